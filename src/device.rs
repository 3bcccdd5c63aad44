//! The device side of delivery, as `ampoule update` and the demo run it: one update check
//! against a channel's feed with what the on-device store remembers, then either an install
//! of the bundle the check found, or a record of the feed, so that a replayed older feed is
//! refused next time whatever the outcome. On a trust set, a newer set the feed names is
//! taken and stored within the same check, before the bundle is looked at.
//!
//! Apps embedding `ampoule-verify` do the same with [`ampoule_verify::fetch::Updater`] and
//! [`ampoule_verify::Store`]; this module is the reference for how the two fit together.

use std::io::{self, Read, Write};
use std::path::{Path, PathBuf};

use ampoule_verify::feed::{Release as FeedRelease, rollout_bucket};
use ampoule_verify::fetch::{Transfer, Update, Updater};
use ampoule_verify::ledger::LedgerVerifier;
use ampoule_verify::{
    FeedVerifier, Installed, Store, Timestamp, TrustSet, TrustedKeys, VerifiedFeed, Verifier,
};
use anyhow::{Context, Result, bail};
use semver::Version;

/// The file in the store directory that holds the device id `update` made on its first run.
pub const DEVICE_ID_FILE: &str = "device-id";
/// The directory in the store directory where bundles download (and resume) before install.
pub const DOWNLOADS_DIR: &str = "downloads";
/// The lock file in [`DOWNLOADS_DIR`] held for a whole update, so that two updaters never
/// write the same partial download.
pub const DOWNLOAD_LOCK: &str = "lock";
/// The longest device id accepted.
pub const DEVICE_ID_BYTES: usize = 128;

/// One device following one channel: the store it installs into and how it checks feeds and
/// bundles.
pub struct Device {
    /// The on-device store.
    pub store: Store,
    /// The channel feed's URL.
    pub feed_url: String,
    /// The channel the device follows; a feed for another channel is refused.
    pub channel: String,
    /// The keys whose signatures count on feeds, and how many must have signed.
    pub feed_keys: (TrustedKeys, usize),
    /// The keys whose signatures count on the audit ledger's tree heads, and how many must
    /// have signed: every feed must then prove that its release is in the ledger, and the
    /// ledger must extend the largest tree head this store saw. `None` accepts feeds without
    /// ledger proofs (for release trees published before the ledger existed).
    pub ledger_keys: Option<(TrustedKeys, usize)>,
    /// The app's bundle verifier (keys, app version, name, limits); the installed version
    /// and model line come from the store at each check.
    pub bundles: Verifier,
    /// The id that places this device in rollouts.
    pub device_id: String,
    /// Where bundles download to.
    pub download_dir: PathBuf,
    /// Transfer limits and the download progress callback.
    pub transfer: Transfer,
    /// The trust set the device runs on, normally [`Store::load_trust_set`] of the set shipped
    /// with the app: feeds, tree heads and bundles are then checked with its keys (replacing
    /// `feed_keys`, the `ledger_keys` keys and the keys of `bundles`, whose other settings
    /// stay), and a feed naming a newer set rotates to it, which the store keeps as
    /// `trust-set.json`. `None` checks with the keys above only.
    pub trust_set: Option<TrustSet>,
}

/// What one check did, and the trust set it rotated to if the feed named a newer one.
#[derive(Debug)]
pub struct Checked {
    /// What the check did with the feed's release.
    pub outcome: Outcome,
    /// The newer trust set the feed named, verified and stored before the bundle was checked.
    pub rotated: Option<TrustSet>,
}

/// What one check did.
#[derive(Debug)]
pub enum Outcome {
    /// A newer bundle was downloaded, verified and installed.
    Updated {
        feed: VerifiedFeed,
        installed: Box<Installed>,
    },
    /// The channel's release is not newer than what the store accepted.
    UpToDate { feed: VerifiedFeed },
    /// The release is rolled out to a share of devices that does not include this one yet.
    NotInRollout { feed: VerifiedFeed, bucket: u16 },
    /// The channel offers nothing (every release on it was withdrawn).
    NothingCurrent { feed: VerifiedFeed },
    /// The release needs another app version.
    NeedsOtherApp { feed: VerifiedFeed },
}

impl Outcome {
    /// The verified feed the check acted on.
    pub fn feed(&self) -> &VerifiedFeed {
        match self {
            Outcome::Updated { feed, .. }
            | Outcome::UpToDate { feed }
            | Outcome::NotInRollout { feed, .. }
            | Outcome::NothingCurrent { feed }
            | Outcome::NeedsOtherApp { feed } => feed,
        }
    }

    /// A short name for JSON output.
    pub fn name(&self) -> &'static str {
        match self {
            Outcome::Updated { .. } => "updated",
            Outcome::UpToDate { .. } => "up_to_date",
            Outcome::NotInRollout { .. } => "not_in_rollout",
            Outcome::NothingCurrent { .. } => "nothing_current",
            Outcome::NeedsOtherApp { .. } => "needs_other_app",
        }
    }

    /// The release the feed offers, if any.
    pub fn offered(&self) -> Option<&FeedRelease> {
        self.feed().release()
    }
}

impl Device {
    /// Runs one update check at clock time `now`. Errors are those of the feed, the download
    /// and the bundle (`ampoule_verify::Error`, whose kind tells a refusal from a network or
    /// disk problem); the store is unchanged by any of them.
    pub fn check(&self, now: Timestamp) -> ampoule_verify::Result<Outcome> {
        Ok(self.check_rotating(now)?.outcome)
    }

    /// [`Device::check`], also saying whether the check rotated to a newer trust set. The
    /// rotation is stored before the bundle is looked at, and the bundle and the store's
    /// installed release are then checked with the new set's keys, so a key the new set
    /// revokes no longer counts in the same run. A trust set the feed names that is refused
    /// ends the check with that refusal.
    pub fn check_rotating(&self, now: Timestamp) -> ampoule_verify::Result<Checked> {
        let state = self.store.state()?;
        let mut bundles = self.bundles.clone();
        if let Some(name) = &state.name
            && bundles.required_name().is_none()
        {
            bundles = bundles.require_name(name.clone());
        }
        // The highest version ever accepted, not the current one: after a rollback the
        // store refuses everything up to it, so downloading it would be wasted.
        if let Some(highest) = &state.highest_version {
            bundles = bundles.installed(highest.clone());
        }
        let (keys, threshold) = &self.feed_keys;
        let mut feeds =
            FeedVerifier::new(keys.clone(), self.channel.clone())?.threshold(*threshold);
        if let Some((sequence, digest)) = state.last_feed(&self.channel) {
            feeds = feeds.last_accepted(sequence, digest);
        }
        if let Some((keys, threshold)) = &self.ledger_keys {
            feeds = feeds.require_ledger(
                LedgerVerifier::new(keys.clone(), *threshold)?.remembered(state.tree_head),
            );
        }
        let mut updater = Updater::new(
            self.feed_url.clone(),
            feeds,
            bundles,
            self.device_id.clone(),
            self.download_dir.clone(),
        )
        .transfer(self.transfer.clone());
        let mut store = self.store.clone();
        if let Some(trust) = &self.trust_set {
            // Keys and thresholds of the trust set replace those of the verifiers, ledger
            // requirement and remembered tree head included.
            updater = updater.with_trust_set(trust.clone())?;
            store = store.with_trust_set(trust)?;
        }
        let mut rotated: Option<TrustSet> = None;
        let update = updater.check_with(now, &mut |next| {
            store.save_trust_set(next)?;
            rotated = Some(next.clone());
            Ok(())
        })?;
        if let Some(next) = &rotated {
            store = store.with_trust_set(next)?;
        }
        let outcome = match update {
            Update::Ready { feed, bundle, path } => {
                let installed = store.install_from_feed(*bundle, &feed);
                // A refused bundle would be refused again; a lock or disk problem may pass, and
                // the complete download then saves the next run a transfer.
                let done = match &installed {
                    Ok(_) => true,
                    Err(e) => e.kind().is_refusal(),
                };
                if done {
                    let _ = std::fs::remove_file(&path);
                }
                let installed = installed?;
                self.remember_tree_head(&feed)?;
                // The release before the previous one is no rollback target any more: free its
                // space now rather than at the next update. A failure here changes nothing
                // that matters (the next update sweeps again), so it does not fail this one.
                let _ = store.gc();
                return Ok(Checked {
                    outcome: Outcome::Updated {
                        feed,
                        installed: Box::new(installed),
                    },
                    rotated,
                });
            }
            Update::UpToDate { feed } => Outcome::UpToDate { feed },
            Update::NotInRollout { feed } => {
                let bucket = feed
                    .release()
                    .map_or(0, |r| rollout_bucket(&self.device_id, &r.sha256));
                Outcome::NotInRollout { feed, bucket }
            }
            Update::NothingCurrent { feed } => Outcome::NothingCurrent { feed },
            Update::NeedsOtherApp { feed } => Outcome::NeedsOtherApp { feed },
            // Outcomes a newer ampoule-verify may add install nothing, as these do.
            other => Outcome::UpToDate {
                feed: other.feed().clone(),
            },
        };
        store.record_feed(outcome.feed())?;
        self.remember_tree_head(outcome.feed())?;
        Ok(Checked { outcome, rotated })
    }

    /// Remembers the ledger's tree head a feed proved, so that a smaller or forked ledger is
    /// refused from now on.
    fn remember_tree_head(&self, feed: &VerifiedFeed) -> ampoule_verify::Result<()> {
        match feed.ledger() {
            Some(check) => self.store.remember_tree_head(&check.tree_head),
            None => Ok(()),
        }
    }

    /// The version the store runs now.
    pub fn current_version(&self) -> ampoule_verify::Result<Option<Version>> {
        Ok(self.store.state()?.current.map(|c| c.version))
    }
}

/// Checks a device id given on the command line or read from the store: 1 to 128 printable
/// ASCII characters, no spaces.
pub fn check_device_id(id: &str) -> Result<()> {
    if id.is_empty() || id.len() > DEVICE_ID_BYTES || !id.bytes().all(|b| b.is_ascii_graphic()) {
        bail!(
            "device id '{}' is not usable: use 1 to {DEVICE_ID_BYTES} printable ASCII characters without spaces",
            id.chars().take(140).collect::<String>().escape_debug()
        );
    }
    Ok(())
}

/// The device id kept in the store directory, made from 128 random bits on the first call.
/// It lives beside the store so that one device keeps its rollout place across runs; a
/// copied store copies the id too.
pub fn stored_device_id(store_dir: &Path) -> Result<String> {
    let path = store_dir.join(DEVICE_ID_FILE);
    let mut random = [0u8; 16];
    getrandom::fill(&mut random)
        .map_err(|e| anyhow::anyhow!("cannot get random bytes for a device id: {e}"))?;
    let fresh = hex::encode(random);
    match std::fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(&path)
    {
        Ok(mut file) => {
            file.write_all(format!("{fresh}\n").as_bytes())
                .and_then(|()| file.sync_all())
                .with_context(|| format!("cannot write {}", path.display()))?;
            return Ok(fresh);
        }
        Err(e) if e.kind() == io::ErrorKind::AlreadyExists => {}
        Err(e) => return Err(e).with_context(|| format!("cannot create {}", path.display())),
    }
    let mut text = String::new();
    std::fs::File::open(&path)
        .and_then(|f| f.take(DEVICE_ID_BYTES as u64 + 2).read_to_string(&mut text))
        .with_context(|| format!("cannot read {}", path.display()))?;
    let id = text.trim_end_matches('\n');
    check_device_id(id).with_context(|| {
        format!(
            "{} is damaged; remove it to make a new id (the device then takes a new place in rollouts)",
            path.display()
        )
    })?;
    Ok(id.to_string())
}
