//! The outer layout of a bundle file: where the manifest, the signatures and the payload are,
//! read with every size capped, and the writer that lays them out.
//!
//! Reading the layout authenticates nothing; it finds the pieces so that the signature can be
//! checked before anything large is read or parsed.

use std::fs::File;
use std::io::{self, BufRead, Read, Seek, SeekFrom, Write};

use crate::format::digest::Hasher;
use crate::error::{Error, ErrorKind, Result};
use crate::format::{entry, limit};
use crate::format::manifest::Manifest;
use crate::readahead::ReadAhead;
use crate::format::tar;
use crate::progress::{Progress, ProgressFn, Stage};

const ARCHIVE: &str = "bundle";

/// Where the pieces of a bundle file are.
#[derive(Debug, Clone)]
pub struct Layout {
    /// The manifest's exact bytes, as signed.
    pub manifest: Vec<u8>,
    /// The signatures document's bytes.
    pub signatures: Vec<u8>,
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
pub fn read_head<R: Read>(reader: &mut R) -> Result<Head> {
    let order = &entry::OUTER;
    let size = tar::expect_entry(reader, ARCHIVE, order, 0)?;
    let manifest = read_small(reader, ARCHIVE, entry::MANIFEST, size, limit::MANIFEST_BYTES)?;
    let size = tar::expect_entry(reader, ARCHIVE, order, 1)?;
    let signatures = read_small(reader, ARCHIVE, entry::SIGNATURES, size, limit::SIGNATURES_BYTES)?;
    let payload_len = tar::expect_entry(reader, ARCHIVE, order, 2)?;
    let payload_offset = payload_offset(manifest.len() as u64, signatures.len() as u64);
    Ok(Head {
        manifest,
        signatures,
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
        payload_offset,
        payload_len,
        file_len,
    })
}

/// Where the payload's bytes start in a bundle whose manifest and signatures documents are
/// `manifest_len` and `signatures_len` bytes long.
pub fn payload_offset(manifest_len: u64, signatures_len: u64) -> u64 {
    tar::entry_len(manifest_len) + tar::entry_len(signatures_len) + tar::BLOCK
}

/// Writes everything before the payload's bytes: the manifest and signatures entries and the
/// payload's header, [`payload_offset`] bytes in all, with headers stamped `mtime`.
pub fn write_head<W: Write>(
    out: &mut W,
    mtime: u64,
    manifest: &[u8],
    signatures: &[u8],
    payload_len: u64,
) -> io::Result<()> {
    let zeros = [0u8; 512];
    for (name, data) in [(entry::MANIFEST, manifest), (entry::SIGNATURES, signatures)] {
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

/// Writes a bundle: the three entries in order with headers stamped `mtime`, zero padding,
/// and the end-of-archive marker. `payload` must yield exactly `payload_len` bytes.
pub fn write_bundle<W: Write, R: Read>(
    out: &mut W,
    mtime: u64,
    manifest: &[u8],
    signatures: &[u8],
    payload: &mut R,
    payload_len: u64,
) -> io::Result<()> {
    write_head(out, mtime, manifest, signatures, payload_len)?;
    let copied = io::copy(&mut payload.take(payload_len), out)?;
    if copied != payload_len {
        return Err(io::Error::new(
            io::ErrorKind::UnexpectedEof,
            format!("payload ended after {copied} of {payload_len} bytes"),
        ));
    }
    write_tail(out, payload_len)
}

/// Streams the compressed payload through SHA-256, reading exactly the size the manifest
/// declares, and compares it with the manifest's digest. The reads run on a thread of their
/// own, so this pass takes as long as the hashing alone.
pub fn check_payload(
    file: &mut File,
    layout: &Layout,
    manifest: &Manifest,
    progress: Option<&ProgressFn>,
) -> Result<()> {
    let declared = &manifest.payload;
    if layout.payload_len != declared.size {
        return Err(Error::new(
            ErrorKind::Digest,
            format!(
                "payload is {} bytes but the manifest declares {} bytes",
                layout.payload_len, declared.size
            ),
        ));
    }
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
    if found != declared.sha256 {
        return Err(Error::new(
            ErrorKind::Digest,
            format!(
                "payload digest mismatch: manifest declares sha256 {}, the bundle holds {found}",
                declared.sha256
            ),
        ));
    }
    Ok(())
}
