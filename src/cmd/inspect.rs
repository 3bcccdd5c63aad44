//! `ampoule inspect`: what a bundle holds and who signed it, without unpacking it.

use std::io::{Read, Seek, SeekFrom};

use ampoule_verify::Digest;
use ampoule_verify::DocumentKind;
use ampoule_verify::ModelFormat;
use ampoule_verify::bundle::Unverified;
use ampoule_verify::format::limit;
use ampoule_verify::model::{TensorEntry, read_safetensors_tensors};
use ampoule_verify::signed::{SignedDocument, kind};
use anyhow::{Context, Result};
use serde_json::json;

use crate::cli::InspectArgs;
use crate::cmd::{load_trust, load_trust_set};
use crate::failure::bundle_error;
use crate::output::{Output, shown};

pub fn run(args: InspectArgs, out: &Output) -> Result<()> {
    if crate::cmd::delta::is_delta(&args.bundle) {
        return crate::cmd::delta::inspect(&args.bundle, out);
    }
    let (keys, threshold) = match &args.trust_set {
        Some(path) => load_trust_set(path)?.keys_for(DocumentKind::Bundle),
        None => (load_trust(&args.trust)?, 1),
    };
    let mut bundle = Unverified::open(&args.bundle).map_err(|e| bundle_error(&args.bundle, e))?;
    let payload_ok = bundle.check_payload();
    // A safetensors file has no inputs or outputs to show: its tensors are read from the
    // payload's model header, once the payload's digest matched the manifest.
    let tensors = match (
        &payload_ok,
        bundle.manifest.model.as_ref().map(|m| m.format),
    ) {
        (Ok(()), Some(ModelFormat::Safetensors)) => Some(safetensors_tensors(&mut bundle)?),
        _ => None,
    };
    let Unverified {
        layout,
        manifest,
        signatures,
        ..
    } = bundle;
    let report = SignedDocument::<kind::Manifest>::new(&layout.manifest, &signatures.signatures)?
        .tally(&keys);
    let m = &manifest;
    let mut human = format!(
        "bundle   {}\nname     {}\nversion  {}\ncreated  {}\nrequires app {}\nsize     {} bytes (manifest {} bytes, sha256 {})\npayload  {} bytes zstd, {} ({})\n",
        shown(&args.bundle.display().to_string()),
        shown(&m.name),
        m.version,
        m.created,
        m.requires_app,
        layout.file_len,
        layout.manifest.len(),
        Digest::of(&layout.manifest),
        m.payload.size,
        match (m.payload.sha256, m.chunk_count(), m.payload.chunk_bytes) {
            (Some(sha256), ..) => format!("sha256 {sha256}"),
            (None, Some(count), Some(bytes)) => format!(
                "{count} chunks of {bytes} bytes decoded, chunk list sha256 {}",
                m.payload
                    .chunks_sha256
                    .map(|d| d.to_string())
                    .unwrap_or_default()
            ),
            _ => "no digest".to_string(),
        },
        match &payload_ok {
            Ok(()) => "matches".to_string(),
            Err(e) => format!("DOES NOT MATCH: {e}"),
        },
    );
    for f in &m.files {
        human.push_str(&format!(
            "file     {:<16} {:>12} bytes  sha256 {}  ({:?})\n",
            shown(&f.path),
            f.size,
            f.sha256,
            f.role
        ));
    }
    human.push_str(&format!("labels   {}\n", m.label_count));
    match &m.model {
        Some(sig) => {
            human.push_str(&format!(
                "model    {}{}{}, {} parameters in {} weight tensors, weights {}\n",
                sig.format,
                sig.opset
                    .map(|o| format!(", opset {o}"))
                    .unwrap_or_default(),
                sig.producer
                    .as_ref()
                    .map(|p| format!(", made by {}", shown(p)))
                    .unwrap_or_default(),
                sig.parameters,
                sig.weight_tensors,
                if sig.weights_8bit {
                    "8-bit"
                } else {
                    "not 8-bit"
                },
            ));
            for v in &sig.inputs {
                human.push_str(&format!("input    {}\n", shown(&v.to_string())));
            }
            for v in &sig.outputs {
                human.push_str(&format!("output   {}\n", shown(&v.to_string())));
            }
            if let Some(c) = &sig.classifier {
                let mut line = format!("classes  counted on '{}'", shown(&c.tensor));
                if let Some(dim) = c.dim {
                    line.push_str(&format!(", dimension {dim}"));
                }
                if let Some(shape) = &c.shape {
                    let dims: Vec<String> = shape.iter().map(u64::to_string).collect();
                    line.push_str(&format!(", shape [{}]", dims.join(", ")));
                }
                human.push_str(&format!("{line}\n"));
            }
            if sig.rules > 1 {
                human.push_str(&format!(
                    "rules    model read under reading rules {} (FORMAT.md, the model object)\n",
                    sig.rules
                ));
            }
            for t in tensors.iter().flatten() {
                let shape: Vec<String> = t.shape.iter().map(u64::to_string).collect();
                human.push_str(&format!(
                    "tensor   {}: {} [{}]\n",
                    shown(&t.name),
                    t.dtype,
                    shape.join(", ")
                ));
            }
            for line in sig.size_report().to_string().lines() {
                human.push_str(&format!("weights  {line}\n"));
            }
        }
        None => human.push_str(
            "model    opaque (not a format ampoule reads; no tensor signature recorded)\n",
        ),
    }
    if let Some(metadata) = &m.metadata {
        for (key, value) in metadata.leaves() {
            human.push_str(&format!("metadata {key} = {}\n", shown(&value.to_string())));
        }
    }
    if !keys.is_empty() {
        human.push_str(&format!(
            "signed   {} valid of {threshold} needed{}\n",
            report.valid.len(),
            if report.valid.len() >= threshold {
                ""
            } else {
                "  NOT ENOUGH"
            }
        ));
    }
    if signatures.signatures.is_empty() {
        human.push_str("signers  none: this bundle is UNSIGNED\n");
    }
    for s in &signatures.signatures {
        let status = if keys.is_empty() {
            "not checked (no --trust or --trust-set given)"
        } else if report.valid.contains(&s.key_id) {
            "valid, trusted"
        } else if report.invalid.contains(&s.key_id) {
            "INVALID for this manifest"
        } else {
            "key not trusted here"
        };
        human.push_str(&format!("signer   {}  {status}\n", s.key_id));
    }
    out.result(
        &human,
        json!({
            "ok": true,
            "bundle": args.bundle,
            "size": layout.file_len,
            "manifest_sha256": Digest::of(&layout.manifest),
            "payload_matches": payload_ok.is_ok(),
            "threshold": (!keys.is_empty()).then_some(threshold),
            "threshold_met": (!keys.is_empty()).then_some(report.valid.len() >= threshold),
            "payload_error": payload_ok.err().map(|e| e.to_string()),
            "signatures": signatures.signatures.iter().map(|s| {
                json!({
                    "key_id": s.key_id.to_string(),
                    "status": if keys.is_empty() { "unchecked" }
                        else if report.valid.contains(&s.key_id) { "valid" }
                        else if report.invalid.contains(&s.key_id) { "invalid" }
                        else { "untrusted" },
                })
            }).collect::<Vec<_>>(),
            "size_report": m.model.as_ref().map(|s| s.size_report()),
            "tensors": tensors,
            "manifest": m,
        }),
    )
}

/// The tensors of the bundle's safetensors model: its header, read from the decompressed
/// payload's first entry (the model), within the format's window and size caps.
fn safetensors_tensors(bundle: &mut Unverified) -> Result<Vec<TensorEntry>> {
    let (offset, len) = (bundle.layout.payload_offset, bundle.layout.payload_len);
    let size = bundle.manifest.model().size;
    let file = bundle.file_mut();
    file.seek(SeekFrom::Start(offset))
        .context("cannot read the bundle's payload")?;
    let mut decoder = zstd::Decoder::new(file.take(len)).context("cannot read the payload")?;
    decoder
        .window_log_max(limit::WINDOW_LOG)
        .context("cannot read the payload")?;
    let mut header = [0u8; 512];
    decoder
        .read_exact(&mut header)
        .context("cannot read the payload's first tar header")?;
    Ok(read_safetensors_tensors(decoder.take(size), size)?)
}
