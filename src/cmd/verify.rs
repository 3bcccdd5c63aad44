//! `ampoule verify`: the device's checks, run from the command line, with an optional unpack.

use ampoule_verify::{
    DEFAULT_MAX_BUNDLE_BYTES, DEFAULT_MAX_UNPACKED_BYTES, DocumentKind, Verifier,
};
use anyhow::Result;
use serde_json::json;

use crate::cli::VerifyArgs;
use crate::cmd::{
    load_trust_named, load_trust_set, metadata_policy, name_trusted, parse_version, policy_document,
};
use crate::failure::{bundle_error, count};
use crate::output::{Output, shown};

pub fn run(args: VerifyArgs, out: &Output) -> Result<()> {
    // With a trust set, its bundle keys and bundle threshold; with --trust, any one key.
    let (keys, threshold, trusted) = match &args.trust_set {
        Some(path) => {
            let (keys, threshold) = load_trust_set(path)?.keys_for(DocumentKind::Bundle);
            (keys, threshold, String::new())
        }
        None => {
            let (keys, trusted) = load_trust_named(&args.trust)?;
            (keys, 1, trusted)
        }
    };
    let mut verifier = match &args.app_version {
        Some(v) => Verifier::new(keys, parse_version(v, "--app-version")?)?,
        None => ampoule_verify::dangerous::verifier_without_app_version(keys)?,
    }
    .with_threshold(threshold)?;
    if let Some(v) = &args.installed {
        verifier = verifier.installed(parse_version(v, "--installed")?);
    }
    // --name and --max-size win over what the policy document sets.
    let document = policy_document(&args.require_meta)?;
    let (name, mut max_bundle, mut max_unpacked) = match document {
        Some(document) => {
            verifier = verifier.compatibility(document.compatibility);
            (
                args.name.clone().or(document.bundle_name),
                document
                    .max_bundle_bytes
                    .unwrap_or(DEFAULT_MAX_BUNDLE_BYTES),
                document
                    .max_unpacked_bytes
                    .unwrap_or(DEFAULT_MAX_UNPACKED_BYTES),
            )
        }
        None => (
            args.name.clone(),
            DEFAULT_MAX_BUNDLE_BYTES,
            DEFAULT_MAX_UNPACKED_BYTES,
        ),
    };
    if let Some(name) = name {
        verifier = verifier.require_name(name);
    }
    if let Some(policy) = metadata_policy(&args.require_meta)? {
        verifier = verifier.compatibility(policy);
    }
    if let Some(n) = args.max_size {
        (max_bundle, max_unpacked) = (n, n);
    }
    verifier = verifier
        .max_bundle_bytes(max_bundle)
        .max_unpacked_bytes(max_unpacked)
        .on_progress(out.verify_progress());
    let not_a_bundle = |e| bundle_error(&args.bundle, e);
    let mut verified = verifier
        .verify_path(&args.bundle)
        .map_err(|e| name_trusted(not_a_bundle(e), &trusted))?;
    let manifest = verified.manifest().clone();
    let signers: Vec<String> = verified.signers().iter().map(|k| k.to_string()).collect();
    let report = verified.signature_report().clone();
    let (labels, extracted) = match &args.extract {
        Some(dir) => {
            let unpacked = verified.unpack(dir).map_err(not_a_bundle)?;
            (unpacked.labels, Some(unpacked.dir))
        }
        None => (verified.check_contents().map_err(not_a_bundle)?, None),
    };
    let mut human = format!(
        "OK {} {}: signed by {} ({} needed); payload and {} match their digests; {}\n",
        shown(&manifest.name),
        manifest.version,
        signers.join(", "),
        threshold,
        count(manifest.files.len(), "file", "files"),
        count(labels.len(), "label", "labels")
    );
    match &args.app_version {
        Some(v) => human.push_str(&format!("app {v} is within {}\n", manifest.requires_app)),
        None => human.push_str(&format!(
            "app version not checked (no --app-version): the bundle requires {}\n",
            manifest.requires_app
        )),
    }
    let list = |ids: &[ampoule_verify::KeyId]| {
        ids.iter()
            .map(|k| k.to_string())
            .collect::<Vec<_>>()
            .join(", ")
    };
    if !report.invalid.is_empty() {
        human.push_str(&format!(
            "not counted, signature does not match this manifest: {}\n",
            list(&report.invalid)
        ));
    }
    if !report.untrusted.is_empty() {
        human.push_str(&format!(
            "not counted, key not trusted here: {}\n",
            list(&report.untrusted)
        ));
    }
    if let Some(dir) = &extracted {
        human.push_str(&format!("unpacked into {}\n", dir.display()));
    }
    out.result(
        &human,
        json!({
            "ok": true,
            "name": manifest.name,
            "version": manifest.version.to_string(),
            "signers": signers,
            "threshold": threshold,
            "untrusted_signers": report.untrusted.iter().map(|k| k.to_string()).collect::<Vec<_>>(),
            "invalid_signers": report.invalid.iter().map(|k| k.to_string()).collect::<Vec<_>>(),
            "requires_app": manifest.requires_app.to_string(),
            "app_version_checked": args.app_version.is_some(),
            "labels": labels,
            "extracted_to": extracted,
            "manifest": manifest,
        }),
    )
}
