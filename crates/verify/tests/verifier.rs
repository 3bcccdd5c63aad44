//! The verifier's public API as an app uses it: what it refuses to be built from, the error
//! kinds an app matches on, progress reports, and unpacking that leaves nothing behind.
//! Bundles are laid out with the crate's own writer (`bundle::write_bundle`, `tar::header`).

use std::sync::{Arc, Mutex};

use ampoule_verify::bundle::write_bundle;
use ampoule_verify::format::{context, signed_bytes};
use ampoule_verify::manifest::{Compression, FileEntry, Payload, Role};
use ampoule_verify::signature::{SignatureEntry, Signatures};
use ampoule_verify::{
    Digest, ErrorKind, KeyId, Manifest, Progress, PublicKey, Stage, Timestamp, TrustedKeys,
    Verifier, tar,
};
use ed25519_dalek::{Signer, SigningKey};
use semver::{Version, VersionReq};

const LABELS: &[u8] = b"fox\nbadger\nhare\n";
const MTIME: u64 = 1_796_112_000;

fn entry(name: &str, data: &[u8]) -> Vec<u8> {
    let mut out = tar::header(name, data.len() as u64, MTIME).to_vec();
    out.extend_from_slice(data);
    out.resize(out.len() + tar::padding(data.len() as u64) as usize, 0);
    out
}

/// A signed format 1 bundle of `model` and the fixture labels; `edit` may change the manifest
/// first.
fn bundle(key: &SigningKey, model: &[u8], edit: impl FnOnce(&mut Manifest)) -> Vec<u8> {
    let mut inner = [entry("model.bin", model), entry("labels.txt", LABELS)].concat();
    inner.extend_from_slice(&tar::END_OF_ARCHIVE);
    let payload = zstd::encode_all(&inner[..], 3).expect("zstd");
    let file = |path: &str, role, data: &[u8]| FileEntry {
        path: path.into(),
        role,
        size: data.len() as u64,
        sha256: Digest::of(data),
    };
    let mut manifest = Manifest {
        format: 1,
        name: "trailcam-species".into(),
        version: Version::new(1, 1, 0),
        created: Timestamp::from_unix(MTIME).expect("in range"),
        requires_app: VersionReq::parse(">=2.0.0, <3.0.0").expect("req"),
        payload: Payload {
            compression: Compression::Zstd,
            size: payload.len() as u64,
            sha256: Some(Digest::of(&payload)),
            chunk_bytes: None,
            chunks_sha256: None,
        },
        files: vec![
            file("model.bin", Role::Model, model),
            file("labels.txt", Role::Labels, LABELS),
        ],
        label_count: 3,
        model: None,
        metadata: None,
    };
    edit(&mut manifest);
    let manifest = manifest.to_json();
    let mut sigs = Signatures::default();
    sigs.insert(SignatureEntry {
        key_id: KeyId::of_raw_key(key.verifying_key().as_bytes()),
        signature: key
            .sign(&signed_bytes(context::MANIFEST, &manifest))
            .to_bytes(),
    });
    let mut out = Vec::new();
    write_bundle(
        &mut out,
        MTIME,
        (&manifest, &sigs.to_json(), None),
        &mut &payload[..],
        payload.len() as u64,
    )
    .expect("in memory");
    out
}

fn trusting(key: &SigningKey) -> TrustedKeys {
    [PublicKey::from_verifying_key(&key.verifying_key()).expect("not weak")]
        .into_iter()
        .collect()
}

fn app() -> Version {
    Version::new(2, 4, 0)
}

#[test]
fn a_verifier_needs_at_least_one_key() {
    let err = Verifier::new(TrustedKeys::new(), app()).expect_err("empty");
    assert_eq!(
        err.to_string(),
        "no trusted keys given; a verifier needs at least one public key to check signatures against"
    );
    assert_eq!(err.kind(), ErrorKind::Key);
}

#[test]
fn issue_2_verify_then_unpack_with_progress_reaching_its_total() {
    // Before the fix the unpack stage reported file bytes against the inner tar's length, so
    // it never reached its total and the CLI's progress bar was never finished.
    let key = SigningKey::from_bytes(&[3; 32]);
    let model: Vec<u8> = (0..600_000u32).map(|i| (i % 251) as u8).collect();
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("b.ampoule");
    std::fs::write(&path, bundle(&key, &model, |_| {})).expect("write");
    let seen: Arc<Mutex<Vec<Progress>>> = Arc::default();
    let log = Arc::clone(&seen);
    let verified = Verifier::new(trusting(&key), app())
        .expect("verifier")
        .installed(Version::new(1, 0, 0))
        .require_name("trailcam-species")
        .on_progress(Arc::new(move |p| log.lock().expect("lock").push(p)))
        .verify_path(&path)
        .expect("verifies");
    assert_eq!(
        verified.signers(),
        &[KeyId::of_raw_key(key.verifying_key().as_bytes())]
    );
    let dest = dir.path().join("model-1.1.0");
    let unpacked = verified.unpack(&dest).expect("unpacks");
    assert_eq!(unpacked.labels, ["fox", "badger", "hare"]);
    assert_eq!(std::fs::read(&unpacked.model).expect("model"), model);
    assert_eq!(
        std::fs::read(&unpacked.labels_path).expect("labels"),
        LABELS
    );
    // Progress ends at the total of each stage, and never runs past it.
    let seen = seen.lock().expect("lock");
    for stage in [Stage::HashPayload, Stage::Unpack] {
        let reports: Vec<_> = seen.iter().filter(|p| p.stage == stage).collect();
        let last = reports.last().expect("reports for each stage");
        assert_eq!(last.done, last.total, "{stage:?}");
        assert!(reports.windows(2).all(|w| w[0].done <= w[1].done));
    }
    // Only the destination is left: no staging directory beside it.
    let mut names: Vec<_> = std::fs::read_dir(dir.path())
        .expect("dir")
        .map(|e| e.expect("entry").file_name())
        .collect();
    names.sort();
    assert_eq!(names, ["b.ampoule", "model-1.1.0"]);
}

#[test]
fn refusals_have_kinds_apps_can_match_on() {
    let key = SigningKey::from_bytes(&[3; 32]);
    let other = SigningKey::from_bytes(&[4; 32]);
    let model = vec![7u8; 4000];
    let dir = tempfile::tempdir().expect("temp dir");
    let verifier = Verifier::new(trusting(&key), app()).expect("verifier");
    let cases: Vec<(Vec<u8>, ErrorKind)> = vec![
        (bundle(&other, &model, |_| {}), ErrorKind::Signature),
        (
            bundle(&key, &model, |m| {
                m.requires_app = VersionReq::parse(">=3").expect("req")
            }),
            ErrorKind::Policy,
        ),
        (bundle(&key, &model, |m| m.format = 9), ErrorKind::Manifest),
        (
            bundle(&key, &model, |m| m.payload.sha256 = Some(Digest::of(b"x"))),
            ErrorKind::Digest,
        ),
        (
            bundle(&key, &model, |_| {})[..700].to_vec(),
            ErrorKind::Malformed,
        ),
    ];
    for (i, (bytes, kind)) in cases.into_iter().enumerate() {
        let path = dir.path().join(format!("{i}.ampoule"));
        std::fs::write(&path, bytes).expect("write");
        let err = verifier.verify_path(&path).expect_err("refused");
        assert_eq!(err.kind(), kind, "case {i}: {err}");
        assert!(err.kind().is_refusal(), "case {i}");
    }
    // A file digest that does not match is found on unpacking, and nothing is left.
    let path = dir.path().join("late.ampoule");
    std::fs::write(
        &path,
        bundle(&key, &model, |m| m.files[0].sha256 = Digest::of(b"x")),
    )
    .expect("write");
    let err = verifier
        .verify_path(&path)
        .expect("passes the checks before decompression")
        .unpack(&dir.path().join("out"))
        .expect_err("refused");
    assert_eq!(err.kind(), ErrorKind::Digest);
    assert!(std::fs::read_dir(dir.path()).expect("dir").all(|e| {
        let name = e.expect("entry").file_name();
        name.to_string_lossy().ends_with(".ampoule")
    }));
    // An existing destination is not a refusal of the bundle.
    let err = verifier
        .verify_path(&dir.path().join("0.ampoule"))
        .map(|_| ())
        .expect_err("untrusted signer");
    assert_eq!(err.kind(), ErrorKind::Signature);
    std::fs::write(
        dir.path().join("good.ampoule"),
        bundle(&key, &model, |_| {}),
    )
    .expect("w");
    let err = verifier
        .verify_path(&dir.path().join("good.ampoule"))
        .expect("verifies")
        .unpack(dir.path())
        .expect_err("exists");
    assert_eq!(err.kind(), ErrorKind::Destination);
    assert!(!err.kind().is_refusal());
}

#[test]
fn issue11_the_policy_requires_metadata_values_by_key() {
    use ampoule_verify::CompatibilityPolicy;
    use ampoule_verify::metadata::MetadataBuilder;
    use serde_json::{Value, json};

    let key = SigningKey::from_bytes(&[3; 32]);
    let mut builder = MetadataBuilder::new();
    builder
        .add_json(br#"{"preprocess": {"colour_order": "rgb", "mean": [0.5, 0.5, 0.5]}, "eval": {"top1": 0.9}}"#)
        .expect("valid metadata");
    let metadata = builder.build().expect("valid metadata");
    let dir = tempfile::tempdir().expect("temp dir");
    let (with, without) = (
        dir.path().join("with.ampoule"),
        dir.path().join("without.ampoule"),
    );
    std::fs::write(&with, bundle(&key, b"model", |m| m.metadata = metadata)).expect("write");
    std::fs::write(&without, bundle(&key, b"model", |_| {})).expect("write");
    let verify = |path: &std::path::Path, policy: CompatibilityPolicy| {
        Verifier::new(trusting(&key), app())
            .expect("verifier")
            .compatibility(policy)
            .verify_path(path)
    };

    let all = CompatibilityPolicy::builder()
        .require_metadata("preprocess.colour_order", "rgb")
        .require_metadata("eval.top1", 0.9)
        .require_metadata("preprocess.mean", json!([0.5, 0.5, 0.5]))
        .build()
        .expect("a policy");
    let verified = verify(&with, all).expect("every value is there");
    assert_eq!(verified.manifest().metadata("eval.top1"), Some(&json!(0.9)));
    // Numbers compare by value: the integer 1 equals 1.0, whichever side writes which.
    let one = CompatibilityPolicy::builder()
        .require_metadata("eval.top1", 1)
        .build()
        .expect("a policy");
    let err = verify(&with, one).expect_err("0.9 is not 1");
    assert_eq!(err.kind(), ErrorKind::Incompatible);
    assert_eq!(
        err.to_string(),
        "the bundle's metadata has eval.top1 = 0.9, the app requires 1"
    );
    for (policy, path, message) in [
        (
            ("preprocess.colour_order", json!("bgr")),
            &with,
            "the bundle's metadata has preprocess.colour_order = \"rgb\", the app requires \"bgr\"",
        ),
        (
            ("notes", json!("first")),
            &with,
            "the bundle's metadata has no notes, the app requires notes = \"first\"",
        ),
        (
            ("preprocess.colour_order", json!("rgb")),
            &without,
            "the bundle's metadata has no preprocess.colour_order, the app requires \
             preprocess.colour_order = \"rgb\"",
        ),
    ] {
        let policy = CompatibilityPolicy::builder()
            .require_metadata(policy.0, policy.1)
            .build()
            .expect("a policy");
        let err = verify(path, policy).expect_err("refused");
        assert_eq!(
            (err.kind(), err.to_string().as_str()),
            (ErrorKind::Incompatible, message)
        );
    }

    for (key, value, message) in [
        (
            "Colour",
            json!("rgb"),
            "the policy's required metadata key 'Colour' is not allowed: each dot-separated \
             segment must be 1 to 64 bytes of a-z, 0-9 and _",
        ),
        (
            "notes",
            Value::Null,
            "the policy requires metadata key 'notes' to be null, which no bundle holds",
        ),
    ] {
        let err = CompatibilityPolicy::builder()
            .require_metadata(key, value)
            .build()
            .expect_err("not a usable requirement");
        assert_eq!(
            (err.kind(), err.to_string().as_str()),
            (ErrorKind::Policy, message)
        );
    }
    let err = CompatibilityPolicy::builder()
        .require_metadata("notes", "a")
        .require_metadata("notes", "b")
        .build()
        .expect_err("twice");
    assert_eq!(
        err.to_string(),
        "the policy requires metadata key 'notes' twice"
    );
}
