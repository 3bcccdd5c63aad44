//! The device's whole update, in the library: what the app trusts and accepts ([`App`]), the
//! device that follows one channel into its store ([`Device`]), and one update that ends in a
//! typed [`Outcome`].
//!
//! Every app runs the same steps in the same order, so no app can leave one out:
//!
//! 1. take the store's download lock (a second updater waits for nothing and fails cleanly);
//! 2. when the feed names a newer trust set than the device holds, walk the tree's trust sets
//!    from the device's version to that one (`trust/<n>.json`, each accepted only as the
//!    successor of the one before, at most 32), then verify the feed under the last one;
//! 3. verify the channel's feed under the trust the device holds now: signatures, channel,
//!    freshness, sequence against what the store accepted, the ledger's signed tree head and
//!    the feed's own ledger entry (its sequence, its offer, the head's last leaf); after a
//!    walk, the feed must name the set it ended on, and the ledger must log every set on the
//!    way (the tree's `ledger/trust-sets/<size>.json`); only then are the new sets stored;
//! 4. prove the ledger only grew since the largest tree head the store remembers, walking the
//!    tree's consistency steps when the device missed appends;
//! 5. decide by the store's version floor, the app's version, the rollout and the app's size
//!    limit, before a byte of the bundle is fetched;
//! 6. download into the store, check the file against the feed's size and SHA-256, verify
//!    the bundle (signatures, policy, payload digest) and that the ledger logged its manifest;
//!    when the feed lists a delta whose base is the digest of the installed files (which the
//!    store checks in full first), download that delta instead and check the manifest it
//!    carries the same way; a delta that fails anything gives way to the bundle in the same
//!    update, and is remembered (`refusals.rs`);
//! 7. install atomically (a delta's files rebuilt from the current release's, through the same
//!    install), remember the feed and the tree head, and clean up.
//!
//! The steps run through a [`Session`], which asks the app for each document it needs
//! ([`Next::Fetch`]) and for the bundle ([`Next::Download`]), so an app with its own HTTP
//! stack or a platform transfer service drives the same loop. With the `fetch` feature,
//! [`Device::update`] drives it over HTTP(S) itself. [`Device::install_offline`] drives it from
//! an offline file, where only the feed's expiry goes unchecked.
//!
//! Nothing here can be switched off. The weak paths (no ledger, no feed, an unchecked tree
//! head) live in [`crate::dangerous`], whose documentation says what each one loses.

mod app_policy;
mod device;
mod offline;
mod outcome;
pub(crate) mod refusals;
mod session;

use std::fmt;
use std::time::Duration;

use semver::Version;

use crate::check::bundle::{DEFAULT_MAX_BUNDLE_BYTES, DEFAULT_MAX_UNPACKED_BYTES};
use crate::check::policy::CompatibilityPolicy;
use crate::check::trust::TrustSet;
use crate::error::{Error, ErrorKind, Result};
use crate::format::signed::{Signers, kind};
use crate::format::time::Timestamp;
use crate::progress::ProgressFn;

pub use device::{DEVICE_ID_BYTES, Device};
pub use offline::offline_channel;
pub use outcome::{Outcome, Report};
pub use session::{Download, Fetch, Next, Session};

/// Whose signatures the app accepts: the trust set it ships with (which the device then
/// follows through rotations), or keys pinned per role.
#[derive(Clone)]
pub struct Trust {
    source: Source,
}

#[derive(Clone)]
enum Source {
    Shipped(Vec<u8>),
    Pinned(Box<Pinned>),
}

#[derive(Clone)]
pub(crate) struct Pinned {
    bundle: Signers<kind::Manifest>,
    feed: Signers<kind::Feed>,
    tree_head: Signers<kind::TreeHead>,
}

impl fmt::Debug for Trust {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match &self.source {
            Source::Shipped(bytes) => f
                .debug_struct("Trust")
                .field("shipped_trust_set_bytes", &bytes.len())
                .finish(),
            Source::Pinned(p) => f
                .debug_struct("Trust")
                .field("bundle", &p.bundle)
                .field("feed", &p.feed)
                .field("tree_head", &p.tree_head)
                .finish(),
        }
    }
}

impl Trust {
    /// The trust set the app ships with (the exact file the release side publishes). The
    /// device keeps the newest set it accepted since in its store and uses the newer of the
    /// two, so an app update can also ship a newer set.
    ///
    /// # Errors
    ///
    /// [`ErrorKind::TrustSet`] or [`ErrorKind::Signature`] when the file is not a trust set
    /// signed by its own threshold. Expiry is checked when a device opens.
    pub fn shipped_trust_set(bytes: impl Into<Vec<u8>>) -> Result<Trust> {
        let bytes = bytes.into();
        TrustSet::self_signed(&bytes)
            .map_err(|e| e.context("the trust set shipped with the app"))?;
        Ok(Trust {
            source: Source::Shipped(bytes),
        })
    }

    /// Keys pinned in the app, each for one role as a trust set would list them: bundles,
    /// feeds and the ledger's tree heads. A key that should hold two roles is passed for both
    /// on purpose; nothing gives a key a role it was not given. Pinned keys cannot be rotated
    /// without an app update: prefer [`Trust::shipped_trust_set`].
    pub fn pinned(
        bundle: Signers<kind::Manifest>,
        feed: Signers<kind::Feed>,
        tree_head: Signers<kind::TreeHead>,
    ) -> Trust {
        Trust {
            source: Source::Pinned(Box::new(Pinned {
                bundle,
                feed,
                tree_head,
            })),
        }
    }
}

/// What the app accepts: its trust, its own version, and optionally the one bundle name it
/// runs, its compatibility policy, its size limits and its device id.
#[derive(Clone)]
pub struct App {
    trust: Trust,
    version: Version,
    bundle_name: Option<String>,
    policy: Option<CompatibilityPolicy>,
    max_bundle_bytes: u64,
    max_unpacked_bytes: u64,
    device_id: Option<String>,
    progress: Option<ProgressFn>,
    ledger: Ledger,
    lock_wait: Duration,
}

/// Whether feeds must prove their release in the audit ledger: always, except through
/// [`crate::dangerous::skip_ledger`].
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Ledger {
    Required,
    Skipped,
}

impl fmt::Debug for App {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("App")
            .field("trust", &self.trust)
            .field("version", &self.version)
            .field("bundle_name", &self.bundle_name)
            .field("policy", &self.policy)
            .field("max_bundle_bytes", &self.max_bundle_bytes)
            .field("max_unpacked_bytes", &self.max_unpacked_bytes)
            .field("device_id", &self.device_id)
            .field("ledger", &self.ledger)
            .finish_non_exhaustive()
    }
}

impl App {
    /// An app at `version` trusting `trust`. Until [`App::bundle_name`] says otherwise, the
    /// store takes the model line of the first bundle it installs and keeps to it.
    pub fn new(trust: Trust, version: Version) -> App {
        App {
            trust,
            version,
            bundle_name: None,
            policy: None,
            max_bundle_bytes: DEFAULT_MAX_BUNDLE_BYTES,
            max_unpacked_bytes: DEFAULT_MAX_UNPACKED_BYTES,
            device_id: None,
            progress: None,
            ledger: Ledger::Required,
            lock_wait: Duration::ZERO,
        }
    }

    /// Accepts only bundles named `name` (the model line the app's code runs).
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Settings`] for a name no bundle can have.
    pub fn bundle_name(mut self, name: impl Into<String>) -> Result<App> {
        let name = name.into();
        crate::format::manifest::check_name(&name)
            .map_err(|e| Error::new(ErrorKind::Settings, format!("bundle name: {e}")))?;
        self.bundle_name = Some(name);
        Ok(self)
    }

    /// What the app's code needs of the model and labels, checked before anything replaces
    /// the running model.
    pub fn compatibility(mut self, policy: CompatibilityPolicy) -> App {
        self.policy = Some(policy);
        self
    }

    /// The largest bundle file the device downloads (1 GiB unless set): a feed offering more
    /// is refused before anything is fetched.
    pub fn max_bundle_bytes(mut self, bytes: u64) -> App {
        self.max_bundle_bytes = bytes;
        self
    }

    /// The most bytes a bundle may unpack to (4 GiB unless set).
    pub fn max_unpacked_bytes(mut self, bytes: u64) -> App {
        self.max_unpacked_bytes = bytes;
        self
    }

    /// The id that places this device in rollouts, when the app has one of its own; without
    /// it the store makes a random one on first use and keeps it.
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Settings`] unless it is 1 to [`DEVICE_ID_BYTES`] printable ASCII
    /// characters without spaces.
    pub fn device_id(mut self, id: impl Into<String>) -> Result<App> {
        let id = id.into();
        device::check_device_id(&id)?;
        self.device_id = Some(id);
        Ok(self)
    }

    /// How long an update (or a rollback or clean-up) waits for another one on the same store
    /// to finish before it fails with [`ErrorKind::Locked`]; zero, the default, fails at once.
    /// An app that starts other processes while it updates should allow a little: a process
    /// being started briefly holds a copy of every open file, locks included.
    pub fn wait_for_lock(mut self, wait: Duration) -> App {
        self.lock_wait = wait;
        self
    }

    /// Calls `progress` while a bundle downloads (with `fetch`), is hashed and is unpacked.
    pub fn on_progress(mut self, progress: ProgressFn) -> App {
        self.progress = Some(progress);
        self
    }

    /// The app's version.
    pub fn version(&self) -> &Version {
        &self.version
    }

    pub(crate) fn without_ledger(mut self) -> App {
        self.ledger = Ledger::Skipped;
        self
    }
}

/// The trust a device holds at one moment: a verified trust set, or the pinned keys.
#[derive(Clone, Debug)]
pub(crate) enum Held {
    Set(TrustSet),
    Pinned(Pinned),
}

impl fmt::Debug for Pinned {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Pinned").finish_non_exhaustive()
    }
}

impl App {
    /// The trust set shipped with the app, when it runs on trust sets.
    pub(crate) fn shipped_trust_set(&self) -> Option<&[u8]> {
        match &self.trust.source {
            Source::Shipped(initial) => Some(initial),
            Source::Pinned(_) => None,
        }
    }
}

impl Held {
    /// The trust for a store in `dir`: the newer of the shipped and the stored trust set,
    /// or the pinned keys. The set may have expired: expiry stops new installs, not the
    /// model the device verified and runs, so opening the store and checking the current
    /// release still work. Every check of a new document refuses an expired set (a feed
    /// verifier built from it refuses every feed), and the update renews it through the
    /// tree when a successor is published there.
    fn load(trust: &Trust, dir: &std::path::Path) -> Result<Held> {
        match &trust.source {
            Source::Shipped(initial) => crate::store::newest_trust_set(dir, initial).map(Held::Set),
            Source::Pinned(p) => Ok(Held::Pinned((**p).clone())),
        }
    }

    /// Refuses new installs under a trust set that expired before `now`.
    fn check_unexpired(&self, now: Timestamp) -> Result<()> {
        match self {
            Held::Set(set) => set.file().check_expiry(now),
            Held::Pinned(_) => Ok(()),
        }
    }

    fn set(&self) -> Option<&TrustSet> {
        match self {
            Held::Set(set) => Some(set),
            Held::Pinned(_) => None,
        }
    }
}
