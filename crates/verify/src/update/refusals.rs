//! The store's memory of the last bundle it refused, so that a device on a metered link does
//! not download a bundle it will refuse again on every poll (issue 10).
//!
//! `downloads/refused.json` holds one refusal: the refused bundle's SHA-256 (as its feed
//! declares it), the error's kind and message, when it happened, and a fingerprint of what the
//! decision depended on besides the bundle: the app's version, bundle name, policy and size
//! limits, and the trust it held. While the feed offers the same digest and the fingerprint is
//! the same, the update refuses again without downloading anything. A new feed sequence alone
//! does not end it; another offered digest, an app update, a new trust set or 24 hours do.
//!
//! The file is not signed: whoever can write the store can plant one. That costs at most
//! one day's delay of that one bundle, which deleting the store's download directory would
//! not even cost, so the file is believed only that far: it never makes the device accept
//! anything, and a refusal remembered "in the future" (a clock set back) is ignored.

use std::fs::File;
use std::io::{Read, Write};

use serde::{Deserialize, Serialize};

use crate::check::bundle::Verifier;
use crate::dir::Dir;
use crate::error::{Error, ErrorKind};
use crate::format::digest::Digest;
use crate::format::time::Timestamp;
use crate::store::REFUSED_FILE;

use super::{App, Held};

/// How long a refusal is remembered at most.
pub const REMEMBER_SECS: u64 = 24 * 60 * 60;
const MAX_BYTES: u64 = 8 * 1024;
const MAX_REASON_BYTES: usize = 2 * 1024;
const TEMP: &str = ".refused.json.tmp";

#[derive(Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct Remembered {
    sha256: Digest,
    kind: String,
    reason: String,
    at: u64,
    app: Digest,
}

/// What a refusal depended on besides the bundle: when any of it changes, the bundle is
/// worth another look.
pub(crate) fn fingerprint(app: &App, held: &Held, bundles: &Verifier) -> Digest {
    let trust = match held {
        Held::Set(set) => format!("set {} {}", set.version(), Digest::of(&set.to_json())),
        Held::Pinned(_) => format!("pinned {:?} {}", bundles.keys(), bundles.threshold()),
    };
    Digest::of(
        format!(
            "{}|{:?}|{:?}|{}|{}|{trust}",
            app.version, app.bundle_name, app.policy, app.max_bundle_bytes, app.max_unpacked_bytes
        )
        .as_bytes(),
    )
}

/// The kinds a remembered refusal may carry: refusals, and for a delta a failed transfer.
fn kind_named(name: &str) -> Option<ErrorKind> {
    let kinds = [
        ErrorKind::Malformed,
        ErrorKind::TooLarge,
        ErrorKind::Signature,
        ErrorKind::Key,
        ErrorKind::Digest,
        ErrorKind::Manifest,
        ErrorKind::Policy,
        ErrorKind::Model,
        ErrorKind::Incompatible,
        ErrorKind::Proof,
        ErrorKind::Feed,
        ErrorKind::Stale,
        ErrorKind::TrustSet,
        // Only ever remembered for a delta; a bundle is skipped only for a refusal.
        ErrorKind::Network,
    ];
    kinds.into_iter().find(|k| format!("{k:?}") == name)
}

/// The refusal remembered for the bundle `sha256` under `app`, if one is and it is less than
/// a day old by `now`.
/// `what` names the file in the message: `bundle`, or `delta`.
pub(crate) fn recall(
    dir: &Dir,
    sha256: &Digest,
    app: &Digest,
    now: Timestamp,
    what: &str,
) -> Option<Error> {
    let file: File = dir.open_file(REFUSED_FILE).ok()?;
    let mut bytes = Vec::new();
    file.take(MAX_BYTES + 1).read_to_end(&mut bytes).ok()?;
    let kept: Remembered = serde_json::from_slice(&bytes).ok()?;
    let age = now.unix().checked_sub(kept.at)?;
    if &kept.sha256 != sha256 || &kept.app != app || age >= REMEMBER_SECS {
        return None;
    }
    let kind = kind_named(&kept.kind)?;
    let reason: String = kept.reason.chars().take(MAX_REASON_BYTES).collect();
    Some(Error::new(
        kind,
        format!(
            "{reason} (refused {} min ago and remembered: this {what} is not downloaded again \
             until the feed offers another one, the app or its trust changes, or {} hours pass)",
            age / 60,
            REMEMBER_SECS / 3600
        ),
    ))
}

/// Remembers that the bundle `sha256` was refused with `error` under `app`. Best effort: a
/// failure to write only means the next update may download the bundle again.
pub(crate) fn remember(dir: &Dir, sha256: &Digest, error: &Error, app: &Digest, now: Timestamp) {
    if error.kind().is_refusal() {
        remember_any(dir, sha256, error, app, now);
    }
}

/// Remembers the file `sha256` with `error` of any kind: for a delta (issue 13), which the
/// update also remembers when it could not be downloaded, so that the next update goes
/// straight to the full bundle and resumes it. Remembering a delta never costs more than the
/// full bundle, which a device without deltas always downloads.
pub(crate) fn remember_any(
    dir: &Dir,
    sha256: &Digest,
    error: &Error,
    app: &Digest,
    now: Timestamp,
) {
    let kept = Remembered {
        sha256: *sha256,
        kind: format!("{:?}", error.kind()),
        reason: error.to_string().chars().take(MAX_REASON_BYTES).collect(),
        at: now.unix(),
        app: *app,
    };
    let Ok(bytes) = serde_json::to_vec(&kept) else {
        return;
    };
    let _ = dir.remove(TEMP);
    let written = dir.create_new(TEMP).and_then(|mut file| {
        file.write_all(&bytes)?;
        file.sync_all()
    });
    if written.is_ok() && dir.rename(TEMP, dir, REFUSED_FILE).is_ok() {
        let _ = dir.sync();
    } else {
        let _ = dir.remove(TEMP);
    }
}

/// Forgets a remembered refusal (after an install, which shows the store moved on).
pub(crate) fn forget(dir: &Dir) {
    let _ = dir.remove(REFUSED_FILE);
}
