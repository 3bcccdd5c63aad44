//! Signed metadata: what a release engineer records under the manifest's signature beyond what
//! ampoule derives from the files (preprocessing, the evaluation on the team's own test set,
//! the training data snapshot, release notes), so that an app and an auditor read it from the
//! verified manifest instead of from a side file that nobody signed.
//!
//! The manifest's optional `metadata` field is a JSON object. Keys are named by dotted paths
//! (`preprocess.mean`) into nested objects, each segment 1 to [`limit::METADATA_KEY_BYTES`]
//! bytes of `[a-z0-9_]`. The object is stored with its keys sorted, is at most
//! [`limit::METADATA_BYTES`] as compact JSON and [`limit::METADATA_DEPTH`] levels deep, and
//! holds no `null` and no empty object, so that every key has one value and one way to be
//! written. Arrays hold numbers, strings, booleans and arrays, never objects: every object
//! member has a dotted name. A few keys have a documented meaning and type (see
//! `check_documented`); the others are free.
//!
//! `pack` builds the object ([`MetadataBuilder`]) and the device reads it (the manifest's
//! strict parse, then `Metadata::validate`) under the same rules, the documented types
//! included: whoever holds a bundle key cannot hand devices metadata that `pack` refuses, and
//! an app that reads `preprocess.colour_order` can rely on `rgb` or `bgr`. (The price: a later
//! format that widens a documented type needs newer devices, as any format change does.)
//!
//! serde_json's `Value` silently keeps the last of two equal keys, so objects are read here by
//! a visitor of our own that refuses a repeated key, and in a manifest a key out of order.

use std::fmt;

use serde::de::{self, DeserializeSeed, MapAccess, SeqAccess, Visitor};
use serde::{Deserialize, Deserializer, Serialize};
use serde_json::{Map, Number, Value};

use crate::error::{Error, ErrorKind, Result};
use crate::format::labels::is_invisible;
use crate::format::limit;
use crate::format::tar;

/// A manifest's `metadata` object, validated; see the module documentation.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
#[serde(transparent)]
pub struct Metadata(Map<String, Value>);

fn invalid(message: String) -> Error {
    Error::new(ErrorKind::Manifest, message)
}

/// A key from a manifest or a user, as a message may show it: escaped, at most 100 characters.
fn shown(key: &str) -> String {
    tar::shown(key.as_bytes())
}

/// A value as a message shows it: compact JSON (whose strings escape control characters), cut
/// after 100 characters, with invisible and bidirectional format characters written `\u{...}`
/// so that a value cannot pose as another.
pub(crate) fn shown_value(value: &Value) -> String {
    let text = value.to_string();
    let mut out = String::new();
    for (i, c) in text.chars().enumerate() {
        if i == 100 {
            out.push_str("...");
            break;
        }
        if c.is_control() || (c.is_whitespace() && c != ' ') || is_invisible(c) {
            out.push_str(&format!("\\u{{{:x}}}", u32::from(c)));
        } else {
            out.push(c);
        }
    }
    out
}

/// What a value is, for a message that says what it should have been.
fn describe(value: &Value) -> String {
    match value {
        Value::Null => "null".into(),
        Value::Bool(b) => format!("the boolean {b}"),
        Value::Number(_) => format!("the number {}", shown_value(value)),
        Value::String(_) => format!("the string {}", shown_value(value)),
        Value::Array(_) => "an array".into(),
        Value::Object(_) => "an object".into(),
    }
}

/// Whether `segment` may be one segment of a key: 1 to 64 bytes of `[a-z0-9_]`.
fn segment_ok(segment: &str) -> bool {
    !segment.is_empty()
        && segment.len() <= limit::METADATA_KEY_BYTES
        && segment
            .bytes()
            .all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'_')
}

fn bad_key(key: &str) -> Error {
    invalid(format!(
        "metadata key '{}' is not allowed: each dot-separated segment must be 1 to {} bytes of \
         a-z, 0-9 and _",
        shown(key),
        limit::METADATA_KEY_BYTES
    ))
}

fn too_deep(key: &str, levels: usize) -> Error {
    invalid(format!(
        "metadata key '{}' is {levels} levels deep; the format allows at most {} (the metadata \
         object and each object or array in it count one)",
        shown(key),
        limit::METADATA_DEPTH
    ))
}

/// The segments of a dotted key, each checked, at most [`limit::METADATA_DEPTH`] of them.
pub(crate) fn parse_key(key: &str) -> Result<Vec<&str>> {
    let segments: Vec<&str> = key.split('.').collect();
    if !segments.iter().all(|s| segment_ok(s)) {
        return Err(bad_key(key));
    }
    if segments.len() > limit::METADATA_DEPTH {
        return Err(too_deep(key, segments.len()));
    }
    Ok(segments)
}

/// Whether `value` is a number or a non-empty array of numbers.
fn numbers(value: &Value) -> bool {
    match value {
        Value::Number(_) => true,
        Value::Array(items) => !items.is_empty() && items.iter().all(Value::is_number),
        _ => false,
    }
}

/// The documented keys and their types (FORMAT.md lists the same):
/// `preprocess.input_size`, `preprocess.mean`, `preprocess.std`, `preprocess.scale` hold a
/// number or an array of numbers; `preprocess.colour_order` is `"rgb"` or `"bgr"`; every key
/// under `eval` is a number (a result on the team's own test set); `data.snapshot` and `notes`
/// are strings; `preprocess`, `eval` and `data` themselves are objects.
fn check_documented(path: &[&str], value: &Value) -> Result<()> {
    let must = |ok: bool, want: &str| {
        if ok {
            Ok(())
        } else {
            Err(invalid(format!(
                "metadata key '{}' must be {want}, not {}",
                path.join("."),
                describe(value)
            )))
        }
    };
    match path {
        ["preprocess" | "eval" | "data"] => {
            must(value.is_object(), "an object (documented keys go under it)")
        }
        ["preprocess", "input_size" | "mean" | "std" | "scale"] => {
            must(numbers(value), "a number or a non-empty array of numbers")
        }
        ["preprocess", "colour_order"] => must(
            matches!(value.as_str(), Some("rgb" | "bgr")),
            "\"rgb\" or \"bgr\"",
        ),
        ["eval", _, ..] => must(
            value.is_number() || value.is_object(),
            "a number (every key under eval is a result)",
        ),
        ["data", "snapshot"] | ["notes"] => must(value.is_string(), "a string"),
        _ => Ok(()),
    }
}

/// Whether a key that `--meta` would set as a string may hold one (a documented key of
/// another type may not), for a refusal that says how to set it instead.
pub fn takes_string(key: &str) -> bool {
    let path: Vec<&str> = key.split('.').collect();
    // "rgb" is a string every documented string key accepts, and no other documented key does.
    check_documented(&path, &Value::from("rgb")).is_ok()
}

/// Checks the value at `path`, held by an object or array `level` levels deep (the metadata
/// object is level 1).
fn check_value(path: &mut Vec<String>, value: &Value, level: usize) -> Result<()> {
    if value.is_null() {
        return Err(invalid(format!(
            "metadata key '{}' is null; leave out a key that has no value",
            path.join(".")
        )));
    }
    let segments: Vec<&str> = path.iter().map(String::as_str).collect();
    check_documented(&segments, value)?;
    match value {
        Value::Object(map) => check_object(path, map, level + 1),
        Value::Array(items) => {
            if level + 1 > limit::METADATA_DEPTH {
                return Err(too_deep(&path.join("."), level + 1));
            }
            for item in items {
                match item {
                    Value::Null | Value::Object(_) => {
                        return Err(invalid(format!(
                            "metadata key '{}' holds {} inside an array; arrays hold numbers, \
                             strings, booleans and arrays",
                            path.join("."),
                            if item.is_null() { "null" } else { "an object" }
                        )));
                    }
                    _ => check_value(path, item, level + 1)?,
                }
            }
            Ok(())
        }
        // Null was refused above.
        Value::Null | Value::Bool(_) | Value::Number(_) | Value::String(_) => Ok(()),
    }
}

/// Checks an object's members, `level` levels deep.
fn check_object(path: &mut Vec<String>, map: &Map<String, Value>, level: usize) -> Result<()> {
    if level > limit::METADATA_DEPTH {
        return Err(too_deep(&path.join("."), level));
    }
    if map.is_empty() {
        return Err(invalid(if path.is_empty() {
            "the metadata object is empty; leave the field out instead".to_string()
        } else {
            format!(
                "metadata key '{}' is an empty object; leave out a key that has no value",
                path.join(".")
            )
        }));
    }
    for (key, value) in map {
        path.push(key.clone());
        if !segment_ok(key) {
            return Err(bad_key(&path.join(".")));
        }
        check_value(path, value, level)?;
        path.pop();
    }
    Ok(())
}

/// Rebuilds every object with its keys in sorted order, whatever order the map type keeps.
fn sorted(value: Value) -> Value {
    match value {
        Value::Object(map) => Value::Object(sorted_map(map)),
        Value::Array(items) => Value::Array(items.into_iter().map(sorted).collect()),
        other => other,
    }
}

fn sorted_map(map: Map<String, Value>) -> Map<String, Value> {
    let mut members: Vec<(String, Value)> = map.into_iter().collect();
    members.sort_by(|a, b| a.0.cmp(&b.0));
    members.into_iter().map(|(k, v)| (k, sorted(v))).collect()
}

/// Whether two values are equal as the app's policy compares them: numbers by value (`1`
/// equals `1.0`), everything else exactly.
pub(crate) fn same_value(a: &Value, b: &Value) -> bool {
    match (a, b) {
        (Value::Number(x), Value::Number(y)) => match (x.as_i128(), y.as_i128()) {
            (Some(x), Some(y)) => x == y,
            _ => x.as_f64() == y.as_f64(),
        },
        (Value::Array(x), Value::Array(y)) => {
            x.len() == y.len() && x.iter().zip(y).all(|(x, y)| same_value(x, y))
        }
        (Value::Object(x), Value::Object(y)) => {
            x.len() == y.len()
                && x.iter()
                    .all(|(k, v)| y.get(k).is_some_and(|w| same_value(v, w)))
        }
        _ => a == b,
    }
}

impl Metadata {
    pub_for_release! {
        /// Checks the whole object against the format's rules: its compact size, its depth,
        /// every key segment, no null or empty object, no object inside an array, and the
        /// documented keys' types.
        fn validate(&self) -> Result<()> {
            let size = serde_json::to_vec(&self.0)
                .expect("a map of JSON values always serializes")
                .len();
            if size > limit::METADATA_BYTES {
                return Err(invalid(format!(
                    "metadata is {size} bytes as compact JSON, over the format's limit of {} bytes",
                    limit::METADATA_BYTES
                )));
            }
            check_object(&mut Vec::new(), &self.0, 1)
        }
    }

    /// The value at a dotted key (`preprocess.mean`); an object for a key with keys under it.
    pub(crate) fn get(&self, key: &str) -> Option<&Value> {
        let mut segments = key.split('.');
        let mut value = self.0.get(segments.next()?)?;
        for segment in segments {
            value = value.as_object()?.get(segment)?;
        }
        Some(value)
    }

    pub_for_release! {
        /// Every key that holds a value (a number, string, boolean or array), with its dotted
        /// name, in sorted order.
        fn leaves(&self) -> Vec<(String, &Value)> {
            fn walk<'a>(prefix: &str, map: &'a Map<String, Value>, out: &mut Vec<(String, &'a Value)>) {
                for (key, value) in map {
                    let name = if prefix.is_empty() {
                        key.clone()
                    } else {
                        format!("{prefix}.{key}")
                    };
                    match value {
                        Value::Object(inner) => walk(&name, inner, out),
                        _ => out.push((name, value)),
                    }
                }
            }
            let mut out = Vec::new();
            walk("", &self.0, &mut out);
            out
        }
    }
}

impl<'de> Deserialize<'de> for Metadata {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        match (Reader {
            path: String::new(),
            sorted: true,
        })
        .deserialize(deserializer)?
        {
            Value::Object(map) => Ok(Metadata(map)),
            other => Err(de::Error::custom(format!(
                "metadata must be a JSON object, not {}",
                describe(&other)
            ))),
        }
    }
}

/// Reads any JSON value into a `Value`, refusing a key repeated in one object and, when
/// `sorted`, a key that does not come after the one before it.
struct Reader {
    /// The dotted path of the value read, for messages.
    path: String,
    sorted: bool,
}

impl<'de> DeserializeSeed<'de> for Reader {
    type Value = Value;

    fn deserialize<D: Deserializer<'de>>(
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
        Number::from_f64(v).map(Value::Number).ok_or_else(|| {
            E::custom(format!(
                "metadata key '{}' is not a finite number",
                shown(&self.path)
            ))
        })
    }

    fn visit_str<E: de::Error>(self, v: &str) -> std::result::Result<Value, E> {
        Ok(Value::String(v.to_owned()))
    }

    fn visit_string<E: de::Error>(self, v: String) -> std::result::Result<Value, E> {
        Ok(Value::String(v))
    }

    fn visit_unit<E: de::Error>(self) -> std::result::Result<Value, E> {
        Ok(Value::Null)
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> std::result::Result<Value, A::Error> {
        let mut items = Vec::new();
        while let Some(item) = seq.next_element_seed(Reader {
            path: self.path.clone(),
            sorted: self.sorted,
        })? {
            items.push(item);
        }
        Ok(Value::Array(items))
    }

    fn visit_map<A: MapAccess<'de>>(self, mut access: A) -> std::result::Result<Value, A::Error> {
        let mut map = Map::new();
        let mut last: Option<String> = None;
        while let Some(key) = access.next_key::<String>()? {
            let path = if self.path.is_empty() {
                key.clone()
            } else {
                format!("{}.{key}", self.path)
            };
            if map.contains_key(&key) {
                return Err(de::Error::custom(format!(
                    "metadata key '{}' appears twice",
                    shown(&path)
                )));
            }
            if let Some(before) = last.as_ref().filter(|before| self.sorted && key < **before) {
                return Err(de::Error::custom(format!(
                    "metadata key '{}' comes after '{}'; a manifest stores keys in sorted order",
                    shown(&path),
                    shown(before)
                )));
            }
            let value = access.next_value_seed(Reader {
                path,
                sorted: self.sorted,
            })?;
            map.insert(key.clone(), value);
            last = Some(key);
        }
        Ok(Value::Object(map))
    }
}

/// Collects metadata from `pack`'s options: strings set by key, and JSON files. A key set
/// twice, or set both to a value and as a parent of another key, is refused by name.
#[derive(Debug, Default)]
pub struct MetadataBuilder {
    root: Map<String, Value>,
}

impl MetadataBuilder {
    pub_for_release! {
        /// An empty builder.
        fn new() -> Self {
            MetadataBuilder::default()
        }
    }

    pub_for_release! {
        /// Sets the dotted `key` to the string `value` (`pack --meta KEY=VALUE`).
        fn set_string(&mut self, key: &str, value: &str) -> Result<()> {
            self.set(key, Value::String(value.to_owned()))
        }
    }

    pub_for_release! {
        /// Sets every value of a JSON object (`pack --meta-file`), keeping each scalar's JSON
        /// type. The text must be strict JSON holding one object; a key repeated in one object
        /// is refused, and a member name may itself be a dotted key.
        fn add_json(&mut self, text: &[u8]) -> Result<()> {
            let mut deserializer = serde_json::Deserializer::from_slice(text);
            let value = Reader {
                path: String::new(),
                sorted: false,
            }
            .deserialize(&mut deserializer)
            .and_then(|value| deserializer.end().map(|()| value))
            .map_err(|e| invalid(format!("metadata file is not valid: {e}")))?;
            let Value::Object(map) = value else {
                return Err(invalid(format!(
                    "metadata file must hold a JSON object, not {}",
                    describe(&value)
                )));
            };
            self.add_object("", map)
        }
    }

    fn add_object(&mut self, prefix: &str, map: Map<String, Value>) -> Result<()> {
        if map.is_empty() && !prefix.is_empty() {
            return Err(invalid(format!(
                "metadata key '{}' is an empty object; leave out a key that has no value",
                shown(prefix)
            )));
        }
        for (key, value) in map {
            let name = if prefix.is_empty() {
                key
            } else {
                format!("{prefix}.{key}")
            };
            parse_key(&name)?;
            match value {
                Value::Object(inner) => self.add_object(&name, inner)?,
                value => self.set(&name, value)?,
            }
        }
        Ok(())
    }

    fn set(&mut self, key: &str, value: Value) -> Result<()> {
        let path = parse_key(key)?;
        let (last, parents) = path
            .split_last()
            .expect("a key always has at least one segment");
        let mut node = &mut self.root;
        for (i, segment) in parents.iter().enumerate() {
            let child = node
                .entry((*segment).to_owned())
                .or_insert_with(|| Value::Object(Map::new()));
            node = match child {
                Value::Object(map) => map,
                _ => return Err(clash(&path[..=i].join("."), key)),
            };
        }
        match node.get(*last) {
            None => {
                node.insert((*last).to_owned(), value);
                Ok(())
            }
            Some(Value::Object(children)) => {
                let child = children.keys().next().map_or("", String::as_str);
                Err(clash(key, &format!("{key}.{child}")))
            }
            Some(_) => Err(invalid(format!(
                "metadata key '{}' is set twice; set each key once",
                shown(key)
            ))),
        }
    }

    pub_for_release! {
        /// The metadata, checked as a device checks it; `None` when nothing was set, so that
        /// the manifest has no `metadata` field at all.
        fn build(self) -> Result<Option<Metadata>> {
            if self.root.is_empty() {
                return Ok(None);
            }
            let metadata = Metadata(sorted_map(self.root));
            metadata.validate()?;
            Ok(Some(metadata))
        }
    }
}

fn clash(parent: &str, child: &str) -> Error {
    invalid(format!(
        "metadata key '{}' is set both to a value and as the parent of '{}'; a key holds a value \
         or keys under it, not both",
        shown(parent),
        shown(child)
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn built(pairs: &[(&str, &str)], file: Option<&str>) -> Result<Option<Metadata>> {
        let mut builder = MetadataBuilder::new();
        if let Some(file) = file {
            builder.add_json(file.as_bytes())?;
        }
        for (key, value) in pairs {
            builder.set_string(key, value)?;
        }
        builder.build()
    }

    fn refused(pairs: &[(&str, &str)], file: Option<&str>) -> String {
        built(pairs, file)
            .expect_err("the metadata should be refused")
            .to_string()
    }

    fn read(text: &str) -> std::result::Result<Metadata, String> {
        let metadata: Metadata = serde_json::from_str(text).map_err(|e| e.to_string())?;
        metadata.validate().map_err(|e| e.to_string())?;
        Ok(metadata)
    }

    #[test]
    fn issue11_options_and_files_build_one_sorted_object() {
        let metadata = built(
            &[
                ("notes", "first reserve model"),
                ("data.snapshot", "2026-11-30"),
            ],
            Some(
                r#"{"preprocess": {"std": [0.229, 0.224, 0.225], "mean": [0.485, 0.456, 0.406],
                    "colour_order": "rgb", "input_size": 96}, "eval.top1": 0.91, "zoo": true}"#,
            ),
        )
        .expect("valid metadata")
        .expect("something was set");
        assert_eq!(
            serde_json::to_string(&metadata).expect("serializes"),
            r#"{"data":{"snapshot":"2026-11-30"},"eval":{"top1":0.91},"notes":"first reserve model","preprocess":{"colour_order":"rgb","input_size":96,"mean":[0.485,0.456,0.406],"std":[0.229,0.224,0.225]},"zoo":true}"#
        );
        assert_eq!(metadata.get("eval.top1"), Some(&Value::from(0.91)));
        assert_eq!(
            metadata.get("preprocess.input_size"),
            Some(&Value::from(96))
        );
        assert!(metadata.get("preprocess").is_some_and(Value::is_object));
        assert_eq!(metadata.get("preprocess.nothing"), None);
        assert_eq!(metadata.get("notes.deeper"), None);
        assert_eq!(metadata.get(""), None);
        assert_eq!(metadata.leaves().len(), 8);
        // What the builder writes, the device reads back unchanged.
        let text = serde_json::to_string(&metadata).expect("serializes");
        assert_eq!(read(&text), Ok(metadata));
        assert_eq!(built(&[], None).expect("nothing set"), None);
    }

    #[test]
    fn issue11_keys_are_dotted_paths_of_limited_segments() {
        let long = "k".repeat(64);
        built(&[(&long, "x")], None).expect("a 64-byte segment");
        let too_long = "k".repeat(65);
        for key in [
            "Preprocess.mean",
            "a..b",
            ".a",
            "a.",
            "",
            "a-b",
            "a b",
            "caf\u{e9}",
            too_long.as_str(),
        ] {
            assert_eq!(
                refused(&[(key, "x")], None),
                format!(
                    "metadata key '{}' is not allowed: each dot-separated segment must be 1 to 64 \
                     bytes of a-z, 0-9 and _",
                    key.escape_debug()
                ),
                "{key:?}"
            );
        }
    }

    #[test]
    fn issue11_a_key_set_twice_or_as_value_and_parent_is_refused_by_name() {
        let twice = "metadata key 'eval.top1' is set twice; set each key once";
        assert_eq!(
            refused(&[("eval.top1", "1"), ("eval.top1", "2")], None),
            twice
        );
        assert_eq!(
            refused(&[("eval.top1", "1")], Some(r#"{"eval": {"top1": 1}}"#)),
            twice
        );
        assert_eq!(
            refused(&[], Some(r#"{"eval.top1": 1, "eval": {"top1": 1}}"#)),
            "metadata key 'eval.top1' is set twice; set each key once"
        );
        assert_eq!(
            refused(&[], Some(r#"{"eval": {"top1": 1, "top1": 2}}"#)),
            "metadata file is not valid: metadata key 'eval.top1' appears twice at line 1 column 27"
        );
        assert_eq!(
            refused(&[("a", "1"), ("a.b", "2")], None),
            "metadata key 'a' is set both to a value and as the parent of 'a.b'; a key holds a \
             value or keys under it, not both"
        );
        assert_eq!(
            refused(&[("a.b", "2"), ("a", "1")], None),
            "metadata key 'a' is set both to a value and as the parent of 'a.b'; a key holds a \
             value or keys under it, not both"
        );
        assert_eq!(
            refused(&[("x.y", "1")], Some(r#"{"x": {"y": {"z": 1}}}"#)),
            "metadata key 'x.y' is set both to a value and as the parent of 'x.y.z'; a key holds \
             a value or keys under it, not both"
        );
    }

    #[test]
    fn issue11_depth_and_size_are_capped() {
        built(&[("a.b.c.d.e.f.g.h", "x")], None).expect("8 levels");
        assert_eq!(
            refused(&[("a.b.c.d.e.f.g.h.i", "x")], None),
            "metadata key 'a.b.c.d.e.f.g.h.i' is 9 levels deep; the format allows at most 8 (the \
             metadata object and each object or array in it count one)"
        );
        built(
            &[],
            Some(r#"{"a":{"b":{"c":{"d":{"e":{"f":{"g":[1]}}}}}}}"#),
        )
        .expect("8 levels");
        assert_eq!(
            refused(
                &[],
                Some(r#"{"a":{"b":{"c":{"d":{"e":{"f":{"g":{"h":[1]}}}}}}}}"#)
            ),
            "metadata key 'a.b.c.d.e.f.g.h' is 9 levels deep; the format allows at most 8 (the \
             metadata object and each object or array in it count one)"
        );
        assert_eq!(
            refused(
                &[],
                Some(r#"{"a":{"b":{"c":{"d":{"e":{"f":{"g":{"h":[]}}}}}}}}"#)
            ),
            "metadata key 'a.b.c.d.e.f.g.h' is 9 levels deep; the format allows at most 8 (the \
             metadata object and each object or array in it count one)"
        );
        // {"notes":"..."} is 12 bytes around the string.
        let fits = "n".repeat(limit::METADATA_BYTES - 12);
        built(&[("notes", &fits)], None).expect("exactly 16 KiB");
        let over = "n".repeat(limit::METADATA_BYTES - 11);
        assert_eq!(
            refused(&[("notes", &over)], None),
            "metadata is 16385 bytes as compact JSON, over the format's limit of 16384 bytes"
        );
    }

    #[test]
    fn issue11_documented_keys_have_their_types() {
        for (key, file) in [
            ("preprocess.mean", r#"{"preprocess": {"mean": "0.5"}}"#),
            ("preprocess.std", r#"{"preprocess": {"std": []}}"#),
            ("preprocess.scale", r#"{"preprocess": {"scale": [1, "2"]}}"#),
            (
                "preprocess.input_size",
                r#"{"preprocess": {"input_size": true}}"#,
            ),
        ] {
            let message = refused(&[], Some(file));
            assert!(
                message.starts_with(&format!(
                    "metadata key '{key}' must be a number or a non-empty array of numbers, not "
                )),
                "{message}"
            );
        }
        assert_eq!(
            refused(&[("preprocess.colour_order", "RGB")], None),
            "metadata key 'preprocess.colour_order' must be \"rgb\" or \"bgr\", not the string \"RGB\""
        );
        built(&[("preprocess.colour_order", "bgr")], None).expect("bgr");
        assert_eq!(
            refused(&[("eval.top1", "0.91")], None),
            "metadata key 'eval.top1' must be a number (every key under eval is a result), not \
             the string \"0.91\""
        );
        built(
            &[],
            Some(r#"{"eval": {"reserve_2026": {"top1": 0.91, "top5": 0.99}}}"#),
        )
        .expect("nested results");
        assert_eq!(
            refused(&[], Some(r#"{"data": {"snapshot": 20261130}}"#)),
            "metadata key 'data.snapshot' must be a string, not the number 20261130"
        );
        assert_eq!(
            refused(&[], Some(r#"{"notes": ["a"]}"#)),
            "metadata key 'notes' must be a string, not an array"
        );
        assert_eq!(
            refused(&[("preprocess", "imagenet")], None),
            "metadata key 'preprocess' must be an object (documented keys go under it), not the \
             string \"imagenet\""
        );
        built(
            &[("preprocess.resize", "bilinear"), ("team.owner", "survey")],
            None,
        )
        .expect("free keys");
        assert!(takes_string("notes") && takes_string("data.snapshot"));
        assert!(takes_string("preprocess.resize") && takes_string("anything"));
        assert!(takes_string("preprocess.colour_order"));
        assert!(!takes_string("eval.top1") && !takes_string("preprocess.mean"));
        assert!(!takes_string("preprocess") && !takes_string("eval"));
    }

    #[test]
    fn issue11_files_are_strict_json_objects_without_null_or_empty_objects() {
        for (file, message) in [
            ("[1]", "metadata file must hold a JSON object, not an array"),
            (
                r#"{"a": 1,}"#,
                "metadata file is not valid: trailing comma at line 1 column 9",
            ),
            (
                r#"{"a": 1} {"b": 2}"#,
                "metadata file is not valid: trailing characters at line 1 column 10",
            ),
            (
                r#"{"a": null}"#,
                "metadata key 'a' is null; leave out a key that has no value",
            ),
            (
                r#"{"a": {}}"#,
                "metadata key 'a' is an empty object; leave out a key that has no value",
            ),
            (
                r#"{"a": [{"b": 1}]}"#,
                "metadata key 'a' holds an object inside an array; arrays hold numbers, strings, \
                 booleans and arrays",
            ),
            (
                r#"{"a": 1e400}"#,
                "metadata file is not valid: number out of range at line 1 column 11",
            ),
        ] {
            assert_eq!(refused(&[], Some(file)), message, "{file}");
        }
        assert_eq!(
            built(&[], Some("{}")).expect("an empty file sets nothing"),
            None
        );
    }

    #[test]
    fn issue11_the_device_refuses_what_pack_would_refuse() {
        // Hand-written objects, as a holder of a bundle key could sign them.
        for (text, message) in [
            (
                r#"{}"#,
                "the metadata object is empty; leave the field out instead",
            ),
            (
                r#"{"b": 1, "a": 2}"#,
                "metadata key 'a' comes after 'b'; a manifest stores keys in sorted order at line 1 column 12",
            ),
            (
                r#"{"a": 1, "a": 1}"#,
                "metadata key 'a' appears twice at line 1 column 12",
            ),
            (
                r#"{"A": 1}"#,
                "metadata key 'A' is not allowed: each dot-separated segment must be 1 to 64 bytes \
                 of a-z, 0-9 and _",
            ),
            (
                r#"{"a.b": 1}"#,
                "metadata key 'a.b' is not allowed: each dot-separated segment must be 1 to 64 \
                 bytes of a-z, 0-9 and _",
            ),
            (
                r#"{"a": null}"#,
                "metadata key 'a' is null; leave out a key that has no value",
            ),
            (
                r#"{"preprocess": {"colour_order": "grb"}}"#,
                "metadata key 'preprocess.colour_order' must be \"rgb\" or \"bgr\", not the \
                 string \"grb\"",
            ),
            ("[]", "metadata must be a JSON object, not an array"),
        ] {
            assert_eq!(read(text).map(|_| ()), Err(message.to_string()), "{text}");
        }
        let nine = r#"{"a":{"b":{"c":{"d":{"e":{"f":{"g":{"h":{"i":1}}}}}}}}}"#;
        assert_eq!(
            read(nine).map(|_| ()),
            Err(
                "metadata key 'a.b.c.d.e.f.g.h' is 9 levels deep; the format allows at most 8 \
                 (the metadata object and each object or array in it count one)"
                    .to_string()
            )
        );
    }

    #[test]
    fn issue11_policy_equality_compares_numbers_by_value() {
        assert!(same_value(&Value::from(1), &Value::from(1.0)));
        assert!(same_value(&Value::from(-3), &Value::from(-3)));
        assert!(!same_value(&Value::from(1), &Value::from(1.5)));
        assert!(!same_value(&Value::from(1), &Value::from("1")));
        assert!(same_value(
            &serde_json::json!([0.5, 1, [2]]),
            &serde_json::json!([0.5, 1.0, [2.0]])
        ));
        assert!(!same_value(
            &serde_json::json!([1]),
            &serde_json::json!([1, 1])
        ));
        assert!(same_value(
            &serde_json::json!({"a": 1}),
            &serde_json::json!({"a": 1.0})
        ));
        assert!(!same_value(
            &serde_json::json!({"a": 1}),
            &serde_json::json!({"b": 1})
        ));
        // What a refusal shows of a value: no character that hides or reorders text.
        assert_eq!(
            shown_value(&Value::from("rgb\u{202e}\n")),
            r#""rgb\u{202e}\n""#
        );
        assert_eq!(shown_value(&Value::from("x".repeat(200))).len(), 103);
    }
}
