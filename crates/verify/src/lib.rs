//! `ampoule-verify` checks signed ampoule model bundles on a device and installs them.
//!
//! A bundle is accepted only when a trusted key signed its exact manifest, every byte matches
//! the digests that manifest declares, and the app's policy (name, newer version, app-version
//! range, size limits) allows it. Only then can it be unpacked or installed: those steps take a
//! `VerifiedBundle`, a type no code outside this crate can make.
#![forbid(unsafe_code)]
#![warn(missing_docs)]

pub mod digest;
pub mod error;
pub mod format;
pub mod keys;
pub mod merkle;

pub use digest::Digest;
pub use error::{Error, ErrorKind, Result};
pub use keys::{KeyId, PublicKey, TrustedKeys};
