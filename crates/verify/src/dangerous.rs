//! Every way to weaken a device's checks, in one place, each saying what it loses. Nothing
//! here is needed by an app that follows a release tree: [`crate::update`] runs the whole
//! update with every check on. Use these only for a reason you can write down, and prefer
//! fixing the release tree (publish with the ledger, ship the feed beside the bundle).
//!
//! None of them can be reached from the safe types by accident:
//!
//! ```compile_fail
//! // The store has no public install that skips the feed.
//! fn install(store: &ampoule_verify::Store, bundle: ampoule_verify::VerifiedBundle) {
//!     store.install(bundle, None, None);
//! }
//! ```
//!
//! ```compile_fail
//! // A tree head nobody verified cannot be remembered through the store.
//! fn remember(store: &ampoule_verify::Store, head: &ampoule_verify::merkle::TreeHead) {
//!     store.remember_tree_head(head);
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
//! The same types reach each weak path here, and only here:
//!
//! ```no_run
//! use ampoule_verify::merkle::TreeHead;
//! use ampoule_verify::{App, Store, TrustedKeys, VerifiedBundle, dangerous};
//!
//! fn weak(
//!     store: &Store,
//!     bundle: VerifiedBundle,
//!     head: &TreeHead,
//!     app: App,
//!     keys: TrustedKeys,
//! ) -> ampoule_verify::Result<()> {
//!     dangerous::install_without_feed(store, bundle)?;
//!     dangerous::remember_unverified_tree_head(store, head)?;
//!     let _app = dangerous::skip_ledger(app);
//!     let _verifier = dangerous::verifier_without_app_version(keys)?;
//!     Ok(())
//! }
//! ```

use crate::error::Result;
use crate::keys::TrustedKeys;
use crate::merkle::TreeHead;
use crate::store::{Installed, Store};
use crate::update::App;
use crate::verify::{VerifiedBundle, Verifier};

/// Feeds need no proof from the audit ledger.
///
/// **What is lost:** a bundle signed with a stolen key and offered to one device in a feed of
/// its own is installed without ever appearing where auditors look; a rolled-back or forked
/// ledger goes unnoticed. Only for release trees published before the ledger existed.
pub fn skip_ledger(app: App) -> App {
    app.without_ledger()
}

/// Installs a verified bundle that came without its channel's feed.
///
/// **What is lost:** everything the feed proves. The bundle's signatures, policy and payload
/// are checked, and the store still refuses a version not newer than the highest it
/// accepted, but nothing shows that the release was published (the ledger), is current on
/// the device's channel (a withdrawn or superseded release installs), or is meant for this
/// device (rollout). For a technician's install, prefer an offline file that carries the
/// feed ([`crate::Device::install_offline`]): it loses only the feed's expiry.
///
/// # Errors
///
/// As an install: the store's own checks, its lock, I/O.
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
pub fn verifier_without_app_version(keys: TrustedKeys) -> Result<Verifier> {
    Verifier::without_app_version(keys)
}
