//! `ampoule serve`: the demo and test web server for a release tree (see `crate::release::serve`).

use std::net::SocketAddr;

use anyhow::{Context, Result, bail};
use serde_json::json;

use crate::cli::ServeArgs;
use crate::output::Output;

pub fn run(args: ServeArgs, out: &Output) -> Result<()> {
    let addr: SocketAddr = args.addr.parse().with_context(|| {
        format!(
            "--addr '{}' is not an IP address and port like 127.0.0.1:8000",
            args.addr
        )
    })?;
    if !args.tree.is_dir() {
        bail!(
            "{} is not a directory; publish to it first",
            args.tree.display()
        );
    }
    let root = args
        .tree
        .canonicalize()
        .with_context(|| format!("cannot resolve {}", args.tree.display()))?;
    if !addr.ip().is_loopback() {
        out.note("serving beyond this machine: this server is for demos and tests only");
    }
    let shown = root.clone();
    let mut printed = Ok(());
    crate::release::serve::run(root, addr, |bound| {
        let url = format!("http://{bound}/");
        printed = out.result(
            &format!("serving {} at {url}", shown.display()),
            json!({ "ok": true, "url": url, "tree": shown }),
        );
        if printed.is_ok() {
            out.note("for demos and tests only; press Ctrl-C to stop");
        }
    })
    .with_context(|| format!("cannot serve on {addr}"))?;
    printed
}
