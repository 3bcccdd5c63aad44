//! Payload decoding, above the checks: only bytes a check already vouched for reach the zstd
//! decoder and the inner tar reader here, and every file is checked against its digest as it
//! streams out.

pub mod delta;
pub mod inspect;
pub mod unpack;
