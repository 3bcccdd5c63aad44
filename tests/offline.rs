//! Offline install (issue 9 item 3): `ampoule offline` writes what a device would fetch into
//! one file, and `ampoule update --offline` and `Device::install_offline` install from it with
//! every check of an online update but the feed's expiry. Trees are made by the real binary;
//! hostile files are built here, each with the exact refusal it must get.

mod tree_common;

use std::path::Path;
use std::process::Output;

use ampoule::release::keyfile::{PassphraseSource, read_secret_key};
use ampoule::release::serve::Server;
use ampoule_verify::feed::{Feed, SignedFeed, rollout_bucket};
use ampoule_verify::format::{context, signed_bytes};
use ampoule_verify::signature::SignatureEntry;
use ampoule_verify::{
    App, Device, Digest, ErrorKind, KeyId, Outcome, Report, Timestamp, Version, tar,
};
use tree_common::*;

const DAY: u64 = 86_400;

fn app(d: &Path) -> App {
    pinned_app(d)
}

fn device(d: &Path, store: &str) -> Device {
    Device::open(&d.join(store), "stable", app(d), Timestamp::now()).expect("open the store")
}

/// `ampoule offline` for `channel` into `out`; returns stdout.
fn offline(d: &Path, channel: &str, out: &str) -> String {
    ok(
        d,
        &["offline", "--tree", "tree", "--channel", channel, "-o", out],
    )
}

/// `ampoule update --offline FILE` for the store `cam`, as camera-7 on app 2.3.0.
fn update_offline(d: &Path, file: &str) -> Output {
    run(
        d,
        &[
            "update",
            "--store",
            "cam",
            "--offline",
            file,
            "--trust",
            "k.pub",
            "--app-version",
            "2.3.0",
            "--device-id",
            "camera-7",
        ],
    )
}

fn stdout(out: &Output) -> String {
    String::from_utf8_lossy(&out.stdout).trim_end().to_string()
}

fn stderr(out: &Output) -> String {
    String::from_utf8_lossy(&out.stderr).trim_end().to_string()
}

fn installed_version(report: &Report) -> Version {
    match &report.outcome {
        Outcome::Installed(installed) => installed.release.manifest.version.clone(),
        other => panic!("expected an install, got {other:?}"),
    }
}

fn refusal(report: &Report) -> (ErrorKind, String) {
    match &report.outcome {
        Outcome::Refused(e) => (e.kind(), e.to_string()),
        other => panic!("expected a refusal, got {other:?}"),
    }
}

/// What is in the store's download directory (nothing when it was never made).
fn downloads(d: &Path, store: &str) -> Vec<String> {
    match std::fs::read_dir(d.join(store).join("downloads")) {
        Ok(dir) => dir
            .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
            .collect(),
        Err(_) => Vec::new(),
    }
}

/// The entries `ampoule offline` writes for `channel` with no ledger steps, in order, read
/// from the tree as FORMAT.md describes them; and the modification time it stamps.
fn entries_of(d: &Path, channel: &str) -> (Vec<(String, Vec<u8>)>, u64) {
    let feed_bytes = std::fs::read(d.join(format!("tree/feeds/{channel}.json"))).expect("the feed");
    let feed = read_feed(d, channel);
    let mut entries = vec![
        (
            "offline.json".to_string(),
            format!("{{\"format\":1,\"channel\":\"{channel}\"}}").into_bytes(),
        ),
        (format!("feeds/{channel}.json"), feed_bytes),
    ];
    if let Some(named) = &feed.trust_set {
        let name = format!("trust/{}.json", named.version);
        let bytes = std::fs::read(d.join("tree").join(&name)).expect("the trust set");
        entries.push((name, bytes));
    }
    if let Some(release) = &feed.release {
        let name = format!("bundles/{}.ampoule", release.sha256);
        let bytes = std::fs::read(d.join("tree").join(&name)).expect("the bundle");
        entries.push((name, bytes));
    }
    (entries, feed.issued.unix())
}

/// A ustar archive of `entries` (headers by the crate's writer), each header passed through
/// `edit` with its index first, then the end-of-archive marker.
fn archive_with(
    entries: &[(String, Vec<u8>)],
    mtime: u64,
    edit: &dyn Fn(usize, &mut [u8; 512]),
) -> Vec<u8> {
    let mut out = Vec::new();
    for (i, (name, data)) in entries.iter().enumerate() {
        let mut h = tar::header(name, data.len() as u64, mtime);
        edit(i, &mut h);
        out.extend_from_slice(&h);
        out.extend_from_slice(data);
        out.resize(out.len() + tar::padding(data.len() as u64) as usize, 0);
    }
    out.extend_from_slice(&tar::END_OF_ARCHIVE);
    out
}

fn archive(entries: &[(String, Vec<u8>)], mtime: u64) -> Vec<u8> {
    archive_with(entries, mtime, &|_, _| {})
}

/// Gives a header another type flag and a checksum that matches, as a tool writing that
/// type would.
fn retype(h: &mut [u8; 512], flag: u8) {
    h[156] = flag;
    h[148..156].fill(b' ');
    let sum: u32 = h.iter().map(|&b| u32::from(b)).sum();
    h[148..154].copy_from_slice(format!("{sum:06o}").as_bytes());
    h[154] = 0;
}

/// Signs the tree's feed of `channel` again with other times, as a feed key would.
fn resign_feed(d: &Path, channel: &str, issued: u64, expires: u64) -> Timestamp {
    let path = d.join(format!("tree/feeds/{channel}.json"));
    let signed = SignedFeed::from_json(&std::fs::read(&path).expect("feed")).expect("envelope");
    let mut feed = Feed::from_json(signed.feed.as_bytes()).expect("feed text");
    feed.issued = Timestamp::from_unix(issued).expect("issued");
    feed.expires = Timestamp::from_unix(expires).expect("expires");
    let text = feed.to_json();
    let key = read_secret_key(&d.join("k.pem"), &PassphraseSource::None).expect("the test key");
    let resigned = SignedFeed {
        signatures: vec![SignatureEntry {
            key_id: KeyId::of_raw_key(key.verifying_key().as_bytes()),
            signature: ed25519_dalek::Signer::sign(
                &key,
                &signed_bytes(context::FEED, text.as_bytes()),
            )
            .to_bytes(),
        }],
        feed: text,
    };
    std::fs::write(&path, resigned.to_json()).expect("write the feed");
    feed.expires
}

#[test]
fn issue9_an_offline_file_installs_through_the_cli_and_the_library() {
    let dir = setup();
    let d = dir.path();
    publish(d, &pack(d, "1.0.0", 0, "k.pem"), "stable", "100");

    let text = offline(d, "stable", "stable.ampoule-offline");
    let bytes = std::fs::read(d.join("stable.ampoule-offline")).expect("the offline file");
    let expires = read_feed(d, "stable").expires;
    assert_eq!(
        text.trim_end(),
        format!(
            "wrote stable.ampoule-offline ({} bytes): channel stable, feed sequence 1, \
             trailcam-species 1.0.0, 0 consistency steps\nthe feed expires at {expires}; a \
             device installing offline does not check that, so hand out files made from the \
             current feed",
            bytes.len()
        )
    );
    // The layout FORMAT.md documents, byte for byte: entries named as in the tree, stamped
    // with the feed's issue time, so the same tree gives the same file.
    let (entries, mtime) = entries_of(d, "stable");
    assert!(
        bytes == archive(&entries, mtime),
        "the file differs from the documented layout"
    );
    match std::process::Command::new("tar")
        .args(["tf", "stable.ampoule-offline"])
        .current_dir(d)
        .output()
    {
        Ok(out) if out.status.success() => {
            let names: Vec<&str> = entries.iter().map(|(n, _)| n.as_str()).collect();
            assert_eq!(
                String::from_utf8_lossy(&out.stdout)
                    .lines()
                    .collect::<Vec<_>>(),
                names
            );
        }
        _ => eprintln!("skipped: GNU tar is not available; the listing was not cross-checked"),
    }

    let out = update_offline(d, "stable.ampoule-offline");
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    let state: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("cam/state.json")).expect("state"))
            .expect("state.json");
    let release = state["current"]["release"].as_str().expect("release");
    assert_eq!(
        stdout(&out),
        format!(
            "installed trailcam-species 1.0.0 from channel stable (feed sequence 1): 6 labels, \
             model at cam/releases/{release}/model.bin"
        )
    );
    assert_eq!(downloads(d, "cam"), ["lock"]);
    let out = update_offline(d, "stable.ampoule-offline");
    assert_eq!(
        stdout(&out),
        "up to date: channel stable offers trailcam-species 1.0.0 (feed sequence 1); keeping \
         trailcam-species 1.0.0"
    );

    // The library, into another store.
    let camera = device(d, "cam2");
    let report = camera.install_offline(&d.join("stable.ampoule-offline"), Timestamp::now());
    assert_eq!(installed_version(&report), Version::new(1, 0, 0));
    assert_eq!(
        camera.current().expect("current").map(|r| r.labels.len()),
        Some(6)
    );
    let report = camera.install_offline(&d.join("stable.ampoule-offline"), Timestamp::now());
    assert!(matches!(report.outcome, Outcome::UpToDate), "{report:?}");

    // --json, and an output that exists already is never replaced.
    let doc: serde_json::Value = serde_json::from_str(&ok(
        d,
        &[
            "--json",
            "offline",
            "--tree",
            "tree",
            "--channel",
            "stable",
            "-o",
            "again",
        ],
    ))
    .expect("JSON");
    assert_eq!(doc["ok"], true);
    assert_eq!(doc["sequence"], 1);
    assert_eq!(doc["release"]["version"], "1.0.0");
    assert_eq!(doc["consistency_steps"], 0);
    assert_eq!(doc["bytes"], bytes.len());
    let (code, err) = refused(
        d,
        &[
            "offline",
            "--tree",
            "tree",
            "--channel",
            "stable",
            "-o",
            "again",
        ],
    );
    assert_eq!(code, 2);
    assert_eq!(
        err,
        "ampoule: error: again already exists; choose another output name or remove it first \
         (nothing was written)"
    );
    let (code, err) = refused(
        d,
        &[
            "offline",
            "--tree",
            "tree",
            "--channel",
            "beta",
            "-o",
            "beta.ampoule-offline",
        ],
    );
    assert_eq!(code, 2);
    assert_eq!(
        err,
        "ampoule: error: channel 'beta' has no feed in release tree tree (tree/feeds/beta.json \
         is missing); publish on it first"
    );
    assert!(!d.join("beta.ampoule-offline").exists());
}

#[test]
fn issue9_an_expired_feed_installs_offline_and_is_refused_online() {
    let dir = setup();
    let d = dir.path();
    publish(d, &pack(d, "1.0.0", 0, "k.pem"), "stable", "100");
    let now = Timestamp::now().unix();
    let expires = resign_feed(d, "stable", now - 10 * DAY, now - 3 * DAY);

    // Online, the same feed is refused: a device that can poll learns it is cut off.
    let server =
        Server::start(d.join("tree"), "127.0.0.1:0".parse().expect("addr")).expect("server");
    let url = server.url("feeds/stable.json");
    let online = run(
        d,
        &[
            "update",
            "--store",
            "online",
            "--feed",
            &url,
            "--trust",
            "k.pub",
            "--app-version",
            "2.3.0",
        ],
    );
    assert_eq!(online.status.code(), Some(1));
    let err = stderr(&online);
    assert!(
        err.starts_with(&format!(
            "ampoule: error: feed expired at {expires} (device clock "
        )) && err.ends_with("allowed skew 300 s); the publisher must publish a fresh feed"),
        "{err}"
    );
    assert!(device(d, "online").current().expect("current").is_none());

    // Offline, the feed's expiry is the one check not made: it installs.
    offline(d, "stable", "stable.ampoule-offline");
    let out = update_offline(d, "stable.ampoule-offline");
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    assert!(
        stdout(&out).starts_with("installed trailcam-species 1.0.0 from channel stable"),
        "{}",
        stdout(&out)
    );
}

#[test]
fn issue9_offline_still_refuses_a_feed_issued_in_the_future() {
    let dir = setup();
    let d = dir.path();
    publish(d, &pack(d, "1.0.0", 0, "k.pem"), "stable", "100");
    let now = Timestamp::now().unix();
    resign_feed(d, "stable", now + DAY, now + 8 * DAY);
    offline(d, "stable", "stable.ampoule-offline");
    let camera = device(d, "cam");
    let clock = Timestamp::from_unix(now).expect("now");
    let report = camera.install_offline(&d.join("stable.ampoule-offline"), clock);
    let issued = Timestamp::from_unix(now + DAY).expect("issued");
    // A wrong clock is a failure to retry once the clock is set, not a refusal (issue 10
    // item 4); it is still not installed.
    let Outcome::Failed(e) = &report.outcome else {
        panic!("expected a failure, got {:?}", report.outcome);
    };
    assert_eq!(
        (e.kind(), e.to_string()),
        (
            ErrorKind::Clock,
            format!(
                "feed was issued at {issued}, after this device's clock ({clock}) by more than \
                 the allowed 300 s; check the device clock"
            )
        )
    );
    assert!(camera.current().expect("current").is_none());
}

#[test]
fn issue9_an_older_offline_file_after_a_newer_install_is_a_replay() {
    let dir = setup();
    let d = dir.path();
    publish(d, &pack(d, "1.0.0", 0, "k.pem"), "stable", "100");
    offline(d, "stable", "old.ampoule-offline");
    publish(d, &pack(d, "1.1.0", 1, "k.pem"), "stable", "100");
    offline(d, "stable", "new.ampoule-offline");

    let out = update_offline(d, "new.ampoule-offline");
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    let out = update_offline(d, "old.ampoule-offline");
    assert_eq!(out.status.code(), Some(1), "{}", stdout(&out));
    assert_eq!(
        stderr(&out),
        "ampoule: error: feed sequence 1 is lower than 2, the last one this device accepted; \
         refusing a replayed older feed"
    );
    let camera = device(d, "cam");
    assert_eq!(
        camera
            .current()
            .expect("current")
            .map(|r| r.manifest.version),
        Some(Version::new(1, 1, 0))
    );
}

#[test]
fn issue9_the_rollout_applies_offline() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "0");
    offline(d, "stable", "stable.ampoule-offline");
    let out = update_offline(d, "stable.ampoule-offline");
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    let bucket = rollout_bucket(
        "camera-7",
        &Digest::of(&std::fs::read(d.join(&v1)).expect("v1")),
    );
    assert_eq!(
        stdout(&out),
        format!(
            "not in the rollout yet: channel stable offers trailcam-species 1.0.0 to 0% of \
             devices, and device camera-7 is in bucket {bucket} of 10000 (feed sequence 1); \
             nothing installed yet"
        )
    );
    assert_eq!(downloads(d, "cam"), ["lock"], "nothing was copied");
}

#[test]
fn issue9_a_device_that_missed_publishes_walks_the_steps_in_the_file() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    offline(d, "stable", "first.ampoule-offline");
    let camera = device(d, "cam");
    let report = camera.install_offline(&d.join("first.ampoule-offline"), Timestamp::now());
    assert_eq!(installed_version(&report), Version::new(1, 0, 0));

    // Two appends the camera never sees (another channel), then a release on its own.
    publish(d, &v1, "beta", "100");
    publish(d, &v1, "beta", "100");
    publish(d, &pack(d, "1.1.0", 1, "k.pem"), "stable", "100");

    // Without the steps, the camera cannot prove the ledger only grew: refused, and the
    // refusal names the step it needed.
    let (entries, mtime) = entries_of(d, "stable");
    std::fs::write(d.join("no-steps.ampoule-offline"), archive(&entries, mtime)).expect("write");
    let report = camera.install_offline(&d.join("no-steps.ampoule-offline"), Timestamp::now());
    assert_eq!(
        refusal(&report),
        (
            ErrorKind::Malformed,
            format!(
                "offline file {} holds no 'ledger/consistency/1.json', the consistency step the \
                 update needs",
                d.join("no-steps.ampoule-offline").display()
            )
        )
    );

    let text = offline(d, "stable", "second.ampoule-offline");
    assert!(
        text.contains(", trailcam-species 1.1.0, 3 consistency steps\n"),
        "{text}"
    );
    let report = camera.install_offline(&d.join("second.ampoule-offline"), Timestamp::now());
    assert_eq!(installed_version(&report), Version::new(1, 1, 0));
    let state = camera.store().state().expect("state");
    assert_eq!(state.tree_head.map(|h| h.tree_size), Some(4));
}

#[test]
fn issue9_a_trust_set_rotation_comes_from_the_file() {
    let dir = setup();
    let d = dir.path();
    ok(d, &["keygen", "--secret", "e.pem", "--public", "e.pub"]);
    let init = [
        "trust",
        "init",
        "--key",
        "k.pub",
        "--expires-in",
        "365d",
        "-o",
        "trust-1.json",
    ];
    ok(d, &init);
    ok(d, &["trust", "sign", "trust-1.json", "--key", "k.pem"]);
    ok(
        d,
        &[
            "trust",
            "add",
            "trust-1.json",
            "--key",
            "e.pub",
            "-o",
            "trust-2.json",
        ],
    );
    ok(d, &["trust", "sign", "trust-2.json", "--key", "k.pem"]);
    let publish_set = |file: &str| {
        ok(
            d,
            &[
                "publish",
                "--trust-set",
                file,
                "--tree",
                "tree",
                "--key",
                "k.pem",
            ],
        )
    };
    publish_set("trust-1.json");
    publish(d, &pack(d, "1.0.0", 0, "k.pem"), "stable", "100");
    publish_set("trust-2.json");

    let text = offline(d, "stable", "stable.ampoule-offline");
    assert!(
        text.contains(", trailcam-species 1.0.0, trust set version 2, "),
        "{text}"
    );
    let update = |file: &str| {
        run(
            d,
            &[
                "update",
                "--store",
                "cam",
                "--offline",
                file,
                "--trust-set",
                "trust-1.json",
                "--app-version",
                "2.3.0",
            ],
        )
    };
    // Without the set the feed names, the device cannot follow the rotation: refused.
    let (mut entries, mtime) = entries_of(d, "stable");
    assert_eq!(entries[2].0, "trust/2.json");
    entries.remove(2);
    std::fs::write(d.join("no-trust.ampoule-offline"), archive(&entries, mtime)).expect("write");
    let out = update("no-trust.ampoule-offline");
    assert_eq!(out.status.code(), Some(1), "{}", stdout(&out));
    assert_eq!(
        stderr(&out),
        "ampoule: error: offline file no-trust.ampoule-offline holds no 'trust/2.json', the \
         trust set the update needs"
    );
    assert!(!d.join("cam/trust-chain.json").exists());

    let out = update("stable.ampoule-offline");
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    assert!(
        stdout(&out).starts_with(
            "trust set rotated to version 2; installed trailcam-species 1.0.0 from channel stable"
        ),
        "{}",
        stdout(&out)
    );
    let chain: serde_json::Value = serde_json::from_slice(
        &std::fs::read(d.join("cam/trust-chain.json")).expect("the stored chain"),
    )
    .expect("chain JSON");
    assert_eq!(
        chain["sets"][0]
            .as_str()
            .expect("the stored set")
            .as_bytes(),
        std::fs::read(d.join("trust-2.json")).expect("trust-2.json")
    );
}

/// Makes a hostile file from the good entries and their modification time.
type MakeFile = Box<dyn Fn(&[(String, Vec<u8>)], u64) -> Vec<u8>>;

/// One hostile file: how it is made from the good entries, and the refusal it must get.
struct Hostile {
    name: &'static str,
    file: MakeFile,
    kind: ErrorKind,
    message: String,
}

#[test]
fn issue9_hostile_offline_files_are_refused_with_the_exact_reason() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let sha256 = Digest::of(&std::fs::read(d.join(&v1)).expect("v1"));
    let bundle = format!("bundles/{sha256}.ampoule");
    let mut flipped = std::fs::read(d.join(&v1)).expect("v1");
    flipped[600] ^= 1;
    let flipped_sha256 = Digest::of(&flipped);
    let path = |name: &str| d.join(format!("{name}.ampoule-offline"));

    let cases = vec![
        Hostile {
            name: "symlink",
            file: Box::new(|entries, mtime| {
                archive_with(entries, mtime, &|i, h| {
                    if i == 1 {
                        retype(h, b'2');
                    }
                })
            }),
            kind: ErrorKind::Malformed,
            message: "offline file entry 'feeds/stable.json' is a symbolic link (tar type '2'); \
                      only regular files are allowed"
                .into(),
        },
        Hostile {
            name: "unknown-entry",
            file: Box::new(|entries, mtime| {
                let mut entries = entries.to_vec();
                entries.insert(2, ("notes.txt".into(), b"hello".to_vec()));
                archive(&entries, mtime)
            }),
            kind: ErrorKind::Malformed,
            message: "offline file entry 'notes.txt' is not allowed: an offline file for \
                      channel 'stable' holds only offline.json, feeds/stable.json, \
                      trust/<version>.json, ledger/trust-sets/<size>.json, \
                      ledger/consistency/<size>.json and bundles/<sha256>.ampoule"
                .into(),
        },
        Hostile {
            name: "escaping-path",
            file: Box::new(|entries, mtime| {
                let mut entries = entries.to_vec();
                entries.insert(2, ("feeds/../../cam/state.json".into(), b"{}".to_vec()));
                archive(&entries, mtime)
            }),
            kind: ErrorKind::Malformed,
            message: "offline file entry name 'feeds/../../cam/state.json' is not a relative \
                      path of plain names; nothing may point outside the archive"
                .into(),
        },
        Hostile {
            name: "duplicate",
            file: Box::new(|entries, mtime| {
                let mut entries = entries.to_vec();
                entries.insert(2, entries[1].clone());
                archive(&entries, mtime)
            }),
            kind: ErrorKind::Malformed,
            message: "offline file entry 'feeds/stable.json' appears twice".into(),
        },
        Hostile {
            name: "oversized-feed",
            file: Box::new(|entries, mtime| {
                let mut entries = entries.to_vec();
                entries[1].1.resize(64 * 1024 + 1, b' ');
                archive(&entries, mtime)
            }),
            kind: ErrorKind::TooLarge,
            message: "offline file entry 'feeds/stable.json' is 65537 bytes, over the limit of \
                      65536 bytes"
                .into(),
        },
        Hostile {
            name: "other-bundle-bytes",
            file: Box::new(move |entries, mtime| {
                let mut entries = entries.to_vec();
                entries[2].1 = flipped.clone();
                archive(&entries, mtime)
            }),
            kind: ErrorKind::Digest,
            message: format!(
                "offline file entry '{bundle}' has SHA-256 {flipped_sha256}, but the feed \
                 declares {sha256}"
            ),
        },
        Hostile {
            name: "missing-bundle",
            file: Box::new(|entries, mtime| archive(&entries[..2], mtime)),
            kind: ErrorKind::Malformed,
            message: format!(
                "offline file {} holds no '{bundle}', the bundle the feed offers",
                path("missing-bundle").display()
            ),
        },
        Hostile {
            name: "trailing-garbage",
            file: Box::new(|entries, mtime| {
                let mut bytes = archive(entries, mtime);
                bytes.extend_from_slice(b"x");
                bytes
            }),
            kind: ErrorKind::Malformed,
            message: "offline file has trailing bytes after the end-of-archive marker".into(),
        },
        Hostile {
            name: "other-channel",
            file: Box::new(|entries, mtime| {
                let mut entries = entries.to_vec();
                entries[0].1 = br#"{"format":1,"channel":"beta"}"#.to_vec();
                archive(&entries, mtime)
            }),
            kind: ErrorKind::Feed,
            message: format!(
                "offline file {} is for channel 'beta', but this device follows channel 'stable'",
                path("other-channel").display()
            ),
        },
    ];
    let (entries, mtime) = entries_of(d, "stable");
    // The good file installs in a store of its own: every case below starts from it.
    std::fs::write(path("good"), archive(&entries, mtime)).expect("write");
    let good = device(d, "good").install_offline(&path("good"), Timestamp::now());
    assert_eq!(installed_version(&good), Version::new(1, 0, 0));

    let camera = device(d, "cam");
    for case in cases {
        std::fs::write(path(case.name), (case.file)(&entries, mtime)).expect("write");
        let report = camera.install_offline(&path(case.name), Timestamp::now());
        assert_eq!(
            refusal(&report),
            (case.kind, case.message.clone()),
            "case {}",
            case.name
        );
        assert!(
            camera.current().expect("current").is_none(),
            "case {}: nothing installed",
            case.name
        );
        let left = downloads(d, "cam");
        assert!(
            left.is_empty() || left == ["lock"],
            "case {}: left {left:?} in the download directory",
            case.name
        );
    }
}
