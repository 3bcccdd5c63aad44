//! `ampoule sign`: adds one signer's signature to a bundle, checking the whole bundle under
//! the new signature before the original file is replaced. The signature comes from a secret
//! key file, or from an outside signer that was given the exported request.

use std::fs::File;

use ampoule_verify::TrustedKeys;
use ampoule_verify::bundle::Unverified;
use ampoule_verify::format::{context, limit, signed_bytes};
use anyhow::{Context, Result, bail};
use serde_json::json;

use crate::cli::SignArgs;
use crate::cmd::external::{ToSign, key_named, signature, write_file};
use crate::failure::{bundle_error, count};
use crate::output::Output;
use crate::release::pack::rewrite_signatures;

pub fn run(args: SignArgs, out: &Output) -> Result<()> {
    let mut bundle = Unverified::open(&args.bundle).map_err(|e| bundle_error(&args.bundle, e))?;
    let manifest = bundle.manifest.clone();
    let layout = bundle.layout.clone();
    let mut signatures = bundle.signatures.clone();
    if let Some(request) = &args.signer.export_request {
        write_file(
            request,
            &signed_bytes(context::MANIFEST, &layout.manifest),
            false,
        )?;
        let human = format!(
            "wrote the signing request for {} {} to {}; sign exactly these bytes with Ed25519, then \
             attach the raw 64-byte signature with 'ampoule sign {} --attach SIG --pubkey PUB.pem'",
            manifest.name,
            manifest.version,
            request.display(),
            args.bundle.display()
        );
        return out.result(
            &human,
            json!({ "ok": true, "bundle": args.bundle, "request": request }),
        );
    }
    let (entry, public) = signature(
        &args.signer,
        &ToSign {
            what: "bundle's manifest",
            context: context::MANIFEST,
            document: &layout.manifest,
            file: &args.bundle,
            command: "ampoule sign",
            noun: "bundle",
        },
    )?;
    let changed = signatures.insert(entry);
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
            ampoule_verify::dangerous::verifier_without_app_version(own_key.clone())?
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
            "signed {summary} in {} with key {}; it now carries {}",
            args.bundle.display(),
            key_named(&args.signer, &public),
            count(signers.len(), "signature", "signatures")
        )
    } else {
        format!(
            "{} is already signed by key {}; nothing changed",
            args.bundle.display(),
            key_named(&args.signer, &public)
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
