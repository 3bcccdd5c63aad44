//! The `ampoule` command-line tool: the release side of ampoule.
//!
//! Raw arguments are parsed by clap into the `*Args` types of `cli.rs`; each command module
//! validates them once into its own settings and does the work. Errors are printed once,
//! prefixed with the program name, and mapped to the documented exit codes.

use std::process::ExitCode;

use ampoule::cli::{Cli, Command};
use ampoule::cmd::{self, demo};
use ampoule::output::Output;
use ampoule::{Refused, exit};
use clap::Parser;

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
            let code = if e.use_stderr() {
                exit::USAGE_OR_IO
            } else {
                exit::OK
            };
            let _ = e.print();
            if e.use_stderr() {
                // The command line did not parse, so `--json` is looked for by hand.
                let json = std::env::args_os()
                    .skip(1)
                    .take_while(|a| a != "--")
                    .any(|a| a == "--json");
                Output::new(json).usage_error(&e, code);
            }
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
        Command::Diff(args) => cmd::diff::run(args, &out),
        Command::Trust(args) => cmd::trust::run(args, &out),
        Command::Publish(args) => cmd::publish::run(args, &out),
        Command::Withdraw(args) => cmd::withdraw::run(args, &out),
        Command::Ledger(args) => cmd::ledger::run(args, &out),
        Command::Offline(args) => cmd::offline::run(args, &out),
        Command::Serve(args) => cmd::serve::run(args, &out),
        Command::Update(args) => cmd::update::run(args, &out),
        Command::Store(args) => cmd::store::run(args, &out),
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
