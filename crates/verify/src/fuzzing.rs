//! The fuzz targets' entry points (feature `fuzzing`, never in an app's build): one function
//! per target in `fuzz/fuzz_targets/`, each taking the fuzzer's bytes to the place where
//! hostile bytes first land on a device, an auditor's machine or a release tool. Keeping them
//! here, inside the crate, lets a target reach crate-private steps without making anything
//! public in the default build, and a later format change touches this one file.
//!
//! Some checks can only be passed with a signature, which a fuzzer cannot forge. For those the
//! target comes in two forms: the raw form feeds the bytes in as they arrive (so the fuzzer
//! works on the envelope, the caps and the signature check), and the signed form treats the
//! bytes as the document text and signs it with [`FUZZ_KEY`], a key the entry point's
//! verifiers trust, so the fuzzer reaches the parse and the checks that follow the signature.
//! Where a document carries a digest of other bytes (a manifest of its payload), the signed
//! form computes it, so the fuzzer reaches the code behind the digest too.
//!
//! Inputs of several documents are split at [`SEPARATOR`], a line no JSON text can hold.
//!
//! Every entry point returns nothing: a panic, an endless loop or an allocation over the
//! fuzzer's limits is the finding. [`seeds`] makes the committed seed corpora with the
//! project's own writers.

use std::fs::{self, File, OpenOptions};
use std::io::Write;
use std::path::PathBuf;
use std::sync::OnceLock;

use ed25519_dalek::{Signer, SigningKey};
use semver::Version;

use crate::check::bundle::Verifier;
use crate::check::feed::{Feed, FeedVerifier, Release, SignedFeed, TrustSetRef};
use crate::check::ledger_proof::LedgerVerifier;
use crate::check::policy::CompatibilityPolicy;
use crate::check::policy_document::PolicyDocument;
use crate::check::trust::{
    DocumentKind, KeyEntry, Thresholds, TrustSet, TrustSetBody, TrustSetFile,
};
use crate::format::bundle::{read_layout, write_bundle};
use crate::format::chunks::ListWriter;
use crate::format::digest::Digest;
use crate::format::keys::{PublicKey, TrustedKeys};
use crate::format::ledger_entry::{
    ConsistencyStep, ENTRY_FORMAT, Entry, Event, FeedLedger, Offered, Record, TrustSetEntry,
};
use crate::format::manifest::{Compression, FileEntry, Manifest, Payload, Role};
use crate::format::merkle::{
    ConsistencyProof, InclusionProof, MemoryTree, SignedTreeHead, TreeHead, consistency_proof,
    inclusion_proof, leaf_hash, tree_root,
};
use crate::format::metadata::{Metadata, MetadataBuilder};
use crate::format::signature::{SignatureEntry, Signatures};
use crate::format::signed::{SignedDocument, kind};
use crate::format::time::Timestamp;
use crate::format::{
    FEED_FORMAT_VERSION, FORMAT_VERSION, OLDEST_FORMAT_VERSION, context, entry, signed_bytes, tar,
};
use crate::store::Store;
use crate::update::{App, Device, Trust};

/// The secret half of the key every entry point's verifiers trust for every role (the same
/// fixed seed the crate's integration tests sign with). Public knowledge: only fuzzing uses it.
pub const FUZZ_KEY: [u8; 32] = [7u8; 32];

/// Splits an input holding several documents.
pub const SEPARATOR: &[u8] = b"\n--\n";

/// The bundle name, channel and app version the entry points' verifiers expect.
const NAME: &str = "trailcam-species";
const CHANNEL: &str = "stable";
const APP_VERSION: Version = Version::new(1, 4, 0);
/// The time the seeds were made at, and the device's clock in every entry point (an hour on).
const MADE: u64 = 1_796_000_000;
const NOW: u64 = MADE + 3600;
/// The most trees the proof oracle builds leaves for.
const ORACLE_LEAVES: u64 = 300;
const LABELS: &str = "fox\nroe deer\nwild boar\nbadger\nhare\nempty frame\n";

fn signing_key() -> SigningKey {
    SigningKey::from_bytes(&FUZZ_KEY)
}

fn public_key() -> PublicKey {
    PublicKey::from_verifying_key(&signing_key().verifying_key())
        .expect("the fuzz key is a valid, strong Ed25519 key")
}

fn trusted() -> TrustedKeys {
    [public_key()].into_iter().collect()
}

fn now() -> Timestamp {
    Timestamp::from_unix(NOW).expect("a fixed time in range")
}

fn sign(context: &[u8], document: &[u8]) -> SignatureEntry {
    SignatureEntry {
        key_id: public_key().id(),
        signature: signing_key()
            .sign(&signed_bytes(context, document))
            .to_bytes(),
    }
}

fn sections(data: &[u8]) -> Vec<&[u8]> {
    let mut parts = Vec::new();
    let mut rest = data;
    while parts.len() < 16 {
        match rest.windows(SEPARATOR.len()).position(|w| w == SEPARATOR) {
            Some(i) => {
                parts.push(&rest[..i]);
                rest = &rest[i + SEPARATOR.len()..];
            }
            None => break,
        }
    }
    parts.push(rest);
    parts
}

fn joined(parts: &[&[u8]]) -> Vec<u8> {
    parts.join(SEPARATOR)
}

/// A scratch path of this process under the system's temporary directory.
fn scratch(name: &str) -> PathBuf {
    std::env::temp_dir().join(format!("ampoule-fuzz-{}-{name}", std::process::id()))
}

/// `bytes` as an open file, as the bundle reader takes it.
fn as_file(bytes: &[u8]) -> File {
    let path = scratch("bundle");
    let mut file = OpenOptions::new()
        .read(true)
        .write(true)
        .create(true)
        .truncate(true)
        .open(&path)
        .expect("the fuzzer can write its scratch file");
    file.write_all(bytes)
        .expect("the fuzzer can write its scratch file");
    file
}

/// The verifier every bundle entry point uses: the fuzz key, the app's version and name.
fn verifier() -> Verifier {
    Verifier::new(trusted(), APP_VERSION)
        .expect("one trusted key")
        .require_name(NAME)
        .max_unpacked_bytes(1 << 20)
}

// ---------------------------------------------------------------------------------------------
// Bundles and payloads

/// `bundle`: the bytes as a bundle file. The device's verifier (outer tar, caps, signatures
/// entry, signature check; nothing after it unless the fuzzer finds a signature), then the
/// release tools' unverified reading of the same file (manifest parse, payload digest, and the
/// decoder when the manifest's digest matches).
pub fn bundle(data: &[u8]) {
    let file = as_file(data);
    if let Ok(mut verified) = verifier().verify_file(file.try_clone().expect("clone")) {
        let _ = verified.check_contents();
    }
    let mut file = file;
    let Ok(layout) = read_layout(&mut file, data.len() as u64) else {
        return;
    };
    let _ = Signatures::from_json(&layout.signatures);
    let Ok(manifest) = Manifest::from_json(&layout.manifest) else {
        return;
    };
    if crate::format::bundle::check_payload(&mut file, &layout, &manifest, None).is_ok() {
        let _ = crate::payload::unpack::stream(
            &crate::payload::unpack::Source {
                file: &file,
                payload_offset: layout.payload_offset,
                manifest: &manifest,
                chunks: layout.chunks.as_deref(),
                progress: None,
            },
            None,
        );
    }
}

/// `manifest`: the bytes as a manifest, signed with the fuzz key, through the store's re-check
/// of a stored manifest (signature, strict parse, validation of every field and of the signed
/// metadata, the app's policy); a manifest that passes must survive its own JSON, its metadata
/// is read back by key, and a policy that requires a metadata value compares it. Then the same bytes as
/// `pack --meta-file` reads a metadata file (strict JSON, repeated keys, the same rules).
pub fn manifest(data: &[u8]) {
    let signatures = Signatures {
        signatures: vec![sign(context::MANIFEST, data)],
    };
    let checked = verifier().check_stored("manifest", data, &signatures.to_json());
    if let Ok((manifest, _)) = checked {
        let again = Manifest::from_json(&manifest.to_json()).expect("a valid manifest reads back");
        assert_eq!(again, manifest);
        let _ = manifest.unpacked_tar_len();
        let _ = manifest.parse_labels(LABELS.as_bytes());
        if let Some(metadata) = &manifest.metadata {
            for (key, value) in metadata.leaves() {
                assert_eq!(
                    manifest.metadata(&key),
                    Some(value),
                    "a leaf reads back by key"
                );
            }
        }
        let _ = metadata_policy().check_metadata(&manifest);
    }
    let mut builder = MetadataBuilder::new();
    if builder.add_json(data).is_ok() {
        let _ = builder.build();
    }
}

/// The metadata requirement the `manifest` entry point compares a passing manifest with.
fn metadata_policy() -> CompatibilityPolicy {
    CompatibilityPolicy::builder()
        .require_metadata("preprocess.colour_order", "rgb")
        .build()
        .expect("a fixed, valid requirement")
}

/// The seed manifest's metadata: every documented key and a free one.
fn seed_metadata() -> Metadata {
    let mut builder = MetadataBuilder::new();
    builder
        .add_json(
            br#"{"preprocess": {"input_size": [96, 96], "mean": [0.485, 0.456, 0.406],
                 "std": [0.229, 0.224, 0.225], "scale": 255, "colour_order": "rgb"},
                 "eval": {"top1": 0.912, "reserve_2026": {"top5": 0.987}},
                 "data": {"snapshot": "2026-11-30"}, "notes": "first reserve model",
                 "team": {"site": "north ridge", "night_frames": true}}"#,
        )
        .expect("valid seed metadata");
    builder
        .build()
        .expect("valid seed metadata")
        .expect("seed metadata is not empty")
}

/// `signatures`: the bytes as a signatures entry, counted against a fixed manifest.
pub fn signatures(data: &[u8]) {
    let Ok(signatures) = Signatures::from_json(data) else {
        return;
    };
    let document = b"{}";
    if let Ok(doc) = SignedDocument::<kind::Manifest>::new(document, &signatures.signatures) {
        let _ = doc.tally(&trusted());
    }
    let again = Signatures::from_json(&signatures.to_json()).expect("signatures read back");
    assert_eq!(again.signatures.len(), signatures.signatures.len());
}

/// The manifest the payload entry points describe their payloads with: format 1, which binds
/// the payload by one digest and decodes it as one stream ([`chunked`] makes it format 2).
fn template_manifest(payload: &[u8], files: [(u64, Digest); 2], label_count: u32) -> Manifest {
    Manifest {
        format: OLDEST_FORMAT_VERSION,
        name: NAME.into(),
        version: Version::new(1, 0, 0),
        created: Timestamp::from_unix(MADE).expect("a fixed time in range"),
        requires_app: ">=1.0.0, <2.0.0".parse().expect("a fixed range"),
        payload: Payload {
            compression: Compression::Zstd,
            size: payload.len() as u64,
            sha256: Some(Digest::of(payload)),
            chunk_bytes: None,
            chunks_sha256: None,
        },
        files: vec![
            FileEntry {
                path: "model.onnx".into(),
                role: Role::Model,
                size: files[0].0,
                sha256: files[0].1,
            },
            FileEntry {
                path: entry::LABELS.into(),
                role: Role::Labels,
                size: files[1].0,
                sha256: files[1].1,
            },
        ],
        label_count,
        model: None,
        metadata: None,
    }
}

/// `manifest` (format 1) as the format 2 manifest of a payload of `payload_len` bytes whose
/// chunk list is `list`, in chunks of 1 MiB.
fn chunked(manifest: &Manifest, payload_len: usize, list: &[u8]) -> Manifest {
    let mut manifest = manifest.clone();
    manifest.format = FORMAT_VERSION;
    manifest.payload.size = payload_len as u64;
    manifest.payload.sha256 = None;
    manifest.payload.chunk_bytes = Some(1 << 20);
    manifest.payload.chunks_sha256 = Some(Digest::of(list));
    manifest
}

/// A bundle file of `manifest` (signed with the fuzz key), the chunk list `chunks` (format
/// 2) and `payload`.
fn bundle_bytes(manifest: &Manifest, chunks: Option<&[u8]>, payload: &[u8]) -> Vec<u8> {
    let manifest = manifest.to_json();
    let signatures = Signatures {
        signatures: vec![sign(context::MANIFEST, &manifest)],
    }
    .to_json();
    let mut out = Vec::new();
    write_bundle(
        &mut out,
        MADE,
        (&manifest, &signatures, chunks),
        &mut &payload[..],
        payload.len() as u64,
    )
    .expect("writing to memory cannot fail");
    out
}

/// Verifies a bundle the entry point made and decodes its payload.
fn verify_and_decode(bundle: &[u8]) {
    let mut verified = verifier()
        .verify_file(as_file(bundle))
        .expect("a bundle the fuzz target signed verifies");
    let _ = verified.check_contents();
}

/// The files of the seed payload: an invented model and the label list.
fn seed_files() -> (Vec<u8>, Vec<u8>) {
    let model: Vec<u8> = (0..700u32).map(|i| (i * 37 % 251) as u8).collect();
    (model, LABELS.as_bytes().to_vec())
}

/// The seed payload's sizes and digests.
fn seed_entries() -> [(u64, Digest); 2] {
    let (model, labels) = seed_files();
    [
        (model.len() as u64, Digest::of(&model)),
        (labels.len() as u64, Digest::of(&labels)),
    ]
}

/// `payload`: the bytes as the compressed payload of a bundle whose signed manifest declares
/// their size and SHA-256 (and the seed payload's files): the bounded zstd decoder (window
/// cap, output cap), the inner tar and the per-file digests. Then the same bytes as the one
/// chunk of a format 2 payload, its record in a signed chunk list: the chunk's frame checks
/// (one frame, its declared and actual decoded size) and the same inner tar.
pub fn payload(data: &[u8]) {
    let manifest = template_manifest(data, seed_entries(), 6);
    verify_and_decode(&bundle_bytes(&manifest, None, data));
    let mut list = ListWriter::default();
    list.push(data);
    let list = list.finish();
    let manifest = chunked(&manifest, data.len(), &list);
    let bundle = bundle_bytes(&manifest, Some(&list), data);
    // A chunk over its cap is refused by the list's check, before any decoding.
    if let Ok(mut verified) = verifier().verify_file(as_file(&bundle)) {
        let _ = verified.check_contents();
    }
}

/// `payload_tar`: the bytes as the decompressed inner tar. The target compresses them and
/// declares in the signed manifest the sizes and digests the tar's own headers lead to, so the
/// fuzzer reaches the per-file digests, the padding and end-of-archive checks, trailing data
/// and the label list's parse.
pub fn payload_tar(data: &[u8]) {
    let mut files = seed_entries();
    let mut label_count = 6;
    let mut offset = 0usize;
    for (index, file) in files.iter_mut().enumerate() {
        let Some(block) = data.get(offset..offset + 512) else {
            break;
        };
        let block: &[u8; 512] = block.try_into().expect("512 bytes");
        let Ok(tar::Block::File { size, .. }) = tar::parse_header(block, "payload") else {
            break;
        };
        let start = offset + 512;
        let end = usize::try_from(size)
            .ok()
            .and_then(|s| start.checked_add(s))
            .map_or(data.len(), |e| e.min(data.len()));
        let content = &data[start..end];
        *file = (size, Digest::of(content));
        if index == 1
            && let Ok(labels) = crate::format::labels::parse_stored_labels(content)
        {
            label_count = u32::try_from(labels.len()).unwrap_or(u32::MAX).max(1);
        }
        offset = end.saturating_add(tar::padding(size) as usize);
    }
    let payload = zstd::bulk::compress(data, 1).expect("zstd compresses in memory");
    let manifest = template_manifest(&payload, files, label_count);
    if manifest.validate().is_err() {
        return;
    }
    verify_and_decode(&bundle_bytes(&manifest, None, &payload));
}

// ---------------------------------------------------------------------------------------------
// Feeds, trust sets and the ledger

fn ledger_verifier(remembered: Option<TreeHead>) -> LedgerVerifier {
    LedgerVerifier::new(trusted(), 1)
        .expect("one trusted key")
        .remembered(remembered)
}

fn feed_verifier() -> FeedVerifier {
    FeedVerifier::new(trusted(), CHANNEL).expect("one trusted key and a valid channel")
}

/// `feed`: the bytes as a feed file, through the device's feed verifier with the ledger
/// required (size cap, envelope, signatures; nothing after them unless the fuzzer finds a
/// signature), then the release tools' unchecked reading of the feed text inside.
pub fn feed(data: &[u8]) {
    let _ = feed_verifier()
        .require_ledger(ledger_verifier(None))
        .verify(data, now());
    if let Ok(signed) = SignedFeed::from_json(data) {
        let _ = Feed::from_json(signed.feed.as_bytes());
    }
}

/// `feed_signed`: sections `feed text [-- remembered tree head [-- consistency step ...]]`.
/// The target re-signs the feed's tree head with the fuzz key (re-writing the text when it
/// parses) and signs the feed text, so the fuzzer reaches the feed's parse, its freshness and
/// sequence checks, the ledger entry, the inclusion proof, the walk over the consistency steps
/// (served in order) and the device's decision.
pub fn feed_signed(data: &[u8]) {
    let parts = sections(data);
    let mut text = parts[0].to_vec();
    if let Ok(mut feed) = serde_json::from_slice::<Feed>(&text)
        && let Some(ledger) = &mut feed.ledger
    {
        ledger.tree_head = signed_head(ledger.tree_head.head());
        text = feed.to_json().into_bytes();
    }
    let Ok(text) = String::from_utf8(text) else {
        return;
    };
    let signature = sign(context::FEED, text.as_bytes());
    let envelope = SignedFeed {
        feed: text,
        signatures: vec![signature],
    }
    .to_json();
    let remembered = parts
        .get(1)
        .and_then(|b| serde_json::from_slice::<TreeHead>(b).ok());
    let mut steps = parts.iter().skip(2);
    let mut step = |size: u64| {
        steps.next().map(|b| b.to_vec()).ok_or_else(|| {
            crate::error::Error::new(
                crate::error::ErrorKind::Proof,
                format!("no consistency step from size {size}"),
            )
        })
    };
    let with_ledger = feed_verifier()
        .last_accepted(1, None)
        .require_ledger(ledger_verifier(remembered));
    if let Ok(verified) = with_ledger.verify_with_steps(&envelope, now(), &mut step) {
        let _ = verified.decide(&verifier().installed(Version::new(1, 0, 0)), "fuzz-device");
        if let Some(release) = verified.release() {
            let _ = release.urls("https://models.example.invalid/feeds/stable.json");
        }
        if let Some(trust_set) = verified.trust_set() {
            let _ = trust_set.url("https://models.example.invalid/feeds/stable.json");
        }
    }
    let _ = feed_verifier().verify(&envelope, now());
}

fn signed_head(head: TreeHead) -> SignedTreeHead {
    let signature = sign(context::TREE_HEAD, &head.signed_document());
    SignedTreeHead::new(head, vec![signature])
}

/// The trust set every trust-set entry point trusts already: version 1, the fuzz key in every
/// role, thresholds of 1.
fn initial_trust_set() -> Vec<u8> {
    trust_set_file(&trust_set_body(1).to_json())
}

fn trust_set_body(version: u64) -> TrustSetBody {
    TrustSetBody {
        format: crate::format::trust_set::FORMAT_VERSION,
        version,
        expires: Timestamp::from_unix(MADE + 365 * 86_400).expect("a fixed time in range"),
        keys: vec![KeyEntry::new(
            &public_key(),
            DocumentKind::ALL.to_vec(),
            "fuzz key",
        )],
        thresholds: Thresholds {
            bundle: 1,
            feed: 1,
            tree_head: 1,
            trust_set: 1,
        },
    }
}

/// A trust-set file holding `text`, signed with the fuzz key.
fn trust_set_file(text: &str) -> Vec<u8> {
    let signature = sign(context::TRUST_SET, text.as_bytes());
    let envelope = serde_json::json!({ "trust_set": text, "signatures": [signature] });
    serde_json::to_vec_pretty(&envelope).expect("a trust-set envelope serializes")
}

/// Uses a trust set a check accepted: verifiers built from it, and its file read back.
fn use_trust_set(set: &TrustSet) {
    let _ = Verifier::from_trust_set(set, APP_VERSION);
    let _ = FeedVerifier::from_trust_set(set, CHANNEL);
    let _ = LedgerVerifier::from_trust_set(set);
    let again = TrustSetFile::from_json(&set.to_json()).expect("an accepted trust set reads back");
    assert_eq!(again.text(), set.file().text());
}

/// `trust_set`: the bytes as a trust-set file: the unchecked parse release tools make (both
/// JSON layers, every field, the keys), the initial check, and acceptance as the successor of
/// the fuzz key's set (signature checks; nothing after them unless the fuzzer finds one).
pub fn trust_set(data: &[u8]) {
    let _ = TrustSetFile::from_json(data);
    let _ = TrustSet::verify_initial(data, now());
    let initial =
        TrustSet::verify_initial(&initial_trust_set(), now()).expect("the fuzz trust set verifies");
    let _ = initial.accept_successor(data, now());
}

/// `trust_set_signed`: the bytes as a trust set's text, signed with the fuzz key: the parse,
/// the validation, the counting of its own keys' signatures, expiry, and acceptance as the
/// successor of the fuzz key's set, as the initial set, and as a device's stored set.
pub fn trust_set_signed(data: &[u8]) {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let file = trust_set_file(text);
    let initial_bytes = initial_trust_set();
    let initial =
        TrustSet::verify_initial(&initial_bytes, now()).expect("the fuzz trust set verifies");
    if let Ok(next) = initial.accept_successor(&file, now()) {
        use_trust_set(&next);
    }
    if let Ok(set) = TrustSet::verify_initial(&file, now()) {
        use_trust_set(&set);
    }
    let _ = TrustSet::resume(&initial_bytes, Some(&file), now());
    let _ = TrustSet::renew(&initial_bytes, None, &file, now());
}

/// The app's policy document every setting of which the seed states (FORMAT.md's example).
const SEED_POLICY: &str = r#"{
  "policy_format": 1,
  "about": "what the trail camera's code feeds the species model and reads from it",
  "bundle_name": "trailcam-species",
  "max_bundle_bytes": 67108864,
  "max_unpacked_bytes": 268435456,
  "model": {
    "format": "onnx",
    "max_opset": 17,
    "weights_8bit": false,
    "inputs": [{ "name": "image", "dtype": "float32", "shape": "[*, 3, 96, 96]" }],
    "outputs": [{ "name": "species", "dtype": "float32", "shape": "[*, 7]" }],
    "classifier_output": "species",
    "class_dim": 1
  },
  "labels": { "min_count": 2, "max_count": 64, "required": ["empty frame"] },
  "metadata": { "preprocess.colour_order": "rgb", "preprocess.input_size": 96 }
}"#;

/// `policy_document`: the bytes as the app's policy document (what the C interface's open
/// calls and the CLI's `--policy` pass on): the strict reader with its caps, and, when it
/// reads, the policy's checks of a real ONNX classifier's signature and six labels.
pub fn policy_document(data: &[u8]) {
    static SIGNATURE: OnceLock<Option<crate::format::model::ModelSignature>> = OnceLock::new();
    let Ok(document) = PolicyDocument::parse(data) else {
        return;
    };
    let signature = SIGNATURE.get_or_init(|| {
        let model = include_bytes!("../tests/data/models/trailcam-f32.onnx");
        crate::format::model::read_model_signature("model.onnx", &model[..], model.len() as u64)
            .expect("the seed model reads")
    });
    let labels = [
        "fox",
        "roe deer",
        "wild boar",
        "badger",
        "hare",
        "empty frame",
    ];
    let _ = document.compatibility.check(signature.as_ref(), &labels);
    let _ = document.compatibility.check(None, &labels[..1]);
}

/// `tree_head`: the bytes as a signed tree head (parse, caps, signature check, and its JSON
/// read back), and as an unsigned head that the target signs, which must then verify.
pub fn tree_head(data: &[u8]) {
    if let Ok(signed) = SignedTreeHead::from_json(data) {
        let _ = signed.verify(&trusted(), 1);
        let _ = crate::check::ledger_proof::check_tree_head(&signed, &trusted(), 2);
        let again =
            SignedTreeHead::from_json(&signed.to_json()).expect("a signed tree head reads back");
        assert_eq!(again, signed);
    }
    if let Ok(head) = serde_json::from_slice::<TreeHead>(data) {
        let signed = signed_head(head);
        let verified = signed
            .verify(&trusted(), 1)
            .expect("a tree head signed with the trusted key verifies");
        assert_eq!(*verified.head(), head);
    }
}

/// The tree the proof oracle compares proofs with: leaf `i` is the hash of `i`'s 8 bytes.
fn oracle_tree() -> &'static MemoryTree {
    static TREE: OnceLock<MemoryTree> = OnceLock::new();
    TREE.get_or_init(|| {
        (0..ORACLE_LEAVES)
            .map(|i| leaf_hash(&i.to_be_bytes()))
            .collect()
    })
}

fn oracle_head(size: u64) -> TreeHead {
    TreeHead {
        tree_size: size,
        root_hash: tree_root(oracle_tree(), size).expect("the oracle tree holds the size"),
        time: MADE,
    }
}

/// `proofs`: the bytes as an inclusion proof, a consistency proof and a consistency step
/// file. Proofs within the oracle's tree are checked against it: one that verifies must be the
/// proof the crate's own prover makes (anything else would be a SHA-256 collision). Larger ones
/// are checked against arbitrary roots for what the arithmetic does with their sizes.
pub fn proofs(data: &[u8]) {
    let tree = oracle_tree();
    if let Ok(proof) = serde_json::from_slice::<InclusionProof>(data) {
        if proof.tree_size <= ORACLE_LEAVES && proof.leaf_index < ORACLE_LEAVES {
            let head = oracle_head(proof.tree_size);
            let leaf = leaf_hash(&proof.leaf_index.to_be_bytes());
            if proof.verify(&leaf, &head).is_ok() {
                let real = inclusion_proof(tree, proof.leaf_index, proof.tree_size)
                    .expect("a verified proof's leaf is in the tree");
                assert_eq!(
                    proof.hashes, real,
                    "an inclusion proof verified that the prover did not make"
                );
            }
        } else {
            let head = TreeHead {
                tree_size: proof.tree_size,
                root_hash: Digest::of(data),
                time: 0,
            };
            let _ = proof.verify(&leaf_hash(b""), &head);
        }
    }
    if let Ok(proof) = serde_json::from_slice::<ConsistencyProof>(data) {
        if proof.new_size <= ORACLE_LEAVES {
            let (old, new) = (
                oracle_head(proof.old_size.min(ORACLE_LEAVES)),
                oracle_head(proof.new_size),
            );
            if proof.old_size <= ORACLE_LEAVES && proof.verify(&old, &new).is_ok() {
                let real = consistency_proof(tree, proof.old_size, proof.new_size)
                    .expect("a verified proof's sizes are in the tree");
                assert_eq!(
                    proof.hashes, real,
                    "a consistency proof verified that the prover did not make"
                );
            }
        } else {
            let old = TreeHead {
                tree_size: proof.old_size,
                root_hash: Digest::of(data),
                time: 0,
            };
            let new = TreeHead {
                tree_size: proof.new_size,
                root_hash: leaf_hash(data),
                time: 0,
            };
            let _ = proof.verify(&old, &new);
        }
    }
    if let Ok(step) = ConsistencyStep::from_json(data) {
        let again = ConsistencyStep::from_json(&step.to_json()).expect("a step reads back");
        assert_eq!(again, step);
        let head = step.tree_head.head();
        if head.tree_size <= ORACLE_LEAVES && step.proof.old_size <= head.tree_size {
            let _ = step.proof.verify(
                &oracle_head(step.proof.old_size),
                &oracle_head(head.tree_size),
            );
        }
    }
}

/// `ledger_entry`: the bytes as a ledger entry of either kind (and read back from its own
/// bytes), and as a feed's ledger object.
pub fn ledger_entry(data: &[u8]) {
    if let Ok(record) = Record::from_bytes(data) {
        let again = Record::from_bytes(&record.to_bytes()).expect("an entry reads back");
        assert_eq!(again, record);
        let _ = record.time();
    }
    let _ = Entry::from_bytes(data);
    if let Ok(ledger) = serde_json::from_slice::<FeedLedger>(data) {
        let _ = ledger.tree_head.verify(&trusted(), 1);
        if let Some(entry) = &ledger.entry {
            let _ = Record::from_bytes(entry.as_bytes());
        }
    }
}

// ---------------------------------------------------------------------------------------------
// The store

/// This process's store directory, holding one installed release of the seed bundle, whose
/// `state.json` the target then replaces; made again if anything removed the release.
fn store_dir() -> PathBuf {
    let dir = scratch("store");
    let releases = dir.join(crate::store::RELEASES_DIR);
    let installed = fs::read_dir(&releases).is_ok_and(|mut d| d.next().is_some());
    if !installed {
        let _ = fs::remove_dir_all(&dir);
        let store = Store::open(&dir, verifier()).expect("a fresh store opens");
        let verified = verifier()
            .verify_file(as_file(&seed_bundle()))
            .expect("the seed bundle verifies");
        store
            .install_without_feed(verified)
            .expect("the seed bundle installs");
    }
    dir
}

/// Removes this process's scratch files (the bundle file and the stores), for tests that run
/// the entry points in a process that goes on.
pub fn clean_up() {
    for name in [
        "bundle", "store", "device", "offline", "chain", "outside", "delta",
    ] {
        let path = scratch(name);
        let _ = fs::remove_dir_all(&path);
        let _ = fs::remove_file(&path);
    }
}

/// The files the `store` target writes, in the order of its sections.
const STORE_FILES: [&str; 7] = [
    crate::store::STATE_FILE,
    crate::store::TRUST_SET_FILE,
    crate::store::TRUST_CHAIN_FILE,
    crate::store::HIGHEST_FILE,
    "feeds/stable.json",
    "downloads/refused.json",
    "device-id",
];

/// A section that plants a symbolic link (to a file outside the store) instead of a file.
const LINK: &[u8] = b"@link";

/// `store`: sections `state.json -- trust-set.json -- trust-chain.json -- highest.json --
/// feeds/stable.json -- downloads/refused.json -- device-id`, written into a store that holds
/// one installed release (a file whose section is absent is removed, except that the device id
/// is then a valid one; a section `@link` plants a symbolic link to a file outside the store
/// instead): opening the store (parse and consistency checks of the state, then what the kept
/// signed manifests and feeds prove of it), opening the current release under that state, the
/// trust sets the store keeps (believed only as far as they chain from the set shipped with
/// the app), the device id and remembered refusal a device reads, and the store's clean-up.
/// Nothing outside the store may change.
pub fn store(data: &[u8]) {
    let dir = &store_dir();
    let parts = sections(data);
    let outside = scratch("outside");
    let victim = outside.join("photos.db");
    fs::create_dir_all(&outside).expect("the fuzzer can write its scratch files");
    fs::write(&victim, b"the app's own data").expect("the fuzzer can write its scratch files");
    for (index, name) in STORE_FILES.into_iter().enumerate() {
        let path = dir.join(name);
        match fs::symlink_metadata(&path) {
            Ok(m) if m.is_dir() => fs::remove_dir_all(&path).expect("the fuzzer owns its store"),
            Ok(_) => fs::remove_file(&path).expect("the fuzzer owns its store"),
            Err(_) => {}
        }
        // Without its section the device id stays a valid one: a fresh id is written and
        // synced to disk, which would slow every input down to the disk's pace.
        let kept_id: &[u8] = b"fuzz-device-kept\n";
        let Some(bytes) = parts
            .get(index)
            .copied()
            .or((name == "device-id").then_some(kept_id))
        else {
            continue;
        };
        if let Some(parent) = path.parent() {
            fs::create_dir_all(parent).expect("the fuzzer can write its store");
        }
        if bytes == LINK {
            std::os::unix::fs::symlink(&victim, &path).expect("the fuzzer can plant a link");
        } else {
            fs::write(&path, bytes).expect("the fuzzer can write its store");
        }
    }
    let initial = initial_trust_set();
    let held = TrustSet::verify_initial(&initial, now()).expect("the fuzz trust set verifies");
    if let Ok(store) = Store::open(dir, verifier()) {
        let store = store.with_trust_chain(&initial).with_documents(
            held.signers().expect("feed signers"),
            held.signers().expect("tree-head signers"),
        );
        let _ = store.state();
        let _ = store.open_current();
        let _ = store.trust_chain(&initial);
    }
    let _ = Store::load_trust_set(dir, &initial, now());
    let own_id = App::new(
        Trust::shipped_trust_set(initial.clone()).expect("the fuzz trust set verifies"),
        APP_VERSION,
    );
    if let Ok(device) = Device::open(dir, CHANNEL, own_id, now()) {
        if let Ok(downloads) = device.downloads() {
            let _ = crate::update::refusals::recall(
                &downloads,
                &Digest::of(b"offered"),
                &Digest::of(b"app"),
                now(),
                "bundle",
            );
        }
        let _ = device.gc();
    }
    assert_eq!(
        fs::read(&victim).expect("the file outside the store is still there"),
        b"the app's own data",
        "the store wrote through a planted link"
    );
}

/// `onnx`: the bytes as an ONNX model (issue 11's reading paths): under every reading rule the
/// streaming and the seeking reader agree, a signature survives its own JSON, and the pack
/// path (the oldest rules that read alike, a class dimension recorded for the first output)
/// and the device's re-read under the record's rules and classifier give the same record.
pub fn onnx(data: &[u8]) {
    use crate::format::model::{
        ModelSignature, read_as, read_model_signature, read_model_signature_seekable,
    };
    let len = data.len() as u64;
    let streamed = read_model_signature("model.onnx", data, len);
    let seeked = read_model_signature_seekable("model.onnx", std::io::Cursor::new(data), len);
    match (&streamed, &seeked) {
        (Ok(a), Ok(b)) => assert_eq!(a, b, "the streaming and seeking readers disagree"),
        (Err(a), Err(b)) => assert_eq!(a.to_string(), b.to_string()),
        (a, b) => panic!("the readers disagree: {a:?} / {b:?}"),
    }
    for rules in 1..=crate::format::MODEL_READING_RULES {
        let Ok(Some(signature)) =
            read_as("model.onnx", std::io::Cursor::new(data), len, rules, None)
        else {
            continue;
        };
        let json = serde_json::to_string(&signature).expect("a signature serializes");
        let back: ModelSignature = serde_json::from_str(&json).expect("a signature reads back");
        assert_eq!(back, signature);
        let _ = signature.class_count(None, None);
        let _ = signature.size_report();
        let Some(output) = signature.outputs.first() else {
            continue;
        };
        let request = crate::format::model::Classifier {
            tensor: output.name.clone(),
            dim: Some(1),
            shape: None,
        };
        if let Ok(Some(recorded)) = read_as(
            "model.onnx",
            std::io::Cursor::new(data),
            len,
            rules,
            Some(&request),
        ) {
            let again = read_as(
                "model.onnx",
                std::io::Cursor::new(data),
                len,
                recorded.rules,
                recorded.classifier.as_ref(),
            )
            .expect("a record re-reads under its own rules");
            assert_eq!(again.as_ref(), Some(&recorded));
            let _ = recorded.check_label_count(None, None, 7);
        }
    }
}

/// `safetensors`: the bytes as a safetensors model: the signature survives its own JSON, the
/// tensor list agrees with it, and a classifier named after its first tensor (`pack
/// --classifier-output`) re-reads to the same record, as the device re-reads it.
pub fn safetensors(data: &[u8]) {
    use crate::format::model::{
        Classifier, ModelSignature, read_as, read_model_signature, read_safetensors_tensors,
    };
    let len = data.len() as u64;
    let Ok(Some(signature)) = read_model_signature("model.safetensors", data, len) else {
        return;
    };
    let json = serde_json::to_string(&signature).expect("a signature serializes");
    let back: ModelSignature = serde_json::from_str(&json).expect("a signature reads back");
    assert_eq!(back, signature);
    let tensors = read_safetensors_tensors(data, len).expect("the same file reads again");
    assert_eq!(tensors.len() as u64, signature.weight_tensors);
    let Some(first) = tensors.first() else {
        return;
    };
    let request = Classifier {
        tensor: first.name.clone(),
        dim: None,
        shape: None,
    };
    if let Ok(Some(recorded)) = read_as(
        "model.safetensors",
        std::io::Cursor::new(data),
        len,
        1,
        Some(&request),
    ) {
        let again = read_as(
            "model.safetensors",
            std::io::Cursor::new(data),
            len,
            recorded.rules,
            recorded.classifier.as_ref(),
        )
        .expect("a record re-reads");
        assert_eq!(again.as_ref(), Some(&recorded));
        let _ = recorded.check_label_count(None, None, 7);
    }
}

/// `offline`: the bytes as an offline file, installed by a device on the fuzz key's trust set
/// into an empty store: the archive's layout (ustar headers, the order and names of its parts,
/// each part's cap, the end marker) and then the update it carries, each document through the
/// checks of the targets above (signatures included, which the fuzzer keeps only where it
/// leaves a seed's documents whole).
pub fn offline(data: &[u8]) {
    let dir = scratch("device");
    let _ = fs::remove_dir_all(&dir);
    let file = scratch("offline");
    fs::write(&file, data).expect("the fuzzer can write its scratch file");
    let Ok(device) = Device::open(&dir, CHANNEL, app(), now()) else {
        return;
    };
    let _ = device.install_offline(&file, now()).into_result();
}

/// `delta`: the bytes as a delta file (FORMAT.md, "Deltas"), applied to the seed bundle's
/// files under the fuzz key's verifier: the outer layout and its caps, the header (its base
/// list and the memory it asks for), the carried manifest and signatures (the fuzzer keeps a
/// valid signature only where it leaves a seed's manifest whole), the base files' digests, each
/// record against the header's caps, the zstd frames against their base windows, and every
/// rebuilt file against the manifest. Whatever fails, nothing is left in the output directory.
pub fn delta(data: &[u8]) {
    let (model, labels) = seed_files();
    let mut base = [std::io::Cursor::new(model), std::io::Cursor::new(labels)];
    let dir = scratch("delta");
    let _ = fs::remove_dir_all(&dir);
    fs::create_dir_all(&dir).expect("the fuzzer can make its scratch directory");
    if crate::payload::delta::apply(&verifier(), data, &mut base, &dir).is_err() {
        assert!(
            fs::read_dir(&dir)
                .expect("the scratch directory")
                .next()
                .is_none(),
            "a failed delta left files behind"
        );
    }
}

/// The seed delta: 1.0.1 from the seed bundle's files, its model copied from the base and its
/// labels (the same six, in reverse order) a zstd frame without a base window.
fn seed_delta() -> Vec<u8> {
    use crate::format::delta_file::{self, Header, Op, Record};
    let (model, labels) = seed_files();
    let reversed: String = LABELS.lines().rev().map(|l| format!("{l}\n")).collect();
    let patch = zstd::bulk::compress(reversed.as_bytes(), 3).expect("zstd compresses in memory");
    let mut manifest = template_manifest(
        b"",
        [
            (model.len() as u64, Digest::of(&model)),
            (reversed.len() as u64, Digest::of(reversed.as_bytes())),
        ],
        6,
    );
    manifest.version = Version::new(1, 0, 1);
    let base = template_manifest(b"", seed_entries(), 6).files;
    let records = [
        Record {
            op: Op::Copy,
            file: 0,
            base: 0,
            len: model.len() as u32,
            offset: 0,
            window: 0,
            patch: 0,
        },
        Record {
            op: Op::Zstd,
            file: 1,
            base: 1,
            len: reversed.len() as u32,
            offset: 0,
            window: labels.len() as u32,
            patch: patch.len() as u32,
        },
    ];
    let header = Header {
        format: crate::format::delta::FORMAT_VERSION,
        name: NAME.into(),
        version: manifest.version.clone(),
        base,
        chunk_bytes: 4096,
        window_bytes: 4096,
        records: records.len() as u64,
    };
    let mut patches = Vec::new();
    for record in &records {
        patches.extend_from_slice(&record.to_bytes());
    }
    patches.extend_from_slice(&patch);
    let manifest = manifest.to_json();
    let signatures = Signatures {
        signatures: vec![sign(context::MANIFEST, &manifest)],
    }
    .to_json();
    let mut out = Vec::new();
    delta_file::write_head(
        &mut out,
        MADE,
        &header,
        &manifest,
        &signatures,
        patches.len() as u64,
    )
    .and_then(|()| {
        out.extend_from_slice(&patches);
        delta_file::write_tail(&mut out, patches.len() as u64)
    })
    .expect("writing to memory cannot fail");
    out
}

fn app() -> App {
    let trust = Trust::shipped_trust_set(initial_trust_set()).expect("the fuzz trust set verifies");
    App::new(trust, APP_VERSION)
        .bundle_name(NAME)
        .and_then(|app| app.device_id("fuzz-device"))
        .expect("a valid name and device id")
        .max_bundle_bytes(1 << 20)
        .max_unpacked_bytes(1 << 20)
}

/// An offline file as `ampoule offline` lays it out: its header, the feed, the bundle.
fn offline_file(feed: &[u8], bundle: &[u8]) -> Vec<u8> {
    use crate::format::offline::{HEADER, Header, bundle_entry, feed_entry};
    let mut out = Vec::new();
    let header = Header::new(CHANNEL).to_json();
    for (name, data) in [
        (HEADER.to_string(), header.as_bytes()),
        (feed_entry(CHANNEL), feed),
        (bundle_entry(&Digest::of(bundle)), bundle),
    ] {
        out.extend_from_slice(&tar::header(&name, data.len() as u64, MADE));
        out.extend_from_slice(data);
        out.resize(out.len() + tar::padding(data.len() as u64) as usize, 0);
    }
    out.extend_from_slice(&tar::END_OF_ARCHIVE);
    out
}

// ---------------------------------------------------------------------------------------------
// Seeds

/// The seed bundle: the seed payload under a manifest signed with the fuzz key.
fn seed_bundle() -> Vec<u8> {
    let (model, labels) = seed_files();
    let payload = seed_payload(&model, &labels);
    bundle_bytes(
        &template_manifest(&payload, seed_entries(), 6),
        None,
        &payload,
    )
}

/// The seed payload: the inner tar of `model` and `labels`, compressed.
fn seed_payload(model: &[u8], labels: &[u8]) -> Vec<u8> {
    zstd::bulk::compress(&seed_tar(model, labels), 3).expect("zstd compresses in memory")
}

fn seed_tar(model: &[u8], labels: &[u8]) -> Vec<u8> {
    let mut inner = Vec::new();
    for (name, data) in [("model.onnx", model), (entry::LABELS, labels)] {
        inner.extend_from_slice(&tar::header(name, data.len() as u64, MADE));
        inner.extend_from_slice(data);
        inner.resize(inner.len() + tar::padding(data.len() as u64) as usize, 0);
    }
    inner.extend_from_slice(&tar::END_OF_ARCHIVE);
    inner
}

/// A small ledger: a trust-set entry and two publishes of the seed bundle's channel.
struct SeedLedger {
    entries: Vec<Vec<u8>>,
    tree: MemoryTree,
}

impl SeedLedger {
    fn new(bundle: &[u8], manifest: &[u8]) -> SeedLedger {
        let trust = Record::TrustSet(TrustSetEntry {
            event: Event::TrustSet,
            trust_set_version: 1,
            trust_set_digest: Digest::of(&initial_trust_set()),
            key_ids: vec![public_key().id()],
            time: MADE - 200,
        });
        let offered = |version: &str| Offered {
            bundle: NAME.into(),
            version: version.parse().expect("a fixed version"),
            bundle_digest: Digest::of(bundle),
            manifest_digest: Digest::of(manifest),
            rollout_percent: 100,
            deltas: Vec::new(),
        };
        let entry = |event: Event, version: &str, sequence: u64, offered: Option<Offered>| {
            Record::Bundle(Entry {
                format: ENTRY_FORMAT,
                event,
                channel: CHANNEL.into(),
                bundle: NAME.into(),
                version: version.parse().expect("a fixed version"),
                bundle_digest: Digest::of(bundle),
                manifest_digest: Digest::of(manifest),
                key_ids: vec![public_key().id()],
                time: MADE - 100 + sequence,
                feed_sequence: sequence,
                offered: Some(offered),
            })
        };
        // The trust set, two publishes, then a withdraw that leaves nothing offered.
        let entries: Vec<Vec<u8>> = [
            trust,
            entry(Event::Publish, "0.9.0", 1, Some(offered("0.9.0"))),
            entry(Event::Publish, "1.0.0", 2, Some(offered("1.0.0"))),
            entry(Event::Withdraw, "1.0.0", 3, None),
        ]
        .iter()
        .map(Record::to_bytes)
        .collect();
        let tree = entries.iter().map(|e| leaf_hash(e)).collect();
        SeedLedger { entries, tree }
    }

    fn head(&self, size: u64) -> TreeHead {
        TreeHead {
            tree_size: size,
            root_hash: tree_root(&self.tree, size).expect("the seed ledger holds the size"),
            time: MADE,
        }
    }

    fn consistency(&self, old: u64, new: u64) -> ConsistencyProof {
        ConsistencyProof {
            old_size: old,
            new_size: new,
            hashes: consistency_proof(&self.tree, old, new).expect("sizes in the ledger"),
        }
    }

    /// The ledger object of the feed that appended entry `size - 1`.
    fn feed_ledger(&self, size: u64) -> FeedLedger {
        let last = (size - 1) as usize;
        FeedLedger {
            tree_head: signed_head(self.head(size)),
            entry: Some(String::from_utf8(self.entries[last].clone()).expect("JSON is UTF-8")),
            inclusion: Some(InclusionProof {
                leaf_index: size - 1,
                tree_size: size,
                hashes: inclusion_proof(&self.tree, size - 1, size).expect("leaf in the ledger"),
            }),
            consistency: self.consistency(size - 1, size),
        }
    }

    fn step(&self, old: u64, new: u64) -> ConsistencyStep {
        ConsistencyStep {
            tree_head: signed_head(self.head(new)),
            proof: self.consistency(old, new),
        }
    }
}

/// Every target's seed inputs, made with the crate's own writers: `(target, file name,
/// bytes)`. The valid documents among them pass the checks their targets run, so the fuzzer
/// starts from inputs that reach the deep code.
pub fn seeds() -> Vec<(&'static str, String, Vec<u8>)> {
    let (model, labels) = seed_files();
    let payload = seed_payload(&model, &labels);
    let manifest = template_manifest(&payload, seed_entries(), 6);
    let bundle = bundle_bytes(&manifest, None, &payload);
    let (chunked_payload, list) =
        crate::format::bundle::chunked_payload(&seed_tar(&model, &labels), 1 << 20, 3)
            .expect("zstd compresses in memory");
    let bundle_format_2 = bundle_bytes(
        &chunked(&manifest, chunked_payload.len(), &list),
        Some(&list),
        &chunked_payload,
    );
    let manifest_bytes = manifest.to_json();
    let ledger = SeedLedger::new(&bundle, &manifest_bytes);
    let release = Release {
        name: NAME.into(),
        version: Version::new(1, 0, 0),
        requires_app: ">=1.0.0, <2.0.0".parse().expect("a fixed range"),
        size: bundle.len() as u64,
        sha256: Digest::of(&bundle),
        path: format!("../bundles/{}.ampoule", Digest::of(&bundle)),
        mirrors: vec!["https://mirror.example.invalid/bundles/b.ampoule".into()],
        rollout_percent: 100,
        deltas: Vec::new(),
    };
    let feed = |sequence: u64, release: Option<Release>, ledger: Option<FeedLedger>| Feed {
        format: FEED_FORMAT_VERSION,
        channel: CHANNEL.into(),
        sequence,
        issued: Timestamp::from_unix(MADE).expect("a fixed time"),
        expires: Timestamp::from_unix(MADE + 7 * 86_400).expect("a fixed time"),
        release,
        trust_set: Some(TrustSetRef {
            version: 1,
            path: "../trust/1.json".into(),
            sha256: Digest::of(&initial_trust_set()),
        }),
        ledger,
    };
    let full_feed = feed(2, Some(release), Some(ledger.feed_ledger(3))).to_json();
    let empty_feed = feed(3, None, Some(ledger.feed_ledger(4))).to_json();
    let envelope = |text: &str| {
        SignedFeed {
            feed: text.to_string(),
            signatures: vec![sign(context::FEED, text.as_bytes())],
        }
        .to_json()
    };
    let head1 = serde_json::to_vec(&ledger.head(1)).expect("a head serializes");
    let step12 = ledger.step(1, 2).to_json();
    let successor = trust_set_body(2).to_json();

    let state =
        fs::read(store_dir().join(crate::store::STATE_FILE)).expect("the seed store has a state");
    let v2_file = trust_set_file(&successor);
    let chain = {
        let dir = scratch("chain");
        let _ = fs::remove_dir_all(&dir);
        let initial = initial_trust_set();
        let v2 = TrustSet::verify_initial(&initial, now())
            .and_then(|v1| v1.accept_successor(&v2_file, now()))
            .expect("the seed trust sets chain");
        Store::open(&dir, verifier())
            .and_then(|store| store.save_trust_set(&initial, &v2))
            .expect("a store keeps an accepted trust set");
        let chain = fs::read(dir.join(crate::store::TRUST_CHAIN_FILE))
            .expect("the store wrote its trust chain");
        let _ = fs::remove_dir_all(&dir);
        chain
    };

    // highest.json as the store keeps it: the seed bundle's signed manifest; and a refusal
    // as the update remembers one.
    let kept_manifest = serde_json::to_vec(&serde_json::json!({
        "manifest": String::from_utf8_lossy(&manifest_bytes),
        "signatures": String::from_utf8_lossy(&Signatures {
            signatures: vec![sign(context::MANIFEST, &manifest_bytes)],
        }
        .to_json()),
    }))
    .expect("JSON serializes");
    let refused = serde_json::to_vec(&serde_json::json!({
        "sha256": Digest::of(b"offered").to_string(),
        "kind": "Incompatible",
        "reason": "bundle needs a label this app lacks",
        "at": NOW - 60,
        "app": Digest::of(b"app").to_string(),
    }))
    .expect("JSON serializes");
    let mut seeds: Vec<(&'static str, String, Vec<u8>)> = vec![
        ("bundle", "valid.ampoule".into(), bundle.clone()),
        ("bundle", "valid-format-2.ampoule".into(), bundle_format_2),
        ("manifest", "valid.json".into(), manifest_bytes.clone()),
        (
            "manifest",
            "with-metadata.json".into(),
            Manifest {
                metadata: Some(seed_metadata()),
                ..manifest.clone()
            }
            .to_json(),
        ),
        (
            "manifest",
            "meta-file.json".into(),
            serde_json::to_vec_pretty(&seed_metadata()).expect("metadata serializes"),
        ),
        (
            "signatures",
            "valid.json".into(),
            Signatures {
                signatures: vec![sign(context::MANIFEST, &manifest_bytes)],
            }
            .to_json(),
        ),
        ("payload", "valid.tar.zst".into(), payload.clone()),
        ("payload_tar", "valid.tar".into(), seed_tar(&model, &labels)),
        ("feed", "release.json".into(), envelope(&full_feed)),
        ("feed", "withdrawn.json".into(), envelope(&empty_feed)),
        (
            "feed_signed",
            "release.txt".into(),
            full_feed.clone().into_bytes(),
        ),
        (
            "feed_signed",
            "with-steps.txt".into(),
            joined(&[full_feed.as_bytes(), &head1, &step12]),
        ),
        (
            "feed_signed",
            "withdrawn.txt".into(),
            empty_feed.into_bytes(),
        ),
        ("trust_set", "v1.json".into(), initial_trust_set()),
        ("trust_set", "v2.json".into(), v2_file.clone()),
        ("trust_set_signed", "v2.txt".into(), successor.into_bytes()),
        (
            "tree_head",
            "signed.json".into(),
            signed_head(ledger.head(3)).to_json(),
        ),
        ("tree_head", "unsigned.json".into(), head1.clone()),
        (
            "proofs",
            "inclusion.json".into(),
            serde_json::to_vec(&InclusionProof {
                leaf_index: 5,
                tree_size: 11,
                hashes: inclusion_proof(oracle_tree(), 5, 11).expect("in the oracle tree"),
            })
            .expect("a proof serializes"),
        ),
        (
            "proofs",
            "consistency.json".into(),
            serde_json::to_vec(&ConsistencyProof {
                old_size: 6,
                new_size: 13,
                hashes: consistency_proof(oracle_tree(), 6, 13).expect("in the oracle tree"),
            })
            .expect("a proof serializes"),
        ),
        ("proofs", "step.json".into(), step12),
        (
            "ledger_entry",
            "publish.json".into(),
            ledger.entries[2].clone(),
        ),
        (
            "ledger_entry",
            "trust-set.json".into(),
            ledger.entries[0].clone(),
        ),
        (
            "ledger_entry",
            "feed-ledger.json".into(),
            serde_json::to_vec(&ledger.feed_ledger(3)).expect("a ledger object serializes"),
        ),
        ("store", "installed.txt".into(), state.clone()),
        (
            "store",
            "with-trust-set.txt".into(),
            joined(&[&state, &v2_file]),
        ),
        (
            "store",
            "with-trust-chain.txt".into(),
            joined(&[&state, b"", &chain]),
        ),
        (
            "store",
            "every-file.txt".into(),
            joined(&[
                &state,
                b"",
                &chain,
                &kept_manifest,
                &envelope(&full_feed),
                &refused,
                b"fuzz-device-2\n",
            ]),
        ),
        (
            "store",
            "links.txt".into(),
            joined(&[&state, LINK, LINK, LINK, LINK, LINK, LINK]),
        ),
        (
            "delta",
            "labels-reordered.ampoule-delta".into(),
            seed_delta(),
        ),
        (
            "offline",
            "release.ampoule-offline".into(),
            offline_file(&envelope(&full_feed), &bundle),
        ),
        ("policy_document", "full.json".into(), SEED_POLICY.into()),
        (
            "policy_document",
            "smallest.json".into(),
            br#"{"policy_format": 1}"#.to_vec(),
        ),
    ];
    // Real and reference models (crates/verify/tests/data/*/README.md names their sources).
    for (name, bytes) in [
        (
            "light_bvlc_alexnet.onnx",
            &include_bytes!("../tests/data/real-models/onnx-1.23.2-light_bvlc_alexnet.onnx")[..],
        ),
        (
            "test_operator_mm.onnx",
            include_bytes!("../tests/data/real-models/onnx-1.23.2-test_operator_mm.onnx"),
        ),
        (
            "logreg_iris.onnx",
            include_bytes!("../tests/data/real-models/onnxruntime-1.32.0-logreg_iris.onnx"),
        ),
        (
            "subgraphs.onnx",
            include_bytes!("../tests/data/real-models/subgraphs.onnx"),
        ),
        (
            "trailcam-f32.onnx",
            include_bytes!("../tests/data/models/trailcam-f32.onnx"),
        ),
        (
            "trailcam-oldstyle.onnx",
            include_bytes!("../tests/data/models/trailcam-oldstyle.onnx"),
        ),
    ] {
        seeds.push(("onnx", name.into(), bytes.to_vec()));
    }
    for (name, bytes) in [
        (
            "classifier.safetensors",
            &include_bytes!("../tests/data/real-models/classifier.safetensors")[..],
        ),
        (
            "trailcam-int8.safetensors",
            include_bytes!("../tests/data/models/trailcam-int8.safetensors"),
        ),
    ] {
        seeds.push(("safetensors", name.into(), bytes.to_vec()));
    }
    seeds.sort_by(|a, b| (a.0, &a.1).cmp(&(b.0, &b.1)));
    seeds
}

/// Runs `data` through the entry point of `target`; `false` for an unknown target name.
pub fn run(target: &str, data: &[u8]) -> bool {
    let entry: fn(&[u8]) = match target {
        "bundle" => bundle,
        "manifest" => manifest,
        "signatures" => signatures,
        "payload" => payload,
        "payload_tar" => payload_tar,
        "feed" => feed,
        "feed_signed" => feed_signed,
        "trust_set" => trust_set,
        "trust_set_signed" => trust_set_signed,
        "tree_head" => tree_head,
        "proofs" => proofs,
        "ledger_entry" => ledger_entry,
        "store" => store,
        "offline" => offline,
        "delta" => delta,
        "policy_document" => policy_document,
        "onnx" => onnx,
        "safetensors" => safetensors,
        _ => return false,
    };
    entry(data);
    true
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The delta seed stands for a valid delta: it rebuilds its release from the seed files,
    /// so a campaign starts past every check.
    #[test]
    fn the_delta_seed_rebuilds_its_release() {
        let (model, labels) = seed_files();
        let dir = tempfile::tempdir().expect("temp dir");
        let mut base = [
            std::io::Cursor::new(model.clone()),
            std::io::Cursor::new(labels),
        ];
        crate::payload::delta::apply(&verifier(), &seed_delta()[..], &mut base, dir.path())
            .expect("the seed delta applies");
        assert_eq!(
            fs::read(dir.path().join("model.onnx")).expect("model"),
            model
        );
        assert_eq!(
            fs::read_to_string(dir.path().join(entry::LABELS)).expect("labels"),
            "empty frame\nhare\nbadger\nwild boar\nroe deer\nfox\n"
        );
    }
}
