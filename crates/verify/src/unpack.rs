//! Decompressing a verified payload: a bounded zstd decoder on one thread, the inner tar's
//! checks, the per-file SHA-256 and the writes on another, and the staging directory that
//! turns into the destination only when everything matched.
//!
//! Memory is bounded by the zstd window cap and a few fixed buffers, never by the model size.

use std::fs::{self, File, OpenOptions};
use std::io::{self, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{Receiver, Sender, SyncSender, channel, sync_channel};

use crate::digest::Hasher;
use crate::error::{Error, ErrorKind, Result};
use crate::format::limit;
use crate::labels::parse_stored_labels;
use crate::manifest::Manifest;
use crate::tar;
use crate::verify::{Progress, ProgressFn, Stage};

const ARCHIVE: &str = "payload";
const CHUNK: usize = 256 * 1024;
const CHUNKS_IN_FLIGHT: usize = 4;

/// Reads the decoder thread's chunks as one stream, handing spent buffers back for reuse.
struct ChunkReader {
    chunks: Receiver<Result<Vec<u8>>>,
    spent: Sender<Vec<u8>>,
    current: Vec<u8>,
    pos: usize,
    failed: Option<Error>,
}

impl Read for ChunkReader {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        while self.pos == self.current.len() {
            match self.chunks.recv() {
                Ok(Ok(chunk)) => {
                    let spent = std::mem::replace(&mut self.current, chunk);
                    let _ = self.spent.send(spent);
                    self.pos = 0;
                }
                Ok(Err(e)) => {
                    self.failed = Some(e);
                    return Err(io::Error::other("payload decoding failed"));
                }
                Err(_) => return Ok(0),
            }
        }
        let n = buf.len().min(self.current.len() - self.pos);
        buf[..n].copy_from_slice(&self.current[self.pos..self.pos + n]);
        self.pos += n;
        Ok(n)
    }
}

fn decode_error(e: &io::Error) -> Error {
    let text = e.to_string();
    if text.contains("memory") || text.contains("indow") {
        Error::new(
            ErrorKind::TooLarge,
            format!(
                "payload's zstd frame needs a window larger than the {} MiB this verifier allows ({text})",
                (1u64 << limit::WINDOW_LOG) >> 20
            ),
        )
    } else {
        Error::new(
            ErrorKind::Malformed,
            format!("payload is not valid zstd data: {text}"),
        )
    }
}

/// Runs on its own thread: decodes exactly the payload bytes, sends the output in chunks, and
/// stops with an error once the output passes `tar_len`.
fn decode(
    mut file: File,
    offset: u64,
    size: u64,
    tar_len: u64,
    out: SyncSender<Result<Vec<u8>>>,
    spent: Receiver<Vec<u8>>,
) {
    let result = (|| -> Result<()> {
        file.seek(SeekFrom::Start(offset))
            .map_err(|e| Error::io("cannot read the payload", e))?;
        let input = io::BufReader::with_capacity(CHUNK, file.take(size));
        let mut decoder = zstd::stream::read::Decoder::with_buffer(input)
            .map_err(|e| Error::io("cannot start the zstd decoder", e))?;
        decoder
            .window_log_max(limit::WINDOW_LOG)
            .map_err(|e| Error::io("cannot set the zstd window limit", e))?;
        let mut limited = decoder.take(tar_len + 1);
        let mut total = 0u64;
        loop {
            let mut buf = spent.try_recv().unwrap_or_default();
            buf.resize(CHUNK, 0);
            let mut filled = 0;
            while filled < buf.len() {
                match limited.read(&mut buf[filled..]) {
                    Ok(0) => break,
                    Ok(n) => filled += n,
                    Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
                    Err(e) => return Err(decode_error(&e)),
                }
            }
            total += filled as u64;
            if total > tar_len {
                return Err(Error::new(
                    ErrorKind::TooLarge,
                    format!(
                        "payload decompresses to more than the {tar_len} bytes its manifest declares"
                    ),
                ));
            }
            if filled == 0 {
                return Ok(());
            }
            buf.truncate(filled);
            if out.send(Ok(buf)).is_err() {
                // The reader stopped early because it found an error of its own.
                return Ok(());
            }
        }
    })();
    if let Err(e) = result {
        let _ = out.send(Err(e));
    }
}

/// Where the files go: nowhere (check only) or a staging directory.
struct Sink<'a> {
    dir: Option<&'a Path>,
}

impl Sink<'_> {
    fn open(&self, name: &str) -> Result<Option<File>> {
        let Some(dir) = self.dir else { return Ok(None) };
        let path = dir.join(name);
        OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(&path)
            .map(Some)
            .map_err(|e| Error::io(format!("cannot create {}", path.display()), e))
    }
}

/// A payload to decompress: the open bundle file, where the payload starts, and the manifest
/// that declares its size and digests (already checked against the payload's digest).
pub(crate) struct Source<'a> {
    pub file: &'a File,
    pub payload_offset: u64,
    pub manifest: &'a Manifest,
    pub progress: Option<&'a ProgressFn>,
}

/// Decompresses and checks the payload, writing files into `dir` when given. Returns the
/// labels.
pub(crate) fn stream(source: &Source<'_>, dir: Option<&Path>) -> Result<Vec<String>> {
    let manifest = source.manifest;
    let tar_len = manifest.unpacked_tar_len();
    // Progress counts file data only (what `read_payload` advances by), not tar headers.
    let data_len = manifest.files_len();
    let file = source
        .file
        .try_clone()
        .map_err(|e| Error::io("cannot read the payload", e))?;
    let (offset, size) = (source.payload_offset, manifest.payload.size);
    let (chunk_tx, chunk_rx) = sync_channel(CHUNKS_IN_FLIGHT);
    let (spent_tx, spent_rx) = channel();
    let sink = Sink { dir };
    let progress = source.progress.cloned();
    let done = AtomicU64::new(0);
    std::thread::scope(|scope| {
        scope.spawn(move || decode(file, offset, size, tar_len, chunk_tx, spent_rx));
        let mut reader = ChunkReader {
            chunks: chunk_rx,
            spent: spent_tx,
            current: Vec::new(),
            pos: 0,
            failed: None,
        };
        let result = read_payload(&mut reader, manifest, &sink, &|n| {
            let now = done.fetch_add(n, Ordering::Relaxed) + n;
            if let Some(report) = &progress {
                report(Progress {
                    stage: Stage::Unpack,
                    done: now,
                    total: data_len,
                });
            }
        });
        // Dropping the reader closes the channel, which stops the decoder thread.
        let failed = reader.failed.take();
        drop(reader);
        match (result, failed) {
            (_, Some(decoder_error)) => Err(decoder_error),
            (result, None) => result,
        }
    })
}

fn read_payload(
    reader: &mut ChunkReader,
    manifest: &Manifest,
    sink: &Sink<'_>,
    advance: &dyn Fn(u64),
) -> Result<Vec<String>> {
    let order: Vec<&str> = manifest.files.iter().map(|f| f.path.as_str()).collect();
    let mut labels_bytes = Vec::new();
    let mut buf = vec![0u8; CHUNK];
    for (index, declared) in manifest.files.iter().enumerate() {
        let size = tar::expect_entry(reader, ARCHIVE, &order, index)?;
        if size != declared.size {
            return Err(Error::new(
                ErrorKind::Digest,
                format!(
                    "payload entry '{}' is {size} bytes but the manifest declares {} bytes",
                    declared.path, declared.size
                ),
            ));
        }
        let mut out = sink.open(&declared.path)?;
        let mut hasher = Hasher::new();
        let mut left = size;
        while left > 0 {
            let want = buf.len().min(usize::try_from(left).unwrap_or(usize::MAX));
            tar::read_exact_or_truncated(reader, &mut buf[..want], || {
                format!("{ARCHIVE} entry '{}'", declared.path)
            })?;
            let chunk = &buf[..want];
            hasher.update(chunk);
            if declared.role == crate::manifest::Role::Labels {
                labels_bytes.extend_from_slice(chunk);
            }
            if let Some(file) = out.as_mut() {
                file.write_all(chunk)
                    .map_err(|e| Error::io(format!("cannot write {}", declared.path), e))?;
            }
            left -= want as u64;
            advance(want as u64);
        }
        let found = hasher.finish();
        if found != declared.sha256 {
            return Err(Error::new(
                ErrorKind::Digest,
                format!(
                    "digest mismatch for '{}': manifest declares sha256 {}, the payload holds {found}",
                    declared.path, declared.sha256
                ),
            ));
        }
        if let Some(file) = out {
            file.sync_all()
                .map_err(|e| Error::io(format!("cannot flush {} to disk", declared.path), e))?;
        }
        tar::read_padding(reader, size, ARCHIVE, &declared.path)?;
    }
    tar::read_end(reader, ARCHIVE)?;
    let labels = parse_stored_labels(&labels_bytes)?;
    if labels.len() != manifest.label_count as usize {
        return Err(Error::new(
            ErrorKind::Manifest,
            format!(
                "labels.txt holds {} labels but the manifest declares {}",
                labels.len(),
                manifest.label_count
            ),
        ));
    }
    Ok(labels)
}

/// A staging directory that removes itself unless it was renamed into place (`keep`).
pub(crate) struct Staging {
    pub path: PathBuf,
    pub keep: bool,
}

impl Drop for Staging {
    fn drop(&mut self) {
        if !self.keep {
            let _ = fs::remove_dir_all(&self.path);
        }
    }
}

impl Staging {
    /// Makes a fresh, empty directory in `dir` named `<prefix><pid>-<nanos>-<attempt>`, so
    /// that leftovers of a crashed run can be recognised by their prefix.
    pub(crate) fn create_in(dir: &Path, prefix: &str) -> Result<Staging> {
        let pid = std::process::id();
        for attempt in 0..100u32 {
            let nanos = std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map_or(0, |d| d.subsec_nanos());
            let path = dir.join(format!("{prefix}{pid}-{nanos:x}-{attempt}"));
            match fs::create_dir(&path) {
                Ok(()) => return Ok(Staging { path, keep: false }),
                Err(e) if e.kind() == io::ErrorKind::AlreadyExists => continue,
                Err(e) => {
                    return Err(Error::io(
                        format!("cannot create a staging directory in {}", dir.display()),
                        e,
                    ));
                }
            }
        }
        Err(Error::new(
            ErrorKind::Destination,
            format!(
                "cannot find a free staging directory name in {}",
                dir.display()
            ),
        ))
    }
}

/// Makes a fresh, empty staging directory beside `dest`.
fn make_staging(dest: &Path) -> Result<Staging> {
    let stem = dest
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "bundle".into());
    Staging::create_in(parent_of(dest), &format!(".{stem}.partial-"))
}

fn parent_of(path: &Path) -> &Path {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    }
}

/// Flushes a directory's entries to disk, so a rename in it survives a power cut.
pub(crate) fn sync_dir(dir: &Path) -> Result<()> {
    File::open(dir).and_then(|d| d.sync_all()).map_err(|e| {
        Error::io(
            format!("cannot flush directory {} to disk", dir.display()),
            e,
        )
    })
}

/// Unpacks into a staging directory and renames it to `dest` once every check passed,
/// including `last_checks` on the labels and the staged files.
pub(crate) fn unpack_to(
    source: &Source<'_>,
    dest: &Path,
    last_checks: &dyn Fn(&[String], &Path) -> Result<()>,
) -> Result<Vec<String>> {
    if fs::symlink_metadata(dest).is_ok() {
        return Err(Error::new(
            ErrorKind::Destination,
            format!(
                "{} already exists; unpack into a new directory (nothing was written)",
                dest.display()
            ),
        ));
    }
    let mut staging = make_staging(dest)?;
    let labels = stream(source, Some(&staging.path))?;
    last_checks(&labels, &staging.path)?;
    sync_dir(&staging.path)?;
    fs::rename(&staging.path, dest).map_err(|e| {
        Error::io(
            format!("cannot move the unpacked files to {}", dest.display()),
            e,
        )
    })?;
    staging.keep = true;
    sync_dir(parent_of(dest))?;
    Ok(labels)
}
