//! Delivery end to end with the real binary: publish and withdraw on a release tree, the demo
//! server's GET, HEAD and Range answers, and a device's update check against that server.

use std::io::{Read, Write};
use std::net::TcpStream;
use std::path::{Path, PathBuf};

use ampoule_verify::fetch::{Transfer, Update, Updater, download};
use ampoule_verify::{Digest, FeedVerifier, Timestamp, Verifier};
use semver::Version;

mod tree_common;
use tree_common::*;

fn files_under(root: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let mut stack = vec![root.to_path_buf()];
    while let Some(dir) = stack.pop() {
        for entry in std::fs::read_dir(&dir).expect("read_dir") {
            let path = entry.expect("entry").path();
            if path.is_dir() {
                stack.push(path);
            } else {
                out.push(path);
            }
        }
    }
    out.sort();
    out
}

fn sha256_file(path: &Path) -> Digest {
    Digest::of(&std::fs::read(path).expect("file"))
}

#[test]
fn publish_writes_a_verifiable_feed_and_content_addressed_bundle() {
    let dir = setup();
    let d = dir.path();
    let bundle = pack(d, "1.0.0", 0, "k.pem");
    let out = publish(d, &bundle, "stable", "25");
    assert_eq!(out["sequence"], 1);
    assert_eq!(out["release"]["rollout_percent"], 25);
    let feed = read_feed(d, "stable");
    let release = feed.release.expect("a current release");
    let digest = sha256_file(&d.join(&bundle));
    assert_eq!(release.sha256, digest);
    assert_eq!(
        release.size,
        std::fs::metadata(d.join(&bundle)).expect("meta").len()
    );
    assert_eq!(release.path, format!("../bundles/{digest}.ampoule"));
    assert_eq!(
        (release.name.as_str(), release.version.to_string().as_str()),
        ("trailcam-species", "1.0.0")
    );
    assert_eq!(release.requires_app.to_string(), ">=2.0.0, <3.0.0");
    assert_eq!(
        sha256_file(&d.join(format!("tree/bundles/{digest}.ampoule"))),
        digest
    );
    assert!(
        feed.expires.unix() - feed.issued.unix() == 7 * 86_400,
        "default expiry is 7 days"
    );
    // Atomic writes leave no temporary file behind.
    let names: Vec<String> = files_under(&d.join("tree"))
        .iter()
        .map(|p| {
            p.strip_prefix(d.join("tree"))
                .expect("inside")
                .display()
                .to_string()
        })
        .collect();
    assert_eq!(
        names,
        [
            ".lock".to_string(),
            format!("bundles/{digest}.ampoule"),
            "feeds/stable.json".into(),
            "history/stable.json".into(),
            "index.json".into(),
            // The audit ledger (issue 4); the first append has no consistency step to write.
            "ledger/entries.idx".into(),
            "ledger/entries.jsonl".into(),
            "ledger/hashes/level-00.bin".into(),
            "ledger/lock".into(),
            "ledger/tree-head.json".into(),
            "ledger/tree-heads.jsonl".into(),
        ]
    );
}

#[test]
fn sequence_grows_and_withdraw_falls_back() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let v2 = pack(d, "1.1.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    publish(d, &v2, "stable", "10");
    let feed = read_feed(d, "stable");
    assert_eq!(feed.sequence, 2);
    assert_eq!(
        feed.release.as_ref().map(|r| r.version.to_string()),
        Some("1.1.0".into())
    );
    // Publishing the current bundle again renews the feed and changes only its rollout.
    publish(d, &v2, "stable", "50");
    let feed = read_feed(d, "stable");
    assert_eq!(feed.sequence, 3);
    assert_eq!(feed.release.as_ref().map(|r| r.rollout_percent), Some(50));

    let out = ok(
        d,
        &[
            "--json",
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
    let out: serde_json::Value = serde_json::from_str(&out).expect("json");
    assert_eq!(out["previous"]["version"], "1.1.0");
    let feed = read_feed(d, "stable");
    assert_eq!(feed.sequence, 4);
    assert_eq!(
        feed.release.as_ref().map(|r| r.version.to_string()),
        Some("1.0.0".into())
    );

    let text = ok(
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
    assert!(
        text.starts_with("withdrew trailcam-species 1.0.0 from channel stable\nchannel stable now offers nothing (release: null; devices keep what they have)\nwas: trailcam-species 1.0.0\n"),
        "{text}"
    );
    let feed = read_feed(d, "stable");
    assert_eq!((feed.sequence, feed.release), (5, None));

    // A rerun changes nothing (tests/retries.rs has its exact output).
    // The bundles stay in the tree: devices that already have them are not affected.
    assert_eq!(files_under(&d.join("tree/bundles")).len(), 2);
}

#[test]
fn channels_are_independent() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let v2 = pack(d, "1.1.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    publish(d, &v2, "beta", "100");
    publish(d, &v2, "stable", "100");
    assert_eq!(read_feed(d, "beta").sequence, 1);
    assert_eq!(read_feed(d, "stable").sequence, 2);
    assert_eq!(
        files_under(&d.join("tree/bundles")).len(),
        2,
        "one copy per bundle"
    );
}

#[test]
fn republishing_a_version_with_other_content_is_refused() {
    let dir = setup();
    let d = dir.path();
    let first = pack(d, "1.0.0", 0, "k.pem");
    let other = pack(d, "1.0.0", 1, "k.pem");
    publish(d, &first, "stable", "100");
    let before = std::fs::read(d.join("tree/feeds/stable.json")).expect("feed");
    let (code, message) = refused(
        d,
        &[
            "publish",
            &other,
            "--tree",
            "tree",
            "--channel",
            "beta",
            "--key",
            "k.pem",
        ],
    );
    assert_eq!(code, 1);
    let index: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("tree/index.json")).expect("index"))
            .expect("json");
    assert_eq!(
        message,
        format!(
            "ampoule: error: trailcam-species 1.0.0 is already in the release tree as bundle {} \
             (published {}), and this file is {}; a published version never changes: pack it \
             as a new version",
            sha256_file(&d.join(&first)),
            index["releases"][0]["first_published"]
                .as_str()
                .expect("time"),
            sha256_file(&d.join(&other))
        )
    );
    assert_eq!(
        std::fs::read(d.join("tree/feeds/stable.json")).expect("feed"),
        before
    );
    assert!(!d.join("tree/feeds/beta.json").exists());
    assert_eq!(
        files_under(&d.join("tree/bundles")).len(),
        1,
        "the refused copy is gone"
    );
}

#[test]
fn an_older_version_is_refused_on_the_same_channel() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let v2 = pack(d, "1.1.0", 0, "k.pem");
    publish(d, &v2, "stable", "100");
    assert_eq!(
        refused(
            d,
            &[
                "publish",
                &v1,
                "--tree",
                "tree",
                "--channel",
                "stable",
                "--key",
                "k.pem"
            ]
        ),
        (
            1,
            "ampoule: error: trailcam-species 1.0.0 is not newer than 1.1.0, the current release \
             on channel stable; devices would not take it (use withdraw to go back to an earlier \
             release)"
                .into()
        )
    );
}

#[test]
fn publish_checks_the_bundle_signature_first() {
    let dir = setup();
    let d = dir.path();
    ok(
        d,
        &["keygen", "--secret", "other.pem", "--public", "other.pub"],
    );
    let bundle = pack(d, "1.0.0", 0, "other.pem");
    let (code, message) = refused(
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
        ],
    );
    assert_eq!(code, 1);
    assert!(
        message.starts_with(&format!(
            "ampoule: error: bundle {bundle} refused; nothing was published: bundle has no valid \
             signature by a trusted key (by keys not trusted here: "
        )),
        "{message}"
    );
    // Since issue 12 a refused first publish leaves no tree at all, not even its directories.
    assert!(!d.join("tree").exists());
    // With the bundle key trusted explicitly, the feed key may differ from the bundle key.
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
            "other.pub",
        ],
    );
    assert_eq!(read_feed(d, "stable").sequence, 1);
    // In a tree that exists, the refused bundle's staged copy is removed too.
    let other = pack(d, "1.1.0", 0, "other.pem");
    let (code, _) = refused(
        d,
        &[
            "publish",
            &other,
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            "k.pem",
        ],
    );
    assert_eq!(code, 1);
    assert_eq!(files_under(&d.join("tree/bundles")).len(), 1);
    assert_eq!(read_feed(d, "stable").sequence, 1);
}

#[test]
fn a_locked_tree_is_refused() {
    let dir = setup();
    let d = dir.path();
    let bundle = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &bundle, "stable", "100");
    let lock = std::fs::File::options()
        .write(true)
        .open(d.join("tree/.lock"))
        .expect("lock file");
    lock.try_lock().expect("the test takes the lock");
    assert_eq!(
        refused(
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
                "--lock-wait",
                "0"
            ]
        ),
        (
            2,
            "ampoule: error: another publish or withdraw is changing the release tree tree; try \
             again when it has finished"
                .into()
        )
    );
    // Waiting gives up after the time given, and says so.
    let withdraw_waiting = [
        "withdraw",
        "--tree",
        "tree",
        "--channel",
        "stable",
        "--key",
        "k.pem",
        "--version",
        "1.0.0",
        "--lock-wait",
        "1",
    ];
    assert_eq!(
        refused(d, &withdraw_waiting),
        (
            2,
            "ampoule: error: another publish or withdraw is changing the release tree tree \
             (waited 1 s); try again when it has finished"
                .into()
        )
    );
    drop(lock);
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

#[test]
fn bad_arguments_are_refused() {
    let dir = setup();
    let d = dir.path();
    let bundle = pack(d, "1.0.0", 0, "k.pem");
    let base = [
        "publish",
        bundle.as_str(),
        "--tree",
        "tree",
        "--key",
        "k.pem",
    ];
    let with = |extra: &[&str]| -> Vec<String> {
        base.iter().chain(extra).map(|s| s.to_string()).collect()
    };
    let cases: [(&[&str], &str); 3] = [
        (
            &["--channel", "Stable"],
            "ampoule: error: channel name 'Stable' is not allowed: use 1 to 64 lowercase letters, digits, '-', '_' or '.', starting with a letter or digit",
        ),
        (
            &["--channel", "stable", "--rollout", "101"],
            "ampoule: error: --rollout 101 is not a percentage from 0 to 100",
        ),
        (
            &["--channel", "stable", "--expires-in", "7w"],
            "ampoule: error: '7w' is not a duration; write a whole number and a unit, like 7d, 12h, 90m or 3600s",
        ),
    ];
    for (extra, expected) in cases {
        let args = with(extra);
        let args: Vec<&str> = args.iter().map(String::as_str).collect();
        assert_eq!(refused(d, &args).1, expected);
    }
    assert!(!d.join("tree").exists(), "nothing was created");
}

fn serve(d: &Path) -> Served {
    serve_tree(d, "tree")
}

/// One raw HTTP/1.1 request; returns the status line, the lowercased head and the body.
fn http(addr: &str, method: &str, path: &str, headers: &[&str]) -> (String, String, Vec<u8>) {
    let mut stream = TcpStream::connect(addr).expect("connect");
    let mut request = format!("{method} {path} HTTP/1.1\r\nhost: {addr}\r\nconnection: close\r\n");
    for h in headers {
        request.push_str(h);
        request.push_str("\r\n");
    }
    request.push_str("\r\n");
    stream.write_all(request.as_bytes()).expect("send");
    let mut raw = Vec::new();
    stream.read_to_end(&mut raw).expect("read");
    let split = raw
        .windows(4)
        .position(|w| w == b"\r\n\r\n")
        .expect("a response head");
    let head = String::from_utf8_lossy(&raw[..split]).to_lowercase();
    let status = head.lines().next().unwrap_or("").to_string();
    (status, head, raw[split + 4..].to_vec())
}

#[test]
fn serve_answers_get_head_and_ranges() {
    let dir = setup();
    let d = dir.path();
    let bundle = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &bundle, "stable", "100");
    let bytes = std::fs::read(d.join(&bundle)).expect("bundle");
    let len = bytes.len();
    let path = format!("/bundles/{}.ampoule", Digest::of(&bytes));
    let server = serve(d);
    let a = server.addr.as_str();

    let (status, head, body) = http(a, "GET", &path, &[]);
    assert_eq!(status, "http/1.1 200 ok");
    assert!(
        head.contains(&format!("\r\ncontent-length: {len}")),
        "{head}"
    );
    assert!(head.contains("\r\naccept-ranges: bytes"));
    assert_eq!(body, bytes);

    let (status, head, body) = http(a, "HEAD", &path, &[]);
    assert_eq!(status, "http/1.1 200 ok");
    assert!(
        head.contains(&format!("\r\ncontent-length: {len}")),
        "{head}"
    );
    assert!(body.is_empty());

    // RFC 9110 section 14.4: 206 with Content-Range "bytes first-last/complete-length".
    let (status, head, body) = http(a, "GET", &path, &["range: bytes=100-"]);
    assert_eq!(status, "http/1.1 206 partial content");
    assert!(
        head.contains(&format!("\r\ncontent-range: bytes 100-{}/{len}", len - 1)),
        "{head}"
    );
    assert!(head.contains(&format!("\r\ncontent-length: {}", len - 100)));
    assert_eq!(body, &bytes[100..]);

    let (status, head, body) = http(a, "GET", &path, &["range: bytes=10-19"]);
    assert_eq!(status, "http/1.1 206 partial content");
    assert!(head.contains(&format!("\r\ncontent-range: bytes 10-19/{len}")));
    assert_eq!(body, &bytes[10..20]);

    let (status, head, _) = http(a, "GET", &path, &[&format!("range: bytes={len}-")]);
    assert_eq!(status, "http/1.1 416 range not satisfiable");
    assert!(head.contains(&format!("\r\ncontent-range: bytes */{len}")));

    // Several ranges are not supported: the whole file, as RFC 9110 allows.
    let (status, _, body) = http(a, "GET", &path, &["range: bytes=0-1,5-6"]);
    assert_eq!(status, "http/1.1 200 ok");
    assert_eq!(body.len(), len);

    let (status, head, _) = http(a, "GET", "/feeds/stable.json", &[]);
    assert_eq!(status, "http/1.1 200 ok");
    assert!(head.contains("\r\ncontent-type: application/json"));

    for (path, expected) in [
        ("/feeds/../../k.pem", "http/1.1 400 bad request"),
        ("/feeds/%2e%2e/index.json", "http/1.1 400 bad request"),
        ("/.lock", "http/1.1 404 not found"),
        ("/feeds/missing.json", "http/1.1 404 not found"),
        ("/feeds", "http/1.1 404 not found"),
        ("/", "http/1.1 404 not found"),
    ] {
        assert_eq!(http(a, "GET", path, &[]).0, expected, "{path}");
    }
    let (status, head, _) = http(a, "POST", "/feeds/stable.json", &[]);
    assert_eq!(status, "http/1.1 405 method not allowed");
    assert!(head.contains("\r\nallow: get, head"));
}

#[test]
fn download_resumes_against_serve() {
    let dir = setup();
    let d = dir.path();
    let bundle = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &bundle, "stable", "100");
    let bytes = std::fs::read(d.join(&bundle)).expect("bundle");
    let digest = Digest::of(&bytes);
    let server = serve(d);
    let partial = d.join("download.partial");
    std::fs::write(&partial, &bytes[..bytes.len() / 3]).expect("prefix");
    download(
        &[format!("http://{}/bundles/{digest}.ampoule", server.addr)],
        &partial,
        bytes.len() as u64,
        &digest,
        &Transfer::new(),
    )
    .expect("resumed download");
    assert_eq!(std::fs::read(&partial).expect("file"), bytes);
}

fn updater(d: &Path, addr: &str, installed: Option<&str>, device: &str) -> Updater {
    let mut bundles = Verifier::new(keys(d), Version::new(2, 3, 0)).expect("verifier");
    if let Some(v) = installed {
        bundles = bundles.installed(v.parse().expect("version"));
    }
    Updater::new(
        format!("http://{addr}/feeds/stable.json"),
        FeedVerifier::new(keys(d), "stable").expect("feed verifier"),
        bundles.require_name("trailcam-species"),
        device,
        d.join("downloads"),
    )
}

#[test]
fn a_device_update_check_against_serve() {
    let dir = setup();
    let d = dir.path();
    std::fs::create_dir(d.join("downloads")).expect("downloads dir");
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let server = serve(d);

    let update = updater(d, &server.addr, None, "camera-0001")
        .check(Timestamp::now())
        .expect("update check");
    let Update::Ready { feed, bundle, path } = update else {
        panic!("expected a bundle, got {update:?}");
    };
    assert_eq!(feed.sequence(), 1);
    assert_eq!(bundle.manifest().version.to_string(), "1.0.0");
    assert_eq!(
        std::fs::read(&path).expect("download"),
        std::fs::read(d.join(&v1)).expect("bundle")
    );
    drop(bundle);

    let update = updater(d, &server.addr, Some("1.0.0"), "camera-0001")
        .check(Timestamp::now())
        .expect("update check");
    assert!(matches!(update, Update::UpToDate { .. }), "{update:?}");

    let v2 = pack(d, "1.1.0", 0, "k.pem");
    publish(d, &v2, "stable", "0");
    let update = updater(d, &server.addr, Some("1.0.0"), "camera-0001")
        .check(Timestamp::now())
        .expect("update check");
    assert!(matches!(update, Update::NotInRollout { .. }), "{update:?}");
    assert_eq!(update.feed().sequence(), 2);

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
    let update = updater(d, &server.addr, Some("1.0.0"), "camera-0001")
        .check(Timestamp::now())
        .expect("update check");
    assert!(
        matches!(update, Update::NothingCurrent { .. }),
        "{update:?}"
    );

    // A device that accepted sequence 5 somewhere refuses this tree's older feed (sequence 4).
    let strict = Updater::new(
        format!("http://{}/feeds/stable.json", server.addr),
        FeedVerifier::new(keys(d), "stable")
            .expect("feed verifier")
            .last_accepted(5, None),
        Verifier::new(keys(d), Version::new(2, 3, 0)).expect("verifier"),
        "camera-0001",
        d.join("downloads"),
    );
    let err = strict.check(Timestamp::now()).expect_err("replay");
    assert_eq!(
        err.to_string(),
        "feed sequence 4 is lower than 5, the last one this device accepted; refusing a replayed older feed"
    );
}
