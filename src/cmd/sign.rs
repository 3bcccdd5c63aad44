//! `ampoule sign`: adds one signer's signature to a bundle, checking the whole bundle under
//! the new signature before the original file is replaced.

use std::fs::File;

use ampoule_verify::bundle::Unverified;
use ampoule_verify::format::limit;
use ampoule_verify::{PublicKey, TrustedKeys, Verifier};
use anyhow::{Context, Result, bail};
use serde_json::json;

use crate::cli::SignArgs;
use crate::cmd::passphrase_source;
use crate::keyfile;
use crate::output::Output;
use crate::pack::{rewrite_signatures, sign_manifest};

pub fn run(args: SignArgs, out: &Output) -> Result<()> {
    let key = keyfile::read_secret_key(&args.key, &passphrase_source(&args.passphrase))?;
    let public = PublicKey::from_verifying_key(&key.verifying_key())?;
    let mut bundle = Unverified::open(&args.bundle)?;
    let mut signatures = bundle.signatures.clone();
    let changed = signatures.insert(sign_manifest(&key, &bundle.layout.manifest));
    let manifest = bundle.manifest.clone();
    let layout = bundle.layout.clone();
    let summary = format!("{} {}", manifest.name, manifest.version);
    if changed {
        if signatures.signatures.len() > limit::SIGNATURES {
            bail!(
                "{} already carries {} signatures, the most a bundle may hold",
                args.bundle.display(),
                limit::SIGNATURES
            );
        }
        let own_key: TrustedKeys = [public.clone()].into_iter().collect();
        let check = move |f: File| -> Result<()> {
            Verifier::dangerous_without_app_version(own_key.clone())?
                .verify_file(f)?
                .check_contents()
                .context(
                    "the bundle does not check out under the new signature; it was left unchanged",
                )?;
            Ok(())
        };
        rewrite_signatures(
            &args.bundle,
            bundle.file_mut(),
            &layout,
            &manifest,
            &signatures,
            &check,
        )?;
    }
    let signers: Vec<String> = signatures
        .signatures
        .iter()
        .map(|s| s.key_id.to_string())
        .collect();
    let human = if changed {
        format!(
            "signed {summary} in {} with key {}; it now carries {} signature(s)",
            args.bundle.display(),
            public.id(),
            signers.len()
        )
    } else {
        format!(
            "{} is already signed by key {}; nothing changed",
            args.bundle.display(),
            public.id()
        )
    };
    out.result(
        &human,
        json!({
            "ok": true,
            "bundle": args.bundle,
            "key_id": public.id().to_string(),
            "changed": changed,
            "signatures": signers,
        }),
    )
}
