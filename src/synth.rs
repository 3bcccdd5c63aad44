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
        let r = rng.next();
        let sum: u32 = (0..4).map(|i| ((r >> (16 * i)) & 0xffff) as u32).sum();
        // Mean 2 * 65535, standard deviation about 37,837 for four 16-bit uniforms.
        let centered = f64::from(sum) - 131_070.0;
        let weight = (centered / 37_837.0 * 0.05) as f32;
        out.write_all(&weight.to_le_bytes())?;
    }
    out.flush()
}
