//! The command line's contract with scripts (issue 12): usage and I/O errors exit 2,
//! refusals exit 1, and every `--json` error carries `ok`, `error`, `exit_code` and a `kind`
//! the README documents. Each case runs the real binary in a fresh directory and asserts the
//! exit code, the exact message and the JSON document.

mod common;

use std::collections::BTreeSet;

use ampoule::failure::KINDS;
use common::*;
use serde_json::{Value, json};

/// Runs `args` without and with `--json`, and asserts the exit code, the one stderr line,
/// an empty stdout without `--json`, and the JSON error document with it.
fn assert_error(env: &Env, args: &[&str], code: i32, kind: &str, error: &str) {
    let run = env.run(args);
    assert_eq!(
        (run.code, run.stderr.as_str(), run.stdout.as_str()),
        (code, format!("ampoule: error: {error}\n").as_str(), ""),
        "ampoule {args:?}"
    );
    let mut with_json = vec!["--json"];
    with_json.extend_from_slice(args);
    let run = env.run(&with_json);
    assert_eq!(run.code, code, "{run:?}");
    let doc: Value = serde_json::from_str(&run.stdout).expect("one JSON document");
    assert_eq!(
        doc,
        json!({"ok": false, "exit_code": code, "kind": kind, "error": error}),
        "ampoule {with_json:?}"
    );
}

fn publish_args<'a>(bundle: &'a str, extra: &[&'a str]) -> Vec<&'a str> {
    let mut args = vec![
        "publish",
        bundle,
        "--tree",
        "tree",
        "--channel",
        "stable",
        "--key",
        SECRET,
    ];
    args.extend_from_slice(extra);
    args
}

#[test]
fn issue12_invalid_names_channels_and_rollouts_are_usage_errors() {
    let env = Env::new();
    env.pack("1.0.0", "b.ampoule");
    assert_error(
        &env,
        &[
            "pack",
            "--model",
            MODEL,
            "--labels",
            LABELS_FILE,
            "--name",
            "Trailcam",
            "--version",
            "1.0.0",
            "--requires-app",
            REQUIRES_APP,
            "-o",
            "x.ampoule",
        ],
        2,
        "usage",
        "bundle name 'Trailcam' is not allowed: use 1 to 64 lowercase letters, digits, '-', '_' \
         or '.', starting with a letter or digit",
    );
    let mut args = publish_args("b.ampoule", &[]);
    args[5] = "Stable";
    assert_error(
        &env,
        &args,
        2,
        "usage",
        "channel name 'Stable' is not allowed: use 1 to 64 lowercase letters, digits, '-', '_' \
         or '.', starting with a letter or digit",
    );
    assert_error(
        &env,
        &publish_args("b.ampoule", &["--rollout", "150"]),
        2,
        "usage",
        "--rollout 150 is not a percentage from 0 to 100",
    );
    assert!(
        !env.path("tree").exists(),
        "a refused publish left a tree behind"
    );
    assert_eq!(env.run(publish_args("b.ampoule", &[])).code, 0);
    assert_error(
        &env,
        &[
            "withdraw",
            "--tree",
            "tree",
            "--channel",
            "beta",
            "--key",
            SECRET,
        ],
        2,
        "usage",
        "channel beta was never published to in tree; there is nothing to withdraw (check the \
         channel name: 'ampoule ledger list --tree tree' shows the channels)",
    );
}

#[test]
fn issue12_key_and_trust_set_files_that_do_not_parse_are_usage_errors() {
    let env = Env::new();
    env.pack("1.0.0", "b.ampoule");
    assert_error(
        &env,
        &["verify", "b.ampoule", "--trust", LABELS_FILE],
        2,
        "key_file",
        "cannot read public key labels.txt: not an Ed25519 public key in SubjectPublicKeyInfo \
         PEM (ASN.1 error: PEM error: PEM preamble contains invalid data (NUL byte)); expected \
         a \
         '-----BEGIN PUBLIC KEY-----' block as written by keygen or 'openssl pkey -pubout'",
    );
    env.write("trust.json", b"{\"comment\": \"not a trust set\"}\n");
    assert_error(
        &env,
        &["verify", "b.ampoule", "--trust-set", "trust.json"],
        2,
        "trust_set_file",
        "trust.json is not a valid trust-set file (give a file made by 'ampoule trust init', \
         'add' or 'remove'): trust-set file is not valid: unknown field `comment`, expected \
         `trust_set` or `signatures` at line 1 column 10",
    );
}

#[test]
fn issue12_a_trust_set_that_parses_but_is_not_signed_is_refused() {
    let env = Env::new();
    env.pack("1.0.0", "b.ampoule");
    let run = env.run(["trust", "init", "--key", PUBLIC, "-o", "trust.json"]);
    assert_eq!(run.code, 0, "{run:?}");
    let unsigned = "trust set version 1 is not signed; it needs a signature by a trusted key";
    assert_error(
        &env,
        &["verify", "b.ampoule", "--trust-set", "trust.json"],
        1,
        "signature",
        &format!("trust set trust.json refused: {unsigned}"),
    );
    // trust show prints its report, and "refused" in it is a refusal too.
    let run = env.run(["trust", "show", "trust.json"]);
    assert_eq!(run.code, 1, "{run:?}");
    assert!(
        run.stdout.ends_with(&format!(
            "as a device's initial trust set: refused: {unsigned}\n"
        )),
        "{run:?}"
    );
    let error = format!("trust set trust.json refused as a device's initial trust set: {unsigned}");
    assert_eq!(run.stderr, format!("ampoule: error: {error}\n"));
    let run = env.run(["--json", "trust", "show", "trust.json"]);
    assert_eq!(run.code, 1, "{run:?}");
    let doc: Value = serde_json::from_str(&run.stdout).expect("JSON");
    assert_eq!(
        (&doc["ok"], &doc["exit_code"], &doc["kind"], &doc["error"]),
        (&json!(false), &json!(1), &json!("signature"), &json!(error)),
    );
    assert_eq!(doc["as_initial"]["accepted"], false);
    // Once signed, the same command accepts it and exits 0.
    let run = env.run(["trust", "sign", "trust.json", "--key", SECRET]);
    assert_eq!(run.code, 0, "{run:?}");
    let run = env.run(["--json", "trust", "show", "trust.json"]);
    assert_eq!(run.code, 0, "{run:?}");
    let doc: Value = serde_json::from_str(&run.stdout).expect("JSON");
    assert_eq!((&doc["ok"], doc.get("kind")), (&json!(true), None));
}

#[test]
fn issue12_a_file_given_as_a_bundle_is_refused_without_showing_its_bytes() {
    let env = Env::new();
    env.pack("1.0.0", "b.ampoule");
    // Text long enough to fill a tar header, so a reader that quoted entry names would quote
    // it; a secret key file, shorter than one header; and a trust-set file.
    let marker = "badger seen at camera 4 ".repeat(40);
    env.write("notes.txt", marker.as_bytes());
    let run = env.run(["trust", "init", "--key", PUBLIC, "-o", "trust.json"]);
    assert_eq!(run.code, 0, "{run:?}");
    let checksum =
        "it has a tar header whose checksum does not match: the file is damaged or not a bundle";
    for (file, reason) in [
        ("notes.txt", checksum),
        (
            SECRET,
            "bundle header of entry 'manifest.json' is truncated: the file ended early",
        ),
        ("trust.json", checksum),
        (MODEL, checksum),
    ] {
        let error = not_a_bundle(file, reason);
        for args in [
            vec!["verify", file, "--trust", PUBLIC],
            vec!["inspect", file],
            vec!["sign", file, "--key", SECRET],
            vec!["diff", "b.ampoule", file],
        ] {
            assert_error(&env, &args, 1, "not_a_bundle", &error);
        }
        assert_error(
            &env,
            &publish_args(file, &[]),
            1,
            "not_a_bundle",
            &format!("bundle {file} refused; nothing was published: {error}"),
        );
    }
    // The key's bytes were never shown, and the file given was left as it was.
    let secret = String::from_utf8(env.read(SECRET)).expect("PEM");
    let body = secret.lines().nth(1).expect("a base64 line");
    let run = env.run(["verify", SECRET, "--trust", PUBLIC]);
    assert!(!run.stderr.contains(body), "{run:?}");
    assert_eq!(env.read("notes.txt"), marker.as_bytes());
}

#[test]
fn issue12_ledger_check_with_problems_prints_one_json_error_document() {
    let env = Env::new();
    let bundle = env.pack("1.0.0", "b.ampoule");
    assert_eq!(env.run(publish_args("b.ampoule", &[])).code, 0);
    let sha = ampoule_verify::Digest::of(&std::fs::read(&bundle).expect("bundle"));
    std::fs::remove_file(env.path(&format!("tree/bundles/{sha}.ampoule"))).expect("remove");
    let run = env.run([
        "--json", "ledger", "check", "--tree", "tree", "--trust", PUBLIC,
    ]);
    assert_eq!(
        (run.code, run.stderr.as_str()),
        (1, "ampoule: error: ledger check found 1 problem\n"),
        "{run:?}"
    );
    let doc: Value = serde_json::from_str(&run.stdout).expect("exactly one JSON document");
    assert_eq!(
        (&doc["ok"], &doc["exit_code"], &doc["kind"], &doc["error"]),
        (
            &json!(false),
            &json!(1),
            &json!("ledger_problems"),
            &json!("ledger check found 1 problem")
        ),
    );
    assert_eq!(
        doc["problems"],
        json!([format!(
            "entry 0: bundle {NAME} 1.0.0 (bundles/{sha}.ampoule) is missing from the tree"
        )])
    );
}

#[test]
fn issue12_the_readme_lists_every_error_kind_with_its_exit_code() {
    let readme = include_str!("../README.md");
    let start = readme
        .find("| kind | exit code |")
        .expect("the README's table of error kinds");
    let listed: BTreeSet<(String, u8)> = readme[start..]
        .lines()
        .skip(2)
        .take_while(|l| l.starts_with('|'))
        .map(|l| {
            let cells: Vec<&str> = l.split('|').map(str::trim).collect();
            (
                cells[1].trim_matches('`').to_string(),
                cells[2].parse().expect("an exit code"),
            )
        })
        .collect();
    let known: BTreeSet<(String, u8)> = KINDS
        .iter()
        .map(|(name, code)| (name.to_string(), *code))
        .collect();
    assert_eq!(listed, known);
}

fn pack_with_labels(env: &Env, labels: &str, version: &str, out: &str) {
    let run = env.run([
        "pack",
        "--model",
        MODEL,
        "--labels",
        labels,
        "--name",
        NAME,
        "--version",
        version,
        "--requires-app",
        REQUIRES_APP,
        "--created",
        CREATED,
        "-o",
        out,
    ]);
    assert_eq!(run.code, 0, "{run:?}");
    // Unsigned, so the device's layout reader and GNU tar (issue 12 item 7).
    bundle_check::assert_readers_accept(
        env!("CARGO_BIN_EXE_ampoule"),
        &env.path(out),
        None,
        "model.onnx",
    );
}

#[test]
fn issue12_diff_fail_on_breaking_exits_1_on_labels_reordered_or_removed() {
    let env = Env::new();
    pack_with_labels(&env, LABELS_FILE, "1.0.0", "a.ampoule");
    // Same labels in the same order, another version: nothing breaking.
    pack_with_labels(&env, LABELS_FILE, "1.0.1", "same.ampoule");
    let run = env.run([
        "--json",
        "diff",
        "a.ampoule",
        "same.ampoule",
        "--fail-on",
        "breaking",
    ]);
    assert_eq!((run.code, run.stderr.as_str()), (0, ""), "{run:?}");
    let doc: Value = serde_json::from_str(&run.stdout).expect("JSON");
    assert_eq!((&doc["ok"], &doc["breaking"]), (&json!(true), &json!([])));
    // 'fox' and 'roe deer' swapped; 'empty frame' replaced by 'pine marten'.
    env.write(
        "changed.txt",
        b"roe deer\nfox\nwild boar\nbadger\nhare\npine marten\n",
    );
    pack_with_labels(&env, "changed.txt", "1.1.0", "b.ampoule");
    let breaking = [
        "label 'fox' moved from index 0 to 1",
        "label 'roe deer' moved from index 1 to 0",
        "label 'empty frame' removed",
    ];
    // Without --fail-on the same changes are reported and the exit code stays 0.
    let run = env.run(["--json", "diff", "a.ampoule", "b.ampoule"]);
    assert_eq!(run.code, 0, "{run:?}");
    let doc: Value = serde_json::from_str(&run.stdout).expect("JSON");
    assert_eq!(doc["breaking"], json!(breaking));
    let error = format!("{NAME} 1.0.0 -> 1.1.0: 3 breaking changes (--fail-on breaking)");
    let run = env.run(["diff", "a.ampoule", "b.ampoule", "--fail-on", "breaking"]);
    assert_eq!(
        (run.code, run.stderr.as_str()),
        (1, format!("ampoule: error: {error}\n").as_str()),
        "{run:?}"
    );
    assert!(
        run.stdout
            .contains("WARNING: 2 labels changed output index"),
        "{run:?}"
    );
    let run = env.run([
        "--json",
        "diff",
        "a.ampoule",
        "b.ampoule",
        "--fail-on",
        "breaking",
    ]);
    assert_eq!(run.code, 1, "{run:?}");
    let doc: Value = serde_json::from_str(&run.stdout).expect("JSON");
    assert_eq!(
        (&doc["ok"], &doc["exit_code"], &doc["kind"], &doc["error"]),
        (
            &json!(false),
            &json!(1),
            &json!("breaking_change"),
            &json!(error)
        ),
    );
    assert_eq!(doc["breaking"], json!(breaking));
}
