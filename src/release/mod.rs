//! The release side's domain: the release tree and its records, the audit ledger's files and
//! its use by the tree, key files, packing, and the demo and test server. Commands (`cmd/`) call
//! these; nothing here reads command-line arguments or prints.

pub mod atomic;
pub mod delta;
pub mod files;
pub mod keyfile;
pub mod ledger_audit;
pub mod ledger_storage;
pub mod pack;
pub mod serve;
pub mod synth;
pub mod tree;
pub mod tree_deltas;
pub mod tree_records;
pub mod trust_proofs;
pub mod ustar;
