//! Invented model weights for the demo and the benchmarks: deterministic float32 values
//! shaped like trained weights (small, roughly normal), so compression behaves as it would on
//! a real model rather than on zeros or on random bytes.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::Path;

/// SplitMix64 (Steele, Lea and Flood, "Fast splittable pseudorandom number generators",
/// OOPSLA 2014): tiny, fast, and the same sequence on every machine.
struct SplitMix64(u64);

impl SplitMix64 {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }
}

/// Writes `bytes` bytes (rounded down to whole floats) of little-endian float32 weights drawn
/// from `seed`: the sum of four uniform values (an Irwin-Hall approximation of a normal
/// distribution) scaled to a standard deviation of about 0.05.
pub fn write_weights(path: &Path, bytes: u64, seed: u64) -> std::io::Result<()> {
    let mut rng = SplitMix64(seed);
    let mut out = BufWriter::with_capacity(1 << 20, File::create(path)?);
    for _ in 0..bytes / 4 {
        out.write_all(&weight(&mut rng).to_le_bytes())?;
    }
    out.flush()
}

/// One weight: the sum of four 16-bit uniforms (mean 131,070, standard deviation about
/// 37,837), centred and scaled to a standard deviation of about 0.05.
fn weight(rng: &mut SplitMix64) -> f32 {
    let r = rng.next();
    let sum: u32 = (0..4).map(|i| ((r >> (16 * i)) & 0xffff) as u32).sum();
    ((f64::from(sum) - 131_070.0) / 37_837.0 * 0.05) as f32
}

/// Protobuf wire-format helpers for writing a small ONNX file (field numbers from the
/// `onnx.proto` schema that ships with the `onnx` Python package).
mod pb {
    pub fn varint(out: &mut Vec<u8>, mut v: u64) {
        while v >= 0x80 {
            out.push((v as u8) | 0x80);
            v >>= 7;
        }
        out.push(v as u8);
    }

    pub fn key(out: &mut Vec<u8>, field: u32, wire: u8) {
        varint(out, (u64::from(field) << 3) | u64::from(wire));
    }

    pub fn uint(out: &mut Vec<u8>, field: u32, v: u64) {
        key(out, field, 0);
        varint(out, v);
    }

    pub fn bytes(out: &mut Vec<u8>, field: u32, data: &[u8]) {
        key(out, field, 2);
        varint(out, data.len() as u64);
        out.extend_from_slice(data);
    }
}

/// ONNX's element type code for float32 (`TensorProto.DataType.FLOAT`).
const ONNX_FLOAT: u64 = 1;

/// A tensor-typed ValueInfoProto; `None` dims are the symbolic batch dimension `N`.
fn value_info(name: &str, dims: &[Option<u64>]) -> Vec<u8> {
    let mut shape = Vec::new();
    for dim in dims {
        let mut d = Vec::new();
        match dim {
            Some(v) => pb::uint(&mut d, 1, *v),
            None => pb::bytes(&mut d, 2, b"N"),
        }
        pb::bytes(&mut shape, 1, &d);
    }
    let mut tensor = Vec::new();
    pb::uint(&mut tensor, 1, ONNX_FLOAT);
    pb::bytes(&mut tensor, 2, &shape);
    let mut ty = Vec::new();
    pb::bytes(&mut ty, 1, &tensor);
    let mut info = Vec::new();
    pb::bytes(&mut info, 1, name.as_bytes());
    pb::bytes(&mut info, 2, &ty);
    info
}

fn node(op: &str, inputs: &[&str], output: &str) -> Vec<u8> {
    let mut n = Vec::new();
    for input in inputs {
        pb::bytes(&mut n, 1, input.as_bytes());
    }
    pb::bytes(&mut n, 2, output.as_bytes());
    pb::bytes(&mut n, 3, format!("{op}_{output}").as_bytes());
    pb::bytes(&mut n, 4, op.as_bytes());
    n
}

fn initializer(name: &str, dims: [u64; 2], seed: u64) -> Vec<u8> {
    let mut rng = SplitMix64(seed);
    let count = dims[0] * dims[1];
    let mut raw = Vec::with_capacity(count as usize * 4);
    for _ in 0..count {
        raw.extend_from_slice(&weight(&mut rng).to_le_bytes());
    }
    let mut t = Vec::new();
    for d in dims {
        pb::uint(&mut t, 1, d);
    }
    pb::uint(&mut t, 2, ONNX_FLOAT);
    pb::bytes(&mut t, 8, name.as_bytes());
    pb::bytes(&mut t, 9, &raw);
    t
}

/// Writes an invented ONNX species classifier: `image` float32 [N, 3, `side`, `side`] →
/// Flatten → MatMul (3·side² × `hidden`) → Relu → MatMul (`hidden` × `classes`) → Softmax →
/// `species` float32 [N, `classes`]. At side 96 it weighs about 108 KiB per hidden unit.
pub fn write_onnx_classifier(
    path: &Path,
    side: u64,
    hidden: u64,
    classes: u64,
    seed: u64,
) -> std::io::Result<()> {
    let features = 3 * side * side;
    let mut graph = Vec::new();
    pb::bytes(&mut graph, 1, &node("Flatten", &["image"], "flat"));
    pb::bytes(&mut graph, 1, &node("MatMul", &["flat", "w1"], "h"));
    pb::bytes(&mut graph, 1, &node("Relu", &["h"], "hr"));
    pb::bytes(&mut graph, 1, &node("MatMul", &["hr", "w2"], "logits"));
    pb::bytes(&mut graph, 1, &node("Softmax", &["logits"], "species"));
    pb::bytes(&mut graph, 2, b"trailcam-species");
    pb::bytes(&mut graph, 5, &initializer("w1", [features, hidden], seed));
    pb::bytes(
        &mut graph,
        5,
        &initializer("w2", [hidden, classes], seed ^ 0x5eed),
    );
    pb::bytes(
        &mut graph,
        11,
        &value_info("image", &[None, Some(3), Some(side), Some(side)]),
    );
    pb::bytes(
        &mut graph,
        12,
        &value_info("species", &[None, Some(classes)]),
    );
    let mut opset = Vec::new();
    pb::uint(&mut opset, 2, 13);
    let mut model = Vec::new();
    pb::uint(&mut model, 1, 8);
    pb::bytes(&mut model, 2, b"ampoule-demo");
    pb::bytes(&mut model, 3, env!("CARGO_PKG_VERSION").as_bytes());
    pb::bytes(&mut model, 7, &graph);
    pb::bytes(&mut model, 8, &opset);
    std::fs::write(path, model)
}
