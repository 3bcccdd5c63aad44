//! The hand-written header and the Rust side cannot drift apart (issue 14): every function
//! declared in include/ampoule.h is exported by src/ffi.rs with the same parameter types in
//! the same order and the same return type, and the other way round; every `repr(C)` struct
//! has the same fields in the same order with the same types; every code the header defines
//! (status, outcome, field, ABI version, message size) has the Rust side's number; and the
//! shared library built by this test run exports exactly the header's functions.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use ampoule_verify_ffi::ffi::{ABI_VERSION, FIELDS, OUTCOMES, SHA256_BYTES, STAGES, STEPS};
use ampoule_verify_ffi::status::{MESSAGE_BYTES, STATUSES};

fn crate_file(name: &str) -> String {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join(name);
    std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

/// The header without its comments (the planned calls are inside one).
fn header() -> String {
    let text = crate_file("include/ampoule.h");
    let mut out = String::new();
    let mut rest = text.as_str();
    while let Some(start) = rest.find("/*") {
        out.push_str(&rest[..start]);
        let end = rest[start..].find("*/").expect("a closed comment") + start + 2;
        out.push(' ');
        rest = &rest[end..];
    }
    out.push_str(rest);
    out
}

/// A C type written one way: tokens split at `*`, joined by single spaces.
fn c_type(text: &str) -> String {
    text.replace('*', " * ")
        .split_whitespace()
        .collect::<Vec<_>>()
        .join(" ")
}

/// `AmpouleRoleKeys` -> `ampoule_role_keys`.
fn snake(name: &str) -> String {
    let mut out = String::new();
    for (i, c) in name.chars().enumerate() {
        if c.is_ascii_uppercase() {
            if i > 0 {
                out.push('_');
            }
            out.push(c.to_ascii_lowercase());
        } else {
            out.push(c);
        }
    }
    out
}

/// The C type a Rust type in the interface stands for.
fn rust_to_c(rust: &str) -> String {
    let rust = rust.trim();
    if let Some(inner) = rust.strip_prefix("*const ") {
        return c_type(&format!("const {} *", rust_to_c(inner)));
    }
    if let Some(inner) = rust.strip_prefix("*mut ") {
        return c_type(&format!("{} *", rust_to_c(inner)));
    }
    if let Some(array) = rust.strip_prefix('[').and_then(|r| r.strip_suffix(']')) {
        let (element, size) = array.split_once(';').expect("an array type");
        return format!("{}[AMPOULE_{}]", rust_to_c(element), size.trim());
    }
    match rust {
        "u8" => "uint8_t".into(),
        "u32" => "uint32_t".into(),
        "i32" => "int32_t".into(),
        "u64" => "uint64_t".into(),
        "i64" => "int64_t".into(),
        "usize" => "size_t".into(),
        "c_char" => "char".into(),
        "c_void" => "void".into(),
        // A nullable C function pointer: the header's typedef.
        "Option<raw::ProgressFn>" => "ampoule_progress_fn".into(),
        other if other.starts_with("Ampoule") => snake(other),
        other => panic!("no C type for the Rust type {other}"),
    }
}

/// The text between the parenthesis at `open` and its match.
fn parenthesized(text: &str, open: usize) -> (&str, usize) {
    let mut depth = 0;
    for (i, c) in text[open..].char_indices() {
        match c {
            '(' => depth += 1,
            ')' => {
                depth -= 1;
                if depth == 0 {
                    return (&text[open + 1..open + i], open + i + 1);
                }
            }
            _ => {}
        }
    }
    panic!("unbalanced parentheses")
}

/// Each exported function of src/ffi.rs: its name, its parameters' C types, its return type.
fn rust_functions() -> BTreeMap<String, (Vec<String>, String)> {
    let source = crate_file("src/ffi.rs");
    let mut out = BTreeMap::new();
    for (at, _) in source.match_indices("extern \"C\" fn ") {
        let rest = &source[at + "extern \"C\" fn ".len()..];
        let name = rest[..rest.find('(').expect("a parameter list")].to_string();
        let open = at + "extern \"C\" fn ".len() + name.len();
        let (params, after) = parenthesized(&source, open);
        let params: Vec<String> = params
            .split(',')
            .map(str::trim)
            .filter(|p| !p.is_empty())
            .map(|p| rust_to_c(p.split_once(':').expect("name: type").1))
            .collect();
        let tail = source[after..].split('{').next().expect("a body").trim();
        let returns = match tail.strip_prefix("->") {
            Some(ty) => rust_to_c(ty),
            None => "void".into(),
        };
        out.insert(name, (params, returns));
    }
    out
}

/// Each function the header declares.
fn header_functions() -> BTreeMap<String, (Vec<String>, String)> {
    let header = header();
    let mut out = BTreeMap::new();
    for statement in header.split(';') {
        let statement = statement.trim();
        let Some(open) = statement.find('(') else {
            continue;
        };
        if statement.starts_with('#') || statement.contains("typedef") || statement.contains('{') {
            continue;
        }
        let before = &statement[..open];
        let name_start = before
            .rfind(|c: char| !(c.is_ascii_alphanumeric() || c == '_'))
            .map_or(0, |i| i + 1);
        let name = before[name_start..].to_string();
        let returns = c_type(&before[..name_start]);
        let (params, _) = parenthesized(statement, open);
        let params: Vec<String> = if params.trim() == "void" {
            Vec::new()
        } else {
            params
                .split(',')
                .map(|p| {
                    let p = p.trim();
                    let cut = p
                        .rfind(|c: char| !(c.is_ascii_alphanumeric() || c == '_'))
                        .expect("a type before the name");
                    c_type(&p[..=cut])
                })
                .collect()
        };
        if name.starts_with("ampoule_") {
            out.insert(name, (params, returns));
        }
    }
    out
}

#[test]
fn issue14_every_function_has_the_same_signature_in_the_header_and_in_rust() {
    let rust = rust_functions();
    let header = header_functions();
    assert!(
        rust.len() >= 21,
        "only {} functions found in src/ffi.rs",
        rust.len()
    );
    assert_eq!(
        rust.keys().collect::<Vec<_>>(),
        header.keys().collect::<Vec<_>>(),
        "the functions differ"
    );
    for (name, signature) in &rust {
        assert_eq!(Some(signature), header.get(name), "{name}");
    }
}

/// The fields of each `#[repr(C)]` struct in `sources`, as (name, C type).
fn rust_structs(sources: &[&str]) -> BTreeMap<String, Vec<(String, String)>> {
    let mut out = BTreeMap::new();
    for file in sources {
        let source = crate_file(file);
        for (at, _) in source.match_indices("#[repr(C)]") {
            let rest = &source[at..];
            let Some(start) = rest.find("pub struct ") else {
                continue;
            };
            let rest = &rest[start + "pub struct ".len()..];
            let name = rest[..rest.find(' ').expect("a name")].to_string();
            let body = &rest[rest.find('{').expect("a body") + 1..rest.find('}').expect("an end")];
            let fields = body
                .lines()
                .map(str::trim)
                .filter(|l| l.starts_with("pub "))
                .map(|l| {
                    let (field, ty) = l["pub ".len()..].split_once(':').expect("field: type");
                    (field.to_string(), rust_to_c(ty.trim_end_matches(',')))
                })
                .collect();
            out.insert(snake(&name), fields);
        }
    }
    out
}

fn header_structs() -> BTreeMap<String, Vec<(String, String)>> {
    let header = header();
    let mut out = BTreeMap::new();
    for (at, _) in header.match_indices("typedef struct ") {
        let rest = &header[at + "typedef struct ".len()..];
        let name = rest[..rest.find(' ').expect("a name")].to_string();
        let body = &rest[rest.find('{').expect("a body") + 1..rest.find('}').expect("an end")];
        let fields = body
            .split(';')
            .map(str::trim)
            .filter(|f| !f.is_empty())
            .map(|f| {
                let (declared, array) = match f.split_once('[') {
                    Some((d, a)) => (d.trim(), format!("[{a}")),
                    None => (f, String::new()),
                };
                let cut = declared
                    .rfind(|c: char| !(c.is_ascii_alphanumeric() || c == '_'))
                    .expect("a type before the name");
                (
                    declared[cut + 1..].to_string(),
                    format!("{}{array}", c_type(&declared[..=cut])),
                )
            })
            .collect();
        out.insert(name, fields);
    }
    out
}

#[test]
fn issue14_every_struct_has_the_same_fields_in_the_header_and_in_rust() {
    let rust = rust_structs(&["src/ffi.rs", "src/status.rs"]);
    let header = header_structs();
    assert_eq!(rust.len(), 8, "{rust:?}");
    assert_eq!(rust, header);
}

/// Every `#define AMPOULE_<prefix><NAME> <number>` of the header.
fn defines(prefix: &str) -> BTreeMap<String, i64> {
    header()
        .lines()
        .filter_map(|l| l.trim().strip_prefix("#define AMPOULE_"))
        .filter_map(|l| {
            let (name, value) = l.split_once(' ')?;
            let name = name.strip_prefix(prefix)?;
            Some((name.to_string(), value.trim().parse().ok()?))
        })
        .collect()
}

#[test]
fn issue14_every_code_has_the_same_number_in_the_header_and_in_rust() {
    let statuses: BTreeMap<String, i64> = STATUSES
        .iter()
        .map(|(status, name)| (name.to_uppercase(), *status as i64))
        .collect();
    let mut header_statuses = defines("");
    header_statuses.retain(|name, _| {
        !name.starts_with("OUTCOME_")
            && !name.starts_with("FIELD_")
            && !name.starts_with("STEP_")
            && !name.starts_with("STAGE_")
            && name != "ABI_VERSION"
            && name != "MESSAGE_BYTES"
            && name != "SHA256_BYTES"
    });
    assert_eq!(header_statuses, statuses);
    let table = |t: &[(&str, i32)]| -> BTreeMap<String, i64> {
        t.iter()
            .map(|(n, v)| (n.to_string(), i64::from(*v)))
            .collect()
    };
    assert_eq!(defines("OUTCOME_"), table(OUTCOMES));
    assert_eq!(defines("FIELD_"), table(FIELDS));
    assert_eq!(defines("STEP_"), table(STEPS));
    assert_eq!(defines("STAGE_"), table(STAGES));
    assert_eq!(
        defines("SHA256_BYTES").get(""),
        Some(&(SHA256_BYTES as i64))
    );
    assert_eq!(
        defines("ABI_VERSION").get(""),
        Some(&i64::from(ABI_VERSION))
    );
    assert_eq!(
        defines("MESSAGE_BYTES").get(""),
        Some(&(MESSAGE_BYTES as i64))
    );
    assert_eq!(ampoule_verify_ffi::ffi::ampoule_abi_version(), ABI_VERSION);
}

/// The directory cargo put this test run's libraries in (target/<profile>).
pub fn library_dir() -> PathBuf {
    let exe = std::env::current_exe().expect("the test's own path");
    exe.parent()
        .and_then(Path::parent)
        .expect("target/<profile>/deps/<test>")
        .to_path_buf()
}

#[test]
fn issue14_the_shared_library_exports_exactly_the_header_s_functions() {
    // `cargo build` puts the library in target/<profile>; `cargo test` of the workspace leaves
    // it in target/<profile>/deps only: take the newer of the two.
    let dir = library_dir();
    let library = [
        dir.join("libampoule_verify_ffi.so"),
        dir.join("deps/libampoule_verify_ffi.so"),
    ]
    .into_iter()
    .filter_map(|p| Some((std::fs::metadata(&p).ok()?.modified().ok()?, p)))
    .max()
    .map(|(_, p)| p)
    .unwrap_or_else(|| {
        panic!(
            "libampoule_verify_ffi.so was not built in {}",
            dir.display()
        )
    });
    // nm is part of binutils, which the system C compiler the C test needs brings along.
    let out = std::process::Command::new("nm")
        .args(["-D", "--defined-only"])
        .arg(&library)
        .output()
        .expect("nm runs (binutils)");
    assert!(out.status.success(), "{out:?}");
    let mut exported: Vec<String> = String::from_utf8_lossy(&out.stdout)
        .lines()
        .filter_map(|l| l.split_whitespace().nth(2))
        .filter(|s| s.starts_with("ampoule_"))
        .map(str::to_string)
        .collect();
    exported.sort();
    let declared: Vec<String> = header_functions().into_keys().collect();
    assert_eq!(exported, declared);
}

#[test]
fn readme_c_examples_compile_against_the_header() {
    let readme = crate_file("../../README.md");
    let section = readme
        .split("## Using ampoule from Kotlin, Swift or C++")
        .nth(1)
        .and_then(|rest| rest.split("\n## ").next())
        .expect("the README's section for other languages");
    let examples: Vec<&str> = section
        .split("```c\n")
        .skip(1)
        .filter_map(|rest| rest.split("```").next())
        .collect();
    assert_eq!(
        examples.len(),
        3,
        "the offline install, the step-by-step update, and the URL update's limits and cancel"
    );
    for example in examples {
        let mut cc = std::process::Command::new("cc")
            .args([
                "-std=c11",
                "-Wall",
                "-Wextra",
                "-Werror",
                "-fsyntax-only",
                "-x",
                "c",
                "-I",
            ])
            .arg(Path::new(env!("CARGO_MANIFEST_DIR")).join("include"))
            .arg("-")
            .stdin(std::process::Stdio::piped())
            .stderr(std::process::Stdio::piped())
            .spawn()
            .expect("the system C compiler `cc` runs");
        std::io::Write::write_all(
            &mut cc.stdin.take().expect("cc's stdin"),
            example.as_bytes(),
        )
        .expect("the example goes to cc");
        let out = cc.wait_with_output().expect("cc finishes");
        assert!(
            out.status.success(),
            "a README C example does not compile:\n{}\n{example}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
}
