//! Writing bundles: the one pass over the model that hashes it and compresses it, the
//! manifest that binds the result, and the atomic write of the bundle file.
//!
//! Every name, limit and layout rule comes from `ampoule_verify` (format, tar, bundle), so
//! what is written here is exactly what the device-side reader accepts; the tar headers
//! themselves come from the `tar` crate ([`crate::release::ustar`]).
//!
//! Packing is meant to take less time than `tar | zstd | openssl dgst` would, although it
//! also hashes the model: the thread that reads the model only cuts the inner tar into chunks
//! (format 2, `ampoule_verify::format::chunks`), two workers compress one chunk each at a
//! time as a zstd frame of its own, and the model's SHA-256 and the writing and hashing of
//! the frames run on threads of their own. The number of chunks, so the chunk list's length,
//! follows from the inner tar's length, and the payload is compressed straight to its place
//! in the bundle file, so it is written once and never copied.

use std::fs::{self, File};
use std::io::{self, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::mpsc::{Receiver, Sender, SyncSender, channel, sync_channel};
use std::thread::{Scope, ScopedJoinHandle};

use ampoule_verify::bundle::{self, Layout};
use ampoule_verify::digest::Hasher;
use ampoule_verify::format::chunks::{self, ListWriter};
use ampoule_verify::format::{context, entry, limit, signed_bytes};
use ampoule_verify::manifest::{Compression, FileEntry, Payload, Role};
use ampoule_verify::metadata::Metadata;
use ampoule_verify::model::ModelSignature;
use ampoule_verify::signature::{SignatureEntry, Signatures};
use ampoule_verify::{Digest, KeyId, Manifest, Timestamp, labels, tar};
use anyhow::{Context, Result, bail};
use ed25519_dalek::{Signer, SigningKey};
use indicatif::ProgressBar;

use crate::release::atomic::{Placement, place, temp_beside};
use crate::release::ustar::{self, Small};
use semver::{Version, VersionReq};

/// The zstd level for payloads. On weight-like float data level 1 compresses as well as 3
/// (ratio 1.083 against 1.082 on the invented weights, in chunks of 512 KiB) in about three
/// quarters of the time, and decodes as fast; negative levels leave the literals
/// uncompressed (ratio 1.000, 8% more to download) and higher ones buy nothing at many
/// times the time (BENCHMARKS.md, "Issue 13 item 4"; ../shared/CRATES.md for level 19).
const ZSTD_LEVEL: i32 = 1;
/// Compression workers, each compressing whole chunks. Fixed, not the machine's core count,
/// though the output would not change with it: every chunk is a frame of its own, compressed
/// alone, so the bytes never depend on timing.
const ZSTD_WORKERS: usize = 2;
/// The size of each read of the model.
const CHUNK: usize = 1024 * 1024;
/// Buffers queued for a side thread before the feeding thread waits for it.
const CHUNKS_IN_FLIGHT: usize = 4;
/// How much of the bundle is written between flushes to disk while it is compressed.
const EARLY_SYNC_BYTES: usize = 16 * 1024 * 1024;

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
    /// The signed metadata (`--meta`, `--meta-file`), checked; `None` writes no field.
    pub metadata: Option<Metadata>,
}

/// What was written.
pub struct Packed {
    pub manifest: Manifest,
    pub bundle_len: u64,
    pub signers: Vec<KeyId>,
}

/// Hashes the buffers it is fed (the model's), on a thread of its own, and hands each buffer
/// back for reuse.
struct SideThread<'scope> {
    full: Option<SyncSender<Vec<u8>>>,
    spent: Receiver<Vec<u8>>,
    handle: Option<ScopedJoinHandle<'scope, io::Result<Hasher>>>,
}

impl<'scope> SideThread<'scope> {
    fn spawn(scope: &'scope Scope<'scope, '_>) -> Self {
        let (full, queued) = sync_channel::<Vec<u8>>(CHUNKS_IN_FLIGHT);
        let (done, spent) = channel();
        let handle = scope.spawn(move || {
            let mut hasher = Hasher::new();
            for buf in queued {
                hasher.update(&buf);
                // The feeder may have finished and gone; the buffer is then simply dropped.
                let _ = done.send(buf);
            }
            Ok(hasher)
        });
        SideThread {
            full: Some(full),
            spent,
            handle: Some(handle),
        }
    }

    /// Hands `buf` over and returns a buffer to fill next, with unspecified contents.
    fn feed(&mut self, buf: Vec<u8>) -> io::Result<Vec<u8>> {
        let sent = self
            .full
            .as_ref()
            .is_some_and(|full| full.send(buf).is_ok());
        if !sent {
            return Err(match self.join() {
                Err(e) => e,
                Ok(_) => io::Error::other("the hashing thread stopped early"),
            });
        }
        Ok(self
            .spent
            .try_recv()
            .unwrap_or_else(|_| Vec::with_capacity(CHUNK)))
    }

    fn join(&mut self) -> io::Result<Hasher> {
        match self.handle.take().map(ScopedJoinHandle::join) {
            Some(Ok(result)) => result,
            Some(Err(panic)) => std::panic::resume_unwind(panic),
            None => Err(io::Error::other("the hashing thread already stopped")),
        }
    }

    /// Waits until everything fed is hashed, and returns the hash.
    fn finish(mut self) -> io::Result<Hasher> {
        // Closing the queue ends the thread's loop.
        self.full = None;
        self.join()
    }
}

/// Flushes a file to disk every [`EARLY_SYNC_BYTES`] written, on a thread of its own.
struct Flusher<'scope> {
    kick: SyncSender<()>,
    unflushed: usize,
    handle: ScopedJoinHandle<'scope, io::Result<()>>,
}

impl<'scope> Flusher<'scope> {
    fn spawn(scope: &'scope Scope<'scope, '_>, file: File) -> Self {
        let (kick, kicked) = sync_channel::<()>(1);
        let handle = scope.spawn(move || kicked.iter().try_for_each(|()| file.sync_data()));
        Flusher {
            kick,
            unflushed: 0,
            handle,
        }
    }

    fn wrote(&mut self, n: usize) {
        self.unflushed += n;
        if self.unflushed >= EARLY_SYNC_BYTES {
            // A flush already under way takes these pages too, so a full queue is no loss.
            let _ = self.kick.try_send(());
            self.unflushed = 0;
        }
    }

    fn finish(self) -> io::Result<()> {
        drop(self.kick);
        self.handle
            .join()
            .unwrap_or_else(|panic| std::panic::resume_unwind(panic))
    }
}

/// A compressed chunk (its frame) and the chunk's buffer, handed back for reuse.
type Frame = io::Result<(Vec<u8>, Vec<u8>)>;

/// The inner tar, cut into chunks of `chunk_bytes` as it is written, each chunk handed to
/// the compression workers in turn (chunk i to worker i mod [`ZSTD_WORKERS`]).
struct ChunkCutter {
    chunk_bytes: usize,
    buf: Vec<u8>,
    jobs: Vec<SyncSender<Vec<u8>>>,
    spent: Receiver<Vec<u8>>,
    sent: usize,
}

impl ChunkCutter {
    fn hand_over(&mut self) -> io::Result<()> {
        let fresh = self
            .spent
            .try_recv()
            .unwrap_or_else(|_| Vec::with_capacity(self.chunk_bytes));
        let full = std::mem::replace(&mut self.buf, fresh);
        self.buf.clear();
        let worker = &self.jobs[self.sent % self.jobs.len()];
        if worker.send(full).is_err() {
            // A worker or the writer stopped on an error, which the caller reports.
            return Err(io::Error::other("the compression stopped early"));
        }
        self.sent += 1;
        Ok(())
    }

    /// Hands over the last, shorter chunk, and closes the workers' queues.
    fn finish(mut self) -> io::Result<()> {
        if !self.buf.is_empty() {
            self.hand_over()?;
        }
        Ok(())
    }
}

impl Write for ChunkCutter {
    fn write(&mut self, data: &[u8]) -> io::Result<usize> {
        let n = data.len().min(self.chunk_bytes - self.buf.len());
        self.buf.extend_from_slice(&data[..n]);
        if self.buf.len() == self.chunk_bytes {
            self.hand_over()?;
        }
        Ok(n)
    }

    fn flush(&mut self) -> io::Result<()> {
        Ok(())
    }
}

/// A compression worker: each chunk it is given becomes one zstd frame (level
/// [`ZSTD_LEVEL`], stating its decoded size), sent on with the chunk's buffer for reuse.
fn compress_chunks(jobs: Receiver<Vec<u8>>, frames: SyncSender<Frame>) {
    let compressor = zstd::bulk::Compressor::new(ZSTD_LEVEL).and_then(|mut c| {
        // No content checksum: each frame's SHA-256 is in the chunk list and every file's in
        // the manifest, so zstd's own XXH64 would only cost time on both sides.
        c.set_parameter(zstd::zstd_safe::CParameter::ChecksumFlag(false))?;
        c.set_parameter(zstd::zstd_safe::CParameter::ContentSizeFlag(true))?;
        Ok(c)
    });
    let mut compressor = match compressor {
        Ok(c) => c,
        Err(e) => {
            let _ = frames.send(Err(e));
            return;
        }
    };
    for chunk in jobs {
        let frame = compressor.compress(&chunk).map(|frame| (frame, chunk));
        let failed = frame.is_err();
        if frames.send(frame).is_err() || failed {
            return;
        }
    }
}

/// The writing thread: takes the frames in chunk order (from the workers in turn), writes
/// them to `file` at its position, records each in the chunk list, and flushes the file to
/// disk as it grows. Returns the chunk list.
fn write_frames<'scope>(
    scope: &'scope Scope<'scope, '_>,
    file: &mut File,
    frames: &[Receiver<Frame>],
    spent: &Sender<Vec<u8>>,
) -> io::Result<ListWriter> {
    let mut flusher = Flusher::spawn(scope, file.try_clone()?);
    let mut list = ListWriter::default();
    for index in 0.. {
        // A worker's queue closes after its last frame, so the first closed queue in turn is
        // the end.
        let Ok(next) = frames[index % frames.len()].recv() else {
            break;
        };
        let (frame, chunk) = next?;
        file.write_all(&frame)?;
        list.push(&frame);
        flusher.wrote(frame.len());
        // The cutter may have finished and gone; the buffer is then simply dropped.
        let _ = spent.send(chunk);
    }
    flusher.finish()?;
    Ok(list)
}

/// Signs a manifest's exact bytes under the manifest context.
pub fn sign_manifest(key: &SigningKey, manifest_bytes: &[u8]) -> SignatureEntry {
    let signature = key.sign(&signed_bytes(context::MANIFEST, manifest_bytes));
    SignatureEntry {
        key_id: KeyId::of_raw_key(key.verifying_key().as_bytes()),
        signature: signature.to_bytes(),
    }
}

/// The model file, open, and its size, refused when the format cannot hold it.
fn open_model(spec: &PackSpec) -> Result<(File, u64)> {
    let model = File::open(&spec.model)
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
    Ok((model, model_len))
}

/// The size of the inner tar (model, labels, end marker) before compression.
fn inner_tar_len(model_len: u64, labels_file: &[u8]) -> u64 {
    tar::entry_len(model_len)
        + tar::entry_len(labels_file.len() as u64)
        + tar::END_OF_ARCHIVE.len() as u64
}

/// Compresses the inner tar (model, labels) into `out` at its current position, in chunks of
/// `chunk_bytes`, hashing the model on the way, in a single read of the model file. Returns
/// the model's entry and the chunk list (which knows the payload's size).
fn write_payload(
    spec: &PackSpec,
    (mut model, model_len): (File, u64),
    labels_file: &[u8],
    (out, chunk_bytes): (&mut File, u32),
    bar: &ProgressBar,
) -> Result<(FileEntry, ListWriter)> {
    let mtime = spec.created.unix();
    let chunk_bytes = chunk_bytes as usize;
    let (model_hash, list) = std::thread::scope(|scope| -> Result<_> {
        let (spent_tx, spent_rx) = channel();
        let mut jobs = Vec::new();
        let mut frames = Vec::new();
        for _ in 0..ZSTD_WORKERS {
            let (job_tx, job_rx) = sync_channel(1);
            let (frame_tx, frame_rx) = sync_channel(1);
            scope.spawn(move || compress_chunks(job_rx, frame_tx));
            jobs.push(job_tx);
            frames.push(frame_rx);
        }
        let writer = scope.spawn(move || write_frames(scope, out, &frames, &spent_tx));
        let mut model_side = SideThread::spawn(scope);
        let mut cutter = ChunkCutter {
            chunk_bytes,
            buf: Vec::with_capacity(chunk_bytes),
            jobs,
            spent: spent_rx,
            sent: 0,
        };
        let fed = feed_inner_tar(
            spec,
            (&mut model, model_len),
            labels_file,
            mtime,
            (&mut cutter, &mut model_side),
            bar,
        );
        // Finishing (or, on an error, dropping) the cutter closes the workers' queues, which
        // ends the workers and then the writer.
        let fed = match fed {
            Ok(()) => cutter.finish().context("cannot compress the payload"),
            Err(e) => {
                drop(cutter);
                Err(e)
            }
        };
        let written = writer
            .join()
            .unwrap_or_else(|panic| std::panic::resume_unwind(panic));
        // The writer's error is the cause when both failed: the cutter only saw a closed queue.
        let list = written.context("cannot write the payload")?;
        fed?;
        Ok((model_side.finish()?, list))
    })?;
    let model_entry = FileEntry {
        path: spec.model_path.clone(),
        role: Role::Model,
        size: model_len,
        sha256: model_hash.finish(),
    };
    Ok((model_entry, list))
}

/// Writes the inner tar into `cutter`: the model's entry, read once and also fed to the
/// thread that hashes it, then the labels and the end-of-archive marker.
fn feed_inner_tar(
    spec: &PackSpec,
    (model, model_len): (&mut File, u64),
    labels_file: &[u8],
    mtime: u64,
    (cutter, model_side): (&mut ChunkCutter, &mut SideThread<'_>),
    bar: &ProgressBar,
) -> Result<()> {
    ustar::write_header(cutter, &spec.model_path, model_len, mtime)?;
    let mut seen = 0u64;
    let mut buf = Vec::with_capacity(CHUNK);
    loop {
        buf.resize(CHUNK, 0);
        let n = match model.read(&mut buf) {
            Ok(0) => break,
            Ok(n) => n,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => continue,
            Err(e) => return Err(e).context(format!("cannot read {}", spec.model.display())),
        };
        if seen + n as u64 > model_len {
            bail!(
                "{} grew while it was being packed; pack it again when it is no longer being written",
                spec.model.display()
            );
        }
        buf.truncate(n);
        cutter.write_all(&buf)?;
        seen += n as u64;
        bar.set_position(seen);
        buf = model_side.feed(buf)?;
    }
    if seen != model_len {
        bail!(
            "{} shrank while it was being packed; pack it again when it is no longer being written",
            spec.model.display()
        );
    }
    ustar::write_padding(cutter, model_len)?;
    ustar::write_entry(cutter, entry::LABELS, labels_file, mtime)?;
    ustar::write_end(cutter)?;
    Ok(())
}

/// The manifest for `spec` with these model and payload entries.
fn manifest_for(
    spec: &PackSpec,
    labels_file: &[u8],
    model: FileEntry,
    payload: Payload,
) -> Result<Manifest> {
    Ok(Manifest {
        format: ampoule_verify::format::FORMAT_VERSION,
        name: spec.name.clone(),
        version: spec.version.clone(),
        created: spec.created,
        requires_app: spec.requires_app.clone(),
        payload,
        files: vec![
            model,
            FileEntry {
                path: entry::LABELS.to_string(),
                role: Role::Labels,
                size: labels_file.len() as u64,
                sha256: Digest::of(labels_file),
            },
        ],
        label_count: u32::try_from(spec.labels.len()).context("too many labels")?,
        model: spec.model_signature.clone(),
        metadata: spec.metadata.clone(),
    })
}

/// Where the payload will most likely start: the manifest's length depends on the payload's
/// size and digests, known only once it is written, but the digests' length is fixed and the
/// compressed size almost always has as many digits as the uncompressed one. Block padding
/// absorbs the rest, except when a change of length crosses a block boundary. The chunk
/// list's length is exact: one record per `chunk_bytes` of the inner tar.
fn likely_payload_offset(
    spec: &PackSpec,
    labels_file: &[u8],
    model_len: u64,
    (key, chunk_bytes): (Option<&SigningKey>, u32),
) -> Result<u64> {
    let unknown = Digest::from_bytes([0; 32]);
    let tar_len = inner_tar_len(model_len, labels_file);
    let draft = manifest_for(
        spec,
        labels_file,
        FileEntry {
            path: spec.model_path.clone(),
            role: Role::Model,
            size: model_len,
            sha256: unknown,
        },
        chunked_payload(tar_len, chunk_bytes, unknown),
    )?;
    let list_len = tar_len.div_ceil(u64::from(chunk_bytes)) * chunks::RECORD_BYTES as u64;
    let mut signatures = Signatures::default();
    if let Some(key) = key {
        signatures.insert(SignatureEntry {
            key_id: KeyId::of_raw_key(key.verifying_key().as_bytes()),
            signature: [0; 64],
        });
    }
    Ok(bundle::payload_offset(
        draft.to_json().len() as u64,
        signatures.to_json().len() as u64,
        Some(list_len),
    ))
}

/// The manifest's payload object of format 2: `size` compressed bytes in chunks of
/// `chunk_bytes` of the inner tar, bound by the chunk list's SHA-256.
fn chunked_payload(size: u64, chunk_bytes: u32, chunks_sha256: Digest) -> Payload {
    Payload {
        compression: Compression::Zstd,
        size,
        sha256: None,
        chunk_bytes: Some(chunk_bytes),
        chunks_sha256: Some(chunks_sha256),
    }
}

/// Packs `spec` into a new bundle at `out`, signed by `key` if given. The bundle appears at
/// `out` only when it is complete; an existing file is never replaced.
pub fn pack(
    spec: &PackSpec,
    key: Option<&SigningKey>,
    out: &Path,
    bar: &ProgressBar,
) -> Result<Packed> {
    pack_guessing(spec, key, out, bar, 0)
}

/// [`pack`], with the payload's likely offset moved by `misguess` bytes, so that tests can
/// take the path that moves a payload written at the wrong place.
fn pack_guessing(
    spec: &PackSpec,
    key: Option<&SigningKey>,
    out: &Path,
    bar: &ProgressBar,
    misguess: u64,
) -> Result<Packed> {
    if fs::symlink_metadata(out).is_ok() {
        bail!(
            "{} already exists; choose another output name or remove it first (nothing was written)",
            out.display()
        );
    }
    let labels_file = labels::labels_file(&spec.labels);
    let model = open_model(spec)?;
    let Some(chunk_bytes) = chunks::writer_chunk_bytes(inner_tar_len(model.1, &labels_file)) else {
        bail!(
            "model {} is {} bytes, more than a bundle's {} chunks of {} bytes hold",
            spec.model.display(),
            model.1,
            limit::CHUNKS,
            1u64 << limit::CHUNK_LOG_MAX
        );
    };
    let guess = likely_payload_offset(spec, &labels_file, model.1, (key, chunk_bytes))? + misguess;
    let mut temp = temp_beside(out)?;
    temp.as_file_mut().seek(SeekFrom::Start(guess))?;
    let (model_entry, list) = write_payload(
        spec,
        model,
        &labels_file,
        (temp.as_file_mut(), chunk_bytes),
        bar,
    )
    .with_context(|| format!("cannot write bundle {}", out.display()))?;
    let payload_len = list.payload_len();
    let list = list.finish();
    let payload = chunked_payload(payload_len, chunk_bytes, Digest::of(&list));
    let manifest = manifest_for(spec, &labels_file, model_entry, payload)?;
    manifest
        .validate()
        .context("the manifest to be written is not valid")?;
    let manifest_bytes = manifest.to_json();
    if manifest_bytes.len() as u64 > limit::MANIFEST_BYTES {
        bail!(
            "the manifest would be {} bytes, over the format's limit of {} bytes (the model \
             declares very many or very long inputs and outputs, or the metadata holds long \
             arrays: the manifest stores it indented)",
            manifest_bytes.len(),
            limit::MANIFEST_BYTES
        );
    }
    let mut signatures = Signatures::default();
    if let Some(key) = key {
        signatures.insert(sign_manifest(key, &manifest_bytes));
    }
    let signers = signatures.signatures.iter().map(|s| s.key_id).collect();
    let signatures_bytes = signatures.to_json();
    let parts = Parts {
        mtime: spec.created.unix(),
        small: Small {
            manifest: &manifest_bytes,
            signatures: &signatures_bytes,
            chunks: Some(&list),
        },
        payload_len,
    };
    let offset = bundle::payload_offset(
        manifest_bytes.len() as u64,
        signatures_bytes.len() as u64,
        Some(list.len() as u64),
    );
    let bundle_len = if offset == guess {
        let file = temp.as_file_mut();
        file.seek(SeekFrom::Start(0))?;
        ustar::write_head(file, parts.mtime, parts.small, payload_len)
            .and_then(|()| file.seek(SeekFrom::Start(guess + payload_len)))
            .and_then(|_| ustar::write_tail(file, payload_len))
            .with_context(|| format!("cannot write bundle {}", out.display()))?;
        place(out, temp, Placement::New)?
    } else {
        // Rare: the guess was a block off. Copy the payload to its place in a second file
        // (copy_file_range, in the kernel, where the file system supports it).
        let file = temp.as_file_mut();
        file.seek(SeekFrom::Start(guess))?;
        write_bundle_file(out, &parts, file, Placement::New)?
    };
    Ok(Packed {
        manifest,
        bundle_len,
        signers,
    })
}

/// The small parts of a bundle and the length of its payload.
pub struct Parts<'a> {
    pub mtime: u64,
    pub small: Small<'a>,
    pub payload_len: u64,
}

/// Writes a complete bundle to a temporary file beside `out` and puts it in place.
pub fn write_bundle_file(
    out: &Path,
    parts: &Parts<'_>,
    payload: &mut File,
    placement: Placement<'_>,
) -> Result<u64> {
    let mut temp = temp_beside(out)?;
    ustar::write_bundle(
        temp.as_file_mut(),
        parts.mtime,
        parts.small,
        payload,
        parts.payload_len,
    )
    .with_context(|| format!("cannot write bundle {}", out.display()))?;
    place(out, temp, placement)
}

/// Rewrites an existing bundle with a new signatures document, copying manifest, chunk list
/// (format 2) and payload unchanged. The original is replaced only once the new file is complete on disk and
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
            small: Small {
                manifest: &layout.manifest,
                signatures: &signatures.to_json(),
                chunks: layout.chunks.as_deref(),
            },
            payload_len: layout.payload_len,
        },
        file,
        Placement::Replace(check),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec(dir: &Path) -> PackSpec {
        let model = dir.join("species.bin");
        crate::release::synth::write_weights(&model, 3 * 1024 * 1024 + 17, 5)
            .expect("write weights");
        PackSpec {
            model,
            model_path: "model.bin".into(),
            labels: crate::release::synth::SPECIES
                .iter()
                .map(|s| s.to_string())
                .collect(),
            name: "trailcam-species".into(),
            version: Version::new(1, 4, 0),
            requires_app: VersionReq::STAR,
            created: Timestamp::from_unix(1_764_547_200).expect("a time"),
            model_signature: None,
            metadata: None,
        }
    }

    #[test]
    fn a_misguessed_payload_offset_gives_the_same_bundle() {
        let dir = tempfile::tempdir().expect("temp dir");
        let spec = spec(dir.path());
        let key = SigningKey::from_bytes(&[9u8; 32]);
        let bar = ProgressBar::hidden();
        let (direct, moved) = (dir.path().join("a.ampoule"), dir.path().join("b.ampoule"));
        let a = pack(&spec, Some(&key), &direct, &bar).expect("pack in place");
        let b = pack_guessing(&spec, Some(&key), &moved, &bar, 512).expect("pack and move");
        assert_eq!(a.bundle_len, b.bundle_len);
        let (a_bytes, b_bytes) = (
            fs::read(&direct).expect("read a"),
            fs::read(&moved).expect("read b"),
        );
        assert!(a_bytes == b_bytes, "the two bundles differ");
        // Both halves agree on the layout: the reader finds the payload where it was written.
        let mut file = File::open(&direct).expect("open");
        let layout = bundle::read_layout(&mut file, a.bundle_len).expect("layout");
        assert_eq!(layout.payload_len, a.manifest.payload.size);
        let model = fs::read(&spec.model).expect("model");
        assert_eq!(a.manifest.model().sha256, Digest::of(&model));
        assert_eq!(fs::read_dir(dir.path()).expect("list").count(), 3);
    }
}
