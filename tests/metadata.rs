//! Signed metadata (issue 11): `pack --meta/--meta-file` records it in the manifest, the
//! device's reader and the library give it back, `inspect` and `diff` show it, and an app's
//! policy (`--require-meta` on `verify` and `update`) can require a key's value. Each refusal
//! at pack is asserted exactly, with nothing written; the device's refusals of hand-signed
//! metadata are in tests/hostile.rs.

mod tree_common;

use std::path::Path;

use ampoule_verify::{Device, Outcome, Timestamp, Verifier, Version};
use serde_json::{Value, json};
use tree_common::*;

/// The preprocessing and evaluation results of the invented trail-camera model, as a team
/// would keep them in a file (numbers stay numbers).
const META_FILE: &str = r#"{
  "preprocess": {
    "input_size": [96, 96],
    "mean": [0.485, 0.456, 0.406],
    "std": [0.229, 0.224, 0.225],
    "colour_order": "rgb"
  },
  "eval": {"top1": 0.912, "reserve_2026": {"top5": 0.987}}
}
"#;

/// Packs model variant `variant` as `version` with these extra arguments into `out`.
fn pack_with(
    d: &Path,
    version: &str,
    variant: u8,
    extra: &[&str],
    out: &str,
) -> std::process::Output {
    let model = format!("model-{variant}.bin");
    write_model(d, &model, variant);
    pack_model_with(d, &model, version, "k.pem", out, extra)
}

fn pack_ok(d: &Path, version: &str, variant: u8, extra: &[&str], out: &str) {
    let run = pack_with(d, version, variant, extra, out);
    assert!(
        run.status.success(),
        "pack failed: {}",
        String::from_utf8_lossy(&run.stderr)
    );
}

fn full_metadata(d: &Path) -> Vec<String> {
    std::fs::write(d.join("meta.json"), META_FILE).expect("metadata file");
    [
        "--meta",
        "data.snapshot=2026-11-30",
        "--meta",
        "notes=Adds pine marten; retrained on the winter frames",
        "--meta-file",
        "meta.json",
        "--meta",
        "team.site=north ridge",
    ]
    .map(String::from)
    .to_vec()
}

fn strs(args: &[String]) -> Vec<&str> {
    args.iter().map(String::as_str).collect()
}

fn expected_metadata() -> Value {
    json!({
        "data": {"snapshot": "2026-11-30"},
        "eval": {"reserve_2026": {"top5": 0.987}, "top1": 0.912},
        "notes": "Adds pine marten; retrained on the winter frames",
        "preprocess": {
            "colour_order": "rgb",
            "input_size": [96, 96],
            "mean": [0.485, 0.456, 0.406],
            "std": [0.229, 0.224, 0.225]
        },
        "team": {"site": "north ridge"}
    })
}

#[test]
fn issue11_pack_with_metadata_then_verify_and_the_library_reads_it() {
    let dir = setup();
    let d = dir.path();
    let args = full_metadata(d);
    pack_ok(d, "1.0.0", 0, &strs(&args), "meta.ampoule");

    // The manifest holds it with sorted keys, after every other field.
    let inspect: Value =
        serde_json::from_str(&ok(d, &["--json", "inspect", "meta.ampoule"])).expect("JSON");
    assert_eq!(inspect["manifest"]["metadata"], expected_metadata());
    let text = ok(d, &["inspect", "meta.ampoule"]);
    for line in [
        "metadata data.snapshot = \"2026-11-30\"\n",
        "metadata eval.reserve_2026.top5 = 0.987\n",
        "metadata eval.top1 = 0.912\n",
        "metadata preprocess.mean = [0.485,0.456,0.406]\n",
        "metadata team.site = \"north ridge\"\n",
    ] {
        assert!(text.contains(line), "{line:?} not in:\n{text}");
    }

    // The library reads it from the verified manifest.
    let verifier = Verifier::new(keys(d), Version::new(2, 3, 0)).expect("a verifier");
    let verified = verifier
        .verify_path(&d.join("meta.ampoule"))
        .expect("verifies");
    let m = verified.manifest();
    assert_eq!(
        m.metadata("preprocess.mean"),
        Some(&json!([0.485, 0.456, 0.406]))
    );
    assert_eq!(m.metadata("eval.top1").and_then(Value::as_f64), Some(0.912));
    assert_eq!(
        m.metadata("preprocess.colour_order")
            .and_then(Value::as_str),
        Some("rgb")
    );
    assert_eq!(
        m.metadata("eval.reserve_2026"),
        Some(&json!({"top5": 0.987}))
    );
    assert_eq!(m.metadata("preprocess.scale"), None);

    // And a device that installs it (from an offline file) reads it from the installed release.
    publish(d, "meta.ampoule", "stable", "100");
    ok(
        d,
        &[
            "offline",
            "--tree",
            "tree",
            "--channel",
            "stable",
            "-o",
            "s.ampoule-offline",
        ],
    );
    let device = Device::open(&d.join("cam"), "stable", pinned_app(d), Timestamp::now())
        .expect("open the store");
    let report = device.install_offline(&d.join("s.ampoule-offline"), Timestamp::now());
    match &report.outcome {
        Outcome::Installed(installed) => assert_eq!(
            installed.release.manifest.metadata("data.snapshot"),
            Some(&json!("2026-11-30"))
        ),
        other => panic!("expected an install, got {other:?}"),
    }
    let current = device
        .current()
        .expect("the store reads")
        .expect("a release");
    assert_eq!(
        current.manifest.metadata("notes").and_then(Value::as_str),
        Some("Adds pine marten; retrained on the winter frames")
    );
}

#[test]
fn issue11_a_bundle_without_metadata_has_no_metadata_field() {
    // tests/golden.rs pins a whole bundle packed without metadata to the bytes committed before
    // issue 11; this checks the other half: the field appears only when metadata was given.
    let dir = setup();
    let d = dir.path();
    pack_ok(d, "1.0.0", 0, &[], "plain.ampoule");
    pack_ok(d, "1.0.0", 0, &["--meta", "notes=x"], "noted.ampoule");
    let manifest = |name: &str| -> Value {
        let out: Value = serde_json::from_str(&ok(d, &["--json", "inspect", name])).expect("JSON");
        out["manifest"].clone()
    };
    let (plain, noted) = (manifest("plain.ampoule"), manifest("noted.ampoule"));
    assert!(plain.get("metadata").is_none(), "{plain}");
    assert_eq!(noted["metadata"], json!({"notes": "x"}));
    let mut without = noted.clone();
    without
        .as_object_mut()
        .expect("an object")
        .remove("metadata");
    assert_eq!(without, plain, "metadata changed another field");
    let text = ok(d, &["inspect", "plain.ampoule"]);
    assert!(!text.contains("metadata"), "{text}");
}

#[test]
fn issue11_pack_refuses_each_bad_metadata_by_name_and_writes_nothing() {
    let dir = setup();
    let d = dir.path();
    std::fs::write(
        d.join("dup.json"),
        r#"{"eval": {"top1": 0.9, "top1": 0.91}}"#,
    )
    .expect("write");
    std::fs::write(d.join("eval.json"), r#"{"eval": {"top1": 0.9}}"#).expect("write");
    std::fs::write(d.join("leaf.json"), r#"{"team": "survey"}"#).expect("write");
    std::fs::write(
        d.join("deep.json"),
        r#"{"a":{"b":{"c":{"d":{"e":{"f":{"g":{"h":{"i":1}}}}}}}}}"#,
    )
    .expect("write");
    std::fs::write(
        d.join("big.json"),
        format!(r#"{{"notes": "{}"}}"#, "n".repeat(16 * 1024)),
    )
    .expect("write");
    std::fs::write(d.join("huge.json"), vec![b' '; 256 * 1024 + 1]).expect("write");
    std::fs::write(d.join("mean.json"), r#"{"preprocess": {"mean": "0.5"}}"#).expect("write");
    std::fs::write(d.join("comma.json"), r#"{"notes": "x",}"#).expect("write");
    let segment_rule = "each dot-separated segment must be 1 to 64 bytes of a-z, 0-9 and _";
    let long = format!("{}=x", "k".repeat(65));
    let cases: Vec<(Vec<&str>, String)> = vec![
        (
            vec!["--meta", "Preprocess.mean=1"],
            format!("--meta Preprocess.mean=... refused: metadata key 'Preprocess.mean' is not allowed: {segment_rule}"),
        ),
        (
            vec!["--meta", "team..site=x"],
            format!("--meta team..site=... refused: metadata key 'team..site' is not allowed: {segment_rule}"),
        ),
        (
            vec!["--meta", &long],
            format!(
                "--meta {k}=... refused: metadata key '{k}' is not allowed: {segment_rule}",
                k = "k".repeat(65)
            ),
        ),
        (
            vec!["--meta", "notes"],
            "--meta 'notes' is not KEY=VALUE, like data.snapshot=2026-11-30".into(),
        ),
        (
            vec!["--meta", "notes=a", "--meta", "notes=b"],
            "--meta notes=... refused: metadata key 'notes' is set twice; set each key once".into(),
        ),
        (
            vec!["--meta-file", "eval.json", "--meta-file", "eval.json"],
            "--meta-file eval.json refused: metadata key 'eval.top1' is set twice; set each key once"
                .into(),
        ),
        (
            vec!["--meta-file", "leaf.json", "--meta", "team.site=north"],
            "--meta team.site=... refused: metadata key 'team' is set both to a value and as the \
             parent of 'team.site'; a key holds a value or keys under it, not both"
                .into(),
        ),
        (
            vec!["--meta", "team.site=north", "--meta", "team=survey"],
            "--meta team=... refused: metadata key 'team' is set both to a value and as the \
             parent of 'team.site'; a key holds a value or keys under it, not both"
                .into(),
        ),
        (
            vec!["--meta-file", "dup.json"],
            "--meta-file dup.json refused: metadata file is not valid: metadata key 'eval.top1' \
             appears twice at line 1 column 29"
                .into(),
        ),
        (
            vec!["--meta-file", "comma.json"],
            "--meta-file comma.json refused: metadata file is not valid: trailing comma at line 1 \
             column 15"
                .into(),
        ),
        (
            vec!["--meta", "a.b.c.d.e.f.g.h.i=x"],
            "--meta a.b.c.d.e.f.g.h.i=... refused: metadata key 'a.b.c.d.e.f.g.h.i' is 9 levels \
             deep; the format allows at most 8 (the metadata object and each object or array in \
             it count one)"
                .into(),
        ),
        (
            vec!["--meta-file", "deep.json"],
            "--meta-file deep.json refused: metadata key 'a.b.c.d.e.f.g.h.i' is 9 levels deep; \
             the format allows at most 8 (the metadata object and each object or array in it \
             count one)"
                .into(),
        ),
        (
            vec!["--meta-file", "big.json"],
            "metadata refused: metadata is 16396 bytes as compact JSON, over the format's limit \
             of 16384 bytes"
                .into(),
        ),
        (
            vec!["--meta-file", "huge.json"],
            "huge.json is over 262144 bytes; that is not a metadata file".into(),
        ),
        (
            vec!["--meta-file", "mean.json"],
            "metadata refused: metadata key 'preprocess.mean' must be a number or a non-empty \
             array of numbers, not the string \"0.5\""
                .into(),
        ),
        (
            vec!["--meta", "eval.top1=0.91"],
            "--meta eval.top1=... sets a string, but eval.top1 is a documented key that holds \
             numbers (or is an object); set it in --meta-file, like {\"eval\": {\"top1\": 0.91}}"
                .into(),
        ),
        (
            vec!["--meta", "preprocess.colour_order=RGB"],
            "metadata refused: metadata key 'preprocess.colour_order' must be \"rgb\" or \"bgr\", \
             not the string \"RGB\""
                .into(),
        ),
    ];
    for (extra, message) in cases {
        let out = pack_with(d, "1.0.0", 0, &extra, "refused.ampoule");
        assert_eq!(
            (
                out.status.code(),
                String::from_utf8_lossy(&out.stderr).trim_end()
            ),
            (Some(2), format!("ampoule: error: {message}").as_str()),
            "pack {extra:?}"
        );
        assert!(
            !d.join("refused.ampoule").exists(),
            "pack {extra:?} wrote a bundle"
        );
    }
}

#[test]
fn issue11_verify_and_update_require_metadata_values() {
    let dir = setup();
    let d = dir.path();
    let args = full_metadata(d);
    pack_ok(d, "1.0.0", 0, &strs(&args), "meta.ampoule");
    let verify = |require: &[&str]| {
        let mut a = vec![
            "verify",
            "meta.ampoule",
            "--trust",
            "k.pub",
            "--app-version",
            "2.3.0",
        ];
        for r in require {
            a.extend_from_slice(&["--require-meta", r]);
        }
        run(d, &a)
    };
    // Equal: strings, numbers by value, arrays, a quoted string that looks like a number.
    let equal = verify(&[
        "preprocess.colour_order=rgb",
        "eval.top1=0.912",
        "preprocess.input_size=[96, 96.0]",
        "data.snapshot=2026-11-30",
        "team.site=\"north ridge\"",
    ]);
    assert!(equal.status.success(), "{equal:?}");
    for (require, message) in [
        (
            "preprocess.colour_order=bgr",
            "the bundle's metadata has preprocess.colour_order = \"rgb\", the app requires \"bgr\"",
        ),
        (
            "eval.top1=0.95",
            "the bundle's metadata has eval.top1 = 0.912, the app requires 0.95",
        ),
        (
            "preprocess.input_size=\"96\"",
            "the bundle's metadata has preprocess.input_size = [96,96], the app requires \"96\"",
        ),
        (
            "preprocess.scale=255",
            "the bundle's metadata has no preprocess.scale, the app requires preprocess.scale = 255",
        ),
    ] {
        let out = verify(&[require]);
        assert_eq!(
            (
                out.status.code(),
                String::from_utf8_lossy(&out.stderr).trim_end()
            ),
            (Some(1), format!("ampoule: error: {message}").as_str()),
            "--require-meta {require}"
        );
    }
    for (require, message) in [
        (
            "Colour=rgb",
            "the policy's required metadata key 'Colour' is not allowed: each dot-separated \
             segment must be 1 to 64 bytes of a-z, 0-9 and _",
        ),
        (
            "colour",
            "--require-meta 'colour' is not KEY=VALUE, like preprocess.colour_order=rgb",
        ),
    ] {
        let out = verify(&[require]);
        assert_eq!(
            (
                out.status.code(),
                String::from_utf8_lossy(&out.stderr).trim_end()
            ),
            (Some(2), format!("ampoule: error: {message}").as_str()),
            "--require-meta {require}"
        );
    }

    // update: the same requirement, on a device installing from an offline file.
    publish(d, "meta.ampoule", "stable", "100");
    ok(
        d,
        &[
            "offline",
            "--tree",
            "tree",
            "--channel",
            "stable",
            "-o",
            "s.ampoule-offline",
        ],
    );
    let update = |require: &str| {
        run(
            d,
            &[
                "update",
                "--store",
                "cam",
                "--offline",
                "s.ampoule-offline",
                "--trust",
                "k.pub",
                "--app-version",
                "2.3.0",
                "--device-id",
                "camera-7",
                "--require-meta",
                require,
            ],
        )
    };
    let refused = update("preprocess.colour_order=bgr");
    assert_eq!(refused.status.code(), Some(1), "{refused:?}");
    assert!(
        String::from_utf8_lossy(&refused.stderr).contains(
            "the bundle's metadata has preprocess.colour_order = \"rgb\", the app requires \"bgr\""
        ),
        "{refused:?}"
    );
    let installed = update("preprocess.colour_order=rgb");
    assert!(installed.status.success(), "{installed:?}");
    assert!(
        String::from_utf8_lossy(&installed.stdout).starts_with("installed trailcam-species 1.0.0"),
        "{installed:?}"
    );
}

#[test]
fn issue11_inspect_escapes_metadata_text_and_json_keeps_it_exact() {
    let dir = setup();
    let d = dir.path();
    // A right-to-left override and a zero-width space: a terminal would show them reordered
    // or not at all.
    let notes = "fox \u{202e}raob\u{200b}";
    pack_ok(
        d,
        "1.0.0",
        0,
        &["--meta", &format!("notes={notes}")],
        "odd.ampoule",
    );
    let text = ok(d, &["inspect", "odd.ampoule"]);
    assert!(
        text.contains("metadata notes = \"fox \\u{202e}raob\\u{200b}\"\n"),
        "{text}"
    );
    let json: Value =
        serde_json::from_str(&ok(d, &["--json", "inspect", "odd.ampoule"])).expect("JSON");
    assert_eq!(json["manifest"]["metadata"]["notes"], json!(notes));
}

#[test]
fn issue11_diff_compares_metadata_and_marks_preprocess_changes_breaking() {
    let dir = setup();
    let d = dir.path();
    std::fs::write(
        d.join("old.json"),
        r#"{"preprocess": {"mean": [0.5, 0.5, 0.5]}, "eval": {"top1": 0.90}, "notes": "first"}"#,
    )
    .expect("write");
    std::fs::write(
        d.join("new.json"),
        r#"{"preprocess": {"mean": [0.485, 0.456, 0.406]}, "eval": {"top1": 0.91}, "data": {"snapshot": "2026-11-30"}}"#,
    )
    .expect("write");
    pack_ok(d, "1.0.0", 0, &["--meta-file", "old.json"], "old.ampoule");
    pack_ok(d, "1.1.0", 0, &["--meta-file", "new.json"], "new.ampoule");
    let text = ok(d, &["diff", "old.ampoule", "new.ampoule"]);
    for line in [
        "metadata added: data.snapshot = \"2026-11-30\"\n",
        "metadata changed: eval.top1: 0.9 -> 0.91\n",
        "metadata removed: notes = \"first\"\n",
        "WARNING: metadata changed: preprocess.mean: [0.5,0.5,0.5] -> [0.485,0.456,0.406]\n",
    ] {
        assert!(text.contains(line), "{line:?} not in:\n{text}");
    }
    let doc: Value =
        serde_json::from_str(&ok(d, &["--json", "diff", "old.ampoule", "new.ampoule"]))
            .expect("JSON");
    assert_eq!(
        doc["metadata"],
        json!([
            {"key": "data.snapshot", "new": "2026-11-30", "breaking": false},
            {"key": "eval.top1", "old": 0.9, "new": 0.91, "breaking": false},
            {"key": "notes", "old": "first", "breaking": false},
            {"key": "preprocess.mean", "old": [0.5, 0.5, 0.5], "new": [0.485, 0.456, 0.406], "breaking": true},
        ])
    );
    assert_eq!(
        doc["breaking"],
        json!(["metadata changed: preprocess.mean: [0.5,0.5,0.5] -> [0.485,0.456,0.406]"])
    );
    let (code, _) = refused(
        d,
        &[
            "diff",
            "old.ampoule",
            "new.ampoule",
            "--fail-on",
            "breaking",
        ],
    );
    assert_eq!(code, 1);
    // Only non-preprocess changes: nothing breaking.
    pack_ok(
        d,
        "1.2.0",
        0,
        &["--meta-file", "new.json", "--meta", "notes=second"],
        "newer.ampoule",
    );
    ok(
        d,
        &[
            "diff",
            "new.ampoule",
            "newer.ampoule",
            "--fail-on",
            "breaking",
        ],
    );
}

#[test]
fn issue11_format_md_states_the_caps_the_format_defines() {
    use ampoule_verify::format::limit;
    let text = std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("FORMAT.md"))
        .expect("FORMAT.md");
    for (value, stated, phrase) in [
        (
            limit::METADATA_BYTES,
            16 * 1024,
            "At most 16 KiB (16,384 bytes) as compact JSON",
        ),
        (limit::METADATA_DEPTH, 8, "at most 8 levels deep"),
        (
            limit::METADATA_KEY_BYTES,
            64,
            "1 to 64 bytes of `a`-`z`, `0`-`9`, `_`",
        ),
    ] {
        assert_eq!(value, stated, "{phrase}");
        assert!(text.contains(phrase), "FORMAT.md no longer says {phrase:?}");
    }
}

#[test]
fn issue11_metadata_that_makes_the_manifest_too_large_is_refused_at_pack() {
    // 8,000 small numbers 7 levels down: 16,043 bytes as compact JSON, within the metadata's
    // cap, but the manifest stores it indented, one number per line, and would pass 64 KiB.
    let dir = setup();
    let d = dir.path();
    let numbers = vec!["1"; 8000].join(",");
    std::fs::write(
        d.join("long.json"),
        format!(r#"{{"a":{{"b":{{"c":{{"d":{{"e":{{"f":{{"g":[{numbers}]}}}}}}}}}}}}}}"#),
    )
    .expect("write");
    let out = pack_with(d, "1.0.0", 0, &["--meta-file", "long.json"], "long.ampoule");
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{stderr}");
    assert!(
        stderr.starts_with("ampoule: error: the manifest would be ")
            && stderr.contains(
                "bytes, over the format's limit of 65536 bytes (the model declares very many or \
                 very long inputs and outputs, or the metadata holds long arrays: the manifest \
                 stores it indented)"
            ),
        "{stderr}"
    );
    assert!(!d.join("long.ampoule").exists());
}
