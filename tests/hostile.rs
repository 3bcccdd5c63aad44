//! Hostile bundles (design threats 1, 2, 3, 5, 6, 7 and 8): each is made by a named generator
//! below, correctly signed wherever that lets it get past the earlier checks, so it reaches the
//! check it targets. Every one must make `ampoule verify --extract` exit 1 with exactly the
//! error given and leave the directory as it was (no extract dir, no `.partial` staging dir).

mod common;

use ampoule_verify::format::entry;
use ampoule_verify::{Digest, KeyId, tar};
use common::*;

/// Where each region of a bundle laid out by [`assemble`] starts.
struct Offsets {
    manifest: usize,
    manifest_pad: usize,
    signatures_header: usize,
    payload_header: usize,
    payload: usize,
    payload_pad: usize,
    end: usize,
    len: usize,
}

fn offsets(manifest_len: usize, signatures_len: usize, payload_len: usize) -> Offsets {
    let entry = |n: usize| tar::entry_len(n as u64) as usize;
    let signatures_header = entry(manifest_len);
    let payload_header = signatures_header + entry(signatures_len);
    let end = payload_header + entry(payload_len);
    Offsets {
        manifest: 512,
        manifest_pad: 512 + manifest_len,
        signatures_header,
        payload_header,
        payload: payload_header + 512,
        payload_pad: payload_header + 512 + payload_len,
        end,
        len: end + 1024,
    }
}

/// A good signed bundle and where its regions are.
fn good() -> (Env, Draft, Vec<u8>, Offsets) {
    let env = Env::new();
    let draft = Draft::good();
    let bundle = draft.signed(&env.key);
    let manifest = draft.manifest.to_json();
    let sigs = signatures(&[&env.key], &manifest);
    let at = offsets(manifest.len(), sigs.len(), draft.payload.len());
    assert_eq!(at.len, bundle.len(), "offsets match the layout");
    assert!(
        tar::padding(manifest.len() as u64) > 0 && tar::padding(draft.payload.len() as u64) > 0,
        "the fixture needs padding after the manifest and the payload"
    );
    (env, draft, bundle, at)
}

fn flipped(bundle: &[u8], at: usize) -> Vec<u8> {
    let mut bytes = bundle.to_vec();
    bytes[at] ^= 0x01;
    bytes
}

fn not_matching(id: KeyId) -> String {
    format!("bundle has no valid signature by a trusted key (not matching this document: {id})")
}

#[test]
fn the_untouched_fixture_verifies() {
    // Every hostile case below is a small change to this bundle; it must pass as it is, or the
    // refusals would prove nothing.
    let (env, _, bundle, _) = good();
    env.assert_accepted(&bundle);
}

#[test]
fn flipped_byte_in_manifest() {
    let (env, _, bundle, at) = good();
    // Inside the JSON text; the signature covers every byte, so it fails before parsing.
    env.assert_refused(
        &flipped(&bundle, at.manifest + 40),
        &[],
        &not_matching(env.key_id()),
    );
}

#[test]
fn flipped_byte_in_signature() {
    let (env, _, bundle, at) = good();
    let sigs = &bundle[at.signatures_header + 512..at.payload_header];
    let value = b"\"signature\": \"";
    let pos = sigs
        .windows(value.len())
        .position(|w| w == value)
        .expect("the signature field")
        + value.len();
    let mut bytes = bundle.clone();
    let digit = &mut bytes[at.signatures_header + 512 + pos + 10];
    // Still a lowercase hex digit, so the document parses and only the signature is wrong.
    *digit = if *digit == b'0' { b'1' } else { b'0' };
    env.assert_refused(&bytes, &[], &not_matching(env.key_id()));
}

#[test]
fn flipped_byte_in_key_id() {
    let (env, _, bundle, at) = good();
    let id = env.key_id().to_string();
    let sigs = &bundle[at.signatures_header + 512..at.payload_header];
    let pos = sigs
        .windows(id.len())
        .position(|w| w == id.as_bytes())
        .expect("the key id");
    let mut bytes = bundle.clone();
    let digit = &mut bytes[at.signatures_header + 512 + pos];
    *digit = if *digit == b'0' { b'1' } else { b'0' };
    let changed = std::str::from_utf8(&bytes[at.signatures_header + 512 + pos..][..32])
        .expect("hex")
        .to_string();
    env.assert_refused(
        &bytes,
        &[],
        &format!(
            "bundle has no valid signature by a trusted key (by keys not trusted here: {changed}); \
             trusted here: {} ({PUBLIC})",
            env.key_id()
        ),
    );
}

#[test]
fn flipped_byte_in_payload() {
    let (env, draft, bundle, at) = good();
    let bytes = flipped(&bundle, at.payload + 100);
    let found = Digest::of(&bytes[at.payload..at.payload_pad]);
    env.assert_refused(
        &bytes,
        &[],
        &format!(
            "payload digest mismatch: manifest declares sha256 {}, the bundle holds {found}",
            draft.manifest.payload.sha256.expect("a format 1 draft")
        ),
    );
}

#[test]
fn flipped_byte_in_each_tar_header() {
    let (env, _, bundle, at) = good();
    for (name, header) in [
        (entry::MANIFEST, 0),
        (entry::SIGNATURES, at.signatures_header),
        (entry::PAYLOAD, at.payload_header),
    ] {
        // Byte 140 is inside the mtime field: the checksum no longer matches.
        let bytes = flipped(&bundle, header + 140);
        let h: [u8; 512] = bytes[header..header + 512].try_into().expect("a block");
        let stored = header_sum(
            bundle[header..header + 512]
                .try_into()
                .expect("the original block"),
        );
        env.assert_not_a_bundle(
            &bytes,
            &[],
            &format!(
                "bundle entry '{name}' has a bad tar header checksum (stored {stored:o}, computed {:o}): \
                 the file is damaged or not a bundle",
                header_sum(&h)
            ),
        );
    }
}

#[test]
fn flipped_byte_in_padding_and_end_marker() {
    let (env, _, bundle, at) = good();
    env.assert_not_a_bundle(
        &flipped(&bundle, at.manifest_pad),
        &[],
        "bundle entry 'manifest.json' has non-zero bytes in its tar padding",
    );
    env.assert_not_a_bundle(
        &flipped(&bundle, at.signatures_header - 1),
        &[],
        "bundle entry 'manifest.json' has non-zero bytes in its tar padding",
    );
    env.assert_not_a_bundle(
        &flipped(&bundle, at.payload_pad),
        &[],
        "bundle entry 'payload.tar.zst' has non-zero bytes in its tar padding",
    );
    for pos in [at.end, at.end + 700, at.len - 1] {
        env.assert_not_a_bundle(
            &flipped(&bundle, pos),
            &[],
            "bundle has an unexpected extra entry or bytes where the end-of-archive marker belongs",
        );
    }
}

#[test]
fn truncated_at_several_offsets() {
    let (env, draft, bundle, at) = good();
    let payload_len = draft.payload.len();
    let short_payload = |len: usize| {
        format!(
            "bundle is truncated: entry 'payload.tar.zst' declares {payload_len} bytes but the file has \
             only {} bytes after its header",
            len - at.payload
        )
    };
    let cases = [
        (
            0,
            "bundle header of entry 'manifest.json' is truncated: the file ended early".to_string(),
        ),
        (
            300,
            "bundle header of entry 'manifest.json' is truncated: the file ended early".to_string(),
        ),
        (
            at.manifest + 5,
            "bundle entry 'manifest.json' is truncated: the file ended early".to_string(),
        ),
        (
            at.manifest_pad + 1,
            "bundle entry 'manifest.json' is truncated: the file ended early".to_string(),
        ),
        (
            at.signatures_header + 511,
            "bundle header of entry 'signatures.json' is truncated: the file ended early"
                .to_string(),
        ),
        (
            at.payload_header + 100,
            "bundle header of entry 'payload.tar.zst' is truncated: the file ended early"
                .to_string(),
        ),
        (at.payload + 1000, short_payload(at.payload + 1000)),
        (at.end, short_payload(at.end)),
        (at.len - 512, short_payload(at.len - 512)),
        (at.len - 1, short_payload(at.len - 1)),
    ];
    for (len, expected) in cases {
        env.assert_not_a_bundle(&bundle[..len], &[], &expected);
    }
}

#[test]
fn missing_entry() {
    let env = Env::new();
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    let sigs = signatures(&[&env.key], &manifest);
    let m = tar_entry(entry::MANIFEST, &manifest);
    let s = tar_entry(entry::SIGNATURES, &sigs);
    let p = tar_entry(entry::PAYLOAD, &draft.payload);
    env.assert_not_a_bundle(
        &tar_of(&[m.clone(), s.clone()]),
        &[],
        "bundle ends before entry 'payload.tar.zst': the entry is missing",
    );
    env.assert_not_a_bundle(
        &tar_of(&[m, p.clone()]),
        &[],
        "bundle entry 'payload.tar.zst' is out of order: entry 2 must be 'signatures.json'",
    );
    env.assert_not_a_bundle(
        &tar_of(&[s, p]),
        &[],
        "bundle entry 'signatures.json' is out of order: entry 1 must be 'manifest.json'",
    );
    env.assert_not_a_bundle(
        &tar_of(&[]),
        &[],
        "bundle ends before entry 'manifest.json': the entry is missing",
    );
}

#[test]
fn extra_entry() {
    let env = Env::new();
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    let sigs = signatures(&[&env.key], &manifest);
    let m = tar_entry(entry::MANIFEST, &manifest);
    let s = tar_entry(entry::SIGNATURES, &sigs);
    let p = tar_entry(entry::PAYLOAD, &draft.payload);
    let extra = tar_entry("notes.txt", b"badger seen at camera 4\n");
    env.assert_not_a_bundle_because(
        &tar_of(&[m.clone(), s.clone(), p.clone(), extra.clone()]),
        "it has an extra entry after its last declared entry",
        "bundle has an extra entry 'notes.txt' after its last declared entry",
    );
    env.assert_not_a_bundle_because(
        &tar_of(&[m, extra, s, p]),
        "it has an entry that is not the one its place calls for",
        "bundle entry 'notes.txt' is not allowed: entry 2 must be 'signatures.json'",
    );
}

#[test]
fn reordered_entries() {
    let env = Env::new();
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    let sigs = signatures(&[&env.key], &manifest);
    let m = tar_entry(entry::MANIFEST, &manifest);
    let s = tar_entry(entry::SIGNATURES, &sigs);
    let p = tar_entry(entry::PAYLOAD, &draft.payload);
    env.assert_not_a_bundle(
        &tar_of(&[s.clone(), m.clone(), p.clone()]),
        &[],
        "bundle entry 'signatures.json' is out of order: entry 1 must be 'manifest.json'",
    );
    env.assert_not_a_bundle(
        &tar_of(&[m, p, s]),
        &[],
        "bundle entry 'payload.tar.zst' is out of order: entry 2 must be 'signatures.json'",
    );
}

#[test]
fn trailing_bytes_after_end_marker() {
    let (env, _, bundle, _) = good();
    for tail in [&b"x"[..], &[0u8; 512][..], &[0u8; 1][..]] {
        let mut bytes = bundle.clone();
        bytes.extend_from_slice(tail);
        env.assert_not_a_bundle(
            &bytes,
            &[],
            "bundle has trailing bytes after the end-of-archive marker",
        );
    }
}

/// A header for `name` as a general tar writer would make it: the library's header with
/// a different name, checksum fixed. `tar::header` itself takes only plain names.
fn header_named(name: &str, size: usize) -> [u8; 512] {
    let mut h = tar::header("x", size as u64, CREATED_UNIX);
    h[..100].fill(0);
    h[..name.len()].copy_from_slice(name.as_bytes());
    fix_checksum(&mut h);
    h
}

#[test]
fn entry_names_with_dot_dot_or_absolute_path() {
    let env = Env::new();
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    for name in [
        "../manifest.json",
        "/etc/manifest.json",
        "..",
        "sub/manifest.json",
    ] {
        let bytes = tar_of(&[tar_entry_with_header(
            header_named(name, manifest.len()),
            &manifest,
        )]);
        env.assert_not_a_bundle_because(
            &bytes,
            "it has an entry name that is a path; bundles hold only plain file names",
            &format!(
                "bundle entry name '{name}' is a path; bundles hold only plain file names, \
                 nothing outside them"
            ),
        );
    }
}

#[test]
fn payload_entry_names_with_dot_dot_or_absolute_path() {
    // Correctly signed, so the inner tar is reached; the staging directory must be removed.
    let env = Env::new();
    let model = model_bytes(2000);
    for name in ["../model.onnx", "/tmp/model.onnx"] {
        let inner = tar_of(&[
            tar_entry_with_header(header_named(name, model.len()), &model),
            tar_entry(entry::LABELS, LABELS),
        ]);
        let draft = Draft::with_payload(model.clone(), LABELS.to_vec(), zstd(&inner));
        env.assert_not_a_bundle_because(
            &draft.signed(&env.key),
            "its payload has an entry name that is a path; bundles hold only plain file names",
            &format!(
                "payload entry name '{name}' is a path; bundles hold only plain file names, \
                 nothing outside them"
            ),
        );
    }
}

#[test]
fn link_and_device_entries() {
    let env = Env::new();
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    // The command line shows one reason for all, since the type byte is the file's; the
    // library's refusal names each type.
    for (flag, kind, link) in [
        (b'2', "a symbolic link", "/etc/passwd"),
        (b'1', "a hard link", "signatures.json"),
        (b'3', "a character device", ""),
        (b'4', "a block device", ""),
        (b'6', "a FIFO", ""),
        (b'5', "a directory", ""),
    ] {
        let h = retyped(
            tar::header(entry::MANIFEST, manifest.len() as u64, CREATED_UNIX),
            flag,
            link,
        );
        env.assert_not_a_bundle_because(
            &tar_of(&[tar_entry_with_header(h, &manifest)]),
            "it has an entry that is not a regular file (a link, device, directory or extended \
             header); only regular files are allowed",
            &format!(
                "bundle entry 'manifest.json' is {kind} (tar type '{}'); only regular files \
                 are allowed",
                char::from(flag)
            ),
        );
    }
}

#[test]
fn link_entries_inside_a_signed_payload() {
    let env = Env::new();
    let model = model_bytes(3000);
    for (flag, kind, link) in [
        (b'2', "a symbolic link", "/etc/shadow"),
        (b'1', "a hard link", "model.onnx"),
    ] {
        let h = retyped(
            tar::header(entry::LABELS, LABELS.len() as u64, CREATED_UNIX),
            flag,
            link,
        );
        let inner = tar_of(&[
            tar_entry("model.onnx", &model),
            tar_entry_with_header(h, LABELS),
        ]);
        let draft = Draft::with_payload(model.clone(), LABELS.to_vec(), zstd(&inner));
        env.assert_not_a_bundle_because(
            &draft.signed(&env.key),
            "its payload has an entry that is not a regular file (a link, device, directory or \
             extended header); only regular files are allowed",
            &format!(
                "payload entry 'labels.txt' is {kind} (tar type '{}'); only regular files are \
                 allowed",
                char::from(flag)
            ),
        );
    }
}

#[test]
fn regular_file_header_naming_a_link_target() {
    // Type '0' but a link name: a reader that looked only at the link field could be fooled.
    let env = Env::new();
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    let h = retyped(
        tar::header(entry::MANIFEST, manifest.len() as u64, CREATED_UNIX),
        b'0',
        "/etc/passwd",
    );
    env.assert_not_a_bundle(
        &tar_of(&[tar_entry_with_header(h, &manifest)]),
        &[],
        "bundle entry 'manifest.json' names a link target; only regular files are allowed",
    );
}

#[test]
fn duplicate_names() {
    let env = Env::new();
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    let sigs = signatures(&[&env.key], &manifest);
    let m = tar_entry(entry::MANIFEST, &manifest);
    let s = tar_entry(entry::SIGNATURES, &sigs);
    env.assert_not_a_bundle(
        &tar_of(&[m.clone(), m.clone(), s.clone()]),
        &[],
        "bundle entry 'manifest.json' appears twice",
    );
    env.assert_not_a_bundle(
        &tar_of(&[m, s.clone(), s]),
        &[],
        "bundle entry 'signatures.json' appears twice",
    );
    // Inside a signed payload: the model twice instead of model then labels. The model is as
    // long as the label list, so the payload has the declared size and the tar check decides.
    let model = model_bytes(LABELS.len());
    let inner = tar_of(&[
        tar_entry("model.onnx", &model),
        tar_entry("model.onnx", &model),
    ]);
    let draft = Draft::with_payload(model, LABELS.to_vec(), zstd(&inner));
    env.assert_not_a_bundle(
        &draft.signed(&env.key),
        &[],
        "payload entry 'model.onnx' appears twice",
    );
}

#[test]
fn manifest_over_64_kib() {
    let env = Env::new();
    let draft = Draft::good();
    // JSON allows trailing whitespace, so this is a valid, signed manifest of the given size.
    let padded = |len: usize| {
        let mut m = draft.manifest.to_json();
        m.resize(len, b' ');
        m
    };
    let over = padded(64 * 1024 + 1);
    env.assert_refused(
        &assemble(&over, &signatures(&[&env.key], &over), &draft.payload),
        &[],
        "bundle entry 'manifest.json' is 65537 bytes, over the limit of 65536 bytes",
    );
    // The boundary itself is allowed: the cap is not off by one.
    let at_cap = padded(64 * 1024);
    env.assert_accepted(&assemble(
        &at_cap,
        &signatures(&[&env.key], &at_cap),
        &draft.payload,
    ));
}

#[test]
fn signatures_document_over_64_kib_or_too_many_signatures() {
    let env = Env::new();
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    let mut big = signatures(&[&env.key], &manifest);
    big.resize(64 * 1024 + 1, b' ');
    env.assert_refused(
        &assemble(&manifest, &big, &draft.payload),
        &[],
        "bundle entry 'signatures.json' is 65537 bytes, over the limit of 65536 bytes",
    );
    let keys: Vec<_> = (0..33).map(|i| signing_key(100 + i)).collect();
    let many = signatures(&keys.iter().collect::<Vec<_>>(), &manifest);
    env.assert_refused(
        &assemble(&manifest, &many, &draft.payload),
        &[],
        "signatures.json holds 33 signatures, over the limit of 32",
    );
}

/// The window size a zstd frame header declares (RFC 8878 section 3.1.1.1.2), so the fixture
/// is checked to be what it claims before the verifier sees it.
fn declared_window(frame: &[u8]) -> u64 {
    // RFC 8878 section 3.1.1: magic 0xFD2FB528, little-endian.
    assert_eq!(&frame[..4], &[0x28, 0xb5, 0x2f, 0xfd], "zstd frame magic");
    let descriptor = frame[4];
    assert_eq!(
        descriptor & 0x20,
        0,
        "not single-segment: a window descriptor follows"
    );
    let wd = frame[5];
    let window_log = 10 + u64::from(wd >> 3);
    let base = 1u64 << window_log;
    base + (base / 8) * u64::from(wd & 7)
}

fn windowed_payload(window_log: u32) -> (Vec<u8>, Vec<u8>) {
    let model = model_bytes(30 * 1024);
    let inner = tar_of(&[
        tar_entry("model.onnx", &model),
        tar_entry(entry::LABELS, LABELS),
    ]);
    // Streaming without a pledged size: zstd cannot shrink the window to the input size.
    let mut enc = zstd::stream::write::Encoder::new(Vec::new(), 3).expect("encoder");
    enc.window_log(window_log).expect("window log");
    std::io::Write::write_all(&mut enc, &inner).expect("compress");
    (model, enc.finish().expect("finish"))
}

#[test]
fn zstd_window_over_8_mib() {
    let env = Env::new();
    let (model, payload) = windowed_payload(24);
    assert_eq!(declared_window(&payload), 16 << 20);
    let draft = Draft::with_payload(model, LABELS.to_vec(), payload);
    env.assert_refused(
        &draft.signed(&env.key),
        &[],
        "payload's zstd frame needs a window larger than the 8 MiB this verifier allows \
         (Frame requires too much memory for decoding)",
    );
}

#[test]
fn zstd_window_of_exactly_8_mib_is_accepted() {
    // RFC 8878 section 3.1.1.1.2 recommends decoders support windows up to 8 MB; the
    // boundary must pass.
    let env = Env::new();
    let (model, payload) = windowed_payload(23);
    assert_eq!(declared_window(&payload), 8 << 20);
    let draft = Draft::with_payload(model, LABELS.to_vec(), payload);
    env.assert_accepted(&draft.signed(&env.key));
}

#[test]
fn payload_decompressing_past_its_declared_size() {
    // A valid inner tar, then a second zstd frame of 1 MiB of zeros; all signed and digested.
    // With a 700 KiB model the good part spans several of the decoder's 256 KiB chunks, so
    // the file writer is busy when the excess is found.
    let env = Env::new();
    for model_len in [20 * 1024, 700 * 1024] {
        let model = model_bytes(model_len);
        let inner = tar_of(&[
            tar_entry("model.onnx", &model),
            tar_entry(entry::LABELS, LABELS),
        ]);
        let mut payload = zstd(&inner);
        payload.extend_from_slice(&zstd(&vec![0u8; 1 << 20]));
        let bomb = Draft::with_payload(model, LABELS.to_vec(), payload);
        env.assert_refused(
            &bomb.signed(&env.key),
            &[],
            &format!(
                "payload decompresses to more than the {} bytes its manifest declares",
                bomb.manifest.unpacked_tar_len()
            ),
        );
    }
}

#[test]
fn payload_with_trailing_non_zstd_bytes() {
    let env = Env::new();
    let draft = Draft::good();
    let mut payload = draft.payload.clone();
    payload.extend_from_slice(b"trailing junk");
    let bad = Draft::with_payload(draft.model.clone(), draft.labels.clone(), payload);
    env.assert_not_a_bundle(
        &bad.signed(&env.key),
        &[],
        "payload is not valid zstd data: Unknown frame descriptor",
    );
}

#[test]
fn file_digest_or_size_not_matching_the_manifest() {
    let env = Env::new();
    let mut draft = Draft::good();
    let wrong = Digest::of(b"another model");
    draft.manifest.files[0].sha256 = wrong;
    env.assert_refused(
        &draft.signed(&env.key),
        &[],
        &format!(
            "digest mismatch for 'model.onnx': manifest declares sha256 {wrong}, the payload holds {}",
            Digest::of(&draft.model)
        ),
    );
    let mut draft = Draft::good();
    draft.manifest.files[1].size += 1;
    env.assert_refused(
        &draft.signed(&env.key),
        &[],
        &format!(
            "payload entry 'labels.txt' is {} bytes but the manifest declares {} bytes",
            LABELS.len(),
            LABELS.len() + 1
        ),
    );
    let mut draft = Draft::good();
    draft.manifest.payload.size -= 1;
    env.assert_refused(
        &draft.signed(&env.key),
        &[],
        &format!(
            "payload is {} bytes but the manifest declares {} bytes",
            draft.payload.len(),
            draft.payload.len() - 1
        ),
    );
}

#[test]
fn signature_by_an_untrusted_key() {
    let env = Env::new();
    let stranger = signing_key(99);
    env.assert_refused(
        &Draft::good().signed(&stranger),
        &[],
        &format!(
            "bundle has no valid signature by a trusted key (by keys not trusted here: {}); \
             trusted here: {} ({PUBLIC})",
            key_id(&stranger),
            env.key_id()
        ),
    );
}

/// The identity point of edwards25519, encoded: y = 1, x = 0 (RFC 8032 section 5.1.2
/// encodes y little-endian with x's sign in the top bit). Section 5.1 names (0, 1) the
/// neutral element; it has order 1, the smallest order there is.
const IDENTITY_POINT: [u8; 32] = {
    let mut p = [0u8; 32];
    p[0] = 1;
    p
};

#[test]
fn weak_small_order_key_is_refused_as_trust() {
    use ed25519_dalek::Verifier as _;
    use ed25519_dalek::pkcs8::EncodePublicKey;
    use ed25519_dalek::pkcs8::spki::der::pem::LineEnding;
    let env = Env::new();
    let weak = ed25519_dalek::VerifyingKey::from_bytes(&IDENTITY_POINT).expect("a curve point");
    // Under the identity key, R = identity and S = 0 is a "signature" on every message for a
    // non-strict verifier: the forgery this fixture carries.
    let forged: [u8; 64] = {
        let mut s = [0u8; 64];
        s[..32].copy_from_slice(&IDENTITY_POINT);
        s
    };
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    let message =
        ampoule_verify::format::signed_bytes(ampoule_verify::format::context::MANIFEST, &manifest);
    let sig = ed25519_dalek::Signature::from_bytes(&forged);
    assert!(weak.verify(&message, &sig).is_ok(), "the forgery is real");
    assert!(weak.verify_strict(&message, &sig).is_err());
    let id = KeyId::of_raw_key(&IDENTITY_POINT);
    let sigs = format!(
        "{{\"signatures\":[{{\"key_id\":\"{id}\",\"signature\":\"{}\"}}]}}",
        hex::encode(forged)
    );
    let pem = weak.to_public_key_pem(LineEnding::LF).expect("pem");
    env.write("weak.public.pem", pem.as_bytes());
    env.write(
        "hostile.ampoule",
        &assemble(&manifest, sigs.as_bytes(), &draft.payload),
    );
    let before = env.listing();
    let run = env.run([
        "verify",
        "hostile.ampoule",
        "--trust",
        "weak.public.pem",
        "--extract",
        "unpacked",
    ]);
    assert_eq!(
        (run.code, run.stderr),
        (
            1,
            format!(
                "ampoule: error: cannot read public key weak.public.pem: public key {id} is a weak \
                 (small-order) Ed25519 key and cannot be trusted\n"
            )
        )
    );
    assert_eq!(env.listing(), before);
}

#[test]
fn signature_over_a_different_manifest() {
    let env = Env::new();
    let draft = Draft::good();
    let mut other = draft.clone();
    other.manifest.version = semver::Version::new(1, 0, 1);
    let manifest = draft.manifest.to_json();
    let foreign = signatures(&[&env.key], &other.manifest.to_json());
    env.assert_refused(
        &assemble(&manifest, &foreign, &draft.payload),
        &[],
        &not_matching(env.key_id()),
    );
}

#[test]
fn signature_made_without_the_manifest_context() {
    // Signing the bare manifest (no domain-separation context) must not count.
    use ed25519_dalek::Signer;
    let env = Env::new();
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    let bare = env.key.sign(&manifest).to_bytes();
    let sigs = format!(
        "{{\"signatures\":[{{\"key_id\":\"{}\",\"signature\":\"{}\"}}]}}",
        env.key_id(),
        hex::encode(bare)
    );
    env.assert_refused(
        &assemble(&manifest, sigs.as_bytes(), &draft.payload),
        &[],
        &not_matching(env.key_id()),
    );
}

#[test]
fn unsigned_bundle() {
    let env = Env::new();
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    env.assert_refused(
        &assemble(&manifest, b"{\"signatures\":[]}", &draft.payload),
        &[],
        "bundle is not signed; it needs a signature by a trusted key",
    );
}

#[test]
fn downgrade_and_reinstall() {
    let env = Env::new();
    let bundle = Draft::good().signed(&env.key);
    env.assert_refused(
        &bundle,
        &["--installed", "1.2.0"],
        "bundle version 1.0.0 is not newer than the installed version 1.2.0; refusing a downgrade or reinstall",
    );
    env.assert_refused(
        &bundle,
        &["--installed", "1.0.0"],
        "bundle version 1.0.0 is not newer than the installed version 1.0.0; refusing a downgrade or reinstall",
    );
}

#[test]
fn app_version_outside_the_range() {
    let env = Env::new();
    let bundle = Draft::good().signed(&env.key);
    for app in ["3.0.0", "1.9.9", "2.5.0-beta.1"] {
        env.assert_refused(
            &bundle,
            &["--app-version", app],
            &format!("bundle requires app version >=2.0.0, <3.0.0 but this app is {app}"),
        );
    }
}

#[test]
fn other_name_or_too_large() {
    let env = Env::new();
    let draft = Draft::good();
    let bundle = draft.signed(&env.key);
    env.assert_refused(
        &bundle,
        &["--name", "nestbox-birds"],
        "bundle is named 'trailcam-species' but this app accepts only 'nestbox-birds'",
    );
    let len = bundle.len();
    env.assert_refused(
        &bundle,
        &["--max-size", &(len - 1).to_string()],
        &format!(
            "bundle is {len} bytes, over this app's limit of {} bytes",
            len - 1
        ),
    );
    let files = draft.manifest.files_len();
    env.assert_refused(
        &bundle,
        &["--max-size", &len.to_string()],
        &format!("bundle unpacks to {files} bytes, over this app's limit of {len} bytes"),
    );
}

#[test]
fn empty_label_list() {
    // A signed manifest that declares no labels is refused before its payload is read.
    let env = Env::new();
    let mut draft = Draft::good();
    draft.manifest.label_count = 0;
    env.assert_refused(
        &draft.signed(&env.key),
        &[],
        "manifest declares an empty label list; a bundle needs at least one label",
    );
    // A signed manifest that declares one label over an empty labels.txt: refused on unpacking.
    let model = model_bytes(1000);
    let inner = tar_of(&[
        tar_entry("model.onnx", &model),
        tar_entry(entry::LABELS, b""),
    ]);
    let mut draft = Draft::with_payload(model, Vec::new(), zstd(&inner));
    draft.manifest.label_count = 1;
    env.assert_refused(
        &draft.signed(&env.key),
        &[],
        "label list is empty; a model needs at least one label",
    );
}

#[test]
fn label_count_not_matching_the_label_list() {
    let env = Env::new();
    let mut draft = Draft::good();
    draft.manifest.label_count = LABEL_COUNT + 1;
    env.assert_refused(
        &draft.signed(&env.key),
        &[],
        "labels.txt holds 6 labels but the manifest declares 7",
    );
}

/// Signs hand-edited manifest text, so the JSON itself is what is hostile.
fn signed_text(env: &Env, draft: &Draft, manifest: &str) -> Vec<u8> {
    let m = manifest.as_bytes();
    assemble(m, &signatures(&[&env.key], m), &draft.payload)
}

#[test]
fn manifest_with_an_unknown_field() {
    let env = Env::new();
    let draft = Draft::good();
    let text = String::from_utf8(draft.manifest.to_json()).expect("utf-8");
    let edited = text.replacen("{\n", "{\n  \"comment\": \"x\",\n", 1);
    env.assert_refused(
        &signed_text(&env, &draft, &edited),
        &[],
        "manifest is not valid: unknown field `comment`, expected one of `format`, `name`, \
         `version`, `created`, `requires_app`, `payload`, `files`, `label_count`, `model`, `metadata` at line 2 column 11",
    );
}

#[test]
fn manifest_with_a_duplicate_key() {
    // A JSON reader that keeps the last value would see a different name than one that keeps
    // the first (RFC 8259 section 4 leaves duplicate names undefined).
    let env = Env::new();
    let draft = Draft::good();
    let text = String::from_utf8(draft.manifest.to_json()).expect("utf-8");
    let edited = text.replacen(
        "  \"name\": \"trailcam-species\",\n",
        "  \"name\": \"trailcam-species\",\n  \"name\": \"nestbox-birds\",\n",
        1,
    );
    assert_ne!(edited, text);
    env.assert_refused(
        &signed_text(&env, &draft, &edited),
        &[],
        "manifest is not valid: duplicate field `name` at line 4 column 8",
    );
}

/// The draft's manifest with `metadata` (JSON text) added as its last field, signed.
fn with_metadata(env: &Env, draft: &Draft, metadata: &str) -> Vec<u8> {
    let text = String::from_utf8(draft.manifest.to_json()).expect("utf-8");
    let body = text
        .strip_suffix("\n}\n")
        .expect("the writer ends the object so");
    signed_text(
        env,
        draft,
        &format!("{body},\n  \"metadata\": {metadata}\n}}\n"),
    )
}

#[test]
fn issue11_signed_metadata_that_pack_would_refuse_is_refused_by_the_device() {
    // A holder of a bundle key signs metadata by hand; the device applies pack's rules.
    let env = Env::new();
    let draft = Draft::good();
    env.assert_accepted(&with_metadata(
        &env,
        &draft,
        r#"{"eval": {"top1": 0.91}, "notes": "ok", "preprocess": {"colour_order": "bgr"}}"#,
    ));
    let segment_rule = "each dot-separated segment must be 1 to 64 bytes of a-z, 0-9 and _";
    let nine = r#"{"a":{"b":{"c":{"d":{"e":{"f":{"g":{"h":{"i":1}}}}}}}}}"#;
    let big = format!(r#"{{"notes": "{}"}}"#, "n".repeat(16 * 1024));
    let long = format!(r#"{{"{}": 1}}"#, "k".repeat(65));
    for (metadata, refusal) in [
        (
            r#"{"Eval": 1}"#,
            format!("metadata key 'Eval' is not allowed: {segment_rule}"),
        ),
        (
            r#"{"a.b": 1}"#,
            format!("metadata key 'a.b' is not allowed: {segment_rule}"),
        ),
        (
            long.as_str(),
            format!(
                "metadata key '{}' is not allowed: {segment_rule}",
                "k".repeat(65)
            ),
        ),
        (
            r#"{"notes": "a", "notes": "b"}"#,
            "manifest is not valid: metadata key 'notes' appears twice at line 27 column 36"
                .to_string(),
        ),
        (
            r#"{"notes": "a", "eval": {"top1": 1}}"#,
            "manifest is not valid: metadata key 'eval' comes after 'notes'; a manifest stores \
             keys in sorted order at line 27 column 35"
                .to_string(),
        ),
        (
            nine,
            "metadata key 'a.b.c.d.e.f.g.h' is 9 levels deep; the format allows at most 8 (the \
             metadata object and each object or array in it count one)"
                .to_string(),
        ),
        (
            big.as_str(),
            "metadata is 16396 bytes as compact JSON, over the format's limit of 16384 bytes"
                .to_string(),
        ),
        (
            r#"{"eval": {"top1": "0.91"}}"#,
            "metadata key 'eval.top1' must be a number (every key under eval is a result), not \
             the string \"0.91\""
                .to_string(),
        ),
        (
            r#"{"preprocess": {"colour_order": "rgba"}}"#,
            "metadata key 'preprocess.colour_order' must be \"rgb\" or \"bgr\", not the string \
             \"rgba\""
                .to_string(),
        ),
        (
            r#"{"notes": null}"#,
            "metadata key 'notes' is null; leave out a key that has no value".to_string(),
        ),
        (
            r#"{}"#,
            "the metadata object is empty; leave the field out instead".to_string(),
        ),
        (
            r#""notes""#,
            "manifest is not valid: metadata must be a JSON object, not the string \"notes\" at \
             line 28 column 1"
                .to_string(),
        ),
    ] {
        env.assert_refused(&with_metadata(&env, &draft, metadata), &[], &refusal);
    }
}

#[test]
fn unsupported_format_version() {
    let env = Env::new();
    let mut draft = Draft::good();
    draft.manifest.format = 3;
    env.assert_refused(
        &draft.signed(&env.key),
        &[],
        "manifest format 3 is not supported (this reader knows formats 1 to 2); \
         update ampoule-verify to read newer bundles",
    );
}

#[test]
fn issue_2_gnu_format_tar_is_refused_without_showing_the_magic() {
    // GNU tar's default format writes the old GNU magic "ustar  \0", not POSIX "ustar\0" "00".
    // Issue 2 showed the magic escaped once; since issue 12 the command line shows no byte
    // of the file, and the library's message still shows it escaped once.
    let env = Env::new();
    let draft = Draft::good();
    let manifest = draft.manifest.to_json();
    let mut h = tar::header(entry::MANIFEST, manifest.len() as u64, CREATED_UNIX);
    h[257..265].copy_from_slice(b"ustar  \0");
    fix_checksum(&mut h);
    env.assert_not_a_bundle_because(
        &tar_of(&[tar_entry_with_header(h, &manifest)]),
        "it has a header that is not a POSIX ustar header; write bundles with \
         'tar --format=ustar'",
        "bundle entry 'manifest.json' is not a POSIX ustar header (magic \"ustar  \\0\"); \
         write bundles with 'tar --format=ustar'",
    );
}

#[test]
fn issue_2_unreadable_size_field_is_refused_without_showing_it() {
    // Issue 2 showed the field escaped once; since issue 12 the command line shows no byte
    // of the file, and the library's message still shows it escaped once.
    let env = Env::new();
    let mut h = tar::header(entry::MANIFEST, 0, CREATED_UNIX);
    h[124..136].copy_from_slice(b"00000001x50\0");
    fix_checksum(&mut h);
    env.assert_not_a_bundle_because(
        &tar_of(&[h.to_vec()]),
        "it has a tar header whose size field is not an octal number",
        "bundle entry 'manifest.json' has an unreadable size field \"00000001x50\\0\"",
    );
}

#[test]
fn name_in_the_ustar_prefix_field() {
    // POSIX joins prefix and name with '/': "../../etc" + "manifest.json" would be a path.
    let env = Env::new();
    let mut h = tar::header(entry::MANIFEST, 0, CREATED_UNIX);
    h[345..354].copy_from_slice(b"../../etc");
    fix_checksum(&mut h);
    env.assert_not_a_bundle(
        &tar_of(&[h.to_vec()]),
        &[],
        "bundle entry 'manifest.json' uses the ustar name prefix field; \
         entry names must be short plain file names",
    );
}

/// A signed draft whose payload is `inner` compressed, declaring the fixture files.
fn signed_inner(env: &Env, model: &[u8], labels: &[u8], inner: &[u8]) -> Vec<u8> {
    Draft::with_payload(model.to_vec(), labels.to_vec(), zstd(inner)).signed(&env.key)
}

#[test]
fn payload_decompressing_short_of_its_declared_size() {
    let env = Env::new();
    let model = model_bytes(5000);
    let full = tar_of(&[
        tar_entry("model.onnx", &model),
        tar_entry(entry::LABELS, LABELS),
    ]);
    // The inner tar without its end-of-archive marker, then cut inside the labels' data.
    env.assert_not_a_bundle(
        &signed_inner(&env, &model, LABELS, &full[..full.len() - 1024]),
        &[],
        "payload end-of-archive marker is truncated: the file ended early",
    );
    let labels_data = tar::entry_len(model.len() as u64) as usize + 512;
    env.assert_not_a_bundle(
        &signed_inner(&env, &model, LABELS, &full[..labels_data + 3]),
        &[],
        "payload entry 'labels.txt' is truncated: the file ended early",
    );
}

#[test]
fn damaged_inner_tar_headers_and_padding() {
    let env = Env::new();
    let model = model_bytes(5000);
    let full = tar_of(&[
        tar_entry("model.onnx", &model),
        tar_entry(entry::LABELS, LABELS),
    ]);
    let labels_header = tar::entry_len(model.len() as u64) as usize;
    let mut bad_sum = full.clone();
    bad_sum[labels_header + 140] ^= 1;
    let h: [u8; 512] = bad_sum[labels_header..labels_header + 512]
        .try_into()
        .expect("a block");
    let stored = header_sum(
        full[labels_header..labels_header + 512]
            .try_into()
            .expect("a block"),
    );
    env.assert_not_a_bundle(
        &signed_inner(&env, &model, LABELS, &bad_sum),
        &[],
        &format!(
            "payload entry 'labels.txt' has a bad tar header checksum (stored {stored:o}, computed {:o}): \
             the file is damaged or not a bundle",
            header_sum(&h)
        ),
    );
    let mut bad_pad = full.clone();
    bad_pad[labels_header - 1] = b'x';
    env.assert_not_a_bundle(
        &signed_inner(&env, &model, LABELS, &bad_pad),
        &[],
        "payload entry 'model.onnx' has non-zero bytes in its tar padding",
    );
    let mut extra = full.clone();
    extra.truncate(full.len() - 1024);
    extra.extend_from_slice(&tar_entry("notes.txt", b"x"));
    extra.extend_from_slice(&tar::END_OF_ARCHIVE);
    // Issue 10 item 8: the extra entry is named, not hidden behind the size it adds.
    env.assert_not_a_bundle_because(
        &signed_inner(&env, &model, LABELS, &extra),
        "its payload has an extra entry after its last declared entry",
        "payload has an extra entry 'notes.txt' after its last declared entry",
    );
}

/// A header of type `flag` named `name` with `size` bytes of data, as a general tar writer
/// would make it.
fn typed_header(name: &str, flag: u8, size: usize) -> [u8; 512] {
    retyped(header_named(name, size), flag, "")
}

#[test]
fn issue10_pax_gnu_long_name_and_dot_entries_in_a_small_payload_name_their_cause() {
    // Issue 10 item 8. Each of these makes the inner tar longer than the manifest declares,
    // and before the fix the payload was refused as "decompresses to more than the N bytes
    // its manifest declares", hiding what was wrong. The names and type bytes are the ones
    // GNU tar writes (from memory of GNU tar 1.35: `--format=pax` extended headers, the
    // `././@LongLink` entry of `--format=gnu` for a name over 100 bytes, `./` from
    // `tar -C dir .`); the magic stays POSIX so that the type or name is what is refused.
    let env = Env::new();
    let model = model_bytes(3000);
    let pax_records = b"30 mtime=1764547200.123456789\n";
    let long_name = format!("{}.onnx", "m".repeat(120));
    let cases: Vec<(Vec<u8>, &str, String)> = vec![
        (
            tar_of(&[
                tar_entry_with_header(
                    typed_header("PaxHeaders/model.onnx", b'x', pax_records.len()),
                    pax_records,
                ),
                tar_entry("model.onnx", &model),
                tar_entry(entry::LABELS, LABELS),
            ]),
            "its payload has an entry that is not a regular file (a link, device, directory or \
             extended header); only regular files are allowed",
            "payload entry 'PaxHeaders/model.onnx' is a pax extended header (tar type 'x'); \
             only regular files are allowed"
                .into(),
        ),
        (
            tar_of(&[
                tar_entry("model.onnx", &model),
                tar_entry_with_header(
                    typed_header("PaxHeaders/labels.txt", b'x', pax_records.len()),
                    pax_records,
                ),
                tar_entry(entry::LABELS, LABELS),
            ]),
            "its payload has an entry that is not a regular file (a link, device, directory or \
             extended header); only regular files are allowed",
            "payload entry 'PaxHeaders/labels.txt' is a pax extended header (tar type 'x'); \
             only regular files are allowed"
                .into(),
        ),
        (
            tar_of(&[
                tar_entry_with_header(
                    typed_header("././@LongLink", b'L', long_name.len() + 1),
                    format!("{long_name}\0").as_bytes(),
                ),
                tar_entry("model.onnx", &model),
                tar_entry(entry::LABELS, LABELS),
            ]),
            "its payload has an entry that is not a regular file (a link, device, directory or \
             extended header); only regular files are allowed",
            "payload entry '././@LongLink' is a GNU long-name header (tar type 'L'); only \
             regular files are allowed"
                .into(),
        ),
        (
            tar_of(&[
                tar_entry_with_header(typed_header("./", b'5', 0), b""),
                tar_entry("model.onnx", &model),
                tar_entry(entry::LABELS, LABELS),
            ]),
            "its payload has an entry that is not a regular file (a link, device, directory or \
             extended header); only regular files are allowed",
            "payload entry './' is a directory (tar type '5'); only regular files are allowed"
                .into(),
        ),
        (
            tar_of(&[
                tar_entry_with_header(header_named(".", 0), b""),
                tar_entry("model.onnx", &model),
                tar_entry(entry::LABELS, LABELS),
            ]),
            "its payload has an entry name that is a path; bundles hold only plain file names",
            "payload entry name '.' is a path; bundles hold only plain file names, nothing \
             outside them"
                .into(),
        ),
        (
            // After the last file: a pax global header where the end marker belongs.
            tar_of(&[
                tar_entry("model.onnx", &model),
                tar_entry(entry::LABELS, LABELS),
                tar_entry_with_header(
                    typed_header("pax_global_header", b'g', pax_records.len()),
                    pax_records,
                ),
            ]),
            "its payload has an entry that is not a regular file (a link, device, directory or \
             extended header); only regular files are allowed",
            "payload entry 'pax_global_header' is a pax extended header (tar type 'g'); only \
             regular files are allowed"
                .into(),
        ),
    ];
    for (inner, reason, library) in cases {
        let declared = Draft::with_payload(model.clone(), LABELS.to_vec(), Vec::new())
            .manifest
            .unpacked_tar_len();
        assert!(
            inner.len() as u64 > declared,
            "each case is longer than declared, as the attack is"
        );
        env.assert_not_a_bundle_because(
            &signed_inner(&env, &model, LABELS, &inner),
            reason,
            &library,
        );
    }
}

#[test]
fn payload_that_is_not_zstd_or_labels_not_in_stored_form() {
    let env = Env::new();
    let model = model_bytes(5000);
    let inner = tar_of(&[
        tar_entry("model.onnx", &model),
        tar_entry(entry::LABELS, LABELS),
    ]);
    // The bare tar, signed and digested but not compressed.
    let raw = Draft::with_payload(model.clone(), LABELS.to_vec(), inner).signed(&env.key);
    env.assert_not_a_bundle(
        &raw,
        &[],
        "payload is not valid zstd data: Unknown frame descriptor",
    );
    // CRLF line ends: pack would normalize them, so a bundle holding them was not made by pack.
    let crlf = b"fox\r\nhare\r\n";
    let inner = tar_of(&[
        tar_entry("model.onnx", &model),
        tar_entry(entry::LABELS, crlf),
    ]);
    let mut draft = Draft::with_payload(model, crlf.to_vec(), zstd(&inner));
    draft.manifest.label_count = 2;
    env.assert_refused(
        &draft.signed(&env.key),
        &[],
        "labels.txt is not in the stored form (one label per line, each ending in a single '\\n')",
    );
}

/// Hostile label lists of issue 10 item 7, each with the fixture's six labels: the line, and
/// what the device and `pack` say about it (the label shown escaped, so no terminal obeys it).
pub const HOSTILE_LABELS: &[(&str, &str)] = &[
    (
        // A right-to-left override: "boar" shows as "raob" reversed back, i.e. as "boar".
        "wild \u{202E}raob",
        "label on line 3 ('wild \\u{202e}raob') holds U+202E, a bidirectional control, which \
         can make text display in another order; labels may not hold invisible or \
         bidirectional format characters (Unicode 14.0.0)",
    ),
    (
        "badger\u{200B}",
        "label on line 3 ('badger\\u{200b}') holds U+200B, an invisible format character; \
         labels may not hold invisible or bidirectional format characters (Unicode 14.0.0)",
    ),
    (
        "\u{FEFF}wild boar",
        "label on line 3 ('\\u{feff}wild boar') holds U+FEFF, an invisible format character; \
         labels may not hold invisible or bidirectional format characters (Unicode 14.0.0)",
    ),
    (
        "che\u{0300}vre",
        "label on line 3 ('che\u{300}vre') is not in Unicode Normalization Form C (NFC, \
         Unicode 14.0.0); write it composed, for example with Python's \
         unicodedata.normalize('NFC', text)",
    ),
];

/// The fixture's labels with line 3 replaced by `line`.
pub fn labels_with_line_3(line: &str) -> Vec<u8> {
    let text = std::str::from_utf8(LABELS).expect("UTF-8");
    let mut lines: Vec<&str> = text.lines().collect();
    lines[2] = line;
    (lines.join("\n") + "\n").into_bytes()
}

#[test]
fn issue10_signed_labels_with_invisible_or_bidirectional_characters_or_not_in_nfc() {
    // Issue 10 item 7: the device's verifier refuses each, though the bundle is signed.
    let env = Env::new();
    let model = model_bytes(3000);
    for (line, expected) in HOSTILE_LABELS {
        let labels = labels_with_line_3(line);
        let inner = tar_of(&[
            tar_entry("model.onnx", &model),
            tar_entry(entry::LABELS, &labels),
        ]);
        let draft = Draft::with_payload(model.clone(), labels, zstd(&inner));
        env.assert_refused(&draft.signed(&env.key), &[], expected);
    }
}

// ---------------------------------------------------------------------------------------------
// Format 2 (issue 13): the payload in chunks, each bound by its size and SHA-256 in the chunk
// list, whose SHA-256 the signed manifest declares. Each chunk is checked just before it is
// decoded, so every refusal below comes before the decoder sees a byte it should not.

/// Each chunk's compressed size and SHA-256, from a chunk list (36 bytes a record: the size,
/// 4 bytes little-endian, then the digest; FORMAT.md, "The chunk list").
fn records(list: &[u8]) -> Vec<(u32, Vec<u8>)> {
    list.chunks_exact(36)
        .map(|r| {
            let size = u32::from_le_bytes(r[..4].try_into().expect("4 bytes"));
            (size, r[4..].to_vec())
        })
        .collect()
}

/// The chunk list of `frames`, made here by hand from its definition.
fn list_of(frames: &[Vec<u8>]) -> Vec<u8> {
    frames
        .iter()
        .flat_map(|f| {
            let mut record = (f.len() as u32).to_le_bytes().to_vec();
            record.extend_from_slice(Digest::of(f).as_bytes());
            record
        })
        .collect()
}

/// The payload of a format 2 draft cut into its chunks, by the sizes its list gives.
fn frames(draft: &Draft) -> Vec<Vec<u8>> {
    let mut at = 0;
    records(draft.chunks.as_deref().expect("a format 2 draft"))
        .into_iter()
        .map(|(size, _)| {
            let frame = draft.payload[at..at + size as usize].to_vec();
            at += size as usize;
            frame
        })
        .collect()
}

/// A bundle of `draft` with its chunk list and payload replaced, laid out without re-signing:
/// the signed manifest still binds the original list.
fn relaid(env: &Env, draft: &Draft, list: &[u8], payload: &[u8]) -> Vec<u8> {
    let manifest = draft.manifest.to_json();
    assemble_with(
        &manifest,
        &signatures(&[&env.key], &manifest),
        Some(list),
        payload,
    )
}

/// A bundle whose signed manifest binds `list` and a payload of `payload`'s size: what a
/// careless packer holding the bundle key could write.
fn resigned(env: &Env, draft: &Draft, list: Vec<u8>, payload: Vec<u8>) -> Vec<u8> {
    let mut draft = draft.clone();
    draft.manifest.payload.size = payload.len() as u64;
    draft.manifest.payload.chunks_sha256 = Some(Digest::of(&list));
    draft.payload = payload;
    draft.chunks = Some(list);
    draft.signed(&env.key)
}

#[test]
fn issue13_the_untouched_format_2_fixture_verifies_and_unpacks() {
    let env = Env::new();
    let draft = Draft::chunked();
    assert_eq!(frames(&draft).len(), 4, "the fixture spans several chunks");
    assert_eq!(
        list_of(&frames(&draft)),
        draft.chunks.clone().expect("a list")
    );
    let bundle = draft.signed(&env.key);
    env.assert_accepted(&bundle);
    env.write("unpack.ampoule", &bundle);
    let run = env.run([
        "verify",
        "unpack.ampoule",
        "--trust",
        PUBLIC,
        "--app-version",
        APP_VERSION,
        "--extract",
        "unpacked-2",
    ]);
    assert_eq!(run.code, 0, "{run:?}");
    let model = std::fs::read(env.path("unpacked-2/model.onnx")).expect("unpacked model");
    assert!(model == draft.model, "the unpacked model differs");
}

#[test]
fn issue13_an_altered_chunk_is_refused_before_it_is_decoded() {
    let env = Env::new();
    let draft = Draft::chunked();
    let chunks = frames(&draft);
    let (start, end) = (chunks[0].len(), chunks[0].len() + chunks[1].len());
    let mut payload = draft.payload.clone();
    payload[start + 100] ^= 0x01;
    let found = Digest::of(&payload[start..end]);
    env.assert_refused(
        &relaid(
            &env,
            &draft,
            draft.chunks.as_deref().expect("a list"),
            &payload,
        ),
        &[],
        &format!(
            "payload chunk 1 (bytes {start} to {end}) has sha256 {found}, but the chunk list \
             declares {}; the bundle is damaged or was altered",
            Digest::of(&chunks[1])
        ),
    );
}

#[test]
fn issue13_a_chunk_list_not_matching_the_manifest_is_refused() {
    let env = Env::new();
    let draft = Draft::chunked();
    let mut list = draft.chunks.clone().expect("a list");
    // A digest byte of the second record: a list made for other chunks.
    list[36 + 4 + 7] ^= 0x80;
    env.assert_refused(
        &relaid(&env, &draft, &list, &draft.payload),
        &[],
        &format!(
            "chunk list digest mismatch: manifest declares chunks_sha256 {}, the bundle's \
             'chunks.sha256' holds {}",
            draft.manifest.payload.chunks_sha256.expect("format 2"),
            Digest::of(&list)
        ),
    );
}

#[test]
fn issue13_a_truncated_chunk_list_is_refused() {
    let env = Env::new();
    let draft = Draft::chunked();
    let list = draft.chunks.clone().expect("a list");
    env.assert_not_a_bundle(
        &relaid(&env, &draft, &list[..list.len() - 10], &draft.payload),
        &[],
        &format!(
            "bundle entry 'chunks.sha256' is {} bytes, not a whole number of 36-byte records: \
             the chunk list is truncated or damaged",
            list.len() - 10
        ),
    );
    // One whole record fewer: too few chunks for the inner tar the manifest's files make.
    env.assert_not_a_bundle(
        &relaid(&env, &draft, &list[..list.len() - 36], &draft.payload),
        &[],
        &format!(
            "bundle entry 'chunks.sha256' lists 3 chunks, but the manifest's files make an \
             inner tar of {} bytes, which needs 4 in chunks of 65536 bytes",
            draft.manifest.unpacked_tar_len()
        ),
    );
}

#[test]
fn issue13_chunk_sizes_that_do_not_add_up_are_refused() {
    let env = Env::new();
    let draft = Draft::chunked();
    let chunks = frames(&draft);
    // The list says the last chunk is one byte longer than the payload holds, and the
    // manifest is signed over it: refused before the payload is read.
    let mut list = list_of(&chunks);
    let last = list.len() - 36;
    let size = u32::from_le_bytes(list[last..last + 4].try_into().expect("4 bytes")) + 1;
    list[last..last + 4].copy_from_slice(&size.to_le_bytes());
    env.assert_not_a_bundle(
        &resigned(&env, &draft, list, draft.payload.clone()),
        &[],
        &format!(
            "bundle entry 'chunks.sha256' lists chunks of {} bytes in all, but the manifest \
             declares a payload of {} bytes: the chunk sizes do not add up",
            draft.payload.len() + 1,
            draft.payload.len()
        ),
    );
    // Sizes that add up but cut the payload elsewhere: the first chunk takes one byte of the
    // second frame, and each digest is of the bytes so cut. The first chunk is then not one
    // zstd frame.
    let mut cut = chunks.clone();
    let moved = cut[1].remove(0);
    cut[0].push(moved);
    env.assert_not_a_bundle(
        &resigned(&env, &draft, list_of(&cut), draft.payload.clone()),
        &[],
        &format!(
            "payload chunk 0 is not valid zstd data: its first frame ends after {} of its {} \
             bytes; a chunk is one frame",
            chunks[0].len(),
            cut[0].len()
        ),
    );
}

#[test]
fn issue13_reordered_chunks_are_refused() {
    let env = Env::new();
    let draft = Draft::chunked();
    let chunks = frames(&draft);
    // Two frames of the model swapped in the payload, the signed list unchanged.
    let swapped = [
        chunks[0].clone(),
        chunks[2].clone(),
        chunks[1].clone(),
        chunks[3].clone(),
    ];
    let payload = swapped.concat();
    let end = chunks[0].len() + chunks[1].len();
    env.assert_refused(
        &relaid(
            &env,
            &draft,
            draft.chunks.as_deref().expect("a list"),
            &payload,
        ),
        &[],
        &format!(
            "payload chunk 1 (bytes {} to {end}) has sha256 {}, but the chunk list declares {}; \
             the bundle is damaged or was altered",
            chunks[0].len(),
            Digest::of(&payload[chunks[0].len()..end]),
            Digest::of(&chunks[1])
        ),
    );
    // Swapped in the list too, and signed so: every chunk checks and decodes to its place's
    // size, but the model comes out with two of its pieces swapped, and its digest is not
    // the manifest's.
    let inner = tar_of(&[
        tar_entry("model.onnx", &draft.model),
        tar_entry(entry::LABELS, LABELS),
    ]);
    let k = CHUNK_BYTES as usize;
    let seen = [
        &inner[..k],
        &inner[2 * k..3 * k],
        &inner[k..2 * k],
        &inner[3 * k..],
    ]
    .concat();
    let model = &seen[512..512 + draft.model.len()];
    env.assert_refused(
        &resigned(&env, &draft, list_of(&swapped), payload),
        &[],
        &format!(
            "digest mismatch for 'model.onnx': manifest declares sha256 {}, the payload holds {}",
            Digest::of(&draft.model),
            Digest::of(model)
        ),
    );
}

#[test]
fn issue13_a_chunk_decoding_to_another_size_than_its_place_is_refused() {
    let env = Env::new();
    let draft = Draft::chunked();
    let mut chunks = frames(&draft);
    // The last chunk's frame replaced by one holding its bytes and 1 MiB of zeros more, the
    // list and manifest signed over it: a bomb stopped by the size the frame must declare.
    let inner = tar_of(&[
        tar_entry("model.onnx", &draft.model),
        tar_entry(entry::LABELS, LABELS),
    ]);
    let last = 3 * CHUNK_BYTES as usize;
    let mut tail = inner[last..].to_vec();
    let place = tail.len();
    tail.resize(place + (1 << 20), 0);
    // The library's one-shot compressor states the frame's decoded size, as pack's does.
    chunks[3] = ::zstd::bulk::compress(&tail, 3).expect("zstd compresses in memory");
    env.assert_not_a_bundle(
        &resigned(&env, &draft, list_of(&chunks), chunks.concat()),
        &[],
        &format!(
            "payload chunk 3 is not valid zstd data: its frame declares {} decoded bytes, but \
             its place in the inner tar holds {place}",
            tail.len()
        ),
    );
}

#[test]
fn issue13_a_format_1_layout_under_a_format_2_manifest_and_the_reverse_are_refused() {
    let env = Env::new();
    let chunked = Draft::chunked();
    let manifest = chunked.manifest.to_json();
    env.assert_not_a_bundle(
        &assemble(
            &manifest,
            &signatures(&[&env.key], &manifest),
            &chunked.payload,
        ),
        &[],
        "bundle has no 'chunks.sha256' entry, which its format 2 manifest requires before \
         'payload.tar.zst'",
    );
    let plain = Draft::good();
    let manifest = plain.manifest.to_json();
    env.assert_not_a_bundle(
        &assemble_with(
            &manifest,
            &signatures(&[&env.key], &manifest),
            Some(&list_of(std::slice::from_ref(&plain.payload))),
            &plain.payload,
        ),
        &[],
        "bundle has a 'chunks.sha256' entry, but its format 1 manifest binds the payload by one \
         digest",
    );
}
