//! Builds small, validly signed bundles for the integration tests with the crate's own format
//! pieces (ustar headers, the bundle writer, zstd, Ed25519), since tests here cannot use the
//! release-side CLI.

#![allow(dead_code)]

use std::fs::File;
use std::path::{Path, PathBuf};

use ampoule_verify::digest::Digest;
use ampoule_verify::format::{FORMAT_VERSION, context, entry, signed_bytes};
use ampoule_verify::manifest::{Compression, FileEntry, Payload, Role};
use ampoule_verify::signature::{SignatureEntry, Signatures};
use ampoule_verify::{KeyId, Manifest, PublicKey, Timestamp, TrustedKeys, Verifier, bundle, tar};
use ed25519_dalek::{Signer, SigningKey};

/// The model line every test bundle belongs to.
pub const NAME: &str = "trailcam-species";
/// Labels of the invented trail-camera classifier.
pub const LABELS: [&str; 6] = [
    "fox",
    "roe deer",
    "wild boar",
    "badger",
    "hare",
    "empty frame",
];
/// The app version the test verifier states.
pub const APP_VERSION: &str = "1.4.0";

/// The release key (a fixed seed: tests need no randomness).
pub fn signing_key() -> SigningKey {
    SigningKey::from_bytes(&[7u8; 32])
}

/// A key the device does not trust.
pub fn untrusted_key() -> SigningKey {
    SigningKey::from_bytes(&[9u8; 32])
}

pub fn key_id(key: &SigningKey) -> KeyId {
    KeyId::of_raw_key(key.verifying_key().as_bytes())
}

pub fn trusted() -> TrustedKeys {
    let key = PublicKey::from_verifying_key(&signing_key().verifying_key()).expect("test key");
    [key].into_iter().collect()
}

/// The verifier an app on version [`APP_VERSION`] uses.
pub fn verifier() -> Verifier {
    verifier_for_app(APP_VERSION)
}

pub fn verifier_for_app(app: &str) -> Verifier {
    Verifier::new(trusted(), app.parse().expect("test app version"))
        .expect("one trusted key")
        .require_name(NAME)
}

/// A model file of `len` bytes whose content depends on `seed` (xorshift64, so it does not
/// compress: useful to fill a small disk).
pub fn model_bytes(seed: u64, len: usize) -> Vec<u8> {
    let mut x = seed.wrapping_mul(0x9e37_79b9_7f4a_7c15) | 1;
    (0..len)
        .map(|_| {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            x as u8
        })
        .collect()
}

/// Signs `manifest` with `key` as a bundle signature.
pub fn sign(key: &SigningKey, manifest: &[u8]) -> SignatureEntry {
    SignatureEntry {
        key_id: key_id(key),
        signature: key
            .sign(&signed_bytes(context::MANIFEST, manifest))
            .to_bytes(),
    }
}

/// Writes a bundle of `version` with `model` to `dir` and returns its path.
pub fn write_bundle(dir: &Path, version: &str, model: &[u8]) -> PathBuf {
    write_named_bundle(dir, NAME, version, model)
}

/// Writes a bundle of model line `name`.
pub fn write_named_bundle(dir: &Path, name: &str, version: &str, model: &[u8]) -> PathBuf {
    write_bundle_signed_by(dir, name, version, model, &|manifest| {
        let mut signatures = Signatures::default();
        signatures.insert(sign(&signing_key(), manifest));
        signatures
    })
}

/// Writes a bundle whose signatures document is whatever `sign_manifest` makes of the exact
/// manifest bytes (hostile lists included: repeated keys, other contexts, too many).
pub fn write_bundle_signed_by(
    dir: &Path,
    name: &str,
    version: &str,
    model: &[u8],
    sign_manifest: &dyn Fn(&[u8]) -> Signatures,
) -> PathBuf {
    let labels: Vec<u8> = LABELS
        .iter()
        .flat_map(|l| format!("{l}\n").into_bytes())
        .collect();
    let mtime = 1_796_000_000;
    let mut inner = Vec::new();
    for (name, data) in [("model.onnx", model), (entry::LABELS, &labels[..])] {
        inner.extend_from_slice(&tar::header(name, data.len() as u64, mtime));
        inner.extend_from_slice(data);
        inner.resize(inner.len() + tar::padding(data.len() as u64) as usize, 0);
    }
    inner.extend_from_slice(&tar::END_OF_ARCHIVE);
    // Format 2: the inner tar in chunks of 64 KiB (the smallest the format allows, so that
    // even these small models make several), each a zstd frame bound by the chunk list.
    let chunk_bytes = 64 * 1024;
    let (payload, chunks) =
        bundle::chunked_payload(&inner, chunk_bytes, 3).expect("zstd compresses in memory");
    let manifest = Manifest {
        format: FORMAT_VERSION,
        name: name.into(),
        version: version.parse().expect("test version"),
        created: Timestamp::from_unix(mtime).expect("test time"),
        requires_app: ">=1.0.0, <2.0.0".parse().expect("test range"),
        payload: Payload {
            compression: Compression::Zstd,
            size: payload.len() as u64,
            sha256: None,
            chunk_bytes: Some(chunk_bytes),
            chunks_sha256: Some(Digest::of(&chunks)),
        },
        files: vec![
            FileEntry {
                path: "model.onnx".into(),
                role: Role::Model,
                size: model.len() as u64,
                sha256: Digest::of(model),
            },
            FileEntry {
                path: entry::LABELS.into(),
                role: Role::Labels,
                size: labels.len() as u64,
                sha256: Digest::of(&labels),
            },
        ],
        label_count: LABELS.len() as u32,
        model: None,
        metadata: None,
    };
    let manifest_bytes = manifest.to_json();
    let signatures = sign_manifest(&manifest_bytes);
    let path = dir.join(format!("{name}-{version}.ampoule"));
    let mut out = File::create(&path).expect("create test bundle");
    bundle::write_bundle(
        &mut out,
        mtime,
        (&manifest_bytes, &signatures.to_json(), Some(&chunks)),
        &mut &payload[..],
        payload.len() as u64,
    )
    .expect("write test bundle");
    path
}
