//! `cargo bench --bench delta`: deltas (issue 13) on the invented model, in one run on
//! the same machine: the delta's size against `zstd -3 --patch-from` of the same two model
//! files, the full bundle and the floor (the changed bytes alone, compressed at level 3);
//! the time to make and to apply it against the full bundle's pack and verify; and the peak
//! memory of applying it.
//!
//! Two cases, each from the same base release: the classifier head (2048 x 6 float32 and its
//! bias, 49,176 bytes) retrained, and the head grown to 7 classes, which moves every byte
//! after it (`synth::write_head_model`). Settings: `AMPOULE_BENCH_SCALE` (the model is 84 MiB
//! times this, default 1) and `AMPOULE_BENCH_RUNS` (the median of this many runs, default 3).
//!
//! Applying runs in a child process (this bench program started again with `apply-child`),
//! which reads its own peak resident memory (VmHWM in /proc/self/status) after applying: the
//! whole process, the library's buffers and the program around them (the largest of the runs
//! is judged). The bench never fails; it reports. Each case also prints one `REPORT delta
//! key=value ...` line (times and memory as `median/min/max`), which `benches/report` reads.

use std::fs::{self, File};
use std::path::Path;
use std::process::Command;
use std::time::Instant;

use ampoule::release::synth;
use ampoule_verify::payload::delta::apply;
use ampoule_verify::{PublicKey, TrustedKeys, Verifier};

const AMPOULE: &str = env!("CARGO_BIN_EXE_ampoule");
const BASE_MODEL_BYTES: u64 = 84 * 1024 * 1024;
const MIB: f64 = 1024.0 * 1024.0;
/// The memory target for applying a delta.
const TARGET_RSS_MIB: f64 = 32.0;

fn env_number(name: &str, default: u64) -> u64 {
    std::env::var(name)
        .ok()
        .and_then(|v| v.trim().parse().ok())
        .unwrap_or(default)
}

/// Runs a program to completion in `dir` and returns its wall time and stdout; panics with
/// its stderr if it fails, because a timing of a failed run would mean nothing.
fn timed(dir: &Path, program: &str, args: &[&str]) -> (f64, String) {
    let start = Instant::now();
    let out = Command::new(program)
        .args(args)
        .current_dir(dir)
        .output()
        .unwrap_or_else(|e| panic!("cannot start {program}: {e}"));
    let secs = start.elapsed().as_secs_f64();
    assert!(
        out.status.success(),
        "{program} {args:?} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    (secs, String::from_utf8_lossy(&out.stdout).into_owned())
}

fn median(mut xs: Vec<f64>) -> f64 {
    xs.sort_by(f64::total_cmp);
    xs[xs.len() / 2]
}

/// `median/min/max` of `xs`, for the `REPORT` lines.
fn triple(xs: &[f64]) -> String {
    let min = xs.iter().copied().fold(f64::INFINITY, f64::min);
    let max = xs.iter().copied().fold(0.0, f64::max);
    format!("{:.4}/{min:.4}/{max:.4}", median(xs.to_vec()))
}

fn remove(path: &Path) {
    if path.is_dir() {
        fs::remove_dir_all(path).expect("remove a bench output directory");
    } else if path.exists() {
        fs::remove_file(path).expect("remove a bench output file");
    }
}

fn len(path: &Path) -> u64 {
    fs::metadata(path).expect("a bench file exists").len()
}

/// The child: applies DELTA to the base files in BASE into OUT (a new directory), checking
/// the carried manifest against PUB, and prints its peak resident memory in KiB.
fn apply_child(args: &[String]) {
    let [delta, base, out, public] = args else {
        panic!("apply-child DELTA BASE OUT PUB.pem");
    };
    let pem = fs::read_to_string(public).expect("public key");
    let mut keys = TrustedKeys::new();
    keys.add(PublicKey::from_pem(&pem).expect("a public key"));
    let verifier = Verifier::new(keys, semver::Version::new(2, 1, 0))
        .expect("a verifier")
        .installed(semver::Version::new(1, 0, 0));
    fs::create_dir(out).expect("the output directory");
    let base = Path::new(base);
    let mut files = [
        File::open(base.join("model.bin")).expect("base model"),
        File::open(base.join("labels.txt")).expect("base labels"),
    ];
    let delta = File::open(delta).expect("the delta");
    apply(&verifier, delta, &mut files, Path::new(out)).expect("the delta applies");
    let status = fs::read_to_string("/proc/self/status").expect("/proc/self/status");
    let hwm = status
        .lines()
        .find_map(|l| l.strip_prefix("VmHWM:"))
        .and_then(|v| v.split_whitespace().next())
        .expect("VmHWM");
    println!("{hwm}");
}

/// The changed bytes alone compressed at level 3: the least any delta could be.
fn floor(new_model: &Path, classes: u64) -> u64 {
    let model = fs::read(new_model).expect("the new model");
    let head = synth::head_bytes(classes) as usize;
    let end = model.len() - synth::HEAD_TAIL_BYTES as usize;
    zstd::bulk::compress(&model[end - head..end], 3)
        .expect("zstd")
        .len() as u64
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    if args.first().map(String::as_str) == Some("apply-child") {
        apply_child(&args[1..]);
        return;
    }
    let scale = env_number("AMPOULE_BENCH_SCALE", 1).max(1);
    let runs = env_number("AMPOULE_BENCH_RUNS", 3).max(1) as usize;
    let model_bytes = BASE_MODEL_BYTES * scale;
    let work = tempfile::tempdir().expect("a temporary directory");
    let dir = work.path();
    let me = std::env::current_exe().expect("this program's path");
    let me = me.to_str().expect("a UTF-8 path");
    println!(
        "delta bench: model {:.0} MiB float32 (scale {scale}), median of {runs} runs",
        model_bytes as f64 / MIB
    );
    timed(
        dir,
        AMPOULE,
        &[
            "keygen",
            "--secret",
            "k.secret.pem",
            "--public",
            "k.public.pem",
        ],
    );
    fs::write(dir.join("labels.txt"), synth::species_labels()).expect("labels");
    fs::write(
        dir.join("labels6.txt"),
        "fox\nroe deer\nwild boar\nbadger\nhare\nempty frame\n",
    )
    .expect("labels");
    synth::write_head_model(&dir.join("old.bin"), model_bytes, 6, 2).expect("base model");
    let pack = |model: &str, version: &str, out: &str| {
        remove(&dir.join(out));
        timed(
            dir,
            AMPOULE,
            &[
                "pack",
                "--model",
                model,
                "--labels",
                "labels6.txt",
                "--name",
                "trailcam-species",
                "--version",
                version,
                "--key",
                "k.secret.pem",
                "--created",
                "2026-12-01T08:00:00Z",
                "-o",
                out,
            ],
        )
        .0
    };
    pack("old.bin", "1.0.0", "old.ampoule");
    timed(
        dir,
        AMPOULE,
        &[
            "verify",
            "old.ampoule",
            "--trust",
            "k.public.pem",
            "--app-version",
            "2.1.0",
            "--extract",
            "base",
        ],
    );
    for (case, classes) in [
        ("retrained head (2048x6)", 6u64),
        ("head grown 6 -> 7 classes", 7),
    ] {
        println!("\n== {case}");
        synth::write_head_model(&dir.join("new.bin"), model_bytes, classes, 4).expect("new model");
        let pack_all: Vec<f64> = (0..runs)
            .map(|_| pack("new.bin", "1.1.0", "new.ampoule"))
            .collect();
        let pack_secs = median(pack_all.clone());
        let verify_all: Vec<f64> = (0..runs)
            .map(|_| {
                remove(&dir.join("full"));
                timed(
                    dir,
                    AMPOULE,
                    &[
                        "verify",
                        "new.ampoule",
                        "--trust",
                        "k.public.pem",
                        "--app-version",
                        "2.1.0",
                        "--installed",
                        "1.0.0",
                        "--extract",
                        "full",
                    ],
                )
                .0
            })
            .collect();
        let verify_secs = median(verify_all.clone());
        let make_all: Vec<f64> = (0..runs)
            .map(|_| {
                remove(&dir.join("d.ampoule-delta"));
                timed(
                    dir,
                    AMPOULE,
                    &[
                        "delta",
                        "--from",
                        "old.ampoule",
                        "new.ampoule",
                        "-o",
                        "d.ampoule-delta",
                    ],
                )
                .0
            })
            .collect();
        let make_secs = median(make_all.clone());
        let mut peaks = Vec::new();
        let apply_all: Vec<f64> = (0..runs)
            .map(|_| {
                remove(&dir.join("rebuilt"));
                let (secs, out) = timed(
                    dir,
                    me,
                    &[
                        "apply-child",
                        "d.ampoule-delta",
                        "base",
                        "rebuilt",
                        "k.public.pem",
                    ],
                );
                peaks.push(out.trim().parse::<f64>().expect("VmHWM in KiB") / 1024.0);
                secs
            })
            .collect();
        let apply_secs = median(apply_all.clone());
        for name in ["model.bin", "labels.txt"] {
            assert!(
                fs::read(dir.join("rebuilt").join(name)).ok()
                    == fs::read(dir.join("full").join(name)).ok(),
                "the rebuilt {name} differs from the full bundle's"
            );
        }
        remove(&dir.join("patch.zst"));
        let zstd_make = timed(
            dir,
            "zstd",
            &[
                "-q",
                "-3",
                "--patch-from=old.bin",
                "new.bin",
                "-o",
                "patch.zst",
            ],
        )
        .0;
        let delta = len(&dir.join("d.ampoule-delta"));
        let patch = len(&dir.join("patch.zst"));
        let bundle = len(&dir.join("new.ampoule"));
        let floor = floor(&dir.join("new.bin"), classes);
        println!(
            "size   delta {delta} B | zstd -3 --patch-from {patch} B (model file only) | floor {floor} B | full bundle {bundle} B"
        );
        println!(
            "       delta / patch-from {:.3} ({}) | delta / floor {:.2} | delta / bundle {:.4}%",
            delta as f64 / patch as f64,
            if delta <= patch {
                "PASS: no larger"
            } else {
                "MISS: larger"
            },
            delta as f64 / floor as f64,
            delta as f64 * 100.0 / bundle as f64
        );
        println!(
            "time   make {make_secs:.3} s vs pack {pack_secs:.3} s ({:.2}x); zstd --patch-from makes in {zstd_make:.3} s",
            make_secs / pack_secs
        );
        println!(
            "       apply {apply_secs:.3} s vs verify --extract {verify_secs:.3} s ({:.2}x)",
            apply_secs / verify_secs
        );
        let peak = peaks.iter().copied().fold(0.0, f64::max);
        println!(
            "memory apply peak RSS {peak:.1} MiB (whole process; target <= {TARGET_RSS_MIB} MiB: {})",
            if peak <= TARGET_RSS_MIB {
                "PASS"
            } else {
                "MISS"
            }
        );
        println!(
            "REPORT delta scale={scale} runs={runs} classes={classes} delta_bytes={delta} \
             patch_bytes={patch} floor_bytes={floor} bundle_bytes={bundle} make={} pack={} \
             apply={} verify={} zstd_make={zstd_make:.4} apply_rss_mib={} \
             target_rss_mib={TARGET_RSS_MIB}",
            triple(&make_all),
            triple(&pack_all),
            triple(&apply_all),
            triple(&verify_all),
            triple(&peaks)
        );
    }
}
