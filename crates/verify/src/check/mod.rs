//! The checks, above the format's documents: who signed (trust sets and the one counting rule
//! of `format::signed`), whether a feed is current and proven in the ledger, whether a bundle
//! passes the app's policy and its payload digest. A check decides; it decompresses nothing and
//! writes nothing (payload decoding and the store are the layers above).

pub mod bundle;
pub mod feed;
pub mod ledger_proof;
pub mod policy;
pub mod policy_document;
pub mod trust;
