//! Invented model data for the demo, the benchmarks and tests: float32 weights of a made-up
//! trail-camera species classifier and its label list, generated from a seed.
//!
//! Random bytes would not compress at all and zeros would compress to nothing, so neither says
//! anything about how packing behaves on a real model. These weights are drawn from a bell
//! curve at the scales a freshly initialized convolutional network uses, which gives zstd about
//! the ratio it finds on real float32 weights (a few to twenty percent). The same seed and size
//! always give the same bytes, on every machine.

use std::fs::File;
use std::io::{self, BufWriter, Write};
use std::path::Path;

/// The invented classes of the trail-camera classifier, in output-index order.
pub const SPECIES: [&str; 10] = [
    "empty frame",
    "red fox",
    "roe deer",
    "red deer",
    "wild boar",
    "european badger",
    "brown hare",
    "pine marten",
    "tawny owl",
    "domestic cat",
];

/// Inputs per output of each invented layer (3x3 convolutions over 3 to 512 channels, then
/// the classifier head); a weight's scale is He initialization's sqrt(2 / fan-in).
const FAN_INS: [u32; 8] = [27, 288, 576, 1152, 2304, 4608, 4608, 512];
/// Weights per layer before the next layer's scale starts.
const LAYER_FLOATS: usize = 256 * 1024;

/// splitmix64 (Steele, Lea and Flood, "Fast splittable pseudorandom number generators",
/// OOPSLA 2014): tiny, fast, and plenty for data that only needs to look like weights.
struct SplitMix64(u64);

impl SplitMix64 {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }

    /// A value with mean 0 and standard deviation 1, close to normal: the sum of four
    /// uniform 32-bit draws (Irwin-Hall), which needs no logarithms and is exactly
    /// reproducible across platforms. 32 bits each keep every bit of a float32's mantissa
    /// random, as in trained weights; coarser draws repeat values and compress too well.
    fn bell(&mut self) -> f32 {
        let (a, b) = (self.next(), self.next());
        let sum = (a & 0xffff_ffff) + (a >> 32) + (b & 0xffff_ffff) + (b >> 32);
        // The sum of four U(0, 1) has mean 2 and variance 1/3.
        let u = sum as f64 / 4_294_967_296.0;
        ((u - 2.0) * 3f64.sqrt()) as f32
    }
}

/// Writes `bytes` bytes of invented float32 weights (little-endian) to a new or truncated
/// file at `path`, the same bytes for the same `bytes` and `seed`. A size that is not a
/// multiple of four ends with the first bytes of one last weight.
pub fn write_weights(path: &Path, bytes: u64, seed: u64) -> io::Result<()> {
    let mut out = BufWriter::with_capacity(1024 * 1024, File::create(path)?);
    weights_to(&mut out, bytes, seed)?;
    out.into_inner().map_err(|e| e.into_error())?.sync_all()
}

/// [`write_weights`]'s bytes, written to `out`.
fn weights_to<W: Write>(out: &mut W, bytes: u64, seed: u64) -> io::Result<()> {
    let mut rng = SplitMix64(seed);
    let mut left = bytes;
    let mut index = 0usize;
    let mut block = Vec::with_capacity(4 * LAYER_FLOATS);
    while left > 0 {
        let fan_in = FAN_INS[(index / LAYER_FLOATS) % FAN_INS.len()];
        let scale = (2.0 / f64::from(fan_in)).sqrt() as f32;
        block.clear();
        for _ in 0..LAYER_FLOATS {
            block.extend_from_slice(&(rng.bell() * scale).to_le_bytes());
        }
        index += LAYER_FLOATS;
        let n = usize::try_from(left).map_or(block.len(), |l| l.min(block.len()));
        out.write_all(&block[..n])?;
        left -= n as u64;
    }
    Ok(())
}

/// Features into the invented classifier head of [`write_head_model`].
pub const HEAD_FEATURES: u64 = 2048;
/// The weights stored after the head in [`write_head_model`]'s file.
pub const HEAD_TAIL_BYTES: u64 = 256 * 1024;

/// The bytes of a classifier head of [`HEAD_FEATURES`] x `classes` float32 weights and its
/// bias: 49,176 for 6 classes.
pub fn head_bytes(classes: u64) -> u64 {
    (HEAD_FEATURES * classes + classes) * 4
}

/// The invented model of issue 13, for deltas: the weights of a backbone, then a classifier
/// head of [`HEAD_FEATURES`] x `classes` with its bias, then [`HEAD_TAIL_BYTES`] of other
/// weights, which move when the head changes size. `bytes` is the file's size at 6 classes
/// (the backbone's size follows from it). Retraining the head is another `head_seed`; one
/// more class is `classes` 7, which makes the file 8,196 bytes longer.
///
/// # Panics
/// If `bytes` cannot hold a 6-class head and the tail.
pub fn write_head_model(path: &Path, bytes: u64, classes: u64, head_seed: u64) -> io::Result<()> {
    let backbone = bytes
        .checked_sub(head_bytes(6) + HEAD_TAIL_BYTES)
        .expect("the model holds a head and a tail");
    let mut out = BufWriter::with_capacity(1024 * 1024, File::create(path)?);
    weights_to(&mut out, backbone, 1)?;
    weights_to(&mut out, head_bytes(classes), head_seed)?;
    weights_to(&mut out, HEAD_TAIL_BYTES, 3)?;
    out.into_inner().map_err(|e| e.into_error())?.sync_all()
}

/// The label file for [`SPECIES`]: one label per line, each ending in a newline.
pub fn species_labels() -> String {
    SPECIES.iter().map(|s| format!("{s}\n")).collect()
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
    // He initialization's scale for this layer's fan-in, as for the flat weights above.
    let scale = (2.0 / dims[0] as f64).sqrt() as f32;
    let count = dims[0] * dims[1];
    let mut raw = Vec::with_capacity(count as usize * 4);
    for _ in 0..count {
        raw.extend_from_slice(&(rng.bell() * scale).to_le_bytes());
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn same_seed_same_bytes_and_sizes_are_exact() {
        let dir = tempfile::tempdir().expect("a temp dir can be made");
        let (a, b, c) = (
            dir.path().join("a"),
            dir.path().join("b"),
            dir.path().join("c"),
        );
        write_weights(&a, 1_000_003, 7).expect("write a");
        write_weights(&b, 1_000_003, 7).expect("write b");
        write_weights(&c, 1_000_003, 8).expect("write c");
        let (a, b, c) = (
            std::fs::read(a).expect("read a"),
            std::fs::read(b).expect("read b"),
            std::fs::read(c).expect("read c"),
        );
        assert_eq!(a.len(), 1_000_003);
        assert_eq!(a, b);
        assert_ne!(a, c);
    }

    #[test]
    fn weights_are_small_centred_finite_floats() {
        let dir = tempfile::tempdir().expect("a temp dir can be made");
        let path = dir.path().join("w");
        write_weights(&path, 4 * 100_000, 1).expect("write");
        let bytes = std::fs::read(path).expect("read");
        let w: Vec<f32> = bytes
            .chunks_exact(4)
            .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
            .collect();
        let mean = w.iter().map(|&x| f64::from(x)).sum::<f64>() / w.len() as f64;
        let sd = (w.iter().map(|&x| f64::from(x).powi(2)).sum::<f64>() / w.len() as f64).sqrt();
        // The first layer's scale is sqrt(2 / 27), about 0.27.
        assert!(w.iter().all(|x| x.is_finite() && x.abs() < 1.0));
        assert!(mean.abs() < 0.01, "mean {mean}");
        assert!((sd - 0.272).abs() < 0.01, "sd {sd}");
    }
}
