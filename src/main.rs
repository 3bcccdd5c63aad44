//! The `ampoule` command-line tool.
// The ledger's API is called by the `publish` and `ledger` subcommands as they are wired in;
// until then only its tests and the bench use it.
#[allow(dead_code)]
mod ledger;

fn main() {}
