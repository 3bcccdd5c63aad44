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

/// Declares the crate-private twin of a module that is public with the `release` feature. The
/// public declaration is written out, so that tools walking `mod` items (cargo-mutants,
/// rustfmt) find each file, and exactly once.
#[cfg(not(feature = "release"))]
macro_rules! private_twin {
    ($name:ident) => {
        mod $name;
    };
}

// The layers, bottom first; each folder uses only itself and the folders above it in this
// list (crates/verify/tests/layers.rs checks that). Shared by all of them: the error type,
// progress reports and the reading thread.
#[cfg(feature = "release")]
pub mod error;
#[cfg(not(feature = "release"))]
private_twin!(error);
mod progress;
mod readahead;
// Opening and removing inside the store without following links.
#[cfg(unix)]
mod dir;
#[cfg(not(unix))]
compile_error!(
    "ampoule-verify needs a Unix-like system: its store opens every file with openat and \
     O_NOFOLLOW so that a planted link is never followed"
);
// The format and its documents.
#[cfg(feature = "release")]
pub mod format;
#[cfg(not(feature = "release"))]
private_twin!(format);
// The checks: signatures, trust sets, feeds, the ledger's proofs, the app's policy.
#[cfg(feature = "release")]
pub mod check;
#[cfg(not(feature = "release"))]
private_twin!(check);
// Payload decoding: zstd and the inner tar, only of bytes a check vouched for.
#[cfg(feature = "release")]
pub mod payload;
#[cfg(not(feature = "release"))]
private_twin!(payload);
// The on-device store: atomic swap, rollback, lock.
#[cfg(feature = "release")]
pub mod store;
#[cfg(not(feature = "release"))]
private_twin!(store);
// The network (feature `fetch`).
#[cfg(all(feature = "fetch", feature = "release"))]
pub mod net;
#[cfg(all(feature = "fetch", not(feature = "release")))]
mod net;
// The device's update on top, and the weak paths beside it.
pub mod dangerous;
pub mod update;
// The fuzz targets' entry points (`fuzz/`), beside the top layer: absent from every other build.
#[cfg(feature = "fuzzing")]
pub mod fuzzing;

/// The paths the release side and the tests have always used, for the `release` feature.
#[cfg(feature = "release")]
pub use {
    check::{feed, trust},
    format::{digest, keys, labels, manifest, merkle, metadata, signature, signed, tar, time},
};

/// The audit ledger: its documents and the device's checks of them.
#[cfg(feature = "release")]
pub mod ledger {
    pub use crate::check::ledger_proof::*;
    pub use crate::format::ledger_entry::*;
}

/// A bundle file's outer layout and writer, and the unverified view release tools use.
#[cfg(feature = "release")]
pub mod bundle {
    pub use crate::format::bundle::*;
    pub use crate::payload::inspect::Unverified;
}

/// Model readers and the compatibility policy.
#[cfg(any(feature = "release", feature = "fuzzing"))]
pub mod model {
    pub use crate::check::policy::*;
    pub use crate::check::policy_document::*;
    pub use crate::format::model::*;
}

/// HTTP(S) transfers (feature `fetch`).
#[cfg(all(feature = "fetch", feature = "release"))]
pub use net as fetch;

/// The README's examples, compiled as doctests so they cannot go stale.
#[cfg(doctest)]
#[doc = include_str!("../../../README.md")]
pub struct ReadmeDoctests;

// The app's trust: keys per role, or the trust set it ships with.
pub use format::keys::{KeyId, PublicKey, TrustedKeys};
pub use format::signed::{Signers, kind};
pub use update::Trust;
// The app itself: its version, the bundle name it accepts, its compatibility policy.
pub use check::policy::{
    CompatibilityPolicy, CompatibilityPolicyBuilder, ShapePattern, TensorSpec,
};
pub use format::model::ModelFormat;
pub use semver::Version;
pub use update::App;
// The store, the update and what it ends in.
pub use check::feed::{Release as OfferedRelease, VerifiedFeed};
pub use format::manifest::Manifest;
pub use progress::{Progress, ProgressFn, Stage};
pub use store::{Installed, Release};
pub use update::{Device, Outcome, Report};
// Bundles' and documents' digests, and the device's clock.
pub use format::digest::Digest;
pub use format::time::Timestamp;
// Errors.
pub use error::{Error, ErrorKind, Result};
#[cfg(feature = "fetch")]
pub use net::Transfer;
// Paths the release side has always used, kept for it.
#[cfg(feature = "release")]
pub use check::bundle::{
    DEFAULT_MAX_BUNDLE_BYTES, DEFAULT_MAX_UNPACKED_BYTES, VerifiedBundle, Verifier,
};
#[cfg(feature = "release")]
pub use check::feed::{FeedVerifier, in_rollout};
#[cfg(feature = "release")]
pub use check::trust::{DocumentKind, TrustSet, TrustSetFile};
#[cfg(feature = "release")]
pub use format::model::ModelSignature;
#[cfg(feature = "release")]
pub use payload::unpack::Unpacked;
#[cfg(feature = "release")]
pub use store::{Store, StoreState};
