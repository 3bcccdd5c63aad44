#![doc = include_str!("lib.md")]
#![forbid(unsafe_code)]
#![warn(missing_docs)]
// Every module is private to apps; the release-side CLI, its tests and the crate's own tests
// reach the internals through the `release` feature, the fuzz targets through `fuzzing`. Both
// are off by default and out of the published docs. The one screen an app needs is the
// `pub use` list below, plus the `update` and `dangerous` modules.
#![cfg_attr(not(feature = "release"), allow(dead_code, unused_imports))]

/// Wraps one method (or associated constant) that the release side uses but apps do not:
/// public with the `release` feature, crate-private otherwise, so it stays out of the app's
/// API without a second copy of its body.
macro_rules! pub_for_release {
    ($(#[$meta:meta])* const fn $($rest:tt)*) => {
        #[cfg(feature = "release")]
        $(#[$meta])* pub const fn $($rest)*
        #[cfg(not(feature = "release"))]
        $(#[$meta])* pub(crate) const fn $($rest)*
    };
    ($(#[$meta:meta])* fn $($rest:tt)*) => {
        #[cfg(feature = "release")]
        $(#[$meta])* pub fn $($rest)*
        #[cfg(not(feature = "release"))]
        $(#[$meta])* pub(crate) fn $($rest)*
    };
    ($(#[$meta:meta])* const $($rest:tt)*) => {
        #[cfg(feature = "release")]
        $(#[$meta])* pub const $($rest)*
        #[cfg(not(feature = "release"))]
        $(#[$meta])* pub(crate) const $($rest)*
    };
}

/// Declares modules that are public only with the `release` feature (and the `fuzzing`
/// feature for those the fuzz targets read).
macro_rules! internal {
    ($($name:ident),* $(,)?) => { $(
        #[cfg(feature = "release")]
        pub mod $name;
        #[cfg(not(feature = "release"))]
        mod $name;
    )* };
}

internal!(
    bundle, digest, error, feed, format, keys, labels, ledger, manifest, merkle, signature, signed,
    store, tar, time, trust, verify,
);
#[cfg(all(feature = "fetch", feature = "release"))]
pub mod fetch;
#[cfg(all(feature = "fetch", not(feature = "release")))]
mod fetch;
#[cfg(any(feature = "release", feature = "fuzzing"))]
pub mod model;
#[cfg(not(any(feature = "release", feature = "fuzzing")))]
mod model;
mod readahead;
mod unpack;

pub mod dangerous;
pub mod update;

/// The README's examples, compiled as doctests so they cannot go stale.
#[cfg(doctest)]
#[doc = include_str!("../../../README.md")]
pub struct ReadmeDoctests;

// The app's trust: keys per role, or the trust set it ships with.
pub use keys::{KeyId, PublicKey, TrustedKeys};
pub use signed::{Signers, kind};
pub use update::Trust;
// The app itself: its version, the bundle name it accepts, its compatibility policy.
pub use model::{
    CompatibilityPolicy, CompatibilityPolicyBuilder, ModelFormat, ShapePattern, TensorSpec,
};
pub use semver::Version;
pub use update::App;
// The store, the update and what it ends in.
pub use feed::{Release as OfferedRelease, VerifiedFeed};
pub use manifest::Manifest;
pub use store::{Installed, Release};
pub use update::{Device, Outcome, Report};
pub use verify::{Progress, ProgressFn, Stage};
// Bundles' and documents' digests, and the device's clock.
pub use digest::Digest;
pub use time::Timestamp;
// Errors.
pub use error::{Error, ErrorKind, Result};
#[cfg(feature = "fetch")]
pub use fetch::Transfer;
// Paths the release side has always used, kept for it.
#[cfg(feature = "release")]
pub use feed::{FeedVerifier, in_rollout};
#[cfg(feature = "release")]
pub use model::ModelSignature;
#[cfg(feature = "release")]
pub use store::{Store, StoreState};
#[cfg(feature = "release")]
pub use trust::{DocumentKind, TrustSet, TrustSetFile};
#[cfg(feature = "release")]
pub use verify::{
    DEFAULT_MAX_BUNDLE_BYTES, DEFAULT_MAX_UNPACKED_BYTES, Unpacked, VerifiedBundle, Verifier,
};
