//! Issue 6 through the real binary: pack records the model's signature as the reference
//! libraries read it, refuses a label list that does not fit the classifier output, and
//! `diff` and `inspect` report what changed.

mod common;

use common::{Env, NAME, PUBLIC, REQUIRES_APP, SECRET};
use serde_json::Value;

/// A trail-camera classifier made with the `onnx` Python package (1.23.2) by
/// crates/verify/tests/data/models/gen_models.py, and what that package reports about it.
const F32_ONNX: &[u8] = include_bytes!("../crates/verify/tests/data/models/trailcam-f32.onnx");
const F32_REFERENCE: &str =
    include_str!("../crates/verify/tests/data/models/trailcam-f32.onnx.json");

const SEVEN: &str = "fox\nroe deer\nwild boar\nbadger\nhare\nempty frame\npine marten\n";

fn pack(
    env: &Env,
    model: &str,
    labels: &str,
    version: &str,
    out: &str,
    extra: &[&str],
) -> common::Run {
    let mut args = vec![
        "--json",
        "pack",
        "--model",
        model,
        "--labels",
        labels,
        "--name",
        NAME,
        "--version",
        version,
        "--requires-app",
        REQUIRES_APP,
        "--key",
        SECRET,
        "-o",
        out,
    ];
    args.extend_from_slice(extra);
    let run = env.run(&args);
    if run.code == 0 {
        // Every bundle made here, real-model fixtures included, passes the device's reader
        // and GNU tar (issue 12 item 7).
        let extension = model.rsplit('.').next().unwrap_or("bin");
        common::bundle_check::assert_readers_accept(
            env!("CARGO_BIN_EXE_ampoule"),
            &env.path(out),
            Some(&env.path(common::PUBLIC)),
            &format!("model.{extension}"),
        );
    }
    run
}

fn json(run: &common::Run) -> Value {
    serde_json::from_str(&run.stdout).unwrap_or_else(|e| panic!("not JSON ({e}): {run:?}"))
}

/// The recorded tensor shape in our JSON form, from the reference report's form (the onnx
/// package reports `dim_param` as a string and `dim_value` as a number, as we do).
fn reference_shape(reference: &Value, side: &str) -> Value {
    reference[side][0]["shape"].clone()
}

#[test]
fn pack_records_the_signature_the_onnx_package_reports() {
    let env = Env::new();
    env.write("f32.onnx", F32_ONNX);
    env.write("seven.txt", SEVEN.as_bytes());
    let run = pack(&env, "f32.onnx", "seven.txt", "1.0.0", "a.ampoule", &[]);
    assert_eq!(run.code, 0, "{run:?}");
    let model = &json(&run)["manifest"]["model"];
    let reference: Value = serde_json::from_str(F32_REFERENCE).expect("reference JSON");
    assert_eq!(model["format"], "onnx");
    assert_eq!(model["opset"], reference["opset"]);
    assert_eq!(model["ir_version"], reference["ir_version"]);
    assert_eq!(model["inputs"][0]["name"], reference["inputs"][0]["name"]);
    assert_eq!(
        model["inputs"][0]["shape"],
        reference_shape(&reference, "inputs")
    );
    assert_eq!(model["outputs"][0]["name"], reference["outputs"][0]["name"]);
    assert_eq!(
        model["outputs"][0]["shape"],
        reference_shape(&reference, "outputs")
    );
    assert_eq!(model["weight_tensors"], reference["initializer_count"]);

    // The device reads the same signature again from the unpacked file and accepts it.
    let run = env.run([
        "verify",
        "a.ampoule",
        "--trust",
        PUBLIC,
        "--app-version",
        "2.1.0",
        "--extract",
        "out",
    ]);
    assert_eq!(run.code, 0, "{run:?}");
}

#[test]
fn pack_refuses_labels_that_do_not_fit_the_classifier_output_unless_overridden() {
    let env = Env::new();
    env.write("f32.onnx", F32_ONNX);
    env.write(
        "six.txt",
        b"fox\nroe deer\nwild boar\nbadger\nhare\nempty frame\n",
    );
    let run = pack(&env, "f32.onnx", "six.txt", "1.0.0", "a.ampoule", &[]);
    assert_eq!(run.code, 1, "{run:?}");
    assert_eq!(
        run.stderr,
        "ampoule: error: label list refused; fix the label file, or pass --allow-label-mismatch \
         if the model really has a different number of outputs than labels: the label list has 6 \
         labels, but output 'species' has 7 classes (shape [N, 7])\n"
    );
    assert!(!env.path("a.ampoule").exists());

    let run = pack(
        &env,
        "f32.onnx",
        "six.txt",
        "1.0.0",
        "a.ampoule",
        &["--allow-label-mismatch"],
    );
    assert_eq!(run.code, 0, "{run:?}");
    assert!(
        run.stderr.contains("warning: the label list has 6 labels"),
        "{run:?}"
    );

    let run = pack(
        &env,
        "f32.onnx",
        "six.txt",
        "1.0.1",
        "b.ampoule",
        &["--classifier-output", "scores"],
    );
    assert_eq!(run.code, 1, "{run:?}");
    assert_eq!(
        run.stderr,
        "ampoule: error: the model has no output 'scores' (its outputs: 'species')\n"
    );
}

#[test]
fn pack_refuses_a_file_that_claims_to_be_onnx_but_is_not() {
    let env = Env::new();
    env.write("broken.onnx", b"\x0a\xff\xff\xff\xff\x0f");
    env.write("seven.txt", SEVEN.as_bytes());
    let run = pack(&env, "broken.onnx", "seven.txt", "1.0.0", "a.ampoule", &[]);
    assert_eq!(run.code, 1, "{run:?}");
    assert!(
        run.stderr
            .starts_with("ampoule: error: cannot read the model's signature from broken.onnx: "),
        "{run:?}"
    );
    assert!(!env.path("a.ampoule").exists());
}

#[test]
fn diff_flags_reordered_labels_and_changed_outputs() {
    let env = Env::new();
    env.write("f32.onnx", F32_ONNX);
    env.write("seven.txt", SEVEN.as_bytes());
    env.write(
        "swapped.txt",
        b"roe deer\nfox\nwild boar\nbadger\nhare\nempty frame\npine marten\n",
    );
    assert_eq!(
        pack(&env, "f32.onnx", "seven.txt", "1.0.0", "a.ampoule", &[]).code,
        0
    );
    assert_eq!(
        pack(&env, "f32.onnx", "swapped.txt", "1.0.1", "b.ampoule", &[]).code,
        0
    );
    let run = env.run(["diff", "a.ampoule", "b.ampoule"]);
    assert_eq!(run.code, 0, "{run:?}");
    assert!(
        run.stdout.contains(
            "WARNING: 2 labels changed output index; an app that maps indices to labels itself will report the wrong species:\n  'fox' moved from index 0 to 1\n  'roe deer' moved from index 1 to 0\n"
        ),
        "{}",
        run.stdout
    );
    let run = env.run(["--json", "diff", "a.ampoule", "b.ampoule"]);
    let doc = json(&run);
    assert_eq!(doc["labels"]["reordered"][0]["label"], "fox");
    assert_eq!(doc["labels"]["added"], serde_json::json!([]));

    // The fixture model of Env has 6 outputs; diffing against it shows the output change.
    let run = env.run([
        "pack",
        "--model",
        common::MODEL,
        "--labels",
        common::LABELS_FILE,
        "--name",
        NAME,
        "--version",
        "0.9.0",
        "--key",
        SECRET,
        "-o",
        "c.ampoule",
    ]);
    assert_eq!(run.code, 0, "{run:?}");
    let doc = json(&env.run(["--json", "diff", "c.ampoule", "a.ampoule"]));
    assert_eq!(
        doc["outputs"]["changed"][0]["old"],
        "species: float32 [N, 6]"
    );
    assert_eq!(
        doc["outputs"]["changed"][0]["new"],
        "species: float32 [N, 7]"
    );
    assert_eq!(
        doc["inputs"]["changed"][0]["old"],
        "image: float32 [N, 3, 8, 8]"
    );
    assert_eq!(doc["labels"]["added"], serde_json::json!(["pine marten"]));
}

#[test]
fn inspect_shows_the_signature_and_the_8bit_estimate() {
    let env = Env::new();
    env.write("f32.onnx", F32_ONNX);
    env.write("seven.txt", SEVEN.as_bytes());
    assert_eq!(
        pack(&env, "f32.onnx", "seven.txt", "1.0.0", "a.ampoule", &[]).code,
        0
    );
    let run = env.run(["inspect", "a.ampoule"]);
    assert!(
        run.stdout
            .contains("input    image: float32 [N, 3, 96, 96]\n"),
        "{}",
        run.stdout
    );
    assert!(
        run.stdout.contains("output   species: float32 [N, 7]\n"),
        "{}",
        run.stdout
    );
    // 588 float32 bytes (the onnx package's report) quantized to 8 bits: a quarter, 147
    // (the common rule of thumb for linear 8-bit quantization).
    assert!(run.stdout.contains("about 147 bytes"), "{}", run.stdout);
    let doc = json(&env.run(["--json", "inspect", "a.ampoule"]));
    assert_eq!(doc["size_report"]["float32_bytes"], 588);
    assert_eq!(doc["size_report"]["float32_as_8bit_bytes"], 147);
}

/// Issue 11 item 7: `diff` reports every model-wide change an app's compatibility policy can
/// refuse, and marks it. The fixtures are the committed models made with the onnx package
/// (`crates/verify/tests/data/models/gen_models.py`): `trailcam-oldstyle.onnx` imports
/// operator set 8, `trailcam-f32.onnx` set 13 with float weights, `trailcam-int8.onnx` set 13
/// with 8-bit weights, as each file's `.json` beside it records from onnx's own reading.
#[test]
fn issue11_diff_reports_opset_8bit_and_format_changes_as_breaking() {
    let env = Env::new();
    let fixture = |name: &str| {
        std::fs::read(
            std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
                .join(format!("crates/verify/tests/data/models/{name}")),
        )
        .expect("fixture")
    };
    env.write("old.onnx", &fixture("trailcam-oldstyle.onnx"));
    env.write("f32.onnx", F32_ONNX);
    env.write("int8.onnx", &fixture("trailcam-int8.onnx"));
    env.write("w.safetensors", &fixture("trailcam-int8.safetensors"));
    env.write("seven.txt", SEVEN.as_bytes());
    for (model, version, out) in [
        ("old.onnx", "1.0.0", "a.ampoule"),
        ("f32.onnx", "1.1.0", "b.ampoule"),
        ("int8.onnx", "1.2.0", "c.ampoule"),
        ("w.safetensors", "1.3.0", "d.ampoule"),
    ] {
        let run = pack(&env, model, "seven.txt", version, out, &[]);
        assert_eq!(run.code, 0, "{run:?}");
    }
    let breaking = |old: &str, new: &str| -> Vec<String> {
        let doc = json(&env.run(["--json", "diff", old, new]));
        doc["breaking"]
            .as_array()
            .expect("breaking")
            .iter()
            .map(|v| v.as_str().expect("text").to_string())
            .collect()
    };
    assert!(
        breaking("a.ampoule", "b.ampoule").contains(&"operator set raised: 8 -> 13".to_string())
    );
    // Going back down crosses no app's cap: reported, not breaking.
    let run = env.run(["diff", "b.ampoule", "a.ampoule"]);
    assert!(
        run.stdout.contains("\noperator set lowered: 13 -> 8\n"),
        "{}",
        run.stdout
    );
    assert!(
        !breaking("b.ampoule", "a.ampoule")
            .iter()
            .any(|b| b.starts_with("operator set"))
    );
    // The 8-bit model also takes uint8 frames: both are breaking, each named.
    assert_eq!(
        breaking("b.ampoule", "c.ampoule"),
        [
            "input changed: image: float32 [N, 3, 96, 96] -> image: uint8 [N, 3, 96, 96]",
            "weights changed: float -> 8-bit"
        ]
    );
    assert!(
        breaking("c.ampoule", "d.ampoule")
            .contains(&"model format changed: onnx -> safetensors".to_string())
    );
    let run = env.run(["diff", "b.ampoule", "c.ampoule", "--fail-on", "breaking"]);
    assert_eq!(run.code, 1, "{run:?}");
    assert!(
        run.stdout
            .contains("WARNING: weights changed: float -> 8-bit"),
        "{}",
        run.stdout
    );
}

/// Real models from Python packages (crates/verify/tests/data/real-models/README.md names each
/// package, version and licence).
const REAL: &str = concat!(
    env!("CARGO_MANIFEST_DIR"),
    "/crates/verify/tests/data/real-models/"
);

fn real(name: &str) -> Vec<u8> {
    std::fs::read(format!("{REAL}{name}")).expect("a real-model fixture")
}

/// Issue 11 items 2 and 4: the OCR text-direction classifier of rapidocr-onnxruntime 1.4.4
/// keeps every weight in Constant nodes and stores its batch dimension as -1; it packs with
/// its two labels (`label_list: ['0', '180']` in that wheel's config.yaml), and the record
/// counts the Constants' weights as onnx 1.23.2 reads them (reference.json: 308 tensors,
/// 133,777 parameters) under reading rules 2.
#[test]
fn issue11_a_real_model_with_constant_weights_and_minus_one_dims_packs() {
    let env = Env::new();
    env.write(
        "cls.onnx",
        &real("rapidocr_onnxruntime-1.4.4-ch_ppocr_mobile_v2.0_cls_infer.onnx"),
    );
    env.write("two.txt", b"0\n180\n");
    let run = pack(&env, "cls.onnx", "two.txt", "1.0.0", "a.ampoule", &[]);
    assert_eq!(run.code, 0, "{run:?}");
    let model = &json(&run)["manifest"]["model"];
    assert_eq!(model["rules"], 2);
    assert_eq!(model["weight_tensors"], 308);
    assert_eq!(model["parameters"], 133_777);
    assert_eq!(model["outputs"][0]["shape"], serde_json::json!([null, 2]));
    assert_eq!(model.get("classifier"), None);
}

/// onnx 1.23.2's light SqueezeNet as `squeezenet.onnx`, beside `thousand.txt`: 1000 labels.
fn squeezenet_with_a_thousand_labels() -> Env {
    let env = Env::new();
    env.write(
        "squeezenet.onnx",
        &real("onnx-1.23.2-light_squeezenet.onnx"),
    );
    let labels: String = (0..1000).map(|i| format!("class {i}\n")).collect();
    env.write("thousand.txt", labels.as_bytes());
    env
}

/// Issue 11 item 1: `--class-dim` is recorded in the signed manifest; a wrong one is refused
/// by the label check. The model is onnx 1.23.2's light SqueezeNet, output [1, 1000, 1, 1]
/// (the shape of its expected output light_squeezenet_output_0.pb); its weights come from
/// ConstantOfShape at run time, so reading rules 1 read it the same and it keeps them.
#[test]
fn issue11_pack_records_the_class_dimension() {
    let env = squeezenet_with_a_thousand_labels();
    let run = pack(
        &env,
        "squeezenet.onnx",
        "thousand.txt",
        "1.0.0",
        "a.ampoule",
        &["--class-dim", "1"],
    );
    assert_eq!(run.code, 0, "{run:?}");
    let model = &json(&run)["manifest"]["model"];
    assert_eq!(
        model["classifier"],
        serde_json::json!({"tensor": "softmaxout_1", "dim": 1})
    );
    assert_eq!(model.get("rules"), None, "rules 1 read it alike");
    let run = pack(
        &env,
        "squeezenet.onnx",
        "thousand.txt",
        "1.0.1",
        "b.ampoule",
        &["--class-dim", "3"],
    );
    assert_eq!(run.code, 1, "{run:?}");
    assert!(
        run.stderr.contains(
            "the label list has 1000 labels, but output 'softmaxout_1' has 1 classes (shape [1, 1000, 1, 1])"
        ),
        "{run:?}"
    );
    let run = pack(
        &env,
        "squeezenet.onnx",
        "thousand.txt",
        "1.0.1",
        "b.ampoule",
        &["--class-dim", "4"],
    );
    assert_eq!(run.code, 1, "{run:?}");
    assert_eq!(
        run.stderr,
        "ampoule: error: cannot read the model's signature from squeezenet.onnx: output \
         'softmaxout_1' has shape [1, 1000, 1, 1], which has no dimension 4\n"
    );
}

/// Issue 11 item 6: a safetensors model's class count is the first dimension of the tensor
/// `--classifier-output` names; the name and the tensor's shape are recorded, and `inspect`
/// lists the tensors as the safetensors 0.8.0 package reads them (reference.json).
#[test]
fn issue11_safetensors_classifier_output_and_inspect_tensors() {
    let env = Env::new();
    env.write("classifier.safetensors", &real("classifier.safetensors"));
    env.write("seven.txt", SEVEN.as_bytes());
    let run = pack(
        &env,
        "classifier.safetensors",
        "seven.txt",
        "1.0.0",
        "a.ampoule",
        &[],
    );
    assert_eq!(run.code, 0, "{run:?}");
    assert!(
        run.stderr.contains(
            "label count not checked against the model: the safetensors model has no outputs to match labels to"
        ),
        "{run:?}"
    );
    let run = pack(
        &env,
        "classifier.safetensors",
        "seven.txt",
        "1.0.1",
        "b.ampoule",
        &["--classifier-output", "head.weight"],
    );
    assert_eq!(run.code, 0, "{run:?}");
    assert_eq!(
        json(&run)["manifest"]["model"]["classifier"],
        serde_json::json!({"tensor": "head.weight", "shape": [7, 8]})
    );
    env.write(
        "six.txt",
        b"fox\nroe deer\nwild boar\nbadger\nhare\nempty frame\n",
    );
    let run = pack(
        &env,
        "classifier.safetensors",
        "six.txt",
        "1.0.2",
        "c.ampoule",
        &["--classifier-output", "head.bias"],
    );
    assert_eq!(run.code, 1, "{run:?}");
    assert!(
        run.stderr.contains(
            "the label list has 6 labels, but tensor 'head.bias' has 7 classes (shape [7])"
        ),
        "{run:?}"
    );
    let run = env.run(["inspect", "b.ampoule"]);
    assert_eq!(run.code, 0, "{run:?}");
    for line in [
        "classes  counted on 'head.weight', shape [7, 8]\n",
        "tensor   backbone.weight: float32 [8, 12]\n",
        "tensor   head.bias: float32 [7]\n",
        "tensor   head.weight: float16 [7, 8]\n",
    ] {
        assert!(run.stdout.contains(line), "{line}{}", run.stdout);
    }
    let doc = json(&env.run(["--json", "inspect", "b.ampoule"]));
    assert_eq!(
        doc["tensors"][1],
        serde_json::json!({"name": "head.bias", "dtype": "float32", "shape": [7]})
    );
}

/// Issue 11 item 5: the real OCR label list of rapidocr-onnxruntime 1.4.4 (a single space,
/// U+3000 and two CJK compatibility ideographs among its 6625 labels) packs.
#[test]
fn issue11_a_real_ocr_label_list_packs() {
    let env = Env::new();
    env.write("model.bin", b"an opaque model");
    env.write(
        "dictionary.txt",
        &real("rapidocr_onnxruntime-1.4.4-rec-labels.txt"),
    );
    let run = pack(
        &env,
        "model.bin",
        "dictionary.txt",
        "1.0.0",
        "a.ampoule",
        &[],
    );
    assert_eq!(run.code, 0, "{run:?}");
    assert_eq!(json(&run)["manifest"]["label_count"], 6625);
}

/// Issue 11 with item 7: `diff` reports a changed classifier record and newer reading rules as
/// breaking (a policy naming the output counts classes by the record; a verifier that knows only
/// the older rules refuses the bundle). The old bundle is the one packed before issue 11
/// (tests/data/before-issue11/README.md).
#[test]
fn issue11_diff_reports_classifier_and_reading_rule_changes_as_breaking() {
    let env = squeezenet_with_a_thousand_labels();
    let a = pack(
        &env,
        "squeezenet.onnx",
        "thousand.txt",
        "1.0.0",
        "a.ampoule",
        &[],
    );
    assert_eq!(a.code, 0, "{a:?}");
    let b = pack(
        &env,
        "squeezenet.onnx",
        "thousand.txt",
        "1.1.0",
        "b.ampoule",
        &["--class-dim", "1"],
    );
    assert_eq!(b.code, 0, "{b:?}");
    let doc = json(&env.run(["--json", "diff", "a.ampoule", "b.ampoule"]));
    assert_eq!(
        doc["breaking"],
        serde_json::json!(["classifier changed: none recorded -> 'softmaxout_1' dimension 1"])
    );

    let data = concat!(env!("CARGO_MANIFEST_DIR"), "/tests/data/before-issue11/");
    env.write(
        "old.ampoule",
        &std::fs::read(format!("{data}trailcam-species-1.0.0.ampoule")).expect("old bundle"),
    );
    env.write(
        "mm.onnx",
        &std::fs::read(format!("{data}operator-mm.onnx")).expect("model"),
    );
    env.write(
        "four.txt",
        &std::fs::read(format!("{data}labels.txt")).expect("labels"),
    );
    let new = pack(&env, "mm.onnx", "four.txt", "1.1.0", "new.ampoule", &[]);
    assert_eq!(new.code, 0, "{new:?}");
    let doc = json(&env.run(["--json", "diff", "old.ampoule", "new.ampoule"]));
    let breaking = doc["breaking"].as_array().expect("breaking");
    assert!(
        breaking.contains(&serde_json::json!(
            "model read under newer rules: 1 -> 2 (verifiers that know only rules 1 refuse it)"
        )),
        "{doc}"
    );
}
