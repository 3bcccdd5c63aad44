//! `ampoule offline`: writes the one file a technician carries to a device without a network.
//! It holds a channel's current feed and what a device would fetch because of it, named as in
//! the release tree (`ampoule_verify::format::offline`, FORMAT.md).
//!
//! The tree is read without its lock, so that a read-only copy works too. The feed is read
//! first, and everything it refers to was written before it and never changes afterwards
//! (trust sets by version, ledger steps by size, bundles by digest): a publish running
//! meanwhile cannot make the file inconsistent.

use std::fs::{self, File};
use std::io::{BufWriter, Read, Write};
use std::path::{Path, PathBuf};

use ampoule_verify::digest::Hasher;
use ampoule_verify::feed::{Feed, SignedFeed, resolve};
use ampoule_verify::format::offline::{
    HEADER, Header, bundle_entry, entry_of_url, feed_entry, feed_url, step_entry, trust_set_entry,
};
use ampoule_verify::format::{limit, trust_proofs, trust_set};
use ampoule_verify::ledger::{CONSISTENCY_DIR, LEDGER_DIR, MAX_STEP_BYTES, MAX_STEPS};
use ampoule_verify::{Digest, tar};
use anyhow::{Context, Result, bail};
use serde_json::json;

use crate::Refused;
use crate::cli::OfflineArgs;
use crate::cmd::external::read_bounded;
use crate::output::Output;
use crate::release::atomic::{Placement, place, temp_beside};

pub fn run(args: OfflineArgs, out: &Output) -> Result<()> {
    crate::cmd::check_channel_arg(&args.channel)?;
    let contents = Contents::gather(&args.tree, &args.channel)?;
    if fs::symlink_metadata(&args.out).is_ok() {
        bail!(
            "{} already exists; choose another output name or remove it first (nothing was written)",
            args.out.display()
        );
    }
    let bytes = contents.write(&args.out)?;
    contents.report(&args.out, bytes, out)
}

/// What goes into the file, read from the tree.
struct Contents {
    channel: String,
    feed_bytes: Vec<u8>,
    feed: Feed,
    trust_set: Option<(u64, Vec<u8>)>,
    /// The trust sets before the one the feed names, ascending, as many as a device walks
    /// (those the tree has), for a device that missed rotations.
    earlier_trust_sets: Vec<(u64, Vec<u8>)>,
    /// The ledger's proofs of the trust sets against the feed's tree head, when the tree has
    /// any.
    trust_proofs: Option<(u64, Vec<u8>)>,
    /// Each step's old size and file, ascending.
    steps: Vec<(u64, PathBuf)>,
    bundle: Option<PathBuf>,
}

impl Contents {
    fn gather(tree: &Path, channel: &str) -> Result<Contents> {
        let feed_path = tree.join(feed_entry(channel));
        if !feed_path.is_file() {
            bail!(
                "channel '{channel}' has no feed in release tree {} ({} is missing); publish on \
                 it first",
                tree.display(),
                feed_path.display()
            );
        }
        let feed_bytes = read_bounded(&feed_path, limit::FEED_BYTES, "a feed")?;
        // Parsed, not verified: the release side holds no device's trust, and the device
        // checks everything in the file anyway.
        let feed = SignedFeed::from_json(&feed_bytes)
            .and_then(|signed| Feed::from_json(signed.feed.as_bytes()))
            .with_context(|| format!("{} is not a feed", feed_path.display()))?;
        if feed.channel != channel {
            return Err(Refused(format!(
                "{} is a feed for channel '{}', not '{channel}'",
                feed_path.display(),
                feed.channel
            ))
            .into());
        }
        let trust_set = match &feed.trust_set {
            Some(named) => {
                let name = trust_set_entry(named.version);
                in_file_layout(channel, &named.path, &name, "trust set")?;
                let path = tree.join(&name);
                let bytes = read_bounded(&path, trust_set::MAX_BYTES, "a trust set")?;
                let got = Digest::of(&bytes);
                if got != named.sha256 {
                    return Err(Refused(format!(
                        "{} has SHA-256 {got}, but the feed names {}; the tree is damaged",
                        path.display(),
                        named.sha256
                    ))
                    .into());
                }
                Some((named.version, bytes))
            }
            None => None,
        };
        let head_size = feed
            .ledger
            .as_ref()
            .map_or(0, |l| l.tree_head.head().tree_size);
        let mut earlier_trust_sets = Vec::new();
        if let Some((named, _)) = &trust_set {
            let first = named.saturating_sub(trust_set::MAX_WALK - 1).max(1);
            for version in first..*named {
                let path = tree.join(trust_set_entry(version));
                // A tree started on a later version has none before it.
                if path.is_file() {
                    earlier_trust_sets.push((
                        version,
                        read_bounded(&path, trust_set::MAX_BYTES, "a trust set")?,
                    ));
                }
            }
        }
        let proofs_path = tree.join(trust_proofs::path(head_size));
        let trust_proofs = match trust_set.is_some() && proofs_path.is_file() {
            true => Some((
                head_size,
                read_bounded(&proofs_path, trust_proofs::MAX_BYTES, "trust-set proofs")?,
            )),
            false => None,
        };
        let steps = steps_below(tree, head_size)?;
        let bundle = match &feed.release {
            Some(release) => {
                let path = tree.join(bundle_entry(&release.sha256));
                let len = fs::metadata(&path)
                    .with_context(|| {
                        format!(
                            "cannot read {}, the bundle the feed of '{channel}' offers",
                            path.display()
                        )
                    })?
                    .len();
                if len != release.size {
                    return Err(Refused(format!(
                        "{} is {len} bytes, but the feed declares {} bytes; the tree is damaged",
                        path.display(),
                        release.size
                    ))
                    .into());
                }
                Some(path)
            }
            None => None,
        };
        Ok(Contents {
            channel: channel.to_string(),
            feed_bytes,
            feed,
            trust_set,
            earlier_trust_sets,
            trust_proofs,
            steps,
            bundle,
        })
    }

    /// Writes the file whole or not at all, and returns its length.
    fn write(&self, out: &Path) -> Result<u64> {
        let mut temp = temp_beside(out)?;
        let mtime = self.feed.issued.unix();
        let header = Header::new(&self.channel).to_json();
        let io = |e: std::io::Error| {
            anyhow::Error::new(e).context(format!("cannot write {}", out.display()))
        };
        let mut buffered = BufWriter::with_capacity(256 * 1024, temp.as_file_mut());
        let w = &mut buffered;
        put(w, HEADER, header.as_bytes(), mtime).map_err(io)?;
        put(w, &feed_entry(&self.channel), &self.feed_bytes, mtime).map_err(io)?;
        for (version, bytes) in self.earlier_trust_sets.iter().chain(&self.trust_set) {
            put(w, &trust_set_entry(*version), bytes, mtime).map_err(io)?;
        }
        if let Some((size, bytes)) = &self.trust_proofs {
            put(w, &trust_proofs::path(*size), bytes, mtime).map_err(io)?;
        }
        for (size, path) in &self.steps {
            let bytes = read_bounded(path, MAX_STEP_BYTES, "a consistency step")?;
            put(w, &step_entry(*size), &bytes, mtime).map_err(io)?;
        }
        if let (Some(path), Some(release)) = (&self.bundle, &self.feed.release) {
            let name = bundle_entry(&release.sha256);
            w.write_all(&tar::header(&name, release.size, mtime))
                .map_err(io)?;
            let got = copy_hashed(path, release.size, w, out)?;
            if got != release.sha256 {
                return Err(Refused(format!(
                    "{} has SHA-256 {got}, but the feed declares {}; the tree is damaged \
                     (nothing was written)",
                    path.display(),
                    release.sha256
                ))
                .into());
            }
            w.write_all(&[0u8; 512][..tar::padding(release.size) as usize])
                .map_err(io)?;
        }
        w.write_all(&tar::END_OF_ARCHIVE).map_err(io)?;
        w.flush().map_err(io)?;
        drop(buffered);
        place(out, temp, Placement::New)
    }

    fn report(&self, file: &Path, bytes: u64, out: &Output) -> Result<()> {
        let feed = &self.feed;
        let offered = feed.release.as_ref().map_or_else(
            || "nothing (every release withdrawn)".to_string(),
            |r| format!("{} {}", r.name, r.version),
        );
        let trust = self
            .trust_set
            .as_ref()
            .map_or(String::new(), |(v, _)| format!(", trust set version {v}"));
        let human = format!(
            "wrote {} ({bytes} bytes): channel {}, feed sequence {}, {offered}{trust}, {}\n\
             the feed expires at {}; a device installing offline does not check that, so hand \
             out files made from the current feed",
            file.display(),
            self.channel,
            feed.sequence,
            match self.steps.len() {
                1 => "1 consistency step".to_string(),
                n => format!("{n} consistency steps"),
            },
            feed.expires
        );
        let release = feed.release.as_ref().map(|r| {
            json!({
                "name": r.name,
                "version": r.version.to_string(),
                "sha256": r.sha256,
                "size": r.size,
            })
        });
        out.result(
            &human,
            json!({
                "ok": true,
                "file": file,
                "bytes": bytes,
                "channel": self.channel,
                "sequence": feed.sequence,
                "feed_expires": feed.expires,
                "release": release,
                "trust_set_version": self.trust_set.as_ref().map(|(v, _)| v),
                "consistency_steps": self.steps.len(),
            }),
        )
    }
}

/// Writes one small entry: header, data, padding.
fn put(w: &mut impl Write, name: &str, data: &[u8], mtime: u64) -> std::io::Result<()> {
    w.write_all(&tar::header(name, data.len() as u64, mtime))?;
    w.write_all(data)?;
    w.write_all(&[0u8; 512][..tar::padding(data.len() as u64) as usize])
}

/// Refuses a reference in the feed that would not name `name` once resolved against the
/// feed's offline URL: the device would look for it in vain.
fn in_file_layout(channel: &str, reference: &str, name: &str, what: &str) -> Result<()> {
    let resolved = resolve(&feed_url(channel), reference)?;
    if entry_of_url(&resolved) != Some(name) {
        bail!(
            "the feed of '{channel}' names its {what} at '{reference}', outside the release \
             tree's layout ({name}); an offline file cannot hold it"
        );
    }
    Ok(())
}

/// The tree's consistency steps from heads smaller than `head_size` (the feed's), ascending;
/// the last [`MAX_STEPS`] of them, since a device walks no more in one update.
fn steps_below(tree: &Path, head_size: u64) -> Result<Vec<(u64, PathBuf)>> {
    let dir = tree.join(LEDGER_DIR).join(CONSISTENCY_DIR);
    let listing = match fs::read_dir(&dir) {
        Ok(listing) => listing,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Vec::new()),
        Err(e) => return Err(e).with_context(|| format!("cannot list {}", dir.display())),
    };
    let mut steps = Vec::new();
    for entry in listing {
        let entry = entry.with_context(|| format!("cannot list {}", dir.display()))?;
        let file_name = entry.file_name();
        // Anything else here (a temporary file a crash left) is not a step.
        let Some(size) = file_name
            .to_str()
            .and_then(|n| n.strip_suffix(".json"))
            .and_then(|n| n.parse::<u64>().ok())
            .filter(|size| tree.join(step_entry(*size)) == entry.path())
        else {
            continue;
        };
        if size < head_size {
            steps.push((size, entry.path()));
        }
    }
    steps.sort();
    let keep_from = steps.len().saturating_sub(MAX_STEPS);
    Ok(steps.split_off(keep_from))
}

/// Copies exactly `size` bytes of `path` into `w` and returns their SHA-256.
fn copy_hashed(path: &Path, size: u64, w: &mut impl Write, out: &Path) -> Result<Digest> {
    let file = File::open(path).with_context(|| format!("cannot open {}", path.display()))?;
    let mut reader = file.take(size);
    let mut hasher = Hasher::new();
    let mut buf = vec![0u8; 256 * 1024];
    let mut copied = 0u64;
    loop {
        let n = reader
            .read(&mut buf)
            .with_context(|| format!("cannot read {}", path.display()))?;
        if n == 0 {
            break;
        }
        hasher.update(&buf[..n]);
        w.write_all(&buf[..n])
            .with_context(|| format!("cannot write {}", out.display()))?;
        copied += n as u64;
    }
    if copied != size {
        bail!(
            "{} ended after {copied} bytes while it was copied; the feed declares {size} bytes",
            path.display()
        );
    }
    Ok(hasher.finish())
}
