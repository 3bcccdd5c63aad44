//! Model awareness: what a model file says about itself, so that a signed bundle that would still
//! break the app (a changed input size, an output with a different class count, 8-bit data fed to
//! a float model) is caught at pack time and again on the device, before the swap.
//!
//! Two formats are read: ONNX (a protobuf `ModelProto`, read by a small bounded wire-format
//! reader of our own that walks only the fields it needs and skips weight data without keeping
//! it) and safetensors (an 8-byte little-endian header length, then a JSON header). Any other
//! file is an opaque model: it is packed and installed, but carries no [`ModelSignature`].
//! Every length, count and size read from a model file is checked against the file's length and
//! against the caps in [`limit`] before anything is allocated; memory does not grow with the
//! size of the weights.
//!
//! The app states what its code expects in a [`CompatibilityPolicy`]; the recorded signature is
//! checked against it before a bundle is installed.

use std::cmp::Ordering;
use std::collections::BTreeMap;
use std::fmt;
use std::fs::File;
use std::io::{self, BufReader, Read, Seek, SeekFrom};
use std::path::Path;

use serde::de::{self, MapAccess, Visitor};
use serde::{Deserialize, Deserializer, Serialize, Serializer};

use crate::error::{Error, ErrorKind, Result};
use crate::format::MODEL_READING_RULES;

mod onnx;
mod safetensors;

/// Caps the model readers hold, whatever the file declares.
pub mod limit {
    /// The most graph inputs, and separately outputs, a signature may list.
    pub const VALUES: usize = 32;
    /// The most inputs a graph may list before initializers are taken out of them (old ONNX
    /// files list every weight as a graph input too).
    pub const RAW_INPUTS: usize = 4096;
    /// The highest rank (number of dimensions) of a graph input or output.
    pub const RANK: usize = 16;
    /// The highest rank of a weight tensor.
    pub const WEIGHT_RANK: usize = 64;
    /// The most weight tensors (ONNX initializers, safetensors entries) in one model.
    pub const WEIGHT_TENSORS: usize = 100_000;
    /// The longest name of a graph input or output, in bytes.
    pub const VALUE_NAME_BYTES: usize = 256;
    /// The longest name of a weight tensor, in bytes.
    pub const WEIGHT_NAME_BYTES: usize = 4096;
    /// The longest symbolic dimension name (ONNX `dim_param`), in bytes.
    pub const DIM_PARAM_BYTES: usize = 128;
    /// The longest producer name or version, or opset domain, in bytes.
    pub const PRODUCER_BYTES: usize = 256;
    /// The largest safetensors JSON header, in bytes: the reference implementation's own
    /// limit (`MAX_HEADER_SIZE` in the safetensors crate is 100,000,000).
    pub const SAFETENSORS_HEADER_BYTES: u64 = 100_000_000;
    /// The most `__metadata__` entries in a safetensors header.
    pub const SAFETENSORS_METADATA_ENTRIES: usize = 4096;
    /// The deepest an ONNX subgraph (an attribute graph of If, Loop, Scan, ...) may be nested
    /// below the main graph; real models nest a few levels.
    pub const SUBGRAPH_DEPTH: usize = 16;
}

/// A model file format ampoule can read a signature from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
#[non_exhaustive]
pub enum ModelFormat {
    /// ONNX: a protobuf `ModelProto` (file extension `.onnx`).
    Onnx,
    /// safetensors: header length, JSON header, raw tensor data (file extension
    /// `.safetensors`).
    Safetensors,
}

impl ModelFormat {
    pub_for_release! {
        /// The format a file name declares by its extension (ASCII case ignored); `None` for an
        /// opaque model.
        ///
        /// The extension decides, not the content: a file named `.onnx` that does not parse is an
        /// error, never silently opaque, and a file of another name is never guessed at.
        fn from_file_name(name: &str) -> Option<ModelFormat> {
            let (_, extension) = name.rsplit_once('.')?;
            if extension.eq_ignore_ascii_case("onnx") {
                Some(ModelFormat::Onnx)
            } else if extension.eq_ignore_ascii_case("safetensors") {
                Some(ModelFormat::Safetensors)
            } else {
                None
            }
        }
    }

    pub_for_release! {
        /// The name used in JSON and messages (apps have it from `Display`).
        fn name(self) -> &'static str {
            match self {
                ModelFormat::Onnx => "onnx",
                ModelFormat::Safetensors => "safetensors",
            }
        }
    }
}

impl fmt::Display for ModelFormat {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// The element type of a tensor, under one vocabulary for both formats.
///
/// Ordered by name, so maps keyed by dtype serialize in a stable order.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[non_exhaustive]
#[allow(missing_docs)] // each variant is named after the type it stands for
pub enum DType {
    #[serde(rename = "float32")]
    Float32,
    #[serde(rename = "uint8")]
    Uint8,
    #[serde(rename = "int8")]
    Int8,
    #[serde(rename = "uint16")]
    Uint16,
    #[serde(rename = "int16")]
    Int16,
    #[serde(rename = "int32")]
    Int32,
    #[serde(rename = "int64")]
    Int64,
    #[serde(rename = "string")]
    String,
    #[serde(rename = "bool")]
    Bool,
    #[serde(rename = "float16")]
    Float16,
    #[serde(rename = "float64")]
    Float64,
    #[serde(rename = "uint32")]
    Uint32,
    #[serde(rename = "uint64")]
    Uint64,
    #[serde(rename = "complex64")]
    Complex64,
    #[serde(rename = "complex128")]
    Complex128,
    #[serde(rename = "bfloat16")]
    Bfloat16,
    #[serde(rename = "float8e4m3fn")]
    Float8E4M3Fn,
    #[serde(rename = "float8e4m3fnuz")]
    Float8E4M3Fnuz,
    #[serde(rename = "float8e5m2")]
    Float8E5M2,
    #[serde(rename = "float8e5m2fnuz")]
    Float8E5M2Fnuz,
    #[serde(rename = "uint4")]
    Uint4,
    #[serde(rename = "int4")]
    Int4,
    #[serde(rename = "float4e2m1")]
    Float4E2M1,
    #[serde(rename = "float8e8m0")]
    Float8E8M0,
    #[serde(rename = "uint2")]
    Uint2,
    #[serde(rename = "int2")]
    Int2,
    #[serde(rename = "float6e2m3")]
    Float6E2M3,
    #[serde(rename = "float6e3m2")]
    Float6E3M2,
}

/// Every dtype with its ONNX `TensorProto.DataType` code (onnx.proto) and its safetensors name
/// (the `Dtype` enum of the safetensors format). One table, so the three names cannot drift.
const DTYPES: [(DType, &str, i64, Option<&str>); 28] = [
    (DType::Float32, "float32", 1, Some("F32")),
    (DType::Uint8, "uint8", 2, Some("U8")),
    (DType::Int8, "int8", 3, Some("I8")),
    (DType::Uint16, "uint16", 4, Some("U16")),
    (DType::Int16, "int16", 5, Some("I16")),
    (DType::Int32, "int32", 6, Some("I32")),
    (DType::Int64, "int64", 7, Some("I64")),
    (DType::String, "string", 8, None),
    (DType::Bool, "bool", 9, Some("BOOL")),
    (DType::Float16, "float16", 10, Some("F16")),
    (DType::Float64, "float64", 11, Some("F64")),
    (DType::Uint32, "uint32", 12, Some("U32")),
    (DType::Uint64, "uint64", 13, Some("U64")),
    (DType::Complex64, "complex64", 14, Some("C64")),
    (DType::Complex128, "complex128", 15, None),
    (DType::Bfloat16, "bfloat16", 16, Some("BF16")),
    (DType::Float8E4M3Fn, "float8e4m3fn", 17, Some("F8_E4M3")),
    // The two FNUZ names as the safetensors 0.8.0 wheel's library spells them (issue 11).
    (
        DType::Float8E4M3Fnuz,
        "float8e4m3fnuz",
        18,
        Some("F8_E4M3FNUZ"),
    ),
    (DType::Float8E5M2, "float8e5m2", 19, Some("F8_E5M2")),
    (
        DType::Float8E5M2Fnuz,
        "float8e5m2fnuz",
        20,
        Some("F8_E5M2FNUZ"),
    ),
    (DType::Uint4, "uint4", 21, None),
    (DType::Int4, "int4", 22, None),
    (DType::Float4E2M1, "float4e2m1", 23, Some("F4")),
    (DType::Float8E8M0, "float8e8m0", 24, Some("F8_E8M0")),
    (DType::Uint2, "uint2", 25, None),
    (DType::Int2, "int2", 26, None),
    (DType::Float6E2M3, "float6e2m3", 27, Some("F6_E2M3")),
    (DType::Float6E3M2, "float6e3m2", 28, Some("F6_E3M2")),
];

impl DType {
    fn entry(self) -> &'static (DType, &'static str, i64, Option<&'static str>) {
        DTYPES
            .iter()
            .find(|entry| entry.0 == self)
            .expect("invariant: DTYPES lists every DType variant")
    }

    /// The name used in JSON and messages (`float32`, `int8`, ...).
    pub fn name(self) -> &'static str {
        self.entry().1
    }

    /// The dtype of a name as [`DType::name`] gives it.
    pub fn from_name(name: &str) -> Option<DType> {
        DTYPES
            .iter()
            .find(|entry| entry.1 == name)
            .map(|entry| entry.0)
    }

    /// The ONNX `TensorProto.DataType` code.
    pub fn onnx_code(self) -> i64 {
        self.entry().2
    }

    /// The dtype of an ONNX `TensorProto.DataType` code.
    pub fn from_onnx_code(code: i64) -> Option<DType> {
        DTYPES
            .iter()
            .find(|entry| entry.2 == code)
            .map(|entry| entry.0)
    }

    /// The safetensors name (`F32`, `I8`, ...), if the format has this type.
    pub fn safetensors_name(self) -> Option<&'static str> {
        self.entry().3
    }

    /// The dtype of a safetensors name.
    pub fn from_safetensors_name(name: &str) -> Option<DType> {
        DTYPES
            .iter()
            .find(|entry| entry.3 == Some(name))
            .map(|entry| entry.0)
    }

    /// Bits per element; `None` for strings, whose size varies.
    pub fn bits(self) -> Option<u32> {
        use DType::*;
        Some(match self {
            String => return None,
            Uint2 | Int2 => 2,
            Uint4 | Int4 | Float4E2M1 => 4,
            Float6E2M3 | Float6E3M2 => 6,
            Uint8 | Int8 | Bool | Float8E4M3Fn | Float8E4M3Fnuz | Float8E5M2 | Float8E5M2Fnuz
            | Float8E8M0 => 8,
            Uint16 | Int16 | Float16 | Bfloat16 => 16,
            Float32 | Int32 | Uint32 => 32,
            Float64 | Int64 | Uint64 | Complex64 => 64,
            Complex128 => 128,
        })
    }

    /// Whether weights of this type count as quantized to 8 bits or fewer: the 8-bit and
    /// narrower integer and float types (not `bool`, which is 8 bits wide but holds no weight).
    pub fn is_8bit_or_narrower(self) -> bool {
        !matches!(self, DType::Bool) && self.bits().is_some_and(|bits| bits <= 8)
    }

    /// The bytes `elements` elements of this type occupy, packed (sub-byte types share bytes);
    /// `None` for strings or when the count overflows.
    pub fn bytes_for(self, elements: u64) -> Option<u64> {
        let bits = u128::from(self.bits()?);
        let bytes = (u128::from(elements) * bits).div_ceil(8);
        u64::try_from(bytes).ok()
    }
}

impl PartialOrd for DType {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}

impl Ord for DType {
    fn cmp(&self, other: &Self) -> Ordering {
        self.name().cmp(other.name())
    }
}

impl fmt::Display for DType {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// One dimension of a recorded tensor shape.
///
/// In JSON: a number for a fixed size, a string for a named (symbolic) size such as a batch
/// dimension `"N"`, and `null` for a dimension the model leaves unknown and unnamed.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub enum Dim {
    /// A fixed size.
    Fixed(u64),
    /// A size chosen at run time, named by the model (ONNX `dim_param`).
    Symbolic(String),
    /// A size the model neither fixes nor names.
    Unknown,
}

impl fmt::Display for Dim {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Dim::Fixed(size) => write!(f, "{size}"),
            Dim::Symbolic(name) => f.write_str(name),
            Dim::Unknown => f.write_str("?"),
        }
    }
}

impl Serialize for Dim {
    fn serialize<S: Serializer>(&self, serializer: S) -> std::result::Result<S::Ok, S::Error> {
        match self {
            Dim::Fixed(size) => serializer.serialize_u64(*size),
            Dim::Symbolic(name) => serializer.serialize_str(name),
            Dim::Unknown => serializer.serialize_none(),
        }
    }
}

impl<'de> Deserialize<'de> for Dim {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct DimVisitor;
        impl<'de> Visitor<'de> for DimVisitor {
            type Value = Dim;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a dimension: a whole number, a name, or null")
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> std::result::Result<Dim, E> {
                Ok(Dim::Fixed(v))
            }
            fn visit_str<E: de::Error>(self, v: &str) -> std::result::Result<Dim, E> {
                if v.is_empty() {
                    return Err(E::custom("a symbolic dimension name is empty"));
                }
                Ok(Dim::Symbolic(v.to_owned()))
            }
            fn visit_unit<E: de::Error>(self) -> std::result::Result<Dim, E> {
                Ok(Dim::Unknown)
            }
            fn visit_none<E: de::Error>(self) -> std::result::Result<Dim, E> {
                Ok(Dim::Unknown)
            }
        }
        deserializer.deserialize_any(DimVisitor)
    }
}

/// Shows a shape as `[N, 3, 96, 96]` for messages.
pub(crate) struct ShapeDisplay<'a>(pub(crate) &'a [Dim]);

impl fmt::Display for ShapeDisplay<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("[")?;
        for (i, dim) in self.0.iter().enumerate() {
            if i > 0 {
                f.write_str(", ")?;
            }
            write!(f, "{dim}")?;
        }
        f.write_str("]")
    }
}

/// What kind of value a graph input or output carries. Apps almost always feed and read
/// dense tensors; the other ONNX kinds are recorded so a policy can refuse them by name.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum ValueKind {
    /// A dense tensor.
    #[default]
    Tensor,
    /// An ONNX sparse tensor.
    SparseTensor,
    /// An ONNX sequence (its element type is not recorded).
    Sequence,
    /// An ONNX map (its key and value types are not recorded).
    Map,
    /// An ONNX optional value (its element type is not recorded).
    Optional,
    /// An ONNX opaque value.
    Opaque,
}

impl ValueKind {
    /// The name used in JSON and messages.
    pub fn name(self) -> &'static str {
        match self {
            ValueKind::Tensor => "tensor",
            ValueKind::SparseTensor => "sparse_tensor",
            ValueKind::Sequence => "sequence",
            ValueKind::Map => "map",
            ValueKind::Optional => "optional",
            ValueKind::Opaque => "opaque",
        }
    }

    fn is_tensor(&self) -> bool {
        *self == ValueKind::Tensor
    }
}

/// A graph input or output: its name, kind, element type and shape.
///
/// JSON: `{"name":"image","dtype":"float32","shape":["N",3,96,96]}`; `kind` appears only when
/// the value is not a dense tensor; `dtype` is `null` when the model leaves it undefined, and
/// `shape` is `null` when the model records no shape (not even a rank).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
#[non_exhaustive]
pub struct ValueSignature {
    /// The name the app feeds or reads the value by.
    pub name: String,
    /// What kind of value this is.
    #[serde(default, skip_serializing_if = "ValueKind::is_tensor")]
    pub kind: ValueKind,
    /// The element type, if the model states one.
    pub dtype: Option<DType>,
    /// The shape, if the model records one.
    pub shape: Option<Vec<Dim>>,
}

/// Shown as `image: float32 [N, 3, 96, 96]`; a non-tensor value shows its kind, and `?`
/// stands for an undefined dtype or an unrecorded shape.
impl fmt::Display for ValueSignature {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: ", self.name)?;
        if self.kind != ValueKind::Tensor {
            write!(f, "{} ", self.kind.name())?;
        }
        match self.dtype {
            Some(dtype) => write!(f, "{dtype} ")?,
            None => f.write_str("? ")?,
        }
        match &self.shape {
            Some(shape) => write!(f, "{}", ShapeDisplay(shape)),
            None => f.write_str("[?]"),
        }
    }
}

/// Bytes of weight data per dtype, in a stable (by name) order. In JSON an object such as
/// `{"float32":1152,"int8":216}`; a dtype named twice is refused.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize)]
#[serde(transparent)]
pub struct BytesByDtype(pub BTreeMap<DType, u64>);

impl BytesByDtype {
    /// The total over all dtypes (saturating: a signature is not trusted to be sane).
    pub fn total(&self) -> u64 {
        self.0
            .values()
            .fold(0u64, |sum, bytes| sum.saturating_add(*bytes))
    }

    /// The bytes of one dtype (0 if absent).
    pub fn get(&self, dtype: DType) -> u64 {
        self.0.get(&dtype).copied().unwrap_or(0)
    }

    pub(crate) fn add(&mut self, dtype: DType, bytes: u64) -> Option<()> {
        let entry = self.0.entry(dtype).or_insert(0);
        *entry = entry.checked_add(bytes)?;
        Some(())
    }
}

impl<'de> Deserialize<'de> for BytesByDtype {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> std::result::Result<Self, D::Error> {
        struct MapVisitor;
        impl<'de> Visitor<'de> for MapVisitor {
            type Value = BytesByDtype;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("an object of dtype names to byte counts")
            }
            fn visit_map<A: MapAccess<'de>>(
                self,
                mut map: A,
            ) -> std::result::Result<BytesByDtype, A::Error> {
                let mut out = BTreeMap::new();
                while let Some((dtype, bytes)) = map.next_entry::<DType, u64>()? {
                    if out.insert(dtype, bytes).is_some() {
                        return Err(de::Error::custom(format!(
                            "dtype '{dtype}' appears twice in bytes_by_dtype"
                        )));
                    }
                }
                Ok(BytesByDtype(out))
            }
        }
        deserializer.deserialize_map(MapVisitor)
    }
}

/// What a model file says about itself: the record `pack` puts in the manifest and the device
/// checks against the app's [`CompatibilityPolicy`].
///
/// JSON, fields always in this order:
///
/// ```json
/// {"format":"onnx","rules":2,"ir_version":8,"opset":13,"producer":"trailcam-export",
///  "producer_version":"1.0",
///  "inputs":[{"name":"image","dtype":"float32","shape":["N",3,96,96]}],
///  "outputs":[{"name":"species","dtype":"float32","shape":["N",7]}],
///  "weight_tensors":4,"parameters":147,"weights_8bit":false,"bytes_by_dtype":{"float32":588},
///  "classifier":{"tensor":"species","dim":1}}
/// ```
///
/// `ir_version`, `opset`, `producer` and `producer_version` are `null` when the file does not
/// state them (always for safetensors, which also has no inputs or outputs). `rules` is absent
/// for reading rules 1, and `classifier` when `pack` recorded none. For ONNX, weights are the
/// graph's initializers and, under reading rules 2, the `value` tensors of Constant nodes and
/// the initializers and Constants of subgraphs. Never counted: sparse initializers, a
/// Constant's sparse, scalar or list forms (`sparse_value`, `value_float(s)`,
/// `value_int(s)`), and tensors made at run time (ConstantOfShape and every other operator's
/// output), which are computed, not stored.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
#[non_exhaustive]
pub struct ModelSignature {
    /// The file format.
    pub format: ModelFormat,
    /// The reading rules that produced this record (see
    /// [`crate::format::MODEL_READING_RULES`]); 1 when absent from the JSON, as in every
    /// bundle packed before the field existed.
    #[serde(default = "rules_one", skip_serializing_if = "is_rules_one")]
    pub rules: u32,
    /// ONNX: the IR version.
    pub ir_version: Option<u64>,
    /// ONNX: the version of the default operator set (domain `""` or `ai.onnx`) it imports.
    pub opset: Option<u64>,
    /// ONNX: the producer name.
    pub producer: Option<String>,
    /// ONNX: the producer version.
    pub producer_version: Option<String>,
    /// The graph inputs the app must feed (ONNX initializers listed as inputs are left out).
    pub inputs: Vec<ValueSignature>,
    /// The graph outputs.
    pub outputs: Vec<ValueSignature>,
    /// How many weight tensors (ONNX initializers, safetensors entries) the file holds.
    pub weight_tensors: u64,
    /// The total element count of all weight tensors.
    pub parameters: u64,
    /// Whether at least half of the parameters are stored in a type of 8 bits or fewer (see
    /// [`DType::is_8bit_or_narrower`]): a quantized model keeps small float scales and int32
    /// biases beside its 8-bit weights, so "all of them" would never hold.
    pub weights_8bit: bool,
    /// Weight bytes per dtype.
    pub bytes_by_dtype: BytesByDtype,
    /// The tensor whose classes the label list names, when `pack` recorded it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub classifier: Option<Classifier>,
}

fn rules_one() -> u32 {
    1
}

fn is_rules_one(rules: &u32) -> bool {
    *rules == 1
}

/// Which tensor's classes the label list names, as `pack --classifier-output NAME
/// [--class-dim N]` recorded it, so the device can count them before it unpacks anything.
///
/// Recorded when the count needs more than the model's outputs say: a class dimension given
/// with `--class-dim`, or a safetensors tensor (the format has no outputs, so the tensor's shape
/// is recorded here). JSON: `{"tensor":"species","dim":1}` or
/// `{"tensor":"head.bias","shape":[1000]}`.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
#[non_exhaustive]
pub struct Classifier {
    /// The ONNX output, or the safetensors tensor (a `[C]` bias or a `[C, in]` weight).
    pub tensor: String,
    /// The dimension that counts the classes; when absent, the rule of
    /// [`ModelSignature::class_count`] (ONNX) or dimension 0 (safetensors).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub dim: Option<u32>,
    /// safetensors: the tensor's shape, as the file's header states it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shape: Option<Vec<u64>>,
}

impl ModelSignature {
    /// The input named `name`.
    pub fn input(&self, name: &str) -> Option<&ValueSignature> {
        self.inputs.iter().find(|value| value.name == name)
    }

    /// The output named `name`.
    pub fn output(&self, name: &str) -> Option<&ValueSignature> {
        self.outputs.iter().find(|value| value.name == name)
    }

    /// The tensor whose classes the label list names, and its shape: for ONNX the output named
    /// (or else the recorded classifier's, or else the only output); for safetensors the
    /// recorded classifier tensor, the only one whose shape the record holds.
    fn classified(&self, name: Option<&str>) -> Result<(String, Vec<Dim>)> {
        let recorded = self.classifier.as_ref();
        let name = name.or(recorded.map(|c| c.tensor.as_str()));
        if self.format == ModelFormat::Safetensors {
            let Some(name) = name else {
                return Err(Error::new(
                    ErrorKind::Incompatible,
                    "the safetensors model has no outputs to match labels to: name the tensor that counts the classes (a [C] bias or a [C, in] weight)"
                        .to_string(),
                ));
            };
            return match recorded {
                Some(Classifier {
                    tensor,
                    shape: Some(shape),
                    ..
                }) if tensor == name => {
                    Ok((name.into(), shape.iter().copied().map(Dim::Fixed).collect()))
                }
                _ => Err(Error::new(
                    ErrorKind::Incompatible,
                    format!(
                        "the safetensors model records the shape of no tensor '{name}'; pack it with --classifier-output {name}"
                    ),
                )),
            };
        }
        let value = match name {
            Some(name) => self.output(name).ok_or_else(|| {
                Error::new(
                    ErrorKind::Incompatible,
                    format!(
                        "the model has no output '{name}' (its outputs: {})",
                        name_list(&self.outputs)
                    ),
                )
            })?,
            None => match self.outputs.as_slice() {
                [only] => only,
                [] => {
                    return Err(Error::new(
                        ErrorKind::Incompatible,
                        format!(
                            "the {} model has no outputs to match labels to",
                            self.format
                        ),
                    ));
                }
                many => {
                    return Err(Error::new(
                        ErrorKind::Incompatible,
                        format!(
                            "the model has {} outputs ({}): name the classifier output",
                            many.len(),
                            name_list(many)
                        ),
                    ));
                }
            },
        };
        let refuse = |why: &str| {
            Error::new(
                ErrorKind::Incompatible,
                format!("output '{}' {why}", value.name),
            )
        };
        if value.kind != ValueKind::Tensor {
            return Err(refuse(&format!(
                "is a {}, not a tensor of class scores",
                value.kind.name()
            )));
        }
        match value.shape.as_deref() {
            None => Err(refuse(
                "has no recorded shape, so its class count is unknown",
            )),
            Some([]) => Err(refuse("is a scalar, not a tensor of class scores")),
            Some(shape) => Ok((value.name.clone(), shape.to_vec())),
        }
    }

    /// The class count of the classifier tensor: the ONNX output named (or else the recorded
    /// classifier's, or else the only output), or the safetensors tensor `pack` recorded.
    ///
    /// With `dim` (the app's own), or else the dimension `pack --class-dim` recorded for this
    /// tensor, that dimension counts the classes; it must be fixed. Otherwise, for safetensors,
    /// dimension 0 (a `[C]` bias or a `[C, in]` weight); for ONNX, this rule:
    ///
    /// 1. the last dimension, when it is fixed and larger than 1 (`[N, 7]`, `[N, T, 6625]`);
    /// 2. else, with dimension 0 (the batch) dropped, the one dimension that is fixed and
    ///    larger than 1 when every other one is fixed at 1 (`[1, 1000, 1, 1]`, the shape of
    ///    older image classifiers whose last layer is a convolution);
    /// 3. else 1 when every dimension after the first is fixed at 1 (`[batch, 1]`);
    /// 4. else the count cannot be determined (`[N, 1, H, W]`), and this is an error.
    pub fn class_count(&self, tensor: Option<&str>, dim: Option<u32>) -> Result<u64> {
        let (name, shape) = self.classified(tensor)?;
        let recorded = self
            .classifier
            .as_ref()
            .filter(|c| c.tensor == name)
            .and_then(|c| c.dim);
        let what = if self.format == ModelFormat::Safetensors {
            "tensor"
        } else {
            "output"
        };
        let at = |index: u32| match shape.get(index as usize) {
            Some(Dim::Fixed(size)) => Ok(*size),
            Some(other) => Err(Error::new(
                ErrorKind::Incompatible,
                format!(
                    "{what} '{name}' has shape {}: its class dimension {index} is {other}, \
                     not a fixed size",
                    ShapeDisplay(&shape)
                ),
            )),
            None => Err(Error::new(
                ErrorKind::Incompatible,
                format!(
                    "{what} '{name}' has shape {}, which has no dimension {index}",
                    ShapeDisplay(&shape)
                ),
            )),
        };
        match dim.or(recorded) {
            Some(index) => at(index),
            None if self.format == ModelFormat::Safetensors => at(0),
            None => class_dimension(&shape).ok_or_else(|| {
                Error::new(
                    ErrorKind::Incompatible,
                    format!(
                        "output '{name}' has shape {}: its class count cannot be determined \
                         (neither its last dimension nor a single dimension after the first is \
                         a fixed size above 1 with every other one fixed at 1; name the class \
                         dimension)",
                        ShapeDisplay(&shape)
                    ),
                )
            }),
        }
    }

    /// Checks that a label list of `label_count` labels has one label per class of the
    /// classifier tensor (see [`ModelSignature::class_count`]).
    pub fn check_label_count(
        &self,
        tensor: Option<&str>,
        dim: Option<u32>,
        label_count: usize,
    ) -> Result<()> {
        let classes = self.class_count(tensor, dim)?;
        if u64::try_from(label_count).ok() != Some(classes) {
            let (name, shape) = self.classified(tensor)?;
            let what = if self.format == ModelFormat::Safetensors {
                "tensor"
            } else {
                "output"
            };
            return Err(Error::new(
                ErrorKind::Incompatible,
                format!(
                    "the label list has {label_count} labels, but {what} '{name}' has {classes} classes (shape {})",
                    ShapeDisplay(&shape)
                ),
            ));
        }
        Ok(())
    }

    /// Bytes by dtype, and what the float32 weights would weigh as 8-bit.
    pub fn size_report(&self) -> SizeReport {
        let total_bytes = self.bytes_by_dtype.total();
        let float32_bytes = self.bytes_by_dtype.get(DType::Float32);
        let float32_as_8bit_bytes = float32_bytes.div_ceil(4);
        SizeReport {
            bytes_by_dtype: self.bytes_by_dtype.clone(),
            total_bytes,
            float32_bytes,
            float32_as_8bit_bytes,
            estimated_8bit_total_bytes: total_bytes - float32_bytes + float32_as_8bit_bytes,
        }
    }
}

/// The class count of a tensor shape by the rule of [`ModelSignature::class_count`]; `None`
/// when the rule cannot tell.
fn class_dimension(shape: &[Dim]) -> Option<u64> {
    let fixed = |dim: &Dim| match dim {
        Dim::Fixed(size) => Some(*size),
        Dim::Symbolic(_) | Dim::Unknown => None,
    };
    if let Some(last) = shape.last().and_then(fixed)
        && last > 1
    {
        return Some(last);
    }
    // Dimension 0 is the batch; every other one must be fixed for the rule to say anything.
    let rest: Vec<u64> = shape.get(1..)?.iter().map(fixed).collect::<Option<_>>()?;
    let mut above_one = rest.iter().copied().filter(|&size| size > 1);
    match (above_one.next(), above_one.next()) {
        (None, _) if rest.iter().all(|&size| size == 1) => Some(1),
        (Some(classes), None) if rest.iter().all(|&size| size == 1 || size == classes) => {
            Some(classes)
        }
        _ => None,
    }
}

pub(crate) fn name_list(values: &[ValueSignature]) -> String {
    if values.is_empty() {
        return "none".into();
    }
    let names: Vec<String> = values.iter().map(|v| format!("'{}'", v.name)).collect();
    names.join(", ")
}

/// How much a model's weights weigh, and what they would weigh quantized to 8 bits.
///
/// The estimate uses the common rule of thumb for linear 8-bit quantization: each float32
/// weight becomes one byte, a quarter of its size; other dtypes are counted as they are. Scales
/// and zero points add a little, and layers left in float add more, so it is an estimate.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
#[non_exhaustive]
pub struct SizeReport {
    /// Weight bytes per dtype, as recorded.
    pub bytes_by_dtype: BytesByDtype,
    /// All weight bytes.
    pub total_bytes: u64,
    /// The float32 weight bytes.
    pub float32_bytes: u64,
    /// The float32 weights quantized to 8 bits: a quarter, rounded up (common practice).
    pub float32_as_8bit_bytes: u64,
    /// The whole model's weight bytes with its float32 weights quantized to 8 bits.
    pub estimated_8bit_total_bytes: u64,
}

impl fmt::Display for SizeReport {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (dtype, bytes) in &self.bytes_by_dtype.0 {
            writeln!(f, "{dtype}: {bytes} bytes")?;
        }
        writeln!(f, "total: {} bytes", self.total_bytes)?;
        write!(
            f,
            "with float32 weights as 8-bit (a quarter, common practice): about {} bytes",
            self.estimated_8bit_total_bytes
        )
    }
}

/// Where the readers get bytes from: a plain stream skips weight data by reading and dropping
/// it, a seekable file skips it by seeking.
pub(crate) trait Source {
    fn read_exact(&mut self, buf: &mut [u8]) -> io::Result<()>;
    fn skip(&mut self, n: u64) -> io::Result<()>;
    /// Called once the reader is done, to confirm that bytes skipped by seeking exist.
    fn finish(&mut self) -> io::Result<()>;
}

struct Streamed<R: Read>(BufReader<R>);

impl<R: Read> Source for Streamed<R> {
    fn read_exact(&mut self, buf: &mut [u8]) -> io::Result<()> {
        self.0.read_exact(buf)
    }

    fn skip(&mut self, n: u64) -> io::Result<()> {
        let skipped = io::copy(&mut (&mut self.0).take(n), &mut io::sink())?;
        if skipped != n {
            return Err(io::ErrorKind::UnexpectedEof.into());
        }
        Ok(())
    }

    fn finish(&mut self) -> io::Result<()> {
        Ok(())
    }
}

struct Seeking<R: Read + Seek>(BufReader<R>);

impl<R: Read + Seek> Source for Seeking<R> {
    fn read_exact(&mut self, buf: &mut [u8]) -> io::Result<()> {
        self.0.read_exact(buf)
    }

    fn skip(&mut self, n: u64) -> io::Result<()> {
        let n = i64::try_from(n).map_err(|_| io::Error::from(io::ErrorKind::UnexpectedEof))?;
        self.0.seek_relative(n)
    }

    fn finish(&mut self) -> io::Result<()> {
        let here = self.0.stream_position()?;
        let end = self.0.seek(SeekFrom::End(0))?;
        if end < here {
            return Err(io::ErrorKind::UnexpectedEof.into());
        }
        Ok(())
    }
}

/// Reads the signature of a model file from a stream, choosing the format by `file_name`'s
/// extension (see [`ModelFormat::from_file_name`]); `Ok(None)` for an opaque model. The newest
/// reading rules apply ([`crate::format::MODEL_READING_RULES`]).
///
/// `file_len` must be the file's true length (from the file system, or the size the verified
/// manifest declares): every length in the file is checked against it. Weight data is read and
/// dropped, never kept, so memory stays bounded; prefer [`read_model_signature_seekable`] for
/// files, which seeks past the weights instead. A safetensors reader stops after the header:
/// the data region is checked against `file_len`, not read.
pub fn read_model_signature<R: Read>(
    file_name: &str,
    reader: R,
    file_len: u64,
) -> Result<Option<ModelSignature>> {
    match ModelFormat::from_file_name(file_name) {
        None => Ok(None),
        Some(ModelFormat::Onnx) => onnx::read(
            Streamed(BufReader::new(reader)),
            file_len,
            MODEL_READING_RULES,
        )
        .map(Some),
        Some(ModelFormat::Safetensors) => {
            safetensors::read(reader, file_len).map(|(signature, _)| Some(signature))
        }
    }
}

/// Like [`read_model_signature`], but seeks past weight data instead of reading it. The reader
/// starts at the model's first byte; `file_len` bytes must follow.
pub fn read_model_signature_seekable<R: Read + Seek>(
    file_name: &str,
    reader: R,
    file_len: u64,
) -> Result<Option<ModelSignature>> {
    read_as(file_name, reader, file_len, MODEL_READING_RULES, None)
}

/// Reads the signature of the model file at `path` (format by its extension; `Ok(None)` for an
/// opaque model), seeking past weight data, under the newest reading rules.
pub fn read_model_signature_file(path: &Path) -> Result<Option<ModelSignature>> {
    let Some((file_name, file, len)) = open_model(path)? else {
        return Ok(None);
    };
    read_model_signature_seekable(&file_name, file, len)
}

/// The record `pack` signs for the model at `path`: read under the oldest reading rules that
/// read it the same as the newest (so a verifier that knows only the older rules still
/// installs it), with the classifier tensor recorded when `tensor` names a safetensors tensor
/// or `dim` names a class dimension (see [`Classifier`]).
///
/// # Errors
///
/// As the readers; and [`ErrorKind::Incompatible`] when the classifier tensor does not exist
/// or its class dimension is not a fixed size.
pub fn read_model_signature_for_pack(
    path: &Path,
    tensor: Option<&str>,
    dim: Option<u32>,
) -> Result<Option<ModelSignature>> {
    let Some((file_name, mut file, len)) = open_model(path)? else {
        return Ok(None);
    };
    let format = ModelFormat::from_file_name(&file_name);
    let request = match (format, tensor, dim) {
        (Some(ModelFormat::Safetensors), Some(tensor), _) => Some(Classifier {
            tensor: tensor.to_owned(),
            dim,
            shape: None,
        }),
        (_, _, Some(dim)) => {
            let unread = read_as(&file_name, &mut file, len, MODEL_READING_RULES, None)?;
            let name = match (tensor, unread.as_ref()) {
                (Some(tensor), _) => tensor.to_owned(),
                (None, Some(signature)) => signature.classified(None)?.0,
                (None, None) => return Ok(None),
            };
            file.seek(SeekFrom::Start(0))
                .map_err(|e| Error::io(format!("reading {}", path.display()), e))?;
            Some(Classifier {
                tensor: name,
                dim: Some(dim),
                shape: None,
            })
        }
        _ => None,
    };
    let newest = read_as(
        &file_name,
        &mut file,
        len,
        MODEL_READING_RULES,
        request.as_ref(),
    )?;
    let Some(newest) = newest else {
        return Ok(None);
    };
    for rules in 1..MODEL_READING_RULES {
        file.seek(SeekFrom::Start(0))
            .map_err(|e| Error::io(format!("reading {}", path.display()), e))?;
        // A model the older rules refuse (a dimension of -1) simply needs the newer ones.
        if let Ok(Some(older)) = read_as(&file_name, &mut file, len, rules, request.as_ref()) {
            let mut same = newest.clone();
            same.rules = rules;
            if older == same {
                return Ok(Some(older));
            }
        }
    }
    Ok(Some(newest))
}

fn open_model(path: &Path) -> Result<Option<(String, File, u64)>> {
    let file_name = path
        .file_name()
        .map(|name| name.to_string_lossy().into_owned())
        .unwrap_or_default();
    if ModelFormat::from_file_name(&file_name).is_none() {
        return Ok(None);
    }
    let shown = path.display();
    let file = File::open(path).map_err(|e| Error::io(format!("opening {shown}"), e))?;
    let len = file
        .metadata()
        .map_err(|e| Error::io(format!("reading the size of {shown}"), e))?
        .len();
    Ok(Some((file_name, file, len)))
}

/// Reads a model under reading `rules`, recording the classifier `request` names (its tensor
/// and dimension; for safetensors the tensor's shape is taken from the file): how `pack` makes
/// the record, and how the device re-reads an unpacked model under the rules and classifier
/// its signed manifest names.
pub(crate) fn read_as<R: Read + Seek>(
    file_name: &str,
    reader: R,
    file_len: u64,
    rules: u32,
    request: Option<&Classifier>,
) -> Result<Option<ModelSignature>> {
    if !(1..=MODEL_READING_RULES).contains(&rules) {
        return Err(unknown_rules(rules));
    }
    let mut signature = match ModelFormat::from_file_name(file_name) {
        None => return Ok(None),
        Some(ModelFormat::Onnx) => onnx::read(Seeking(BufReader::new(reader)), file_len, rules)?,
        Some(ModelFormat::Safetensors) => {
            let (signature, tensors) = safetensors::read(reader, file_len)?;
            if let Some(request) = request {
                let shape = tensors
                    .into_iter()
                    .find(|tensor| tensor.name == request.tensor)
                    .map(|tensor| tensor.shape)
                    .ok_or_else(|| {
                        Error::new(
                            ErrorKind::Incompatible,
                            format!("the safetensors model has no tensor '{}'", request.tensor),
                        )
                    })?;
                let mut signature = signature;
                signature.classifier = Some(Classifier {
                    tensor: request.tensor.clone(),
                    dim: request.dim,
                    shape: Some(shape),
                });
                signature.class_count(None, None)?;
                return Ok(Some(signature));
            }
            signature
        }
    };
    if let Some(request) = request {
        signature.classifier = Some(Classifier {
            tensor: request.tensor.clone(),
            dim: request.dim,
            shape: None,
        });
        signature.class_count(None, None)?;
    }
    Ok(Some(signature))
}

fn unknown_rules(rules: u32) -> Error {
    Error::new(
        ErrorKind::Manifest,
        format!(
            "the manifest's model was read under reading rules {rules}, which this verifier does \
             not know (it knows 1 to {MODEL_READING_RULES}); update ampoule-verify to install it"
        ),
    )
}

impl ModelSignature {
    pub_for_release! {
        /// Refuses a record made under reading rules this verifier does not know.
        fn check_rules(&self) -> Result<()> {
            if (1..=MODEL_READING_RULES).contains(&self.rules) {
                Ok(())
            } else {
                Err(unknown_rules(self.rules))
            }
        }
    }
}

/// One tensor of a safetensors file, as its header states it.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
#[non_exhaustive]
pub struct TensorEntry {
    /// The tensor's name.
    pub name: String,
    /// Its element type.
    pub dtype: DType,
    /// Its shape.
    pub shape: Vec<u64>,
}

/// The tensors of a safetensors file (name, dtype, shape), in the order of their data, for
/// `inspect`; the file is checked as [`read_model_signature`] checks it.
pub fn read_safetensors_tensors<R: Read>(reader: R, file_len: u64) -> Result<Vec<TensorEntry>> {
    safetensors::read(reader, file_len).map(|(_, tensors)| tensors)
}

/// Maps a read error to a model error: running out of bytes means the file is shorter than
/// its declared length, anything else is I/O.
pub(crate) fn read_error(format: ModelFormat, len: u64, e: io::Error) -> Error {
    if e.kind() == io::ErrorKind::UnexpectedEof {
        Error::new(
            ErrorKind::Model,
            format!("{format}: the file is shorter than its declared length of {len} bytes"),
        )
    } else {
        Error::io(format!("reading the {format} model"), e)
    }
}

/// Totals over weight tensors, shared by both readers.
#[derive(Default)]
pub(crate) struct WeightTotals {
    pub(crate) tensors: u64,
    pub(crate) parameters: u64,
    pub(crate) narrow_parameters: u64,
    pub(crate) bytes_by_dtype: BytesByDtype,
}

impl WeightTotals {
    /// Adds one tensor; `None` if a total overflows.
    pub(crate) fn add(&mut self, dtype: DType, elements: u64, bytes: u64) -> Option<()> {
        self.tensors = self.tensors.checked_add(1)?;
        self.parameters = self.parameters.checked_add(elements)?;
        if dtype.is_8bit_or_narrower() {
            self.narrow_parameters = self.narrow_parameters.checked_add(elements)?;
        }
        self.bytes_by_dtype.add(dtype, bytes)
    }

    pub(crate) fn weights_8bit(&self) -> bool {
        self.parameters > 0 && self.narrow_parameters >= self.parameters - self.narrow_parameters
    }
}

/// The element count of a shape, `None` on overflow.
pub(crate) fn element_count(shape: &[u64]) -> Option<u64> {
    shape
        .iter()
        .try_fold(1u64, |count, dim| count.checked_mul(*dim))
}

/// Shows a list of numbers as `[1, 2, 3]`.
pub(crate) fn list<T: fmt::Display>(items: &[T]) -> String {
    let items: Vec<String> = items.iter().map(|item| item.to_string()).collect();
    format!("[{}]", items.join(", "))
}
