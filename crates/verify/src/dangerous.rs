//! Every way to weaken a device's checks, in one place, each saying what it loses. Nothing
//! here is needed by an app that follows a release tree: [`crate::update`] runs the whole
//! update with every check on. Use these only for a reason you can write down, and prefer
//! fixing the release tree (publish with the ledger, ship the feed beside the bundle).
//!
//! None of them can be reached from the safe types by accident:
//!
//! ```compile_fail
//! // A device installs only through its update, which needs the channel's feed.
//! fn install(device: &ampoule_verify::Device, bundle: &std::path::Path) {
//!     device.install(bundle);
//! }
//! ```
//!
//! ```compile_fail
//! // Nothing outside the update remembers a tree head: apps cannot name one.
//! fn remember(device: &ampoule_verify::Device, head: &ampoule_verify::merkle::TreeHead) {
//!     device.remember_tree_head(head);
//! }
//! ```
//!
//! ```compile_fail
//! // An app cannot switch the ledger requirement off.
//! fn app(app: ampoule_verify::App) -> ampoule_verify::App {
//!     app.skip_ledger()
//! }
//! ```
//!
//! ```compile_fail
//! // A verifier always states the app's version.
//! fn verifier(keys: ampoule_verify::TrustedKeys) -> ampoule_verify::Verifier {
//!     ampoule_verify::Verifier::dangerous_without_app_version(keys).unwrap()
//! }
//! ```
//!
//! The same types reach the weak paths an app can take here, and only here:
//!
//! ```no_run
//! use ampoule_verify::{App, Device, dangerous};
//!
//! fn weak(device: &Device, bundle: &std::path::Path, app: App) -> ampoule_verify::Result<()> {
//!     dangerous::install_bundle_without_feed(device, bundle)?;
//!     let _app = dangerous::skip_ledger(app);
//!     Ok(())
//! }
//! ```
//!
//! Two more exist only for the release side's tools and tests (feature `release`): a verifier
//! without the app-version check, and remembering a tree head nobody verified.

use std::path::Path;

use crate::error::Result;
use crate::store::Installed;
use crate::update::{App, Device};
#[cfg(feature = "release")]
use crate::{
    check::bundle::{VerifiedBundle, Verifier},
    format::keys::TrustedKeys,
    format::merkle::TreeHead,
    store::Store,
};

/// Feeds need no proof from the audit ledger.
///
/// **What is lost:** a bundle signed with a stolen key and offered to one device in a feed of
/// its own is installed without ever appearing where auditors look; a rolled-back or forked
/// ledger goes unnoticed; and a trust set the device rotates to need not be logged either, so
/// whoever holds a trust-set threshold and the feed key can rotate one device in secret. Only
/// for release trees published before the ledger existed.
pub fn skip_ledger(app: App) -> App {
    app.without_ledger()
}

/// Verifies the bundle file at `bundle` for the device's app and installs it, without its
/// channel's feed.
///
/// **What is lost:** everything the feed proves. The bundle's signatures (under the trust the
/// device holds), the app's policy and the payload are checked, and the store still refuses a
/// version not newer than the highest it accepted, but nothing shows that the release was
/// published (the ledger), is current on the device's channel (a withdrawn or superseded
/// release installs), or is meant for this device (rollout). For a technician's install,
/// prefer an offline update file, which carries the feed ([`crate::Device::install_offline`]):
/// it loses only the feed's expiry.
///
/// # Errors
///
/// The bundle's refusal; the store's own checks, its lock, I/O.
pub fn install_bundle_without_feed(device: &Device, bundle: &Path) -> Result<Installed> {
    device.install_without_feed(bundle)
}

/// Installs a bundle verified by hand without its channel's feed (see
/// [`install_bundle_without_feed`] for what is lost).
///
/// # Errors
///
/// As an install: the store's own checks, its lock, I/O.
#[cfg(feature = "release")]
pub fn install_without_feed(store: &Store, bundle: VerifiedBundle) -> Result<Installed> {
    store.install_without_feed(bundle)
}

/// Remembers a ledger tree head as the largest the device saw, although nothing verified it.
///
/// **What is lost:** a made-up head of a huge size makes the device refuse every genuine
/// feed from then on (their heads look rolled back) until the store is reset. The update
/// remembers only heads it verified.
///
/// # Errors
///
/// A head smaller than the remembered one; the store's lock; I/O.
#[cfg(feature = "release")]
pub fn remember_unverified_tree_head(store: &Store, head: &TreeHead) -> Result<()> {
    store.remember_tree_head(head)
}

/// A bundle verifier that does not check the app-version range, for release-side tools that
/// check a bundle outside any app.
///
/// **What is lost:** a bundle made for another app version (other inputs, other labels)
/// passes. Never on a device: an app always states its own version.
///
/// # Errors
///
/// An empty key set.
#[cfg(feature = "release")]
pub fn verifier_without_app_version(keys: TrustedKeys) -> Result<Verifier> {
    Verifier::without_app_version(keys)
}
