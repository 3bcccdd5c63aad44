//! The `ampoule` command-line tool.

#[allow(dead_code)] // the subcommands that call it are being written alongside
mod keyfile;
fn main() {}
