//! The release side's layers, from the bottom: the error contract (`failure.rs`), the domain (`src/release/`: the release tree
//! and its records, the ledger's files and audit, key files, packing), the front's own types
//! (`cli.rs`, `output.rs`), then the commands (`src/cmd/`). No domain module imports a command
//! or the front, and no two modules import each other. The same check as the verifier's
//! (`crates/verify/tests/layering`), on this crate's sources.

#[path = "../crates/verify/tests/layering/mod.rs"]
mod layering;

use std::path::Path;

use layering::Layer;

const LAYERS: &[Layer] = &[
    ("errors", &["failure.rs"]),
    ("domain", &["release/"]),
    ("front", &["cli.rs", "output.rs"]),
    ("commands", &["cmd/"]),
];

/// lib.rs declares the modules and main.rs dispatches to the commands.
const EXEMPT: &[&str] = &["lib.rs", "main.rs"];

#[test]
fn issue9_release_side_modules_use_only_their_layer_and_the_ones_below() {
    let found = layering::check(
        &Path::new(env!("CARGO_MANIFEST_DIR")).join("src"),
        LAYERS,
        EXEMPT,
    );
    assert!(
        found.problems.is_empty(),
        "the release side's layers are broken:\n{}",
        found.problems.join("\n")
    );
    // The test must see what it checks: the publish command does use the release tree.
    assert!(
        found
            .uses
            .get("cmd::publish")
            .is_some_and(|t| t.contains("release::tree")),
        "the test found no use of release::tree by cmd::publish: it is not reading the sources"
    );
}
