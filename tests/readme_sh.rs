//! Issue 12 item 1: the README's shell examples run as written. The test reads README.md
//! itself and runs every ```sh block of the sections below, in order, in one fresh directory,
//! each block with `bash -euo pipefail`; then FORMAT.md's recipe blocks, in another. A comment
//! line `#   TEXT` right in a block is output the block must print: the whole line, or, when
//! it ends in ` ...`, the start of one.
//!
//! The only changes made to the text before it runs are these substitutions:
//! 1. `ampoule` is the binary under test (`CARGO_BIN_EXE_ampoule`), through a link named
//!    `ampoule` in a directory put first on `PATH`;
//! 2. the address `127.0.0.1:8000` becomes `127.0.0.1:<a free port>`;
//! 3. a line that starts `ampoule serve` runs in the background (its output to `serve.log`,
//!    its process id kept, killed at the end), and the block waits until the port accepts.
//!
//! A block that cannot run carries `<!-- readme-test: skip (REASON) -->` on the line before
//! its fence, and is listed in [`SKIPPED`] with that reason; each one without the other fails.

use std::path::{Path, PathBuf};
use std::process::Command;

const BIN: &str = env!("CARGO_BIN_EXE_ampoule");

/// README sections whose ```sh blocks run: level-2 headings, subsections included. The issue
/// names "Keys" and "Auditing"; the README's headings are longer, and these are the ones.
const README_SECTIONS: &[&str] = &[
    "Using it",
    "Publishing and updating",
    "Keys: read this before you ship",
    "Auditing: the ledger",
];

/// FORMAT.md sections whose ```sh blocks run (the openssl, tar and zstd recipes).
const FORMAT_SECTIONS: &[&str] = &["Checking a bundle with general-purpose tools"];

/// Blocks marked as not run: (file, the block's first line, the reason in its marker).
const SKIPPED: &[(&str, &str, &str)] = &[(
    "FORMAT.md",
    "tar --format=ustar -b1 -cf payload.tar model.onnx labels.txt",
    "two steps are prose, writing manifest.json and signatures.json; tests/interop.rs runs the \
     recipe",
)];

const MARKER: &str = "<!-- readme-test: skip (";

/// The tools FORMAT.md's recipes call besides ampoule.
const FORMAT_TOOLS: &[&str] = &["openssl", "tar", "zstd", "xxd", "python3", "sha256sum"];

#[derive(Debug)]
struct Block {
    file: &'static str,
    section: String,
    /// 1-based line of the opening fence.
    line: usize,
    text: String,
    skip: Option<String>,
}

/// The ```sh blocks under the level-2 headings `sections` of `markdown`, in order.
fn sh_blocks(file: &'static str, markdown: &str, sections: &[&str]) -> Vec<Block> {
    let lines: Vec<&str> = markdown.lines().collect();
    let mut blocks = Vec::new();
    let mut section = String::new();
    let mut i = 0;
    while i < lines.len() {
        let line = lines[i];
        if let Some(heading) = line.strip_prefix("## ") {
            section = heading.trim().to_string();
        }
        if line.starts_with("```") {
            let lang = line.trim_start_matches('`').trim();
            let start = i;
            i += 1;
            let mut body = Vec::new();
            while i < lines.len() && !lines[i].starts_with("```") {
                body.push(lines[i]);
                i += 1;
            }
            assert!(
                i < lines.len(),
                "{file} ends inside the block at line {}",
                start + 1
            );
            if lang == "sh" && sections.contains(&section.as_str()) {
                let before = lines[..start].iter().rev().find(|l| !l.trim().is_empty());
                let skip = before.and_then(|l| {
                    l.trim()
                        .strip_prefix(MARKER)
                        .and_then(|r| r.strip_suffix(") -->"))
                        .map(str::to_string)
                });
                blocks.push(Block {
                    file,
                    section: section.clone(),
                    line: start + 1,
                    text: body.join("\n") + "\n",
                    skip,
                });
            }
        }
        i += 1;
    }
    blocks
}

/// Substitution 3 (and 2, applied to the whole block before): a serve line runs in the
/// background and the block waits for its port.
fn substitute(text: &str, port: u16) -> String {
    let text = text.replace("127.0.0.1:8000", &format!("127.0.0.1:{port}"));
    let mut out = String::new();
    for line in text.lines() {
        if line.starts_with("ampoule serve ") {
            let command = line.split(" #").next().unwrap_or(line).trim_end();
            out.push_str(&format!(
                "{command} > serve.log 2>&1 &\necho $! >> serve.pids\n\
                 for _ in $(seq 100); do (echo > /dev/tcp/127.0.0.1/{port}) 2>/dev/null && break; \
                 sleep 0.1; done\n"
            ));
        } else {
            out.push_str(line);
            out.push('\n');
        }
    }
    out
}

/// The expected output a block shows in `#   ` comment lines: (text, whether it is a prefix).
fn expected_output(text: &str) -> Vec<(String, bool)> {
    text.lines()
        .filter_map(|l| l.strip_prefix("#   "))
        .filter(|l| !l.starts_with(' '))
        .map(|l| match l.strip_suffix(" ...") {
            Some(prefix) => (prefix.to_string(), true),
            None => (l.to_string(), false),
        })
        .collect()
}

/// A directory holding the link `ampoule` -> the binary under test (substitution 1).
fn bin_dir(root: &Path) -> PathBuf {
    let dir = root.join(".readme-test-bin");
    std::fs::create_dir(&dir).expect("bin dir");
    std::os::unix::fs::symlink(BIN, dir.join("ampoule")).expect("link to the binary");
    dir
}

fn path_with(dir: &Path) -> String {
    format!(
        "{}:{}",
        dir.display(),
        std::env::var("PATH").unwrap_or_default()
    )
}

/// Kills the servers the blocks started (by the ids they wrote), also when a block fails.
struct Servers(PathBuf);

impl Drop for Servers {
    fn drop(&mut self) {
        let pids = std::fs::read_to_string(self.0.join("serve.pids")).unwrap_or_default();
        for pid in pids.split_whitespace() {
            let _ = Command::new("kill").arg(pid).status();
        }
    }
}

fn run_block(block: &Block, dir: &Path, path: &str, port: u16) -> String {
    let script = substitute(&block.text, port);
    let out = Command::new("bash")
        .args(["-euo", "pipefail", "-c", &script])
        .current_dir(dir)
        .env("PATH", path)
        .output()
        .expect("bash runs");
    let stdout = String::from_utf8_lossy(&out.stdout).into_owned();
    assert!(
        out.status.success(),
        "{} line {} ({}) exited {:?}:\n{script}\n--- stdout\n{stdout}\n--- stderr\n{}",
        block.file,
        block.line,
        block.section,
        out.status.code(),
        String::from_utf8_lossy(&out.stderr)
    );
    for (text, prefix) in expected_output(&block.text) {
        assert!(
            stdout.lines().any(|l| if prefix {
                l.starts_with(&text)
            } else {
                l == text
            }),
            "{} line {}: the output shown, '{text}{}', is not what the block printed:\n{stdout}",
            block.file,
            block.line,
            if prefix { " ..." } else { "" }
        );
    }
    stdout
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .expect("a free port")
        .port()
}

/// Every marked block is in [`SKIPPED`] with the same reason, and every entry there is marked.
fn check_skips(blocks: &[Block], file: &str) {
    let marked: Vec<(&str, &str)> = blocks
        .iter()
        .filter_map(|b| {
            b.skip
                .as_deref()
                .map(|r| (b.text.lines().next().unwrap_or_default(), r))
        })
        .collect();
    let listed: Vec<(&str, &str)> = SKIPPED
        .iter()
        .filter(|(f, _, _)| *f == file)
        .map(|(_, first, reason)| (*first, *reason))
        .collect();
    assert_eq!(marked, listed, "{file}: marked blocks vs the test's list");
}

fn which(tool: &str) -> bool {
    Command::new("which")
        .arg(tool)
        .output()
        .is_ok_and(|o| o.status.success())
}

#[test]
fn issue12_readme_sh_blocks_run_as_written() {
    let readme = include_str!("../README.md");
    let blocks = sh_blocks("README.md", readme, README_SECTIONS);
    for section in README_SECTIONS {
        assert!(
            blocks.iter().any(|b| b.section == *section),
            "README.md has no ```sh block under '## {section}'"
        );
    }
    check_skips(&blocks, "README.md");

    let tmp = tempfile::tempdir().expect("tempdir");
    let dir = tmp.path();
    let path = path_with(&bin_dir(dir));
    let port = free_port();
    let _servers = Servers(dir.to_path_buf());
    for block in blocks.iter().filter(|b| b.skip.is_none()) {
        println!("running README.md line {} ({})", block.line, block.section);
        run_block(block, dir, &path, port);
    }

    // In the README's flow a bundle signed only by the feed key is refused by the device: the
    // README's own update command, after such a bundle was published (with --trust naming
    // the feed key, since the tree's trust set does not let it sign bundles).
    let update = blocks
        .iter()
        .find_map(|b| {
            let start = b.text.find("ampoule update --store ./camera --feed ")?;
            let rest = &b.text[start..];
            let mut command = String::new();
            for line in rest.lines() {
                command.push_str(line.trim_end_matches('\\'));
                if !line.ends_with('\\') {
                    break;
                }
            }
            Some(command)
        })
        .expect("the README's update command");
    assert!(update.contains("--trust-bundle release.public.pem --trust-feed feed.public.pem"));
    let forged = Block {
        file: "readme_sh.rs",
        section: "a bundle signed by the feed key".into(),
        line: 0,
        text: "ampoule pack --model species.onnx --labels labels.txt --name trailcam-species \
               --version 1.3.0 --requires-app '>=2.0.0, <3.0.0' --key feed.secret.pem \
               -o forged.ampoule\n\
               ampoule publish forged.ampoule --tree ./release --channel stable \
               --key feed.secret.pem --trust feed.public.pem\n"
            .into(),
        skip: None,
    };
    run_block(&forged, dir, &path, port);
    let out = Command::new("bash")
        .args(["-euo", "pipefail", "-c", &substitute(&update, port)])
        .current_dir(dir)
        .env("PATH", &path)
        .output()
        .expect("bash runs");
    let feed_key = String::from_utf8_lossy(
        &Command::new(BIN)
            .args(["key-id", "feed.public.pem"])
            .current_dir(dir)
            .output()
            .expect("key-id")
            .stdout,
    )
    .trim()
    .rsplit(' ')
    .next()
    .expect("an id")
    .to_string();
    assert_eq!(
        (
            out.status.code(),
            String::from_utf8_lossy(&out.stderr).trim_end().to_string()
        ),
        (
            Some(1),
            format!(
                "ampoule: error: bundle has no valid signature by a trusted key (by keys not \
                 trusted here: {feed_key})"
            )
        )
    );
}

#[test]
fn issue12_format_md_recipes_run_as_written() {
    let format = include_str!("../FORMAT.md");
    let blocks = sh_blocks("FORMAT.md", format, FORMAT_SECTIONS);
    assert!(!blocks.is_empty(), "FORMAT.md has no recipe blocks");
    check_skips(&blocks, "FORMAT.md");
    let missing: Vec<&str> = FORMAT_TOOLS.iter().copied().filter(|t| !which(t)).collect();
    if !missing.is_empty() {
        println!("skipped: FORMAT.md's recipes need {}", missing.join(", "));
        return;
    }
    let tmp = tempfile::tempdir().expect("tempdir");
    let dir = tmp.path();
    let path = path_with(&bin_dir(dir));
    for block in blocks.iter().filter(|b| b.skip.is_none()) {
        println!("running FORMAT.md line {} ({})", block.line, block.section);
        let out = run_block(block, dir, &path, free_port());
        assert!(out.contains("Signature Verified Successfully"), "{out}");
    }
    for (_, first, reason) in SKIPPED {
        println!("not run: the block starting '{first}': {reason}");
    }
}
