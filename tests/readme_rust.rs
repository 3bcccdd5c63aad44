//! Every Rust block in README.md builds in a fresh crate whose only dependency is
//! ampoule-verify, the way an app developer would paste it. The README's doctests (in
//! ampoule-verify's lib.rs) compile inside the crate, where its own dependencies are in scope,
//! so they passed while a block used `semver` directly and a new app did not build (issue 9:
//! the types the examples need are re-exported, and this test keeps it so).

use std::path::{Path, PathBuf};
use std::process::Command;

const ROOT: &str = env!("CARGO_MANIFEST_DIR");

/// One fenced Rust block of the README.
struct Block {
    /// The line of its opening fence, 1-based, for the failure message.
    line: usize,
    /// Its info string, like `rust,no_run`.
    info: String,
    code: String,
}

/// The README's ```rust blocks (any variant: `rust`, `rust,no_run`, ...), with rustdoc's
/// hidden-line markers (`# `) removed as rustdoc removes them before compiling.
fn rust_blocks(markdown: &str) -> Vec<Block> {
    let mut blocks = Vec::new();
    let mut open: Option<Block> = None;
    for (index, line) in markdown.lines().enumerate() {
        let fence = line.trim_start().strip_prefix("```");
        match (&mut open, fence) {
            (None, Some(info)) if info.split(',').next().map(str::trim) == Some("rust") => {
                open = Some(Block {
                    line: index + 1,
                    info: info.trim().to_string(),
                    code: String::new(),
                });
            }
            (None, Some(_)) => {
                // Another language's block: skip to its closing fence.
                open = Some(Block {
                    line: 0,
                    info: String::new(),
                    code: String::new(),
                });
            }
            (Some(_), Some(_)) => {
                if let Some(block) = open.take().filter(|b| b.line != 0) {
                    blocks.push(block);
                }
            }
            (Some(block), None) => {
                let shown = match line.trim_start() {
                    "#" => "",
                    trimmed => match trimmed.strip_prefix("# ") {
                        Some(hidden) => hidden,
                        None => line,
                    },
                };
                block.code.push_str(shown);
                block.code.push('\n');
            }
            (None, None) => {}
        }
    }
    assert!(open.is_none(), "README.md ends inside a fenced block");
    blocks
}

/// Builds `code` as the `src/lib.rs` of a new crate in `dir` that depends only on
/// ampoule-verify (by path, with `fetch` when the code uses that module), pinned to the
/// workspace's Cargo.lock. Returns the compiler's output when it does not build.
fn build_alone(code: &str, dir: &Path, target_dir: &Path) -> Result<(), String> {
    let features = if code.contains("ampoule_verify::fetch") {
        r#", features = ["fetch"]"#
    } else {
        ""
    };
    let manifest = format!(
        "[package]\nname = \"readme-block\"\nversion = \"0.0.0\"\nedition = \"2024\"\n\
         publish = false\n\n[dependencies]\nampoule-verify = {{ path = {:?}{features} }}\n\n\
         # Its own workspace, whatever directory it is in.\n[workspace]\n",
        Path::new(ROOT).join("crates/verify").display().to_string()
    );
    std::fs::create_dir_all(dir.join("src")).expect("crate directory");
    std::fs::write(dir.join("Cargo.toml"), manifest).expect("Cargo.toml");
    // Unused items are fine, as in a doctest: the block shows a function nobody calls.
    std::fs::write(dir.join("src/lib.rs"), format!("#![allow(unused)]\n{code}")).expect("lib.rs");
    // The same versions the workspace tests; cargo drops the entries this crate does not use
    // (so no --locked), and --offline keeps it from asking a registry.
    std::fs::copy(Path::new(ROOT).join("Cargo.lock"), dir.join("Cargo.lock")).expect("lock");
    let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".into());
    let out = Command::new(cargo)
        .args(["build", "--offline", "--quiet"])
        .env("CARGO_TARGET_DIR", target_dir)
        .current_dir(dir)
        .output()
        .expect("cargo runs");
    if out.status.success() {
        Ok(())
    } else {
        Err(String::from_utf8_lossy(&out.stderr).into_owned())
    }
}

/// `target/readme-crates` beside the test's own profile directory: shared by every run, so
/// ampoule-verify and its dependencies are built once.
fn target_dir() -> PathBuf {
    let exe = std::env::current_exe().expect("the test binary's path");
    exe.ancestors()
        .nth(3)
        .expect("test binaries live in target/<profile>/deps")
        .join("readme-crates")
}

#[test]
fn issue9_every_readme_rust_block_builds_with_only_ampoule_verify() {
    let started = std::time::Instant::now();
    let target = target_dir();
    let scratch = tempfile::tempdir().expect("tempdir");

    // The check can fail: the block the issue found, `semver` used without declaring it.
    let undeclared = "use semver::Version;\npub fn app() -> Version { Version::new(2, 3, 0) }\n";
    let refused = build_alone(undeclared, &scratch.path().join("undeclared"), &target)
        .expect_err("a block using an undeclared crate must not build");
    assert!(refused.contains("semver"), "{refused}");

    let readme = std::fs::read_to_string(Path::new(ROOT).join("README.md")).expect("README");
    let blocks = rust_blocks(&readme);
    assert!(!blocks.is_empty(), "README.md has no ```rust block");
    let mut built = 0;
    let mut failures = Vec::new();
    for block in &blocks {
        if block.info.contains("ignore") || block.info.contains("compile_fail") {
            println!(
                "README.md:{}: skipped, marked {} (not meant to build)",
                block.line, block.info
            );
            continue;
        }
        let dir = scratch.path().join(format!("line-{}", block.line));
        match build_alone(&block.code, &dir, &target) {
            Ok(()) => built += 1,
            Err(output) => failures.push(format!(
                "README.md:{}: the ```{} block does not build with only ampoule-verify \
                 (src/lib.rs line N is README.md line N + {}):\n{output}",
                block.line,
                block.info,
                block.line - 1
            )),
        }
    }
    println!(
        "built {built} of {} README Rust blocks in fresh crates in {:.1?}",
        blocks.len(),
        started.elapsed()
    );
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}
