//! `ampoule man`: the manual page, generated from the clap definitions. One page holds every
//! command: the top level as clap_mangen renders it, then a section per subcommand (nested
//! ones too) whose synopsis, description, options and examples are subsections.

use anyhow::Result;
use clap::CommandFactory;
use clap_mangen::Man;

use crate::cli::Cli;
use crate::output::Output;

pub fn run(out: &Output) -> Result<()> {
    let cmd = Cli::command();
    let mut page = Vec::new();
    Man::new(cmd.clone()).render(&mut page)?;
    let mut path = vec![cmd.get_name().to_string()];
    for sub in cmd.get_subcommands() {
        section(sub, &mut path, &mut page)?;
    }
    out.raw(&page)
}

/// Appends `cmd`'s section, then its subcommands' sections.
fn section(cmd: &clap::Command, path: &mut Vec<String>, page: &mut Vec<u8>) -> Result<()> {
    path.push(cmd.get_name().to_string());
    let name = path.join(" ");
    let man = Man::new(cmd.clone().bin_name(&name));
    let mut parts = Vec::new();
    man.render_synopsis_section(&mut parts)?;
    man.render_description_section(&mut parts)?;
    if cmd.get_arguments().any(|a| !a.is_hide_set()) {
        man.render_options_section(&mut parts)?;
    }
    if cmd.get_after_help().is_some() {
        man.render_extra_section(&mut parts)?;
    }
    page.extend_from_slice(format!(".SH \"{}\"\n", name.to_uppercase()).as_bytes());
    // clap_mangen starts each part with its own section heading; here they sit under the
    // command's heading, one level down.
    for line in String::from_utf8_lossy(&parts).lines() {
        let line = match line.strip_prefix(".SH ") {
            Some(heading) => format!(".SS {heading}"),
            None => line.to_string(),
        };
        page.extend_from_slice(line.as_bytes());
        page.push(b'\n');
    }
    for sub in cmd.get_subcommands() {
        section(sub, path, page)?;
    }
    path.pop();
    Ok(())
}
