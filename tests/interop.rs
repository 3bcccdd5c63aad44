//! Interop with general-purpose tools: the bundle format is plain POSIX ustar, zstd and
//! Ed25519 over documented bytes, so GNU tar, the zstd command and openssl must read what
//! `ampoule` writes, and `ampoule verify` must accept a bundle made with those tools alone.
//! Each test is skipped, saying why, when a tool is missing.

mod common;

use std::path::Path;
use std::process::Command;

use common::*;

/// The signing context as FORMAT.md documents it, spelled out here rather than taken from
/// the library, so a change to the constant is caught.
const MANIFEST_CONTEXT: &[u8] = b"ampoule-sig-v1:manifest\n";

fn tools(names: &[&str]) -> bool {
    names.iter().all(|n| tool(n).is_some())
}

/// Packs the fixture model with the CLI, signed.
fn packed(env: &Env) -> std::path::PathBuf {
    let run = env.run([
        "pack",
        "--model",
        MODEL,
        "--labels",
        LABELS_FILE,
        "--name",
        NAME,
        "--version",
        "1.4.0",
        "--requires-app",
        REQUIRES_APP,
        "--created",
        CREATED,
        "--key",
        SECRET,
        "-o",
        "species.ampoule",
    ]);
    assert_eq!(run.code, 0, "{run:?}");
    bundle_check::assert_readers_accept(
        env!("CARGO_BIN_EXE_ampoule"),
        &env.path("species.ampoule"),
        Some(&env.path(PUBLIC)),
        "model.onnx",
    );
    env.path("species.ampoule")
}

fn tar_in(dir: &Path) -> Command {
    let mut c = Command::new("tar");
    c.current_dir(dir);
    c
}

fn json(bytes: &[u8]) -> serde_json::Value {
    serde_json::from_slice(bytes).expect("JSON")
}

/// `openssl dgst -sha256 -r FILE`, as hex.
fn openssl_sha256(file: &Path) -> String {
    let mut c = Command::new("openssl");
    c.args(["dgst", "-sha256", "-r"]).arg(file);
    let out = String::from_utf8(run_tool(c)).expect("text");
    out.split_whitespace().next().expect("a digest").to_string()
}

/// The key id as documented: SHA-256 of the DER SubjectPublicKeyInfo (from openssl), first
/// 16 bytes.
fn openssl_key_id(dir: &Path, public_pem: &str) -> String {
    let mut c = Command::new("openssl");
    c.current_dir(dir).args([
        "pkey", "-pubin", "-in", public_pem, "-outform", "DER", "-out", "key.der",
    ]);
    run_tool(c);
    openssl_sha256(&dir.join("key.der"))[..32].to_string()
}

#[test]
fn openssl_verifies_the_signature_over_the_documented_bytes() {
    if !tools(&["openssl", "tar"]) {
        return;
    }
    let env = Env::new();
    let bundle = packed(&env);
    let mut c = tar_in(env.dir.path());
    c.arg("-xf")
        .arg(&bundle)
        .args(["manifest.json", "signatures.json"]);
    run_tool(c);
    let manifest = env.read("manifest.json");
    let sigs = json(&env.read("signatures.json"));
    let entries = sigs["signatures"].as_array().expect("a list");
    assert_eq!(entries.len(), 1);
    let sig = hex::decode(entries[0]["signature"].as_str().expect("hex")).expect("hex");
    assert_eq!(
        entries[0]["key_id"].as_str(),
        Some(openssl_key_id(env.dir.path(), PUBLIC).as_str()),
        "key id = first 16 bytes of SHA-256 of the DER SubjectPublicKeyInfo"
    );
    env.write("sig.bin", &sig);
    let mut signed = MANIFEST_CONTEXT.to_vec();
    signed.extend_from_slice(&manifest);
    env.write("signed.bin", &signed);
    let verify = |input: &str| {
        Command::new("openssl")
            .current_dir(env.dir.path())
            .args(["pkeyutl", "-verify", "-pubin", "-inkey", PUBLIC, "-rawin"])
            .args(["-in", input, "-sigfile", "sig.bin"])
            .output()
            .expect("openssl runs")
    };
    let out = verify("signed.bin");
    assert!(out.status.success(), "{out:?}");
    assert_eq!(
        String::from_utf8_lossy(&out.stdout),
        "Signature Verified Successfully\n"
    );
    // Without the context the same signature must not verify: it covers context || manifest.
    env.write("bare.bin", &manifest);
    assert!(!verify("bare.bin").status.success());
}

#[test]
fn gnu_tar_lists_exactly_the_four_entries() {
    if !tools(&["tar"]) {
        return;
    }
    let env = Env::new();
    let bundle = packed(&env);
    let mut c = tar_in(env.dir.path());
    c.env("TZ", "UTC")
        .args(["--numeric-owner", "-tvf"])
        .arg(&bundle);
    let listing = String::from_utf8(run_tool(c)).expect("text");
    let rows: Vec<Vec<&str>> = listing
        .lines()
        .map(|l| l.split_whitespace().collect())
        .collect();
    let names: Vec<&str> = rows.iter().map(|r| r[5]).collect();
    assert_eq!(
        names,
        [
            "manifest.json",
            "signatures.json",
            "chunks.sha256",
            "payload.tar.zst"
        ]
    );
    for row in &rows {
        // Mode 0644, owner and group 0, and the --created time as mtime (tar prints UTC here).
        assert_eq!(&row[..2], &["-rw-r--r--", "0/0"], "{listing}");
        assert_eq!(&row[3..5], &["2026-12-01", "08:00"], "{listing}");
    }
    let sizes: Vec<u64> = rows.iter().map(|r| r[2].parse().expect("a size")).collect();
    let layout_len = sizes
        .iter()
        .map(|&s| ampoule_verify::tar::entry_len(s))
        .sum::<u64>()
        + 1024;
    assert_eq!(
        std::fs::metadata(&bundle).expect("bundle").len(),
        layout_len,
        "headers, padded data, two zero blocks and nothing else"
    );
}

#[test]
fn payload_decompresses_with_zstd_and_lists_with_tar() {
    if !tools(&["tar", "zstd", "openssl", "sha256sum"]) {
        return;
    }
    let env = Env::new();
    let bundle = packed(&env);
    let mut c = tar_in(env.dir.path());
    c.arg("xOf").arg(&bundle).arg("payload.tar.zst");
    let payload = run_tool(c);
    env.write("payload.tar.zst", &payload);
    let mut c = tar_in(env.dir.path());
    c.arg("xOf").arg(&bundle).arg("manifest.json");
    let manifest = json(&run_tool(c));
    // Format 2: openssl's SHA-256 of the chunk list is the manifest's, and of each chunk (cut
    // from the payload by the sizes the list gives: 4 bytes little-endian, then 32 bytes of
    // digest) the list's.
    let mut c = tar_in(env.dir.path());
    c.arg("xOf").arg(&bundle).arg("chunks.sha256");
    let list = run_tool(c);
    env.write("chunks.sha256", &list);
    assert_eq!(
        manifest["payload"]["chunks_sha256"].as_str(),
        Some(openssl_sha256(&env.path("chunks.sha256")).as_str())
    );
    let mut at = 0;
    for record in list.chunks(36) {
        let size = u32::from_le_bytes(record[..4].try_into().expect("a whole record")) as usize;
        env.write("chunk.bin", &payload[at..at + size]);
        assert_eq!(
            openssl_sha256(&env.path("chunk.bin")),
            hex::encode(&record[4..]),
            "the chunk at {at}"
        );
        at += size;
    }
    assert_eq!(at, payload.len(), "the chunks cover the payload");
    assert_eq!(
        manifest["payload"]["size"].as_u64(),
        Some(payload.len() as u64)
    );

    let mut c = Command::new("zstd");
    c.current_dir(env.dir.path())
        .args(["-d", "-q", "payload.tar.zst", "-o", "payload.tar"]);
    run_tool(c);
    let mut c = tar_in(env.dir.path());
    c.args(["-tf", "payload.tar"]);
    assert_eq!(
        String::from_utf8(run_tool(c)).expect("text"),
        "model.onnx\nlabels.txt\n"
    );
    std::fs::create_dir(env.path("inner")).expect("mkdir");
    let mut c = tar_in(&env.path("inner"));
    c.args(["-xf", "../payload.tar"]);
    run_tool(c);
    let mut c = Command::new("sha256sum");
    c.current_dir(env.path("inner"))
        .args(["model.onnx", "labels.txt"]);
    let sums = String::from_utf8(run_tool(c)).expect("text");
    let sums: Vec<&str> = sums.lines().map(|l| &l[..64]).collect();
    for (i, file) in manifest["files"]
        .as_array()
        .expect("files")
        .iter()
        .enumerate()
    {
        assert_eq!(file["sha256"].as_str(), Some(sums[i]), "{file}");
    }
    assert_eq!(
        std::fs::read(env.path("inner/model.onnx")).expect("model"),
        env.read(MODEL)
    );
    assert_eq!(
        std::fs::read(env.path("inner/labels.txt")).expect("labels"),
        LABELS
    );
}

#[test]
fn issue13_a_format_2_bundle_made_by_hand_with_split_zstd_python_and_openssl_verifies() {
    // FORMAT.md's recipe for format 2: the inner tar cut with split, each piece compressed
    // alone by the zstd command, the chunk list written with Python's standard library.
    if !tools(&["tar", "zstd", "openssl", "sha256sum", "split", "python3"]) {
        return;
    }
    let env = Env::new();
    let dir = env.dir.path();
    let sh = |script: &str| {
        let mut c = Command::new("sh");
        c.current_dir(dir).args(["-e", "-c", script]);
        String::from_utf8(run_tool(c)).expect("text")
    };
    sh("openssl genpkey -algorithm ed25519 -out hand.secret.pem
        openssl pkey -in hand.secret.pem -pubout -out hand.public.pem");
    std::fs::create_dir(env.path("files")).expect("mkdir");
    // Over 1 MiB, so the inner tar makes three chunks of 512 KiB.
    let model = model_bytes(1200 * 1024);
    std::fs::write(env.path("files/model.onnx"), &model).expect("write");
    std::fs::write(env.path("files/labels.txt"), LABELS).expect("write");
    sh(
        "tar --format=ustar -b1 -C files -cf payload.tar model.onnx labels.txt
        split -b 524288 -d -a 4 payload.tar part.
        for p in part.[0-9][0-9][0-9][0-9]; do zstd -1 -q \"$p\" -o \"$p.zst\"; done
        cat part.*.zst > payload.tar.zst
        python3 -c '
import glob, hashlib, os, struct
with open(\"chunks.sha256\", \"wb\") as out:
    for name in sorted(glob.glob(\"part.*.zst\")):
        data = open(name, \"rb\").read()
        out.write(struct.pack(\"<I\", len(data)) + hashlib.sha256(data).digest())'",
    );
    assert_eq!(sh("ls part.*.zst | wc -l").trim(), "3");
    let digest = |path: &str| sh(&format!("sha256sum {path}"))[..64].to_string();
    let size = |path: &str| std::fs::metadata(env.path(path)).expect("file").len();
    let manifest = format!(
        "{{\"format\":2,\"name\":\"trailcam-species\",\"version\":\"3.0.0\",\
         \"created\":\"2026-12-01T08:00:00Z\",\"requires_app\":\">=2.0.0\",\
         \"payload\":{{\"compression\":\"zstd\",\"size\":{},\"chunk_bytes\":524288,\
         \"chunks_sha256\":\"{}\"}},\
         \"files\":[{{\"path\":\"model.onnx\",\"role\":\"model\",\"size\":{},\"sha256\":\"{}\"}},\
         {{\"path\":\"labels.txt\",\"role\":\"labels\",\"size\":{},\"sha256\":\"{}\"}}],\
         \"label_count\":6}}",
        size("payload.tar.zst"),
        digest("chunks.sha256"),
        size("files/model.onnx"),
        digest("files/model.onnx"),
        size("files/labels.txt"),
        digest("files/labels.txt"),
    );
    std::fs::create_dir(env.path("outer")).expect("mkdir");
    env.write("outer/manifest.json", manifest.as_bytes());
    let mut signed = MANIFEST_CONTEXT.to_vec();
    signed.extend_from_slice(manifest.as_bytes());
    env.write("signed.bin", &signed);
    sh("openssl pkeyutl -sign -inkey hand.secret.pem -rawin -in signed.bin -out sig.bin");
    let signatures = format!(
        "{{\"signatures\":[{{\"key_id\":\"{}\",\"signature\":\"{}\"}}]}}\n",
        openssl_key_id(dir, "hand.public.pem"),
        hex::encode(env.read("sig.bin"))
    );
    env.write("outer/signatures.json", signatures.as_bytes());
    sh("cp payload.tar.zst chunks.sha256 outer/
        tar --format=ustar -b1 -C outer -cf hand.ampoule manifest.json signatures.json \
            chunks.sha256 payload.tar.zst");
    let run = env.run([
        "verify",
        "hand.ampoule",
        "--trust",
        "hand.public.pem",
        "--app-version",
        APP_VERSION,
        "--extract",
        "unpacked",
    ]);
    assert_eq!(run.code, 0, "{run:?}");
    assert_eq!(
        std::fs::read(env.path("unpacked/model.onnx")).expect("model"),
        model
    );
}

#[test]
fn bundle_made_by_hand_with_tar_zstd_and_openssl_verifies() {
    if !tools(&["tar", "zstd", "openssl", "sha256sum"]) {
        return;
    }
    let env = Env::new();
    let dir = env.dir.path();
    let sh = |script: &str| {
        let mut c = Command::new("sh");
        c.current_dir(dir).args(["-e", "-c", script]);
        String::from_utf8(run_tool(c)).expect("text")
    };
    // A key made by openssl, not by ampoule.
    sh("openssl genpkey -algorithm ed25519 -out hand.secret.pem
        openssl pkey -in hand.secret.pem -pubout -out hand.public.pem");
    // The payload: an inner ustar of model then labels, zstd-compressed by the command.
    std::fs::create_dir(env.path("files")).expect("mkdir");
    let model = model_bytes(70 * 1024);
    std::fs::write(env.path("files/model.onnx"), &model).expect("write");
    std::fs::write(env.path("files/labels.txt"), LABELS).expect("write");
    sh(
        "tar --format=ustar -b1 -C files -cf payload.tar model.onnx labels.txt
        zstd -q -19 payload.tar -o payload.tar.zst",
    );
    let digest = |path: &str| sh(&format!("sha256sum {path}"))[..64].to_string();
    let size = |path: &str| std::fs::metadata(env.path(path)).expect("file").len();
    // The manifest, written by hand as one compact line: any exact bytes may be signed.
    let manifest = format!(
        "{{\"format\":1,\"name\":\"trailcam-species\",\"version\":\"3.0.0\",\
         \"created\":\"2026-12-01T08:00:00Z\",\"requires_app\":\">=2.0.0\",\
         \"payload\":{{\"compression\":\"zstd\",\"size\":{},\"sha256\":\"{}\"}},\
         \"files\":[{{\"path\":\"model.onnx\",\"role\":\"model\",\"size\":{},\"sha256\":\"{}\"}},\
         {{\"path\":\"labels.txt\",\"role\":\"labels\",\"size\":{},\"sha256\":\"{}\"}}],\
         \"label_count\":6}}",
        size("payload.tar.zst"),
        digest("payload.tar.zst"),
        size("files/model.onnx"),
        digest("files/model.onnx"),
        size("files/labels.txt"),
        digest("files/labels.txt"),
    );
    std::fs::create_dir(env.path("outer")).expect("mkdir");
    env.write("outer/manifest.json", manifest.as_bytes());
    let mut signed = MANIFEST_CONTEXT.to_vec();
    signed.extend_from_slice(manifest.as_bytes());
    env.write("signed.bin", &signed);
    sh("openssl pkeyutl -sign -inkey hand.secret.pem -rawin -in signed.bin -out sig.bin");
    let signatures = format!(
        "{{\"signatures\":[{{\"key_id\":\"{}\",\"signature\":\"{}\"}}]}}\n",
        openssl_key_id(dir, "hand.public.pem"),
        hex::encode(env.read("sig.bin"))
    );
    env.write("outer/signatures.json", signatures.as_bytes());
    sh("cp payload.tar.zst outer/
        tar --format=ustar -b1 -C outer -cf hand.ampoule manifest.json signatures.json payload.tar.zst");

    let run = env.run([
        "verify",
        "hand.ampoule",
        "--trust",
        "hand.public.pem",
        "--app-version",
        APP_VERSION,
        "--extract",
        "unpacked",
    ]);
    assert_eq!(run.code, 0, "{run:?}");
    assert!(
        run.stdout
            .starts_with("OK trailcam-species 3.0.0: signed by "),
        "{}",
        run.stdout
    );
    assert_eq!(
        std::fs::read(env.path("unpacked/model.onnx")).expect("model"),
        model
    );
    assert_eq!(
        std::fs::read(env.path("unpacked/labels.txt")).expect("labels"),
        LABELS
    );

    // The same archive in GNU tar's default format is refused, naming the fix.
    sh("tar --format=gnu -C outer -cf gnu.ampoule manifest.json signatures.json payload.tar.zst");
    let run = env.run(["verify", "gnu.ampoule", "--trust", "hand.public.pem"]);
    assert_eq!(
        (run.code, run.stderr.as_str()),
        (
            1,
            format!(
                "ampoule: error: {}\n",
                not_a_bundle(
                    "gnu.ampoule",
                    "it has a header that is not a POSIX ustar header; write bundles with \
                     'tar --format=ustar'"
                )
            )
            .as_str()
        )
    );
}
