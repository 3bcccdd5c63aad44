//! The hostile-case index (`tests/HOSTILE.md`, issue 10 item 11) stays true: every test it names
//! exists, and every test in the hostile files (issue 14 added the policy document's and the
//! C interface's, issue 15 the fault-injecting proxy's) and every `issue10_` and `issue13_` test
//! is named in it. A test added to those files without a row, or a row naming a test that was
//! renamed or removed, fails here.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

/// The files whose every test is a hostile case.
const HOSTILE_FILES: &[&str] = &[
    "tests/hostile.rs",
    "tests/feed_binding.rs",
    // Issue 14: the policy document and the C interface, each case a named test.
    "tests/policy_document.rs",
    "tests/c_api.rs",
    // Issue 15: the fault-injecting proxy's faults, and the fleet that meets them at random.
    "tests/fleet.rs",
];

/// Where `issue10_` and `issue13_` tests live.
const SOURCE_DIRS: &[&str] = &["tests", "crates/verify/tests", "crates/verify/src", "src"];

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// `file::name` for every backticked reference in the index.
fn named(index: &str) -> BTreeSet<(String, String)> {
    index
        .split('`')
        .skip(1)
        .step_by(2)
        .filter_map(|token| {
            let (file, name) = token.rsplit_once("::")?;
            (file.ends_with(".rs") && !name.is_empty())
                .then(|| (file.to_string(), name.to_string()))
        })
        .collect()
}

/// The test functions of a source file: `fn name(` right after a `#[test]` line.
fn tests_in(path: &Path) -> Vec<String> {
    let text = std::fs::read_to_string(path).unwrap_or_default();
    let lines: Vec<&str> = text.lines().collect();
    lines
        .windows(2)
        .filter(|w| w[0].trim() == "#[test]")
        .filter_map(|w| {
            let rest = w[1].trim().strip_prefix("fn ")?;
            Some(rest.split('(').next()?.to_string())
        })
        .collect()
}

fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    for entry in entries.flatten() {
        let path = entry.path();
        if path.is_dir() {
            rust_files(&path, out);
        } else if path.extension().is_some_and(|e| e == "rs") {
            out.push(path);
        }
    }
}

#[test]
fn issue10_the_hostile_case_index_names_only_real_tests_and_every_hostile_test() {
    let root = root();
    let index = std::fs::read_to_string(root.join("tests/HOSTILE.md")).expect("tests/HOSTILE.md");
    let named = named(&index);
    assert!(
        named.len() > 40,
        "the index names only {} tests",
        named.len()
    );

    let missing: Vec<String> = named
        .iter()
        .filter(|(file, name)| !tests_in(&root.join(file)).contains(name))
        .map(|(file, name)| format!("{file}::{name}"))
        .collect();
    assert!(
        missing.is_empty(),
        "tests/HOSTILE.md names tests that do not exist: {missing:?}"
    );

    let mut required = BTreeSet::new();
    for file in HOSTILE_FILES {
        for name in tests_in(&root.join(file)) {
            required.insert((file.to_string(), name));
        }
    }
    for dir in SOURCE_DIRS {
        let mut files = Vec::new();
        rust_files(&root.join(dir), &mut files);
        for path in files {
            let file = path
                .strip_prefix(&root)
                .expect("under the root")
                .to_string_lossy()
                .replace('\\', "/");
            for name in tests_in(&path) {
                if (name.starts_with("issue10_") || name.starts_with("issue13_"))
                    && file != "tests/hostile_index.rs"
                {
                    required.insert((file.clone(), name));
                }
            }
        }
    }
    let unlisted: Vec<String> = required
        .difference(&named)
        .map(|(file, name)| format!("{file}::{name}"))
        .collect();
    assert!(
        unlisted.is_empty(),
        "hostile tests missing from tests/HOSTILE.md: {unlisted:?}"
    );
}

#[test]
fn the_index_check_can_fail() {
    // A reference to a test that does not exist, and a parse of a fabricated row.
    let fake = "| x | y | `tests/hostile.rs::no_such_test` | z |";
    let named = named(fake);
    assert_eq!(
        named.iter().next(),
        Some(&("tests/hostile.rs".to_string(), "no_such_test".to_string()))
    );
    assert!(!tests_in(&root().join("tests/hostile.rs")).contains(&"no_such_test".to_string()));
    assert!(tests_in(&root().join("tests/hostile.rs")).contains(&"unsigned_bundle".to_string()));
}
