//! `ampoule demo`: the trail-camera story, end to end, on generated data.
//!
//! A wildlife-survey team (invented) runs solar trail cameras in a forest reserve. The demo
//! makes a demo-only release key, packs a species classifier as v1.0.0 and v1.1.0 (which adds
//! a species), checks both the way a camera would, and shows the refusals that protect the
//! cameras: a label list that does not fit the model, a replayed older model, a tampered copy,
//! a model the camera's code cannot feed, a bundle signed by a stranger.

use std::path::{Path, PathBuf};

use ampoule_verify::model::{DType, TensorSpec, read_model_signature_file};
use ampoule_verify::{CompatibilityPolicy, PublicKey, Timestamp, TrustedKeys, Verifier};
use anyhow::{Context, Result, bail};
use semver::{Version, VersionReq};
use serde_json::{Value, json};

use crate::cli::DemoArgs;
use crate::keyfile;
use crate::output::Output;
use crate::pack::{PackSpec, pack};
use crate::synth;

/// The species the first model knows, in output-index order (invented survey classes).
const SPECIES_V1: [&str; 6] = [
    "fox",
    "roe deer",
    "wild boar",
    "badger",
    "hare",
    "empty frame",
];
/// The species added in v1.1.0.
const NEW_SPECIES: &str = "pine marten";
/// Hidden units of the demo classifier: about 8 MiB of float32 weights, large enough to show
/// streaming, small enough to run in seconds.
const HIDDEN: u64 = 76;
/// The cameras' input: 96 × 96 RGB frames.
const SIDE: u64 = 96;
/// The cameras' app version, and the range the bundles require.
const APP_VERSION: &str = "2.3.0";
const REQUIRES_APP: &str = ">=2.0.0, <3.0.0";
/// A fixed creation time so that the demo's bundles are the same on every run.
const CREATED: &str = "2026-12-01T06:00:00Z";

/// The demo's steps, printed as they happen and collected for `--json`.
struct Story<'a> {
    out: &'a Output,
    steps: Vec<Value>,
}

impl Story<'_> {
    fn tell(&mut self, step: &str, text: String, detail: Value) {
        if !self.out.json() {
            println!("{:>2}. {text}", self.steps.len() + 1);
        }
        self.steps
            .push(json!({ "step": step, "text": text, "detail": detail }));
    }
}

/// Where the demo works: the given directory (kept), or a temporary one (removed at the end).
enum Workdir {
    Kept(PathBuf),
    Temporary(tempfile::TempDir),
}

impl Workdir {
    fn path(&self) -> &Path {
        match self {
            Workdir::Kept(p) => p,
            Workdir::Temporary(t) => t.path(),
        }
    }
}

pub fn run(args: DemoArgs, out: &Output) -> Result<()> {
    let work = match args.dir {
        Some(dir) => {
            if std::fs::symlink_metadata(&dir).is_ok() {
                bail!(
                    "{} already exists; give --dir a new directory so the demo cannot mix with other files",
                    dir.display()
                );
            }
            std::fs::create_dir_all(&dir)
                .with_context(|| format!("cannot create {}", dir.display()))?;
            Workdir::Kept(dir)
        }
        None => {
            Workdir::Temporary(tempfile::tempdir().context("cannot create a temporary directory")?)
        }
    };
    let dir = work.path();
    if !out.json() {
        println!(
            "ampoule demo: trail cameras in a forest reserve (invented data) in {}",
            dir.display()
        );
    }
    let mut story = Story {
        out,
        steps: Vec::new(),
    };

    let key = keyfile::generate_key();
    let public = PublicKey::from_verifying_key(&key.verifying_key())?;
    keyfile::write_secret_key(&dir.join("release.secret.pem"), &key, None)?;
    keyfile::write_public_key(&dir.join("release.public.pem"), &public)?;
    story.tell(
        "keygen",
        format!(
            "made a demo-only release key {} (release.secret.pem, owner-only)",
            public.id()
        ),
        json!({ "key_id": public.id().to_string() }),
    );

    let created: Timestamp = CREATED.parse()?;
    let requires_app = VersionReq::parse(REQUIRES_APP)?;
    let mut bundles = Vec::new();
    let species = |extra: Option<&str>| -> Vec<String> {
        SPECIES_V1
            .iter()
            .copied()
            .chain(extra)
            .map(str::to_string)
            .collect()
    };
    for (version, seed, extra) in [("1.0.0", 1, None), ("1.1.0", 2, Some(NEW_SPECIES))] {
        let labels = species(extra);
        let model = dir.join(format!("species-{version}.onnx"));
        synth::write_onnx_classifier(&model, SIDE, HIDDEN, labels.len() as u64, seed)?;
        let spec = model_spec(&model, labels, version, &requires_app, created)?;
        let path = dir.join(format!("species-{version}.ampoule"));
        let packed = pack(&spec, Some(&key), &path, &indicatif::ProgressBar::hidden())?;
        story.tell(
            "pack",
            format!(
                "packed trailcam-species {version}: {} labels{}, model {:.1} MiB ({} parameters) -> bundle {:.1} MiB, signed",
                packed.manifest.label_count,
                extra.map(|s| format!(" (adds '{s}')")).unwrap_or_default(),
                mib(packed.manifest.model().size),
                packed.manifest.model.as_ref().map_or(0, |m| m.parameters),
                mib(packed.bundle_len)
            ),
            json!({ "bundle": path, "size": packed.bundle_len, "manifest": packed.manifest }),
        );
        bundles.push(path);
    }

    let mismatch = model_spec(
        &dir.join("species-1.1.0.onnx"),
        species(None),
        "1.1.1",
        &requires_app,
        created,
    )?
    .model_signature
    .context("the demo model has a signature")?
    .check_label_count(None, SPECIES_V1.len());
    refusal(
        &mut story,
        "labels",
        "packing the 7-class model with last season's 6 labels",
        mismatch,
    )?;

    let trusted: TrustedKeys = [public.clone()].into_iter().collect();
    let camera = Verifier::new(trusted.clone(), Version::parse(APP_VERSION)?)?
        .require_name("trailcam-species")
        .compatibility(camera_policy()?);
    let camera_dir = dir.join("camera");
    std::fs::create_dir_all(&camera_dir)?;

    let unpacked = camera
        .verify_path(&bundles[0])?
        .unpack(&camera_dir.join("model-1.0.0"))?;
    story.tell(
        "install",
        format!(
            "camera (app {APP_VERSION}) checked v1.0.0 and unpacked it: {} species",
            unpacked.labels.len()
        ),
        json!({ "version": "1.0.0", "dir": unpacked.dir }),
    );

    let unpacked = camera
        .clone()
        .installed(Version::new(1, 0, 0))
        .verify_path(&bundles[1])?
        .unpack(&camera_dir.join("model-1.1.0"))?;
    story.tell(
        "update",
        format!(
            "camera accepted v1.1.0 over v1.0.0: now knows '{}'",
            unpacked
                .labels
                .last()
                .map(String::as_str)
                .unwrap_or_default()
        ),
        json!({ "version": "1.1.0", "dir": unpacked.dir }),
    );

    let replay = camera
        .clone()
        .installed(Version::new(1, 1, 0))
        .verify_path(&bundles[0]);
    refusal(
        &mut story,
        "replay",
        "an old v1.0.0 bundle replayed to a camera on v1.1.0",
        replay,
    )?;

    let tampered = dir.join("species-1.1.0-tampered.ampoule");
    std::fs::copy(&bundles[1], &tampered)?;
    flip_byte(&tampered, 4096)?;
    let result = camera
        .clone()
        .installed(Version::new(1, 0, 0))
        .verify_path(&tampered)
        .and_then(|mut v| v.check_contents().map(|_| v));
    refusal(
        &mut story,
        "tamper",
        "a copy of v1.1.0 with one payload byte flipped",
        result,
    )?;

    let big = dir.join("species-1.2.0-128px.onnx");
    synth::write_onnx_classifier(&big, 128, 8, 7, 3)?;
    let spec = model_spec(
        &big,
        species(Some(NEW_SPECIES)),
        "1.2.0",
        &requires_app,
        created,
    )?;
    let wrong_input = dir.join("species-1.2.0.ampoule");
    pack(
        &spec,
        Some(&key),
        &wrong_input,
        &indicatif::ProgressBar::hidden(),
    )?;
    let result = camera
        .clone()
        .installed(Version::new(1, 1, 0))
        .verify_path(&wrong_input);
    refusal(
        &mut story,
        "incompatible",
        "a validly signed v1.2.0 retrained on 128 x 128 frames",
        result,
    )?;

    let stranger = keyfile::generate_key();
    let forged = dir.join("species-9.9.9-forged.ampoule");
    let spec = model_spec(
        &big,
        species(Some(NEW_SPECIES)),
        "9.9.9",
        &requires_app,
        created,
    )?;
    pack(
        &spec,
        Some(&stranger),
        &forged,
        &indicatif::ProgressBar::hidden(),
    )?;
    let result = camera.verify_path(&forged);
    refusal(
        &mut story,
        "forgery",
        "a v9.9.9 bundle signed by a key the cameras do not trust",
        result,
    )?;

    if let Workdir::Kept(path) = &work
        && !out.json()
    {
        println!("everything the demo made is in {}", path.display());
    }
    if out.json() {
        out.result("", json!({ "ok": true, "dir": dir, "steps": story.steps }))?;
    }
    Ok(())
}

/// What the camera app's code feeds and reads: 96 x 96 RGB float frames in, one score per
/// species out, and an "empty frame" class it relies on to skip frames.
fn camera_policy() -> Result<CompatibilityPolicy> {
    Ok(CompatibilityPolicy::builder()
        .input(
            TensorSpec::new("image")
                .dtype(DType::Float32)
                .shape("[*, 3, 96, 96]".parse()?),
        )
        .output(TensorSpec::new("species").dtype(DType::Float32))
        .classifier_output("species")
        .label_count(2..=64)
        .require_label("empty frame")
        .build()?)
}

/// What to pack for one demo release: the model, its labels, and the recorded signature.
fn model_spec(
    model: &Path,
    labels: Vec<String>,
    version: &str,
    requires_app: &VersionReq,
    created: Timestamp,
) -> Result<PackSpec> {
    Ok(PackSpec {
        model: model.to_path_buf(),
        model_path: "model.onnx".into(),
        labels,
        name: "trailcam-species".into(),
        version: Version::parse(version)?,
        requires_app: requires_app.clone(),
        created,
        model_signature: read_model_signature_file(model)?,
    })
}

fn mib(bytes: u64) -> f64 {
    bytes as f64 / (1024.0 * 1024.0)
}

/// Records an expected refusal; a demo whose attack was accepted is a failed demo.
fn refusal<T>(
    story: &mut Story<'_>,
    step: &str,
    what: &str,
    result: ampoule_verify::Result<T>,
) -> Result<()> {
    match result {
        Ok(_) => bail!("the demo expected {what} to be refused, but it was accepted"),
        Err(e) => {
            story.tell(
                step,
                format!("refused {what}: {e}"),
                json!({ "error": e.to_string() }),
            );
            Ok(())
        }
    }
}

/// Flips one bit of the byte `from_end` bytes before the end of the payload region.
fn flip_byte(path: &Path, from_end: u64) -> Result<()> {
    use std::io::{Read, Seek, SeekFrom, Write};
    let mut f = std::fs::OpenOptions::new()
        .read(true)
        .write(true)
        .open(path)?;
    let len = f.metadata()?.len();
    let at = len.saturating_sub(from_end);
    let mut byte = [0u8; 1];
    f.seek(SeekFrom::Start(at))?;
    f.read_exact(&mut byte)?;
    byte[0] ^= 0x01;
    f.seek(SeekFrom::Start(at))?;
    f.write_all(&byte)?;
    Ok(())
}
