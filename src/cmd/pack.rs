//! `ampoule pack`: validates the inputs once, then writes the bundle in one pass.

use std::io::Read;
use std::path::Path;

use ampoule_verify::format::limit;
use ampoule_verify::manifest::{check_name, model_path};
use ampoule_verify::metadata::{self, Metadata, MetadataBuilder};
use ampoule_verify::model::{ModelSignature, read_model_signature_for_pack};
use ampoule_verify::{Timestamp, labels};
use anyhow::{Context, Result, bail};
use semver::VersionReq;
use serde_json::json;

use crate::cli::PackArgs;
use crate::cmd::{parse_version, passphrase_source};
use crate::failure::{count, usage};
use crate::output::Output;
use crate::release::files::read_bounded;
use crate::release::keyfile;
use crate::release::pack::{PackSpec, pack};

/// The creation time: `--created`, else `SOURCE_DATE_EPOCH` (reproducible-builds.org's
/// convention for build timestamps), else now.
pub fn creation_time(flag: Option<&str>) -> Result<Timestamp> {
    let (text, source) = match flag {
        Some(t) => (t.to_string(), "--created"),
        None => match std::env::var("SOURCE_DATE_EPOCH") {
            Ok(t) => (t, "SOURCE_DATE_EPOCH"),
            Err(_) => return Ok(Timestamp::now()),
        },
    };
    if !text.is_empty() && text.bytes().all(|b| b.is_ascii_digit()) {
        return text
            .parse::<u64>()
            .ok()
            .and_then(Timestamp::from_unix)
            .with_context(|| format!("{source} '{text}' is not a Unix time up to year 9999"));
    }
    text.parse::<Timestamp>().map_err(usage).with_context(|| {
        format!("{source} '{text}' is not Unix seconds or a UTC time like 2026-12-01T08:00:00Z")
    })
}

/// Reads a label file, refusing one too large to be a label list before reading it whole.
pub fn read_labels(path: &Path) -> Result<Vec<String>> {
    let file = std::fs::File::open(path)
        .with_context(|| format!("cannot open label list {}", path.display()))?;
    let mut bytes = Vec::new();
    file.take(limit::LABELS_FILE_BYTES + 1)
        .read_to_end(&mut bytes)
        .with_context(|| format!("cannot read label list {}", path.display()))?;
    if bytes.len() as u64 > limit::LABELS_FILE_BYTES {
        bail!(
            "label list {} is over {} bytes; that is not a label list",
            path.display(),
            limit::LABELS_FILE_BYTES
        );
    }
    labels::parse_labels(&bytes).with_context(|| format!("label list {} refused", path.display()))
}

/// The model's name inside the payload, from its file extension (`bin` when it has none).
fn inner_model_path(model: &Path) -> Result<String> {
    let ext = model
        .extension()
        .map(|e| e.to_string_lossy().to_ascii_lowercase())
        .unwrap_or_else(|| "bin".into());
    model_path(&ext).with_context(|| {
        format!(
            "model file extension '{ext}' is not usable: rename the file to end in 1 to {} ASCII letters or digits (like .onnx)",
            limit::MODEL_EXTENSION_CHARS
        )
    })
}

/// Refuses a label list whose length differs from the classifier output's class count,
/// unless `--allow-label-mismatch` says the engineer knows.
fn check_labels_fit(
    signature: &ModelSignature,
    labels: &[String],
    args: &PackArgs,
    out: &Output,
) -> Result<()> {
    let output = args.classifier_output.as_deref();
    let dim = args.class_dim;
    match signature.class_count(output, dim) {
        Ok(_) => match signature.check_label_count(output, dim, labels.len()) {
            Ok(()) => Ok(()),
            Err(e) if args.allow_label_mismatch => {
                out.note(&format!(
                    "warning: {e} (packed anyway: --allow-label-mismatch)"
                ));
                Ok(())
            }
            Err(e) => Err(anyhow::Error::new(e).context(
                "label list refused; fix the label file, or pass --allow-label-mismatch if the \
                 model really has a different number of outputs than labels",
            )),
        },
        Err(e) if output.is_some() || dim.is_some() => Err(e.into()),
        Err(e) => {
            out.note(&format!(
                "label count not checked against the model: {e} (use --classifier-output NAME, \
                 and --class-dim N when the shape does not say which dimension counts classes)"
            ));
            Ok(())
        }
    }
}

/// The largest `--meta-file` read: the metadata itself is capped at 16 KiB as compact JSON,
/// and this leaves room for indentation and white space around it.
const META_FILE_BYTES: u64 = 256 * 1024;

/// The signed metadata from `--meta-file` (each file in turn) and `--meta`, checked as a
/// device checks it; `None` when neither was given, so the manifest has no metadata field.
fn read_metadata(args: &PackArgs) -> Result<Option<Metadata>> {
    let mut builder = MetadataBuilder::new();
    for path in &args.meta_file {
        let text = read_bounded(path, META_FILE_BYTES, "a metadata file")?;
        builder
            .add_json(&text)
            .map_err(usage)
            .with_context(|| format!("--meta-file {} refused", path.display()))?;
    }
    for pair in &args.meta {
        let Some((key, value)) = pair.split_once('=') else {
            return Err(usage(anyhow::anyhow!(
                "--meta '{pair}' is not KEY=VALUE, like data.snapshot=2026-11-30"
            )));
        };
        if !metadata::takes_string(key) {
            return Err(usage(anyhow::anyhow!(
                "--meta {key}=... sets a string, but {key} is a documented key that holds numbers \
                 (or is an object); set it in --meta-file, like {{\"eval\": {{\"top1\": 0.91}}}}"
            )));
        }
        builder
            .set_string(key, value)
            .map_err(usage)
            .with_context(|| format!("--meta {key}=... refused"))?;
    }
    builder.build().map_err(usage).context("metadata refused")
}

pub fn run(args: PackArgs, out: &Output) -> Result<()> {
    check_name(&args.name).map_err(usage)?;
    let version = parse_version(&args.version, "--version")?;
    let requires_app = VersionReq::parse(&args.requires_app).with_context(|| {
        format!(
            "--requires-app '{}' is not a SemVer requirement such as '>=2.0.0, <3.0.0'",
            args.requires_app
        )
    })?;
    let created = creation_time(args.created.as_deref())?;
    let metadata = read_metadata(&args)?;
    let labels = read_labels(&args.labels)?;
    let model_len = std::fs::metadata(&args.model)
        .with_context(|| format!("cannot read model {}", args.model.display()))?
        .len();
    let model_signature = read_model_signature_for_pack(
        &args.model,
        args.classifier_output.as_deref(),
        args.class_dim,
    )
    .with_context(|| {
        format!(
            "cannot read the model's signature from {}",
            args.model.display()
        )
    })?;
    match &model_signature {
        Some(signature) => check_labels_fit(signature, &labels, &args, out)?,
        None if args.classifier_output.is_some() || args.class_dim.is_some() => {
            return Err(usage(anyhow::anyhow!(
                "--classifier-output and --class-dim need a model ampoule reads (.onnx or \
                 .safetensors); {} is packed as an opaque file",
                args.model.display()
            )));
        }
        None => {}
    }
    let spec = PackSpec {
        model_path: inner_model_path(&args.model)?,
        model: args.model,
        labels,
        name: args.name,
        version,
        requires_app,
        created,
        model_signature,
        metadata,
    };
    let key = match &args.key {
        Some(path) => Some(keyfile::read_secret_key(
            path,
            &passphrase_source(&args.passphrase),
        )?),
        None => None,
    };
    let bar = out.bar(model_len, "packing");
    let packed = pack(&spec, key.as_ref(), &args.out, &bar)?;
    bar.finish_and_clear();
    let m = &packed.manifest;
    let mut human = format!(
        "packed {} {} -> {} ({} bytes; model {} bytes, {}, payload {} bytes)\n",
        m.name,
        m.version,
        args.out.display(),
        packed.bundle_len,
        m.model().size,
        count(m.label_count, "label", "labels"),
        m.payload.size
    );
    if let Some(metadata) = &m.metadata {
        let keys: Vec<String> = metadata.leaves().into_iter().map(|(k, _)| k).collect();
        human.push_str(&format!(
            "metadata {} signed in the manifest: {}\n",
            count(keys.len(), "key", "keys"),
            keys.join(", ")
        ));
    }
    match packed.signers.first() {
        Some(id) => {
            let file = args.key.as_deref().map(|k| format!(" ({})", k.display()));
            human.push_str(&format!("signed by key {id}{}\n", file.unwrap_or_default()));
        }
        None => human.push_str(
            "UNSIGNED: no --key was given, so every device will refuse this bundle until it is signed with 'ampoule sign'\n",
        ),
    }
    out.result(
        &human,
        json!({
            "ok": true,
            "bundle": args.out,
            "bundle_size": packed.bundle_len,
            "signed": !packed.signers.is_empty(),
            "signers": packed.signers.iter().map(|k| k.to_string()).collect::<Vec<_>>(),
            "manifest": m,
        }),
    )
}
