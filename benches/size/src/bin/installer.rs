//! The smallest real use of ampoule-verify through its safe path: the step-by-step update an
//! app with its own HTTP stack drives, answered here from a release tree's files. One key is
//! pinned for every role and the app states its version. Everything that touches the
//! library's API is in `install`.

use ampoule_size::{Request, run};
use ampoule_verify::update::Next;
use ampoule_verify::{App, Device, Outcome, PublicKey, Signers, Timestamp, Trust, Version};
use std::error::Error;
use std::path::PathBuf;
use std::process::ExitCode;

/// Where a URL of the pretend server lives in the tree.
const BASE: &str = "https://size-check.invalid/";

fn install(request: &Request) -> Result<String, Box<dyn Error>> {
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
    let file = |url: &str| -> PathBuf { request.tree.join(url.trim_start_matches(BASE)) };
    let feed_url = format!("{BASE}feeds/stable.json");
    let mut session = device.begin(&feed_url, std::fs::read(file(&feed_url))?, now);
    let report = loop {
        match session.advance() {
            Next::Fetch(want) => session.provide(std::fs::read(file(want.url()))?),
            Next::Download(want) => {
                std::fs::copy(file(&want.urls()[0]), want.path())?;
                session.downloaded(want.path());
            }
            Next::Done(report) => break report,
            _ => return Err("an update step this app does not know".into()),
        }
    };
    match report.outcome {
        Outcome::Installed(installed) => {
            let manifest = &installed.release.manifest;
            Ok(format!("installed {} {}", manifest.name, manifest.version))
        }
        Outcome::Refused(e) | Outcome::Failed(e) => Err(e.into()),
        other => Ok(other.name().to_string()),
    }
}

fn main() -> ExitCode {
    run(install)
}
