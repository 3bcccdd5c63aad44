//! The app without the verifier: it copies the channel's feed into the store unchecked. Its
//! size is the zero that `installer` is measured against.

use ampoule_size::{Request, run};
use std::error::Error;
use std::process::ExitCode;

fn copy(request: &Request) -> Result<String, Box<dyn Error>> {
    std::fs::create_dir_all(&request.store)?;
    let feed = request.tree.join("feeds/stable.json");
    let bytes = std::fs::copy(feed, request.store.join("stable.json"))?;
    Ok(format!("copied {bytes} bytes unchecked"))
}

fn main() -> ExitCode {
    run(copy)
}
