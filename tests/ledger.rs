//! Issue 4, the audit ledger end to end: publish and withdraw append entries, the feed carries
//! the ledger's proofs, `ampoule ledger list/check/prove` read it (from a directory and over
//! HTTP), check finds each kind of tampering, and a device refuses what was signed but never
//! published, a smaller or inconsistent tree head, and still follows after missed publishes.
//! The Merkle hashing itself is checked against the RFC 6962/9162 vectors in
//! crates/verify/tests/merkle.rs; here every proof is verified by that same reader code, and the
//! tampering is done by hand on the files.

use std::path::Path;
use std::process::{Child, Command, Stdio};

use ampoule::release::ledger_storage::Ledger;
use ampoule_verify::feed::{Feed, SignedFeed};
use ampoule_verify::fetch::{Update, Updater};
use ampoule_verify::ledger::{
    DeltaRef, Entry, Event, LedgerVerifier, Record, TrustSetEntry, step_path,
};
use ampoule_verify::merkle::{SignedTreeHead, TreeHead};
use ampoule_verify::{Digest, ErrorKind, FeedVerifier, KeyId, Timestamp, Verifier};
use ed25519_dalek::{Signer, SigningKey};
use semver::Version;

/// The test binary spawns child processes (servers, the CLI) from other tests while this one
/// runs; a fork that has not yet exec'd briefly shares the store's lock file descriptor, so an
/// updater here waits a little for the lock instead of failing at once.
const LOCK_WAIT: std::time::Duration = std::time::Duration::from_secs(10);

mod tree_common;
use tree_common::*;

fn json(d: &Path, args: &[&str]) -> serde_json::Value {
    let mut all = vec!["--json"];
    all.extend_from_slice(args);
    serde_json::from_str(&ok(d, &all)).expect("--json prints JSON")
}

fn check_run(d: &Path, extra: &[&str]) -> (i32, serde_json::Value) {
    let mut args = vec![
        "--json", "ledger", "check", "--tree", "tree", "--trust", "k.pub",
    ];
    args.extend_from_slice(extra);
    let out = run(d, &args);
    let doc = serde_json::from_slice(&out.stdout).expect("check --json prints its report");
    (out.status.code().unwrap_or(-1), doc)
}

fn problems(doc: &serde_json::Value) -> Vec<String> {
    doc["problems"]
        .as_array()
        .expect("problems")
        .iter()
        .map(|p| p.as_str().expect("text").to_string())
        .collect()
}

/// A tree with 1.0.0 on stable, 1.1.0 on beta, then 1.1.0 on stable, then stable withdrawn.
fn four_changes(d: &Path) -> (String, String) {
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let v2 = pack(d, "1.1.0", 1, "k.pem");
    publish(d, &v1, "stable", "100");
    publish(d, &v2, "beta", "100");
    publish(d, &v2, "stable", "100");
    ok(
        d,
        &[
            "withdraw",
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            "k.pem",
            "--version",
            "1.1.0",
        ],
    );
    (v1, v2)
}

fn sha(d: &Path, file: &str) -> Digest {
    Digest::of(&std::fs::read(d.join(file)).expect("file"))
}

fn feed_bytes(d: &Path, channel: &str) -> Vec<u8> {
    std::fs::read(d.join(format!("tree/feeds/{channel}.json"))).expect("feed")
}

fn head_of(d: &Path) -> TreeHead {
    let bytes = std::fs::read(d.join("tree/ledger/tree-head.json")).expect("head");
    SignedTreeHead::from_json(bytes.strip_suffix(b"\n").unwrap_or(&bytes))
        .expect("head")
        .head()
}

fn device(d: &Path, channel: &str, remembered: Option<TreeHead>) -> FeedVerifier {
    FeedVerifier::new(keys(d), channel)
        .expect("feed verifier")
        .require_ledger(
            LedgerVerifier::new(keys(d), 1)
                .expect("ledger verifier")
                .remembered(remembered),
        )
}

/// Makes an edited publish entry offer its own (edited) release again, as a format-2 publish
/// entry must, so the ledger check looks at the edit itself.
fn offer_itself(entry: &mut Entry) {
    let mut offered = entry
        .offered()
        .cloned()
        .expect("a format-2 publish entry offers");
    offered.bundle = entry.bundle.clone();
    offered.version = entry.version.clone();
    offered.bundle_digest = entry.bundle_digest;
    offered.manifest_digest = entry.manifest_digest;
    entry.offered = Some(Some(offered));
}

/// Reads consistency steps straight from the tree, as the updater does over HTTP.
fn steps_from(d: &Path) -> impl FnMut(u64) -> ampoule_verify::Result<Vec<u8>> + '_ {
    move |size| Ok(std::fs::read(d.join("tree").join(step_path(size))).expect("step file"))
}

#[test]
fn publish_and_withdraw_append_entries_issue_4() {
    let dir = setup();
    let d = dir.path();
    let (v1, v2) = four_changes(d);
    let listed = json(d, &["ledger", "list", "--tree", "tree"]);
    let entries = listed["entries"].as_array().expect("entries");
    let summary: Vec<(String, String, String, u64)> = entries
        .iter()
        .map(|e| {
            (
                e["event"].as_str().expect("event").to_string(),
                e["channel"].as_str().expect("channel").to_string(),
                e["version"].as_str().expect("version").to_string(),
                e["feed_sequence"].as_u64().expect("sequence"),
            )
        })
        .collect();
    let row = |e: &str, c: &str, v: &str, s| (e.to_string(), c.to_string(), v.to_string(), s);
    assert_eq!(
        summary,
        [
            row("publish", "stable", "1.0.0", 1),
            row("publish", "beta", "1.1.0", 1),
            row("publish", "stable", "1.1.0", 2),
            row("withdraw", "stable", "1.1.0", 3),
        ]
    );
    // Digests as sha256sum would print them (FIPS 180-4 through Digest::of), signers by key id.
    assert_eq!(entries[0]["bundle_sha256"], sha(d, &v1).to_string());
    assert_eq!(entries[3]["bundle_sha256"], sha(d, &v2).to_string());
    let key = ok(d, &["inspect", &v1, "--json"]);
    let key: serde_json::Value = serde_json::from_str(&key).expect("inspect JSON");
    let signer = key["signatures"][0]["key_id"].clone();
    assert_eq!(entries[0]["key_ids"], serde_json::json!([signer]));
    assert_eq!(listed["tree_size"], 4);

    // The feed of the withdraw names 1.0.0 again and carries its own entry, the withdraw
    // (entry 3, the head's last leaf), which names both the release pulled (1.1.0) and the
    // one offered now (1.0.0, with its manifest's digest and the feed's rollout) (issue 10
    // item 3).
    let feed = read_feed(d, "stable");
    let ledger = feed.ledger.expect("the feed carries the ledger");
    assert_eq!(ledger.tree_head.head(), head_of(d));
    let inclusion = ledger.inclusion.expect("inclusion proof");
    assert_eq!((inclusion.leaf_index, inclusion.tree_size), (3, 4));
    let entry = Entry::from_bytes(ledger.entry.expect("entry").as_bytes()).expect("entry");
    assert_eq!(
        (entry.event, entry.version.to_string(), entry.feed_sequence),
        (Event::Withdraw, "1.1.0".into(), feed.sequence)
    );
    assert_eq!(entry.bundle_digest, sha(d, &v2));
    let offered = entry.offered().expect("the withdraw offers 1.0.0 again");
    assert_eq!(
        (
            offered.version.to_string(),
            offered.bundle_digest,
            offered.rollout_percent
        ),
        ("1.0.0".to_string(), sha(d, &v1), 100)
    );
    assert!(offered.deltas.is_empty());
    assert_eq!(
        offered.manifest_digest,
        Digest::of(
            &ampoule_verify::bundle::Unverified::open(&d.join(&v1))
                .expect("bundle")
                .layout
                .manifest
        )
    );
    assert_eq!(
        (ledger.consistency.old_size, ledger.consistency.new_size),
        (3, 4)
    );

    // CSV (RFC 4180) with a header, one channel only.
    let csv = ok(
        d,
        &[
            "ledger",
            "list",
            "--tree",
            "tree",
            "--channel",
            "beta",
            "--csv",
        ],
    );
    let lines: Vec<&str> = csv.lines().collect();
    assert_eq!(
        lines[0],
        "index,time,event,channel,bundle,version,bundle_sha256,manifest_sha256,key_ids,\
         feed_sequence,trust_set_version,trust_set_sha256,rollout_percent_from_history,deltas"
    );
    assert_eq!(lines.len(), 2);
    assert!(
        lines[1].starts_with("1,") && lines[1].contains(",publish,beta,trailcam-species,1.1.0,"),
        "{csv}"
    );
    let (code, err) = refused(d, &["--json", "ledger", "list", "--tree", "tree", "--csv"]);
    assert_eq!(
        (code, err.as_str()),
        (
            2,
            "ampoule: error: --csv and --json print different formats; choose one"
        )
    );
    let text = ok(d, &["ledger", "list", "--tree", "tree"]);
    assert!(text.starts_with("#  time"), "{text}");
    assert!(
        text.contains("4 of 4 entries shown; tree head size 4"),
        "{text}"
    );

    let (code, report) = check_run(d, &[]);
    assert_eq!((code, problems(&report).len()), (0, 0), "{report}");
    assert_eq!(report["tree_heads_checked"], 4);
    assert_eq!(report["bundles_checked"], 2);
    assert_eq!(report["warnings"], serde_json::json!([]));
}

#[test]
fn prove_prints_and_verifies_an_inclusion_proof() {
    let dir = setup();
    let d = dir.path();
    let (v1, _) = four_changes(d);
    let proof = json(d, &["ledger", "prove", &v1, "--tree", "tree"]);
    let hashes: Vec<Digest> = proof["inclusion"]["hashes"]
        .as_array()
        .expect("hashes")
        .iter()
        .map(|h| h.as_str().expect("hex").parse().expect("digest"))
        .collect();
    let leaf =
        ampoule_verify::merkle::leaf_hash(proof["entry"].as_str().expect("entry").as_bytes());
    assert_eq!(proof["leaf_hash"], leaf.to_string());
    let head = head_of(d);
    ampoule_verify::merkle::verify_inclusion(0, 4, &leaf, &hashes, &head.root_hash)
        .expect("the printed proof verifies");
    // By digest too.
    let by_digest = json(
        d,
        &[
            "ledger",
            "prove",
            &sha(d, &v1).to_string(),
            "--tree",
            "tree",
        ],
    );
    assert_eq!(by_digest["inclusion"], proof["inclusion"]);

    let never = pack(d, "9.0.0", 7, "k.pem");
    let (code, err) = refused(d, &["ledger", "prove", &never, "--tree", "tree"]);
    assert_eq!(code, 1);
    assert_eq!(
        err,
        format!(
            "ampoule: error: bundle {} was never published: no publish entry in the ledger of \
             tree names it",
            sha(d, &never)
        )
    );
}

fn flip(path: &Path, at: usize) -> Vec<u8> {
    let original = std::fs::read(path).expect("read");
    let mut bytes = original.clone();
    bytes[at] ^= 0x01;
    std::fs::write(path, bytes).expect("write");
    original
}

#[test]
fn check_finds_rewritten_and_deleted_entries_and_changed_bundles() {
    let dir = setup();
    let d = dir.path();
    let (v1, _) = four_changes(d);
    let entries = d.join("tree/ledger/entries.jsonl");
    let text = std::fs::read_to_string(&entries).expect("entries");

    // A rewritten entry: same length, one version digit changed.
    let rewritten = text.replacen("\"version\":\"1.0.0\"", "\"version\":\"1.0.1\"", 1);
    std::fs::write(&entries, &rewritten).expect("write");
    let (code, report) = check_run(d, &[]);
    assert_eq!(code, 1);
    let found = problems(&report);
    assert!(
        found[0].starts_with("stored hash at level 0, index 0 is "),
        "{found:?}"
    );
    assert!(found[0].contains(", but the entries give "), "{found:?}");
    std::fs::write(&entries, &text).expect("restore");

    // A deleted entry: the second line removed.
    let lines: Vec<&str> = text.lines().collect();
    let deleted: String = lines
        .iter()
        .enumerate()
        .filter(|(i, _)| *i != 1)
        .map(|(_, l)| format!("{l}\n"))
        .collect();
    std::fs::write(&entries, &deleted).expect("write");
    let (code, report) = check_run(d, &[]);
    assert_eq!(code, 1);
    let found = problems(&report);
    assert_eq!(
        found,
        [format!(
            "the ledger is damaged: {} holds {} bytes, but the tree head of size 4 needs {}",
            entries
                .display()
                .to_string()
                .replacen(&d.display().to_string(), "", 1)
                .trim_start_matches('/'),
            deleted.len(),
            text.len()
        )]
    );
    std::fs::write(&entries, &text).expect("restore");

    // A bundle file changed in the tree.
    let bundle = d.join(format!("tree/bundles/{}.ampoule", sha(d, &v1)));
    let original = flip(&bundle, 2000);
    let changed = Digest::of(&std::fs::read(&bundle).expect("bundle"));
    let (code, report) = check_run(d, &[]);
    assert_eq!(code, 1);
    assert_eq!(
        problems(&report),
        [format!(
            "entry 0: bundle trailcam-species 1.0.0 (bundles/{}.ampoule) differs from what was \
             published: its sha256 is {changed}",
            sha(d, &v1)
        )]
    );
    // And removed.
    std::fs::remove_file(&bundle).expect("remove");
    let (_, report) = check_run(d, &[]);
    assert_eq!(
        problems(&report),
        [format!(
            "entry 0: bundle trailcam-species 1.0.0 (bundles/{}.ampoule) is missing from the tree",
            sha(d, &v1)
        )]
    );
    std::fs::write(&bundle, original).expect("restore");
    assert_eq!(check_run(d, &[]).0, 0);
}

#[test]
fn check_refuses_an_untrusted_tree_head_and_a_rewritten_history() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let v2 = pack(d, "1.1.0", 1, "k.pem");
    publish(d, &v1, "stable", "100");
    publish(d, &v2, "stable", "100");
    std::fs::copy(d.join("tree/ledger/tree-head.json"), d.join("audit-1.json")).expect("save");
    publish(d, &v2, "beta", "100");
    let (code, report) = check_run(d, &["--since", "audit-1.json"]);
    assert_eq!(
        (code, report["consistent_since"].clone()),
        (0, 2.into()),
        "{report}"
    );

    // Another key: every head is refused.
    ok(
        d,
        &["keygen", "--secret", "other.pem", "--public", "other.pub"],
    );
    let out = run(
        d,
        &[
            "--json",
            "ledger",
            "check",
            "--tree",
            "tree",
            "--trust",
            "other.pub",
        ],
    );
    assert_eq!(out.status.code(), Some(1));
    let report: serde_json::Value = serde_json::from_slice(&out.stdout).expect("report");
    let found = problems(&report);
    assert!(
        found[0].starts_with("tree-head.json is not validly signed: tree head of size 3 has no valid signature by a trusted key (by keys not trusted here: "),
        "{found:?}"
    );
    assert!(
        found[1].starts_with("line 1 of tree-heads.jsonl (tree size 1): tree head of size 1 has no valid signature by a trusted key (by keys not trusted here: "),
        "{found:?}"
    );

    // A rewritten history: a second tree with the same key but other entries; its head of
    // size 3 does not extend the saved head of size 2 of the first tree.
    let other = tempfile::tempdir().expect("tempdir");
    let o = other.path();
    for f in ["k.pem", "k.pub", "labels.txt"] {
        std::fs::copy(d.join(f), o.join(f)).expect("copy");
    }
    let w1 = pack(o, "1.0.0", 5, "k.pem");
    let w2 = pack(o, "1.1.0", 6, "k.pem");
    publish(o, &w1, "stable", "100");
    publish(o, &w2, "stable", "100");
    publish(o, &w2, "beta", "100");
    std::fs::copy(d.join("audit-1.json"), o.join("audit-1.json")).expect("copy");
    let (code, report) = check_run(o, &["--since", "audit-1.json"]);
    assert_eq!(code, 1);
    let found = problems(&report);
    assert_eq!(found.len(), 1, "{found:?}");
    assert!(
        found[0].starts_with(
            "the current tree head (size 3) is not consistent with the saved tree head of size 2: \
             the history was rewritten (consistency proof from tree size 2 (root "
        ),
        "{found:?}"
    );
    // A trimmed history: the saved head is larger than the ledger.
    std::fs::copy(d.join("tree/ledger/tree-head.json"), o.join("audit-3.json")).expect("copy");
    let small = tempfile::tempdir().expect("tempdir");
    let s = small.path();
    for f in ["k.pem", "k.pub", "labels.txt"] {
        std::fs::copy(d.join(f), s.join(f)).expect("copy");
    }
    let x1 = pack(s, "1.0.0", 0, "k.pem");
    publish(s, &x1, "stable", "100");
    std::fs::copy(d.join("tree/ledger/tree-head.json"), s.join("audit-3.json")).expect("copy");
    let (code, report) = check_run(s, &["--since", "audit-3.json"]);
    assert_eq!(code, 1);
    assert_eq!(
        problems(&report),
        [
            "the ledger has 1 entry, fewer than the 3 of the saved tree head: its history was trimmed"
        ]
    );
}

#[test]
fn check_flags_version_reuse_sequence_gaps_and_entries_without_a_feed() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    // A crafted ledger continues where the tree's ends, signed with the tree's key, as a
    // release side with a bug (or a thief with the key) could write it.
    let key = SigningKey::from_bytes(&tree_key_seed(d));
    let mut ledger = Ledger::open(&d.join("tree/ledger")).expect("open");
    let first = Entry::from_bytes(&ledger.entry(0).expect("entry 0")).expect("entry");
    let mut reuse = first.clone();
    reuse.bundle_digest = Digest::of(b"other bundle bytes");
    reuse.feed_sequence = 2;
    offer_itself(&mut reuse);
    let mut gap = first.clone();
    gap.feed_sequence = 5;
    let time = head_of(d).time;
    ledger.append_entry(&reuse, &[&key], time).expect("append");
    ledger.append_entry(&gap, &[&key], time).expect("append");
    let (code, report) = check_run(d, &[]);
    assert_eq!(code, 1);
    let found = problems(&report);
    assert!(
        found.contains(&format!(
            "entry 1: trailcam-species 1.0.0 is logged with bundle {}, but entry 0 logged it \
             with bundle {}: a version was reused with different content",
            reuse.bundle_digest, first.bundle_digest
        )),
        "{found:?}"
    );
    assert!(
        found.contains(
            &"entry 2: sequence gap on channel stable: feed sequence 5 follows 2 (entry 1); \
              sequences 3 to 4 are not in the ledger"
                .to_string()
        ),
        "{found:?}"
    );
    assert!(
        found.contains(&format!(
            "consistency step {}: No such file or directory (os error 2); devices that saw tree \
             size 1 cannot catch up",
            step_path(1)
        )),
        "{found:?}"
    );
    assert!(
        found.contains(&format!(
            "entry 1: bundle trailcam-species 1.0.0 (bundles/{}.ampoule) is missing from the tree",
            reuse.bundle_digest
        )),
        "{found:?}"
    );
    let warnings: Vec<&str> = report["warnings"]
        .as_array()
        .expect("warnings")
        .iter()
        .map(|w| w.as_str().expect("text"))
        .collect();
    assert_eq!(
        warnings,
        [
            "entry 1 (publish of trailcam-species 1.0.0 on channel stable, feed sequence 2) has \
             no feed update: the channel's history has no event with that sequence (a publish \
             or withdraw that stopped after its ledger append)",
            "entry 2 (publish of trailcam-species 1.0.0 on channel stable, feed sequence 5) has \
             no feed update: the channel's history has no event with that sequence (a publish \
             or withdraw that stopped after its ledger append)",
        ]
    );
}

/// The seed of `k.pem`, read the way the release side reads it.
fn tree_key_seed(d: &Path) -> [u8; 32] {
    ampoule::release::keyfile::read_secret_key(
        &d.join("k.pem"),
        &ampoule::release::keyfile::PassphraseSource::Env("AMPOULE_TEST_UNUSED".into()),
    )
    .expect("the test key is not encrypted")
    .to_bytes()
}

#[test]
fn a_publish_that_stops_after_its_append_leaves_a_warning_and_no_reused_sequence() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let v2 = pack(d, "1.1.0", 1, "k.pem");
    publish(d, &v1, "stable", "100");
    // What a crash between the ledger append and the feed leaves: the entry, no history, no feed.
    let key = SigningKey::from_bytes(&tree_key_seed(d));
    let mut entry = Entry::from_bytes(
        &Ledger::open(&d.join("tree/ledger"))
            .expect("open")
            .entry(0)
            .expect("entry"),
    )
    .expect("entry");
    entry.bundle_digest = sha(d, &v2);
    entry.manifest_digest = Digest::of(
        &ampoule_verify::bundle::Unverified::open(&d.join(&v2))
            .expect("bundle")
            .layout
            .manifest,
    );
    entry.version = Version::new(1, 1, 0);
    entry.feed_sequence = 2;
    offer_itself(&mut entry);
    ampoule::release::ledger_audit::append(&d.join("tree"), &entry, &[&key], &[])
        .expect("append as publish does");
    assert_eq!(
        read_feed(d, "stable").sequence,
        1,
        "the feed was not written"
    );
    let (code, report) = check_run(d, &[]);
    assert_eq!(code, 1, "{report}");
    // The bundle was never placed in the tree either: that is a problem, the feed a warning.
    assert_eq!(report["warnings"].as_array().expect("warnings").len(), 1);
    assert!(
        report["warnings"][0]
            .as_str()
            .expect("text")
            .starts_with("entry 1 (publish of trailcam-species 1.1.0 on channel stable, feed sequence 2) has no feed update"),
        "{report}"
    );
    // The next publish takes sequence 3: the ledger never logs one sequence twice.
    let published = publish(d, &v2, "stable", "100");
    assert_eq!(published["sequence"], 3);
    let (code, report) = check_run(d, &[]);
    assert_eq!(code, 0, "{report}");
    assert_eq!(report["warnings"].as_array().expect("warnings").len(), 1);
}

#[test]
fn two_publishes_at_once_are_serialized() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let v2 = pack(d, "1.1.0", 1, "k.pem");
    publish(d, &v1, "stable", "100");
    let mut won = 0;
    for round in 0..4 {
        let spawn = |bundle: &str, channel: String| -> Child {
            Command::new(BIN)
                .args([
                    "publish",
                    bundle,
                    "--tree",
                    "tree",
                    "--channel",
                    &channel,
                    "--key",
                    "k.pem",
                ])
                .current_dir(d)
                .stdout(Stdio::null())
                .stderr(Stdio::piped())
                .spawn()
                .expect("spawn publish")
        };
        let children = [
            spawn(&v2, format!("beta-{round}")),
            spawn(&v1, format!("field-{round}")),
        ];
        for child in children {
            let out = child.wait_with_output().expect("publish ends");
            // The second waits for the tree lock and then publishes: both succeed, in turn.
            assert!(
                out.status.success(),
                "{}",
                String::from_utf8_lossy(&out.stderr)
            );
            won += 1;
        }
    }
    assert_eq!(won, 8, "every publish of every round succeeds");
    let (code, report) = check_run(d, &[]);
    assert_eq!(code, 0, "{report}");
    assert_eq!(report["tree_size"], 1 + won);
    assert_eq!(report["tree_heads_checked"], 1 + won);
}

#[test]
fn the_device_refuses_a_bundle_signed_but_never_published() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let good = feed_bytes(d, "stable");
    device(d, "stable", None)
        .verify(&good, Timestamp::now())
        .expect("the published feed passes");

    // A thief with the key signs 2.0.0 and a feed of their own for one camera, reusing the
    // real ledger object (or none at all).
    let secret = pack(d, "2.0.0", 9, "k.pem");
    let key = SigningKey::from_bytes(&tree_key_seed(d));
    let forge = |edit: &dyn Fn(&mut Feed)| -> Vec<u8> {
        let signed = SignedFeed::from_json(&good).expect("envelope");
        let mut feed = Feed::from_json(signed.feed.as_bytes()).expect("feed");
        edit(&mut feed);
        let text = feed.to_json();
        let signature = key.sign(&ampoule_verify::format::signed_bytes(
            ampoule_verify::format::context::FEED,
            text.as_bytes(),
        ));
        SignedFeed {
            feed: text,
            signatures: vec![ampoule_verify::signature::SignatureEntry {
                key_id: ampoule_verify::KeyId::of_raw_key(key.verifying_key().as_bytes()),
                signature: signature.to_bytes(),
            }],
        }
        .to_json()
    };
    let digest = sha(d, &secret);
    let retarget = |feed: &mut Feed| {
        let release = feed.release.as_mut().expect("release");
        release.version = Version::new(2, 0, 0);
        release.sha256 = digest;
    };
    let never = format!(
        "feed sequence 1 offers trailcam-species 2.0.0 (sha256 {digest}), but the ledger does \
             not log that as channel stable's current release: "
    );
    let cases: Vec<(Vec<u8>, String)> = vec![
        (
            forge(&|f| {
                retarget(f);
                f.ledger = None;
            }),
            format!("{never}the feed carries no ledger proof, and this device requires one"),
        ),
        (
            forge(&|f| retarget(f)),
            format!(
                "{never}the ledger entry the feed carries offers trailcam-species 1.0.0 (sha256 \
                 {}) at 100% rollout, not trailcam-species 2.0.0 (sha256 {digest}) at 100% \
                 rollout",
                sha(d, &v1)
            ),
        ),
        (
            // The entry text rewritten to match: the real tree head does not include it.
            forge(&|f| {
                retarget(f);
                let l = f.ledger.as_mut().expect("ledger");
                let text = l.entry.clone().expect("entry");
                let mut entry = Entry::from_bytes(text.as_bytes()).expect("entry");
                entry.version = Version::new(2, 0, 0);
                entry.bundle_digest = digest;
                offer_itself(&mut entry);
                l.entry = Some(String::from_utf8(entry.to_bytes()).expect("utf-8"));
            }),
            format!(
                "{never}the ledger entry the feed carries is not in the ledger's tree head of \
                 size 1 (inclusion \
                 proof of leaf 0 in tree size 1 does not lead to root {})",
                head_of(d).root_hash
            ),
        ),
        (
            // Issue 13: the real release with a delta the ledger never logged, so that a
            // device downloads a file of the thief's choosing first.
            forge(&|f| {
                f.release.as_mut().expect("release").deltas = vec![DeltaRef {
                    base: Digest::of(b"a base"),
                    size: 1000,
                    sha256: Digest::of(b"the thief's delta"),
                }];
            }),
            format!(
                "feed sequence 1 offers trailcam-species 1.0.0 (sha256 {}), but the ledger does \
                 not log that as channel stable's current release: the ledger entry the feed \
                 carries lists 0 delta(s) for this release, and the feed 1 that differ from \
                 them; a feed offers only the deltas the ledger logged",
                sha(d, &v1)
            ),
        ),
    ];
    for (bytes, expected) in cases {
        let err = device(d, "stable", None)
            .verify(&bytes, Timestamp::now())
            .expect_err("never published");
        assert_eq!(err.to_string(), expected);
        assert_eq!(err.kind(), ErrorKind::Proof);
        // Without the ledger requirement the same feed passes: the check is what refuses it.
        FeedVerifier::new(keys(d), "stable")
            .expect("verifier")
            .verify(&bytes, Timestamp::now())
            .expect("signature and fields are fine");
    }

    // A tree head signed by a key the device does not trust.
    ok(
        d,
        &["keygen", "--secret", "other.pem", "--public", "other.pub"],
    );
    let other = keys_from(d, "other.pub");
    let err = FeedVerifier::new(keys(d), "stable")
        .expect("verifier")
        .require_ledger(LedgerVerifier::new(other, 1).expect("ledger verifier"))
        .verify(&good, Timestamp::now())
        .expect_err("untrusted tree head");
    assert!(
        err.to_string()
            .starts_with("tree head of size 1 has no valid signature by a trusted key (by keys not trusted here: "),
        "{err}"
    );
}

fn keys_from(d: &Path, public: &str) -> ampoule_verify::TrustedKeys {
    let pem = std::fs::read_to_string(d.join(public)).expect("public key");
    [ampoule_verify::PublicKey::from_pem(&pem).expect("key")]
        .into_iter()
        .collect()
}

#[test]
fn the_device_refuses_a_smaller_or_inconsistent_tree_head_and_follows_after_missed_publishes() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let v2 = pack(d, "1.1.0", 1, "k.pem");
    let v3 = pack(d, "1.2.0", 2, "k.pem");
    publish(d, &v1, "stable", "100");
    let old_feed = feed_bytes(d, "stable");
    let seen_1 = head_of(d);
    publish(d, &v2, "beta", "100");
    publish(d, &v2, "stable", "100");
    publish(d, &v3, "beta", "100");
    publish(d, &v3, "stable", "100");
    let feed = feed_bytes(d, "stable");
    let now = Timestamp::now();

    // Saw every head: the feed's own proof (from size 4) suffices.
    let seen_4 = {
        let bytes = std::fs::read(d.join("tree/ledger/tree-heads.jsonl")).expect("log");
        let line = bytes.split(|&b| b == b'\n').nth(3).expect("line 4");
        SignedTreeHead::from_json(line).expect("head").head()
    };
    let checked = device(d, "stable", Some(seen_4))
        .verify(&feed, now)
        .expect("consistent with size 4");
    assert_eq!(checked.ledger().expect("ledger").tree_head, head_of(d));

    // Missed three appends: plain verify cannot fetch, verify_with_steps walks 1 -> 2 -> 3 -> 4.
    let err = device(d, "stable", Some(seen_1))
        .verify(&feed, now)
        .expect_err("needs the steps");
    assert_eq!(
        err.to_string(),
        "the feed's ledger proof does not start at tree size 1, which this device saw last; \
         fetch ledger/consistency/1.json from the release tree to catch up"
    );
    let mut fetched = Vec::new();
    let mut steps = steps_from(d);
    device(d, "stable", Some(seen_1))
        .verify_with_steps(&feed, now, &mut |size| {
            fetched.push(size);
            steps(size)
        })
        .expect("a device that skipped publishes still accepts");
    assert_eq!(fetched, [1, 2, 3]);

    // A smaller tree head than remembered: the old feed (size 1) after size 5.
    let err = device(d, "stable", Some(head_of(d)))
        .verify(&old_feed, now)
        .expect_err("smaller");
    assert_eq!(
        err.to_string(),
        "ledger tree head of size 1 is smaller than the tree head of size 5 this device saw \
         before; refusing a rolled-back ledger (after a channel switch, the new channel's feed \
         is taken once a renewal of it carries a head at least that large: 'ampoule publish' \
         of its current bundle renews it)"
    );
    assert_eq!(err.kind(), ErrorKind::Stale);

    // Inconsistent: a remembered head of a forked ledger, at the size the proof starts from
    // and at the same size.
    let forked = TreeHead {
        root_hash: Digest::of(b"a forked ledger"),
        ..seen_4
    };
    let err = device(d, "stable", Some(forked))
        .verify(&feed, now)
        .expect_err("inconsistent");
    assert!(
        err.to_string().starts_with(
            "ledger tree head of size 5 is not consistent with the tree head of size 4 this \
             device saw before: consistency proof from tree size 4 (root "
        ),
        "{err}"
    );
    let same_size = TreeHead {
        root_hash: Digest::of(b"a forked ledger"),
        ..head_of(d)
    };
    let err = device(d, "stable", Some(same_size))
        .verify(&feed, now)
        .expect_err("forked");
    assert_eq!(
        err.to_string(),
        format!(
            "ledger tree head of size 5 has root {}, but this device saw root {} at that size; \
             the ledger was forked or rewritten",
            head_of(d).root_hash,
            same_size.root_hash
        )
    );
    // A forked head two steps back: the walk's first proof fails.
    let forked_1 = TreeHead {
        root_hash: Digest::of(b"a forked ledger"),
        ..seen_1
    };
    let err = device(d, "stable", Some(forked_1))
        .verify_with_steps(&feed, now, &mut steps_from(d))
        .expect_err("inconsistent walk");
    assert!(
        err.to_string().starts_with(
            "ledger tree head of size 5 is not consistent with the tree head of size 1 this \
             device saw before: consistency proof from tree size 1 (root "
        ),
        "{err}"
    );
}

#[test]
fn the_store_remembers_the_largest_tree_head() {
    let dir = setup();
    let d = dir.path();
    let store_dir = d.join("store");
    let verifier = Verifier::new(keys(d), Version::new(2, 3, 0)).expect("verifier");
    let store = ampoule_verify::Store::open(&store_dir, verifier)
        .expect("store")
        .wait_for_lock(LOCK_WAIT);
    assert_eq!(store.state().expect("state").tree_head, None);
    let small = TreeHead {
        tree_size: 3,
        root_hash: Digest::of(b"three"),
        time: 1,
    };
    let large = TreeHead {
        tree_size: 5,
        root_hash: Digest::of(b"five"),
        time: 2,
    };
    ampoule_verify::dangerous::remember_unverified_tree_head(&store, &small).expect("first");
    ampoule_verify::dangerous::remember_unverified_tree_head(&store, &large).expect("larger");
    assert_eq!(store.state().expect("state").tree_head, Some(large));
    let err = ampoule_verify::dangerous::remember_unverified_tree_head(&store, &small)
        .expect_err("smaller");
    assert_eq!(
        err.to_string(),
        format!(
            "tree head of size 3 (root {}) does not extend the tree head of size 5 (root {}) \
             this store remembers; refusing to forget the larger one",
            small.root_hash, large.root_hash
        )
    );
    assert_eq!(store.state().expect("state").tree_head, Some(large));
}

fn serve(d: &Path) -> Served {
    serve_tree(d, "tree")
}

#[test]
fn over_http_the_auditor_lists_and_checks_and_a_device_catches_up() {
    let dir = setup();
    let d = dir.path();
    let (v1, _) = four_changes(d);
    let v3 = pack(d, "1.2.0", 2, "k.pem");
    publish(d, &v3, "stable", "100");
    let server = serve(d);
    let url = format!("http://{}/", server.addr);
    let listed = json(d, &["ledger", "list", "--url", &url]);
    let local = json(d, &["ledger", "list", "--tree", "tree"]);
    assert_eq!(listed["entries"], local["entries"]);
    let out = run(
        d,
        &[
            "--json", "ledger", "check", "--url", &url, "--trust", "k.pub",
        ],
    );
    let report: serde_json::Value = serde_json::from_slice(&out.stdout).expect("report");
    assert_eq!(out.status.code(), Some(0), "{report}");
    assert_eq!(
        (
            report["tree_heads_checked"].clone(),
            report["bundles_checked"].clone()
        ),
        (5.into(), 3.into())
    );
    // A bundle changed on the server is found over HTTP too.
    let bundle = d.join(format!("tree/bundles/{}.ampoule", sha(d, &v1)));
    flip(&bundle, 3000);
    let out = run(
        d,
        &[
            "--json", "ledger", "check", "--url", &url, "--trust", "k.pub",
        ],
    );
    assert_eq!(out.status.code(), Some(1));

    // A camera that saw only the first head updates through the served consistency steps.
    std::fs::create_dir(d.join("downloads")).expect("downloads");
    let updater = Updater::new(
        format!("{url}feeds/stable.json"),
        device(d, "stable", Some(first_head(d))),
        Verifier::new(keys(d), Version::new(2, 3, 0))
            .expect("verifier")
            .installed(Version::new(1, 0, 0)),
        "camera-0007",
        d.join("downloads"),
    );
    let update = updater.check(Timestamp::now()).expect("update check");
    let Update::Ready { feed, bundle, .. } = update else {
        panic!("expected a bundle, got {update:?}");
    };
    assert_eq!(bundle.manifest().version, Version::new(1, 2, 0));
    assert_eq!(feed.ledger().expect("ledger").tree_head, head_of(d));
}

fn first_head(d: &Path) -> TreeHead {
    let bytes = std::fs::read(d.join("tree/ledger/tree-heads.jsonl")).expect("log");
    let line = bytes.split(|&b| b == b'\n').next().expect("line 1");
    SignedTreeHead::from_json(line).expect("head").head()
}

#[test]
fn check_with_a_trust_set_needs_its_tree_head_threshold() {
    let dir = setup();
    let d = dir.path();
    ok(
        d,
        &["keygen", "--secret", "second.pem", "--public", "second.pub"],
    );
    ok(
        d,
        &[
            "trust",
            "init",
            "--key",
            "k.pub",
            "--key",
            "second.pub",
            "--threshold",
            "tree_head=2",
            "--expires-in",
            "365d",
            "-o",
            "trust.json",
        ],
    );
    ok(d, &["trust", "sign", "trust.json", "--key", "k.pem"]);
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    // Both keys sign the tree head: the feed key and one --tree-head-key.
    ok(
        d,
        &[
            "publish",
            &v1,
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            "k.pem",
            "--tree-head-key",
            "second.pem",
        ],
    );
    let with_set = |d: &Path| {
        let out = run(
            d,
            &[
                "--json",
                "ledger",
                "check",
                "--tree",
                "tree",
                "--trust-set",
                "trust.json",
            ],
        );
        let doc: serde_json::Value = serde_json::from_slice(&out.stdout).expect("report");
        (out.status.code().unwrap_or(-1), doc)
    };
    let (code, report) = with_set(d);
    assert_eq!(code, 0, "{report}");
    // One more publish signed by the feed key alone falls short of the threshold.
    publish(d, &v1, "beta", "100");
    let (code, report) = with_set(d);
    assert_eq!(code, 1);
    let found = problems(&report);
    assert_eq!(found.len(), 1, "{found:?}");
    assert!(
        found[0].starts_with(
            "line 2 of tree-heads.jsonl (tree size 2): tree head of size 2 has 1 valid \
             signature(s) by trusted keys but needs 2 (valid: "
        ),
        "{found:?}"
    );
}

/// Publishing a trust set renews every channel's feed; each renewal is logged as a publish of
/// the channel's release, so devices that require the ledger accept the renewed feeds and the
/// auditor's check stays clean (issue 5 meets issue 4).
#[test]
fn a_trust_set_publish_logs_each_renewed_feed_issue_5() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let before = head_of(d);
    ok(d, &["trust", "init", "--key", "k.pub", "-o", "trust.json"]);
    ok(d, &["trust", "sign", "trust.json", "--key", "k.pem"]);
    let report = json(
        d,
        &[
            "publish",
            "--trust-set",
            "trust.json",
            "--tree",
            "tree",
            "--key",
            "k.pem",
        ],
    );
    assert_eq!(report["feeds"][0]["channel"], "stable");
    assert_eq!(report["feeds"][0]["sequence"], 2);

    // One trust-set entry, then the renewed feed's publish entry.
    let after = head_of(d);
    assert_eq!(after.tree_size, before.tree_size + 2);
    let ledger = Ledger::open(&d.join("tree/ledger")).expect("ledger");
    let at = before.tree_size;
    let trust_text = ledger.entry(at).expect("entry");
    let signer = KeyId::of_raw_key(
        SigningKey::from_bytes(&tree_key_seed(d))
            .verifying_key()
            .as_bytes(),
    );
    // The SHA-256 is of the file as published, compared with std::fs bytes hashed by the
    // digest module (itself checked against the FIPS 180-2 vectors in crates/verify).
    let trust_sha = sha(d, "tree/trust/1.json");
    assert_eq!(trust_sha, sha(d, "trust.json"));
    assert_eq!(
        Record::from_bytes(&trust_text).expect("record"),
        Record::TrustSet(TrustSetEntry {
            event: Event::TrustSet,
            trust_set_version: 1,
            trust_set_digest: trust_sha,
            key_ids: vec![signer],
            time: after.time,
        })
    );
    assert_eq!(
        String::from_utf8(trust_text.clone()).expect("utf-8"),
        format!(
            "{{\"event\":\"trust_set\",\"trust_set_version\":1,\"trust_set_digest\":\"{trust_sha}\",\
             \"key_ids\":[\"{signer}\"],\"time\":{}}}",
            after.time
        )
    );
    // Read as the entry of a release it is refused, whatever reads it.
    let err = Entry::from_bytes(&trust_text).expect_err("not a bundle entry");
    assert!(
        err.to_string()
            .starts_with("ledger entry is not valid: unknown field `trust_set_version`"),
        "{err}"
    );
    let last =
        Entry::from_bytes(&ledger.entry(after.tree_size - 1).expect("entry")).expect("entry");
    assert_eq!(last.event, Event::Publish);
    assert_eq!((last.channel.as_str(), last.feed_sequence), ("stable", 2));
    assert_eq!(last.bundle_digest, sha(d, &v1));

    // ledger list shows it, also when listing one channel.
    let listed = json(
        d,
        &["ledger", "list", "--tree", "tree", "--channel", "stable"],
    );
    let time = Timestamp::from_unix(after.time).expect("time").to_string();
    assert_eq!(
        listed["entries"][1],
        serde_json::json!({
            "index": 1,
            "time": time,
            "event": "trust_set",
            "trust_set_version": 1,
            "trust_set_sha256": trust_sha.to_string(),
            "key_ids": [signer.to_string()],
        })
    );
    let text = ok(d, &["ledger", "list", "--tree", "tree"]);
    let row: Vec<&str> = text
        .lines()
        .find(|l| l.starts_with("1 "))
        .expect("row 1")
        .split_whitespace()
        .collect();
    let short_sha = trust_sha.to_string()[..16].to_string();
    let short_key = signer.to_string()[..8].to_string();
    assert_eq!(
        row,
        [
            "1",
            time.as_str(),
            "trust_set",
            "-",
            "trust",
            "set",
            "1",
            short_sha.as_str(),
            short_key.as_str(),
            "-",
            "-"
        ]
    );
    let csv = ok(d, &["ledger", "list", "--tree", "tree", "--csv"]);
    assert_eq!(
        csv.lines().nth(2),
        Some(format!("1,{time},trust_set,,,,,,{signer},,1,{trust_sha},,").as_str())
    );

    // The feed may not pass the trust-set entry off as its release's entry, although that
    // entry really is in the tree head.
    let good = feed_bytes(d, "stable");
    let key = SigningKey::from_bytes(&tree_key_seed(d));
    let signed = SignedFeed::from_json(&good).expect("envelope");
    let mut forged = Feed::from_json(signed.feed.as_bytes()).expect("feed");
    let l = forged.ledger.as_mut().expect("ledger");
    l.entry = Some(String::from_utf8(trust_text).expect("utf-8"));
    l.inclusion = Some(ledger.inclusion_proof(at, after.tree_size).expect("proof"));
    let forged_text = forged.to_json();
    let signature = key.sign(&ampoule_verify::format::signed_bytes(
        ampoule_verify::format::context::FEED,
        forged_text.as_bytes(),
    ));
    let forged = SignedFeed {
        feed: forged_text,
        signatures: vec![ampoule_verify::signature::SignatureEntry {
            key_id: signer,
            signature: signature.to_bytes(),
        }],
    }
    .to_json();
    let err = device(d, "stable", None)
        .verify(&forged, Timestamp::now())
        .expect_err("a trust-set entry is not a publish");
    assert_eq!(
        err.to_string(),
        format!(
            "feed sequence 2 offers trailcam-species 1.0.0 (sha256 {}), but the ledger does not \
             log that as channel stable's current release: the ledger entry the feed carries \
             logs trust set version 1, not the feed's own change",
            sha(d, &v1)
        )
    );
    assert_eq!(err.kind(), ErrorKind::Proof);

    // A device that saw the first head follows the renewed feed through its consistency proof.
    let feed = device(d, "stable", Some(before))
        .verify_with_steps(
            &feed_bytes(d, "stable"),
            Timestamp::now(),
            &mut steps_from(d),
        )
        .expect("the renewed feed verifies with its ledger proof");
    assert_eq!(feed.feed().trust_set.as_ref().map(|t| t.version), Some(1));
    let (code, report) = check_run(d, &[]);
    assert_eq!(code, 0, "{report}");
    assert_eq!(problems(&report), Vec::<String>::new());

    // A crafted continuation, signed with the tree's key: version 3, then version 1 again
    // with other content.
    let mut ledger = Ledger::open(&d.join("tree/ledger")).expect("open");
    let crafted = |version: u64, content: &[u8]| TrustSetEntry {
        event: Event::TrustSet,
        trust_set_version: version,
        trust_set_digest: Digest::of(content),
        key_ids: vec![signer],
        time: after.time,
    };
    for entry in [crafted(3, b"set three"), crafted(1, b"another set one")] {
        ledger
            .append(&entry.to_bytes(), &[&key], after.time)
            .expect("append");
    }
    let (code, report) = check_run(d, &[]);
    assert_eq!(code, 1);
    let found = problems(&report);
    for expected in [
        format!(
            "entry 4: trust set version 1 is logged with sha256 {}, but entry 1 logged it with \
             sha256 {trust_sha}: a trust-set version was reused with different content",
            Digest::of(b"another set one")
        ),
        "entry 4: trust set version 1 follows version 3 (entry 3); trust-set versions went down"
            .to_string(),
    ] {
        assert!(found.contains(&expected), "{found:?}");
    }
}

/// The digest `sha256sum` (GNU coreutils) prints for a file, as an outside reference for the
/// digests the check names.
fn sha256sum(path: &Path) -> String {
    let out = Command::new("sha256sum")
        .arg(path)
        .output()
        .expect("sha256sum runs");
    assert!(out.status.success());
    String::from_utf8(out.stdout).expect("utf-8")[..64].to_string()
}

/// Each trust-set entry is held against the tree's `trust/<version>.json`: a file changed
/// after it was logged, or removed, is a problem the check names with both digests.
#[test]
fn check_compares_trust_set_entries_with_the_tree_files_issue_5() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    ok(d, &["trust", "init", "--key", "k.pub", "-o", "trust.json"]);
    ok(d, &["trust", "sign", "trust.json", "--key", "k.pem"]);
    ok(
        d,
        &[
            "publish",
            "--trust-set",
            "trust.json",
            "--tree",
            "tree",
            "--key",
            "k.pem",
        ],
    );
    let file = d.join("tree/trust/1.json");
    let logged = sha256sum(&file);
    let (code, report) = check_run(d, &[]);
    assert_eq!((code, problems(&report)), (0, Vec::<String>::new()));
    // Over HTTP the check fetches the trust-set files as well.
    let server = serve(d);
    let url = format!("http://{}/", server.addr);
    let over_http = || {
        let out = run(
            d,
            &[
                "--json", "ledger", "check", "--url", &url, "--trust", "k.pub",
            ],
        );
        let report: serde_json::Value = serde_json::from_slice(&out.stdout).expect("report");
        (out.status.code().unwrap_or(-1), problems(&report))
    };
    assert_eq!(over_http(), (0, Vec::<String>::new()));

    // One newline more: still JSON with the same keys, but not the file that was logged.
    let mut bytes = std::fs::read(&file).expect("trust/1.json");
    bytes.push(b'\n');
    std::fs::write(&file, &bytes).expect("tamper");
    let (code, report) = check_run(d, &[]);
    assert_eq!(code, 1);
    assert_eq!(
        problems(&report),
        [format!(
            "entry 1: trust set version 1 is logged with sha256 {logged}, but trust/1.json has \
             sha256 {}",
            sha256sum(&file)
        )]
    );
    assert_eq!(over_http(), (1, problems(&report)));

    std::fs::remove_file(&file).expect("delete");
    let (code, report) = check_run(d, &[]);
    assert_eq!(code, 1);
    assert_eq!(
        problems(&report),
        [format!(
            "entry 1: trust set version 1 is logged with sha256 {logged}, but trust/1.json is \
             missing from the tree"
        )]
    );
    assert_eq!(over_http(), (1, problems(&report)));
}

#[test]
fn issue12_ledger_list_shows_each_publishs_rollout_from_the_history_marked_as_such() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "25");
    // The same release again at a wider rollout: a renewal, logged as a second publish entry.
    publish(d, &v1, "stable", "100");
    ok(
        d,
        &[
            "withdraw",
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            "k.pem",
            "--version",
            "1.0.0",
        ],
    );
    let rollouts = |json: &serde_json::Value| -> Vec<serde_json::Value> {
        json["entries"]
            .as_array()
            .expect("entries")
            .iter()
            .map(|e| e["rollout_percent_from_history"].clone())
            .collect()
    };
    let listed: serde_json::Value =
        serde_json::from_str(&ok(d, &["--json", "ledger", "list", "--tree", "tree"]))
            .expect("list --json");
    assert_eq!(
        rollouts(&listed),
        [
            serde_json::json!(25),
            serde_json::json!(100),
            serde_json::Value::Null
        ]
    );
    assert_eq!(
        listed["rollout_source"],
        "history/ files of the tree, not covered by the ledger"
    );
    let text = ok(d, &["ledger", "list", "--tree", "tree"]);
    let last_cells: Vec<&str> = text
        .lines()
        .skip(1)
        .take(3)
        .map(|l| l.split_whitespace().last().unwrap_or_default())
        .collect();
    assert_eq!(last_cells, ["25%", "100%", "-"], "{text}");
    assert!(
        text.contains("* rollout: from the tree's history/ files, which the ledger does not cover"),
        "{text}"
    );
    let csv = ok(d, &["ledger", "list", "--tree", "tree", "--csv"]);
    // The rollout is the column before the deltas (issue 13), which are empty here.
    let last: Vec<&str> = csv
        .lines()
        .skip(1)
        .map(|l| l.rsplit(',').nth(1).unwrap_or_default())
        .collect();
    assert_eq!(last, ["25", "100", ""], "{csv}");
    // Over HTTP the histories are fetched for the listing too.
    let served = serve_tree(d, "tree");
    let url = format!("http://{}/", served.addr);
    let over_http: serde_json::Value =
        serde_json::from_str(&ok(d, &["--json", "ledger", "list", "--url", &url]))
            .expect("list --url --json");
    assert_eq!(rollouts(&over_http), rollouts(&listed));
}

/// A hostile server for a release tree (issue 10 item 6): `ledger/tree-head.json` is `head`,
/// and any other path answers 200 with `flood` bytes and no length. It serves at most 20
/// connections on 127.0.0.1 and records each request's path.
fn hostile_tree_server(
    head: Vec<u8>,
    flood: usize,
) -> (String, std::sync::Arc<std::sync::Mutex<Vec<String>>>) {
    use std::io::{Read, Write};
    let listener = std::net::TcpListener::bind("127.0.0.1:0").expect("bind");
    let url = format!("http://{}/", listener.local_addr().expect("addr"));
    let requests = std::sync::Arc::new(std::sync::Mutex::new(Vec::new()));
    let seen = std::sync::Arc::clone(&requests);
    std::thread::spawn(move || {
        for stream in listener.incoming().take(20) {
            let Ok(mut stream) = stream else { break };
            let _ = stream.set_read_timeout(Some(std::time::Duration::from_secs(5)));
            let mut request = Vec::new();
            let mut buf = [0u8; 1024];
            while !request.windows(4).any(|w| w == b"\r\n\r\n") {
                match stream.read(&mut buf) {
                    Ok(0) | Err(_) => break,
                    Ok(n) => request.extend_from_slice(&buf[..n]),
                }
            }
            let text = String::from_utf8_lossy(&request).into_owned();
            let path = text.split(' ').nth(1).unwrap_or_default().to_string();
            seen.lock().expect("requests").push(path.clone());
            if path.ends_with("/ledger/tree-head.json") {
                let _ = write!(
                    stream,
                    "HTTP/1.1 200 OK\r\nContent-Length: {}\r\nConnection: close\r\n\r\n",
                    head.len()
                );
                let _ = stream.write_all(&head);
            } else {
                let _ = stream.write_all(b"HTTP/1.1 200 OK\r\nConnection: close\r\n\r\n");
                let chunk = vec![b'x'; 64 * 1024];
                let mut left = flood;
                while left > 0 {
                    let n = left.min(chunk.len());
                    if stream.write_all(&chunk[..n]).is_err() {
                        break;
                    }
                    left -= n;
                }
            }
        }
    });
    (url, requests)
}

/// The tree's genuine head with its size raised to 2^40 entries: what a hostile server sends
/// to make an auditor download without end. Its signature no longer verifies.
fn inflated_head(d: &Path) -> Vec<u8> {
    let mut head: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("tree/ledger/tree-head.json")).expect("head"))
            .expect("head JSON");
    let at = if head.pointer("/tree_head/tree_size").is_some() {
        "/tree_head/tree_size"
    } else {
        "/tree_size"
    };
    let size = head.pointer_mut(at).expect("the head has a tree_size");
    *size = serde_json::json!(1u64 << 40);
    let bytes = serde_json::to_vec(&head).expect("JSON");
    assert!(
        SignedTreeHead::from_json(&bytes).is_ok(),
        "still a well-formed head"
    );
    bytes
}

#[test]
fn issue10_ledger_list_and_check_verify_the_served_tree_head_before_sizing_anything() {
    let dir = setup();
    let d = dir.path();
    four_changes(d);
    let (url, requests) = hostile_tree_server(inflated_head(d), 4 << 20);
    let head_url = format!("{url}ledger/tree-head.json");
    for command in ["list", "check"] {
        requests.lock().expect("requests").clear();
        let out = run(
            d,
            &[
                "--json", "ledger", command, "--url", &url, "--trust", "k.pub",
            ],
        );
        let doc: serde_json::Value = serde_json::from_slice(&out.stdout).expect("JSON error");
        assert_eq!(out.status.code(), Some(1), "ledger {command}: {doc}");
        assert_eq!(doc["kind"], "signature", "ledger {command}: {doc}");
        let key = keys(d).iter().next().expect("a key").id();
        assert_eq!(
            doc["error"],
            format!(
                "the tree head at {head_url} is refused, and nothing was sized from it or \
                 downloaded after it: tree head of size 1099511627776 has no valid signature \
                 by a trusted key (not matching this document: {key})"
            ),
            "ledger {command}"
        );
        assert_eq!(
            *requests.lock().expect("requests"),
            vec!["/ledger/tree-head.json".to_string()],
            "ledger {command} asked for nothing after the refused head"
        );
    }
}

#[test]
fn issue10_ledger_list_without_trust_reads_at_most_max_bytes_and_says_it_is_unauthenticated() {
    let dir = setup();
    let d = dir.path();
    four_changes(d);
    let (url, requests) = hostile_tree_server(inflated_head(d), 4 << 20);
    let out = run(
        d,
        &[
            "--json",
            "ledger",
            "list",
            "--url",
            &url,
            "--max-bytes",
            "1048576",
        ],
    );
    let doc: serde_json::Value = serde_json::from_slice(&out.stdout).expect("JSON error");
    assert_eq!(out.status.code(), Some(1), "{doc}");
    assert_eq!(doc["kind"], "too_large");
    let head_len = inflated_head(d).len();
    assert_eq!(
        doc["error"],
        format!(
            "stopped after 1048576 bytes from {url} (--max-bytes): its tree head is not \
             verified, so it cannot size the downloads; give --trust or --trust-set, or a \
             larger --max-bytes: {url}ledger/entries.jsonl is over the limit of {} bytes; \
             stopped reading",
            1_048_576 - head_len
        )
    );
    assert_eq!(
        *requests.lock().expect("requests"),
        vec![
            "/ledger/tree-head.json".to_string(),
            "/ledger/entries.jsonl".to_string()
        ]
    );
    // The default budget is 256 MiB, as the help says.
    let help = ok(d, &["ledger", "list", "--help"]);
    assert!(help.contains("[default: 268435456]"), "{help}");
}

#[test]
fn issue10_ledger_list_says_whether_the_listing_is_authenticated() {
    let dir = setup();
    let d = dir.path();
    four_changes(d);
    let served = serve(d);
    let url = format!("http://{}/", served.addr);
    let key = keys(d).iter().next().expect("a key").id().to_string();
    for source in [["--tree", "tree"], ["--url", url.as_str()]] {
        let plain = json(d, &["ledger", "list", source[0], source[1]]);
        assert_eq!(plain["authenticated"], false);
        assert_eq!(plain["tree_head_signed_by"], serde_json::Value::Null);
        let text = ok(d, &["ledger", "list", source[0], source[1]]);
        assert!(
            text.ends_with(
                "unauthenticated: no --trust or --trust-set was given, so neither the tree head \
                 nor the entries were checked\n"
            ),
            "{text}"
        );
        let checked = json(
            d,
            &["ledger", "list", source[0], source[1], "--trust", "k.pub"],
        );
        assert_eq!(checked["authenticated"], true);
        assert_eq!(checked["tree_head_signed_by"], serde_json::json!([key]));
        assert_eq!(checked["entries"], plain["entries"]);
        let text = ok(
            d,
            &["ledger", "list", source[0], source[1], "--trust", "k.pub"],
        );
        assert!(
            text.ends_with(&format!(
                "authenticated: the entries hash to the root of the tree head, signed by {key} \
                 (the history's consistency: run ledger check)\n"
            )),
            "{text}"
        );
    }
    // An entry changed in place: the signed head no longer covers the listing.
    let entries = d.join("tree/ledger/entries.jsonl");
    let text = std::fs::read_to_string(&entries).expect("entries");
    std::fs::write(&entries, text.replacen("stable", "stabld", 1)).expect("tamper");
    let (code, err) = refused(d, &["ledger", "list", "--tree", "tree", "--trust", "k.pub"]);
    assert_eq!(code, 1);
    assert!(
        err.starts_with("ampoule: error: the ledger's 4 entries hash to root "),
        "{err}"
    );
    assert!(
        err.ends_with(": the entries are not the ones the head signed (run ledger check)"),
        "{err}"
    );
}
