//! Offline install: one update answered from a file instead of a network, for a device that a
//! technician visits with an SD card. The file holds what the device would have fetched (its
//! channel's feed, the trust sets up to the one the feed names with the ledger's proofs of
//! them, the ledger's consistency steps, the bundle;
//! see [`crate::format::offline`]), and the same [`Session`](super::Session) as an online update asks for each
//! of them, so every check runs, in the same order, with one exception: a device without a
//! network cannot tell a fresh feed from a stale one, so the feed's expiry is not checked.
//! Everything else holds: signatures, channel, a feed issued in the future, the sequence the
//! store accepted (an older file after a newer install is a replay), the ledger, the rollout,
//! the app's limits and every check of the bundle.
//!
//! The archive is read with the bounded ustar reader that bundles use ([`crate::format::tar`]): only
//! regular files, only the format's names in the format's order, each within its cap, nothing
//! after the end-of-archive marker. Opening the file reads headers only. A document is read
//! when the session asks for it, and the bundle is copied into the store's download directory
//! at exactly the size the feed declares, hashed on the way.
//!
//! The expiry switch is crate-private: no app can turn it off for a feed it fetched.
//!
//! ```compile_fail,E0624
//! fn weaken(session: ampoule_verify::update::Session<'_>) -> ampoule_verify::update::Session<'_> {
//!     session.offline()
//! }
//! ```

use std::collections::BTreeMap;
use std::fs::File;
use std::io::{self, BufReader, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use crate::error::{Error, ErrorKind, Result};
use crate::format::digest::{Digest, Hasher};
use crate::format::ledger_entry::{MAX_STEP_BYTES, MAX_STEPS};
use crate::format::offline::{
    FORMAT_VERSION, HEADER, HEADER_BYTES, Header, bundle_entry, entry_of_url, feed_entry, feed_url,
    step_entry, trust_set_entry,
};
use crate::format::tar::{self, Block, Names};
use crate::format::time::Timestamp;
use crate::format::trust_proofs;
use crate::format::{limit, trust_set};
use crate::progress::{Progress, ProgressFn, Stage};

use super::{Device, Download, Fetch, Next, Report};

/// The archive in messages.
const ARCHIVE: &str = "offline file";

/// What an entry is, in the only order entries may come: each entry's part must be greater
/// than the one before, which also refuses a second feed, proofs file or bundle, and trust
/// sets or steps out of ascending order.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
enum Part {
    Header,
    Feed,
    TrustSet(u64),
    TrustProofs,
    Step(u64),
    Bundle,
}

impl Part {
    fn cap(self, max_bundle_bytes: u64) -> u64 {
        match self {
            Part::Header => HEADER_BYTES,
            Part::Feed => limit::FEED_BYTES,
            Part::TrustSet(_) => trust_set::MAX_BYTES,
            Part::TrustProofs => trust_proofs::MAX_BYTES,
            Part::Step(_) => MAX_STEP_BYTES,
            Part::Bundle => max_bundle_bytes,
        }
    }
}

/// Where one entry's data is in the file.
#[derive(Debug, Clone, Copy)]
struct Span {
    offset: u64,
    size: u64,
}

/// An offline file whose layout was checked: its channel and where each entry is.
struct OfflineFile {
    path: PathBuf,
    file: File,
    channel: String,
    entries: BTreeMap<String, Span>,
}

/// The channel an offline file is for, from its first entry. Nothing else in the file is read
/// or checked here ([`Device::install_offline`] checks all of it); for a tool that opens the
/// device by the file's channel.
///
/// # Errors
///
/// [`ErrorKind::Malformed`] for a file that does not start with a valid [`HEADER`] entry;
/// [`ErrorKind::Feed`] for a channel name no feed can carry; I/O errors.
pub fn offline_channel(file: &Path) -> Result<String> {
    let opened = File::open(file)
        .map_err(|e| Error::io(format!("cannot open offline file {}", file.display()), e))?;
    let mut reader = BufReader::with_capacity(4 * 1024, &opened);
    Ok(read_header(&mut reader)?.0.channel)
}

/// Reads the first entry, which must be [`HEADER`], and checks what it says. Returns it and
/// the reader's position after its padding.
fn read_header<R: Read>(reader: &mut R) -> Result<(Header, u64)> {
    let mut h = [0u8; 512];
    tar::read_exact_or_truncated(reader, &mut h, || format!("{ARCHIVE} header of '{HEADER}'"))?;
    let size = match tar::parse_header_with(&h, ARCHIVE, Names::Paths)? {
        Block::File { name, size } if name == HEADER => size,
        Block::File { name, .. } => {
            return Err(Error::new(
                ErrorKind::Malformed,
                format!(
                    "{ARCHIVE} entry 1 is '{}', not '{HEADER}': this is not an offline file",
                    tar::shown(name.as_bytes())
                ),
            ));
        }
        Block::Zero => {
            return Err(Error::new(
                ErrorKind::Malformed,
                format!("{ARCHIVE} is empty: it holds no '{HEADER}'"),
            ));
        }
    };
    too_large(HEADER, size, HEADER_BYTES)?;
    let mut bytes = vec![0u8; size as usize];
    tar::read_exact_or_truncated(reader, &mut bytes, || format!("{ARCHIVE} entry '{HEADER}'"))?;
    tar::read_padding(reader, size, ARCHIVE, HEADER)?;
    let header: Header = serde_json::from_slice(&bytes).map_err(|e| {
        Error::new(
            ErrorKind::Malformed,
            format!("{ARCHIVE} entry '{HEADER}' is not valid: {e}"),
        )
    })?;
    if header.format != FORMAT_VERSION {
        // The header is not signed, so a newer number here proves nothing about the release:
        // it is a refusal, never a reason to report that another app is needed.
        return Err(Error::new(
            ErrorKind::Malformed,
            format!(
                "{ARCHIVE} format {} is not supported (this reader knows format {FORMAT_VERSION})",
                header.format
            ),
        ));
    }
    crate::check::feed::check_channel(&header.channel)?;
    Ok((header, tar::entry_len(size)))
}

fn too_large(name: &str, size: u64, cap: u64) -> Result<()> {
    if size > cap {
        return Err(Error::new(
            ErrorKind::TooLarge,
            format!("{ARCHIVE} entry '{name}' is {size} bytes, over the limit of {cap} bytes"),
        ));
    }
    Ok(())
}

/// What `name` stands for in a file of `channel`, when it is one of the format's names
/// written the one way the writer writes it (no leading zeros, lowercase hex).
fn part_of(name: &str, channel: &str) -> Option<Part> {
    if name == HEADER {
        return Some(Part::Header);
    }
    if name == feed_entry(channel) {
        return Some(Part::Feed);
    }
    // Parse the file name's number or digest, then compare with the name the format writes
    // for it: that refuses leading zeros, a `+`, uppercase hex and any other directory.
    let (_, file) = name.rsplit_once('/')?;
    if let Some(n) = file
        .strip_suffix(".json")
        .and_then(|n| n.parse::<u64>().ok())
    {
        if n >= 1 && trust_set_entry(n) == name {
            return Some(Part::TrustSet(n));
        }
        if trust_proofs::path(n) == name {
            return Some(Part::TrustProofs);
        }
        return (step_entry(n) == name).then_some(Part::Step(n));
    }
    let digest: Digest = file.split_once('.')?.0.parse().ok()?;
    (bundle_entry(&digest) == name).then_some(Part::Bundle)
}

impl OfflineFile {
    /// Opens `path` and checks its layout, reading headers only: that it is for `channel`,
    /// the names, their order, each entry's cap (the bundle's is `max_bundle_bytes`), the
    /// padding, and the end.
    fn open(path: &Path, channel: &str, max_bundle_bytes: u64) -> Result<OfflineFile> {
        let file = File::open(path)
            .map_err(|e| Error::io(format!("cannot open offline file {}", path.display()), e))?;
        let file_len = file
            .metadata()
            .map_err(|e| Error::io(format!("cannot read offline file {}", path.display()), e))?
            .len();
        let mut reader = BufReader::with_capacity(8 * 1024, &file);
        let (header, mut pos) = read_header(&mut reader)?;
        if header.channel != channel {
            return Err(Error::new(
                ErrorKind::Feed,
                format!(
                    "offline file {} is for channel '{}', but this device follows channel \
                     '{channel}'",
                    path.display(),
                    header.channel
                ),
            ));
        }
        let channel = header.channel;
        let mut entries = BTreeMap::new();
        let mut last = (Part::Header, HEADER.to_string());
        let mut steps = 0usize;
        let mut trust_sets = 0u64;
        loop {
            let mut h = [0u8; 512];
            tar::read_exact_or_truncated(&mut reader, &mut h, || {
                format!("{ARCHIVE} header after entry '{}'", last.1)
            })?;
            let (name, size) = match tar::parse_header_with(&h, ARCHIVE, Names::Paths)? {
                Block::File { name, size } => (name, size),
                Block::Zero => {
                    // The first block of the end-of-archive marker: read the whole marker
                    // again and make sure nothing follows it.
                    reader
                        .seek(SeekFrom::Start(pos))
                        .map_err(|e| Error::io(format!("cannot read {}", path.display()), e))?;
                    tar::read_end(&mut reader, ARCHIVE)?;
                    break;
                }
            };
            let part = next_part(&name, &channel, &last, &entries)?;
            if matches!(part, Part::TrustSet(_)) {
                trust_sets += 1;
                if trust_sets > trust_set::MAX_WALK {
                    return Err(Error::new(
                        ErrorKind::TooLarge,
                        format!(
                            "{ARCHIVE} holds more than {} trust sets",
                            trust_set::MAX_WALK
                        ),
                    ));
                }
            }
            if matches!(part, Part::Step(_)) {
                steps += 1;
                if steps > MAX_STEPS {
                    return Err(Error::new(
                        ErrorKind::TooLarge,
                        format!("{ARCHIVE} holds more than {MAX_STEPS} consistency steps"),
                    ));
                }
            }
            too_large(&name, size, part.cap(max_bundle_bytes))?;
            let offset = pos + tar::BLOCK;
            let end = offset + size + tar::padding(size);
            if end > file_len {
                return Err(Error::new(
                    ErrorKind::Malformed,
                    format!(
                        "{ARCHIVE} entry '{name}' is truncated: it declares {size} bytes, but the \
                         file ends {} bytes after its header",
                        file_len - offset
                    ),
                ));
            }
            reader
                .seek(SeekFrom::Start(offset + size))
                .map_err(|e| Error::io(format!("cannot read {}", path.display()), e))?;
            tar::read_padding(&mut reader, size, ARCHIVE, &name)?;
            pos = end;
            entries.insert(name.clone(), Span { offset, size });
            last = (part, name);
        }
        let feed = feed_entry(&channel);
        if !entries.contains_key(&feed) {
            return Err(Error::new(
                ErrorKind::Malformed,
                format!(
                    "offline file {} holds no '{feed}', the feed of its channel",
                    path.display()
                ),
            ));
        }
        Ok(OfflineFile {
            path: path.to_path_buf(),
            file,
            channel,
            entries,
        })
    }

    /// The entry named `name`, or a refusal that says what is missing and why it was needed.
    fn entry(&self, name: &str, needed_as: &str) -> Result<Span> {
        self.entries.get(name).copied().ok_or_else(|| {
            Error::new(
                ErrorKind::Malformed,
                format!(
                    "offline file {} holds no '{name}', {needed_as}",
                    self.path.display()
                ),
            )
        })
    }

    /// Reads a small entry whole; its cap was checked when the file was opened.
    fn read(&self, span: Span, name: &str) -> Result<Vec<u8>> {
        let mut reader = &self.file;
        reader
            .seek(SeekFrom::Start(span.offset))
            .map_err(|e| Error::io(format!("cannot read {}", self.path.display()), e))?;
        let mut bytes = vec![0u8; span.size as usize];
        tar::read_exact_or_truncated(&mut reader, &mut bytes, || {
            format!("{ARCHIVE} entry '{name}'")
        })?;
        Ok(bytes)
    }

    /// Answers a [`Next::Fetch`] from the entry its URL names.
    fn fetch(&self, want: &Fetch) -> Result<Vec<u8>> {
        let needed_as = format!("the {} the update needs", want.what());
        let name = entry_of_url(want.url()).ok_or_else(|| {
            Error::new(
                ErrorKind::Malformed,
                format!(
                    "the update needs {} at {}, which no offline file can hold",
                    want.what(),
                    want.url()
                ),
            )
        })?;
        let span = self.entry(name, &needed_as)?;
        too_large(name, span.size, want.max_bytes())?;
        self.read(span, name)
    }

    /// Answers a [`Next::Download`]: copies the bundle entry named by the SHA-256 the feed
    /// declares into the download's path, exactly at the declared size, and refuses it
    /// (removing the copy) unless it hashes to that SHA-256.
    /// When the session asks for the bundle's head first, only the head is copied.
    fn copy_bundle(&self, want: &Download, progress: Option<&ProgressFn>) -> Result<()> {
        let copied = self.copy_bundle_inner(want, progress);
        if copied.is_err() {
            // Another update would otherwise take these bytes for the start of a download.
            want.discard();
        }
        copied
    }

    fn copy_bundle_inner(&self, want: &Download, progress: Option<&ProgressFn>) -> Result<()> {
        let name = bundle_entry(want.sha256());
        let span = self.entry(&name, "the bundle the feed offers")?;
        if span.size != want.whole {
            return Err(Error::new(
                ErrorKind::Digest,
                format!(
                    "{ARCHIVE} entry '{name}' is {} bytes, but the feed declares {} bytes",
                    span.size, want.whole
                ),
            ));
        }
        if want.head {
            let head = Span {
                offset: span.offset,
                size: want.size(),
            };
            return self.copy_to(head, &name, want, progress).map(|_| ());
        }
        let copied = self.copy_to(span, &name, want, progress);
        let refusal = match copied {
            Ok(sha256) if sha256 == *want.sha256() => return Ok(()),
            Ok(sha256) => Error::new(
                ErrorKind::Digest,
                format!(
                    "{ARCHIVE} entry '{name}' has SHA-256 {sha256}, but the feed declares {}",
                    want.sha256()
                ),
            ),
            Err(e) => e,
        };
        Err(refusal)
    }

    /// Copies the entry at `span` into the download's file, flushed to disk, and returns its
    /// SHA-256.
    fn copy_to(
        &self,
        span: Span,
        name: &str,
        want: &Download,
        progress: Option<&ProgressFn>,
    ) -> Result<Digest> {
        let to = want.path();
        let mut reader = &self.file;
        reader
            .seek(SeekFrom::Start(span.offset))
            .map_err(|e| Error::io(format!("cannot read {}", self.path.display()), e))?;
        let write_error = |e: io::Error| Error::io(format!("cannot write {}", to.display()), e);
        // Opened by the store without following links (see `Download::file`); whatever a
        // partial download left is overwritten from the start.
        let mut out = want.file()?;
        out.set_len(0).map_err(write_error)?;
        let mut hasher = Hasher::new();
        let mut buf = vec![0u8; 64 * 1024];
        let mut done = 0u64;
        while done < span.size {
            let n = (span.size - done).min(buf.len() as u64) as usize;
            tar::read_exact_or_truncated(&mut reader, &mut buf[..n], || {
                format!("{ARCHIVE} entry '{name}'")
            })?;
            hasher.update(&buf[..n]);
            out.write_all(&buf[..n]).map_err(write_error)?;
            done += n as u64;
            if let Some(progress) = progress {
                progress(Progress {
                    stage: Stage::Download,
                    done,
                    total: span.size,
                });
            }
        }
        out.sync_all().map_err(write_error)?;
        Ok(hasher.finish())
    }
}

/// Checks that `name` may come after `last` (the part and name of the entry before it) and
/// returns what it is.
fn next_part(
    name: &str,
    channel: &str,
    last: &(Part, String),
    seen: &BTreeMap<String, Span>,
) -> Result<Part> {
    let refuse = |message: String| Err(Error::new(ErrorKind::Malformed, message));
    let shown = tar::shown(name.as_bytes());
    let feed = feed_entry(channel);
    let Some(part) = part_of(name, channel) else {
        return refuse(format!(
            "{ARCHIVE} entry '{shown}' is not allowed: an offline file for channel '{channel}' \
             holds only {HEADER}, {feed}, trust/<version>.json, \
             ledger/trust-sets/<size>.json, ledger/consistency/<size>.json and \
             bundles/<sha256>.ampoule"
        ));
    };
    if name == HEADER || seen.contains_key(name) {
        return refuse(format!("{ARCHIVE} entry '{shown}' appears twice"));
    }
    if last.0 == Part::Header && part != Part::Feed {
        return refuse(format!(
            "{ARCHIVE} entry '{shown}' is out of order: entry 2 must be '{feed}'"
        ));
    }
    if part == last.0 {
        let what = if part == Part::Bundle {
            "bundle"
        } else {
            "trust-set proofs file"
        };
        return refuse(format!(
            "{ARCHIVE} entry '{shown}' is a second {what} after '{}'; an offline file holds \
             at most one",
            last.1
        ));
    }
    if part < last.0 {
        return refuse(format!(
            "{ARCHIVE} entry '{shown}' is out of order after '{}': the order is {HEADER}, the \
             feed, the trust sets by ascending version, the trust-set proofs, the consistency \
             steps by ascending size, the bundle",
            last.1
        ));
    }
    Ok(part)
}

impl Device {
    /// Runs one update from an offline file (made by `ampoule offline`) instead of the
    /// network, at clock time `now`: the same checks in the same order as an online update
    /// ([`Device::begin`]), except the feed's expiry, which a device without a network cannot
    /// judge (see [`crate::format::offline`]). The file must be for the channel this
    /// device follows; anything the update needs that the file does not hold ends it as a
    /// refusal that names the missing entry.
    pub fn install_offline(&self, file: &Path, now: Timestamp) -> Report {
        let offline = match OfflineFile::open(file, self.channel(), self.app().max_bundle_bytes) {
            Ok(offline) => offline,
            Err(e) => return Report::ended_early(e),
        };
        let name = feed_entry(&offline.channel);
        let feed = match offline
            .entry(&name, "the feed of its channel")
            .and_then(|span| offline.read(span, &name))
        {
            Ok(bytes) => bytes,
            Err(e) => return Report::ended_early(e),
        };
        let mut session = self.begin(&feed_url(&offline.channel), feed, now).offline();
        loop {
            match session.advance() {
                Next::Fetch(want) => match offline.fetch(&want) {
                    Ok(bytes) => session.provide(bytes),
                    Err(e) => return session.fail_with(e),
                },
                Next::Download(want) => {
                    match offline.copy_bundle(&want, self.app().progress.as_ref()) {
                        Ok(()) => session.downloaded_and_checked(None),
                        Err(e) => return session.fail_with(e),
                    }
                }
                Next::Done(report) => return report,
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn only_the_names_the_writer_writes_are_parts() {
        let sha = Digest::of(b"a bundle");
        let bundle = bundle_entry(&sha);
        for (name, part) in [
            ("offline.json", Some(Part::Header)),
            ("feeds/stable.json", Some(Part::Feed)),
            ("trust/2.json", Some(Part::TrustSet(2))),
            ("ledger/trust-sets/9.json", Some(Part::TrustProofs)),
            ("ledger/trust-sets/09.json", None),
            ("ledger/consistency/0.json", Some(Part::Step(0))),
            ("ledger/consistency/17.json", Some(Part::Step(17))),
            (bundle.as_str(), Some(Part::Bundle)),
            ("feeds/beta.json", None),
            ("trust/0.json", None),
            ("trust/02.json", None),
            ("trust/+2.json", None),
            ("ledger/consistency/017.json", None),
            ("ledger/2.json", None),
            ("bundles/2.json", None),
            ("trust/x.ampoule", None),
            (&bundle.to_uppercase(), None),
            (&bundle.replace(".ampoule", ".tar"), None),
            (&format!("feeds/{}", &bundle[8..]), None),
            ("notes.txt", None),
        ] {
            assert_eq!(part_of(name, "stable"), part, "{name}");
        }
    }

    #[test]
    fn parts_order_as_the_format_says() {
        assert!(Part::Header < Part::Feed);
        assert!(Part::Feed < Part::TrustSet(1));
        assert!(Part::TrustSet(1) < Part::TrustSet(2));
        assert!(Part::TrustSet(u64::MAX) < Part::TrustProofs);
        assert!(Part::TrustProofs < Part::Step(0));
        assert!(Part::Step(1) < Part::Step(2));
        assert!(Part::Step(u64::MAX) < Part::Bundle);
    }
}
