//! Issue 12 item 5, safe retries and previews, with the real binary: `withdraw` names the
//! version it pulls so a rerun changes nothing, a rerun of `publish` says it only renewed the
//! feed, and `--dry-run` runs every check, shows what it would write and writes nothing.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

mod tree_common;
use tree_common::*;

/// Every file under `root` (relative path → bytes), to show that a command wrote nothing.
fn snapshot(root: &Path) -> BTreeMap<PathBuf, Vec<u8>> {
    let mut files = BTreeMap::new();
    let mut stack = vec![root.to_path_buf()];
    while let Some(dir) = stack.pop() {
        for entry in std::fs::read_dir(&dir).expect("read_dir") {
            let path = entry.expect("entry").path();
            if path.is_dir() {
                stack.push(path);
            } else {
                let bytes = std::fs::read(&path).expect("file");
                files.insert(
                    path.strip_prefix(root).expect("inside").to_path_buf(),
                    bytes,
                );
            }
        }
    }
    files
}

fn withdraw_args<'a>(extra: &[&'a str]) -> Vec<&'a str> {
    let mut args = vec![
        "withdraw",
        "--tree",
        "tree",
        "--channel",
        "stable",
        "--key",
        "k.pem",
    ];
    args.extend_from_slice(extra);
    args
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
        "k.pem",
    ];
    args.extend_from_slice(extra);
    args
}

fn json(text: &str) -> serde_json::Value {
    serde_json::from_str(text).expect("--json prints JSON")
}

/// The word after `marker` in `text` (a timestamp or a number the test cannot know ahead).
fn word_after<'a>(text: &'a str, marker: &str) -> &'a str {
    let at = text
        .find(marker)
        .unwrap_or_else(|| panic!("{marker:?} in {text}"))
        + marker.len();
    text[at..]
        .split([' ', ',', '}', '"', '\n'])
        .next()
        .expect("a word")
}

fn sha(d: &Path, bundle: &str) -> String {
    ampoule_verify::Digest::of(&std::fs::read(d.join(bundle)).expect("bundle")).to_hex()
}

/// 1.0.0 then 1.1.0 on stable.
fn two_releases(d: &Path) -> (String, String) {
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let v2 = pack(d, "1.1.0", 1, "k.pem");
    publish(d, &v1, "stable", "100");
    publish(d, &v2, "stable", "100");
    (v1, v2)
}

#[test]
fn issue12_withdraw_without_version_names_the_current_release() {
    let dir = setup();
    let d = dir.path();
    two_releases(d);
    let before = snapshot(&d.join("tree"));
    assert_eq!(
        refused(d, &withdraw_args(&[])),
        (
            2,
            "ampoule: error: withdraw needs --version, the release to pull: the current release \
             of channel stable is trailcam-species 1.1.0 (--version 1.1.0)"
                .into()
        )
    );
    let out = run(d, &[&["--json"][..], &withdraw_args(&[])].concat());
    assert_eq!(out.status.code(), Some(2));
    let doc = json(&String::from_utf8_lossy(&out.stdout));
    assert_eq!(
        (doc["ok"].as_bool(), doc["kind"].as_str()),
        (Some(false), Some("usage"))
    );
    assert_eq!(snapshot(&d.join("tree")), before);

    ok(d, &withdraw_args(&["--version", "1.1.0"]));
    ok(d, &withdraw_args(&["--version", "1.0.0"]));
    assert_eq!(
        refused(d, &withdraw_args(&[])),
        (
            2,
            "ampoule: error: withdraw needs --version, the release to pull: channel stable offers \
             nothing now"
                .into()
        )
    );
}

#[test]
fn issue12_withdraw_of_the_current_version_pulls_it() {
    let dir = setup();
    let d = dir.path();
    let (v1, v2) = two_releases(d);
    let text = ok(d, &withdraw_args(&["--version", "1.1.0"]));
    let expires = word_after(&text, ", expires ");
    let root = word_after(&text, ", root ");
    assert_eq!(
        text,
        format!(
            "withdrew trailcam-species 1.1.0 from channel stable\n\
             channel stable now offers trailcam-species 1.0.0 ({} bytes, sha256 {}) at 100% \
             rollout\nwas: trailcam-species 1.1.0\n\
             feed tree/feeds/stable.json sequence 3, expires {expires}, signed by key {} (k.pem)\n\
             ledger: entry 2 logged, tree size 3, root {root}\n",
            std::fs::metadata(d.join(&v1)).expect("bundle").len(),
            sha(d, &v1),
            word_after(&ok(d, &["key-id", "k.pem"]), "key id "),
        )
    );
    let _ = v2;
    let feed = read_feed(d, "stable");
    assert_eq!(feed.sequence, 3);
    assert_eq!(
        feed.release.map(|r| r.version.to_string()),
        Some("1.0.0".to_string())
    );
}

#[test]
fn issue12_withdraw_rerun_changes_nothing_and_exits_0() {
    let dir = setup();
    let d = dir.path();
    two_releases(d);
    let first = json(&ok(
        d,
        &[&["--json"][..], &withdraw_args(&["--version", "1.1.0"])].concat(),
    ));
    assert_eq!(first["action"], "withdrawn");
    let time = first["issued"].as_str().expect("issued").to_string();
    let before = snapshot(&d.join("tree"));
    assert_eq!(
        ok(d, &withdraw_args(&["--version", "1.1.0"])),
        format!(
            "trailcam-species 1.1.0 was already withdrawn from channel stable (feed sequence 3, \
             {time}); nothing changed and no ledger entry was added\n\
             channel stable offers trailcam-species 1.0.0 at 100% rollout\n"
        )
    );
    let again = json(&ok(
        d,
        &[&["--json"][..], &withdraw_args(&["--version", "1.1.0"])].concat(),
    ));
    assert_eq!(
        again,
        serde_json::json!({
            "ok": true,
            "action": "already_withdrawn",
            "dry_run": false,
            "channel": "stable",
            "name": "trailcam-species",
            "version": "1.1.0",
            "withdrawn_sequence": 3,
            "withdrawn_time": time,
            "release": first["release"],
        })
    );
    // The dry run of a rerun says the same, and nothing was written by any of them.
    let dry = json(&ok(
        d,
        &[
            &["--json"][..],
            &withdraw_args(&["--version", "1.1.0", "--dry-run"]),
        ]
        .concat(),
    ));
    assert_eq!(
        (dry["action"].as_str(), dry["dry_run"].as_bool()),
        (Some("already_withdrawn"), Some(true))
    );
    assert_eq!(snapshot(&d.join("tree")), before);
}

#[test]
fn issue12_withdraw_of_any_other_version_exits_2() {
    let dir = setup();
    let d = dir.path();
    two_releases(d);
    let before = snapshot(&d.join("tree"));
    assert_eq!(
        refused(d, &withdraw_args(&["--version", "1.0.0"])),
        (
            2,
            "ampoule: error: 1.0.0 is an earlier release on channel stable, not the current one \
             (its current release is trailcam-species 1.1.0); withdraw pulls only the current \
             release"
                .into()
        )
    );
    assert_eq!(
        refused(d, &withdraw_args(&["--version", "2.0.0"])),
        (
            2,
            "ampoule: error: version 2.0.0 was never published on channel stable (its current \
             release is trailcam-species 1.1.0); give --version the release to pull"
                .into()
        )
    );
    assert_eq!(
        refused(d, &withdraw_args(&["--version", "latest"])),
        (
            2,
            "ampoule: error: --version latest is not a version (unexpected character 'l' while \
             parsing major version number); give the current release's version, like 1.1.0"
                .into()
        )
    );
    assert_eq!(snapshot(&d.join("tree")), before);
}

#[test]
fn issue12_publish_rerun_says_it_only_renewed_the_feed() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let first = json(&ok(
        d,
        &[&["--json"][..], &publish_args(&v1, &["--rollout", "10"])].concat(),
    ));
    assert_eq!(
        (first["action"].as_str(), first["sequence"].as_u64()),
        (Some("published"), Some(1))
    );
    let text = ok(d, &publish_args(&v1, &[]));
    assert_eq!(
        text.lines().next(),
        Some(
            "renewed the feed only: trailcam-species 1.0.0 is already the current release on \
             channel stable (new sequence and expiry, rollout 10% -> 100%)"
        )
    );
    assert!(
        text.contains("\nfeed tree/feeds/stable.json sequence 2, expires "),
        "{text}"
    );
    let again = json(&ok(d, &[&["--json"][..], &publish_args(&v1, &[])].concat()));
    assert_eq!(
        (
            again["action"].as_str(),
            again["sequence"].as_u64(),
            again["ledger_entry"]["feed_sequence"].as_u64()
        ),
        (Some("renewed"), Some(3), Some(3))
    );
    assert_eq!(
        ok(d, &publish_args(&v1, &[])).lines().next(),
        Some(
            "renewed the feed only: trailcam-species 1.0.0 is already the current release on \
             channel stable (new sequence and expiry, rollout 100% as before)"
        )
    );
    let v2 = pack(d, "1.1.0", 1, "k.pem");
    assert_eq!(
        ok(d, &publish_args(&v2, &[])).lines().next(),
        Some("published trailcam-species 1.1.0 on channel stable: a new release")
    );
}

#[test]
fn issue12_publish_dry_run_checks_everything_and_writes_nothing() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    // Into a tree that does not exist: it stays that way.
    let text = ok(d, &publish_args(&v1, &["--rollout", "10", "--dry-run"]));
    assert!(!d.join("tree").exists(), "a dry run made the tree");
    let expires = word_after(&text, " expires ");
    let time = word_after(&text, "\"time\":");
    let key = word_after(&ok(d, &["key-id", "k.pem"]), "key id ").to_string();
    let (size, digest) = (
        std::fs::metadata(d.join(&v1)).expect("bundle").len(),
        sha(d, &v1),
    );
    let manifest = word_after(&text, "\"manifest_digest\":\"");
    assert_eq!(
        text,
        format!(
            "would publish trailcam-species 1.0.0 on channel stable: a new release\n\
             channel stable would offer trailcam-species 1.0.0 ({size} bytes, sha256 {digest}) \
             at 10% rollout\nnow: nothing\n\
             feed tree/feeds/stable.json would get sequence 1, expires {expires}, signed by key \
             {key} (k.pem)\n\
             ledger: would append entry 0: {{\"format\":2,\"event\":\"publish\",\
             \"channel\":\"stable\",\"bundle\":\"trailcam-species\",\"version\":\"1.0.0\",\
             \"bundle_digest\":\"{digest}\",\"manifest_digest\":\"{manifest}\",\"key_ids\":\
             [\"{key}\"],\"time\":{time},\"feed_sequence\":1,\"offered\":{{\"bundle\":\
             \"trailcam-species\",\"version\":\"1.0.0\",\"bundle_digest\":\"{digest}\",\
             \"manifest_digest\":\"{manifest}\",\"rollout_percent\":10,\"deltas\":[]}}}}\n\
             dry run: nothing was written\n"
        )
    );

    // Into an existing tree: byte-identical afterwards, ledger included; then the real
    // publish writes what the dry run showed.
    publish(d, &v1, "stable", "100");
    let v2 = pack(d, "1.1.0", 1, "k.pem");
    let before = snapshot(&d.join("tree"));
    let dry = json(&ok(
        d,
        &[
            &["--json"][..],
            &publish_args(&v2, &["--rollout", "25", "--dry-run"]),
        ]
        .concat(),
    ));
    assert_eq!(snapshot(&d.join("tree")), before);
    assert_eq!(
        (
            dry["action"].as_str(),
            dry["dry_run"].as_bool(),
            dry["sequence"].as_u64()
        ),
        (Some("published"), Some(true), Some(2))
    );
    assert_eq!(dry["release"]["rollout_percent"], 25);
    assert_eq!(dry["ledger"], serde_json::Value::Null);
    assert_eq!(dry["ledger_entry_index"], 1);
    let real = json(&ok(
        d,
        &[&["--json"][..], &publish_args(&v2, &["--rollout", "25"])].concat(),
    ));
    for field in [
        "action",
        "channel",
        "sequence",
        "release",
        "previous",
        "feed",
        "signer",
        "ledger_entry_index",
    ] {
        assert_eq!(dry[field], real[field], "{field}");
    }
    let without_time = |v: &serde_json::Value| {
        let mut v = v["ledger_entry"].clone();
        v.as_object_mut().expect("an entry").remove("time");
        v
    };
    assert_eq!(without_time(&dry), without_time(&real));
    assert_eq!(real["dry_run"], false);

    // Every check runs: an older version is refused as it would be for real.
    let before = snapshot(&d.join("tree"));
    assert_eq!(
        refused(d, &publish_args(&v1, &["--dry-run"])),
        (
            1,
            "ampoule: error: trailcam-species 1.0.0 is not newer than 1.1.0, the current release \
             on channel stable; devices would not take it (use withdraw to go back to an earlier \
             release)"
                .into()
        )
    );
    assert_eq!(snapshot(&d.join("tree")), before);
}

#[test]
fn issue12_withdraw_dry_run_writes_nothing() {
    let dir = setup();
    let d = dir.path();
    two_releases(d);
    let before = snapshot(&d.join("tree"));
    let dry = json(&ok(
        d,
        &[
            &["--json"][..],
            &withdraw_args(&["--version", "1.1.0", "--dry-run"]),
        ]
        .concat(),
    ));
    assert_eq!(snapshot(&d.join("tree")), before);
    assert_eq!(
        (
            dry["action"].as_str(),
            dry["dry_run"].as_bool(),
            dry["sequence"].as_u64()
        ),
        (Some("withdrawn"), Some(true), Some(3))
    );
    assert_eq!(dry["release"]["version"], "1.0.0");
    assert_eq!(dry["previous"]["version"], "1.1.0");
    assert_eq!(dry["ledger_entry"]["event"], "withdraw");
    assert_eq!(dry["ledger_entry"]["version"], "1.1.0");
    assert_eq!(dry["ledger_entry_index"], 2);
    let text = ok(d, &withdraw_args(&["--version", "1.1.0", "--dry-run"]));
    assert_eq!(
        text.lines().next(),
        Some("would withdraw trailcam-species 1.1.0 from channel stable")
    );
    assert!(text.ends_with("\ndry run: nothing was written\n"), "{text}");
    assert_eq!(snapshot(&d.join("tree")), before);
    // Its checks are the real ones: another version is refused the same way.
    assert_eq!(
        refused(d, &withdraw_args(&["--version", "1.0.0", "--dry-run"])).0,
        2
    );
    let real = json(&ok(
        d,
        &[&["--json"][..], &withdraw_args(&["--version", "1.1.0"])].concat(),
    ));
    for field in [
        "action",
        "sequence",
        "release",
        "previous",
        "ledger_entry_index",
    ] {
        assert_eq!(dry[field], real[field], "{field}");
    }
}

#[test]
fn issue12_publish_of_a_trust_set_dry_run_checks_everything_and_writes_nothing() {
    let dir = setup();
    let d = dir.path();
    two_releases(d);
    // A first trust set: the test key with every role, signed by it.
    for args in [
        &[
            "trust",
            "init",
            "--key",
            "k.pub",
            "--expires-in",
            "365d",
            "-o",
            "trust-1.json",
        ][..],
        &["trust", "sign", "trust-1.json", "--key", "k.pem"][..],
    ] {
        ok(d, args);
    }
    let before = snapshot(&d.join("tree"));
    let args = [
        "--json",
        "publish",
        "--trust-set",
        "trust-1.json",
        "--tree",
        "tree",
        "--key",
        "k.pem",
        "--dry-run",
    ];
    let planned = json(&ok(d, &args));
    assert_eq!(
        snapshot(&d.join("tree")),
        before,
        "a dry run writes nothing"
    );
    assert_eq!(planned["dry_run"], true);
    assert_eq!(planned["trust_set_version"], 1);
    assert_eq!(planned["ledger_entry"]["event"], "trust_set");
    assert_eq!(planned["renewed"][0]["channel"], "stable");
    let sequence = planned["renewed"][0]["sequence"].clone();
    // The real publish then writes what the dry run showed.
    let done = json(&ok(d, &args[..args.len() - 1]));
    assert_eq!(done["feeds"][0]["sequence"], sequence, "{done}");
    // A set the tree refuses is refused by the dry run too, and nothing is written.
    let before = snapshot(&d.join("tree"));
    let (code, err) = refused(d, &args);
    assert_eq!(code, 1, "{err}");
    assert!(
        err.contains("trust set version 1 is not newer than the trusted version 1"),
        "{err}"
    );
    assert_eq!(snapshot(&d.join("tree")), before);
}
