//! `ampoule-verify` checks signed ampoule model bundles on a device and installs them.
#![forbid(unsafe_code)]
#![warn(missing_docs)]
