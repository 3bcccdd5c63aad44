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
    // Nothing staged is left beside the bundles.
    let left: Vec<String> = std::fs::read_dir(d.join("tree/bundles"))
        .expect("bundles")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .filter(|n| n.starts_with('.'))
        .collect();
    assert!(left.is_empty(), "{left:?}");
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

/// A command from PATH, or `None` (and a note of what is skipped) when it is not installed.
fn tool(name: &str) -> Option<std::process::Command> {
    let found = std::process::Command::new(name)
        .arg("--version")
        .output()
        .is_ok_and(|o| o.status.success());
    if !found {
        eprintln!("skipped the {name} check: {name} is not installed");
    }
    found.then(|| std::process::Command::new(name))
}

/// Runs an outside tool in `dir` and returns its stdout; it must succeed.
fn outside(dir: &Path, mut command: std::process::Command) -> Vec<u8> {
    let out = command.current_dir(dir).output().expect("the tool runs");
    assert!(
        out.status.success(),
        "{command:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    out.stdout
}

/// Extracts `bundle`'s files with GNU tar and the zstd command into `d/into`.
fn extract_bundle(d: &Path, bundle: &str, into: &str) -> Option<()> {
    let dest = d.join(into);
    std::fs::create_dir(&dest).expect("dir");
    let mut tar = tool("tar")?;
    tar.args(["-xf", &format!("../{bundle}"), "payload.tar.zst"]);
    outside(&dest, tar);
    let mut zstd = tool("zstd")?;
    zstd.args(["-d", "-q", "payload.tar.zst", "-o", "payload.tar"]);
    outside(&dest, zstd);
    let mut tar = tool("tar")?;
    tar.args(["-xf", "payload.tar"]);
    outside(&dest, tar);
    Some(())
}

#[test]
fn issue13_a_delta_made_by_publish_rebuilds_the_release_with_gnu_tar_zstd_and_openssl() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack_line(d, "trailcam-species", "1.0.0", 0, 0);
    let v2 = pack_line(d, "trailcam-species", "1.1.0", 5_000, 1);
    publish_json(d, &v1, &[]);
    let published = publish_json(d, &v2, &[]);
    let delta = reference(&published["deltas"][0]);
    let file = d.join(format!("tree/bundles/{}.ampoule-delta", delta.sha256));
    let (Some(_), Some(_)) = (
        extract_bundle(d, &v1, "base"),
        extract_bundle(d, &v2, "new"),
    ) else {
        return;
    };

    // GNU tar reads the delta: four entries in the order FORMAT.md gives.
    let x = d.join("delta");
    std::fs::create_dir(&x).expect("dir");
    let mut tar = tool("tar").expect("tar ran above");
    tar.arg("-tf").arg(&file);
    let listed = String::from_utf8(outside(&x, tar)).expect("names");
    assert_eq!(
        listed,
        "delta.json\nmanifest.json\nsignatures.json\npatches.bin\n"
    );
    let mut tar = tool("tar").expect("tar");
    tar.arg("-xf").arg(&file);
    outside(&x, tar);

    // It carries the release's manifest and signatures byte for byte, as GNU tar extracts
    // them from the bundle.
    let mut tar = tool("tar").expect("tar");
    tar.args([
        "-xf",
        &format!("../{v2}"),
        "manifest.json",
        "signatures.json",
    ]);
    outside(&d.join("new"), tar);
    for name in ["manifest.json", "signatures.json"] {
        assert_eq!(
            std::fs::read(x.join(name)).expect("from the delta"),
            std::fs::read(d.join("new").join(name)).expect("from the bundle"),
            "{name}"
        );
    }
    // openssl verifies the carried signature (FORMAT.md's recipe: the context, then the
    // manifest as stored; RFC 8032 Ed25519).
    if let Some(mut openssl) = tool("openssl") {
        let mut signed = b"ampoule-sig-v1:manifest\n".to_vec();
        signed.extend(std::fs::read(x.join("manifest.json")).expect("manifest"));
        std::fs::write(x.join("signed.bin"), signed).expect("signed");
        let sigs: Value =
            serde_json::from_slice(&std::fs::read(x.join("signatures.json")).expect("sigs"))
                .expect("JSON");
        let hex = sigs["signatures"][0]["signature"].as_str().expect("hex");
        let sig: Vec<u8> = (0..hex.len())
            .step_by(2)
            .map(|i| u8::from_str_radix(&hex[i..i + 2], 16).expect("hex"))
            .collect();
        std::fs::write(x.join("sig.bin"), sig).expect("sig");
        openssl.args([
            "pkeyutl",
            "-verify",
            "-pubin",
            "-inkey",
            "../k.pub",
            "-rawin",
            "-in",
            "signed.bin",
            "-sigfile",
            "sig.bin",
        ]);
        let said = String::from_utf8(outside(&x, openssl)).expect("text");
        assert!(said.contains("Signature Verified Successfully"), "{said}");
    }

    // The records, read by FORMAT.md's table (24 bytes, little-endian), rebuild the new files
    // from the base files: copies as base bytes, zstd records with the zstd command and the
    // base window (`--patch-from`, the same reference-prefix mechanism).
    let header: Value =
        serde_json::from_slice(&std::fs::read(x.join("delta.json")).expect("header"))
            .expect("JSON");
    let manifest: Value =
        serde_json::from_slice(&std::fs::read(x.join("manifest.json")).expect("manifest"))
            .expect("JSON");
    let base_files: Vec<Vec<u8>> = header["base"]
        .as_array()
        .expect("base")
        .iter()
        .map(|f| {
            std::fs::read(d.join("base").join(f["path"].as_str().expect("path"))).expect("base")
        })
        .collect();
    let targets: Vec<&str> = manifest["files"]
        .as_array()
        .expect("files")
        .iter()
        .map(|f| f["path"].as_str().expect("path"))
        .collect();
    let mut rebuilt: Vec<Vec<u8>> = vec![Vec::new(); targets.len()];
    let patches = std::fs::read(x.join("patches.bin")).expect("patches");
    let (mut at, mut zstd_records) = (0usize, 0);
    let u32_at =
        |b: &[u8], i: usize| u32::from_le_bytes(b[i..i + 4].try_into().expect("4")) as usize;
    for _ in 0..header["records"].as_u64().expect("records") {
        let r = &patches[at..at + 24];
        at += 24;
        let (op, file, base) = (r[0], r[1] as usize, r[2] as usize);
        let len = u32_at(r, 4);
        let offset = u64::from_le_bytes(r[8..16].try_into().expect("8")) as usize;
        let (window, patch) = (u32_at(r, 16), u32_at(r, 20));
        match op {
            1 => rebuilt[file].extend_from_slice(&base_files[base][offset..offset + len]),
            2 => {
                std::fs::write(x.join("window"), &base_files[base][offset..offset + window])
                    .expect("window");
                std::fs::write(x.join("patch.zst"), &patches[at..at + patch]).expect("patch");
                let mut zstd = tool("zstd").expect("zstd ran above");
                zstd.args([
                    "-d",
                    "-q",
                    "-f",
                    "--patch-from=window",
                    "patch.zst",
                    "-o",
                    "chunk",
                ]);
                outside(&x, zstd);
                let chunk = std::fs::read(x.join("chunk")).expect("chunk");
                assert_eq!(chunk.len(), len);
                rebuilt[file].extend(chunk);
                zstd_records += 1;
            }
            other => panic!("op {other}"),
        }
        at += patch;
    }
    assert_eq!(at, patches.len(), "nothing after the last record");
    assert!(zstd_records >= 1, "the changed layer is a zstd record");
    for (name, bytes) in targets.iter().zip(&rebuilt) {
        assert_eq!(
            bytes,
            &std::fs::read(d.join("new").join(name)).expect("extracted by GNU tar and zstd"),
            "{name}"
        );
    }
}

/// Runs `ledger check` on the tree; returns its exit code and JSON report.
fn ledger_check(d: &Path) -> (i32, Value) {
    let out = run(
        d,
        &[
            "--json", "ledger", "check", "--tree", "tree", "--trust", "k.pub",
        ],
    );
    let report = serde_json::from_slice(&out.stdout).expect("ledger check --json prints JSON");
    (out.status.code().unwrap_or(-1), report)
}

fn problems(report: &Value) -> Vec<String> {
    report["problems"]
        .as_array()
        .expect("problems")
        .iter()
        .map(|p| p.as_str().expect("text").to_string())
        .collect()
}

#[test]
fn issue13_ledger_check_rebuilds_each_delta_and_names_one_altered_or_removed() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack_line(d, "trailcam-species", "1.0.0", 0, 0);
    let v2 = pack_line(d, "trailcam-species", "1.1.0", 5_000, 1);
    let v3 = pack_line(d, "trailcam-species", "1.2.0", 5_000, 2);
    publish_json(d, &v1, &[]);
    publish_json(d, &v2, &[]);
    let third = publish_json(d, &v3, &[]);
    let (code, report) = ledger_check(d);
    assert_eq!((code, problems(&report)), (0, Vec::<String>::new()));
    assert_eq!(report["deltas_checked"], 3);
    assert_eq!(report["deltas_rebuilt"], 3, "each rebuilt from its base");
    // The same over HTTP: check fetches the logged deltas with the rest of the tree.
    let served = serve_tree(d, "tree");
    let url = format!("http://{}/", served.addr);
    let over_http: Value = serde_json::from_str(&ok(
        d,
        &[
            "--json", "ledger", "check", "--url", &url, "--trust", "k.pub",
        ],
    ))
    .expect("JSON");
    assert_eq!(
        (&over_http["deltas_checked"], &over_http["deltas_rebuilt"]),
        (&serde_json::json!(3), &serde_json::json!(3))
    );
    drop(served);

    // One altered (a byte in its patches), one removed: each named, with what to do.
    let altered = reference(&third["deltas"][0]);
    let removed = reference(&third["deltas"][1]);
    let path = |r: &DeltaRef| d.join(format!("tree/bundles/{}.ampoule-delta", r.sha256));
    let mut bytes = std::fs::read(path(&altered)).expect("delta");
    let at = bytes.len() - 1100;
    bytes[at] ^= 1;
    std::fs::write(path(&altered), &bytes).expect("alter");
    std::fs::remove_file(path(&removed)).expect("remove");
    let (code, report) = ledger_check(d);
    assert_eq!(code, 1);
    let name = |r: &DeltaRef| {
        format!(
            "entry 2: delta bundles/{}.ampoule-delta of trailcam-species 1.2.0 (base {})",
            r.sha256, r.base
        )
    };
    assert_eq!(
        problems(&report),
        [
            format!(
                "{} differs from what was published: it has sha256 {} ({} bytes), the entry \
                 logs {} ({} bytes); devices refuse it and download the full bundle: restore it \
                 from a backup",
                name(&altered),
                Digest::of(&bytes),
                altered.size,
                altered.sha256,
                altered.size
            ),
            format!(
                "{} is missing from the tree: devices on that base download the full bundle \
                 instead; restore it from a backup (publishing the release again stops \
                 offering it)",
                name(&removed)
            ),
        ]
    );
    assert_eq!(report["deltas_rebuilt"], 1);
}

/// Writes `bytes` as a delta file into the tree and appends an entry that re-offers the
/// channel's current release (1.1.0) with that delta, as a thief of the feed key could.
fn log_delta(d: &Path, bytes: &[u8]) -> DeltaRef {
    let mut entry = feed_entry(d);
    let head = ampoule_verify::format::delta_file::read_head(&mut std::io::Cursor::new(bytes))
        .expect("a delta head");
    let reference = DeltaRef {
        base: head.header.base_id(),
        size: bytes.len() as u64,
        sha256: Digest::of(bytes),
    };
    std::fs::write(
        d.join(format!("tree/bundles/{}.ampoule-delta", reference.sha256)),
        bytes,
    )
    .expect("write");
    let ledger =
        ampoule::release::ledger_storage::Ledger::open(&d.join("tree/ledger")).expect("ledger");
    // One channel: its sequences are the entries, one by one.
    entry.feed_sequence = ledger.size() + 1;
    if let Some(Some(offered)) = entry.offered.as_mut() {
        offered.deltas = vec![reference.clone()];
    }
    let key = ampoule::release::keyfile::read_secret_key(
        &d.join("k.pem"),
        &ampoule::release::keyfile::PassphraseSource::None,
    )
    .expect("the test key");
    ampoule::release::ledger_audit::append(&d.join("tree"), &entry, &[&key], &[]).expect("append");
    reference
}

/// `delta` laid out again with its header's base list replaced by `base` (patches, manifest
/// and signatures kept), or with a byte of its patches flipped at `flip` from the end.
fn rewritten(
    delta: &[u8],
    base: Option<Vec<ampoule_verify::manifest::FileEntry>>,
    flip: Option<usize>,
) -> Vec<u8> {
    use ampoule_verify::format::delta_file;
    let mut reader = std::io::Cursor::new(delta);
    let mut head = delta_file::read_head(&mut reader).expect("head");
    let at = reader.position() as usize;
    let mut patches = delta[at..at + head.patches_len as usize].to_vec();
    if let Some(base) = base {
        head.header.base = base;
    }
    if let Some(back) = flip {
        let i = patches.len() - back;
        patches[i] ^= 1;
    }
    let mut out = Vec::new();
    delta_file::write_head(
        &mut out,
        1_796_112_000,
        &head.header,
        &head.manifest,
        &head.signatures,
        head.patches_len,
    )
    .expect("write");
    out.extend_from_slice(&patches);
    delta_file::write_tail(&mut out, head.patches_len).expect("write");
    out
}

#[test]
fn issue13_ledger_check_names_a_logged_delta_that_publish_never_makes() {
    let dir = setup();
    let d = dir.path();
    let night = pack_line(d, "trailcam-night", "1.0.0", 1_000, 7);
    let v1 = pack_line(d, "trailcam-species", "1.0.0", 0, 0);
    let v2 = pack_line(d, "trailcam-species", "1.1.0", 5_000, 1);
    publish_json(d, &night, &[]);
    publish_json(d, &v1, &[]);
    let published = publish_json(d, &v2, &[]);
    let genuine = reference(&published["deltas"][0]);
    let bytes = std::fs::read(d.join(format!("tree/bundles/{}.ampoule-delta", genuine.sha256)))
        .expect("delta");
    let files = |bundle: &str| {
        ampoule_verify::bundle::Unverified::open(&d.join(bundle))
            .expect("bundle")
            .manifest
            .files
    };
    // Three deltas whose files are what the entries log, each one publish never makes: from
    // the release to itself, from another bundle name's release, with an altered patch.
    let to_itself = log_delta(d, &rewritten(&bytes, Some(files(&v2)), None));
    let other_name = log_delta(d, &rewritten(&bytes, Some(files(&night)), None));
    let altered = log_delta(d, &rewritten(&bytes, None, Some(1100)));
    let (code, report) = ledger_check(d);
    assert_eq!(code, 1);
    let found = problems(&report);
    let tail = "; publish never makes such a delta, so whoever holds the feed key logged one it \
                did not make: devices fail on it and download the full bundle";
    let name = |index: u64, r: &DeltaRef| {
        format!(
            "entry {index}: delta bundles/{}.ampoule-delta of trailcam-species 1.1.0 (base {})",
            r.sha256, r.base
        )
    };
    assert_eq!(found.len(), 3, "{found:#?}");
    assert_eq!(
        found[0],
        format!(
            "{} leads from the release's own files to themselves{tail}",
            name(3, &to_itself)
        )
    );
    assert_eq!(
        found[1],
        format!(
            "{} has a base that is no earlier release of trailcam-species in the ledger{tail}",
            name(4, &other_name)
        )
    );
    let prefix = format!(
        "{} does not rebuild trailcam-species 1.1.0 from trailcam-species 1.0.0 (bundle {}): ",
        name(5, &altered),
        Digest::of(&std::fs::read(d.join(&v1)).expect("bundle"))
    );
    assert!(found[2].starts_with(&prefix), "{}", found[2]);
    assert!(found[2].ends_with(tail), "{}", found[2]);
    assert_eq!(report["deltas_checked"], 4);
    assert_eq!(report["deltas_rebuilt"], 1, "only the genuine one");
}

#[test]
fn issue13_pack_delta_from_writes_the_delta_beside_the_bundle_or_nothing() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack_line(d, "trailcam-species", "1.0.0", 0, 0);
    std::fs::write(d.join("next.bin"), model(5_000, 1)).expect("model");
    fn pack_args<'a>(version: &'a str, from: &'a str, out: &'a str) -> Vec<&'a str> {
        vec![
            "--json",
            "pack",
            "--model",
            "next.bin",
            "--labels",
            "labels.txt",
            "--name",
            "trailcam-species",
            "--version",
            version,
            "--created",
            "2026-12-01T08:00:00Z",
            "--key",
            "k.pem",
            "--delta-from",
            from,
            "-o",
            out,
        ]
    }
    let packed: Value =
        serde_json::from_str(&ok(d, &pack_args("1.1.0", &v1, "next.ampoule"))).expect("JSON");
    let path = d.join("next-from-1.0.0.ampoule-delta");
    assert_eq!(packed["delta"]["path"], "next-from-1.0.0.ampoule-delta");
    assert_eq!(packed["delta"]["from"]["version"], "1.0.0");
    let bytes = std::fs::read(&path).expect("the delta beside the bundle");
    assert_eq!(packed["delta"]["size"], bytes.len());
    assert_eq!(packed["delta"]["sha256"], Digest::of(&bytes).to_string());
    // The same bytes as `ampoule delta` makes, and as publish makes from the same bundles.
    ok(
        d,
        &[
            "delta",
            "--from",
            &v1,
            "next.ampoule",
            "-o",
            "by-hand.ampoule-delta",
        ],
    );
    assert_eq!(
        std::fs::read(d.join("by-hand.ampoule-delta")).expect("delta"),
        bytes
    );
    publish_json(d, &v1, &[]);
    let published = publish_json(d, "next.ampoule", &[]);
    assert_eq!(published["deltas"][0]["sha256"], packed["delta"]["sha256"]);

    // Refused before anything is packed: another name, not older, a delta already there.
    let other = pack_line(d, "trailcam-night", "1.0.0", 0, 0);
    for (from, version, expected) in [
        (
            other.as_str(),
            "1.2.0",
            format!(
                "ampoule: error: --delta-from {other} is bundle 'trailcam-night', not \
                 'trailcam-species'; a delta rebuilds a release of the same bundle from an older \
                 one (nothing was packed)"
            ),
        ),
        (
            v1.as_str(),
            "0.9.0",
            format!(
                "ampoule: error: --delta-from {v1} is trailcam-species 1.0.0, not older than \
                 0.9.0; a delta leads from an older release to a newer one (nothing was packed)"
            ),
        ),
    ] {
        let mut args = vec![
            "pack",
            "--model",
            "next.bin",
            "--labels",
            "labels.txt",
            "--name",
            "trailcam-species",
            "--key",
            "k.pem",
            "-o",
            "refused.ampoule",
            "--version",
        ];
        args.extend([version, "--delta-from", from]);
        assert_eq!(refused(d, &args), (2, expected));
        assert!(!d.join("refused.ampoule").exists());
    }
    let (code, err) = refused(d, &pack_args("1.1.0", &v1, "next.ampoule")[1..]);
    assert_eq!(code, 2);
    assert_eq!(
        err,
        "ampoule: error: next-from-1.0.0.ampoule-delta exists already; remove it or choose \
         another -o (nothing was packed)"
    );
    // Without --key the bundle would be unsigned, and so would its delta.
    let (code, err) = refused(
        d,
        &[
            "pack",
            "--model",
            "next.bin",
            "--labels",
            "labels.txt",
            "--name",
            "trailcam-species",
            "--version",
            "1.3.0",
            "--delta-from",
            &v1,
            "-o",
            "unsigned.ampoule",
        ],
    );
    assert_eq!(code, 2);
    assert!(err.contains("--key <SECRET.pem>"), "{err}");
}

#[test]
fn issue13_inspect_diff_and_ledger_list_show_a_delta_as_a_way_to_send_a_release() {
    let dir = setup();
    let d = dir.path();
    let v1 = pack_line(d, "trailcam-species", "1.0.0", 0, 0);
    let v2 = pack_line(d, "trailcam-species", "1.1.0", 5_000, 1);
    publish_json(d, &v1, &[]);
    let published = publish_json(d, &v2, &[]);
    let delta = reference(&published["deltas"][0]);
    let file = format!("tree/bundles/{}.ampoule-delta", delta.sha256);
    let bundle_size = published["release"]["size"].as_u64().expect("size");

    let inspect: Value = serde_json::from_str(&ok(d, &["--json", "inspect", &file])).expect("JSON");
    assert_eq!(inspect["kind"], "delta");
    assert_eq!(inspect["version"], "1.1.0");
    assert_eq!(inspect["base"], delta.base.to_string());
    assert_eq!(inspect["rebuilt_size"], MODEL_BYTES as u64 + 47);
    let text = ok(d, &["inspect", &file]);
    assert!(
        text.contains("\nwhat     not a release: a way to send trailcam-species 1.1.0 to a device"),
        "{text}"
    );

    let diff: Value = serde_json::from_str(&ok(d, &["--json", "diff", &v1, &file])).expect("JSON");
    assert_eq!(
        (diff["relation"].as_str(), diff["delta_size"].as_u64()),
        (Some("base"), Some(delta.size))
    );
    let diff: Value = serde_json::from_str(&ok(d, &["--json", "diff", &file, &v2])).expect("JSON");
    assert_eq!(diff["relation"], "release");
    let (code, err) = refused(d, &["diff", &v1, &file, "--fail-on", "breaking"]);
    assert_eq!(
        (code, err.as_str()),
        (
            2,
            "ampoule: error: --fail-on compares two releases, and a delta is not a release: \
             give the bundles"
        )
    );

    let list = ok(d, &["ledger", "list", "--tree", "tree", "--trust", "k.pub"]);
    let line = format!(
        "    delta to trailcam-species 1.1.0 from trailcam-species 1.0.0 (base {}): {} bytes, \
         {:.2}% of the {bundle_size}-byte bundle, sha256 {}\n",
        &delta.base.to_string()[..16],
        delta.size,
        delta.size as f64 * 100.0 / bundle_size as f64,
        &delta.sha256.to_string()[..16]
    );
    assert!(list.contains(&line), "{list}");
    let listed: Value = serde_json::from_str(&ok(
        d,
        &[
            "--json", "ledger", "list", "--tree", "tree", "--trust", "k.pub",
        ],
    ))
    .expect("JSON");
    let logged = &listed["entries"][1]["offered"]["deltas"][0];
    assert_eq!(reference(logged), delta);
    assert_eq!(logged["base_releases"][0]["version"], "1.0.0");
    assert_eq!(logged["bundle_size"], bundle_size);
}
