//! The `ampoule` command line as a user and a script see it: documented exit codes (0 ok,
//! 1 refused, 2 usage or I/O), `--json` documents for successes and errors, commands that
//! never overwrite or half-write, and deterministic packing.

mod common;

use std::process::{Command, Stdio};

use common::*;
use serde_json::Value;

fn pack_args<'a>(out: &'a str, extra: &[&'a str]) -> Vec<&'a str> {
    let mut args = vec![
        "pack",
        "--model",
        MODEL,
        "--labels",
        LABELS_FILE,
        "--name",
        NAME,
        "--version",
        "1.2.0",
        "--requires-app",
        REQUIRES_APP,
        "-o",
        out,
    ];
    args.extend_from_slice(extra);
    args
}

/// Every valid bundle pack writes here also passes the device's reader and, where installed,
/// GNU tar (issue 12 item 7); `signed` says whether the whole device check can run.
fn readers_accept(env: &Env, out: &str, signed: bool) {
    let public = env.path(PUBLIC);
    bundle_check::assert_readers_accept(
        env!("CARGO_BIN_EXE_ampoule"),
        &env.path(out),
        signed.then_some(public.as_path()),
        "model.onnx",
    );
}

fn json(run: &Run) -> Value {
    serde_json::from_str(&run.stdout)
        .unwrap_or_else(|e| panic!("stdout is not one JSON document ({e}): {run:?}"))
}

fn assert_failed(run: &Run, code: i32, error: &str) {
    assert_eq!(
        (run.code, run.stderr.as_str(), run.stdout.as_str()),
        (code, format!("ampoule: error: {error}\n").as_str(), ""),
    );
}

#[test]
fn exit_codes_for_usage_errors_missing_files_and_refusals() {
    let env = Env::new();
    for args in [
        &[][..],
        &["frobnicate"][..],
        &["verify"][..],
        &["verify", "x.ampoule"][..],
        &["pack", "--model", MODEL][..],
        &[
            "verify",
            "x.ampoule",
            "--trust",
            PUBLIC,
            "--max-size",
            "lots",
        ][..],
    ] {
        let run = env.run(args);
        assert_eq!((run.code, run.stdout.as_str()), (2, ""), "ampoule {args:?}");
        assert!(
            run.stderr.contains("Usage: ampoule") || run.stderr.contains("try '--help'"),
            "{run:?}"
        );
    }
    for args in [
        &["--help"][..],
        &["--version"][..],
        &["verify", "--help"][..],
    ] {
        assert_eq!(env.run(args).code, 0, "ampoule {args:?}");
    }
    assert_failed(
        &env.run(["verify", "missing.ampoule", "--trust", PUBLIC]),
        2,
        "cannot open bundle missing.ampoule: No such file or directory (os error 2)",
    );
    env.pack("1.0.0", "b.ampoule");
    assert_failed(
        &env.run(["verify", "b.ampoule", "--trust", "missing.pem"]),
        2,
        "cannot open missing.pem: No such file or directory (os error 2)",
    );
    assert_failed(
        &env.run([
            "verify",
            "b.ampoule",
            "--trust",
            PUBLIC,
            "--app-version",
            "two",
        ]),
        2,
        "--app-version 'two' is not a Semantic Versioning 2.0.0 version such as 1.2.0 or \
         2.0.0-rc.1: unexpected character 't' while parsing major version number",
    );
    let mut args = pack_args("c.ampoule", &[]);
    args[2] = "missing.onnx";
    assert_failed(
        &env.run(&args),
        2,
        "cannot read model missing.onnx: No such file or directory (os error 2)",
    );
    let refused = env.run([
        "verify",
        "b.ampoule",
        "--trust",
        PUBLIC,
        "--installed",
        "1.0.0",
    ]);
    assert_eq!(refused.code, 1, "{refused:?}");
    let ok = env.run(["verify", "b.ampoule", "--trust", PUBLIC]);
    assert_eq!(ok.code, 0, "{ok:?}");
    assert_eq!(
        ok.stdout,
        format!(
            "OK trailcam-species 1.0.0: signed by {} (1 needed); payload and 2 files match their digests; 6 labels\n\
             app version not checked (no --app-version): the bundle requires >=2.0.0, <3.0.0\n",
            env.key_id()
        )
    );
}

#[test]
fn json_for_every_command() {
    let env = Env::new();
    let keygen = env.run([
        "--json",
        "keygen",
        "--secret",
        "b.secret.pem",
        "--public",
        "b.public.pem",
    ]);
    assert_eq!(keygen.code, 0, "{keygen:?}");
    let doc = json(&keygen);
    assert_eq!(doc["ok"], true);
    let second_id = doc["key_id"].as_str().expect("a key id").to_string();
    assert_eq!(second_id.len(), 32);

    let mut args = vec!["--json"];
    args.extend(pack_args(
        "j.ampoule",
        &["--created", CREATED, "--key", SECRET],
    ));
    let pack = env.run(&args);
    assert_eq!(pack.code, 0, "{pack:?}");
    readers_accept(&env, "j.ampoule", true);
    let doc = json(&pack);
    assert_eq!(
        (&doc["ok"], &doc["signed"], &doc["manifest"]["version"]),
        (
            &Value::from(true),
            &Value::from(true),
            &Value::from("1.2.0")
        )
    );
    assert_eq!(
        doc["signers"],
        serde_json::json!([env.key_id().to_string()])
    );

    let sign = env.run(["--json", "sign", "j.ampoule", "--key", "b.secret.pem"]);
    assert_eq!(sign.code, 0, "{sign:?}");
    let doc = json(&sign);
    assert_eq!(
        (&doc["ok"], &doc["changed"]),
        (&Value::from(true), &Value::from(true))
    );
    assert_eq!(doc["signatures"].as_array().map(Vec::len), Some(2));

    let verify = env.run([
        "--json",
        "verify",
        "j.ampoule",
        "--trust",
        "b.public.pem",
        "--app-version",
        APP_VERSION,
    ]);
    assert_eq!(verify.code, 0, "{verify:?}");
    let doc = json(&verify);
    assert_eq!(doc["ok"], true);
    assert_eq!(doc["signers"], serde_json::json!([second_id]));
    assert_eq!(
        doc["untrusted_signers"],
        serde_json::json!([env.key_id().to_string()])
    );
    assert_eq!(
        doc["labels"],
        serde_json::json!([
            "fox",
            "roe deer",
            "wild boar",
            "badger",
            "hare",
            "empty frame"
        ])
    );

    let inspect = env.run(["--json", "inspect", "j.ampoule", "--trust", PUBLIC]);
    assert_eq!(inspect.code, 0, "{inspect:?}");
    let doc = json(&inspect);
    assert_eq!(doc["payload_matches"], true);
    let statuses: Vec<&str> = doc["signatures"]
        .as_array()
        .expect("signatures")
        .iter()
        .map(|s| s["status"].as_str().expect("status"))
        .collect();
    assert_eq!(statuses.len(), 2);
    assert!(
        statuses.contains(&"valid") && statuses.contains(&"untrusted"),
        "{statuses:?}"
    );

    // Errors: a refusal, an I/O error and a usage error each give one JSON document on stdout.
    for (args, code, kind, error) in [
        (
            vec![
                "--json",
                "verify",
                "j.ampoule",
                "--trust",
                PUBLIC,
                "--installed",
                "9.0.0",
            ],
            1,
            Value::from("policy"),
            "bundle version 1.2.0 is not newer than the installed version 9.0.0; refusing a \
             downgrade or reinstall",
        ),
        (
            vec!["--json", "inspect", "missing.ampoule"],
            2,
            Value::from("io"),
            "cannot open bundle missing.ampoule: No such file or directory (os error 2)",
        ),
        (
            vec!["--json", "keygen", "--secret", SECRET, "--public", "x.pem"],
            2,
            Value::from("usage"),
            "release.secret.pem already exists; keygen never overwrites a key file (choose another \
             path, or move the old file away first if you are sure it is not needed)",
        ),
    ] {
        let run = env.run(&args);
        assert_eq!(run.code, code, "{run:?}");
        assert_eq!(
            json(&run),
            serde_json::json!({"ok": false, "exit_code": code, "kind": kind, "error": error}),
            "{args:?}"
        );
        assert_eq!(run.stderr, format!("ampoule: error: {error}\n"));
    }
}

#[test]
fn issue_2_usage_errors_with_json_print_a_json_document() {
    // Before the fix a command line that did not parse printed only clap's text, so a script
    // reading --json output found nothing on stdout.
    let env = Env::new();
    for (args, error) in [
        (
            &["--json", "verify"][..],
            "the following required arguments were not provided: --trust <PUB.pem> <BUNDLE>",
        ),
        (
            &["frobnicate", "--json"][..],
            "unrecognized subcommand 'frobnicate'",
        ),
        (
            &["verify", "--json", "b.ampoule", "--trust"][..],
            "a value is required for '--trust <PUB.pem>' but none was supplied",
        ),
    ] {
        let run = env.run(args);
        assert_eq!(run.code, 2, "{run:?}");
        assert_eq!(
            json(&run),
            serde_json::json!({"ok": false, "exit_code": 2, "kind": "usage", "error": error})
        );
        // clap's own text stays on stderr for people.
        assert!(
            run.stderr.starts_with("error: ") && run.stderr.contains("try '--help'"),
            "{run:?}"
        );
    }
    // Without --json (or after `--`) stdout stays empty.
    let run = env.run(["verify", "b.ampoule", "--", "--json"]);
    assert_eq!((run.code, run.stdout.as_str()), (2, ""), "{run:?}");
}

#[test]
fn issue_2_a_closed_stdout_pipe_is_not_an_error() {
    // Before the fix `ampoule --json inspect B | head -1` printed "Broken pipe" and exited 2:
    // the JSON writer's error hid the io::ErrorKind from the broken-pipe check.
    let env = Env::new();
    env.pack("1.0.0", "b.ampoule");
    for json in [true, false] {
        let mut command = Command::new(env!("CARGO_BIN_EXE_ampoule"));
        if json {
            command.arg("--json");
        }
        let mut child = command
            .args(["inspect", "b.ampoule"])
            .current_dir(env.dir.path())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .expect("spawn");
        // Closed before the child can write (it is still starting up).
        drop(child.stdout.take());
        let out = child.wait_with_output().expect("wait");
        assert_eq!(
            (
                out.status.code(),
                String::from_utf8_lossy(&out.stderr).as_ref()
            ),
            (Some(0), ""),
            "json: {json}"
        );
    }
}

#[test]
fn signing_twice_with_one_key_changes_nothing() {
    let env = Env::new();
    let run = env.run(pack_args("s.ampoule", &["--created", CREATED]));
    assert_eq!(run.code, 0, "{run:?}");
    readers_accept(&env, "s.ampoule", false);
    let run = env.run(["sign", "s.ampoule", "--key", SECRET]);
    assert_eq!(
        (run.code, run.stdout),
        (
            0,
            format!(
                "signed trailcam-species 1.2.0 in s.ampoule with key {} (release.secret.pem); it now carries 1 signature\n",
                env.key_id()
            )
        )
    );
    let once = env.read("s.ampoule");
    let listing = env.listing();
    let run = env.run(["sign", "s.ampoule", "--key", SECRET]);
    assert_eq!(
        (run.code, run.stdout),
        (
            0,
            format!(
                "s.ampoule is already signed by key {} (release.secret.pem); nothing changed\n",
                env.key_id()
            )
        )
    );
    assert_eq!(env.read("s.ampoule"), once, "bytes unchanged");
    assert_eq!(env.listing(), listing, "no temporary file left");
    // Signing at pack time gives the same bytes as signing afterwards.
    let run = env.run(pack_args(
        "p.ampoule",
        &["--created", CREATED, "--key", SECRET],
    ));
    assert_eq!(run.code, 0, "{run:?}");
    readers_accept(&env, "p.ampoule", true);
    assert_eq!(env.read("p.ampoule"), once);
}

#[test]
fn unsigned_pack_says_so_and_verify_refuses_it() {
    let env = Env::new();
    let run = env.run(pack_args("u.ampoule", &["--created", CREATED]));
    assert_eq!(run.code, 0, "{run:?}");
    readers_accept(&env, "u.ampoule", false);
    let lines: Vec<&str> = run.stdout.lines().collect();
    assert_eq!(
        lines[1],
        "UNSIGNED: no --key was given, so every device will refuse this bundle until it is \
         signed with 'ampoule sign'"
    );
    let refused = env.run(["verify", "u.ampoule", "--trust", PUBLIC]);
    assert_failed(
        &refused,
        1,
        "bundle is not signed; it needs a signature by a trusted key",
    );
    let inspect = env.run(["inspect", "u.ampoule"]);
    assert!(
        inspect
            .stdout
            .contains("signers  none: this bundle is UNSIGNED\n"),
        "{inspect:?}"
    );
    assert_eq!(env.run(["sign", "u.ampoule", "--key", SECRET]).code, 0);
    assert_eq!(env.run(["verify", "u.ampoule", "--trust", PUBLIC]).code, 0);
}

#[test]
fn pack_refuses_an_existing_output_file() {
    let env = Env::new();
    env.write("taken.ampoule", b"an older release");
    let before = env.listing();
    let run = env.run(pack_args("taken.ampoule", &["--key", SECRET]));
    assert_failed(
        &run,
        2,
        "taken.ampoule already exists; choose another output name or remove it first \
         (nothing was written)",
    );
    assert_eq!(env.read("taken.ampoule"), b"an older release");
    assert_eq!(env.listing(), before);
}

#[test]
fn pack_refuses_an_empty_label_list_and_writes_nothing() {
    let env = Env::new();
    env.write("empty.txt", b"");
    let before = env.listing();
    let mut args = pack_args("e.ampoule", &[]);
    args[4] = "empty.txt";
    assert_failed(
        &env.run(&args),
        1,
        "label list empty.txt refused: label list is empty; a model needs at least one label",
    );
    assert_eq!(env.listing(), before);
}

#[test]
fn issue10_pack_refuses_labels_with_invisible_or_bidirectional_characters_or_not_in_nfc() {
    let env = Env::new();
    let mut args = pack_args("h.ampoule", &[]);
    args[4] = "hostile.txt";
    for (line, expected) in [
        (
            "wild \u{202E}raob",
            "label on line 3 ('wild \\u{202e}raob') holds U+202E, a bidirectional control, \
             which can make text display in another order; labels may not hold invisible or \
             bidirectional format characters (Unicode 14.0.0)",
        ),
        (
            "badger\u{200B}",
            "label on line 3 ('badger\\u{200b}') holds U+200B, an invisible format character; \
             labels may not hold invisible or bidirectional format characters (Unicode 14.0.0)",
        ),
        (
            "che\u{0300}vre",
            "label on line 3 ('che\u{300}vre') is not in Unicode Normalization Form C (NFC, \
             Unicode 14.0.0); write it composed, for example with Python's \
             unicodedata.normalize('NFC', text)",
        ),
    ] {
        let text = format!("fox\nroe deer\n{line}\nbadger\n");
        env.write("hostile.txt", text.as_bytes());
        let before = env.listing();
        assert_failed(
            &env.run(&args),
            1,
            &format!("label list hostile.txt refused: {expected}"),
        );
        assert_eq!(env.listing(), before);
    }
}

#[test]
fn verify_extract_refuses_an_existing_directory_and_changes_nothing() {
    let env = Env::new();
    env.pack("1.0.0", "b.ampoule");
    std::fs::create_dir(env.path("models")).expect("mkdir");
    env.write("models/model.onnx", b"the model running now");
    let before = env.listing();
    let run = env.run([
        "verify",
        "b.ampoule",
        "--trust",
        PUBLIC,
        "--extract",
        "models",
    ]);
    assert_failed(
        &run,
        2,
        "models already exists; unpack into a new directory (nothing was written)",
    );
    assert_eq!(env.listing(), before);
    assert_eq!(env.read("models/model.onnx"), b"the model running now");
    // Into a new directory it works, and gives back exactly what was packed.
    let run = env.run(["verify", "b.ampoule", "--trust", PUBLIC, "--extract", "new"]);
    assert_eq!(run.code, 0, "{run:?}");
    assert!(run.stdout.ends_with("unpacked into new\n"), "{run:?}");
    assert_eq!(env.read("new/model.onnx"), env.read(MODEL));
    assert_eq!(env.read("new/labels.txt"), LABELS);
}

#[test]
fn keygen_refuses_to_overwrite() {
    let env = Env::new();
    let secret = env.read(SECRET);
    let public = env.read(PUBLIC);
    let run = env.run(["keygen", "--secret", SECRET, "--public", "other.pem"]);
    assert_failed(
        &run,
        2,
        "release.secret.pem already exists; keygen never overwrites a key file (choose another \
         path, or move the old file away first if you are sure it is not needed)",
    );
    let run = env.run(["keygen", "--secret", "new.secret.pem", "--public", PUBLIC]);
    assert_failed(
        &run,
        2,
        "release.public.pem already exists; keygen never overwrites a key file (choose another \
         path, or move the old file away first if you are sure it is not needed)",
    );
    assert_eq!((env.read(SECRET), env.read(PUBLIC)), (secret, public));
    assert!(!env.path("other.pem").exists() && !env.path("new.secret.pem").exists());
}

#[test]
fn packing_is_deterministic() {
    let env = Env::new();
    let pack = |out: &str, extra: &[&str], vars: &[(&str, &str)]| {
        let run = env.run_env(pack_args(out, extra), vars);
        assert_eq!(run.code, 0, "{run:?}");
        readers_accept(&env, out, extra.contains(&"--key"));
        env.read(out)
    };
    let signed = ["--key", SECRET];
    let a = pack("a.ampoule", &["--created", CREATED, "--key", SECRET], &[]);
    let b = pack("b.ampoule", &["--created", CREATED, "--key", SECRET], &[]);
    assert_eq!(a, b, "same inputs and --created");
    // SOURCE_DATE_EPOCH (reproducible-builds.org) names the same instant in Unix seconds.
    let epoch = CREATED_UNIX.to_string();
    let c = pack("c.ampoule", &signed, &[("SOURCE_DATE_EPOCH", &epoch)]);
    let d = pack("d.ampoule", &signed, &[("SOURCE_DATE_EPOCH", &epoch)]);
    assert_eq!(c, d, "same inputs and SOURCE_DATE_EPOCH");
    assert_eq!(
        c, a,
        "SOURCE_DATE_EPOCH and --created name the same instant"
    );
    let e = pack("e.ampoule", &["--created", &epoch, "--key", SECRET], &[]);
    assert_eq!(e, a, "--created in Unix seconds");
    // --created wins over SOURCE_DATE_EPOCH, and another time gives other bytes.
    let f = pack(
        "f.ampoule",
        &["--created", CREATED, "--key", SECRET],
        &[("SOURCE_DATE_EPOCH", "0")],
    );
    assert_eq!(f, a);
    let g = pack(
        "g.ampoule",
        &["--created", "2026-12-01T08:00:01Z", "--key", SECRET],
        &[],
    );
    assert_ne!(g, a);
}

#[test]
fn issue10_text_output_escapes_names_from_a_bundle() {
    // Issue 10 item 7: a model whose output tensor is named "s", RIGHT-TO-LEFT OVERRIDE, "eci"
    // (the same 7 bytes as "species", so the ONNX file stays valid). A terminal would show
    // the raw name reversed; the text output shows the override as an escape instead.
    let env = Env::new();
    let path = env.path("evil.onnx");
    ampoule::release::synth::write_onnx_classifier(&path, 8, 4, 6, 7).expect("a model");
    let bytes = std::fs::read(&path).expect("model");
    let evil = "s\u{202E}eci".as_bytes();
    assert_eq!(evil.len(), "species".len());
    let mut swapped = Vec::with_capacity(bytes.len());
    let mut i = 0;
    while i < bytes.len() {
        if bytes[i..].starts_with(b"species") {
            swapped.extend_from_slice(evil);
            i += evil.len();
        } else {
            swapped.push(bytes[i]);
            i += 1;
        }
    }
    std::fs::write(&path, &swapped).expect("write");
    ampoule::release::synth::write_onnx_classifier(&env.path("good.onnx"), 8, 4, 6, 7)
        .expect("a model");
    for (model, out) in [("evil.onnx", "evil.ampoule"), ("good.onnx", "good.ampoule")] {
        let mut args = pack_args(out, &["--key", SECRET]);
        args[2] = model;
        let run = env.run(&args);
        assert_eq!(run.code, 0, "{run:?}");
    }
    let inspect = env.run(["inspect", "evil.ampoule"]);
    assert_eq!(inspect.code, 0, "{inspect:?}");
    assert!(
        inspect
            .stdout
            .contains("output   s\\u{202e}eci: float32 [N, 6]\n"),
        "{}",
        inspect.stdout
    );
    let diff = env.run(["diff", "good.ampoule", "evil.ampoule"]);
    assert!(
        diff.stdout
            .contains("output added: s\\u{202e}eci: float32 [N, 6]\n"),
        "{}",
        diff.stdout
    );
    for run in [&inspect, &diff] {
        assert!(!run.stdout.contains('\u{202E}'), "{}", run.stdout);
    }
    // JSON carries the exact name.
    let doc: Value =
        serde_json::from_str(&env.run(["--json", "inspect", "evil.ampoule"]).stdout).expect("JSON");
    assert!(doc.to_string().contains('\u{202E}'), "{doc}");
}
