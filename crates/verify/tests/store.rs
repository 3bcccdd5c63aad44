//! The on-device store against the threats it exists for: crashes and kills at every step of
//! an install or rollback, a full disk, two updaters at once, and a store edited between runs.
//!
//! Crash tests re-run this test binary as a child process (`child_process_entry`, which does
//! nothing unless the parent sets `AMPOULE_STORE_CHILD`) and kill it with SIGKILL at a step.
//! Digests in expected messages come from GNU coreutils' `sha256sum`, not from the crate.

mod common;

use std::fs;
use std::io;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::thread;
use std::time::{Duration, Instant};

use ampoule_verify::store::{ReleaseRef, Step, release_dir_name};
use ampoule_verify::{Digest, ErrorKind, Store, VerifiedBundle};
use common::{key_id, model_bytes, sign, signing_key, untrusted_key, verifier, write_bundle};

const MODEL_LEN: usize = 4096;

/// Test bundles of several versions, written once per test.
struct Bundles {
    _tmp: tempfile::TempDir,
    dir: PathBuf,
}

impl Bundles {
    fn new() -> Self {
        let tmp = tempfile::tempdir().expect("temp dir");
        let dir = tmp.path().to_path_buf();
        Bundles { _tmp: tmp, dir }
    }

    /// The bundle of `version` (written on first use), its model made from `version`.
    fn path(&self, version: &str) -> PathBuf {
        let path = self.dir.join(format!("{}-{version}.ampoule", common::NAME));
        if !path.exists() {
            let seed = version
                .bytes()
                .fold(0u64, |a, b| a.wrapping_mul(31).wrapping_add(u64::from(b)));
            write_bundle(&self.dir, version, &model_bytes(seed, MODEL_LEN));
        }
        path
    }

    fn verified(&self, version: &str) -> VerifiedBundle {
        verified(&self.path(version))
    }

    /// The release directory name the store gives `version`.
    fn release(&self, version: &str) -> String {
        let bundle = self.verified(version);
        release_dir_name(bundle.manifest(), &Digest::of(bundle.manifest_bytes()))
    }
}

/// The store's install with an explicit channel and feed sequence, as the update's own
/// install does it, reached through the crash-test hook: these tests pin the store's rules
/// (version floor, sequences, channels) one call at a time.
trait InstallForTests {
    fn install(
        &self,
        bundle: ampoule_verify::VerifiedBundle,
        channel: Option<&str>,
        feed_sequence: Option<u64>,
    ) -> ampoule_verify::Result<ampoule_verify::Installed>;
}

impl InstallForTests for Store {
    fn install(
        &self,
        bundle: ampoule_verify::VerifiedBundle,
        channel: Option<&str>,
        feed_sequence: Option<u64>,
    ) -> ampoule_verify::Result<ampoule_verify::Installed> {
        self.install_with_hook(bundle, channel, feed_sequence, &mut |_| Ok(()))
    }
}

fn verified(path: &Path) -> VerifiedBundle {
    verifier().verify_path(path).expect("test bundle verifies")
}

fn open_store(dir: &Path) -> Store {
    Store::open(dir, verifier()).expect("store opens")
}

fn current_version(store: &Store) -> Option<String> {
    store
        .open_current()
        .expect("current release checks")
        .map(|r| r.manifest.version.to_string())
}

fn entries(dir: &Path) -> Vec<String> {
    let mut names: Vec<String> = fs::read_dir(dir)
        .expect("list dir")
        .map(|e| {
            e.expect("dir entry")
                .file_name()
                .to_string_lossy()
                .into_owned()
        })
        .collect();
    names.sort();
    names
}

/// SHA-256 of a file as GNU coreutils computes it.
fn sha256sum(path: &Path) -> String {
    let out = Command::new("sha256sum")
        .arg(path)
        .output()
        .expect("sha256sum runs");
    assert!(out.status.success(), "sha256sum failed");
    String::from_utf8(out.stdout).expect("utf-8")[..64].to_string()
}

fn sorted(mut v: Vec<String>) -> Vec<String> {
    v.sort();
    v
}

/// A store holding `versions`, installed in order from channel `stable` with sequences 1, 2...
fn store_with(bundles: &Bundles, dir: &Path, versions: &[&str]) -> Store {
    let store = open_store(dir);
    for (i, v) in versions.iter().enumerate() {
        store
            .install(bundles.verified(v), Some("stable"), Some(i as u64 + 1))
            .expect("install");
    }
    store
}

#[test]
fn public_store_types_cross_threads() {
    fn send_sync<T: Send + Sync>() {}
    send_sync::<Store>();
    send_sync::<ampoule_verify::Release>();
    send_sync::<ampoule_verify::StoreState>();
}

#[test]
fn install_then_open_current_gives_checked_paths_and_layout() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path().join("store");
    let store = open_store(&dir);
    assert!(store.open_current().expect("empty store opens").is_none());
    assert_eq!(entries(&dir), ["lock", "releases", "state.json"]);

    let installed = store
        .install(bundles.verified("1.0.0"), Some("stable"), Some(4))
        .expect("install");
    assert_eq!(installed.replaced, None);
    let release = store.open_current().expect("checks").expect("installed");
    let rel = bundles.release("1.0.0");
    assert_eq!(release.dir, dir.join("releases").join(&rel));
    assert_eq!(release.model, release.dir.join("model.onnx"));
    assert_eq!(release.labels, common::LABELS);
    assert_eq!(release.signers, [key_id(&signing_key())]);
    assert_eq!(installed.release.dir, release.dir);
    assert_eq!(
        entries(&release.dir),
        [
            "labels.txt",
            "manifest.json",
            "model.onnx",
            "signatures.json"
        ]
    );
    // The directory name carries the manifest's SHA-256 prefix and the model is the one the
    // manifest describes, both by sha256sum (GNU coreutils).
    let manifest_sum = sha256sum(&release.dir.join("manifest.json"));
    assert_eq!(
        rel,
        format!("trailcam-species-1.0.0-{}", &manifest_sum[..12])
    );
    assert_eq!(release.manifest_sha256.to_hex(), manifest_sum);
    assert_eq!(
        sha256sum(&release.model),
        release.manifest.model().sha256.to_hex()
    );

    let state = store.state().expect("state");
    assert_eq!(state.name.as_deref(), Some("trailcam-species"));
    assert_eq!(state.highest_version, Some("1.0.0".parse().expect("v")));
    assert_eq!(state.current.as_ref().map(|c| c.release.clone()), Some(rel));
    assert_eq!(state.previous, None);
    assert_eq!(state.channels["stable"].highest_sequence, Some(4));

    let second = store
        .install(bundles.verified("1.1.0"), Some("stable"), Some(5))
        .expect("install");
    assert_eq!(second.replaced, Some("1.0.0".parse().expect("v")));
    let state = store.state().expect("state");
    assert_eq!(
        state.previous.map(|p| p.release),
        Some(bundles.release("1.0.0"))
    );
    assert_eq!(current_version(&store).as_deref(), Some("1.1.0"));
}

#[test]
fn install_refuses_downgrade_reinstall_replayed_feed_and_other_lines() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let store = store_with(&bundles, tmp.path(), &["1.0.0", "1.1.0"]);
    let refused = |version: &str, channel: Option<&str>, sequence: Option<u64>| {
        let e = store
            .install(bundles.verified(version), channel, sequence)
            .expect_err("refused");
        assert_eq!(e.kind(), ErrorKind::Policy, "{e}");
        e.to_string()
    };
    assert_eq!(
        refused("1.0.5", Some("stable"), Some(9)),
        "bundle version 1.0.5 is not newer than 1.1.0, the highest version this store accepted; \
         refusing a downgrade or reinstall"
    );
    assert_eq!(
        refused("1.1.0", None, None),
        "bundle version 1.1.0 is not newer than 1.1.0, the highest version this store accepted; \
         refusing a downgrade or reinstall"
    );
    // Build metadata alone does not make a release newer (SemVer 2.0.0, item 10).
    assert_eq!(
        refused("1.1.0+rebuild.2", None, None),
        "bundle version 1.1.0+rebuild.2 is not newer than 1.1.0, the highest version this store \
         accepted; refusing a downgrade or reinstall"
    );
    assert_eq!(
        refused("1.2.0", Some("stable"), Some(1)),
        "feed sequence 1 for channel 'stable' is lower than 2, the highest this store accepted; \
         refusing a replayed feed"
    );
    assert_eq!(
        refused("1.2.0", None, Some(3)),
        "feed sequence 3 was given without a channel; name the channel the feed came from"
    );
    assert_eq!(
        refused("1.2.0", Some("Beta Test"), Some(3)),
        "channel name 'Beta Test' is not allowed: use 1 to 64 lowercase letters, digits, '-', '_' \
         or '.', starting with a letter or digit"
    );
    // Nothing above changed the store.
    assert_eq!(current_version(&store).as_deref(), Some("1.1.0"));
    // An equal sequence is allowed (the same feed fetched again naming a newer bundle is not
    // possible, but a feed that was not re-signed is not a replay of an older one).
    store
        .install(bundles.verified("1.2.0"), Some("stable"), Some(2))
        .expect("equal sequence allowed");
    // A new channel starts its own sequence, but the version floor is per store.
    assert_eq!(
        refused("1.1.5", Some("beta"), Some(1)),
        "bundle version 1.1.5 is not newer than 1.2.0, the highest version this store accepted; \
         refusing a downgrade or reinstall"
    );
    store
        .install(bundles.verified("1.3.0-beta.1"), Some("beta"), Some(1))
        .expect("new channel");
    let state = store.state().expect("state");
    assert_eq!(
        state.channels["beta"].highest_version,
        Some("1.3.0-beta.1".parse().expect("v"))
    );
    assert_eq!(state.channels["stable"].highest_sequence, Some(2));

    // One store holds one model line, whatever the verifier accepts.
    let any_name = ampoule_verify::Verifier::new(common::trusted(), "1.4.0".parse().expect("v"))
        .expect("verifier");
    let store = Store::open(&tmp.path().join("any"), any_name.clone()).expect("open");
    store
        .install(bundles.verified("1.0.0"), None, None)
        .expect("first install sets the line");
    let night = common::write_named_bundle(
        &bundles.dir,
        "trailcam-night",
        "2.0.0",
        &model_bytes(5, MODEL_LEN),
    );
    let e = store
        .install(any_name.verify_path(&night).expect("verifies"), None, None)
        .expect_err("other line");
    assert_eq!(e.kind(), ErrorKind::Policy);
    assert_eq!(
        e.to_string(),
        format!(
            "store {} holds model line 'trailcam-species'; refusing bundle 'trailcam-night' \
             (use one store per model line)",
            tmp.path().join("any").display()
        )
    );
}

#[test]
fn install_rechecks_the_bundle_with_the_stores_own_keys() {
    // A bundle verified under one key set cannot enter a store whose app trusts other keys:
    // the app could never open it.
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let other_keys: ampoule_verify::TrustedKeys =
        [
            ampoule_verify::PublicKey::from_verifying_key(&untrusted_key().verifying_key())
                .expect("key"),
        ]
        .into_iter()
        .collect();
    let other =
        ampoule_verify::Verifier::new(other_keys, "1.4.0".parse().expect("v")).expect("verifier");
    let store = Store::open(tmp.path(), other).expect("open");
    let e = store
        .install(bundles.verified("1.0.0"), None, None)
        .expect_err("refused");
    assert_eq!(e.kind(), ErrorKind::Signature);
    assert_eq!(
        e.to_string(),
        format!(
            "the store's verifier refuses the bundle: bundle has no valid signature by a trusted \
             key (by keys not trusted here: {})",
            key_id(&signing_key())
        )
    );
    assert_eq!(entries(&tmp.path().join("releases")), Vec::<String>::new());
    assert_eq!(store.state().expect("state").current, None);
}

#[test]
fn a_very_long_version_gets_a_short_release_directory_name() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let version = format!("1.0.0-{}", "a".repeat(190));
    let store = store_with(&bundles, tmp.path(), &[version.as_str()]);
    let release = store.open_current().expect("checks").expect("installed");
    let sum = sha256sum(&release.dir.join("manifest.json"));
    assert_eq!(
        entries(&tmp.path().join("releases")),
        [format!("trailcam-species-{}", &sum[..12])]
    );
    assert_eq!(release.manifest.version.to_string(), version);
}

#[test]
fn rollback_restores_previous_and_keeps_the_version_floor() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let store = store_with(&bundles, tmp.path(), &["1.0.0"]);
    let e = store.rollback().expect_err("nothing to roll back to");
    assert_eq!(e.kind(), ErrorKind::Policy);
    assert_eq!(
        e.to_string(),
        format!(
            "store {} has no previous release to roll back to",
            tmp.path().display()
        )
    );
    store
        .install(bundles.verified("1.1.0"), Some("stable"), Some(2))
        .expect("install");
    let back = store.rollback().expect("rollback");
    assert_eq!(back.manifest.version.to_string(), "1.0.0");
    assert_eq!(current_version(&store).as_deref(), Some("1.0.0"));
    let state = store.state().expect("state");
    assert_eq!(state.previous, None);
    assert_eq!(state.highest_version, Some("1.1.0".parse().expect("v")));
    // The release rolled back from can neither come back by rollback nor by reinstall.
    assert_eq!(
        store.rollback().expect_err("no previous").to_string(),
        format!(
            "store {} has no previous release to roll back to",
            tmp.path().display()
        )
    );
    assert_eq!(
        store
            .install(bundles.verified("1.1.0"), Some("stable"), Some(3))
            .expect_err("refused")
            .to_string(),
        "bundle version 1.1.0 is not newer than 1.1.0, the highest version this store accepted; \
         refusing a downgrade or reinstall"
    );
    // The next update cleans up the rolled-back-from release and installs a fixed one.
    store
        .install(bundles.verified("1.1.1"), Some("stable"), Some(3))
        .expect("newer fix");
    assert_eq!(
        entries(&tmp.path().join("releases")),
        sorted(vec![bundles.release("1.0.0"), bundles.release("1.1.1")])
    );
}

#[test]
fn rollback_refuses_a_damaged_previous_release_and_changes_nothing() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let store = store_with(&bundles, tmp.path(), &["1.0.0", "1.1.0"]);
    let rel = bundles.release("1.0.0");
    let model = tmp.path().join("releases").join(&rel).join("model.onnx");
    let mut bytes = fs::read(&model).expect("model");
    let declared = sha256sum(&model);
    bytes[100] ^= 1;
    fs::write(&model, &bytes).expect("tamper");
    let before = store.state().expect("state");
    let e = store.rollback().expect_err("refused");
    assert_eq!(e.kind(), ErrorKind::Digest);
    assert_eq!(
        e.to_string(),
        format!(
            "cannot roll back, the previous release failed its check: stored release {rel}: \
             digest mismatch for 'model.onnx': manifest declares sha256 {declared}, the store holds {}",
            sha256sum(&model)
        )
    );
    assert_eq!(store.state().expect("state"), before);
    assert_eq!(current_version(&store).as_deref(), Some("1.1.0"));
}

#[test]
fn gc_keeps_only_current_and_previous() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let store = store_with(&bundles, tmp.path(), &["1.0.0", "1.1.0", "1.2.0"]);
    let releases = tmp.path().join("releases");
    assert_eq!(entries(&releases).len(), 3);
    let removed = store.gc().expect("gc");
    assert_eq!(removed, [releases.join(bundles.release("1.0.0"))]);
    assert_eq!(
        entries(&releases),
        sorted(vec![bundles.release("1.1.0"), bundles.release("1.2.0")])
    );
    assert_eq!(store.gc().expect("gc again"), Vec::<PathBuf>::new());
    assert_eq!(current_version(&store).as_deref(), Some("1.2.0"));
}

// ---- a store changed between runs is refused before the app opens it ----

struct Tampered {
    store: Store,
    _bundles: Bundles,
    _tmp: tempfile::TempDir,
    dir: PathBuf,
    rel: String,
    rel_dir: PathBuf,
    state: PathBuf,
}

/// A store with 1.0.0 then 1.1.0 installed; `rel` is 1.1.0, the current release.
fn tampered() -> Tampered {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path().join("store");
    let store = store_with(&bundles, &dir, &["1.0.0", "1.1.0"]);
    let rel = bundles.release("1.1.0");
    Tampered {
        store,
        rel_dir: dir.join("releases").join(&rel),
        state: dir.join("state.json"),
        rel,
        dir,
        _bundles: bundles,
        _tmp: tmp,
    }
}

impl Tampered {
    fn open_error(&self) -> ampoule_verify::Error {
        self.store.open_current().expect_err("tampering detected")
    }

    fn edit_state(&self, edit: impl FnOnce(&mut serde_json::Value)) {
        let mut value: serde_json::Value =
            serde_json::from_slice(&fs::read(&self.state).expect("state")).expect("json");
        edit(&mut value);
        fs::write(&self.state, serde_json::to_vec(&value).expect("json")).expect("write state");
    }
}

#[test]
fn tamper_model_byte() {
    let t = tampered();
    let model = t.rel_dir.join("model.onnx");
    let declared = sha256sum(&model);
    let mut bytes = fs::read(&model).expect("model");
    bytes[MODEL_LEN - 1] ^= 0x80;
    fs::write(&model, &bytes).expect("tamper");
    let e = t.open_error();
    assert_eq!(e.kind(), ErrorKind::Digest);
    assert_eq!(
        e.to_string(),
        format!(
            "stored release {}: digest mismatch for 'model.onnx': manifest declares sha256 {declared}, \
             the store holds {}",
            t.rel,
            sha256sum(&model)
        )
    );
}

#[test]
fn tamper_model_truncated() {
    let t = tampered();
    let model = t.rel_dir.join("model.onnx");
    let bytes = fs::read(&model).expect("model");
    fs::write(&model, &bytes[..MODEL_LEN - 1]).expect("tamper");
    assert_eq!(
        t.open_error().to_string(),
        format!(
            "stored release {}: 'model.onnx' is 4095 bytes but the manifest declares 4096 bytes",
            t.rel
        )
    );
}

#[test]
fn tamper_labels_same_size() {
    let t = tampered();
    let labels = t.rel_dir.join("labels.txt");
    let declared = sha256sum(&labels);
    let text = fs::read_to_string(&labels).expect("labels");
    fs::write(&labels, text.replace("fox", "cat")).expect("tamper");
    assert_eq!(
        t.open_error().to_string(),
        format!(
            "stored release {}: digest mismatch for 'labels.txt': manifest declares sha256 {declared}, \
             the store holds {}",
            t.rel,
            sha256sum(&labels)
        )
    );
}

#[test]
fn tamper_manifest_is_caught_by_the_digest_in_state() {
    let t = tampered();
    let manifest = t.rel_dir.join("manifest.json");
    let recorded = sha256sum(&manifest);
    let text = fs::read_to_string(&manifest).expect("manifest");
    fs::write(&manifest, text.replace("<2.0.0", "<3.0.0")).expect("tamper");
    let e = t.open_error();
    assert_eq!(e.kind(), ErrorKind::Store);
    assert_eq!(
        e.to_string(),
        format!(
            "stored release {}: manifest.json has sha256 {} but state.json records {recorded}; \
             the store was changed outside ampoule-verify",
            t.rel,
            sha256sum(&manifest)
        )
    );
}

#[test]
fn tamper_manifest_and_state_is_caught_by_the_signature() {
    let t = tampered();
    let manifest = t.rel_dir.join("manifest.json");
    let text = fs::read_to_string(&manifest).expect("manifest");
    fs::write(&manifest, text.replace("<2.0.0", "<3.0.0")).expect("tamper");
    let new_sum = sha256sum(&manifest);
    t.edit_state(|v| v["current"]["manifest_sha256"] = new_sum.clone().into());
    let e = t.open_error();
    assert_eq!(e.kind(), ErrorKind::Signature);
    assert_eq!(
        e.to_string(),
        format!(
            "stored release {}: manifest has no valid signature by a trusted key \
             (not matching this document: {})",
            t.rel,
            key_id(&signing_key())
        )
    );
}

#[test]
fn tamper_signatures_replaced_by_an_untrusted_key() {
    let t = tampered();
    let manifest = fs::read(t.rel_dir.join("manifest.json")).expect("manifest");
    let mut sigs = ampoule_verify::signature::Signatures::default();
    sigs.insert(sign(&untrusted_key(), &manifest));
    fs::write(t.rel_dir.join("signatures.json"), sigs.to_json()).expect("tamper");
    assert_eq!(
        t.open_error().to_string(),
        format!(
            "stored release {}: manifest has no valid signature by a trusted key \
             (by keys not trusted here: {})",
            t.rel,
            key_id(&untrusted_key())
        )
    );
}

#[test]
fn tamper_state_not_json() {
    let t = tampered();
    fs::write(&t.state, b"\x00garbage").expect("tamper");
    let e = t.open_error();
    assert_eq!(e.kind(), ErrorKind::Store);
    assert_eq!(
        e.to_string(),
        format!(
            "{} is not valid: expected value at line 1 column 1; the store was damaged or \
             changed outside ampoule-verify. Remove it and move the store's other files aside to \
             start the store afresh",
            t.state.display()
        )
    );
    // Store::open refuses it too, and no update touches a store it cannot read.
    assert_eq!(
        Store::open(&t.dir, verifier())
            .expect_err("refused")
            .to_string(),
        format!(
            "{} is not valid: expected value at line 1 column 1; the store was damaged or \
             changed outside ampoule-verify. Remove it and move the store's other files aside to \
             start the store afresh",
            t.state.display()
        )
    );
}

#[test]
fn tamper_state_pointer_escaping_releases() {
    let t = tampered();
    t.edit_state(|v| v["current"]["release"] = "../../etc".into());
    assert_eq!(
        t.open_error().to_string(),
        format!(
            "{} is inconsistent: it names release '../../etc', which is not a release directory \
             name; the store was damaged or changed outside ampoule-verify. Remove it and move \
             the store's other files aside to start the store afresh",
            t.state.display()
        )
    );
}

#[test]
fn tamper_state_floor_lowered() {
    // Issue 10: the floor is what the kept signed manifests prove, not the number in
    // state.json. Lowered there, it stays at the current release's version (what deleting
    // the store's proof of a higher one would give), and the release still opens.
    let t = tampered();
    t.edit_state(|v| v["highest_version"] = "0.9.0".into());
    assert_eq!(
        t.store.state().expect("state").highest_version,
        Some("1.1.0".parse().expect("version"))
    );
    assert!(t.store.open_current().expect("opens").is_some());
}

#[test]
fn issue10_tamper_state_floor_raised_is_not_believed() {
    let t = tampered();
    t.edit_state(|v| v["highest_version"] = "999.0.0".into());
    assert_eq!(
        t.store.state().expect("state").highest_version,
        Some("1.1.0".parse().expect("version"))
    );
}

#[test]
fn tamper_state_pointer_to_other_release_dir() {
    // The pointer names the previous release's directory under the current version: the
    // manifest digest recorded for the current release does not match that directory.
    let t = tampered();
    let state: ampoule_verify::StoreState =
        serde_json::from_slice(&fs::read(&t.state).expect("state")).expect("json");
    let previous: ReleaseRef = state.previous.expect("previous");
    t.edit_state(|v| v["current"]["release"] = previous.release.clone().into());
    t.edit_state(|v| v["previous"] = serde_json::Value::Null);
    let e = t.open_error();
    assert_eq!(
        e.to_string(),
        format!(
            "stored release {}: manifest.json has sha256 {} but state.json records {}; \
             the store was changed outside ampoule-verify",
            previous.release,
            previous.manifest_sha256,
            sha256sum(&t.rel_dir.join("manifest.json"))
        )
    );
}

#[test]
fn tamper_release_dir_deleted() {
    let t = tampered();
    fs::remove_dir_all(&t.rel_dir).expect("tamper");
    let e = t.open_error();
    assert_eq!(e.kind(), ErrorKind::Store);
    assert_eq!(
        e.to_string(),
        format!(
            "stored release {}: {} is missing",
            t.rel,
            t.rel_dir.display()
        )
    );
}

#[test]
fn tamper_state_deleted() {
    let t = tampered();
    let store = open_store(&t.dir);
    fs::remove_file(&t.state).expect("tamper");
    assert_eq!(
        store.open_current().expect_err("refused").to_string(),
        format!(
            "{} is missing; the store was damaged or changed outside ampoule-verify",
            t.state.display()
        )
    );
    let e = Store::open(&t.dir, verifier()).expect_err("refused");
    assert_eq!(e.kind(), ErrorKind::Store);
    assert_eq!(
        e.to_string(),
        format!(
            "store {} holds releases but no state.json; it was damaged or changed outside \
             ampoule-verify (move it aside and install again)",
            t.dir.display()
        )
    );
    assert!(
        !t.state.exists(),
        "a refused open must not create a fresh state"
    );
}

#[test]
fn tamper_extra_file_in_release() {
    let t = tampered();
    fs::write(t.rel_dir.join("helper.so"), b"\x7fELF").expect("tamper");
    assert_eq!(
        t.open_error().to_string(),
        format!(
            "stored release {}: it holds an unexpected entry 'helper.so'",
            t.rel
        )
    );
}

#[test]
fn tamper_model_replaced_by_symlink() {
    let t = tampered();
    let model = t.rel_dir.join("model.onnx");
    let outside = t.dir.join("outside.onnx");
    fs::rename(&model, &outside).expect("move");
    std::os::unix::fs::symlink(&outside, &model).expect("symlink");
    assert_eq!(
        t.open_error().to_string(),
        format!(
            "stored release {}: model.onnx is a symbolic link where the store keeps a file",
            t.rel
        )
    );
}

#[test]
fn stored_model_is_refused_once_the_app_outgrows_it() {
    let t = tampered();
    let store = Store::open(&t.dir, common::verifier_for_app("2.0.0")).expect("open");
    let e = store.open_current().expect_err("refused");
    assert_eq!(e.kind(), ErrorKind::Policy);
    assert_eq!(
        e.to_string(),
        format!(
            "stored release {}: bundle requires app version >=1.0.0, <2.0.0 but this app is 2.0.0",
            t.rel
        )
    );
}

// ---- crashes, faults and a full disk ----

/// Runs in a child process when the parent sets `AMPOULE_STORE_CHILD` to
/// `install:<step>` or `rollback:<step>`: performs the operation on `AMPOULE_STORE_DIR` and,
/// at the step, writes `AMPOULE_STORE_MARKER`, then waits for the parent to kill it (or, if
/// `AMPOULE_STORE_GO` is set, until that file appears, and finishes).
#[test]
fn child_process_entry() {
    let Ok(mode) = std::env::var("AMPOULE_STORE_CHILD") else {
        return;
    };
    let var = |name: &str| PathBuf::from(std::env::var(name).expect("parent sets it"));
    let (action, step_name) = mode.split_once(':').expect("action:step");
    let marker = var("AMPOULE_STORE_MARKER");
    let go = std::env::var("AMPOULE_STORE_GO").ok().map(PathBuf::from);
    let store = open_store(&var("AMPOULE_STORE_DIR"));
    let mut hook = |step: Step| -> io::Result<()> {
        if step.name() == step_name {
            fs::write(&marker, step.name())?;
            let deadline = Instant::now() + Duration::from_secs(60);
            while Instant::now() < deadline {
                if go.as_ref().is_some_and(|g| g.exists()) {
                    return Ok(());
                }
                thread::sleep(Duration::from_millis(5));
            }
            // The parent should have killed this process long ago.
            std::process::abort();
        }
        Ok(())
    };
    match action {
        "install" => {
            let sequence = std::env::var("AMPOULE_STORE_SEQUENCE")
                .expect("sequence")
                .parse()
                .expect("number");
            store
                .install_with_hook(
                    verified(&var("AMPOULE_STORE_BUNDLE")),
                    Some("stable"),
                    Some(sequence),
                    &mut hook,
                )
                .expect("child install");
        }
        "rollback" => {
            store.rollback_with_hook(&mut hook).expect("child rollback");
        }
        other => panic!("unknown child action {other}"),
    }
}

struct ChildRun<'a> {
    mode: String,
    dir: &'a Path,
    bundle: Option<&'a Path>,
    sequence: u64,
    go: Option<&'a Path>,
}

/// Starts the child and returns once it reached its step.
fn start_child(run: &ChildRun<'_>) -> Child {
    let marker = run.dir.with_extension("marker");
    let _ = fs::remove_file(&marker);
    let mut cmd = Command::new(std::env::current_exe().expect("test binary"));
    cmd.args([
        "--exact",
        "child_process_entry",
        "--test-threads=1",
        "--nocapture",
    ])
    .env("AMPOULE_STORE_CHILD", &run.mode)
    .env("AMPOULE_STORE_DIR", run.dir)
    .env("AMPOULE_STORE_MARKER", &marker)
    .env("AMPOULE_STORE_SEQUENCE", run.sequence.to_string())
    .stdout(Stdio::null())
    .stderr(Stdio::piped());
    if let Some(bundle) = run.bundle {
        cmd.env("AMPOULE_STORE_BUNDLE", bundle);
    }
    if let Some(go) = run.go {
        cmd.env("AMPOULE_STORE_GO", go);
    }
    let mut child = cmd.spawn().expect("spawn child");
    let deadline = Instant::now() + Duration::from_secs(60);
    while !marker.exists() {
        if let Some(status) = child.try_wait().expect("child status") {
            let mut err = String::new();
            io::Read::read_to_string(&mut child.stderr.take().expect("stderr"), &mut err)
                .expect("stderr");
            panic!(
                "child {} ended ({status}) before its step:\n{err}",
                run.mode
            );
        }
        assert!(
            Instant::now() < deadline,
            "child {} never reached its step",
            run.mode
        );
        thread::sleep(Duration::from_millis(2));
    }
    child
}

/// Kills the child with SIGKILL (Child::kill on Unix) where it stands.
fn kill_child(mut child: Child) {
    child.kill().expect("kill child");
    let status = child.wait().expect("wait child");
    assert!(!status.success(), "a killed child cannot succeed");
}

/// Names of removed leftovers, with the unique part of temporary names elided.
fn leftover_names(removed: &[PathBuf]) -> Vec<String> {
    sorted(
        removed
            .iter()
            .map(|p| {
                let name = p.file_name().expect("name").to_string_lossy().into_owned();
                if name.starts_with(".staging-") {
                    ".staging-*".into()
                } else if name.starts_with(".state.json.tmp-") {
                    ".state.json.tmp-*".into()
                } else {
                    name
                }
            })
            .collect(),
    )
}

#[test]
fn killed_at_every_install_step_leaves_old_or_new_and_the_next_run_recovers() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let (old, new) = (bundles.release("1.0.0"), bundles.release("1.1.0"));
    for (i, step) in Step::INSTALL.into_iter().enumerate() {
        let dir = tmp.path().join(format!("store-{i}"));
        store_with(&bundles, &dir, &["1.0.0"]);
        let new_bundle = bundles.path("1.1.0");
        let child = start_child(&ChildRun {
            mode: format!("install:{}", step.name()),
            dir: &dir,
            bundle: Some(&new_bundle),
            sequence: 2,
            go: None,
        });
        kill_child(child);

        // The next run: the app opens a complete, verified model, old or new.
        let store = open_store(&dir);
        let (expected, sequence) = if step.is_committed() {
            ("1.1.0", 2)
        } else {
            ("1.0.0", 1)
        };
        assert_eq!(
            current_version(&store).as_deref(),
            Some(expected),
            "killed at {step:?}"
        );
        let state = store.state().expect("state");
        assert_eq!(
            state.highest_version,
            Some(expected.parse().expect("v")),
            "{step:?}"
        );
        assert_eq!(
            state.channels["stable"].highest_sequence,
            Some(sequence),
            "{step:?}"
        );

        // Recovery removes exactly what the killed run left behind.
        let leftovers: Vec<String> = match step {
            Step::StagingCreated
            | Step::FilesWritten
            | Step::MetadataWritten
            | Step::StagingSynced => vec![".staging-*".into()],
            Step::ReleaseRenamed | Step::ReleasesSynced => vec![new.clone()],
            Step::StateWritten => sorted(vec![new.clone(), ".state.json.tmp-*".into()]),
            _ => vec![],
        };
        assert_eq!(
            leftover_names(&store.gc().expect("gc")),
            leftovers,
            "{step:?}"
        );
        let kept = if step.is_committed() {
            sorted(vec![old.clone(), new.clone()])
        } else {
            vec![old.clone()]
        };
        assert_eq!(entries(&dir.join("releases")), kept, "{step:?}");
        assert_eq!(
            entries(&dir),
            ["highest.json", "lock", "releases", "state.json"],
            "{step:?}"
        );

        // And the store keeps working.
        store
            .install(bundles.verified("1.2.0"), Some("stable"), Some(3))
            .expect("install after recovery");
        assert_eq!(current_version(&store).as_deref(), Some("1.2.0"));
    }
}

#[test]
fn killed_at_every_rollback_step_leaves_old_or_new_and_the_next_run_recovers() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let (old, bad) = (bundles.release("1.0.0"), bundles.release("1.1.0"));
    for (i, step) in Step::ROLLBACK.into_iter().enumerate() {
        let dir = tmp.path().join(format!("store-{i}"));
        store_with(&bundles, &dir, &["1.0.0", "1.1.0"]);
        let child = start_child(&ChildRun {
            mode: format!("rollback:{}", step.name()),
            dir: &dir,
            bundle: None,
            sequence: 0,
            go: None,
        });
        kill_child(child);

        let store = open_store(&dir);
        let state = store.state().expect("state");
        if step.is_committed() {
            assert_eq!(
                current_version(&store).as_deref(),
                Some("1.0.0"),
                "{step:?}"
            );
            assert_eq!(state.previous, None, "{step:?}");
        } else {
            assert_eq!(
                current_version(&store).as_deref(),
                Some("1.1.0"),
                "{step:?}"
            );
            assert_eq!(
                state.previous.map(|p| p.release).as_deref(),
                Some(old.as_str()),
                "{step:?}"
            );
        }
        assert_eq!(
            state.highest_version,
            Some("1.1.0".parse().expect("v")),
            "{step:?}"
        );
        let leftovers: Vec<String> = match step {
            Step::StateWritten => vec![".state.json.tmp-*".into()],
            _ if step.is_committed() => vec![bad.clone()],
            _ => vec![],
        };
        assert_eq!(
            leftover_names(&store.gc().expect("gc")),
            leftovers,
            "{step:?}"
        );
        assert_eq!(
            entries(&dir),
            ["highest.json", "lock", "releases", "state.json"],
            "{step:?}"
        );
        store
            .install(bundles.verified("1.2.0"), Some("stable"), Some(3))
            .expect("install after recovery");
    }
}

#[test]
fn an_io_error_at_every_install_step_leaves_the_store_as_it_was() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    for (i, failing) in Step::INSTALL.into_iter().enumerate() {
        let dir = tmp.path().join(format!("store-{i}"));
        let store = store_with(&bundles, &dir, &["1.0.0"]);
        let before = store.state().expect("state");
        let mut hook = |step: Step| {
            if step == failing {
                // ENOSPC, as a full disk reports it (Linux errno 28).
                Err(io::Error::from_raw_os_error(28))
            } else {
                Ok(())
            }
        };
        let e = store
            .install_with_hook(
                bundles.verified("1.1.0"),
                Some("stable"),
                Some(2),
                &mut hook,
            )
            .expect_err("step fails");
        assert_eq!(e.kind(), ErrorKind::Io);
        assert_eq!(
            e.to_string(),
            format!(
                "store step {} failed: No space left on device (os error 28)",
                failing.name()
            )
        );
        if failing.is_committed() {
            // The commit happened; only its flush to disk is in doubt.
            assert_eq!(
                current_version(&store).as_deref(),
                Some("1.1.0"),
                "{failing:?}"
            );
        } else {
            assert_eq!(store.state().expect("state"), before, "{failing:?}");
            assert_eq!(
                current_version(&store).as_deref(),
                Some("1.0.0"),
                "{failing:?}"
            );
            assert_eq!(
                entries(&dir.join("releases")),
                [bundles.release("1.0.0")],
                "nothing half-written after {failing:?}"
            );
            assert_eq!(
                entries(&dir),
                ["highest.json", "lock", "releases", "state.json"],
                "{failing:?}"
            );
        }
    }
}

/// A tmpfs mounted for one test, unmounted when dropped.
struct Tmpfs {
    path: PathBuf,
}

impl Tmpfs {
    fn mount(path: &Path, size: &str) -> Result<Tmpfs, String> {
        fs::create_dir_all(path).map_err(|e| e.to_string())?;
        let out = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(path)
            .output()
            .map_err(|e| e.to_string())?;
        if !out.status.success() {
            return Err(String::from_utf8_lossy(&out.stderr).trim().to_string());
        }
        Ok(Tmpfs {
            path: path.to_path_buf(),
        })
    }
}

impl Drop for Tmpfs {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg(&self.path).status();
    }
}

#[test]
fn a_full_disk_fails_the_install_and_keeps_the_old_model() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let mount_point = tmp.path().join("small-disk");
    let disk = match Tmpfs::mount(&mount_point, "1m") {
        Ok(disk) => disk,
        Err(why) => {
            println!(
                "skipped: cannot mount a 1 MiB tmpfs to fill ({why}); the injected ENOSPC test still runs"
            );
            return;
        }
    };
    let dir = disk.path.join("store");
    let store = store_with(&bundles, &dir, &["1.0.0"]);
    let before = store.state().expect("state");
    // A 2 MiB model that does not compress cannot fit on a 1 MiB disk.
    write_bundle(&bundles.dir, "2.0.0", &model_bytes(99, 2 * 1024 * 1024));
    let e = store
        .install(bundles.verified("2.0.0"), Some("stable"), Some(2))
        .expect_err("disk full");
    assert_eq!(e.kind(), ErrorKind::Io);
    assert_eq!(
        e.to_string(),
        "cannot write model.onnx: No space left on device (os error 28)"
    );
    assert_eq!(store.state().expect("state"), before);
    assert_eq!(current_version(&store).as_deref(), Some("1.0.0"));
    assert_eq!(entries(&dir.join("releases")), [bundles.release("1.0.0")]);
    assert_eq!(
        entries(&dir),
        ["highest.json", "lock", "releases", "state.json"]
    );

    // Fill the disk to the last byte: a small install fails too, and the old model stays.
    let filler = disk.path.join("filler");
    let mut f = fs::File::create(&filler).expect("filler");
    let chunk = vec![0u8; 64 * 1024];
    loop {
        match io::Write::write(&mut f, &chunk) {
            Ok(0) => break,
            Ok(_) => {}
            Err(e) if e.raw_os_error() == Some(28) => break,
            Err(e) => panic!("filling the disk: {e}"),
        }
    }
    drop(f);
    let e = store
        .install(bundles.verified("1.1.0"), Some("stable"), Some(2))
        .expect_err("disk full");
    assert_eq!(e.kind(), ErrorKind::Io);
    assert_eq!(
        e.to_string(),
        "cannot write model.onnx: No space left on device (os error 28)"
    );
    assert_eq!(store.state().expect("state"), before);
    assert_eq!(current_version(&store).as_deref(), Some("1.0.0"));
    assert_eq!(entries(&dir.join("releases")), [bundles.release("1.0.0")]);
    // Once space is back, the same install goes through.
    fs::remove_file(&filler).expect("free space");
    store
        .install(bundles.verified("1.1.0"), Some("stable"), Some(2))
        .expect("install with space");
    drop(store);
    drop(disk);
}

// ---- two updaters at once ----

#[test]
fn a_second_updater_fails_cleanly_or_waits_while_readers_see_the_old_model() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path().to_path_buf();
    store_with(&bundles, &dir, &["1.0.0"]);
    let locked = format!(
        "store {} is being updated by another process; try again later",
        dir.display()
    );

    // Updater A pauses inside its install; B is refused at once, readers are not blocked.
    let (reached_tx, reached_rx) = mpsc::channel();
    let (go_tx, go_rx) = mpsc::channel::<()>();
    let a = {
        let (dir, bundle) = (dir.clone(), bundles.verified("1.1.0"));
        thread::spawn(move || {
            let mut hook = |step: Step| {
                if step == Step::ReleaseRenamed {
                    reached_tx.send(()).expect("main thread waits");
                    go_rx.recv().expect("main thread releases");
                }
                Ok(())
            };
            open_store(&dir).install_with_hook(bundle, None, None, &mut hook)
        })
    };
    reached_rx
        .recv_timeout(Duration::from_secs(30))
        .expect("A reached its step");
    let b = open_store(&dir);
    for e in [
        b.install(bundles.verified("1.2.0"), None, None)
            .map(|_| ())
            .expect_err("locked"),
        b.rollback().map(|_| ()).expect_err("locked"),
        b.gc().map(|_| ()).expect_err("locked"),
    ] {
        assert_eq!(e.kind(), ErrorKind::Locked);
        assert_eq!(e.to_string(), locked);
    }
    let e = b
        .clone()
        .wait_for_lock(Duration::from_millis(100))
        .install(bundles.verified("1.2.0"), None, None)
        .expect_err("still locked after waiting");
    assert_eq!(
        e.to_string(),
        format!(
            "store {} is being updated by another process (waited 100 ms); try again later",
            dir.display()
        )
    );
    assert_eq!(current_version(&b).as_deref(), Some("1.0.0"));
    go_tx.send(()).expect("A waits");
    a.join().expect("A thread").expect("A installs");
    assert_eq!(current_version(&b).as_deref(), Some("1.1.0"));

    // A waiting updater goes next once the first one finishes.
    let (reached_tx, reached_rx) = mpsc::channel();
    let (go_tx, go_rx) = mpsc::channel::<()>();
    let a = {
        let (dir, bundle) = (dir.clone(), bundles.verified("1.2.0"));
        thread::spawn(move || {
            let mut hook = |step: Step| {
                if step == Step::StateWritten {
                    reached_tx.send(()).expect("main thread waits");
                    go_rx.recv().expect("main thread releases");
                }
                Ok(())
            };
            open_store(&dir).install_with_hook(bundle, None, None, &mut hook)
        })
    };
    reached_rx
        .recv_timeout(Duration::from_secs(30))
        .expect("A reached its step");
    let waiter = {
        let (dir, bundle) = (dir.clone(), bundles.verified("1.3.0"));
        thread::spawn(move || {
            open_store(&dir)
                .wait_for_lock(Duration::from_secs(30))
                .install(bundle, None, None)
        })
    };
    thread::sleep(Duration::from_millis(150));
    assert!(!waiter.is_finished(), "B must wait for A's lock");
    go_tx.send(()).expect("A waits");
    a.join().expect("A thread").expect("A installs");
    waiter
        .join()
        .expect("B thread")
        .expect("B installs after A");
    let state = b.state().expect("state");
    assert_eq!(current_version(&b).as_deref(), Some("1.3.0"));
    assert_eq!(
        state.previous.map(|p| p.release),
        Some(bundles.release("1.2.0"))
    );
}

#[test]
fn an_updater_in_another_process_holds_the_lock_until_it_finishes() {
    let bundles = Bundles::new();
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path().join("store");
    let store = store_with(&bundles, &dir, &["1.0.0"]);
    let go = tmp.path().join("go");
    let new_bundle = bundles.path("1.1.0");
    let mut child = start_child(&ChildRun {
        mode: "install:files-written".into(),
        dir: &dir,
        bundle: Some(&new_bundle),
        sequence: 2,
        go: Some(&go),
    });
    let e = store
        .install(bundles.verified("1.2.0"), Some("stable"), Some(3))
        .expect_err("locked by the child");
    assert_eq!(e.kind(), ErrorKind::Locked);
    assert_eq!(
        e.to_string(),
        format!(
            "store {} is being updated by another process; try again later",
            dir.display()
        )
    );
    assert_eq!(current_version(&store).as_deref(), Some("1.0.0"));
    fs::write(&go, b"").expect("release the child");
    let status = child.wait().expect("child");
    assert!(status.success(), "child install finishes: {status}");
    assert_eq!(current_version(&store).as_deref(), Some("1.1.0"));
    // Its lock died with it: this process can update now.
    store
        .install(bundles.verified("1.2.0"), Some("stable"), Some(3))
        .expect("install after the child");
}

#[test]
fn two_processes_creating_one_store_at_once_both_see_one_valid_state() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path().join("new-store");
    let handles: Vec<_> = (0..4)
        .map(|_| {
            let dir = dir.clone();
            thread::spawn(move || Store::open(&dir, verifier()).map(|s| s.state()))
        })
        .collect();
    for h in handles {
        let state = h.join().expect("thread").expect("open").expect("state");
        assert_eq!(state.current, None);
    }
    assert_eq!(entries(&dir), ["lock", "releases", "state.json"]);
}
