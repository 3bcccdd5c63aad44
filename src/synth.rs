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
    out.into_inner().map_err(|e| e.into_error())?.sync_all()
}

/// The label file for [`SPECIES`]: one label per line, each ending in a newline.
pub fn species_labels() -> String {
    SPECIES.iter().map(|s| format!("{s}\n")).collect()
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
