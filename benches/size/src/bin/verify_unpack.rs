//! Figure (b) of issue 14, the app the 549 KiB was measured on: verify one bundle file
//! against one trusted key and the app's version, and unpack it into a directory. No store, no
//! feed, no ledger: only the release side reaches `Verifier` (feature `release-api`), so this
//! is a comparison, not an app's path. The source argument is the bundle; the store argument
//! is the directory it unpacks into.

use ampoule_size::{Request, run};
use ampoule_verify::{PublicKey, TrustedKeys, Verifier, Version};
use std::error::Error;
use std::process::ExitCode;

fn verify_and_unpack(request: &Request) -> Result<String, Box<dyn Error>> {
    let trusted: TrustedKeys = [PublicKey::from_pem(&request.key_pem)?]
        .into_iter()
        .collect();
    let verifier = Verifier::new(trusted, Version::parse(&request.app_version)?)?;
    let verified = verifier.verify_path(&request.tree)?;
    let line = format!(
        "unpacked {} {}",
        verified.manifest().name,
        verified.manifest().version
    );
    verified.unpack(&request.store)?;
    Ok(line)
}

fn main() -> ExitCode {
    run(verify_and_unpack)
}
