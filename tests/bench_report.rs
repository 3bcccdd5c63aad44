//! `benches/report` (issue 15 item 4) reads the benches' `REPORT` lines and judges each target;
//! these tests run it with `--from-logs` on logs kept in `tests/bench_report/`, so no bench
//! runs here. The logs are real: the full report of 2026-12-02 10:42 UTC, each bench's log
//! trimmed to its title and its `REPORT` lines (`size.json` is `benches/size/measure --json`'s
//! output of that run; `fleet.log` is the 50-device run's tables, from before the fleet bench
//! printed `REPORT` lines), and `fleet-report-lines.log`, a small run of the fleet bench that
//! prints them. A test below checks that every key those lines use is still written by its
//! bench, so a bench and the script cannot drift apart unnoticed.
//!
//! The targets are the issues' own (issue 13: verify and pack at most 0.7x the shell pipeline,
//! the fresh update at most 0.8x of curl and the plain pipeline, verify's peak memory at most
//! 16 MiB; issue 14: at most 400 KiB added by the verifier).

use std::path::{Path, PathBuf};
use std::process::Command;

fn repo() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn logs() -> PathBuf {
    repo().join("tests/bench_report")
}

/// Runs `benches/report` with `args`; returns its stdout, requiring the exit code `code`.
fn report(args: &[&str], code: i32) -> String {
    let out = Command::new("python3")
        .arg(repo().join("benches/report"))
        .args(args)
        .output()
        .expect("python3 runs benches/report");
    assert_eq!(
        out.status.code(),
        Some(code),
        "benches/report {args:?}:\n{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).expect("UTF-8")
}

/// The table's row whose first cell starts with `what`, as its cells.
fn row(table: &str, what: &str) -> Vec<String> {
    table
        .lines()
        .find(|l| l.starts_with(&format!("| {what}")))
        .unwrap_or_else(|| panic!("no row '{what}' in:\n{table}"))
        .trim_matches('|')
        .split(" | ")
        .map(|c| c.trim().to_string())
        .collect()
}

fn copy_logs(to: &Path) {
    for entry in std::fs::read_dir(logs()).expect("the logs") {
        let entry = entry.expect("an entry");
        std::fs::copy(entry.path(), to.join(entry.file_name())).expect("a copy");
    }
}

#[test]
fn the_report_judges_each_target_from_the_benches_lines() {
    let dir = logs();
    let table = report(
        &[
            "--from-logs",
            dir.to_str().expect("UTF-8"),
            "--no-write",
            "--only",
            "pipeline,pipeline10,delivery,delta,ledger,size,fleet",
        ],
        0,
    );
    // The ratios are of medians, worked here by hand from the logs' REPORT lines: verify
    // 0.2429 / 0.3135 s, pack 0.2851 / 0.4136 s, pack at 10x 3.2984 / 4.4718 s, the fresh
    // update 0.5424 / 0.8204 s.
    let verify = row(&table, "verify + extract, 1x");
    assert!(verify[3].starts_with("0.77x"), "{verify:?}");
    assert_eq!(
        (verify[4].as_str(), verify[5].as_str()),
        ("<= 0.70x", "**no**")
    );
    let pack = row(&table, "pack, 1x");
    assert!(pack[3].starts_with("0.69x"), "{pack:?}");
    assert_eq!(pack[5], "yes");
    let pack10 = row(&table, "pack, 10x");
    assert!(pack10[3].starts_with("0.74x"), "{pack10:?}");
    assert_eq!(pack10[5], "**no**");
    let rss = row(&table, "verify peak RSS, 1x");
    assert_eq!(rss[5], "yes");
    let fresh = row(&table, "fresh update over loopback");
    assert!(fresh[3].starts_with("0.66x"), "{fresh:?}");
    assert_eq!((fresh[4].as_str(), fresh[5].as_str()), ("<= 0.80x", "yes"));
    let delta = row(&table, "delta size, retrained last layer, 1x");
    assert_eq!(delta[5], "yes", "{delta:?}");
    let size = row(&table, "verifier size");
    assert_eq!(size[5], "**no**", "{size:?}");
    // The fleet's rows from its tables (the log has no REPORT fleet lines).
    let fleet = row(
        &table,
        "fleet of 50 devices, the built-in server: round 1: publish 1.1.0",
    );
    assert!(fleet[0].contains("delta 54272 bytes"), "{fleet:?}");
    assert_eq!(fleet[1], "update p50 1.63 s, p95 3.15 s, max 3.33 s");
    row(
        &table,
        "fleet of 50 devices, the built-in server: round 3: withdraw 1.3.0",
    );
    assert!(table.contains("Rebuilt from the logs in"), "{table}");
}

#[test]
fn the_fleet_s_report_lines_make_its_rows() {
    let tmp = tempfile::tempdir().expect("a temporary directory");
    copy_logs(tmp.path());
    std::fs::copy(
        tmp.path().join("fleet-report-lines.log"),
        tmp.path().join("fleet.log"),
    )
    .expect("copy");
    let table = report(
        &[
            "--from-logs",
            tmp.path().to_str().expect("UTF-8"),
            "--no-write",
            "--only",
            "fleet",
        ],
        0,
    );
    let lines = std::fs::read_to_string(logs().join("fleet-report-lines.log")).expect("log");
    let reports = lines
        .lines()
        .filter(|l| l.starts_with("REPORT fleet "))
        .count();
    let rows = table
        .lines()
        .filter(|l| l.starts_with("| fleet of "))
        .count();
    assert_eq!(rows, reports, "{table}");
    let update = table
        .lines()
        .find(|l| l.contains(": round 1: publish 1.1.0 (bundle "))
        .unwrap_or_else(|| panic!("no round 1 row in:\n{table}"));
    assert!(update.contains("installed from a delta"), "{update}");
    assert!(update.contains("update p50 "), "{update}");
}

#[test]
fn a_faster_verify_is_judged_met() {
    let tmp = tempfile::tempdir().expect("a temporary directory");
    copy_logs(tmp.path());
    let log = tmp.path().join("pipeline.log");
    let text = std::fs::read_to_string(&log).expect("pipeline.log");
    // verify's median lowered from 0.2429 s to 0.2100 s: 0.67x of the pipeline's 0.3135 s.
    let faster = text.replace("verify=0.2429/", "verify=0.2100/");
    assert_ne!(faster, text, "the log holds the median this test changes");
    std::fs::write(&log, faster).expect("pipeline.log");
    let table = report(
        &[
            "--from-logs",
            tmp.path().to_str().expect("UTF-8"),
            "--no-write",
            "--only",
            "pipeline",
        ],
        0,
    );
    let verify = row(&table, "verify + extract, 1x");
    assert!(verify[3].starts_with("0.67x"), "{verify:?}");
    assert_eq!(verify[5], "yes");
    assert!(table.contains("delivery: not chosen"), "{table}");
}

#[test]
fn a_missing_log_fails_the_report_and_names_the_bench() {
    let tmp = tempfile::tempdir().expect("a temporary directory");
    copy_logs(tmp.path());
    std::fs::remove_file(tmp.path().join("delivery.log")).expect("remove");
    let table = report(
        &[
            "--from-logs",
            tmp.path().to_str().expect("UTF-8"),
            "--no-write",
            "--only",
            "pipeline,delivery",
        ],
        1,
    );
    assert!(table.contains("delivery: FAILED"), "{table}");
    row(&table, "verify + extract, 1x");
}

#[test]
fn the_table_replaces_only_what_lies_between_its_markers() {
    let tmp = tempfile::tempdir().expect("a temporary directory");
    let file = tmp.path().join("BENCHMARKS.md");
    let start = "<!-- benches/report: start (written by benches/report; edit the script, not this table) -->";
    let end = "<!-- benches/report: end -->";
    std::fs::write(
        &file,
        format!("# Benchmarks\n\nbefore\n\n{start}\nold table\n{end}\n\nafter\n"),
    )
    .expect("write");
    let dir = logs();
    report(
        &[
            "--from-logs",
            dir.to_str().expect("UTF-8"),
            "--only",
            "pipeline",
            "--file",
            file.to_str().expect("UTF-8"),
        ],
        0,
    );
    let text = std::fs::read_to_string(&file).expect("read");
    assert!(
        text.starts_with("# Benchmarks\n\nbefore\n\n")
            && text.ends_with(&format!("{end}\n\nafter\n")),
        "{text}"
    );
    assert!(!text.contains("old table"), "{text}");
    assert_eq!(text.matches(start).count(), 1, "{text}");
    row(&text, "verify + extract, 1x");
}

#[test]
fn a_usage_error_exits_2() {
    report(&["--only", "pipeline,nonsense", "--no-write"], 2);
    report(&["--from-logs", "/nonexistent/logs", "--no-write"], 2);
}

/// Every key the kept logs' `REPORT` lines use is still printed by the bench that wrote it:
/// a bench that renames or drops a figure fails here, not silently in the next report.
#[test]
fn the_kept_report_lines_match_what_the_benches_print() {
    let sources = [
        ("pipeline", "benches/pipeline.rs"),
        ("delivery", "benches/delivery.rs"),
        ("delivery-delta", "benches/delivery.rs"),
        ("delta", "benches/delta.rs"),
        ("ledger", "benches/ledger.rs"),
        ("fleet", "benches/fleet.rs"),
    ];
    let mut seen = 0;
    for entry in std::fs::read_dir(logs()).expect("the logs") {
        let text = std::fs::read_to_string(entry.expect("an entry").path()).expect("a log");
        for line in text.lines().filter(|l| l.starts_with("REPORT ")) {
            let mut words = line.split_whitespace().skip(1);
            let bench = words.next().expect("a bench name");
            let (_, file) = sources
                .iter()
                .find(|(name, _)| *name == bench)
                .unwrap_or_else(|| panic!("a REPORT line of an unknown bench: {line}"));
            let source = std::fs::read_to_string(repo().join(file)).expect("the bench");
            for key in words.filter_map(|w| w.split_once('=').map(|(k, _)| k)) {
                assert!(
                    source.contains(&format!("{key}=")),
                    "{file} no longer prints '{key}=' (kept line: {line})"
                );
                seen += 1;
            }
        }
    }
    assert!(
        seen > 50,
        "the kept logs hold too few REPORT figures ({seen})"
    );
}
