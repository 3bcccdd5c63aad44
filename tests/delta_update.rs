//! Issue 13 item 2, the device side of deltas: the update picks a delta whose base is the
//! digest of the installed release's files (after the store checked those files in full),
//! never by version; the release it rebuilds installs through the same store install as the
//! full bundle and ends with the same files; a delta that fails to download, to apply or to
//! check gives way to the full bundle in the same update, never to a second delta, and is
//! remembered; installed files altered on disk get no delta at all. Step by step (an app with
//! its own HTTP), over HTTP (the `fetch` path) and through `ampoule update`.
//!
//! End to end, `publish` makes the delta and lists it in the feed and the ledger, and a device
//! that requires the ledger uses it. The other tests list deltas a publisher would not (another
//! base, a damaged or foreign delta): each makes its delta with `ampoule delta`, puts it beside
//! the bundles as `<sha256>.ampoule-delta`, and re-signs the feed with the deltas it lists;
//! such a feed is not what the ledger logged, so those devices skip the ledger
//! (`dangerous::skip_ledger`, `--dangerous-skip-ledger`). The reference for "the same files" is
//! the full bundle, installed by a second store from the same tree.

mod tree_common;

use std::path::Path;
use std::process::Command;

use ampoule::release::serve::Server;
use ampoule_verify::feed::Feed;
use ampoule_verify::fetch::Transfer;
use ampoule_verify::ledger::DeltaRef;
use ampoule_verify::payload::delta::read_head;
use ampoule_verify::update::Next;
use ampoule_verify::{Device, Digest, ErrorKind, Outcome, Report, Timestamp, Version, dangerous};
use tree_common::*;

/// Any base works: the step-by-step "app" maps each URL back to a file of the tree.
const BASE: &str = "https://models.example.invalid/";
const FEED: &str = "https://models.example.invalid/feeds/stable.json";

/// The invented model's size: incompressible, so the bundle is larger than its head (the
/// session then asks for it in two parts) and much larger than a delta.
const MODEL_BYTES: usize = 300_000;
/// How many bytes at the end of the model a "retrain" changes (a last layer).
const RETRAINED_BYTES: usize = 2_000;

/// Writes the invented model `name`: a linear congruential sequence (the constants of
/// Numerical Recipes' `ranqd1`, from memory), whose last [`RETRAINED_BYTES`] are XORed with
/// `retrain`, as retraining the last layer changes them.
fn write_model(d: &Path, name: &str, retrain: u8) {
    let mut x: u32 = 0x2545_f491;
    let mut bytes: Vec<u8> = (0..MODEL_BYTES)
        .map(|_| {
            x = x.wrapping_mul(1_664_525).wrapping_add(1_013_904_223);
            (x >> 24) as u8
        })
        .collect();
    for b in &mut bytes[MODEL_BYTES - RETRAINED_BYTES..] {
        *b ^= retrain;
    }
    std::fs::write(d.join(name), bytes).expect("model");
}

/// Packs `version` of the model line with the model retrained as `retrain`; returns the
/// bundle's file name in `d`.
fn pack_retrained(d: &Path, version: &str, retrain: u8) -> String {
    let model = format!("model-{version}-{retrain}.bin");
    write_model(d, &model, retrain);
    let out = format!("species-{version}-{retrain}.ampoule");
    pack_model(d, &model, version, "k.pem", &out);
    out
}

/// Makes the delta from bundle `old` to bundle `new` with `ampoule delta`, and returns its
/// bytes and its base's digest (read from its header).
fn make_delta(d: &Path, old: &str, new: &str) -> (Vec<u8>, Digest) {
    let out = format!("{old}-to-{new}.ampoule-delta");
    ok(d, &["delta", "--from", old, new, "-o", &out]);
    let bytes = std::fs::read(d.join(&out)).expect("delta");
    let base = read_head(&mut &bytes[..])
        .expect("a delta")
        .header
        .base_id();
    (bytes, base)
}

/// Puts delta `bytes` for `base` beside the bundles, as `<sha256>.ampoule-delta`, and returns
/// its listing.
fn place(d: &Path, bytes: &[u8], base: Digest) -> DeltaRef {
    let sha256 = Digest::of(bytes);
    std::fs::write(
        d.join(format!("tree/bundles/{sha256}.ampoule-delta")),
        bytes,
    )
    .expect("place");
    DeltaRef {
        base,
        size: bytes.len() as u64,
        sha256,
    }
}

/// Lists `deltas` in the channel's feed, re-signed with the test key.
fn list(d: &Path, deltas: &[DeltaRef]) {
    resign_feed(d, "stable", |text| {
        let mut feed = Feed::from_json(text.as_bytes()).expect("feed");
        feed.release.as_mut().expect("a release").deltas = deltas.to_vec();
        feed.to_json()
    });
}

fn delta_url(delta: &DeltaRef) -> String {
    format!("{BASE}bundles/{}.ampoule-delta", delta.sha256)
}

/// A camera that skips the ledger, for feeds re-signed with deltas the ledger did not log.
fn open(d: &Path, store: &str) -> Device {
    let app = dangerous::skip_ledger(pinned_app(d));
    Device::open(&d.join(store), "stable", app, Timestamp::now()).expect("open")
}

/// One update, step by step, as an app with its own HTTP runs it.
struct Poll {
    report: Report,
    /// The URL of each download the session asked for, in order (a bundle's head and its
    /// whole are two).
    asked: Vec<String>,
    /// The bytes the "app" wrote into the store's download files.
    written: u64,
}

/// The bytes the "server" sends for `url`, or `None` when the transfer fails.
type Serve<'a> = &'a dyn Fn(&str, Vec<u8>) -> Option<Vec<u8>>;

fn as_is(_: &str, bytes: Vec<u8>) -> Option<Vec<u8>> {
    Some(bytes)
}

/// Runs one update on the tree's feed: each fetch answered from the tree's files, each
/// download written into the file the store prepared (appended after what it holds, as the
/// crate documents) from what `serve` sends for its URL.
fn poll(device: &Device, d: &Path, serve: Serve<'_>) -> Poll {
    let feed = std::fs::read(d.join("tree/feeds/stable.json")).expect("feed");
    let mut session = device.begin(FEED, feed, Timestamp::now());
    let (mut asked, mut written) = (Vec::new(), 0);
    let file_of = |url: &str| {
        d.join("tree")
            .join(url.strip_prefix(BASE).expect("in the tree"))
    };
    loop {
        match session.advance() {
            Next::Fetch(want) => {
                session.provide(std::fs::read(file_of(want.url())).expect("asked-for file"));
            }
            Next::Download(want) => {
                let url = want.urls()[0].clone();
                asked.push(url.clone());
                let served = std::fs::read(file_of(&url)).unwrap_or_default();
                let Some(sent) = serve(&url, served) else {
                    let report = session.fail("connection lost");
                    return Poll {
                        report,
                        asked,
                        written,
                    };
                };
                let mut file = want.file().expect("the store's download file");
                let have = file.metadata().expect("size").len() as usize;
                let upto = (want.size() as usize).min(sent.len()).max(have);
                std::io::Seek::seek(&mut file, std::io::SeekFrom::End(0)).expect("seek");
                std::io::Write::write_all(&mut file, &sent[have..upto]).expect("write");
                written += (upto - have) as u64;
                session.downloaded(want.path());
            }
            Next::Done(report) => {
                return Poll {
                    report,
                    asked,
                    written,
                };
            }
            other => panic!("unexpected step {other:?}"),
        }
    }
}

fn installed(report: &Report) -> Version {
    match &report.outcome {
        Outcome::Installed(installed) => installed.release.manifest.version.clone(),
        other => panic!("expected an install, got {other:?}"),
    }
}

/// The current release's directory in `store`.
fn current_dir(d: &Path, store: &str) -> std::path::PathBuf {
    let state: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join(store).join("state.json")).expect("state"))
            .expect("state.json");
    let release = state["current"]["release"]
        .as_str()
        .expect("a current release");
    d.join(store).join("releases").join(release)
}

/// Every file of the current release in `store`, by name.
fn files(d: &Path, store: &str) -> Vec<(String, Vec<u8>)> {
    let dir = current_dir(d, store);
    let mut names: Vec<String> = std::fs::read_dir(&dir)
        .expect("release")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    names
        .into_iter()
        .map(|n| {
            let bytes = std::fs::read(dir.join(&n)).expect("file");
            (n, bytes)
        })
        .collect()
}

/// The reference: a store with nothing installed takes the full bundle of what the channel
/// offers (no delta applies to nothing), and its files are what a delta must rebuild.
fn full_bundle_files(d: &Path) -> Vec<(String, Vec<u8>)> {
    let reference = open(d, "reference");
    let p = poll(&reference, d, &as_is);
    assert_eq!(p.report.delta, None);
    assert!(
        p.asked.iter().all(|u| u.ends_with(".ampoule")),
        "{:?}",
        p.asked
    );
    installed(&p.report);
    files(d, "reference")
}

/// Publishes `bundle` on `stable` without deltas: the test lists its own.
fn publish_plain(d: &Path, bundle: &str) {
    ok(
        d,
        &[
            "publish",
            bundle,
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            "k.pem",
            "--deltas",
            "0",
        ],
    );
}

/// A tree with 1.0.0 published and `stores` on it, then 1.1.0 published (neither with
/// deltas); returns the two bundles' file names and 1.1.0's size.
fn on_1_0_0_offered_1_1_0(d: &Path, stores: &[&str]) -> (String, String, u64) {
    let v1 = pack_retrained(d, "1.0.0", 0);
    publish_plain(d, &v1);
    for store in stores {
        let p = poll(&open(d, store), d, &as_is);
        assert_eq!(installed(&p.report), Version::new(1, 0, 0));
    }
    let v2 = pack_retrained(d, "1.1.0", 0x5a);
    publish_plain(d, &v2);
    let size = std::fs::metadata(d.join(&v2)).expect("bundle").len();
    (v1, v2, size)
}

#[test]
fn issue13_end_to_end_publish_lists_a_delta_and_a_device_that_requires_the_ledger_uses_it() {
    let dir = setup();
    let d = dir.path();
    let camera = || Device::open(&d.join("cam"), "stable", pinned_app(d), Timestamp::now());
    let v1 = pack_retrained(d, "1.0.0", 0);
    publish(d, &v1, "stable", "100");
    let p = poll(&camera().expect("open"), d, &as_is);
    assert_eq!(installed(&p.report), Version::new(1, 0, 0));
    let v2 = pack_retrained(d, "1.1.0", 0x5a);
    publish(d, &v2, "stable", "100");
    let bundle = std::fs::metadata(d.join(&v2)).expect("bundle").len();
    let listed = read_feed(d, "stable").release.expect("offered").deltas;
    let [delta] = listed.as_slice() else {
        panic!("publish lists one delta, from 1.0.0: {listed:?}")
    };
    let p = poll(&camera().expect("open"), d, &as_is);
    assert_eq!(installed(&p.report), Version::new(1, 1, 0));
    assert_eq!(p.asked, [delta_url(delta)]);
    assert_eq!(p.report.delta, Some(delta.sha256));
    assert_eq!(p.report.downloaded, delta.size);
    assert!(delta.size * 20 < bundle, "{} against {bundle}", delta.size);
    assert_eq!(files(d, "cam"), full_bundle_files(d));
}

#[test]
fn issue13_the_update_picks_the_delta_of_the_installed_files_and_installs_the_bundles_files() {
    let dir = setup();
    let d = dir.path();
    let (v1, v2, bundle) = on_1_0_0_offered_1_1_0(d, &["cam"]);
    // Two deltas: one from 1.0.0, the files the camera runs, and one from a 0.9.0 it never had.
    let v09 = pack_retrained(d, "0.9.0", 0x11);
    let (bytes, base) = make_delta(d, &v1, &v2);
    let from_v1 = place(d, &bytes, base);
    let (bytes, base) = make_delta(d, &v09, &v2);
    let from_v09 = place(d, &bytes, base);
    list(d, &[from_v09, from_v1.clone()]);

    let p = poll(&open(d, "cam"), d, &as_is);
    assert_eq!(installed(&p.report), Version::new(1, 1, 0));
    assert_eq!(p.asked, [delta_url(&from_v1)], "one download, the delta");
    assert_eq!(p.report.delta, Some(from_v1.sha256));
    assert!(
        p.report.delta_refused.is_none(),
        "{:?}",
        p.report.delta_refused
    );
    assert_eq!(p.report.downloaded, from_v1.size);
    assert_eq!(p.written, from_v1.size);
    assert!(
        from_v1.size * 20 < bundle,
        "{} against {bundle}",
        from_v1.size
    );
    // The same release, byte for byte, as the full bundle installs it; the model is the file
    // that was packed.
    let rebuilt = files(d, "cam");
    assert_eq!(rebuilt, full_bundle_files(d));
    let model = rebuilt
        .iter()
        .find(|(n, _)| n == "model.bin")
        .expect("model");
    assert_eq!(
        model.1,
        std::fs::read(d.join("model-1.1.0-90.bin")).expect("packed")
    );
    // Nothing is left in the download directory but its lock.
    let left: Vec<_> = std::fs::read_dir(d.join("cam/downloads"))
        .expect("downloads")
        .map(|e| e.expect("entry").file_name())
        .collect();
    assert_eq!(left, ["lock"]);
    // The store opens the rebuilt release as it opens any (every file checked again), and
    // rolls back from it to the release the delta read, untouched.
    let camera = open(d, "cam");
    let current = camera.current().expect("opens").expect("current");
    assert_eq!(current.manifest.version, Version::new(1, 1, 0));
    let back = camera.rollback().expect("rollback");
    assert_eq!(back.manifest.version, Version::new(1, 0, 0));
    assert_eq!(
        std::fs::read(back.model).expect("model"),
        std::fs::read(d.join("model-1.0.0-0.bin")).expect("packed")
    );
}

#[test]
fn issue13_a_delta_is_matched_by_the_digest_of_the_files_never_by_version() {
    let dir = setup();
    let d = dir.path();
    let (_, v2, bundle) = on_1_0_0_offered_1_1_0(d, &["cam"]);
    // Another build of 1.0.0 (same name and version, other model bytes): its delta does not
    // apply to the camera's files, whatever the version says.
    let rebuilt_v1 = pack_retrained(d, "1.0.0", 0x33);
    let (bytes, base) = make_delta(d, &rebuilt_v1, &v2);
    let other = place(d, &bytes, base);
    list(d, &[other]);
    let p = poll(&open(d, "cam"), d, &as_is);
    assert_eq!(installed(&p.report), Version::new(1, 1, 0));
    assert!(
        p.asked.iter().all(|u| u.ends_with(".ampoule")),
        "{:?}",
        p.asked
    );
    assert_eq!(p.report.delta, None);
    assert!(
        p.report.delta_refused.is_none(),
        "{:?}",
        p.report.delta_refused
    );
    assert_eq!(p.report.downloaded, bundle);
    assert_eq!(files(d, "cam"), full_bundle_files(d));
}

/// Flips one byte in the middle of the first record's zstd frame in `patches.bin`.
fn alter_patch(delta: &[u8]) -> Vec<u8> {
    let head = read_head(&mut &delta[..]).expect("a delta");
    let padded = head.patches_len.div_ceil(512) * 512;
    // The archive ends with the patches, their padding and two zero blocks.
    let start = delta.len() - 1024 - padded as usize;
    let mut altered = delta.to_vec();
    altered[start + 24 + (head.patches_len as usize - 24) / 2] ^= 0x40;
    altered
}

/// Makes a bad delta from the bundles of 1.0.0, 1.1.0 and 1.2.0 and places it in the tree:
/// its listing, and the bytes the server sends instead of it (if other than the file's).
type MakeBad = fn(&Path, &str, &str, &str) -> (DeltaRef, Option<Vec<u8>>);

/// One way a delta fails, and what the report then says about it.
struct Bad {
    what: &'static str,
    make: MakeBad,
    kind: ErrorKind,
    says: &'static str,
}

fn bad_deltas() -> Vec<Bad> {
    vec![
        Bad {
            what: "altered patch",
            make: |d, v1, v2, _| {
                let (bytes, base) = make_delta(d, v1, v2);
                (place(d, &alter_patch(&bytes), base), None)
            },
            kind: ErrorKind::Digest,
            says: "delta record 0 does not decode",
        },
        Bad {
            what: "wrong digest from the server",
            make: |d, v1, v2, _| {
                let (bytes, base) = make_delta(d, v1, v2);
                let listed = place(d, &bytes, base);
                let mut sent = bytes;
                let last = sent.len() - 1500;
                sent[last] ^= 1;
                (listed, Some(sent))
            },
            kind: ErrorKind::Digest,
            says: "but the feed declares",
        },
        Bad {
            what: "truncated",
            make: |d, v1, v2, _| {
                let (bytes, base) = make_delta(d, v1, v2);
                (place(d, &bytes[..bytes.len() * 2 / 3], base), None)
            },
            kind: ErrorKind::Malformed,
            says: "delta is truncated",
        },
        Bad {
            what: "a genuine delta of another release",
            make: |d, v1, _, v3| {
                let (bytes, base) = make_delta(d, v1, v3);
                (place(d, &bytes, base), None)
            },
            kind: ErrorKind::Feed,
            says: "feed announced trailcam-species 1.1.0 but the bundle it points to is \
                   trailcam-species 1.2.0",
        },
    ]
}

#[test]
fn issue13_a_failed_delta_gives_way_to_the_full_bundle_in_the_same_update_never_to_another() {
    for bad in bad_deltas() {
        let dir = setup();
        let d = dir.path();
        let (v1, v2, bundle) = on_1_0_0_offered_1_1_0(d, &["cam"]);
        let v3 = pack_retrained(d, "1.2.0", 0x77);
        let (listed, sent) = (bad.make)(d, &v1, &v2, &v3);
        list(d, std::slice::from_ref(&listed));
        let serve = move |url: &str, bytes: Vec<u8>| {
            Some(match (&sent, url.ends_with(".ampoule-delta")) {
                (Some(sent), true) => sent.clone(),
                _ => bytes,
            })
        };
        let p = poll(&open(d, "cam"), d, &serve);
        let case = bad.what;
        assert_eq!(installed(&p.report), Version::new(1, 1, 0), "{case}");
        // The delta, then the bundle (its head, then the whole): never a second delta.
        assert_eq!(p.asked[0], delta_url(&listed), "{case}");
        assert!(
            p.asked[1..].iter().all(|u| u.ends_with(".ampoule")) && p.asked.len() == 3,
            "{case}: {:?}",
            p.asked
        );
        assert_eq!(p.report.delta, None, "{case}");
        let why = p
            .report
            .delta_refused
            .as_ref()
            .expect("why the delta was not used");
        assert_eq!(why.kind(), bad.kind, "{case}: {why}");
        let text = why.to_string();
        assert!(
            text.starts_with(&format!(
                "delta {} not used; the full bundle is downloaded instead",
                listed.sha256
            )) && text.contains(bad.says),
            "{case}: {text}"
        );
        assert_eq!(p.report.downloaded, listed.size + bundle, "{case}");
        assert_eq!(files(d, "cam"), full_bundle_files(d), "{case}");
    }
}

#[test]
fn issue13_a_failed_delta_is_remembered_and_not_downloaded_again() {
    for bad in bad_deltas() {
        let dir = setup();
        let d = dir.path();
        let (v1, v2, bundle) = on_1_0_0_offered_1_1_0(d, &["cam"]);
        let v3 = pack_retrained(d, "1.2.0", 0x77);
        let (listed, sent) = (bad.make)(d, &v1, &v2, &v3);
        list(d, std::slice::from_ref(&listed));
        let case = bad.what;
        // The delta fails, and so does the bundle's transfer after it.
        let serve = |url: &str, bytes: Vec<u8>| match (&sent, url.ends_with(".ampoule-delta")) {
            (Some(sent), true) => Some(sent.clone()),
            (None, true) => Some(bytes),
            (_, false) => None,
        };
        let device = open(d, "cam");
        let p = poll(&device, d, &serve);
        assert_eq!(p.report.outcome.name(), "failed", "{case}: {:?}", p.report);
        assert_eq!(p.asked.len(), 2, "{case}: {:?}", p.asked);
        assert_eq!(
            p.report.delta_refused.as_ref().map(|e| e.kind()),
            Some(bad.kind)
        );
        // The next poll goes straight to the bundle, and says why.
        let p = poll(&device, d, &as_is);
        assert_eq!(installed(&p.report), Version::new(1, 1, 0), "{case}");
        assert!(
            p.asked.iter().all(|u| u.ends_with(".ampoule")),
            "{case}: {:?}",
            p.asked
        );
        assert_eq!(p.written, bundle, "{case}");
        let why = p
            .report
            .delta_refused
            .as_ref()
            .expect("remembered")
            .to_string();
        assert!(
            why.starts_with(&format!("delta {}: ", listed.sha256))
                && why.contains(bad.says)
                && why.contains("remembered"),
            "{case}: {why}"
        );
    }
}

#[test]
fn issue13_a_delta_that_could_not_be_fetched_is_remembered_for_the_next_update() {
    let dir = setup();
    let d = dir.path();
    let (v1, v2, bundle) = on_1_0_0_offered_1_1_0(d, &["cam"]);
    let (bytes, base) = make_delta(d, &v1, &v2);
    let listed = place(d, &bytes, base);
    list(d, std::slice::from_ref(&listed));
    let device = open(d, "cam");
    // The app's transfer of the delta fails (a 404, say) and it ends the update.
    let p = poll(&device, d, &|_, _| None);
    assert_eq!(p.report.outcome.name(), "failed");
    assert_eq!(p.asked, [delta_url(&listed)]);
    // The next update takes the full bundle instead of trying the delta again.
    let p = poll(&device, d, &as_is);
    assert_eq!(installed(&p.report), Version::new(1, 1, 0));
    assert!(
        p.asked.iter().all(|u| u.ends_with(".ampoule")),
        "{:?}",
        p.asked
    );
    assert_eq!(p.written, bundle);
    let why = p.report.delta_refused.expect("remembered").to_string();
    assert!(why.contains("connection lost"), "{why}");
}

/// Flips one byte in the middle of the current release's model in `store` (same size).
fn alter_installed_model(d: &Path, store: &str) {
    let path = current_dir(d, store).join("model.bin");
    let mut bytes = std::fs::read(&path).expect("model");
    bytes[MODEL_BYTES / 2] ^= 0xff;
    std::fs::write(&path, bytes).expect("altered model");
}

#[test]
fn issue13_installed_files_altered_on_disk_get_no_delta_and_the_full_bundle_installs() {
    let dir = setup();
    let d = dir.path();
    let (v1, v2, bundle) = on_1_0_0_offered_1_1_0(d, &["cam", "cam2"]);
    let (bytes, base) = make_delta(d, &v1, &v2);
    let listed = place(d, &bytes, base);
    list(d, std::slice::from_ref(&listed));
    let reference = full_bundle_files(d);

    // Altered before the update: the store's check finds it, and no delta is downloaded.
    alter_installed_model(d, "cam");
    let p = poll(&open(d, "cam"), d, &as_is);
    assert_eq!(installed(&p.report), Version::new(1, 1, 0));
    assert!(
        p.asked.iter().all(|u| u.ends_with(".ampoule")),
        "{:?}",
        p.asked
    );
    assert_eq!(p.report.downloaded, bundle);
    let why = p.report.delta_refused.as_ref().expect("why no delta");
    assert_eq!(why.kind(), ErrorKind::Digest, "{why}");
    let text = why.to_string();
    assert!(
        text.starts_with(
            "no delta used, the installed release failed the store's check; the full bundle \
             is downloaded instead: stored release trailcam-species-1.0.0-"
        ) && text.contains("digest mismatch for 'model.bin'"),
        "{text}"
    );
    assert_eq!(files(d, "cam"), reference);

    // Altered after the check, while the delta downloads: the delta checks the base files
    // again before it reads a patch, and the full bundle follows in the same update.
    let serve = |url: &str, bytes: Vec<u8>| {
        if url.ends_with(".ampoule-delta") {
            alter_installed_model(d, "cam2");
        }
        Some(bytes)
    };
    let p = poll(&open(d, "cam2"), d, &serve);
    assert_eq!(installed(&p.report), Version::new(1, 1, 0));
    assert_eq!(p.asked[0], delta_url(&listed));
    assert_eq!(p.report.delta, None);
    let text = p.report.delta_refused.as_ref().expect("why").to_string();
    let altered = Digest::of(&std::fs::read(previous_model(d, "cam2")).expect("altered"));
    assert!(
        text.contains(&format!(
            "base file model.bin has sha256 {altered} ({MODEL_BYTES} bytes), but the delta \
             applies to sha256"
        )),
        "{text}"
    );
    assert!(
        text.contains("the installed files differ from the delta's base"),
        "{text}"
    );
    assert_eq!(files(d, "cam2"), reference);
}

/// The previous release's model in `store` (the one the delta was to apply to).
fn previous_model(d: &Path, store: &str) -> std::path::PathBuf {
    let state: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join(store).join("state.json")).expect("state"))
            .expect("state.json");
    let release = state["previous"]["release"]
        .as_str()
        .expect("a previous release");
    d.join(store)
        .join("releases")
        .join(release)
        .join("model.bin")
}

#[test]
fn issue13_over_http_the_update_uses_the_delta_and_falls_back_when_it_is_missing() {
    let dir = setup();
    let d = dir.path();
    let server =
        Server::start(d.join("tree"), "127.0.0.1:0".parse().expect("addr")).expect("server");
    let url = server.url("feeds/stable.json");
    let transfer = Transfer::new();
    let v1 = pack_retrained(d, "1.0.0", 0);
    publish_plain(d, &v1);
    for store in ["cam", "cam2"] {
        let report = open(d, store).update(&url, &transfer, Timestamp::now());
        assert_eq!(installed(&report), Version::new(1, 0, 0));
    }
    let v2 = pack_retrained(d, "1.1.0", 0x5a);
    publish_plain(d, &v2);
    let bundle = std::fs::metadata(d.join(&v2)).expect("bundle").len();
    let (bytes, base) = make_delta(d, &v1, &v2);
    let listed = place(d, &bytes, base);
    list(d, std::slice::from_ref(&listed));

    let report = open(d, "cam").update(&url, &transfer, Timestamp::now());
    assert_eq!(installed(&report), Version::new(1, 1, 0));
    assert_eq!(report.delta, Some(listed.sha256));
    assert_eq!(report.downloaded, listed.size);

    // The server lacks the delta: the bundle follows in the same update.
    std::fs::remove_file(d.join(format!("tree/bundles/{}.ampoule-delta", listed.sha256)))
        .expect("remove the delta");
    let report = open(d, "cam2").update(&url, &transfer, Timestamp::now());
    assert_eq!(installed(&report), Version::new(1, 1, 0));
    assert_eq!(report.delta, None);
    assert_eq!(report.downloaded, bundle);
    let why = report.delta_refused.as_ref().expect("why").to_string();
    assert!(why.contains("404"), "{why}");
    assert_eq!(files(d, "cam"), files(d, "cam2"));
}

#[test]
fn issue13_ampoule_update_says_a_delta_was_used_and_what_it_downloaded() {
    let dir = setup();
    let d = dir.path();
    let server =
        Server::start(d.join("tree"), "127.0.0.1:0".parse().expect("addr")).expect("server");
    let url = server.url("feeds/stable.json");
    let update = |store: &str, json: bool| {
        let mut args = vec![
            "update",
            "--store",
            store,
            "--feed",
            &url,
            "--trust",
            "k.pub",
            "--app-version",
            "2.3.0",
        ];
        if json {
            args.insert(0, "--json");
        }
        let out = Command::new(BIN)
            .args(&args)
            .current_dir(d)
            .output()
            .expect("ampoule runs");
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8(out.stdout).expect("UTF-8")
    };
    let v1 = pack_retrained(d, "1.0.0", 0);
    publish(d, &v1, "stable", "100");
    update("cam", false);
    update("cam2", false);
    let v2 = pack_retrained(d, "1.1.0", 0x5a);
    // `publish` makes the delta from 1.0.0 and lists it; the ledger is checked.
    publish(d, &v2, "stable", "100");
    let bundle = std::fs::metadata(d.join(&v2)).expect("bundle").len();
    let listed = read_feed(d, "stable").release.expect("offered").deltas[0].clone();

    let doc: serde_json::Value = serde_json::from_str(&update("cam", true)).expect("JSON");
    assert_eq!(doc["outcome"], "updated");
    assert_eq!(doc["downloaded_bytes"], listed.size);
    assert_eq!(doc["delta"]["sha256"], listed.sha256.to_string());
    assert_eq!(doc["delta"]["size"], listed.size);
    assert_eq!(doc["delta"]["base"], listed.base.to_string());
    assert_eq!(doc["delta_refused"], serde_json::Value::Null);
    assert_eq!(
        doc["offered"]["deltas"][0]["sha256"],
        listed.sha256.to_string()
    );

    let text = update("cam2", false);
    assert!(
        text.trim_end().ends_with(&format!(
            "; downloaded {} bytes (delta {}) instead of the bundle's {bundle} bytes",
            listed.size, listed.sha256
        )),
        "{text}"
    );
}

#[test]
fn issue13_an_offline_install_takes_the_bundle_even_when_the_feed_lists_a_delta() {
    let dir = setup();
    let d = dir.path();
    let camera = || Device::open(&d.join("cam"), "stable", pinned_app(d), Timestamp::now());
    let v1 = pack_retrained(d, "1.0.0", 0);
    publish(d, &v1, "stable", "100");
    assert_eq!(
        installed(&poll(&camera().expect("open"), d, &as_is).report),
        Version::new(1, 0, 0)
    );
    let v2 = pack_retrained(d, "1.1.0", 0x5a);
    publish(d, &v2, "stable", "100");
    assert_eq!(
        read_feed(d, "stable")
            .release
            .expect("offered")
            .deltas
            .len(),
        1
    );
    // The offline file carries the feed (with its delta listed) and the bundle alone.
    ok(
        d,
        &[
            "offline",
            "--tree",
            "tree",
            "--channel",
            "stable",
            "-o",
            "stable.ampoule-offline",
        ],
    );
    let report = camera()
        .expect("open")
        .install_offline(&d.join("stable.ampoule-offline"), Timestamp::now());
    assert_eq!(installed(&report), Version::new(1, 1, 0));
    assert_eq!(report.delta, None);
    assert!(report.delta_refused.is_none(), "{:?}", report.delta_refused);
    assert_eq!(files(d, "cam"), full_bundle_files(d));
}
