//! Old and new bundles both install (issue 11): the device re-reads an unpacked model under the
//! reading rules its signed manifest names, not under today's.
//!
//! tests/data/before-issue11/ holds a bundle that `ampoule pack` wrote before issue 11 changed
//! what the ONNX reader counts (its README says how): its model, the `onnx` 1.23.2 test model
//! `test_operator_mm`, keeps one weight in a Constant node, which today's rules count and the
//! old rules did not.

use std::path::{Path, PathBuf};

use ampoule::release::keyfile;
use ampoule::release::pack::{PackSpec, pack};
use ampoule_verify::model::{CompatibilityPolicy, read_model_signature_file};
use ampoule_verify::time::Timestamp;
use ampoule_verify::{PublicKey, TrustedKeys, Verifier, Version};
use indicatif::ProgressBar;
use semver::VersionReq;

fn data(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data/before-issue11")
        .join(name)
}

fn demo_keys() -> TrustedKeys {
    let pem = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("keys-example/DEMO-ONLY-release.public.pem"),
    )
    .expect("the demo public key");
    let mut keys = TrustedKeys::new();
    keys.add(PublicKey::from_pem(&pem).expect("a public key"));
    keys
}

fn verifier() -> Verifier {
    let policy = CompatibilityPolicy::builder()
        .classifier_output("3")
        .build()
        .expect("policy");
    Verifier::new(demo_keys(), Version::new(2, 1, 0))
        .expect("verifier")
        .compatibility(policy)
}

#[test]
fn issue11_a_bundle_packed_before_the_reading_rules_installs() {
    let bundle = data("trailcam-species-1.0.0.ampoule");
    let verified = verifier().verify_path(&bundle).expect("verified");
    let model = verified.manifest().model.clone().expect("a model record");
    // The record the old pack signed: reading rules 1 (no `rules` field), no weights.
    assert_eq!(model.rules, 1);
    assert_eq!((model.weight_tensors, model.parameters), (0, 0));
    let dir = tempfile::tempdir().expect("temp dir");
    let unpacked = verified
        .unpack(&dir.path().join("installed"))
        .expect("the old bundle installs with today's verifier");
    assert_eq!(unpacked.labels.len(), 4);

    // Today's rules read the same file differently (the Constant's one float32), so a device
    // that compared under them would refuse this bundle: the check above can fail.
    let today = read_model_signature_file(&data("operator-mm.onnx"))
        .expect("read")
        .expect("onnx");
    assert_eq!(today.rules, 2);
    assert_eq!((today.weight_tensors, today.parameters), (1, 1));
    assert_ne!(today, model);
}

/// Packs the fixture's model and labels with today's pack, with `signature` as the model record.
fn repack(dir: &Path, signature: ampoule_verify::model::ModelSignature) -> PathBuf {
    let key = keyfile::read_secret_key(
        &{
            let key = dir.join("demo.secret.pem");
            std::fs::copy(
                Path::new(env!("CARGO_MANIFEST_DIR"))
                    .join("keys-example/DEMO-ONLY-release.secret.pem"),
                &key,
            )
            .expect("copy the demo key");
            use std::os::unix::fs::PermissionsExt;
            std::fs::set_permissions(&key, std::fs::Permissions::from_mode(0o600))
                .expect("chmod 600");
            key
        },
        &keyfile::PassphraseSource::None,
    )
    .expect("the demo key");
    let spec = PackSpec {
        model: data("operator-mm.onnx"),
        model_path: "model.onnx".into(),
        labels: ["fox", "roe deer", "badger", "hare"]
            .map(String::from)
            .to_vec(),
        name: "trailcam-species".into(),
        version: Version::new(1, 1, 0),
        requires_app: VersionReq::STAR,
        created: Timestamp::from_unix(1_764_547_200).expect("a time"),
        model_signature: Some(signature),
        metadata: None,
    };
    let out = dir.join("new.ampoule");
    pack(&spec, Some(&key), &out, &ProgressBar::hidden()).expect("pack");
    out
}

#[test]
fn issue11_a_bundle_packed_today_records_rules_2_and_installs() {
    let dir = tempfile::tempdir().expect("temp dir");
    let signature =
        ampoule_verify::model::read_model_signature_for_pack(&data("operator-mm.onnx"), None, None)
            .expect("read")
            .expect("onnx");
    // The rules-1 reading differs (0 parameters), so pack keeps rules 2.
    assert_eq!((signature.rules, signature.parameters), (2, 1));
    let bundle = repack(dir.path(), signature);
    let verified = verifier().verify_path(&bundle).expect("verified");
    verified
        .unpack(&dir.path().join("installed"))
        .expect("today's bundle installs");
}

#[test]
fn issue11_a_manifest_naming_unknown_reading_rules_is_refused() {
    let dir = tempfile::tempdir().expect("temp dir");
    let mut signature = read_model_signature_file(&data("operator-mm.onnx"))
        .expect("read")
        .expect("onnx");
    signature.rules = 3;
    let bundle = repack(dir.path(), signature);
    let err = verifier().verify_path(&bundle).expect_err("refused");
    assert_eq!(
        err.to_string(),
        "the manifest's model was read under reading rules 3, which this verifier does not know (it knows 1 to 2); update ampoule-verify to install it"
    );
}

#[test]
fn issue11_a_manifest_whose_rules_do_not_match_the_model_is_refused_after_unpacking() {
    // A record claiming rules 1 but carrying the rules-2 counts: the re-read under rules 1
    // finds 0 parameters, so the signed record does not describe the shipped model.
    let dir = tempfile::tempdir().expect("temp dir");
    let mut signature = read_model_signature_file(&data("operator-mm.onnx"))
        .expect("read")
        .expect("onnx");
    signature.rules = 1;
    let bundle = repack(dir.path(), signature);
    let verified = verifier()
        .verify_path(&bundle)
        .expect("verified before unpacking");
    let err = verified
        .unpack(&dir.path().join("installed"))
        .expect_err("refused");
    assert_eq!(
        err.to_string(),
        "model.onnx does not have the model signature its manifest records; the bundle was packed wrongly"
    );
    assert!(!dir.path().join("installed").exists());
}
