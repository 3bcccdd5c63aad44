//! `ampoule diff`: what changed between two releases, with the changes that silently break
//! an app (reordered labels, changed tensors) called out first.

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::path::Path;

use ampoule_verify::bundle::Unverified;
use ampoule_verify::model::{ModelSignature, ValueSignature};
use ampoule_verify::{KeyId, Manifest};
use anyhow::{Context, Result};
use serde::Serialize;
use serde_json::{Value, json};

use crate::cli::{DiffArgs, FailOn};
use crate::failure::{Failure, Kind, bundle_error, count};
use crate::output::{Output, failed_report, shown};

/// One bundle as the diff sees it.
struct Side {
    manifest: Manifest,
    labels: Vec<String>,
    signers: BTreeSet<KeyId>,
    size: u64,
}

fn load(path: &Path) -> Result<Side> {
    let mut bundle = Unverified::open(path).map_err(|e| bundle_error(path, e))?;
    // The labels sit inside the payload; reading them means checking the whole payload.
    let labels = bundle
        .dangerous_check_contents()
        .map_err(|e| bundle_error(path, e))
        .with_context(|| format!("cannot read the labels of {}", path.display()))?;
    Ok(Side {
        signers: bundle
            .signatures
            .signatures
            .iter()
            .map(|s| s.key_id)
            .collect(),
        size: bundle.layout.file_len,
        manifest: bundle.manifest,
        labels,
    })
}

/// A label whose output index changed: every prediction of that class now means another.
#[derive(Serialize)]
struct Moved {
    label: String,
    old_index: usize,
    new_index: usize,
}

/// A tensor present in both signatures whose dtype or shape changed.
#[derive(Serialize)]
struct Changed {
    old: String,
    new: String,
}

#[derive(Serialize, Default)]
struct TensorDiff {
    added: Vec<String>,
    removed: Vec<String>,
    changed: Vec<Changed>,
}

fn tensor_diff(old: &[ValueSignature], new: &[ValueSignature]) -> TensorDiff {
    let mut diff = TensorDiff::default();
    for n in new {
        match old.iter().find(|o| o.name == n.name) {
            None => diff.added.push(n.to_string()),
            Some(o) if o != n => diff.changed.push(Changed {
                old: o.to_string(),
                new: n.to_string(),
            }),
            Some(_) => {}
        }
    }
    for o in old {
        if !new.iter().any(|n| n.name == o.name) {
            diff.removed.push(o.to_string());
        }
    }
    diff
}

fn moved_labels(old: &[String], new: &[String]) -> Vec<Moved> {
    let new_index: HashMap<&str, usize> = new
        .iter()
        .enumerate()
        .map(|(i, l)| (l.as_str(), i))
        .collect();
    old.iter()
        .enumerate()
        .filter_map(|(old_index, label)| {
            let &new_index = new_index.get(label.as_str())?;
            (new_index != old_index).then(|| Moved {
                label: label.clone(),
                old_index,
                new_index,
            })
        })
        .collect()
}

fn signature_parts(sig: Option<&ModelSignature>) -> (&[ValueSignature], &[ValueSignature]) {
    sig.map_or((&[], &[]), |s| (s.inputs.as_slice(), s.outputs.as_slice()))
}

fn signed_change(old: u64, new: u64) -> String {
    let delta = new as i128 - old as i128;
    if delta == 0 {
        format!("{new} (unchanged)")
    } else if old == 0 {
        format!("{old} -> {new}")
    } else {
        format!(
            "{old} -> {new} ({delta:+}, {:+.1}%)",
            delta as f64 * 100.0 / old as f64
        )
    }
}

pub fn run(args: DiffArgs, out: &Output) -> Result<()> {
    if crate::cmd::delta::is_delta(&args.old) || crate::cmd::delta::is_delta(&args.new) {
        if args.fail_on.is_some() {
            return Err(crate::failure::usage(anyhow::anyhow!(
                "--fail-on compares two releases, and a delta is not a release: give the \
                 bundles"
            )));
        }
        return crate::cmd::delta::diff(&args.old, &args.new, out);
    }
    let old = load(&args.old)?;
    let new = load(&args.new)?;
    let (om, nm) = (&old.manifest, &new.manifest);
    let added: Vec<&String> = new
        .labels
        .iter()
        .filter(|l| !old.labels.contains(l))
        .collect();
    let removed: Vec<&String> = old
        .labels
        .iter()
        .filter(|l| !new.labels.contains(l))
        .collect();
    let moved = moved_labels(&old.labels, &new.labels);
    let (old_in, old_out) = signature_parts(om.model.as_ref());
    let (new_in, new_out) = signature_parts(nm.model.as_ref());
    let inputs = tensor_diff(old_in, new_in);
    let outputs = tensor_diff(old_out, new_out);
    let model = model_changes(om.model.as_ref(), nm.model.as_ref());
    let params = |m: &Manifest| m.model.as_ref().map_or(0, |s| s.parameters);
    let signers_added: Vec<String> = new
        .signers
        .difference(&old.signers)
        .map(|k| k.to_string())
        .collect();
    let signers_removed: Vec<String> = old
        .signers
        .difference(&new.signers)
        .map(|k| k.to_string())
        .collect();

    let mut human = String::new();
    let mut line = |text: String| {
        human.push_str(&text);
        human.push('\n');
    };
    line(format!(
        "{} {} -> {} {}",
        shown(&om.name),
        om.version,
        shown(&nm.name),
        nm.version
    ));
    if !moved.is_empty() {
        line(format!(
            "WARNING: {} changed output index; an app that maps indices to labels itself will report the wrong species:",
            count(moved.len(), "label", "labels")
        ));
        for m in &moved {
            line(format!(
                "  '{}' moved from index {} to {}",
                shown(&m.label),
                m.old_index,
                m.new_index
            ));
        }
    }
    for (what, diff) in [("input", &inputs), ("output", &outputs)] {
        for c in &diff.changed {
            line(format!(
                "WARNING: {what} changed: {} -> {}",
                shown(&c.old.to_string()),
                shown(&c.new.to_string())
            ));
        }
        for a in &diff.added {
            line(format!("{what} added: {}", shown(&a.to_string())));
        }
        for r in &diff.removed {
            line(format!(
                "WARNING: {what} removed: {}",
                shown(&r.to_string())
            ));
        }
    }
    for change in &model {
        let mark = if change.breaking { "WARNING: " } else { "" };
        line(format!("{mark}{}", change.text));
    }
    let metadata = metadata_changes(om, nm);
    for change in &metadata {
        let mark = if change.breaking { "WARNING: " } else { "" };
        line(format!("{mark}{}", shown(&change.text())));
    }
    line(format!(
        "labels: {} -> {}; added: {}; removed: {}",
        old.labels.len(),
        new.labels.len(),
        if added.is_empty() {
            "none".to_string()
        } else {
            added
                .iter()
                .map(|l| format!("'{}'", shown(l)))
                .collect::<Vec<_>>()
                .join(", ")
        },
        if removed.is_empty() {
            "none".to_string()
        } else {
            removed
                .iter()
                .map(|l| format!("'{}'", shown(l)))
                .collect::<Vec<_>>()
                .join(", ")
        },
    ));
    line(format!(
        "parameters: {}",
        signed_change(params(om), params(nm))
    ));
    line(format!(
        "model bytes: {}",
        signed_change(om.model().size, nm.model().size)
    ));
    line(format!(
        "bundle bytes: {}",
        signed_change(old.size, new.size)
    ));
    if om.requires_app != nm.requires_app {
        line(format!(
            "requires app: {} -> {}",
            om.requires_app, nm.requires_app
        ));
    }
    if signers_added.is_empty() && signers_removed.is_empty() {
        line("signers: unchanged".to_string());
    } else {
        line(format!(
            "signers: added {}; removed {}",
            if signers_added.is_empty() {
                "none".into()
            } else {
                signers_added.join(", ")
            },
            if signers_removed.is_empty() {
                "none".into()
            } else {
                signers_removed.join(", ")
            },
        ));
    }
    line(
        "(signatures not checked: diff compares contents; use verify to check who signed)"
            .to_string(),
    );
    let mut breaking = breaking_changes(&moved, &removed, &inputs, &outputs);
    breaking.extend(model.iter().filter(|c| c.breaking).map(|c| c.text.clone()));
    breaking.extend(
        metadata
            .iter()
            .filter(|c| c.breaking)
            .map(MetadataChange::text),
    );
    let doc = json!({
            "ok": true,
            "breaking": breaking,
            "old": { "name": om.name, "version": om.version.to_string(), "bundle": args.old },
            "new": { "name": nm.name, "version": nm.version.to_string(), "bundle": args.new },
            "labels": {
                "old_count": old.labels.len(),
                "new_count": new.labels.len(),
                "added": added,
                "removed": removed,
                "reordered": moved,
            },
            "inputs": inputs,
            "outputs": outputs,
            "model": model,
            "metadata": metadata,
            "parameters": { "old": params(om), "new": params(nm) },
            "model_bytes": { "old": om.model().size, "new": nm.model().size },
            "bundle_bytes": { "old": old.size, "new": new.size },
            "requires_app": { "old": om.requires_app.to_string(), "new": nm.requires_app.to_string() },
            "signers": { "added": signers_added, "removed": signers_removed },
    });
    if args.fail_on != Some(FailOn::Breaking) || breaking.is_empty() {
        return out.result(&human, doc);
    }
    let message = format!(
        "{} {} -> {}: {} (--fail-on breaking)",
        nm.name,
        om.version,
        nm.version,
        count(breaking.len(), "breaking change", "breaking changes")
    );
    out.result(&human, failed_report(doc, &message, Kind::BreakingChange))?;
    Err(Failure::reported(Kind::BreakingChange, message))
}

/// A change of the model as a whole that an app's compatibility policy can refuse.
#[derive(Debug, Serialize)]
struct ModelChange {
    /// What changed, old -> new.
    text: String,
    /// Whether an app built for the old bundle may refuse or misread the new one.
    breaking: bool,
}

/// The model-wide changes a `CompatibilityPolicy` checks: the file format (a policy can
/// require one), the ONNX operator set (a policy can cap it: only a raise can cross the cap),
/// the recorded classifier (a policy naming it counts classes by it), and 8-bit against float
/// weights (a policy can require either); and newer reading rules, which a verifier that does
/// not know them refuses whatever its policy. Tensor names, dtypes and
/// shapes, and labels, are compared elsewhere.
fn model_changes(old: Option<&ModelSignature>, new: Option<&ModelSignature>) -> Vec<ModelChange> {
    let format = |s: Option<&ModelSignature>| s.map_or("opaque", |s| s.format.name());
    let mut changes = Vec::new();
    if format(old) != format(new) {
        changes.push(ModelChange {
            text: format!("model format changed: {} -> {}", format(old), format(new)),
            breaking: true,
        });
    }
    let (Some(old), Some(new)) = (old, new) else {
        return changes;
    };
    if old.opset != new.opset {
        let shown = |o: Option<u64>| o.map_or_else(|| "none".to_string(), |v| v.to_string());
        let raised = match (old.opset, new.opset) {
            (Some(a), Some(b)) => b > a,
            (None, Some(_)) => true,
            _ => false,
        };
        changes.push(ModelChange {
            text: format!(
                "operator set {}: {} -> {}",
                if raised { "raised" } else { "lowered" },
                shown(old.opset),
                shown(new.opset)
            ),
            breaking: raised,
        });
    }
    if new.rules > old.rules {
        changes.push(ModelChange {
            text: format!(
                "model read under newer rules: {} -> {} (verifiers that know only rules {} refuse it)",
                old.rules, new.rules, old.rules
            ),
            breaking: true,
        });
    }
    if old.classifier != new.classifier {
        let shown = |c: Option<&ampoule_verify::model::Classifier>| match c {
            None => "none recorded".to_string(),
            Some(c) => {
                let mut text = format!("'{}'", c.tensor);
                if let Some(dim) = c.dim {
                    text.push_str(&format!(" dimension {dim}"));
                }
                if let Some(shape) = &c.shape {
                    let dims: Vec<String> = shape.iter().map(u64::to_string).collect();
                    text.push_str(&format!(" [{}]", dims.join(", ")));
                }
                text
            }
        };
        changes.push(ModelChange {
            text: format!(
                "classifier changed: {} -> {}",
                shown(old.classifier.as_ref()),
                shown(new.classifier.as_ref())
            ),
            breaking: true,
        });
    }
    if old.weights_8bit != new.weights_8bit {
        let kind = |eight: bool| if eight { "8-bit" } else { "float" };
        changes.push(ModelChange {
            text: format!(
                "weights changed: {} -> {}",
                kind(old.weights_8bit),
                kind(new.weights_8bit)
            ),
            breaking: true,
        });
    }
    changes
}

/// One key of the signed metadata that differs between the bundles: added (no `old`),
/// removed (no `new`) or changed.
#[derive(Debug, Serialize)]
struct MetadataChange {
    key: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    old: Option<Value>,
    #[serde(skip_serializing_if = "Option::is_none")]
    new: Option<Value>,
    /// A change under `preprocess`: an app that prepares its input as the old bundle said
    /// feeds the new model input it was not trained on.
    breaking: bool,
}

impl MetadataChange {
    /// The change in one line, as text output and the `breaking` list show it.
    fn text(&self) -> String {
        let json = |v: &Value| v.to_string();
        match (&self.old, &self.new) {
            (None, Some(new)) => format!("metadata added: {} = {}", self.key, json(new)),
            (Some(old), None) => format!("metadata removed: {} = {}", self.key, json(old)),
            (Some(old), Some(new)) => format!(
                "metadata changed: {}: {} -> {}",
                self.key,
                json(old),
                json(new)
            ),
            (None, None) => format!("metadata unchanged: {}", self.key),
        }
    }
}

/// Every key that holds a value in either bundle's metadata and differs, in key order. Only
/// changes under `preprocess` are breaking; an app's policy may require other keys too, but
/// diff does not know the app.
fn metadata_changes(old: &Manifest, new: &Manifest) -> Vec<MetadataChange> {
    let leaves = |m: &Manifest| -> BTreeMap<String, Value> {
        m.metadata.as_ref().map_or_else(BTreeMap::new, |meta| {
            meta.leaves()
                .into_iter()
                .map(|(k, v)| (k, v.clone()))
                .collect()
        })
    };
    let (mut old, mut new) = (leaves(old), leaves(new));
    let keys: BTreeSet<String> = old.keys().chain(new.keys()).cloned().collect();
    keys.into_iter()
        .filter_map(|key| {
            let (o, n) = (old.remove(&key), new.remove(&key));
            (o != n).then(|| MetadataChange {
                breaking: key.starts_with("preprocess."),
                key,
                old: o,
                new: n,
            })
        })
        .collect()
}

/// The changes that make an app built for the old bundle misread the new one, as the README
/// lists them: a label that moved (every prediction of its index now means another class), a
/// label removed, and an input or output whose name, dtype or shape the app's code relies on.
fn breaking_changes(
    moved: &[Moved],
    removed: &[&String],
    inputs: &TensorDiff,
    outputs: &TensorDiff,
) -> Vec<String> {
    let mut found: Vec<String> = moved
        .iter()
        .map(|m| {
            format!(
                "label '{}' moved from index {} to {}",
                m.label, m.old_index, m.new_index
            )
        })
        .collect();
    found.extend(removed.iter().map(|l| format!("label '{l}' removed")));
    for (what, diff) in [("input", inputs), ("output", outputs)] {
        found.extend(
            diff.changed
                .iter()
                .map(|c| format!("{what} changed: {} -> {}", c.old, c.new)),
        );
        found.extend(diff.removed.iter().map(|r| format!("{what} removed: {r}")));
    }
    found
}
