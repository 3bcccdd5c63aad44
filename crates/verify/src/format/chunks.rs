//! Format 2's chunked payload (issue 13): the chunk list that binds each chunk of the
//! compressed payload by its size and SHA-256, the reader that checks every chunk against it
//! just before handing it on, and the list's writer.
//!
//! Format 1 bound the payload by one SHA-256 of the whole, so a verifier had to read and hash
//! all of it before the decoder could see a byte: two passes, one after the other. Here the
//! manifest binds the chunk list by its SHA-256, the list binds each chunk, and the reader
//! below hashes chunk `i + 1` on its own thread while the decoder works on chunk `i`. The
//! decoder still sees only bytes a signed digest vouched for.
//!
//! A chunk is one zstd frame holding `chunk_bytes` of the inner tar (the last one the rest),
//! compressed on its own. So the number of chunks follows from the signed manifest alone
//! (the inner tar's length), a writer knows the list's length before it compresses anything,
//! each chunk decodes into a buffer of its own known size (the decoder keeps no window beyond
//! it), and chunks could be decoded side by side. The frames together are one ordinary zstd
//! stream that `zstd -d` reads. The same list lets a download be checked chunk by chunk as it
//! arrives, and resumed after the last chunk that checked.

use std::fs::File;
use std::io::{self, Read};
use std::sync::mpsc::{Receiver, Sender, SyncSender, channel, sync_channel};
use std::thread::Scope;

use crate::error::{Error, ErrorKind, Result};
use crate::format::digest::{Digest, Hasher};
use crate::format::manifest::Manifest;
use crate::format::{entry, limit};

/// The bytes of one record in the chunk list: the chunk's compressed size (4 bytes,
/// little-endian) and its SHA-256 (32 bytes).
pub const RECORD_BYTES: usize = 36;

/// Checked chunks queued ahead of the release tools' check ([`check_all`]).
const CHUNKS_IN_FLIGHT: usize = 1;

/// The most compressed bytes one chunk of `len` bytes may take: zstd's worst case for
/// incompressible data is well under 1/128 more plus a frame header and checksum (RFC 8878
/// section 3.1.1.2; `ZSTD_compressBound` in the reference library gives less).
pub fn max_compressed(len: u64) -> u64 {
    len + len / 128 + 1024
}

/// One chunk: its compressed size and the SHA-256 of its compressed bytes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Record {
    /// The chunk's compressed size in bytes.
    pub size: u32,
    /// The SHA-256 of the chunk's compressed bytes.
    pub sha256: Digest,
}

impl Record {
    /// The record's 36 bytes as the list stores them.
    pub fn to_bytes(self) -> [u8; RECORD_BYTES] {
        let mut out = [0u8; RECORD_BYTES];
        out[..4].copy_from_slice(&self.size.to_le_bytes());
        out[4..].copy_from_slice(self.sha256.as_bytes());
        out
    }

    fn parse(bytes: &[u8]) -> Record {
        let size = u32::from_le_bytes(bytes[..4].try_into().expect("a record has 4 size bytes"));
        let digest: [u8; 32] = bytes[4..].try_into().expect("a record has 32 digest bytes");
        Record {
            size,
            sha256: Digest::from_bytes(digest),
        }
    }
}

/// Where a payload's chunks are, what they must hash to, and what each decodes to.
#[derive(Debug, Clone)]
pub struct Plan {
    /// The inner tar's length: what all chunks decode to together.
    pub tar_len: u64,
    /// The decoded size of every chunk but the last.
    pub chunk_bytes: u64,
    /// Each chunk's record, in order.
    pub records: Vec<Record>,
}

impl Plan {
    /// The plan of a format 2 bundle: checks its chunk list against the manifest. The list
    /// must hold whole records, exactly as many as the inner tar's length and `chunk_bytes`
    /// make, each chunk at most [`max_compressed`] of what it decodes to, the sizes adding up
    /// to the payload's, and the whole list must have the SHA-256 the manifest declares.
    /// Nothing of the payload is read.
    pub fn new(list: &[u8], manifest: &Manifest) -> Result<Plan> {
        let payload = &manifest.payload;
        let (Some(count), Some(chunk_bytes), Some(declared)) = (
            manifest.chunk_count(),
            payload.chunk_bytes,
            payload.chunks_sha256,
        ) else {
            return Err(Error::new(
                ErrorKind::Malformed,
                format!(
                    "bundle has a '{}' entry, but its format {} manifest binds the payload by \
                     one digest",
                    entry::CHUNKS,
                    manifest.format
                ),
            ));
        };
        if !list.len().is_multiple_of(RECORD_BYTES) {
            return Err(Error::new(
                ErrorKind::Malformed,
                format!(
                    "bundle entry '{}' is {} bytes, not a whole number of {RECORD_BYTES}-byte \
                     records: the chunk list is truncated or damaged",
                    entry::CHUNKS,
                    list.len()
                ),
            ));
        }
        let listed = (list.len() / RECORD_BYTES) as u64;
        if listed != count {
            return Err(Error::new(
                ErrorKind::Malformed,
                format!(
                    "bundle entry '{}' lists {listed} chunks, but the manifest's files make an \
                     inner tar of {} bytes, which needs {count} in chunks of {chunk_bytes} bytes",
                    entry::CHUNKS,
                    manifest.unpacked_tar_len()
                ),
            ));
        }
        let plan = Plan {
            tar_len: manifest.unpacked_tar_len(),
            chunk_bytes: u64::from(chunk_bytes),
            records: list.chunks_exact(RECORD_BYTES).map(Record::parse).collect(),
        };
        let mut total = 0u64;
        for (index, record) in plan.records.iter().enumerate() {
            let cap = max_compressed(plan.len_of(index) as u64);
            if record.size == 0 || u64::from(record.size) > cap {
                return Err(Error::new(
                    ErrorKind::Malformed,
                    format!(
                        "bundle entry '{}' gives chunk {index} {} compressed bytes, outside 1 to \
                         {cap} for a chunk of {} bytes",
                        entry::CHUNKS,
                        record.size,
                        plan.len_of(index)
                    ),
                ));
            }
            total += u64::from(record.size);
        }
        if total != payload.size {
            return Err(Error::new(
                ErrorKind::Malformed,
                format!(
                    "bundle entry '{}' lists chunks of {total} bytes in all, but the manifest \
                     declares a payload of {} bytes: the chunk sizes do not add up",
                    entry::CHUNKS,
                    payload.size
                ),
            ));
        }
        let found = Digest::of(list);
        if found != declared {
            return Err(Error::new(
                ErrorKind::Digest,
                format!(
                    "chunk list digest mismatch: manifest declares chunks_sha256 {declared}, \
                     the bundle's '{}' holds {found}",
                    entry::CHUNKS
                ),
            ));
        }
        Ok(plan)
    }

    /// The decoded length of chunk `index`.
    pub fn len_of(&self, index: usize) -> usize {
        let start = index as u64 * self.chunk_bytes;
        // At most chunk_bytes, which is at most 4 MiB.
        self.tar_len.saturating_sub(start).min(self.chunk_bytes) as usize
    }
}

/// The chunk size a writer uses for an inner tar of `tar_len` bytes: 512 KiB, or the smallest
/// larger power of two that keeps the list within [`limit::CHUNKS`] records (1 MiB from 2 GiB
/// on). `None` when even the largest chunk size would need more. A reader holds about ten
/// chunks at a time, so the size bounds its memory; 512 KiB keeps a verifier within 16 MiB
/// and costs no measurable compression on weights (BENCHMARKS.md).
pub fn writer_chunk_bytes(tar_len: u64) -> Option<u32> {
    (19..=limit::CHUNK_LOG_MAX)
        .map(|log| 1u32 << log)
        .find(|&chunk| tar_len.div_ceil(u64::from(chunk)) <= limit::CHUNKS)
}

/// Builds a chunk list as the compressed chunks are written, in order.
#[derive(Debug, Default)]
pub struct ListWriter {
    list: Vec<u8>,
    total: u64,
}

impl ListWriter {
    /// Records the next chunk's compressed bytes.
    pub fn push(&mut self, compressed: &[u8]) {
        let size = u32::try_from(compressed.len()).expect("a chunk's frame is at most 4 MiB");
        let record = Record {
            size,
            sha256: Digest::of(compressed),
        };
        self.list.extend_from_slice(&record.to_bytes());
        self.total += compressed.len() as u64;
    }

    /// The payload's size so far: the compressed chunks' sizes added up.
    pub fn payload_len(&self) -> u64 {
        self.total
    }

    /// The list's bytes (the `chunks.sha256` entry).
    pub fn finish(self) -> Vec<u8> {
        self.list
    }
}

/// Starts reading `file` (positioned at the payload's first byte) on a thread of `scope`:
/// each chunk is read, hashed, and handed on only once its SHA-256 equals its record's, chunk
/// `i` to `outputs[i % outputs.len()]`. A chunk that differs, or a file that ends early, ends
/// the stream with an error that says which chunk. Returns where the consumers hand each
/// chunk's buffer back for reuse.
pub(crate) fn spawn_checker<'scope>(
    scope: &'scope Scope<'scope, '_>,
    file: File,
    plan: &Plan,
    outputs: Vec<SyncSender<Result<Vec<u8>>>>,
) -> Sender<Vec<u8>> {
    let (spent, reuse) = channel();
    let records = plan.records.clone();
    scope.spawn(move || check_chunks(file, &records, &outputs, &reuse));
    spent
}

/// Reads, hashes and checks every chunk in order, sending each one on, until the end, the
/// first error, or a consumer leaving.
fn check_chunks(
    mut file: File,
    records: &[Record],
    outputs: &[SyncSender<Result<Vec<u8>>>],
    reuse: &Receiver<Vec<u8>>,
) {
    let mut start = 0u64;
    for (index, record) in records.iter().enumerate() {
        let mut buf = reuse.try_recv().unwrap_or_default();
        buf.resize(record.size as usize, 0);
        let end = start + u64::from(record.size);
        let checked = read_chunk(&mut file, &mut buf, start).and_then(|()| {
            let found = Digest::of(&buf);
            if found == record.sha256 {
                Ok(buf)
            } else {
                Err(Error::new(
                    ErrorKind::Digest,
                    format!(
                        "payload chunk {index} (bytes {start} to {end}) has sha256 {found}, but \
                         the chunk list declares {}; the bundle is damaged or was altered",
                        record.sha256
                    ),
                ))
            }
        });
        let stop = checked.is_err();
        if outputs[index % outputs.len()].send(checked).is_err() || stop {
            return;
        }
        start = end;
    }
}

fn read_chunk(file: &mut File, buf: &mut [u8], start: u64) -> Result<()> {
    let mut filled = 0;
    while filled < buf.len() {
        match file.read(&mut buf[filled..]) {
            Ok(0) => {
                return Err(Error::new(
                    ErrorKind::Malformed,
                    format!(
                        "payload is truncated: it ends after {} bytes, inside a chunk",
                        start + filled as u64
                    ),
                ));
            }
            Ok(n) => filled += n,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
            Err(e) => return Err(Error::io("cannot read the payload", e)),
        }
    }
    Ok(())
}

/// A bundle file's chunks where they lie in the file, fed with the file's bytes in order as a
/// download writes them (or as a kept partial download is read again): each chunk is checked
/// against its record once its last byte has arrived. A download then keeps every chunk that
/// checked and fetches again from the first one that did not, instead of starting over, and
/// a wrong byte is caught one chunk after it arrives instead of at the end.
///
/// The watch proves chunks only. The head before the payload was checked before the payload
/// was asked for, and the whole file's SHA-256 against the feed's is still checked at the
/// end; the install reads the file again and checks every chunk just before decoding it,
/// since the file sits in a directory others may write between the two.
#[derive(Clone)]
pub(crate) struct Watch {
    /// The payload's offset in the file: the first chunk's first byte.
    payload_offset: u64,
    records: std::sync::Arc<[Record]>,
    /// The chunk being filled, its first byte's offset in the file, and its bytes so far.
    next: usize,
    start: u64,
    hasher: Hasher,
    /// The file's bytes seen so far.
    seen: u64,
}

/// A chunk whose bytes do not hash to its record.
#[derive(Debug, Clone)]
pub(crate) struct BadChunk {
    /// The chunk's index and where it lies in the file.
    pub index: usize,
    pub start: u64,
    pub end: u64,
    /// What its bytes hash to, and what the list declares.
    pub found: Digest,
    pub declared: Digest,
}

impl std::fmt::Display for BadChunk {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "payload chunk {} (bytes {} to {} of the file) has SHA-256 {}, but the bundle's \
             signed chunk list declares {}",
            self.index, self.start, self.end, self.found, self.declared
        )
    }
}

impl std::fmt::Debug for Watch {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Watch")
            .field("chunks", &self.records.len())
            .field("checked", &self.next)
            .field("seen", &self.seen)
            .finish_non_exhaustive()
    }
}

impl Watch {
    /// A watch over the chunks of `plan`, whose payload starts at `payload_offset` in the
    /// file, with nothing seen yet.
    pub(crate) fn new(payload_offset: u64, plan: &Plan) -> Watch {
        Watch {
            payload_offset,
            records: plan.records.clone().into(),
            next: 0,
            start: payload_offset,
            hasher: Hasher::new(),
            seen: 0,
        }
    }

    /// The same watch with nothing seen: for reading the file again from its start (the
    /// `fetch` driver's resume).
    #[cfg_attr(not(feature = "fetch"), allow(dead_code))]
    pub(crate) fn restart(&self) -> Watch {
        Watch {
            records: self.records.clone(),
            next: 0,
            start: self.payload_offset,
            hasher: Hasher::new(),
            seen: 0,
            ..*self
        }
    }

    /// Takes the file's next bytes. Stops at the first chunk whose bytes do not hash to its
    /// record: the watch then stands at that chunk's first byte, as the file does once cut
    /// back to [`Watch::good_len`], ready for the chunk's bytes fetched again.
    pub(crate) fn feed(&mut self, mut data: &[u8]) -> std::result::Result<(), BadChunk> {
        if self.seen < self.payload_offset {
            let skip = (self.payload_offset - self.seen).min(data.len() as u64) as usize;
            self.seen += skip as u64;
            data = &data[skip..];
        }
        while !data.is_empty() {
            let Some(record) = self.records.get(self.next) else {
                // Past the last chunk: the tar's padding and end blocks, which the whole
                // file's digest covers.
                self.seen += data.len() as u64;
                return Ok(());
            };
            let end = self.start + u64::from(record.size);
            let take = (end - self.seen).min(data.len() as u64) as usize;
            self.hasher.update(&data[..take]);
            self.seen += take as u64;
            data = &data[take..];
            if self.seen == end {
                let hasher = std::mem::take(&mut self.hasher);
                let found = hasher.finish();
                if found != record.sha256 {
                    self.seen = self.start;
                    return Err(self.bad(found));
                }
                self.next += 1;
                self.start = end;
            }
        }
        Ok(())
    }

    fn bad(&self, found: Digest) -> BadChunk {
        let record = self.records[self.next];
        BadChunk {
            index: self.next,
            start: self.start,
            end: self.start + u64::from(record.size),
            found,
            declared: record.sha256,
        }
    }

    /// The end of the last chunk that checked (the payload's offset when none did yet): the
    /// longest prefix of the file this watch vouches for, beside the head checked before.
    pub(crate) fn good_len(&self) -> u64 {
        self.start
    }

    /// How many chunks checked.
    pub(crate) fn checked(&self) -> usize {
        self.next
    }
}

/// Hashes every chunk of a payload against its record without decoding anything: the release
/// tools' check of a format 2 bundle they only look at (`inspect`, `sign`).
pub(crate) fn check_all(file: File, plan: &Plan) -> Result<()> {
    std::thread::scope(|scope| {
        let (output, checked) = sync_channel(CHUNKS_IN_FLIGHT);
        let returned = spawn_checker(scope, file, plan, vec![output]);
        for chunk in checked {
            let _ = returned.send(chunk?);
        }
        Ok(())
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_chunk_decodes_to_chunk_bytes_but_the_last() {
        let plan = Plan {
            tar_len: 5,
            chunk_bytes: 2,
            records: Vec::new(),
        };
        assert_eq!((plan.len_of(0), plan.len_of(1), plan.len_of(2)), (2, 2, 1));
    }

    #[test]
    fn a_record_is_its_size_then_its_digest() {
        let record = Record {
            size: 0x0102_0304,
            sha256: Digest::of(b"abc"),
        };
        let bytes = record.to_bytes();
        assert_eq!(bytes[..4], [4, 3, 2, 1]);
        // FIPS 180-4, appendix B.1 (and NIST's published example): SHA-256("abc").
        assert_eq!(
            hex::encode(&bytes[4..]),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
        assert_eq!(Record::parse(&bytes), record);
    }

    #[test]
    fn the_writer_keeps_the_list_within_its_cap() {
        assert_eq!(writer_chunk_bytes(88 << 20), Some(512 << 10));
        assert_eq!(writer_chunk_bytes(2048 << 20), Some(512 << 10));
        assert_eq!(writer_chunk_bytes((2048 << 20) + 1), Some(1 << 20));
        assert_eq!(writer_chunk_bytes((4096 << 20) + 1), Some(2 << 20));
        assert_eq!(
            writer_chunk_bytes(limit::CHUNKS << limit::CHUNK_LOG_MAX),
            Some(4 << 20)
        );
        assert_eq!(
            writer_chunk_bytes((limit::CHUNKS << limit::CHUNK_LOG_MAX) + 1),
            None
        );
    }

    /// A file of a 5-byte head, three chunks of 4, 3 and 5 bytes, and a 2-byte tail, with a
    /// watch over it. The digests are the `sha2` crate's, checked against FIPS 180-4 above.
    fn file_and_watch() -> (Vec<u8>, Watch) {
        let chunks: [&[u8]; 3] = [b"abcd", b"efg", b"hijkl"];
        let records = chunks
            .iter()
            .map(|c| Record {
                size: c.len() as u32,
                sha256: Digest::of(c),
            })
            .collect();
        let plan = Plan {
            tar_len: 12,
            chunk_bytes: 4,
            records,
        };
        let mut file = b"HEAD:".to_vec();
        file.extend(chunks.concat());
        file.extend(b"..");
        (file, Watch::new(5, &plan))
    }

    #[test]
    fn a_watch_checks_each_chunk_however_the_bytes_arrive() {
        let (file, watch) = file_and_watch();
        for split in 1..file.len() {
            let mut w = watch.restart();
            for part in file.chunks(split) {
                assert!(w.feed(part).is_ok(), "split {split}");
            }
            assert_eq!((w.checked(), w.good_len()), (3, 17), "split {split}");
        }
        // Before its last byte a chunk is not vouched for.
        let mut w = watch.restart();
        w.feed(&file[..11]).expect("the first chunk checks");
        assert_eq!((w.checked(), w.good_len()), (1, 9));
    }

    #[test]
    fn a_watch_stops_at_the_first_wrong_chunk_and_goes_on_from_its_start() {
        let (mut file, watch) = file_and_watch();
        // The head and the tail are not the watch's: the feed's digest covers them.
        file[0] ^= 1;
        file[18] ^= 1;
        let mut w = watch.restart();
        assert!(w.feed(&file).is_ok());
        file[0] ^= 1;
        file[18] ^= 1;
        // A wrong byte in the second chunk.
        let mut damaged = file.clone();
        damaged[10] ^= 0x20;
        let mut w = watch.restart();
        let bad = w.feed(&damaged).expect_err("the second chunk differs");
        assert_eq!((bad.index, bad.start, bad.end), (1, 9, 12));
        assert_eq!(bad.declared, Digest::of(b"efg"));
        assert_eq!(bad.found, Digest::of(b"eFg"));
        assert_eq!((w.checked(), w.good_len()), (1, 9));
        // Cut back to its good length, the file goes on with the right bytes.
        assert!(w.feed(&file[9..]).is_ok());
        assert_eq!((w.checked(), w.good_len()), (3, 17));
        assert!(
            bad.to_string()
                .starts_with("payload chunk 1 (bytes 9 to 12 of the file)")
        );
    }
}
