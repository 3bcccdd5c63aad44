//! Key rotation through the release tree (issue 5), with the real binary and a device
//! updating from `ampoule serve`: a trust set published with `publish --trust-set`, named by
//! every feed; a device on the old set takes the new one from the feed, stores it, and refuses
//! a bundle signed by the key it revokes in the same update. Refusals of sets that are not
//! successors, at publish and on the device, and of feeds naming older sets. The same
//! rotation through `ampoule update --trust-set`.

use std::path::Path;

use ampoule_verify::fetch::{Transfer, Update, Updater};
use ampoule_verify::{
    Digest, ErrorKind, FeedVerifier, KeyId, PublicKey, Store, Timestamp, TrustSet, TrustSetFile,
    Verifier,
};
use semver::Version;

/// The test binary spawns child processes (servers, the CLI) from other tests while this one
/// runs; a fork that has not yet exec'd briefly shares the store's lock file descriptor, so an
/// updater here waits a little for the lock instead of failing at once.
const LOCK_WAIT: std::time::Duration = std::time::Duration::from_secs(10);

mod tree_common;
use tree_common::*;

fn serve(d: &Path, tree: &str) -> Served {
    serve_tree(d, tree)
}

fn key_id_of(d: &Path, public: &str) -> KeyId {
    let pem = std::fs::read_to_string(d.join(public)).expect("public key");
    PublicKey::from_pem(&pem).expect("key").id()
}

/// Keys a, b, c of the survey team and the tree's feed key k (from `setup`). Version 1 lists
/// all four with every role, needing 2 signatures for bundles and trust sets; version 2 is
/// version 1 without c. Both are signed by a and b.
fn team(d: &Path) {
    for name in ["a", "b", "c"] {
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
            "365d",
            "-o",
            "trust-1.json",
        ],
    );
    ok(
        d,
        &[
            "trust",
            "remove",
            "trust-1.json",
            "--key",
            "c.public.pem",
            "-o",
            "trust-2.json",
        ],
    );
    for file in ["trust-1.json", "trust-2.json"] {
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
}

/// Packs VERSION signed by the first key, then signs it with the second.
fn pack_signed_by(d: &Path, version: &str, first: &str, second: &str) -> String {
    let bundle = pack(d, version, 0, &format!("{first}.secret.pem"));
    ok(
        d,
        &["sign", &bundle, "--key", &format!("{second}.secret.pem")],
    );
    bundle
}

fn publish_trust_set(d: &Path, tree: &str, file: &str) -> serde_json::Value {
    let out = ok(
        d,
        &[
            "--json",
            "publish",
            "--trust-set",
            file,
            "--tree",
            tree,
            "--key",
            "k.pem",
        ],
    );
    serde_json::from_str(&out).expect("publish --json prints JSON")
}

const APP: Version = Version::new(2, 3, 0);

/// A device's update check as an app on trust sets runs it: the trust set from the store
/// (or the one shipped with the app), an updater on it, rotations saved to the store.
fn device_check(
    store_dir: &Path,
    initial: &[u8],
    addr: &str,
    installed: Option<&str>,
) -> (ampoule_verify::Result<Update>, Vec<u64>) {
    let now = Timestamp::now();
    let trust = Store::load_trust_set(store_dir, initial, now).expect("the device's trust set");
    let store = Store::open(
        store_dir,
        Verifier::from_trust_set(&trust, APP).expect("bundle keys"),
    )
    .expect("store")
    .wait_for_lock(LOCK_WAIT);
    let mut bundles = Verifier::from_trust_set(&trust, APP)
        .expect("bundle keys")
        .require_name("trailcam-species");
    if let Some(v) = installed {
        bundles = bundles.installed(v.parse().expect("version"));
    }
    let updater = Updater::new(
        format!("http://{addr}/feeds/stable.json"),
        FeedVerifier::from_trust_set(&trust, "stable").expect("feed keys"),
        bundles,
        "camera-0007",
        store_dir.join("downloads"),
    )
    .transfer(Transfer::new().attempts_per_source(1))
    .with_trust_set(trust)
    .expect("updater on the trust set");
    let mut saved = Vec::new();
    let result = updater.check_with(now, &mut |next| {
        saved.push(next.version());
        store.save_trust_set(initial, next)
    });
    (result, saved)
}

fn install(store_dir: &Path, initial: &[u8], update: Update) -> Version {
    let trust = Store::load_trust_set(store_dir, initial, Timestamp::now()).expect("trust set");
    let store = Store::open(
        store_dir,
        Verifier::from_trust_set(&trust, APP).expect("bundle keys"),
    )
    .expect("store")
    .wait_for_lock(LOCK_WAIT);
    let Update::Ready { feed, bundle, path } = update else {
        panic!("expected a bundle ready to install, got {update:?}");
    };
    let installed = store.install_from_feed(*bundle, &feed).expect("installed");
    std::fs::remove_file(path).expect("the download is no longer needed");
    installed.release.manifest.version
}

#[test]
fn issue5_a_rotation_published_in_the_tree_revokes_a_key_on_devices() {
    let dir = setup();
    let d = dir.path();
    team(d);
    let (a, c) = (key_id_of(d, "a.public.pem"), key_id_of(d, "c.public.pem"));
    let v1_bytes = std::fs::read(d.join("trust-1.json")).expect("v1");
    let v2_bytes = std::fs::read(d.join("trust-2.json")).expect("v2");

    // The first trust set goes into an empty tree: no channel to renew yet.
    let out = publish_trust_set(d, "tree", "trust-1.json");
    assert_eq!(out["trust_set"]["version"], 1);
    assert_eq!(
        out["trust_set"]["sha256"],
        Digest::of(&v1_bytes).to_string()
    );
    assert_eq!(out["previous_version"], serde_json::Value::Null);
    assert_eq!(out["feeds"], serde_json::json!([]));
    assert_eq!(
        std::fs::read(d.join("tree/trust/1.json")).expect("in the tree"),
        v1_bytes
    );

    // Bundle 1.0.0, signed by a and c (2 of version 1), reaches a device on version 1.
    let v100 = pack_signed_by(d, "1.0.0", "a", "c");
    publish(d, &v100, "stable", "100");
    let feed = read_feed(d, "stable");
    let named = feed.trust_set.expect("the feed names the trust set");
    assert_eq!(
        (named.version, named.path.as_str(), named.sha256),
        (1, "../trust/1.json", Digest::of(&v1_bytes))
    );
    let server = serve(d, "tree");
    let store_dir = d.join("camera-store");
    let (update, saved) = device_check(&store_dir, &v1_bytes, &server.addr, None);
    assert!(saved.is_empty(), "the feed names the set the device has");
    assert_eq!(
        install(&store_dir, &v1_bytes, update.expect("update")),
        Version::new(1, 0, 0)
    );

    // c is revoked: version 2 is published, and every channel's feed is renewed to name it.
    let out = publish_trust_set(d, "tree", "trust-2.json");
    assert_eq!(out["previous_version"], 1);
    assert_eq!(out["feeds"][0]["channel"], "stable");
    assert_eq!(out["feeds"][0]["sequence"], 2);
    let feed = read_feed(d, "stable");
    assert_eq!(feed.sequence, 2);
    assert_eq!(
        feed.release.as_ref().map(|r| r.version.to_string()),
        Some("1.0.0".into()),
        "the release stays"
    );
    assert_eq!(
        feed.trust_set.as_ref().map(|t| (t.version, t.sha256)),
        Some((2, Digest::of(&v2_bytes)))
    );
    let history: serde_json::Value = serde_json::from_slice(
        &std::fs::read(d.join("tree/history/stable.json")).expect("history"),
    )
    .expect("json");
    assert_eq!(history["events"][1]["action"], "trust_set");
    assert_eq!(history["events"][1]["version"], 2);

    // The tree now checks bundles against version 2: a bundle signed by a and c is refused.
    let v110 = pack_signed_by(d, "1.1.0", "a", "c");
    let (code, message) = refused(
        d,
        &[
            "publish",
            &v110,
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            "k.pem",
        ],
    );
    assert_eq!(code, 1);
    assert_eq!(
        message,
        format!(
            "ampoule: error: bundle {v110} refused; nothing was published: bundle has 1 valid \
             signature(s) by trusted keys but needs 2 (valid: {a}; by keys not trusted here: {c})"
        )
    );
    // Whoever holds c gets it onto the channel anyway (here: by overriding the check).
    ok(
        d,
        &[
            "publish",
            &v110,
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            "k.pem",
            "--trust",
            "a.public.pem",
        ],
    );

    // The device, still on version 1, verifies the feed under version 1, takes version 2
    // from it, stores it, and refuses the bundle under version 2 in the same update.
    let (update, saved) = device_check(&store_dir, &v1_bytes, &server.addr, Some("1.0.0"));
    let e = update.expect_err("signed by a revoked key");
    assert_eq!(e.kind(), ErrorKind::Signature);
    assert_eq!(
        e.to_string(),
        format!(
            "bundle has 1 valid signature(s) by trusted keys but needs 2 (valid: {a}; by keys \
             not trusted here: {c})"
        )
    );
    assert_eq!(saved, [2]);
    let store_trust =
        Store::load_trust_set(&store_dir, &v1_bytes, Timestamp::now()).expect("stored trust set");
    assert_eq!(store_trust.version(), 2);
    assert_eq!(
        newest_stored_trust_set(&store_dir).expect("stored"),
        store_trust.to_json()
    );
    // Under version 1 alone the same bundle would have been taken: the rotation made the
    // difference.
    let v1 = TrustSet::verify_initial(&v1_bytes, Timestamp::now()).expect("v1");
    Verifier::from_trust_set(&v1, APP)
        .expect("v1 verifier")
        .verify_path(&d.join(&v110))
        .expect("a and c are 2 keys of version 1");
    let downloads: Vec<_> = std::fs::read_dir(store_dir.join("downloads"))
        .expect("downloads")
        .collect();
    assert!(
        downloads.is_empty(),
        "nothing of the refused bundle is kept: {downloads:?}"
    );
    // The revocation reaches the installed model too: 1.0.0 was signed by a and c, and under
    // version 2 only a counts. The store refuses to hand it out, as it would any model that
    // no longer has its threshold of trusted signatures.
    let store = Store::open(
        &store_dir,
        Verifier::from_trust_set(&store_trust, APP).expect("v2 verifier"),
    )
    .expect("store")
    .wait_for_lock(LOCK_WAIT);
    let stored = store
        .open_current()
        .expect_err("signed by a revoked key")
        .to_string();
    assert!(
        stored.starts_with("stored release trailcam-species-1.0.0-")
            && stored.ends_with(&format!(
                ": manifest has 1 valid signature(s) by trusted keys but needs 2 (valid: {a}; \
                 by keys not trusted here: {c})"
            )),
        "{stored}"
    );

    // A rebooted device starts on version 2 and refuses the same bundle without rotating.
    let (update, saved) = device_check(&store_dir, &v1_bytes, &server.addr, Some("1.0.0"));
    assert_eq!(
        update.expect_err("still revoked").kind(),
        ErrorKind::Signature
    );
    assert!(saved.is_empty());

    // The way out is a new release signed by keys that remain: the device takes it.
    let v120 = pack_signed_by(d, "1.2.0", "a", "b");
    publish(d, &v120, "stable", "100");
    let (update, saved) = device_check(&store_dir, &v1_bytes, &server.addr, Some("1.0.0"));
    assert!(saved.is_empty());
    assert_eq!(
        install(&store_dir, &v1_bytes, update.expect("update")),
        Version::new(1, 2, 0)
    );
    assert_eq!(
        store
            .open_current()
            .expect("checks under version 2")
            .map(|r| r.manifest.version),
        Some(Version::new(1, 2, 0))
    );
}

#[test]
fn issue5_a_feed_naming_an_older_trust_set_is_ignored() {
    let dir = setup();
    let d = dir.path();
    team(d);
    let v1_bytes = std::fs::read(d.join("trust-1.json")).expect("v1");
    let v2_bytes = std::fs::read(d.join("trust-2.json")).expect("v2");
    // A tree (or a mirror left behind) that names only version 1.
    publish_trust_set(d, "tree", "trust-1.json");
    let bundle = pack_signed_by(d, "1.0.0", "a", "b");
    publish(d, &bundle, "stable", "100");
    assert_eq!(read_feed(d, "stable").trust_set.map(|t| t.version), Some(1));

    // The device already accepted version 2 (from another tree, or an earlier rotation).
    let store_dir = d.join("camera-store");
    let now = Timestamp::now();
    let v2 = TrustSet::verify_initial(&v1_bytes, now)
        .and_then(|v1| v1.accept_successor(&v2_bytes, now))
        .expect("v2");
    Store::open(
        &store_dir,
        Verifier::from_trust_set(&v2, APP).expect("bundle keys"),
    )
    .expect("store")
    .wait_for_lock(LOCK_WAIT)
    .save_trust_set(&v1_bytes, &v2)
    .expect("saved");

    // The feed verifies under version 2 (k is a feed key there too); the older set it names
    // changes nothing, and the bundle is checked under version 2.
    let server = serve(d, "tree");
    let (update, saved) = device_check(&store_dir, &v1_bytes, &server.addr, None);
    assert!(saved.is_empty());
    let update = update.expect("the feed is fine");
    assert_eq!(
        update.feed().trust_set().map(|t| t.version),
        Some(1),
        "the feed named version 1"
    );
    assert_eq!(
        install(&store_dir, &v1_bytes, update),
        Version::new(1, 0, 0)
    );
    assert_eq!(
        Store::load_trust_set(&store_dir, &v1_bytes, now)
            .expect("stored")
            .version(),
        2,
        "the device keeps the newest set it accepted"
    );
}

#[test]
fn issue5_a_trust_set_that_is_not_a_successor_is_refused_at_publish_and_on_the_device() {
    let dir = setup();
    let d = dir.path();
    team(d);
    ok(
        d,
        &[
            "keygen",
            "--secret",
            "x.secret.pem",
            "--public",
            "x.public.pem",
        ],
    );
    let x = key_id_of(d, "x.public.pem");
    let v1_bytes = std::fs::read(d.join("trust-1.json")).expect("v1");
    publish_trust_set(d, "tree", "trust-1.json");
    let bundle = pack_signed_by(d, "1.0.0", "a", "b");
    publish(d, &bundle, "stable", "100");
    let feed_before = std::fs::read(d.join("tree/feeds/stable.json")).expect("feed");

    // Version 2 adding x, signed only by x: the keys of version 1 did not authorise it.
    ok(
        d,
        &[
            "trust",
            "add",
            "trust-1.json",
            "--key",
            "x.public.pem",
            "-o",
            "forged-2.json",
        ],
    );
    ok(
        d,
        &["trust", "sign", "forged-2.json", "--key", "x.secret.pem"],
    );
    let forged = std::fs::read(d.join("forged-2.json")).expect("forged");
    let refusal = format!(
        "trust set version 2, counting the keys of trusted version 1, has 0 valid signature(s) \
         by trusted keys but needs 2 (by keys not trusted here: {x})"
    );
    assert_eq!(
        refused(
            d,
            &[
                "publish",
                "--trust-set",
                "forged-2.json",
                "--tree",
                "tree",
                "--key",
                "k.pem"
            ]
        ),
        (
            1,
            format!(
                "ampoule: error: trust set forged-2.json refused; nothing was published: {refusal}"
            )
        )
    );
    // Publishing version 1 again is a rollback of trust.
    assert_eq!(
        refused(
            d,
            &[
                "publish",
                "--trust-set",
                "trust-1.json",
                "--tree",
                "tree",
                "--key",
                "k.pem"
            ]
        ),
        (
            1,
            "ampoule: error: trust set trust-1.json refused; nothing was published: trust set \
             version 1 is not newer than the trusted version 1; refusing to roll trust back"
                .into()
        )
    );
    // A feed key the new set does not give the feed role: devices would refuse every feed.
    ok(
        d,
        &["keygen", "--secret", "other.pem", "--public", "other.pub"],
    );
    let other = key_id_of(d, "other.pub");
    assert_eq!(
        refused(
            d,
            &[
                "publish",
                "--trust-set",
                "trust-2.json",
                "--tree",
                "tree",
                "--key",
                "other.pem"
            ]
        ),
        (
            1,
            format!(
                "ampoule: error: trust set trust-2.json refused; nothing was published: key \
                 {other} (other.pem) is not a feed key in trust set version 2; devices on that set would \
                 refuse the feeds this tree signs with it (sign with a key that has the feed \
                 role in both the current and the new set)"
            )
        )
    );
    assert!(!d.join("tree/trust/2.json").exists());
    assert_eq!(
        std::fs::read(d.join("tree/feeds/stable.json")).expect("feed"),
        feed_before,
        "refusals change no feed"
    );

    // Forced onto the server by hand, the next feed names it, and the device refuses it.
    std::fs::copy(d.join("forged-2.json"), d.join("tree/trust/2.json")).expect("by hand");
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
            "a.public.pem",
        ],
    );
    assert_eq!(
        read_feed(d, "stable")
            .trust_set
            .map(|t| (t.version, t.sha256)),
        Some((2, Digest::of(&forged)))
    );
    let server = serve(d, "tree");
    let store_dir = d.join("camera-store");
    let (update, saved) = device_check(&store_dir, &v1_bytes, &server.addr, None);
    let e = update.expect_err("not a successor");
    assert_eq!(e.kind(), ErrorKind::Signature);
    assert_eq!(
        e.to_string(),
        format!(
            "the trust set at http://{}/trust/2.json that the feed names was refused: {refusal}",
            server.addr
        )
    );
    assert!(saved.is_empty());
    assert!(newest_stored_trust_set(&store_dir).is_none());

    // Bytes on the server that are not the ones the feed names are refused before parsing.
    std::fs::copy(d.join("trust-2.json"), d.join("tree/trust/2.json")).expect("swap");
    let (update, saved) = device_check(&store_dir, &v1_bytes, &server.addr, None);
    let e = update.expect_err("digest");
    assert_eq!(e.kind(), ErrorKind::Digest);
    assert_eq!(
        e.to_string(),
        format!(
            "trust set downloaded from http://{}/trust/2.json has SHA-256 {}, but the feed \
             declares {}",
            server.addr,
            Digest::of(&std::fs::read(d.join("trust-2.json")).expect("v2")),
            Digest::of(&forged)
        )
    );
    assert!(saved.is_empty());
}

#[test]
fn issue5_a_device_whose_trust_set_expired_renews_it_through_the_feed() {
    use ampoule_verify::fetch::renew_expired_trust_set;

    let dir = setup();
    let d = dir.path();
    team(d);
    // Version 2 outlives version 1 (365 days) by a month.
    ok(
        d,
        &[
            "trust",
            "remove",
            "trust-1.json",
            "--key",
            "c.public.pem",
            "--expires-in",
            "395d",
            "-o",
            "trust-2-long.json",
        ],
    );
    for signer in ["a", "b"] {
        ok(
            d,
            &[
                "trust",
                "sign",
                "trust-2-long.json",
                "--key",
                &format!("{signer}.secret.pem"),
            ],
        );
    }
    let v1_bytes = std::fs::read(d.join("trust-1.json")).expect("v1");
    publish_trust_set(d, "tree", "trust-1.json");
    let bundle = pack_signed_by(d, "1.0.0", "a", "b");
    publish(d, &bundle, "stable", "100");
    publish_trust_set(d, "tree", "trust-2-long.json");

    let store_dir = d.join("camera-store");
    let now = Timestamp::now();
    let v1 = TrustSet::verify_initial(&v1_bytes, now).expect("v1");
    let store = Store::open(
        &store_dir,
        Verifier::from_trust_set(&v1, APP).expect("bundle keys"),
    )
    .expect("store")
    .wait_for_lock(LOCK_WAIT);
    // The camera was offline for 366 days: version 1 expired, and with it every feed check.
    let later = Timestamp::from_unix(now.unix() + 366 * 86_400).expect("in range");
    assert_eq!(
        Store::load_trust_set(&store_dir, &v1_bytes, later)
            .expect_err("expired")
            .kind(),
        ErrorKind::TrustSet
    );
    let server = serve(d, "tree");
    let feed_url = format!("http://{}/feeds/stable.json", server.addr);
    let transfer = Transfer::new().attempts_per_source(1);
    let renewed = renew_expired_trust_set(&feed_url, &transfer, &store, &v1_bytes, later)
        .expect("renewed by the expired set's keys");
    assert_eq!(renewed.version(), 2);
    assert_eq!(
        Store::load_trust_set(&store_dir, &v1_bytes, later)
            .expect("stored and current")
            .version(),
        2
    );
    // Asking again is a refusal: the named set is not newer than the stored one.
    assert_eq!(
        renew_expired_trust_set(&feed_url, &transfer, &store, &v1_bytes, later)
            .expect_err("not newer")
            .to_string(),
        format!(
            "the trust set at http://{}/trust/2.json was refused: trust set version 2 is not \
             newer than the trusted version 2; refusing to roll trust back",
            server.addr
        )
    );

    // A set the expired keys did not sign is refused, whatever the unverified feed says.
    let other_dir = d.join("camera-2");
    let other = Store::open(
        &other_dir,
        Verifier::from_trust_set(&v1, APP).expect("bundle keys"),
    )
    .expect("store")
    .wait_for_lock(LOCK_WAIT);
    ok(
        d,
        &[
            "keygen",
            "--secret",
            "x.secret.pem",
            "--public",
            "x.public.pem",
        ],
    );
    ok(
        d,
        &[
            "trust",
            "add",
            "trust-2-long.json",
            "--key",
            "x.public.pem",
            "-o",
            "forged-3.json",
        ],
    );
    ok(
        d,
        &["trust", "sign", "forged-3.json", "--key", "x.secret.pem"],
    );
    std::fs::copy(d.join("forged-3.json"), d.join("tree/trust/3.json")).expect("by hand");
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
            "a.public.pem",
        ],
    );
    let x = key_id_of(d, "x.public.pem");
    assert_eq!(
        renew_expired_trust_set(&feed_url, &transfer, &other, &v1_bytes, later)
            .expect_err("forged")
            .to_string(),
        format!(
            "the trust set at http://{}/trust/3.json was refused: trust set version 3, counting \
             the keys of trusted version 1, has 0 valid signature(s) by trusted keys but needs 2 \
             (by keys not trusted here: {x})",
            server.addr
        )
    );
    assert_eq!(other.trust_chain(&v1_bytes).expect("readable").1, 0);
}

/// `ampoule update --trust-set` as a camera on trust sets runs it, from store `store`.
fn update_on_trust_set(d: &Path, addr: &str, store: &str, json: bool) -> std::process::Output {
    let feed = format!("http://{addr}/feeds/stable.json");
    let mut args = vec![
        "update",
        "--store",
        store,
        "--feed",
        feed.as_str(),
        "--trust-set",
        "trust-1.json",
        "--app-version",
        "2.3.0",
        "--device-id",
        "camera-0007",
    ];
    if json {
        args.insert(0, "--json");
    }
    run(d, &args)
}

fn stdout_of(out: &std::process::Output) -> String {
    assert!(
        out.status.success(),
        "update failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).trim_end().to_string()
}

#[test]
fn issue5_update_on_a_trust_set_rotates_through_the_feed_and_keeps_the_new_set() {
    let dir = setup();
    let d = dir.path();
    team(d);
    let (a, c) = (key_id_of(d, "a.public.pem"), key_id_of(d, "c.public.pem"));
    let v1_bytes = std::fs::read(d.join("trust-1.json")).expect("v1");
    let v2_bytes = std::fs::read(d.join("trust-2.json")).expect("v2");
    publish_trust_set(d, "tree", "trust-1.json");
    let v100 = pack_signed_by(d, "1.0.0", "a", "b");
    publish(d, &v100, "stable", "100");
    let server = serve(d, "tree");

    // On version 1, shipped with the app: installs, stores no trust set of its own.
    let doc: serde_json::Value = serde_json::from_str(&stdout_of(&update_on_trust_set(
        d,
        &server.addr,
        "cam",
        true,
    )))
    .expect("--json prints JSON");
    assert_eq!(doc["outcome"], "updated");
    assert_eq!(
        (&doc["trust_set_version"], &doc["trust_set_rotated"]),
        (&serde_json::json!(1), &serde_json::json!(false))
    );
    assert!(newest_stored_trust_set(&d.join("cam")).is_none());

    // Version 2 revokes c; the renewed feed names it. The camera, started on version 1 again,
    // rotates within the update and keeps version 2.
    publish_trust_set(d, "tree", "trust-2.json");
    assert_eq!(
        stdout_of(&update_on_trust_set(d, &server.addr, "cam", false)),
        "trust set rotated to version 2; up to date: channel stable offers trailcam-species \
         1.0.0 (feed sequence 2); keeping trailcam-species 1.0.0"
    );
    let stored = newest_stored_trust_set(&d.join("cam")).expect("the store keeps the set");
    let kept = TrustSet::verify_initial(&stored, Timestamp::now()).expect("stored set verifies");
    assert_eq!(kept.version(), 2);
    assert_eq!(
        kept.file().text(),
        TrustSetFile::from_json(&v2_bytes).expect("v2").text()
    );
    // The next run starts on the stored version 2: nothing to rotate.
    let doc: serde_json::Value = serde_json::from_str(&stdout_of(&update_on_trust_set(
        d,
        &server.addr,
        "cam",
        true,
    )))
    .expect("--json prints JSON");
    assert_eq!(
        (
            &doc["outcome"],
            &doc["trust_set_version"],
            &doc["trust_set_rotated"]
        ),
        (
            &serde_json::json!("up_to_date"),
            &serde_json::json!(2),
            &serde_json::json!(false)
        )
    );

    // Whoever holds c puts 1.1.0, signed by a and c, on the channel (overriding the tree's
    // check). A second camera, still on version 1 alone, would take it: 2 keys of version 1.
    let v110 = pack_signed_by(d, "1.1.0", "a", "c");
    ok(
        d,
        &[
            "publish",
            &v110,
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            "k.pem",
            "--trust",
            "a.public.pem",
        ],
    );
    let v1 = TrustSet::verify_initial(&v1_bytes, Timestamp::now()).expect("v1");
    Verifier::from_trust_set(&v1, APP)
        .expect("v1 verifier")
        .verify_path(&d.join(&v110))
        .expect("a and c are 2 keys of version 1");
    // It starts on version 1, rotates to version 2 from the feed, stores it, and refuses the
    // bundle under version 2 in the same run.
    let out = update_on_trust_set(d, &server.addr, "cam2", false);
    assert_eq!(out.status.code(), Some(1));
    assert_eq!(
        String::from_utf8_lossy(&out.stderr).trim_end(),
        format!(
            "ampoule: error: bundle has 1 valid signature(s) by trusted keys but needs 2 \
             (valid: {a}; by keys not trusted here: {c})"
        )
    );
    let stored = newest_stored_trust_set(&d.join("cam2")).expect("kept despite the refusal");
    assert_eq!(
        TrustSet::verify_initial(&stored, Timestamp::now())
            .expect("stored set verifies")
            .version(),
        2
    );
    let state: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("cam2/state.json")).expect("state"))
            .expect("json");
    assert_eq!(
        state["current"],
        serde_json::Value::Null,
        "nothing installed"
    );
    // The first camera, already on version 2, refuses it without rotating.
    let out = update_on_trust_set(d, &server.addr, "cam", false);
    assert_eq!(out.status.code(), Some(1));
    assert_eq!(
        String::from_utf8_lossy(&out.stderr).trim_end(),
        format!(
            "ampoule: error: bundle has 1 valid signature(s) by trusted keys but needs 2 \
             (valid: {a}; by keys not trusted here: {c})"
        )
    );
}
