//! Decompressing a verified payload: a bounded zstd decoder on one thread, the inner tar's
//! checks and the per-file SHA-256 on another, the writes on a third, and the staging
//! directory that turns into the destination only when everything matched. In format 2 a
//! fourth thread reads each chunk and checks its SHA-256 against the signed chunk list just
//! before the decoder gets it ([`crate::format::chunks`]), so checking and decoding overlap
//! and the payload is read once; each chunk's frame is decoded whole into a buffer of its
//! size. In format 1 the decoder reads one zstd stream whose digest was checked whole before.
//!
//! Memory is bounded by the chunk size (format 2) or the zstd window cap (format 1) and a few
//! fixed buffers, never by the model size.
//! Decoded chunks are shared with the writing thread, not copied: the hash and the write of
//! the same bytes run side by side.

use std::ffi::OsString;
use std::fs::File;
use std::io::{self, BufRead, Read, Seek, SeekFrom, Write};
use std::ops::Deref;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc::{Receiver, Sender, SyncSender, channel, sync_channel};
use std::sync::{Arc, Mutex};

use crate::check::bundle::VerifiedBundle;
use crate::check::policy::CompatibilityPolicy;
use crate::dir::{Dir, Refused};
use crate::error::{Error, ErrorKind, Result};
use crate::format::chunks::{Plan, spawn_checker};
use crate::format::digest::Hasher;
use crate::format::limit;
use crate::format::manifest::Manifest;
use crate::format::tar;
use crate::progress::{Progress, ProgressFn, Stage};
use crate::readahead::ReadAhead;
use zstd::zstd_safe::DCtx;

const ARCHIVE: &str = "payload";
const CHUNK: usize = 256 * 1024;
const CHUNKS_IN_FLIGHT: usize = 4;
/// Format 2's decoded chunks are whole chunks of the inner tar (512 KiB as pack writes them,
/// up to 4 MiB), not [`CHUNK`]s: fewer of them wait in each queue, so memory stays at a few
/// chunks.
const WHOLE_CHUNKS_IN_FLIGHT: usize = 2;
/// Where a decoding thread sends its decoded chunks, or the error that stopped it.
type Decoded = SyncSender<Result<Vec<u8>>>;

/// How much of a file is written between flushes to disk while it streams.
const EARLY_SYNC_BYTES: usize = 16 * 1024 * 1024;

/// Bytes inside a decoded chunk, shared with the writing thread instead of copied.
struct Piece {
    chunk: Arc<Vec<u8>>,
    start: usize,
    end: usize,
}

impl Deref for Piece {
    type Target = [u8];

    fn deref(&self) -> &[u8] {
        &self.chunk[self.start..self.end]
    }
}

/// Hands a chunk back to the decoder for reuse once nobody else holds it; the last holder
/// does this, whether that is the reader or the writing thread.
fn recycle(chunk: Arc<Vec<u8>>, spent: &Sender<Vec<u8>>) {
    if let Ok(buf) = Arc::try_unwrap(chunk) {
        let _ = spent.send(buf);
    }
}

/// Reads the decoder threads' chunks as one stream, chunk `i` from decoder `i` mod their
/// number, handing spent buffers back for reuse.
struct ChunkReader {
    chunks: Vec<Receiver<Result<Vec<u8>>>>,
    next: usize,
    spent: Sender<Vec<u8>>,
    current: Arc<Vec<u8>>,
    pos: usize,
    failed: Option<Error>,
}

impl ChunkReader {
    /// Makes sure unread bytes are at hand; false at the end of the stream.
    fn fill(&mut self) -> io::Result<bool> {
        while self.pos == self.current.len() {
            let decoder = &self.chunks[self.next % self.chunks.len()];
            self.next += 1;
            match decoder.recv() {
                Ok(Ok(chunk)) => {
                    let spent = std::mem::replace(&mut self.current, Arc::new(chunk));
                    recycle(spent, &self.spent);
                    self.pos = 0;
                }
                Ok(Err(e)) => {
                    self.failed = Some(e);
                    return Err(io::Error::other("payload decoding failed"));
                }
                Err(_) => return Ok(false),
            }
        }
        Ok(true)
    }

    /// Up to `max` of the next bytes, without copying them; `None` at the end of the stream.
    fn piece(&mut self, max: usize) -> io::Result<Option<Piece>> {
        if !self.fill()? {
            return Ok(None);
        }
        let end = self.current.len().min(self.pos.saturating_add(max));
        let piece = Piece {
            chunk: Arc::clone(&self.current),
            start: self.pos,
            end,
        };
        self.pos = end;
        Ok(Some(piece))
    }
}

impl Read for ChunkReader {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        if !self.fill()? {
            return Ok(0);
        }
        let n = buf.len().min(self.current.len() - self.pos);
        buf[..n].copy_from_slice(&self.current[self.pos..self.pos + n]);
        self.pos += n;
        Ok(n)
    }
}

/// Runs on its own thread for each file written: writes the pieces in order, recycling their
/// chunks, and gives the file back for its flush to disk.
///
/// A second thread flushes the file to disk every [`EARLY_SYNC_BYTES`] as it grows, so the
/// final `sync_all` has little left to wait for, the writes themselves never wait for the
/// disk, and a device with little memory does not pile up a whole model of unwritten pages.
fn write_pieces(file: File, pieces: Receiver<Piece>, spent: Sender<Vec<u8>>) -> io::Result<File> {
    let early = file.try_clone()?;
    let (kick, kicked) = sync_channel::<()>(1);
    std::thread::scope(|scope| {
        let flusher = scope.spawn(move || kicked.iter().try_for_each(|()| early.sync_data()));
        let written = write_each(file, pieces, &spent, kick);
        let flushed = flusher
            .join()
            .unwrap_or_else(|panic| std::panic::resume_unwind(panic));
        let file = written?;
        flushed?;
        Ok(file)
    })
}

/// The writing loop of [`write_pieces`]; returning drops `kick`, which stops the flusher.
fn write_each(
    mut file: File,
    pieces: Receiver<Piece>,
    spent: &Sender<Vec<u8>>,
    kick: SyncSender<()>,
) -> io::Result<File> {
    let mut unflushed = 0;
    for piece in pieces {
        file.write_all(&piece)?;
        unflushed += piece.len();
        recycle(piece.chunk, spent);
        if unflushed >= EARLY_SYNC_BYTES {
            // A flush already under way takes these pages too, so a full queue is no loss.
            let _ = kick.try_send(());
            unflushed = 0;
        }
    }
    Ok(file)
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

/// Format 2 decodes chunks on this many threads at once, each taking every second chunk:
/// frames are independent, so on two cores decoding no longer waits for one.
const DECODERS: usize = 2;

/// Runs on its own thread: decodes exactly the payload bytes, sends the output in chunks, and
/// stops with an error once the output passes `tar_len`. With a chunk plan (format 2) each
/// chunk of the payload is checked against its signed digest, on a thread of its own, before
/// a decoder sees it, and [`DECODERS`] threads decode the chunks, chunk `i` sent out on
/// `outs[i % DECODERS]`; without one (format 1) the payload's whole digest was checked before,
/// and one stream goes out on `outs[0]`.
fn decode(
    mut file: File,
    (offset, size, tar_len): (u64, u64, u64),
    plan: Option<Plan>,
    outs: Vec<Decoded>,
    spent: Receiver<Vec<u8>>,
) {
    let spent = Mutex::new(spent);
    let result = std::thread::scope(|scope| -> Result<()> {
        file.seek(SeekFrom::Start(offset))
            .map_err(|e| Error::io("cannot read the payload", e))?;
        // The compressed bytes are read (and checked) on yet another thread, so these only
        // decode.
        let Some(plan) = &plan else {
            let spent = spent.lock().unwrap_or_else(|e| e.into_inner());
            let input = ReadAhead::spawn(scope, file.take(size));
            return decode_stream(input, tar_len, (&outs[0], &spent));
        };
        let (inputs, checked): (Vec<_>, Vec<_>) = (0..outs.len()).map(|_| sync_channel(1)).unzip();
        let returned = spawn_checker(scope, file, plan, inputs);
        let spent = &spent;
        for (first, (input, out)) in checked.into_iter().zip(&outs).enumerate() {
            let returned = returned.clone();
            scope.spawn(move || {
                let decoded = decode_chunks(first, (input, &returned), plan, (out, spent));
                if let Err(e) = decoded {
                    let _ = out.send(Err(e));
                }
            });
        }
        Ok(())
    });
    if let Err(e) = result {
        let _ = outs[0].send(Err(e));
    }
}

/// Format 2, on one of the [`DECODERS`] threads: decodes chunks `first`, `first + DECODERS`,
/// ... as they arrive checked, each one zstd frame decoded whole into a buffer of the size the
/// chunk must decode to, and sends them on. A chunk that is not exactly one frame, or decodes
/// to another size, stops the payload.
fn decode_chunks(
    first: usize,
    (input, returned): (Receiver<Result<Vec<u8>>>, &Sender<Vec<u8>>),
    plan: &Plan,
    (out, spent): (&Decoded, &Mutex<Receiver<Vec<u8>>>),
) -> Result<()> {
    let mut dctx = DCtx::create();
    for (n, chunk) in input.into_iter().enumerate() {
        let index = first + n * DECODERS;
        let chunk = chunk?;
        let want = plan.len_of(index);
        let bad = |why: String| {
            Error::new(
                ErrorKind::Malformed,
                format!("payload chunk {index} is not valid zstd data: {why}"),
            )
        };
        let name = |code| zstd::zstd_safe::get_error_name(code).to_string();
        let frame =
            zstd::zstd_safe::find_frame_compressed_size(&chunk).map_err(|c| bad(name(c)))?;
        if frame != chunk.len() {
            return Err(bad(format!(
                "its first frame ends after {frame} of its {} bytes; a chunk is one frame",
                chunk.len()
            )));
        }
        // The writer always states each frame's decoded size; a frame must state its place's.
        match zstd::zstd_safe::get_frame_content_size(&chunk) {
            Ok(Some(n)) if n == want as u64 => {}
            Ok(Some(n)) => {
                return Err(bad(format!(
                    "its frame declares {n} decoded bytes, but its place in the inner tar holds {want}"
                )));
            }
            Ok(None) | Err(_) => {
                return Err(bad("its frame does not declare its decoded size".into()));
            }
        }
        let reused = spent
            .try_lock()
            .ok()
            .and_then(|spent| spent.try_recv().ok());
        let mut buf = reused.unwrap_or_default();
        buf.clear();
        buf.reserve_exact(want);
        // The buffer holds at least `want` bytes; a frame that does not decode to exactly its
        // declared size is an error of zstd's, or a count that differs below.
        let n = dctx
            .decompress(&mut buf, &chunk)
            .map_err(|c| bad(name(c)))?;
        if n != want {
            return Err(bad(format!(
                "it decodes to {n} bytes, not the {want} bytes of its place in the inner tar"
            )));
        }
        let _ = returned.send(chunk);
        if out.send(Ok(buf)).is_err() {
            // The reader stopped early because it found an error of its own.
            return Ok(());
        }
    }
    Ok(())
}

fn decompresses_past(tar_len: u64) -> Error {
    Error::new(
        ErrorKind::TooLarge,
        format!("payload decompresses to more than the {tar_len} bytes its manifest declares"),
    )
}

/// Format 1: decodes the payload as one zstd stream (its digest was checked whole before),
/// sending the output in chunks, until it passes `tar_len`.
fn decode_stream<R: BufRead>(
    input: R,
    tar_len: u64,
    (out, spent): (&Decoded, &Receiver<Vec<u8>>),
) -> Result<()> {
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
            // The declared bytes go to the reader first: what they hold (a pax header, a
            // GNU long name, a directory entry, an extra file) is the real cause, and the
            // reader names it before it reaches this error.
            let excess = usize::try_from(total - tar_len).unwrap_or(usize::MAX);
            buf.truncate(filled.saturating_sub(excess));
            if !buf.is_empty() && out.send(Ok(buf)).is_err() {
                return Ok(());
            }
            return Err(decompresses_past(tar_len));
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
}

/// Where the files go: nowhere (check only) or a staging directory, and how many decoded
/// pieces may wait for the writing thread.
struct Sink<'a> {
    dir: Option<&'a Dir>,
    depth: usize,
}

impl Sink<'_> {
    fn open(&self, name: &str) -> Result<Option<File>> {
        let Some(dir) = self.dir else { return Ok(None) };
        // Created new inside the open staging directory: never through a link.
        dir.create_new(name)
            .map(Some)
            .map_err(|e| Error::io(format!("cannot create {}", dir.join(name).display()), e))
    }
}

/// A payload to decompress: the open bundle file, where the payload starts, the manifest
/// that declares its size and digests, and, in format 2, the chunk plan each chunk is checked
/// against as it is read (in format 1 the whole payload's digest was checked already).
pub(crate) struct Source<'a> {
    pub file: &'a File,
    pub payload_offset: u64,
    pub manifest: &'a Manifest,
    pub chunks: Option<&'a [u8]>,
    pub progress: Option<&'a ProgressFn>,
}

/// Decompresses and checks the payload, writing files into `dir` when given. Returns the
/// labels.
pub(crate) fn stream(source: &Source<'_>, dir: Option<&Dir>) -> Result<Vec<String>> {
    let manifest = source.manifest;
    let tar_len = manifest.unpacked_tar_len();
    // Progress counts file data only (what `read_payload` advances by), not tar headers.
    let data_len = manifest.files_len();
    let file = source
        .file
        .try_clone()
        .map_err(|e| Error::io("cannot read the payload", e))?;
    let (offset, size) = (source.payload_offset, manifest.payload.size);
    let plan = match source.chunks {
        Some(list) => Some(Plan::new(list, manifest)?),
        None => None,
    };
    let depth = match plan {
        Some(_) => WHOLE_CHUNKS_IN_FLIGHT,
        None => CHUNKS_IN_FLIGHT,
    };
    let decoders = if plan.is_some() { DECODERS } else { 1 };
    let (chunk_txs, chunk_rxs): (Vec<_>, Vec<_>) =
        (0..decoders).map(|_| sync_channel(depth)).unzip();
    let (spent_tx, spent_rx) = channel();
    let sink = Sink { dir, depth };
    let progress = source.progress.cloned();
    let done = AtomicU64::new(0);
    std::thread::scope(|scope| {
        scope.spawn(move || decode(file, (offset, size, tar_len), plan, chunk_txs, spent_rx));
        let mut reader = ChunkReader {
            chunks: chunk_rxs,
            next: 0,
            spent: spent_tx,
            current: Arc::new(Vec::new()),
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
        let out = sink.open(&declared.path)?;
        let cannot_write = |e| Error::io(format!("cannot write {}", declared.path), e);
        let (found, out) = std::thread::scope(|scope| -> Result<_> {
            let mut writer = out.map(|file| {
                let (pieces, queued) = sync_channel(sink.depth);
                let spent = reader.spent.clone();
                (
                    pieces,
                    scope.spawn(move || write_pieces(file, queued, spent)),
                )
            });
            let mut hasher = Hasher::new();
            let mut left = size;
            while left > 0 {
                let want = usize::try_from(left).unwrap_or(usize::MAX);
                let piece = match reader.piece(want) {
                    Ok(Some(piece)) => piece,
                    Ok(None) => {
                        return Err(tar::truncated(&format!(
                            "{ARCHIVE} entry '{}'",
                            declared.path
                        )));
                    }
                    Err(e) => {
                        let what = format!("cannot read {ARCHIVE} entry '{}'", declared.path);
                        return Err(Error::io(what, e));
                    }
                };
                hasher.update(&piece);
                if declared.role == crate::format::manifest::Role::Labels {
                    labels_bytes.extend_from_slice(&piece);
                }
                let n = piece.len() as u64;
                if let Some((pieces, _)) = &writer
                    && pieces.send(piece).is_err()
                {
                    // The writing thread stopped on an error; it is reported below.
                    break;
                }
                left -= n;
                advance(n);
            }
            let file = match writer.take() {
                Some((pieces, handle)) => {
                    drop(pieces);
                    let file = handle
                        .join()
                        .unwrap_or_else(|panic| std::panic::resume_unwind(panic))
                        .map_err(cannot_write)?;
                    Some(file)
                }
                None => None,
            };
            Ok((hasher.finish(), file))
        })?;
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
    let labels = manifest.parse_labels(&labels_bytes)?;
    Ok(labels)
}

/// A staging directory that removes itself unless it was renamed into place (`keep`). It is
/// created and used through open directory handles, so a link planted at its name or at its
/// parent's name never redirects a write.
pub(crate) struct Staging<'p> {
    /// The directory it lives in.
    pub parent: &'p Dir,
    /// Its name in `parent`; after a rename, the new name, so that a failure removes that.
    pub name: OsString,
    /// The open staging directory.
    pub dir: Dir,
    pub keep: bool,
}

impl Drop for Staging<'_> {
    fn drop(&mut self) {
        if !self.keep {
            let _ = self.parent.remove(&self.name);
        }
    }
}

impl<'p> Staging<'p> {
    /// Makes a fresh, empty directory in `parent` named `<prefix><pid>-<nanos>-<attempt>`, so
    /// that leftovers of a crashed run can be recognised by their prefix.
    pub(crate) fn create_in(parent: &'p Dir, prefix: &str) -> Result<Staging<'p>> {
        let pid = std::process::id();
        let cannot = |e| {
            Error::io(
                format!(
                    "cannot create a staging directory in {}",
                    parent.path().display()
                ),
                e,
            )
        };
        for attempt in 0..100u32 {
            let nanos = std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map_or(0, |d| d.subsec_nanos());
            let name = OsString::from(format!("{prefix}{pid}-{nanos:x}-{attempt}"));
            match parent.make_dir(&name) {
                Ok(dir) => {
                    return Ok(Staging {
                        parent,
                        name,
                        dir,
                        keep: false,
                    });
                }
                Err(Refused::Io(e)) if e.kind() == io::ErrorKind::AlreadyExists => continue,
                Err(Refused::Io(e)) => return Err(cannot(e)),
                Err(Refused::Missing | Refused::Planted(_)) => {
                    return Err(cannot(io::Error::other(
                        "the new directory was replaced while it was being opened",
                    )));
                }
            }
        }
        Err(Error::new(
            ErrorKind::Destination,
            format!(
                "cannot find a free staging directory name in {}",
                parent.path().display()
            ),
        ))
    }
}

fn parent_of(path: &Path) -> &Path {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    }
}

/// Flushes a directory's entries to disk, so a rename in it survives a power cut.
pub(crate) fn sync_dir(dir: &Dir) -> Result<()> {
    dir.sync().map_err(|e| {
        Error::io(
            format!("cannot flush directory {} to disk", dir.path().display()),
            e,
        )
    })
}

/// Unpacks into a staging directory and renames it to `dest` once every check passed,
/// including `last_checks` on the labels and the staged files.
pub(crate) fn unpack_to(
    source: &Source<'_>,
    dest: &Path,
    last_checks: &dyn Fn(&[String], &Dir) -> Result<()>,
) -> Result<Vec<String>> {
    let exists = || {
        Error::new(
            ErrorKind::Destination,
            format!(
                "{} already exists; unpack into a new directory (nothing was written)",
                dest.display()
            ),
        )
    };
    let Some(name) = dest.file_name() else {
        return Err(exists());
    };
    let parent = Dir::open_root(parent_of(dest), false)
        .map_err(|e| Error::io(format!("cannot open {}", parent_of(dest).display()), e))?;
    if parent
        .found(name)
        .map_err(|e| Error::io(format!("cannot read {}", dest.display()), e))?
        .is_some()
    {
        return Err(exists());
    }
    let stem = name.to_string_lossy().into_owned();
    let mut staging = Staging::create_in(&parent, &format!(".{stem}.partial-"))?;
    let labels = stream(source, Some(&staging.dir))?;
    last_checks(&labels, &staging.dir)?;
    sync_dir(&staging.dir)?;
    parent.rename(&staging.name, &parent, name).map_err(|e| {
        Error::io(
            format!("cannot move the unpacked files to {}", dest.display()),
            e,
        )
    })?;
    staging.keep = true;
    sync_dir(&parent)?;
    Ok(labels)
}

/// The checks a release's files get once they are all written and each matched the manifest,
/// whether they were unpacked from a bundle or rebuilt from a delta: the labels the app
/// requires, and the model's signature read again.
pub(crate) fn check_unpacked(
    manifest: &Manifest,
    compatibility: Option<&CompatibilityPolicy>,
    labels: &[String],
    dir: &Dir,
) -> Result<()> {
    if let Some(policy) = compatibility {
        policy.check_required_labels(labels)?;
    }
    check_model_signature(manifest, dir)
}

/// Reads the unpacked model's signature again, under the reading rules and with the
/// classifier the signed manifest names, and requires it to be the record the manifest
/// holds, so a manifest cannot describe a different model than it ships, and a bundle packed
/// under older rules still installs.
fn check_model_signature(manifest: &Manifest, dir: &Dir) -> Result<()> {
    let Some(recorded) = &manifest.model else {
        // Packed as opaque: the manifest makes no claim about the model's structure.
        return Ok(());
    };
    let model = manifest.model();
    let shown = dir.join(&model.path);
    let file = dir
        .open_file(&model.path)
        .map_err(|e| Error::io(format!("cannot open {}", shown.display()), e.into_io()))?;
    let len = file
        .metadata()
        .map_err(|e| Error::io(format!("cannot read {}", shown.display()), e))?
        .len();
    let found = crate::format::model::read_as(
        &model.path,
        file,
        len,
        recorded.rules,
        recorded.classifier.as_ref(),
    )?;
    if found.as_ref() != Some(recorded) {
        return Err(Error::new(
            ErrorKind::Manifest,
            format!(
                "{} does not have the model signature its manifest records; the bundle was packed wrongly",
                model.path
            ),
        ));
    }
    Ok(())
}

/// Decompression of a verified bundle: the payload layer's part of [`VerifiedBundle`], which
/// the checks below it only ever hand on.
impl VerifiedBundle {
    /// Decompresses the payload and checks every file's size and digest without writing
    /// anything. Memory stays bounded whatever the model's size.
    pub fn check_contents(&mut self) -> Result<Vec<String>> {
        let labels = crate::payload::unpack::stream(&self.source(), None)?;
        self.check_labels(&labels)?;
        Ok(labels)
    }

    /// Decompresses into `dir`, an existing empty staging directory, with every check that
    /// [`VerifiedBundle::unpack`] makes before its rename. For the store, which stages and
    /// renames on its own.
    pub(crate) fn unpack_into_staging(&self, dir: &Dir) -> Result<Vec<String>> {
        let labels = crate::payload::unpack::stream(&self.source(), Some(dir))?;
        self.last_checks(&labels, dir)?;
        Ok(labels)
    }

    /// The checks that need the unpacked files: required labels, and the model's signature.
    fn last_checks(&self, labels: &[String], staged: &Dir) -> Result<()> {
        check_unpacked(&self.manifest, self.compatibility.as_ref(), labels, staged)
    }

    fn check_labels(&self, labels: &[String]) -> Result<()> {
        match &self.compatibility {
            Some(policy) => policy.check_required_labels(labels),
            None => Ok(()),
        }
    }

    fn source(&self) -> crate::payload::unpack::Source<'_> {
        crate::payload::unpack::Source {
            file: &self.file,
            payload_offset: self.layout.payload_offset,
            manifest: &self.manifest,
            chunks: self.layout.chunks.as_deref(),
            progress: self.progress.as_ref(),
        }
    }

    /// Unpacks the model and labels into the new directory `dest`, which must not exist.
    /// Files are written into a fresh staging directory beside it and checked as they stream;
    /// only when every check passed is the staging directory renamed to `dest`. On any
    /// failure nothing is left behind.
    pub fn unpack(self, dest: &Path) -> Result<Unpacked> {
        let labels = crate::payload::unpack::unpack_to(&self.source(), dest, &|labels, staged| {
            self.last_checks(labels, staged)
        })?;
        Ok(Unpacked {
            model: dest.join(&self.manifest.model().path),
            labels_path: dest.join(&self.manifest.labels().path),
            dir: dest.to_path_buf(),
            labels,
            manifest: self.manifest,
        })
    }
}

/// A verified bundle's files, unpacked and checked.
#[derive(Debug, Clone)]
pub struct Unpacked {
    /// The directory holding the files.
    pub dir: PathBuf,
    /// The model file.
    pub model: PathBuf,
    /// The label list file.
    pub labels_path: PathBuf,
    /// The labels, in output-index order.
    pub labels: Vec<String>,
    /// The verified manifest.
    pub manifest: Manifest,
}
