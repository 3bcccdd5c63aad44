//! `ampoule completions SHELL`: a completion script generated from the clap definitions, so
//! it can never fall behind the commands it completes.

use anyhow::Result;
use clap::CommandFactory;

use crate::cli::{Cli, CompletionsArgs};
use crate::output::Output;

pub fn run(args: CompletionsArgs, out: &Output) -> Result<()> {
    let mut cmd = Cli::command();
    let mut script = Vec::new();
    clap_complete::generate(args.shell, &mut cmd, "ampoule", &mut script);
    // The script is the output whatever --quiet says: it is what was asked for.
    out.raw(&script)
}
