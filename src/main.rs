//! The `ampoule` command-line tool: the release side of ampoule.
//!
//! Raw arguments are parsed by clap into the `*Args` types of `cli.rs`; each command module
//! validates them once into its own settings and does the work. Errors are printed once,
//! prefixed with the program name, and mapped to the documented exit codes.

mod cli;
mod cmd;
mod demo;
mod keyfile;
mod output;
mod pack;

use std::process::ExitCode;

use clap::Parser;

use crate::cli::{Cli, Command};
use crate::output::Output;

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

fn exit_code_of(err: &anyhow::Error) -> u8 {
    for cause in err.chain() {
        if let Some(e) = cause.downcast_ref::<ampoule_verify::Error>() {
            return if e.kind().is_refusal() {
                exit::REFUSED
            } else {
                exit::USAGE_OR_IO
            };
        }
        if cause.downcast_ref::<Refused>().is_some() {
            return exit::REFUSED;
        }
    }
    exit::USAGE_OR_IO
}

fn is_broken_pipe(err: &anyhow::Error) -> bool {
    err.chain().any(|c| {
        c.downcast_ref::<std::io::Error>()
            .is_some_and(|e| e.kind() == std::io::ErrorKind::BrokenPipe)
    })
}

fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            let code = if e.use_stderr() { exit::USAGE_OR_IO } else { exit::OK };
            let _ = e.print();
            return ExitCode::from(code);
        }
    };
    let out = Output::new(cli.json);
    let result = match cli.command {
        Command::Keygen(args) => cmd::keygen::run(args, &out),
        Command::Pack(args) => cmd::pack::run(args, &out),
        Command::Sign(args) => cmd::sign::run(args, &out),
        Command::Verify(args) => cmd::verify::run(args, &out),
        Command::Inspect(args) => cmd::inspect::run(args, &out),
        Command::Demo(args) => demo::run(args, &out),
    };
    match result {
        Ok(()) => ExitCode::from(exit::OK),
        Err(err) if is_broken_pipe(&err) => ExitCode::from(exit::OK),
        Err(err) => {
            let code = exit_code_of(&err);
            out.error(&err, code);
            ExitCode::from(code)
        }
    }
}
