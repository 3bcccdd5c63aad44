//! Signing outside ampoule (issue 5), with the real openssl command as the outside signer and
//! as the reference verifier: the README's commands, run as written.
//!
//! openssl 3 signs Ed25519 with `pkeyutl -sign -rawin` and writes the raw 64-byte signature
//! (RFC 8032 section 5.1.6); `pkeyutl -verify -rawin` checks one. Each test prints why it
//! skipped when openssl is missing.

#[path = "bundle_check/mod.rs"]
mod bundle_check;

use std::path::Path;
use std::process::Command;

struct Run {
    code: i32,
    stdout: String,
    stderr: String,
}

fn ampoule(dir: &Path, args: &[&str]) -> Run {
    let out = Command::new(env!("CARGO_BIN_EXE_ampoule"))
        .args(args)
        .current_dir(dir)
        .output()
        .expect("run ampoule");
    Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

fn ok(dir: &Path, args: &[&str]) -> serde_json::Value {
    let mut all = vec!["--json"];
    all.extend_from_slice(args);
    let run = ampoule(dir, &all);
    assert_eq!(run.code, 0, "{args:?}: {}", run.stderr);
    serde_json::from_str(&run.stdout).expect("--json prints JSON")
}

fn openssl_available() -> bool {
    let found = Command::new("openssl")
        .arg("version")
        .output()
        .is_ok_and(|o| o.status.success());
    if !found {
        eprintln!("skipping: the openssl command is not installed (it is the reference signer)");
    }
    found
}

fn openssl(dir: &Path, args: &[&str]) -> String {
    let out = Command::new("openssl")
        .args(args)
        .current_dir(dir)
        .output()
        .expect("run openssl");
    assert!(
        out.status.success(),
        "openssl {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// An Ed25519 key pair made by openssl alone, as an outside signer would hold it.
fn openssl_key(dir: &Path, name: &str) {
    let secret = format!("{name}.secret.pem");
    openssl(
        dir,
        &["genpkey", "-algorithm", "ed25519", "-out", secret.as_str()],
    );
    openssl(
        dir,
        &[
            "pkey",
            "-in",
            secret.as_str(),
            "-pubout",
            "-out",
            &format!("{name}.public.pem"),
        ],
    );
}

/// The README's signing command.
fn openssl_sign(dir: &Path, key: &str, request: &str, sig: &str) {
    openssl(
        dir,
        &[
            "pkeyutl", "-sign", "-inkey", key, "-rawin", "-in", request, "-out", sig,
        ],
    );
}

fn openssl_verifies(dir: &Path, public: &str, request: &str, sig: &str) {
    let out = openssl(
        dir,
        &[
            "pkeyutl", "-verify", "-pubin", "-inkey", public, "-rawin", "-in", request, "-sigfile",
            sig,
        ],
    );
    assert!(out.contains("Signature Verified Successfully"), "{out}");
}

fn pack_unsigned(dir: &Path) {
    let model: Vec<u8> = (0..30_000u32).map(|i| (i * 13 % 241) as u8).collect();
    std::fs::write(dir.join("species.bin"), model).expect("model");
    std::fs::write(
        dir.join("labels.txt"),
        "fox\nroe deer\nwild boar\nbadger\nhare\nempty frame\n",
    )
    .expect("labels");
    ok(
        dir,
        &[
            "pack",
            "--model",
            "species.bin",
            "--labels",
            "labels.txt",
            "--name",
            "trailcam-species",
            "--version",
            "1.2.0",
            "--created",
            "2026-12-01T06:00:00Z",
            "-o",
            "species.ampoule",
        ],
    );
    // Unsigned: the device's layout reader and GNU tar (issue 12 item 7).
    bundle_check::assert_readers_accept(
        env!("CARGO_BIN_EXE_ampoule"),
        &dir.join("species.ampoule"),
        None,
        "model.bin",
    );
}

#[test]
fn openssl_signs_a_bundle_request_and_the_signature_attaches_issue5() {
    if !openssl_available() {
        return;
    }
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    openssl_key(dir, "outside");
    pack_unsigned(dir);

    ok(
        dir,
        &["sign", "species.ampoule", "--export-request", "request.bin"],
    );
    let request = std::fs::read(dir.join("request.bin")).expect("request");
    assert!(request.starts_with(b"ampoule-sig-v1:manifest\n{"));
    // The rest is the manifest exactly as stored, as GNU tar extracts it (when installed).
    match Command::new("tar")
        .args(["-xOf", "species.ampoule", "manifest.json"])
        .current_dir(dir)
        .output()
    {
        Ok(out) if out.status.success() => {
            assert_eq!(
                &request[b"ampoule-sig-v1:manifest\n".len()..],
                &out.stdout[..]
            );
        }
        _ => eprintln!("skipping the comparison with tar's manifest.json: tar is not installed"),
    }
    // A second export never overwrites the first.
    let again = ampoule(
        dir,
        &["sign", "species.ampoule", "--export-request", "request.bin"],
    );
    assert_eq!(again.code, 2);

    openssl_sign(dir, "outside.secret.pem", "request.bin", "sig.bin");
    openssl_verifies(dir, "outside.public.pem", "request.bin", "sig.bin");

    // A signature that does not verify is refused and the bundle stays byte for byte the same.
    let before = std::fs::read(dir.join("species.ampoule")).expect("bundle");
    let mut bad = std::fs::read(dir.join("sig.bin")).expect("sig");
    bad[10] ^= 0x01;
    std::fs::write(dir.join("bad.bin"), &bad).expect("write");
    let doc = ok(dir, &["inspect", "species.ampoule"]);
    assert_eq!(doc["signatures"], serde_json::json!([]), "unsigned so far");
    let run = ampoule(
        dir,
        &[
            "sign",
            "species.ampoule",
            "--attach",
            "bad.bin",
            "--pubkey",
            "outside.public.pem",
        ],
    );
    let id = outside_key_id(dir);
    assert_eq!(run.code, 1, "{}", run.stderr);
    assert_eq!(
        run.stderr,
        format!(
            "ampoule: error: signature does not verify under key {id} over this bundle's manifest; \
             species.ampoule was left unchanged (sign exactly the bytes 'ampoule sign \
             --export-request' wrote for this bundle, with the secret key of outside.public.pem)\n"
        )
    );
    assert_eq!(
        std::fs::read(dir.join("species.ampoule")).expect("bundle"),
        before
    );
    // Hex instead of raw bytes is refused before any check.
    std::fs::write(dir.join("hex.txt"), hex::encode(&bad)).expect("write");
    let run = ampoule(
        dir,
        &[
            "sign",
            "species.ampoule",
            "--attach",
            "hex.txt",
            "--pubkey",
            "outside.public.pem",
        ],
    );
    assert_eq!(run.code, 2);
    assert_eq!(
        run.stderr,
        "ampoule: error: hex.txt is over 64 bytes; that is not a raw Ed25519 signature\n"
    );

    let doc = ok(
        dir,
        &[
            "sign",
            "species.ampoule",
            "--attach",
            "sig.bin",
            "--pubkey",
            "outside.public.pem",
        ],
    );
    assert_eq!(doc["key_id"], id);
    let doc = ok(
        dir,
        &["verify", "species.ampoule", "--trust", "outside.public.pem"],
    );
    assert_eq!(doc["signers"], serde_json::json!([id]));
}

/// The key id of outside.public.pem, computed by openssl and sha256 the way FORMAT.md shows:
/// the first 16 bytes of SHA-256 over the DER SubjectPublicKeyInfo.
fn outside_key_id(dir: &Path) -> String {
    let out = Command::new("openssl")
        .args([
            "pkey",
            "-pubin",
            "-in",
            "outside.public.pem",
            "-outform",
            "DER",
        ])
        .current_dir(dir)
        .output()
        .expect("openssl");
    assert!(out.status.success());
    use sha2::Digest as _;
    hex::encode(&sha2::Sha256::digest(&out.stdout)[..16])
}

#[test]
fn openssl_signs_a_trust_set_and_its_thresholds_hold_issue5() {
    if !openssl_available() {
        return;
    }
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    openssl_key(dir, "hsm1");
    openssl_key(dir, "hsm2");
    ok(
        dir,
        &[
            "trust",
            "init",
            "--key",
            "hsm1.public.pem",
            "--key",
            "hsm2.public.pem",
            "--threshold",
            "bundle=2,trust_set=2",
            "--comment",
            "signing devices in the field office",
            "-o",
            "trust.json",
        ],
    );
    ok(
        dir,
        &[
            "trust",
            "sign",
            "trust.json",
            "--export-request",
            "trust-request.bin",
        ],
    );
    let request = std::fs::read(dir.join("trust-request.bin")).expect("request");
    assert!(request.starts_with(b"ampoule-sig-v1:trust-set\n{"));
    for k in ["hsm1", "hsm2"] {
        let sig = format!("{k}.trust.sig");
        openssl_sign(dir, &format!("{k}.secret.pem"), "trust-request.bin", &sig);
        openssl_verifies(dir, &format!("{k}.public.pem"), "trust-request.bin", &sig);
    }
    // hsm2's signature attached under hsm1's key is refused; the file stays as it was.
    let before = std::fs::read(dir.join("trust.json")).expect("trust set");
    let run = ampoule(
        dir,
        &[
            "trust",
            "sign",
            "trust.json",
            "--attach",
            "hsm2.trust.sig",
            "--pubkey",
            "hsm1.public.pem",
        ],
    );
    assert_eq!(run.code, 1, "{}", run.stderr);
    assert!(
        run.stderr
            .starts_with("ampoule: error: signature does not verify under key ")
            && run.stderr.ends_with(
                " over this trust set version 1; trust.json was left unchanged (sign exactly the \
                 bytes 'ampoule trust sign --export-request' wrote for this trust set, with the \
                 secret key of hsm1.public.pem)\n"
            ),
        "{}",
        run.stderr
    );
    assert_eq!(std::fs::read(dir.join("trust.json")).expect("read"), before);

    for k in ["hsm1", "hsm2"] {
        ok(
            dir,
            &[
                "trust",
                "sign",
                "trust.json",
                "--attach",
                &format!("{k}.trust.sig"),
                "--pubkey",
                &format!("{k}.public.pem"),
            ],
        );
    }
    let doc = ok(dir, &["trust", "show", "trust.json"]);
    assert_eq!(doc["as_initial"]["accepted"], true, "{doc}");
    assert_eq!(doc["own_signatures"]["valid"], 2);

    // A bundle signed outside by one device of two is refused; by both, accepted.
    pack_unsigned(dir);
    ok(
        dir,
        &["sign", "species.ampoule", "--export-request", "request.bin"],
    );
    for (i, k) in ["hsm1", "hsm2"].into_iter().enumerate() {
        let sig = format!("{k}.bundle.sig");
        openssl_sign(dir, &format!("{k}.secret.pem"), "request.bin", &sig);
        ok(
            dir,
            &[
                "sign",
                "species.ampoule",
                "--attach",
                &sig,
                "--pubkey",
                &format!("{k}.public.pem"),
            ],
        );
        let run = ampoule(
            dir,
            &["verify", "species.ampoule", "--trust-set", "trust.json"],
        );
        if i == 0 {
            assert_eq!(run.code, 1);
            assert!(
                run.stderr
                    .starts_with("ampoule: error: bundle has 1 valid signature(s) by trusted keys but needs 2 (valid: "),
                "{}",
                run.stderr
            );
        } else {
            assert_eq!(run.code, 0, "{}", run.stderr);
        }
    }
}
