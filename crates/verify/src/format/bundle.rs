//! The outer layout of a bundle file: where the manifest, the signatures and the payload are,
//! read with every size capped, and the writer that lays them out.
//!
//! Reading the layout authenticates nothing; it finds the pieces so that the signature can be
//! checked before anything large is read or parsed.

use std::fs::File;
use std::io::{self, BufRead, Read, Seek, SeekFrom, Write};

use crate::error::{Error, ErrorKind, Result};
use crate::format::chunks;
use crate::format::digest::Hasher;
use crate::format::manifest::Manifest;
use crate::format::tar;
use crate::format::{entry, limit};
use crate::progress::{Progress, ProgressFn, Stage};
use crate::readahead::ReadAhead;

const ARCHIVE: &str = "bundle";

/// Where the pieces of a bundle file are.
#[derive(Debug, Clone)]
pub struct Layout {
    /// The manifest's exact bytes, as signed.
    pub manifest: Vec<u8>,
    /// The signatures document's bytes.
    pub signatures: Vec<u8>,
    /// The chunk list's bytes (format 2); `None` in a format 1 bundle, which has no such entry.
    pub chunks: Option<Vec<u8>>,
    /// The payload's offset in the file.
    pub payload_offset: u64,
    /// The payload's size in bytes.
    pub payload_len: u64,
    /// The bundle file's size.
    pub file_len: u64,
}

/// Reads a small entry's data after its header, refusing it if it is over `cap`. `archive`
/// names the archive in messages ("bundle", "delta").
pub(crate) fn read_small<R: Read>(
    reader: &mut R,
    archive: &str,
    name: &str,
    size: u64,
    cap: u64,
) -> Result<Vec<u8>> {
    if size > cap {
        return Err(Error::new(
            ErrorKind::TooLarge,
            format!("{archive} entry '{name}' is {size} bytes, over the limit of {cap} bytes"),
        ));
    }
    let mut data = vec![0u8; size as usize];
    tar::read_exact_or_truncated(reader, &mut data, || format!("{archive} entry '{name}'"))?;
    tar::read_padding(reader, size, archive, name)?;
    Ok(data)
}

/// A bundle's head: everything before the payload's bytes, at most [`limit::HEAD_BYTES`].
#[derive(Debug, Clone)]
pub struct Head {
    /// The manifest's exact bytes, as signed.
    pub manifest: Vec<u8>,
    /// The signatures document's bytes.
    pub signatures: Vec<u8>,
    /// The chunk list's bytes (format 2); `None` in a format 1 bundle.
    pub chunks: Option<Vec<u8>>,
    /// The payload's offset in the file.
    pub payload_offset: u64,
    /// The payload's size in bytes, as its tar header states it.
    pub payload_len: u64,
}

impl Head {
    /// The whole bundle's exact length: the head, the payload and its padding, and the
    /// end-of-archive blocks. Once the manifest's signatures are checked and its payload size
    /// equals [`Head::payload_len`], this is a length the bundle signers fixed.
    pub fn bundle_len(&self) -> Option<u64> {
        self.payload_offset
            .checked_add(self.payload_len)?
            .checked_add(tar::padding(self.payload_len))?
            .checked_add(tar::END_OF_ARCHIVE.len() as u64)
    }
}

/// Reads a bundle's head from the start of `reader`: the fixed entry order, the headers, the
/// caps on the small entries and their padding, and the payload's header. Nothing after it
/// is read, so the head of a bundle still downloading can be checked.
///
/// Both layouts are read: format 2's four entries, and format 1's three (no chunk list). The
/// layout alone proves nothing: the signed manifest's format must then agree with it
/// ([`check_before_decoding`]).
pub fn read_head<R: Read>(reader: &mut R) -> Result<Head> {
    let order = &entry::OUTER;
    let size = tar::expect_entry(reader, ARCHIVE, order, 0)?;
    let manifest = read_small(
        reader,
        ARCHIVE,
        entry::MANIFEST,
        size,
        limit::MANIFEST_BYTES,
    )?;
    let size = tar::expect_entry(reader, ARCHIVE, order, 1)?;
    let signatures = read_small(
        reader,
        ARCHIVE,
        entry::SIGNATURES,
        size,
        limit::SIGNATURES_BYTES,
    )?;
    // The third entry is the chunk list in format 2, the payload in format 1; a bundle that
    // ends there misses its payload in both.
    let (name, size) = tar::next_entry(reader, ARCHIVE, &entry::OUTER_FORMAT_1, 2)?;
    let (chunks, payload_len) = if name == entry::CHUNKS {
        let chunks = read_small(
            reader,
            ARCHIVE,
            entry::CHUNKS,
            size,
            limit::CHUNK_LIST_BYTES,
        )?;
        (Some(chunks), tar::expect_entry(reader, ARCHIVE, order, 3)?)
    } else {
        (
            None,
            tar::check_entry(name, size, ARCHIVE, &entry::OUTER_FORMAT_1, 2)?,
        )
    };
    let payload_offset = payload_offset(
        manifest.len() as u64,
        signatures.len() as u64,
        chunks.as_ref().map(|c| c.len() as u64),
    );
    Ok(Head {
        manifest,
        signatures,
        chunks,
        payload_offset,
        payload_len,
    })
}

/// Reads the layout of an open bundle file of `file_len` bytes, checking the fixed entry
/// order, every header, the caps on the small entries, the padding and that nothing follows
/// the end-of-archive marker. The payload itself is not read.
pub fn read_layout(file: &mut File, file_len: u64) -> Result<Layout> {
    file.seek(SeekFrom::Start(0))
        .map_err(|e| Error::io("cannot read the bundle", e))?;
    let mut reader = io::BufReader::with_capacity(8 * 1024, &mut *file);
    let Head {
        manifest,
        signatures,
        chunks,
        payload_offset,
        payload_len,
    } = read_head(&mut reader)?;
    drop(reader);
    let needed = payload_offset
        .checked_add(payload_len + tar::padding(payload_len))
        .and_then(|n| n.checked_add(tar::END_OF_ARCHIVE.len() as u64));
    match needed {
        Some(needed) if needed <= file_len => {}
        _ => {
            return Err(Error::new(
                ErrorKind::Malformed,
                format!(
                    "{ARCHIVE} is truncated: entry '{}' declares {payload_len} bytes but the file has \
                     only {} bytes after its header",
                    entry::PAYLOAD,
                    file_len.saturating_sub(payload_offset)
                ),
            ));
        }
    }
    file.seek(SeekFrom::Start(payload_offset + payload_len))
        .map_err(|e| Error::io("cannot read the bundle", e))?;
    let mut tail = io::BufReader::with_capacity(4 * 1024, &mut *file);
    tar::read_padding(&mut tail, payload_len, ARCHIVE, entry::PAYLOAD)?;
    tar::read_end(&mut tail, ARCHIVE)?;
    Ok(Layout {
        manifest,
        signatures,
        chunks,
        payload_offset,
        payload_len,
        file_len,
    })
}

/// Where the payload's bytes start in a bundle whose manifest, signatures and chunk list
/// (`None` in format 1) are this many bytes long.
pub fn payload_offset(manifest_len: u64, signatures_len: u64, chunks_len: Option<u64>) -> u64 {
    tar::entry_len(manifest_len)
        + tar::entry_len(signatures_len)
        + chunks_len.map_or(0, tar::entry_len)
        + tar::BLOCK
}

/// Writes everything before the payload's bytes: the manifest, signatures and chunk list
/// (when given: format 2) entries and the payload's header, [`payload_offset`] bytes in all,
/// with headers stamped `mtime`.
pub fn write_head<W: Write>(
    out: &mut W,
    mtime: u64,
    manifest: &[u8],
    signatures: &[u8],
    chunks: Option<&[u8]>,
    payload_len: u64,
) -> io::Result<()> {
    let zeros = [0u8; 512];
    let small = [
        Some((entry::MANIFEST, manifest)),
        Some((entry::SIGNATURES, signatures)),
        chunks.map(|c| (entry::CHUNKS, c)),
    ];
    for (name, data) in small.into_iter().flatten() {
        out.write_all(&tar::header(name, data.len() as u64, mtime))?;
        out.write_all(data)?;
        out.write_all(&zeros[..tar::padding(data.len() as u64) as usize])?;
    }
    out.write_all(&tar::header(entry::PAYLOAD, payload_len, mtime))
}

/// Writes everything after the payload's `payload_len` bytes: its padding and the
/// end-of-archive marker.
pub fn write_tail<W: Write>(out: &mut W, payload_len: u64) -> io::Result<()> {
    out.write_all(&[0u8; 512][..tar::padding(payload_len) as usize])?;
    out.write_all(&tar::END_OF_ARCHIVE)
}

/// Writes a bundle: the entries in order with headers stamped `mtime` (the chunk list only
/// when given: format 2), zero padding, and the end-of-archive marker. `payload` must yield
/// exactly `payload_len` bytes.
pub fn write_bundle<W: Write, R: Read>(
    out: &mut W,
    mtime: u64,
    (manifest, signatures, chunks): (&[u8], &[u8], Option<&[u8]>),
    payload: &mut R,
    payload_len: u64,
) -> io::Result<()> {
    write_head(out, mtime, manifest, signatures, chunks, payload_len)?;
    let copied = io::copy(&mut payload.take(payload_len), out)?;
    if copied != payload_len {
        return Err(io::Error::new(
            io::ErrorKind::UnexpectedEof,
            format!("payload ended after {copied} of {payload_len} bytes"),
        ));
    }
    write_tail(out, payload_len)
}

/// A format 2 payload made in memory, for tests and tools that build small bundles: the inner
/// tar cut into `chunk_bytes` chunks, each compressed at zstd `level` as a frame of its own
/// that states its content size (no checksum, as pack writes them). Returns the payload and
/// its chunk list.
pub fn chunked_payload(
    inner_tar: &[u8],
    chunk_bytes: u32,
    level: i32,
) -> io::Result<(Vec<u8>, Vec<u8>)> {
    let mut payload = Vec::new();
    let mut list = chunks::ListWriter::default();
    let mut compressor = zstd::bulk::Compressor::new(level)?;
    compressor.set_parameter(zstd::zstd_safe::CParameter::ChecksumFlag(false))?;
    compressor.set_parameter(zstd::zstd_safe::CParameter::ContentSizeFlag(true))?;
    for chunk in inner_tar.chunks(chunk_bytes as usize) {
        let frame = compressor.compress(chunk)?;
        list.push(&frame);
        payload.extend_from_slice(&frame);
    }
    Ok((payload, list.finish()))
}

/// The checks that must pass before any payload byte is decoded. The payload's size must be
/// the manifest's, and the layout the manifest's format: a chunk list in format 2, none in
/// format 1. In format 2 the chunk list must match the manifest; each chunk is then checked
/// as it is read for decoding (`chunks::spawn_checker`), so nothing of the payload is read
/// here. In format 1 the whole payload is hashed now, as [`check_payload`] does.
pub fn check_before_decoding(
    file: &mut File,
    layout: &Layout,
    manifest: &Manifest,
    progress: Option<&ProgressFn>,
) -> Result<()> {
    check_binding(layout.payload_len, layout.chunks.as_deref(), manifest)?;
    match &layout.chunks {
        Some(_) => Ok(()),
        None => hash_whole(file, layout, manifest, progress),
    }
}

/// Checks every byte of the payload against what the manifest binds, without decoding: the
/// whole payload's SHA-256 in format 1, every chunk's (and the chunk list's) in format 2.
pub fn check_payload(
    file: &mut File,
    layout: &Layout,
    manifest: &Manifest,
    progress: Option<&ProgressFn>,
) -> Result<()> {
    check_binding(layout.payload_len, layout.chunks.as_deref(), manifest)?;
    match &layout.chunks {
        Some(list) => {
            let plan = chunks::Plan::new(list, manifest)?;
            file.seek(SeekFrom::Start(layout.payload_offset))
                .map_err(|e| Error::io("cannot read the payload", e))?;
            let file = file
                .try_clone()
                .map_err(|e| Error::io("cannot read the payload", e))?;
            chunks::check_all(file, &plan)
        }
        None => hash_whole(file, layout, manifest, progress),
    }
}

/// The small checks of what binds the payload, before any of its bytes is read: the payload
/// entry's size (`payload_len`, from its tar header) against the manifest's, and the layout
/// against the manifest's format: in format 2 a chunk list that [`chunks::Plan::new`]
/// accepts, in format 1 none.
pub(crate) fn check_binding(
    payload_len: u64,
    chunk_list: Option<&[u8]>,
    manifest: &Manifest,
) -> Result<()> {
    let declared = &manifest.payload;
    if payload_len != declared.size {
        return Err(Error::new(
            ErrorKind::Digest,
            format!(
                "payload is {payload_len} bytes but the manifest declares {} bytes",
                declared.size
            ),
        ));
    }
    match chunk_list {
        Some(list) => chunks::Plan::new(list, manifest).map(|_| ()),
        None if declared.chunks_sha256.is_some() => Err(missing_list(manifest)),
        None => Ok(()),
    }
}

fn missing_list(manifest: &Manifest) -> Error {
    Error::new(
        ErrorKind::Malformed,
        format!(
            "bundle has no '{}' entry, which its format {} manifest requires before '{}'",
            entry::CHUNKS,
            manifest.format,
            entry::PAYLOAD
        ),
    )
}

/// Streams the compressed payload through SHA-256, reading exactly the size the manifest
/// declares, and compares it with the manifest's digest (format 1). The reads run on a thread
/// of their own, so this pass takes as long as the hashing alone.
fn hash_whole(
    file: &mut File,
    layout: &Layout,
    manifest: &Manifest,
    progress: Option<&ProgressFn>,
) -> Result<()> {
    let declared = &manifest.payload;
    let Some(expected) = declared.sha256 else {
        return Err(missing_list(manifest));
    };
    file.seek(SeekFrom::Start(layout.payload_offset))
        .map_err(|e| Error::io("cannot read the payload", e))?;
    let mut hasher = Hasher::new();
    std::thread::scope(|scope| -> Result<()> {
        let mut input = ReadAhead::spawn(scope, file.take(declared.size));
        loop {
            let chunk = input
                .fill_buf()
                .map_err(|e| Error::io("cannot read the payload", e))?;
            if chunk.is_empty() {
                return Ok(());
            }
            hasher.update(chunk);
            let n = chunk.len();
            input.consume(n);
            if let Some(report) = progress {
                report(Progress {
                    stage: Stage::HashPayload,
                    done: hasher.len(),
                    total: declared.size,
                });
            }
        }
    })?;
    if hasher.len() != declared.size {
        return Err(Error::new(
            ErrorKind::Malformed,
            format!(
                "payload is truncated: read {} of {} bytes",
                hasher.len(),
                declared.size
            ),
        ));
    }
    let found = hasher.finish();
    if found != expected {
        return Err(Error::new(
            ErrorKind::Digest,
            format!(
                "payload digest mismatch: manifest declares sha256 {expected}, the bundle holds {found}"
            ),
        ));
    }
    Ok(())
}
