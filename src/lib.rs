//! The release side of ampoule as a library: the `ampoule` binary is a thin front over these
//! modules, and the benchmarks and tests call them directly.
//!
//! Format definitions, reading and verification live in `ampoule-verify`; this crate writes
//! bundles, manages key files and runs the commands.

// Layers, bottom first: the domain (`release/`), then the front's own types (`cli`,
// `output`), then the commands (`cmd/`); `main.rs` dispatches. tests/layers.rs checks it.
pub mod release;

pub mod cli;
pub mod output;

pub mod cmd;

/// Exit codes, documented in `--help` and the README.
pub mod exit {
    /// Success.
    pub const OK: u8 = 0;
    /// A bundle (or key, or feed) was refused: verification or policy said no.
    pub const REFUSED: u8 = 1;
    /// Wrong usage, or a file could not be read or written.
    pub const USAGE_OR_IO: u8 = 2;
}

/// A refusal that did not come from `ampoule-verify` but must exit like one.
#[derive(Debug)]
pub struct Refused(pub String);

impl std::fmt::Display for Refused {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for Refused {}
