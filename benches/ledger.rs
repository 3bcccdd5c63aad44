//! Measures the audit ledger at a million entries: append throughput, proof generation and
//! verification time for random entries, and the time and peak memory of a full check.
//!
//! Run with `cargo bench --bench ledger` (optionally `-- ENTRIES`); it prints its numbers and
//! is not part of the test suite. The figures are also printed on one `REPORT ledger
//! key=value ...` line at the end (proof times as `median/min/max` in microseconds), which
//! `benches/report` reads. The target (issue 4): generating and verifying an inclusion proof
//! of a random entry at 1M entries each take under 1 ms.

use std::time::{Duration, Instant};

use ampoule::release::ledger_storage::{Entry, Event, Ledger};
use ampoule_verify::{Digest, KeyId, PublicKey, TrustedKeys};
use ed25519_dalek::SigningKey;

const BATCH: u64 = 10_000;
const SAMPLES: usize = 1_000;

fn sample_entry(i: u64, key: KeyId) -> Entry {
    let animals = [
        "fox",
        "roe-deer",
        "wild-boar",
        "badger",
        "hare",
        "empty-frame",
    ];
    let mut entry = Entry {
        format: ampoule_verify::ledger::ENTRY_FORMAT,
        event: if i % 50 == 49 {
            Event::Withdraw
        } else {
            Event::Publish
        },
        channel: ["stable", "beta", "canary"][(i % 3) as usize].to_string(),
        bundle: format!("trailcam-{}", animals[(i % 6) as usize]),
        version: semver::Version::new(1 + i / 100_000, (i / 1000) % 100, i % 1000),
        bundle_digest: Digest::of(&i.to_be_bytes()),
        manifest_digest: Digest::of(&(!i).to_be_bytes()),
        key_ids: vec![key],
        time: 1_767_225_600 + i,
        feed_sequence: i + 1,
        offered: Some(None),
    };
    // The new entry format: a publish offers its own release; a withdraw here offers nothing.
    if entry.event == Event::Publish {
        entry.offered = Some(Some(ampoule_verify::ledger::Offered {
            bundle: entry.bundle.clone(),
            version: entry.version.clone(),
            bundle_digest: entry.bundle_digest,
            manifest_digest: entry.manifest_digest,
            rollout_percent: 100,
            deltas: Vec::new(),
        }));
    }
    entry
}

/// Peak resident memory of this process so far, in KiB (Linux `VmHWM`).
fn peak_kib() -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    line.split_whitespace().nth(1)?.parse().ok()
}

/// Resets the peak so the next reading covers only what follows (Linux 4.0 and later).
fn reset_peak() -> bool {
    std::fs::write("/proc/self/clear_refs", "5").is_ok()
}

struct Xorshift(u64);

impl Xorshift {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 << 13;
        self.0 ^= self.0 >> 7;
        self.0 ^= self.0 << 17;
        self.0
    }
}

fn micros(d: Duration) -> f64 {
    d.as_secs_f64() * 1e6
}

/// Prints the line for `name` and returns `median/min/max` in microseconds for the `REPORT`
/// line.
fn summary(name: &str, mut times: Vec<Duration>) -> String {
    times.sort_unstable();
    let mean = times.iter().sum::<Duration>() / times.len() as u32;
    let at = |q: f64| micros(times[((times.len() - 1) as f64 * q) as usize]);
    println!(
        "{name:<40} mean {:>8.1} us  median {:>8.1} us  min {:>8.1} us  p99 {:>8.1} us  max {:>8.1} us  ({} samples)",
        micros(mean),
        at(0.5),
        at(0.0),
        at(0.99),
        at(1.0),
        times.len()
    );
    format!("{:.1}/{:.1}/{:.1}", at(0.5), at(0.0), at(1.0))
}

/// Checks the whole ledger; returns the time in seconds and the peak RSS in KiB, if known.
fn check(ledger: &Ledger, trusted: &TrustedKeys) -> anyhow::Result<(f64, Option<u64>)> {
    let reset = reset_peak();
    let before = peak_kib();
    let started = Instant::now();
    let report = ledger.check(trusted)?;
    let elapsed = started.elapsed();
    let after = peak_kib();
    println!(
        "check of {:>9} entries: {:>7.2} s ({:.0} entries/s), {} heads checked, root {}",
        report.tree_size,
        elapsed.as_secs_f64(),
        report.tree_size as f64 / elapsed.as_secs_f64(),
        report.heads_checked,
        report.root_hash
    );
    match (reset, before, after) {
        (true, Some(b), Some(a)) => {
            println!("  peak RSS during check: {a} KiB (was {b} KiB when the peak was reset)")
        }
        (_, b, a) => {
            println!("  VmHWM before {b:?} KiB, after {a:?} KiB (peak reset not available)")
        }
    }
    Ok((elapsed.as_secs_f64(), after.filter(|_| reset)))
}

fn main() -> anyhow::Result<()> {
    let total: u64 = std::env::args()
        .skip(1)
        .find_map(|a| a.parse().ok())
        .unwrap_or(1_000_000);
    let key = SigningKey::from_bytes(&[7; 32]);
    let public = PublicKey::from_verifying_key(&key.verifying_key())?;
    let trusted: TrustedKeys = [public.clone()].into_iter().collect();
    let dir = tempfile::tempdir()?;
    let mut ledger = Ledger::create(dir.path())?;
    println!(
        "ledger benchmark: {total} entries in {}",
        dir.path().display()
    );

    // Appends in batches, one signed tree head (and one round of fsyncs) per batch.
    let started = Instant::now();
    let mut checked_small = false;
    let mut excluded = Duration::ZERO;
    let mut next = 0;
    while next < total {
        let end = (next + BATCH).min(total);
        let entries: Vec<Vec<u8>> = (next..end)
            .map(|i| sample_entry(i, public.id()).to_bytes())
            .collect();
        ledger.append_batch(&entries, &[&key], 1_767_225_600 + next)?;
        next = end;
        if next == total / 10 && !checked_small {
            // A check at a tenth of the size, to compare its peak memory with the full one;
            // its time is left out of the append time.
            let paused = Instant::now();
            check(&ledger, &trusted)?;
            checked_small = true;
            excluded += paused.elapsed();
        }
    }
    let append_time = started.elapsed() - excluded;
    println!(
        "append {total} entries in batches of {BATCH}: {:.2} s ({:.0} entries/s)",
        append_time.as_secs_f64(),
        total as f64 / append_time.as_secs_f64(),
    );
    let disk: u64 = walk(dir.path())?.iter().sum();
    println!("  ledger files: {:.1} MiB", disk as f64 / (1024.0 * 1024.0));

    // Single appends: each syncs its data, signs and renames a head on its own.
    let mut singles = Vec::new();
    for i in 0..20 {
        let entry = sample_entry(total + i, public.id()).to_bytes();
        let t = Instant::now();
        ledger.append(&entry, &[&key], 1_767_225_600 + total + i)?;
        singles.push(t.elapsed());
    }
    let single = summary("single append (sync + sign + rename)", singles);

    let head = *ledger
        .tree_head()
        .expect("appended")
        .verify(&trusted, 1)?
        .head();
    let size = head.tree_size;
    let mut rng = Xorshift(0x9e37_79b9_7f4a_7c15);
    let (mut generate, mut verify, mut both) = (Vec::new(), Vec::new(), Vec::new());
    for _ in 0..SAMPLES {
        let index = rng.next() % size;
        let t = Instant::now();
        let proof = ledger.inclusion_proof(index, size)?;
        let leaf = ledger.leaf_hash(index)?;
        let generated = t.elapsed();
        let t = Instant::now();
        proof.verify(&leaf, &head)?;
        let verified = t.elapsed();
        generate.push(generated);
        verify.push(verified);
        both.push(generated + verified);
    }
    let inclusion = [
        summary(&format!("inclusion proof generate at {size}"), generate),
        summary("inclusion proof verify", verify),
        summary("inclusion proof generate + verify", both),
    ];

    let (mut generate, mut verify) = (Vec::new(), Vec::new());
    for _ in 0..SAMPLES {
        let old_size = 1 + rng.next() % size;
        let t = Instant::now();
        let old_root = ledger.root_at(old_size)?;
        let proof = ledger.consistency_proof(old_size, size)?;
        generate.push(t.elapsed());
        let old = ampoule_verify::merkle::TreeHead {
            tree_size: old_size,
            root_hash: old_root,
            time: 0,
        };
        let t = Instant::now();
        proof.verify(&old, &head)?;
        verify.push(t.elapsed());
    }
    let consistency = [
        summary(
            &format!("consistency proof (+old root) at {size}"),
            generate,
        ),
        summary("consistency proof verify", verify),
    ];

    let (check_secs, check_kib) = check(&ledger, &trusted)?;
    println!(
        "REPORT ledger entries={total} tree_size={size} append_s={:.2} single_append_us={single} \
         inclusion_generate_us={} inclusion_verify_us={} inclusion_both_us={} \
         consistency_generate_us={} consistency_verify_us={} check_s={check_secs:.2} \
         check_rss_mib={:.1} target_proof_us=1000",
        append_time.as_secs_f64(),
        inclusion[0],
        inclusion[1],
        inclusion[2],
        consistency[0],
        consistency[1],
        check_kib.map_or(0.0, |k| k as f64 / 1024.0)
    );
    Ok(())
}

fn walk(dir: &std::path::Path) -> std::io::Result<Vec<u64>> {
    let mut sizes = Vec::new();
    for entry in std::fs::read_dir(dir)? {
        let entry = entry?;
        let meta = entry.metadata()?;
        if meta.is_dir() {
            sizes.extend(walk(&entry.path())?);
        } else {
            sizes.push(meta.len());
        }
    }
    Ok(sizes)
}
