//! Figure (d) of issue 14: the app that updates from a feed's URL with the library's own
//! HTTP(S) client (feature `fetch`). The source argument is the feed's URL.

use ampoule_size::{Request, run};
use ampoule_verify::{
    App, Device, Outcome, PublicKey, Signers, Timestamp, Transfer, Trust, Version,
};
use std::error::Error;
use std::process::ExitCode;

fn update(request: &Request) -> Result<String, Box<dyn Error>> {
    let key = PublicKey::from_pem(&request.key_pem)?;
    let keys = || [key.clone()].into_iter().collect();
    let trust = Trust::pinned(
        Signers::new(keys(), 1)?,
        Signers::new(keys(), 1)?,
        Signers::new(keys(), 1)?,
    );
    let app = App::new(trust, Version::parse(&request.app_version)?);
    let now = Timestamp::now();
    let device = Device::open(&request.store, "stable", app, now)?;
    let url = request.tree.to_str().ok_or("the feed's URL is not UTF-8")?;
    match device.update(url, &Transfer::new(), now).outcome {
        Outcome::Installed(installed) => {
            let manifest = &installed.release.manifest;
            Ok(format!("installed {} {}", manifest.name, manifest.version))
        }
        Outcome::Refused(e) | Outcome::Failed(e) => Err(e.into()),
        other => Ok(other.name().to_string()),
    }
}

fn main() -> ExitCode {
    run(update)
}
