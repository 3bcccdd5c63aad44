//! The release tree: the plain static files a web server hands to devices, and the release-side
//! records that publishing and withdrawing need. Layout (all paths relative to the tree root):
//!
//! ```text
//! bundles/<sha256>.ampoule   every bundle ever published, named by the SHA-256 of the file
//! bundles/<sha256>.ampoule-delta  every delta a feed listed (issue 13), named likewise
//! feeds/<channel>.json       each channel's signed feed: what devices poll
//! history/<channel>.json     each channel's publish and withdraw events, oldest first
//! index.json                 every name and version in the tree, with its bundle's digest
//! trust/<version>.json       every trust set published, by version; the highest is current
//! ledger/                    the audit ledger of every publish and withdraw (see `audit.rs`)
//! .lock                      held while a command changes the tree
//! ```
//!
//! Devices need only `feeds/` and `bundles/`; a feed points at its bundle with the relative
//! path `../bundles/<sha256>.ampoule`, so the tree can be served from any base URL. Every file
//! is written to a temporary file in its directory, flushed, renamed into place and the
//! directory flushed, so a reader or a crash sees the old file or the new one, never a mix. The
//! ledger entry is appended first and the feed written last: it is the moment devices see a
//! change, and by then the change is in the ledger.
//!
//! Trust sets: a new one is published only if it verifies as the successor of the tree's
//! current one (or, for the first, as an initial set), and then every channel's feed is signed
//! again naming it, so devices learn of a rotation at their next poll. Every feed names the
//! current trust set (version, path, SHA-256); a device fetches it only when it is newer than
//! its own.

use std::fs::{self, File, TryLockError};
use std::io::{self, Read, Write};
use std::path::{Path, PathBuf};

use ampoule_verify::digest::Hasher;
use ampoule_verify::feed::{Feed, Release, SignedFeed, TrustSetRef, check_channel};
use ampoule_verify::format::{
    BUNDLE_EXTENSION, FEED_FORMAT_VERSION, context, signed_bytes, trust_set as trust_spec,
};
use ampoule_verify::ledger::{
    DeltaRef, ENTRY_FORMAT, Entry as LedgerEntry, Event as LedgerEvent, Offered, TrustSetEntry,
};
use ampoule_verify::signature::SignatureEntry;
use ampoule_verify::{
    Digest, DocumentKind, KeyId, Manifest, Timestamp, TrustSet, TrustSetFile, TrustedKeys, Verifier,
};
use anyhow::{Context, Result, anyhow, bail};
use ed25519_dalek::{Signer, SigningKey};

use serde::{Deserialize, Serialize};
use tempfile::NamedTempFile;

use crate::Refused;

use super::tree_deltas::{self, Deltas};
use super::tree_records::RECORD_FILE_BYTES;
pub use super::tree_records::{
    BUNDLES_DIR, Event, FEEDS_DIR, HISTORY_DIR, History, INDEX_FILE, Index, IndexEntry, LOCK_FILE,
    TRUST_DIR, write_atomic,
};

#[derive(Debug, Clone)]
pub struct Change {
    pub channel: String,
    pub feed: Feed,
    pub feed_path: PathBuf,
    pub signer: KeyId,
    /// What the change replaced as current, if anything.
    pub previous: Option<Release>,
    /// What happened to the channel.
    pub action: Action,
    /// The ledger entry appended.
    pub entry: LedgerEntry,
}

/// What a publish or withdraw does to a channel.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Action {
    /// A release became current that was not current before.
    Published,
    /// The current release stays; only its feed is signed again (new sequence and expiry, the
    /// rollout given).
    Renewed,
    /// The current release was pulled.
    Withdrawn,
    /// The feed was signed again to name a newly published trust set.
    TrustSetNamed,
}

impl Action {
    /// The name in `--json` output.
    pub fn name(self) -> &'static str {
        match self {
            Action::Published => "published",
            Action::Renewed => "renewed",
            Action::Withdrawn => "withdrawn",
            Action::TrustSetNamed => "trust_set_named",
        }
    }
}

/// A publish or withdraw worked out and checked against the tree, with nothing written: what
/// `--dry-run` shows, and what [`Tree::apply`] writes.
#[derive(Debug, Clone)]
pub struct Plan {
    pub action: Action,
    pub channel: String,
    /// The feed to sign, without its `ledger` object (that comes from the append).
    pub feed: Feed,
    pub feed_path: PathBuf,
    /// What is current before the change, if anything.
    pub previous: Option<Release>,
    /// The ledger entry to append.
    pub entry: LedgerEntry,
    /// The index the entry gets in the ledger.
    pub entry_index: u64,
    history: History,
    /// The index with the new name and version, when the release is new to the tree.
    index: Option<Index>,
    /// The bundle to place in `bundles/` (publish only).
    bundle: Option<Digest>,
}

/// A withdraw of a version, or the finding that the version was withdrawn already, in which
/// case nothing is written and no ledger entry is added.
#[derive(Debug, Clone)]
pub enum Withdrawal<T> {
    Pending(T),
    Already(Box<AlreadyWithdrawn>),
}

/// A version that an earlier withdraw pulled from a channel.
#[derive(Debug, Clone)]
pub struct AlreadyWithdrawn {
    pub channel: String,
    pub name: String,
    pub version: semver::Version,
    /// The sequence and time of the feed that withdrew it.
    pub sequence: u64,
    pub time: Timestamp,
    /// What the channel offers now.
    pub current: Option<Release>,
}

/// The tree's current trust set: the highest version under `trust/`.
pub struct TreeTrustSet {
    pub version: u64,
    pub sha256: Digest,
    pub bytes: Vec<u8>,
    pub path: PathBuf,
}

impl TreeTrustSet {
    /// How feeds name it: relative to `feeds/<channel>.json`.
    pub fn reference(&self) -> TrustSetRef {
        TrustSetRef {
            version: self.version,
            path: format!("../{TRUST_DIR}/{}.json", self.version),
            sha256: self.sha256,
        }
    }

    /// The set as release-side checks see it: signed by its own threshold and not expired.
    pub fn verified(&self, now: Timestamp) -> Result<TrustSet> {
        TrustSet::resume(&self.bytes, None, now).with_context(|| {
            format!(
                "the release tree's trust set {} is not usable; publish a successor",
                self.path.display()
            )
        })
    }
}

/// What publishing a trust set would do, from [`Tree::plan_trust_set`].
pub struct TrustSetPlan {
    /// The ledger entry it would append first.
    pub entry: TrustSetEntry,
    /// The version of the tree's trust set now, if it has one.
    pub previous_version: Option<u64>,
    /// Each channel whose feed it would renew: the channel, the new feed sequence, and the
    /// release the renewed feed names.
    pub renewed: Vec<(String, u64, Release)>,
}

/// What publishing a trust set wrote.
pub struct TrustSetChange {
    pub trust_set: TreeTrustSet,
    /// The version it succeeded, if the tree had one.
    pub previous_version: Option<u64>,
    /// Every channel's feed, signed again to name the new set.
    pub feeds: Vec<Change>,
}

/// A bundle copied into the tree's bundle directory under a temporary name, checked, and
/// waiting to be renamed to its content address.
pub struct StagedBundle {
    temp: NamedTempFile,
    pub facts: BundleFacts,
}

/// What publishing needs to know of a checked bundle.
#[derive(Debug, Clone)]
pub struct BundleFacts {
    pub manifest: Manifest,
    pub sha256: Digest,
    pub size: u64,
    /// For the ledger entry: SHA-256 of the exact manifest bytes, and the keys whose
    /// signatures were checked.
    pub manifest_digest: Digest,
    pub signers: Vec<KeyId>,
}

/// Settings shared by publish and withdraw.
pub struct Signing<'a> {
    pub key: &'a SigningKey,
    /// The file `key` was read from, named beside its id in messages (none when the key
    /// was made in memory, as in the demo and benchmarks).
    pub key_file: Option<&'a Path>,
    pub now: Timestamp,
    pub expires_in_secs: u64,
    /// Keys that sign the ledger's tree head besides `key`.
    pub tree_head_keys: &'a [SigningKey],
    /// Tree-head signers outside this process, whose keys this process never holds.
    pub outside: &'a [crate::release::ledger_audit::OutsideHeadSigner],
}

/// A release tree with its lock held; the lock is released when this is dropped. A tree
/// opened with [`Tree::read_only`] (for a dry run) holds a shared lock, or none when the tree
/// does not exist yet, and refuses to write.
pub struct Tree {
    root: PathBuf,
    _lock: Option<File>,
    writable: bool,
}

fn io_context(doing: &str, path: &Path) -> String {
    format!("cannot {doing} {}", path.display())
}

/// Files in the tree are read by whatever web server serves it.
fn publishable(path: &Path) -> Result<()> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        fs::set_permissions(path, fs::Permissions::from_mode(0o644))
            .with_context(|| io_context("set permissions of", path))?;
    }
    Ok(())
}

fn sync_dir(dir: &Path) -> Result<()> {
    File::open(dir)
        .and_then(|d| d.sync_all())
        .with_context(|| io_context("flush directory", dir))
}

/// Reads a release-side record (history, index), bounded; a missing file is the empty record.
fn read_record<T: for<'de> Deserialize<'de> + Default>(path: &Path) -> Result<T> {
    let file = match File::open(path) {
        Ok(f) => f,
        Err(e) if e.kind() == io::ErrorKind::NotFound => return Ok(T::default()),
        Err(e) => return Err(e).with_context(|| io_context("open", path)),
    };
    let mut bytes = Vec::new();
    file.take(RECORD_FILE_BYTES + 1)
        .read_to_end(&mut bytes)
        .with_context(|| io_context("read", path))?;
    if bytes.len() as u64 > RECORD_FILE_BYTES {
        bail!(
            "{} is over {RECORD_FILE_BYTES} bytes; it is not a record this tool wrote",
            path.display()
        );
    }
    serde_json::from_slice(&bytes).with_context(|| {
        format!(
            "{} is not a valid record; restore it from a backup (nothing was changed)",
            path.display()
        )
    })
}

fn to_pretty_json<T: Serialize>(value: &T) -> Vec<u8> {
    let mut bytes =
        serde_json::to_vec_pretty(value).expect("records of strings and numbers serialize");
    bytes.push(b'\n');
    bytes
}

/// Parses a duration like `30d`, `12h`, `90m` or `3600s` into seconds: 1 second to 400 days.
pub fn parse_duration(text: &str) -> Result<u64> {
    let bad = || {
        anyhow!(
            "'{text}' is not a duration; write a whole number and a unit, like 7d, 12h, 90m or 3600s"
        )
    };
    let split = text.len().checked_sub(1).ok_or_else(bad)?;
    let (number, unit) = text.split_at(split);
    if number.is_empty() || !number.bytes().all(|b| b.is_ascii_digit()) {
        return Err(bad());
    }
    let n: u64 = number.parse().map_err(|_| bad())?;
    let scale = match unit {
        "s" => 1,
        "m" => 60,
        "h" => 3600,
        "d" => 86_400,
        _ => return Err(bad()),
    };
    let secs = n.checked_mul(scale).ok_or_else(bad)?;
    if !(1..=400 * 86_400).contains(&secs) {
        bail!("duration '{text}' must be between 1s and 400d");
    }
    Ok(secs)
}

/// Checks a bundle file as [`Tree::stage_bundle_with`] checks its copy, with the same
/// errors, for a publish that must refuse before it creates anything, and for a dry run.
pub fn check_bundle(bundle: &Path, verifier: &Verifier) -> Result<BundleFacts> {
    let mut verified = verifier
        .verify_path(bundle)
        .map_err(|e| publish_refused(bundle, e))?;
    verified
        .check_contents()
        .map_err(|e| publish_refused(bundle, e))?;
    let file = File::open(bundle).with_context(|| io_context("open bundle", bundle))?;
    let (sha256, size) = ampoule_verify::digest::hash_reader(file, u64::MAX)
        .with_context(|| io_context("read", bundle))?;
    Ok(BundleFacts {
        manifest_digest: Digest::of(verified.manifest_bytes()),
        signers: verified.signers().to_vec(),
        manifest: verified.manifest().clone(),
        sha256,
        size,
    })
}

fn publish_refused(bundle: &Path, e: ampoule_verify::Error) -> anyhow::Error {
    if e.kind() == ampoule_verify::ErrorKind::Io {
        // Not a refusal: the file could not be read.
        return e.into();
    }
    crate::failure::bundle_error(bundle, e).context(format!(
        "bundle {} refused; nothing was published",
        bundle.display()
    ))
}

/// What a feed offering `release` logs in its ledger entry: the release and its deltas.
fn offered(release: &Release, manifest_digest: Digest) -> Offered {
    Offered {
        bundle: release.name.clone(),
        version: release.version.clone(),
        bundle_digest: release.sha256,
        manifest_digest,
        rollout_percent: release.rollout_percent,
        deltas: release.deltas.clone(),
    }
}

/// The keys that sign a change's tree head: the feed key first.
fn signing_keys<'a>(signing: &Signing<'a>) -> Vec<&'a SigningKey> {
    std::iter::once(signing.key)
        .chain(signing.tree_head_keys)
        .collect()
}

/// Takes a lock with `try_lock`, trying again for up to `wait`.
fn wait_for_lock(
    root: &Path,
    lock_path: &Path,
    wait: std::time::Duration,
    try_lock: impl Fn() -> std::result::Result<(), TryLockError>,
) -> Result<()> {
    let started = std::time::Instant::now();
    loop {
        match try_lock() {
            Ok(()) => return Ok(()),
            Err(TryLockError::WouldBlock) if started.elapsed() < wait => {
                std::thread::sleep(std::time::Duration::from_millis(50));
            }
            Err(TryLockError::WouldBlock) => {
                let waited = if wait.is_zero() {
                    String::new()
                } else {
                    format!(" (waited {} s)", wait.as_secs())
                };
                bail!(
                    "another publish or withdraw is changing the release tree {}{waited}; try \
                     again when it has finished",
                    root.display()
                )
            }
            Err(TryLockError::Error(e)) => {
                return Err(e).with_context(|| io_context("lock", lock_path));
            }
        }
    }
}

impl Tree {
    /// Opens (creating if needed) the tree at `root` and takes its lock, failing at once
    /// when another command holds it.
    pub fn lock(root: &Path) -> Result<Tree> {
        Self::lock_waiting(root, std::time::Duration::ZERO)
    }

    /// Like [`Tree::lock`], but waits up to `wait` for another publish or withdraw to finish,
    /// so that two run at the same time go one after the other.
    pub fn lock_waiting(root: &Path, wait: std::time::Duration) -> Result<Tree> {
        for dir in [BUNDLES_DIR, FEEDS_DIR, HISTORY_DIR] {
            let path = root.join(dir);
            fs::create_dir_all(&path).with_context(|| io_context("create directory", &path))?;
        }
        let lock_path = root.join(LOCK_FILE);
        let lock = File::options()
            .create(true)
            .truncate(false)
            .write(true)
            .open(&lock_path)
            .with_context(|| io_context("open the lock file", &lock_path))?;
        wait_for_lock(root, &lock_path, wait, || lock.try_lock())?;
        Ok(Tree {
            root: root.to_path_buf(),
            _lock: Some(lock),
            writable: true,
        })
    }

    /// Opens the tree at `root` for a dry run: it creates nothing, not even the tree, and
    /// takes the lock shared (waiting up to `wait`), so that it reads no half-made change.
    /// Every method that would write refuses.
    pub fn read_only(root: &Path, wait: std::time::Duration) -> Result<Tree> {
        let lock_path = root.join(LOCK_FILE);
        let lock = match File::open(&lock_path) {
            Ok(lock) => {
                wait_for_lock(root, &lock_path, wait, || lock.try_lock_shared())?;
                Some(lock)
            }
            Err(e) if e.kind() == io::ErrorKind::NotFound => None,
            Err(e) => return Err(e).with_context(|| io_context("open the lock file", &lock_path)),
        };
        Ok(Tree {
            root: root.to_path_buf(),
            _lock: lock,
            writable: false,
        })
    }

    fn writable(&self) -> Result<()> {
        if !self.writable {
            bail!(
                "the release tree {} was opened for a dry run; nothing may be written",
                self.root.display()
            );
        }
        Ok(())
    }

    pub fn root(&self) -> &Path {
        &self.root
    }

    pub fn feed_path(&self, channel: &str) -> PathBuf {
        self.root.join(FEEDS_DIR).join(format!("{channel}.json"))
    }

    pub fn history_path(&self, channel: &str) -> PathBuf {
        self.root.join(HISTORY_DIR).join(format!("{channel}.json"))
    }

    pub fn bundle_path(&self, sha256: &Digest) -> PathBuf {
        self.root
            .join(BUNDLES_DIR)
            .join(format!("{sha256}.{BUNDLE_EXTENSION}"))
    }

    pub fn history(&self, channel: &str) -> Result<History> {
        read_record(&self.history_path(channel))
    }

    pub fn index(&self) -> Result<Index> {
        read_record(&self.root.join(INDEX_FILE))
    }

    /// Copies `bundle` into the tree under a temporary name, hashing it on the way, and checks
    /// the copy: signature by one of `trust`, manifest, payload digest and every file inside.
    /// What is published is the copy that was checked, whatever happens to the original.
    pub fn stage_bundle(&self, bundle: &Path, trust: &TrustedKeys) -> Result<StagedBundle> {
        self.stage_bundle_with(
            bundle,
            ampoule_verify::dangerous::verifier_without_app_version(trust.clone())?,
        )
    }

    /// [`Tree::stage_bundle`] with the signature check of `verifier` (keys and threshold).
    pub fn stage_bundle_with(&self, bundle: &Path, verifier: Verifier) -> Result<StagedBundle> {
        self.writable()?;
        let dir = self.root.join(BUNDLES_DIR);
        let mut temp = tempfile::Builder::new()
            .prefix(crate::release::atomic::TEMP_PREFIX)
            .tempfile_in(&dir)
            .with_context(|| io_context("create a temporary file in", &dir))?;
        let mut source = File::open(bundle).with_context(|| io_context("open bundle", bundle))?;
        let mut hasher = Hasher::new();
        let mut buf = vec![0u8; 1024 * 1024];
        loop {
            let n = match source.read(&mut buf) {
                Ok(0) => break,
                Ok(n) => n,
                Err(e) if e.kind() == io::ErrorKind::Interrupted => continue,
                Err(e) => return Err(e).with_context(|| io_context("read", bundle)),
            };
            hasher.update(&buf[..n]);
            temp.write_all(&buf[..n])
                .with_context(|| io_context("write", temp.path()))?;
        }
        temp.as_file()
            .sync_all()
            .with_context(|| io_context("flush", temp.path()))?;
        let size = hasher.len();
        let sha256 = hasher.finish();
        let copy = temp
            .reopen()
            .with_context(|| io_context("reopen", temp.path()))?;
        let mut verified = verifier
            .verify_file(copy)
            .map_err(|e| publish_refused(bundle, e))?;
        verified
            .check_contents()
            .map_err(|e| publish_refused(bundle, e))?;
        Ok(StagedBundle {
            facts: BundleFacts {
                manifest_digest: Digest::of(verified.manifest_bytes()),
                signers: verified.signers().to_vec(),
                manifest: verified.manifest().clone(),
                sha256,
                size,
            },
            temp,
        })
    }

    /// The sequence the next feed of `channel` gets: above everything in its history and
    /// above the feed on disk, so it grows even if a history write was lost.
    fn next_sequence(&self, channel: &str, history: &History) -> Result<u64> {
        let mut last = history.last_sequence();
        let path = self.feed_path(channel);
        match fs::read(&path) {
            Ok(bytes) => {
                let signed = SignedFeed::from_json(&bytes)
                    .with_context(|| format!("{} is not a feed", path.display()))?;
                let feed = Feed::from_json(signed.feed.as_bytes())
                    .with_context(|| format!("{} is not a feed", path.display()))?;
                last = last.max(feed.sequence);
            }
            Err(e) if e.kind() == io::ErrorKind::NotFound => {}
            Err(e) => return Err(e).with_context(|| io_context("read", &path)),
        }
        // A publish that crashed after its ledger append logged a sequence no feed carries.
        last = last.max(crate::release::ledger_audit::last_sequence(
            &self.root, channel,
        )?);
        last.checked_add(1)
            .ok_or_else(|| anyhow!("channel {channel} has used every sequence number"))
    }

    /// Publishes a staged bundle as the current release of `channel`, with deltas from up to
    /// `bases` earlier releases of the channel (see [`Tree::deltas`]). Publishing the bundle
    /// that is current already renews the feed (new sequence and expiry) with the new rollout.
    /// The bundle and the deltas are made and checked under temporary names, removed on any
    /// failure, and renamed to their content addresses just before the ledger append: a crash
    /// after that leaves whole files no feed names yet, which the next publish reuses.
    pub fn publish(
        &self,
        staged: StagedBundle,
        channel: &str,
        rollout_percent: u8,
        mirrors: &[String],
        bases: usize,
        signing: &Signing<'_>,
    ) -> Result<(Change, Deltas)> {
        // Every refusal first: deltas cost time, and are not made for a refused publish.
        self.plan_publish(
            &staged.facts,
            channel,
            rollout_percent,
            mirrors,
            &[],
            signing,
        )?;
        let mut deltas = self.deltas(
            staged.temp.path(),
            &staged.facts,
            channel,
            bases,
            &self.root.join(BUNDLES_DIR),
        )?;
        let plan = self.plan_publish(
            &staged.facts,
            channel,
            rollout_percent,
            mirrors,
            &deltas.references(),
            signing,
        )?;
        self.place_bundle(staged)?;
        deltas.place(&self.root)?;
        Ok((self.apply(plan, signing)?, deltas))
    }

    /// The deltas a publish of `bundle` (a checked file that `facts` describes) on `channel`
    /// offers. A new release gets one from each of the channel's last `bases` earlier
    /// releases of the same name that saves enough ([`tree_deltas`]), made in a staging
    /// directory inside `staging_in`; a renewal (the current release again) offers the deltas
    /// it lists again, at most `bases`, each whose file is still intact.
    pub fn deltas(
        &self,
        bundle: &Path,
        facts: &BundleFacts,
        channel: &str,
        bases: usize,
        staging_in: &Path,
    ) -> Result<Deltas> {
        tree_deltas::check_count(bases)?;
        let history = self.history(channel)?;
        if let Some(current) = history.stack().pop()
            && current.sha256 == facts.sha256
        {
            return Ok(tree_deltas::renewed(&self.root, &current.deltas, bases));
        }
        let found = tree_deltas::bases(&history, &facts.manifest, &facts.sha256, bases);
        tree_deltas::make(
            &self.root,
            &found,
            bundle,
            &facts.manifest,
            facts.size,
            staging_in,
        )
    }

    /// Works out and checks a publish of the bundle `facts` describes, offering `deltas`,
    /// writing nothing: the version rules, the feed, the ledger entry and the keys that would
    /// sign its tree head.
    pub fn plan_publish(
        &self,
        facts: &BundleFacts,
        channel: &str,
        rollout_percent: u8,
        mirrors: &[String],
        deltas: &[DeltaRef],
        signing: &Signing<'_>,
    ) -> Result<Plan> {
        check_channel(channel)?;
        if rollout_percent > 100 {
            bail!("--rollout {rollout_percent} is not a percentage from 0 to 100");
        }
        let m = &facts.manifest;
        let mut index = self.index()?;
        let same_version = index
            .releases
            .iter()
            .find(|r| r.name == m.name && r.version.cmp_precedence(&m.version).is_eq())
            .cloned();
        if let Some(old) = &same_version
            && old.sha256 != facts.sha256
        {
            return Err(Refused(format!(
                "{} {} is already in the release tree as bundle {} (published {}), and this \
                 file is {}; a published version never changes: pack it as a new version",
                m.name, m.version, old.sha256, old.first_published, facts.sha256
            ))
            .into());
        }
        let mut history = self.history(channel)?;
        let previous = history.stack().pop();
        let renew = previous.as_ref().is_some_and(|c| c.sha256 == facts.sha256);
        if let Some(current) = &previous
            && !renew
            && current.name == m.name
            && m.version.cmp_precedence(&current.version).is_le()
        {
            return Err(Refused(format!(
                "{} {} is not newer than {}, the current release on channel {channel}; \
                 devices would not take it (use withdraw to go back to an earlier release)",
                m.name, m.version, current.version
            ))
            .into());
        }
        let release = Release {
            name: m.name.clone(),
            version: m.version.clone(),
            requires_app: m.requires_app.clone(),
            size: facts.size,
            sha256: facts.sha256,
            path: format!("../{BUNDLES_DIR}/{}.{BUNDLE_EXTENSION}", facts.sha256),
            mirrors: mirrors
                .iter()
                .map(|base| {
                    format!(
                        "{}/{BUNDLES_DIR}/{}.{BUNDLE_EXTENSION}",
                        base.trim_end_matches('/'),
                        facts.sha256
                    )
                })
                .collect(),
            rollout_percent,
            deltas: deltas.to_vec(),
        };
        release.validate()?;
        let sequence = self.next_sequence(channel, &history)?;
        let feed = self.feed(channel, sequence, Some(release.clone()), signing)?;
        let entry = LedgerEntry {
            format: ENTRY_FORMAT,
            event: LedgerEvent::Publish,
            channel: channel.to_string(),
            bundle: release.name.clone(),
            version: release.version.clone(),
            bundle_digest: release.sha256,
            manifest_digest: facts.manifest_digest,
            key_ids: facts.signers.clone(),
            time: signing.now.unix(),
            feed_sequence: sequence,
            offered: Some(Some(offered(&release, facts.manifest_digest))),
        };
        let entry_index =
            crate::release::ledger_audit::preview(&self.root, &entry, &signing_keys(signing))?;
        let index = same_version.is_none().then(|| {
            index.releases.push(IndexEntry {
                name: release.name.clone(),
                version: release.version.clone(),
                sha256: release.sha256,
                size: release.size,
                first_published: signing.now,
            });
            index
        });
        history.events.push(Event::Publish {
            sequence,
            time: signing.now,
            release,
        });
        Ok(Plan {
            action: if renew {
                Action::Renewed
            } else {
                Action::Published
            },
            channel: channel.to_string(),
            feed,
            feed_path: self.feed_path(channel),
            previous,
            entry,
            entry_index,
            history,
            index,
            bundle: Some(facts.sha256),
        })
    }

    /// Writes what `plan` worked out: the index, the ledger entry, the history and the feed.
    /// A publish's bundle must be in `bundles/` already ([`Tree::publish`] puts it there).
    pub fn apply(&self, plan: Plan, signing: &Signing<'_>) -> Result<Change> {
        self.writable()?;
        if let Some(sha256) = &plan.bundle {
            let path = self.bundle_path(sha256);
            if !path.is_file() {
                bail!("{} is missing; the bundle was not placed", path.display());
            }
        }
        if let Some(index) = &plan.index {
            write_atomic(&self.root.join(INDEX_FILE), &to_pretty_json(index))?;
        }
        let mut change = self.commit(
            &plan.channel,
            &plan.history,
            plan.feed,
            plan.previous,
            signing,
            &plan.entry,
        )?;
        change.action = plan.action;
        Ok(change)
    }

    /// The release `channel` offers now, if any. A channel never published to is a usage
    /// error (often a typo).
    pub fn current(&self, channel: &str) -> Result<Option<Release>> {
        Ok(self.published_history(channel)?.stack().pop())
    }

    fn published_history(&self, channel: &str) -> Result<History> {
        check_channel(channel)?;
        let history = self.history(channel)?;
        if history.events.is_empty() {
            return Err(crate::failure::usage(anyhow::anyhow!(
                "channel {channel} was never published to in {}; there is nothing to withdraw \
                 (check the channel name: 'ampoule ledger list --tree {}' shows the channels)",
                self.root.display(),
                self.root.display()
            )));
        }
        Ok(history)
    }

    /// Pulls `version`, the current release of `channel`: the release before it becomes
    /// current again, or the channel offers nothing (`release: null`) when there is none. A
    /// version withdrawn from the channel before changes nothing.
    pub fn withdraw(
        &self,
        channel: &str,
        version: &semver::Version,
        signing: &Signing<'_>,
    ) -> Result<Withdrawal<Change>> {
        Ok(match self.plan_withdraw(channel, version, signing)? {
            Withdrawal::Pending(plan) => Withdrawal::Pending(self.apply(plan, signing)?),
            Withdrawal::Already(already) => Withdrawal::Already(already),
        })
    }

    /// Works out and checks a withdraw of `version`, writing nothing. Only the current release
    /// can be withdrawn; any other version that was never withdrawn from `channel` is a usage
    /// error that names the current release.
    pub fn plan_withdraw(
        &self,
        channel: &str,
        version: &semver::Version,
        signing: &Signing<'_>,
    ) -> Result<Withdrawal<Plan>> {
        let mut history = self.published_history(channel)?;
        let mut stack = history.stack();
        let same = |v: &semver::Version| v.cmp_precedence(version).is_eq();
        let current = stack.pop();
        let offers = current.as_ref().map_or_else(
            || "it offers nothing now".to_string(),
            |c| format!("its current release is {} {}", c.name, c.version),
        );
        let Some(current) = current.filter(|c| same(&c.version)) else {
            if stack.iter().any(|r| same(&r.version)) {
                return Err(crate::failure::usage(anyhow!(
                    "{version} is an earlier release on channel {channel}, not the current one \
                     ({offers}); withdraw pulls only the current release"
                )));
            }
            let withdrawn = history.events.iter().rev().find_map(|e| match e {
                Event::Withdraw {
                    sequence,
                    time,
                    name,
                    version: v,
                    ..
                } if same(v) => Some((*sequence, *time, name.clone(), v.clone())),
                _ => None,
            });
            let Some((sequence, time, name, version)) = withdrawn else {
                return Err(crate::failure::usage(anyhow!(
                    "version {version} was never published on channel {channel} ({offers}); \
                     give --version the release to pull"
                )));
            };
            return Ok(Withdrawal::Already(Box::new(AlreadyWithdrawn {
                channel: channel.to_string(),
                name,
                version,
                sequence,
                time,
                current: history.stack().pop(),
            })));
        };
        let sequence = self.next_sequence(channel, &history)?;
        let now_offered = stack.pop();
        // The withdraw entry names both the release pulled (its own fields) and what the
        // channel's feed offers from now on, so the feed carries an entry of its own.
        let logged_offer = match &now_offered {
            Some(r) => {
                let (manifest_digest, _) =
                    crate::release::ledger_audit::withdrawn(&self.root, channel, &r.sha256)?;
                Some(offered(r, manifest_digest))
            }
            None => None,
        };
        let feed = self.feed(channel, sequence, now_offered, signing)?;
        let (manifest_digest, key_ids) =
            crate::release::ledger_audit::withdrawn(&self.root, channel, &current.sha256)?;
        let entry = LedgerEntry {
            format: ENTRY_FORMAT,
            event: LedgerEvent::Withdraw,
            channel: channel.to_string(),
            bundle: current.name.clone(),
            version: current.version.clone(),
            bundle_digest: current.sha256,
            manifest_digest,
            key_ids,
            time: signing.now.unix(),
            feed_sequence: sequence,
            offered: Some(logged_offer),
        };
        let entry_index =
            crate::release::ledger_audit::preview(&self.root, &entry, &signing_keys(signing))?;
        history.events.push(Event::Withdraw {
            sequence,
            time: signing.now,
            name: current.name.clone(),
            version: current.version.clone(),
            sha256: current.sha256,
        });
        Ok(Withdrawal::Pending(Plan {
            action: Action::Withdrawn,
            channel: channel.to_string(),
            feed,
            feed_path: self.feed_path(channel),
            previous: Some(current),
            entry,
            entry_index,
            history,
            index: None,
            bundle: None,
        }))
    }

    pub fn trust_set_path(&self, version: u64) -> PathBuf {
        self.root.join(TRUST_DIR).join(format!("{version}.json"))
    }

    /// The tree's current trust set, the highest `trust/<version>.json`; `None` when the tree
    /// has none. Other names in `trust/` are ignored.
    pub fn current_trust_set(&self) -> Result<Option<TreeTrustSet>> {
        let dir = self.root.join(TRUST_DIR);
        let entries = match fs::read_dir(&dir) {
            Ok(entries) => entries,
            Err(e) if e.kind() == io::ErrorKind::NotFound => return Ok(None),
            Err(e) => return Err(e).with_context(|| io_context("list", &dir)),
        };
        let mut highest = None;
        for entry in entries {
            let entry = entry.with_context(|| io_context("list", &dir))?;
            let name = entry.file_name();
            let version = name
                .to_str()
                .and_then(|n| n.strip_suffix(".json"))
                .filter(|n| !n.starts_with('0') && n.bytes().all(|b| b.is_ascii_digit()))
                .and_then(|n| n.parse::<u64>().ok());
            if let Some(v) = version {
                highest = highest.max(Some(v));
            }
        }
        let Some(version) = highest else {
            return Ok(None);
        };
        let path = self.trust_set_path(version);
        let bytes =
            crate::release::files::read_bounded(&path, trust_spec::MAX_BYTES, "a trust-set file")?;
        let file = TrustSetFile::from_json(&bytes)
            .with_context(|| format!("{} is not a valid trust-set file", path.display()))?;
        if file.version() != version {
            bail!(
                "{} holds trust set version {}; a trust set in the release tree is named by its \
                 own version (restore the file from a backup)",
                path.display(),
                file.version()
            );
        }
        Ok(Some(TreeTrustSet {
            version,
            sha256: Digest::of(&bytes),
            bytes,
            path,
        }))
    }

    /// Publishes the trust set `bytes` as the tree's current one: it must verify as the
    /// successor of the current set (as a device would take it), or as an initial set when the
    /// tree has none, and the feed key must be able to sign feeds under both. The ledger logs
    /// it (one trust-set entry), then every channel's feed is signed again, naming it.
    /// What [`Tree::publish_trust_set`] would do, after every one of its checks, writing
    /// nothing: the set's version, the ledger entry it would append, and each channel's feed
    /// it would renew, with its new sequence.
    pub fn plan_trust_set(&self, bytes: &[u8], signing: &Signing<'_>) -> Result<TrustSetPlan> {
        let (accepted, current) = self.accept_trust_set(bytes, signing)?;
        let mut renewed = Vec::new();
        // A tree not made yet has no channels.
        let channels = if self.root.join(FEEDS_DIR).is_dir() {
            self.channels()?
        } else {
            Vec::new()
        };
        for channel in channels {
            let history = self.history(&channel)?;
            let Some(release) = history.stack().pop() else {
                continue;
            };
            let sequence = self.next_sequence(&channel, &history)?;
            renewed.push((channel, sequence, release));
        }
        Ok(TrustSetPlan {
            entry: TrustSetEntry {
                event: LedgerEvent::TrustSet,
                trust_set_version: accepted.version(),
                trust_set_digest: Digest::of(bytes),
                key_ids: accepted.signature_report().valid.clone(),
                time: signing.now.unix(),
            },
            previous_version: current.map(|c| c.version),
            renewed,
        })
    }

    /// Accepts `bytes` as the tree's next trust set: the successor of the current one (or a
    /// valid first one), under which the signing key still signs feeds alone.
    fn accept_trust_set(
        &self,
        bytes: &[u8],
        signing: &Signing<'_>,
    ) -> Result<(TrustSet, Option<TreeTrustSet>)> {
        let current = self.current_trust_set()?;
        let accepted = match &current {
            None => TrustSet::verify_initial(bytes, signing.now),
            Some(current) => TrustSet::renew(&current.bytes, None, bytes, signing.now),
        }?;
        // Devices behind on trust sets walk `trust/<n>.json` one version at a time.
        if let Some(current) = &current
            && accepted.version() != current.version + 1
        {
            return Err(Refused(format!(
                "trust set version {} does not follow the release tree's version {} directly; \
                 devices that missed rotations fetch every version in turn, so publish version \
                 {} next",
                accepted.version(),
                current.version,
                current.version + 1
            ))
            .into());
        }
        let signer = KeyId::of_raw_key(signing.key.verifying_key().as_bytes());
        // The feed announcing the new set is verified under the current one first, then under
        // the new one, so the feed key must hold under both. The current set may have expired
        // (renewing it is allowed); its signatures were checked when it was published.
        let mut sets = vec![accepted.file().clone()];
        if let Some(current) = &current {
            sets.push(TrustSetFile::from_json(&current.bytes)?);
        }
        for set in &sets {
            let (keys, threshold) = (
                set.keys_for(DocumentKind::Feed),
                set.threshold(DocumentKind::Feed),
            );
            if keys.get(&signer).is_none() {
                let file = signing
                    .key_file
                    .map(|f| format!(" ({})", f.display()))
                    .unwrap_or_default();
                return Err(Refused(format!(
                    "key {signer}{file} is not a feed key in trust set version {}; devices on that set \
                     would refuse the feeds this tree signs with it (sign with a key that has the \
                     feed role in both the current and the new set)",
                    set.version()
                ))
                .into());
            }
            if threshold != 1 {
                return Err(Refused(format!(
                    "trust set version {} needs {threshold} feed signatures, but the release tree \
                     signs each feed with one key; set its feed threshold to 1",
                    set.version()
                ))
                .into());
            }
        }
        // A device accepts the new set only if the tree head that logs it carries the
        // signatures of the current set's tree-head keys (FORMAT.md, trust-set proofs): a
        // publish without them would strand every device on the current set.
        if let Some(current) = &current {
            let file = TrustSetFile::from_json(&current.bytes)?;
            let (keys, threshold) = (
                file.keys_for(DocumentKind::TreeHead),
                file.threshold(DocumentKind::TreeHead),
            );
            let mut signers: Vec<KeyId> = signing_keys(signing)
                .into_iter()
                .map(|k| KeyId::of_raw_key(k.verifying_key().as_bytes()))
                .filter(|id| keys.get(id).is_some())
                .collect();
            signers.sort();
            signers.dedup();
            if signers.len() < threshold {
                return Err(Refused(format!(
                    "trust set version {} must be logged in a tree head signed by {threshold} \
                     tree-head key(s) of the current version {}, but this publish signs with \
                     {} of them; devices on version {} would refuse the new set. Give those \
                     keys with --tree-head-key",
                    accepted.version(),
                    current.version,
                    signers.len(),
                    current.version
                ))
                .into());
            }
        }
        Ok((accepted, current))
    }

    pub fn publish_trust_set(&self, bytes: &[u8], signing: &Signing<'_>) -> Result<TrustSetChange> {
        self.writable()?;
        let (accepted, current) = self.accept_trust_set(bytes, signing)?;
        // The ledger logs the new set before any file names it, so an auditor never learns of
        // a trust set later than devices do.
        let keys = signing_keys(signing);
        let entry = TrustSetEntry {
            event: LedgerEvent::TrustSet,
            trust_set_version: accepted.version(),
            trust_set_digest: Digest::of(bytes),
            key_ids: accepted.signature_report().valid.clone(),
            time: signing.now.unix(),
        };
        crate::release::ledger_audit::append_trust_set(&self.root, &entry, &keys, signing.outside)?;
        let dir = self.root.join(TRUST_DIR);
        fs::create_dir_all(&dir).with_context(|| io_context("create directory", &dir))?;
        let path = self.trust_set_path(accepted.version());
        write_atomic(&path, bytes)?;
        let published = TreeTrustSet {
            version: accepted.version(),
            sha256: Digest::of(bytes),
            bytes: bytes.to_vec(),
            path,
        };
        let mut feeds = Vec::new();
        for channel in self.channels()? {
            let mut history = self.history(&channel)?;
            // A channel that offers nothing has no release to log a renewal for; its next
            // publish names the new trust set.
            let Some(release) = history.stack().pop() else {
                continue;
            };
            let sequence = self.next_sequence(&channel, &history)?;
            let feed = self.feed(&channel, sequence, Some(release.clone()), signing)?;
            // The renewed feed re-announces the channel's release, so the ledger logs it as a
            // publish (a renewal) with the digests and signers of its first publish entry.
            let (manifest_digest, key_ids) =
                crate::release::ledger_audit::withdrawn(&self.root, &channel, &release.sha256)?;
            let entry = LedgerEntry {
                format: ENTRY_FORMAT,
                event: LedgerEvent::Publish,
                channel: channel.clone(),
                bundle: release.name.clone(),
                version: release.version.clone(),
                bundle_digest: release.sha256,
                manifest_digest,
                key_ids,
                time: signing.now.unix(),
                feed_sequence: sequence,
                offered: Some(Some(offered(&release, manifest_digest))),
            };
            history.events.push(Event::TrustSet {
                sequence,
                time: signing.now,
                version: published.version,
                sha256: published.sha256,
            });
            let mut change = self.commit(
                &channel,
                &history,
                feed,
                Some(release.clone()),
                signing,
                &entry,
            )?;
            change.action = Action::TrustSetNamed;
            feeds.push(change);
        }
        Ok(TrustSetChange {
            trust_set: published,
            previous_version: current.map(|c| c.version),
            feeds,
        })
    }

    /// The channels that have a feed, in name order.
    fn channels(&self) -> Result<Vec<String>> {
        let dir = self.root.join(FEEDS_DIR);
        let mut channels = Vec::new();
        for entry in fs::read_dir(&dir).with_context(|| io_context("list", &dir))? {
            let entry = entry.with_context(|| io_context("list", &dir))?;
            if let Some(channel) = entry
                .file_name()
                .to_str()
                .and_then(|n| n.strip_suffix(".json"))
                .filter(|c| check_channel(c).is_ok())
            {
                channels.push(channel.to_string());
            }
        }
        channels.sort();
        Ok(channels)
    }

    /// A signed feed for `channel`, not written yet.
    fn feed(
        &self,
        channel: &str,
        sequence: u64,
        release: Option<Release>,
        signing: &Signing<'_>,
    ) -> Result<Feed> {
        let expires = signing
            .now
            .unix()
            .checked_add(signing.expires_in_secs)
            .and_then(Timestamp::from_unix)
            .ok_or_else(|| anyhow!("the feed's expiry would be past the year 9999"))?;
        let feed = Feed {
            format: FEED_FORMAT_VERSION,
            channel: channel.to_string(),
            sequence,
            issued: signing.now,
            expires,
            release,
            trust_set: self.current_trust_set()?.map(|t| t.reference()),
            ledger: None,
        };
        feed.validate()?;
        Ok(feed)
    }

    /// Appends `entry` to the ledger, then writes the history, then the signed feed with the
    /// ledger's proofs: the feed last, because devices act on it (see `audit.rs` for why).
    fn commit(
        &self,
        channel: &str,
        history: &History,
        mut feed: Feed,
        previous: Option<Release>,
        signing: &Signing<'_>,
        entry: &LedgerEntry,
    ) -> Result<Change> {
        self.writable()?;
        let keys = signing_keys(signing);
        feed.ledger = Some(crate::release::ledger_audit::append(
            &self.root,
            entry,
            &keys,
            signing.outside,
        )?);
        feed.validate()?;
        write_atomic(&self.history_path(channel), &to_pretty_json(history))?;
        let text = feed.to_json();
        let signer = KeyId::of_raw_key(signing.key.verifying_key().as_bytes());
        let signed = SignedFeed {
            feed: text.clone(),
            signatures: vec![SignatureEntry {
                key_id: signer,
                signature: signing
                    .key
                    .sign(&signed_bytes(context::FEED, text.as_bytes()))
                    .to_bytes(),
            }],
        };
        let feed_path = self.feed_path(channel);
        write_atomic(&feed_path, &signed.to_json())?;
        Ok(Change {
            channel: channel.to_string(),
            feed,
            feed_path,
            signer,
            previous,
            action: Action::Published,
            entry: entry.clone(),
        })
    }

    /// Renames a staged bundle to its content address. A file already there with the same
    /// name holds the same bytes unless it was damaged, so it is checked and replaced if so.
    fn place_bundle(&self, staged: StagedBundle) -> Result<()> {
        self.writable()?;
        let dest = self.bundle_path(&staged.facts.sha256);
        if let Ok(existing) = File::open(&dest) {
            let (digest, _) = ampoule_verify::digest::hash_reader(existing, u64::MAX)
                .with_context(|| io_context("read", &dest))?;
            if digest == staged.facts.sha256 {
                return Ok(());
            }
        }
        publishable(staged.temp.path())?;
        staged
            .temp
            .persist(&dest)
            .map_err(|e| e.error)
            .with_context(|| io_context("create", &dest))?;
        sync_dir(&self.root.join(BUNDLES_DIR))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn durations() {
        assert_eq!(parse_duration("7d").ok(), Some(7 * 86_400));
        assert_eq!(parse_duration("12h").ok(), Some(12 * 3600));
        assert_eq!(parse_duration("90m").ok(), Some(5400));
        assert_eq!(parse_duration("3600s").ok(), Some(3600));
        for bad in [
            "",
            "d",
            "7",
            "7w",
            "-1d",
            "1.5h",
            "0s",
            "401d",
            "99999999999999999999d",
        ] {
            assert!(parse_duration(bad).is_err(), "{bad}");
        }
    }
}
