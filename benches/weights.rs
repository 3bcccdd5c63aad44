//! `cargo bench --bench weights`: does a transform of float32 weights before zstd make
//! bundles smaller enough to be worth a format change (issue 13 item 5)?
//!
//! Two models, in one run: the invented 84 MiB trail-camera weights the pipeline bench uses
//! (`synth::write_weights`, seed 2026) and the largest real float32 model among the test
//! fixtures, the `rapidocr-onnxruntime` 1.4.4 wheel's text-direction classifier
//! (`ch_ppocr_mobile_v2.0_cls_infer.onnx`, Apache-2.0, 572 KiB, every weight a float32
//! tensor in a Constant node).
//!
//! Each is compressed with zstd at pack's settings (level 3, 2 workers), untransformed and
//! after each transform:
//! - byte shuffling: the bytes of each 4-byte float grouped by position (all first bytes,
//!   then all second bytes, ...), so the exponent bytes, which repeat a few values, sit
//!   together. Described from memory as the "shuffle" filter of HDF5 and of the Blosc
//!   compressor library (Alted, "Why modern CPUs are starving and what can be done about
//!   it", Computing in Science & Engineering, 2010).
//! - byte shuffling, then each byte of the plane holding the sign and exponent replaced by
//!   its difference from the one before (wrapping), so runs of one exponent become zeros.
//!
//! A transform applies to the bytes of each float32 tensor (found by walking the ONNX
//! protobuf: initializers and Constant/attribute tensors, including subgraphs, whether the
//! floats are in `raw_data` or packed `float_data`, as in this model; for the
//! invented weights the whole file is one tensor); all other bytes stay as they are. For the
//! ONNX model, shuffling the whole file as if it were all floats is measured too.
//!
//! The rule asks for a full bundle at least 5% smaller on both models with verify no
//! more than 5% slower. The bench packs each model, and each transformed model, with the real
//! `ampoule` binary: the bundles differ only in the model's bytes (a real format would add a
//! few bytes to the manifest to record the transform). It estimates verify's added time as
//! un-shuffling plus the change in decompression time, both on one thread, against `ampoule
//! verify --extract`'s wall time on the plain bundle: no such verifier exists to time.
//!
//! `AMPOULE_BENCH_RUNS` sets the best-of count (default 3). The bench never fails; it reports.

use std::fs;
use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Instant;

use ampoule::release::synth;

const AMPOULE: &str = env!("CARGO_BIN_EXE_ampoule");
const SYNTH_BYTES: u64 = 84 * 1024 * 1024;
/// The fixture named in the module docs, relative to the workspace.
const REAL_MODEL: &str = "crates/verify/tests/data/real-models/rapidocr_onnxruntime-1.4.4-ch_ppocr_mobile_v2.0_cls_infer.onnx";
/// pack's settings (src/release/pack.rs: `ZSTD_LEVEL`, `ZSTD_WORKERS`).
const ZSTD_LEVEL: i32 = 3;
const ZSTD_WORKERS: u32 = 2;
/// Small inputs are processed repeatedly until about this many bytes went through, so
/// that each timing is long enough to read.
const MIN_TIMED_BYTES: usize = 64 * 1024 * 1024;
/// The rule: at least this much smaller, at most this much slower.
const MIN_SAVING: f64 = 0.05;
const MAX_SLOWDOWN: f64 = 0.05;

fn env_number(name: &str, default: u64) -> u64 {
    match std::env::var(name) {
        Ok(v) => v.trim().parse().unwrap_or_else(|_| {
            eprintln!("{name}={v:?} is not a whole number; using {default}");
            default
        }),
        Err(_) => default,
    }
}

/// The best time, in seconds, of `runs` runs of `f` over an input of `len` bytes; small
/// inputs repeat `f` within each run and divide.
fn best_secs(runs: usize, len: usize, mut f: impl FnMut()) -> f64 {
    let reps = (MIN_TIMED_BYTES / len.max(1)).max(1);
    let mut best = f64::INFINITY;
    for _ in 0..runs {
        let start = Instant::now();
        for _ in 0..reps {
            f();
        }
        best = best.min(start.elapsed().as_secs_f64() / reps as f64);
    }
    best
}

fn compress(data: &[u8]) -> Vec<u8> {
    let mut enc = zstd::stream::write::Encoder::new(Vec::new(), ZSTD_LEVEL).expect("zstd init");
    enc.multithread(ZSTD_WORKERS).expect("zstd workers");
    enc.write_all(data).expect("zstd compresses");
    enc.finish().expect("zstd finishes")
}

fn decompress(data: &[u8], len: usize) -> Vec<u8> {
    let mut out = Vec::with_capacity(len);
    zstd::stream::read::Decoder::new(data)
        .expect("zstd decoder")
        .read_to_end(&mut out)
        .expect("zstd decompresses");
    out
}

/// Protobuf reading, just enough to find the float32 tensors of an ONNX model (field
/// numbers from the `onnx.proto` schema shipped in the `onnx` Python package).
mod onnx {
    use std::ops::Range;

    /// One field: its number and, for length-delimited fields, the bytes' range in `buf`.
    fn fields(buf: &[u8], base: usize) -> Vec<(u64, Option<Range<usize>>, u64)> {
        fn varint(buf: &[u8], pos: &mut usize) -> Option<u64> {
            let mut v = 0u64;
            for shift in (0..64).step_by(7) {
                let b = *buf.get(*pos)?;
                *pos += 1;
                v |= u64::from(b & 0x7f) << shift;
                if b < 0x80 {
                    return Some(v);
                }
            }
            None
        }
        let mut out = Vec::new();
        let mut pos = 0;
        while pos < buf.len() {
            let Some(key) = varint(buf, &mut pos) else {
                break;
            };
            let (field, wire) = (key >> 3, key & 7);
            match wire {
                0 => match varint(buf, &mut pos) {
                    Some(v) => out.push((field, None, v)),
                    None => break,
                },
                1 => pos += 8,
                5 => pos += 4,
                2 => {
                    let Some(len) = varint(buf, &mut pos) else {
                        break;
                    };
                    let end = pos + len as usize;
                    if end > buf.len() {
                        break;
                    }
                    out.push((field, Some(base + pos..base + end), 0));
                    pos = end;
                }
                _ => break,
            }
        }
        out
    }

    /// The byte ranges of every float32 tensor's data (`raw_data`, or `float_data` packed)
    /// in an ONNX model file.
    pub fn float32_ranges(model: &[u8]) -> Vec<Range<usize>> {
        let mut out = Vec::new();
        for (field, r, _) in fields(model, 0) {
            if let (7, Some(r)) = (field, r) {
                graph(model, r, &mut out);
            }
        }
        out
    }

    fn graph(all: &[u8], at: Range<usize>, out: &mut Vec<Range<usize>>) {
        for (field, r, _) in fields(&all[at.clone()], at.start) {
            match (field, r) {
                (1, Some(r)) => {
                    for (f, a, _) in fields(&all[r.clone()], r.start) {
                        if let (5, Some(a)) = (f, a) {
                            attribute(all, a, out);
                        }
                    }
                }
                (5, Some(r)) => tensor(all, r, out),
                _ => {}
            }
        }
    }

    fn attribute(all: &[u8], at: Range<usize>, out: &mut Vec<Range<usize>>) {
        for (field, r, _) in fields(&all[at.clone()], at.start) {
            match (field, r) {
                (5 | 10, Some(r)) => tensor(all, r, out),
                (6 | 11, Some(r)) => graph(all, r, out),
                _ => {}
            }
        }
    }

    fn tensor(all: &[u8], at: Range<usize>, out: &mut Vec<Range<usize>>) {
        let fs = fields(&all[at.clone()], at.start);
        let float = fs.iter().any(|(f, r, v)| *f == 2 && r.is_none() && *v == 1);
        // raw_data (9) or packed float_data (4): both hold little-endian float32s.
        let raw = fs
            .into_iter()
            .find_map(|(f, r, _)| (f == 9 || f == 4).then_some(r).flatten());
        if float
            && let Some(raw) = raw
            && raw.len() % 4 == 0
            && !raw.is_empty()
        {
            out.push(raw);
        }
    }
}

/// The transforms, each applied to every range and undone range by range.
#[derive(Clone, Copy, PartialEq)]
enum Transform {
    Shuffle,
    ShuffleExponentDelta,
}

/// Groups the bytes of `src` (whole 4-byte floats) by position into `dst`.
fn shuffle(src: &[u8], dst: &mut [u8]) {
    let n = src.len() / 4;
    let (p0, rest) = dst.split_at_mut(n);
    let (p1, rest) = rest.split_at_mut(n);
    let (p2, p3) = rest.split_at_mut(n);
    for (i, f) in src.chunks_exact(4).enumerate() {
        p0[i] = f[0];
        p1[i] = f[1];
        p2[i] = f[2];
        p3[i] = f[3];
    }
}

fn unshuffle(src: &[u8], dst: &mut [u8]) {
    let n = src.len() / 4;
    let (p0, rest) = src.split_at(n);
    let (p1, rest) = rest.split_at(n);
    let (p2, p3) = rest.split_at(n);
    for (i, f) in dst.chunks_exact_mut(4).enumerate() {
        f[0] = p0[i];
        f[1] = p1[i];
        f[2] = p2[i];
        f[3] = p3[i];
    }
}

fn apply(t: Transform, data: &[u8], ranges: &[std::ops::Range<usize>]) -> Vec<u8> {
    let mut out = data.to_vec();
    for r in ranges {
        shuffle(&data[r.clone()], &mut out[r.clone()]);
        if t == Transform::ShuffleExponentDelta {
            let plane = &mut out[r.start + 3 * (r.len() / 4)..r.end];
            for i in (1..plane.len()).rev() {
                plane[i] = plane[i].wrapping_sub(plane[i - 1]);
            }
        }
    }
    out
}

/// Undoes `apply` in place, with `scratch` as large as the largest range.
fn undo(t: Transform, data: &mut [u8], ranges: &[std::ops::Range<usize>], scratch: &mut [u8]) {
    for r in ranges {
        if t == Transform::ShuffleExponentDelta {
            let plane = &mut data[r.start + 3 * (r.len() / 4)..r.end];
            for i in 1..plane.len() {
                plane[i] = plane[i].wrapping_add(plane[i - 1]);
            }
        }
        let tmp = &mut scratch[..r.len()];
        tmp.copy_from_slice(&data[r.clone()]);
        unshuffle(tmp, &mut data[r.clone()]);
    }
}

/// One range over a whole file's floats, as if every 4 bytes were one.
fn whole_file(len: usize) -> Vec<std::ops::Range<usize>> {
    std::iter::once(0..len - len % 4).collect()
}

/// Runs the `ampoule` binary in `dir`; panics with its stderr if it fails.
fn ampoule(dir: &Path, args: &[&str]) -> f64 {
    let start = Instant::now();
    let out = Command::new(AMPOULE)
        .args(args)
        .current_dir(dir)
        .stdin(Stdio::null())
        .output()
        .expect("ampoule starts");
    let secs = start.elapsed().as_secs_f64();
    assert!(
        out.status.success(),
        "ampoule {args:?} failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    secs
}

/// Packs `model` with `labels` into a bundle and returns the bundle's size.
fn pack(dir: &Path, model: &str, labels: &str) -> u64 {
    let out = format!("{model}.ampoule");
    if dir.join(&out).exists() {
        fs::remove_file(dir.join(&out)).expect("remove the last bundle");
    }
    ampoule(
        dir,
        &[
            "pack",
            "--model",
            model,
            "--labels",
            labels,
            "--name",
            "trailcam-weights",
            "--version",
            "1.0.0",
            "--created",
            "2026-12-02T08:00:00Z",
            "--key",
            "k.secret.pem",
            "-o",
            &out,
        ],
    );
    fs::metadata(dir.join(&out))
        .expect("the bundle exists")
        .len()
}

/// The best `ampoule verify --extract` time of `model`'s bundle.
fn verify(dir: &Path, model: &str, runs: usize) -> f64 {
    let bundle = format!("{model}.ampoule");
    let mut best = f64::INFINITY;
    for _ in 0..runs {
        let target = dir.join("out");
        if target.exists() {
            fs::remove_dir_all(&target).expect("remove the extracted files");
        }
        let status = Command::new("sync").status().expect("sync runs");
        assert!(status.success(), "sync failed");
        let secs = ampoule(
            dir,
            &[
                "verify",
                &bundle,
                "--trust",
                "k.public.pem",
                "--extract",
                "out",
            ],
        );
        best = best.min(secs);
    }
    best
}

struct Row {
    name: &'static str,
    compressed: usize,
    bundle: u64,
    /// The bundle it is compared with.
    base: u64,
    compress: f64,
    decompress: f64,
    transform: f64,
    untransform: f64,
}

/// Measures one model and prints its table; returns whether a transform qualifies.
fn measure(dir: &Path, file: &str, labels: &str, title: &str, runs: usize) -> bool {
    let data = fs::read(dir.join(file)).expect("the model reads");
    let len = data.len();
    let ranges = if file.ends_with(".onnx") {
        onnx::float32_ranges(&data)
    } else {
        whole_file(len)
    };
    let float_bytes: usize = ranges.iter().map(|r| r.len()).sum();
    let bundle_len = pack(dir, file, labels);
    let verify_secs = verify(dir, file, runs);
    // A transformed model is packed under a name with the same extension, so its bundle
    // differs from the plain one only in the model's bytes and digest. A model whose whole
    // file was shuffled no longer reads as ONNX: it is packed as `.bin` and compared with the
    // plain model packed as `.bin` too (no model signature in either manifest).
    let ext = file.rsplit('.').next().unwrap_or("bin");

    let mut rows = Vec::new();
    let mut row = |name: &'static str,
                   t: Option<Transform>,
                   ranges: &[std::ops::Range<usize>],
                   as_bin: bool| {
        let (input, bundle, base) = match t {
            Some(t) => {
                let input = apply(t, &data, ranges);
                let base = if as_bin {
                    fs::write(dir.join("plain.bin"), &data).expect("write the plain model");
                    pack(dir, "plain.bin", labels)
                } else {
                    bundle_len
                };
                let xform = format!("xform.{}", if as_bin { "bin" } else { ext });
                fs::write(dir.join(&xform), &input).expect("write the transformed model");
                (input, pack(dir, &xform, labels), base)
            }
            None => (data.clone(), bundle_len, bundle_len),
        };
        let packed = compress(&input);
        let compress_secs = best_secs(runs, len, || {
            std::hint::black_box(compress(&input));
        });
        let decompress_secs = best_secs(runs, len, || {
            std::hint::black_box(decompress(&packed, len));
        });
        let mut restored = decompress(&packed, len);
        let largest = ranges.iter().map(|r| r.len()).max().unwrap_or(0);
        let mut scratch = vec![0u8; largest];
        let (transform, untransform) = match t {
            Some(t) => {
                let fwd = best_secs(runs, len, || {
                    std::hint::black_box(apply(t, &data, ranges));
                });
                let mut work = input.clone();
                let back = best_secs(runs, len, || {
                    work.copy_from_slice(&input);
                    undo(t, &mut work, ranges, &mut scratch);
                });
                // The copy that restores the input each time is not part of undoing.
                let copy = best_secs(runs, len, || work.copy_from_slice(&input));
                undo(t, &mut restored, ranges, &mut scratch);
                (fwd, (back - copy).max(0.0))
            }
            None => (0.0, 0.0),
        };
        assert!(restored == data, "{name} does not round-trip on {file}");
        rows.push(Row {
            name,
            compressed: packed.len(),
            bundle,
            base,
            compress: compress_secs,
            decompress: decompress_secs,
            transform,
            untransform,
        });
    };
    row("zstd -3 (pack today)", None, &ranges, false);
    row(
        "shuffle + zstd -3",
        Some(Transform::Shuffle),
        &ranges,
        false,
    );
    row(
        "shuffle, exp. delta + zstd -3",
        Some(Transform::ShuffleExponentDelta),
        &ranges,
        false,
    );
    if file.ends_with(".onnx") {
        let whole = whole_file(len);
        row(
            "shuffle whole file + zstd",
            Some(Transform::Shuffle),
            &whole,
            true,
        );
    }

    println!();
    println!(
        "{title}: {len} bytes, {float_bytes} in {} float32 tensors; bundle {bundle_len} bytes, \
         ampoule verify --extract {verify_secs:.4} s",
        ranges.len()
    );
    println!(
        "{:<30} {:>10} {:>7} {:>9} {:>9} {:>9} {:>9} {:>10} {:>8} {:>8}",
        "",
        "zstd bytes",
        "ratio",
        "comp s",
        "decomp s",
        "xform s",
        "undo s",
        "bundle",
        "bundle",
        "verify"
    );
    let plain = &rows[0];
    let mut qualifies = false;
    for r in &rows {
        let saving = 1.0 - r.bundle as f64 / r.base as f64;
        let added = r.untransform + (r.decompress - plain.decompress);
        let slowdown = added / verify_secs;
        let ok = r.name != plain.name && saving >= MIN_SAVING && slowdown <= MAX_SLOWDOWN;
        qualifies |= ok;
        println!(
            "{:<30} {:>10} {:>7.4} {:>9.4} {:>9.4} {:>9.4} {:>9.4} {:>10} {:>7.2}% {:>+7.2}%{}",
            r.name,
            r.compressed,
            len as f64 / r.compressed as f64,
            r.compress,
            r.decompress,
            r.transform,
            r.untransform,
            r.bundle,
            -100.0 * saving,
            100.0 * slowdown,
            if ok { "  qualifies" } else { "" }
        );
    }
    qualifies
}

fn main() {
    let runs = env_number("AMPOULE_BENCH_RUNS", 3).max(1) as usize;
    let tmp = tempfile::tempdir().expect("a temp dir can be made");
    let dir = tmp.path();
    let cores = std::thread::available_parallelism().map_or(0, |n| n.get());
    println!(
        "ampoule weights bench, {}: zstd level {ZSTD_LEVEL}, {ZSTD_WORKERS} workers, \
         best of {runs} (AMPOULE_BENCH_RUNS), {cores} cores",
        ampoule_verify::Timestamp::now()
    );
    println!(
        "bundle: `ampoule pack` of the transformed model (no transform recorded, the format \
         has none); verify: estimated added time (undo + decompression change) against \
         ampoule verify --extract. Rule: <= -{:.0}% and <= +{:.0}% on both models.",
        100.0 * MIN_SAVING,
        100.0 * MAX_SLOWDOWN
    );
    ampoule(
        dir,
        &[
            "keygen",
            "--secret",
            "k.secret.pem",
            "--public",
            "k.public.pem",
        ],
    );
    synth::write_weights(&dir.join("model.bin"), SYNTH_BYTES, 2026).expect("write the model");
    fs::write(dir.join("species.txt"), synth::species_labels()).expect("write the labels");
    let real = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join(REAL_MODEL);
    fs::copy(&real, dir.join("cls.onnx")).expect("copy the real model");
    // The classifier's two classes, from the wheel's config.yaml (label_list: ['0', '180']).
    fs::write(dir.join("cls.txt"), "0\n180\n").expect("write the labels");

    let invented = measure(
        dir,
        "model.bin",
        "species.txt",
        "invented trail-camera weights (84 MiB)",
        runs,
    );
    let real = measure(
        dir,
        "cls.onnx",
        "cls.txt",
        "rapidocr-onnxruntime 1.4.4 ch_ppocr_mobile_v2.0_cls_infer.onnx",
        runs,
    );
    println!();
    println!(
        "decision (issue 13 item 5): {}",
        if invented && real {
            "a transform qualifies on both models: propose it"
        } else {
            "no transform qualifies on both models: adopt none"
        }
    );
}
