//! Figure (a) of issue 14: the app that opens a store and installs an offline file (made by
//! `ampoule offline`) through the safe path, without `fetch`. The source argument is the file.

use ampoule_size::{Request, run};
use ampoule_verify::{App, Device, Outcome, PublicKey, Signers, Timestamp, Trust, Version};
use std::error::Error;
use std::process::ExitCode;

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
    match device.install_offline(&request.tree, now).outcome {
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
