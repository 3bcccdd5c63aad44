//! The app's policy document (issue 14): each setting refuses a bundle that `verify --policy`
//! would otherwise accept, and hostile documents (not JSON, over a cap, a key twice, a key the
//! schema does not name, a wrong type) are refused naming the field, by the library and by
//! the CLI alike. The bundle is the fixture of `tests/common`: an invented ONNX classifier
//! (`image` float32 [N, 3, 8, 8] in, `species` float32 [N, 6] out, opset 13, float weights)
//! with six labels and no metadata.

mod common;

use ampoule_verify::model::PolicyDocument;
use common::{APP_VERSION, Env, PUBLIC};

/// `ampoule verify bundle --policy policy.json` with `document`, and its exit code and stderr.
fn verify_with(env: &Env, document: &str) -> (i32, String) {
    env.write("policy.json", document.as_bytes());
    let run = env.run([
        "verify",
        "species.ampoule",
        "--trust",
        PUBLIC,
        "--app-version",
        APP_VERSION,
        "--policy",
        "policy.json",
    ]);
    (run.code, run.stderr)
}

/// A document of format 1 with `members` (JSON object members, without the braces).
fn document(members: &str) -> String {
    format!(r#"{{"policy_format": 1, {members}}}"#)
}

#[test]
fn issue14_each_policy_setting_refuses_a_bundle_through_the_document() {
    let env = Env::new();
    env.pack("1.0.0", "species.ampoule");
    // The whole policy the fixture fits, every setting stated: accepted.
    let fits = document(
        r#""about": "the fixture's own policy", "bundle_name": "trailcam-species",
        "max_bundle_bytes": 10000000, "max_unpacked_bytes": 10000000,
        "model": {"format": "onnx", "max_opset": 13, "weights_8bit": false,
          "inputs": [{"name": "image", "dtype": "float32", "shape": "[*, 3, 8, 8]"}],
          "outputs": [{"name": "species", "dtype": "float32", "shape": "[*, 6]"}],
          "classifier_output": "species", "class_dim": 1},
        "labels": {"min_count": 6, "max_count": 6, "required": ["empty frame", "fox"]}"#,
    );
    assert_eq!(verify_with(&env, &fits).0, 0, "the fitting policy");
    let cases = [
        (
            r#""bundle_name": "trailcam-birds""#,
            "bundle is named 'trailcam-species' but this app accepts only 'trailcam-birds'",
        ),
        (r#""max_bundle_bytes": 1000"#, ""),
        (r#""max_unpacked_bytes": 1000"#, ""),
        (
            r#""model": {"format": "safetensors"}"#,
            "the model is onnx, the app expects safetensors",
        ),
        (
            r#""model": {"max_opset": 12}"#,
            "the model needs onnx opset 13, the app supports at most 12",
        ),
        (
            r#""model": {"weights_8bit": true}"#,
            "the model's weights are not 8-bit, the app expects 8-bit weights",
        ),
        (
            r#""model": {"inputs": [{"name": "frame"}]}"#,
            "the model has no input 'frame' (its inputs: 'image')",
        ),
        (
            r#""model": {"inputs": [{"name": "image", "dtype": "uint8"}]}"#,
            "input 'image' has dtype float32, the app expects uint8",
        ),
        (
            r#""model": {"inputs": [{"name": "image", "shape": "[*, 3, 96, 96]"}]}"#,
            "input 'image' has shape [N, 3, 8, 8], the app expects [*, 3, 96, 96]: \
             dimension 2 is 8, not 96",
        ),
        (
            r#""model": {"outputs": [{"name": "scores"}]}"#,
            "the model has no output 'scores' (its outputs: 'species')",
        ),
        (
            r#""model": {"outputs": [{"name": "species", "dtype": "float16"}]}"#,
            "output 'species' has dtype float32, the app expects float16",
        ),
        (
            r#""model": {"outputs": [{"name": "species", "shape": "[*, 7]"}]}"#,
            "output 'species' has shape [N, 6], the app expects [*, 7]: dimension 1 is 6, not 7",
        ),
        (r#""model": {"classifier_output": "image"}"#, ""),
        (
            r#""model": {"classifier_output": "species", "class_dim": 0}"#,
            "",
        ),
        (
            r#""labels": {"min_count": 7}"#,
            "the label list has 6 labels, the app accepts 7 to 100000",
        ),
        (
            r#""labels": {"max_count": 5}"#,
            "the label list has 6 labels, the app accepts 0 to 5",
        ),
        (
            r#""labels": {"required": ["wolf"]}"#,
            "the label list lacks 'wolf', which the app requires",
        ),
        (
            r#""metadata": {"preprocess.colour_order": "rgb"}"#,
            "the bundle's metadata has no preprocess.colour_order, the app requires \
             preprocess.colour_order = \"rgb\"",
        ),
    ];
    for (members, message) in cases {
        let (code, stderr) = verify_with(&env, &document(members));
        assert_eq!(code, 1, "{members}: {stderr}");
        if !message.is_empty() {
            assert_eq!(stderr, format!("ampoule: error: {message}\n"), "{members}");
        }
    }
}

/// Hostile documents and the refusal each must get, from the library's reader.
pub const HOSTILE: &[(&str, &str)] = &[
    (
        "",
        "policy document: not valid: EOF while parsing a value at line 1 column 0",
    ),
    ("[1]", "policy document: it is an array, not an object"),
    (
        r#"{"policy_format": 1,}"#,
        "policy document: not valid: trailing comma at line 1 column 21",
    ),
    (
        r#"{"policy_format": 1} {}"#,
        "policy document: not valid: trailing characters at line 1 column 22",
    ),
    (
        r#"{"bundle_name": "a"}"#,
        "policy document: it has no policy_format; write \"policy_format\": 1",
    ),
    (
        r#"{"policy_format": 2}"#,
        "policy document: policy_format: 2 is not supported (this reader knows 1)",
    ),
    (
        r#"{"policy_format": 1, "policy_format": 1}"#,
        "policy document: not valid: key 'policy_format' appears twice at line 1 column 36",
    ),
    (
        r#"{"policy_format": 1, "model": {"inputs": [{"name": "a", "name": "b"}]}}"#,
        "policy document: not valid: key 'model.inputs[0].name' appears twice at line 1 column 62",
    ),
    (
        r#"{"policy_format": 1, "metadata": {"notes": "a", "notes": "b"}}"#,
        "policy document: not valid: key 'metadata.notes' appears twice at line 1 column 55",
    ),
    (
        r#"{"policy_format": 1, "modle": {}}"#,
        "policy document: unknown key 'modle' (the keys here are policy_format, about, \
         bundle_name, max_bundle_bytes, max_unpacked_bytes, model, labels, metadata)",
    ),
    (
        r#"{"policy_format": 1, "model": {"imputs": []}}"#,
        "policy document: model: unknown key 'imputs' (the keys here are format, max_opset, \
         weights_8bit, inputs, outputs, classifier_output, class_dim)",
    ),
    (
        r#"{"policy_format": 1, "model": {"inputs": [{"name": "image", "dtype": "float33"}]}}"#,
        "policy document: model.inputs[0].dtype: 'float33' is not a tensor element type; use \
         a name such as float32, float16, int8 or uint8",
    ),
    (
        r#"{"policy_format": 1, "model": {"inputs": [{"name": "image", "shape": "[a, 3]"}]}}"#,
        "policy document: model.inputs[0].shape: shape pattern '[a, 3]' has a dimension 'a' \
         that is neither '*' nor a whole number",
    ),
    (
        r#"{"policy_format": 1, "model": {"outputs": [{"dtype": "float32"}]}}"#,
        "policy document: model.outputs[0]: it has no name",
    ),
    (
        r#"{"policy_format": 1, "model": {"format": "tflite"}}"#,
        "policy document: model.format: 'tflite' is not a model format: use onnx or safetensors",
    ),
    (
        r#"{"policy_format": 1, "model": {"max_opset": -1}}"#,
        "policy document: model.max_opset: it is the number -1, not a whole number from 0",
    ),
    (
        r#"{"policy_format": 1, "model": {"class_dim": 4294967296}}"#,
        "policy document: model.class_dim: 4294967296 is too large",
    ),
    (
        r#"{"policy_format": 1, "model": {"weights_8bit": "yes"}}"#,
        "policy document: model.weights_8bit: it is the string 'yes', not true or false",
    ),
    (
        r#"{"policy_format": 1, "max_bundle_bytes": 0}"#,
        "policy document: max_bundle_bytes: it is the number 0, not a whole number from 1",
    ),
    (
        r#"{"policy_format": 1, "max_unpacked_bytes": 1.5}"#,
        "policy document: max_unpacked_bytes: it is the number 1.5, not a whole number from 1",
    ),
    (
        r#"{"policy_format": 1, "bundle_name": "Trail Camera"}"#,
        "policy document: bundle_name: bundle name 'Trail Camera' is not allowed: use 1 to 64 \
         lowercase letters, digits, '-', '_' or '.', starting with a letter or digit",
    ),
    (
        r#"{"policy_format": 1, "labels": {"min_count": 9, "max_count": 3}}"#,
        "policy document: the policy's label count range 9 to 3 is empty",
    ),
    (
        r#"{"policy_format": 1, "labels": {"max_count": 100001}}"#,
        "policy document: labels.max_count: 100001 is more labels than a bundle can hold \
         (100000)",
    ),
    (
        r#"{"policy_format": 1, "labels": {"required": ["fox", 3]}}"#,
        "policy document: labels.required[1]: it is the number 3, not a string",
    ),
    (
        r#"{"policy_format": 1, "metadata": {"Colour": "rgb"}}"#,
        "policy document: the policy's required metadata key 'Colour' is not allowed: each \
         dot-separated segment must be 1 to 64 bytes of a-z, 0-9 and _",
    ),
    (
        r#"{"policy_format": 1, "metadata": {"notes": null}}"#,
        "policy document: the policy requires metadata key 'notes' to be null, which no bundle \
         holds",
    ),
    (
        r#"{"policy_format": 1, "model": {"inputs": [{"name": "a"}, {"name": "a"}]}}"#,
        "policy document: the policy states input 'a' twice",
    ),
];

#[test]
fn issue14_hostile_policy_documents_are_refused_naming_the_field() {
    let mut wrong = Vec::new();
    for (text, message) in HOSTILE {
        let err = PolicyDocument::parse(text.as_bytes()).expect_err(text);
        assert_eq!(err.kind(), ampoule_verify::ErrorKind::Settings, "{text}");
        if err.to_string() != *message {
            wrong.push(format!("{text}\n  gave: {err}\n  want: {message}"));
        }
    }
    assert!(wrong.is_empty(), "{}", wrong.join("\n"));
}

/// Documents over each cap: built here, refused by the cap's name.
pub fn over_caps() -> Vec<(String, String)> {
    let long = "x".repeat(1025);
    let deep = format!(
        r#"{{"policy_format": 1, "metadata": {{"notes": {}1{}}}}}"#,
        "[".repeat(7),
        "]".repeat(7)
    );
    let many: Vec<String> = (0..1025).map(|i| i.to_string()).collect();
    let tensors: Vec<String> = (0..65).map(|i| format!(r#"{{"name": "t{i}"}}"#)).collect();
    let keys: Vec<String> = (0..65).map(|i| format!(r#""k{i}": 1"#)).collect();
    vec![
        (
            format!(
                r#"{{"policy_format": 1, "about": "{}"}}"#,
                "x".repeat(70_000)
            ),
            "policy document: it is 70033 bytes, over the limit of 65536 bytes".into(),
        ),
        (
            format!(r#"{{"policy_format": 1, "about": "{long}"}}"#),
            "policy document: not valid: about: a string of 1025 bytes, over the limit of \
             1024 bytes at line 1 column 1057"
                .into(),
        ),
        (
            format!(r#"{{"policy_format": 1, "{long}": 1}}"#),
            "policy document: not valid: a string of 1025 bytes, over the limit of 1024 bytes \
             at line 1 column 1048"
                .into(),
        ),
        (
            deep,
            "policy document: not valid: metadata.notes[0][0][0][0][0][0]: nested deeper than 8 \
             levels at line 1 column 50"
                .into(),
        ),
        (
            format!(
                r#"{{"policy_format": 1, "labels": {{"required": [{}]}}}}"#,
                many.join(",")
            ),
            "policy document: not valid: labels.required: more than 1024 items at line 1 column \
             4060"
                .into(),
        ),
        (
            format!(
                r#"{{"policy_format": 1, "model": {{"inputs": [{}]}}}}"#,
                tensors.join(",")
            ),
            "policy document: model.inputs: it states 65 tensors, over the limit of 64".into(),
        ),
        (
            format!(
                r#"{{"policy_format": 1, "metadata": {{{}}}}}"#,
                keys.join(",")
            ),
            "policy document: metadata: it requires 65 keys, over the limit of 64".into(),
        ),
    ]
}

#[test]
fn issue14_policy_documents_over_a_cap_are_refused_by_the_cap() {
    let mut wrong = Vec::new();
    for (text, message) in over_caps() {
        let err = PolicyDocument::parse(text.as_bytes()).expect_err(&message);
        if err.to_string() != message {
            wrong.push(format!("gave: {err}\n  want: {message}"));
        }
    }
    assert!(wrong.is_empty(), "{}", wrong.join("\n"));
    // Just within every cap: accepted.
    let tensors: Vec<String> = (0..64).map(|i| format!(r#"{{"name": "t{i}"}}"#)).collect();
    let within = format!(
        r#"{{"policy_format": 1, "about": "{}", "model": {{"inputs": [{}]}},
           "metadata": {{"notes": [[[[[[1]]]]]]}}}}"#,
        "x".repeat(1024),
        tensors.join(",")
    );
    PolicyDocument::parse(within.as_bytes()).expect("within every cap");
}

#[test]
fn issue14_the_cli_refuses_a_hostile_policy_document_as_a_usage_error() {
    let env = Env::new();
    env.pack("1.0.0", "species.ampoule");
    let (code, stderr) = verify_with(&env, r#"{"policy_format": 1, "modle": {}}"#);
    assert_eq!(
        (code, stderr.as_str()),
        (
            2,
            "ampoule: error: --policy policy.json: policy document: unknown key 'modle' (the \
             keys here are policy_format, about, bundle_name, max_bundle_bytes, \
             max_unpacked_bytes, model, labels, metadata)\n"
        )
    );
    // Over the size cap: refused before it is read whole.
    env.write("policy.json", &vec![b' '; 70_000]);
    let (code, stderr) = verify_with(&env, &" ".repeat(70_000));
    assert_eq!(
        (code, stderr.as_str()),
        (
            2,
            "ampoule: error: policy.json is over 65536 bytes; that is not a policy document\n"
        )
    );
}

#[test]
fn issue14_format_md_s_example_document_reads_as_the_builder_would_build_it() {
    let format = include_str!("../FORMAT.md");
    let section = format
        .split("## The policy document")
        .nth(1)
        .expect("FORMAT.md has the policy document's section");
    let json = section
        .split("```json\n")
        .nth(1)
        .and_then(|rest| rest.split("```").next())
        .expect("the section's example");
    let document = PolicyDocument::parse(json.as_bytes()).expect("the example reads");
    assert_eq!(document.bundle_name.as_deref(), Some("trailcam-species"));
    assert_eq!(document.max_bundle_bytes, Some(64 << 20));
    let built = ampoule_verify::CompatibilityPolicy::builder()
        .format(ampoule_verify::ModelFormat::Onnx)
        .max_opset(17)
        .weights_8bit(false)
        .input(
            ampoule_verify::TensorSpec::new("image")
                .dtype("float32")
                .expect("dtype")
                .shape("[*, 3, 96, 96]".parse().expect("shape")),
        )
        .output(
            ampoule_verify::TensorSpec::new("species")
                .dtype("float32")
                .expect("dtype")
                .shape("[*, 7]".parse().expect("shape")),
        )
        .classifier_output("species")
        .class_dim(1)
        .label_count(2..=64)
        .require_label("empty frame")
        .require_metadata("preprocess.colour_order", "rgb")
        .require_metadata("preprocess.input_size", 96)
        .build()
        .expect("the builder's policy");
    assert_eq!(document.compatibility, built);
}
