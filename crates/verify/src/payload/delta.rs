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
//! This is the store-independent core: it takes the base files as open readers and writes
//! through an open directory handle (files created new, never through a link). The device's
//! update (`update/`) decides which delta to fetch and checks it into a [`VerifiedDelta`]; the
//! store (`store/`) opens the base files in the current release and rebuilds into its staging
//! directory, within the same install as a full bundle's payload.

use std::fs::File;
use std::io::{self, BufReader, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use zstd::zstd_safe::{DCtx, DParameter};

use crate::check::bundle::Verifier;
use crate::check::policy::CompatibilityPolicy;
use crate::dir::Dir;
use crate::error::{Error, ErrorKind, Result};
use crate::format::delta::PATCHES;
use crate::format::delta::{CHUNK_BYTES, RECORD_BYTES, WINDOW_LOG};
use crate::format::delta_file::{Head, Header};
use crate::format::digest::{Digest, Hasher, hash_reader};
use crate::format::manifest::{FileEntry, Manifest, Role};
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

/// A delta whose head was read and whose carried manifest passed the app's verifier (its
/// signatures, then the app's whole policy) and matches the header; nothing of its patches
/// was read yet. The delta's counterpart of a `VerifiedBundle`: only this crate makes one, and
/// the store rebuilds a release only from one.
pub(crate) struct VerifiedDelta<R> {
    reader: BufReader<R>,
    head: Head,
    manifest: Manifest,
    report: SignatureReport,
    compatibility: Option<CompatibilityPolicy>,
}

impl<R: Read> VerifiedDelta<R> {
    /// Reads the delta's head from `delta` and checks the carried manifest with `verifier` as
    /// a full bundle's is checked, then the header against it (same release, a base that is
    /// not the release itself).
    pub(crate) fn read(verifier: &Verifier, delta: R) -> Result<VerifiedDelta<R>> {
        Self::read_with(
            delta,
            |manifest, signatures| verifier.check_carried(manifest, signatures),
            verifier.compatibility_policy().cloned(),
        )
    }

    /// [`VerifiedDelta::read`] with `carried` checking the carried manifest and signatures,
    /// and the app's policy (if any) for the checks after rebuilding.
    fn read_with(
        delta: R,
        carried: impl FnOnce(&[u8], &[u8]) -> Result<(Manifest, SignatureReport)>,
        compatibility: Option<CompatibilityPolicy>,
    ) -> Result<VerifiedDelta<R>> {
        let mut reader = BufReader::with_capacity(64 * 1024, delta);
        let head = read_head(&mut reader)?;
        let (manifest, report) = carried(&head.manifest, &head.signatures)?;
        check_header(&head.header, &manifest)?;
        Ok(VerifiedDelta {
            reader,
            head,
            manifest,
            report,
            compatibility,
        })
    }

    /// The carried manifest, verified.
    pub(crate) fn manifest(&self) -> &Manifest {
        &self.manifest
    }

    /// The carried manifest's exact signed bytes.
    pub(crate) fn manifest_bytes(&self) -> &[u8] {
        &self.head.manifest
    }

    /// The carried signatures document's exact bytes.
    pub(crate) fn signatures(&self) -> &[u8] {
        &self.head.signatures
    }

    /// The base's files as the header lists them, in the base manifest's order.
    pub(crate) fn base_files(&self) -> &[FileEntry] {
        &self.head.header.base
    }

    /// The one digest naming the base (FORMAT.md "Deltas").
    pub(crate) fn base(&self) -> Digest {
        self.head.header.base_id()
    }

    /// Rebuilds the release's files into `dir` (an open directory where none of them exists
    /// yet) from the base files `base` (in header order), checks each against the manifest as
    /// soon as it is complete, reads the delta to its exact end, and makes the checks a full
    /// bundle's files get after unpacking (required labels, the model read again). Returns the
    /// labels. On failure, files already created stay in `dir` for the caller to remove with
    /// it (the store's staging directory) or by name ([`apply`]).
    pub(crate) fn rebuild_into<B: Read + Seek>(
        &mut self,
        base: &mut [B],
        dir: &Dir,
        created: &mut Vec<String>,
    ) -> Result<Vec<String>> {
        let header = &self.head.header;
        let manifest = &self.manifest;
        check_base(header, base)?;
        let mut patches = Read::take(&mut self.reader, self.head.patches_len);
        let mut buffers = Buffers::new(header);
        let mut labels = Vec::new();
        let mut current: Option<(usize, Target<'_>)> = None;
        for index in 0..header.records {
            let mut bytes = [0u8; RECORD_BYTES];
            read_patches(&mut patches, &mut bytes, index)?;
            let record = Record::parse(&bytes, index, header)?;
            let file = usize::from(record.file);
            // Move on to the record's file, finishing every file before it (an empty file
            // has no records).
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
                let target = create(dir, &manifest.files[start], created)?;
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
            let chunk = buffers.rebuild(
                &record,
                index,
                &mut base[usize::from(record.base)],
                header,
                &mut patches,
            )?;
            target.hasher.update(chunk);
            if target.entry.role == Role::Labels {
                // Bounded by the manifest's cap on labels.txt, checked above per record.
                labels.extend_from_slice(chunk);
            }
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
            create(dir, entry, created)?.finish()?;
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
        read_tail(&mut self.reader, self.head.patches_len)?;
        let labels = manifest.parse_labels(&labels)?;
        crate::payload::unpack::check_unpacked(
            manifest,
            self.compatibility.as_ref(),
            &labels,
            dir,
        )?;
        Ok(labels)
    }
}

/// Removes the files an apply created unless it finished.
struct Written<'d> {
    dir: &'d Dir,
    names: Vec<String>,
    keep: bool,
}

impl Drop for Written<'_> {
    fn drop(&mut self) {
        if !self.keep {
            for name in &self.names {
                let _ = self.dir.remove(name);
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
/// exist there). `verifier` checks the carried manifest as it checks a full bundle's, and the
/// rebuilt files get the checks a full bundle's unpacked files get (required labels, the model
/// read again).
///
/// On any failure, nothing this call wrote is left in `dir`.
pub fn apply<R: Read, B: Read + Seek>(
    verifier: &Verifier,
    delta: R,
    base: &mut [B],
    dir: &Path,
) -> Result<Rebuilt> {
    rebuild(VerifiedDelta::read(verifier, delta)?, base, dir)
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
    let delta = VerifiedDelta::read_with(
        delta,
        |manifest, _| Ok((Manifest::from_json(manifest)?, SignatureReport::default())),
        None,
    )?;
    rebuild(delta, base, dir)
}

/// Rebuilds a checked delta's files into the directory `dir`, removing them on failure.
fn rebuild<R: Read, B: Read + Seek>(
    mut delta: VerifiedDelta<R>,
    base: &mut [B],
    dir: &Path,
) -> Result<Rebuilt> {
    let out = Dir::open_root(dir, false)
        .map_err(|e| Error::io(format!("cannot open {}", dir.display()), e))?;
    let mut written = Written {
        dir: &out,
        names: Vec::new(),
        keep: false,
    };
    delta.rebuild_into(base, &out, &mut written.names)?;
    written.keep = true;
    let files = written.names.iter().map(|n| dir.join(n)).collect();
    Ok(Rebuilt {
        base: delta.base(),
        files,
        manifest: delta.manifest,
        manifest_bytes: delta.head.manifest,
        signatures: delta.head.signatures,
        report: delta.report,
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

/// Creates a rebuilt file in `dir` (it must not exist: nothing is written through a link
/// planted at its name) and records its name for clean-up.
fn create<'m>(dir: &Dir, entry: &'m FileEntry, created: &mut Vec<String>) -> Result<Target<'m>> {
    let file = dir.create_new(&entry.path).map_err(|e| {
        Error::io(
            format!("cannot create {}", dir.join(&entry.path).display()),
            e,
        )
    })?;
    created.push(entry.path.clone());
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
        if record
            .offset
            .checked_add(u64::from(span))
            .is_none_or(|end| end > base_entry.size)
        {
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
                        format!(
                            "delta record {index} does not decode: {why}; the delta is damaged: use the full bundle"
                        ),
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
                    return Err(bad(format!(
                        "it gives {n} bytes, the record declares {}",
                        record.len
                    )));
                }
            }
        }
        Ok(&self.chunk)
    }
}
