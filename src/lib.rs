//! The release side of ampoule as a library: the `ampoule` binary is a thin front over these
//! modules, and the benchmarks and tests call them directly.
//!
//! Format definitions, reading and verification live in `ampoule-verify`; this crate writes
//! bundles, manages key files and runs the commands.

// Layers, bottom first: the error contract (`failure`), the domain (`release/`), then the
// front's own types (`cli`, `output`), then the commands (`cmd/`); `main.rs` dispatches.
// tests/layers.rs checks it.
pub mod failure;

pub mod release;

pub mod cli;
pub mod output;

pub mod cmd;

pub use failure::{Refused, exit};
