//! Unsafe code stays where issue 14 put it: this crate is the only workspace member that may
//! use it, only in `src/ffi.rs` and `src/raw.rs`, and every unsafe block there follows a
//! `// SAFETY:` line (clippy's `undocumented_unsafe_blocks`, denied in Cargo.toml, says the
//! same on every CI run). Every other member takes the workspace's `unsafe_code = "forbid"`.

use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../..")
        .canonicalize()
        .expect("the workspace root")
}

fn read(path: &Path) -> String {
    std::fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

#[test]
fn issue14_only_the_c_interface_may_use_unsafe_code() {
    let root = root();
    let workspace = read(&root.join("Cargo.toml"));
    assert!(workspace.contains("[workspace.lints.rust]\nunsafe_code = \"forbid\""));
    let members: Vec<&str> = workspace
        .split("members = [")
        .nth(1)
        .and_then(|rest| rest.split(']').next())
        .expect("the workspace's members")
        .lines()
        .filter_map(|l| l.trim().strip_prefix('"')?.split('"').next())
        .collect();
    assert!(members.contains(&"crates/verify-ffi"), "{members:?}");
    for member in members.iter().filter(|m| **m != "crates/verify-ffi") {
        let manifest = read(&root.join(member).join("Cargo.toml"));
        assert!(
            manifest.contains("[lints]\nworkspace = true"),
            "{member} does not take the workspace's lints (unsafe_code = \"forbid\")"
        );
    }
    assert!(read(&root.join("crates/verify/src/lib.rs")).contains("#![forbid(unsafe_code)]"));
    let ffi = read(&root.join("crates/verify-ffi/Cargo.toml"));
    assert!(ffi.contains("unsafe_code = \"deny\""));
    assert!(ffi.contains("undocumented_unsafe_blocks = \"deny\""));
}

#[test]
fn issue14_every_unsafe_block_says_why_it_is_sound() {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut blocks = 0;
    for entry in std::fs::read_dir(&src).expect("src") {
        let path = entry.expect("an entry").path();
        let text = read(&path);
        let name = path
            .file_name()
            .expect("a name")
            .to_string_lossy()
            .into_owned();
        let allowed = name == "ffi.rs" || name == "raw.rs";
        assert_eq!(
            text.contains("#![allow(unsafe_code)]"),
            allowed,
            "{name}: unsafe code is allowed in ffi.rs and raw.rs only"
        );
        let lines: Vec<&str> = text.lines().collect();
        for (i, line) in lines.iter().enumerate() {
            if !line.contains("unsafe {") {
                continue;
            }
            blocks += 1;
            // The SAFETY comment is above the statement the block belongs to.
            let mut above = false;
            for l in lines[..i].iter().rev().map(|l| l.trim()) {
                if l.starts_with("// SAFETY:") {
                    above = true;
                    break;
                }
                let ends_statement = l.is_empty() || l.ends_with([';', '{', '}']);
                if !l.starts_with("//") && ends_statement {
                    break;
                }
            }
            assert!(
                above,
                "{name}:{}: an unsafe block without // SAFETY:",
                i + 1
            );
        }
    }
    assert!(blocks >= 10, "only {blocks} unsafe blocks found");
}
