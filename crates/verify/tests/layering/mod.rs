//! The layer check both crates run on their own sources (`crates/verify/tests/layers.rs`,
//! `tests/layers.rs`): a module may use its own layer and the ones below, never one above,
//! and no two modules may use each other. Paths are read from the code (`crate::...`, with
//! brace groups expanded); comments are left out.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

/// A layer's name and its members: folders end in `/`, files are named as they are.
pub type Layer = (&'static str, &'static [&'static str]);

/// What the check found: the problems, and which module uses which (for the test's own
/// sanity checks).
pub struct Found {
    pub problems: Vec<String>,
    pub uses: BTreeMap<String, BTreeSet<String>>,
}

/// Checks every `.rs` file under `src` against `layers` (bottom first); files in `exempt`
/// (the crate root, which declares everything) are skipped.
pub fn check(src: &Path, layers: &[Layer], exempt: &[&str]) -> Found {
    let mut files = Vec::new();
    rust_files(src, &mut files);
    let relative = |p: &Path| {
        p.strip_prefix(src)
            .expect("under src")
            .to_string_lossy()
            .replace('\\', "/")
    };
    let modules: BTreeSet<String> = files.iter().map(|f| module_of(&relative(f))).collect();
    let mut uses: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    let mut problems = Vec::new();
    for file in &files {
        let rel = relative(file);
        if exempt.contains(&rel.as_str()) {
            continue;
        }
        let Some(layer) = layer_of(layers, &rel) else {
            problems.push(format!(
                "{rel} is in no layer; put it in one of the layer folders"
            ));
            continue;
        };
        let module = module_of(&rel);
        let text = std::fs::read_to_string(file).expect("read source");
        for target in references(&text, &modules) {
            if target == module {
                continue;
            }
            let target_file = files
                .iter()
                .map(|f| relative(f))
                .find(|r| module_of(r) == target)
                .expect("a referenced module is a file");
            if let Some(target_layer) = layer_of(layers, &target_file)
                && target_layer > layer
            {
                problems.push(format!(
                    "{rel} ({}) uses {target_file} ({}), a layer above it",
                    layers[layer].0, layers[target_layer].0
                ));
            }
            uses.entry(module.clone()).or_default().insert(target);
        }
    }
    for (a, targets) in &uses {
        for b in targets {
            if a < b && uses.get(b).is_some_and(|back| back.contains(a)) {
                problems.push(format!("{a} and {b} use each other"));
            }
        }
    }
    Found { problems, uses }
}

pub fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
    for entry in std::fs::read_dir(dir).expect("read src") {
        let path = entry.expect("entry").path();
        if path.is_dir() {
            rust_files(&path, out);
        } else if path.extension().is_some_and(|e| e == "rs") {
            out.push(path);
        }
    }
}

/// The module path of a source file: `format/feed.rs` is `format::feed`, `store/mod.rs` is
/// `store`.
fn module_of(relative: &str) -> String {
    let path = relative.trim_end_matches(".rs");
    let path = path.strip_suffix("/mod").unwrap_or(path);
    path.replace('/', "::")
}

fn layer_of(layers: &[Layer], relative: &str) -> Option<usize> {
    layers.iter().position(|(_, members)| {
        members.iter().any(|m| {
            if m.ends_with('/') {
                relative.starts_with(m)
            } else {
                relative == *m
            }
        })
    })
}

/// Every `crate::a::b::...` path in code (comments and doc comments left out), brace groups
/// (`crate::{a::X, b::{c, d}}`) expanded, each resolved to the longest module path that is a
/// file of the crate.
fn references(text: &str, modules: &BTreeSet<String>) -> BTreeSet<String> {
    let code: String = text
        .lines()
        .map(|line| match line.find("//") {
            Some(i) => &line[..i],
            None => line,
        })
        .collect::<Vec<_>>()
        .join("\n");
    let mut paths = Vec::new();
    let mut rest = code.as_str();
    while let Some(i) = rest.find("crate::") {
        rest = &rest[i + "crate::".len()..];
        expand("", rest, &mut paths);
    }
    let mut found = BTreeSet::new();
    for path in paths {
        let segments: Vec<&str> = path.split("::").filter(|s| !s.is_empty()).collect();
        let longest = (1..=segments.len())
            .rev()
            .map(|n| segments[..n].join("::"))
            .find(|candidate| modules.contains(candidate));
        if let Some(module) = longest {
            found.insert(module);
        }
    }
    found
}

/// Reads one path at the start of `text` (after `prefix`), expanding a brace group into one
/// path per member.
fn expand(prefix: &str, text: &str, out: &mut Vec<String>) {
    let head: String = text
        .chars()
        .take_while(|c| c.is_ascii_alphanumeric() || *c == '_' || *c == ':')
        .collect();
    let path = format!("{prefix}{head}");
    let after = text[head.len()..].trim_start();
    if (head.ends_with("::") || head.is_empty())
        && let Some(inner) = after.strip_prefix('{')
    {
        let mut depth = 0;
        let mut start = 0;
        for (i, c) in inner.char_indices() {
            match c {
                '{' => depth += 1,
                '}' if depth == 0 => {
                    expand(&path, inner[start..i].trim_start(), out);
                    return;
                }
                '}' => depth -= 1,
                ',' if depth == 0 => {
                    expand(&path, inner[start..i].trim_start(), out);
                    start = i + 1;
                }
                _ => {}
            }
        }
        return;
    }
    out.push(path);
}
