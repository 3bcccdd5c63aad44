//! The verifier's promise to apps: without the `fetch` feature it pulls in no async runtime and
//! no HTTP stack. Checked on the real dependency graph with `cargo tree`, and checked to be
//! able to fail: with the feature the same crates must show up.

use std::process::Command;

fn normal_dependencies(features: &[&str]) -> String {
    let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".into());
    let manifest = concat!(env!("CARGO_MANIFEST_DIR"), "/Cargo.toml");
    let mut command = Command::new(cargo);
    command.args([
        "tree",
        "--offline",
        "--locked",
        "--manifest-path",
        manifest,
        "-p",
        "ampoule-verify",
        "-e",
        "normal",
        "--prefix",
        "none",
    ]);
    for feature in features {
        command.args(["--features", feature]);
    }
    let out = command.output().expect("cargo tree runs");
    assert!(
        out.status.success(),
        "cargo tree failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

fn has_crate(tree: &str, name: &str) -> bool {
    tree.lines()
        .any(|line| line.split_whitespace().next() == Some(name))
}

const ASYNC_STACK: [&str; 5] = ["tokio", "hyper", "hyper-util", "rustls", "mio"];

#[test]
fn without_fetch_no_async_runtime_is_pulled_in() {
    let tree = normal_dependencies(&[]);
    for name in ASYNC_STACK {
        assert!(
            !has_crate(&tree, name),
            "{name} is a dependency without `fetch`:\n{tree}"
        );
    }
    let with_fetch = normal_dependencies(&["fetch"]);
    for name in ASYNC_STACK {
        assert!(
            has_crate(&with_fetch, name),
            "{name} missing with `fetch`:\n{with_fetch}"
        );
    }
}
