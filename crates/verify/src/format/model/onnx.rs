//! A bounded reader for the few fields of an ONNX `ModelProto` that make up a model's signature.
//!
//! A general protobuf library would decode the whole message, weights included, into memory; a
//! model can be hundreds of MiB. This reader walks the protobuf wire format (field key varint,
//! then a varint, fixed 4 or 8 bytes, or a length-delimited payload) over a stream, descends only
//! into ModelProto -> GraphProto -> initializer / input / output -> TypeProto -> tensor shape
//! (and, under reading rules 2, node -> attribute -> tensor or subgraph), and skips everything
//! else by its length, so memory stays bounded whatever the file holds.
//!
//! Every length is checked against the bytes left in the enclosing message before it is used.
//! The walk follows the schema: nested messages in fields it does not read are skipped
//! unparsed, and groups (the deprecated wire types 3 and 4, whose skipping would need
//! recursion) are refused. The one recursion is a subgraph (an attribute of If, Loop, Scan and
//! the like), refused past [`limit::SUBGRAPH_DEPTH`] levels, so a file cannot make the walk
//! deeper than that. Field numbers follow onnx.proto as shipped with the `onnx` Python package
//! 1.23.
//!
//! Reading rules (see [`crate::format::MODEL_READING_RULES`]): under rules 1 only the top
//! graph's initializers are weights and any negative dimension is refused, exactly as before
//! issue 11, so a bundle packed then re-reads to the record it signed. Under rules 2, the
//! `value` tensor of every Constant node and the initializers and Constants of every subgraph
//! count too, each tensor must fit in the bytes it holds, and a dimension of -1 (which
//! exporters write for "unknown", and onnx's checker and onnxruntime accept) reads as unknown.
//! A tensor made at run time (ConstantOfShape, or any other operator's output) is not a weight
//! and is not counted.

use std::collections::HashSet;

use crate::error::{Error, ErrorKind, Result};
use crate::format::digest::Digest;

use super::{
    DType, Dim, ModelFormat, ModelSignature, Source, ValueKind, ValueSignature, WeightTotals,
    element_count, limit, list, read_error,
};

/// Protobuf wire types (protobuf encoding guide).
const VARINT: u8 = 0;
const FIXED64: u8 = 1;
const LEN: u8 = 2;
const FIXED32: u8 = 5;

/// The longest varint: ten 7-bit groups cover 64 bits.
const VARINT_MAX_BYTES: u32 = 10;

fn malformed(message: String) -> Error {
    Error::new(ErrorKind::Model, format!("onnx: {message}"))
}

/// A field key read from the stream.
struct Field {
    number: u64,
    wire: u8,
    at: u64,
}

struct Wire<S> {
    src: S,
    pos: u64,
    len: u64,
    /// The reading rules (1 or 2).
    rules: u32,
}

impl<S: Source> Wire<S> {
    fn read_byte(&mut self) -> Result<u8> {
        let mut byte = [0u8; 1];
        self.src
            .read_exact(&mut byte)
            .map_err(|e| read_error(ModelFormat::Onnx, self.len, e))?;
        self.pos += 1;
        Ok(byte[0])
    }

    fn varint(&mut self, end: u64) -> Result<u64> {
        let start = self.pos;
        let mut value = 0u64;
        for i in 0..VARINT_MAX_BYTES {
            if self.pos >= end {
                return Err(malformed(format!("truncated varint at byte {start}")));
            }
            let byte = self.read_byte()?;
            if i == VARINT_MAX_BYTES - 1 {
                if byte & 0x80 != 0 {
                    return Err(malformed(format!(
                        "varint at byte {start} is longer than {VARINT_MAX_BYTES} bytes"
                    )));
                }
                if byte > 1 {
                    return Err(malformed(format!(
                        "varint at byte {start} overflows 64 bits"
                    )));
                }
            }
            value |= u64::from(byte & 0x7f) << (7 * i);
            if byte & 0x80 == 0 {
                return Ok(value);
            }
        }
        // The tenth byte returns or fails above; this only keeps the function total.
        Err(malformed(format!(
            "varint at byte {start} is longer than {VARINT_MAX_BYTES} bytes"
        )))
    }

    fn field(&mut self, end: u64, message: &str) -> Result<Field> {
        let at = self.pos;
        let key = self.varint(end)?;
        let number = key >> 3;
        let wire = (key & 7) as u8;
        if number == 0 || number > (1 << 29) - 1 {
            return Err(malformed(format!(
                "field number {number} of {message} at byte {at} is out of range"
            )));
        }
        Ok(Field { number, wire, at })
    }

    fn expect(&self, field: &Field, wire: u8, message: &str) -> Result<()> {
        if field.wire != wire {
            return Err(malformed(format!(
                "field {} of {message} at byte {} has wire type {}, expected {wire}",
                field.number, field.at, field.wire
            )));
        }
        Ok(())
    }

    fn varint_field(&mut self, field: &Field, end: u64, message: &str) -> Result<u64> {
        self.expect(field, VARINT, message)?;
        self.varint(end)
    }

    /// Reads the length of a length-delimited field and returns where its payload ends.
    fn payload_end(&mut self, field: &Field, end: u64, message: &str) -> Result<u64> {
        self.expect(field, LEN, message)?;
        let len = self.varint(end)?;
        let remaining = end - self.pos;
        if len > remaining {
            return Err(malformed(format!(
                "field {} of {message} at byte {} declares {len} bytes, only {remaining} remain",
                field.number, field.at
            )));
        }
        Ok(self.pos + len)
    }

    fn skip_to(&mut self, to: u64) -> Result<()> {
        self.src
            .skip(to - self.pos)
            .map_err(|e| read_error(ModelFormat::Onnx, self.len, e))?;
        self.pos = to;
        Ok(())
    }

    fn skip_fixed(&mut self, field: &Field, end: u64, width: u64, message: &str) -> Result<()> {
        let remaining = end - self.pos;
        if width > remaining {
            return Err(malformed(format!(
                "field {} of {message} at byte {} needs {width} bytes, only {remaining} remain",
                field.number, field.at
            )));
        }
        self.skip_to(self.pos + width)
    }

    fn skip_field(&mut self, field: &Field, end: u64, message: &str) -> Result<()> {
        match field.wire {
            VARINT => self.varint(end).map(drop),
            FIXED64 => self.skip_fixed(field, end, 8, message),
            FIXED32 => self.skip_fixed(field, end, 4, message),
            LEN => {
                let to = self.payload_end(field, end, message)?;
                self.skip_to(to)
            }
            3 | 4 => Err(malformed(format!(
                "field {} of {message} at byte {} is a group (wire type {}), which onnx does not use",
                field.number, field.at, field.wire
            ))),
            other => Err(malformed(format!(
                "field {} of {message} at byte {} has unknown wire type {other}",
                field.number, field.at
            ))),
        }
    }

    /// Reads a length-delimited UTF-8 string of at most `cap` bytes; `what` names it in errors.
    fn string(
        &mut self,
        field: &Field,
        end: u64,
        message: &str,
        what: &str,
        cap: usize,
    ) -> Result<String> {
        let to = self.payload_end(field, end, message)?;
        let len = to - self.pos;
        if len > cap as u64 {
            return Err(malformed(format!(
                "{what} at byte {} is {len} bytes long, over the cap of {cap}",
                field.at
            )));
        }
        let mut bytes = vec![0u8; len as usize];
        self.src
            .read_exact(&mut bytes)
            .map_err(|e| read_error(ModelFormat::Onnx, self.len, e))?;
        self.pos = to;
        String::from_utf8(bytes)
            .map_err(|_| malformed(format!("{what} at byte {} is not utf-8", field.at)))
    }
}

/// Reads a model's signature from `src`, which holds exactly `len` bytes, under reading `rules`
/// (1 or 2; the caller has refused any other).
pub(crate) fn read<S: Source>(src: S, len: u64, rules: u32) -> Result<ModelSignature> {
    let mut wire = Wire {
        src,
        pos: 0,
        len,
        rules,
    };
    let signature = read_model(&mut wire)?;
    wire.src
        .finish()
        .map_err(|e| read_error(ModelFormat::Onnx, len, e))?;
    Ok(signature)
}

fn read_model<S: Source>(w: &mut Wire<S>) -> Result<ModelSignature> {
    const MESSAGE: &str = "model";
    let end = w.len;
    let mut ir_version = None;
    let mut opset = None;
    let mut producer = None;
    let mut producer_version = None;
    let mut graph = None;
    while w.pos < end {
        let field = w.field(end, MESSAGE)?;
        match field.number {
            1 => ir_version = Some(w.varint_field(&field, end, MESSAGE)?),
            2 => {
                producer =
                    Some(w.string(&field, end, MESSAGE, "producer name", limit::PRODUCER_BYTES)?)
            }
            3 => {
                producer_version = Some(w.string(
                    &field,
                    end,
                    MESSAGE,
                    "producer version",
                    limit::PRODUCER_BYTES,
                )?)
            }
            7 => {
                if graph.is_some() {
                    return Err(malformed(format!(
                        "the model has a second graph at byte {}",
                        field.at
                    )));
                }
                let graph_end = w.payload_end(&field, end, MESSAGE)?;
                let mut weights = WeightTotals::default();
                let values = read_graph(w, graph_end, 0, &mut weights)?;
                graph = Some((values, weights));
            }
            8 => {
                let import_end = w.payload_end(&field, end, MESSAGE)?;
                let (domain, version) = read_opset_import(w, import_end)?;
                if domain.is_empty() || domain == "ai.onnx" {
                    if opset.is_some() {
                        return Err(malformed(format!(
                            "the model imports the default operator set a second time at byte {}",
                            field.at
                        )));
                    }
                    opset = Some(version);
                }
            }
            _ => w.skip_field(&field, end, MESSAGE)?,
        }
    }
    let ((inputs, outputs), weights) =
        graph.ok_or_else(|| malformed("the model has no graph".into()))?;
    let weights_8bit = weights.weights_8bit();
    Ok(ModelSignature {
        format: ModelFormat::Onnx,
        rules: w.rules,
        ir_version,
        opset,
        producer,
        producer_version,
        inputs,
        outputs,
        weight_tensors: weights.tensors,
        parameters: weights.parameters,
        weights_8bit,
        bytes_by_dtype: weights.bytes_by_dtype,
        classifier: None,
    })
}

fn read_opset_import<S: Source>(w: &mut Wire<S>, end: u64) -> Result<(String, u64)> {
    const MESSAGE: &str = "opset import";
    let mut domain = String::new();
    let mut version = 0;
    while w.pos < end {
        let field = w.field(end, MESSAGE)?;
        match field.number {
            1 => domain = w.string(&field, end, MESSAGE, "opset domain", limit::PRODUCER_BYTES)?,
            2 => version = w.varint_field(&field, end, MESSAGE)?,
            _ => w.skip_field(&field, end, MESSAGE)?,
        }
    }
    Ok((domain, version))
}

/// A weight's name reduced to a fixed 16 bytes, so remembering up to
/// [`limit::WEIGHT_TENSORS`] initializer names costs a bounded amount of memory.
fn name_key(name: &str) -> [u8; 16] {
    let digest = Digest::of(name.as_bytes());
    let mut key = [0u8; 16];
    key.copy_from_slice(&digest.as_bytes()[..16]);
    key
}

/// Reads a graph, adding its weights to `weights`. The top graph (`depth` 0) returns its inputs
/// (initializers taken out) and outputs; a subgraph's are the parent node's business and are
/// skipped.
fn read_graph<S: Source>(
    w: &mut Wire<S>,
    end: u64,
    depth: usize,
    weights: &mut WeightTotals,
) -> Result<(Vec<ValueSignature>, Vec<ValueSignature>)> {
    const MESSAGE: &str = "graph";
    if depth > limit::SUBGRAPH_DEPTH {
        return Err(malformed(format!(
            "subgraphs are nested more than {} deep",
            limit::SUBGRAPH_DEPTH
        )));
    }
    let top = depth == 0;
    let mut raw_inputs: Vec<ValueSignature> = Vec::new();
    let mut outputs: Vec<ValueSignature> = Vec::new();
    let mut weight_names = HashSet::new();
    while w.pos < end {
        let field = w.field(end, MESSAGE)?;
        match field.number {
            1 if w.rules >= 2 => {
                let node_end = w.payload_end(&field, end, MESSAGE)?;
                read_node(w, node_end, depth, weights)?;
            }
            5 => {
                if weights.tensors >= limit::WEIGHT_TENSORS as u64 {
                    return Err(malformed(format!(
                        "the graph has more than {} initializers",
                        limit::WEIGHT_TENSORS
                    )));
                }
                let tensor_end = w.payload_end(&field, end, MESSAGE)?;
                let tensor = read_tensor(w, tensor_end, field.at, "initializer")?;
                add_weight(weights, &tensor)?;
                if top && !weight_names.insert(name_key(&tensor.name)) {
                    return Err(malformed(format!(
                        "the graph has two initializers named '{}'",
                        tensor.name
                    )));
                }
            }
            11 if top => {
                if raw_inputs.len() >= limit::RAW_INPUTS {
                    return Err(malformed(format!(
                        "the graph lists more than {} inputs",
                        limit::RAW_INPUTS
                    )));
                }
                let value_end = w.payload_end(&field, end, MESSAGE)?;
                raw_inputs.push(read_value_info(w, value_end, field.at, "input")?);
            }
            12 if top => {
                if outputs.len() >= limit::VALUES {
                    return Err(malformed(format!(
                        "the graph has more than {} outputs",
                        limit::VALUES
                    )));
                }
                let value_end = w.payload_end(&field, end, MESSAGE)?;
                outputs.push(read_value_info(w, value_end, field.at, "output")?);
            }
            _ => w.skip_field(&field, end, MESSAGE)?,
        }
    }
    // Before IR version 4 every initializer had to be listed as a graph input too; those are
    // weights with defaults, not values the app feeds.
    let inputs: Vec<ValueSignature> = raw_inputs
        .into_iter()
        .filter(|value| !weight_names.contains(&name_key(&value.name)))
        .collect();
    if inputs.len() > limit::VALUES {
        return Err(malformed(format!(
            "the graph has {} inputs that are not initializers, over the cap of {}",
            inputs.len(),
            limit::VALUES
        )));
    }
    check_names(&inputs, "input")?;
    check_names(&outputs, "output")?;
    Ok((inputs, outputs))
}

fn add_weight(weights: &mut WeightTotals, tensor: &Tensor) -> Result<()> {
    weights
        .add(tensor.dtype, tensor.elements, tensor.bytes)
        .ok_or_else(|| {
            malformed("the weights' total parameter count or size overflows 64 bits".into())
        })
}

/// Reads a node (rules 2): a Constant's `value` tensor is a weight; a subgraph in any
/// attribute is walked for its own weights; every tensor an attribute holds is read (so
/// external data is refused wherever it hides) but only a Constant's counts.
fn read_node<S: Source>(
    w: &mut Wire<S>,
    end: u64,
    depth: usize,
    weights: &mut WeightTotals,
) -> Result<()> {
    const MESSAGE: &str = "node";
    let mut op_type = String::new();
    let mut domain = String::new();
    let mut value: Option<Tensor> = None;
    while w.pos < end {
        let field = w.field(end, MESSAGE)?;
        match field.number {
            4 => {
                op_type = w.string(&field, end, MESSAGE, "operator type", limit::PRODUCER_BYTES)?
            }
            5 => {
                let attribute_end = w.payload_end(&field, end, MESSAGE)?;
                if let Some(tensor) = read_attribute(w, attribute_end, depth, weights)?
                    && value.replace(tensor).is_some()
                {
                    return Err(malformed(format!(
                        "the node ending at byte {end} has two attributes named 'value'"
                    )));
                }
            }
            7 => {
                domain = w.string(
                    &field,
                    end,
                    MESSAGE,
                    "operator domain",
                    limit::PRODUCER_BYTES,
                )?
            }
            _ => w.skip_field(&field, end, MESSAGE)?,
        }
    }
    let default_domain = domain.is_empty() || domain == "ai.onnx";
    if let (Some(tensor), "Constant", true) = (value, op_type.as_str(), default_domain) {
        if weights.tensors >= limit::WEIGHT_TENSORS as u64 {
            return Err(malformed(format!(
                "the model has more than {} weight tensors",
                limit::WEIGHT_TENSORS
            )));
        }
        add_weight(weights, &tensor)?;
    }
    Ok(())
}

/// Reads a node's attribute (an AttributeProto); returns its tensor when the attribute is
/// named `value` and holds one (the weight of a Constant node).
fn read_attribute<S: Source>(
    w: &mut Wire<S>,
    end: u64,
    depth: usize,
    weights: &mut WeightTotals,
) -> Result<Option<Tensor>> {
    const MESSAGE: &str = "attribute";
    let mut name = String::new();
    let mut tensor = None;
    while w.pos < end {
        let field = w.field(end, MESSAGE)?;
        match field.number {
            1 => {
                name = w.string(
                    &field,
                    end,
                    MESSAGE,
                    "attribute name",
                    limit::PRODUCER_BYTES,
                )?
            }
            5 => {
                let tensor_end = w.payload_end(&field, end, MESSAGE)?;
                let read = read_tensor(w, tensor_end, field.at, "attribute tensor")?;
                if tensor.replace(read).is_some() {
                    return Err(malformed(format!(
                        "the attribute ending at byte {end} has two tensors"
                    )));
                }
            }
            10 => {
                let tensor_end = w.payload_end(&field, end, MESSAGE)?;
                read_tensor(w, tensor_end, field.at, "attribute tensor")?;
            }
            6 | 11 => {
                let graph_end = w.payload_end(&field, end, MESSAGE)?;
                read_graph(w, graph_end, depth + 1, weights)?;
            }
            _ => w.skip_field(&field, end, MESSAGE)?,
        }
    }
    Ok(tensor.filter(|_| name == "value"))
}

fn check_names(values: &[ValueSignature], role: &str) -> Result<()> {
    let mut seen = HashSet::new();
    for value in values {
        if value.name.is_empty() {
            return Err(malformed(format!("a graph {role} has an empty name")));
        }
        if !seen.insert(value.name.as_str()) {
            return Err(malformed(format!(
                "the graph has two {role}s named '{}'",
                value.name
            )));
        }
    }
    Ok(())
}

/// A tensor's name and size, its data skipped, never kept.
struct Tensor {
    name: String,
    dtype: DType,
    elements: u64,
    bytes: u64,
}

/// Reads one TensorProto: an initializer (`what` is "initializer", which must be named) or a
/// tensor an attribute holds. External data is refused. Under rules 2 the tensor must fit in the
/// bytes it holds: `raw_data` of exactly its size, or typed data fields (`float_data`,
/// `int64_data`, ...) of at least one byte per element (a varint's least; sub-byte types pack
/// several per byte); a large tensor is still only measured, its data skipped.
fn read_tensor<S: Source>(w: &mut Wire<S>, end: u64, at: u64, what: &str) -> Result<Tensor> {
    const MESSAGE: &str = "tensor";
    let mut dims: Vec<i64> = Vec::new();
    let mut data_type = 0i64;
    let mut name = String::new();
    let mut raw_bytes: Option<u64> = None;
    let mut string_bytes = 0u64;
    let mut strings = 0u64;
    // Bytes of typed data (float_data, int32_data, int64_data, double_data, uint64_data).
    let mut typed_bytes = 0u64;
    let mut external = false;
    let push_dim = |dims: &mut Vec<i64>, value: u64| {
        if dims.len() >= limit::WEIGHT_RANK {
            return Err(malformed(format!(
                "the {what} at byte {at} has more than {} dimensions",
                limit::WEIGHT_RANK
            )));
        }
        // int64 fields carry negative values as ten-byte two's-complement varints.
        dims.push(value as i64);
        Ok(())
    };
    while w.pos < end {
        let field = w.field(end, MESSAGE)?;
        match (field.number, field.wire) {
            (1, VARINT) => {
                let value = w.varint(end)?;
                push_dim(&mut dims, value)?;
            }
            (1, LEN) => {
                let packed_end = w.payload_end(&field, end, MESSAGE)?;
                while w.pos < packed_end {
                    let value = w.varint(packed_end)?;
                    push_dim(&mut dims, value)?;
                }
            }
            (2, _) => data_type = w.varint_field(&field, end, MESSAGE)? as i64,
            (6, _) => {
                let data_end = w.payload_end(&field, end, MESSAGE)?;
                string_bytes = string_bytes.saturating_add(data_end - w.pos);
                strings += 1;
                w.skip_to(data_end)?;
            }
            (8, _) => {
                name = w.string(
                    &field,
                    end,
                    MESSAGE,
                    &format!("{what} name"),
                    limit::WEIGHT_NAME_BYTES,
                )?
            }
            (9, _) => {
                let data_end = w.payload_end(&field, end, MESSAGE)?;
                raw_bytes = Some(data_end - w.pos);
                w.skip_to(data_end)?;
            }
            (13, _) => {
                external = true;
                w.skip_field(&field, end, MESSAGE)?;
            }
            (14, _) => external |= w.varint_field(&field, end, MESSAGE)? == 1,
            (4 | 5 | 7 | 10 | 11, LEN) => {
                let data_end = w.payload_end(&field, end, MESSAGE)?;
                typed_bytes = typed_bytes.saturating_add(data_end - w.pos);
                w.skip_to(data_end)?;
            }
            (4 | 5 | 7 | 10 | 11, _) => {
                let from = w.pos;
                w.skip_field(&field, end, MESSAGE)?;
                typed_bytes = typed_bytes.saturating_add(w.pos - from);
            }
            _ => w.skip_field(&field, end, MESSAGE)?,
        }
    }
    let shown = if name.is_empty() {
        format!("at byte {at}")
    } else {
        format!("'{name}'")
    };
    if name.is_empty() && what == "initializer" {
        return Err(malformed(format!("the initializer {shown} has no name")));
    }
    if external {
        return Err(malformed(format!(
            "{what} {shown} keeps its data in an external file, which a bundle cannot carry"
        )));
    }
    let dtype = DType::from_onnx_code(data_type).ok_or_else(|| {
        malformed(format!(
            "{what} {shown} has unknown element type {data_type}"
        ))
    })?;
    let mut shape = Vec::with_capacity(dims.len());
    for dim in &dims {
        let dim = u64::try_from(*dim).map_err(|_| {
            malformed(format!(
                "{what} {shown} has a negative dimension in its shape {}",
                list(&dims)
            ))
        })?;
        shape.push(dim);
    }
    let elements = element_count(&shape).ok_or_else(|| {
        malformed(format!(
            "{what} {shown} has shape {} whose element count overflows 64 bits",
            list(&dims)
        ))
    })?;
    let bytes = match dtype.bytes_for(elements) {
        Some(bytes) => bytes,
        None if dtype == DType::String => string_bytes,
        None => {
            return Err(malformed(format!(
                "{what} {shown} has shape {} whose size in bytes overflows 64 bits",
                list(&dims)
            )));
        }
    };
    // raw_data holds the elements packed little-endian; the 6-bit float types have no packing
    // the ONNX schema pins down, so their length is not checked.
    let checkable = dtype.bits().is_some_and(|bits| bits != 6);
    if let (Some(raw), true) = (raw_bytes, checkable)
        && raw != bytes
    {
        return Err(malformed(format!(
            "{what} {shown} has {raw} bytes of raw data, its shape {} of {dtype} needs {bytes}",
            list(&dims)
        )));
    }
    if w.rules >= 2 && raw_bytes.is_none() {
        let (held, unit) = match dtype.bits() {
            None => (strings, "strings"),
            Some(bits) if bits < 8 => (typed_bytes.saturating_mul(u64::from(8 / bits)), "bytes"),
            Some(_) => (typed_bytes, "bytes"),
        };
        if elements > held {
            let holds = if unit == "strings" {
                strings
            } else {
                typed_bytes
            };
            return Err(malformed(format!(
                "{what} {shown} has shape {} ({elements} elements of {dtype}), but it holds only {holds} {unit} of data",
                list(&dims)
            )));
        }
    }
    Ok(Tensor {
        name,
        dtype,
        elements,
        bytes,
    })
}

/// Reads a graph input or output (a ValueInfoProto).
fn read_value_info<S: Source>(
    w: &mut Wire<S>,
    end: u64,
    at: u64,
    role: &str,
) -> Result<ValueSignature> {
    const MESSAGE: &str = "value info";
    let mut name = String::new();
    let mut typed = None;
    let what = format!("graph {role} at byte {at}");
    while w.pos < end {
        let field = w.field(end, MESSAGE)?;
        match field.number {
            1 => {
                name = w.string(
                    &field,
                    end,
                    MESSAGE,
                    &format!("{role} name"),
                    limit::VALUE_NAME_BYTES,
                )?
            }
            2 => {
                if typed.is_some() {
                    return Err(malformed(format!("the {what} has a second type")));
                }
                let type_end = w.payload_end(&field, end, MESSAGE)?;
                typed = Some(read_type(w, type_end, &what)?);
            }
            _ => w.skip_field(&field, end, MESSAGE)?,
        }
    }
    // A value with no type at all is only acceptable for an old-style initializer input, which
    // is dropped later; for the others an undefined dtype and shape is the honest record.
    let (kind, elem_type, shape) = typed.unwrap_or((ValueKind::Tensor, 0, None));
    let dtype = match elem_type {
        0 => None,
        code => Some(DType::from_onnx_code(code).ok_or_else(|| {
            malformed(format!("{role} '{name}' has unknown element type {code}"))
        })?),
    };
    let shape = match shape {
        None => None,
        Some(dims) => {
            let mut shape = Vec::with_capacity(dims.len());
            for dim in dims {
                shape.push(match dim {
                    // Exporters write -1 for "unknown"; onnx's checker and onnxruntime accept it.
                    RawDim::Value(-1) if w.rules >= 2 => Dim::Unknown,
                    RawDim::Value(value) => Dim::Fixed(u64::try_from(value).map_err(|_| {
                        malformed(format!("{role} '{name}' has a negative dimension {value}"))
                    })?),
                    RawDim::Param(param) if !param.is_empty() => Dim::Symbolic(param),
                    RawDim::Param(_) | RawDim::Unset => Dim::Unknown,
                });
            }
            Some(shape)
        }
    };
    Ok(ValueSignature {
        name,
        kind,
        dtype,
        shape,
    })
}

enum RawDim {
    Value(i64),
    Param(String),
    Unset,
}

/// Reads a TypeProto: the kind of value and, for dense and sparse tensors, element type and
/// shape. Sequence, map, optional and opaque types are recorded by kind only, their payload
/// skipped unparsed, so a type nested any depth costs no recursion.
fn read_type<S: Source>(
    w: &mut Wire<S>,
    end: u64,
    what: &str,
) -> Result<(ValueKind, i64, Option<Vec<RawDim>>)> {
    const MESSAGE: &str = "type";
    let mut result = None;
    while w.pos < end {
        let field = w.field(end, MESSAGE)?;
        let kind = match field.number {
            1 => ValueKind::Tensor,
            8 => ValueKind::SparseTensor,
            4 => ValueKind::Sequence,
            5 => ValueKind::Map,
            9 => ValueKind::Optional,
            7 => ValueKind::Opaque,
            _ => {
                w.skip_field(&field, end, MESSAGE)?;
                continue;
            }
        };
        if result.is_some() {
            return Err(malformed(format!("the {what} has more than one type")));
        }
        let value_end = w.payload_end(&field, end, MESSAGE)?;
        result = Some(match kind {
            ValueKind::Tensor | ValueKind::SparseTensor => {
                let (elem_type, shape) = read_tensor_type(w, value_end, what)?;
                (kind, elem_type, shape)
            }
            _ => {
                w.skip_to(value_end)?;
                (kind, 0, None)
            }
        });
    }
    result.ok_or_else(|| malformed(format!("the {what} has an empty type")))
}

/// Reads TypeProto.Tensor (or SparseTensor, which has the same two fields).
fn read_tensor_type<S: Source>(
    w: &mut Wire<S>,
    end: u64,
    what: &str,
) -> Result<(i64, Option<Vec<RawDim>>)> {
    const MESSAGE: &str = "tensor type";
    let mut elem_type = 0i64;
    let mut shape = None;
    while w.pos < end {
        let field = w.field(end, MESSAGE)?;
        match field.number {
            1 => elem_type = w.varint_field(&field, end, MESSAGE)? as i64,
            2 => {
                if shape.is_some() {
                    return Err(malformed(format!("the {what} has a second shape")));
                }
                let shape_end = w.payload_end(&field, end, MESSAGE)?;
                shape = Some(read_shape(w, shape_end, what)?);
            }
            _ => w.skip_field(&field, end, MESSAGE)?,
        }
    }
    Ok((elem_type, shape))
}

fn read_shape<S: Source>(w: &mut Wire<S>, end: u64, what: &str) -> Result<Vec<RawDim>> {
    const MESSAGE: &str = "shape";
    let mut dims = Vec::new();
    while w.pos < end {
        let field = w.field(end, MESSAGE)?;
        match field.number {
            1 => {
                if dims.len() >= limit::RANK {
                    return Err(malformed(format!(
                        "the {what} has more than {} dimensions",
                        limit::RANK
                    )));
                }
                let dim_end = w.payload_end(&field, end, MESSAGE)?;
                dims.push(read_dim(w, dim_end)?);
            }
            _ => w.skip_field(&field, end, MESSAGE)?,
        }
    }
    Ok(dims)
}

fn read_dim<S: Source>(w: &mut Wire<S>, end: u64) -> Result<RawDim> {
    const MESSAGE: &str = "dimension";
    // dim_value and dim_param are a oneof: the last one present wins, as in protobuf.
    let mut dim = RawDim::Unset;
    while w.pos < end {
        let field = w.field(end, MESSAGE)?;
        match field.number {
            1 => dim = RawDim::Value(w.varint_field(&field, end, MESSAGE)? as i64),
            2 => {
                dim = RawDim::Param(w.string(
                    &field,
                    end,
                    MESSAGE,
                    "symbolic dimension name",
                    limit::DIM_PARAM_BYTES,
                )?)
            }
            _ => w.skip_field(&field, end, MESSAGE)?,
        }
    }
    Ok(dim)
}
