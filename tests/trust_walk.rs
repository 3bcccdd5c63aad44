//! Ordinary operations that used to strand a device (issue 10 item 4), through the library's
//! own update (`Device::update` over `ampoule serve`) and `ampoule update`:
//! - a device that missed rotations walks `trust/<n>.json` from its version to the one the
//!   feed names, each set a successor of the one before, each proven in the ledger the feed
//!   proves; more than 32 versions is refused; a set the ledger does not log is refused;
//! - a trust set that expired while the device was offline still opens the running model, and
//!   an update renews it through the tree, or says plainly why it cannot;
//! - a clock in 1970 is "clock wrong" (a failure to retry), not a refusal; a clock in 2100
//!   lets no expired feed or trust set pass, and the running model still opens.
//!
//! Each hostile case asserts the exact refusal text.

use std::path::Path;
use std::time::Duration;

use ampoule_verify::feed::Feed;
use ampoule_verify::fetch::Transfer;
use ampoule_verify::format::trust_proofs::TrustSetProofs;
use ampoule_verify::{
    App, Device, Digest, ErrorKind, Outcome, Report, Timestamp, Trust, TrustSet, Version,
};

mod tree_common;
use tree_common::*;

const DAY: u64 = 86_400;

/// Keys a, b, c, d of the survey team and the tree's feed key k. Version 1 lists a, b, c and
/// k with every role (bundles and trust sets need 2 signatures) and expires in `v1_days`;
/// each later version drops or adds one key; all are signed by a and b, which every version
/// keeps. Returns the file names, version 1 first.
fn team(d: &Path, versions: u64, v1_days: u64, later_days: u64) -> Vec<String> {
    for name in ["a", "b", "c", "d"] {
        ok(
            d,
            &[
                "keygen",
                "--secret",
                &format!("{name}.secret.pem"),
                "--public",
                &format!("{name}.public.pem"),
            ],
        );
    }
    let v1_expiry = format!("{v1_days}d");
    ok(
        d,
        &[
            "trust",
            "init",
            "--key",
            "a.public.pem",
            "--key",
            "b.public.pem",
            "--key",
            "c.public.pem",
            "--key",
            "k.pub",
            "--threshold",
            "bundle=2,trust_set=2",
            "--expires-in",
            &v1_expiry,
            "-o",
            "trust-1.json",
        ],
    );
    let later = format!("{later_days}d");
    for v in 2..=versions {
        let (before, file) = (format!("trust-{}.json", v - 1), format!("trust-{v}.json"));
        // Alternately drop and add one key, so every version differs.
        let (verb, key) = match v % 2 {
            0 => ("remove", if v % 4 == 0 { "d" } else { "c" }),
            _ => ("add", if v % 4 == 1 { "c" } else { "d" }),
        };
        ok(
            d,
            &[
                "trust",
                verb,
                &before,
                "--key",
                &format!("{key}.public.pem"),
                "--expires-in",
                &later,
                "-o",
                &file,
            ],
        );
    }
    let files: Vec<String> = (1..=versions).map(|v| format!("trust-{v}.json")).collect();
    for file in &files {
        for signer in ["a", "b"] {
            ok(
                d,
                &[
                    "trust",
                    "sign",
                    file,
                    "--key",
                    &format!("{signer}.secret.pem"),
                ],
            );
        }
    }
    files
}

fn publish_trust_set(d: &Path, file: &str, feed_days: u64) {
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
            "--expires-in",
            &format!("{feed_days}d"),
        ],
    );
}

/// Packs `version`, signed by a and b.
fn pack_ab(d: &Path, version: &str, variant: u8) -> String {
    let bundle = pack(d, version, variant, "a.secret.pem");
    ok(d, &["sign", &bundle, "--key", "b.secret.pem"]);
    bundle
}

fn publish_for(d: &Path, bundle: &str, feed_days: u64) {
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
            "--expires-in",
            &format!("{feed_days}d"),
        ],
    );
}

/// The camera app shipped with trust set version 1.
fn app(d: &Path) -> App {
    let shipped = std::fs::read(d.join("trust-1.json")).expect("trust-1.json");
    App::new(
        Trust::shipped_trust_set(shipped).expect("a valid shipped set"),
        Version::new(2, 3, 0),
    )
    .device_id("camera-7")
    .expect("device id")
    .wait_for_lock(Duration::from_secs(5))
}

fn update(device: &Device, addr: &str, now: Timestamp) -> Report {
    device.update(
        &format!("http://{addr}/feeds/stable.json"),
        &Transfer::new().attempts_per_source(1),
        now,
    )
}

fn refusal(report: &Report) -> (ErrorKind, String) {
    match &report.outcome {
        Outcome::Refused(e) => (e.kind(), e.to_string()),
        other => panic!("expected a refusal, got {other:?}"),
    }
}

fn installed_version(report: &Report) -> Version {
    match &report.outcome {
        Outcome::Installed(i) => i.release.manifest.version.clone(),
        other => panic!("expected an install, got {other:?}"),
    }
}

fn at(secs: u64) -> Timestamp {
    Timestamp::from_unix(secs).expect("in range")
}

fn stored_version(d: &Path, store: &str) -> Option<u64> {
    let bytes = newest_stored_trust_set(&d.join(store))?;
    Some(
        TrustSet::verify_initial(&bytes, at(0))
            .expect("the stored set verifies")
            .version(),
    )
}

/// The feed of `stable` re-signed by k after `change`: what whoever holds the feed key can
/// serve.
fn resign_feed(d: &Path, change: impl FnOnce(&mut Feed)) {
    let mut feed = read_feed(d, "stable");
    change(&mut feed);
    let signed = signed_feed_file(d, "k.pem", feed.to_json());
    std::fs::write(d.join("tree/feeds/stable.json"), signed.to_json()).expect("feed written");
}

#[test]
fn issue10_a_device_two_rotations_behind_catches_up_through_update() {
    let dir = setup();
    let d = dir.path();
    team(d, 3, 365, 365);
    publish_trust_set(d, "trust-1.json", 7);
    publish_for(d, &pack_ab(d, "1.0.0", 0), 7);
    // The camera installs 1.0.0 on version 1, then is switched off.
    let server = serve_tree(d, "tree");
    let camera = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let report = update(&camera, &server.addr, Timestamp::now());
    assert_eq!(installed_version(&report), Version::new(1, 0, 0));
    assert_eq!(report.trust_set_version, Some(1));

    // Two rotations and a release while it is off.
    publish_trust_set(d, "trust-2.json", 7);
    publish_trust_set(d, "trust-3.json", 7);
    publish_for(d, &pack_ab(d, "1.1.0", 1), 7);
    // Beside every feed's tree head, the ledger's proofs of the newest trust sets.
    let head = read_feed(d, "stable")
        .ledger
        .expect("a ledger proof")
        .tree_head
        .head();
    let proofs = TrustSetProofs::from_json(
        &std::fs::read(d.join(format!("tree/ledger/trust-sets/{}.json", head.tree_size)))
            .expect("the proofs file of the feed's head"),
    )
    .expect("valid");
    assert_eq!(proofs.trust_sets.len(), 3);

    let report = update(&camera, &server.addr, Timestamp::now());
    assert_eq!(installed_version(&report), Version::new(1, 1, 0));
    assert_eq!(
        (report.rotated_to, report.trust_set_version),
        (Some(3), Some(3))
    );
    assert_eq!(
        newest_stored_trust_set(&d.join("cam")).expect("stored"),
        std::fs::read(d.join("tree/trust/3.json")).expect("version 3")
    );
    // The next update starts on version 3: nothing to walk.
    let report = update(&camera, &server.addr, Timestamp::now());
    assert!(matches!(report.outcome, Outcome::UpToDate), "{report:?}");
    assert_eq!(report.rotated_to, None);
}

#[test]
fn issue10_a_gap_over_32_trust_set_versions_is_refused_with_what_to_do() {
    let dir = setup();
    let d = dir.path();
    let files = team(d, 2, 365, 365);
    publish_trust_set(d, &files[0], 7);
    publish_for(d, &pack_ab(d, "1.0.0", 0), 7);
    // Whoever holds the feed key names version 34; the device would have to walk 33 versions.
    resign_feed(d, |feed| {
        let named = feed.trust_set.as_mut().expect("the feed names a trust set");
        named.version = 34;
        named.path = "../trust/34.json".into();
    });
    let server = serve_tree(d, "tree");
    let camera = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let report = update(&camera, &server.addr, Timestamp::now());
    assert_eq!(
        refusal(&report),
        (
            ErrorKind::TrustSet,
            "the feed names trust set version 34, 33 versions after this device's version 1; \
             a device follows at most 32 versions in one update, so it cannot reach it. Ship \
             an app with trust set version 2 or newer"
                .into()
        )
    );
    assert_eq!(stored_version(d, "cam"), None);

    // 32 versions is the most a device walks: it then asks for trust/2.json, which here is
    // the real version 2 (published by hand, so the walk goes on to trust/3.json, missing).
    std::fs::copy(d.join(&files[1]), d.join("tree/trust/2.json")).expect("copied");
    resign_feed(d, |feed| {
        let named = feed.trust_set.as_mut().expect("named");
        named.version = 33;
        named.path = "../trust/33.json".into();
    });
    let report = update(&camera, &server.addr, Timestamp::now());
    let Outcome::Failed(e) = &report.outcome else {
        panic!("expected a failure to fetch, got {:?}", report.outcome);
    };
    assert_eq!(e.kind(), ErrorKind::Network);
    assert!(
        e.to_string().contains("/trust/3.json"),
        "the walk went on to version 3: {e}"
    );
    assert_eq!(stored_version(d, "cam"), None, "nothing stored mid-walk");
}

#[test]
fn issue10_a_trust_set_the_ledger_does_not_log_is_refused_as_a_secret_rotation() {
    let dir = setup();
    let d = dir.path();
    let files = team(d, 2, 365, 365);
    publish_trust_set(d, &files[0], 7);
    publish_for(d, &pack_ab(d, "1.0.0", 0), 7);
    // Whoever holds a, b (the trust-set threshold) and the feed key rotates one camera in
    // secret: version 2 is a valid successor, put beside the tree's files by hand, and the
    // feed re-signed to name it. The ledger never logged it.
    std::fs::copy(d.join(&files[1]), d.join("tree/trust/2.json")).expect("copied");
    let sha256 = Digest::of(&std::fs::read(d.join(&files[1])).expect("v2"));
    let mut head_size = 0;
    resign_feed(d, |feed| {
        head_size = feed
            .ledger
            .as_ref()
            .expect("ledger")
            .tree_head
            .head()
            .tree_size;
        let named = feed.trust_set.as_mut().expect("named");
        named.version = 2;
        named.path = "../trust/2.json".into();
        named.sha256 = sha256;
    });
    let server = serve_tree(d, "tree");
    let camera = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let report = update(&camera, &server.addr, Timestamp::now());
    assert_eq!(
        refusal(&report),
        (
            ErrorKind::Proof,
            format!(
                "trust set version 2 (sha256 {sha256}) is not in the ledger the feed proves \
                 (no trust-set entry for it among the 1 the tree proves at size {head_size}); \
                 refusing a trust set that may have been rotated in secret"
            )
        )
    );
    assert_eq!(stored_version(d, "cam"), None, "the secret set is not kept");
    assert_eq!(report.trust_set_version, Some(1));
    assert!(camera.current().expect("readable").is_none());

    // Without the proofs file the update fails to fetch it, and keeps nothing either.
    std::fs::remove_file(d.join(format!("tree/ledger/trust-sets/{head_size}.json")))
        .expect("removed");
    let report = update(&camera, &server.addr, Timestamp::now());
    assert!(
        matches!(&report.outcome, Outcome::Failed(e) if e.kind() == ErrorKind::Network),
        "{report:?}"
    );
    assert_eq!(stored_version(d, "cam"), None);
}

#[test]
fn issue10_an_expired_trust_set_keeps_the_model_and_is_renewed_through_update() {
    let dir = setup();
    let d = dir.path();
    // Version 1 expires in 365 days, version 2 in 800; feeds last 400 days here so that the
    // camera's year offline is about the trust set alone.
    let files = team(d, 2, 365, 800);
    publish_trust_set(d, &files[0], 400);
    publish_for(d, &pack_ab(d, "1.0.0", 0), 400);
    let server = serve_tree(d, "tree");
    let now = Timestamp::now();
    let camera = Device::open(&d.join("cam"), "stable", app(d), now).expect("open");
    assert_eq!(
        installed_version(&update(&camera, &server.addr, now)),
        Version::new(1, 0, 0)
    );
    drop(camera);

    // 366 days later, version 1 has expired. The running model still opens.
    let later = at(now.unix() + 366 * DAY);
    let camera = Device::open(&d.join("cam"), "stable", app(d), later).expect("opens expired");
    let current = camera.current().expect("checked").expect("installed");
    assert_eq!(current.manifest.version, Version::new(1, 0, 0));
    // With no successor in the tree, the update says so plainly and keeps the model.
    let report = update(&camera, &server.addr, later);
    let expires = TrustSet::verify_initial(&std::fs::read(d.join(&files[0])).expect("v1"), now)
        .expect("v1")
        .expires();
    assert_eq!(
        refusal(&report),
        (
            ErrorKind::TrustSet,
            format!(
                "trust set version 1 expired at {expires} (it is now {later}); a newer trust \
                 set signed by the keys trusted now is needed; the feed names no newer trust \
                 set. The model in use stays and still opens, but nothing new installs until \
                 the release tree publishes a successor signed by the keys of version 1 \
                 (ampoule publish --trust-set) or the app ships a newer trust set; if the \
                 device clock is wrong, set it"
            )
        )
    );
    assert!(camera.current().expect("still checked").is_some());

    // The team publishes version 2 (signed by version 1's keys, expired or not) and 1.1.0.
    publish_trust_set(d, &files[1], 400);
    publish_for(d, &pack_ab(d, "1.1.0", 1), 400);
    // The camera's clock is a year ahead of the publisher's here; what matters is that it
    // is past version 1's expiry and inside version 2's and the feed's.
    let report = update(&camera, &server.addr, later);
    assert_eq!(installed_version(&report), Version::new(1, 1, 0));
    assert_eq!(report.rotated_to, Some(2));
    assert_eq!(stored_version(d, "cam"), Some(2));
    assert_eq!(
        camera
            .current()
            .expect("checked")
            .expect("current")
            .manifest
            .version,
        Version::new(1, 1, 0)
    );
}

#[test]
fn issue10_a_clock_in_1970_is_clock_wrong_and_a_clock_in_2100_lets_nothing_expired_pass() {
    let dir = setup();
    let d = dir.path();
    let files = team(d, 2, 365, 365);
    publish_trust_set(d, &files[0], 7);
    publish_for(d, &pack_ab(d, "1.0.0", 0), 7);
    let server = serve_tree(d, "tree");
    let issued = read_feed(d, "stable").issued;

    // A board without a real-time clock, booted in 1970: the feed verifies but reads as
    // issued in the future. A failure to retry once the clock is set, not a refusal.
    let epoch = at(0);
    let camera = Device::open(&d.join("cam"), "stable", app(d), epoch).expect("open");
    let report = update(&camera, &server.addr, epoch);
    let Outcome::Failed(e) = &report.outcome else {
        panic!("expected a failure, got {:?}", report.outcome);
    };
    assert_eq!(
        (e.kind(), e.to_string()),
        (
            ErrorKind::Clock,
            format!(
                "feed was issued at {issued}, after this device's clock (1970-01-01T00:00:00Z) \
                 by more than the allowed 300 s; check the device clock"
            )
        )
    );
    assert!(camera.current().expect("readable").is_none());
    // The clock set right: the camera installs.
    let now = Timestamp::now();
    assert_eq!(
        installed_version(&update(&camera, &server.addr, now)),
        Version::new(1, 0, 0)
    );

    // A clock in 2100: the trust set and the feed read as expired, and nothing passes. The
    // model the camera runs still opens.
    // 4102444800 s after the epoch is 2100-01-01T00:00:00Z (from memory; the display below
    // checks it).
    let future = at(4_102_444_800);
    assert_eq!(future.to_string(), "2100-01-01T00:00:00Z");
    let camera = Device::open(&d.join("cam"), "stable", app(d), future).expect("opens");
    assert!(camera.current().expect("checked").is_some());
    let report = update(&camera, &server.addr, future);
    let (kind, text) = refusal(&report);
    assert_eq!(kind, ErrorKind::TrustSet);
    assert!(
        text.starts_with("trust set version 1 expired at ")
            && text.contains("(it is now 2100-01-01T00:00:00Z)")
            && text.ends_with("if the device clock is wrong, set it"),
        "{text}"
    );
    // Even with a successor named, the feed itself has expired by 2100.
    publish_trust_set(d, &files[1], 7);
    let expires = read_feed(d, "stable").expires;
    let report = update(&camera, &server.addr, future);
    let (kind, text) = refusal(&report);
    assert_eq!(
        (kind, text),
        (
            ErrorKind::TrustSet,
            format!(
                "the trust set at http://{}/trust/2.json that the feed names: trust set version \
                 2 expired at {} (it is now 2100-01-01T00:00:00Z); a newer trust set signed by \
                 the keys trusted now is needed",
                server.addr,
                TrustSet::verify_initial(&std::fs::read(d.join(&files[1])).expect("v2"), now)
                    .expect("v2")
                    .expires()
            )
        )
    );
    assert_eq!(stored_version(d, "cam"), None);
    // A device on pinned keys has no trust set to expire: the feed's own expiry refuses it.
    let pinned =
        Device::open(&d.join("cam-pinned"), "stable", pinned_app(d), future).expect("opens");
    assert_eq!(
        refusal(&update(&pinned, &server.addr, future)),
        (
            ErrorKind::Stale,
            format!(
                "feed expired at {expires} (device clock 2100-01-01T00:00:00Z, allowed skew \
                 300 s); the publisher must publish a fresh feed"
            )
        )
    );
    assert_eq!(
        camera
            .current()
            .expect("checked")
            .expect("current")
            .manifest
            .version,
        Version::new(1, 0, 0)
    );
}

/// A trust set written with the library, for roles the CLI's `trust init` cannot give in one
/// version: each key named in `d` with its roles, thresholds 1 except 2 for trust sets, signed
/// by a and b.
fn custom_set(d: &Path, version: u64, keys: &[(&str, &[&str])], out: &str) {
    custom_set_expiring(
        d,
        version,
        keys,
        out,
        at(Timestamp::now().unix() + 365 * DAY),
    );
}

/// [`custom_set`] expiring at `expires`.
fn custom_set_expiring(
    d: &Path,
    version: u64,
    keys: &[(&str, &[&str])],
    out: &str,
    expires: Timestamp,
) {
    use ampoule_verify::trust::{KeyEntry, Thresholds, TrustSetBody, TrustSetFile};
    use ampoule_verify::{DocumentKind, PublicKey};
    let entries = keys
        .iter()
        .map(|(name, roles)| {
            let pem = std::fs::read_to_string(d.join(format!("{name}.public.pem"))).expect("pem");
            KeyEntry::new(
                &PublicKey::from_pem(&pem).expect("key"),
                roles
                    .iter()
                    .map(|r| r.parse::<DocumentKind>().expect("role"))
                    .collect(),
                format!("key {name}"),
            )
        })
        .collect();
    let body = TrustSetBody {
        format: 1,
        version,
        expires,
        keys: entries,
        thresholds: Thresholds {
            bundle: 1,
            feed: 1,
            tree_head: 1,
            trust_set: 2,
        },
    };
    let mut file = TrustSetFile::unsigned(body).expect("valid");
    for signer in ["a", "b"] {
        let key = ampoule::release::keyfile::read_secret_key(
            &d.join(format!("{signer}.secret.pem")),
            &ampoule::release::keyfile::PassphraseSource::None,
        )
        .expect("key");
        let signature = ed25519_dalek::Signer::sign(&key, &file.signing_request()).to_bytes();
        file.insert_signature(ampoule_verify::signature::SignatureEntry {
            key_id: ampoule_verify::KeyId::of_raw_key(key.verifying_key().as_bytes()),
            signature,
        })
        .expect("under the limit");
    }
    std::fs::write(d.join(out), file.to_json()).expect("written");
}

fn key_id(d: &Path, name: &str) -> ampoule_verify::KeyId {
    let pem = std::fs::read_to_string(d.join(format!("{name}.public.pem"))).expect("pem");
    ampoule_verify::PublicKey::from_pem(&pem).expect("key").id()
}

#[test]
fn issue10_a_secret_rotation_on_a_forked_ledger_needs_the_old_tree_head_keys() {
    let dir = setup();
    let d = dir.path();
    for name in ["a", "b", "k2", "t", "x"] {
        ok(
            d,
            &[
                "keygen",
                "--secret",
                &format!("{name}.secret.pem"),
                "--public",
                &format!("{name}.public.pem"),
            ],
        );
    }
    std::fs::copy(d.join("k.pub"), d.join("k.public.pem")).expect("the feed key's copy");
    // The documented configuration: the runner's key k signs feeds only; t, held elsewhere,
    // signs tree heads; a and b sign bundles and trust sets.
    let team: &[(&str, &[&str])] = &[
        ("a", &["bundle", "trust_set"]),
        ("b", &["bundle", "trust_set"]),
        ("k", &["feed"]),
        ("t", &["tree_head"]),
    ];
    custom_set(d, 1, team, "trust-1.json");
    let publish_with = |tree: &str, args: &[&str], head_key: &str| {
        let mut all = vec!["publish"];
        all.extend_from_slice(args);
        all.extend_from_slice(&[
            "--tree",
            tree,
            "--key",
            "k.pem",
            "--tree-head-key",
            head_key,
        ]);
        ok(d, &all);
    };
    publish_with("tree", &["--trust-set", "trust-1.json"], "t.secret.pem");
    let bundle = pack(d, "1.0.0", 0, "a.secret.pem");
    publish_with("tree", &[&bundle, "--channel", "stable"], "t.secret.pem");

    // Whoever holds a, b and the runner's key k, but not t, makes version 2 with a tree-head
    // key x of their own, and forks the ledger on a copy of the tree, signing its heads with x.
    custom_set(
        d,
        2,
        &[
            ("a", &["bundle", "trust_set"]),
            ("b", &["bundle", "trust_set"]),
            ("k", &["feed"]),
            ("x", &["tree_head"]),
        ],
        "forged-2.json",
    );
    copy_dir(&d.join("tree"), &d.join("fork"));
    // The tool refuses: the head that logs version 2 would lack version 1's tree-head key.
    let (code, message) = refused(
        d,
        &[
            "publish",
            "--trust-set",
            "forged-2.json",
            "--tree",
            "fork",
            "--key",
            "k.pem",
            "--tree-head-key",
            "x.secret.pem",
        ],
    );
    assert_eq!(
        (code, message.as_str()),
        (
            1,
            "ampoule: error: trust set forged-2.json refused; nothing was published: trust set \
             version 2 must be logged in a tree head signed by 1 \
             tree-head key(s) of the current version 1, but this publish signs with 0 of them; \
             devices on version 1 would refuse the new set. Give those keys with \
             --tree-head-key"
        )
    );
    // So the forger goes around it: in the fork, version 1 is replaced by one of their own
    // (a and b sign it) that gives x the tree-head role. Devices still hold the real one.
    custom_set(
        d,
        1,
        &[
            ("a", &["bundle", "trust_set"]),
            ("b", &["bundle", "trust_set"]),
            ("k", &["feed"]),
            ("x", &["tree_head"]),
        ],
        "forged-1.json",
    );
    std::fs::copy(d.join("forged-1.json"), d.join("fork/trust/1.json")).expect("replaced");
    publish_with("fork", &["--trust-set", "forged-2.json"], "x.secret.pem");
    let fork = serve_tree(d, "fork");
    let camera = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let report = update(&camera, &fork.addr, Timestamp::now());
    let sha256 = Digest::of(&std::fs::read(d.join("forged-2.json")).expect("forged"));
    // The head that logs version 2 in the fork is the third (the set, the bundle, then it).
    let mut ids = [key_id(d, "k"), key_id(d, "x")];
    ids.sort();
    assert_eq!(
        refusal(&report),
        (
            ErrorKind::Proof,
            format!(
                "trust set version 2 (sha256 {sha256}) is not in the ledger the feed proves (the \
                 tree head of size 3 that logs it is not signed by the tree-head keys trusted \
                 before it: tree head of size 3 has no valid signature by a trusted key (by \
                 keys not trusted here: {}, {})); refusing a trust set that may have been \
                 rotated in secret",
                ids[0], ids[1]
            )
        )
    );
    assert_eq!(stored_version(d, "cam"), None);

    // The same rotation published in the genuine tree, its heads signed by t, goes through.
    custom_set(
        d,
        2,
        &[
            ("a", &["bundle", "trust_set"]),
            ("b", &["bundle", "trust_set"]),
            ("k", &["feed"]),
            ("t", &["tree_head"]),
            ("k2", &["feed"]),
        ],
        "trust-2.json",
    );
    publish_with("tree", &["--trust-set", "trust-2.json"], "t.secret.pem");
    let genuine = serve_tree(d, "tree");
    let report = update(&camera, &genuine.addr, Timestamp::now());
    assert_eq!(installed_version(&report), Version::new(1, 0, 0));
    assert_eq!(report.rotated_to, Some(2));
}

fn copy_dir(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).expect("mkdir");
    for entry in std::fs::read_dir(from).expect("list") {
        let entry = entry.expect("entry");
        let target = to.join(entry.file_name());
        if entry.file_type().expect("type").is_dir() {
            copy_dir(&entry.path(), &target);
        } else {
            std::fs::copy(entry.path(), &target).expect("copy");
        }
    }
}

#[test]
fn issue10_trust_set_proofs_lost_in_a_crash_are_rebuilt_and_an_offline_file_carries_the_walk() {
    let dir = setup();
    let d = dir.path();
    team(d, 3, 365, 365);
    publish_trust_set(d, "trust-1.json", 7);
    publish_for(d, &pack_ab(d, "1.0.0", 0), 7);
    publish_trust_set(d, "trust-2.json", 7);
    // A crash after an append lost the proofs files (here: all of them). The next append reads
    // the ledger and its head log through and writes the file for its head again.
    std::fs::remove_dir_all(d.join("tree/ledger/trust-sets")).expect("removed");
    publish_trust_set(d, "trust-3.json", 7);
    let head = read_feed(d, "stable")
        .ledger
        .expect("a ledger proof")
        .tree_head
        .head();
    let rebuilt = TrustSetProofs::from_json(
        &std::fs::read(d.join(format!("tree/ledger/trust-sets/{}.json", head.tree_size)))
            .expect("rebuilt"),
    )
    .expect("valid");
    assert_eq!(rebuilt.trust_sets.len(), 3);

    // A camera still on version 1, without a network: the technician's offline file holds
    // versions 1 to 3 and the proofs, and the camera walks them as it would online.
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
    let listing = std::process::Command::new("tar")
        .args(["tf", "stable.ampoule-offline"])
        .current_dir(d)
        .output()
        .expect("GNU tar runs");
    let names = String::from_utf8_lossy(&listing.stdout).into_owned();
    let proofs = format!("ledger/trust-sets/{}.json", head.tree_size);
    assert!(
        names.contains("trust/1.json\ntrust/2.json\ntrust/3.json\n") && names.contains(&proofs),
        "{names}"
    );
    let camera = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let report = camera.install_offline(&d.join("stable.ampoule-offline"), Timestamp::now());
    assert_eq!(installed_version(&report), Version::new(1, 0, 0));
    assert_eq!(
        (report.rotated_to, stored_version(d, "cam")),
        (Some(3), Some(3))
    );
}

#[test]
fn issue10_ampoule_update_renews_an_expired_shipped_trust_set_through_the_tree() {
    let dir = setup();
    let d = dir.path();
    for name in ["a", "b"] {
        ok(
            d,
            &[
                "keygen",
                "--secret",
                &format!("{name}.secret.pem"),
                "--public",
                &format!("{name}.public.pem"),
            ],
        );
    }
    std::fs::copy(d.join("k.pub"), d.join("k.public.pem")).expect("the feed key's copy");
    let all: &[&str] = &["bundle", "feed", "tree_head", "trust_set"];
    let keys: &[(&str, &[&str])] = &[("a", all), ("b", all), ("k", all)];
    // The app shipped version 1, which expired yesterday; the tree runs on version 2.
    custom_set_expiring(
        d,
        1,
        keys,
        "trust-1.json",
        at(Timestamp::now().unix() - DAY),
    );
    custom_set(d, 2, keys, "trust-2.json");
    publish_trust_set(d, "trust-2.json", 7);
    publish_for(d, &pack_ab(d, "1.0.0", 0), 7);
    let server = serve_tree(d, "tree");
    let out = ok(
        d,
        &[
            "update",
            "--store",
            "cam",
            "--feed",
            &format!("http://{}/feeds/stable.json", server.addr),
            "--trust-set",
            "trust-1.json",
            "--app-version",
            "2.3.0",
            "--device-id",
            "camera-7",
        ],
    );
    assert!(
        out.starts_with("trust set rotated to version 2; installed trailcam-species 1.0.0"),
        "{out}"
    );
    assert_eq!(stored_version(d, "cam"), Some(2));
}

#[test]
fn issue10_a_server_that_tampers_with_the_walk_is_refused_and_nothing_is_kept() {
    let dir = setup();
    let d = dir.path();
    team(d, 3, 365, 365);
    publish_trust_set(d, "trust-1.json", 7);
    publish_for(d, &pack_ab(d, "1.0.0", 0), 7);
    publish_trust_set(d, "trust-2.json", 7);
    publish_trust_set(d, "trust-3.json", 7);
    let server = serve_tree(d, "tree");
    let camera = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let tree = d.join("tree");
    let v3 = std::fs::read(tree.join("trust/3.json")).expect("v3");

    // The server hands out version 2 again where version 3 belongs.
    std::fs::copy(tree.join("trust/2.json"), tree.join("trust/3.json")).expect("swapped");
    let report = update(&camera, &server.addr, Timestamp::now());
    assert_eq!(
        refusal(&report),
        (
            ErrorKind::TrustSet,
            format!(
                "the trust set at http://{}/trust/3.json (version 3 of the walk from version 1 \
                 to 3) was refused: trust set version 2 is not newer than the trusted version \
                 2; refusing to roll trust back",
                server.addr
            )
        )
    );
    std::fs::write(tree.join("trust/3.json"), &v3).expect("restored");

    // The server flips one hash of version 3's inclusion proof in the proofs file.
    let head = read_feed(d, "stable")
        .ledger
        .expect("a ledger proof")
        .tree_head
        .head();
    let path = tree.join(format!("ledger/trust-sets/{}.json", head.tree_size));
    let good = std::fs::read(&path).expect("proofs");
    let mut proofs = TrustSetProofs::from_json(&good).expect("valid");
    let last = proofs.trust_sets.last_mut().expect("version 3's proof");
    let hash = last
        .inclusion
        .hashes
        .first_mut()
        .expect("a tree of 5 has a path");
    *hash = Digest::of(b"not the sibling");
    std::fs::write(&path, proofs.to_json()).expect("tampered");
    let report = update(&camera, &server.addr, Timestamp::now());
    let (kind, text) = refusal(&report);
    let sha256 = Digest::of(&v3);
    assert_eq!(kind, ErrorKind::Proof);
    assert!(
        text.starts_with(&format!(
            "trust set version 3 (sha256 {sha256}) is not in the ledger the feed proves (its \
             inclusion proof in the tree head of size 5 does not verify: "
        )) && text.ends_with("); refusing a trust set that may have been rotated in secret"),
        "{text}"
    );
    assert_eq!(
        stored_version(d, "cam"),
        None,
        "nothing kept from a refused walk"
    );
    assert_eq!(report.trust_set_version, Some(1));

    // The genuine files again: the walk goes through.
    std::fs::write(&path, &good).expect("restored");
    let report = update(&camera, &server.addr, Timestamp::now());
    assert_eq!(installed_version(&report), Version::new(1, 0, 0));
    assert_eq!(stored_version(d, "cam"), Some(3));
}
