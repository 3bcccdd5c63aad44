//! The `ampoule` command-line tool.
fn main() {}
