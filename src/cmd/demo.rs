//! `ampoule demo`: the trail-camera story, end to end, on generated data.
//!
//! A wildlife-survey team (invented) runs solar trail cameras in a forest reserve. The demo
//! makes a demo-only release key, packs a species classifier as v1.0.0 and v1.1.0 (which adds
//! a species), publishes them on a channel of a release tree served from this process, and
//! lets two cameras update through their on-device stores: v1.0.0 for both, v1.1.0 at a 50%
//! rollout for one of them. It shows the refusals that protect the cameras: a label list that
//! does not fit the model, a replayed older bundle, a bundle tampered with on the server, a
//! replayed older feed, a model the camera's code cannot feed, a bundle signed by a stranger;
//! and what a camera does when the channel is withdrawn (it keeps its model). The cameras run
//! on a trust set shipped with their app, so the keys can change without an app update: the
//! team adds a field-laptop key through the feed, and when that laptop goes missing, revokes
//! it again, and the cameras refuse what it signed in the same update that revokes it.

use std::path::{Path, PathBuf};

use ampoule_verify::digest::hash_reader;
use ampoule_verify::feed::rollout_bucket;
use ampoule_verify::fetch::Transfer;
use ampoule_verify::format::BUNDLE_EXTENSION;
use ampoule_verify::model::{PolicyDocument, read_model_signature_file};
use ampoule_verify::signature::SignatureEntry;
use ampoule_verify::trust::{KeyEntry, Thresholds, TrustSetBody};
use ampoule_verify::{
    App, Device, Digest, DocumentKind, Outcome, PublicKey, Report, Store, Timestamp, Trust,
    TrustSetFile, TrustedKeys, Verifier, dangerous, in_rollout,
};
use anyhow::{Context, Result, bail};
use semver::{Version, VersionReq};
use serde_json::{Value, json};

use crate::cli::DemoArgs;
use crate::output::Output;
use crate::release::keyfile;
use crate::release::pack::{PackSpec, pack};
use crate::release::serve::Server;
use crate::release::synth;
use crate::release::tree::{BUNDLES_DIR, Change, FEEDS_DIR, Signing, Tree, Withdrawal};

/// The scenario's inputs, kept in the top-level `demo/` folder (its README tells the story)
/// and compiled in, so an installed `ampoule demo` runs outside the checkout. tests/demo.rs
/// checks that these copies equal the files.
pub const INPUTS: &[(&str, &str)] = &[
    ("README.md", include_str!("../../demo/README.md")),
    (
        "labels-1.0.0.txt",
        include_str!("../../demo/labels-1.0.0.txt"),
    ),
    (
        "labels-1.1.0.txt",
        include_str!("../../demo/labels-1.1.0.txt"),
    ),
    (
        "camera-policy.json",
        include_str!("../../demo/camera-policy.json"),
    ),
];

fn input(name: &str) -> &'static str {
    INPUTS
        .iter()
        .find(|(n, _)| *n == name)
        .map(|(_, text)| *text)
        .expect("every input the demo reads is in INPUTS")
}

/// The species model `version` knows, in output-index order (invented survey classes).
fn species(version: &str) -> Result<Vec<String>> {
    let name = format!("labels-{version}.txt");
    ampoule_verify::labels::parse_labels(input(&name).as_bytes())
        .with_context(|| format!("the demo's {name} is not a valid label list"))
}
/// Hidden units of the demo classifier: about 8 MiB of float32 weights, large enough to show
/// streaming, small enough to run in seconds.
const HIDDEN: u64 = 76;
/// The cameras' input: 96 × 96 RGB frames.
const SIDE: u64 = 96;
/// The cameras' app version, and the range the bundles require.
const APP_VERSION: &str = "2.3.0";
const REQUIRES_APP: &str = ">=2.0.0, <3.0.0";
/// The channel the cameras follow, and the share of them the second release goes to first.
const CHANNEL: &str = "stable";
const ROLLOUT: u8 = 50;
/// How long the demo's feeds stay valid: a week, the publish command's default.
const FEED_EXPIRES_SECS: u64 = 7 * 86_400;
/// A fixed creation time so that the demo's bundles are the same on every run.
const CREATED: &str = "2026-12-01T06:00:00Z";
/// How long the demo's trust sets stay valid: a year.
const TRUST_SET_EXPIRES_SECS: u64 = 365 * 86_400;

/// The demo's steps, printed as they happen and collected for `--json`.
struct Story<'a> {
    out: &'a Output,
    steps: Vec<Value>,
}

impl Story<'_> {
    fn tell(&mut self, step: &str, text: String, detail: Value) {
        if self.out.text() {
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
    if out.text() {
        println!(
            "ampoule demo: trail cameras in a forest reserve (invented data) in {}",
            dir.display()
        );
    }
    let mut story = Story {
        out,
        steps: Vec::new(),
    };
    // The story's inputs beside what is made from them, for a look afterwards with --dir.
    for (name, text) in INPUTS {
        std::fs::write(dir.join(name), text)
            .with_context(|| format!("cannot write {}", dir.join(name).display()))?;
    }

    let key = keyfile::generate_key();
    let public = PublicKey::from_verifying_key(&key.verifying_key())?;
    keyfile::write_secret_key(&dir.join("release.secret.pem"), &key, None)?;
    keyfile::write_public_key(&dir.join("release.public.pem"), &public)?;
    // What the camera app ships with: the release key for everything, one signature each.
    let release_only = [(&public, DocumentKind::ALL.to_vec(), "release")];
    let trust_v1 = trust_set(1, &release_only, &key)?;
    std::fs::write(dir.join("trust-1.json"), &trust_v1)?;
    story.tell(
        "keygen",
        format!(
            "made a demo-only release key {} (release.secret.pem, owner-only) and trust set v1 \
             listing it, which the camera app ships with (trust-1.json); for brevity this one \
             key holds every role, tree heads included, which a real release must not do: \
             there the publishing runner holds the feed role only and the tree-head key is \
             kept elsewhere (FORMAT.md, \"Who signs tree heads\")",
            public.id()
        ),
        json!({ "key_id": public.id().to_string(), "trust_set_version": 1 }),
    );

    let created: Timestamp = CREATED.parse()?;
    let requires_app = VersionReq::parse(REQUIRES_APP)?;
    let mut bundles = Vec::new();
    let first = species("1.0.0")?;
    for (version, seed) in [("1.0.0", 1), ("1.1.0", 2)] {
        let labels = species(version)?;
        let added: Vec<String> = labels
            .iter()
            .filter(|l| !first.contains(l))
            .map(|l| format!("'{l}'"))
            .collect();
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
                if added.is_empty() {
                    String::new()
                } else {
                    format!(" (adds {})", added.join(", "))
                },
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
        first.clone(),
        "1.1.1",
        &requires_app,
        created,
    )?
    .model_signature
    .context("the demo model has a signature")?
    .check_label_count(None, None, first.len());
    refusal(
        &mut story,
        "labels",
        "packing the 7-class model with last season's 6 labels",
        mismatch,
    )?;

    let trusted: TrustedKeys = [public.clone()].into_iter().collect();
    let policy = camera_policy()?;
    let mut camera = Verifier::new(trusted.clone(), Version::parse(APP_VERSION)?)?
        .compatibility(policy.compatibility);
    if let Some(name) = policy.bundle_name {
        camera = camera.require_name(name);
    }

    // The release tree, served from this process as any static web server would serve it.
    let tree = dir.join("release");
    Tree::lock(&tree)?.publish_trust_set(&trust_v1, &signing(&key))?;
    let published = publish(&tree, &bundles[0], 100, &key, &trusted)?;
    let server = Server::start(tree.clone(), "127.0.0.1:0".parse()?)
        .context("cannot start the demo's web server on 127.0.0.1")?;
    let feed_url = server.url(&format!("{FEEDS_DIR}/{CHANNEL}.json"));
    story.tell(
        "publish",
        format!(
            "published trust set v1 and v1.0.0 on channel {CHANNEL} (feed sequence {}); the \
             release tree is served at {}",
            published.feed.sequence,
            server.url("")
        ),
        json!({ "tree": tree, "url": server.url(""), "sequence": published.feed.sequence }),
    );

    // Two cameras whose rollout buckets for v1.1.0 fall on either side of 50%.
    let v11 = file_digest(&bundles[1])?;
    let (id_in, id_out) = pick_cameras(&v11, ROLLOUT)?;
    let device = |id: &str| -> Result<Camera> {
        // The camera app: the trust set it ships with, its version, its model line and what
        // its code needs of a model.
        let app = App::new(
            Trust::shipped_trust_set(trust_v1.clone())?,
            Version::parse(APP_VERSION)?,
        )
        .policy_document(input("camera-policy.json").as_bytes())?
        .device_id(id)?;
        let store_dir = dir.join("cameras").join(id);
        Ok(Camera {
            device: Device::open(&store_dir, CHANNEL, app, Timestamp::now())?,
            feed_url: feed_url.clone(),
        })
    };
    let (mut cam_in, mut cam_out) = (device(&id_in)?, device(&id_out)?);
    let mut species_count = 0;
    for cam in [&cam_in, &cam_out] {
        match cam.check(Timestamp::now())?.outcome {
            Outcome::Installed(installed) => species_count = installed.release.labels.len(),
            other => bail!(
                "{} expected to install v1.0.0, got {}",
                cam.id(),
                other.name()
            ),
        }
    }
    story.tell(
        "install",
        format!(
            "cameras {id_in} and {id_out} (app {APP_VERSION}) checked the feed, downloaded v1.0.0, \
             verified it and installed it into their stores: {species_count} species"
        ),
        json!({ "cameras": [id_in, id_out], "version": "1.0.0" }),
    );

    let published = publish(&tree, &bundles[1], ROLLOUT, &key, &trusted)?;
    let rollout_feed = std::fs::read(tree.join(FEEDS_DIR).join(format!("{CHANNEL}.json")))?;
    story.tell(
        "rollout",
        format!(
            "published v1.1.0 on {CHANNEL} to {ROLLOUT}% of cameras (feed sequence {})",
            published.feed.sequence
        ),
        json!({ "version": "1.1.0", "rollout_percent": ROLLOUT, "sequence": published.feed.sequence }),
    );
    let threshold = u16::from(ROLLOUT) * 100;
    match cam_in.check(Timestamp::now())?.outcome {
        Outcome::Installed(installed) => story.tell(
            "rollout-in",
            format!(
                "{id_in} is in rollout bucket {} of 10000 (under {threshold}): updated 1.0.0 -> 1.1.0, now knows '{}'",
                rollout_bucket(&id_in, &v11),
                installed.release.labels.last().map(String::as_str).unwrap_or_default()
            ),
            json!({ "camera": id_in, "version": "1.1.0", "model": installed.release.model }),
        ),
        other => bail!("{id_in} expected to take v1.1.0, got {}", other.name()),
    }
    match cam_out.check(Timestamp::now())?.outcome {
        Outcome::NotInRollout { bucket } => story.tell(
            "rollout-out",
            format!("{id_out} is in bucket {bucket} (not under {threshold}): not in the rollout yet, keeps v1.0.0"),
            json!({ "camera": id_out, "bucket": bucket, "version": "1.0.0" }),
        ),
        other => bail!("{id_out} expected to stay out of the rollout, got {}", other.name()),
    }

    let old = camera.verify_path(&bundles[0])?;
    refusal(
        &mut story,
        "replay",
        &format!("the old v1.0.0 bundle replayed into the store of {id_in} (on v1.1.0)"),
        dangerous::install_without_feed(cam_in.device.store(), old),
    )?;

    // v1.1.1: the same model, republished; then one byte of it flips on the server.
    let spec = model_spec(
        &dir.join("species-1.1.0.onnx"),
        species("1.1.0")?,
        "1.1.1",
        &requires_app,
        created,
    )?;
    let v111 = dir.join("species-1.1.1.ampoule");
    pack(&spec, Some(&key), &v111, &indicatif::ProgressBar::hidden())?;
    let published = publish(&tree, &v111, 100, &key, &trusted)?;
    let served = tree
        .join(BUNDLES_DIR)
        .join(format!("{}.{BUNDLE_EXTENSION}", file_digest(&v111)?));
    flip_byte(&served, 4096)?;
    let result = cam_in.check(Timestamp::now());
    let kept = cam_in.current_version()?;
    if kept != Some(Version::new(1, 1, 0)) {
        bail!("{id_in} should still run v1.1.0 after the tampered download, but runs {kept:?}");
    }
    refusal(
        &mut story,
        "tamper",
        &format!(
            "v1.1.1 (feed sequence {}) after one byte of its bundle flipped on the server \
             ({id_in} keeps v1.1.0)",
            published.feed.sequence
        ),
        result,
    )?;

    let mut sequence = 0;
    for version in ["1.1.1", "1.1.0", "1.0.0"] {
        sequence = withdraw(&tree, version, &key)?.feed.sequence;
    }
    for cam in [&cam_in, &cam_out] {
        match cam.check(Timestamp::now())?.outcome {
            Outcome::NothingOffered => {}
            other => bail!(
                "{} expected an empty channel, got {}",
                cam.id(),
                other.name()
            ),
        }
    }
    let versions = |cam: &Camera| -> Result<String> {
        Ok(cam
            .current_version()?
            .map_or_else(|| "nothing".into(), |v| v.to_string()))
    };
    story.tell(
        "withdraw",
        format!(
            "withdrew v1.1.1, v1.1.0 and v1.0.0: {CHANNEL} offers nothing (feed sequence {sequence}); \
             {id_in} keeps v{}, {id_out} keeps v{}",
            versions(&cam_in)?,
            versions(&cam_out)?
        ),
        json!({ "sequence": sequence, "kept": { id_in.clone(): versions(&cam_in)?, id_out.clone(): versions(&cam_out)? } }),
    );

    crate::release::tree::write_atomic(
        &tree.join(FEEDS_DIR).join(format!("{CHANNEL}.json")),
        &rollout_feed,
    )?;
    refusal(
        &mut story,
        "feed-replay",
        "the v1.1.0 rollout feed (sequence 2), validly signed, served again",
        cam_out.check(Timestamp::now()),
    )?;

    let cameras = [&mut cam_in, &mut cam_out];
    rotate_keys(&mut story, dir, &tree, &key, cameras, &trust_v1, |v| {
        model_spec(
            &dir.join("species-1.1.0.onnx"),
            species("1.1.0")?,
            v,
            &requires_app,
            created,
        )
    })?;

    // The auditor: everything shipped is in the ledger, and the ledger was never rewritten.
    let heads = ampoule_verify::ledger::LedgerVerifier::new(trusted.clone(), 1)?;
    let audit = crate::release::ledger_audit::check(&tree, &trusted, &heads, None)?;
    // The one finding the auditor must make is the bundle flipped on the server above.
    let [finding] = audit.problems.as_slice() else {
        bail!(
            "the demo's ledger check should find exactly the tampered bundle, but found: {}",
            audit.problems.join("; ")
        );
    };
    story.tell(
        "audit",
        format!(
            "an auditor checked the release tree's ledger: {} entries (every publish, withdraw \
             and trust set), {} signed tree heads, each consistent with the one before; it flags the \
             file tampered with on the server: {finding}",
            audit.tree_size, audit.heads_checked
        ),
        json!({
            "entries": audit.tree_size,
            "heads": audit.heads_checked,
            "root": audit.root_hash,
            "problems": audit.problems,
        }),
    );
    server
        .shutdown()
        .context("cannot stop the demo's web server")?;

    let big = dir.join("species-1.2.0-128px.onnx");
    synth::write_onnx_classifier(&big, 128, 8, 7, 3)?;
    let spec = model_spec(&big, species("1.1.0")?, "1.2.0", &requires_app, created)?;
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
    let spec = model_spec(&big, species("1.1.0")?, "9.9.9", &requires_app, created)?;
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
        && out.text()
    {
        println!("everything the demo made is in {}", path.display());
    }
    if out.json() {
        out.result("", json!({ "ok": true, "dir": dir, "steps": story.steps }))?;
    }
    Ok(())
}

/// Key rotation on the cameras: trust set v2 adds a field-laptop key for bundles, and the
/// cameras take it from the feed in the update that installs a bundle only that key signed;
/// then the laptop goes missing after signing v1.1.3, trust set v3 revokes its key, and the
/// cameras, taking v3 from the renewed feed, refuse v1.1.3 in the same update.
fn rotate_keys(
    story: &mut Story<'_>,
    dir: &Path,
    tree: &Path,
    key: &ed25519_dalek::SigningKey,
    cameras: [&mut Camera; 2],
    shipped: &[u8],
    spec: impl Fn(&str) -> Result<PackSpec>,
) -> Result<()> {
    let public = PublicKey::from_verifying_key(&key.verifying_key())?;
    let field = keyfile::generate_key();
    let field_public = PublicKey::from_verifying_key(&field.verifying_key())?;
    let release_only = [(&public, DocumentKind::ALL.to_vec(), "release")];
    let with_field = [
        release_only[0].clone(),
        (&field_public, vec![DocumentKind::Bundle], "field laptop"),
    ];
    let both: TrustedKeys = [public.clone(), field_public.clone()].into_iter().collect();
    let [cam_in, cam_out] = cameras;

    let trust_v2 = trust_set(2, &with_field, key)?;
    Tree::lock(tree)?.publish_trust_set(&trust_v2, &signing(key))?;
    let v112 = dir.join("species-1.1.2.ampoule");
    pack(
        &spec("1.1.2")?,
        Some(&field),
        &v112,
        &indicatif::ProgressBar::hidden(),
    )?;
    let published = publish(tree, &v112, 100, key, &both)?;
    let shipped_keys: TrustedKeys = [public.clone()].into_iter().collect();
    if Verifier::new(shipped_keys, Version::parse(APP_VERSION)?)?
        .verify_path(&v112)
        .is_ok()
    {
        bail!("v1.1.2 should need trust set v2, but the release key alone accepts it");
    }
    story.tell(
        "trust-set",
        format!(
            "added a field-laptop key {} for bundles: published trust set v2 (signed by the \
             release key, as v1 requires) and v1.1.2, signed with the field-laptop key only \
             (feed sequence {})",
            field_public.id(),
            published.feed.sequence
        ),
        json!({
            "trust_set_version": 2,
            "field_key_id": field_public.id().to_string(),
            "sequence": published.feed.sequence,
        }),
    );
    for cam in [&mut *cam_in, &mut *cam_out] {
        let checked = cam.check(Timestamp::now())?;
        match (&checked.outcome, checked.rotated_to) {
            (Outcome::Installed(installed), Some(2))
                if installed.release.manifest.version == Version::new(1, 1, 2) => {}
            (other, rotated) => bail!(
                "{} expected to take trust set v2 and install v1.1.2, got {} (trust set {:?})",
                cam.id(),
                other.name(),
                rotated
            ),
        }
    }
    story.tell(
        "rotate",
        format!(
            "{} and {} took trust set v2 from the feed and stored it, then installed v1.1.2 in \
             the same update (the v1 they shipped with would refuse it)",
            cam_in.id(), cam_out.id()
        ),
        json!({ "cameras": [cam_in.id(), cam_out.id()], "trust_set_version": 2, "version": "1.1.2" }),
    );

    let v113 = dir.join("species-1.1.3.ampoule");
    pack(
        &spec("1.1.3")?,
        Some(&field),
        &v113,
        &indicatif::ProgressBar::hidden(),
    )?;
    let lost = publish(tree, &v113, 100, key, &both)?;
    let trust_v3 = trust_set(3, &release_only, key)?;
    let revoked = Tree::lock(tree)?.publish_trust_set(&trust_v3, &signing(key))?;
    let renewed = revoked
        .feeds
        .last()
        .map_or(0, |change| change.feed.sequence);
    story.tell(
        "revoke",
        format!(
            "the field laptop went missing; v1.1.3, signed with its key, is on the channel (feed \
             sequence {}): published trust set v3 without that key (the feed, renewed to name \
             it, is sequence {renewed})",
            lost.feed.sequence
        ),
        json!({ "trust_set_version": 3, "sequence": renewed }),
    );
    let mut results = Vec::new();
    for cam in [&mut *cam_in, &mut *cam_out] {
        let result = cam.check(Timestamp::now());
        // What the camera runs on from now on, as its app loads it after a restart.
        let stored = Store::load_trust_set(cam.device.store().dir(), shipped, Timestamp::now())?;
        let kept = cam.current_version()?;
        if stored.version() != 3 || kept != Some(Version::new(1, 1, 2)) {
            bail!(
                "{} should have stored trust set v3 and kept v1.1.2, but has trust set v{} and runs {kept:?}",
                cam.id(),
                stored.version()
            );
        }
        results.push(result);
    }
    let first = results.remove(0);
    if let Some(Ok(_)) = results.first() {
        bail!(
            "{} accepted v1.1.3 after trust set v3 revoked its key",
            cam_out.id()
        );
    }
    refusal(
        story,
        "revoked",
        &format!(
            "v1.1.3 on {} and {}, in the update that took trust set v3 (both keep v1.1.2)",
            cam_in.id(),
            cam_out.id()
        ),
        first,
    )
}

/// A trust set of `keys` (with their roles and comments), one signature needed for each kind
/// of document, valid for a year, signed by `signer`.
fn trust_set(
    version: u64,
    keys: &[(&PublicKey, Vec<DocumentKind>, &str)],
    signer: &ed25519_dalek::SigningKey,
) -> Result<Vec<u8>> {
    use ed25519_dalek::Signer;
    let now = Timestamp::now();
    let body = TrustSetBody {
        format: ampoule_verify::format::trust_set::FORMAT_VERSION,
        version,
        expires: Timestamp::from_unix(now.unix() + TRUST_SET_EXPIRES_SECS)
            .context("a year from now is a valid time")?,
        keys: keys
            .iter()
            .map(|(key, roles, comment)| KeyEntry::new(key, roles.clone(), *comment))
            .collect(),
        thresholds: Thresholds {
            bundle: 1,
            feed: 1,
            tree_head: 1,
            trust_set: 1,
        },
    };
    let mut file = TrustSetFile::unsigned(body)?;
    let signature = signer.sign(&file.signing_request());
    file.insert_signature(SignatureEntry {
        key_id: PublicKey::from_verifying_key(&signer.verifying_key())?.id(),
        signature: signature.to_bytes(),
    })?;
    Ok(file.to_json())
}

/// The camera app's policy document, demo/camera-policy.json (FORMAT.md, "The policy
/// document"): what its code feeds and reads (96 x 96 RGB float frames in, one score per
/// species out), the model line it runs, and the "empty frame" class it relies on to skip
/// frames. The same file `ampoule verify --policy` and the C interface read.
fn camera_policy() -> Result<PolicyDocument> {
    PolicyDocument::parse(input("camera-policy.json").as_bytes())
        .context("the demo's camera-policy.json is not a policy document")
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
        metadata: None,
    })
}

/// Copies a bundle into the release tree and makes it current on the demo channel.
fn publish(
    tree: &Path,
    bundle: &Path,
    rollout: u8,
    key: &ed25519_dalek::SigningKey,
    trusted: &TrustedKeys,
) -> Result<Change> {
    let tree = Tree::lock(tree)?;
    let staged = tree.stage_bundle(bundle, trusted)?;
    let (change, _) = tree.publish(
        staged,
        CHANNEL,
        rollout,
        &[],
        crate::release::tree_deltas::DEFAULT_BASES,
        &signing(key),
    )?;
    Ok(change)
}

/// Withdraws `version`, the current release of the demo channel.
fn withdraw(tree: &Path, version: &str, key: &ed25519_dalek::SigningKey) -> Result<Change> {
    match Tree::lock(tree)?.withdraw(CHANNEL, &version.parse()?, &signing(key))? {
        Withdrawal::Pending(change) => Ok(change),
        Withdrawal::Already(_) => bail!("the demo withdrew {version} twice"),
    }
}

fn signing(key: &ed25519_dalek::SigningKey) -> Signing<'_> {
    Signing {
        key_file: None,
        key,
        now: Timestamp::now(),
        expires_in_secs: FEED_EXPIRES_SECS,
        tree_head_keys: &[],
        outside: &[],
    }
}

fn file_digest(path: &Path) -> Result<Digest> {
    let file =
        std::fs::File::open(path).with_context(|| format!("cannot open {}", path.display()))?;
    Ok(hash_reader(file, u64::MAX)
        .with_context(|| format!("cannot read {}", path.display()))?
        .0)
}

/// The first camera ids (camera-01, camera-02, ...) inside and outside a rollout of `percent`
/// for the bundle `digest`: the same bundle always gives the same two.
fn pick_cameras(digest: &Digest, percent: u8) -> Result<(String, String)> {
    let ids: Vec<String> = (1..=999).map(|n| format!("camera-{n:02}")).collect();
    let inside = ids.iter().find(|id| in_rollout(id, digest, percent));
    let outside = ids.iter().find(|id| !in_rollout(id, digest, percent));
    match (inside, outside) {
        (Some(a), Some(b)) => Ok((a.clone(), b.clone())),
        _ => bail!("no camera ids on both sides of a {percent}% rollout"),
    }
}

fn mib(bytes: u64) -> f64 {
    bytes as f64 / (1024.0 * 1024.0)
}

/// Records an expected refusal; a demo whose attack was accepted is a failed demo.
/// One trail camera: the device its app opens on its store, and where its channel's feed is.
struct Camera {
    device: Device,
    feed_url: String,
}

impl Camera {
    fn id(&self) -> &str {
        self.device.device_id()
    }

    /// One update over HTTP, as the camera's app runs it; a refusal or failure as an error.
    fn check(&self, now: Timestamp) -> ampoule_verify::Result<Report> {
        self.device
            .update(&self.feed_url, &Transfer::new(), now)
            .into_result()
    }

    fn current_version(&self) -> Result<Option<Version>> {
        Ok(self.device.store().state()?.current.map(|c| c.version))
    }
}

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
