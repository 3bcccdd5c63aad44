//! Trust sets from the command line (issue 5): bundle thresholds, rotation, revocation,
//! rollback of trust, refusals with their exact messages, and no secret in any output.

#[path = "bundle_check/mod.rs"]
mod bundle_check;

use std::fs::File;
use std::path::Path;
use std::process::Command;

use ampoule::release::keyfile::{self, PassphraseSource};
use ampoule_verify::bundle::read_layout;
use ampoule_verify::signature::{SignatureEntry, Signatures};
use ampoule_verify::{KeyId, Manifest, Timestamp, TrustSet, Verifier};
use semver::Version;

struct Run {
    code: i32,
    stdout: String,
    stderr: String,
}

fn ampoule_env(dir: &Path, args: &[&str], env: &[(&str, &str)]) -> Run {
    let out = Command::new(env!("CARGO_BIN_EXE_ampoule"))
        .args(args)
        .current_dir(dir)
        .envs(env.iter().copied())
        .output()
        .expect("run ampoule");
    Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

fn ampoule(dir: &Path, args: &[&str]) -> Run {
    ampoule_env(dir, args, &[])
}

fn ok(dir: &Path, args: &[&str]) -> serde_json::Value {
    let mut all = vec!["--json"];
    all.extend_from_slice(args);
    let run = ampoule(dir, &all);
    assert_eq!(run.code, 0, "{args:?}: {}", run.stderr);
    serde_json::from_str(&run.stdout).expect("--json prints JSON")
}

/// A `trust show` that prints "refused": since issue 12 it exits 1, and its JSON report
/// carries the error fields every JSON error has, `kind` the library's kind of the refusal.
fn show_refused(dir: &Path, args: &[&str], kind: &str) -> serde_json::Value {
    let mut all = vec!["--json"];
    all.extend_from_slice(args);
    let run = ampoule(dir, &all);
    assert_eq!(run.code, 1, "{args:?}: {}", run.stderr);
    let doc: serde_json::Value = serde_json::from_str(&run.stdout).expect("--json prints JSON");
    assert_eq!(
        (&doc["ok"], &doc["exit_code"], &doc["kind"]),
        (&false.into(), &1.into(), &kind.into()),
        "{doc}"
    );
    assert_eq!(
        run.stderr,
        format!(
            "ampoule: error: {}\n",
            doc["error"].as_str().expect("error")
        )
    );
    doc
}

/// Makes NAME.secret.pem and NAME.public.pem and returns the key id.
fn keygen(dir: &Path, name: &str) -> String {
    let doc = ok(
        dir,
        &[
            "keygen",
            "--secret",
            &format!("{name}.secret.pem"),
            "--public",
            &format!("{name}.public.pem"),
        ],
    );
    doc["key_id"].as_str().expect("key id").to_string()
}

/// A small invented model and label list, packed as trailcam-species 1.1.0.
fn pack(dir: &Path, key: Option<&str>, out: &str) {
    let model: Vec<u8> = (0..20_000u32).map(|i| (i * 7 % 251) as u8).collect();
    std::fs::write(dir.join("species.bin"), model).expect("model");
    std::fs::write(
        dir.join("labels.txt"),
        "fox\nroe deer\nwild boar\nbadger\nhare\nempty frame\n",
    )
    .expect("labels");
    let mut args = vec![
        "pack",
        "--model",
        "species.bin",
        "--labels",
        "labels.txt",
        "--name",
        "trailcam-species",
        "--version",
        "1.1.0",
        "--created",
        "2026-12-01T06:00:00Z",
        "-o",
        out,
    ];
    let secret = key.map(|k| format!("{k}.secret.pem"));
    if let Some(s) = &secret {
        args.extend(["--key", s.as_str()]);
    }
    ok(dir, &args);
    // Signed by trust-set keys here, so the device's layout reader and GNU tar.
    bundle_check::assert_readers_accept(
        env!("CARGO_BIN_EXE_ampoule"),
        &dir.join(out),
        None,
        "model.bin",
    );
}

/// Three keys a, b, c in a trust set needing 2 of them for bundles and trust sets, signed
/// by a and b. Returns the key ids.
fn team(dir: &Path) -> (String, String, String) {
    let (a, b, c) = (keygen(dir, "a"), keygen(dir, "b"), keygen(dir, "c"));
    ok(
        dir,
        &[
            "trust",
            "init",
            "--key",
            "a.public.pem",
            "--key",
            "b.public.pem",
            "--key",
            "c.public.pem",
            "--threshold",
            "bundle=2,trust_set=2",
            "--expires-in",
            "365d",
            "-o",
            "trust-1.json",
        ],
    );
    for k in ["a", "b"] {
        ok(
            dir,
            &[
                "trust",
                "sign",
                "trust-1.json",
                "--key",
                &format!("{k}.secret.pem"),
            ],
        );
    }
    (a, b, c)
}

fn sorted(mut ids: Vec<&str>) -> Vec<&str> {
    ids.sort();
    ids
}

/// Replaces a bundle's signatures document with `entries`, exactly as given (duplicates too).
fn set_signatures(path: &Path, entries: Vec<SignatureEntry>) {
    let mut file = File::open(path).expect("open bundle");
    let len = file.metadata().expect("metadata").len();
    let layout = read_layout(&mut file, len).expect("layout");
    let manifest = Manifest::from_json(&layout.manifest).expect("manifest");
    let sigs = Signatures {
        signatures: entries,
    };
    ampoule::release::pack::rewrite_signatures(path, &mut file, &layout, &manifest, &sigs, &|_| {
        Ok(())
    })
    .expect("rewrite");
}

fn signatures_of(path: &Path) -> Vec<SignatureEntry> {
    let mut file = File::open(path).expect("open bundle");
    let len = file.metadata().expect("metadata").len();
    let layout = read_layout(&mut file, len).expect("layout");
    Signatures::from_json(&layout.signatures)
        .expect("signatures")
        .signatures
}

#[test]
fn bundle_below_threshold_with_garbage_signatures_is_refused_issue5() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let (a, b, c) = team(dir);
    let x = keygen(dir, "x");
    pack(dir, Some("a"), "species.ampoule");
    let bundle = dir.join("species.ampoule");

    // One valid signature by a (twice), garbage under b's id, and one by a key nobody trusts.
    let good = signatures_of(&bundle).remove(0);
    let garbage = |id: &str, byte: u8| SignatureEntry {
        key_id: id.parse::<KeyId>().expect("key id"),
        signature: [byte; 64],
    };
    set_signatures(
        &bundle,
        vec![good.clone(), good, garbage(&b, 0x5a), garbage(&x, 0xa5)],
    );
    let expected = format!(
        "bundle has 1 valid signature(s) by trusted keys but needs 2 (valid: {a}; not matching \
         this document: {b}; by keys not trusted here: {x})"
    );
    let run = ampoule(
        dir,
        &["verify", "species.ampoule", "--trust-set", "trust-1.json"],
    );
    assert_eq!(run.code, 1, "{}", run.stderr);
    assert_eq!(run.stderr, format!("ampoule: error: {expected}\n"));

    // The library says the same, through Verifier::from_trust_set.
    let set = TrustSet::verify_initial(
        &std::fs::read(dir.join("trust-1.json")).expect("read"),
        Timestamp::now(),
    )
    .expect("trust set");
    let verifier = Verifier::from_trust_set(&set, Version::new(2, 3, 0)).expect("verifier");
    assert_eq!(verifier.threshold(), 2);
    let err = verifier.verify_path(&bundle).expect_err("below threshold");
    assert_eq!(err.to_string(), expected);

    // With --trust (any one key) the same bundle passes: the threshold is the difference.
    let run = ampoule(
        dir,
        &["verify", "species.ampoule", "--trust", "a.public.pem"],
    );
    assert_eq!(run.code, 0, "{}", run.stderr);

    // A second trusted signer meets the threshold; the garbage is shown, never counted.
    ok(dir, &["sign", "species.ampoule", "--key", "c.secret.pem"]);
    let doc = ok(
        dir,
        &["verify", "species.ampoule", "--trust-set", "trust-1.json"],
    );
    assert_eq!(doc["signers"], serde_json::json!(sorted(vec![&a, &c])));
    assert_eq!(doc["threshold"], 2);
    assert_eq!(doc["invalid_signers"], serde_json::json!([b]));
    assert_eq!(doc["untrusted_signers"], serde_json::json!([x]));
    let doc = ok(
        dir,
        &["inspect", "species.ampoule", "--trust-set", "trust-1.json"],
    );
    assert_eq!(doc["threshold"], 2);
    assert_eq!(doc["threshold_met"], true);
}

#[test]
fn rotation_revocation_and_rollback_from_the_command_line_issue5() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let (a, _b, c) = team(dir);
    let x = keygen(dir, "x");

    // c leaked: version 2 drops it, signed by a and b.
    let doc = ok(
        dir,
        &[
            "trust",
            "remove",
            "trust-1.json",
            "--key-id",
            &c,
            "-o",
            "trust-2.json",
        ],
    );
    assert_eq!(doc["version"], 2);
    let doc = show_refused(
        dir,
        &["trust", "show", "trust-2.json", "--trusted", "trust-1.json"],
        "signature",
    );
    assert_eq!(doc["as_successor"]["accepted"], false);
    assert_eq!(
        doc["as_successor"]["error"],
        "trust set version 2, counting the keys of trusted version 1, is not signed; it needs a \
         signature by a trusted key"
    );
    for k in ["a", "b"] {
        ok(
            dir,
            &[
                "trust",
                "sign",
                "trust-2.json",
                "--key",
                &format!("{k}.secret.pem"),
            ],
        );
    }
    let doc = ok(
        dir,
        &["trust", "show", "trust-2.json", "--trusted", "trust-1.json"],
    );
    assert_eq!(doc["as_successor"]["accepted"], true, "{doc}");
    assert_eq!(doc["as_initial"]["accepted"], true);

    // Whoever holds c adds their own key x and signs with c and x: not enough under version 2.
    ok(
        dir,
        &[
            "trust",
            "add",
            "trust-2.json",
            "--key",
            "x.public.pem",
            "--key",
            "c.public.pem",
            "-o",
            "trust-3.json",
        ],
    );
    for k in ["c", "x"] {
        ok(
            dir,
            &[
                "trust",
                "sign",
                "trust-3.json",
                "--key",
                &format!("{k}.secret.pem"),
            ],
        );
    }
    let doc = show_refused(
        dir,
        &["trust", "show", "trust-3.json", "--trusted", "trust-2.json"],
        "signature",
    );
    let cx = sorted(vec![&c, &x]);
    assert_eq!(
        doc["as_successor"]["error"],
        format!(
            "trust set version 3, counting the keys of trusted version 2, has 0 valid signature(s) \
             by trusted keys but needs 2 (by keys not trusted here: {}, {})",
            cx[0], cx[1]
        )
    );

    // A device on version 2 refuses version 1 again, validly signed as it is.
    let doc = show_refused(
        dir,
        &["trust", "show", "trust-1.json", "--trusted", "trust-2.json"],
        "trust_set",
    );
    assert_eq!(
        doc["as_successor"]["error"],
        "trust set version 1 is not newer than the trusted version 2; refusing to roll trust back"
    );

    // A bundle signed by a and the revoked c no longer meets the threshold of version 2.
    pack(dir, Some("a"), "species.ampoule");
    ok(dir, &["sign", "species.ampoule", "--key", "c.secret.pem"]);
    ok(
        dir,
        &["verify", "species.ampoule", "--trust-set", "trust-1.json"],
    );
    let run = ampoule(
        dir,
        &["verify", "species.ampoule", "--trust-set", "trust-2.json"],
    );
    assert_eq!(run.code, 1);
    assert_eq!(
        run.stderr,
        format!(
            "ampoule: error: bundle has 1 valid signature(s) by trusted keys but needs 2 (valid: \
             {a}; by keys not trusted here: {c})\n"
        )
    );
}

#[test]
fn trust_commands_refuse_bad_input_issue5() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let a = keygen(dir, "a");
    keygen(dir, "b");
    let refused = |args: &[&str], code: i32, message: &str| {
        let run = ampoule(dir, args);
        assert_eq!(run.code, code, "{args:?}: {}", run.stderr);
        assert_eq!(
            run.stderr,
            format!("ampoule: error: {message}\n"),
            "{args:?}"
        );
    };
    let invalid = "the new trust set is not valid (after removing keys, lower thresholds with \
                   --threshold KIND=N)";
    refused(
        &[
            "trust",
            "init",
            "--key",
            "a.public.pem",
            "--key",
            "a.public.pem",
            "-o",
            "t.json",
        ],
        1,
        &format!("{invalid}: trust set lists key {a} more than once"),
    );
    refused(
        &[
            "trust",
            "init",
            "--key",
            "a.public.pem",
            "--key",
            "b.public.pem",
            "--threshold",
            "bundle=3",
            "-o",
            "t.json",
        ],
        1,
        &format!(
            "{invalid}: trust set threshold for bundle is 3 but only 2 key(s) have the bundle role"
        ),
    );
    refused(
        &[
            "trust",
            "init",
            "--key",
            "a.public.pem",
            "--threshold",
            "manifest=1",
            "-o",
            "t.json",
        ],
        2,
        "--threshold 'manifest=1' is not KIND=N, where KIND is bundle, feed, tree_head or \
         trust_set and N a whole number such as 2",
    );
    refused(
        &[
            "trust",
            "init",
            "--key",
            "a.public.pem",
            "--expires",
            "2020-01-01T00:00:00Z",
            "-o",
            "t.json",
        ],
        2,
        &format!(
            "the new trust set would expire at 2020-01-01T00:00:00Z, which is not in the future \
             (it is now {}); give --expires-in such as 365d",
            Timestamp::now()
        ),
    );
    assert!(!dir.join("t.json").exists(), "nothing was written");

    ok(
        dir,
        &[
            "trust",
            "init",
            "--key",
            "a.public.pem",
            "--key",
            "b.public.pem",
            "--threshold",
            "trust_set=2",
            "-o",
            "t.json",
        ],
    );
    refused(
        &[
            "trust",
            "remove",
            "t.json",
            "--key-id",
            "00000000000000000000000000000000",
            "-o",
            "t2.json",
        ],
        2,
        "key 00000000000000000000000000000000 is not in trust set version 1 (t.json); nothing \
         was written",
    );
    refused(
        &[
            "trust",
            "remove",
            "t.json",
            "--key",
            "b.public.pem",
            "-o",
            "t2.json",
        ],
        1,
        &format!(
            "{invalid}: trust set threshold for trust_set is 2 but only 1 key(s) have the \
             trust_set role"
        ),
    );
    pack(dir, Some("a"), "species.ampoule");
    refused(
        &["verify", "species.ampoule", "--trust-set", "t.json"],
        1,
        "trust set t.json refused: trust set version 1 is not signed; it needs a signature by a \
         trusted key",
    );
    ok(dir, &["trust", "sign", "t.json", "--key", "a.secret.pem"]);
    refused(
        &["verify", "species.ampoule", "--trust-set", "t.json"],
        1,
        &format!(
            "trust set t.json refused: trust set version 1 has 1 valid signature(s) by trusted \
             keys but needs 2 (valid: {a})"
        ),
    );
    // An existing output is never replaced.
    refused(
        &["trust", "init", "--key", "a.public.pem", "-o", "t.json"],
        2,
        "t.json already exists; choose another output name or remove it first (nothing was \
         written)",
    );
}

/// The secret seed of a key file, as hex, and the base64 lines of its PEM body.
fn secret_forms(path: &Path, passphrase: &PassphraseSource) -> Vec<String> {
    let key = keyfile::read_secret_key(path, passphrase).expect("read secret key");
    let mut forms = vec![hex::encode(key.to_bytes())];
    let pem = std::fs::read_to_string(path).expect("read pem");
    forms.extend(
        pem.lines()
            .filter(|l| !l.starts_with("-----") && l.len() > 16)
            .map(str::to_string),
    );
    forms
}

/// The same for an encrypted key file: its PEM body lines, and its seed as openssl decrypts it
/// (openssl 3 `pkey -outform DER` writes the RFC 8410 PKCS#8 v1 form, whose last 32 bytes are
/// the seed). Without openssl only the PEM lines are checked.
fn encrypted_secret_forms(path: &Path, (var, pass): (&str, &str)) -> Vec<String> {
    let pem = std::fs::read_to_string(path).expect("read pem");
    let mut forms: Vec<String> = pem
        .lines()
        .filter(|l| !l.starts_with("-----") && l.len() > 16)
        .map(str::to_string)
        .collect();
    let der = Command::new("openssl")
        .args([
            "pkey",
            "-outform",
            "DER",
            "-passin",
            &format!("env:{var}"),
            "-in",
        ])
        .arg(path)
        .env(var, pass)
        .output();
    match der {
        Ok(out) if out.status.success() && out.stdout.len() == 48 => {
            forms.push(hex::encode(&out.stdout[16..]));
        }
        _ => {
            eprintln!("skipping the seed check of the encrypted key: openssl could not decrypt it")
        }
    }
    forms
}

#[test]
fn no_secret_in_any_output_of_the_new_commands_issue5() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let dir = tmp.path();
    let pass = [("TRAILCAM_PASS", "badger sett by the old oak")];
    keygen(dir, "a");
    let enc = ampoule_env(
        dir,
        &[
            "keygen",
            "--secret",
            "e.secret.pem",
            "--public",
            "e.public.pem",
            "--encrypt",
            "--passphrase-env",
            "TRAILCAM_PASS",
        ],
        &pass,
    );
    assert_eq!(enc.code, 0, "{}", enc.stderr);
    let mut runs: Vec<Run> = Vec::new();
    let mut run = |args: &[&str]| {
        for json in [true, false] {
            let mut all = if json { vec!["--json"] } else { vec![] };
            all.extend_from_slice(args);
            runs.push(ampoule_env(dir, &all, &pass));
        }
    };
    for out in ["t1.json", "t2.json"] {
        // Run once without and once with --json; the second writes nothing (the file exists).
        run(&[
            "trust",
            "init",
            "--key",
            "a.public.pem",
            "--key",
            "e.public.pem",
            "-o",
            out,
        ]);
    }
    run(&["trust", "sign", "t1.json", "--key", "a.secret.pem"]);
    run(&[
        "trust",
        "sign",
        "t2.json",
        "--key",
        "e.secret.pem",
        "--passphrase-env",
        "TRAILCAM_PASS",
    ]);
    run(&["trust", "sign", "t1.json", "--export-request", "req.bin"]);
    run(&["trust", "show", "t1.json", "--trusted", "t2.json"]);
    run(&[
        "trust",
        "add",
        "t1.json",
        "--key",
        "e.public.pem",
        "-o",
        "t3.json",
    ]);
    // Mistakes: the secret key given where a public key belongs.
    run(&[
        "trust",
        "add",
        "t1.json",
        "--key",
        "a.secret.pem",
        "-o",
        "t4.json",
    ]);
    run(&[
        "trust",
        "sign",
        "t1.json",
        "--attach",
        "req.bin",
        "--pubkey",
        "a.secret.pem",
    ]);
    pack(dir, None, "species.ampoule");
    run(&["sign", "species.ampoule", "--export-request", "breq.bin"]);
    run(&[
        "sign",
        "species.ampoule",
        "--key",
        "e.secret.pem",
        "--passphrase-env",
        "TRAILCAM_PASS",
    ]);
    run(&["verify", "species.ampoule", "--trust-set", "t2.json"]);
    let mut forbidden = secret_forms(&dir.join("a.secret.pem"), &PassphraseSource::None);
    forbidden.extend(encrypted_secret_forms(&dir.join("e.secret.pem"), pass[0]));
    forbidden.push(pass[0].1.to_string());
    assert!(runs.len() > 10);
    for r in &runs {
        for secret in &forbidden {
            assert!(
                !r.stdout.contains(secret.as_str()) && !r.stderr.contains(secret.as_str()),
                "a secret appeared in output: {}{}",
                r.stdout,
                r.stderr
            );
        }
    }
    // The mistaken runs were refused, and said why.
    assert!(
        runs.iter()
            .any(|r| r.stderr.contains("holds a secret key, not a public key")),
        "the secret key given as a public key was not refused"
    );
}
