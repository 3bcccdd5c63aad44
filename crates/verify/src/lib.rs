//! `ampoule-verify` checks signed ampoule model bundles on a device and installs them.
//!
//! A bundle is accepted only when a trusted key signed its exact manifest, every byte matches
//! the digests that manifest declares, and the app's policy (name, newer version, app-version
//! range, size limits) allows it. Only then can it be unpacked or installed: those steps take a
//! [`VerifiedBundle`], a type no code outside this crate can make.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub mod bundle;
pub mod digest;
pub mod error;
pub mod format;
pub mod keys;
pub mod labels;
pub mod manifest;
mod readahead;
pub mod signature;
pub mod tar;
pub mod time;
mod unpack;
mod verify;

pub use digest::Digest;
pub use error::{Error, ErrorKind, Result};
pub use keys::{KeyId, PublicKey, TrustedKeys};
pub use manifest::Manifest;
pub use time::Timestamp;
pub use verify::{
    DEFAULT_MAX_BUNDLE_BYTES, DEFAULT_MAX_UNPACKED_BYTES, Progress, ProgressFn, Stage, Unpacked,
    VerifiedBundle, Verifier,
};
