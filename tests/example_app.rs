//! The example app an app developer starts from (`crates/verify/examples/trail_camera.rs`) is
//! run here as a program, against a release tree the real `ampoule` binary published and
//! `ampoule serve` serves: if the library's API or the tree's layout moves, the example
//! breaks in this test rather than in someone's first hour with the crate.

mod tree_common;

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::time::SystemTime;

use tree_common::*;

/// The workspace root; the example's sources are under it.
const ROOT: &str = env!("CARGO_MANIFEST_DIR");

/// The example binary, in the `examples/` directory beside this test's `deps/`.
///
/// `cargo test --workspace` (what CI and DEVELOPERS.md run) builds every example whose
/// required features are on before any test runs, and `fetch` is on because the `ampoule`
/// package depends on ampoule-verify with it. A narrower run (`cargo test --test
/// example_app`) builds only this package's targets, so the binary may be missing or older
/// than its sources; then it is built here with cargo, in the same target directory and
/// profile, rather than testing a stale program.
fn example_binary() -> PathBuf {
    let exe = std::env::current_exe().expect("the test binary's path");
    let profile_dir = exe
        .parent()
        .and_then(Path::parent)
        .expect("test binaries live in target/<profile>/deps");
    let binary = profile_dir
        .join("examples")
        .join(format!("trail_camera{}", std::env::consts::EXE_SUFFIX));
    if modified(&binary).is_some_and(|built| built >= newest_source()) {
        return binary;
    }
    let profile = profile_dir
        .file_name()
        .and_then(|n| n.to_str())
        .expect("a profile directory name");
    let target_dir = profile_dir.parent().expect("the target directory");
    let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".into());
    let mut build = Command::new(cargo);
    build
        .args(["build", "--offline", "--locked", "-p", "ampoule-verify"])
        .args(["--features", "fetch", "--example", "trail_camera"])
        .env("CARGO_TARGET_DIR", target_dir)
        .current_dir(ROOT);
    match profile {
        "debug" => {}
        "release" => {
            build.arg("--release");
        }
        other => {
            build.args(["--profile", other]);
        }
    }
    let out = build.output().expect("cargo runs");
    assert!(
        out.status.success(),
        "building the example failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    binary
}

fn modified(path: &Path) -> Option<SystemTime> {
    std::fs::metadata(path).and_then(|m| m.modified()).ok()
}

/// The newest modification time among the files the example is built from.
fn newest_source() -> SystemTime {
    fn walk(dir: &Path, newest: &mut SystemTime) {
        for entry in std::fs::read_dir(dir).into_iter().flatten().flatten() {
            let path = entry.path();
            if path.is_dir() {
                walk(&path, newest);
            } else if let Some(t) = modified(&path) {
                *newest = (*newest).max(t);
            }
        }
    }
    let verify = Path::new(ROOT).join("crates/verify");
    let mut newest = SystemTime::UNIX_EPOCH;
    walk(&verify.join("src"), &mut newest);
    walk(&verify.join("examples"), &mut newest);
    for file in [
        verify.join("Cargo.toml"),
        Path::new(ROOT).join("Cargo.lock"),
    ] {
        newest = newest.max(modified(&file).unwrap_or(SystemTime::UNIX_EPOCH));
    }
    newest
}

/// A trust set of one key (`k`, from `setup`) with every role, signed by it.
fn trust_set(d: &Path, public: &str, secret: &str, out: &str) {
    ok(
        d,
        &[
            "trust",
            "init",
            "--key",
            public,
            "--expires-in",
            "365d",
            "-o",
            out,
        ],
    );
    ok(d, &["trust", "sign", out, "--key", secret]);
}

fn camera(binary: &Path, d: &Path, addr: &str, store: &str, trust: &str) -> Output {
    Command::new(binary)
        .args(["--store", store])
        .args(["--feed", &format!("http://{addr}/feeds/stable.json")])
        .args(["--trust-set", trust, "--app-version", "2.3.0"])
        .args(["--device-id", "camera-0007"])
        .current_dir(d)
        .output()
        .expect("the example runs")
}

fn summary(out: &Output) -> (Option<i32>, String, String) {
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn issue9_example_app_installs_then_is_up_to_date_and_refuses_a_foreign_tree() {
    let binary = example_binary();
    let dir = setup();
    let d = dir.path();
    trust_set(d, "k.pub", "k.pem", "trust-1.json");
    // The tree starts on the set the cameras ship with, as tests/rotation.rs sets one up.
    ok(
        d,
        &[
            "publish",
            "--trust-set",
            "trust-1.json",
            "--tree",
            "tree",
            "--key",
            "k.pem",
        ],
    );
    let bundle = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &bundle, "stable", "100");
    let server = serve_tree(d, "tree");

    let first = camera(&binary, d, &server.addr, "cam", "trust-1.json");
    assert_eq!(
        summary(&first),
        (Some(0), "installed 1.0.0\n".into(), String::new())
    );
    let second = camera(&binary, d, &server.addr, "cam", "trust-1.json");
    assert_eq!(
        summary(&second),
        (Some(0), "up_to_date\n".into(), String::new())
    );

    // A camera shipped with another team's trust set refuses this tree's feed: exit code 1.
    ok(d, &["keygen", "--secret", "x.pem", "--public", "x.pub"]);
    trust_set(d, "x.pub", "x.pem", "other-team.json");
    let foreign = camera(&binary, d, &server.addr, "cam-2", "other-team.json");
    let (code, stdout, stderr) = summary(&foreign);
    assert_eq!((code, stdout.as_str()), (Some(1), ""), "{stderr}");
    assert!(stderr.starts_with("refused: "), "{stderr}");
    let releases = std::fs::read_dir(d.join("cam-2/releases")).map_or(0, |dir| dir.count());
    assert_eq!(releases, 0, "nothing is installed from a refused feed");
}
