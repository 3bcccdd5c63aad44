//! Making a delta (issue 13): the patches that rebuild a newer bundle's files from an older
//! bundle's, with the newer bundle's manifest and signatures carried exactly as they are, so
//! no bundle key is needed.
//!
//! Each file of the new release is cut into chunks of [`CHUNK_BYTES`]. A chunk is first looked
//! for, byte for byte, in the base file of the same role at two places: the same offset from
//! the start, and the same offset from the end. The second finds everything after a layer that
//! changed size (a classifier going from 6 to 7 classes moves every byte after it). A chunk
//! found there is a copy record. Otherwise it is compressed with zstd against a window of up to
//! [`WINDOW_BYTES`] of the base around each of those two places, and the smaller frame is kept.
//! The window reaches 2 MiB either side of the chunk, so a shift of up to 2 MiB in the middle of
//! a changed region still finds its old bytes. The device's memory for applying is therefore a
//! window, a chunk and a patch, whatever the model's size.

use std::fs::File;
use std::io::{self, BufWriter, Read, Seek, SeekFrom, Write};
use std::path::Path;

use ampoule_verify::Digest;
use ampoule_verify::bundle::Unverified;
use ampoule_verify::format::delta::{CHUNK_BYTES, PATCH_BYTES, WINDOW_BYTES, WINDOW_LOG};
use ampoule_verify::format::delta_file::{self, Header, Op, Record};
use ampoule_verify::manifest::FileEntry;
use anyhow::{Context, Result, bail};
use zstd::zstd_safe::{CCtx, CParameter};

use super::atomic::{self, Placement};

/// The zstd level of patch frames: on weight-like data higher levels buy almost nothing
/// (CRATES.md: level 19 against 3 on float32 weights) at many times the time.
const LEVEL: i32 = 3;

/// What [`make`] wrote.
#[derive(Debug, Clone)]
pub struct Made {
    /// The delta's header.
    pub header: Header,
    /// The delta file's size in bytes.
    pub size: u64,
    /// The delta file's SHA-256.
    pub sha256: Digest,
    /// How many records copy base bytes unchanged.
    pub copies: u64,
}

/// Makes the delta from the bundle `old` to the bundle `new` and writes it to `out`, which
/// must not exist. Both bundles' payloads are checked against their manifests; no signature
/// is checked or made: the delta carries `new`'s signatures, which a device checks.
pub fn make(old: &Path, new: &Path, out: &Path) -> Result<Made> {
    let mut base =
        Unverified::open(old).with_context(|| format!("cannot read {}", old.display()))?;
    let mut target =
        Unverified::open(new).with_context(|| format!("cannot read {}", new.display()))?;
    let (b, t) = (&base.manifest, &target.manifest);
    if b.name != t.name {
        bail!(
            "{} is bundle '{}' but {} is '{}'; a delta rebuilds a release of the same bundle",
            old.display(),
            b.name,
            new.display(),
            t.name
        );
    }
    if t.version.cmp_precedence(&b.version) != std::cmp::Ordering::Greater {
        bail!(
            "{} {} is not newer than {} {}; a delta leads from an older release to a newer one",
            t.name,
            t.version,
            b.name,
            b.version
        );
    }
    let same = b.files.len() == t.files.len()
        && b.files
            .iter()
            .zip(&t.files)
            .all(|(x, y)| x.sha256 == y.sha256);
    if same {
        bail!(
            "{} and {} hold the same files; there is nothing to rebuild",
            old.display(),
            new.display()
        );
    }
    let work = tempfile::tempdir().context("cannot create a temporary directory")?;
    let (base_dir, target_dir) = (work.path().join("base"), work.path().join("target"));
    base.dangerous_unpack(&base_dir)
        .with_context(|| format!("cannot unpack {}", old.display()))?;
    target
        .dangerous_unpack(&target_dir)
        .with_context(|| format!("cannot unpack {}", new.display()))?;
    let base_files = base.manifest.files.clone();
    let target_files = target.manifest.files.clone();

    let patches_path = work.path().join("patches");
    let mut patches = BufWriter::new(
        File::options()
            .read(true)
            .write(true)
            .create_new(true)
            .open(&patches_path)?,
    );
    let mut opened = Vec::new();
    for entry in &base_files {
        opened.push(File::open(base_dir.join(&entry.path))?);
    }
    let mut records = 0u64;
    let mut copies = 0u64;
    for (index, entry) in target_files.iter().enumerate() {
        // The base file of the same role (format 1: the model, then the labels).
        let b = base_files
            .iter()
            .position(|f| f.role == entry.role)
            .unwrap_or(0);
        let mut file = File::open(target_dir.join(&entry.path))?;
        let mut chunk = vec![0u8; CHUNK_BYTES as usize];
        let mut offset = 0u64;
        while offset < entry.size {
            let len = (entry.size - offset).min(u64::from(CHUNK_BYTES)) as usize;
            file.read_exact(&mut chunk[..len])?;
            let (record, patch) = encode(
                &chunk[..len],
                offset,
                entry.size,
                &mut opened[b],
                &base_files[b],
                index as u8,
                b as u8,
            )?;
            if record.op == Op::Copy {
                copies += 1;
            }
            patches.write_all(&record.to_bytes())?;
            patches.write_all(&patch)?;
            records += 1;
            offset += len as u64;
        }
    }
    let mut patches = patches.into_inner().map_err(|e| e.into_error())?;
    let patches_len = patches.stream_position()?;
    patches.seek(SeekFrom::Start(0))?;

    let header = Header {
        format: ampoule_verify::format::delta::FORMAT_VERSION,
        name: target.manifest.name.clone(),
        version: target.manifest.version.clone(),
        base: base_files,
        chunk_bytes: CHUNK_BYTES,
        window_bytes: WINDOW_BYTES,
        records,
    };
    let mtime = target.manifest.created.unix();
    let temp = atomic::temp_beside(out)?;
    let mut writer = BufWriter::new(temp.as_file());
    delta_file::write_head(
        &mut writer,
        mtime,
        &header,
        &target.layout.manifest,
        &target.layout.signatures,
        patches_len,
    )?;
    io::copy(&mut patches, &mut writer)?;
    delta_file::write_tail(&mut writer, patches_len)?;
    writer.flush()?;
    drop(writer);
    let sha256 = {
        let (digest, _) = ampoule_verify::digest::hash_reader(temp.reopen()?, u64::MAX)?;
        digest
    };
    let size = atomic::place(out, temp, Placement::New)?;
    Ok(Made {
        header,
        size,
        sha256,
        copies,
    })
}

/// One chunk's record and patch: a copy if the base holds the chunk at one of the candidate
/// offsets, else the smaller zstd frame against a window around each candidate.
fn encode(
    chunk: &[u8],
    offset: u64,
    target_len: u64,
    base: &mut File,
    base_entry: &FileEntry,
    file: u8,
    base_index: u8,
) -> Result<(Record, Vec<u8>)> {
    let len = chunk.len() as u64;
    let base_len = base_entry.size;
    let mut candidates = vec![offset];
    // The same distance from the end: after a layer that grew or shrank.
    if let Some(from_end) = (offset + base_len).checked_sub(target_len)
        && from_end != offset
    {
        candidates.push(from_end);
    }
    let mut buf = vec![0u8; chunk.len()];
    for &at in &candidates {
        if at + len <= base_len {
            base.seek(SeekFrom::Start(at))?;
            base.read_exact(&mut buf)?;
            if buf == chunk {
                let record = Record {
                    op: Op::Copy,
                    file,
                    base: base_index,
                    len: len as u32,
                    offset: at,
                    window: 0,
                    patch: 0,
                };
                return Ok((record, Vec::new()));
            }
        }
    }
    let mut best: Option<(Record, Vec<u8>)> = None;
    let margin = (u64::from(WINDOW_BYTES) - len) / 2;
    for &at in &candidates {
        // The window reaches `margin` either side of the chunk, moved inward at the file's
        // ends so that it is as long as the base allows.
        let end = (at.saturating_sub(margin) + u64::from(WINDOW_BYTES)).min(base_len);
        let start = end.saturating_sub(u64::from(WINDOW_BYTES));
        let mut window = vec![0u8; (end - start) as usize];
        base.seek(SeekFrom::Start(start))?;
        base.read_exact(&mut window)?;
        let patch = compress(chunk, &window)?;
        if best.as_ref().is_none_or(|(_, p)| patch.len() < p.len()) {
            let record = Record {
                op: Op::Zstd,
                file,
                base: base_index,
                len: len as u32,
                offset: start,
                window: window.len() as u32,
                patch: patch.len() as u32,
            };
            best = Some((record, patch));
        }
    }
    Ok(best.expect("there is always one candidate"))
}

/// One zstd frame of `chunk` with `window` as its reference prefix, with its content size and
/// checksum, within the window a device accepts.
fn compress(chunk: &[u8], window: &[u8]) -> Result<Vec<u8>> {
    let fail = |code| anyhow::anyhow!("zstd: {}", zstd::zstd_safe::get_error_name(code));
    let mut cctx = CCtx::create();
    for parameter in [
        CParameter::CompressionLevel(LEVEL),
        CParameter::ChecksumFlag(true),
        CParameter::ContentSizeFlag(true),
        CParameter::WindowLog(WINDOW_LOG),
        // Without long-distance matching, level 3's small hash tables forget most of an
        // 8 MiB window and the patch is half the chunk (CRATES.md, zstd).
        CParameter::EnableLongDistanceMatching(true),
    ] {
        cctx.set_parameter(parameter).map_err(fail)?;
    }
    cctx.set_pledged_src_size(Some(chunk.len() as u64))
        .map_err(fail)?;
    cctx.ref_prefix(window).map_err(fail)?;
    let mut out = Vec::with_capacity(zstd::zstd_safe::compress_bound(chunk.len()));
    cctx.compress2(&mut out, chunk).map_err(fail)?;
    if out.len() > PATCH_BYTES as usize {
        bail!(
            "a chunk compressed to {} bytes, over the format's {PATCH_BYTES}",
            out.len()
        );
    }
    Ok(out)
}
