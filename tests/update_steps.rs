//! The library's update driven step by step, as an app with its own HTTP stack drives it: no
//! `fetch`, no server. The "app" here answers every request from the release tree's files on
//! disk, which is what any static web server would send. The tree is made by the real
//! `ampoule` binary (publish, ledger, consistency steps).

mod tree_common;

use std::io::{Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use ampoule_verify::update::{Download, Next};
use ampoule_verify::{App, Device, Digest, ErrorKind, Outcome, Report, Timestamp, Version};
use tree_common::*;

/// Any base works: the test maps each URL back to a file of the tree.
const BASE: &str = "https://models.example.invalid/";

fn feed_url(channel: &str) -> String {
    format!("{BASE}feeds/{channel}.json")
}

fn tree_file(d: &Path, url: &str) -> PathBuf {
    let path = url
        .strip_prefix(BASE)
        .unwrap_or_else(|| panic!("the session asked for {url}, outside the tree"));
    d.join("tree").join(path)
}

fn app(d: &Path) -> App {
    pinned_app(d)
}

/// What the app did during one update.
#[derive(Debug, Default)]
struct Asked {
    fetched: Vec<String>,
    downloads: usize,
}

/// What the "app" does with a download: write it somewhere and hand in the path, or give up.
type Transfer<'a> = &'a dyn Fn(&Path, &Download) -> Option<PathBuf>;

/// Runs one update by hand on the channel's feed as the tree serves it: every fetch is
/// answered from the tree's files, and `transfer` gets the served bundle's path and the
/// session's download request.
fn run(device: &Device, d: &Path, channel: &str, transfer: Transfer<'_>) -> (Report, Asked) {
    let url = feed_url(channel);
    let feed = std::fs::read(tree_file(d, &url)).expect("feed file");
    let mut session = device.begin(&url, feed, Timestamp::now());
    let mut asked = Asked::default();
    loop {
        match session.advance() {
            Next::Fetch(want) => {
                asked.fetched.push(want.url().to_string());
                let bytes = std::fs::read(tree_file(d, want.url())).expect("asked-for file");
                assert!(bytes.len() as u64 <= want.max_bytes());
                session.provide(bytes);
            }
            Next::Download(want) => {
                asked.downloads += 1;
                let served = tree_file(d, &want.urls()[0]);
                assert_eq!(
                    std::fs::metadata(&served).expect("bundle").len(),
                    want.size()
                );
                match transfer(&served, &want) {
                    Some(landed) => session.downloaded(&landed),
                    None => return (session.fail("connection lost"), asked),
                }
            }
            Next::Done(report) => return (report, asked),
            other => panic!("unexpected step {other:?}"),
        }
    }
}

/// One update whose download a platform transfer service writes wherever it likes (the app
/// hands the path in); `bundle` gives the bytes it writes.
fn drive(
    device: &Device,
    d: &Path,
    channel: &str,
    bundle: &dyn Fn(&Path) -> Vec<u8>,
) -> (Report, Asked) {
    let landed = d.join("transfer-service.bin");
    run(device, d, channel, &|served, _| {
        std::fs::write(&landed, bundle(served)).expect("downloaded file");
        Some(landed.clone())
    })
}

fn as_served(path: &Path) -> Vec<u8> {
    std::fs::read(path).expect("bundle file")
}

fn installed_version(report: &Report) -> Version {
    match &report.outcome {
        Outcome::Installed(installed) => installed.release.manifest.version.clone(),
        other => panic!("expected an install, got {other:?}"),
    }
}

#[test]
fn issue9_step_by_step_update_installs_catches_up_and_refuses_without_fetch() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let device = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");

    let (report, asked) = drive(&device, d, "stable", &as_served);
    assert_eq!(installed_version(&report), Version::new(1, 0, 0));
    assert!(asked.fetched.is_empty(), "{asked:?}");
    assert_eq!(asked.downloads, 1);
    assert_eq!(report.feed.as_ref().map(|f| f.sequence()), Some(1));
    let current = device.current().expect("open current").expect("a model");
    assert_eq!(current.labels.len(), 6);

    let (report, asked) = drive(&device, d, "stable", &as_served);
    assert!(matches!(report.outcome, Outcome::UpToDate), "{report:?}");
    assert_eq!(asked.downloads, 0);

    // Two appends the device never sees (another channel), then a release on its own: the
    // device walks the tree's consistency steps from the head it remembers (size 1).
    publish(d, &v1, "beta", "100");
    publish(d, &v1, "beta", "100");
    publish(d, &pack(d, "1.1.0", 1, "k.pem"), "stable", "100");
    let (report, asked) = drive(&device, d, "stable", &as_served);
    assert_eq!(installed_version(&report), Version::new(1, 1, 0));
    assert_eq!(
        asked.fetched,
        [
            format!("{BASE}ledger/consistency/1.json"),
            format!("{BASE}ledger/consistency/2.json"),
        ]
    );
    let state = device.store().state().expect("state");
    assert_eq!(state.tree_head.map(|h| h.tree_size), Some(4));

    // A download that is not the file the feed signed: refused before the bundle is opened,
    // and the running model stays.
    publish(d, &pack(d, "1.2.0", 2, "k.pem"), "stable", "100");
    let (report, _) = drive(&device, d, "stable", &|path| {
        let mut bytes = as_served(path);
        let last = bytes.len() - 1;
        bytes[last] ^= 1;
        bytes
    });
    let Outcome::Refused(e) = &report.outcome else {
        panic!("expected a refusal, got {report:?}");
    };
    assert_eq!(e.kind(), ErrorKind::Digest);
    assert!(
        e.to_string().contains("transfer-service.bin has SHA-256 "),
        "{e}"
    );
    assert_eq!(
        device
            .store()
            .state()
            .expect("state")
            .current
            .map(|c| c.version),
        Some(Version::new(1, 1, 0))
    );
    // The next update with the right bytes installs it.
    let (report, _) = drive(&device, d, "stable", &as_served);
    assert_eq!(installed_version(&report), Version::new(1, 2, 0));
}

#[test]
fn issue9_a_store_follows_one_channel_until_switched() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    publish(d, &pack(d, "1.1.0", 1, "k.pem"), "beta", "100");
    let store = d.join("cam");
    let stable = Device::open(&store, "stable", app(d), Timestamp::now()).expect("open");
    assert_eq!(
        installed_version(&drive(&stable, d, "stable", &as_served).0),
        Version::new(1, 0, 0)
    );

    let beta = Device::open(&store, "beta", app(d), Timestamp::now()).expect("open");
    let (report, asked) = drive(&beta, d, "beta", &as_served);
    let Outcome::Refused(e) = &report.outcome else {
        panic!("expected a refusal, got {report:?}");
    };
    assert_eq!(e.kind(), ErrorKind::Policy);
    assert_eq!(
        e.to_string(),
        format!(
            "store {} follows channel 'stable', not 'beta'; switching channels is an explicit \
             step (Device::switch_channel, or `ampoule update --switch-channel`)",
            store.display()
        )
    );
    assert_eq!(asked.downloads, 0);

    beta.switch_channel().expect("switch");
    assert_eq!(
        installed_version(&drive(&beta, d, "beta", &as_served).0),
        Version::new(1, 1, 0)
    );
}

#[test]
fn issue9_the_app_size_limit_is_checked_before_anything_is_downloaded() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let size = std::fs::metadata(d.join(&v1)).expect("bundle").len();
    let app = app(d).max_bundle_bytes(size - 1);
    let device = Device::open(&d.join("cam"), "stable", app, Timestamp::now()).expect("open");
    let (report, asked) = drive(&device, d, "stable", &as_served);
    let Outcome::Refused(e) = &report.outcome else {
        panic!("expected a refusal, got {report:?}");
    };
    assert_eq!(e.kind(), ErrorKind::TooLarge);
    assert_eq!(
        e.to_string(),
        format!(
            "feed offers trailcam-species 1.0.0 as a bundle of {size} bytes, over this app's \
             limit of {} bytes; nothing was downloaded",
            size - 1
        )
    );
    assert_eq!(asked.downloads, 0);
}

#[test]
fn issue9_a_feed_in_a_newer_format_needs_another_app_and_downloads_nothing() {
    let dir = setup();
    let d = dir.path();
    publish(d, &pack(d, "1.0.0", 0, "k.pem"), "stable", "100");
    // The same feed, validly signed, as a later format: this build cannot read it.
    let feed_path = d.join("tree/feeds/stable.json");
    let signed =
        ampoule_verify::feed::SignedFeed::from_json(&std::fs::read(&feed_path).expect("feed"))
            .expect("feed");
    let text = signed.feed.replacen("{\"format\":2,", "{\"format\":3,", 1);
    assert_ne!(text, signed.feed);
    let resigned = signed_feed_file(d, "k.pem", text);
    std::fs::write(&feed_path, resigned.to_json()).expect("newer feed");
    let device = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    for _ in 0..2 {
        let (report, asked) = drive(&device, d, "stable", &as_served);
        match &report.outcome {
            Outcome::NeedsOtherApp { reason } => assert_eq!(
                reason,
                "the feed is in format 3, and this app's ampoule-verify reads format 2; update \
                 the app"
            ),
            other => panic!("expected needs_other_app, got {other:?}"),
        }
        assert_eq!(asked.downloads, 0);
    }

    // Signed by a stranger, the same newer format is a plain refusal: a format number is
    // believed only from a signed feed.
    ok(
        d,
        &["keygen", "--secret", "other.pem", "--public", "other.pub"],
    );
    let forged = signed_feed_file(d, "other.pem", resigned.feed.clone());
    std::fs::write(&feed_path, forged.to_json()).expect("forged feed");
    let (report, _) = drive(&device, d, "stable", &as_served);
    assert!(
        matches!(&report.outcome, Outcome::Refused(e) if e.kind() == ErrorKind::Signature),
        "{report:?}"
    );
}

#[test]
fn issue9_a_finished_session_driven_again_fails_without_touching_the_store() {
    let dir = setup();
    let d = dir.path();
    publish(d, &pack(d, "1.0.0", 0, "k.pem"), "stable", "100");
    let device = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let url = feed_url("stable");
    let feed = std::fs::read(tree_file(d, &url)).expect("feed file");
    let mut session = device.begin(&url, feed, Timestamp::now());
    let mut first = None;
    while first.is_none() {
        match session.advance() {
            Next::Download(want) => {
                std::fs::copy(tree_file(d, &want.urls()[0]), want.path()).expect("copy");
                session.downloaded(want.path());
            }
            Next::Done(report) => first = Some(report),
            other => panic!("unexpected step {other:?}"),
        }
    }
    assert_eq!(
        installed_version(&first.expect("report")),
        Version::new(1, 0, 0)
    );
    let before = std::fs::read(d.join("cam/state.json")).expect("state");
    // The app's mistake: driving it again. A failure (not a refusal), and nothing changes.
    match session.advance() {
        Next::Done(report) => match &report.outcome {
            Outcome::Failed(e) => {
                assert_eq!(e.kind(), ErrorKind::Settings);
                assert_eq!(e.to_string(), "this update already ended; start another");
            }
            other => panic!("expected a failure, got {other:?}"),
        },
        other => panic!("expected the end, got {other:?}"),
    }
    assert_eq!(
        std::fs::read(d.join("cam/state.json")).expect("state"),
        before
    );
}

/// One update on `stable` whose download goes to the session's own path, complete or (as a
/// lost connection leaves it) half of it; and the documents it asked for.
fn drive_partly(device: &Device, d: &Path, complete: bool) -> (Report, Vec<String>) {
    let (report, asked) = run(device, d, "stable", &|served, want| {
        let bytes = as_served(served);
        let part = if complete {
            &bytes[..]
        } else {
            &bytes[..bytes.len() / 2]
        };
        // As the crate documents: through the file the store opened, appended at its end.
        let mut file = want.file().expect("the store's download file");
        let have = file.metadata().expect("size").len() as usize;
        file.seek(SeekFrom::End(0)).expect("seek");
        file.write_all(&part[have.min(part.len())..])
            .expect("write");
        complete.then(|| want.path().to_path_buf())
    });
    (report, asked.fetched)
}

/// A camera that installed 1.0.0 from `stable`, and that bundle's file name.
fn camera_on_1_0_0(d: &Path) -> (Device, String) {
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let device = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    assert_eq!(
        installed_version(&drive_partly(&device, d, true).0),
        Version::new(1, 0, 0)
    );
    (device, v1)
}

fn downloads(d: &Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(d.join("cam/downloads"))
        .expect("downloads")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .filter(|n| n != "lock")
        .collect();
    names.sort();
    names
}

#[test]
fn issue9_review_steps_are_walked_once_and_superseded_partials_are_removed() {
    let dir = setup();
    let d = dir.path();
    let (device, v1) = camera_on_1_0_0(d);
    publish(d, &v1, "beta", "100");
    publish(d, &v1, "beta", "100");
    publish(d, &pack(d, "1.1.0", 1, "k.pem"), "stable", "100");
    // The walk to the new head happens once: the proven head is remembered before the
    // download, so an interrupted download does not cost the next update the same steps.
    let (report, first) = drive_partly(&device, d, false);
    assert!(matches!(report.outcome, Outcome::Failed(_)), "{report:?}");
    assert_eq!(first.len(), 2, "{first:?}");
    let (_, second) = drive_partly(&device, d, false);
    assert!(second.is_empty(), "walked again: {second:?}");
    assert_eq!(
        downloads(d).len(),
        1,
        "the partial of 1.1.0 is kept for resuming"
    );
    // 1.2.0 supersedes 1.1.0: the abandoned partial goes as soon as another is handed out.
    publish(d, &pack(d, "1.2.0", 2, "k.pem"), "stable", "100");
    assert_eq!(
        installed_version(&drive_partly(&device, d, true).0),
        Version::new(1, 2, 0)
    );
    assert!(downloads(d).is_empty(), "{:?}", downloads(d));
    // A partial left some other way is removed by gc too.
    std::fs::write(d.join("cam/downloads/stray.partial"), b"x").expect("stray");
    device.gc().expect("gc");
    assert!(downloads(d).is_empty(), "{:?}", downloads(d));
}

#[test]
fn issue9_review_another_channels_newer_format_feed_is_refused_not_needs_other_app() {
    let dir = setup();
    let d = dir.path();
    let (device, v1) = camera_on_1_0_0(d);
    publish(d, &v1, "beta", "100");
    // beta moved to feed format 3, and a hostile server serves it at stable's URL.
    let beta = ampoule_verify::feed::SignedFeed::from_json(
        &std::fs::read(d.join("tree/feeds/beta.json")).expect("beta"),
    )
    .expect("beta feed");
    let text = beta.feed.replacen("{\"format\":2,", "{\"format\":3,", 1);
    std::fs::write(
        d.join("tree/feeds/stable.json"),
        signed_feed_file(d, "k.pem", text).to_json(),
    )
    .expect("served at stable's URL");
    let (report, _) = drive_partly(&device, d, true);
    assert_eq!(
        refusal(&report).to_string(),
        "feed format 3 is not supported (this reader knows formats 1 to 2)"
    );
}

#[test]
fn issue9_review_a_feed_whose_consistency_walk_failed_is_not_reported() {
    let dir = setup();
    let d = dir.path();
    let (device, v1) = camera_on_1_0_0(d);
    publish(d, &v1, "beta", "100");
    publish(d, &pack(d, "1.1.0", 1, "k.pem"), "stable", "100");
    let url = feed_url("stable");
    let mut session = device.begin(
        &url,
        std::fs::read(tree_file(d, &url)).expect("feed"),
        Timestamp::now(),
    );
    let Next::Fetch(want) = session.advance() else {
        panic!("expected the consistency step to be asked for");
    };
    assert_eq!(want.url(), format!("{BASE}ledger/consistency/1.json"));
    session.provide(b"{}".to_vec());
    let Next::Done(report) = session.advance() else {
        panic!("expected the end");
    };
    assert!(
        matches!(&report.outcome, Outcome::Refused(e) if e.kind() == ErrorKind::Proof),
        "{report:?}"
    );
    assert!(
        report.feed.is_none(),
        "a feed whose ledger walk failed was reported"
    );
}

#[test]
fn issue9_review_a_second_downloaded_call_changes_nothing() {
    let dir = setup();
    let d = dir.path();
    publish(d, &pack(d, "1.0.0", 0, "k.pem"), "stable", "100");
    let device = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let url = feed_url("stable");
    let mut session = device.begin(
        &url,
        std::fs::read(tree_file(d, &url)).expect("feed"),
        Timestamp::now(),
    );
    let Next::Download(want) = session.advance() else {
        panic!("expected the download");
    };
    std::fs::copy(tree_file(d, &want.urls()[0]), want.path()).expect("copy");
    // A transfer service's duplicate completion callback.
    session.downloaded(want.path());
    session.downloaded(want.path());
    let Next::Done(report) = session.advance() else {
        panic!("expected the end");
    };
    assert_eq!(installed_version(&report), Version::new(1, 0, 0));
    assert!(downloads(d).is_empty(), "{:?}", downloads(d));
}

/// The store's download directory replaced by a link to a directory outside the store (what
/// someone with write access to the store can do): the clean-up of downloads never deletes
/// through it.
#[cfg(unix)]
#[test]
fn issue9_review_a_linked_download_directory_is_not_swept() {
    let dir = setup();
    let d = dir.path();
    let (device, _) = camera_on_1_0_0(d);
    let outside = d.join("app-data");
    std::fs::create_dir(&outside).expect("outside dir");
    std::fs::write(outside.join("photos.db"), b"the app's own data").expect("outside file");
    std::fs::remove_dir_all(d.join("cam/downloads")).expect("remove downloads");
    std::os::unix::fs::symlink(&outside, d.join("cam/downloads")).expect("plant the link");
    publish(d, &pack(d, "1.1.0", 1, "k.pem"), "stable", "0");
    let (report, _) = drive_partly(&device, d, true);
    assert!(
        matches!(report.outcome, Outcome::NotInRollout { .. }),
        "{report:?}"
    );
    device.gc().expect("gc");
    assert_eq!(
        std::fs::read(outside.join("photos.db")).expect("still there"),
        b"the app's own data"
    );
}

// Issue 10 item 2: links and other files planted where the store keeps its own. Whoever can
// write the store directory (an SD card, a shared folder) gains nothing beyond deleting it:
// nothing outside the store is written, truncated or removed, and the update goes on.

/// A file of the app's own outside the store, which a planted link points at.
fn outside_file(d: &Path) -> PathBuf {
    let outside = d.join("app-data");
    std::fs::create_dir_all(&outside).expect("outside dir");
    let file = outside.join("photos.db");
    std::fs::write(&file, b"the app's own data").expect("outside file");
    file
}

fn assert_untouched(file: &Path) {
    assert_eq!(
        std::fs::read(file).expect("the outside file is still there"),
        b"the app's own data",
        "{} was written through a planted link",
        file.display()
    );
}

/// Publishes 1.1.0 on `stable` for everyone; returns its partial download's name, which
/// anyone can work out from the public feed (the bundle's SHA-256).
fn offer_1_1_0(d: &Path) -> String {
    let v2 = pack(d, "1.1.0", 1, "k.pem");
    publish(d, &v2, "stable", "100");
    let bytes = std::fs::read(d.join(&v2)).expect("bundle");
    format!("{}.ampoule.partial", ampoule_verify::Digest::of(&bytes))
}

fn removed_mentions(report: &Report, what: &str) -> bool {
    report.removed.iter().any(|r| r.contains(what))
}

/// A camera on 1.0.0 offered 1.1.0, with `plant` run on the download directory, the partial
/// download's name and a file of the app's own outside the store: the update installs, the
/// outside file is untouched, and the report names what was removed with `removed`.
fn planted_at_the_partial_download(plant: impl Fn(&Path, &str, &Path), removed: &str) {
    let dir = setup();
    let d = dir.path();
    let (device, _) = camera_on_1_0_0(d);
    let partial = offer_1_1_0(d);
    let victim = outside_file(d);
    plant(&d.join("cam/downloads"), &partial, &victim);
    let (report, _) = drive_partly(&device, d, true);
    assert_eq!(installed_version(&report), Version::new(1, 1, 0));
    assert_untouched(&victim);
    let removed = removed.replace("{partial}", &partial);
    assert!(
        removed_mentions(&report, &removed),
        "{removed}: {:?}",
        report.removed
    );
}

#[test]
fn issue10_a_link_at_the_partial_download_name_is_unlinked_and_its_target_untouched() {
    planted_at_the_partial_download(
        |downloads, partial, victim| {
            std::os::unix::fs::symlink(victim, downloads.join(partial)).expect("plant the link");
        },
        "{partial} (a symbolic link)",
    );
}

#[test]
fn issue10_a_hard_link_at_a_recorded_partial_download_is_never_resumed() {
    planted_at_the_partial_download(
        |downloads, partial, victim| {
            // The attacker also writes the name into the download lock, as the store records
            // the download it started.
            std::fs::write(downloads.join("lock"), partial).expect("record");
            std::fs::hard_link(victim, downloads.join(partial)).expect("hard link");
        },
        "has 2 hard links; a file the store wrote has one",
    );
}

#[test]
fn issue10_a_linked_releases_directory_is_replaced_and_nothing_outside_is_deleted() {
    let dir = setup();
    let d = dir.path();
    let (device, _) = camera_on_1_0_0(d);
    let victim = outside_file(d);
    let outside = victim.parent().expect("dir").to_path_buf();
    // releases/ becomes a link to the app's data, which also holds a directory named like a
    // stale release that gc would remove.
    std::fs::create_dir(outside.join("trailcam-species-0.9.0-000000000000")).expect("decoy");
    std::fs::rename(d.join("cam/releases"), d.join("releases-moved")).expect("move aside");
    std::os::unix::fs::symlink(&outside, d.join("cam/releases")).expect("plant the link");
    offer_1_1_0(d);
    let (report, _) = drive_partly(&device, d, true);
    assert_eq!(installed_version(&report), Version::new(1, 1, 0));
    device.gc().expect("gc");
    assert_untouched(&victim);
    assert!(outside.join("trailcam-species-0.9.0-000000000000").is_dir());
    assert!(
        removed_mentions(&report, "releases (releases is a symbolic link"),
        "{:?}",
        report.removed
    );
    assert!(
        !std::fs::symlink_metadata(d.join("cam/releases"))
            .expect("releases")
            .file_type()
            .is_symlink()
    );
    // store status names what was removed, from state.json.
    let state: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("cam/state.json")).expect("state"))
            .expect("json");
    assert!(
        state["removed"].as_array().is_some_and(|r| r
            .iter()
            .any(|v| v.as_str().unwrap_or("").contains("releases"))),
        "{state}"
    );
}

#[test]
fn issue10_dangling_links_at_the_locks_and_device_id_create_nothing_outside() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &v1, "stable", "100");
    let cam = d.join("cam");
    std::fs::create_dir_all(cam.join("downloads")).expect("store dirs");
    let target = |name: &str| d.join("app-data").join(name);
    std::fs::create_dir_all(d.join("app-data")).expect("outside");
    for (link, name) in [
        ("lock", "store-lock"),
        ("device-id", "device-id"),
        ("downloads/lock", "download-lock"),
    ] {
        std::os::unix::fs::symlink(target(name), cam.join(link)).expect("plant");
    }
    let device =
        Device::open(&cam, "stable", pinned_app_own_id(d), Timestamp::now()).expect("open");
    let (report, _) = drive_partly(&device, d, true);
    assert_eq!(installed_version(&report), Version::new(1, 0, 0));
    for name in ["store-lock", "device-id", "download-lock"] {
        assert!(
            std::fs::symlink_metadata(target(name)).is_err(),
            "a dangling link made {name} outside the store"
        );
    }
    for link in ["lock", "device-id", "downloads/lock"] {
        assert!(
            std::fs::symlink_metadata(cam.join(link)).is_ok_and(|m| m.is_file()),
            "{link} is a file of the store's own again"
        );
        assert!(
            removed_mentions(&report, &format!("{link} is a symbolic link"))
                || removed_mentions(&report, &format!("{link} (")),
            "{link}: {:?}",
            report.removed
        );
    }
}

#[test]
fn issue10_a_linked_state_file_is_refused_with_how_to_clear_it() {
    let dir = setup();
    let d = dir.path();
    let (_device, _) = camera_on_1_0_0(d);
    let cam = d.join("cam");
    let elsewhere = d.join("state-elsewhere.json");
    std::fs::rename(cam.join("state.json"), &elsewhere).expect("move");
    std::os::unix::fs::symlink(&elsewhere, cam.join("state.json")).expect("plant");
    let err = Device::open(&cam, "stable", app(d), Timestamp::now()).expect_err("refused");
    assert_eq!(err.kind(), ErrorKind::Store);
    assert_eq!(
        err.to_string(),
        format!(
            "{} cannot be read: state.json is a symbolic link where the store keeps a file; \
             ampoule-verify did not write it. Remove it and move the store's other files aside \
             to start the store afresh",
            cam.join("state.json").display()
        )
    );
}

// Issue 10 items 3 and 5: the bundle's size is bound by its signers, checked from its head
// before the payload is downloaded; a refusal is remembered so that a metered link does not
// carry the same refused bundle again on every poll.

/// One update whose downloads write exactly what the session asks for from the served file,
/// through the store's file; returns the report and the bytes written.
fn drive_counting(device: &Device, d: &Path, now: Timestamp) -> (Report, u64) {
    drive_damaging(device, d, now, None)
}

/// [`drive_counting`], with the bit at `damage` of the served bundle flipped on the way.
fn drive_damaging(
    device: &Device,
    d: &Path,
    now: Timestamp,
    damage: Option<usize>,
) -> (Report, u64) {
    let url = feed_url("stable");
    let feed = std::fs::read(tree_file(d, &url)).expect("feed file");
    let mut session = device.begin(&url, feed, now);
    let mut written = 0u64;
    loop {
        match session.advance() {
            Next::Fetch(want) => {
                session.provide(std::fs::read(tree_file(d, want.url())).expect("file"));
            }
            Next::Download(want) => {
                let mut served = as_served(&tree_file(d, &want.urls()[0]));
                if let Some(at) = damage {
                    served[at] ^= 0x04;
                }
                let mut file = want.file().expect("the store's download file");
                let have = file.metadata().expect("size").len();
                // A file that holds the head already (a resumed download) needs nothing more
                // for the head.
                let upto = want.size().min(served.len() as u64).max(have);
                file.seek(SeekFrom::End(0)).expect("seek");
                file.write_all(&served[have as usize..upto as usize])
                    .expect("write");
                written += upto - have;
                session.downloaded(want.path());
            }
            Next::Done(report) => return (report, written),
            other => panic!("unexpected step {other:?}"),
        }
    }
}

fn refusal(report: &Report) -> &ampoule_verify::Error {
    match &report.outcome {
        Outcome::Refused(e) => e,
        other => panic!("expected a refusal, got {other:?}"),
    }
}

#[test]
fn issue10_a_feed_that_overstates_the_size_costs_the_head_alone() {
    let dir = setup();
    let d = dir.path();
    let (real, claimed) = publish_with_overstated_size(d);
    let device = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let (report, written) = drive_counting(&device, d, Timestamp::now());
    let e = refusal(&report);
    assert_eq!(e.kind(), ErrorKind::Feed);
    assert_eq!(
        e.to_string(),
        format!(
            "feed offers trailcam-species 1.0.0 as {claimed} bytes, but its signed manifest \
             makes the bundle {real} bytes; refusing it before its payload is downloaded"
        )
    );
    assert_eq!(written, ampoule_verify::format::limit::HEAD_BYTES);
    assert!(
        downloads(d).iter().all(|n| !n.ends_with(".partial")),
        "the head was discarded: {:?}",
        downloads(d)
    );
    // The next poll downloads nothing at all.
    let (report, written) = drive_counting(&device, d, Timestamp::now());
    assert!(
        refusal(&report).to_string().starts_with(&format!(
            "feed offers trailcam-species 1.0.0 as {claimed} bytes"
        )),
        "{report:?}"
    );
    assert!(refusal(&report).to_string().contains("remembered"));
    assert_eq!(written, 0);
}

#[test]
fn issue10_a_refusal_after_a_full_download_is_remembered_until_the_offer_or_app_changes() {
    let dir = setup();
    let d = dir.path();
    let bundle = pack_large(d, "1.0.0");
    publish(d, &bundle, "stable", "100");
    // This app needs a label the bundle lacks: only the unpacked label list shows it, after
    // the whole bundle came.
    let needs_lynx = |version: Version| {
        pinned_app_version(d, version)
            .device_id("camera-7")
            .expect("id")
            .compatibility(
                ampoule_verify::CompatibilityPolicy::builder()
                    .require_label("lynx")
                    .build()
                    .expect("policy"),
            )
    };
    let device = Device::open(
        &d.join("cam"),
        "stable",
        needs_lynx(Version::new(2, 3, 0)),
        Timestamp::now(),
    )
    .expect("open");
    let whole = std::fs::metadata(tree_file(
        d,
        &read_feed(d, "stable")
            .release
            .expect("offered")
            .urls(&feed_url("stable"))
            .expect("urls")[0],
    ))
    .expect("bundle")
    .len();
    let now = Timestamp::now();
    let (report, written) = drive_counting(&device, d, now);
    let first = refusal(&report).to_string();
    assert_eq!(refusal(&report).kind(), ErrorKind::Incompatible, "{first}");
    assert_eq!(written, whole, "{first}");
    // Polls within a day, even of a renewed feed, download nothing.
    let renewed = publish(d, &bundle, "stable", "100");
    assert!(renewed.to_string().contains("renew"), "{renewed}");
    let (report, written) = drive_counting(&device, d, now);
    assert_eq!(written, 0, "{report:?}");
    assert!(
        refusal(&report).to_string().starts_with(&first),
        "{report:?}"
    );
    assert!(refusal(&report).to_string().contains("remembered"));
    // After 24 hours the bundle is worth another look.
    let later = Timestamp::from_unix(now.unix() + 24 * 3600 + 60).expect("time");
    let (_, written) = drive_counting(&device, d, later);
    assert_eq!(written, whole);
    // So it is at once for another app version.
    drop(device);
    let other = Device::open(
        &d.join("cam"),
        "stable",
        needs_lynx(Version::new(2, 4, 0)),
        Timestamp::now(),
    )
    .expect("open");
    let (_, written) = drive_counting(&other, d, now);
    assert_eq!(written, whole);
}

/// Issue 10 item 1: a planted highest version (or model line) in `state.json` used to lock the
/// device out for good. The store believes only what the signed manifests it keeps prove.
#[test]
fn issue10_a_planted_highest_version_or_model_line_is_not_believed() {
    let dir = setup();
    let d = dir.path();
    let (device, _) = camera_on_1_0_0(d);
    let path = d.join("cam/state.json");
    let mut state: serde_json::Value =
        serde_json::from_slice(&std::fs::read(&path).expect("state")).expect("json");
    state["highest_version"] = "999.0.0".into();
    state["channels"]["stable"]["highest_version"] = "999.0.0".into();
    state["name"] = "someone-elses-line".into();
    std::fs::write(&path, serde_json::to_vec_pretty(&state).expect("json")).expect("plant");
    // A garbage proof of the highest version is no proof either.
    std::fs::write(d.join("cam/highest.json"), b"{\"manifest\": \"999\"}").expect("plant");
    let seen = device.store().state().expect("state");
    assert_eq!(seen.highest_version, Some(Version::new(1, 0, 0)));
    assert_eq!(seen.name.as_deref(), Some("trailcam-species"));
    publish(d, &pack(d, "1.1.0", 1, "k.pem"), "stable", "100");
    let (report, _) = drive_partly(&device, d, true);
    assert_eq!(installed_version(&report), Version::new(1, 1, 0));
    // And the real floor holds: 1.0.0 again is refused as a downgrade.
    let state = device.store().state().expect("state");
    assert_eq!(state.highest_version, Some(Version::new(1, 1, 0)));
}

/// Issue 10 item 1: a planted feed sequence of 2^64-1 or a made-up tree head in `state.json`
/// used to make the device refuse every genuine feed for good. The store believes them only as
/// far as the signed feed it kept proves them.
#[test]
fn issue10_a_planted_sequence_or_tree_head_is_not_believed() {
    let dir = setup();
    let d = dir.path();
    let (device, _) = camera_on_1_0_0(d);
    let path = d.join("cam/state.json");
    let mut state: serde_json::Value =
        serde_json::from_slice(&std::fs::read(&path).expect("state")).expect("json");
    state["channels"]["stable"]["highest_sequence"] = u64::MAX.into();
    state["tree_head"] = serde_json::json!({
        "tree_size": 1_000_000,
        "root_hash": "ab".repeat(32),
        "time": 1_800_000_000u64,
    });
    std::fs::write(&path, serde_json::to_vec_pretty(&state).expect("json")).expect("plant");
    let seen = device.store().state().expect("state");
    assert_eq!(seen.last_feed("stable").map(|(s, _)| s), Some(1));
    assert_eq!(seen.tree_head.map(|h| h.tree_size), Some(1));
    publish(d, &pack(d, "1.1.0", 1, "k.pem"), "stable", "100");
    let (report, _) = drive_partly(&device, d, true);
    assert_eq!(installed_version(&report), Version::new(1, 1, 0));

    // A kept feed that is not a genuine one proves nothing either: the values are absent,
    // and the next genuine feed is taken.
    std::fs::write(d.join("cam/feeds/stable.json"), b"{\"feed\": \"forged\"}").expect("plant");
    let seen = device.store().state().expect("state");
    assert_eq!(seen.last_feed("stable"), None);
    assert_eq!(seen.tree_head, None);
    publish(d, &pack(d, "1.2.0", 2, "k.pem"), "stable", "100");
    let (report, _) = drive_partly(&device, d, true);
    assert_eq!(installed_version(&report), Version::new(1, 2, 0));
}

/// Issue 10 item 5, from the web server's side: a head is not covered by any digest until the
/// whole file is there, so a server that serves another genuine bundle's head gets it refused,
/// but not remembered. Once the server serves the right file, the next update installs.
#[test]
fn issue10_a_head_the_server_swapped_is_refused_but_not_remembered() {
    let dir = setup();
    let d = dir.path();
    let genuine = pack_large(d, "1.0.0");
    publish(d, &genuine, "stable", "100");
    let other = pack_large(d, "2.0.0");
    let url = read_feed(d, "stable")
        .release
        .expect("offered")
        .urls(&feed_url("stable"))
        .expect("urls")[0]
        .clone();
    let served = tree_file(d, &url);
    let kept = std::fs::read(&served).expect("bundle");
    std::fs::copy(d.join(&other), &served).expect("swap");
    let device = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let (report, written) = drive_counting(&device, d, Timestamp::now());
    assert!(
        refusal(&report)
            .to_string()
            .contains("feed announced trailcam-species 1.0.0 but the bundle it points to is trailcam-species 2.0.0"),
        "{report:?}"
    );
    assert_eq!(written, ampoule_verify::format::limit::HEAD_BYTES);
    std::fs::write(&served, &kept).expect("the right file again");
    let (report, _) = drive_counting(&device, d, Timestamp::now());
    assert_eq!(installed_version(&report), Version::new(1, 0, 0));
}

/// Issue 13: an app's transfer that damaged one byte of a format 2 bundle loses only the
/// chunk that byte is in and what follows: the session keeps the chunks before it, which
/// checked against the signed chunk list, and the next update resumes after them.
#[test]
fn issue13_an_app_download_with_a_damaged_chunk_keeps_the_chunks_before_it() {
    let dir = setup();
    let d = dir.path();
    let (bundle, _) = pack_chunky(d, "1.0.0", 3 << 20);
    publish(d, &bundle, "stable", "100");
    let device = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let head = ampoule_verify::format::limit::HEAD_BYTES;
    let damaged_at = 2_000_000u64;
    let (report, written) = drive_damaging(&device, d, Timestamp::now(), Some(2_000_000));
    let size = std::fs::metadata(d.join(&bundle)).expect("bundle").len();
    assert_eq!(written, size, "the head, then the rest");
    let e = refusal(&report);
    assert_eq!(e.kind(), ErrorKind::Digest);
    let partial = d.join(format!(
        "cam/downloads/{}.ampoule.partial",
        Digest::of(&as_served(&d.join(&bundle)))
    ));
    let kept = std::fs::metadata(&partial).expect("partial kept").len();
    // The damaged byte's chunk starts less than one chunk (512 KiB and a few bytes,
    // compressed) before it, and after the head.
    assert!(
        kept > head && kept <= damaged_at && damaged_at - kept <= 525_000,
        "kept {kept} bytes; the damaged byte is at {damaged_at}"
    );
    let message = e.to_string();
    assert!(
        message.contains(&format!("(bytes {kept} to "))
            && message.contains(&format!("The first {kept} bytes, the head and "))
            && message.ends_with("are kept, and the next update downloads the rest again"),
        "{message}"
    );
    // The next update asks only for the rest, and installs.
    let (report, written) = drive_counting(&device, d, Timestamp::now());
    assert_eq!(installed_version(&report), Version::new(1, 0, 0));
    assert_eq!(written, size - kept, "only what was not kept");
}
