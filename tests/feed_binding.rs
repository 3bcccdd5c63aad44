//! Issue 10 item 3: what a thief of the publishing runner's feed key alone can do to devices.
//! Every feed carries the ledger entry its own change appended (format 2), and the device
//! checks that the entry has the feed's sequence, offers what the feed offers, and is the last
//! leaf of the signed tree head the feed carries. The runner here holds the feed key
//! (`runner.pem`) only: bundles are signed with `k.pem` and tree heads with `heads.pem`, a key
//! the runner does not have (the genuine publishes below pass it with `--tree-head-key`, as the
//! release step that holds it would). Each attack is a feed the thief signs with `runner.pem`,
//! given to a device through the library's update path (`Device::begin`), with the exact
//! refusal asserted.

mod tree_common;

use std::path::{Path, PathBuf};

use ampoule::release::ledger_storage::Ledger;
use ampoule_verify::feed::{Feed, SignedFeed};
use ampoule_verify::ledger::{Entry, Event};
use ampoule_verify::signed::Signers;
use ampoule_verify::update::Next;
use ampoule_verify::{
    App, Device, ErrorKind, Outcome, PublicKey, Report, Timestamp, Trust, TrustedKeys, Version,
};
use tree_common::*;

/// Any base works: the test maps each URL back to a file of the tree.
const BASE: &str = "https://models.example.invalid/";

/// The release key (`k.pem`, from `setup`), the runner's feed key and the tree-head key.
fn three_keys() -> tempfile::TempDir {
    let dir = setup();
    let d = dir.path();
    ok(
        d,
        &["keygen", "--secret", "runner.pem", "--public", "runner.pub"],
    );
    ok(
        d,
        &["keygen", "--secret", "heads.pem", "--public", "heads.pub"],
    );
    dir
}

fn public(d: &Path, name: &str) -> TrustedKeys {
    let pem = std::fs::read_to_string(d.join(name)).expect("public key");
    [PublicKey::from_pem(&pem).expect("key")]
        .into_iter()
        .collect()
}

/// The camera app: bundles from the release key, feeds from the runner, tree heads from the
/// tree-head key (the configuration FORMAT.md documents, "Who signs tree heads").
fn app(d: &Path) -> App {
    let trust = Trust::pinned(
        Signers::new(public(d, "k.pub"), 1).expect("bundle signers"),
        Signers::new(public(d, "runner.pub"), 1).expect("feed signers"),
        Signers::new(public(d, "heads.pub"), 1).expect("tree-head signers"),
    );
    App::new(trust, Version::new(2, 3, 0))
        .wait_for_lock(std::time::Duration::from_secs(5))
        .device_id("camera-7")
        .expect("device id")
}

/// A genuine publish: the runner's feed key, the tree-head key from where it is kept.
fn publish_genuine(d: &Path, bundle: &str, channel: &str) {
    ok(
        d,
        &[
            "publish",
            bundle,
            "--tree",
            "tree",
            "--channel",
            channel,
            "--key",
            "runner.pem",
            "--tree-head-key",
            "heads.pem",
            "--trust",
            "k.pub",
        ],
    );
}

fn withdraw_genuine(d: &Path, channel: &str, version: &str) {
    ok(
        d,
        &[
            "withdraw",
            "--tree",
            "tree",
            "--channel",
            channel,
            "--version",
            version,
            "--key",
            "runner.pem",
            "--tree-head-key",
            "heads.pem",
        ],
    );
}

fn feed_file(d: &Path, channel: &str) -> Vec<u8> {
    std::fs::read(d.join(format!("tree/feeds/{channel}.json"))).expect("feed file")
}

fn feed_of(bytes: &[u8]) -> Feed {
    let signed = SignedFeed::from_json(bytes).expect("envelope");
    Feed::from_json(signed.feed.as_bytes()).expect("feed")
}

/// A feed the thief signs with the runner's key alone, made from `base` by `edit`.
fn forge(d: &Path, base: &[u8], edit: &dyn Fn(&mut Feed)) -> Vec<u8> {
    let mut feed = feed_of(base);
    edit(&mut feed);
    signed_feed_file(d, "runner.pem", feed.to_json()).to_json()
}

fn tree_file(d: &Path, url: &str) -> PathBuf {
    let path = url
        .strip_prefix(BASE)
        .unwrap_or_else(|| panic!("the session asked for {url}, outside the tree"));
    d.join("tree").join(path)
}

/// One update on `feed` as the app fetched it: every other file comes from the tree, as a
/// static web server would send it.
fn update(device: &Device, d: &Path, feed: Vec<u8>) -> Report {
    let url = format!("{BASE}feeds/{}.json", device.channel());
    let mut session = device.begin(&url, feed, Timestamp::now());
    loop {
        match session.advance() {
            Next::Fetch(want) => {
                let bytes = std::fs::read(tree_file(d, want.url())).expect("asked-for file");
                session.provide(bytes);
            }
            Next::Download(want) => {
                let landed = d.join("landed.bin");
                std::fs::copy(tree_file(d, &want.urls()[0]), &landed).expect("download");
                session.downloaded(&landed);
            }
            Next::Done(report) => return report,
            other => panic!("unexpected step {other:?}"),
        }
    }
}

fn refusal(report: &Report) -> String {
    match &report.outcome {
        Outcome::Refused(e) => {
            assert_eq!(e.kind(), ErrorKind::Proof, "{e}");
            e.to_string()
        }
        other => panic!("expected a refusal, got {other:?}"),
    }
}

fn installed(report: &Report) -> Version {
    match &report.outcome {
        Outcome::Installed(i) => i.release.manifest.version.clone(),
        other => panic!("expected an install, got {other:?}"),
    }
}

fn sha(d: &Path, file: &str) -> ampoule_verify::Digest {
    ampoule_verify::Digest::of(&std::fs::read(d.join(file)).expect("bundle"))
}

#[test]
fn issue10_a_withdrawn_release_is_not_resurrected_with_its_old_entry_and_the_current_head() {
    let dir = three_keys();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish_genuine(d, &v1, "stable");
    let published = feed_file(d, "stable");
    withdraw_genuine(d, "stable", "1.0.0");
    let withdrawn = feed_file(d, "stable");

    // The withdraw feed carries its own entry: the withdraw of 1.0.0, offering nothing.
    let ledger = feed_of(&withdrawn).ledger.expect("ledger");
    let entry =
        Entry::from_bytes(ledger.entry.as_deref().expect("entry").as_bytes()).expect("entry");
    assert_eq!(
        (entry.event, entry.version.to_string(), entry.feed_sequence),
        (Event::Withdraw, "1.0.0".to_string(), 2)
    );
    assert_eq!(entry.offered, Some(None));
    assert!(
        ledger
            .entry
            .as_deref()
            .expect("entry")
            .ends_with(",\"offered\":null}"),
        "the entry logs what is offered now, null written out"
    );

    // A camera that follows the channel sees the withdraw.
    let camera = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    let report = update(&camera, d, withdrawn.clone());
    assert!(
        matches!(report.outcome, Outcome::NothingOffered),
        "{report:?}"
    );

    // The thief re-offers 1.0.0 with its old publish entry (leaf 0), proven in the current
    // genuine tree head (size 2) that the withdraw feed carries.
    let old_text = feed_of(&published)
        .ledger
        .and_then(|l| l.entry)
        .expect("the publish entry");
    let proof = Ledger::open(&d.join("tree/ledger"))
        .expect("ledger")
        .inclusion_proof(0, 2)
        .expect("proof of leaf 0 in size 2");
    let resurrect = |sequence: u64| {
        let release = feed_of(&published).release;
        let (old_text, proof) = (old_text.clone(), proof.clone());
        forge(d, &withdrawn, &move |f| {
            f.sequence = sequence;
            f.release = release.clone();
            let l = f.ledger.as_mut().expect("ledger");
            l.entry = Some(old_text.clone());
            l.inclusion = Some(proof.clone());
        })
    };
    let offers = format!(
        "offers trailcam-species 1.0.0 (sha256 {}), but the ledger does not log that as channel \
         stable's current release: ",
        sha(d, &v1)
    );
    assert_eq!(
        refusal(&update(&camera, d, resurrect(3))),
        format!(
            "feed sequence 3 {offers}the ledger entry the feed carries was appended for feed \
             sequence 1, not 3"
        )
    );
    // To a camera that never saw the channel, under the entry's own sequence: the entry is not
    // the newest in the head.
    let fresh = Device::open(&d.join("fresh"), "stable", app(d), Timestamp::now()).expect("open");
    assert_eq!(
        refusal(&update(&fresh, d, resurrect(1))),
        format!(
            "feed sequence 1 {offers}the ledger entry the feed carries is entry 0 of the tree \
             head of size 2, not its newest; an older entry is not the channel's current state"
        )
    );
    // With the genuine withdraw entry instead: it offers nothing.
    let with_withdraw_entry = {
        let release = feed_of(&published).release;
        forge(d, &withdrawn, &move |f| f.release = release.clone())
    };
    assert_eq!(
        refusal(&update(&fresh, d, with_withdraw_entry)),
        format!(
            "feed sequence 2 {offers}the ledger entry the feed carries offers nothing, not \
             trailcam-species 1.0.0 (sha256 {}) at 100% rollout",
            sha(d, &v1)
        )
    );
    assert!(fresh.current().expect("current").is_none());

    // The genuine next release installs.
    publish_genuine(d, &pack(d, "1.1.0", 1, "k.pem"), "stable");
    let report = update(&camera, d, feed_file(d, "stable"));
    assert_eq!(installed(&report), Version::new(1, 1, 0));
}

#[test]
fn issue10_a_feed_at_the_largest_sequence_signed_with_the_feed_key_alone_locks_nobody_out() {
    let dir = three_keys();
    let d = dir.path();
    publish_genuine(d, &pack(d, "1.0.0", 0, "k.pem"), "stable");
    let camera = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    assert_eq!(
        installed(&update(&camera, d, feed_file(d, "stable"))),
        Version::new(1, 0, 0)
    );

    let genuine = feed_file(d, "stable");
    let at_max = |keep_entry: bool| {
        forge(d, &genuine, &move |f| {
            f.sequence = u64::MAX;
            f.release = None;
            if !keep_entry {
                let l = f.ledger.as_mut().expect("ledger");
                l.entry = None;
                l.inclusion = None;
            }
        })
    };
    let what = format!(
        "feed sequence {} offers nothing, but the ledger does not log that as channel stable's \
         current state: ",
        u64::MAX
    );
    assert_eq!(
        refusal(&update(&camera, d, at_max(true))),
        format!(
            "{what}the ledger entry the feed carries was appended for feed sequence 1, not {}",
            u64::MAX
        )
    );
    assert_eq!(
        refusal(&update(&camera, d, at_max(false))),
        format!("{what}the feed carries no ledger entry")
    );
    // Nothing of it was remembered: the store still holds sequence 1.
    assert_eq!(
        camera
            .store()
            .state()
            .expect("state")
            .last_feed("stable")
            .map(|(s, _)| s),
        Some(1)
    );

    // The genuine feeds after it install, and none is called a replay.
    let same = update(&camera, d, feed_file(d, "stable"));
    assert!(matches!(same.outcome, Outcome::UpToDate), "{same:?}");
    publish_genuine(d, &pack(d, "1.1.0", 1, "k.pem"), "stable");
    assert_eq!(
        installed(&update(&camera, d, feed_file(d, "stable"))),
        Version::new(1, 1, 0)
    );
}

#[test]
fn issue10_a_device_that_switches_channels_on_one_tree_takes_no_stale_entry() {
    let dir = three_keys();
    let d = dir.path();
    let v09 = pack(d, "0.9.0", 0, "k.pem");
    publish_genuine(d, &v09, "beta");
    let v1 = pack(d, "1.0.0", 1, "k.pem");
    publish_genuine(d, &v1, "stable");
    let stale = feed_file(d, "stable");
    withdraw_genuine(d, "stable", "1.0.0");
    // beta renewed: its feed carries the tree head of size 4.
    publish_genuine(d, &v09, "beta");

    let on_beta = Device::open(&d.join("cam"), "beta", app(d), Timestamp::now()).expect("open");
    assert_eq!(
        installed(&update(&on_beta, d, feed_file(d, "beta"))),
        Version::new(0, 9, 0)
    );
    drop(on_beta);
    let camera = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    camera.switch_channel().expect("switch to stable");

    // The withdrawn 1.0.0's genuine old feed (sequence 1; its entry is the last leaf of the
    // head of size 2), replayed by the thief or the network to the camera that has no
    // sequence of stable yet: its head is older than the one the camera saw on beta.
    let smaller = |size: u64| {
        format!(
            "ledger tree head of size {size} is smaller than the tree head of size 4 this device \
             saw before; refusing a rolled-back ledger (after a channel switch, the new \
             channel's feed is taken once a renewal of it carries a head at least that large: \
             'ampoule publish' of its current bundle renews it)"
        )
    };
    let report = update(&camera, d, stale);
    match &report.outcome {
        Outcome::Refused(e) => {
            assert_eq!(e.to_string(), smaller(2));
            assert_eq!(e.kind(), ErrorKind::Stale);
        }
        other => panic!("expected a refusal, got {other:?}"),
    }
    // The rule's price: stable's genuine current feed (the withdraw, head of size 3) waits for
    // stable's next change too.
    let report = update(&camera, d, feed_file(d, "stable"));
    assert!(
        matches!(&report.outcome, Outcome::Refused(e) if e.to_string() == smaller(3)),
        "{report:?}"
    );
    assert_eq!(
        camera
            .current()
            .expect("current")
            .map(|r| r.manifest.version),
        Some(Version::new(0, 9, 0))
    );

    // Stable's next publish carries the newest head, and the camera takes it.
    publish_genuine(d, &pack(d, "1.1.0", 2, "k.pem"), "stable");
    assert_eq!(
        installed(&update(&camera, d, feed_file(d, "stable"))),
        Version::new(1, 1, 0)
    );
}

/// An entry exactly as the ledger stored it before format 2 (no `format`, no `offered`).
fn legacy_entry(bundle: &str, version: &str, sha256: &str, manifest: &str, key: &str) -> String {
    format!(
        "{{\"event\":\"publish\",\"channel\":\"stable\",\"bundle\":\"{bundle}\",\"version\":\
         \"{version}\",\"bundle_digest\":\"{sha256}\",\"manifest_digest\":\"{manifest}\",\
         \"key_ids\":[\"{key}\"],\"time\":1796112000,\"feed_sequence\":1}}"
    )
}

#[test]
fn issue10_old_format_ledgers_stay_readable_and_devices_require_the_new_binding() {
    let dir = three_keys();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    publish_genuine(d, &v1, "stable");
    // The tree as an earlier version left it: its ledger holds one entry of the old format.
    let manifest = ampoule_verify::Digest::of(
        &ampoule_verify::bundle::Unverified::open(&d.join(&v1))
            .expect("bundle")
            .layout
            .manifest,
    );
    let key_id = public(d, "k.pub")
        .iter()
        .next()
        .expect("key")
        .id()
        .to_string();
    let text = legacy_entry(
        "trailcam-species",
        "1.0.0",
        &sha(d, &v1).to_string(),
        &manifest.to_string(),
        &key_id,
    );
    let parsed = Entry::from_bytes(text.as_bytes()).expect("an old entry parses");
    assert!(!parsed.is_bound());
    assert_eq!(
        parsed.to_bytes(),
        text.as_bytes(),
        "it round-trips byte for byte"
    );
    std::fs::remove_dir_all(d.join("tree/ledger")).expect("remove");
    let heads = ampoule::release::keyfile::read_secret_key(
        &d.join("heads.pem"),
        &ampoule::release::keyfile::PassphraseSource::None,
    )
    .expect("key");
    let mut ledger = Ledger::create(&d.join("tree/ledger")).expect("create");
    ledger
        .append(text.as_bytes(), &[&heads], 1_796_112_000)
        .expect("append");

    let check = |what: &str| {
        let out = run(
            d,
            &[
                "--json",
                "ledger",
                "check",
                "--tree",
                "tree",
                "--trust",
                "heads.pub",
            ],
        );
        let doc: serde_json::Value = serde_json::from_slice(&out.stdout).expect("JSON");
        assert_eq!(out.status.code(), Some(0), "{what}: {doc}");
        doc
    };
    assert_eq!(check("old ledger")["tree_size"], 1);
    let listed: serde_json::Value =
        serde_json::from_str(&ok(d, &["--json", "ledger", "list", "--tree", "tree"]))
            .expect("JSON");
    assert_eq!(listed["entries"][0]["version"], "1.0.0");
    assert_eq!(listed["entries"][0]["format"], 1);

    // A feed carrying the old entry as the head's last leaf is refused by devices.
    let old_feed = forge(d, &feed_file(d, "stable"), &|f| {
        let l = f.ledger.as_mut().expect("ledger");
        l.tree_head = ledger.tree_head().expect("head").clone();
        l.entry = Some(text.clone());
        l.inclusion = Some(ledger.inclusion_proof(0, 1).expect("proof"));
        l.consistency = ledger.consistency_proof(0, 1).expect("proof");
    });
    let camera = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    assert_eq!(
        refusal(&update(&camera, d, old_feed)),
        format!(
            "feed sequence 1 offers trailcam-species 1.0.0 (sha256 {}), but the ledger does not \
             log that as channel stable's current release: the ledger entry the feed carries is \
             in the old entry format (format 1), which does not bind a feed; the publisher must \
             publish or renew the channel with a version of ampoule that writes format 2",
            sha(d, &v1)
        )
    );

    // One renewal appends a format-2 entry after the old one: auditors read both, devices
    // take the renewed feed.
    publish_genuine(d, &v1, "stable");
    let doc = check("mixed ledger");
    assert_eq!(doc["tree_size"], 2);
    let listed: serde_json::Value =
        serde_json::from_str(&ok(d, &["--json", "ledger", "list", "--tree", "tree"]))
            .expect("JSON");
    assert_eq!(listed["entries"][1]["format"], 2);
    assert_eq!(listed["entries"][1]["offered"]["rollout_percent"], 100);
    assert_eq!(
        listed["entries"][1]["offered"]["deltas"],
        serde_json::json!([])
    );
    let report = update(&camera, d, feed_file(d, "stable"));
    assert_eq!(installed(&report), Version::new(1, 0, 0));
}

/// The tree-head signer the runner calls: a script beside the tree-head key in `vault/`, a
/// stand-in for a signing service or hardware token the runner reaches but cannot read. It logs
/// the entry it is shown, then signs with openssl (the general-purpose Ed25519 signer of
/// RFC 8032, which cannot read stdin with -rawin, hence the file).
fn vault(d: &Path, key: &str) -> String {
    std::fs::create_dir(d.join("vault")).expect("vault");
    std::fs::rename(d.join(key), d.join("vault/heads.pem")).expect("move the key");
    std::fs::write(
        d.join("vault/sign.sh"),
        "set -e\nprintf '%s\\n' \"$AMPOULE_LEDGER_ENTRY\" >> vault/shown.log\n\
         f=$(mktemp)\ncat > \"$f\"\nopenssl pkeyutl -sign -rawin -inkey vault/heads.pem -in \"$f\"\n\
         rm -f \"$f\"\n",
    )
    .expect("script");
    "sh vault/sign.sh".to_string()
}

/// `publish` as the runner runs it (the feed key, the bundle checked against the release
/// key), with `extra` arguments.
fn publish_on_runner(d: &Path, bundle: &str, extra: &[&str]) -> std::process::Output {
    let mut args = vec![
        "publish",
        bundle,
        "--tree",
        "tree",
        "--channel",
        "stable",
        "--key",
        "runner.pem",
        "--trust",
        "k.pub",
    ];
    args.extend(extra);
    run(d, &args)
}

/// Whether the `openssl` command (the outside signer's stand-in) is here; says so when not.
fn openssl_available() -> bool {
    let found = std::process::Command::new("openssl")
        .arg("version")
        .output()
        .is_ok_and(|o| o.status.success());
    if !found {
        eprintln!("skipped: openssl is not installed");
    }
    found
}

fn assert_published(out: &std::process::Output) {
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

fn publish_with_signer(d: &Path, bundle: &str, signer: &str) -> std::process::Output {
    publish_on_runner(
        d,
        bundle,
        &[
            "--tree-head-signer",
            signer,
            "--tree-head-signer-key",
            "heads.pub",
        ],
    )
}

#[test]
fn issue10_tree_heads_signed_outside_the_runner() {
    let dir = three_keys();
    let d = dir.path();
    if !openssl_available() {
        return;
    }
    let signer = vault(d, "heads.pem");
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let out = publish_with_signer(d, &v1, &signer);
    assert_published(&out);
    // Feed role for the runner, tree heads from elsewhere: nothing to warn about.
    assert_eq!(String::from_utf8_lossy(&out.stderr), "");
    let shown = std::fs::read_to_string(d.join("vault/shown.log")).expect("log");
    let feed = feed_of(&feed_file(d, "stable"));
    assert_eq!(
        shown.trim_end(),
        feed.ledger
            .as_ref()
            .and_then(|l| l.entry.as_deref())
            .expect("entry"),
        "the signer was shown the entry the head logs"
    );
    let camera = Device::open(&d.join("cam"), "stable", app(d), Timestamp::now()).expect("open");
    assert_eq!(
        installed(&update(&camera, d, feed_file(d, "stable"))),
        Version::new(1, 0, 0)
    );

    // A signer that fails, and one that signs with another key: nothing is appended.
    let before = std::fs::read(d.join("tree/ledger/tree-head.json")).expect("head");
    let v2 = pack(d, "1.1.0", 1, "k.pem");
    let out = publish_with_signer(d, &v2, "cat > /dev/null; exit 3");
    assert_eq!(out.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&out.stderr).contains(
            "the tree-head signer 'cat > /dev/null; exit 3' failed (exit status: 3); nothing \
             was appended and no feed was changed"
        ),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let other =
        "f=$(mktemp); cat > \"$f\"; openssl pkeyutl -sign -rawin -inkey runner.pem -in \"$f\"";
    let out = publish_with_signer(d, &v2, other);
    assert_eq!(out.status.code(), Some(1));
    let heads_id = public(d, "heads.pub").iter().next().expect("key").id();
    assert!(
        String::from_utf8_lossy(&out.stderr).contains(&format!(
            "signature does not verify under key {heads_id} over this tree head: the tree-head \
             signer '{other}' did not sign this tree head with the key given for it \
             ({heads_id}); nothing was appended"
        )),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(
        std::fs::read(d.join("tree/ledger/tree-head.json")).expect("head"),
        before,
        "the ledger did not move"
    );
    assert_eq!(feed_of(&feed_file(d, "stable")).sequence, 1);
    let out = publish_with_signer(d, &v2, &signer);
    assert_published(&out);
    assert_eq!(
        installed(&update(&camera, d, feed_file(d, "stable"))),
        Version::new(1, 1, 0)
    );
}

/// Two tree-head signers outside the runner, for devices that need two tree-head signatures:
/// `--tree-head-signer` repeats, each paired in order with its `--tree-head-signer-key`.
#[test]
fn issue10_two_outside_tree_head_signers_meet_a_threshold_of_two() {
    let dir = three_keys();
    let d = dir.path();
    if !openssl_available() {
        return;
    }
    ok(
        d,
        &["keygen", "--secret", "heads2.pem", "--public", "heads2.pub"],
    );
    let signer = |key: &str| {
        format!("f=$(mktemp); cat > \"$f\"; openssl pkeyutl -sign -rawin -inkey {key} -in \"$f\"")
    };
    let (first, second) = (signer("heads.pem"), signer("heads2.pem"));
    let publish = |bundle: &str, pairs: &[(&str, &str)]| {
        let mut extra = Vec::new();
        for (command, key) in pairs {
            extra.extend(["--tree-head-signer", command, "--tree-head-signer-key", key]);
        }
        publish_on_runner(d, bundle, &extra)
    };
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    // One key short of a pair, and one outside key given twice: refused, nothing appended.
    let out = publish_on_runner(
        d,
        &v1,
        &[
            "--tree-head-signer",
            &first,
            "--tree-head-signer",
            &second,
            "--tree-head-signer-key",
            "heads.pub",
        ],
    );
    assert!(
        String::from_utf8_lossy(&out.stderr).contains(
            "2 --tree-head-signer command(s) but 1 --tree-head-signer-key file(s): give one key \
             for each signer, in the same order"
        ),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let out = publish(&v1, &[(&first, "heads.pub"), (&first, "heads.pub")]);
    assert!(!out.status.success());
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("also signs here"),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        !d.join("tree/ledger/tree-head.json").exists(),
        "nothing was appended"
    );

    let heads: TrustedKeys = ["heads.pub", "heads2.pub"]
        .into_iter()
        .map(|name| {
            PublicKey::from_pem(&std::fs::read_to_string(d.join(name)).expect("public key"))
                .expect("key")
        })
        .collect();
    let trust = Trust::pinned(
        Signers::new(public(d, "k.pub"), 1).expect("bundle signers"),
        Signers::new(public(d, "runner.pub"), 1).expect("feed signers"),
        Signers::new(heads, 2).expect("two tree-head signatures"),
    );
    let camera = Device::open(
        &d.join("cam"),
        "stable",
        App::new(trust, Version::new(2, 3, 0))
            .device_id("camera-7")
            .expect("device id"),
        Timestamp::now(),
    )
    .expect("open");
    // One outside signer: the tree takes it (pinned devices' thresholds are theirs to
    // know), but this device needs two signatures on the tree head.
    let out = publish(&v1, &[(&first, "heads.pub")]);
    assert_published(&out);
    let report = update(&camera, d, feed_file(d, "stable"));
    assert!(
        matches!(&report.outcome, Outcome::Refused(e) if e.kind() == ErrorKind::Signature),
        "{report:?}"
    );
    let v2 = pack(d, "1.1.0", 1, "k.pem");
    let out = publish(&v2, &[(&first, "heads.pub"), (&second, "heads2.pub")]);
    assert_published(&out);
    assert_eq!(
        installed(&update(&camera, d, feed_file(d, "stable"))),
        Version::new(1, 1, 0)
    );
}

#[test]
fn issue10_publish_warns_when_the_feed_key_alone_signs_tree_heads() {
    let dir = three_keys();
    let d = dir.path();
    let v1 = pack(d, "1.0.0", 0, "k.pem");
    let out = publish_on_runner(d, &v1, &[]);
    assert!(out.status.success());
    let runner = public(d, "runner.pub").iter().next().expect("key").id();
    assert_eq!(
        String::from_utf8_lossy(&out.stderr),
        format!(
            "ampoule: warning: the ledger's tree heads are signed by the feed key {runner} \
             (runner.pem) alone: devices that also trust it for tree heads cannot tell a feed \
             signed with a stolen feed key from a genuine one; give the publishing runner's key \
             the feed role only and sign tree heads with a key it does not hold (FORMAT.md, \
             \"Who signs tree heads\"), given with --tree-head-signer or --tree-head-key\n"
        )
    );
    // trust init's default gives one key every role: it says so.
    let out = run(
        d,
        &["trust", "init", "--key", "runner.pub", "-o", "trust.json"],
    );
    assert!(out.status.success());
    assert!(
        String::from_utf8_lossy(&out.stderr).contains(&format!(
            "warning: key {runner} holds both the feed and the tree_head role and tree heads \
             need 1 signature"
        )),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}
