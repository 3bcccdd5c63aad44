//! The model readers against reference libraries, and against hostile model files.
//!
//! The fixtures in tests/data/models/ were written by gen_models.py with the `onnx` 1.23.2 and
//! `safetensors` 0.8.0 PyPI packages (numpy 2.4.6); beside each file, a JSON records what those
//! libraries read back from it. Our readers must report the same names, dtypes, shapes and
//! counts. Hostile files are built by the named generators below, each with its exact error.

use std::io::{self, Cursor, Read, Seek, SeekFrom};

use ampoule_verify::model::{
    CompatibilityPolicy, DType, Dim, DimPattern, ModelFormat, ModelSignature, ShapePattern,
    TensorSpec, ValueKind, read_model_signature, read_model_signature_file,
    read_model_signature_seekable,
};
use ampoule_verify::{ErrorKind, Result};
use serde_json::Value;

struct Fixture {
    name: &'static str,
    bytes: &'static [u8],
    reference: &'static str,
}

/// ONNX fixtures, with what `onnx` 1.23.2 (onnx.load, numpy_helper.to_array) reads from them.
const ONNX_FIXTURES: [Fixture; 3] = [
    Fixture {
        name: "trailcam-f32.onnx",
        bytes: include_bytes!("data/models/trailcam-f32.onnx"),
        reference: include_str!("data/models/trailcam-f32.onnx.json"),
    },
    Fixture {
        name: "trailcam-int8.onnx",
        bytes: include_bytes!("data/models/trailcam-int8.onnx"),
        reference: include_str!("data/models/trailcam-int8.onnx.json"),
    },
    Fixture {
        name: "trailcam-oldstyle.onnx",
        bytes: include_bytes!("data/models/trailcam-oldstyle.onnx"),
        reference: include_str!("data/models/trailcam-oldstyle.onnx.json"),
    },
];

/// safetensors fixtures, with what `safetensors` 0.8.0 (safe_open, framework np) reads.
const SAFETENSORS_FIXTURES: [Fixture; 2] = [
    Fixture {
        name: "trailcam-weights.safetensors",
        bytes: include_bytes!("data/models/trailcam-weights.safetensors"),
        reference: include_str!("data/models/trailcam-weights.safetensors.json"),
    },
    Fixture {
        name: "trailcam-int8.safetensors",
        bytes: include_bytes!("data/models/trailcam-int8.safetensors"),
        reference: include_str!("data/models/trailcam-int8.safetensors.json"),
    },
];

fn read(name: &str, bytes: &[u8]) -> Result<Option<ModelSignature>> {
    read_model_signature(name, bytes, bytes.len() as u64)
}

fn signature(name: &str, bytes: &[u8]) -> ModelSignature {
    let streamed = read(name, bytes)
        .unwrap_or_else(|e| panic!("{name}: {e}"))
        .unwrap_or_else(|| panic!("{name}: read as opaque"));
    // The seeking reader must see exactly what the streaming one sees.
    let seeked = read_model_signature_seekable(name, Cursor::new(bytes), bytes.len() as u64)
        .unwrap_or_else(|e| panic!("{name} (seekable): {e}"))
        .unwrap_or_else(|| panic!("{name}: read as opaque"));
    assert_eq!(streamed, seeked, "{name}");
    streamed
}

fn error_of(name: &str, bytes: &[u8]) -> String {
    match read(name, bytes) {
        Ok(found) => panic!("{name}: expected an error, read {found:?}"),
        Err(e) => {
            assert_eq!(e.kind(), ErrorKind::Model, "{name}: {e}");
            e.to_string()
        }
    }
}

/// A dimension as the reference JSON writes it: a number, a name, or null.
fn dim_json(dim: &Dim) -> Value {
    match dim {
        Dim::Fixed(size) => Value::from(*size),
        Dim::Symbolic(name) => Value::from(name.as_str()),
        Dim::Unknown => Value::Null,
    }
}

#[test]
fn onnx_readers_match_the_onnx_package() {
    for fixture in &ONNX_FIXTURES {
        let reference: Value = serde_json::from_str(fixture.reference).expect("reference json");
        let sig = signature(fixture.name, fixture.bytes);
        let name = fixture.name;
        // Reference: onnx 1.23.2, ModelProto fields as onnx.load reads them.
        assert_eq!(sig.format, ModelFormat::Onnx, "{name}");
        assert_eq!(
            Value::from(sig.ir_version),
            reference["ir_version"],
            "{name}"
        );
        assert_eq!(Value::from(sig.opset), reference["opset"], "{name}");
        assert_eq!(
            Value::from(sig.producer.clone()),
            reference["producer_name"],
            "{name}"
        );
        assert_eq!(
            Value::from(sig.producer_version.clone()),
            reference["producer_version"],
            "{name}"
        );
        for (ours, theirs) in [
            (&sig.inputs, &reference["inputs"]),
            (&sig.outputs, &reference["outputs"]),
        ] {
            let theirs = theirs.as_array().expect("reference values");
            assert_eq!(ours.len(), theirs.len(), "{name}");
            for (value, expected) in ours.iter().zip(theirs) {
                assert_eq!(
                    value.name,
                    expected["name"].as_str().expect("name"),
                    "{name}"
                );
                assert_eq!(value.kind, ValueKind::Tensor, "{name}");
                let dtype = value.dtype.expect("dtype");
                assert_eq!(
                    Value::from(dtype.onnx_code()),
                    expected["elem_type"],
                    "{name}: {}",
                    value.name
                );
                let shape: Vec<Value> = value
                    .shape
                    .as_ref()
                    .expect("shape")
                    .iter()
                    .map(dim_json)
                    .collect();
                assert_eq!(
                    Value::from(shape),
                    expected["shape"],
                    "{name}: {}",
                    value.name
                );
            }
        }
        assert_eq!(
            Value::from(sig.weight_tensors),
            reference["initializer_count"],
            "{name}"
        );
        assert_eq!(
            Value::from(sig.parameters),
            reference["parameter_count"],
            "{name}"
        );
        // Reference: numpy_helper.to_array(initializer).nbytes, summed per data type code.
        let bytes = reference["bytes_by_type"]
            .as_object()
            .expect("bytes_by_type");
        assert_eq!(sig.bytes_by_dtype.0.len(), bytes.len(), "{name}");
        for (code, expected) in bytes {
            let dtype = DType::from_onnx_code(code.parse().expect("code")).expect("known code");
            assert_eq!(
                Value::from(sig.bytes_by_dtype.get(dtype)),
                *expected,
                "{name}: {dtype}"
            );
        }
        // weights_8bit is our rule (at least half of the parameters in 8-bit or narrower
        // types), applied to the reference's parameter counts per type.
        let mut narrow = 0;
        let mut total = 0;
        for (code, count) in reference["parameters_by_type"].as_object().expect("params") {
            let count = count.as_u64().expect("count");
            total += count;
            if DType::from_onnx_code(code.parse().expect("code"))
                .expect("known")
                .is_8bit_or_narrower()
            {
                narrow += count;
            }
        }
        assert_eq!(sig.weights_8bit, narrow * 2 >= total, "{name}");
    }
}

#[test]
fn old_style_initializers_listed_as_inputs_are_not_inputs() {
    let fixture = &ONNX_FIXTURES[2];
    let reference: Value = serde_json::from_str(fixture.reference).expect("reference json");
    // Reference: onnx 1.23.2 lists 5 graph inputs, of which 4 are initializers.
    assert_eq!(reference["graph_inputs_listed"], 5);
    let sig = signature(fixture.name, fixture.bytes);
    assert_eq!(sig.inputs.len(), 1);
    assert_eq!(sig.inputs[0].name, "image");
    assert_eq!(
        sig.inputs[0].shape.as_deref().expect("shape")[0],
        Dim::Unknown
    );
}

#[test]
fn the_float_and_8bit_models_differ_where_the_app_would_break() {
    let float = signature(ONNX_FIXTURES[0].name, ONNX_FIXTURES[0].bytes);
    let eight = signature(ONNX_FIXTURES[1].name, ONNX_FIXTURES[1].bytes);
    assert!(!float.weights_8bit);
    assert!(eight.weights_8bit);
    assert_eq!(float.inputs[0].dtype, Some(DType::Float32));
    assert_eq!(eight.inputs[0].dtype, Some(DType::Uint8));
}

#[test]
fn safetensors_readers_match_the_safetensors_package() {
    for fixture in &SAFETENSORS_FIXTURES {
        let reference: Value = serde_json::from_str(fixture.reference).expect("reference json");
        let name = fixture.name;
        let sig = signature(name, fixture.bytes);
        assert_eq!(sig.format, ModelFormat::Safetensors, "{name}");
        assert!(sig.inputs.is_empty() && sig.outputs.is_empty(), "{name}");
        assert_eq!(sig.opset, None);
        // Reference: safetensors 0.8.0 safe_open: keys, get_slice().get_dtype()/get_shape(),
        // get_tensor().nbytes.
        let tensors = reference["tensors"].as_object().expect("tensors");
        assert_eq!(sig.weight_tensors, tensors.len() as u64, "{name}");
        let mut parameters = 0u64;
        let mut bytes = std::collections::BTreeMap::<DType, u64>::new();
        for tensor in tensors.values() {
            let shape: Vec<u64> = tensor["shape"]
                .as_array()
                .expect("shape")
                .iter()
                .map(|d| d.as_u64().expect("dim"))
                .collect();
            parameters += shape.iter().product::<u64>();
            let dtype = DType::from_safetensors_name(tensor["dtype"].as_str().expect("dtype"))
                .expect("known dtype");
            assert_eq!(dtype.safetensors_name(), tensor["dtype"].as_str());
            *bytes.entry(dtype).or_default() += tensor["nbytes"].as_u64().expect("nbytes");
        }
        assert_eq!(sig.parameters, parameters, "{name}");
        assert_eq!(sig.bytes_by_dtype.0, bytes, "{name}");
    }
    let weights = signature(SAFETENSORS_FIXTURES[0].name, SAFETENSORS_FIXTURES[0].bytes);
    let eight = signature(SAFETENSORS_FIXTURES[1].name, SAFETENSORS_FIXTURES[1].bytes);
    assert!(!weights.weights_8bit);
    assert!(eight.weights_8bit);
}

#[test]
fn files_are_read_from_disk_and_other_files_are_opaque() {
    let dir = tempfile::tempdir().expect("temp dir");
    for fixture in ONNX_FIXTURES.iter().chain(&SAFETENSORS_FIXTURES) {
        let path = dir.path().join(fixture.name);
        std::fs::write(&path, fixture.bytes).expect("write");
        let from_disk = read_model_signature_file(&path)
            .expect("read")
            .expect("signature");
        assert_eq!(
            from_disk,
            signature(fixture.name, fixture.bytes),
            "{}",
            fixture.name
        );
    }
    // An extension no reader claims (a neutral one, named after no product's format).
    let other = dir.path().join("model.weights");
    std::fs::write(&other, b"not parsed").expect("write");
    assert_eq!(read_model_signature_file(&other).expect("read"), None);
    assert_eq!(read("model.bin", b"\x08\x01").expect("read"), None);
    assert_eq!(
        ModelFormat::from_file_name("MODEL.ONNX"),
        Some(ModelFormat::Onnx)
    );
    assert_eq!(ModelFormat::from_file_name("onnx"), None);
}

#[test]
fn the_signature_json_is_stable_and_strict() {
    let sig = signature(ONNX_FIXTURES[0].name, ONNX_FIXTURES[0].bytes);
    let json = serde_json::to_string(&sig).expect("serialize");
    assert_eq!(
        json,
        concat!(
            r#"{"format":"onnx","rules":2,"ir_version":8,"opset":13,"producer":"trailcam-export","producer_version":"1.0","#,
            r#""inputs":[{"name":"image","dtype":"float32","shape":["N",3,96,96]}],"#,
            r#""outputs":[{"name":"species","dtype":"float32","shape":["N",7]}],"#,
            r#""weight_tensors":4,"parameters":147,"weights_8bit":false,"bytes_by_dtype":{"float32":588}}"#
        )
    );
    let back: ModelSignature = serde_json::from_str(&json).expect("deserialize");
    assert_eq!(back, sig);

    let old = signature(ONNX_FIXTURES[2].name, ONNX_FIXTURES[2].bytes);
    let json = serde_json::to_string(&old.inputs[0]).expect("serialize");
    assert_eq!(
        json,
        r#"{"name":"image","dtype":"float32","shape":[null,3,96,96]}"#
    );

    let eight = signature(ONNX_FIXTURES[1].name, ONNX_FIXTURES[1].bytes);
    let json = serde_json::to_string(&eight.bytes_by_dtype).expect("serialize");
    assert_eq!(json, r#"{"float32":52,"int8":138}"#);

    let unknown_field = r#"{"format":"onnx","ir_version":8,"opset":13,"producer":null,"producer_version":null,"inputs":[],"outputs":[],"weight_tensors":0,"parameters":0,"weights_8bit":false,"bytes_by_dtype":{},"extra":1}"#;
    let e = serde_json::from_str::<ModelSignature>(unknown_field).expect_err("unknown field");
    assert!(e.to_string().starts_with("unknown field `extra`"), "{e}");
    let twice = r#"{"format":"onnx","ir_version":8,"opset":13,"producer":null,"producer_version":null,"inputs":[],"outputs":[],"weight_tensors":0,"parameters":0,"weights_8bit":false,"bytes_by_dtype":{"int8":1,"int8":2}}"#;
    let e = serde_json::from_str::<ModelSignature>(twice).expect_err("duplicate dtype");
    assert!(
        e.to_string()
            .starts_with("dtype 'int8' appears twice in bytes_by_dtype"),
        "{e}"
    );
    let sequence = r#"{"name":"scores","kind":"sequence","dtype":null,"shape":null}"#;
    let value: ampoule_verify::model::ValueSignature =
        serde_json::from_str(sequence).expect("kind");
    assert_eq!(value.kind, ValueKind::Sequence);
    assert_eq!(serde_json::to_string(&value).expect("serialize"), sequence);
}

fn trailcam_policy() -> CompatibilityPolicy {
    CompatibilityPolicy::builder()
        .format(ModelFormat::Onnx)
        .max_opset(17)
        .input(
            TensorSpec::new("image")
                .dtype("float32")
                .expect("float32 is an element type")
                .shape("[*, 3, 96, 96]".parse().expect("pattern")),
        )
        .output(
            TensorSpec::new("species")
                .dtype("float32")
                .expect("float32 is an element type")
                .shape("[*, 7]".parse().expect("pattern")),
        )
        .classifier_output("species")
        .label_count(2..=64)
        .require_label("empty frame")
        .build()
        .expect("policy")
}

fn labels(n: usize) -> Vec<String> {
    let names = [
        "fox",
        "roe deer",
        "wild boar",
        "badger",
        "hare",
        "red squirrel",
        "empty frame",
        "pine marten",
    ];
    let mut list: Vec<String> = names.iter().take(n).map(|s| s.to_string()).collect();
    // Keep "empty frame" present whatever the count, so the count is what differs.
    if n < 7
        && let Some(last) = list.last_mut()
    {
        *last = "empty frame".into();
    }
    list
}

fn refusal(
    policy: &CompatibilityPolicy,
    sig: Option<&ModelSignature>,
    labels: &[String],
) -> String {
    let e = policy.check(sig, labels).expect_err("policy should refuse");
    assert_eq!(e.kind(), ErrorKind::Incompatible, "{e}");
    e.to_string()
}

#[test]
fn the_policy_accepts_what_fits_and_names_what_differs() {
    let float = signature(ONNX_FIXTURES[0].name, ONNX_FIXTURES[0].bytes);
    let eight = signature(ONNX_FIXTURES[1].name, ONNX_FIXTURES[1].bytes);
    let old = signature(ONNX_FIXTURES[2].name, ONNX_FIXTURES[2].bytes);
    let policy = trailcam_policy();
    policy.check(Some(&float), &labels(7)).expect("fits");
    // The old model's batch is unknown rather than named; a wildcard takes either.
    policy.check(Some(&old), &labels(7)).expect("fits");

    assert_eq!(
        refusal(&policy, Some(&eight), &labels(7)),
        "input 'image' has dtype uint8, the app expects float32"
    );
    assert_eq!(
        refusal(&policy, Some(&float), &labels(6)),
        "the label list has 6 labels, but output 'species' has 7 classes (shape [N, 7])"
    );
    let six = CompatibilityPolicy::builder()
        .output(TensorSpec::new("species").shape("[1, 6]".parse().expect("pattern")))
        .build()
        .expect("policy");
    assert_eq!(
        refusal(&six, Some(&float), &labels(7)),
        "output 'species' has shape [N, 7], the app expects [1, 6]: dimension 0 is named N (not fixed), not 1"
    );
    let bigger = CompatibilityPolicy::builder()
        .input(TensorSpec::new("image").shape("[*, 3, 224, 224]".parse().expect("pattern")))
        .build()
        .expect("policy");
    assert_eq!(
        refusal(&bigger, Some(&float), &labels(7)),
        "input 'image' has shape [N, 3, 96, 96], the app expects [*, 3, 224, 224]: dimension 2 is 96, not 224"
    );
    let rank = CompatibilityPolicy::builder()
        .input(TensorSpec::new("image").shape("[*, 96, 96]".parse().expect("pattern")))
        .build()
        .expect("policy");
    assert_eq!(
        refusal(&rank, Some(&float), &labels(7)),
        "input 'image' has shape [N, 3, 96, 96], the app expects [*, 96, 96]: rank 4, not 3"
    );
    let fixed_batch = CompatibilityPolicy::builder()
        .input(TensorSpec::new("image").shape("[1, 3, 96, 96]".parse().expect("pattern")))
        .build()
        .expect("policy");
    assert_eq!(
        refusal(&fixed_batch, Some(&old), &labels(7)),
        "input 'image' has shape [?, 3, 96, 96], the app expects [1, 3, 96, 96]: dimension 0 is unknown, not 1"
    );
    let renamed = CompatibilityPolicy::builder()
        .input(TensorSpec::new("frame"))
        .build()
        .expect("policy");
    assert_eq!(
        refusal(&renamed, Some(&float), &labels(7)),
        "the model has no input 'frame' (its inputs: 'image')"
    );
    let two_inputs = CompatibilityPolicy::builder()
        .input(TensorSpec::new("frame"))
        .build()
        .expect("policy");
    let mut needy = float.clone();
    needy.inputs.push(needy.inputs[0].clone());
    needy.inputs[1].name = "frame".into();
    assert_eq!(
        refusal(&two_inputs, Some(&needy), &labels(7)),
        "the model needs input 'image', which the app does not feed (it feeds 'frame')"
    );
    let no_output = CompatibilityPolicy::builder()
        .output(TensorSpec::new("scores"))
        .build()
        .expect("policy");
    assert_eq!(
        refusal(&no_output, Some(&float), &labels(7)),
        "the model has no output 'scores' (its outputs: 'species')"
    );
    let old_runtime = CompatibilityPolicy::builder()
        .max_opset(12)
        .build()
        .expect("policy");
    assert_eq!(
        refusal(&old_runtime, Some(&float), &labels(7)),
        "the model needs onnx opset 13, the app supports at most 12"
    );
    let wants_8bit = CompatibilityPolicy::builder()
        .weights_8bit(true)
        .build()
        .expect("policy");
    assert_eq!(
        refusal(&wants_8bit, Some(&float), &labels(7)),
        "the model's weights are not 8-bit, the app expects 8-bit weights"
    );
    wants_8bit
        .check(Some(&eight), &labels(7))
        .expect("8-bit fits");
    let weights = signature(SAFETENSORS_FIXTURES[0].name, SAFETENSORS_FIXTURES[0].bytes);
    assert_eq!(
        refusal(&policy, Some(&weights), &labels(7)),
        "the model is safetensors, the app expects onnx"
    );
    assert_eq!(
        refusal(&policy, None, &labels(7)),
        "the model is opaque (it has no recorded signature), but the app's policy states what the model must be"
    );
    // Each setting that says what the model must be refuses an opaque model on its own.
    // Mutation testing (MUTANTS.md) found `inputs || outputs` taken for `&&` unnoticed: a
    // policy that named only an output, or only an input, let a model with no recorded
    // signature through.
    let alone = [
        (
            "format",
            CompatibilityPolicy::builder().format(ModelFormat::Onnx),
        ),
        ("max_opset", CompatibilityPolicy::builder().max_opset(13)),
        (
            "input",
            CompatibilityPolicy::builder().input(TensorSpec::new("image")),
        ),
        (
            "output",
            CompatibilityPolicy::builder().output(TensorSpec::new("species")),
        ),
        (
            "weights_8bit",
            CompatibilityPolicy::builder().weights_8bit(false),
        ),
        (
            "classifier_output",
            CompatibilityPolicy::builder().classifier_output("species"),
        ),
    ];
    for (setting, builder) in alone {
        let alone = builder.build().expect(setting);
        assert_eq!(
            refusal(&alone, None, &labels(7)),
            "the model is opaque (it has no recorded signature), but the app's policy states what the model must be",
            "a policy stating only {setting}"
        );
    }
    let labels_only = CompatibilityPolicy::builder()
        .label_count(7..=7)
        .require_label("badger")
        .build()
        .expect("policy");
    labels_only
        .check(None, &labels(7))
        .expect("opaque model, fitting labels");
    assert_eq!(
        refusal(&labels_only, None, &labels(8)),
        "the label list has 8 labels, the app accepts exactly 7"
    );
    assert_eq!(
        refusal(&policy, Some(&float), &labels(1)),
        "the label list has 1 labels, the app accepts 2 to 64"
    );
    let mut no_badger = labels(7);
    no_badger[3] = "stoat".into();
    assert_eq!(
        refusal(&labels_only, None, &no_badger),
        "the label list lacks 'badger', which the app requires"
    );
}

#[test]
fn policies_and_patterns_refuse_nonsense() {
    let e = "[*, x, 96]"
        .parse::<ShapePattern>()
        .expect_err("bad pattern");
    assert_eq!(
        e.to_string(),
        "shape pattern '[*, x, 96]' has a dimension 'x' that is neither '*' nor a whole number"
    );
    let scalar: ShapePattern = "[]".parse().expect("scalar");
    assert!(scalar.dims().is_empty());
    let pattern: ShapePattern = "*, 7".parse().expect("no brackets");
    assert_eq!(
        pattern,
        ShapePattern::new([DimPattern::Any, DimPattern::Exactly(7)])
    );
    assert_eq!(pattern.to_string(), "[*, 7]");
    let e = CompatibilityPolicy::builder()
        .input(TensorSpec::new("image"))
        .input(TensorSpec::new("image"))
        .build()
        .expect_err("twice");
    assert_eq!(e.to_string(), "the policy states input 'image' twice");
    #[allow(clippy::reversed_empty_ranges)]
    let e = CompatibilityPolicy::builder()
        .label_count(9..=2)
        .build()
        .expect_err("empty range");
    assert_eq!(
        e.to_string(),
        "the policy's label count range 9 to 2 is empty"
    );
}

#[test]
fn class_count_finds_the_classifier_output() {
    let float = signature(ONNX_FIXTURES[0].name, ONNX_FIXTURES[0].bytes);
    assert_eq!(float.class_count(None, None).expect("only output"), 7);
    assert_eq!(float.class_count(Some("species"), None).expect("named"), 7);
    float
        .check_label_count(None, None, 7)
        .expect("seven labels");
    assert_eq!(
        float
            .check_label_count(None, None, 6)
            .expect_err("six")
            .to_string(),
        "the label list has 6 labels, but output 'species' has 7 classes (shape [N, 7])"
    );
    assert_eq!(
        float
            .class_count(Some("logits"), None)
            .expect_err("missing")
            .to_string(),
        "the model has no output 'logits' (its outputs: 'species')"
    );
    let weights = signature(SAFETENSORS_FIXTURES[0].name, SAFETENSORS_FIXTURES[0].bytes);
    assert_eq!(
        weights
            .class_count(None, None)
            .expect_err("no outputs")
            .to_string(),
        "the safetensors model has no outputs to match labels to: name the tensor that counts the classes (a [C] bias or a [C, in] weight)"
    );
    let mut two = float.clone();
    two.outputs.push(two.outputs[0].clone());
    two.outputs[1].name = "box".into();
    assert_eq!(
        two.class_count(None, None).expect_err("two").to_string(),
        "the model has 2 outputs ('species', 'box'): name the classifier output"
    );
    two.outputs[0].shape = Some(vec![Dim::Symbolic("N".into()), Dim::Symbolic("C".into())]);
    assert_eq!(
        two.class_count(Some("species"), None)
            .expect_err("symbolic")
            .to_string(),
        "output 'species' has shape [N, C]: its class count cannot be determined (neither its \
         last dimension nor a single dimension after the first is a fixed size above 1 with \
         every other one fixed at 1; name the class dimension)"
    );
}

/// Issue 11's rule for the class dimension, on the output shapes its table names, each from a
/// model file that ships inside a Python-registry package: image classifiers of a model zoo
/// (`[1, 1000]`), older image classifiers whose last layer is a convolution
/// (`[1, 1000, 1, 1]`), an OCR text recognizer (`[N, T, 6625]`), a voice-activity model
/// (`[batch, 1]`), and a segmentation-like output whose class count no rule can read
/// (`[N, 1, H, W]`). The shapes are as the issue reports them (from onnx's reading of those
/// files), not re-read here; `real_models.rs::issue11_the_class_dimension_rule_on_real_output_shapes`
/// takes them from model files in the onnx and rapidocr-onnxruntime packages, with their sources.
#[test]
fn issue11_the_class_dimension_rule_reads_real_output_shapes() {
    let float = signature(ONNX_FIXTURES[0].name, ONNX_FIXTURES[0].bytes);
    let fixed = |n: u64| Dim::Fixed(n);
    let named = |s: &str| Dim::Symbolic(s.into());
    let count = |shape: Vec<Dim>| {
        let mut sig = float.clone();
        sig.outputs[0].shape = Some(shape);
        sig.class_count(None, None).ok()
    };
    assert_eq!(count(vec![fixed(1), fixed(1000)]), Some(1000));
    assert_eq!(
        count(vec![fixed(1), fixed(1000), fixed(1), fixed(1)]),
        Some(1000)
    );
    assert_eq!(count(vec![named("N"), named("T"), fixed(6625)]), Some(6625));
    assert_eq!(count(vec![named("batch"), fixed(1)]), Some(1));
    assert_eq!(
        count(vec![named("N"), fixed(1), named("H"), named("W")]),
        None
    );
    // And the edges of the rule: two dimensions above 1 after the batch, or one not fixed.
    assert_eq!(count(vec![fixed(1), fixed(10), fixed(10), fixed(1)]), None);
    assert_eq!(count(vec![fixed(1), fixed(1000), named("X")]), None);
    // A label list of 1000 fits the older classifier's output; one label does not.
    let mut conv = float.clone();
    conv.outputs[0].shape = Some(vec![fixed(1), fixed(1000), fixed(1), fixed(1)]);
    conv.check_label_count(None, None, 1000)
        .expect("1000 labels for 1000 classes");
    assert!(conv.check_label_count(None, None, 1).is_err());
}

#[test]
fn the_size_report_counts_bytes_and_estimates_8bit() {
    let float = signature(ONNX_FIXTURES[0].name, ONNX_FIXTURES[0].bytes);
    let report = float.size_report();
    // 147 float32 parameters (reference: onnx 1.23.2 JSON) are 588 bytes; a quarter is 147.
    assert_eq!(report.total_bytes, 588);
    assert_eq!(report.float32_bytes, 588);
    assert_eq!(report.float32_as_8bit_bytes, 147);
    assert_eq!(report.estimated_8bit_total_bytes, 147);
    assert_eq!(
        report.to_string(),
        "float32: 588 bytes\ntotal: 588 bytes\nwith float32 weights as 8-bit (a quarter, common practice): about 147 bytes"
    );
    let eight = signature(ONNX_FIXTURES[1].name, ONNX_FIXTURES[1].bytes).size_report();
    assert_eq!(eight.total_bytes, 190);
    assert_eq!(eight.estimated_8bit_total_bytes, 138 + 13);
}

#[test]
fn public_types_cross_threads() {
    fn send_sync<T: Send + Sync>() {}
    send_sync::<ModelSignature>();
    send_sync::<CompatibilityPolicy>();
    send_sync::<ampoule_verify::model::SizeReport>();
}

// ---- Hostile ONNX files, built by a minimal protobuf writer (protobuf encoding guide). ----

fn varint(mut value: u64) -> Vec<u8> {
    let mut out = Vec::new();
    loop {
        let byte = (value & 0x7f) as u8;
        value >>= 7;
        if value == 0 {
            out.push(byte);
            return out;
        }
        out.push(byte | 0x80);
    }
}

fn field_varint(number: u64, value: u64) -> Vec<u8> {
    let mut out = varint(number << 3);
    out.extend(varint(value));
    out
}

fn field_len(number: u64, payload: &[u8]) -> Vec<u8> {
    let mut out = varint((number << 3) | 2);
    out.extend(varint(payload.len() as u64));
    out.extend_from_slice(payload);
    out
}

fn model_with_graph(graph: &[u8]) -> Vec<u8> {
    let mut model = field_varint(1, 8);
    model.extend(field_len(7, graph));
    model
}

fn tensor_value(name: &str, elem_type: u64, dims: &[u64]) -> Vec<u8> {
    let mut shape = Vec::new();
    for dim in dims {
        shape.extend(field_len(1, &field_varint(1, *dim)));
    }
    let mut tensor = field_varint(1, elem_type);
    tensor.extend(field_len(2, &shape));
    let mut value = field_len(1, name.as_bytes());
    value.extend(field_len(2, &field_len(1, &tensor)));
    value
}

fn initializer(name: &str, data_type: u64, dims: &[u64], raw: Option<usize>) -> Vec<u8> {
    let mut tensor = Vec::new();
    for dim in dims {
        tensor.extend(field_varint(1, *dim));
    }
    tensor.extend(field_varint(2, data_type));
    tensor.extend(field_len(8, name.as_bytes()));
    if let Some(raw) = raw {
        tensor.extend(field_len(9, &vec![0u8; raw]));
    }
    field_len(5, &tensor)
}

#[test]
fn hostile_onnx_length_past_end() {
    let mut file = vec![0x3a]; // field 7 (graph), wire type 2
    file.extend(varint(1000));
    file.extend([1, 2, 3]);
    assert_eq!(
        error_of("model.onnx", &file),
        "onnx: field 7 of model at byte 0 declares 1000 bytes, only 3 remain"
    );
}

#[test]
fn hostile_onnx_truncated_and_overlong_varints() {
    assert_eq!(
        error_of("model.onnx", &[0x08, 0x80]),
        "onnx: truncated varint at byte 1"
    );
    let mut overlong = vec![0x08];
    overlong.extend([0x80; 10]);
    overlong.push(0x01);
    assert_eq!(
        error_of("model.onnx", &overlong),
        "onnx: varint at byte 1 is longer than 10 bytes"
    );
    let mut overflow = vec![0x08];
    overflow.extend([0xff; 9]);
    overflow.push(0x02);
    assert_eq!(
        error_of("model.onnx", &overflow),
        "onnx: varint at byte 1 overflows 64 bits"
    );
    // A varint cut by the end of its enclosing message, not of the file.
    // Field 20 (not read, so skipped) as a varint whose continuation bit runs past the graph.
    let graph = [0xa0, 0x01, 0x80];
    let mut file = model_with_graph(&graph);
    file.extend(field_varint(1, 8));
    assert_eq!(
        error_of("model.onnx", &file),
        "onnx: truncated varint at byte 6"
    );
}

#[test]
fn hostile_onnx_wrong_wire_types_and_groups() {
    assert_eq!(
        error_of("model.onnx", &field_varint(7, 1)),
        "onnx: field 7 of model at byte 0 has wire type 0, expected 2"
    );
    // Field 5, wire type 3 (start group): skipping a group needs recursion, so it is refused.
    assert_eq!(
        error_of("model.onnx", &[0x2b, 0x2c]),
        "onnx: field 5 of model at byte 0 is a group (wire type 3), which onnx does not use"
    );
    assert_eq!(
        error_of("model.onnx", &[0x2e]),
        "onnx: field 5 of model at byte 0 has unknown wire type 6"
    );
    assert_eq!(
        error_of("model.onnx", &[0x00]),
        "onnx: field number 0 of model at byte 0 is out of range"
    );
    // A fixed64 field with 3 of its 8 bytes.
    assert_eq!(
        error_of("model.onnx", &[0x49, 1, 2, 3]),
        "onnx: field 9 of model at byte 0 needs 8 bytes, only 3 remain"
    );
}

#[test]
fn hostile_onnx_deeply_nested_types_cost_no_recursion() {
    // 100,000 levels of TypeProto.sequence_type.elem_type: the reader records "sequence" and
    // skips the rest by its length, without descending (a recursive decoder would need a
    // depth cap here to keep its stack).
    // Built inside out from prefixes only, so 100,000 levels cost linear time to build.
    let base = field_len(1, &field_varint(1, 1));
    let mut inner_len = base.len();
    let mut prefixes = Vec::new();
    for _ in 0..100_000 {
        let mut elem = vec![0x0a]; // Sequence.elem_type (field 1), length-delimited
        elem.extend(varint(inner_len as u64));
        let mut level = vec![0x22]; // TypeProto.sequence_type (field 4), length-delimited
        level.extend(varint((elem.len() + inner_len) as u64));
        inner_len += level.len() + elem.len();
        level.extend(elem);
        prefixes.push(level);
    }
    let mut ty: Vec<u8> = prefixes.into_iter().rev().flatten().collect();
    ty.extend(base);
    assert_eq!(ty.len(), inner_len);
    let mut value = field_len(1, b"tracks");
    value.extend(field_len(2, &ty));
    let graph = field_len(12, &value);
    let sig = signature("model.onnx", &model_with_graph(&graph));
    assert_eq!(sig.outputs[0].kind, ValueKind::Sequence);
    assert_eq!(sig.outputs[0].dtype, None);
    assert_eq!(sig.outputs[0].shape, None);
    let policy = CompatibilityPolicy::builder()
        .output(TensorSpec::new("tracks"))
        .build()
        .expect("policy");
    assert_eq!(
        refusal(&policy, Some(&sig), &labels(7)),
        "output 'tracks' is a sequence, the app expects a tensor"
    );
}

#[test]
fn hostile_onnx_huge_declared_dims() {
    let graph = initializer("w", 1, &[1 << 32, 1 << 32], None);
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: initializer 'w' has shape [4294967296, 4294967296] whose element count overflows 64 bits"
    );
    let graph = initializer("w", 15, &[1 << 62], None);
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: initializer 'w' has shape [4611686018427387904] whose size in bytes overflows 64 bits"
    );
    // Four uint8 initializers of 2^62 elements each (2^64 parameters in total) holding no
    // data: under reading rules 2 the first is refused for claiming more than it holds (issue
    // 11 item 4), before any total can overflow.
    let mut graph = initializer("a", 2, &[1 << 62], None);
    graph.extend(initializer("b", 2, &[1 << 62], None));
    graph.extend(initializer("c", 2, &[1 << 62], None));
    graph.extend(initializer("d", 2, &[1 << 62], None));
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: initializer 'a' has shape [4611686018427387904] (4611686018427387904 elements of uint8), but it holds only 0 bytes of data"
    );
    let graph = initializer("w", 1, &[u64::MAX], None);
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: initializer 'w' has a negative dimension in its shape [-1]"
    );
    let graph = initializer("w", 1, &[3, 4], Some(100));
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: initializer 'w' has 100 bytes of raw data, its shape [3, 4] of float32 needs 48"
    );
    let graph = initializer("w", 99, &[3], None);
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: initializer 'w' has unknown element type 99"
    );
    let dims = vec![1u64; 65];
    let graph = initializer("w", 1, &dims, None);
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: the initializer at byte 5 has more than 64 dimensions"
    );
    let graph = field_len(11, &tensor_value("image", 1, &[1; 17]));
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: the graph input at byte 4 has more than 16 dimensions"
    );
    let graph = field_len(11, &tensor_value("image", 1, &[u64::MAX - 1]));
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: input 'image' has a negative dimension -2"
    );
}

#[test]
fn hostile_onnx_counts_names_and_external_data() {
    let mut graph = Vec::new();
    for i in 0..33 {
        graph.extend(field_len(12, &tensor_value(&format!("out{i}"), 1, &[1])));
    }
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: the graph has more than 32 outputs"
    );
    let long = "x".repeat(257);
    let graph = field_len(11, &tensor_value(&long, 1, &[1]));
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: input name at byte 8 is 257 bytes long, over the cap of 256"
    );
    let mut value = field_len(1, b"im\xffage");
    value.extend(field_len(2, &field_len(1, &field_varint(1, 1))));
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&field_len(11, &value))),
        "onnx: input name at byte 6 is not utf-8"
    );
    let mut graph = field_len(11, &tensor_value("image", 1, &[1]));
    graph.extend(field_len(11, &tensor_value("image", 1, &[1])));
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: the graph has two inputs named 'image'"
    );
    let mut graph = initializer("w", 1, &[1], Some(4));
    graph.extend(initializer("w", 1, &[1], Some(4)));
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&graph)),
        "onnx: the graph has two initializers named 'w'"
    );
    let mut tensor = field_varint(1, 4);
    tensor.extend(field_varint(2, 1));
    tensor.extend(field_len(8, b"conv.weight"));
    tensor.extend(field_varint(14, 1));
    assert_eq!(
        error_of("model.onnx", &model_with_graph(&field_len(5, &tensor))),
        "onnx: initializer 'conv.weight' keeps its data in an external file, which a bundle cannot carry"
    );
    let mut twice = model_with_graph(&[]);
    twice.extend(field_len(7, &[]));
    assert_eq!(
        error_of("model.onnx", &twice),
        "onnx: the model has a second graph at byte 4"
    );
    assert_eq!(error_of("model.onnx", &[]), "onnx: the model has no graph");
    assert_eq!(
        error_of("model.onnx", &field_varint(1, 8)),
        "onnx: the model has no graph"
    );
}

#[test]
fn hostile_onnx_file_shorter_than_declared() {
    let file = model_with_graph(&initializer("w", 1, &[4], Some(16)));
    let e = read_model_signature("model.onnx", file.as_slice(), file.len() as u64 + 100)
        .expect_err("short");
    assert_eq!(
        e.to_string(),
        format!(
            "onnx: the file is shorter than its declared length of {} bytes",
            file.len() + 100
        )
    );
    // The seeking reader skips raw data without reading it; the end must still be there.
    let cut = &file[..file.len() - 8];
    let e = read_model_signature_seekable("model.onnx", Cursor::new(cut), file.len() as u64)
        .expect_err("short");
    assert_eq!(
        e.to_string(),
        format!(
            "onnx: the file is shorter than its declared length of {} bytes",
            file.len()
        )
    );
}

/// A file of `head`, then `zeros` zero bytes that exist only as a count, then `tail`: it lets a
/// test hand the reader a 64 GiB model without 64 GiB anywhere.
struct Virtual {
    head: Vec<u8>,
    zeros: u64,
    tail: Vec<u8>,
    pos: u64,
}

impl Virtual {
    fn len(&self) -> u64 {
        self.head.len() as u64 + self.zeros + self.tail.len() as u64
    }
}

impl Read for Virtual {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let head = self.head.len() as u64;
        let n = if self.pos < head {
            let part = &self.head[self.pos as usize..];
            let n = part.len().min(buf.len());
            buf[..n].copy_from_slice(&part[..n]);
            n
        } else if self.pos < head + self.zeros {
            let n = (head + self.zeros - self.pos).min(buf.len() as u64) as usize;
            buf[..n].fill(0);
            n
        } else {
            let at = (self.pos - head - self.zeros) as usize;
            let part = self.tail.get(at..).unwrap_or(&[]);
            let n = part.len().min(buf.len());
            buf[..n].copy_from_slice(&part[..n]);
            n
        };
        self.pos += n as u64;
        Ok(n)
    }
}

impl Seek for Virtual {
    fn seek(&mut self, to: SeekFrom) -> io::Result<u64> {
        self.pos = match to {
            SeekFrom::Start(at) => at,
            SeekFrom::End(delta) => self.len().checked_add_signed(delta).expect("in range"),
            SeekFrom::Current(delta) => self.pos.checked_add_signed(delta).expect("in range"),
        };
        Ok(self.pos)
    }
}

#[test]
fn a_64_gib_initializer_is_skipped_not_read() {
    const RAW: u64 = 64 << 30;
    let mut tensor = field_varint(1, RAW / 4);
    tensor.extend(field_varint(2, 1));
    tensor.extend(field_len(8, b"huge.weight"));
    tensor.extend(varint((9 << 3) | 2));
    tensor.extend(varint(RAW));
    let tensor_len = tensor.len() as u64 + RAW;
    let output = field_len(12, &tensor_value("species", 1, &[1, 7]));
    let mut graph = varint((5 << 3) | 2);
    graph.extend(varint(tensor_len));
    let graph_len = graph.len() as u64 + tensor_len + output.len() as u64;
    let mut head = field_varint(1, 8);
    head.extend(varint((7 << 3) | 2));
    head.extend(varint(graph_len));
    head.extend(graph);
    head.extend(tensor);
    let file = Virtual {
        head,
        zeros: RAW,
        tail: output,
        pos: 0,
    };
    let len = file.len();
    let sig = read_model_signature_seekable("model.onnx", file, len)
        .expect("read")
        .expect("signature");
    assert_eq!(sig.parameters, RAW / 4);
    assert_eq!(sig.bytes_by_dtype.get(DType::Float32), RAW);
    assert_eq!(sig.outputs[0].name, "species");
    assert_eq!(sig.class_count(None, None).expect("classes"), 7);
}

// ---- Hostile safetensors files (format: u64 LE header length, JSON header, data). ----

fn safetensors(header: &str, data_len: usize) -> Vec<u8> {
    let mut file = (header.len() as u64).to_le_bytes().to_vec();
    file.extend_from_slice(header.as_bytes());
    file.extend(vec![0u8; data_len]);
    file
}

const ST: &str = "weights.safetensors";

#[test]
fn hostile_safetensors_header_lengths() {
    assert_eq!(
        error_of(ST, &[1, 2, 3, 4, 5]),
        "safetensors: the file is 5 bytes, shorter than the 8-byte header length"
    );
    let mut file = 1000u64.to_le_bytes().to_vec();
    file.extend([b' '; 20]);
    assert_eq!(
        error_of(ST, &file),
        "safetensors: header length 1000 is larger than the 20 bytes after it"
    );
    let file = u64::MAX.to_le_bytes();
    assert_eq!(
        error_of(ST, &file),
        "safetensors: header length 18446744073709551615 is over the cap of 100000000 bytes"
    );
    // A stream shorter than the length it is said to have.
    let file = safetensors("{}", 0);
    let e = read_model_signature(ST, &file[..6], 10).expect_err("short");
    assert_eq!(
        e.to_string(),
        "safetensors: the file is shorter than its declared length of 10 bytes"
    );
    let e = read_model_signature(ST, &file[..9], 10).expect_err("short");
    assert_eq!(
        e.to_string(),
        "safetensors: the file is shorter than its declared length of 10 bytes"
    );
}

#[test]
fn hostile_safetensors_offsets() {
    let overlapping = r#"{"a":{"dtype":"F32","shape":[12],"data_offsets":[0,48]},"b":{"dtype":"F32","shape":[12],"data_offsets":[40,88]}}"#;
    assert_eq!(
        error_of(ST, &safetensors(overlapping, 88)),
        "safetensors: tensor 'b' (data offsets [40, 88]) overlaps tensor 'a' (data offsets [0, 48])"
    );
    let gap = r#"{"a":{"dtype":"F32","shape":[12],"data_offsets":[0,48]},"b":{"dtype":"F32","shape":[1],"data_offsets":[52,56]}}"#;
    assert_eq!(
        error_of(ST, &safetensors(gap, 56)),
        "safetensors: bytes 48 to 52 of the data region belong to no tensor"
    );
    let trailing = r#"{"a":{"dtype":"F32","shape":[12],"data_offsets":[0,48]}}"#;
    assert_eq!(
        error_of(ST, &safetensors(trailing, 60)),
        "safetensors: bytes 48 to 60 of the data region belong to no tensor"
    );
    let out_of_range = r#"{"a":{"dtype":"F32","shape":[250],"data_offsets":[0,1000]}}"#;
    assert_eq!(
        error_of(ST, &safetensors(out_of_range, 400)),
        "safetensors: tensor 'a' has data offsets [0, 1000], past the end of the 400-byte data region"
    );
    let backwards = r#"{"a":{"dtype":"F32","shape":[0],"data_offsets":[10,4]}}"#;
    assert_eq!(
        error_of(ST, &safetensors(backwards, 10)),
        "safetensors: tensor 'a' has data offsets [10, 4], which end before they begin"
    );
    let wrong_size = r#"{"fc.weight":{"dtype":"F32","shape":[7,8],"data_offsets":[0,200]}}"#;
    assert_eq!(
        error_of(ST, &safetensors(wrong_size, 200)),
        "safetensors: tensor 'fc.weight' has shape [7, 8] of F32 (224 bytes), but its data offsets [0, 200] hold 200 bytes"
    );
    let overflow = r#"{"a":{"dtype":"F32","shape":[4294967296,4294967296],"data_offsets":[0,0]}}"#;
    assert_eq!(
        error_of(ST, &safetensors(overflow, 0)),
        "safetensors: tensor 'a' has shape [4294967296, 4294967296] whose element count overflows 64 bits"
    );
    let huge_bytes = r#"{"a":{"dtype":"F64","shape":[4611686018427387904],"data_offsets":[0,0]}}"#;
    assert_eq!(
        error_of(ST, &safetensors(huge_bytes, 0)),
        "safetensors: tensor 'a' has shape [4611686018427387904] of F64 (36893488147419103232 bytes), but its data offsets [0, 0] hold 0 bytes"
    );
    let half_byte = r#"{"a":{"dtype":"F4","shape":[3],"data_offsets":[0,2]}}"#;
    assert_eq!(
        error_of(ST, &safetensors(half_byte, 2)),
        "safetensors: tensor 'a' has shape [3] of F4, which does not fill whole bytes"
    );
    // Empty tensors and an empty file are valid (reference: safetensors 0.8.0 accepts both).
    let empty = r#"{"a":{"dtype":"F32","shape":[0],"data_offsets":[0,0]},"b":{"dtype":"U8","shape":[2],"data_offsets":[0,2]}}"#;
    let sig = signature(ST, &safetensors(empty, 2));
    assert_eq!((sig.weight_tensors, sig.parameters), (2, 2));
    let sig = signature(ST, &safetensors("{}", 0));
    assert_eq!(
        (sig.weight_tensors, sig.parameters, sig.weights_8bit),
        (0, 0, false)
    );
}

/// The two FNUZ float8 types, named as safetensors 0.8.0 writes and reads them: the names are
/// taken from that PyPI wheel's own library (`F8_E4M3FNUZ`, `F8_E5M2FNUZ`, beside
/// `F8_E4M3` and `F8_E5M2`), and the ONNX codes 18 and 20 from onnx.proto's DataType.
#[test]
fn issue11_safetensors_fnuz_float8_tensors_are_read() {
    let header = r#"{"a":{"dtype":"F8_E4M3FNUZ","shape":[2,3],"data_offsets":[0,6]},"b":{"dtype":"F8_E5M2FNUZ","shape":[4],"data_offsets":[6,10]}}"#;
    let sig = signature(ST, &safetensors(header, 10));
    assert_eq!((sig.weight_tensors, sig.parameters), (2, 10));
    assert!(sig.weights_8bit, "one-byte floats are 8-bit weights");
}

#[test]
fn hostile_safetensors_headers() {
    let twice = r#"{"w":{"dtype":"U8","shape":[1],"data_offsets":[0,1]},"w":{"dtype":"U8","shape":[1],"data_offsets":[1,2]}}"#;
    assert_eq!(
        error_of(ST, &safetensors(twice, 2)),
        "safetensors: header is not valid: tensor 'w' appears twice at line 1 column 56"
    );
    let metadata_twice = r#"{"__metadata__":{"site":"north ridge","site":"south"}}"#;
    assert_eq!(
        error_of(ST, &safetensors(metadata_twice, 0)),
        "safetensors: header is not valid: metadata key 'site' appears twice at line 1 column 44"
    );
    let metadata_number = r#"{"__metadata__":{"cameras":12}}"#;
    assert_eq!(
        error_of(ST, &safetensors(metadata_number, 0)),
        "safetensors: header is not valid: invalid type: integer `12`, expected a string at line 1 column 29"
    );
    let unknown_dtype = r#"{"w":{"dtype":"F128","shape":[1],"data_offsets":[0,16]}}"#;
    assert_eq!(
        error_of(ST, &safetensors(unknown_dtype, 16)),
        "safetensors: tensor 'w' has unknown dtype 'F128'"
    );
    let unknown_field = r#"{"w":{"dtype":"U8","shape":[1],"data_offsets":[0,1],"offset":0}}"#;
    assert!(
        error_of(ST, &safetensors(unknown_field, 1))
            .starts_with("safetensors: header is not valid: unknown field `offset`"),
    );
    let deep_shape = format!(
        r#"{{"w":{{"dtype":"U8","shape":[{}],"data_offsets":[0,1]}}}}"#,
        vec!["1"; 65].join(",")
    );
    assert_eq!(
        error_of(ST, &safetensors(&deep_shape, 1)),
        "safetensors: header is not valid: a shape has more than 64 dimensions at line 1 column 158"
    );
    let negative = r#"{"w":{"dtype":"U8","shape":[-1],"data_offsets":[0,1]}}"#;
    assert!(
        error_of(ST, &safetensors(negative, 1))
            .starts_with("safetensors: header is not valid: invalid value: integer `-1`"),
    );
    let mut not_utf8 = safetensors("{\"?\":1}", 0);
    not_utf8[10] = 0xff;
    assert_eq!(
        error_of(ST, &not_utf8),
        "safetensors: header is not utf-8 (at byte 2)"
    );
    assert_eq!(
        error_of(ST, &safetensors(" {}", 0)),
        "safetensors: header does not begin with '{'"
    );
    assert!(
        error_of(ST, &safetensors("{} x", 0))
            .starts_with("safetensors: header is not valid: trailing characters"),
    );
    // Trailing spaces pad the header to an alignment; the reference library writes them.
    let sig = signature(ST, &safetensors("{}        ", 0));
    assert_eq!(sig.weight_tensors, 0);
}

// ---- Issue 11 item 4: weights in Constant nodes and subgraphs, each read bounded. ----

/// A node (GraphProto field 1) of `op_type` with these attributes.
fn node(op_type: &str, attributes: &[Vec<u8>]) -> Vec<u8> {
    let mut node = field_len(4, op_type.as_bytes());
    for attribute in attributes {
        node.extend(field_len(5, attribute));
    }
    field_len(1, &node)
}

/// A tensor attribute (AttributeProto: name 1, t 5) holding `tensor`, a TensorProto's bytes.
fn tensor_attribute(name: &str, tensor: &[u8]) -> Vec<u8> {
    let mut attribute = field_len(1, name.as_bytes());
    attribute.extend(field_len(5, tensor));
    attribute
}

/// A graph attribute (AttributeProto: name 1, g 6) holding a graph's bytes.
fn graph_attribute(name: &str, graph: &[u8]) -> Vec<u8> {
    let mut attribute = field_len(1, name.as_bytes());
    attribute.extend(field_len(6, graph));
    attribute
}

/// A TensorProto's bytes: dims, data type, then `data` as raw_data (field 9) when given.
fn tensor(data_type: u64, dims: &[u64], raw: Option<&[u8]>) -> Vec<u8> {
    let mut tensor = Vec::new();
    for dim in dims {
        tensor.extend(field_varint(1, *dim));
    }
    tensor.extend(field_varint(2, data_type));
    if let Some(raw) = raw {
        tensor.extend(field_len(9, raw));
    }
    tensor
}

fn with_output(mut graph: Vec<u8>) -> Vec<u8> {
    graph.extend(field_len(12, &tensor_value("species", 1, &[1, 7])));
    model_with_graph(&graph)
}

#[test]
fn issue11_constant_and_subgraph_weights_are_counted() {
    // A Constant of 3 x 4 float32 (raw data), a ConstantOfShape whose `value` attribute is its
    // fill value (not a weight), and an If whose branch holds a Constant and an initializer.
    let mut graph = node(
        "Constant",
        &[tensor_attribute(
            "value",
            &tensor(1, &[3, 4], Some(&[0; 48])),
        )],
    );
    graph.extend(node(
        "ConstantOfShape",
        &[tensor_attribute("value", &tensor(1, &[1], Some(&[0; 4])))],
    ));
    let mut branch = node(
        "Constant",
        &[tensor_attribute("value", &tensor(3, &[5], Some(&[0; 5])))],
    );
    branch.extend(initializer("w", 1, &[2], Some(8)));
    graph.extend(node("If", &[graph_attribute("then_branch", &branch)]));
    let sig = signature("model.onnx", &with_output(graph));
    assert_eq!((sig.weight_tensors, sig.parameters), (3, 12 + 5 + 2));
    assert_eq!(sig.bytes_by_dtype.get(DType::Float32), 48 + 8);
    assert_eq!(sig.bytes_by_dtype.get(DType::Int8), 5);
    // Typed data (float_data, packed) holding exactly the elements is consistent too.
    let mut typed = tensor(1, &[3], None);
    typed.extend(field_len(4, &[0; 12]));
    let graph = node("Constant", &[tensor_attribute("value", &typed)]);
    assert_eq!(signature("model.onnx", &with_output(graph)).parameters, 3);
}

#[test]
fn hostile_onnx_constants_past_their_bytes_or_u64_are_refused() {
    let constant = |t: Vec<u8>| with_output(node("Constant", &[tensor_attribute("value", &t)]));
    assert_eq!(
        error_of(
            "model.onnx",
            &constant(tensor(1, &[1 << 32, 1 << 32], None))
        ),
        "onnx: attribute tensor at byte 25 has shape [4294967296, 4294967296] whose element count overflows 64 bits"
    );
    // 2^40 float32 elements claimed, 12 bytes of float_data held.
    let mut typed = tensor(1, &[1 << 40], None);
    typed.extend(field_len(4, &[0; 12]));
    assert_eq!(
        error_of("model.onnx", &constant(typed)),
        "onnx: attribute tensor at byte 25 has shape [1099511627776] (1099511627776 elements of float32), but it holds only 12 bytes of data"
    );
    assert_eq!(
        error_of("model.onnx", &constant(tensor(1, &[4], Some(&[0; 12])))),
        "onnx: attribute tensor at byte 25 has 12 bytes of raw data, its shape [4] of float32 needs 16"
    );
    // External data in a Constant (data_location 1 = EXTERNAL) is refused, as at the top.
    let mut external = tensor(1, &[4], None);
    external.extend(field_varint(14, 1));
    assert_eq!(
        error_of("model.onnx", &constant(external)),
        "onnx: attribute tensor at byte 25 keeps its data in an external file, which a bundle cannot carry"
    );
    // A Constant with two `value` tensors.
    let twice = with_output(node(
        "Constant",
        &[
            tensor_attribute("value", &tensor(1, &[1], Some(&[0; 4]))),
            tensor_attribute("value", &tensor(1, &[1], Some(&[0; 4]))),
        ],
    ));
    assert_eq!(
        error_of("model.onnx", &twice),
        "onnx: the node ending at byte 58 has two attributes named 'value'"
    );
}

#[test]
fn hostile_onnx_subgraphs_nested_too_deep_or_with_external_data_are_refused() {
    // Subgraphs nested `depth` deep, each an If's then_branch, the innermost holding one
    // Constant of one float32.
    let nested = |depth: usize| {
        let mut graph = node(
            "Constant",
            &[tensor_attribute("value", &tensor(1, &[1], Some(&[0; 4])))],
        );
        for _ in 0..depth {
            graph = node("If", &[graph_attribute("then_branch", &graph)]);
        }
        with_output(graph)
    };
    // The limit itself reads: 16 levels below the main graph.
    assert_eq!(signature("model.onnx", &nested(16)).parameters, 1);
    assert_eq!(
        error_of("model.onnx", &nested(17)),
        "onnx: subgraphs are nested more than 16 deep"
    );
    // An initializer with external data inside a subgraph.
    let mut inner = tensor(1, &[4], None);
    inner.extend(field_len(8, b"w"));
    inner.extend(field_varint(14, 1));
    let branch = field_len(5, &inner);
    let graph = with_output(node("If", &[graph_attribute("else_branch", &branch)]));
    assert_eq!(
        error_of("model.onnx", &graph),
        "onnx: initializer 'w' keeps its data in an external file, which a bundle cannot carry"
    );
}

#[test]
fn issue11_a_dimension_of_minus_one_is_unknown_and_other_negatives_stay_errors() {
    // onnx's checker and onnxruntime accept -1 ("unknown"; real files: the OCR classifier in
    // tests/data/real-models/); -2 means nothing and is refused.
    let output = |dim: u64| model_with_graph(&field_len(12, &tensor_value("scores", 1, &[dim, 2])));
    let sig = signature("model.onnx", &output(u64::MAX));
    assert_eq!(
        sig.outputs[0].shape,
        Some(vec![Dim::Unknown, Dim::Fixed(2)])
    );
    assert_eq!(sig.class_count(None, None).expect("the last dimension"), 2);
    assert_eq!(
        error_of("model.onnx", &output(u64::MAX - 1)),
        "onnx: output 'scores' has a negative dimension -2"
    );
}

#[test]
fn a_64_gib_constant_is_measured_not_read() {
    // Issue 11 item 4: a large but consistent Constant is counted without being read into
    // memory; the Virtual file is 64 GiB of zeros that exist only as a count.
    const RAW: u64 = 64 << 30;
    let mut t = field_varint(1, RAW / 4);
    t.extend(field_varint(2, 1));
    t.extend(varint((9 << 3) | 2));
    t.extend(varint(RAW));
    let t_len = t.len() as u64 + RAW;
    let mut attribute = field_len(1, b"value");
    attribute.extend(varint((5 << 3) | 2));
    attribute.extend(varint(t_len));
    let attribute_len = attribute.len() as u64 + t_len;
    let mut node = field_len(4, b"Constant");
    node.extend(varint((5 << 3) | 2));
    node.extend(varint(attribute_len));
    let node_len = node.len() as u64 + attribute_len;
    let output = field_len(12, &tensor_value("species", 1, &[1, 7]));
    let mut graph = varint((1 << 3) | 2);
    graph.extend(varint(node_len));
    let graph_len = graph.len() as u64 + node_len + output.len() as u64;
    let mut head = field_varint(1, 8);
    head.extend(varint((7 << 3) | 2));
    head.extend(varint(graph_len));
    head.extend(graph);
    head.extend(node);
    head.extend(attribute);
    head.extend(t);
    let file = Virtual {
        head,
        zeros: RAW,
        tail: output,
        pos: 0,
    };
    let len = file.len();
    let sig = read_model_signature_seekable("model.onnx", file, len)
        .expect("read")
        .expect("signature");
    assert_eq!((sig.weight_tensors, sig.parameters), (1, RAW / 4));
    assert_eq!(sig.bytes_by_dtype.get(DType::Float32), RAW);
}
