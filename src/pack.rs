//! Writing bundles: the one pass over the model that hashes it and compresses it, the
//! manifest that binds the result, and the atomic write of the bundle file.
//!
//! Every name, limit and layout rule comes from `ampoule_verify` (format, tar, bundle), so
//! what is written here is exactly what the device-side reader accepts.

use std::fs::{self, File};
use std::io::{self, BufWriter, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use ampoule_verify::bundle::{self, Layout};
use ampoule_verify::digest::Hasher;
use ampoule_verify::format::{context, entry, limit, signed_bytes};
use ampoule_verify::manifest::{Compression, FileEntry, Payload, Role};
use ampoule_verify::model::ModelSignature;
use ampoule_verify::signature::{SignatureEntry, Signatures};
use ampoule_verify::{Digest, KeyId, Manifest, Timestamp, labels, tar};
use anyhow::{Context, Result, bail};
use ed25519_dalek::{Signer, SigningKey};
use indicatif::ProgressBar;
use semver::{Version, VersionReq};
use tempfile::NamedTempFile;

/// The zstd level for payloads: on weight-like float data higher levels buy almost nothing
/// at many times the time (measured in ../shared/CRATES.md: ratio about 1.08 at 3 and 19).
const ZSTD_LEVEL: i32 = 3;
/// Compression workers. Fixed, not the machine's core count, so that every machine writes
/// the same bytes: zstd's multi-threaded output depends on its settings, not on timing.
const ZSTD_WORKERS: u32 = 2;
const READ_CHUNK: usize = 1024 * 1024;

/// What to pack, validated.
pub struct PackSpec {
    pub model: PathBuf,
    /// The model's name inside the payload (`model.onnx`).
    pub model_path: String,
    pub labels: Vec<String>,
    pub name: String,
    pub version: Version,
    pub requires_app: VersionReq,
    pub created: Timestamp,
    /// The model's tensor signature, when its format is one ampoule reads.
    pub model_signature: Option<ModelSignature>,
}

/// What was written.
pub struct Packed {
    pub manifest: Manifest,
    pub bundle_len: u64,
    pub signers: Vec<KeyId>,
}

/// A writer that hashes and counts what passes through it.
struct HashingWriter<W> {
    inner: W,
    hasher: Hasher,
}

impl<W: Write> Write for HashingWriter<W> {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        let n = self.inner.write(buf)?;
        self.hasher.update(&buf[..n]);
        Ok(n)
    }

    fn flush(&mut self) -> io::Result<()> {
        self.inner.flush()
    }
}

/// The temporary file a bundle is written to before it is renamed into place: in the
/// destination's directory, so the rename is atomic.
pub fn temp_beside(path: &Path) -> Result<NamedTempFile> {
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    tempfile::Builder::new()
        .prefix(".ampoule-partial-")
        .tempfile_in(dir)
        .with_context(|| format!("cannot create a temporary file in {}", dir.display()))
}

/// Signs a manifest's exact bytes under the manifest context.
pub fn sign_manifest(key: &SigningKey, manifest_bytes: &[u8]) -> SignatureEntry {
    let signature = key.sign(&signed_bytes(context::MANIFEST, manifest_bytes));
    SignatureEntry {
        key_id: KeyId::of_raw_key(key.verifying_key().as_bytes()),
        signature: signature.to_bytes(),
    }
}

/// Compresses the inner tar (model, labels) into `out`, hashing the model on the way, in a
/// single read of the model file. Returns the model's entry and the payload's size and digest.
fn write_payload(
    spec: &PackSpec,
    labels_file: &[u8],
    out: &mut File,
    bar: &ProgressBar,
) -> Result<(FileEntry, u64, Digest)> {
    let mut model = File::open(&spec.model)
        .with_context(|| format!("cannot open model {}", spec.model.display()))?;
    let model_len = model
        .metadata()
        .with_context(|| format!("cannot read the size of {}", spec.model.display()))?
        .len();
    if model_len > limit::TAR_ENTRY_BYTES {
        bail!(
            "model {} is {model_len} bytes, over the format's limit of {} bytes",
            spec.model.display(),
            limit::TAR_ENTRY_BYTES
        );
    }
    let tar_len = tar::entry_len(model_len)
        + tar::entry_len(labels_file.len() as u64)
        + tar::END_OF_ARCHIVE.len() as u64;
    let mtime = spec.created.unix();

    let sink = HashingWriter {
        inner: BufWriter::with_capacity(READ_CHUNK, &mut *out),
        hasher: Hasher::new(),
    };
    let mut enc = zstd::stream::write::Encoder::new(sink, ZSTD_LEVEL)?;
    enc.multithread(ZSTD_WORKERS)?;
    enc.include_checksum(true)?;
    enc.include_contentsize(true)?;
    enc.set_pledged_src_size(Some(tar_len))?;

    let zeros = [0u8; 512];
    enc.write_all(&tar::header(&spec.model_path, model_len, mtime))?;
    let mut model_hash = Hasher::new();
    let mut buf = vec![0u8; READ_CHUNK];
    loop {
        let n = match model.read(&mut buf) {
            Ok(0) => break,
            Ok(n) => n,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => continue,
            Err(e) => return Err(e).context(format!("cannot read {}", spec.model.display())),
        };
        if model_hash.len() + n as u64 > model_len {
            bail!(
                "{} grew while it was being packed; pack it again when it is no longer being written",
                spec.model.display()
            );
        }
        model_hash.update(&buf[..n]);
        enc.write_all(&buf[..n])?;
        bar.set_position(model_hash.len());
    }
    if model_hash.len() != model_len {
        bail!(
            "{} shrank while it was being packed; pack it again when it is no longer being written",
            spec.model.display()
        );
    }
    enc.write_all(&zeros[..tar::padding(model_len) as usize])?;
    enc.write_all(&tar::header(entry::LABELS, labels_file.len() as u64, mtime))?;
    enc.write_all(labels_file)?;
    enc.write_all(&zeros[..tar::padding(labels_file.len() as u64) as usize])?;
    enc.write_all(&tar::END_OF_ARCHIVE)?;
    let mut sink = enc
        .finish()
        .context("cannot finish compressing the payload")?;
    sink.flush()?;
    let payload_len = sink.hasher.len();
    let payload_digest = sink.hasher.finish();
    let model_entry = FileEntry {
        path: spec.model_path.clone(),
        role: Role::Model,
        size: model_len,
        sha256: model_hash.finish(),
    };
    Ok((model_entry, payload_len, payload_digest))
}

/// Packs `spec` into a new bundle at `out`, signed by `key` if given. The bundle appears at
/// `out` only when it is complete; an existing file is never replaced.
pub fn pack(
    spec: &PackSpec,
    key: Option<&SigningKey>,
    out: &Path,
    bar: &ProgressBar,
) -> Result<Packed> {
    if fs::symlink_metadata(out).is_ok() {
        bail!(
            "{} already exists; choose another output name or remove it first (nothing was written)",
            out.display()
        );
    }
    let labels_file = labels::labels_file(&spec.labels);
    let mut payload = temp_beside(out)?;
    let (model_entry, payload_len, payload_digest) =
        write_payload(spec, &labels_file, payload.as_file_mut(), bar)?;
    let manifest = Manifest {
        format: ampoule_verify::format::FORMAT_VERSION,
        name: spec.name.clone(),
        version: spec.version.clone(),
        created: spec.created,
        requires_app: spec.requires_app.clone(),
        payload: Payload {
            compression: Compression::Zstd,
            size: payload_len,
            sha256: payload_digest,
        },
        files: vec![
            model_entry,
            FileEntry {
                path: entry::LABELS.to_string(),
                role: Role::Labels,
                size: labels_file.len() as u64,
                sha256: Digest::of(&labels_file),
            },
        ],
        label_count: u32::try_from(spec.labels.len()).context("too many labels")?,
        model: spec.model_signature.clone(),
    };
    manifest
        .validate()
        .context("the manifest to be written is not valid")?;
    let manifest_bytes = manifest.to_json();
    if manifest_bytes.len() as u64 > limit::MANIFEST_BYTES {
        bail!(
            "the manifest would be {} bytes, over the format's limit of {} bytes (the model \
             declares very many or very long inputs and outputs)",
            manifest_bytes.len(),
            limit::MANIFEST_BYTES
        );
    }
    let mut signatures = Signatures::default();
    if let Some(key) = key {
        signatures.insert(sign_manifest(key, &manifest_bytes));
    }
    let signers = signatures.signatures.iter().map(|s| s.key_id).collect();
    let payload_file = payload.as_file_mut();
    payload_file.seek(SeekFrom::Start(0))?;
    let bundle_len = write_bundle_file(
        out,
        &Parts {
            mtime: spec.created.unix(),
            manifest: &manifest_bytes,
            signatures: &signatures.to_json(),
            payload_len,
        },
        payload_file,
        Placement::New,
    )?;
    Ok(Packed {
        manifest,
        bundle_len,
        signers,
    })
}

/// The small parts of a bundle and the length of its payload.
pub struct Parts<'a> {
    pub mtime: u64,
    pub manifest: &'a [u8],
    pub signatures: &'a [u8],
    pub payload_len: u64,
}

/// How the finished file takes its place.
pub enum Placement<'a> {
    /// As a new file; an existing one is never replaced.
    New,
    /// Replacing an existing file, once `check` accepted the new one.
    Replace(&'a dyn Fn(File) -> Result<()>),
}

/// Writes a complete bundle to a temporary file beside `out`, flushes it to disk and renames
/// it into place.
pub fn write_bundle_file(
    out: &Path,
    parts: &Parts<'_>,
    payload: &mut File,
    placement: Placement<'_>,
) -> Result<u64> {
    let mut temp = temp_beside(out)?;
    {
        let file = temp.as_file_mut();
        bundle::write_bundle(
            file,
            parts.mtime,
            parts.manifest,
            parts.signatures,
            payload,
            parts.payload_len,
        )
        .with_context(|| format!("cannot write bundle {}", out.display()))?;
        file.sync_all()
            .with_context(|| format!("cannot flush {} to disk", out.display()))?;
    }
    if let Placement::Replace(check) = placement {
        check(temp.reopen()?)?;
    }
    let len = temp.as_file().metadata()?.len();
    // Bundles are published files, readable by the web server that serves them.
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        fs::set_permissions(temp.path(), fs::Permissions::from_mode(0o644))?;
    }
    if matches!(placement, Placement::Replace(_)) {
        temp.persist(out)
            .map_err(|e| e.error)
            .with_context(|| format!("cannot replace {}", out.display()))?;
    } else {
        temp.persist_noclobber(out)
            .map_err(|e| e.error)
            .with_context(|| format!("cannot create {} (does it exist already?)", out.display()))?;
    }
    if let Some(dir) = out.parent().filter(|p| !p.as_os_str().is_empty()) {
        File::open(dir).and_then(|d| d.sync_all()).ok();
    }
    Ok(len)
}

/// Rewrites an existing bundle with a new signatures document, copying manifest and payload
/// unchanged. The original is replaced only once the new file is complete on disk and
/// `check` accepted it.
pub fn rewrite_signatures(
    path: &Path,
    file: &mut File,
    layout: &Layout,
    manifest: &Manifest,
    signatures: &Signatures,
    check: &dyn Fn(File) -> Result<()>,
) -> Result<u64> {
    file.seek(SeekFrom::Start(layout.payload_offset))?;
    write_bundle_file(
        path,
        &Parts {
            mtime: manifest.created.unix(),
            manifest: &layout.manifest,
            signatures: &signatures.to_json(),
            payload_len: layout.payload_len,
        },
        file,
        Placement::Replace(check),
    )
}
