//! Issue 13, the release side of deltas, with the real binary: `publish` makes deltas from the
//! channel's earlier releases of the same name, writes each as `bundles/<sha256>.ampoule-delta`,
//! lists it in the feed and logs it in the ledger entry; a dry run writes none; a renewal offers
//! the same ones again; a delta that saves too little, one for another name and one from a
//! release to itself are never offered.

use std::path::Path;

use ampoule_verify::Digest;
use ampoule_verify::feed::{Feed, SignedFeed};
use ampoule_verify::ledger::{DeltaRef, Entry};
use serde_json::Value;

mod tree_common;
use tree_common::*;

/// The model's size: one 4 MiB delta chunk, so a device rebuilds it in one record.
const MODEL_BYTES: usize = 3_000_000;

/// Model bytes that do not compress (a linear congruential sequence, the constants of
/// Numerical Recipes' `ranqd1`, from memory), the last `changed` bytes drawn from `seed`: a
/// retrained last layer.
fn model(changed: usize, seed: u32) -> Vec<u8> {
    let mut x: u32 = 0x2545_f491;
    let mut next = move || {
        x = x.wrapping_mul(1_664_525).wrapping_add(1_013_904_223);
        (x >> 24) as u8
    };
    let mut bytes: Vec<u8> = (0..MODEL_BYTES).map(|_| next()).collect();
    let mut y = seed;
    for b in &mut bytes[MODEL_BYTES - changed..] {
        y = y.wrapping_mul(1_664_525).wrapping_add(1_013_904_223);
        *b = (y >> 24) as u8;
    }
    bytes
}

/// Packs `version` of `name` from a model whose last `changed` bytes come from `seed`.
fn pack_line(d: &Path, name: &str, version: &str, changed: usize, seed: u32) -> String {
    let file = format!("{name}-{version}.bin");
    std::fs::write(d.join(&file), model(changed, seed)).expect("model");
    let out = format!("{name}-{version}.ampoule");
    let run = run(
        d,
        &[
            "pack",
            "--model",
            &file,
            "--labels",
            "labels.txt",
            "--name",
            name,
            "--version",
            version,
            "--created",
            "2026-12-01T08:00:00Z",
            "--key",
            "k.pem",
            "-o",
            &out,
        ],
    );
    assert!(
        run.status.success(),
        "pack: {}",
        String::from_utf8_lossy(&run.stderr)
    );
    out
}

fn publish_json(d: &Path, bundle: &str, extra: &[&str]) -> Value {
    let mut args = vec![
        "--json",
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
    serde_json::from_str(&ok(d, &args)).expect("publish --json prints JSON")
}

fn feed(d: &Path) -> Feed {
    let signed =
        SignedFeed::from_json(&std::fs::read(d.join("tree/feeds/stable.json")).expect("feed"))
            .expect("a signed feed");
    Feed::from_json(signed.feed.as_bytes()).expect("a feed")
}

/// The ledger entry the feed carries.
fn feed_entry(d: &Path) -> Entry {
    let feed = feed(d);
    let text = feed
        .ledger
        .and_then(|l| l.entry)
        .expect("the feed carries its entry");
    Entry::from_bytes(text.as_bytes()).expect("an entry")
}

fn file_sha(path: &Path) -> Digest {
    Digest::of(&std::fs::read(path).expect("file"))
}

/// Every delta file in the tree's bundles/.
fn delta_files(d: &Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(d.join("tree/bundles"))
        .expect("bundles")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".ampoule-delta"))
        .collect();
    names.sort();
    names
}

/// The feed's deltas are the ledger entry's, and each is a file in bundles/ with the listed
/// size and SHA-256, made from the base the list names.
fn assert_served(d: &Path, deltas: &[DeltaRef]) {
    let feed = feed(d);
    let release = feed.release.as_ref().expect("a release");
    assert_eq!(release.deltas, deltas);
    let entry = feed_entry(d);
    assert_eq!(
        entry.offered().expect("offers a release").deltas,
        deltas,
        "the ledger logs what the feed lists"
    );
    for delta in deltas {
        let path = d.join(format!("tree/bundles/{}.ampoule-delta", delta.sha256));
        assert_eq!(file_sha(&path), delta.sha256, "{}", path.display());
        assert_eq!(std::fs::metadata(&path).expect("delta").len(), delta.size);
        assert!(delta.size < release.size);
    }
}

fn reference(v: &Value) -> DeltaRef {
    DeltaRef {
        base: v["base"].as_str().expect("base").parse().expect("a digest"),
        size: v["size"].as_u64().expect("size"),
        sha256: v["sha256"]
            .as_str()
            .expect("sha256")
            .parse()
            .expect("a digest"),
    }
}

#[test]
fn issue13_publish_makes_deltas_from_the_channels_last_releases_and_lists_them() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack_line(d, "trailcam-species", "1.0.0", 0, 0);
    let v2 = pack_line(d, "trailcam-species", "1.1.0", 5_000, 1);
    let v3 = pack_line(d, "trailcam-species", "1.2.0", 9_000, 2);
    let v4 = pack_line(d, "trailcam-species", "1.3.0", 9_000, 3);
    let first = publish_json(d, &v1, &[]);
    assert_eq!(
        first["deltas"],
        serde_json::json!([]),
        "nothing to start from"
    );
    assert!(delta_files(d).is_empty());

    let second = publish_json(d, &v2, &[]);
    let offered = second["deltas"].as_array().expect("a list");
    assert_eq!(offered.len(), 1, "{second}");
    assert_eq!(offered[0]["from"]["version"], "1.0.0");
    assert_eq!(offered[0]["new"], true);
    assert_served(d, &[reference(&offered[0])]);

    // A dry run makes and shows them, and writes none into the tree.
    let files = delta_files(d);
    let dry = publish_json(d, &v3, &["--dry-run"]);
    assert_eq!(delta_files(d), files, "a dry run wrote a delta");
    let third = publish_json(d, &v3, &[]);
    assert_eq!(
        dry["deltas"], third["deltas"],
        "the dry run showed what was made"
    );
    let versions: Vec<&str> = third["deltas"]
        .as_array()
        .expect("a list")
        .iter()
        .map(|o| o["from"]["version"].as_str().expect("a version"))
        .collect();
    assert_eq!(versions, ["1.1.0", "1.0.0"], "newest base first");
    let refs: Vec<DeltaRef> = third["deltas"]
        .as_array()
        .expect("a list")
        .iter()
        .map(reference)
        .collect();
    assert_served(d, &refs);
    // Each base is named by its files' digest, as its delta's header names it.
    for (r, bundle) in refs.iter().zip([&v2, &v1]) {
        let id = ampoule_verify::bundle::Unverified::open(&d.join(bundle))
            .map(|b| ampoule_verify::format::delta_file::base_id(&b.manifest.files))
            .expect("a bundle");
        assert_eq!(r.base, id);
    }

    // --deltas 1: only the newest earlier release; --deltas 0: none.
    let fourth = publish_json(d, &v4, &["--deltas", "1", "--dry-run"]);
    assert_eq!(fourth["deltas"].as_array().map(Vec::len), Some(1));
    assert_eq!(fourth["deltas"][0]["from"]["version"], "1.2.0");
    let fourth = publish_json(d, &v4, &["--deltas", "0"]);
    assert_eq!(fourth["deltas"], serde_json::json!([]));
    assert_served(d, &[]);
}

#[test]
fn issue13_a_renewal_offers_the_same_deltas_and_a_withdraw_the_release_as_published() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack_line(d, "trailcam-species", "1.0.0", 0, 0);
    let v2 = pack_line(d, "trailcam-species", "1.1.0", 5_000, 1);
    let v3 = pack_line(d, "trailcam-species", "1.2.0", 5_000, 2);
    publish_json(d, &v1, &[]);
    let published = publish_json(d, &v2, &["--rollout", "10"]);
    let refs = vec![reference(&published["deltas"][0])];
    let renewed = publish_json(d, &v2, &["--rollout", "50"]);
    assert_eq!(renewed["action"], "renewed");
    assert_eq!(renewed["deltas"][0]["new"], false);
    assert_eq!(
        renewed["deltas"][0]["sha256"],
        published["deltas"][0]["sha256"]
    );
    assert_served(d, &refs);

    // A withdraw of 1.2.0 offers 1.1.0 again with the deltas it was published with.
    publish_json(d, &v3, &[]);
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
            "1.2.0",
        ],
    );
    assert_eq!(
        feed(d).release.as_ref().map(|r| r.version.to_string()),
        Some("1.1.0".into())
    );
    assert_served(d, &refs);

    // A renewal drops a delta whose file was removed, and says so.
    let path = d.join(format!("tree/bundles/{}.ampoule-delta", refs[0].sha256));
    std::fs::remove_file(&path).expect("remove");
    let renewed = publish_json(d, &v2, &[]);
    assert_eq!(renewed["deltas"], serde_json::json!([]));
    let dropped = renewed["deltas_dropped"][0]["reason"]
        .as_str()
        .expect("a reason");
    assert!(dropped.contains("cannot be read"), "{dropped}");
    assert_served(d, &[]);
}

#[test]
fn issue13_publish_never_offers_a_delta_for_another_name_to_itself_or_saving_too_little() {
    let dir = setup();
    let d = dir.path();
    // Another bundle name on the same channel is never a base.
    let other = pack_line(d, "trailcam-night", "0.9.0", 0, 0);
    publish_json(d, &other, &[]);
    let v1 = pack_line(d, "trailcam-species", "1.0.0", 0, 0);
    let first = publish_json(d, &v1, &[]);
    assert_eq!(first["deltas"], serde_json::json!([]), "{first}");
    assert_eq!(first["deltas_skipped"], serde_json::json!([]), "{first}");

    // A release whose model changed everywhere: the delta saves too little, so it is skipped,
    // with its size and the reason in the output.
    let file = "trailcam-species-2.0.0.bin";
    let bytes: Vec<u8> = model(0, 0).iter().map(|b| b ^ 0x5a).collect();
    std::fs::write(d.join(file), bytes).expect("model");
    let run_pack = run(
        d,
        &[
            "pack",
            "--model",
            file,
            "--labels",
            "labels.txt",
            "--name",
            "trailcam-species",
            "--version",
            "2.0.0",
            "--created",
            "2026-12-01T08:00:00Z",
            "--key",
            "k.pem",
            "-o",
            "v2.ampoule",
        ],
    );
    assert!(run_pack.status.success());
    let text = ok(
        d,
        &[
            "publish",
            "v2.ampoule",
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            "k.pem",
            "--dry-run",
        ],
    );
    assert!(
        text.contains("no delta from trailcam-species 1.0.0: the delta ("),
        "{text}"
    );
    let second = publish_json(d, "v2.ampoule", &[]);
    assert_eq!(second["deltas"], serde_json::json!([]));
    let skipped = &second["deltas_skipped"][0];
    assert_eq!(skipped["from"]["version"], "1.0.0");
    let (size, bundle) = (
        skipped["size"].as_u64().expect("made, then skipped"),
        second["release"]["size"].as_u64().expect("size"),
    );
    assert!(size * 100 > bundle * 75, "{size} of {bundle}");
    assert!(delta_files(d).is_empty(), "a skipped delta was left behind");
    assert_served(d, &[]);

    // Renewing the same bundle never lists a delta from it to itself.
    let renewed = publish_json(d, "v2.ampoule", &[]);
    assert_eq!(renewed["action"], "renewed");
    assert_eq!(renewed["deltas"], serde_json::json!([]));
}

#[test]
fn issue13_deltas_over_the_feeds_limit_are_a_usage_error() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack_line(d, "trailcam-species", "1.0.0", 0, 0);
    let (code, err) = refused(
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
            "--deltas",
            "9",
        ],
    );
    assert_eq!(code, 2);
    assert_eq!(
        err,
        "ampoule: error: --deltas 9 is over 8, the most deltas a feed lists for a release; give 0 to 8"
    );
    assert!(!d.join("tree").exists());
}
