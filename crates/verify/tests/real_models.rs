//! Checks against outside references (issue 11): real model files that ship inside Python
//! packages, read by ampoule and compared field by field with what the reference libraries
//! read from them.
//!
//! tests/data/real-models/README.md names each file's package, version and licence;
//! reference.json was written by reference.py there with onnx 1.23.2, onnxruntime 1.32.0,
//! safetensors 0.8.0 and numpy 2.4.6 (its "source" field says so), so this test needs none of
//! them. Each check below names the library whose value it compares.

use std::collections::BTreeMap;
use std::path::PathBuf;

use ampoule_verify::labels::parse_labels;
use ampoule_verify::model::{
    DType, Dim, ModelSignature, ValueKind, ValueSignature, read_model_signature,
    read_model_signature_for_pack, read_model_signature_seekable, read_safetensors_tensors,
};
use serde_json::Value;

const REFERENCE: &str = include_str!("data/real-models/reference.json");

fn path(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/data/real-models")
        .join(name)
}

fn reference() -> Value {
    serde_json::from_str(REFERENCE).expect("reference.json")
}

/// Reads a fixture with the streaming and the seeking reader, which must agree.
fn signature(name: &str) -> ModelSignature {
    let bytes = std::fs::read(path(name)).expect("fixture");
    let streamed = read_model_signature(name, bytes.as_slice(), bytes.len() as u64)
        .unwrap_or_else(|e| panic!("{name}: {e}"))
        .expect("a format ampoule reads");
    let seeked =
        read_model_signature_seekable(name, std::io::Cursor::new(&bytes), bytes.len() as u64)
            .unwrap_or_else(|e| panic!("{name}: {e}"))
            .expect("a format ampoule reads");
    assert_eq!(streamed, seeked, "{name}");
    streamed
}

/// A dimension as onnx holds it (a number, -1 included, a name, or null when unset) against
/// ours: -1 and unset read as unknown (issue 11 item 2).
fn dim_matches_onnx(ours: &Dim, theirs: &Value) -> bool {
    match (ours, theirs) {
        (Dim::Fixed(size), Value::Number(n)) => n.as_u64() == Some(*size),
        (Dim::Unknown, Value::Number(n)) => n.as_i64() == Some(-1),
        (Dim::Unknown, Value::Null) => true,
        (Dim::Symbolic(name), Value::String(theirs)) => name == theirs,
        _ => false,
    }
}

/// onnxruntime's shapes: a number, a name, or None for a dimension it does not know.
fn dim_matches_onnxruntime(ours: &Dim, theirs: &Value) -> bool {
    match (ours, theirs) {
        (Dim::Fixed(size), Value::Number(n)) => n.as_u64() == Some(*size),
        (Dim::Unknown, Value::Null) => true,
        (Dim::Symbolic(name), Value::String(theirs)) => name == theirs,
        _ => false,
    }
}

/// onnxruntime's type names (`tensor(float)`, `seq(...)`) against our kind and dtype.
fn onnxruntime_type(value: &ValueSignature) -> String {
    match value.kind {
        ValueKind::Tensor => {
            let name = match value.dtype.expect("a tensor's dtype") {
                DType::Float32 => "float",
                DType::Float64 => "double",
                other => other.name(),
            };
            format!("tensor({name})")
        }
        ValueKind::Sequence => "seq".into(),
        other => other.name().into(),
    }
}

fn check_values(name: &str, role: &str, ours: &[ValueSignature], onnx: &Value, ort: &Value) {
    let onnx = onnx.as_array().expect("onnx values");
    assert_eq!(ours.len(), onnx.len(), "{name}: {role}s (onnx)");
    for (value, theirs) in ours.iter().zip(onnx) {
        let what = format!("{name}: {role} '{}'", value.name);
        // onnx 1.23.2: ValueInfoProto.name, type, elem_type, shape.dim.
        assert_eq!(value.name, theirs["name"].as_str().expect("name"), "{what}");
        match theirs["kind"].as_str() {
            Some("tensor_type") => {
                assert_eq!(value.kind, ValueKind::Tensor, "{what}");
                assert_eq!(
                    value.dtype.map(|d| d.onnx_code()),
                    theirs["elem_type"].as_i64(),
                    "{what}"
                );
                let shape = value.shape.as_deref().expect("a shape");
                let expected = theirs["shape"].as_array().expect("onnx shape");
                assert_eq!(shape.len(), expected.len(), "{what}");
                for (dim, theirs) in shape.iter().zip(expected) {
                    assert!(dim_matches_onnx(dim, theirs), "{what}: {dim} vs {theirs}");
                }
            }
            Some("sequence_type") => assert_eq!(value.kind, ValueKind::Sequence, "{what}"),
            other => panic!("{what}: a kind this test does not compare: {other:?}"),
        }
    }
    // onnxruntime 1.32.0: InferenceSession.get_inputs() / get_outputs() (name, type, shape);
    // absent when onnxruntime no longer runs the model's operator set.
    let Some(ort) = ort.as_array() else {
        println!("{name}: onnxruntime refused the model, its {role}s are compared with onnx only");
        return;
    };
    assert_eq!(ours.len(), ort.len(), "{name}: {role}s (onnxruntime)");
    for (value, theirs) in ours.iter().zip(ort) {
        let what = format!("{name}: {role} '{}' (onnxruntime)", value.name);
        assert_eq!(value.name, theirs["name"].as_str().expect("name"), "{what}");
        let their_type = theirs["type"].as_str().expect("type");
        let ours_type = onnxruntime_type(value);
        assert!(
            their_type.starts_with(&ours_type),
            "{what}: {ours_type} vs {their_type}"
        );
        if value.kind == ValueKind::Tensor {
            let shape = value.shape.as_deref().expect("a shape");
            let expected = theirs["shape"].as_array().expect("shape");
            assert_eq!(shape.len(), expected.len(), "{what}");
            for (dim, theirs) in shape.iter().zip(expected) {
                assert!(
                    dim_matches_onnxruntime(dim, theirs),
                    "{what}: {dim} vs {theirs}"
                );
            }
        }
    }
}

#[test]
fn issue11_real_onnx_models_read_as_onnx_and_onnxruntime_read_them() {
    let reference = reference();
    let models = reference["models"].as_object().expect("models");
    let mut compared = 0;
    for (name, expected) in models {
        if !name.ends_with(".onnx") {
            continue;
        }
        let sig = signature(name);
        let onnx = &expected["onnx"];
        let ort = &expected["onnxruntime"];
        // onnx 1.23.2: ModelProto.ir_version, opset_import (default domain), producer_*.
        assert_eq!(Value::from(sig.ir_version), onnx["ir_version"], "{name}");
        assert_eq!(Value::from(sig.opset), onnx["opset"], "{name}");
        assert_eq!(
            Value::from(sig.producer.clone()),
            onnx["producer_name"],
            "{name}"
        );
        assert_eq!(
            Value::from(sig.producer_version.clone()),
            onnx["producer_version"],
            "{name}"
        );
        check_values(name, "input", &sig.inputs, &onnx["inputs"], &ort["inputs"]);
        check_values(
            name,
            "output",
            &sig.outputs,
            &onnx["outputs"],
            &ort["outputs"],
        );
        // onnx 1.23.2 with numpy 2.4.6: numpy_helper.to_array over the initializers, every
        // Constant node's value and the same in every subgraph (size, nbytes), by data type.
        assert_eq!(
            Value::from(sig.weight_tensors),
            onnx["weight_tensors"],
            "{name}"
        );
        assert_eq!(Value::from(sig.parameters), onnx["parameters"], "{name}");
        let ours: BTreeMap<String, u64> = sig
            .bytes_by_dtype
            .0
            .iter()
            .map(|(dtype, bytes)| (dtype.onnx_code().to_string(), *bytes))
            .collect();
        let theirs: BTreeMap<String, u64> =
            serde_json::from_value(onnx["bytes_by_type"].clone()).expect("bytes by type");
        assert_eq!(ours, theirs, "{name}");
        compared += 1;
    }
    assert_eq!(compared, 7, "every ONNX model in reference.json");
}

#[test]
fn issue11_class_counts_match_what_the_packages_say() {
    let reference = reference();
    for (name, expected) in reference["models"].as_object().expect("models") {
        let classes = &expected["classes"];
        if classes.is_null() || !name.ends_with(".onnx") {
            continue;
        }
        let output = classes["output"].as_str().expect("output");
        // The count: what the package says, beside the value in reference.json ("from").
        let count = match classes["count"].as_u64() {
            Some(count) => count,
            // The shape of the expected output onnx's backend test ships: every dimension after
            // the batch multiplied ([1, 1000, 1, 1] is 1000 classes).
            None => classes["shape"].as_array().expect("shape")[1..]
                .iter()
                .map(|d| d.as_u64().expect("a fixed size"))
                .product(),
        };
        let sig = signature(name);
        assert_eq!(
            sig.class_count(Some(output), None).expect("a class count"),
            count,
            "{name} ({})",
            classes["from"]
        );
        assert_eq!(
            sig.class_count(None, None).expect("the only output"),
            count,
            "{name}"
        );
    }
}

#[test]
fn issue11_the_ocr_recognizers_labels_pack_and_match_its_class_count() {
    let reference = reference();
    let rec = &reference["ocr_recognizer"];
    let bytes = std::fs::read(path("rapidocr_onnxruntime-1.4.4-rec-labels.txt")).expect("labels");
    // The label rule accepts the real dictionary: "blank", a single space, U+3000, and the two
    // CJK compatibility ideographs (labels.rs names their lines).
    let labels = parse_labels(&bytes).expect("the OCR dictionary is a valid label list");
    assert_eq!(labels.len() as u64, rec["labels"].as_u64().expect("count"));
    assert_eq!(labels.last().map(String::as_str), Some(" "));
    assert!(labels.iter().any(|label| label == "\u{3000}"));
    // The recognizer's output as onnx 1.23.2 reads it ([N, T, 6625], the file itself is 10.9 MB
    // and not committed): its class count is the last dimension, one class per label.
    let output = &rec["outputs"][0];
    let shape: Vec<Value> = output["shape"].as_array().expect("shape").clone();
    let sig: ModelSignature = serde_json::from_value(serde_json::json!({
        "format": "onnx", "ir_version": null, "opset": null, "producer": null,
        "producer_version": null, "inputs": [],
        "outputs": [{"name": output["name"], "dtype": "float32", "shape": shape}],
        "weight_tensors": 0, "parameters": 0, "weights_8bit": false, "bytes_by_dtype": {}
    }))
    .expect("a signature");
    sig.check_label_count(None, None, labels.len())
        .expect("one label per class");
}

#[test]
fn issue11_safetensors_tensors_and_class_count_match_the_safetensors_package() {
    let reference = reference();
    let expected = &reference["models"]["classifier.safetensors"];
    let file = path("classifier.safetensors");
    let bytes = std::fs::read(&file).expect("fixture");
    let tensors = read_safetensors_tensors(bytes.as_slice(), bytes.len() as u64).expect("read");
    // safetensors 0.8.0: safe_open(framework="np").keys(), get_tensor(name).dtype / .shape.
    let theirs = expected["safetensors"]["tensors"]
        .as_object()
        .expect("tensors");
    assert_eq!(tensors.len(), theirs.len());
    for tensor in &tensors {
        let their = &theirs[&tensor.name];
        assert_eq!(tensor.dtype.name(), their["dtype"].as_str().expect("dtype"));
        let shape: Vec<u64> = serde_json::from_value(their["shape"].clone()).expect("shape");
        assert_eq!(tensor.shape, shape, "{}", tensor.name);
    }
    // The class count is the first dimension of the named tensor: a [C] bias or a [C, in]
    // weight (issue 11 item 6); 7 is what reference.py wrote.
    let count = expected["classes"]["count"].as_u64().expect("count");
    for tensor in ["head.bias", "head.weight"] {
        let sig = read_model_signature_for_pack(&file, Some(tensor), None)
            .expect("read")
            .expect("safetensors");
        assert_eq!(
            sig.class_count(None, None).expect("count"),
            count,
            "{tensor}"
        );
        assert_eq!(
            sig.class_count(Some(tensor), None).expect("count"),
            count,
            "{tensor}"
        );
        let recorded = sig.classifier.as_ref().expect("recorded");
        assert_eq!(recorded.tensor, tensor);
    }
    let sig = read_model_signature_for_pack(&file, Some("backbone.weight"), Some(1))
        .expect("read")
        .expect("safetensors");
    assert_eq!(sig.class_count(None, None).expect("count"), 12);
    assert_eq!(
        read_model_signature_for_pack(&file, Some("head.missing"), None)
            .expect_err("no such tensor")
            .to_string(),
        "the safetensors model has no tensor 'head.missing'"
    );
}

/// Issue 11 items 1 and 6 on the device: the app's policy counts classes with the dimension it
/// sets, else the one `pack --class-dim` recorded for that output, else the rule; for
/// safetensors, only the tensor whose shape the signed record holds can be named.
#[test]
fn issue11_the_device_policy_uses_the_recorded_or_its_own_class_dimension() {
    use ampoule_verify::model::CompatibilityPolicy;
    let labels = |n: usize| -> Vec<String> { (0..n).map(|i| format!("class {i}")).collect() };
    let policy = |dim: Option<u32>| {
        let builder = CompatibilityPolicy::builder().classifier_output("scores");
        match dim {
            Some(dim) => builder.class_dim(dim),
            None => builder,
        }
        .build()
        .expect("policy")
    };
    // An output [N, 5, 7] (invented): the rule takes the last dimension, 7.
    let mut sig: ModelSignature = serde_json::from_value(serde_json::json!({
        "format": "onnx", "ir_version": 8, "opset": 13, "producer": null,
        "producer_version": null, "inputs": [],
        "outputs": [{"name": "scores", "dtype": "float32", "shape": ["N", 5, 7]}],
        "weight_tensors": 0, "parameters": 0, "weights_8bit": false, "bytes_by_dtype": {}
    }))
    .expect("a signature");
    policy(None)
        .check(Some(&sig), &labels(7))
        .expect("the rule: 7");
    // Recorded by pack --class-dim 1: the device counts 5.
    sig.classifier = serde_json::from_value(serde_json::json!({"tensor": "scores", "dim": 1}))
        .expect("classifier");
    policy(None)
        .check(Some(&sig), &labels(5))
        .expect("recorded: 5");
    assert_eq!(
        policy(None)
            .check(Some(&sig), &labels(7))
            .expect_err("7 labels for 5 classes")
            .to_string(),
        "the label list has 7 labels, but output 'scores' has 5 classes (shape [N, 5, 7])"
    );
    // The app's own dimension wins over the record.
    policy(Some(2))
        .check(Some(&sig), &labels(7))
        .expect("the app's: 7");
    assert_eq!(
        policy(Some(0))
            .check(Some(&sig), &labels(7))
            .expect_err("a named dimension")
            .to_string(),
        "output 'scores' has shape [N, 5, 7]: its class dimension 0 is N, not a fixed size"
    );

    // safetensors: the record names head.bias with its shape [7].
    let file = path("classifier.safetensors");
    let sig = read_model_signature_for_pack(&file, Some("head.bias"), None)
        .expect("read")
        .expect("safetensors");
    let named = |name: &str| {
        CompatibilityPolicy::builder()
            .classifier_output(name)
            .build()
            .expect("policy")
    };
    named("head.bias")
        .check(Some(&sig), &labels(7))
        .expect("7 classes");
    assert_eq!(
        named("backbone.weight")
            .check(Some(&sig), &labels(8))
            .expect_err("no recorded shape")
            .to_string(),
        "the safetensors model records the shape of no tensor 'backbone.weight'; pack it with --classifier-output backbone.weight"
    );
}

/// Issue 11 item 1: the class-dimension rule on the five shapes the issue lists, each the output
/// of a model file inside a package (reference.json's `class_shapes` names each source and where
/// its class count comes from): `[1, 1000]`, `[1, 1000, 1, 1]`, `[N, T, 6625]`, `[1, 1]` (a
/// `[batch, 1]` score; no small voice-activity model ships in a package we searched), and
/// `[N, 1, H, W]`, which no rule can read as classes.
#[test]
fn issue11_the_class_dimension_rule_on_real_output_shapes() {
    let reference = reference();
    let shapes = reference["class_shapes"].as_array().expect("class_shapes");
    assert_eq!(shapes.len(), 5);
    for case in shapes {
        let sig: ModelSignature = serde_json::from_value(serde_json::json!({
            "format": "onnx", "ir_version": null, "opset": null, "producer": null,
            "producer_version": null, "inputs": [],
            "outputs": [{"name": "out", "dtype": "float32", "shape": case["shape"]}],
            "weight_tensors": 0, "parameters": 0, "weights_8bit": false, "bytes_by_dtype": {}
        }))
        .expect("a signature");
        assert_eq!(
            sig.class_count(None, None).ok(),
            case["classes"].as_u64(),
            "{} ({})",
            case["source"],
            case["classes_from"]
        );
    }
}

/// Extra coverage, never the only coverage: with `AMPOULE_RAPIDOCR_WHEEL` naming the
/// rapidocr-onnxruntime 1.4.4 wheel and a Python (`AMPOULE_PYTHON`, default `python3`) that has
/// onnx, onnxruntime, safetensors and numpy, reference.py run afresh in a copy of the folder must
/// write the committed values (all but `source`, which names the versions it ran with) and
/// the same derived files. Without them the test says it skipped.
#[test]
fn reference_py_rewrites_the_committed_values_when_its_packages_are_present() {
    use std::process::Command;
    let Ok(wheel) = std::env::var("AMPOULE_RAPIDOCR_WHEEL") else {
        println!("skipped: AMPOULE_RAPIDOCR_WHEEL does not name the rapidocr-onnxruntime wheel");
        return;
    };
    let python = std::env::var("AMPOULE_PYTHON").unwrap_or_else(|_| "python3".into());
    let probe = Command::new(&python)
        .args(["-c", "import onnx, onnxruntime, safetensors, numpy"])
        .status();
    if !probe.is_ok_and(|status| status.success()) {
        println!("skipped: {python} lacks onnx, onnxruntime, safetensors or numpy");
        return;
    }
    let dir = tempfile::tempdir().expect("temp dir");
    let folder = path("");
    for entry in std::fs::read_dir(&folder).expect("the folder") {
        let entry = entry.expect("an entry");
        std::fs::copy(entry.path(), dir.path().join(entry.file_name())).expect("copy");
    }
    let run = Command::new(&python)
        .arg(dir.path().join("reference.py"))
        .arg(&wheel)
        .output()
        .expect("python runs");
    assert!(
        run.status.success(),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let fresh: Value =
        serde_json::from_slice(&std::fs::read(dir.path().join("reference.json")).expect("written"))
            .expect("json");
    let mut committed = reference();
    committed["source"] = fresh["source"].clone();
    assert_eq!(fresh, committed);
    for derived in [
        "subgraphs.onnx",
        "classifier.safetensors",
        "rapidocr_onnxruntime-1.4.4-rec-labels.txt",
    ] {
        assert!(
            std::fs::read(dir.path().join(derived)).expect("written")
                == std::fs::read(folder.join(derived)).expect("committed"),
            "{derived} differs from the committed file"
        );
    }
}
