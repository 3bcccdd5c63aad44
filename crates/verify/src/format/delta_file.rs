//! A delta file (issue 13): its outer layout, its header and its patch records, read with every
//! size capped, and the writer's half of the same definitions.
//!
//! A delta is a way to send a full release, not a release of its own. It is a ustar archive of
//! four regular entries in this order (names and caps in [`crate::format::delta`]):
//!
//! ```text
//! delta.json       the header: the release it rebuilds (name, version) and the base's files
//!                  (path, role, size, SHA-256, as the base manifest lists them), the chunk and
//!                  window sizes applying it needs, the number of records
//! manifest.json    the full release's manifest, byte for byte as the bundle signers signed it
//! signatures.json  the full release's signatures, byte for byte
//! patches.bin      one record per chunk of the rebuilt files, in file order then chunk order
//! ```
//!
//! Nothing in the header or the records is signed: a device trusts only the carried manifest,
//! whose signatures it checks before it reads a single patch byte, and every rebuilt file must
//! have the size and SHA-256 that manifest declares. The header and records can therefore only
//! make a delta fail, never make a device accept other bytes; their caps bound what a failed
//! delta costs.
//!
//! A record is a fixed 24-byte header (little-endian) followed by its patch bytes:
//!
//! ```text
//! 0   u8   op: 1 copy (the chunk is base bytes), 2 zstd (a frame decoded against a window)
//! 1   u8   target file index (manifest order)
//! 2   u8   base file index (header order)
//! 3   u8   0
//! 4   u32  chunk length, 1 to the header's chunk_bytes
//! 8   u64  offset in the base file (of the copied bytes, or of the window)
//! 16  u32  window length (0 for a copy, at most the header's window_bytes)
//! 20  u32  patch length (0 for a copy, at most PATCH_BYTES)
//! ```
//!
//! A zstd record's patch is one Zstandard frame (RFC 8878) made with the window as its
//! reference prefix, with its content size and checksum, that decodes to exactly the chunk.

use std::io::{Read, Write};

use semver::Version;
use serde::{Deserialize, Serialize};

use crate::error::{Error, ErrorKind, Result};
use crate::format::bundle::read_small;
use crate::format::delta::{
    BASE_DOMAIN, CHUNK_BYTES, FORMAT_VERSION, HEADER, HEADER_BYTES, OUTER, PATCH_BYTES, PATCHES,
    RECORD_BYTES, WINDOW_BYTES,
};
use crate::format::digest::{Digest, Hasher};
use crate::format::manifest::{FileEntry, check_name};
use crate::format::{entry, limit, tar};

const ARCHIVE: &str = "delta";

/// The most files a delta's base may list (a format-1 release has two).
const MAX_BASE_FILES: usize = 8;

/// The header entry, `delta.json`: compact JSON in this field order, unknown fields and
/// duplicate keys refused.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Header {
    /// Always [`FORMAT_VERSION`].
    pub format: u32,
    /// The name of the release it rebuilds (the carried manifest's, checked once it is
    /// authenticated).
    pub name: String,
    /// The version of the release it rebuilds (the carried manifest's, checked likewise).
    pub version: Version,
    /// The base release's files, as its manifest lists them: the delta applies only to files
    /// with exactly these sizes and digests.
    pub base: Vec<FileEntry>,
    /// The longest chunk a record rebuilds, at most [`CHUNK_BYTES`].
    pub chunk_bytes: u32,
    /// The longest base window a record refers to, at most [`WINDOW_BYTES`].
    pub window_bytes: u32,
    /// How many records `patches.bin` holds.
    pub records: u64,
}

fn malformed(message: String) -> Error {
    Error::new(ErrorKind::Malformed, message)
}

impl Header {
    /// Parses and checks a header: format, name, base list, and the memory it asks for.
    pub fn from_json(bytes: &[u8]) -> Result<Header> {
        let header: Header = serde_json::from_slice(bytes)
            .map_err(|e| malformed(format!("delta header is not valid: {e}")))?;
        if header.format != FORMAT_VERSION {
            return Err(malformed(format!(
                "delta format {} is not supported (this reader knows format {FORMAT_VERSION}); \
                 use the full bundle",
                header.format
            )));
        }
        check_name(&header.name)?;
        if header.base.is_empty() || header.base.len() > MAX_BASE_FILES {
            return Err(malformed(format!(
                "delta header lists {} base files; 1 to {MAX_BASE_FILES} are allowed",
                header.base.len()
            )));
        }
        let over = |what: &str, asked: u32, cap: u32| {
            Error::new(
                ErrorKind::TooLarge,
                format!(
                    "delta needs {what} of {asked} bytes, over the limit of {cap} bytes a device \
                     gives to applying a delta; use the full bundle"
                ),
            )
        };
        if header.chunk_bytes == 0 || header.chunk_bytes > CHUNK_BYTES {
            return Err(over("chunks", header.chunk_bytes, CHUNK_BYTES));
        }
        if header.window_bytes > WINDOW_BYTES {
            return Err(over("base windows", header.window_bytes, WINDOW_BYTES));
        }
        Ok(header)
    }

    /// The header as the writer stores it: compact JSON.
    pub fn to_json(&self) -> Vec<u8> {
        serde_json::to_vec(self).expect("a header of strings, numbers and digests serializes")
    }

    /// The one digest that names the base ([`base_id`] of its files).
    pub fn base_id(&self) -> Digest {
        base_id(&self.base)
    }
}

/// The one digest that names a base release by its files: SHA-256 over
/// [`BASE_DOMAIN`] followed by one line `<sha256 hex> <size> <path>\n` per file in manifest
/// order. Two releases with the same files have the same id whatever their versions.
pub fn base_id(files: &[FileEntry]) -> Digest {
    let mut hasher = Hasher::new();
    hasher.update(BASE_DOMAIN);
    for file in files {
        hasher.update(format!("{} {} {}\n", file.sha256, file.size, file.path).as_bytes());
    }
    hasher.finish()
}

/// How a record rebuilds its chunk.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Op {
    /// The chunk is the base file's bytes at the offset, unchanged.
    Copy,
    /// The chunk is a zstd frame decoded with the base window as its reference prefix.
    Zstd,
}

/// One patch record's fixed header.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Record {
    /// How the chunk is rebuilt.
    pub op: Op,
    /// The rebuilt file this chunk belongs to (manifest order).
    pub file: u8,
    /// The base file it reads (header order).
    pub base: u8,
    /// The chunk's length.
    pub len: u32,
    /// The offset in the base file of the copied bytes or of the window.
    pub offset: u64,
    /// The window's length (0 for a copy).
    pub window: u32,
    /// The patch's length (0 for a copy).
    pub patch: u32,
}

impl Record {
    /// The record's 24 header bytes.
    pub fn to_bytes(&self) -> [u8; RECORD_BYTES] {
        let mut b = [0u8; RECORD_BYTES];
        b[0] = match self.op {
            Op::Copy => 1,
            Op::Zstd => 2,
        };
        b[1] = self.file;
        b[2] = self.base;
        b[4..8].copy_from_slice(&self.len.to_le_bytes());
        b[8..16].copy_from_slice(&self.offset.to_le_bytes());
        b[16..20].copy_from_slice(&self.window.to_le_bytes());
        b[20..24].copy_from_slice(&self.patch.to_le_bytes());
        b
    }

    /// Reads record number `index` and checks it against the header's caps: a known op,
    /// a base file the header lists, a chunk and window within the declared sizes, a patch
    /// within [`PATCH_BYTES`], and a copy with no window and no patch.
    pub fn parse(b: &[u8; RECORD_BYTES], index: u64, header: &Header) -> Result<Record> {
        let u32_at = |i: usize| u32::from_le_bytes([b[i], b[i + 1], b[i + 2], b[i + 3]]);
        let bad = |why: String| malformed(format!("delta record {index} {why}"));
        let op = match b[0] {
            1 => Op::Copy,
            2 => Op::Zstd,
            other => return Err(bad(format!("has an unknown op {other}"))),
        };
        let record = Record {
            op,
            file: b[1],
            base: b[2],
            len: u32_at(4),
            offset: u64::from_le_bytes(b[8..16].try_into().expect("eight bytes")),
            window: u32_at(16),
            patch: u32_at(20),
        };
        if b[3] != 0 {
            return Err(bad("has a nonzero reserved byte".into()));
        }
        if usize::from(record.base) >= header.base.len() {
            return Err(bad(format!(
                "names base file {}, but the header lists {}",
                record.base,
                header.base.len()
            )));
        }
        if record.len == 0 || record.len > header.chunk_bytes {
            return Err(bad(format!(
                "rebuilds {} bytes; chunks are 1 to {} bytes",
                record.len, header.chunk_bytes
            )));
        }
        if record.window > header.window_bytes || record.patch > PATCH_BYTES {
            return Err(bad(format!(
                "asks for a window of {} bytes and a patch of {} bytes, over {} and {}",
                record.window, record.patch, header.window_bytes, PATCH_BYTES
            )));
        }
        if op == Op::Copy && (record.window != 0 || record.patch != 0) {
            return Err(bad("is a copy with a window or patch".into()));
        }
        if op == Op::Zstd && record.patch == 0 {
            return Err(bad("is a zstd record without a patch".into()));
        }
        Ok(record)
    }
}

/// A delta's head: everything before the patch records' bytes.
#[derive(Debug, Clone)]
pub struct Head {
    /// The parsed header.
    pub header: Header,
    /// The carried manifest's exact bytes, as signed.
    pub manifest: Vec<u8>,
    /// The carried signatures document's bytes.
    pub signatures: Vec<u8>,
    /// The length of `patches.bin`, as its tar header states it.
    pub patches_len: u64,
}

/// Reads a delta's head from the start of `reader`: the fixed entry order, each header, the
/// caps on the small entries and their padding, the header's own checks, and the patches'
/// tar header. No patch byte is read.
pub fn read_head<R: Read>(reader: &mut R) -> Result<Head> {
    let size = tar::expect_entry(reader, ARCHIVE, &OUTER, 0)?;
    let header = read_small(reader, ARCHIVE, HEADER, size, HEADER_BYTES)?;
    let size = tar::expect_entry(reader, ARCHIVE, &OUTER, 1)?;
    let manifest = read_small(
        reader,
        ARCHIVE,
        entry::MANIFEST,
        size,
        limit::MANIFEST_BYTES,
    )?;
    let size = tar::expect_entry(reader, ARCHIVE, &OUTER, 2)?;
    let signatures = read_small(
        reader,
        ARCHIVE,
        entry::SIGNATURES,
        size,
        limit::SIGNATURES_BYTES,
    )?;
    let patches_len = tar::expect_entry(reader, ARCHIVE, &OUTER, 3)?;
    Ok(Head {
        header: Header::from_json(&header)?,
        manifest,
        signatures,
        patches_len,
    })
}

/// Reads the padding after `patches.bin` and the end-of-archive marker, and refuses anything
/// after it.
pub fn read_tail<R: Read>(reader: &mut R, patches_len: u64) -> Result<()> {
    tar::read_padding(reader, patches_len, ARCHIVE, PATCHES)?;
    tar::read_end(reader, ARCHIVE)
}

/// Writes everything before the patch records: the header, manifest and signatures entries
/// and the patches' tar header, stamped `mtime`.
pub fn write_head<W: Write>(
    out: &mut W,
    mtime: u64,
    header: &Header,
    manifest: &[u8],
    signatures: &[u8],
    patches_len: u64,
) -> std::io::Result<()> {
    let zeros = [0u8; 512];
    let header = header.to_json();
    for (name, data) in [
        (HEADER, header.as_slice()),
        (entry::MANIFEST, manifest),
        (entry::SIGNATURES, signatures),
    ] {
        out.write_all(&tar::header(name, data.len() as u64, mtime))?;
        out.write_all(data)?;
        out.write_all(&zeros[..tar::padding(data.len() as u64) as usize])?;
    }
    out.write_all(&tar::header(PATCHES, patches_len, mtime))
}

/// Writes the padding after `patches_len` bytes of records and the end-of-archive marker.
pub fn write_tail<W: Write>(out: &mut W, patches_len: u64) -> std::io::Result<()> {
    crate::format::bundle::write_tail(out, patches_len)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::format::manifest::Role;

    fn header() -> Header {
        Header {
            format: FORMAT_VERSION,
            name: "trailcam-species".into(),
            version: Version::new(1, 1, 0),
            base: vec![FileEntry {
                path: "model.bin".into(),
                role: Role::Model,
                size: 100,
                sha256: Digest::of(b"base"),
            }],
            chunk_bytes: 64,
            window_bytes: 128,
            records: 1,
        }
    }

    fn record() -> Record {
        Record {
            op: Op::Zstd,
            file: 0,
            base: 0,
            len: 64,
            offset: 0,
            window: 100,
            patch: 20,
        }
    }

    #[test]
    fn issue13_records_and_headers_round_trip() {
        let h = header();
        assert_eq!(Header::from_json(&h.to_json()).expect("a header"), h);
        let r = record();
        assert_eq!(Record::parse(&r.to_bytes(), 0, &h).expect("a record"), r);
    }

    #[test]
    fn issue13_records_outside_their_header_are_refused_by_name() {
        let h = header();
        let refused = |edit: &dyn Fn(&mut [u8; RECORD_BYTES])| {
            let mut b = record().to_bytes();
            edit(&mut b);
            Record::parse(&b, 3, &h).expect_err("refused").to_string()
        };
        assert_eq!(refused(&|b| b[0] = 7), "delta record 3 has an unknown op 7");
        assert_eq!(
            refused(&|b| b[3] = 1),
            "delta record 3 has a nonzero reserved byte"
        );
        assert_eq!(
            refused(&|b| b[2] = 1),
            "delta record 3 names base file 1, but the header lists 1"
        );
        assert_eq!(
            refused(&|b| b[4..8].copy_from_slice(&65u32.to_le_bytes())),
            "delta record 3 rebuilds 65 bytes; chunks are 1 to 64 bytes"
        );
        assert_eq!(
            refused(&|b| b[16..20].copy_from_slice(&129u32.to_le_bytes())),
            format!(
                "delta record 3 asks for a window of 129 bytes and a patch of 20 bytes, over 128 \
                 and {PATCH_BYTES}"
            )
        );
        assert_eq!(
            refused(&|b| b[0] = 1),
            "delta record 3 is a copy with a window or patch"
        );
        assert_eq!(
            refused(&|b| b[20..24].copy_from_slice(&0u32.to_le_bytes())),
            "delta record 3 is a zstd record without a patch"
        );
    }

    #[test]
    fn issue13_headers_of_another_format_or_without_a_base_are_refused() {
        let mut h = header();
        h.format = 2;
        assert_eq!(
            Header::from_json(&h.to_json())
                .expect_err("format 2")
                .to_string(),
            "delta format 2 is not supported (this reader knows format 1); use the full bundle"
        );
        let mut h = header();
        h.base.clear();
        assert_eq!(
            Header::from_json(&h.to_json())
                .expect_err("no base")
                .to_string(),
            "delta header lists 0 base files; 1 to 8 are allowed"
        );
        let unknown = br#"{"format":1,"extra":0}"#;
        assert!(
            Header::from_json(unknown)
                .expect_err("unknown field")
                .to_string()
                .starts_with("delta header is not valid: unknown field `extra`")
        );
    }

    #[test]
    fn base_ids_follow_the_documented_lines() {
        // FORMAT.md: SHA-256 of the domain line and one "<sha256> <size> <path>" line per file.
        let h = header();
        let text = format!(
            "ampoule-delta-base-v1\n{} 100 model.bin\n",
            Digest::of(b"base")
        );
        assert_eq!(h.base_id(), Digest::of(text.as_bytes()));
    }

    #[test]
    fn header_caps_hold_at_their_limits() {
        // Found by cargo-mutants (issue 15): the caps' boundaries, each at its limit and one
        // past it.
        let with = |edit: &dyn Fn(&mut Header)| {
            let mut h = header();
            edit(&mut h);
            Header::from_json(&h.to_json())
        };
        let file = header().base[0].clone();
        assert!(with(&|h| h.base = vec![file.clone(); MAX_BASE_FILES]).is_ok());
        let e = with(&|h| h.base = vec![file.clone(); MAX_BASE_FILES + 1]).expect_err("9 files");
        assert_eq!(
            e.to_string(),
            "delta header lists 9 base files; 1 to 8 are allowed"
        );
        assert!(with(&|h| h.chunk_bytes = CHUNK_BYTES).is_ok());
        for bad in [0, CHUNK_BYTES + 1] {
            let e = with(&|h| h.chunk_bytes = bad).expect_err("chunk size");
            assert_eq!(e.kind(), ErrorKind::TooLarge);
            assert_eq!(
                e.to_string(),
                format!(
                    "delta needs chunks of {bad} bytes, over the limit of {CHUNK_BYTES} bytes a \
                     device gives to applying a delta; use the full bundle"
                )
            );
        }
        assert!(with(&|h| h.window_bytes = WINDOW_BYTES).is_ok());
        let e = with(&|h| h.window_bytes = WINDOW_BYTES + 1).expect_err("window");
        assert_eq!(e.kind(), ErrorKind::TooLarge);
        assert!(
            e.to_string().starts_with(&format!(
                "delta needs base windows of {} bytes",
                WINDOW_BYTES + 1
            )),
            "{e}"
        );
    }

    #[test]
    fn record_caps_hold_at_their_limits() {
        // Found by cargo-mutants (issue 15): a window and a patch at their caps are allowed,
        // one past the patch cap is not, and a copy may carry neither a window nor a patch.
        let h = header();
        let parse = |r: Record| Record::parse(&r.to_bytes(), 0, &h);
        let at_caps = Record {
            window: h.window_bytes,
            patch: PATCH_BYTES,
            ..record()
        };
        assert_eq!(parse(at_caps).expect("at the caps"), at_caps);
        let e = parse(Record {
            patch: PATCH_BYTES + 1,
            ..record()
        })
        .expect_err("over the patch cap");
        assert!(e.to_string().contains("over 128 and"), "{e}");
        for (window, patch) in [(1, 0), (0, 1)] {
            let e = parse(Record {
                op: Op::Copy,
                window,
                patch,
                ..record()
            })
            .expect_err("a copy with a window or a patch");
            assert_eq!(
                e.to_string(),
                "delta record 0 is a copy with a window or patch"
            );
        }
    }

    #[test]
    fn the_tail_is_padding_then_the_end_of_archive_and_nothing_more() {
        // Found by cargo-mutants (issue 15): `read_tail` replaced by `Ok(())` went unnoticed
        // by the crate's own tests. POSIX.1-1988 ustar: the data is padded with zeros to a
        // 512-byte block, and the archive ends with two zero blocks.
        let mut tail = Vec::new();
        write_tail(&mut tail, 24).expect("write");
        assert_eq!(tail.len(), 488 + 1024);
        assert!(tail.iter().all(|&b| b == 0));
        assert!(read_tail(&mut &tail[..], 24).is_ok());
        let mut padded = tail.clone();
        padded[10] = 1;
        assert!(read_tail(&mut &padded[..], 24).is_err(), "nonzero padding");
        assert!(
            read_tail(&mut &tail[..tail.len() - 512], 24).is_err(),
            "one end block"
        );
        let mut longer = tail.clone();
        longer.extend_from_slice(b"more");
        assert!(
            read_tail(&mut &longer[..], 24).is_err(),
            "bytes after the end"
        );
    }
}
