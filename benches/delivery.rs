//! Measures delivery of an 84 MiB invented model over loopback (issue 3): `ampoule update`
//! (feed, download, verify, install into the store with every file flushed to disk) against
//! what general-purpose tools take for the same bytes from the same server: `curl` for the
//! download, then the checks FORMAT.md describes with openssl, GNU tar and zstd, and `sync`
//! for the unpacked files. Also the update's peak resident memory and the store's extra disk
//! space while it installs.
//!
//! Then (issue 13) the update of a device on 1.0.0 to 1.1.0 of the issue's 84 MiB model with
//! a retrained last layer (`synth::write_head_model`), with a delta against with the full
//! bundle: two release trees with the same two bundles, one published with deltas (`publish`
//! makes the delta from 1.0.0 and lists it in the feed and the ledger) and one without, each
//! device updating from its own with the ledger checked; the whole `ampoule update` process's
//! time, peak RSS and downloaded bytes.
//!
//! Run with `cargo bench --bench delivery`; it prints its numbers and is not part of the test
//! suite. It needs curl, openssl, tar and zstd; /usr/bin/time (or python3) for peak memory.
//! Each part also prints one `REPORT delivery ...` or `REPORT delivery-delta ...` line of
//! `key=value` figures (times as `median/min/max` in seconds), which `benches/report` reads.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::time::{Duration, Instant};

use ampoule::release::keyfile;
use ampoule::release::pack::{PackSpec, pack};
use ampoule::release::serve::Server;
use ampoule::release::synth;
use ampoule::release::tree::{Signing, Tree};
use ampoule_verify::model::read_model_signature_file;
use ampoule_verify::{PublicKey, Timestamp, TrustedKeys};
use anyhow::{Context, Result, bail};

const BIN: &str = env!("CARGO_BIN_EXE_ampoule");
/// 96 x 96 x 3 inputs into 797 hidden units: 88.1 MB (84.0 MiB) of float32 weights.
const SIDE: u64 = 96;
const HIDDEN: u64 = 797;
const LABELS: [&str; 7] = [
    "fox",
    "roe deer",
    "wild boar",
    "badger",
    "hare",
    "empty frame",
    "pine marten",
];
/// Runs of each side, alternating (`AMPOULE_BENCH_RUNS`, default 3).
fn runs() -> usize {
    std::env::var("AMPOULE_BENCH_RUNS")
        .ok()
        .and_then(|v| v.parse().ok())
        .filter(|&n| n > 0)
        .unwrap_or(3)
}

/// CPU time (user + system) of this process's waited-for children so far, from
/// `/proc/self/stat` (fields 16 and 17, in clock ticks of 1/100 s: proc(5)).
fn children_cpu() -> Duration {
    let stat = std::fs::read_to_string("/proc/self/stat").unwrap_or_default();
    let after_name = stat.rsplit(')').next().unwrap_or("");
    let fields: Vec<u64> = after_name
        .split_whitespace()
        .map(|f| f.parse().unwrap_or(0))
        .collect();
    // After the name: field 3 (state) is fields[0], so field 16 is fields[13].
    let ticks = fields.get(13).copied().unwrap_or(0) + fields.get(14).copied().unwrap_or(0);
    Duration::from_millis(ticks * 10)
}

/// Median, min and max of `times`, in seconds.
fn spread(times: &[Duration]) -> String {
    let min = times.iter().min().copied().unwrap_or_default();
    let max = times.iter().max().copied().unwrap_or_default();
    format!(
        "{:.3} ({:.3}-{:.3})",
        median(times.to_vec()).as_secs_f64(),
        min.as_secs_f64(),
        max.as_secs_f64()
    )
}

/// `median/min/max` of `times` in seconds, for the `REPORT` lines.
fn triple(times: &[Duration]) -> String {
    let min = times.iter().min().copied().unwrap_or_default();
    let max = times.iter().max().copied().unwrap_or_default();
    format!(
        "{:.4}/{:.4}/{:.4}",
        median(times.to_vec()).as_secs_f64(),
        min.as_secs_f64(),
        max.as_secs_f64()
    )
}

fn mib(bytes: u64) -> f64 {
    bytes as f64 / (1024.0 * 1024.0)
}

fn median(mut times: Vec<Duration>) -> Duration {
    times.sort();
    times[times.len() / 2]
}

/// Disk space a directory tree takes (allocated blocks), following no links.
fn disk_usage(path: &Path) -> u64 {
    use std::os::unix::fs::MetadataExt;
    let Ok(meta) = std::fs::symlink_metadata(path) else {
        return 0;
    };
    let mut total = meta.blocks() * 512;
    if meta.is_dir()
        && let Ok(entries) = std::fs::read_dir(path)
    {
        for entry in entries.flatten() {
            total += disk_usage(&entry.path());
        }
    }
    total
}

/// Runs `command`, returning its wall time and, when a tool can tell, its peak RSS in KiB.
fn run_measured(command: Command, dir: &Path) -> Result<(Duration, Option<u64>)> {
    let rss_file = dir.join("maxrss");
    let _ = std::fs::remove_file(&rss_file);
    let program = command.get_program().to_owned();
    let args: Vec<_> = command.get_args().map(|a| a.to_owned()).collect();
    let cwd = command.get_current_dir().map(Path::to_path_buf);
    let mut wrapped = if Path::new("/usr/bin/time").is_file() {
        let mut c = Command::new("/usr/bin/time");
        c.arg("-f").arg("%M").arg("-o").arg(&rss_file).arg(&program);
        c
    } else {
        // Python's resource module reads the children's rusage: ru_maxrss in KiB on Linux.
        let mut c = Command::new("python3");
        c.arg("-c").arg(
            "import resource,subprocess,sys; r=subprocess.run(sys.argv[2:]); \
             open(sys.argv[1],'w').write(str(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)); \
             sys.exit(r.returncode)",
        );
        c.arg(&rss_file).arg(&program);
        c
    };
    wrapped.args(&args);
    if let Some(cwd) = cwd {
        wrapped.current_dir(cwd);
    }
    let start = Instant::now();
    let out = wrapped
        .output()
        .context("cannot run the measured command")?;
    let elapsed = start.elapsed();
    if !out.status.success() {
        bail!(
            "{program:?} failed: {}{}",
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        );
    }
    let rss = std::fs::read_to_string(&rss_file)
        .ok()
        .and_then(|s| s.trim().parse().ok());
    Ok((elapsed, rss))
}

fn update_command(dir: &Path, store: &Path, feed: &str) -> Command {
    let mut c = Command::new(BIN);
    c.args(["update", "--store"])
        .arg(store)
        .args(["--feed", feed, "--trust"])
        .arg(dir.join("release.public.pem"))
        .args(["--app-version", "2.3.0", "--device-id", "camera-bench"]);
    c
}

fn pack_release(
    dir: &Path,
    version: &str,
    seed: u64,
    key: &ed25519_dalek::SigningKey,
) -> Result<(PathBuf, u64)> {
    let model = dir.join(format!("species-{version}.onnx"));
    synth::write_onnx_classifier(&model, SIDE, HIDDEN, LABELS.len() as u64, seed)?;
    let model_len = std::fs::metadata(&model)?.len();
    let spec = PackSpec {
        model: model.clone(),
        model_path: "model.onnx".into(),
        labels: LABELS.iter().map(|s| s.to_string()).collect(),
        name: "trailcam-species".into(),
        version: version.parse()?,
        requires_app: ">=2.0.0, <3.0.0".parse()?,
        created: "2026-12-01T06:00:00Z".parse()?,
        model_signature: read_model_signature_file(&model)?,
        metadata: None,
    };
    let bundle = dir.join(format!("species-{version}.ampoule"));
    pack(&spec, Some(key), &bundle, &indicatif::ProgressBar::hidden())?;
    Ok((bundle, model_len))
}

fn publish(
    tree: &Path,
    bundle: &Path,
    key: &ed25519_dalek::SigningKey,
    trusted: &TrustedKeys,
) -> Result<ampoule::release::tree::Change> {
    // Full bundles only: this part measures the full download.
    publish_with_deltas(tree, bundle, key, trusted, 0)
}

/// Publishes `bundle` on `stable` with deltas from up to `bases` earlier releases.
fn publish_with_deltas(
    tree: &Path,
    bundle: &Path,
    key: &ed25519_dalek::SigningKey,
    trusted: &TrustedKeys,
    bases: usize,
) -> Result<ampoule::release::tree::Change> {
    let tree = Tree::lock(tree)?;
    let staged = tree.stage_bundle(bundle, trusted)?;
    tree.publish(
        staged,
        "stable",
        100,
        &[],
        bases,
        &Signing {
            key_file: None,
            key,
            now: Timestamp::now(),
            expires_in_secs: 86_400,
            tree_head_keys: &[],
            outside: &[],
        },
    )
    .map(|(change, _)| change)
}

/// The reference: curl, then the FORMAT.md checks with openssl, tar and zstd, then sync.
/// The plain pipeline (issue 13's reference): the download, then what the pipeline bench runs
/// to verify and unpack (the signature, the payload's digest, `zstd -d | tar x`), nothing more.
const PLAIN: &str = r#"set -euo pipefail
cd "$1"
curl -s -o bundle.ampoule "$2"
tar xf bundle.ampoule manifest.json signatures.json payload.tar.zst
{ printf 'ampoule-sig-v1:manifest\n'; cat manifest.json; } > signed.bin
python3 -c 'import json,sys; print(json.load(open("signatures.json"))["signatures"][0]["signature"])' | xxd -r -p > sig.bin
openssl pkeyutl -verify -pubin -inkey "$4" -rawin -in signed.bin -sigfile sig.bin > /dev/null
openssl dgst -sha256 payload.tar.zst > /dev/null
mkdir out
zstd -d -q -c payload.tar.zst | tar xf - -C out
"#;

/// The full reference: the plain pipeline plus what ampoule also does (the bundle's digest
/// against the feed's, the unpacked files' digests, and flushing them to disk).
const REFERENCE: &str = r#"set -euo pipefail
cd "$1"
curl -s -o bundle.ampoule "$2"
echo "$3  bundle.ampoule" | sha256sum -c --quiet -
tar xf bundle.ampoule manifest.json signatures.json payload.tar.zst
{ printf 'ampoule-sig-v1:manifest\n'; cat manifest.json; } > signed.bin
python3 -c 'import json,sys; print(json.load(open("signatures.json"))["signatures"][0]["signature"])' | xxd -r -p > sig.bin
openssl pkeyutl -verify -pubin -inkey "$4" -rawin -in signed.bin -sigfile sig.bin > /dev/null
openssl dgst -sha256 payload.tar.zst > /dev/null
mkdir out
zstd -d -q -c payload.tar.zst | tar xf - -C out
sha256sum out/model.onnx out/labels.txt > /dev/null
sync out/model.onnx out/labels.txt
"#;

fn main() -> Result<()> {
    for tool in [
        "curl",
        "openssl",
        "tar",
        "zstd",
        "xxd",
        "python3",
        "sha256sum",
    ] {
        if Command::new(tool).arg("--version").output().is_err() {
            println!("delivery benchmark skipped: the {tool} command is not available");
            return Ok(());
        }
    }
    let work = tempfile::tempdir()?;
    let dir = work.path();
    let key = keyfile::generate_key();
    let public = PublicKey::from_verifying_key(&key.verifying_key())?;
    keyfile::write_public_key(&dir.join("release.public.pem"), &public)?;
    let trusted: TrustedKeys = [public].into_iter().collect();

    let (v1, model_len) = pack_release(dir, "1.0.0", 1, &key)?;
    let bundle_len = std::fs::metadata(&v1)?.len();
    let tree = dir.join("release");
    let change = publish(&tree, &v1, &key, &trusted)?;
    let release = change.feed.release.clone().context("published release")?;
    let server = Server::start(tree.clone(), "127.0.0.1:0".parse()?)?;
    let feed = server.url("feeds/stable.json");
    let bundle_url = server.url(&format!("bundles/{}.ampoule", release.sha256));
    println!(
        "delivery of an invented model: {:.1} MiB model, {:.1} MiB bundle, over loopback from the in-process server",
        mib(model_len),
        mib(bundle_len)
    );

    // The three sides alternate, run by run, so that a change of load touches each alike.
    let runs = runs();
    let (mut ours, mut plain, mut theirs) = (Vec::new(), Vec::new(), Vec::new());
    let (mut ours_cpu, mut plain_cpu, mut theirs_cpu) = (Vec::new(), Vec::new(), Vec::new());
    let mut rss = Vec::new();
    let load = || std::fs::read_to_string("/proc/loadavg").unwrap_or_default();
    let load_start = load();
    for run in 0..runs {
        let store = dir.join(format!("store-{run}"));
        let cpu = children_cpu();
        let (t, r) = run_measured(update_command(dir, &store, &feed), dir)?;
        ours.push(t);
        ours_cpu.push(children_cpu().saturating_sub(cpu));
        rss.extend(r);
        for (script, times, cpus) in [
            (PLAIN, &mut plain, &mut plain_cpu),
            (REFERENCE, &mut theirs, &mut theirs_cpu),
        ] {
            let scratch = dir.join(format!("reference-{run}"));
            std::fs::create_dir(&scratch)?;
            let mut c = Command::new("bash");
            c.arg("-c")
                .arg(script)
                .arg("reference")
                .arg(&scratch)
                .arg(&bundle_url)
                .arg(release.sha256.to_hex())
                .arg(dir.join("release.public.pem"));
            let cpu = children_cpu();
            let start = Instant::now();
            let out = c.output()?;
            if !out.status.success() {
                bail!(
                    "the reference pipeline failed: {}",
                    String::from_utf8_lossy(&out.stderr)
                );
            }
            times.push(start.elapsed());
            cpus.push(children_cpu().saturating_sub(cpu));
            std::fs::remove_dir_all(&scratch)?;
        }
    }
    let secs = |t: &[Duration]| median(t.to_vec()).as_secs_f64();
    println!(
        "  {runs} runs each, alternating; load average at the start {}",
        load_start.trim()
    );
    println!(
        "  ampoule update (fresh store): median {} s; CPU {:.3} s",
        spread(&ours),
        secs(&ours_cpu)
    );
    println!(
        "  curl + openssl + zstd | tar (the plain pipeline): median {} s; CPU {:.3} s",
        spread(&plain),
        secs(&plain_cpu)
    );
    println!(
        "  curl + sha256sum + tar + openssl + zstd | tar + sha256sum + sync: median {} s; CPU {:.3} s",
        spread(&theirs),
        secs(&theirs_cpu)
    );
    println!(
        "  ratio ampoule / plain pipeline: {:.2} (target <= 0.80: {}); CPU {:.2}",
        secs(&ours) / secs(&plain),
        if secs(&ours) <= 0.8 * secs(&plain) {
            "PASS"
        } else {
            "MISS"
        },
        secs(&ours_cpu) / secs(&plain_cpu)
    );
    println!(
        "  ratio ampoule / full reference: {:.2}; CPU {:.2}",
        secs(&ours) / secs(&theirs),
        secs(&ours_cpu) / secs(&theirs_cpu)
    );
    println!("  load average at the end {}", load().trim());
    println!(
        "REPORT delivery runs={runs} update={} plain={} full_ref={} update_cpu={:.3} \
         plain_cpu={:.3} full_ref_cpu={:.3} update_rss_mib={:.1} target_ratio=0.8",
        triple(&ours),
        triple(&plain),
        triple(&theirs),
        secs(&ours_cpu),
        secs(&plain_cpu),
        secs(&theirs_cpu),
        rss.iter().max().map_or(0.0, |&kib| kib as f64 / 1024.0)
    );
    match rss.iter().max() {
        Some(kib) => println!(
            "  peak RSS of ampoule update: {:.1} MiB (max of {runs} runs; the model is {:.1} MiB)",
            *kib as f64 / 1024.0,
            mib(model_len)
        ),
        None => {
            println!("  peak RSS of ampoule update: not measured (no /usr/bin/time or python3)")
        }
    }

    // The store's disk space while an update installs over an installed model: polled every
    // 2 ms from another thread.
    let (v2, _) = pack_release(dir, "1.1.0", 2, &key)?;
    publish(&tree, &v2, &key, &trusted)?;
    let store = dir.join("store-0");
    let before = disk_usage(&store);
    let peak = Arc::new(AtomicU64::new(before));
    let done = Arc::new(AtomicBool::new(false));
    let poller = {
        let (peak, done, store) = (Arc::clone(&peak), Arc::clone(&done), store.clone());
        std::thread::spawn(move || {
            while !done.load(Ordering::SeqCst) {
                peak.fetch_max(disk_usage(&store), Ordering::SeqCst);
                std::thread::sleep(Duration::from_millis(2));
            }
        })
    };
    let (t, r) = run_measured(update_command(dir, &store, &feed), dir)?;
    done.store(true, Ordering::SeqCst);
    let _ = poller.join();
    let after = disk_usage(&store);
    let peak = peak.load(Ordering::SeqCst).max(after);
    println!(
        "  update 1.0.0 -> 1.1.0: {:.3} s, peak RSS {}",
        t.as_secs_f64(),
        r.map_or_else(
            || "not measured".into(),
            |k| format!("{:.1} MiB", k as f64 / 1024.0)
        )
    );
    println!(
        "  store on disk: {:.1} MiB before, {:.1} MiB at the peak, {:.1} MiB after (current + previous)",
        mib(before),
        mib(peak),
        mib(after)
    );
    println!(
        "  extra disk space during the install: {:.1} MiB = {:.2} x one model copy (the download and the unpacked new release)",
        mib(peak - before),
        (peak - before) as f64 / model_len as f64
    );
    server.shutdown()?;
    delta_update(dir, &key, &trusted)
}

/// The 84 MiB model with a retrained head, packed opaque as `version`.
fn pack_head_model(
    dir: &Path,
    version: &str,
    head_seed: u64,
    key: &ed25519_dalek::SigningKey,
) -> Result<PathBuf> {
    let model = dir.join(format!("head-{version}.bin"));
    synth::write_head_model(&model, 84 * 1024 * 1024, 6, head_seed)?;
    let spec = PackSpec {
        model: model.clone(),
        model_path: "model.bin".into(),
        labels: LABELS[..6].iter().map(|s| s.to_string()).collect(),
        name: "trailcam-species".into(),
        version: version.parse()?,
        requires_app: ">=2.0.0, <3.0.0".parse()?,
        created: "2026-12-01T06:00:00Z".parse()?,
        model_signature: None,
        metadata: None,
    };
    let bundle = dir.join(format!("head-{version}.ampoule"));
    pack(&spec, Some(key), &bundle, &indicatif::ProgressBar::hidden())?;
    std::fs::remove_file(&model)?;
    Ok(bundle)
}

/// `ampoule update --json`; returns the report's `downloaded_bytes` and whether a delta was
/// used, with the time and peak RSS.
fn update_json(dir: &Path, store: &Path, feed: &str) -> Result<(Duration, Option<u64>, u64, bool)> {
    let out = dir.join("update.json");
    let mut c = Command::new("bash");
    c.arg("-c")
        .arg(r#"out="$1"; shift; exec "$@" > "$out""#)
        .arg("update")
        .arg(&out);
    let update = update_command(dir, store, feed);
    c.arg(update.get_program()).arg("--json");
    c.args(update.get_args());
    let (t, rss) = run_measured(c, dir)?;
    let doc: serde_json::Value = serde_json::from_slice(&std::fs::read(&out)?)?;
    let downloaded = doc["downloaded_bytes"]
        .as_u64()
        .context("downloaded_bytes")?;
    Ok((t, rss, downloaded, !doc["delta"].is_null()))
}

fn delta_update(dir: &Path, key: &ed25519_dalek::SigningKey, trusted: &TrustedKeys) -> Result<()> {
    let v1 = pack_head_model(dir, "1.0.0", 2, key)?;
    let v2 = pack_head_model(dir, "1.1.0", 4, key)?;
    let bundle_len = std::fs::metadata(&v2)?.len();
    let (with, without) = (dir.join("tree-deltas"), dir.join("tree-plain"));
    let mut feeds = Vec::new();
    let mut servers = Vec::new();
    for tree in [&with, &without] {
        publish(tree, &v1, key, trusted)?;
        let server = Server::start(tree.clone(), "127.0.0.1:0".parse()?)?;
        feeds.push(server.url("feeds/stable.json"));
        servers.push(server);
    }
    // Devices on 1.0.0, one per run and side.
    for run in 0..runs() {
        for (side, feed) in ["delta", "full"].iter().zip(&feeds) {
            let store = dir.join(format!("head-{side}-{run}"));
            update_json(dir, &store, feed)?;
        }
    }
    publish_with_deltas(&with, &v2, key, trusted, 1)?;
    publish(&without, &v2, key, trusted)?;
    let signed = ampoule_verify::feed::SignedFeed::from_json(&std::fs::read(
        with.join("feeds/stable.json"),
    )?)?;
    let feed = ampoule_verify::feed::Feed::from_json(signed.feed.as_bytes())?;
    let delta = feed
        .release
        .and_then(|r| r.deltas.into_iter().next())
        .context("publish listed no delta")?;
    println!(
        "update 1.0.0 -> 1.1.0 of the 84.0 MiB model with a retrained last layer: a {} byte \
         delta against the {:.1} MiB bundle ({:.3}%)",
        delta.size,
        mib(bundle_len),
        delta.size as f64 * 100.0 / bundle_len as f64
    );
    let (mut times, mut rss, mut bytes) = ([Vec::new(), Vec::new()], [0u64; 2], [0u64; 2]);
    for run in 0..runs() {
        for (i, (side, feed)) in ["delta", "full"].iter().zip(&feeds).enumerate() {
            let store = dir.join(format!("head-{side}-{run}"));
            let (t, r, downloaded, used) = update_json(dir, &store, feed)?;
            if used != (i == 0) {
                bail!("the {side} update used a delta: {used}");
            }
            times[i].push(t);
            rss[i] = rss[i].max(r.unwrap_or(0));
            bytes[i] = downloaded;
        }
    }
    let shown = |t: &[Duration]| {
        let mut t: Vec<f64> = t.iter().map(Duration::as_secs_f64).collect();
        t.sort_by(f64::total_cmp);
        format!(
            "median {:.3} s of {} (min {:.3}, max {:.3})",
            t[t.len() / 2],
            t.len(),
            t[0],
            t[t.len() - 1]
        )
    };
    for (i, side) in ["with the delta", "full bundle"].iter().enumerate() {
        println!(
            "  ampoule update, {side}: {}, {} bytes downloaded, peak RSS {:.1} MiB",
            shown(&times[i]),
            bytes[i],
            rss[i] as f64 / 1024.0
        );
    }
    println!(
        "  ratio delta / full bundle: {:.2}",
        median(times[0].clone()).as_secs_f64() / median(times[1].clone()).as_secs_f64()
    );
    println!(
        "REPORT delivery-delta runs={} delta={} full={} delta_bytes={} full_bytes={} \
         delta_rss_mib={:.1} full_rss_mib={:.1}",
        runs(),
        triple(&times[0]),
        triple(&times[1]),
        bytes[0],
        bytes[1],
        rss[0] as f64 / 1024.0,
        rss[1] as f64 / 1024.0
    );
    for server in servers {
        server.shutdown()?;
    }
    Ok(())
}
