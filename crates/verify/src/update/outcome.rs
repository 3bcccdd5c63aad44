//! What one update did: a typed outcome an app can act on, and the verified feed and trust-set
//! version it was decided under.

use crate::check::feed::VerifiedFeed;
use crate::error::Error;
use crate::format::digest::Digest;
use crate::store::Installed;

/// What one update did.
#[derive(Debug)]
#[non_exhaustive]
pub enum Outcome {
    /// A newer bundle was downloaded, verified and installed; the app may load it.
    Installed(Box<Installed>),
    /// The channel's release is not newer than what the store accepted.
    UpToDate,
    /// The release is rolled out to a share of devices that does not include this one yet.
    NotInRollout {
        /// This device's rollout bucket for the release, 0 to 9999; it takes the release once
        /// the rollout reaches `bucket / 100` percent.
        bucket: u16,
    },
    /// The channel offers nothing (every release on it was withdrawn); keep what runs.
    NothingOffered,
    /// What the channel offers needs another version of the app (or of this library, when a
    /// document is in a format it cannot read); nothing was downloaded.
    NeedsOtherApp {
        /// Why, for a person.
        reason: String,
    },
    /// A document or the bundle failed a check; the running model is kept. The error says
    /// which check and what was found.
    Refused(Error),
    /// The update could not finish (network, disk, another update running, cancelled); the
    /// running model is kept, and trying again later may work.
    Failed(Error),
}

impl Outcome {
    /// A short, stable name: `installed`, `up_to_date`, `not_in_rollout`, `nothing_offered`,
    /// `needs_other_app`, `refused`, `failed`.
    pub fn name(&self) -> &'static str {
        match self {
            Outcome::Installed(_) => "installed",
            Outcome::UpToDate => "up_to_date",
            Outcome::NotInRollout { .. } => "not_in_rollout",
            Outcome::NothingOffered => "nothing_offered",
            Outcome::NeedsOtherApp { .. } => "needs_other_app",
            Outcome::Refused(_) => "refused",
            Outcome::Failed(_) => "failed",
        }
    }

    /// The error of a refused or failed update.
    pub fn error(&self) -> Option<&Error> {
        match self {
            Outcome::Refused(e) | Outcome::Failed(e) => Some(e),
            _ => None,
        }
    }

    /// A refusal or a failure, by the error's kind.
    pub(crate) fn from_error(error: Error) -> Outcome {
        if error.kind().is_refusal() {
            Outcome::Refused(error)
        } else {
            Outcome::Failed(error)
        }
    }
}

/// One update's outcome, the feed it acted on and the trust it held.
#[derive(Debug)]
#[non_exhaustive]
pub struct Report {
    /// What the update did.
    pub outcome: Outcome,
    /// The feed the decision was made on, when it passed its checks.
    pub feed: Option<VerifiedFeed>,
    /// The trust-set version the update rotated to (already stored), if the feed named a
    /// newer one.
    pub rotated_to: Option<u64>,
    /// The trust-set version the device holds after the update, when it runs on trust sets.
    pub trust_set_version: Option<u64>,
    /// What the update found in the store that the store's own code could not have put there
    /// (a symbolic link, a FIFO, a file with several hard links) and removed, never following
    /// it: each entry names the path and what was there. Someone else writes the store
    /// directory; the update went on regardless.
    pub removed: Vec<String>,
    /// The delta the release was installed from (its SHA-256, as the feed lists it), when the
    /// update used one instead of the full bundle: the feed offered a delta whose base is the
    /// installed release's files, which the store checked in full first. The installed release
    /// is the same either way, and went through the same checks.
    pub delta: Option<Digest>,
    /// Why the update did not use a delta the feed offered for the installed files: the store's
    /// check of those files failed, or the delta failed to download, to apply or to check
    /// (it is then remembered, like a refused bundle, and not downloaded again for a day), or
    /// it was remembered from before. The update went on with the full bundle.
    pub delta_refused: Option<Error>,
    /// How many bytes this update downloaded into the store (a delta, a bundle, or both after
    /// a delta failed), not counting bytes kept from an earlier update; counted from the
    /// downloads it completed.
    pub downloaded: u64,
}

impl Report {
    /// A report of an update that ended before any feed was verified.
    pub(crate) fn ended_early(error: Error) -> Report {
        Report {
            outcome: Outcome::from_error(error),
            feed: None,
            rotated_to: None,
            trust_set_version: None,
            removed: Vec::new(),
            delta: None,
            delta_refused: None,
            downloaded: 0,
        }
    }

    /// A refused or failed update as an `Err`, anything else as `Ok`: for callers that
    /// propagate errors with `?`. A trust-set rotation kept before a refusal is then only in
    /// the store (and in [`Report::rotated_to`] before the conversion).
    ///
    /// # Errors
    ///
    /// The error of [`Outcome::Refused`] or [`Outcome::Failed`].
    pub fn into_result(self) -> Result<Report, Error> {
        match self.outcome {
            Outcome::Refused(e) | Outcome::Failed(e) => Err(e),
            outcome => Ok(Report { outcome, ..self }),
        }
    }
}
