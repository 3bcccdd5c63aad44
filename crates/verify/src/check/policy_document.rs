//! The app's policy document: its [`CompatibilityPolicy`], the bundle name it runs and its size
//! limits written as one JSON file, so that an app not written in Rust (through the C
//! interface) and the CLI (`verify --policy`, `update --policy`) state the same things the
//! builder does, in the same words. FORMAT.md ("The policy document") gives the schema.
//!
//! The app writes the document, but a C caller may hand over any bytes, so it is read like
//! untrusted input: strict JSON within the caps of [`crate::format::policy_document`] (size,
//! nesting, string length, items per array or object), no key twice in any object, no key the
//! schema does not name, and every value of its documented type. Each refusal names the field
//! by its path (`model.inputs[0].shape`). The app's own version is not in the document: it
//! belongs to the build, and the caller passes it (`--app-version`, the C call's argument), so
//! one document serves every version of the app that shares a policy.

use std::fmt;

use serde::de::{self, DeserializeSeed, MapAccess, SeqAccess, Visitor};
use serde_json::{Map, Number, Value};

use crate::check::policy::{CompatibilityPolicy, CompatibilityPolicyBuilder, TensorSpec};
use crate::error::{Error, ErrorKind, Result};
use crate::format::limit;
use crate::format::model::ModelFormat;
use crate::format::policy_document::{
    BYTES, DEPTH, FORMAT_VERSION, ITEMS, METADATA, STRING_BYTES, TENSORS,
};

/// A policy document, read and checked.
#[derive(Debug, Clone)]
#[non_exhaustive]
pub struct PolicyDocument {
    /// The one bundle name the app runs, when the document names it.
    pub bundle_name: Option<String>,
    /// The largest bundle file the app downloads, when the document sets it.
    pub max_bundle_bytes: Option<u64>,
    /// The most bytes a bundle may unpack to, when the document sets it.
    pub max_unpacked_bytes: Option<u64>,
    /// What the app's code expects of a model and its labels (nothing, when the document
    /// states no `model`, `labels` or `metadata`).
    pub compatibility: CompatibilityPolicy,
}

/// A refusal of the document at `path`.
fn refuse(path: &str, why: impl fmt::Display) -> Error {
    if path.is_empty() {
        Error::new(ErrorKind::Settings, format!("policy document: {why}"))
    } else {
        Error::new(
            ErrorKind::Settings,
            format!("policy document: {path}: {why}"),
        )
    }
}

/// A string for a message: at most 40 characters, escaped.
fn shown(text: &str) -> String {
    let cut: String = text.chars().take(40).collect();
    let more = if cut.len() < text.len() { "..." } else { "" };
    format!("{}{more}", cut.escape_debug())
}

impl PolicyDocument {
    /// Reads a policy document; see the module documentation.
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Settings`], naming the field, for a document that is not strict JSON, is
    /// over a cap, repeats a key, holds a key the schema does not name, or a value of the wrong
    /// type or out of range.
    pub fn parse(bytes: &[u8]) -> Result<PolicyDocument> {
        if bytes.len() > BYTES {
            return Err(refuse(
                "",
                format!(
                    "it is {} bytes, over the limit of {BYTES} bytes",
                    bytes.len()
                ),
            ));
        }
        let mut deserializer = serde_json::Deserializer::from_slice(bytes);
        let value = Reader {
            path: String::new(),
            depth: 1,
        }
        .deserialize(&mut deserializer)
        .and_then(|value| deserializer.end().map(|()| value))
        .map_err(|e| refuse("", format!("not valid: {e}")))?;
        let root = Object::of("", &value)?;
        root.known(&[
            "policy_format",
            "about",
            "bundle_name",
            "max_bundle_bytes",
            "max_unpacked_bytes",
            "model",
            "labels",
            "metadata",
        ])?;
        match root.get("policy_format") {
            None => {
                return Err(refuse(
                    "",
                    format!("it has no policy_format; write \"policy_format\": {FORMAT_VERSION}"),
                ));
            }
            Some(_) => {
                let format = root.u64("policy_format")?.unwrap_or_default();
                if format != FORMAT_VERSION {
                    return Err(refuse(
                        "policy_format",
                        format!("{format} is not supported (this reader knows {FORMAT_VERSION})"),
                    ));
                }
            }
        }
        root.string("about")?;
        let bundle_name = root.string("bundle_name")?;
        if let Some(name) = &bundle_name {
            crate::format::manifest::check_name(name)
                .map_err(|e| refuse("bundle_name", e.to_string()))?;
        }
        let max_bundle_bytes = root.positive("max_bundle_bytes")?;
        let max_unpacked_bytes = root.positive("max_unpacked_bytes")?;
        let mut policy = CompatibilityPolicy::builder();
        if let Some(model) = root.object("model")? {
            policy = read_model(&model, policy)?;
        }
        if let Some(labels) = root.object("labels")? {
            policy = read_labels(&labels, policy)?;
        }
        if let Some(metadata) = root.object("metadata")? {
            if metadata.map.len() > METADATA {
                return Err(refuse(
                    "metadata",
                    format!(
                        "it requires {} keys, over the limit of {METADATA}",
                        metadata.map.len()
                    ),
                ));
            }
            for (key, value) in metadata.map {
                policy = policy.require_metadata(key.as_str(), value.clone());
            }
        }
        let compatibility = policy
            .build()
            .map_err(|e| Error::new(ErrorKind::Settings, format!("policy document: {e}")))?;
        Ok(PolicyDocument {
            bundle_name,
            max_bundle_bytes,
            max_unpacked_bytes,
            compatibility,
        })
    }
}

fn read_model(
    model: &Object<'_>,
    mut policy: CompatibilityPolicyBuilder,
) -> Result<CompatibilityPolicyBuilder> {
    model.known(&[
        "format",
        "max_opset",
        "weights_8bit",
        "inputs",
        "outputs",
        "classifier_output",
        "class_dim",
    ])?;
    if let Some(name) = model.string("format")? {
        let format = match name.as_str() {
            "onnx" => ModelFormat::Onnx,
            "safetensors" => ModelFormat::Safetensors,
            other => {
                return Err(refuse(
                    &model.path("format"),
                    format!(
                        "'{}' is not a model format: use onnx or safetensors",
                        shown(other)
                    ),
                ));
            }
        };
        policy = policy.format(format);
    }
    if let Some(max) = model.u64("max_opset")? {
        policy = policy.max_opset(max);
    }
    if let Some(eight) = model.bool("weights_8bit")? {
        policy = policy.weights_8bit(eight);
    }
    for (field, input) in [("inputs", true), ("outputs", false)] {
        let Some(items) = model.array(field)? else {
            continue;
        };
        if items.len() > TENSORS {
            return Err(refuse(
                &model.path(field),
                format!(
                    "it states {} tensors, over the limit of {TENSORS}",
                    items.len()
                ),
            ));
        }
        for (i, item) in items.iter().enumerate() {
            let spec = read_tensor(&Object::of(&format!("model.{field}[{i}]"), item)?)?;
            policy = if input {
                policy.input(spec)
            } else {
                policy.output(spec)
            };
        }
    }
    if let Some(name) = model.string("classifier_output")? {
        policy = policy.classifier_output(name);
    }
    if let Some(dim) = model.u64("class_dim")? {
        let dim = u32::try_from(dim)
            .map_err(|_| refuse(&model.path("class_dim"), format!("{dim} is too large")))?;
        policy = policy.class_dim(dim);
    }
    Ok(policy)
}

fn read_tensor(tensor: &Object<'_>) -> Result<TensorSpec> {
    tensor.known(&["name", "dtype", "shape"])?;
    let name = tensor
        .string("name")?
        .ok_or_else(|| refuse(&tensor.prefix, "it has no name"))?;
    let mut spec = TensorSpec::new(name);
    if let Some(dtype) = tensor.string("dtype")? {
        spec = spec
            .dtype(&dtype)
            .map_err(|e| refuse(&tensor.path("dtype"), e.to_string()))?;
    }
    if let Some(shape) = tensor.string("shape")? {
        let shape = shape
            .parse()
            .map_err(|e: Error| refuse(&tensor.path("shape"), e.to_string()))?;
        spec = spec.shape(shape);
    }
    Ok(spec)
}

fn read_labels(
    labels: &Object<'_>,
    mut policy: CompatibilityPolicyBuilder,
) -> Result<CompatibilityPolicyBuilder> {
    labels.known(&["min_count", "max_count", "required"])?;
    let min = labels.u64("min_count")?;
    let max = labels.u64("max_count")?;
    for (field, count) in [("min_count", min), ("max_count", max)] {
        if let Some(count) = count.filter(|&c| c > limit::LABELS as u64) {
            return Err(refuse(
                &labels.path(field),
                format!(
                    "{count} is more labels than a bundle can hold ({})",
                    limit::LABELS
                ),
            ));
        }
    }
    if min.is_some() || max.is_some() {
        let min = min.unwrap_or(0) as usize;
        let max = max.map_or(limit::LABELS, |m| m as usize);
        policy = policy.label_count(min..=max);
    }
    if let Some(required) = labels.array("required")? {
        for (i, label) in required.iter().enumerate() {
            let Value::String(label) = label else {
                return Err(refuse(
                    &format!("labels.required[{i}]"),
                    format!("it is {}, not a string", describe(label)),
                ));
            };
            policy = policy.require_label(label.as_str());
        }
    }
    Ok(policy)
}

/// One object of the document and its path, for typed reading of its members.
struct Object<'a> {
    prefix: String,
    map: &'a Map<String, Value>,
}

impl<'a> Object<'a> {
    fn of(prefix: &str, value: &'a Value) -> Result<Object<'a>> {
        match value {
            Value::Object(map) => Ok(Object {
                prefix: prefix.to_string(),
                map,
            }),
            other => Err(refuse(
                prefix,
                format!("it is {}, not an object", describe(other)),
            )),
        }
    }

    fn path(&self, key: &str) -> String {
        if self.prefix.is_empty() {
            key.to_string()
        } else {
            format!("{}.{key}", self.prefix)
        }
    }

    /// Refuses a key not in `known`, naming the keys that are.
    fn known(&self, known: &[&str]) -> Result<()> {
        match self.map.keys().find(|key| !known.contains(&key.as_str())) {
            Some(key) => Err(refuse(
                &self.prefix,
                format!(
                    "unknown key '{}' (the keys here are {})",
                    shown(key),
                    known.join(", ")
                ),
            )),
            None => Ok(()),
        }
    }

    fn get(&self, key: &str) -> Option<&'a Value> {
        self.map.get(key)
    }

    fn typed<T>(
        &self,
        key: &str,
        want: &str,
        read: impl FnOnce(&'a Value) -> Option<T>,
    ) -> Result<Option<T>> {
        match self.get(key) {
            None => Ok(None),
            Some(value) => read(value).map(Some).ok_or_else(|| {
                refuse(
                    &self.path(key),
                    format!("it is {}, not {want}", describe(value)),
                )
            }),
        }
    }

    fn string(&self, key: &str) -> Result<Option<String>> {
        self.typed(key, "a string", |v| v.as_str().map(str::to_string))
    }

    fn u64(&self, key: &str) -> Result<Option<u64>> {
        self.typed(key, "a whole number from 0", Value::as_u64)
    }

    fn positive(&self, key: &str) -> Result<Option<u64>> {
        self.typed(key, "a whole number from 1", |v| {
            v.as_u64().filter(|&n| n > 0)
        })
    }

    fn bool(&self, key: &str) -> Result<Option<bool>> {
        self.typed(key, "true or false", Value::as_bool)
    }

    fn array(&self, key: &str) -> Result<Option<&'a Vec<Value>>> {
        self.typed(key, "an array", Value::as_array)
    }

    fn object(&self, key: &str) -> Result<Option<Object<'a>>> {
        match self.get(key) {
            None => Ok(None),
            Some(value) => Object::of(&self.path(key), value).map(Some),
        }
    }
}

/// What a value is, for messages.
fn describe(value: &Value) -> String {
    match value {
        Value::Null => "null".into(),
        Value::Bool(b) => b.to_string(),
        Value::Number(n) => format!("the number {n}"),
        Value::String(s) => format!("the string '{}'", shown(s)),
        Value::Array(_) => "an array".into(),
        Value::Object(_) => "an object".into(),
    }
}

/// Reads any JSON value into a `Value` within the document's caps, refusing a key repeated in
/// one object. serde_json's own `Value` would keep the last of two equal keys silently.
struct Reader {
    /// Where the value is, for messages.
    path: String,
    /// Its nesting depth: 1 for the document.
    depth: usize,
}

impl Reader {
    fn inner(&self, path: String) -> Reader {
        Reader {
            path,
            depth: self.depth + 1,
        }
    }

    fn at(&self) -> String {
        if self.path.is_empty() {
            String::new()
        } else {
            format!("{}: ", self.path)
        }
    }

    fn container<E: de::Error>(&self) -> std::result::Result<(), E> {
        if self.depth > DEPTH {
            return Err(E::custom(format!(
                "{}nested deeper than {DEPTH} levels",
                self.at()
            )));
        }
        Ok(())
    }

    fn string<E: de::Error>(&self, v: &str) -> std::result::Result<(), E> {
        if v.len() > STRING_BYTES {
            return Err(E::custom(format!(
                "{}a string of {} bytes, over the limit of {STRING_BYTES} bytes",
                self.at(),
                v.len()
            )));
        }
        Ok(())
    }

    fn too_many<E: de::Error>(&self) -> E {
        E::custom(format!("{}more than {ITEMS} items", self.at()))
    }
}

impl<'de> DeserializeSeed<'de> for Reader {
    type Value = Value;

    fn deserialize<D: de::Deserializer<'de>>(
        self,
        deserializer: D,
    ) -> std::result::Result<Value, D::Error> {
        deserializer.deserialize_any(self)
    }
}

impl<'de> Visitor<'de> for Reader {
    type Value = Value;

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("a JSON value")
    }

    fn visit_bool<E: de::Error>(self, v: bool) -> std::result::Result<Value, E> {
        Ok(Value::Bool(v))
    }

    fn visit_i64<E: de::Error>(self, v: i64) -> std::result::Result<Value, E> {
        Ok(Value::from(v))
    }

    fn visit_u64<E: de::Error>(self, v: u64) -> std::result::Result<Value, E> {
        Ok(Value::from(v))
    }

    fn visit_f64<E: de::Error>(self, v: f64) -> std::result::Result<Value, E> {
        Number::from_f64(v)
            .map(Value::Number)
            .ok_or_else(|| E::custom(format!("{}not a finite number", self.at())))
    }

    fn visit_str<E: de::Error>(self, v: &str) -> std::result::Result<Value, E> {
        self.string(v)?;
        Ok(Value::String(v.to_owned()))
    }

    fn visit_unit<E: de::Error>(self) -> std::result::Result<Value, E> {
        Ok(Value::Null)
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> std::result::Result<Value, A::Error> {
        self.container()?;
        let mut items = Vec::new();
        while let Some(item) =
            seq.next_element_seed(self.inner(format!("{}[{}]", self.path, items.len())))?
        {
            if items.len() == ITEMS {
                return Err(self.too_many());
            }
            items.push(item);
        }
        Ok(Value::Array(items))
    }

    fn visit_map<A: MapAccess<'de>>(self, mut access: A) -> std::result::Result<Value, A::Error> {
        self.container()?;
        let mut map = Map::new();
        while let Some(key) = access.next_key::<String>()? {
            self.string(&key)?;
            let path = if self.path.is_empty() {
                key.clone()
            } else {
                format!("{}.{key}", self.path)
            };
            if map.contains_key(&key) {
                return Err(de::Error::custom(format!(
                    "key '{}' appears twice",
                    shown(&path)
                )));
            }
            if map.len() == ITEMS {
                return Err(self.too_many());
            }
            let value = access.next_value_seed(self.inner(path))?;
            map.insert(key, value);
        }
        Ok(Value::Object(map))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every setting of the builder, once, in the document's words.
    pub(crate) const FULL: &str = r#"{
      "policy_format": 1,
      "about": "the trail camera's species model",
      "bundle_name": "trailcam-species",
      "max_bundle_bytes": 67108864,
      "max_unpacked_bytes": 268435456,
      "model": {
        "format": "onnx",
        "max_opset": 17,
        "weights_8bit": false,
        "inputs": [{ "name": "image", "dtype": "float32", "shape": "[*, 3, 96, 96]" }],
        "outputs": [{ "name": "species", "dtype": "float32", "shape": "[*, 7]" }],
        "classifier_output": "species",
        "class_dim": 1
      },
      "labels": { "min_count": 2, "max_count": 64, "required": ["empty frame"] },
      "metadata": { "preprocess.colour_order": "rgb", "preprocess.input_size": 96 }
    }"#;

    #[test]
    fn issue14_the_full_document_is_the_builder_s_policy() {
        let document = PolicyDocument::parse(FULL.as_bytes()).expect("the full document");
        let built = CompatibilityPolicy::builder()
            .format(ModelFormat::Onnx)
            .max_opset(17)
            .weights_8bit(false)
            .input(
                TensorSpec::new("image")
                    .dtype("float32")
                    .and_then(|s| Ok(s.shape("[*, 3, 96, 96]".parse()?)))
                    .expect("spec"),
            )
            .output(
                TensorSpec::new("species")
                    .dtype("float32")
                    .and_then(|s| Ok(s.shape("[*, 7]".parse()?)))
                    .expect("spec"),
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
        assert_eq!(document.bundle_name.as_deref(), Some("trailcam-species"));
        assert_eq!(document.max_bundle_bytes, Some(64 << 20));
        assert_eq!(document.max_unpacked_bytes, Some(256 << 20));
    }

    #[test]
    fn issue14_the_smallest_document_expects_nothing() {
        let document = PolicyDocument::parse(br#"{"policy_format": 1}"#).expect("minimal");
        assert_eq!(
            document.compatibility,
            CompatibilityPolicy::builder().build().expect("empty")
        );
        assert_eq!(document.bundle_name, None);
    }
}
