//! The C interface from C (issue 14): crates/verify-ffi/tests/c/api_test.c is compiled with
//! the system C compiler (`cc`) against the hand-written header and the static library this
//! test run built, once plainly and once under AddressSanitizer, and each of its cases runs
//! as one test here, in both builds. The files it installs are made by the real `ampoule`
//! binary (keygen, pack, publish, offline), so the C program sees what a device would.
//!
//! AddressSanitizer is not optional: `.ci/run` installs the compiler and its runtime, and a
//! machine without them fails here with what to install, rather than skipping.

mod tree_common;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::OnceLock;

use ampoule_verify::PublicKey;
use tree_common::{ok, pack_large, pack_model_with, publish, serve_tree, write_model};

/// The two builds of the C program, and the files every case reads.
struct Built {
    plain: PathBuf,
    asan: PathBuf,
    fixtures: PathBuf,
    scratch: PathBuf,
}

fn built() -> &'static Built {
    static BUILT: OnceLock<Built> = OnceLock::new();
    BUILT.get_or_init(|| {
        let root = Path::new(env!("CARGO_TARGET_TMPDIR")).join("c_api");
        let _ = std::fs::remove_dir_all(&root);
        let fixtures = root.join("fixtures");
        std::fs::create_dir_all(&fixtures).expect("the fixtures directory");
        make_fixtures(&fixtures);
        Built {
            plain: compile(&root.join("api_test"), &[]),
            asan: instrumented(compile(
                &root.join("api_test_asan"),
                &["-fsanitize=address", "-fno-omit-frame-pointer"],
            )),
            fixtures,
            scratch: root.join("scratch"),
        }
    })
}

/// The static library cargo built for this run: the newest `libampoule_verify_ffi*.a` in the
/// profile's directory or its `deps` (a dependency's copy carries a hash in its name).
fn static_library() -> PathBuf {
    let exe = std::env::current_exe().expect("the test's own path");
    let deps = exe.parent().expect("target/<profile>/deps");
    let profile = deps.parent().expect("target/<profile>");
    let mut found: Vec<(std::time::SystemTime, PathBuf)> = [profile, deps]
        .iter()
        .flat_map(|dir| std::fs::read_dir(dir).into_iter().flatten().flatten())
        .map(|e| e.path())
        .filter(|p| {
            let name = p.file_name().map(|n| n.to_string_lossy().into_owned());
            name.is_some_and(|n| n.starts_with("libampoule_verify_ffi") && n.ends_with(".a"))
        })
        .filter_map(|p| Some((p.metadata().ok()?.modified().ok()?, p)))
        .collect();
    found.sort();
    found
        .pop()
        .map(|(_, p)| p)
        .expect("cargo built libampoule_verify_ffi.a (ampoule-verify-ffi is a dev-dependency)")
}

/// Compiles the C program with `cc` and `extra` flags into `out`.
fn compile(out: &Path, extra: &[&str]) -> PathBuf {
    let ffi = Path::new(env!("CARGO_MANIFEST_DIR")).join("crates/verify-ffi");
    let output = Command::new("cc")
        .args(["-std=c11", "-Wall", "-Wextra", "-Werror", "-g"])
        .args(extra)
        .arg("-I")
        .arg(ffi.join("include"))
        .arg(ffi.join("tests/c/api_test.c"))
        .arg(static_library())
        // What a Rust static library needs from the C library on Linux
        // (`rustc --print native-static-libs`).
        .args([
            "-lgcc_s",
            "-lutil",
            "-lrt",
            "-lpthread",
            "-lm",
            "-ldl",
            "-lc",
        ])
        .arg("-o")
        .arg(out)
        .output()
        .expect("the system C compiler `cc` runs (apt-get install gcc)");
    assert!(
        output.status.success(),
        "cc {extra:?} failed (for -fsanitize=address, the compiler's AddressSanitizer runtime \
         must be installed: apt-get install gcc libasan8):\n{}",
        String::from_utf8_lossy(&output.stderr)
    );
    out.to_path_buf()
}

/// `program`, once it is clear that AddressSanitizer's runtime is in it (so a compiler that
/// ignored the flag cannot pass for one that checked).
fn instrumented(program: PathBuf) -> PathBuf {
    let bytes = std::fs::read(&program).expect("the sanitized program");
    assert!(
        bytes.windows(11).any(|w| w == b"__asan_init"),
        "{} holds no AddressSanitizer runtime",
        program.display()
    );
    program
}

/// What the C program installs and reads, made by the `ampoule` binary.
fn make_fixtures(d: &Path) {
    ok(d, &["keygen", "--secret", "k.pem", "--public", "k.pub"]);
    std::fs::write(
        d.join("labels.txt"),
        "fox\nroe deer\nwild boar\nbadger\nhare\nempty frame\n",
    )
    .expect("labels");
    std::fs::write(
        d.join("meta.json"),
        r#"{"preprocess": {"colour_order": "rgb"}, "eval": {"top1": 0.91}}"#,
    )
    .expect("metadata");
    for (version, variant, name) in [("1.0.0", 0, "v1"), ("1.1.0", 1, "v2")] {
        let model = format!("model-{name}.bin");
        write_model(d, &model, variant);
        let bundle = format!("{name}.ampoule");
        let packed = pack_model_with(
            d,
            &model,
            version,
            "k.pem",
            &bundle,
            &["--meta-file", "meta.json"],
        );
        assert!(packed.status.success(), "{packed:?}");
        if name == "v2" {
            // Two appends on another channel before 1.1.0: a device that accepted 1.0.0
            // walks the ledger's consistency steps (FETCH steps, over HTTP).
            publish(d, "v1.ampoule", "beta", "100");
            publish(d, "v1.ampoule", "beta", "100");
        }
        publish(d, &bundle, "stable", "100");
        let offline = format!("{name}.offline");
        ok(
            d,
            &[
                "offline",
                "--tree",
                "tree",
                "--channel",
                "stable",
                "-o",
                &offline,
            ],
        );
    }
    // One byte of the bundle inside the newer offline file flipped: its SHA-256 no longer
    // matches the one the signed feed declares.
    let mut offline = std::fs::read(d.join("v2.offline")).expect("v2.offline");
    let bundle = std::fs::read(d.join("v2.ampoule")).expect("v2.ampoule");
    let at = offline
        .windows(bundle.len())
        .position(|w| w == bundle.as_slice())
        .expect("the bundle is inside the offline file");
    offline[at + bundle.len() / 2] ^= 0x01;
    std::fs::write(d.join("tampered.offline"), offline).expect("tampered.offline");

    // An ONNX classifier (ampoule's invented one: `image` float32 [N, 3, 8, 8] in, `species`
    // float32 [N, 6] out, opset 13, float weights) with metadata, as version 1.2.0 on a
    // channel of its own, for the policy document's settings one by one.
    ampoule::release::synth::write_onnx_classifier(&d.join("species.onnx"), 8, 16, 6, 1)
        .expect("the ONNX classifier");
    let packed = pack_model_with(
        d,
        "species.onnx",
        "1.2.0",
        "k.pem",
        "onnx.ampoule",
        &["--meta-file", "meta.json"],
    );
    assert!(packed.status.success(), "{packed:?}");
    publish(d, "onnx.ampoule", "onnx", "100");
    ok(
        d,
        &[
            "offline",
            "--tree",
            "tree",
            "--channel",
            "onnx",
            "-o",
            "onnx.offline",
        ],
    );

    // A bundle larger than its head (300,000 bytes of model that do not compress), on a channel
    // of its own: the session asks for the head first, then the rest.
    let large = pack_large(d, "2.9.0");
    publish(d, &large, "large", "100");

    // A trust set holding the same key for every role, for the shipped-trust-set path.
    ok(
        d,
        &[
            "trust",
            "init",
            "--key",
            "k.pub",
            "--expires-in",
            "365d",
            "-o",
            "trust-1.json",
        ],
    );
    ok(d, &["trust", "sign", "trust-1.json", "--key", "k.pem"]);
    let pem = std::fs::read_to_string(d.join("k.pub")).expect("k.pub");
    let key = PublicKey::from_pem(&pem).expect("a public key");
    std::fs::write(d.join("key.raw"), key.as_bytes()).expect("key.raw");
    std::fs::write(
        d.join("policy-fits.json"),
        r#"{"policy_format": 1, "bundle_name": "trailcam-species",
            "labels": {"min_count": 2, "required": ["empty frame"]},
            "metadata": {"preprocess.colour_order": "rgb"}}"#,
    )
    .expect("policy-fits.json");
    std::fs::write(
        d.join("policy-refuses.json"),
        r#"{"policy_format": 1, "labels": {"required": ["wolf"]}}"#,
    )
    .expect("policy-refuses.json");
}

/// Runs one case of the C program, plainly and under AddressSanitizer, each in a fresh
/// scratch directory, and requires both to pass.
fn case(name: &str) {
    run_case(name, None);
}

/// Runs one case that updates over HTTP, with `ampoule serve` serving the fixtures' release
/// tree on a free port of 127.0.0.1 for as long as the case runs.
fn http_case(name: &str) {
    let built = built();
    let served = serve_tree(&built.fixtures, "tree");
    run_case(name, Some(&served.addr));
}

fn run_case(name: &str, server: Option<&str>) {
    let built = built();
    for (build, program) in [("plain", &built.plain), ("asan", &built.asan)] {
        let scratch = built.scratch.join(format!("{name}-{build}"));
        let _ = std::fs::remove_dir_all(&scratch);
        std::fs::create_dir_all(&scratch).expect("a scratch directory");
        let mut command = Command::new(program);
        if let Some(addr) = server {
            command.env("AMPOULE_TEST_SERVER", addr);
        }
        let out = command
            .arg(name)
            .arg(&built.fixtures)
            .arg(&scratch)
            // Leaks are errors too; the exit code says whether anything was found.
            .env("ASAN_OPTIONS", "detect_leaks=1:halt_on_error=1")
            .output()
            .expect("the C program runs");
        assert!(
            out.status.success(),
            "case {name} ({build}) failed with {}:\n{}{}",
            out.status,
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        );
        let _ = std::fs::remove_dir_all(&scratch);
    }
}

#[test]
fn issue14_c_abi_version_and_status_names() {
    case("abi");
}

#[test]
fn issue14_c_open_install_offline_read_labels_and_metadata_roll_back() {
    case("lifecycle");
}

#[test]
fn issue14_c_a_shipped_trust_set_opens_and_one_that_is_none_is_refused() {
    case("trust_set");
}

#[test]
fn issue14_c_a_tampered_bundle_is_refused_with_digest() {
    case("tampered");
}

#[test]
fn issue14_c_a_bundle_the_policy_refuses_is_refused_with_incompatible() {
    case("policy_refused");
}

#[test]
fn issue14_c_null_pointers_are_refused() {
    case("null_pointers");
}

#[test]
fn issue14_c_strings_that_are_not_utf8_are_refused() {
    case("non_utf8");
}

#[test]
fn issue14_c_lengths_that_do_not_match_are_refused() {
    case("mismatched_lengths");
}

#[test]
fn issue14_c_freed_and_double_freed_handles_are_invalid() {
    case("freed_handles");
}

#[test]
fn issue14_c_foreign_handles_are_invalid() {
    case("foreign_handles");
}

#[test]
fn issue14_c_two_updates_at_once_on_one_store_one_is_locked() {
    case("two_updates_at_once");
}

#[test]
fn issue14_c_a_malformed_policy_document_is_refused() {
    case("policy_document_malformed");
}

#[test]
fn issue14_c_a_policy_document_over_its_caps_is_refused() {
    case("policy_document_over_caps");
}

#[test]
fn issue14_c_an_update_over_http_step_by_step_catches_up_installs_and_rolls_back() {
    http_case("http_update");
}

#[test]
fn issue14_c_a_cut_off_download_fails_with_network_and_the_next_update_resumes_it() {
    http_case("http_resume");
}

#[test]
fn issue14_c_a_bundle_changed_in_transit_is_refused_with_digest() {
    http_case("http_tampered");
}

#[test]
fn issue14_c_a_bundle_the_policy_refuses_over_http_is_refused_with_incompatible() {
    http_case("http_policy_refused");
}

#[test]
fn issue14_c_a_session_holds_the_store_s_lock_until_freed() {
    http_case("session_locks_the_store");
}

#[test]
fn issue14_c_sessions_misused_are_refused_by_name() {
    http_case("session_misuse");
}

#[test]
fn issue14_c_each_policy_setting_refuses_a_bundle_with_its_status() {
    case("policy_settings");
}

#[test]
fn issue14_c_the_url_update_installs_over_http_with_the_library_s_own_client() {
    http_case("url_update");
}

#[test]
fn issue14_c_the_url_update_keeps_its_limits_and_stops_when_cancelled() {
    http_case("url_limits_and_cancel");
}

#[test]
fn issue14_c_progress_reaches_the_app_s_callback_and_the_device_id_is_kept() {
    case("progress_and_device_id");
}

#[test]
fn issue14_c_a_store_switches_channels_and_gc_leaves_a_session_s_download_alone() {
    http_case("switch_channel_and_gc");
}

#[test]
fn issue14_c_a_bundle_larger_than_its_head_is_asked_for_in_two_parts() {
    http_case("http_head_first");
}
