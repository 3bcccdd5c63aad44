//! Published reference vectors through the verifier's own code paths: Ed25519 (RFC 8032
//! section 7.1) through `PublicKey`, key files (RFC 8410 section 10) through
//! `PublicKey::from_pem`, and SHA-256 (FIPS 180-2 appendix B) through `digest::Hasher` and
//! `digest::hash_reader`.
//!
//! Each vector is a file in `tests/data/` whose first line names its source; the tests loop
//! over every file of a case, so a new vector needs only a new file, and they insist on
//! finding the number of files the source publishes.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;

use ampoule_verify::digest::{Hasher, hash_reader};
use ampoule_verify::format::context;
use ampoule_verify::keys::ED25519_SPKI_PREFIX;
use ampoule_verify::{Digest, KeyId, PublicKey};
use ed25519_dalek::{Signer, SigningKey};
use sha2::{Digest as _, Sha256};

fn data_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data")
}

/// Every vector file whose name starts with `prefix`, with its `key value` lines.
fn vector_files(prefix: &str) -> Vec<(String, BTreeMap<String, String>)> {
    let mut files: Vec<_> = std::fs::read_dir(data_dir())
        .expect("tests/data exists")
        .map(|e| {
            e.expect("dir entry")
                .file_name()
                .to_string_lossy()
                .into_owned()
        })
        .filter(|n| n.starts_with(prefix) && n.ends_with(".txt"))
        .collect();
    files.sort();
    files
        .into_iter()
        .map(|name| {
            let text = std::fs::read_to_string(data_dir().join(&name)).expect("vector file");
            assert!(text.starts_with("# "), "{name} must name its source first");
            let fields = text
                .lines()
                .filter(|l| !l.starts_with('#'))
                .map(|l| {
                    let (k, v) = l.split_once(' ').unwrap_or((l, ""));
                    (k.to_string(), v.to_string())
                })
                .collect();
            (name, fields)
        })
        .collect()
}

fn hex_field(fields: &BTreeMap<String, String>, key: &str) -> Vec<u8> {
    hex::decode(&fields[key]).expect("hex in a vector file")
}

/// The key id as the documentation defines it, computed here from the DER of RFC 8410
/// section 10.1's SubjectPublicKeyInfo (`302a300506032b6570032100` then the raw key).
fn expected_key_id(raw: &[u8]) -> String {
    let mut der = hex::decode("302a300506032b6570032100").expect("hex");
    assert_eq!(der, ED25519_SPKI_PREFIX);
    der.extend_from_slice(raw);
    hex::encode(&Sha256::digest(&der)[..16])
}

#[test]
fn rfc8032_section_7_1_through_public_key() {
    // RFC 8032 section 7.1: TEST 1, 2, 3, 1024 and SHA(abc).
    let files = vector_files("rfc8032-7.1-");
    assert_eq!(
        files.len(),
        5,
        "RFC 8032 section 7.1 has five Ed25519 vectors"
    );
    for (name, v) in &files {
        let secret: [u8; 32] = hex_field(v, "secret_key").try_into().expect("32 bytes");
        let public: [u8; 32] = hex_field(v, "public_key").try_into().expect("32 bytes");
        let message = hex_field(v, "message");
        let signature: [u8; 64] = hex_field(v, "signature").try_into().expect("64 bytes");

        let signing = SigningKey::from_bytes(&secret);
        assert_eq!(
            signing.verifying_key().as_bytes(),
            &public,
            "{name}: public key"
        );
        let key = PublicKey::from_raw(&public).expect("an RFC 8032 key is not weak");
        assert_eq!(key.as_bytes(), &public, "{name}");
        assert_eq!(
            key.id().to_string(),
            expected_key_id(&public),
            "{name}: key id"
        );
        assert_eq!(key.id(), KeyId::of_raw_key(&public), "{name}");
        assert_eq!(
            signing.sign(&message).to_bytes(),
            signature,
            "{name}: signature"
        );

        // PublicKey::verify signs `context || document`; with an empty context it is plain
        // RFC 8032 Ed25519, so the published signature must verify.
        assert!(key.verify(b"", &message, &signature), "{name}: accepts");
        for bit in [0, 7, 255, 256, 511] {
            let mut bad = signature;
            bad[bit / 8] ^= 1 << (bit % 8);
            assert!(
                !key.verify(b"", &message, &bad),
                "{name}: bit {bit} flipped"
            );
        }
        let mut other = message.clone();
        match other.first_mut() {
            Some(b) => *b ^= 1,
            None => other.push(0),
        }
        assert!(
            !key.verify(b"", &other, &signature),
            "{name}: other message"
        );
        // A context changes the signed bytes: the same signature must not verify under it.
        assert!(
            !key.verify(context::MANIFEST, &message, &signature),
            "{name}: under the manifest context"
        );
    }
}

#[test]
fn rfc8032_signatures_verify_with_openssl() {
    // Cross-check: the openssl command verifies the same vectors with our PEM encoding of
    // the public key (openssl pkeyutl -verify -rawin).
    if Command::new("openssl").arg("version").output().is_err() {
        eprintln!("skipped: the openssl command is not installed");
        return;
    }
    let dir = tempfile::tempdir().expect("temp dir");
    let mut checked = 0;
    for (name, v) in vector_files("rfc8032-7.1-") {
        let message = hex_field(&v, "message");
        if message.is_empty() {
            eprintln!(
                "skipped {name} with openssl: openssl 3.0's pkeyutl cannot verify an empty input \
                 (checked through the library above)"
            );
            continue;
        }
        let public: [u8; 32] = hex_field(&v, "public_key").try_into().expect("32 bytes");
        let key = PublicKey::from_raw(&public).expect("not weak");
        let (pem, msg, sig) = (
            dir.path().join("pub.pem"),
            dir.path().join("msg.bin"),
            dir.path().join("sig.bin"),
        );
        std::fs::write(&pem, key.to_pem()).expect("write");
        std::fs::write(&msg, &message).expect("write");
        std::fs::write(&sig, hex_field(&v, "signature")).expect("write");
        let out = Command::new("openssl")
            .args(["pkeyutl", "-verify", "-pubin", "-inkey"])
            .arg(&pem)
            .arg("-rawin")
            .arg("-in")
            .arg(&msg)
            .arg("-sigfile")
            .arg(&sig)
            .output()
            .expect("openssl runs");
        assert!(
            out.status.success(),
            "{name}: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        checked += 1;
    }
    assert_eq!(checked, 4);
}

/// RFC 8410 section 10.1: an Ed25519 public key as SubjectPublicKeyInfo PEM.
const RFC8410_PUBLIC: &str = include_str!("data/rfc8410-10.1-public.pem");
/// RFC 8410 section 10.2: a certificate for an X25519 key (not an Ed25519 public key).
const RFC8410_X25519_CERT: &str = include_str!("data/rfc8410-10.2-x25519-cert.pem");
/// RFC 8410 section 10.3: the private key belonging to the section 10.1 public key.
const RFC8410_PRIVATE: &str = include_str!("data/rfc8410-10.3-private.pem");

#[test]
fn rfc8410_public_key_loads_from_pem() {
    let key = PublicKey::from_pem(RFC8410_PUBLIC).expect("RFC 8410 section 10.1 loads");
    // RFC 8410 section 10.1 prints the key's DER; its last 32 bytes are the raw key.
    assert_eq!(
        hex::encode(key.as_bytes()),
        "19bf44096984cdfe8541bac167dc3b96c85086aa30b6b6cb0c5c38ad703166e1"
    );
    assert_eq!(key.id().to_string(), expected_key_id(key.as_bytes()));
    // The writer gives back the RFC's PEM byte for byte.
    assert_eq!(key.to_pem(), RFC8410_PUBLIC);
    // And the key id is what the module documentation says openssl gives.
    if let Some(openssl_id) = openssl_key_id(RFC8410_PUBLIC) {
        assert_eq!(key.id().to_string(), openssl_id);
    }
}

/// `openssl pkey -pubin -outform DER | openssl dgst -sha256`, first 32 hex digits.
fn openssl_key_id(pem: &str) -> Option<String> {
    let dir = tempfile::tempdir().expect("temp dir");
    let (pem_path, der_path) = (dir.path().join("k.pem"), dir.path().join("k.der"));
    std::fs::write(&pem_path, pem).expect("write");
    let status = Command::new("openssl")
        .args(["pkey", "-pubin", "-outform", "DER", "-in"])
        .arg(&pem_path)
        .arg("-out")
        .arg(&der_path)
        .status();
    match status {
        Ok(s) if s.success() => {}
        _ => {
            eprintln!("skipped: openssl is not installed or cannot read the key");
            return None;
        }
    }
    let out = Command::new("openssl")
        .args(["dgst", "-sha256", "-r"])
        .arg(&der_path)
        .output()
        .expect("openssl dgst");
    let text = String::from_utf8(out.stdout).expect("hex");
    Some(text[..32].to_string())
}

#[test]
fn issue_2_rfc8410_other_samples_are_refused_naming_what_they_are() {
    // Before the fix the certificate was reported as "invalid Base64 encoding" (its 66-column
    // lines, see RFC 8410 errata), which says nothing about the real mistake.
    for (pem, label) in [
        (RFC8410_X25519_CERT, "CERTIFICATE"),
        (RFC8410_PRIVATE, "PRIVATE KEY"),
    ] {
        let err = PublicKey::from_pem(pem).expect_err("not a public key");
        assert_eq!(
            err.to_string(),
            format!(
                "PEM block '{label}' is not an Ed25519 public key; expected a \
                 '-----BEGIN PUBLIC KEY-----' block as written by keygen or 'openssl pkey -pubout'"
            )
        );
        assert_eq!(err.kind(), ampoule_verify::ErrorKind::Key);
    }
    // A public key block whose contents are not Ed25519 keeps the parser's reason.
    let err = PublicKey::from_pem("-----BEGIN PUBLIC KEY-----\nAAAA\n-----END PUBLIC KEY-----\n")
        .expect_err("garbage");
    assert!(
        err.to_string()
            .starts_with("not an Ed25519 public key in SubjectPublicKeyInfo PEM ("),
        "{err}"
    );
}

#[test]
fn small_order_keys_are_refused() {
    // Encodings of points of small order on edwards25519: the identity (0, 1) (RFC 8032
    // section 5.1 calls it the neutral element; encoded y = 1 little-endian per section
    // 5.1.2) and (0, -1) of order 2 (y = p - 1 = 2^255 - 20, "ec ff .. ff 7f").
    let identity = {
        let mut p = [0u8; 32];
        p[0] = 1;
        p
    };
    let order_two = {
        let mut p = [0xffu8; 32];
        p[0] = 0xec;
        p[31] = 0x7f;
        p
    };
    for raw in [identity, order_two] {
        let id = KeyId::of_raw_key(&raw);
        let err = PublicKey::from_raw(&raw).expect_err("weak");
        assert_eq!(
            err.to_string(),
            format!("public key {id} is a weak (small-order) Ed25519 key and cannot be trusted")
        );
        assert_eq!(err.kind(), ampoule_verify::ErrorKind::Key);
    }
}

#[test]
fn fips180_2_appendix_b_through_hasher_and_hash_reader() {
    // FIPS 180-2 appendix B.1, B.2 and B.3.
    let files = vector_files("fips180-2-");
    assert_eq!(
        files.len(),
        3,
        "FIPS 180-2 appendix B has three SHA-256 examples"
    );
    for (name, v) in &files {
        let repeat: usize = v["repeat"].parse().expect("a count");
        let message = v["message"].repeat(repeat).into_bytes();
        let expected: Digest = v["sha256"].parse().expect("a digest");
        assert_eq!(Digest::of(&message), expected, "{name}: Digest::of");

        // Uneven pieces, so block boundaries fall inside and between updates.
        let mut hasher = Hasher::new();
        let mut rest = &message[..];
        for size in [1usize, 63, 64, 65, 1000, 4096].iter().cycle() {
            if rest.is_empty() {
                break;
            }
            let (piece, tail) = rest.split_at((*size).min(rest.len()));
            hasher.update(piece);
            rest = tail;
        }
        assert_eq!(hasher.len(), message.len() as u64, "{name}");
        assert_eq!(hasher.finish(), expected, "{name}: Hasher");

        let len = message.len() as u64;
        assert_eq!(
            hash_reader(&message[..], len).expect("in memory"),
            (expected, len),
            "{name}: hash_reader"
        );
        assert_eq!(
            hash_reader(&message[..], u64::MAX).expect("in memory"),
            (expected, len),
            "{name}: hash_reader, no limit"
        );
        // The limit stops reading: one byte short is another digest.
        let (short, read) = hash_reader(&message[..], len - 1).expect("in memory");
        assert_eq!(read, len - 1, "{name}");
        assert_ne!(short, expected, "{name}");
        assert_eq!(expected.to_string(), v["sha256"], "{name}: lowercase hex");
    }
}
