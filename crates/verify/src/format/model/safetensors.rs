//! A bounded reader for safetensors files: an 8-byte little-endian header length, a JSON header
//! of tensor name -> {dtype, shape, data_offsets} (plus an optional `__metadata__` object of
//! strings), then the tensors' bytes.
//!
//! Only the header is read; the data region is checked by arithmetic: every tensor's offsets
//! must lie inside it, its size must be its shape times its dtype's size, and together the
//! tensors must cover the region exactly, with no gap and no overlap. A header naming a tensor
//! twice is refused (a generic JSON value would keep the last one silently). The rules follow
//! the safetensors format as implemented by the `safetensors` package 0.8.
//!
//! Why a reader of our own, not the format's reference crate (`safetensors` 0.8.0, the code the
//! Python package runs), weighed for issue 11:
//! - Bounded reading. Its `SafeTensors::read_metadata` takes the whole file as one buffer (it
//!   checks that the tensors cover it to the last byte), so a device would hold the model in
//!   memory or map it; only its `Metadata` type's `Deserialize` could be used on the header
//!   alone. That parse goes through a `#[serde(flatten)]` map into a `HashMap`: serde buffers the
//!   whole header as generic values first, and nothing caps the tensor count, a shape's rank or
//!   the `__metadata__` entries (only its own 100,000,000-byte header limit, which we keep).
//! - Strictness. A header naming a tensor twice is read with the last entry kept, silently: the
//!   Python package 0.8.0 loads `{"a":{... [0,8]}, "a":{... [0,4]}}` over 4 data bytes as one
//!   tensor `a` (tried with `safetensors.numpy.load`). Signed records must not depend on which
//!   of two entries a map keeps; this reader refuses it.
//! - Size. With the crate reading headers behind our caps (no default features, `alloc`),
//!   `benches/size/measure` measured the verifier growing from 922,064 to 960,032 bytes in the
//!   `size` profile (+37,968 bytes, +4.1 %) and from 1,270,128 to 1,314,488 bytes in `speed`
//!   (+44,360), for the crate and `hashbrown`, on 2 December 2026 (rustc 1.95.0).
//!
//! So the hand-written reader stays; `crates/verify/tests/real_models.rs` and
//! `model_readers.rs` compare it field by field with what the safetensors 0.8.0 package reads.

use std::collections::HashSet;
use std::fmt;
use std::io::Read;

use serde::de::{self, MapAccess, SeqAccess, Visitor};
use serde::{Deserialize, Deserializer};

use crate::error::{Error, ErrorKind, Result};

use super::{
    DType, ModelFormat, ModelSignature, TensorEntry, WeightTotals, element_count, limit, list,
    read_error,
};

fn malformed(message: String) -> Error {
    Error::new(ErrorKind::Model, format!("safetensors: {message}"))
}

/// The key of the optional metadata object in the header.
const METADATA_KEY: &str = "__metadata__";

/// The first allocation for the header; it grows only as bytes actually arrive, so a false
/// length costs no memory.
const HEADER_INITIAL_CAPACITY: u64 = 64 * 1024;

/// Reads a safetensors file's signature and its tensors (in data order) from `reader`, which
/// holds exactly `len` bytes.
pub(crate) fn read<R: Read>(mut reader: R, len: u64) -> Result<(ModelSignature, Vec<TensorEntry>)> {
    if len < 8 {
        return Err(malformed(format!(
            "the file is {len} bytes, shorter than the 8-byte header length"
        )));
    }
    let mut prefix = [0u8; 8];
    reader
        .read_exact(&mut prefix)
        .map_err(|e| read_error(ModelFormat::Safetensors, len, e))?;
    let header_len = u64::from_le_bytes(prefix);
    if header_len > limit::SAFETENSORS_HEADER_BYTES {
        return Err(malformed(format!(
            "header length {header_len} is over the cap of {} bytes",
            limit::SAFETENSORS_HEADER_BYTES
        )));
    }
    let after = len - 8;
    if header_len > after {
        return Err(malformed(format!(
            "header length {header_len} is larger than the {after} bytes after it"
        )));
    }
    let mut header = Vec::with_capacity(header_len.min(HEADER_INITIAL_CAPACITY) as usize);
    let got = (&mut reader)
        .take(header_len)
        .read_to_end(&mut header)
        .map_err(|e| read_error(ModelFormat::Safetensors, len, e))?;
    if got as u64 != header_len {
        return Err(read_error(
            ModelFormat::Safetensors,
            len,
            std::io::ErrorKind::UnexpectedEof.into(),
        ));
    }
    let data_len = after - header_len;
    let header = std::str::from_utf8(&header)
        .map_err(|e| malformed(format!("header is not utf-8 (at byte {})", e.valid_up_to())))?;
    if !header.starts_with('{') {
        return Err(malformed("header does not begin with '{'".into()));
    }
    let Header(entries) =
        serde_json::from_str(header).map_err(|e| malformed(format!("header is not valid: {e}")))?;
    validate(entries, data_len)
}

/// One tensor's header entry.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct Entry {
    dtype: String,
    shape: Shape,
    data_offsets: (u64, u64),
}

/// A shape, refused past [`limit::WEIGHT_RANK`] dimensions before it grows.
struct Shape(Vec<u64>);

impl<'de> Deserialize<'de> for Shape {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct ShapeVisitor;
        impl<'de> Visitor<'de> for ShapeVisitor {
            type Value = Shape;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a list of whole numbers")
            }
            fn visit_seq<A: SeqAccess<'de>>(
                self,
                mut seq: A,
            ) -> std::result::Result<Shape, A::Error> {
                let mut dims = Vec::new();
                while let Some(dim) = seq.next_element::<u64>()? {
                    if dims.len() >= limit::WEIGHT_RANK {
                        return Err(de::Error::custom(format!(
                            "a shape has more than {} dimensions",
                            limit::WEIGHT_RANK
                        )));
                    }
                    dims.push(dim);
                }
                Ok(Shape(dims))
            }
        }
        deserializer.deserialize_seq(ShapeVisitor)
    }
}

/// The header: tensor entries in file order, metadata checked and dropped.
struct Header(Vec<(String, Entry)>);

impl<'de> Deserialize<'de> for Header {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct HeaderVisitor;
        impl<'de> Visitor<'de> for HeaderVisitor {
            type Value = Header;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("an object of tensor names to entries")
            }
            fn visit_map<A: MapAccess<'de>>(
                self,
                mut map: A,
            ) -> std::result::Result<Header, A::Error> {
                let mut entries = Vec::new();
                let mut names = HashSet::new();
                let mut metadata_seen = false;
                while let Some(name) = map.next_key::<String>()? {
                    if name == METADATA_KEY {
                        if metadata_seen {
                            return Err(de::Error::custom("'__metadata__' appears twice"));
                        }
                        metadata_seen = true;
                        map.next_value::<Metadata>()?;
                        continue;
                    }
                    if entries.len() >= limit::WEIGHT_TENSORS {
                        return Err(de::Error::custom(format!(
                            "the header lists more than {} tensors",
                            limit::WEIGHT_TENSORS
                        )));
                    }
                    if !names.insert(name.clone()) {
                        return Err(de::Error::custom(format!("tensor '{name}' appears twice")));
                    }
                    let entry = map.next_value::<Entry>()?;
                    entries.push((name, entry));
                }
                Ok(Header(entries))
            }
        }
        deserializer.deserialize_map(HeaderVisitor)
    }
}

/// `__metadata__`: an object of strings to strings, each key once.
struct Metadata;

impl<'de> Deserialize<'de> for Metadata {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct MetadataVisitor;
        impl<'de> Visitor<'de> for MetadataVisitor {
            type Value = Metadata;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("an object of strings to strings")
            }
            fn visit_map<A: MapAccess<'de>>(
                self,
                mut map: A,
            ) -> std::result::Result<Metadata, A::Error> {
                let mut keys = HashSet::new();
                while let Some(key) = map.next_key::<String>()? {
                    if keys.len() >= limit::SAFETENSORS_METADATA_ENTRIES {
                        return Err(de::Error::custom(format!(
                            "'__metadata__' has more than {} entries",
                            limit::SAFETENSORS_METADATA_ENTRIES
                        )));
                    }
                    if !keys.insert(key.clone()) {
                        return Err(de::Error::custom(format!(
                            "metadata key '{key}' appears twice"
                        )));
                    }
                    map.next_value::<StringOnly>()?;
                }
                Ok(Metadata)
            }
        }
        deserializer.deserialize_map(MetadataVisitor)
    }
}

/// A JSON string whose content is not kept.
struct StringOnly;

impl<'de> Deserialize<'de> for StringOnly {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct StringVisitor;
        impl Visitor<'_> for StringVisitor {
            type Value = StringOnly;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a string")
            }
            fn visit_str<E: de::Error>(self, _: &str) -> std::result::Result<StringOnly, E> {
                Ok(StringOnly)
            }
        }
        deserializer.deserialize_str(StringVisitor)
    }
}

fn validate(
    mut entries: Vec<(String, Entry)>,
    data_len: u64,
) -> Result<(ModelSignature, Vec<TensorEntry>)> {
    // Sort by offsets so that coverage is one pass: each tensor must begin where the previous
    // one ended.
    entries.sort_by_key(|(_, entry)| entry.data_offsets);
    let mut weights = WeightTotals::default();
    let mut covered = 0u64;
    let mut previous: Option<(&str, (u64, u64))> = None;
    let mut tensors = Vec::with_capacity(entries.len());
    for (name, entry) in &entries {
        let (begin, end) = entry.data_offsets;
        let dtype = DType::from_safetensors_name(&entry.dtype).ok_or_else(|| {
            malformed(format!(
                "tensor '{name}' has unknown dtype '{}'",
                entry.dtype
            ))
        })?;
        if end < begin {
            return Err(malformed(format!(
                "tensor '{name}' has data offsets [{begin}, {end}], which end before they begin"
            )));
        }
        if end > data_len {
            return Err(malformed(format!(
                "tensor '{name}' has data offsets [{begin}, {end}], past the end of the {data_len}-byte data region"
            )));
        }
        let shape = &entry.shape.0;
        let elements = element_count(shape).ok_or_else(|| {
            malformed(format!(
                "tensor '{name}' has shape {} whose element count overflows 64 bits",
                list(shape)
            ))
        })?;
        let bits = u128::from(dtype.bits().unwrap_or(8));
        let total_bits = u128::from(elements) * bits;
        if total_bits % 8 != 0 {
            return Err(malformed(format!(
                "tensor '{name}' has shape {} of {}, which does not fill whole bytes",
                list(shape),
                entry.dtype
            )));
        }
        let bytes = total_bits / 8;
        if bytes != u128::from(end - begin) {
            return Err(malformed(format!(
                "tensor '{name}' has shape {} of {} ({bytes} bytes), but its data offsets [{begin}, {end}] hold {} bytes",
                list(shape),
                entry.dtype,
                end - begin
            )));
        }
        if begin < covered {
            let (other, (other_begin, other_end)) =
                previous.expect("invariant: covered > 0 only after a tensor");
            return Err(malformed(format!(
                "tensor '{name}' (data offsets [{begin}, {end}]) overlaps tensor '{other}' (data offsets [{other_begin}, {other_end}])"
            )));
        }
        if begin > covered {
            return Err(malformed(format!(
                "bytes {covered} to {begin} of the data region belong to no tensor"
            )));
        }
        // `bytes` equals `end - begin` here, so it fits in u64.
        weights.add(dtype, elements, end - begin).ok_or_else(|| {
            malformed("the tensors' total parameter count overflows 64 bits".into())
        })?;
        covered = end;
        previous = Some((name, entry.data_offsets));
        tensors.push(TensorEntry {
            name: name.clone(),
            dtype,
            shape: shape.clone(),
        });
    }
    if covered != data_len {
        return Err(malformed(format!(
            "bytes {covered} to {data_len} of the data region belong to no tensor"
        )));
    }
    let weights_8bit = weights.weights_8bit();
    let signature = ModelSignature {
        format: ModelFormat::Safetensors,
        rules: 1,
        ir_version: None,
        opset: None,
        producer: None,
        producer_version: None,
        inputs: Vec::new(),
        outputs: Vec::new(),
        weight_tensors: weights.tensors,
        parameters: weights.parameters,
        weights_8bit,
        bytes_by_dtype: weights.bytes_by_dtype,
        classifier: None,
    };
    Ok((signature, tensors))
}
