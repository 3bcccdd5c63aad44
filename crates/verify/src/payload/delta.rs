//! Applying a delta (issue 13): the full release's files rebuilt from the base release's files,
//! chunk by chunk, in memory that does not grow with the model's size.
//!
//! The order keeps unauthenticated bytes away from anything that costs: the delta's head (its
//! header, capped, and the carried manifest and signatures); the manifest's signatures and the
//! app's whole policy, as for a full bundle ([`Verifier`]); the header against the manifest
//! (same release, a base that is not the release itself); the given base files against the
//! digests the header names, each hashed in full; and only then the patch records, each checked
//! against its caps before its bytes are read. Every rebuilt file is checked against the
//! manifest's size and SHA-256 as soon as its last chunk is written, so applying stops at the
//! first file that differs, and anything written is removed on any failure.
//!
//! Memory: one base window ([`WINDOW_BYTES`]), one chunk ([`CHUNK_BYTES`]), one compressed
//! patch ([`PATCH_BYTES`]) and a zstd decoding context, allocated once, about 17 MiB whatever
//! the model's size; the frame is decoded whole into the chunk's buffer, so the decoder keeps
//! no window of its own.
//!
//! This is the store-independent core: it takes the base files as open readers and writes into
//! a directory the caller owns. The device's update (`update/`) decides which delta to fetch,
//! where the base files come from, and hands the result to the same install path as a full
//! bundle.

use std::fs::{File, OpenOptions};
use std::io::{self, BufReader, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use zstd::zstd_safe::{DCtx, DParameter};

use crate::check::bundle::Verifier;
use crate::error::{Error, ErrorKind, Result};
use crate::format::delta::{CHUNK_BYTES, RECORD_BYTES, WINDOW_LOG};
use crate::format::delta::PATCHES;
use crate::format::delta_file::Header;
use crate::format::digest::{Digest, Hasher, hash_reader};
use crate::format::manifest::{FileEntry, Manifest};
use crate::format::signature::SignatureReport;

pub use crate::format::delta_file::{Op, Record, base_id, read_head, read_tail};

/// A release rebuilt from a delta: its files in the caller's directory, each with the size
/// and SHA-256 its signed manifest declares, and the carried documents that vouch for them.
#[derive(Debug)]
pub struct Rebuilt {
    /// The carried manifest, verified.
    pub manifest: Manifest,
    /// Its exact signed bytes.
    pub manifest_bytes: Vec<u8>,
    /// The carried signatures document's bytes.
    pub signatures: Vec<u8>,
    /// Whose signatures counted.
    pub report: SignatureReport,
    /// The rebuilt files, in manifest order.
    pub files: Vec<PathBuf>,
    /// The one digest naming the base the delta was applied to.
    pub base: Digest,
}

fn refuse(kind: ErrorKind, message: String) -> Error {
    Error::new(kind, message)
}

/// Removes the files an apply created unless it finished.
struct Written {
    paths: Vec<PathBuf>,
    keep: bool,
}

impl Drop for Written {
    fn drop(&mut self) {
        if !self.keep {
            for path in &self.paths {
                let _ = std::fs::remove_file(path);
            }
        }
    }
}

/// One rebuilt file being written and hashed.
struct Target<'m> {
    entry: &'m FileEntry,
    file: File,
    hasher: Hasher,
}

impl Target<'_> {
    /// Checks the finished file against the manifest: its size, then its SHA-256.
    fn finish(self) -> Result<()> {
        let path = &self.entry.path;
        if self.hasher.len() != self.entry.size {
            return Err(refuse(
                ErrorKind::Digest,
                format!(
                    "delta rebuilds {} bytes of {path}, but the manifest declares {} bytes",
                    self.hasher.len(),
                    self.entry.size
                ),
            ));
        }
        let found = self.hasher.finish();
        if found != self.entry.sha256 {
            return Err(refuse(
                ErrorKind::Digest,
                format!(
                    "delta rebuilds {path} with sha256 {found}, but the manifest declares {}; \
                     the delta is damaged or was made wrongly: use the full bundle",
                    self.entry.sha256
                ),
            ));
        }
        self.file
            .sync_all()
            .map_err(|e| Error::io(format!("cannot flush {path} to disk"), e))
    }
}

/// Applies the delta read from `delta` to the base release's files `base` (open readers, in
/// the order of the base manifest, so the order the delta's header lists them), writing the
/// rebuilt files into the existing directory `dir` under their manifest names (which must not
/// exist there). `verifier` checks the carried manifest as it checks a full bundle's.
///
/// On any failure, nothing this call wrote is left in `dir`.
pub fn apply<R: Read, B: Read + Seek>(
    verifier: &Verifier,
    delta: R,
    base: &mut [B],
    dir: &Path,
) -> Result<Rebuilt> {
    rebuild(delta, base, dir, |manifest, signatures| {
        verifier.check_carried(manifest, signatures)
    })
}

/// [`apply`] without the carried manifest's signature and policy checks (the report lists no
/// signer), for the release side's audit (`ampoule ledger check`): it has compared the carried
/// manifest and signatures with the published bundle's byte for byte, and asks only whether
/// the patches rebuild the files that manifest declares. Every other check of [`apply`] is
/// made. A device never calls this: what it installs must pass [`apply`].
#[cfg(feature = "release")]
pub fn dangerous_rebuild_for_audit<R: Read, B: Read + Seek>(
    delta: R,
    base: &mut [B],
    dir: &Path,
) -> Result<Rebuilt> {
    rebuild(delta, base, dir, |manifest, _| {
        Ok((Manifest::from_json(manifest)?, SignatureReport::default()))
    })
}

/// [`apply`] with `carried` checking the carried manifest and signatures.
fn rebuild<R: Read, B: Read + Seek>(
    delta: R,
    base: &mut [B],
    dir: &Path,
    carried: impl FnOnce(&[u8], &[u8]) -> Result<(Manifest, SignatureReport)>,
) -> Result<Rebuilt> {
    let mut delta = BufReader::with_capacity(64 * 1024, delta);
    let head = read_head(&mut delta)?;
    let (manifest, report) = carried(&head.manifest, &head.signatures)?;
    let header = &head.header;
    check_header(header, &manifest)?;
    check_base(header, base)?;

    let mut written = Written {
        paths: Vec::new(),
        keep: false,
    };
    let mut patches = Read::take(&mut delta, head.patches_len);
    let mut buffers = Buffers::new(header);
    let mut current: Option<(usize, Target<'_>)> = None;
    for index in 0..header.records {
        let mut bytes = [0u8; RECORD_BYTES];
        read_patches(&mut patches, &mut bytes, index)?;
        let record = Record::parse(&bytes, index, header)?;
        let file = usize::from(record.file);
        // Move on to the record's file, finishing every file before it (an empty file has
        // no records).
        let next = current.as_ref().map_or(0, |(i, _)| *i);
        if file < next || file >= manifest.files.len() {
            return Err(refuse(
                ErrorKind::Malformed,
                format!("delta record {index} names file {file} out of order"),
            ));
        }
        while current.as_ref().is_none_or(|(i, _)| *i < file) {
            let start = match current.take() {
                Some((i, target)) => {
                    target.finish()?;
                    i + 1
                }
                None => 0,
            };
            let target = create(dir, &manifest.files[start], &mut written)?;
            current = Some((start, target));
        }
        let (_, target) = current.as_mut().expect("the record's file was just opened");
        if target.hasher.len() + u64::from(record.len) > target.entry.size {
            return Err(refuse(
                ErrorKind::Digest,
                format!(
                    "delta rebuilds more than the {} bytes the manifest declares for {}",
                    target.entry.size, target.entry.path
                ),
            ));
        }
        let chunk = buffers.rebuild(&record, index, &mut base[usize::from(record.base)], header, &mut patches)?;
        target.hasher.update(chunk);
        target
            .file
            .write_all(chunk)
            .map_err(|e| Error::io(format!("cannot write {}", target.entry.path), e))?;
    }
    let mut next = 0;
    if let Some((i, target)) = current.take() {
        target.finish()?;
        next = i + 1;
    }
    for entry in &manifest.files[next..] {
        create(dir, entry, &mut written)?.finish()?;
    }
    if patches.limit() != 0 {
        return Err(refuse(
            ErrorKind::Malformed,
            format!(
                "delta's {PATCHES} holds {} bytes after its {} records",
                patches.limit(),
                header.records
            ),
        ));
    }
    read_tail(&mut delta, head.patches_len)?;
    written.keep = true;
    Ok(Rebuilt {
        base: header.base_id(),
        files: written.paths.clone(),
        manifest,
        manifest_bytes: head.manifest,
        signatures: head.signatures,
        report,
    })
}

/// The header against the authenticated manifest: the same release, and a base that is not
/// the release itself (a delta from a release to itself could only serve a loop or a chain).
fn check_header(header: &Header, manifest: &Manifest) -> Result<()> {
    if header.name != manifest.name || header.version != manifest.version {
        return Err(refuse(
            ErrorKind::Malformed,
            format!(
                "delta's header names {} {} but its signed manifest is {} {}",
                header.name, header.version, manifest.name, manifest.version
            ),
        ));
    }
    let same = header.base.len() == manifest.files.len()
        && header
            .base
            .iter()
            .zip(&manifest.files)
            .all(|(b, t)| b.sha256 == t.sha256 && b.size == t.size);
    if same {
        return Err(refuse(
            ErrorKind::Policy,
            format!(
                "delta's base files are the files it rebuilds ({} {}); a delta leads from an \
                 older release to a newer one",
                manifest.name, manifest.version
            ),
        ));
    }
    Ok(())
}

/// Each given base file against the size and SHA-256 the header names, read in full before
/// any patch byte.
fn check_base<B: Read + Seek>(header: &Header, base: &mut [B]) -> Result<()> {
    if base.len() != header.base.len() {
        return Err(refuse(
            ErrorKind::Settings,
            format!(
                "{} base files were given, but the delta's base lists {}",
                base.len(),
                header.base.len()
            ),
        ));
    }
    for (file, expected) in base.iter_mut().zip(&header.base) {
        let path = &expected.path;
        file.seek(SeekFrom::Start(0))
            .map_err(|e| Error::io(format!("cannot read base file {path}"), e))?;
        let (found, len) = hash_reader(&mut *file, expected.size.saturating_add(1))
            .map_err(|e| Error::io(format!("cannot read base file {path}"), e))?;
        if len != expected.size || found != expected.sha256 {
            return Err(refuse(
                ErrorKind::Digest,
                format!(
                    "base file {path} has sha256 {found} ({len} bytes), but the delta applies \
                     to sha256 {} ({} bytes); the installed files differ from the delta's base: \
                     use the full bundle",
                    expected.sha256, expected.size
                ),
            ));
        }
    }
    Ok(())
}

/// Opens a rebuilt file, which must not exist yet, and records it for clean-up.
fn create<'m>(dir: &Path, entry: &'m FileEntry, written: &mut Written) -> Result<Target<'m>> {
    let path = dir.join(&entry.path);
    let file = OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(&path)
        .map_err(|e| Error::io(format!("cannot create {}", path.display()), e))?;
    written.paths.push(path);
    Ok(Target {
        entry,
        file,
        hasher: Hasher::new(),
    })
}

/// Reads exactly `buf` from the patches, naming a short read as truncation.
fn read_patches<R: Read>(patches: &mut R, buf: &mut [u8], index: u64) -> Result<()> {
    patches.read_exact(buf).map_err(|e| match e.kind() {
        io::ErrorKind::UnexpectedEof => refuse(
            ErrorKind::Malformed,
            format!("delta is truncated in {PATCHES} at record {index}"),
        ),
        _ => Error::io("cannot read the delta", e),
    })
}

/// The three buffers applying needs, allocated once at the sizes the header declares (each
/// within its cap).
struct Buffers {
    window: Vec<u8>,
    chunk: Vec<u8>,
    patch: Vec<u8>,
}

impl Buffers {
    fn new(header: &Header) -> Buffers {
        // The window and patch grow to what records ask, within the caps `Record::parse`
        // checked; the chunk is the decoder's output and needs its capacity up front.
        Buffers {
            window: Vec::new(),
            chunk: Vec::with_capacity(header.chunk_bytes.min(CHUNK_BYTES) as usize),
            patch: Vec::new(),
        }
    }

    /// Rebuilds one record's chunk from its base file and patch.
    fn rebuild<B: Read + Seek, P: Read>(
        &mut self,
        record: &Record,
        index: u64,
        base: &mut B,
        header: &Header,
        patches: &mut P,
    ) -> Result<&[u8]> {
        let base_entry = &header.base[usize::from(record.base)];
        let span = match record.op {
            Op::Copy => record.len,
            Op::Zstd => record.window,
        };
        if record.offset.checked_add(u64::from(span)).is_none_or(|end| end > base_entry.size) {
            return Err(refuse(
                ErrorKind::Malformed,
                format!(
                    "delta record {index} reads {span} bytes at {} of base file {}, which has {} bytes",
                    record.offset, base_entry.path, base_entry.size
                ),
            ));
        }
        let read_base = |buf: &mut Vec<u8>, len: u32, base: &mut B| -> Result<()> {
            buf.resize(len as usize, 0);
            base.seek(SeekFrom::Start(record.offset))
                .and_then(|_| base.read_exact(buf))
                .map_err(|e| Error::io(format!("cannot read base file {}", base_entry.path), e))
        };
        match record.op {
            Op::Copy => {
                read_base(&mut self.chunk, record.len, base)?;
            }
            Op::Zstd => {
                read_base(&mut self.window, record.window, base)?;
                self.patch.resize(record.patch as usize, 0);
                read_patches(patches, &mut self.patch, index)?;
                self.chunk.clear();
                let bad = |why: String| {
                    refuse(
                        ErrorKind::Digest,
                        format!("delta record {index} does not decode: {why}; the delta is damaged: use the full bundle"),
                    )
                };
                let mut dctx = DCtx::create();
                dctx.set_parameter(DParameter::WindowLogMax(WINDOW_LOG))
                    .and_then(|_| dctx.ref_prefix(&self.window))
                    .map_err(|code| bad(zstd::zstd_safe::get_error_name(code).to_string()))?;
                // The buffer's capacity may exceed the chunk; a frame that fills more than the
                // chunk is refused below.
                let n = dctx
                    .decompress(&mut self.chunk, &self.patch)
                    .map_err(|code| bad(zstd::zstd_safe::get_error_name(code).to_string()))?;
                if n != record.len as usize {
                    return Err(bad(format!("it gives {n} bytes, the record declares {}", record.len)));
                }
            }
        }
        Ok(&self.chunk)
    }
}
