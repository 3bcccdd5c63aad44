//! Deltas (issue 13): a delta made from two real bundles rebuilds the newer bundle's files byte
//! for byte, checked against the files the full bundle unpacks to (by the full-bundle verifier,
//! and by GNU tar and the zstd command as the outside reference), for a retrained classifier
//! head and for a head that grew from 6 to 7 classes; and each bad delta is refused with its
//! exact reason, before any patch byte where the issue says so, leaving nothing behind.
//!
//! The model is `synth::write_head_model` at 10 MiB (chunks of 4, 4 and 2 MiB), so
//! the chunking, the copies and the shifted tail are all exercised; the benchmark
//! (`cargo bench --bench delta`) measures the issue's 84 MiB model.

mod common;

use std::fs::{self, File};
use std::io::Cursor;
use std::path::{Path, PathBuf};

use ampoule::release::pack::{PackSpec, pack};
use ampoule::release::{delta, synth};
use ampoule_verify::format::delta::{CHUNK_BYTES, WINDOW_BYTES};
use ampoule_verify::format::delta_file::{self, Header};
use ampoule_verify::payload::delta::{Rebuilt, apply};
use ampoule_verify::{ErrorKind, PublicKey, TrustedKeys, Verifier};
use common::{APP_VERSION, CREATED, Env, NAME, REQUIRES_APP, run_tool, signing_key, tool};
use semver::{Version, VersionReq};

/// The test model's size at 6 classes.
const MODEL_BYTES: u64 = 10 * 1024 * 1024;

/// Packs `model` (opaque, as `model.bin`) with the fixture labels as `name` `version`,
/// signed by `key`.
fn pack_model(
    env: &Env,
    model: &Path,
    name: &str,
    version: &str,
    key: &ed25519_dalek::SigningKey,
) -> PathBuf {
    let labels = ampoule_verify::labels::parse_labels(common::LABELS).expect("fixture labels");
    let spec = PackSpec {
        model: model.to_path_buf(),
        model_path: "model.bin".into(),
        labels,
        name: name.into(),
        version: Version::parse(version).expect("a version"),
        requires_app: VersionReq::parse(REQUIRES_APP).expect("a requirement"),
        created: CREATED.parse().expect("a time"),
        model_signature: None,
        metadata: None,
    };
    let out = env.path(&format!("{name}-{version}.ampoule"));
    pack(&spec, Some(key), &out, &indicatif::ProgressBar::hidden()).expect("pack");
    out
}

/// A base release 1.0.0 and a newer 1.1.0 whose head has `classes` classes from `head_seed`.
struct Pair {
    env: Env,
    old: PathBuf,
    new: PathBuf,
}

fn pair(classes: u64, head_seed: u64) -> Pair {
    pair_named(NAME, classes, head_seed)
}

fn pair_named(name: &str, classes: u64, head_seed: u64) -> Pair {
    let env = Env::new();
    let (old_model, new_model) = (env.path("old.bin"), env.path("new.bin"));
    synth::write_head_model(&old_model, MODEL_BYTES, 6, 2).expect("old model");
    synth::write_head_model(&new_model, MODEL_BYTES, classes, head_seed).expect("new model");
    let old = pack_model(&env, &old_model, name, "1.0.0", &env.key);
    let new = pack_model(&env, &new_model, name, "1.1.0", &env.key);
    Pair { env, old, new }
}

fn verifier(env: &Env) -> Verifier {
    let mut keys = TrustedKeys::new();
    keys.add(PublicKey::from_verifying_key(&env.key.verifying_key()).expect("not weak"));
    Verifier::new(keys, Version::parse(APP_VERSION).expect("a version"))
        .expect("a verifier")
        .require_name(NAME)
        .installed(Version::new(1, 0, 0))
}

/// The files a bundle unpacks to through the full-bundle verifier.
fn unpacked(env: &Env, bundle: &Path, dir: &str) -> PathBuf {
    let dest = env.path(dir);
    verifier(env)
        .installed(Version::new(0, 0, 1))
        .verify_path(bundle)
        .expect("the full bundle verifies")
        .unpack(&dest)
        .expect("the full bundle unpacks");
    dest
}

/// Applies `delta` to the base files in `base` (model.bin, labels.txt) into a fresh
/// directory, which is returned with the result.
fn apply_to(
    env: &Env,
    delta: &[u8],
    base: &Path,
    out: &str,
) -> (PathBuf, ampoule_verify::Result<Rebuilt>) {
    let dir = env.path(out);
    fs::create_dir(&dir).expect("output dir");
    let mut files = [
        File::open(base.join("model.bin")).expect("base model"),
        File::open(base.join("labels.txt")).expect("base labels"),
    ];
    let result = apply(&verifier(env), Cursor::new(delta), &mut files, &dir);
    (dir, result)
}

/// Makes the delta between a pair and returns its bytes.
fn made(pair: &Pair) -> Vec<u8> {
    let out = pair.env.path("update.ampoule-delta");
    delta::make(&pair.old, &pair.new, &out).expect("make the delta");
    fs::read(out).expect("read the delta")
}

/// The delta with its header changed by `edit` (patches, manifest and signatures kept).
fn with_header(delta: &[u8], edit: impl FnOnce(&mut Header)) -> Vec<u8> {
    relaid(delta, |header, _, _| edit(header))
}

/// The delta laid out again after `edit` changed its header, manifest or signatures.
fn relaid(delta: &[u8], edit: impl FnOnce(&mut Header, &mut Vec<u8>, &mut Vec<u8>)) -> Vec<u8> {
    let mut reader = Cursor::new(delta);
    let mut head = delta_file::read_head(&mut reader).expect("the delta's head reads");
    let at = reader.position() as usize;
    let patches = &delta[at..at + head.patches_len as usize];
    edit(&mut head.header, &mut head.manifest, &mut head.signatures);
    let mut out = Vec::new();
    delta_file::write_head(
        &mut out,
        common::CREATED_UNIX,
        &head.header,
        &head.manifest,
        &head.signatures,
        head.patches_len,
    )
    .expect("write");
    out.extend_from_slice(patches);
    delta_file::write_tail(&mut out, head.patches_len).expect("write");
    out
}

/// Where `patches.bin`'s bytes start in a delta.
fn patches_offset(delta: &[u8]) -> usize {
    let mut reader = Cursor::new(delta);
    delta_file::read_head(&mut reader).expect("head");
    reader.position() as usize
}

fn assert_empty(dir: &Path) {
    let left: Vec<_> = fs::read_dir(dir)
        .expect("dir")
        .flatten()
        .map(|e| e.file_name())
        .collect();
    assert!(
        left.is_empty(),
        "a refused delta left {left:?} in {}",
        dir.display()
    );
}

/// The new bundle's files as GNU tar and the zstd command extract them (outside references),
/// when both are installed.
fn extracted_by_tar_and_zstd(env: &Env, bundle: &Path) -> Option<PathBuf> {
    let dest = env.path("tar-extracted");
    fs::create_dir(&dest).expect("dir");
    let mut outer = tool("tar")?;
    outer
        .arg("-xf")
        .arg(bundle)
        .arg("-C")
        .arg(&dest)
        .arg("payload.tar.zst");
    run_tool(outer);
    let mut unzstd = tool("zstd")?;
    unzstd
        .arg("-d")
        .arg("-q")
        .arg(dest.join("payload.tar.zst"))
        .arg("-o")
        .arg(dest.join("payload.tar"));
    run_tool(unzstd);
    let mut inner = tool("tar")?;
    inner
        .arg("-xf")
        .arg(dest.join("payload.tar"))
        .arg("-C")
        .arg(&dest);
    run_tool(inner);
    Some(dest)
}

fn round_trip(pair: &Pair) -> Vec<u8> {
    let env = &pair.env;
    let delta = made(pair);
    let base = unpacked(env, &pair.old, "base");
    let reference = unpacked(env, &pair.new, "reference");
    let (dir, result) = apply_to(env, &delta, &base, "rebuilt");
    let rebuilt = result.expect("the delta applies");
    assert_eq!(rebuilt.manifest.version, Version::new(1, 1, 0));
    for name in ["model.bin", "labels.txt"] {
        assert_eq!(
            fs::read(dir.join(name)).expect("rebuilt"),
            fs::read(reference.join(name)).expect("reference"),
            "{name} differs from the full bundle's"
        );
    }
    // The carried documents are the bundle's own bytes, as its signers made them.
    let layout = ampoule_verify::bundle::Unverified::open(&pair.new)
        .expect("open")
        .layout;
    assert_eq!(rebuilt.manifest_bytes, layout.manifest);
    assert_eq!(rebuilt.signatures, layout.signatures);
    match extracted_by_tar_and_zstd(env, &pair.new) {
        Some(tar_dir) => {
            for name in ["model.bin", "labels.txt"] {
                assert_eq!(
                    fs::read(dir.join(name)).expect("rebuilt"),
                    fs::read(tar_dir.join(name)).expect("extracted by GNU tar and zstd"),
                );
            }
        }
        None => eprintln!("skipped the GNU tar and zstd comparison: a tool is missing"),
    }
    delta
}

#[test]
fn issue13_a_delta_rebuilds_a_retrained_head_byte_for_byte() {
    let pair = pair(6, 4);
    let delta = round_trip(&pair);
    // The head is 49,176 bytes of new weights; all else is copied. A rule of thumb, not a
    // timing: far under 1% of the bundle (the issue's target at 84 MiB).
    let bundle = fs::metadata(&pair.new).expect("bundle").len();
    assert!(
        (delta.len() as u64) < bundle / 100,
        "the delta is {} bytes, the bundle {bundle}",
        delta.len()
    );

    // The CLI makes the same file, and inspect shows it for what it is.
    let env = &pair.env;
    let run = env.run([
        "delta",
        "--from",
        "trailcam-species-1.0.0.ampoule",
        "trailcam-species-1.1.0.ampoule",
        "-o",
        "cli.ampoule-delta",
        "--json",
    ]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    assert_eq!(
        fs::read(env.path("cli.ampoule-delta")).expect("cli delta"),
        delta
    );
    let made: serde_json::Value = serde_json::from_str(&run.stdout).expect("json");
    assert_eq!(
        made["chunks"], 4,
        "three chunks of the model, one of the labels"
    );
    let inspect = env.run(["inspect", "cli.ampoule-delta", "--json"]);
    assert_eq!(inspect.code, 0, "{}", inspect.stderr);
    let shown: serde_json::Value = serde_json::from_str(&inspect.stdout).expect("json");
    assert_eq!(shown["version"], "1.1.0");
    assert_eq!(shown["base"], made["base"]);
    assert_eq!(shown["chunks"], 4);
    assert_eq!(shown["size"], delta.len());
    let text = env.run(["inspect", "cli.ampoule-delta"]);
    assert!(
        text.stdout
            .starts_with("delta    cli.ampoule-delta\nrebuilds trailcam-species 1.1.0"),
        "{}",
        text.stdout
    );
}

#[test]
fn issue13_a_delta_rebuilds_a_head_grown_from_6_to_7_classes() {
    let pair = pair(7, 4);
    let delta = round_trip(&pair);
    // Every byte after the head moved by 8,196; the tail is still found (copied), so the
    // delta stays small.
    let bundle = fs::metadata(&pair.new).expect("bundle").len();
    assert!(
        (delta.len() as u64) < bundle / 100,
        "the delta is {} bytes",
        delta.len()
    );
}

#[test]
fn issue13_an_altered_patch_is_refused_and_nothing_is_left() {
    let pair = pair(6, 4);
    let mut delta = made(&pair);
    let base = unpacked(&pair.env, &pair.old, "base");
    // The third chunk carries the new head: a zstd record. Flip a byte in its frame.
    let at = delta.len() - 1024 - 200;
    delta[at] ^= 0x40;
    let (dir, result) = apply_to(&pair.env, &delta, &base, "out");
    let err = result.expect_err("an altered patch");
    assert_eq!(err.kind(), ErrorKind::Digest, "{err}");
    assert!(
        err.to_string()
            .starts_with("delta record 2 does not decode: ")
            || err
                .to_string()
                .starts_with("delta rebuilds model.bin with sha256 "),
        "{err}"
    );
    assert_empty(&dir);
}

#[test]
fn issue13_a_truncated_delta_is_refused() {
    let pair = pair(6, 4);
    let delta = made(&pair);
    let base = unpacked(&pair.env, &pair.old, "base");
    let patches = patches_offset(&delta);
    for (i, cut) in [
        100,
        700,
        patches - 10,
        patches + 10,
        patches + 30,
        delta.len() - 1500,
        delta.len() - 1,
    ]
    .into_iter()
    .enumerate()
    {
        let (dir, result) = apply_to(&pair.env, &delta[..cut], &base, &format!("out{i}"));
        let err = result.expect_err("a truncated delta");
        assert_eq!(err.kind(), ErrorKind::Malformed, "cut at {cut}: {err}");
        assert!(err.to_string().contains("truncated"), "cut at {cut}: {err}");
        assert_empty(&dir);
    }
    let mut longer = delta.clone();
    longer.push(0);
    let (_, result) = apply_to(&pair.env, &longer, &base, "longer");
    assert_eq!(
        result.expect_err("trailing bytes").to_string(),
        "delta has trailing bytes after the end-of-archive marker"
    );
}

#[test]
fn issue13_a_delta_needing_more_memory_than_the_cap_is_refused_before_its_patches() {
    let pair = pair(6, 4);
    let delta = made(&pair);
    let base = unpacked(&pair.env, &pair.old, "base");
    let window = with_header(&delta, |h| h.window_bytes = WINDOW_BYTES + 1);
    let (_, result) = apply_to(&pair.env, &window, &base, "window");
    let err = result.expect_err("a window over the cap");
    assert_eq!(err.kind(), ErrorKind::TooLarge);
    assert_eq!(
        err.to_string(),
        "delta needs base windows of 8388609 bytes, over the limit of 8388608 bytes a device \
         gives to applying a delta; use the full bundle"
    );
    let chunk = with_header(&delta, |h| h.chunk_bytes = CHUNK_BYTES * 2);
    let (_, result) = apply_to(&pair.env, &chunk, &base, "chunk");
    assert_eq!(
        result.expect_err("a chunk over the cap").to_string(),
        "delta needs chunks of 8388608 bytes, over the limit of 4194304 bytes a device gives \
         to applying a delta; use the full bundle"
    );
    // A record that asks for more than its header declared is refused before its bytes.
    let small = with_header(&delta, |h| h.window_bytes = 1024);
    let (dir, result) = apply_to(&pair.env, &small, &base, "record");
    let err = result.expect_err("a record over the header's window");
    assert!(
        err.to_string()
            .starts_with("delta record 2 asks for a window of 8388608 bytes"),
        "{err}"
    );
    assert_empty(&dir);
}

#[test]
fn issue13_a_delta_whose_base_is_its_own_target_is_refused() {
    let pair = pair(6, 4);
    let delta = made(&pair);
    let reference = unpacked(&pair.env, &pair.new, "reference");
    let new_files = ampoule_verify::bundle::Unverified::open(&pair.new)
        .expect("open")
        .manifest
        .files;
    let looped = with_header(&delta, |h| h.base = new_files);
    let (dir, result) = apply_to(&pair.env, &looped, &reference, "out");
    let err = result.expect_err("a loop");
    assert_eq!(err.kind(), ErrorKind::Policy);
    assert_eq!(
        err.to_string(),
        "delta's base files are the files it rebuilds (trailcam-species 1.1.0); a delta leads \
         from an older release to a newer one"
    );
    assert_empty(&dir);
    // `ampoule delta` will not make one either.
    let run = pair.env.run([
        "delta",
        "--from",
        "trailcam-species-1.1.0.ampoule",
        "trailcam-species-1.1.0.ampoule",
        "-o",
        "loop.ampoule-delta",
    ]);
    assert_eq!(run.code, 2, "{}", run.stderr);
    assert!(
        run.stderr
            .contains("is not newer than trailcam-species 1.1.0"),
        "{}",
        run.stderr
    );
    assert!(!pair.env.path("loop.ampoule-delta").exists());
}

#[test]
fn issue13_a_delta_for_another_bundle_name_is_refused() {
    let pair = pair_named("trailcam-birds", 6, 4);
    let delta = made(&pair);
    let base = unpacked_any(&pair.env, &pair.old, "base");
    let (dir, result) = apply_to(&pair.env, &delta, &base, "out");
    let err = result.expect_err("another bundle");
    assert_eq!(err.kind(), ErrorKind::Policy);
    assert_eq!(
        err.to_string(),
        "bundle is named 'trailcam-birds' but this app accepts only 'trailcam-species'"
    );
    assert_empty(&dir);
}

/// [`unpacked`] for a bundle of any name.
fn unpacked_any(env: &Env, bundle: &Path, dir: &str) -> PathBuf {
    let dest = env.path(dir);
    let mut keys = TrustedKeys::new();
    keys.add(PublicKey::from_verifying_key(&env.key.verifying_key()).expect("not weak"));
    Verifier::new(keys, Version::parse(APP_VERSION).expect("a version"))
        .expect("a verifier")
        .verify_path(bundle)
        .expect("verifies")
        .unpack(&dest)
        .expect("unpacks");
    dest
}

#[test]
fn issue13_a_header_naming_another_release_than_its_manifest_is_refused() {
    let pair = pair(6, 4);
    let delta = made(&pair);
    let base = unpacked(&pair.env, &pair.old, "base");
    let renamed = with_header(&delta, |h| h.version = Version::new(1, 2, 0));
    let (_, result) = apply_to(&pair.env, &renamed, &base, "out");
    assert_eq!(
        result
            .expect_err("header and manifest disagree")
            .to_string(),
        "delta's header names trailcam-species 1.2.0 but its signed manifest is trailcam-species 1.1.0"
    );
}

#[test]
fn issue13_a_delta_rebuilding_other_files_than_its_manifest_declares_is_refused() {
    // Patches that rebuild release A, carrying release B's genuinely signed manifest.
    let pair = pair(6, 4);
    let delta = made(&pair);
    let other_model = pair.env.path("other.bin");
    synth::write_head_model(&other_model, MODEL_BYTES, 6, 9).expect("other model");
    let other = pack_model(&pair.env, &other_model, NAME, "1.1.0-other", &pair.env.key);
    let layout = ampoule_verify::bundle::Unverified::open(&other)
        .expect("open")
        .layout;
    let swapped = relaid(&delta, |h, manifest, signatures| {
        h.version = Version::parse("1.1.0-other").expect("version");
        *manifest = layout.manifest.clone();
        *signatures = layout.signatures.clone();
    });
    let base = unpacked(&pair.env, &pair.old, "base");
    let (dir, result) = apply_to(&pair.env, &swapped, &base, "out");
    let err = result.expect_err("rebuilt files differ from the manifest");
    assert_eq!(err.kind(), ErrorKind::Digest);
    let manifest = ampoule_verify::bundle::Unverified::open(&other)
        .expect("open")
        .manifest;
    let rebuilt = ampoule_verify::bundle::Unverified::open(&pair.new)
        .expect("open")
        .manifest;
    assert_eq!(
        err.to_string(),
        format!(
            "delta rebuilds model.bin with sha256 {}, but the manifest declares {}; the delta is \
             damaged or was made wrongly: use the full bundle",
            rebuilt.files[0].sha256, manifest.files[0].sha256
        )
    );
    assert_empty(&dir);
}

#[test]
fn issue13_altered_base_files_are_refused_before_any_patch_is_read() {
    let pair = pair(6, 4);
    let delta = made(&pair);
    let base = unpacked(&pair.env, &pair.old, "base");
    let model = base.join("model.bin");
    let mut bytes = fs::read(&model).expect("base model");
    bytes[1000] ^= 1;
    fs::write(&model, &bytes).expect("alter the installed model");
    // The patches are cut short too: the base is refused first, so no patch byte was read.
    let short = &delta[..patches_offset(&delta) + 4];
    let (dir, result) = apply_to(&pair.env, short, &base, "out");
    let err = result.expect_err("altered base");
    assert_eq!(err.kind(), ErrorKind::Digest);
    let message = err.to_string();
    assert!(
        message.starts_with("base file model.bin has sha256 "),
        "{message}"
    );
    assert!(
        message.ends_with("the installed files differ from the delta's base: use the full bundle"),
        "{message}"
    );
    assert_empty(&dir);
}

#[test]
fn issue13_a_delta_signed_by_an_untrusted_key_is_refused_before_its_base_and_patches() {
    let pair = pair(6, 4);
    let delta = made(&pair);
    let stranger = signing_key(99);
    let forged = relaid(&delta, |_, manifest, signatures| {
        *signatures = common::signatures(&[&stranger], manifest);
    });
    let short = &forged[..patches_offset(&forged) + 4];
    // No base files at all: the signature is refused first.
    let dir = pair.env.path("out");
    fs::create_dir(&dir).expect("dir");
    let mut none: [File; 0] = [];
    let err = apply(&verifier(&pair.env), Cursor::new(short), &mut none, &dir).expect_err("forged");
    assert_eq!(err.kind(), ErrorKind::Signature);
    assert!(
        err.to_string()
            .starts_with("delta's manifest has no valid signature by a trusted key"),
        "{err}"
    );
}

#[test]
fn issue13_a_zstd_record_decodes_with_the_zstd_command_and_its_base_window() {
    // The outside reference for the patch encoding: the zstd command (`--patch-from`, the
    // same reference-prefix mechanism) decodes a record's frame with the base bytes it names.
    let pair = pair(7, 4);
    let delta = made(&pair);
    let base = unpacked(&pair.env, &pair.old, "base");
    let reference = unpacked(&pair.env, &pair.new, "reference");
    let mut reader = Cursor::new(delta.as_slice());
    let head = delta_file::read_head(&mut reader).expect("head");
    let mut at = reader.position() as usize;
    let mut rebuilt_offset = 0usize;
    for index in 0..head.header.records {
        let bytes: [u8; 24] = delta[at..at + 24].try_into().expect("24 bytes");
        let record = delta_file::Record::parse(&bytes, index, &head.header).expect("a record");
        at += 24;
        if record.op == delta_file::Op::Zstd && record.file == 0 {
            let model = fs::read(base.join("model.bin")).expect("base model");
            let start = record.offset as usize;
            pair.env
                .write("window", &model[start..start + record.window as usize]);
            pair.env
                .write("patch.zst", &delta[at..at + record.patch as usize]);
            let Some(mut zstd) = tool("zstd") else { return };
            zstd.current_dir(pair.env.dir.path()).args([
                "-d",
                "-q",
                "--patch-from=window",
                "patch.zst",
                "-o",
                "chunk",
            ]);
            run_tool(zstd);
            let expected = fs::read(reference.join("model.bin")).expect("reference");
            assert_eq!(
                pair.env.read("chunk"),
                expected[rebuilt_offset..rebuilt_offset + record.len as usize]
            );
            return;
        }
        at += record.patch as usize;
        if record.file == 0 {
            rebuilt_offset += record.len as usize;
        }
    }
    panic!("the delta has no zstd record for the model");
}
