//! The smallest real use of ampoule-verify: verify a bundle against one trusted key and the
//! app's version, and install it in the on-device store. Everything that touches the library's
//! API is in `install`, so an API change means editing one short function.

use ampoule_size::{Request, run};
use ampoule_verify::{PublicKey, Store, TrustedKeys, Verifier};
use std::error::Error;
use std::process::ExitCode;

fn install(request: &Request) -> Result<String, Box<dyn Error>> {
    let trusted: TrustedKeys = [PublicKey::from_pem(&request.key_pem)?]
        .into_iter()
        .collect();
    let app_version = semver::Version::parse(&request.app_version)?;
    let verifier = Verifier::new(trusted, app_version)?;
    let store = Store::open(&request.store, verifier.clone())?;
    let installed = store.install(verifier.verify_path(&request.bundle)?, None, None)?;
    let manifest = &installed.release.manifest;
    Ok(format!("installed {} {}", manifest.name, manifest.version))
}

fn main() -> ExitCode {
    run(install)
}
