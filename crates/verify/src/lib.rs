#![doc = include_str!("lib.md")]
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub mod bundle;
pub mod dangerous;
pub mod digest;
pub mod error;
pub mod feed;
#[cfg(feature = "fetch")]
pub mod fetch;
pub mod format;
pub mod keys;
pub mod labels;
pub mod ledger;
pub mod manifest;
pub mod merkle;
pub mod model;
mod readahead;
pub mod signature;
pub mod signed;
pub mod store;
pub mod tar;
pub mod time;
pub mod trust;
mod unpack;
pub mod update;
mod verify;

/// The README's examples, compiled as doctests so they cannot go stale.
#[cfg(doctest)]
#[doc = include_str!("../../../README.md")]
pub struct ReadmeDoctests;

pub use digest::Digest;
pub use error::{Error, ErrorKind, Result};
pub use feed::{FeedVerifier, VerifiedFeed, in_rollout};
pub use keys::{KeyId, PublicKey, TrustedKeys};
pub use manifest::Manifest;
pub use model::{CompatibilityPolicy, ModelSignature};
pub use semver::Version;
pub use store::{Installed, Release, Store, StoreState};
pub use time::Timestamp;
pub use trust::{DocumentKind, TrustSet, TrustSetFile};
pub use update::{App, Device, Outcome, Report, Trust};
pub use verify::{
    DEFAULT_MAX_BUNDLE_BYTES, DEFAULT_MAX_UNPACKED_BYTES, Progress, ProgressFn, Stage, Unpacked,
    VerifiedBundle, Verifier,
};
