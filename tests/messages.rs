//! Messages that say what was wrong and what to do next (issue 12 item 3), and leave nothing
//! behind when they refuse: each case runs the real binary in a fresh directory and asserts
//! the exit code, the exact message and the files afterwards.

mod common;

use common::*;

fn assert_failed(run: &Run, code: i32, error: &str) {
    assert_eq!(
        (run.code, run.stderr.as_str(), run.stdout.as_str()),
        (code, format!("ampoule: error: {error}\n").as_str(), ""),
    );
}

#[test]
fn issue12_a_public_key_given_as_the_secret_key_is_named_as_one() {
    // Before, a public key (mode 0644, as keygen writes it) passed as --key was reported as a
    // secret key readable by others, to chmod and treat as exposed.
    let env = Env::new();
    env.pack("1.0.0", "b.ampoule");
    let id = env.key_id();
    let error = format!(
        "release.public.pem holds a public key (key id {id}), not a secret key; give the secret \
         key file of the pair (the one 'ampoule keygen --secret' wrote)"
    );
    for args in [
        &[
            "publish",
            "b.ampoule",
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            PUBLIC,
        ][..],
        &["sign", "b.ampoule", "--key", PUBLIC][..],
    ] {
        assert_failed(&env.run(args), 2, &error);
    }
    assert!(!env.path("tree").exists());
}

#[test]
fn issue12_store_commands_on_a_path_that_is_not_a_store_say_so_and_make_nothing() {
    let env = Env::new();
    for command in ["status", "rollback", "gc"] {
        let run = env.run([
            "store",
            command,
            "--store",
            "camera",
            "--trust",
            PUBLIC,
            "--app-version",
            APP_VERSION,
        ]);
        assert_failed(
            &run,
            2,
            "camera is not a store (it has no state.json); give the directory an app keeps its \
             models in, or make one with 'ampoule update --store camera'",
        );
        assert!(!env.path("camera").exists(), "store {command} made a store");
    }
}

#[test]
fn issue12_a_refused_first_publish_leaves_no_tree_behind() {
    let env = Env::new();
    env.write("notes.txt", b"badger seen at camera 4\n");
    let unsigned = env.run([
        "pack",
        "--model",
        MODEL,
        "--labels",
        LABELS_FILE,
        "--name",
        NAME,
        "--version",
        "1.0.0",
        "--requires-app",
        REQUIRES_APP,
        "-o",
        "unsigned.ampoule",
    ]);
    assert_eq!(unsigned.code, 0, "{unsigned:?}");
    for (bundle, error) in [
        (
            "notes.txt",
            format!(
                "bundle notes.txt refused; nothing was published: {}",
                not_a_bundle(
                    "notes.txt",
                    "bundle header of entry 'manifest.json' is truncated: the file ended early"
                )
            ),
        ),
        (
            "unsigned.ampoule",
            "bundle unsigned.ampoule refused; nothing was published: bundle is not signed; it \
             needs a signature by a trusted key"
                .to_string(),
        ),
    ] {
        let run = env.run([
            "publish",
            bundle,
            "--tree",
            "release",
            "--channel",
            "stable",
            "--key",
            SECRET,
        ]);
        assert_failed(&run, 1, &error);
        assert!(!env.path("release").exists(), "{bundle} left a tree");
    }
    let run = env.run(["trust", "init", "--key", PUBLIC, "-o", "trust.json"]);
    assert_eq!(run.code, 0, "{run:?}");
    let run = env.run([
        "publish",
        "--trust-set",
        "trust.json",
        "--tree",
        "release",
        "--key",
        SECRET,
    ]);
    assert_failed(
        &run,
        1,
        "trust set trust.json refused; nothing was published: trust set version 1 is not \
         signed; it needs a signature by a trusted key",
    );
    assert!(!env.path("release").exists());
}

#[test]
fn issue12_writing_into_a_missing_directory_names_the_directory() {
    // Before, the message named a temporary file in the missing directory.
    let env = Env::new();
    let run = env.run([
        "pack",
        "--model",
        MODEL,
        "--labels",
        LABELS_FILE,
        "--name",
        NAME,
        "--version",
        "1.0.0",
        "--requires-app",
        REQUIRES_APP,
        "-o",
        "out/species.ampoule",
    ]);
    assert_failed(
        &run,
        2,
        "cannot write out/species.ampoule: directory out does not exist; create it first or \
         choose another path",
    );
    let run = env.run(["keygen", "--secret", "keys/a.pem", "--public", "keys/b.pem"]);
    assert_failed(
        &run,
        2,
        "cannot write keys/a.pem: directory keys does not exist; create it first or choose \
         another path",
    );
}

#[test]
fn issue12_counts_of_one_are_singular() {
    // Before: "1 hashes", "1 signature(s)", "1 entries".
    let env = Env::new();
    let pack = |version: &str, out: &str, key: &[&str]| {
        let mut args = vec![
            "pack",
            "--model",
            MODEL,
            "--labels",
            LABELS_FILE,
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
        ];
        args.extend_from_slice(key);
        let run = env.run(&args);
        assert_eq!(run.code, 0, "{run:?}");
        bundle_check::assert_readers_accept(
            env!("CARGO_BIN_EXE_ampoule"),
            &env.path(out),
            None,
            "model.onnx",
        );
    };
    pack("1.0.0", "a.ampoule", &[]);
    let run = env.run(["sign", "a.ampoule", "--key", SECRET]);
    assert_eq!(
        run.stdout,
        format!(
            "signed {NAME} 1.0.0 in a.ampoule with key {} ({SECRET}); it now carries 1 signature\n",
            env.key_id()
        )
    );
    pack("1.1.0", "b.ampoule", &["--key", SECRET]);
    for bundle in ["a.ampoule", "b.ampoule"] {
        let run = env.run([
            "publish",
            bundle,
            "--tree",
            "release",
            "--channel",
            "stable",
            "--key",
            SECRET,
        ]);
        assert_eq!(run.code, 0, "{run:?}");
    }
    // Two entries: the first one's inclusion proof is one hash, its sibling's leaf.
    let run = env.run(["ledger", "prove", "a.ampoule", "--tree", "release"]);
    assert_eq!(run.code, 0, "{run:?}");
    assert!(
        run.stdout
            .contains("\ninclusion proof (1 hash, leaf level first):\n"),
        "{run:?}"
    );
    let run = env.run(["ledger", "check", "--tree", "release", "--trust", PUBLIC]);
    assert_eq!(run.code, 0, "{run:?}");
    assert!(
        run.stdout
            .starts_with("ledger of release: 2 entries, root "),
        "{run:?}"
    );
    assert!(
        run.stdout.contains(
            "\nchecked 2 tree heads (signatures, roots, consistency steps) and 2 bundles\n"
        ),
        "{run:?}"
    );
}

#[test]
fn issue12_key_id_names_each_key_file_and_a_trust_sets_keys() {
    let env = Env::new();
    let pass = [("TRAILCAM_PASS", "fox and badger at dusk")];
    let run = env.run_env(
        [
            "keygen",
            "--secret",
            "ci.secret.pem",
            "--public",
            "ci.public.pem",
            "--encrypt",
            "--passphrase-env",
            "TRAILCAM_PASS",
        ],
        &pass,
    );
    assert_eq!(run.code, 0, "{run:?}");
    let ci: serde_json::Value = {
        let run = env.run(["--json", "key-id", "ci.public.pem"]);
        serde_json::from_str(&run.stdout).expect("JSON")
    };
    let ci = ci["files"][0]["key_id"].as_str().expect("id").to_string();
    let run = env.run([
        "trust",
        "init",
        "--key",
        PUBLIC,
        "--comment",
        "release laptop",
        "-o",
        "trust-1.json",
    ]);
    assert_eq!(run.code, 0, "{run:?}");
    let run = env.run([
        "trust",
        "add",
        "trust-1.json",
        "--key",
        "ci.public.pem",
        "--roles",
        "bundle",
        "-o",
        "trust.json",
    ]);
    assert_eq!(run.code, 0, "{run:?}");
    let id = env.key_id();
    let run = env.run_env(
        [
            "key-id",
            PUBLIC,
            SECRET,
            "ci.secret.pem",
            "trust.json",
            "--passphrase-env",
            "TRAILCAM_PASS",
        ],
        &pass,
    );
    assert_eq!(
        (run.code, run.stdout.as_str(), run.stderr.as_str()),
        (
            0,
            format!(
                "{PUBLIC}: public key, key id {id}\n\
                 {SECRET}: secret key, key id {id}\n\
                 ci.secret.pem: encrypted secret key, key id {ci}\n\
                 trust.json: trust set version 2 (signatures not checked; see 'ampoule trust show')\n\
                 \x20 key id {id}  bundle,feed,tree_head,trust_set  release laptop\n\
                 \x20 key id {ci}  bundle\n"
            )
            .as_str(),
            ""
        )
    );
    let run = env.run(["--json", "key-id", SECRET, "trust.json"]);
    let doc: serde_json::Value = serde_json::from_str(&run.stdout).expect("JSON");
    assert_eq!(
        doc,
        serde_json::json!({"ok": true, "files": [
            {"file": SECRET, "kind": "secret_key", "key_id": id.to_string()},
            {"file": "trust.json", "kind": "trust_set", "version": 2, "keys": [
                {"key_id": id.to_string(), "roles": ["bundle", "feed", "tree_head", "trust_set"],
                 "comment": "release laptop"},
                {"key_id": ci, "roles": ["bundle"], "comment": ""},
            ]},
        ]})
    );
    // A wrong passphrase and a file that holds no key are the user's to fix: exit 2.
    let run = env.run_env(
        [
            "key-id",
            "ci.secret.pem",
            "--passphrase-env",
            "TRAILCAM_PASS",
        ],
        &[("TRAILCAM_PASS", "wrong")],
    );
    assert_failed(
        &run,
        2,
        "wrong passphrase for ci.secret.pem or the file is damaged",
    );
    assert_failed(
        &env.run(["key-id", LABELS_FILE]),
        2,
        "labels.txt is not a PEM key file; give a public or secret key file",
    );
}

#[test]
fn issue12_messages_name_key_files_beside_their_ids() {
    let env = Env::new();
    let id = env.key_id();
    let run = env.run([
        "pack",
        "--model",
        MODEL,
        "--labels",
        LABELS_FILE,
        "--name",
        NAME,
        "--version",
        "1.0.0",
        "--requires-app",
        REQUIRES_APP,
        "--key",
        SECRET,
        "-o",
        "b.ampoule",
    ]);
    assert!(
        run.stdout
            .ends_with(&format!("signed by key {id} ({SECRET})\n")),
        "{run:?}"
    );
    let run = env.run([
        "publish",
        "b.ampoule",
        "--tree",
        "release",
        "--channel",
        "stable",
        "--key",
        SECRET,
    ]);
    assert!(
        run.stdout
            .contains(&format!(", signed by key {id} ({SECRET})\n")),
        "{run:?}"
    );
    // Trusting another key: the refusal names the untrusted signer's id and the file trusted.
    let run = env.run([
        "keygen",
        "--secret",
        "o.secret.pem",
        "--public",
        "o.public.pem",
    ]);
    assert_eq!(run.code, 0, "{run:?}");
    let other: serde_json::Value =
        serde_json::from_str(&env.run(["--json", "key-id", "o.public.pem"]).stdout).expect("JSON");
    let other = other["files"][0]["key_id"]
        .as_str()
        .expect("id")
        .to_string();
    assert_failed(
        &env.run(["verify", "b.ampoule", "--trust", "o.public.pem"]),
        1,
        &format!(
            "bundle has no valid signature by a trusted key (by keys not trusted here: {id}); \
             trusted here: {other} (o.public.pem)"
        ),
    );
}
