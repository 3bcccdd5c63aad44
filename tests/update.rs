//! `ampoule update` end to end (issue 3): the real binary updates a store from a release tree
//! that this test serves with the in-process server on 127.0.0.1. Fresh install, up to date,
//! rollout, withdrawn channel, replayed feed, tampered bundle, exit codes and --json.

use std::path::Path;
use std::process::{Command, Output};

use ampoule::release::serve::Server;
use ampoule_verify::feed::{SignedFeed, rollout_bucket};
use ampoule_verify::{Digest, in_rollout};

mod tree_common;
use tree_common::*;

fn serve(d: &Path) -> Server {
    Server::start(d.join("tree"), "127.0.0.1:0".parse().expect("addr")).expect("server starts")
}

fn feed_url(server: &Server) -> String {
    server.url("feeds/stable.json")
}

/// Runs `ampoule update` for the store `cam` with the test key and app 2.3.0.
fn update(d: &Path, server: &Server, extra: &[&str]) -> Output {
    let url = feed_url(server);
    let mut args = vec![
        "update",
        "--store",
        "cam",
        "--feed",
        url.as_str(),
        "--trust",
        "k.pub",
        "--app-version",
        "2.3.0",
    ];
    args.extend_from_slice(extra);
    Command::new(BIN)
        .args(&args)
        .current_dir(d)
        .output()
        .expect("the ampoule binary runs")
}

fn stdout(out: &Output) -> String {
    String::from_utf8_lossy(&out.stdout).trim_end().to_string()
}

fn stderr(out: &Output) -> String {
    String::from_utf8_lossy(&out.stderr).trim_end().to_string()
}

fn succeeded(out: &Output) -> String {
    assert_eq!(out.status.code(), Some(0), "{}", stderr(out));
    stdout(out)
}

fn state(d: &Path) -> serde_json::Value {
    serde_json::from_slice(&std::fs::read(d.join("cam/state.json")).expect("state.json"))
        .expect("state.json is JSON")
}

fn withdraw(d: &Path) {
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
}

/// SHA-256 of a file by Python's hashlib (an implementation independent of ours), or `None`
/// with the reason printed when python3 is missing.
fn python_sha256(path: &Path) -> Option<String> {
    let out = Command::new("python3")
        .args([
            "-c",
            "import hashlib,sys; print(hashlib.sha256(open(sys.argv[1],'rb').read()).hexdigest())",
        ])
        .arg(path)
        .output();
    match out {
        Ok(out) if out.status.success() => {
            Some(String::from_utf8_lossy(&out.stdout).trim().to_string())
        }
        _ => {
            eprintln!("skipped: python3 is not available; digest not cross-checked");
            None
        }
    }
}

fn bundle_digest(d: &Path, bundle: &str) -> Digest {
    Digest::of(&std::fs::read(d.join(bundle)).expect("bundle"))
}

#[test]
fn a_fresh_store_installs_then_is_up_to_date_then_updates_issue_3() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let server = serve(d);

    let text = succeeded(&update(d, &server, &[]));
    let state1 = state(d);
    let release = state1["current"]["release"].as_str().expect("release");
    assert_eq!(
        text,
        format!(
            "installed trailcam-species 1.0.0 from channel stable (feed sequence 1): 6 labels, \
             model at cam/releases/{release}/model.bin"
        )
    );
    assert_eq!(
        std::fs::read(d.join(format!("cam/releases/{release}/model.bin"))).expect("model"),
        std::fs::read(d.join("model-1.0.0-0.bin")).expect("packed model"),
    );
    // The store keeps the digest of the signed feed text: compare with Python's hashlib over
    // the `feed` string of the envelope the tree serves.
    let envelope = std::fs::read(d.join("tree/feeds/stable.json")).expect("feed");
    let signed = SignedFeed::from_json(&envelope).expect("envelope");
    std::fs::write(d.join("feed-text"), signed.feed.as_bytes()).expect("feed text");
    if let Some(expected) = python_sha256(&d.join("feed-text")) {
        assert_eq!(state1["channels"]["stable"]["feed_sha256"], expected);
    }
    assert_eq!(state1["channels"]["stable"]["highest_sequence"], 1);
    // Downloads are removed once installed; the device id was made once, 128 random bits.
    let downloads: Vec<_> = std::fs::read_dir(d.join("cam/downloads"))
        .expect("downloads")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    assert_eq!(downloads, ["lock"]);
    let id = std::fs::read_to_string(d.join("cam/device-id")).expect("device id");
    assert!(
        id.len() == 33 && id.ends_with('\n') && id[..32].bytes().all(|b| b.is_ascii_hexdigit()),
        "{id:?}"
    );

    assert_eq!(
        succeeded(&update(d, &server, &[])),
        "up to date: channel stable offers trailcam-species 1.0.0 (feed sequence 1); keeping \
         trailcam-species 1.0.0"
    );
    assert_eq!(
        state(d),
        state1,
        "polling the same feed again writes nothing"
    );
    assert_eq!(
        std::fs::read_to_string(d.join("cam/device-id")).expect("device id"),
        id,
        "the device id stays"
    );

    let v2 = pack(d, "1.1.0", 0, "k.pem");
    publish(d, &v2, "stable", "100");
    let text = succeeded(&update(d, &server, &[]));
    assert!(
        text.starts_with(
            "updated trailcam-species 1.0.0 -> 1.1.0 from channel stable (feed sequence 2): 6 labels, model at cam/releases/trailcam-species-1.1.0-"
        ),
        "{text}"
    );
    let state2 = state(d);
    assert_eq!(state2["current"]["version"], "1.1.0");
    assert_eq!(state2["previous"]["version"], "1.0.0");
    assert_eq!(state2["channels"]["stable"]["highest_sequence"], 2);

    // A third release: the store keeps the current and the previous one, nothing older.
    let v3 = pack(d, "1.2.0", 0, "k.pem");
    publish(d, &v3, "stable", "100");
    succeeded(&update(d, &server, &[]));
    let state3 = state(d);
    let mut kept: Vec<String> = std::fs::read_dir(d.join("cam/releases"))
        .expect("releases")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    kept.sort();
    let mut expected = vec![
        state3["current"]["release"]
            .as_str()
            .expect("current")
            .to_string(),
        state3["previous"]["release"]
            .as_str()
            .expect("previous")
            .to_string(),
    ];
    expected.sort();
    assert_eq!(kept, expected);
    assert_eq!(state3["previous"]["version"], "1.1.0");
}

#[test]
fn rollout_places_devices_by_id_issue_3() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "50");
    let digest = bundle_digest(d, &v1);
    let ids: Vec<String> = (0..200).map(|n| format!("camera-{n:04}")).collect();
    let inside = ids
        .iter()
        .find(|id| in_rollout(id, &digest, 50))
        .expect("an id inside");
    let outside = ids
        .iter()
        .find(|id| !in_rollout(id, &digest, 50))
        .expect("an id outside");
    // The bucket formula (crate::feed::rollout_bucket), recomputed with Python's hashlib:
    // SHA-256(domain || u32 BE length || id || bundle digest), first 8 bytes BE, mod 10000.
    let bucket = rollout_bucket(outside, &digest);
    let script = "import hashlib,struct,sys; i=sys.argv[1].encode(); \
                  h=hashlib.sha256(b'ampoule-rollout-v1\\n'+struct.pack('>I',len(i))+i+bytes.fromhex(sys.argv[2])).digest(); \
                  print(int.from_bytes(h[:8],'big')%10000)";
    match Command::new("python3")
        .args(["-c", script, outside, &digest.to_hex()])
        .output()
    {
        Ok(out) if out.status.success() => {
            assert_eq!(
                String::from_utf8_lossy(&out.stdout).trim(),
                bucket.to_string()
            );
        }
        _ => eprintln!("skipped: python3 is not available; bucket not cross-checked"),
    }
    let server = serve(d);

    assert_eq!(
        succeeded(&update(d, &server, &["--device-id", outside])),
        format!(
            "not in the rollout yet: channel stable offers trailcam-species 1.0.0 to 50% of \
             devices, and device {outside} is in bucket {bucket} of 10000 (feed sequence 1); \
             nothing installed yet"
        )
    );
    // Even without an install, the feed's sequence is recorded.
    let s = state(d);
    assert_eq!(s["channels"]["stable"]["highest_sequence"], 1);
    assert_eq!(
        s["channels"]["stable"]["highest_version"],
        serde_json::Value::Null
    );
    assert_eq!(s["current"], serde_json::Value::Null);

    let text = succeeded(&update(d, &server, &["--device-id", inside]));
    assert!(
        text.starts_with("installed trailcam-species 1.0.0 from channel stable (feed sequence 1)"),
        "{text}"
    );

    // --json: the bucket and the offered release.
    std::fs::remove_dir_all(d.join("cam")).expect("fresh store");
    let out = update(d, &server, &["--device-id", outside, "--json"]);
    let doc: serde_json::Value = serde_json::from_str(&succeeded(&out)).expect("JSON");
    assert_eq!(doc["ok"], true);
    assert_eq!(doc["outcome"], "not_in_rollout");
    assert_eq!(doc["bucket"], u64::from(bucket));
    assert_eq!(doc["device_id"], outside.as_str());
    assert_eq!(doc["offered"]["version"], "1.0.0");
    assert_eq!(doc["offered"]["rollout_percent"], 50);
    assert_eq!(doc["offered"]["sha256"], digest.to_hex());
    assert_eq!(doc["current"], serde_json::Value::Null);
}

#[test]
fn a_withdrawn_channel_keeps_the_current_model_issue_3() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let server = serve(d);
    succeeded(&update(d, &server, &[]));
    withdraw(d);
    assert_eq!(
        succeeded(&update(d, &server, &[])),
        "channel stable offers nothing: every release on it was withdrawn (feed sequence 2); \
         keeping trailcam-species 1.0.0"
    );
    let s = state(d);
    assert_eq!(s["current"]["version"], "1.0.0");
    assert_eq!(s["channels"]["stable"]["highest_sequence"], 2);
    let release = s["current"]["release"].as_str().expect("release");
    assert!(
        d.join(format!("cam/releases/{release}/model.bin"))
            .is_file()
    );

    let out = update(d, &server, &["--json"]);
    let doc: serde_json::Value = serde_json::from_str(&succeeded(&out)).expect("JSON");
    assert_eq!(doc["outcome"], "nothing_current");
    assert_eq!(doc["offered"], serde_json::Value::Null);
    assert_eq!(doc["current"]["version"], "1.0.0");
}

#[test]
fn a_replayed_older_feed_is_refused_even_after_no_install_issue_3() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let old_feed = std::fs::read(d.join("tree/feeds/stable.json")).expect("feed 1");
    let server = serve(d);
    succeeded(&update(d, &server, &[]));
    // Sequence 2 offers 1.1.0 to nobody: the device installs nothing but remembers 2.
    let v2 = pack(d, "1.1.0", 0, "k.pem");
    publish(d, &v2, "stable", "0");
    let text = succeeded(&update(d, &server, &[]));
    assert!(text.starts_with("not in the rollout yet"), "{text}");
    // Someone serves the validly signed feed of sequence 1 again.
    std::fs::write(d.join("tree/feeds/stable.json"), &old_feed).expect("replay");
    let out = update(d, &server, &[]);
    assert_eq!(out.status.code(), Some(1), "{}", stderr(&out));
    assert_eq!(
        stderr(&out),
        "ampoule: error: feed sequence 1 is lower than 2, the last one this device accepted; \
         refusing a replayed older feed"
    );
    let out = update(d, &server, &["--json"]);
    assert_eq!(out.status.code(), Some(1));
    let doc: serde_json::Value = serde_json::from_str(&stdout(&out)).expect("JSON error");
    assert_eq!(doc["ok"], false);
    assert_eq!(doc["exit_code"], 1);
    assert_eq!(doc["kind"], "stale");
    assert_eq!(state(d)["channels"]["stable"]["highest_sequence"], 2);
}

#[test]
fn a_tampered_bundle_on_the_server_is_refused_and_the_model_kept_issue_3() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let server = serve(d);
    succeeded(&update(d, &server, &[]));
    let before = state(d);

    let v2 = pack(d, "1.1.0", 0, "k.pem");
    publish(d, &v2, "stable", "100");
    let digest = bundle_digest(d, &v2);
    let served = d.join(format!("tree/bundles/{digest}.ampoule"));
    let mut bytes = std::fs::read(&served).expect("served bundle");
    let at = bytes.len() - 2000;
    bytes[at] ^= 0x01;
    std::fs::write(&served, &bytes).expect("tamper");
    let found = python_sha256(&served).unwrap_or_else(|| Digest::of(&bytes).to_hex());

    let out = update(d, &server, &[]);
    assert_eq!(out.status.code(), Some(1), "{}", stderr(&out));
    assert_eq!(
        stderr(&out),
        format!(
            "ampoule: error: file downloaded from http://{}/bundles/{digest}.ampoule has SHA-256 \
             {found}, but the feed declares {digest}; the partial file was discarded",
            server.addr()
        )
    );
    assert_eq!(state(d), before, "the store is unchanged");
    let partial = d.join(format!("cam/downloads/{digest}.ampoule.partial"));
    assert_eq!(
        std::fs::metadata(&partial).map(|m| m.len()).unwrap_or(0),
        0,
        "no bytes of the tampered file are kept for resuming"
    );
}

#[test]
fn issue10_a_server_that_sends_more_than_the_feed_declares_is_a_network_fault() {
    // Issue 10 item 9: the feed and bundle are genuine; the server is what is wrong, so the
    // device says "try again later" (exit 2, kind network), not "refused" (exit 1).
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let digest = bundle_digest(d, &v1);
    let served = d.join(format!("tree/bundles/{digest}.ampoule"));
    let size = std::fs::metadata(&served).expect("served bundle").len();
    let mut bytes = std::fs::read(&served).expect("served bundle");
    bytes.extend_from_slice(&[0u8; 4096]);
    std::fs::write(&served, &bytes).expect("grow the served file");
    let server = serve(d);
    let out = update(d, &server, &[]);
    assert_eq!(out.status.code(), Some(2), "{}", stderr(&out));
    let expected = format!(
        "server declares {} bytes for http://{}/bundles/{digest}.ampoule, but {size} of the \
         {size} bytes the feed signed were expected",
        size + 4096,
        server.addr()
    );
    assert_eq!(stderr(&out), format!("ampoule: error: {expected}"));
    let out = update(d, &server, &["--json"]);
    assert_eq!(out.status.code(), Some(2));
    let doc: serde_json::Value = serde_json::from_str(&stdout(&out)).expect("JSON error");
    assert_eq!(
        (&doc["ok"], &doc["exit_code"], &doc["kind"], &doc["error"]),
        (
            &serde_json::json!(false),
            &serde_json::json!(2),
            &serde_json::json!("network"),
            &serde_json::json!(expected)
        )
    );
    let installed = std::fs::read(d.join("cam/state.json"))
        .ok()
        .and_then(|b| serde_json::from_slice::<serde_json::Value>(&b).ok())
        .map(|s| s["current"].clone());
    assert!(
        installed.is_none_or(|c| c.is_null()),
        "nothing was installed"
    );
}

#[test]
fn exit_codes_for_refusals_and_network_and_usage_issue_3() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let server = serve(d);

    // Usage errors (2): no channel in the URL, a bad device id, a bad app version.
    let (code, err) = refused(
        d,
        &[
            "update",
            "--store",
            "cam",
            "--feed",
            &server.url("latest"),
            "--trust",
            "k.pub",
            "--app-version",
            "2.3.0",
        ],
    );
    assert_eq!(code, 2);
    assert_eq!(
        err,
        format!(
            "ampoule: error: cannot tell the channel from --feed '{}' (it does not end in \
             /<channel>.json); give --channel",
            server.url("latest")
        )
    );
    let out = update(d, &server, &["--device-id", "camera 7"]);
    assert_eq!(out.status.code(), Some(2));
    assert_eq!(
        stderr(&out),
        "ampoule: error: device id 'camera 7' is not usable: use 1 to 128 printable ASCII \
         characters without spaces"
    );
    assert!(!d.join("cam").exists(), "usage errors touch no store");

    // A feed signed by a key the device does not trust: refused (1).
    ok(
        d,
        &["keygen", "--secret", "other.pem", "--public", "other.pub"],
    );
    let url = feed_url(&server);
    let args = [
        "update",
        "--store",
        "cam",
        "--feed",
        url.as_str(),
        "--trust",
        "other.pub",
        "--app-version",
        "2.3.0",
    ];
    let (code, err) = refused(d, &args);
    assert_eq!(code, 1);
    assert!(
        err.starts_with("ampoule: error: feed has no valid signature by a trusted key"),
        "{err}"
    );

    // A device following another channel than the feed's: refused (1).
    let out = update(d, &server, &["--channel", "beta"]);
    assert_eq!(out.status.code(), Some(1));
    assert_eq!(
        stderr(&out),
        "ampoule: error: feed is for channel 'stable' but this device follows channel 'beta'"
    );

    // Nothing listens: a network error (2); trying later may work.
    let closed = {
        let listener = std::net::TcpListener::bind("127.0.0.1:0").expect("bind");
        listener.local_addr().expect("addr")
    };
    let dead = format!("http://{closed}/feeds/stable.json");
    let (code, err) = refused(
        d,
        &[
            "update",
            "--store",
            "cam",
            "--feed",
            &dead,
            "--trust",
            "k.pub",
            "--app-version",
            "2.3.0",
        ],
    );
    assert_eq!(code, 2);
    assert!(
        err.starts_with(&format!("ampoule: error: cannot reach {dead}: ")),
        "{err}"
    );

    // Another updater holds the store: fail at once (2), change nothing.
    succeeded(&update(d, &server, &[]));
    let before = state(d);
    let lock = std::fs::File::options()
        .write(true)
        .open(d.join("cam/downloads/lock"))
        .expect("lock file");
    lock.try_lock().expect("the test takes the lock");
    let out = update(d, &server, &[]);
    assert_eq!(out.status.code(), Some(2));
    assert_eq!(
        stderr(&out),
        "ampoule: error: another update is running on store cam; try again when it has finished"
    );
    drop(lock);
    assert_eq!(state(d), before);
    succeeded(&update(d, &server, &[]));
}

#[test]
fn json_reports_an_update_issue_3() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let server = serve(d);
    let out = update(d, &server, &["--json", "--device-id", "camera-0042"]);
    let doc: serde_json::Value = serde_json::from_str(&succeeded(&out)).expect("JSON");
    assert_eq!(doc["ok"], true);
    assert_eq!(doc["outcome"], "updated");
    assert_eq!(doc["channel"], "stable");
    assert_eq!(doc["sequence"], 1);
    assert_eq!(doc["device_id"], "camera-0042");
    assert_eq!(doc["current"]["version"], "1.0.0");
    assert_eq!(doc["current"]["name"], "trailcam-species");
    assert_eq!(doc["replaced"], serde_json::Value::Null);
    assert_eq!(doc["offered"]["sha256"], bundle_digest(d, &v1).to_hex());
    assert!(
        Path::new(doc["model"].as_str().expect("model")).starts_with("cam/releases"),
        "{doc}"
    );
    assert!(
        !d.join("cam/device-id").exists(),
        "--device-id stores no id"
    );
    server.shutdown().expect("server stops");
}

/// A feed stripped of its ledger proof (what a thief with the feed key serves for a bundle
/// never published) is refused; only the clearly named opt-out accepts it (issue 4 through
/// `update`). A normal update remembers the ledger's tree head in the store.
#[test]
fn update_requires_the_ledger_proof_issue_4() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let feed_path = d.join("tree/feeds/stable.json");
    let signed = SignedFeed::from_json(&std::fs::read(&feed_path).expect("feed")).expect("feed");
    let mut feed: serde_json::Value = serde_json::from_str(&signed.feed).expect("feed text");
    feed.as_object_mut().expect("object").remove("ledger");
    let text = serde_json::to_string(&feed).expect("feed text");
    let stripped = signed_feed_file(d, "k.pem", text);
    std::fs::write(&feed_path, stripped.to_json()).expect("stripped feed");
    let server = serve(d);
    let out = update(d, &server, &[]);
    assert_eq!(out.status.code(), Some(1), "{}", stderr(&out));
    let sha = bundle_digest(d, &v1);
    assert_eq!(
        stderr(&out),
        format!(
            "ampoule: error: feed sequence 1 offers trailcam-species 1.0.0 (sha256 {sha}), but \
             the ledger does not log that as channel stable's current release: the feed carries \
             no ledger proof, and this device requires one"
        )
    );
    assert!(!d.join("cam/releases").exists() || state(d)["current"].is_null());

    let text = succeeded(&update(d, &server, &["--dangerous-skip-ledger"]));
    assert!(
        text.starts_with("installed trailcam-species 1.0.0"),
        "{text}"
    );

    // A device on a normal tree remembers the ledger's tree head.
    publish(d, &pack(d, "1.1.0", 1, "k.pem"), "stable", "100");
    succeeded(&update(d, &server, &[]));
    assert_eq!(state(d)["tree_head"]["tree_size"], 2);
}

fn store_cmd(d: &Path, sub: &str, json: bool) -> Output {
    let mut args = vec![];
    if json {
        args.push("--json");
    }
    args.extend([
        "store",
        sub,
        "--store",
        "cam",
        "--trust",
        "k.pub",
        "--app-version",
        "2.3.0",
    ]);
    Command::new(BIN)
        .args(&args)
        .current_dir(d)
        .output()
        .expect("the ampoule binary runs")
}

/// `ampoule store status|rollback|gc`: the store from the command line, for scripts (the
/// library's Store::open_current, rollback and gc).
#[test]
fn store_status_rollback_and_gc_issue_3() {
    let dir = setup();
    let d = dir.path();
    let server = serve(d);
    publish(d, &pack(d, "1.0.0", 0, "k.pem"), "stable", "100");
    succeeded(&update(d, &server, &[]));
    publish(d, &pack(d, "1.1.0", 1, "k.pem"), "stable", "100");
    succeeded(&update(d, &server, &[]));

    let text = succeeded(&store_cmd(d, "status", false));
    assert!(
        text.starts_with("current  trailcam-species 1.1.0 (6 labels; model "),
        "{text}"
    );
    assert!(
        text.contains("\nprevious 1.0.0\nhighest  1.1.0 (never lowered"),
        "{text}"
    );
    assert!(
        text.contains("\nchannel  stable: feed sequence 2\n"),
        "{text}"
    );

    assert_eq!(
        succeeded(&store_cmd(d, "rollback", false)),
        "rolled back from 1.1.0 to trailcam-species 1.0.0; 1.1.0 stays refused, and so is \
         anything not newer than it"
    );
    let doc: serde_json::Value =
        serde_json::from_str(&succeeded(&store_cmd(d, "status", true))).expect("JSON");
    assert_eq!(doc["current"]["version"], "1.0.0");
    assert_eq!(doc["highest_version"], "1.1.0");
    assert!(doc["previous"].is_null());

    let text = succeeded(&store_cmd(d, "gc", false));
    assert!(
        text.starts_with("removed ") && text.contains("trailcam-species-1.1.0-"),
        "{text}"
    );
    assert_eq!(
        succeeded(&store_cmd(d, "gc", false)),
        "nothing to remove: the store holds only its current and previous releases"
    );

    // Nothing left to roll back to: refused with the store's reason, nothing changed.
    let out = store_cmd(d, "rollback", false);
    assert_ne!(out.status.code(), Some(0));
    assert!(
        stderr(&out).starts_with("ampoule: error: "),
        "{}",
        stderr(&out)
    );
    assert_eq!(state(d)["current"]["version"], "1.0.0");

    // A tampered model is found before an app would load it.
    let model = d.join(doc["current"]["model"].as_str().expect("model path"));
    let mut bytes = std::fs::read(&model).expect("model");
    bytes[10] ^= 1;
    std::fs::write(&model, bytes).expect("tamper");
    let out = store_cmd(d, "status", false);
    assert_eq!(out.status.code(), Some(1), "{}", stderr(&out));
    assert!(
        stderr(&out).contains("digest mismatch for 'model.bin'"),
        "{}",
        stderr(&out)
    );
}

/// `update` with separate release and feed keys (issue 12 item 1): each key is trusted for its
/// own role only.
#[test]
fn issue12_update_trusts_the_release_key_for_bundles_and_the_feed_key_for_feeds() {
    let dir = setup();
    let d = dir.path();
    ok(d, &["keygen", "--secret", "r.pem", "--public", "r.pub"]);
    let bundle = pack(d, "1.0.0", 0, "r.pem");
    ok(
        d,
        &[
            "publish",
            &bundle,
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            "k.pem",
            "--trust",
            "r.pub",
        ],
    );
    let server = serve(d);
    let url = feed_url(&server);
    let run = |store: &str, keys: &[&str]| {
        let mut args = vec!["update", "--store", store, "--feed", url.as_str()];
        args.extend_from_slice(keys);
        args.extend_from_slice(&["--app-version", "2.3.0"]);
        Command::new(BIN)
            .args(&args)
            .current_dir(d)
            .output()
            .expect("the ampoule binary runs")
    };
    let only_feed = run("cam-1", &["--trust-feed", "k.pub"]);
    assert_eq!(
        (only_feed.status.code(), stderr(&only_feed)),
        (
            Some(2),
            "ampoule: error: no key is trusted for bundles; give --trust-bundle RELEASE.pem and \
             --trust-feed FEED.pem (or --trust for a key that signs both, or --trust-set)"
                .to_string()
        )
    );
    // The roles swapped: the feed is signed by a key trusted only for bundles.
    let swapped = run(
        "cam-2",
        &["--trust-bundle", "k.pub", "--trust-feed", "r.pub"],
    );
    assert_eq!(swapped.status.code(), Some(1), "{}", stderr(&swapped));
    let installed = succeeded(&run(
        "cam-3",
        &["--trust-bundle", "r.pub", "--trust-feed", "k.pub"],
    ));
    assert!(
        installed.starts_with(
            "installed trailcam-species 1.0.0 from channel stable (feed sequence 1): 6 labels"
        ),
        "{installed}"
    );
}

/// Issue 10 items 3 and 5, with separate `ampoule update` processes and the bytes the server
/// sent: a feed (signed with the feed key alone) that states a size far above the bundle's
/// costs the bundle's head once, and nothing more on the next poll, until the app changes.
#[test]
fn issue10_separate_updates_download_a_refused_bundles_head_once() {
    let dir = setup();
    let d = dir.path();
    let (real, claimed) = publish_with_overstated_size(d);
    let feed_len = std::fs::metadata(d.join("tree/feeds/stable.json"))
        .expect("feed")
        .len();
    let server = serve(d);
    let head = ampoule_verify::format::limit::HEAD_BYTES;

    let out = update(d, &server, &["--max-size", "104857600"]);
    assert_eq!(out.status.code(), Some(1), "{}", stderr(&out));
    assert_eq!(
        stderr(&out),
        format!(
            "ampoule: error: feed offers trailcam-species 1.0.0 as {claimed} bytes, but its \
             signed manifest makes the bundle {real} bytes; refusing it before its payload is \
             downloaded"
        )
    );
    assert_eq!(
        server.bytes_served(),
        feed_len + head,
        "the feed and the head alone"
    );

    let out = update(d, &server, &["--max-size", "104857600"]);
    assert_eq!(out.status.code(), Some(1), "{}", stderr(&out));
    assert!(stderr(&out).contains("remembered"), "{}", stderr(&out));
    assert_eq!(
        server.bytes_served(),
        2 * feed_len + head,
        "the second poll fetched the feed and nothing of the bundle"
    );

    // Another app version is worth another look: the head once more.
    let out = Command::new(BIN)
        .args([
            "update",
            "--store",
            "cam",
            "--feed",
            &feed_url(&server),
            "--trust",
            "k.pub",
            "--app-version",
            "2.4.0",
            "--max-size",
            "104857600",
        ])
        .current_dir(d)
        .output()
        .expect("the ampoule binary runs");
    assert_eq!(out.status.code(), Some(1), "{}", stderr(&out));
    assert_eq!(server.bytes_served(), 3 * feed_len + 2 * head);
}
