//! The fuzz targets' corpora (`fuzz/corpus/<target>/`) run through their entry points
//! (`ampoule_verify::fuzzing`, feature `fuzzing`) in the default test run, so every seed and
//! every input a campaign once crashed on stays a regression test; and the ignored generator
//! that writes the seeds with the crate's own writers.

use std::path::{Path, PathBuf};
use std::sync::Mutex;

use ampoule_verify::feed::FeedVerifier;
use ampoule_verify::ledger::LedgerVerifier;
use ampoule_verify::{
    App, Device, PublicKey, Timestamp, Trust, TrustSet, TrustedKeys, Verifier, fuzzing,
};
use ed25519_dalek::SigningKey;

/// The entry points keep scratch files of this process (a bundle file, a store); the tests
/// here take turns, and each removes them when it is done.
static SCRATCH: Mutex<()> = Mutex::new(());

fn corpus_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../../fuzz/corpus")
}

#[test]
fn fuzz_seeds_and_committed_corpora_run_through_their_targets() {
    let _turn = SCRATCH.lock().unwrap_or_else(|e| e.into_inner());
    for (target, name, bytes) in fuzzing::seeds() {
        assert!(
            fuzzing::run(target, &bytes),
            "{target}/{name}: no such target"
        );
    }
    let mut ran = 0;
    for dir in std::fs::read_dir(corpus_dir()).expect("fuzz/corpus exists") {
        let dir = dir.expect("a corpus directory").path();
        let target = dir
            .file_name()
            .and_then(|n| n.to_str())
            .expect("a target name")
            .to_string();
        for file in std::fs::read_dir(&dir).expect("a corpus directory") {
            let file = file.expect("a corpus file").path();
            let bytes = std::fs::read(&file).expect("a corpus file");
            if !fuzzing::run(&target, &bytes) {
                println!(
                    "skipped {}: the model readers' corpora run in their own targets",
                    file.display()
                );
                break;
            }
            ran += 1;
        }
    }
    assert!(ran >= fuzzing::seeds().len(), "ran only {ran} corpus files");
    fuzzing::clean_up();
}

fn seed(target: &str, name: &str) -> Vec<u8> {
    fuzzing::seeds()
        .into_iter()
        .find(|(t, n, _)| *t == target && n == name)
        .map(|(_, _, bytes)| bytes)
        .unwrap_or_else(|| panic!("no seed {target}/{name}"))
}

/// The valid seeds pass the device's real checks under the fuzz key, so a campaign starts from
/// inputs that reach the code behind every check; a format change that breaks them fails here
/// (regenerate with the test below).
#[test]
fn fuzz_seeds_that_stand_for_valid_documents_pass_every_check() {
    let _turn = SCRATCH.lock().unwrap_or_else(|e| e.into_inner());
    let key = PublicKey::from_raw(
        SigningKey::from_bytes(&fuzzing::FUZZ_KEY)
            .verifying_key()
            .as_bytes(),
    )
    .expect("the fuzz key is strong");
    let trusted: TrustedKeys = [key].into_iter().collect();
    // The seeds are made at 1_796_000_000; the entry points' clock is an hour later.
    let now = Timestamp::from_unix(1_796_003_600).expect("a time");
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("seed.ampoule");
    std::fs::write(&path, seed("bundle", "valid.ampoule")).expect("write the seed");
    let mut bundle = Verifier::new(trusted.clone(), "1.4.0".parse().expect("version"))
        .expect("a key")
        .require_name("trailcam-species")
        .verify_path(&path)
        .expect("the bundle seed verifies");
    assert_eq!(
        bundle.check_contents().expect("its payload checks").len(),
        6
    );
    // The format 2 seed (issue 13): its chunk list and every chunk check too.
    std::fs::write(&path, seed("bundle", "valid-format-2.ampoule")).expect("write the seed");
    let mut chunked = Verifier::new(trusted.clone(), "1.4.0".parse().expect("version"))
        .expect("a key")
        .verify_path(&path)
        .expect("the format 2 bundle seed verifies");
    assert_eq!(chunked.manifest().format, 2);
    assert_eq!(
        chunked.check_contents().expect("its payload checks").len(),
        6
    );
    let manifest = ampoule_verify::Manifest::from_json(&seed("manifest", "with-metadata.json"))
        .expect("the metadata seed is a valid manifest");
    assert_eq!(
        manifest.metadata("preprocess.colour_order"),
        Some(&serde_json::json!("rgb")),
        "the manifest target's policy requires it"
    );
    let feeds = FeedVerifier::new(trusted.clone(), "stable")
        .expect("a key")
        .require_ledger(LedgerVerifier::new(trusted.clone(), 1).expect("a key"));
    for name in ["release.json", "withdrawn.json"] {
        feeds
            .verify(&seed("feed", name), now)
            .expect("the feed seed verifies with its ledger");
    }
    let v1 = TrustSet::verify_initial(&seed("trust_set", "v1.json"), now).expect("v1 verifies");
    let v2 = v1
        .accept_successor(&seed("trust_set", "v2.json"), now)
        .expect("v2 succeeds v1");
    assert_eq!(v2.version(), 2);
    ampoule_verify::merkle::verify_tree_head(&seed("tree_head", "signed.json"), &trusted, 1)
        .expect("the tree-head seed verifies");
    let trust = Trust::shipped_trust_set(seed("trust_set", "v1.json")).expect("v1 verifies");
    let app = App::new(trust, "1.4.0".parse().expect("version"))
        .bundle_name("trailcam-species")
        .expect("a bundle name");
    let device = Device::open(&dir.path().join("store"), "stable", app, now).expect("a device");
    let offline = dir.path().join("seed.ampoule-offline");
    std::fs::write(&offline, seed("offline", "release.ampoule-offline")).expect("write");
    let report = device.install_offline(&offline, now);
    assert_eq!(
        report.outcome.name(),
        "installed",
        "{:?}",
        report.outcome.error()
    );
    let policy =
        ampoule_verify::model::PolicyDocument::parse(&seed("policy_document", "full.json"))
            .expect("the policy document seed reads");
    assert_eq!(policy.bundle_name.as_deref(), Some("trailcam-species"));
    fuzzing::clean_up();
}

/// Writes the seeds into `fuzz/corpus/<target>/`: `cargo test -p ampoule-verify --test
/// fuzz_seeds -- --ignored`. Run it after a format change and commit what changed.
#[test]
#[ignore = "regenerates the committed seed corpora"]
fn regenerate_fuzz_seeds() {
    let _turn = SCRATCH.lock().unwrap_or_else(|e| e.into_inner());
    for (target, name, bytes) in fuzzing::seeds() {
        let dir = corpus_dir().join(target);
        std::fs::create_dir_all(&dir).expect("create the corpus directory");
        std::fs::write(dir.join(format!("seed-{name}")), bytes).expect("write a seed");
    }
    fuzzing::clean_up();
}
