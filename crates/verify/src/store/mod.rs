//! The on-device store: where an app keeps the verified model it runs, the one before it (for
//! rollback), and what it must remember to refuse old bundles, laid out so that a crash or
//! power cut at any moment leaves either the old or the new model, never neither.
//!
//! # Layout
//!
//! ```text
//! STORE/
//!   state.json                      the one commit point (see below)
//!   lock                            empty; updaters hold an exclusive lock on it
//!   trust-set.json                  the newest trust set the device accepted (see below)
//!   .state.json.tmp-<pid>-<n>       a new state.json being written (removed if left over)
//!   releases/
//!     <name>-<version>-<12 hex>/    one verified release; the hex is the start of the
//!       model.<ext>                 SHA-256 of its exact manifest bytes
//!       labels.txt
//!       manifest.json               the exact signed manifest bytes
//!       signatures.json             the bundle's signatures over them
//!     .staging-<pid>-<n>/           a release being unpacked (removed if left over)
//! ```
//!
//! `state.json` names the current and the previous release (directory name, version and
//! manifest SHA-256), the model line's name, the highest version ever accepted, and per
//! channel the highest version and feed sequence accepted. Pointers and rollback state live
//! in this one file on purpose: replacing it (write a temporary file, fsync it, rename it over
//! `state.json`, fsync the store directory) switches the model and raises the rollback floor
//! in one atomic step, so no crash can leave a new model running with an old floor, or a
//! raised floor with the old model (which would refuse the retried install).
//!
//! # Install
//!
//! Under the lock: remove leftovers of crashed runs; check the bundle against the store (its
//! signatures again under the store's keys, the model line, a version newer than any accepted,
//! a feed sequence not lower than the channel's); unpack into a staging directory with every
//! file fsynced (or, for a delta, rebuild the files there from the current release's, which the
//! delta hashes again first: [`Incoming`]); write the manifest and signatures beside them; fsync the staging directory;
//! rename it into `releases/`; fsync `releases/`; then commit `state.json` as above. Until the
//! rename of `state.json` the old model stays current; after it, the new one is. The numbered
//! points of this sequence are [`Step`]s; tests crash a child process at each one.
//!
//! # Opening
//!
//! [`Store::open_current`] checks the current release fully before the app uses it: the
//! manifest's SHA-256 against `state.json`, its signatures against the app's trusted keys, its
//! policy against the app (name, app-version range, size limit), the directory's name and
//! entries, and every file's size and SHA-256 (one read of the model). A store edited between
//! runs (a changed byte, a swapped manifest, a hand-edited `state.json`, a deleted release) is
//! refused with what is wrong. Opening takes no lock, so an app never waits for a slow
//! update: `state.json` is replaced atomically, and an update never deletes the current or the
//! previous release. Only [`Store::gc`] (and the clean-up at the start of every update)
//! deletes releases, those that are neither current nor previous; an open that loses such a
//! race sees `state.json` change and checks again.
//!
//! # Rollback
//!
//! [`Store::rollback`] makes the previous release current again, after checking it fully,
//! and forgets the release it replaces (there is no previous afterwards). The highest version
//! accepted is not lowered: the rolled-back-from version, and anything not newer than it, is
//! refused from then on, so a fixed model must carry a newer version. Going back to the
//! previous release is allowed despite the floor because the store verified and ran it before.
//!
//! # Trust set
//!
//! An app that runs on a trust set keeps every set it accepted after the one shipped with the
//! app in `trust-chain.json`, oldest first, each the exact bytes of [`TrustSet::to_json`],
//! replaced atomically (temporary file, fsync, rename, fsync of the directory) under the
//! updaters' lock by [`Store::save_trust_set`]. Whoever can write the store can write this
//! file, so it is believed only as far as it proves itself: from the shipped set, each stored
//! set must be a successor of the one before (signed by that one's trust-set threshold and by
//! its own). The first that is not is ignored with everything after it (issue 10: a set
//! planted in the store, signed by its writer's own keys, used to be believed). Falling back to
//! an older set is what deleting the store would do too; the feed then names the newer set
//! again and the device rotates once more. Saving an older version is refused. The file is
//! one atomic unit of its own, apart from `state.json`, so a crash leaves the old or the new
//! chain. Stores written before the chain kept the newest set alone in `trust-set.json`,
//! which is read as a chain of one.
//!
//! # Limits of what a store can detect
//!
//! Anyone who can write the store directory can do what the store's own code does. The checks
//! catch damage and edits that do not re-create a consistent store; they cannot stop someone
//! with the device's write access from deleting the whole store (which resets rollback
//! protection) or restoring an older consistent copy of it. A missing `state.json` beside
//! existing releases is refused rather than treated as a fresh store.

use std::collections::BTreeMap;
use std::fs::{File, TryLockError};
use std::io::{self, Read, Write};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use semver::Version;
use serde::{Deserialize, Serialize};

use crate::check::bundle::{VerifiedBundle, Verifier};
use crate::check::feed::{Feed, SignedFeed, VerifiedFeed};
use crate::check::trust::{TrustSet, TrustSetFile};
use crate::dir::{Dir, Found, Refused};
use crate::error::{Error, ErrorKind, Result};
use crate::format::digest::{Digest, hash_reader};
use crate::format::keys::KeyId;
use crate::format::manifest::{Manifest, Role};
use crate::format::merkle::TreeHead;
use crate::format::signed::{SignedDocument, Signers, kind};
use crate::format::time::Timestamp;
use crate::format::{entry, limit, trust_set};
use crate::payload::delta::VerifiedDelta;
use crate::payload::unpack::{Staging, sync_dir};

/// The format version of `state.json` this crate writes. Format 2 added `channel`; a
/// format 1 file (no `channel`) is read as following no channel yet.
pub const STATE_FORMAT: u32 = 2;
/// The oldest `state.json` format this crate reads.
const OLDEST_STATE_FORMAT: u32 = 1;
/// The state file's name in the store directory.
pub const STATE_FILE: &str = "state.json";
/// The lock file's name in the store directory.
pub const LOCK_FILE: &str = "lock";
/// The directory holding the releases.
pub const RELEASES_DIR: &str = "releases";
/// The file in which stores written before issue 10 kept the newest trust set they accepted;
/// read as a chain of one set, and replaced by [`TRUST_CHAIN_FILE`] at the next rotation.
pub const TRUST_SET_FILE: &str = "trust-set.json";
/// The file holding every trust set the device accepted after the one shipped with the app.
pub const TRUST_CHAIN_FILE: &str = "trust-chain.json";
/// The format of [`TRUST_CHAIN_FILE`].
const TRUST_CHAIN_FORMAT: u32 = 1;
/// The most trust sets a store keeps after the one shipped with the app.
pub const MAX_TRUST_CHAIN: usize = 64;
/// The most channels a store remembers.
pub const MAX_CHANNELS: usize = 64;
/// The directory where bundles download (and resume) before install; the update's.
pub const DOWNLOADS_DIR: &str = "downloads";
/// The lock file in [`DOWNLOADS_DIR`], held for a whole update.
pub const DOWNLOAD_LOCK: &str = "lock";
/// The refusal the update remembers, in [`DOWNLOADS_DIR`].
pub const REFUSED_FILE: &str = "refused.json";
/// The directory of kept feeds: for each channel, the last feed the store accepted on it,
/// exactly as verified, which backs the channel's sequence and the remembered tree head.
pub const KEPT_FEEDS_DIR: &str = "feeds";
const KEPT_TEMP_PREFIX: &str = ".feed.tmp-";

/// The manifest and signatures of the release that set the highest version, which back it.
pub const HIGHEST_FILE: &str = "highest.json";
const HIGHEST_TEMP_PREFIX: &str = ".highest.json.tmp-";

/// `highest.json`: a signed manifest as the bundle carried it.
#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct KeptManifest {
    manifest: String,
    signatures: String,
}

/// The most planted entries one run notes (and `state.json` lists) as removed.
pub const MAX_REMOVED_NOTES: usize = 16;

const STATE_BYTES: u64 = 64 * 1024;
/// What a `state.json` the store cannot use asks for. The release it names cannot be known
/// without it, and moving the store aside loses nothing a genuine update cannot bring back.
const START_AFRESH: &str =
    "Remove it and move the store's other files aside to start the store afresh";
const STATE_TEMP_PREFIX: &str = ".state.json.tmp-";
const TRUST_SET_TEMP_PREFIX: &str = ".trust-set.json.tmp-";
/// The prefix of any other small file of the store's being written ([`replace_own_file`]).
const OWN_TEMP_PREFIX: &str = ".own.tmp-";
const STAGING_PREFIX: &str = ".staging-";
const RELEASE_NAME_BYTES: usize = 200;
const DIGEST_PREFIX_HEX: usize = 12;
const LOCK_POLL: Duration = Duration::from_millis(20);
const OPEN_ATTEMPTS: usize = 3;

/// A release named in `state.json`.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
#[non_exhaustive]
pub struct ReleaseRef {
    /// The release's directory name under `releases/`.
    pub release: String,
    /// The release's version, as its manifest states it.
    pub version: Version,
    /// SHA-256 of the release's exact manifest bytes.
    pub manifest_sha256: Digest,
}

/// What the store accepted on one channel.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
#[non_exhaustive]
pub struct ChannelState {
    /// The highest version installed from this channel; `None` when feeds of the channel were
    /// recorded ([`Store::record_feed`]) but nothing was installed from it yet.
    pub highest_version: Option<Version>,
    /// The highest feed sequence accepted on this channel, if a feed ever named one.
    pub highest_sequence: Option<u64>,
    /// SHA-256 of the signed text of the feed accepted under `highest_sequence`, when known:
    /// with it, another feed under the same sequence is refused too.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub feed_sha256: Option<Digest>,
}

/// The store's state (`state.json`): which releases are current and previous, and what it
/// must remember to refuse old bundles.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
#[non_exhaustive]
pub struct StoreState {
    /// Always [`STATE_FORMAT`].
    pub format: u32,
    /// The model line this store holds, set by the first install.
    pub name: Option<String>,
    /// The channel this store follows, set by the first feed it accepts; changing it is an
    /// explicit call ([`Store::switch_channel`]). Absent in format 1 files.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub channel: Option<String>,
    /// The highest version ever accepted; never lowered, not even by a rollback.
    pub highest_version: Option<Version>,
    /// The release the app runs.
    pub current: Option<ReleaseRef>,
    /// The release before it, kept for [`Store::rollback`].
    pub previous: Option<ReleaseRef>,
    /// What was accepted per channel.
    pub channels: BTreeMap<String, ChannelState>,
    /// The largest audit-ledger tree head this device verified ([`Store::remember_tree_head`]);
    /// absent until the first one, and in stores written before the ledger existed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub tree_head: Option<TreeHead>,
    /// What the last run that removed anything found planted in the store and removed (a
    /// link, a FIFO, a file with several hard links), for `store status`. Informative only:
    /// nothing is decided from it.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub removed: Vec<String>,
}

impl StoreState {
    fn empty() -> Self {
        StoreState {
            format: STATE_FORMAT,
            name: None,
            channel: None,
            highest_version: None,
            current: None,
            previous: None,
            channels: BTreeMap::new(),
            tree_head: None,
            removed: Vec::new(),
        }
    }

    fn to_json(&self) -> Vec<u8> {
        let mut bytes = serde_json::to_vec_pretty(self)
            .expect("a store state of plain strings and numbers always serializes");
        bytes.push(b'\n');
        bytes
    }

    /// Checks what the types alone do not: names that stay inside `releases/`, and a state
    /// that the store's own code could have written.
    fn validate(&self) -> std::result::Result<(), String> {
        if !(OLDEST_STATE_FORMAT..=STATE_FORMAT).contains(&self.format) {
            return Err(format!(
                "format {} is not supported (this reader knows formats \
                 {OLDEST_STATE_FORMAT} to {STATE_FORMAT})",
                self.format
            ));
        }
        if let Some(channel) = &self.channel
            && check_channel(channel).is_err()
        {
            return Err(format!(
                "it follows '{}', which is not a channel name",
                channel.escape_debug()
            ));
        }
        if let Some(name) = &self.name {
            crate::format::manifest::check_name(name)
                .map_err(|_| format!("'{name}' is not a bundle name"))?;
        }
        for pointer in [&self.current, &self.previous].into_iter().flatten() {
            if !is_release_name(&pointer.release) {
                return Err(format!(
                    "it names release '{}', which is not a release directory name",
                    pointer.release.escape_debug()
                ));
            }
            // The highest version and the model line are what the kept manifests prove
            // (Store::back_versions); a release whose manifest does not verify is refused when
            // it is opened, with what is wrong.
        }
        if let (Some(c), Some(p)) = (&self.current, &self.previous)
            && c.release == p.release
        {
            return Err(format!(
                "release {} is both current and previous",
                c.release
            ));
        }
        if self.removed.len() > MAX_REMOVED_NOTES || self.removed.iter().any(|r| r.len() > 4096) {
            return Err(format!(
                "it lists more than {MAX_REMOVED_NOTES} removed entries, or one over 4096 bytes"
            ));
        }
        if self.channels.len() > MAX_CHANNELS {
            return Err(format!(
                "it lists {} channels, over the limit of {MAX_CHANNELS}",
                self.channels.len()
            ));
        }
        for (channel, state) in &self.channels {
            if check_channel(channel).is_err() {
                return Err(format!(
                    "'{}' is not a channel name",
                    channel.escape_debug()
                ));
            }
            match (&state.highest_version, &self.highest_version) {
                (None, _) => {}
                (Some(v), Some(h)) if v.cmp_precedence(h).is_le() => {}
                (Some(v), _) => {
                    return Err(format!(
                        "channel '{channel}' records version {v}, above the highest version accepted ({})",
                        shown_version(self.highest_version.as_ref())
                    ));
                }
            }
        }
        Ok(())
    }
}

impl StoreState {
    /// The feed last accepted on `channel`, as [`crate::FeedVerifier::last_accepted`] takes it:
    /// its sequence and, when the store kept it, the digest of its signed text.
    pub fn last_feed(&self, channel: &str) -> Option<(u64, Option<Digest>)> {
        let known = self.channels.get(channel)?;
        known.highest_sequence.map(|s| (s, known.feed_sha256))
    }
}

fn shown_version(v: Option<&Version>) -> String {
    v.map_or_else(|| "none".to_string(), Version::to_string)
}

/// A release in the store whose every check passed just now.
#[derive(Debug, Clone)]
#[non_exhaustive]
pub struct Release {
    /// The release's directory.
    pub dir: PathBuf,
    /// The model file.
    pub model: PathBuf,
    /// The label list file.
    pub labels_path: PathBuf,
    /// The labels, in output-index order.
    pub labels: Vec<String>,
    /// The verified manifest.
    pub manifest: Manifest,
    /// SHA-256 of the exact manifest bytes.
    pub manifest_sha256: Digest,
    /// The trusted keys whose signatures verified.
    pub signers: Vec<KeyId>,
}

/// What an install did.
#[derive(Debug, Clone)]
#[non_exhaustive]
pub struct Installed {
    /// The release now current.
    pub release: Release,
    /// The version it replaced, now the previous release.
    pub replaced: Option<Version>,
}

/// A point in an install or rollback, in order. A test hook sees each one after it is reached
/// and may fail it or stop the process there; nothing else uses them.
#[doc(hidden)]
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum Step {
    /// The lock is held, leftovers are removed, the request is allowed; nothing is written.
    Locked,
    /// An empty staging directory exists.
    StagingCreated,
    /// The model and labels are in the staging directory, fsynced.
    FilesWritten,
    /// The manifest and signatures are beside them, fsynced.
    MetadataWritten,
    /// The staging directory itself is fsynced.
    StagingSynced,
    /// The staging directory is renamed into `releases/`.
    ReleaseRenamed,
    /// `releases/` is fsynced.
    ReleasesSynced,
    /// The new `state.json` is written to a temporary file and fsynced.
    StateWritten,
    /// The temporary file is renamed over `state.json`: the commit.
    StateRenamed,
    /// The store directory is fsynced; the operation is durable.
    StoreSynced,
}

impl Step {
    /// Every step of an install, in order.
    pub const INSTALL: [Step; 10] = [
        Step::Locked,
        Step::StagingCreated,
        Step::FilesWritten,
        Step::MetadataWritten,
        Step::StagingSynced,
        Step::ReleaseRenamed,
        Step::ReleasesSynced,
        Step::StateWritten,
        Step::StateRenamed,
        Step::StoreSynced,
    ];

    /// Every step of a rollback, in order.
    pub const ROLLBACK: [Step; 4] = [
        Step::Locked,
        Step::StateWritten,
        Step::StateRenamed,
        Step::StoreSynced,
    ];

    /// The step's name in messages.
    pub fn name(self) -> &'static str {
        match self {
            Step::Locked => "locked",
            Step::StagingCreated => "staging-created",
            Step::FilesWritten => "files-written",
            Step::MetadataWritten => "metadata-written",
            Step::StagingSynced => "staging-synced",
            Step::ReleaseRenamed => "release-renamed",
            Step::ReleasesSynced => "releases-synced",
            Step::StateWritten => "state-written",
            Step::StateRenamed => "state-renamed",
            Step::StoreSynced => "store-synced",
        }
    }

    /// Whether the operation's change is visible once this step is reached.
    pub fn is_committed(self) -> bool {
        matches!(self, Step::StateRenamed | Step::StoreSynced)
    }
}

/// A test hook called at every [`Step`]; an error fails the operation at that point.
#[doc(hidden)]
pub type StepHook<'a> = &'a mut dyn FnMut(Step) -> io::Result<()>;

/// An on-device store of verified releases (see the module documentation).
#[derive(Debug, Clone)]
pub struct Store {
    dir: PathBuf,
    verifier: Verifier,
    lock_wait: Duration,
    /// What this handle removed because the store's own code could not have put it there
    /// (a link, a FIFO, a file with several hard links), for the update's report; also
    /// written into `state.json` by the next commit, for `store status`.
    removed: Arc<Mutex<Vec<String>>>,
    /// The trust set shipped with the app, when it runs on trust sets: every set of the chain
    /// it starts counts for the proof of the version floor, so that a release installed under
    /// a set whose key a later set revoked still proves the floor it set (`back_versions`).
    shipped: Option<Arc<Vec<u8>>>,
    /// Whose signatures the kept feeds and their tree heads need (the device's feed and
    /// tree-head signers); with them, the feed sequences and the tree head the store remembers
    /// are what the kept signed feeds prove (`back_feeds`). Without them (the release side's
    /// tools), `state.json` is shown as it is.
    documents: Option<Arc<Documents>>,
}

/// The signers of the documents the store keeps besides manifests.
#[derive(Debug)]
pub(crate) struct Documents {
    feeds: Signers<kind::Feed>,
    heads: Signers<kind::TreeHead>,
}

/// What an install writes into its staging directory: a verified bundle's payload, or the
/// files a verified delta rebuilds from the current release's (issue 13). Everything else an
/// install does (the store's own checks, staging, the swap, the state) is the same for both.
pub(crate) enum Incoming {
    Bundle(VerifiedBundle),
    Delta(VerifiedDelta<File>),
}

impl Incoming {
    fn manifest(&self) -> &Manifest {
        match self {
            Incoming::Bundle(b) => b.manifest(),
            Incoming::Delta(d) => d.manifest(),
        }
    }

    fn manifest_bytes(&self) -> &[u8] {
        match self {
            Incoming::Bundle(b) => &b.layout().manifest,
            Incoming::Delta(d) => d.manifest_bytes(),
        }
    }

    fn signatures(&self) -> &[u8] {
        match self {
            Incoming::Bundle(b) => &b.layout().signatures,
            Incoming::Delta(d) => d.signatures(),
        }
    }
}

/// A lock on a file, held until dropped (or until the process dies, which closes the file).
/// Dropping it unlocks before closing: a child process the app starts meanwhile shares the
/// open file between its fork and its exec, and closing alone would leave the lock held that
/// long, so that the next update on this store found it taken.
pub(crate) struct HeldLock(File);

impl HeldLock {
    /// Takes the lock on `file` if no one holds it.
    pub(crate) fn try_take(file: File) -> std::result::Result<HeldLock, (File, TryLockError)> {
        match file.try_lock() {
            Ok(()) => Ok(HeldLock(file)),
            Err(e) => Err((file, e)),
        }
    }

    /// The locked file.
    pub(crate) fn file(&self) -> &File {
        &self.0
    }
}

impl Drop for HeldLock {
    fn drop(&mut self) {
        let _ = self.0.unlock();
    }
}

impl Store {
    /// Opens the store in `dir`, creating it (and `dir`) if it does not exist yet. `verifier`
    /// says which keys and policy the stored model must still satisfy whenever it is opened;
    /// it is normally the same verifier that checks new bundles.
    ///
    /// A directory with releases but no `state.json` is refused: the state was lost or
    /// removed, and with it the memory of which versions are too old.
    pub fn open(dir: &Path, verifier: Verifier) -> Result<Store> {
        let store = Store {
            dir: dir.to_path_buf(),
            verifier,
            lock_wait: Duration::ZERO,
            removed: Arc::default(),
            shipped: None,
            documents: None,
        };
        let root = Dir::open_root(dir, true)
            .map_err(|e| Error::io(format!("cannot create store {}", dir.display()), e))?;
        if root
            .found(STATE_FILE)
            .map_err(|e| Error::io(format!("cannot read store {}", dir.display()), e))?
            .is_none()
        {
            store.initialize(&root)?;
        }
        store.state()?;
        Ok(store)
    }

    /// How long an update waits for another process's update to finish before failing;
    /// zero (the default) fails at once.
    pub fn wait_for_lock(mut self, wait: Duration) -> Self {
        self.lock_wait = wait;
        self
    }

    /// The store's directory.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// The store's state as `state.json` holds it now (parsed and checked for consistency,
    /// releases not checked).
    pub fn state(&self) -> Result<StoreState> {
        self.state_in(&self.root()?)
    }

    fn state_in(&self, root: &Dir) -> Result<StoreState> {
        let path = root.join(STATE_FILE);
        let bytes = match read_capped(root, STATE_FILE, STATE_BYTES) {
            Ok(bytes) => bytes,
            Err(ReadCapped::Planted(why)) => {
                return Err(Error::new(
                    ErrorKind::Store,
                    format!(
                        "{} cannot be read: {why}; ampoule-verify did not write it. {START_AFRESH}",
                        path.display()
                    ),
                ));
            }
            Err(ReadCapped::Missing) => {
                return Err(Error::new(
                    ErrorKind::Store,
                    format!(
                        "{} is missing; the store was damaged or changed outside ampoule-verify",
                        path.display()
                    ),
                ));
            }
            Err(ReadCapped::TooLarge) => {
                return Err(Error::new(
                    ErrorKind::Store,
                    format!(
                        "{} is over {STATE_BYTES} bytes; the store was damaged or changed outside \
                         ampoule-verify. {START_AFRESH}",
                        path.display()
                    ),
                ));
            }
            Err(ReadCapped::Io(e)) => {
                return Err(Error::io(format!("cannot read {}", path.display()), e));
            }
        };
        let mut state: StoreState = serde_json::from_slice(&bytes).map_err(|e| {
            Error::new(
                ErrorKind::Store,
                format!(
                    "{} is not valid: {e}; the store was damaged or changed outside \
                     ampoule-verify. {START_AFRESH}",
                    path.display()
                ),
            )
        })?;
        self.back_versions(root, &mut state);
        if let Some(documents) = &self.documents {
            back_feeds(root, documents, &mut state);
        }
        state.validate().map_err(|why| {
            Error::new(
                ErrorKind::Store,
                format!(
                    "{} is inconsistent: {why}; the store was damaged or changed outside \
                     ampoule-verify. {START_AFRESH}",
                    path.display()
                ),
            )
        })?;
        Ok(state)
    }

    /// Replaces the model line and the highest version `state.json` states with what signed
    /// manifests the store keeps prove (issue 10): `highest.json` (the manifest that set the
    /// highest version, after a rollback the only proof of it) and the current and previous
    /// releases' manifests, each counted only if its signatures meet the bundle threshold of the
    /// trust held now or of a set before it in the device's chain. A planted value (a highest
    /// version of 999.0.0, another model line) is thereby absent, not believed; a lowered one
    /// leaves the floor at the current release, as deleting `highest.json` would; per-channel
    /// versions above the proven highest are dropped too.
    fn back_versions(&self, root: &Dir, state: &mut StoreState) {
        let mut proven: Option<(String, Version)> = None;
        let mut consider = |manifest: Option<Manifest>| {
            let Some(m) = manifest else { return };
            match &proven {
                // One model line per store: a manifest of another line proves nothing.
                Some((name, _)) if name != &m.name => {}
                Some((_, v)) if m.version.cmp_precedence(v).is_le() => {}
                _ => proven = Some((m.name.clone(), m.version.clone())),
            }
        };
        for pointer in [&state.current, &state.previous].into_iter().flatten() {
            consider(self.signed_manifest_in(root, Some(&pointer.release)));
        }
        // `highest.json` is written just before the state that names its version: it counts
        // only once that state was committed, so that a crash between the two cannot raise the
        // floor over the retried install (and a planted version matches nothing it proves).
        consider(
            self.signed_manifest_in(root, None)
                .filter(|m| state.highest_version.as_ref() == Some(&m.version)),
        );
        let (name, highest) = proven.unzip();
        for channel in state.channels.values_mut() {
            if let Some(v) = &channel.highest_version
                && highest.as_ref().is_none_or(|h| v.cmp_precedence(h).is_gt())
            {
                channel.highest_version = None;
            }
        }
        state.name = name.or_else(|| {
            // Nothing installed yet, or nothing proven: a name alone decides nothing a
            // signed manifest would not, so it stays only while no release is named.
            (state.current.is_none() && state.previous.is_none())
                .then(|| state.name.take())
                .flatten()
        });
        state.highest_version = highest;
    }

    /// The manifest kept for `release` (or in `highest.json` for `None`), if its signatures
    /// verify under the trust held now.
    fn signed_manifest_in(&self, root: &Dir, release: Option<&str>) -> Option<Manifest> {
        let (manifest, signatures) = match release {
            Some(release) => {
                let dir = root.open_dir(RELEASES_DIR).ok()?.open_dir(release).ok()?;
                (
                    read_member(&dir, entry::MANIFEST, limit::MANIFEST_BYTES).ok()?,
                    read_member(&dir, entry::SIGNATURES, limit::SIGNATURES_BYTES).ok()?,
                )
            }
            None => {
                let cap = limit::MANIFEST_BYTES + limit::SIGNATURES_BYTES + 1024;
                let bytes = read_capped(root, HIGHEST_FILE, cap).ok()?;
                let kept: KeptManifest = serde_json::from_slice(&bytes).ok()?;
                (kept.manifest.into_bytes(), kept.signatures.into_bytes())
            }
        };
        let check = |signers: Option<&Signers<kind::Manifest>>| {
            self.verifier
                .check_signed_manifest(&manifest, &signatures, signers)
                .ok()
        };
        check(None).or_else(|| {
            // Only when the keys held now do not prove it: the sets before them.
            let chain = TrustChain::read(&self.dir, self.shipped.as_deref()?).ok()?;
            chain.all.iter().find_map(|set| {
                let signers = set.signers::<kind::Manifest>().ok()?;
                check(Some(&signers))
            })
        })
    }

    /// Checks the current release fully (see the module documentation) and returns its
    /// paths; `None` if nothing was installed yet. Costs one read of the model file.
    pub fn open_current(&self) -> Result<Option<Release>> {
        let mut state = self.state()?;
        for _ in 1..OPEN_ATTEMPTS {
            let Some(pointer) = &state.current else {
                return Ok(None);
            };
            match self.check_release(pointer) {
                Ok(release) => return Ok(Some(release)),
                Err(e) => {
                    // An update may have switched and cleaned up while this read the old
                    // release; only a failure under an unchanged state.json counts.
                    let now = self.state()?;
                    if now.current == state.current {
                        return Err(e);
                    }
                    state = now;
                }
            }
        }
        match &state.current {
            Some(pointer) => self.check_release(pointer).map(Some),
            None => Ok(None),
        }
    }

    /// Installs a verified bundle that came without a verified feed: only the version floor
    /// and the model line protect the device (see [`crate::dangerous::install_without_feed`]).
    pub(crate) fn install_without_feed(&self, bundle: VerifiedBundle) -> Result<Installed> {
        self.install_inner(Incoming::Bundle(bundle), None, None, None, &mut |_| Ok(()))
    }

    /// Installs a bundle that an update check found through `feed`, as [`Store::install`]
    /// does, recording the feed's channel, sequence and digest. The bundle must be the
    /// release the feed names; a feed under an accepted sequence with another digest, or
    /// under a lower sequence, is refused.
    pub fn install_from_feed(
        &self,
        bundle: VerifiedBundle,
        feed: &VerifiedFeed,
    ) -> Result<Installed> {
        self.install_incoming(Incoming::Bundle(bundle), feed)
    }

    /// Installs the release a verified delta rebuilds from the current release's files, as
    /// [`Store::install_from_feed`] installs a bundle: the same checks, staging, swap and
    /// state; only the files come from the delta and the current release instead of a
    /// payload (see [`Incoming`]).
    pub(crate) fn install_delta_from_feed(
        &self,
        delta: VerifiedDelta<File>,
        feed: &VerifiedFeed,
    ) -> Result<Installed> {
        self.install_incoming(Incoming::Delta(delta), feed)
    }

    fn install_incoming(&self, incoming: Incoming, feed: &VerifiedFeed) -> Result<Installed> {
        let m = incoming.manifest();
        match feed.release() {
            Some(r) if r.name == m.name && r.version == m.version => {}
            offered => {
                return Err(Error::new(
                    ErrorKind::Feed,
                    format!(
                        "bundle {} {} is not the release feed sequence {} offers ({})",
                        m.name,
                        m.version,
                        feed.sequence(),
                        offered.map_or_else(
                            || "nothing".to_string(),
                            |r| format!("{} {}", r.name, r.version)
                        )
                    ),
                ));
            }
        }
        let channel = feed.feed().channel.as_str();
        let (sequence, digest) = (feed.sequence(), feed.digest());
        self.keep_feed(&self.root()?, feed)?;
        self.install_inner(
            incoming,
            Some(channel),
            Some(sequence),
            Some(digest),
            &mut |_| Ok(()),
        )
    }

    /// Records that the device acted on `feed` without installing anything (the channel
    /// offers nothing new for it, or not yet for this device), so that an older feed is
    /// refused from then on. Returns whether `state.json` changed: polling the same feed again
    /// writes nothing. Refuses a feed under a lower sequence than the channel's highest, or
    /// under the same sequence with another digest.
    pub fn record_feed(&self, feed: &VerifiedFeed) -> Result<bool> {
        let _lock = self.lock()?;
        let state = self.state()?;
        let channel = feed.feed().channel.as_str();
        check_channel(channel)?;
        let (sequence, digest) = (feed.sequence(), feed.digest());
        let known = state.channels.get(channel);
        check_feed_sequence(channel, known, sequence, Some(digest))?;
        if let Some(known) = known
            && known.highest_sequence == Some(sequence)
            && known.feed_sha256 == Some(digest)
            && state.channel.is_some()
        {
            // Nothing new to remember; the feed that backs it is kept (stores written
            // before the feeds were kept get it now).
            self.keep_feed(&self.root()?, feed)?;
            return Ok(false);
        }
        if known.is_none() && state.channels.len() >= MAX_CHANNELS {
            return Err(Error::new(
                ErrorKind::Policy,
                format!(
                    "store {} already tracks {MAX_CHANNELS} channels; refusing a new channel '{channel}'",
                    self.dir.display()
                ),
            ));
        }
        let mut next = state.clone();
        next.channels.insert(
            channel.to_string(),
            ChannelState {
                highest_version: known.and_then(|k| k.highest_version.clone()),
                highest_sequence: Some(sequence),
                feed_sha256: Some(digest),
            },
        );
        next.format = STATE_FORMAT;
        next.channel.get_or_insert_with(|| channel.to_string());
        let root = self.root()?;
        self.keep_feed(&root, feed)?;
        self.commit(&root, &next, &mut |_| Ok(()))?;
        sync_dir(&root)?;
        Ok(true)
    }

    /// [`Store::install`] with a hook called at every [`Step`]; for crash and fault tests.
    #[doc(hidden)]
    pub fn install_with_hook(
        &self,
        bundle: VerifiedBundle,
        channel: Option<&str>,
        feed_sequence: Option<u64>,
        hook: StepHook<'_>,
    ) -> Result<Installed> {
        self.install_inner(Incoming::Bundle(bundle), channel, feed_sequence, None, hook)
    }

    fn install_inner(
        &self,
        mut incoming: Incoming,
        channel: Option<&str>,
        feed_sequence: Option<u64>,
        feed_sha256: Option<Digest>,
        hook: StepHook<'_>,
    ) -> Result<Installed> {
        let _lock = self.lock()?;
        let root = self.root()?;
        let state = self.state_in(&root)?;
        self.sweep(&root, &state)?;
        let (manifest, report) = self
            .verifier
            .check_stored("bundle", incoming.manifest_bytes(), incoming.signatures())
            .map_err(|e| e.context("the store's verifier refuses the bundle"))?;
        let manifest_sha256 = Digest::of(incoming.manifest_bytes());
        let next = self.next_state(
            &state,
            &manifest,
            manifest_sha256,
            channel,
            feed_sequence.map(|s| (s, feed_sha256)),
        )?;
        let release = release_dir_name(&manifest, &manifest_sha256);
        let releases = self.releases(&root)?;
        let dest = releases.join(&release);
        if releases
            .found(&release)
            .map_err(|e| Error::io(format!("cannot read {}", dest.display()), e))?
            .is_some()
        {
            return Err(Error::new(
                ErrorKind::Store,
                format!(
                    "{} already exists although state.json does not name it; run gc and try again",
                    dest.display()
                ),
            ));
        }
        step(hook, Step::Locked)?;

        // The staging directory later becomes the renamed release.
        let mut staging = Staging::create_in(&releases, STAGING_PREFIX)?;
        step(hook, Step::StagingCreated)?;
        let labels = match &mut incoming {
            Incoming::Bundle(bundle) => bundle.unpack_into_staging(&staging.dir)?,
            Incoming::Delta(delta) => {
                let mut base = self.base_files(&releases, &state, delta.base_files())?;
                // The staging directory is removed with whatever the delta wrote on failure.
                let mut created = Vec::new();
                delta.rebuild_into(&mut base, &staging.dir, &mut created)?
            }
        };
        step(hook, Step::FilesWritten)?;
        write_synced(&staging.dir, entry::MANIFEST, incoming.manifest_bytes())?;
        write_synced(&staging.dir, entry::SIGNATURES, incoming.signatures())?;
        step(hook, Step::MetadataWritten)?;
        sync_dir(&staging.dir)?;
        step(hook, Step::StagingSynced)?;
        releases
            .rename(&staging.name, &releases, &release)
            .map_err(|e| {
                Error::io(
                    format!("cannot move the unpacked release to {}", dest.display()),
                    e,
                )
            })?;
        // From here a failure must remove the release directory, not the staging name.
        staging.name = release.clone().into();
        step(hook, Step::ReleaseRenamed)?;
        sync_dir(&releases)?;
        step(hook, Step::ReleasesSynced)?;

        // What proves the new highest version, before the state that names it.
        let kept = serde_json::to_vec(&KeptManifest {
            manifest: String::from_utf8_lossy(incoming.manifest_bytes()).into_owned(),
            signatures: String::from_utf8_lossy(incoming.signatures()).into_owned(),
        })
        .map_err(|e| Error::new(ErrorKind::Store, format!("cannot keep the manifest: {e}")))?;
        replace_file(&root, HIGHEST_FILE, HIGHEST_TEMP_PREFIX, &kept, &mut |_| {
            Ok(())
        })?;
        self.commit(&root, &next, hook)?;
        staging.keep = true;
        step(hook, Step::StateRenamed)?;
        sync_dir(&root)?;
        step(hook, Step::StoreSynced)?;

        Ok(Installed {
            release: Release {
                model: dest.join(&manifest.model().path),
                labels_path: dest.join(&manifest.labels().path),
                dir: dest,
                labels,
                manifest,
                manifest_sha256,
                signers: report.valid,
            },
            replaced: state.current.map(|c| c.version),
        })
    }

    /// The current release's files a delta applies to, opened in the delta header's order
    /// without following links (each a regular file with one link). Their sizes and digests
    /// are checked by the delta before any patch byte is read.
    fn base_files(
        &self,
        releases: &Dir,
        state: &StoreState,
        files: &[crate::format::manifest::FileEntry],
    ) -> Result<Vec<File>> {
        let Some(current) = &state.current else {
            return Err(Error::new(
                ErrorKind::Store,
                "the store holds no current release for the delta to apply to; the full \
                 bundle installs instead",
            ));
        };
        let dir = releases.open_dir(&current.release).map_err(|e| {
            Error::new(
                ErrorKind::Store,
                format!(
                    "cannot open the current release {} for the delta ({})",
                    releases.join(&current.release).display(),
                    e.into_io()
                ),
            )
        })?;
        files
            .iter()
            .map(|file| {
                open_member(&dir, &file.path)
                    .map_err(|e| e.context(format_args!("stored release {}", current.release)))
            })
            .collect()
    }

    /// Remembers the tree head `feed`'s ledger check verified as the largest this device
    /// saw, for `LedgerVerifier::remembered` next time; nothing for a feed
    /// checked without the ledger. The update calls it for every feed it acted on, whether or
    /// not it installed anything.
    pub(crate) fn remember_feed_tree_head(&self, feed: &VerifiedFeed) -> Result<()> {
        match feed.ledger() {
            Some(check) => {
                self.keep_feed(&self.root()?, feed)?;
                self.remember_tree_head(&check.tree_head)
            }
            None => Ok(()),
        }
    }

    /// Keeps `feed`'s file as the store's proof of what it accepted on the feed's channel
    /// (`feeds/<channel>.json`, replaced atomically), unless it is kept already.
    fn keep_feed(&self, root: &Dir, feed: &VerifiedFeed) -> Result<()> {
        let channel = feed.feed().channel.as_str();
        check_channel(channel)?;
        let dir = open_own_dir(root, KEPT_FEEDS_DIR, &mut |what| self.note_removed(what))?;
        let name = format!("{channel}.json");
        if read_capped(&dir, &name, limit::FEED_BYTES).is_ok_and(|b| b == feed.signed_bytes()) {
            return Ok(());
        }
        replace_file(
            &dir,
            &name,
            KEPT_TEMP_PREFIX,
            feed.signed_bytes(),
            &mut |_| Ok(()),
        )?;
        sync_dir(&dir)
    }

    /// Remembers `head` as the largest ledger tree head this device verified. A head smaller
    /// than the remembered one, or of the same size with another root, is refused: it cannot
    /// have passed the ledger check. Outside the crate only through
    /// [`crate::dangerous::remember_unverified_tree_head`].
    pub(crate) fn remember_tree_head(&self, head: &TreeHead) -> Result<()> {
        let _lock = self.lock()?;
        let state = self.state()?;
        if let Some(seen) = &state.tree_head {
            if head.tree_size < seen.tree_size
                || (head.tree_size == seen.tree_size && head.root_hash != seen.root_hash)
            {
                return Err(Error::new(
                    ErrorKind::Policy,
                    format!(
                        "tree head of size {} (root {}) does not extend the tree head of size {} \
                         (root {}) this store remembers; refusing to forget the larger one",
                        head.tree_size, head.root_hash, seen.tree_size, seen.root_hash
                    ),
                ));
            }
            if seen == head {
                return Ok(());
            }
        }
        let mut next = state;
        next.format = STATE_FORMAT;
        next.tree_head = Some(*head);
        let root = self.root()?;
        self.commit(&root, &next, &mut |_| Ok(()))?;
        sync_dir(&root)
    }

    /// Makes the store follow `channel` from now on. What it accepted stays: the highest
    /// version ever installed (so nothing older is installed from the new channel) and the
    /// feed sequences of every channel it followed.
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Policy`] for a name no channel can have; [`ErrorKind::Locked`] while an
    /// update runs; I/O errors writing `state.json`.
    pub fn switch_channel(&self, channel: &str) -> Result<()> {
        check_channel(channel)?;
        let _lock = self.lock()?;
        let state = self.state()?;
        if state.channel.as_deref() == Some(channel) {
            return Ok(());
        }
        let mut next = state;
        next.format = STATE_FORMAT;
        next.channel = Some(channel.to_string());
        let root = self.root()?;
        self.commit(&root, &next, &mut |_| Ok(()))?;
        sync_dir(&root)
    }

    /// Makes the previous release current again, for when the app's own health check fails
    /// on a new model. The previous release is checked fully first; if it fails, nothing
    /// changes. The release rolled back from stays refused: the highest version accepted is
    /// not lowered, so only a newer version can be installed next.
    pub fn rollback(&self) -> Result<Release> {
        self.rollback_with_hook(&mut |_| Ok(()))
    }

    /// [`Store::rollback`] with a hook called at every [`Step`]; for crash and fault tests.
    #[doc(hidden)]
    pub fn rollback_with_hook(&self, hook: StepHook<'_>) -> Result<Release> {
        let _lock = self.lock()?;
        let root = self.root()?;
        let state = self.state_in(&root)?;
        self.sweep(&root, &state)?;
        let Some(previous) = &state.previous else {
            return Err(Error::new(
                ErrorKind::Policy,
                format!(
                    "store {} has no previous release to roll back to",
                    self.dir.display()
                ),
            ));
        };
        let release = self
            .check_release(previous)
            .map_err(|e| e.context("cannot roll back, the previous release failed its check"))?;
        let mut next = state.clone();
        next.format = STATE_FORMAT;
        next.current = Some(previous.clone());
        next.previous = None;
        step(hook, Step::Locked)?;
        self.commit(&root, &next, hook)?;
        step(hook, Step::StateRenamed)?;
        sync_dir(&root)?;
        step(hook, Step::StoreSynced)?;
        Ok(release)
    }

    /// Removes every release that is neither current nor previous, and whatever crashed
    /// updates left behind (staging directories, temporary state files). Returns what was
    /// removed. Every update does this first as well.
    ///
    /// Downloads are removed too (partial downloads and a remembered refusal), unless an update
    /// holds the download lock.
    pub fn gc(&self) -> Result<Vec<PathBuf>> {
        let _lock = self.lock()?;
        let root = self.root()?;
        let state = self.state_in(&root)?;
        let mut removed = self.sweep(&root, &state)?;
        if root.found(DOWNLOADS_DIR).ok().flatten() == Some(Found::Dir) {
            let downloads = self.downloads(&root)?;
            let lock = open_own_file(&downloads, DOWNLOAD_LOCK, &mut |what| {
                self.note_removed(what)
            })?;
            if let Ok(_held) = HeldLock::try_take(lock) {
                removed.extend(self.sweep_downloads(&downloads, None, false));
            }
        }
        removed.sort();
        Ok(removed)
    }

    /// `downloads/`, opened without following a link (something else at its name is removed
    /// and noted).
    pub(crate) fn downloads(&self, root: &Dir) -> Result<Dir> {
        open_own_dir(root, DOWNLOADS_DIR, &mut |what| self.note_removed(what))
    }

    /// Removes everything in the download directory `dir` but its lock, `keep` (the download
    /// in progress) and, when `keep_refusal`, the remembered refusal: partial downloads of
    /// releases no feed offers any more would otherwise stay for good. Links are unlinked,
    /// never followed. Best effort: what cannot be removed now is tried again next time.
    /// The caller holds the download lock.
    pub(crate) fn sweep_downloads(
        &self,
        dir: &Dir,
        keep: Option<&str>,
        keep_refusal: bool,
    ) -> Vec<PathBuf> {
        let Ok(entries) = dir.list() else {
            return Vec::new();
        };
        let mut removed = Vec::new();
        for name in entries {
            if name == DOWNLOAD_LOCK
                || (keep_refusal && name == REFUSED_FILE)
                || keep.is_some_and(|k| name == k)
            {
                continue;
            }
            if dir.remove(&name).is_ok() {
                removed.push(dir.join(&name));
            }
        }
        removed
    }

    /// What this handle removed because the store's own code could not have put it there
    /// (links, FIFOs, files with several hard links), since the last call; each entry names
    /// the path and what was found. The update reports them.
    pub fn take_removed(&self) -> Vec<String> {
        std::mem::take(&mut *self.removed.lock().unwrap_or_else(|e| e.into_inner()))
    }

    /// Notes a planted entry that was removed.
    pub(crate) fn note_removed(&self, what: String) {
        let mut removed = self.removed.lock().unwrap_or_else(|e| e.into_inner());
        if removed.len() < MAX_REMOVED_NOTES && !removed.contains(&what) {
            removed.push(what);
        }
    }

    /// The trust set an app runs with after a restart: the newer of `initial` (the set
    /// shipped with the app) and the one in `trust-set.json` in `dir`, each signed by its own
    /// threshold, and not expired at `now`. Needs no [`Store`], so that the app can build its
    /// verifier from the result before it opens the store. A damaged `trust-set.json` is an
    /// error; an expired set is an error too, and [`Store::renew_trust_set`] replaces it.
    pub fn load_trust_set(dir: &Path, initial: &[u8], now: Timestamp) -> Result<TrustSet> {
        let set = TrustChain::read(dir, initial)?.newest;
        set.file().check_expiry(now)?;
        Ok(set)
    }

    /// [`Store::load_trust_set`] for this store's directory.
    pub fn trust_set(&self, initial: &[u8], now: Timestamp) -> Result<TrustSet> {
        Self::load_trust_set(&self.dir, initial, now)
    }

    /// The trust chain as the store holds it, checked from `initial`: the newest set it
    /// proves, how many stored sets it proves, and why the rest (if any) is not believed.
    pub fn trust_chain(&self, initial: &[u8]) -> Result<(TrustSet, usize, Option<String>)> {
        let chain = TrustChain::read(&self.dir, initial)?;
        Ok((chain.newest, chain.sets.len(), chain.ignored))
    }

    /// Stores `trust` as the newest trust set the device accepted, under the updaters' lock:
    /// appended to the chain of sets that leads to it from `initial` (the set shipped with the
    /// app), replaced atomically. `trust` must be a successor of the newest set the chain
    /// proves; anything stored that the chain does not prove is dropped. Refuses a version
    /// lower than the newest (a rollback of trust), and an equal version with other content;
    /// saving the newest set again changes nothing.
    pub fn save_trust_set(&self, initial: &[u8], trust: &TrustSet) -> Result<()> {
        let _lock = self.lock()?;
        let chain = TrustChain::read(&self.dir, initial)?;
        let (new, old) = (trust.version(), chain.newest.version());
        if new == old && chain.newest.to_json() == trust.to_json() {
            return Ok(());
        }
        if new <= old {
            return Err(Error::new(
                ErrorKind::TrustSet,
                format!(
                    "trust set version {new} is not newer than version {old}, the highest \
                     store {} accepted; refusing to roll trust back",
                    self.dir.display()
                ),
            ));
        }
        // The chain only ever holds successors: re-check this one against the newest.
        let text = String::from_utf8(trust.to_json())
            .map_err(|_| Error::new(ErrorKind::TrustSet, "trust set is not UTF-8"))?;
        chain
            .newest
            .accept_step(text.as_bytes())
            .map_err(|e| e.context("the trust set to store does not follow the chain"))?;
        let mut sets = chain.sets;
        if sets.len() >= MAX_TRUST_CHAIN {
            return Err(Error::new(
                ErrorKind::TrustSet,
                format!(
                    "store {} already holds {MAX_TRUST_CHAIN} trust sets after the one shipped \
                     with the app; ship a newer trust set with the app",
                    self.dir.display()
                ),
            ));
        }
        sets.push(text);
        let bytes = serde_json::to_vec(&StoredChain {
            format: TRUST_CHAIN_FORMAT,
            sets,
        })
        .map_err(|e| Error::new(ErrorKind::TrustSet, format!("cannot write the chain: {e}")))?;
        let root = self.root()?;
        replace_file(
            &root,
            TRUST_CHAIN_FILE,
            TRUST_SET_TEMP_PREFIX,
            &bytes,
            &mut |_| Ok(()),
        )?;
        // The one-set file of earlier versions is in the chain now.
        let _ = root.remove(TRUST_SET_FILE);
        sync_dir(&root)
    }

    /// For a device whose trust set expired while it was offline: accepts `successor` as the
    /// successor of the newest set the store's chain proves from `initial` (whose keys may
    /// authorise it although expired, see [`TrustSet::renew`]), stores it, and returns it.
    pub fn renew_trust_set(
        &self,
        initial: &[u8],
        successor: &[u8],
        now: Timestamp,
    ) -> Result<TrustSet> {
        let next = TrustChain::read(&self.dir, initial)?
            .newest
            .accept_successor(successor, now)?;
        self.save_trust_set(initial, &next)?;
        Ok(next)
    }

    /// This store with its verifier's bundle keys and threshold taken from `trust` (its policy
    /// stays): after a device accepted a newer trust set, stored releases and new installs are
    /// checked against the new set's keys, so a revoked key no longer counts.
    pub fn with_trust_set(mut self, trust: &TrustSet) -> Result<Store> {
        self.verifier = self.verifier.with_trust_set(trust)?;
        if self.documents.is_some() {
            self.documents = Some(Arc::new(Documents {
                feeds: trust.signers()?,
                heads: trust.signers()?,
            }));
        }
        Ok(self)
    }

    /// This store with the bundle signers of every set of its trust chain from `initial`
    /// (the set shipped with the app), for the proof of its version floor.
    /// This store with the signers of the feeds and tree heads it keeps (see `documents`).
    pub(crate) fn with_documents(
        mut self,
        feeds: Signers<kind::Feed>,
        heads: Signers<kind::TreeHead>,
    ) -> Store {
        self.documents = Some(Arc::new(Documents { feeds, heads }));
        self
    }

    pub(crate) fn with_trust_chain(mut self, initial: &[u8]) -> Store {
        self.shipped = Some(Arc::new(initial.to_vec()));
        self
    }

    /// The store's directory, opened (links in the path the app gave are followed; nothing
    /// inside it is).
    fn root(&self) -> Result<Dir> {
        Dir::open_root(&self.dir, false)
            .map_err(|e| Error::io(format!("cannot open store {}", self.dir.display()), e))
    }

    /// `releases/`, opened without following a link. Anything else at the name (a link, a
    /// file) is removed, noted, and the directory made anew: the releases `state.json` names
    /// are then missing, which opening the current release reports.
    fn releases(&self, root: &Dir) -> Result<Dir> {
        open_own_dir(root, RELEASES_DIR, &mut |what| self.note_removed(what))
    }

    /// Creates `releases/` and the first `state.json`, under the lock so that two processes
    /// opening a new store at once do not both write it.
    fn initialize(&self, root: &Dir) -> Result<()> {
        let lock = self.lock_file(root)?;
        lock.lock()
            .map_err(|e| Error::io(format!("cannot lock store {}", self.dir.display()), e))?;
        let found = |name: &str| {
            root.found(name)
                .map_err(|e| Error::io(format!("cannot read {}", root.join(name).display()), e))
        };
        if found(STATE_FILE)?.is_some() {
            return Ok(());
        }
        if found(RELEASES_DIR)? == Some(Found::Dir) {
            let releases = self.releases(root)?;
            let names = releases
                .list()
                .map_err(|e| Error::io(format!("cannot list {}", releases.path().display()), e))?;
            if names
                .iter()
                .any(|name| !name.to_string_lossy().starts_with(STAGING_PREFIX))
            {
                return Err(Error::new(
                    ErrorKind::Store,
                    format!(
                        "store {} holds releases but no {STATE_FILE}; it was damaged or changed \
                         outside ampoule-verify (move it aside and install again)",
                        self.dir.display()
                    ),
                ));
            }
        }
        self.releases(root)?;
        sync_dir(root)?;
        self.commit(root, &StoreState::empty(), &mut |_| Ok(()))?;
        sync_dir(root)?;
        // The store directory itself may be new too.
        match self.dir.parent() {
            Some(parent) if !parent.as_os_str().is_empty() => Dir::open_root(parent, false)
                .and_then(|d| d.sync())
                .map_err(|e| Error::io(format!("cannot flush {} to disk", parent.display()), e)),
            _ => Ok(()),
        }
    }

    /// The lock file, made if missing. Anything but a regular file of the store's own at the
    /// name (a link, dangling or not, a FIFO, a hard link) is removed, noted, and made anew.
    fn lock_file(&self, root: &Dir) -> Result<File> {
        open_own_file(root, LOCK_FILE, &mut |what| self.note_removed(what))
    }

    /// Takes the updaters' exclusive lock, waiting up to `lock_wait`.
    fn lock(&self) -> Result<HeldLock> {
        let mut file = self.lock_file(&self.root()?)?;
        let deadline = Instant::now() + self.lock_wait;
        loop {
            file = match HeldLock::try_take(file) {
                Ok(held) => return Ok(held),
                Err((file, TryLockError::WouldBlock)) => file,
                Err((_, TryLockError::Error(e))) => {
                    return Err(Error::io(
                        format!("cannot lock store {}", self.dir.display()),
                        e,
                    ));
                }
            };
            let now = Instant::now();
            if now >= deadline {
                let waited = if self.lock_wait.is_zero() {
                    String::new()
                } else {
                    format!(" (waited {} ms)", self.lock_wait.as_millis())
                };
                return Err(Error::new(
                    ErrorKind::Locked,
                    format!(
                        "store {} is being updated by another process{waited}; try again later",
                        self.dir.display()
                    ),
                ));
            }
            std::thread::sleep(LOCK_POLL.min(deadline - now));
        }
    }

    /// The state after installing `manifest`, or the refusal.
    fn next_state(
        &self,
        state: &StoreState,
        manifest: &Manifest,
        manifest_sha256: Digest,
        channel: Option<&str>,
        feed: Option<(u64, Option<Digest>)>,
    ) -> Result<StoreState> {
        let refuse = |message: String| Err(Error::new(ErrorKind::Policy, message));
        if let Some(name) = &state.name
            && &manifest.name != name
        {
            return refuse(format!(
                "store {} holds model line '{name}'; refusing bundle '{}' (use one store per model line)",
                self.dir.display(),
                manifest.name
            ));
        }
        if let Some(highest) = &state.highest_version
            && manifest.version.cmp_precedence(highest).is_le()
        {
            return refuse(format!(
                "bundle version {} is not newer than {highest}, the highest version this store \
                     accepted; refusing a downgrade or reinstall",
                manifest.version
            ));
        }
        let mut next = state.clone();
        match (channel, feed) {
            (None, Some((sequence, _))) => {
                return refuse(format!(
                    "feed sequence {sequence} was given without a channel; name the channel the feed came from"
                ));
            }
            (None, None) => {}
            (Some(channel), feed) => {
                check_channel(channel)?;
                next.channel.get_or_insert_with(|| channel.to_string());
                let known = next.channels.get(channel);
                if let Some((sequence, digest)) = feed {
                    check_feed_sequence(channel, known, sequence, digest)?;
                }
                if known.is_none() && next.channels.len() >= MAX_CHANNELS {
                    return refuse(format!(
                        "store {} already tracks {MAX_CHANNELS} channels; refusing a new channel '{channel}'",
                        self.dir.display()
                    ));
                }
                let (highest_sequence, feed_sha256) = match (feed, known) {
                    (Some((sequence, digest)), Some(k)) if k.highest_sequence == Some(sequence) => {
                        (Some(sequence), digest.or(k.feed_sha256))
                    }
                    (Some((sequence, digest)), _) => (Some(sequence), digest),
                    (None, k) => (
                        k.and_then(|c| c.highest_sequence),
                        k.and_then(|c| c.feed_sha256),
                    ),
                };
                next.channels.insert(
                    channel.to_string(),
                    ChannelState {
                        highest_version: Some(manifest.version.clone()),
                        highest_sequence,
                        feed_sha256,
                    },
                );
            }
        }
        next.format = STATE_FORMAT;
        next.name = Some(manifest.name.clone());
        next.highest_version = Some(manifest.version.clone());
        next.previous = state.current.clone();
        next.current = Some(ReleaseRef {
            release: release_dir_name(manifest, &manifest_sha256),
            version: manifest.version.clone(),
            manifest_sha256,
        });
        Ok(next)
    }

    /// Writes `state` to a temporary file, fsyncs it and renames it over `state.json`.
    /// Errors before the rename leave the old `state.json` and no temporary file.
    /// What this handle removed as planted also goes into the file, for `store status`.
    fn commit(&self, root: &Dir, state: &StoreState, hook: StepHook<'_>) -> Result<()> {
        let removed = self
            .removed
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .clone();
        let mut state = state.clone();
        if !removed.is_empty() {
            state.removed = removed;
        }
        replace_file(root, STATE_FILE, STATE_TEMP_PREFIX, &state.to_json(), hook)
    }

    /// Removes leftovers and releases that `state` names neither current nor previous.
    /// Links planted directly in the store directory are unlinked (never followed) and
    /// noted; so is anything in `releases/` that is not a kept release.
    fn sweep(&self, root: &Dir, state: &StoreState) -> Result<Vec<PathBuf>> {
        let keep: Vec<&str> = [&state.current, &state.previous]
            .into_iter()
            .flatten()
            .map(|p| p.release.as_str())
            .collect();
        let mut removed = Vec::new();
        let releases = self.releases(root)?;
        for entry in list_dir(&releases)? {
            let name = entry.to_string_lossy();
            // A link or special file is removed even at a name `state.json` keeps: the store
            // never makes one, and opening that release refuses it anyway.
            if let Ok(Some(kind @ (Found::Link | Found::Other))) = releases.found(&entry) {
                remove_any(&releases, &entry)?;
                self.note_removed(format!(
                    "{} ({})",
                    releases.join(&entry).display(),
                    kind.describe()
                ));
                removed.push(releases.join(&entry));
            } else if !keep.contains(&name.as_ref()) {
                // What cannot be removed (a tree planted deeper than the store ever makes)
                // is named, and the update goes on: it blocks nothing but its own name.
                match remove_any(&releases, &entry) {
                    Ok(()) => removed.push(releases.join(&entry)),
                    Err(e) => self.note_removed(format!("not removed: {e}")),
                }
            }
        }
        for entry in list_dir(root)? {
            let name = entry.to_string_lossy();
            let planted = matches!(root.found(&entry), Ok(Some(Found::Link | Found::Other)));
            if planted {
                let kind = root.found(&entry).ok().flatten().unwrap_or(Found::Other);
                remove_any(root, &entry)?;
                self.note_removed(format!(
                    "{} ({})",
                    root.join(&entry).display(),
                    kind.describe()
                ));
                removed.push(root.join(&entry));
            } else if name.starts_with(STATE_TEMP_PREFIX)
                || name.starts_with(TRUST_SET_TEMP_PREFIX)
                || name.starts_with(HIGHEST_TEMP_PREFIX)
                || name.starts_with(OWN_TEMP_PREFIX)
            {
                remove_any(root, &entry)?;
                removed.push(root.join(&entry));
            }
        }
        if !removed.is_empty() {
            sync_dir(&releases)?;
            sync_dir(root)?;
        }
        removed.sort();
        Ok(removed)
    }

    /// Checks one stored release fully; every error names the release.
    fn check_release(&self, pointer: &ReleaseRef) -> Result<Release> {
        let name = &pointer.release;
        self.check_release_inner(pointer)
            .map_err(|e| e.context(format_args!("stored release {name}")))
    }

    fn check_release_inner(&self, pointer: &ReleaseRef) -> Result<Release> {
        let damaged = |message: String| Error::new(ErrorKind::Store, message);
        let root = self.root()?;
        let releases_path = root.join(RELEASES_DIR);
        let releases = match root.open_dir(RELEASES_DIR) {
            Ok(dir) => dir,
            Err(Refused::Missing) => {
                return Err(damaged(format!("{} is missing", releases_path.display())));
            }
            Err(Refused::Planted(why)) => return Err(damaged(why)),
            Err(Refused::Io(e)) => {
                return Err(Error::io(
                    format!("cannot read {}", releases_path.display()),
                    e,
                ));
            }
        };
        let path = releases.join(&pointer.release);
        let dir = match releases.open_dir(&pointer.release) {
            Ok(dir) => dir,
            Err(Refused::Missing) => {
                return Err(damaged(format!("{} is missing", path.display())));
            }
            Err(Refused::Planted(_)) => {
                return Err(damaged(format!("{} is not a directory", path.display())));
            }
            Err(Refused::Io(e)) => {
                return Err(Error::io(format!("cannot read {}", path.display()), e));
            }
        };
        let manifest_bytes = read_member(&dir, entry::MANIFEST, limit::MANIFEST_BYTES)?;
        let manifest_sha256 = Digest::of(&manifest_bytes);
        if manifest_sha256 != pointer.manifest_sha256 {
            return Err(damaged(format!(
                "{} has sha256 {manifest_sha256} but {STATE_FILE} records {}; the store was \
                 changed outside ampoule-verify",
                entry::MANIFEST,
                pointer.manifest_sha256
            )));
        }
        let signatures = read_member(&dir, entry::SIGNATURES, limit::SIGNATURES_BYTES)?;
        let (manifest, report) =
            self.verifier
                .check_stored("manifest", &manifest_bytes, &signatures)?;
        if manifest.version != pointer.version {
            return Err(damaged(format!(
                "{STATE_FILE} records version {} but the manifest says {}",
                pointer.version, manifest.version
            )));
        }
        let expected = release_dir_name(&manifest, &manifest_sha256);
        if expected != pointer.release {
            return Err(damaged(format!(
                "the directory name does not match its manifest, which gives {expected}"
            )));
        }
        let allowed = [
            manifest.model().path.as_str(),
            manifest.labels().path.as_str(),
            entry::MANIFEST,
            entry::SIGNATURES,
        ];
        for found in list_dir(&dir)? {
            let found = found.to_string_lossy();
            if !allowed.contains(&found.as_ref()) {
                return Err(damaged(format!(
                    "it holds an unexpected entry '{}'",
                    found.escape_debug()
                )));
            }
        }
        let mut labels = None;
        for file in &manifest.files {
            let path = dir.join(&file.path);
            let opened = open_member(&dir, &file.path)?;
            let len = opened
                .metadata()
                .map_err(|e| Error::io(format!("cannot read {}", path.display()), e))?
                .len();
            let size_error = |len: u64| {
                Error::new(
                    ErrorKind::Digest,
                    format!(
                        "'{}' is {len} bytes but the manifest declares {} bytes",
                        file.path, file.size
                    ),
                )
            };
            if len != file.size {
                return Err(size_error(len));
            }
            let (found, read) = if file.role == Role::Labels {
                // Bounded by the format's cap on labels.txt, checked in Manifest::validate.
                let mut bytes = Vec::new();
                (&opened)
                    .take(file.size + 1)
                    .read_to_end(&mut bytes)
                    .map_err(|e| Error::io(format!("cannot read {}", path.display()), e))?;
                let found = Digest::of(&bytes);
                let read = bytes.len() as u64;
                labels = Some(bytes);
                (found, read)
            } else {
                hash_reader(&opened, file.size + 1)
                    .map_err(|e| Error::io(format!("cannot read {}", path.display()), e))?
            };
            if read != file.size {
                return Err(size_error(read));
            }
            if found != file.sha256 {
                return Err(Error::new(
                    ErrorKind::Digest,
                    format!(
                        "digest mismatch for '{}': manifest declares sha256 {}, the store holds {found}",
                        file.path, file.sha256
                    ),
                ));
            }
        }
        let labels = manifest.parse_labels(&labels.unwrap_or_default())?;
        Ok(Release {
            model: dir.join(&manifest.model().path),
            labels_path: dir.join(&manifest.labels().path),
            dir: path,
            labels,
            manifest,
            manifest_sha256,
            signers: report.valid,
        })
    }
}

/// `trust-chain.json`: every trust set the device accepted after the one shipped with the
/// app, oldest first, each the exact text of [`TrustSet::to_json`].
#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct StoredChain {
    format: u32,
    sets: Vec<String>,
}

/// The stored trust sets, believed only as far as each is the successor of the one before,
/// starting from the set shipped with the app (issue 10: a set planted in the store, signed by
/// anyone else, is not believed).
struct TrustChain {
    /// The newest set the chain proves (the shipped set when it proves none).
    newest: TrustSet,
    /// Every set it proves, the shipped one first.
    all: Vec<TrustSet>,
    /// The texts of the stored sets it proves, oldest first, newer than the shipped set.
    sets: Vec<String>,
    /// Why the stored sets after those are not believed, if any are not.
    ignored: Option<String>,
}

impl TrustChain {
    fn read(dir: &Path, initial: &[u8]) -> Result<TrustChain> {
        let shipped = TrustSet::self_signed(initial)
            .map_err(|e| e.context("the trust set shipped with the app"))?;
        let mut chain = TrustChain {
            all: vec![shipped.clone()],
            newest: shipped,
            sets: Vec::new(),
            ignored: None,
        };
        let root = match Dir::open_root(dir, false) {
            Ok(root) => root,
            // No store yet: no stored sets.
            Err(e) if e.kind() == io::ErrorKind::NotFound => return Ok(chain),
            Err(e) => return Err(Error::io(format!("cannot open store {}", dir.display()), e)),
        };
        let cap = trust_set::MAX_BYTES * (MAX_TRUST_CHAIN as u64 + 1);
        let (name, texts) = match read_capped(&root, TRUST_CHAIN_FILE, cap) {
            Ok(bytes) => match serde_json::from_slice::<StoredChain>(&bytes) {
                Ok(stored) if stored.format == TRUST_CHAIN_FORMAT => {
                    (TRUST_CHAIN_FILE, stored.sets)
                }
                Ok(stored) => {
                    chain.ignored = Some(format!(
                        "{TRUST_CHAIN_FILE} is in format {}, which this reader does not know",
                        stored.format
                    ));
                    return Ok(chain);
                }
                Err(e) => {
                    chain.ignored = Some(format!("{TRUST_CHAIN_FILE} is not valid: {e}"));
                    return Ok(chain);
                }
            },
            // Stores written before the chain kept the newest set alone.
            Err(ReadCapped::Missing) => {
                match read_capped(&root, TRUST_SET_FILE, trust_set::MAX_BYTES) {
                    Ok(bytes) => match String::from_utf8(bytes) {
                        Ok(text) => (TRUST_SET_FILE, vec![text]),
                        Err(_) => {
                            chain.ignored = Some(format!("{TRUST_SET_FILE} is not UTF-8"));
                            return Ok(chain);
                        }
                    },
                    Err(ReadCapped::Missing) => return Ok(chain),
                    Err(ReadCapped::Io(e)) => {
                        return Err(Error::io(
                            format!("cannot read {}", root.join(TRUST_SET_FILE).display()),
                            e,
                        ));
                    }
                    Err(ReadCapped::Planted(why)) => {
                        chain.ignored = Some(why);
                        return Ok(chain);
                    }
                    Err(ReadCapped::TooLarge) => {
                        chain.ignored = Some(format!(
                            "{TRUST_SET_FILE} is over {} bytes",
                            trust_set::MAX_BYTES
                        ));
                        return Ok(chain);
                    }
                }
            }
            Err(ReadCapped::Io(e)) => {
                return Err(Error::io(
                    format!("cannot read {}", root.join(TRUST_CHAIN_FILE).display()),
                    e,
                ));
            }
            Err(ReadCapped::Planted(why)) => {
                chain.ignored = Some(why);
                return Ok(chain);
            }
            Err(ReadCapped::TooLarge) => {
                chain.ignored = Some(format!("{TRUST_CHAIN_FILE} is over {cap} bytes"));
                return Ok(chain);
            }
        };
        for (index, text) in texts.into_iter().enumerate().take(MAX_TRUST_CHAIN) {
            let version = TrustSetFile::from_json(text.as_bytes()).map(|f| f.version());
            // An app update may ship a set the chain already went past the start of.
            if matches!(version, Ok(v) if v <= chain.newest.version()) {
                continue;
            }
            match chain.newest.accept_step(text.as_bytes()) {
                Ok(next) => {
                    chain.all.push(next.clone());
                    chain.newest = next;
                    chain.sets.push(text);
                }
                Err(e) => {
                    chain.ignored = Some(format!(
                        "set {} of {name} is not a successor of trust set version {}: {e}",
                        index + 1,
                        chain.newest.version()
                    ));
                    break;
                }
            }
        }
        Ok(chain)
    }
}

/// The newest trust set the store's chain proves from the shipped one, expiry not checked (a
/// device runs its verified model on an expired set; the update renews it).
pub(crate) fn newest_trust_set(dir: &Path, initial: &[u8]) -> Result<TrustSet> {
    Ok(TrustChain::read(dir, initial)?.newest)
}

/// Replaces each channel's sequence and feed digest, and the remembered tree head, with what
/// the kept feeds prove (issue 10): a kept feed counts only if its signatures meet the feed
/// threshold and it is the channel's; its tree head counts only if its signatures meet the
/// tree-head threshold. The tree head is the largest such. A value `state.json` states but no
/// kept feed backs (a sequence of 2^64-1, a made-up head) is absent, not believed.
fn back_feeds(root: &Dir, documents: &Documents, state: &mut StoreState) {
    let kept = root.open_dir(KEPT_FEEDS_DIR).ok();
    let mut largest: Option<TreeHead> = None;
    for (channel, known) in state.channels.iter_mut() {
        let proven = kept
            .as_ref()
            .and_then(|dir| kept_feed(dir, channel, documents));
        known.highest_sequence = proven.as_ref().map(|(feed, _)| feed.sequence);
        known.feed_sha256 = proven.as_ref().map(|(_, digest)| *digest);
        let head = proven.and_then(|(feed, _)| {
            let signed = feed.ledger?.tree_head;
            signed.check(&documents.heads).ok()?;
            Some(signed.head())
        });
        if let Some(head) = head
            && largest.is_none_or(|l| head.tree_size > l.tree_size)
        {
            largest = Some(head);
        }
    }
    state.tree_head = largest;
}

/// The kept feed of `channel`, if its signatures verify and it is that channel's.
fn kept_feed(dir: &Dir, channel: &str, documents: &Documents) -> Option<(Feed, Digest)> {
    let bytes = read_capped(dir, &format!("{channel}.json"), limit::FEED_BYTES).ok()?;
    let signed = SignedFeed::from_json(&bytes).ok()?;
    SignedDocument::<kind::Feed>::new(signed.feed.as_bytes(), &signed.signatures)
        .ok()?
        .check(&documents.feeds, "kept feed")
        .ok()?;
    let feed = Feed::from_json(signed.feed.as_bytes()).ok()?;
    (feed.channel == channel).then(|| (feed, Digest::of(signed.feed.as_bytes())))
}

/// Refuses a feed under a lower sequence than the channel's highest (a replay), or under the
/// same sequence with another digest (a publisher never signs two feeds under one sequence).
/// Like every refusal of the store's own state, these are [`ErrorKind::Policy`].
fn check_feed_sequence(
    channel: &str,
    known: Option<&ChannelState>,
    sequence: u64,
    digest: Option<Digest>,
) -> Result<()> {
    let Some(highest) = known.and_then(|c| c.highest_sequence) else {
        return Ok(());
    };
    if sequence < highest {
        return Err(Error::new(
            ErrorKind::Policy,
            format!(
                "feed sequence {sequence} for channel '{channel}' is lower than {highest}, \
                 the highest this store accepted; refusing a replayed feed"
            ),
        ));
    }
    if sequence == highest
        && let (Some(found), Some(kept)) = (digest, known.and_then(|c| c.feed_sha256))
        && found != kept
    {
        return Err(Error::new(
            ErrorKind::Policy,
            format!(
                "feed sequence {sequence} for channel '{channel}' was accepted with digest {kept}, \
                 but this feed under the same sequence has digest {found}; refusing it"
            ),
        ));
    }
    Ok(())
}

fn step(hook: StepHook<'_>, step: Step) -> Result<()> {
    hook(step).map_err(|e| Error::io(format!("store step {} failed", step.name()), e))
}

/// Checks a channel name: the same rule as bundle names.
fn check_channel(channel: &str) -> Result<()> {
    crate::format::manifest::check_name(channel).map_err(|_| {
        Error::new(
            ErrorKind::Policy,
            format!(
                "channel name '{}' is not allowed: use 1 to {} lowercase letters, digits, '-', '_' \
                 or '.', starting with a letter or digit",
                channel.escape_debug(),
                limit::NAME_BYTES
            ),
        )
    })
}

/// The directory name of a release: `<name>-<version>-<first 12 hex digits of the manifest's
/// SHA-256>`, or `<name>-<12 hex>` when a very long version would make it too long for a file
/// name. Bundle names and SemVer versions use only characters safe in file names.
pub fn release_dir_name(manifest: &Manifest, manifest_sha256: &Digest) -> String {
    let hex = manifest_sha256.to_hex();
    let short = &hex[..DIGEST_PREFIX_HEX];
    let full = format!("{}-{}-{short}", manifest.name, manifest.version);
    if full.len() <= RELEASE_NAME_BYTES {
        full
    } else {
        format!("{}-{short}", manifest.name)
    }
}

/// Whether `name` could be a release directory name: never empty, hidden, or a path.
fn is_release_name(name: &str) -> bool {
    !name.is_empty()
        && name.len() <= RELEASE_NAME_BYTES
        && name.as_bytes()[0].is_ascii_alphanumeric()
        && name
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || b"-_.+".contains(&b))
}

enum ReadCapped {
    Missing,
    Planted(String),
    TooLarge,
    Io(io::Error),
}

/// Reads a whole small file of the store, refusing more than `cap` bytes, and anything at
/// the name that the store could not have written (a link, a FIFO, a hard link).
fn read_capped(dir: &Dir, name: &str, cap: u64) -> std::result::Result<Vec<u8>, ReadCapped> {
    let file = dir.open_file(name).map_err(|e| match e {
        Refused::Missing => ReadCapped::Missing,
        Refused::Planted(why) => ReadCapped::Planted(why),
        Refused::Io(e) => ReadCapped::Io(e),
    })?;
    let mut bytes = Vec::new();
    file.take(cap + 1)
        .read_to_end(&mut bytes)
        .map_err(ReadCapped::Io)?;
    if bytes.len() as u64 > cap {
        return Err(ReadCapped::TooLarge);
    }
    Ok(bytes)
}

/// Opens a file of a stored release, refusing anything but a regular file with one link.
fn open_member(dir: &Dir, name: &str) -> Result<File> {
    dir.open_file(name).map_err(|e| match e {
        Refused::Missing => Error::new(ErrorKind::Store, format!("{name} is missing")),
        Refused::Planted(why) => Error::new(ErrorKind::Store, why),
        Refused::Io(e) => Error::io(format!("cannot open {}", dir.join(name).display()), e),
    })
}

/// Reads a small file of a stored release whole, refusing more than `cap` bytes.
fn read_member(dir: &Dir, name: &str, cap: u64) -> Result<Vec<u8>> {
    let file = open_member(dir, name)?;
    let mut bytes = Vec::new();
    file.take(cap + 1)
        .read_to_end(&mut bytes)
        .map_err(|e| Error::io(format!("cannot read {}", dir.join(name).display()), e))?;
    if bytes.len() as u64 > cap {
        return Err(Error::new(
            ErrorKind::Store,
            format!("{name} is over the limit of {cap} bytes"),
        ));
    }
    Ok(bytes)
}

fn list_dir(dir: &Dir) -> Result<Vec<std::ffi::OsString>> {
    dir.list()
        .map_err(|e| Error::io(format!("cannot list {}", dir.path().display()), e))
}

/// Removes a file, link or directory tree without following links.
fn remove_any(dir: &Dir, name: &std::ffi::OsStr) -> Result<()> {
    dir.remove(name)
        .map_err(|e| Error::io(format!("cannot remove {}", dir.join(name).display()), e))
}

/// Creates `name` in `dir` (it must not exist: a link there is never written through),
/// writes `bytes` and flushes them to disk.
fn write_synced(dir: &Dir, name: &str, bytes: &[u8]) -> Result<()> {
    let path = dir.join(name);
    let mut file = dir
        .create_new(name)
        .map_err(|e| Error::io(format!("cannot create {}", path.display()), e))?;
    file.write_all(bytes)
        .map_err(|e| Error::io(format!("cannot write {}", path.display()), e))?;
    file.sync_all()
        .map_err(|e| Error::io(format!("cannot flush {} to disk", path.display()), e))
}

/// Replaces `name` in `dir` atomically: a new temporary file, fsynced, renamed over it.
/// Errors before the rename leave the old file and no temporary one.
fn replace_file(
    dir: &Dir,
    name: &str,
    temp_prefix: &str,
    bytes: &[u8],
    hook: StepHook<'_>,
) -> Result<()> {
    let mut temp = TempFile {
        dir,
        name: format!("{temp_prefix}{}", unique_suffix()),
        keep: false,
    };
    write_synced(dir, &temp.name, bytes)?;
    step(hook, Step::StateWritten)?;
    dir.rename(&temp.name, dir, name)
        .map_err(|e| Error::io(format!("cannot replace {}", dir.join(name).display()), e))?;
    temp.keep = true;
    Ok(())
}

/// Writes the store's own small file `name` in `dir` whole or not at all: a temporary file,
/// synced, renamed over whatever is at the name (a link there is replaced, never followed).
pub(crate) fn replace_own_file(dir: &Dir, name: &str, bytes: &[u8]) -> Result<()> {
    replace_file(dir, name, OWN_TEMP_PREFIX, bytes, &mut |_| Ok(()))?;
    dir.sync()
        .map_err(|e| Error::io(format!("cannot sync {}", dir.join(name).display()), e))
}

/// Opens the store's own directory `name` in `dir`, making it if missing. Anything else at the
/// name (a link, a file) is removed (a link is unlinked, never followed), told to `removed`,
/// and the directory made anew.
pub(crate) fn open_own_dir(dir: &Dir, name: &str, removed: &mut dyn FnMut(String)) -> Result<Dir> {
    let path = dir.join(name);
    match dir.open_dir(name) {
        Ok(opened) => return Ok(opened),
        Err(Refused::Io(e)) => {
            return Err(Error::io(format!("cannot open {}", path.display()), e));
        }
        Err(Refused::Planted(why)) => {
            remove_any(dir, name.as_ref())?;
            removed(format!("{} ({why})", path.display()));
        }
        Err(Refused::Missing) => {}
    }
    dir.create_dir(name)
        .map_err(|e| Error::io(format!("cannot create {}", path.display()), e.into_io()))
}

/// Opens the store's own small read-write file `name` in `dir` (a lock file), making it if
/// missing. Anything else at the name is removed (a link is unlinked, never followed), told to
/// `removed`, and the file made anew.
pub(crate) fn open_own_file(
    dir: &Dir,
    name: &str,
    removed: &mut dyn FnMut(String),
) -> Result<File> {
    let path = dir.join(name);
    for _ in 0..2 {
        match dir.open_or_create(name) {
            Ok(file) => return Ok(file),
            Err(Refused::Planted(why)) => {
                remove_any(dir, name.as_ref())?;
                removed(format!("{} ({why})", path.display()));
            }
            Err(Refused::Missing) => {}
            Err(Refused::Io(e)) => {
                return Err(Error::io(format!("cannot open {}", path.display()), e));
            }
        }
    }
    Err(Error::new(
        ErrorKind::Store,
        format!(
            "{} keeps being replaced by something other than a file; check who else writes \
             the store directory",
            path.display()
        ),
    ))
}

fn unique_suffix() -> String {
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.subsec_nanos());
    format!("{}-{nanos:x}", std::process::id())
}

/// A temporary file that is removed unless kept.
struct TempFile<'d> {
    dir: &'d Dir,
    name: String,
    keep: bool,
}

impl Drop for TempFile<'_> {
    fn drop(&mut self) {
        if !self.keep {
            let _ = self.dir.remove(&self.name);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn release_names_stay_inside_releases() {
        for good in [
            "trailcam-species-1.2.0-0123456789ab",
            "a-1.0.0-rc.1+build.5-abcdef012345",
        ] {
            assert!(is_release_name(good), "{good}");
        }
        for bad in [
            "",
            ".",
            "..",
            "../x",
            "a/b",
            ".staging-1",
            "-a",
            "a b",
            "a\\b",
        ] {
            assert!(!is_release_name(bad), "{bad}");
        }
        assert!(!is_release_name(&"a".repeat(RELEASE_NAME_BYTES + 1)));
    }

    #[test]
    fn state_validation_refuses_unsafe_names() {
        let pointer = |release: &str, version: &str| ReleaseRef {
            release: release.into(),
            version: version.parse().expect("test version"),
            manifest_sha256: Digest::of(b"x"),
        };
        let mut state = StoreState::empty();
        state.name = Some("fox".into());
        state.highest_version = Some(Version::new(1, 0, 0));
        // Issue 10: a pointer above the recorded floor is no longer refused here; the floor
        // is what the kept signed manifests prove (Store::back_versions).
        state.current = Some(pointer("fox-2.0.0-0123456789ab", "2.0.0"));
        assert_eq!(state.validate(), Ok(()));
        state.current = Some(pointer("../fox", "1.0.0"));
        assert_eq!(
            state.validate(),
            Err("it names release '../fox', which is not a release directory name".into())
        );
        state.current = Some(pointer("fox-1.0.0-0123456789ab", "1.0.0"));
        assert_eq!(state.validate(), Ok(()));
        state.previous = state.current.clone();
        assert_eq!(
            state.validate(),
            Err("release fox-1.0.0-0123456789ab is both current and previous".into())
        );
    }
}
