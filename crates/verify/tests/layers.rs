//! The verifier's folders are its layers, from the bottom: the format and its documents
//! (`format/`), the checks (`check/`), payload decoding (`payload/`), the on-device store
//! (`store/`), the network (`net/`) and the device's update on top (`update/`). A module may use
//! its own layer and the ones below, never one above, and no two modules may use each other.
//! This test reads the sources and fails on either, naming the files; like `dependencies.rs`,
//! it turns a promise about the code's shape into something that can fail.

mod layering;

use std::path::Path;

use layering::Layer;

/// The layers in order, bottom first. Files directly in `src/` are listed by name.
const LAYERS: &[Layer] = &[
    (
        "base",
        &["error.rs", "readahead.rs", "progress.rs", "dir.rs"],
    ),
    ("format", &["format/"]),
    ("check", &["check/"]),
    ("payload", &["payload/"]),
    ("store", &["store/"]),
    ("net", &["net/"]),
    ("update", &["update/", "dangerous.rs", "fuzzing.rs"]),
];

/// lib.rs declares modules and the public API; it may name anything.
const EXEMPT: &[&str] = &["lib.rs"];

#[test]
fn issue9_modules_use_only_their_layer_and_the_ones_below_and_never_each_other() {
    let found = layering::check(
        &Path::new(env!("CARGO_MANIFEST_DIR")).join("src"),
        LAYERS,
        EXEMPT,
    );
    assert!(
        found.problems.is_empty(),
        "the verifier's layers are broken:\n{}",
        found.problems.join("\n")
    );
    // The test must be able to see a violation: the store does use the checks below it.
    assert!(
        found
            .uses
            .get("store")
            .is_some_and(|t| t.iter().any(|m| m.starts_with("check"))),
        "the test found no use of check/ by store/: it is not reading the sources"
    );
}
