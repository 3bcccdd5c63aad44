//! The `ampoule` command-line tool: the release side of ampoule.
//!
//! Raw arguments are parsed by clap into the `*Args` types of `cli.rs`; each command module
//! validates them once into its own settings and does the work. Errors are printed once,
//! prefixed with the program name, and mapped to the documented exit codes.

use std::process::ExitCode;

use ampoule::cli::{Cli, Command};
use ampoule::cmd::{self, demo};
use ampoule::exit;
use ampoule::failure;
use ampoule::output::Output;
use clap::Parser;

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
                Output::new(json, false).usage_error(&e);
            }
            return ExitCode::from(code);
        }
    };
    let out = Output::new(cli.json, cli.quiet);
    let result = match cli.command {
        Command::Keygen(args) => cmd::keygen::run(args, &out),
        Command::KeyId(args) => cmd::keyid::run(args, &out),
        Command::Pack(args) => cmd::pack::run(args, &out),
        Command::Delta(args) => cmd::delta::run(args, &out),
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
        Command::Completions(args) => cmd::completions::run(args, &out),
        Command::Man(_) => cmd::man::run(&out),
    };
    match result {
        Ok(()) => ExitCode::from(exit::OK),
        Err(err) if is_broken_pipe(&err) => ExitCode::from(exit::OK),
        Err(err) => {
            let kind = failure::classify(&err);
            if failure::is_reported(&err) {
                // The command printed its report (with `--json`, the error document itself).
                out.error_line(&err);
            } else {
                out.error(&err, kind);
            }
            ExitCode::from(kind.exit_code())
        }
    }
}
