//! `ampoule pack`: validates the inputs once, then writes the bundle in one pass; with
//! `--delta-from`, also the delta from an older bundle to it (issue 13).

use std::io::Read;
use std::path::{Path, PathBuf};

use ampoule_verify::bundle::Unverified;
use ampoule_verify::format::delta as delta_format;
use ampoule_verify::format::delta_file::base_id;
use ampoule_verify::format::{BUNDLE_EXTENSION, limit};
use ampoule_verify::manifest::{Manifest, check_name, model_path};
use ampoule_verify::metadata::{self, Metadata, MetadataBuilder};
use ampoule_verify::model::{ModelSignature, read_model_signature_for_pack};
use ampoule_verify::{Timestamp, labels};
use anyhow::{Context, Result, bail};
use semver::{Version, VersionReq};
use serde_json::{Value, json};

use crate::cli::PackArgs;
use crate::cmd::{parse_version, passphrase_source};
use crate::failure::{count, usage};
use crate::output::Output;
use crate::release::files::read_bounded;
use crate::release::pack::{PackSpec, pack};
use crate::release::{delta, keyfile};

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

/// `--delta-from OLD`, checked before anything is packed: OLD's manifest (a bundle of the same
/// name and an older version) and where the delta goes, beside `out` as
/// `<out without .ampoule>-from-<old version>.ampoule-delta`, which must not exist.
fn delta_from(
    old: &Path,
    name: &str,
    version: &Version,
    out: &Path,
) -> Result<(Manifest, PathBuf)> {
    let base = Unverified::open(old)
        .map_err(|e| crate::failure::bundle_error(old, e))
        .with_context(|| format!("--delta-from {} refused; nothing was packed", old.display()))?
        .manifest;
    if base.name != name {
        return Err(usage(anyhow::anyhow!(
            "--delta-from {} is bundle '{}', not '{name}'; a delta rebuilds a release of the same \
             bundle from an older one (nothing was packed)",
            old.display(),
            base.name
        )));
    }
    if !base.version.cmp_precedence(version).is_lt() {
        return Err(usage(anyhow::anyhow!(
            "--delta-from {} is {name} {}, not older than {version}; a delta leads from an older \
             release to a newer one (nothing was packed)",
            old.display(),
            base.version
        )));
    }
    let file = out
        .file_name()
        .map(|f| f.to_string_lossy())
        .unwrap_or_default();
    let stem = file
        .strip_suffix(&format!(".{BUNDLE_EXTENSION}"))
        .unwrap_or(&file);
    let path = out.with_file_name(format!(
        "{stem}-from-{}.{}",
        base.version,
        delta_format::EXTENSION
    ));
    if path.exists() {
        return Err(usage(anyhow::anyhow!(
            "{} exists already; remove it or choose another -o (nothing was packed)",
            path.display()
        )));
    }
    Ok((base, path))
}

pub fn run(args: PackArgs, out: &Output) -> Result<()> {
    check_name(&args.name).map_err(usage)?;
    let version = parse_version(&args.version, "--version")?;
    let delta = match &args.delta_from {
        Some(old) => Some(delta_from(old, &args.name, &version, &args.out)?),
        None => None,
    };
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
        model: args.model.clone(),
        labels,
        name: args.name.clone(),
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
    let delta = match (delta, &args.delta_from) {
        (Some((base, path)), Some(old)) => {
            let (text, doc) = write_delta(old, &base, &args.out, &path, m, packed.bundle_len)?;
            human.push_str(&text);
            doc
        }
        _ => Value::Null,
    };
    out.result(
        &human,
        json!({
            "ok": true,
            "bundle": args.out,
            "bundle_size": packed.bundle_len,
            "signed": !packed.signers.is_empty(),
            "signers": packed.signers.iter().map(|k| k.to_string()).collect::<Vec<_>>(),
            "manifest": m,
            "delta": delta,
        }),
    )
}

/// Writes the delta from `old` (whose manifest is `base`) to the bundle just packed at
/// `bundle`, to `path`; returns its lines of text and its `--json` object. A new release with
/// the same files as `old` needs no delta, and gets none. If making it fails, the bundle is
/// removed too, so that the command leaves both or neither.
fn write_delta(
    old: &Path,
    base: &Manifest,
    bundle: &Path,
    path: &Path,
    target: &Manifest,
    bundle_len: u64,
) -> Result<(String, Value)> {
    let base_files = base_id(&base.files);
    if base_files == base_id(&target.files) {
        return Ok((
            format!(
                "no delta: {} holds the same files as the new release; a device on {} {} has \
                 them already\n",
                old.display(),
                base.name,
                base.version
            ),
            Value::Null,
        ));
    }
    let made = match delta::make(old, bundle, path) {
        Ok(made) => made,
        Err(e) => {
            let removed = std::fs::remove_file(bundle).is_ok();
            let what = if removed {
                format!("{} was removed again", bundle.display())
            } else {
                format!("{} is left; remove it", bundle.display())
            };
            return Err(e.context(format!(
                "cannot make the delta from {} ({what}); pack again, or make the delta later \
                 with 'ampoule delta --from {} BUNDLE -o OUT'",
                old.display(),
                old.display()
            )));
        }
    };
    let percent = made.size as f64 * 100.0 / bundle_len.max(1) as f64;
    let mut text = format!(
        "delta {} from {} {} (base {}): {} bytes, {percent:.2}% of the bundle, sha256 {}\n",
        path.display(),
        base.name,
        base.version,
        made.header.base_id(),
        made.size,
        made.sha256
    );
    if !crate::release::tree_deltas::kept(made.size, bundle_len) {
        text.push_str(&format!(
            "note: publish would not offer this delta: it offers only deltas of at most {}% of \
             the bundle\n",
            crate::release::tree_deltas::MAX_SHARE_PERCENT
        ));
    }
    Ok((
        text,
        json!({
            "path": path,
            "size": made.size,
            "sha256": made.sha256,
            "base": made.header.base_id(),
            "from": {"name": base.name, "version": base.version.to_string(), "bundle": old},
            "chunks": made.header.records,
            "copied_chunks": made.copies,
        }),
    ))
}
