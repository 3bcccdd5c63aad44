//! The threaded unpacking (decoder, hasher, writer and flusher threads) keeps every check:
//! bundles whose signed manifest disagrees with what the payload holds are refused with the
//! exact error, and nothing is left behind. Payloads are built here by hand so that the
//! manifest can lie; the tar layout follows POSIX ustar (IEEE Std 1003.1, pax chapter) as
//! written by `ampoule_verify::tar`, the compression is the zstd library (RFC 8878).

use std::path::{Path, PathBuf};

use ampoule::release::atomic::Placement;
use ampoule::release::pack::{Parts, sign_manifest, write_bundle_file};
use ampoule::release::synth;
use ampoule::release::ustar::Small;
use ampoule_verify::format::{FORMAT_VERSION, entry};
use ampoule_verify::manifest::{Compression, FileEntry, Payload, Role};
use ampoule_verify::signature::Signatures;
use ampoule_verify::{Digest, Manifest, PublicKey, Timestamp, TrustedKeys, Verifier, tar};
use ed25519_dalek::SigningKey;

const LABELS: &[u8] = b"red fox\nroe deer\nwild boar\n";

fn key() -> SigningKey {
    SigningKey::from_bytes(&[7u8; 32])
}

fn verifier() -> Verifier {
    let public = PublicKey::from_verifying_key(&key().verifying_key()).expect("a strong key");
    let keys: TrustedKeys = [public].into_iter().collect();
    ampoule_verify::dangerous::verifier_without_app_version(keys).expect("one trusted key")
}

/// An inner tar of `entries`, each declared with its real size unless a size is given.
fn inner_tar(entries: &[(&str, &[u8], Option<u64>)]) -> Vec<u8> {
    let mut out = Vec::new();
    for (name, data, size) in entries {
        let size = size.unwrap_or(data.len() as u64);
        out.extend_from_slice(&tar::header(name, size, 0));
        out.extend_from_slice(data);
        out.resize(out.len() + tar::padding(data.len() as u64) as usize, 0);
    }
    out.extend_from_slice(&tar::END_OF_ARCHIVE);
    out
}

/// Writes a signed bundle whose manifest declares `model` (size and digest) and the labels,
/// with `tar_bytes` as the payload's content: in format 2 ([`FORMAT_VERSION`]), in 1 MiB
/// chunks as pack writes them (the chunks are checked on one thread and decoded on another,
/// ahead of the tar reader), or in format 1 (one zstd stream, hashed whole first).
fn write_bundle(dir: &Path, model: &[u8], tar_bytes: &[u8], format: u32) -> PathBuf {
    let chunk_bytes = 1 << 20;
    let (payload, chunks) = if format == FORMAT_VERSION {
        let (payload, chunks) = ampoule_verify::bundle::chunked_payload(tar_bytes, chunk_bytes, 3)
            .expect("zstd compresses");
        (payload, Some(chunks))
    } else {
        (
            zstd::bulk::compress(tar_bytes, 3).expect("zstd compresses"),
            None,
        )
    };
    let manifest = Manifest {
        format,
        name: "trailcam-species".into(),
        version: "1.2.0".parse().expect("a version"),
        created: Timestamp::from_unix(1_764_547_200).expect("a time"),
        requires_app: "*".parse().expect("a requirement"),
        payload: Payload {
            compression: Compression::Zstd,
            size: payload.len() as u64,
            sha256: chunks.is_none().then(|| Digest::of(&payload)),
            chunk_bytes: chunks.is_some().then_some(chunk_bytes),
            chunks_sha256: chunks.as_deref().map(Digest::of),
        },
        files: vec![
            FileEntry {
                path: "model.bin".into(),
                role: Role::Model,
                size: model.len() as u64,
                sha256: Digest::of(model),
            },
            FileEntry {
                path: entry::LABELS.into(),
                role: Role::Labels,
                size: LABELS.len() as u64,
                sha256: Digest::of(LABELS),
            },
        ],
        label_count: 3,
        model: None,
        metadata: None,
    };
    let manifest_bytes = manifest.to_json();
    let mut signatures = Signatures::default();
    signatures.insert(sign_manifest(&key(), &manifest_bytes));
    let payload_path = dir.join("payload.tmp");
    std::fs::write(&payload_path, &payload).expect("write the payload");
    let out = dir.join("species.ampoule");
    write_bundle_file(
        &out,
        &Parts {
            mtime: 0,
            small: Small {
                manifest: &manifest_bytes,
                signatures: &signatures.to_json(),
                chunks: chunks.as_deref(),
            },
            payload_len: payload.len() as u64,
        },
        &mut std::fs::File::open(&payload_path).expect("open the payload"),
        Placement::New,
    )
    .expect("write the bundle");
    out
}

/// A model over the early-flush size (16 MiB) and many decoder chunks long.
fn big_model(dir: &Path) -> Vec<u8> {
    let path = dir.join("weights");
    synth::write_weights(&path, 17 * 1024 * 1024 + 3, 11).expect("write weights");
    std::fs::read(path).expect("read weights")
}

fn leftovers(dir: &Path) -> Vec<String> {
    std::fs::read_dir(dir)
        .expect("list the directory")
        .map(|e| {
            e.expect("an entry")
                .file_name()
                .to_string_lossy()
                .into_owned()
        })
        .filter(|n| n.starts_with('.'))
        .collect()
}

#[test]
fn a_large_model_unpacks_byte_for_byte() {
    let dir = tempfile::tempdir().expect("temp dir");
    let model = big_model(dir.path());
    let tar_bytes = inner_tar(&[("model.bin", &model, None), ("labels.txt", LABELS, None)]);
    let bundle = write_bundle(dir.path(), &model, &tar_bytes, FORMAT_VERSION);
    let dest = dir.path().join("installed");
    let unpacked = verifier()
        .verify_path(&bundle)
        .expect("verifies")
        .unpack(&dest)
        .expect("unpacks");
    assert_eq!(std::fs::read(&unpacked.model).expect("model"), model);
    assert_eq!(
        std::fs::read(&unpacked.labels_path).expect("labels"),
        LABELS
    );
    assert_eq!(unpacked.labels, ["red fox", "roe deer", "wild boar"]);
}

#[test]
fn a_model_that_differs_from_its_signed_digest_is_refused_and_nothing_is_left() {
    let dir = tempfile::tempdir().expect("temp dir");
    let model = big_model(dir.path());
    let mut tampered = model.clone();
    // One bit flipped past the first early flush, so the writer has flushed part of it.
    tampered[16 * 1024 * 1024 + 5] ^= 1;
    let tar_bytes = inner_tar(&[("model.bin", &tampered, None), ("labels.txt", LABELS, None)]);
    let bundle = write_bundle(dir.path(), &model, &tar_bytes, FORMAT_VERSION);
    let expected = format!(
        "digest mismatch for 'model.bin': manifest declares sha256 {}, the payload holds {}",
        Digest::of(&model),
        Digest::of(&tampered)
    );
    let dest = dir.path().join("installed");
    let err = verifier()
        .verify_path(&bundle)
        .expect("the payload digest matches")
        .unpack(&dest)
        .expect_err("the model digest does not");
    assert_eq!(err.to_string(), expected);
    assert!(!dest.exists());
    assert_eq!(leftovers(dir.path()), Vec::<String>::new());
    // The check without writing refuses it the same way.
    let err = verifier()
        .verify_path(&bundle)
        .expect("the payload digest matches")
        .check_contents()
        .expect_err("the model digest does not");
    assert_eq!(err.to_string(), expected);
}

#[test]
fn a_payload_that_ends_inside_the_model_is_refused() {
    let dir = tempfile::tempdir().expect("temp dir");
    let model = vec![0x42u8; 700_000];
    // The header declares the full size, but only part of the model follows, and nothing else.
    let mut tar_bytes = tar::header("model.bin", model.len() as u64, 0).to_vec();
    tar_bytes.extend_from_slice(&model[..300_000]);
    // Format 1 finds the end in the stream; format 2 before decoding, in the one chunk's
    // frame, which states fewer bytes than its place holds.
    for (format, expected) in [
        (
            1,
            "payload entry 'model.bin' is truncated: the file ended early".to_string(),
        ),
        (
            FORMAT_VERSION,
            format!(
                "payload chunk 0 is not valid zstd data: its frame declares {} decoded bytes, \
                 but its place in the inner tar holds 702976",
                tar_bytes.len()
            ),
        ),
    ] {
        let bundle = write_bundle(dir.path(), &model, &tar_bytes, format);
        let dest = dir.path().join("installed");
        let err = verifier()
            .verify_path(&bundle)
            .expect("verifies")
            .unpack(&dest)
            .expect_err("truncated");
        assert_eq!(err.to_string(), expected);
        assert!(!dest.exists());
        assert_eq!(leftovers(dir.path()), Vec::<String>::new());
        std::fs::remove_file(bundle).expect("remove the bundle");
    }
}

#[test]
fn a_payload_that_decompresses_past_its_declared_size_is_refused() {
    let dir = tempfile::tempdir().expect("temp dir");
    let model = vec![0x42u8; 700_000];
    let mut tar_bytes = inner_tar(&[("model.bin", &model, None), ("labels.txt", LABELS, None)]);
    // Zeros after the end-of-archive marker: a bomb as far as the declared sizes go.
    tar_bytes.resize(tar_bytes.len() + 4 * 1024 * 1024, 0);
    let tar_len = tar::entry_len(model.len() as u64)
        + tar::entry_len(LABELS.len() as u64)
        + tar::END_OF_ARCHIVE.len() as u64;
    // Format 1: stopped one byte past the declared length, as it decodes.
    let bundle = write_bundle(dir.path(), &model, &tar_bytes, 1);
    let dest = dir.path().join("installed");
    let err = verifier()
        .verify_path(&bundle)
        .expect("verifies")
        .unpack(&dest)
        .expect_err("too long");
    assert_eq!(
        err.to_string(),
        format!("payload decompresses to more than the {tar_len} bytes its manifest declares")
    );
    assert!(!dest.exists());
    std::fs::remove_file(bundle).expect("remove the bundle");
    // Format 2: the chunk list has a record for each MiB the bomb holds, more than the
    // declared files make; refused before anything is decoded.
    let bundle = write_bundle(dir.path(), &model, &tar_bytes, FORMAT_VERSION);
    let err = verifier().verify_path(&bundle).expect_err("too long");
    assert_eq!(
        err.to_string(),
        format!(
            "bundle entry 'chunks.sha256' lists 5 chunks, but the manifest's files make an inner \
             tar of {tar_len} bytes, which needs 1 in chunks of 1048576 bytes"
        )
    );
}
