//! Helpers the integration tests share: a fresh directory per test with a signing key and a
//! small invented model, a runner for the real `ampoule` binary, and the pieces to lay out
//! bundles by hand (so a hostile bundle can pass every check before the one it targets).
//!
//! Each test file uses only some of these, hence the `dead_code` allowance.
#![allow(dead_code)]

#[path = "../bundle_check/mod.rs"]
pub mod bundle_check;

use std::ffi::OsStr;
use std::fs;
use std::path::{Path, PathBuf};
use std::process::Command;

use ampoule::release::keyfile;
use ampoule::release::pack::{PackSpec, pack};
use ampoule_verify::bundle::write_bundle;
use ampoule_verify::format::{context, entry, signed_bytes};
use ampoule_verify::manifest::{Compression, FileEntry, Payload, Role};
use ampoule_verify::signature::{SignatureEntry, Signatures};
use ampoule_verify::{Digest, KeyId, Manifest, PublicKey, Timestamp, tar};
use ed25519_dalek::{Signer, SigningKey};
use semver::{Version, VersionReq};
use tempfile::TempDir;

/// The creation time every fixture uses (`date -u -d @1796112000` prints this instant).
pub const CREATED: &str = "2026-12-01T08:00:00Z";
pub const CREATED_UNIX: u64 = 1_796_112_000;
/// The bundle name of the invented trail-camera model line.
pub const NAME: &str = "trailcam-species";
/// The app-version range fixtures require, and an app version inside it.
pub const REQUIRES_APP: &str = ">=2.0.0, <3.0.0";
pub const APP_VERSION: &str = "2.1.0";
/// The label list as the fixtures store it (invented classes of a forest trail camera).
pub const LABELS: &[u8] = b"fox\nroe deer\nwild boar\nbadger\nhare\nempty frame\n";
pub const LABEL_COUNT: u32 = 6;
/// File names inside each test's directory.
pub const SECRET: &str = "release.secret.pem";
pub const PUBLIC: &str = "release.public.pem";
pub const MODEL: &str = "species.onnx";
pub const LABELS_FILE: &str = "labels.txt";

/// A signing key made from a fixed seed, so failures are reproducible. `seed` picks which.
pub fn signing_key(seed: u8) -> SigningKey {
    SigningKey::from_bytes(&[seed; 32])
}

pub fn key_id(key: &SigningKey) -> KeyId {
    KeyId::of_raw_key(key.verifying_key().as_bytes())
}

/// Invented model bytes: a xorshift stream, so zstd has real work to do but the bytes are
/// the same on every run.
pub fn model_bytes(len: usize) -> Vec<u8> {
    let mut state: u64 = 0x9e37_79b9_7f4a_7c15;
    (0..len)
        .map(|_| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            // Only a few distinct values, like quantized weights: compressible, not trivial.
            (state % 16) as u8
        })
        .collect()
}

/// What a run of the binary gave.
#[derive(Debug)]
pub struct Run {
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
}

/// A fresh temporary directory holding a key pair, a model and a label list.
pub struct Env {
    pub dir: TempDir,
    pub key: SigningKey,
}

impl Env {
    pub fn new() -> Env {
        let dir = tempfile::tempdir().expect("a temporary directory");
        let key = signing_key(7);
        let env = Env { dir, key };
        keyfile::write_secret_key(&env.path(SECRET), &env.key, None).expect("secret key");
        let public = PublicKey::from_verifying_key(&env.key.verifying_key()).expect("not weak");
        keyfile::write_public_key(&env.path(PUBLIC), &public).expect("public key");
        // A real (tiny) ONNX classifier with one output per label, so pack's model checks
        // pass: 3 x 8 x 8 inputs, 16 hidden units, 6 classes.
        ampoule::release::synth::write_onnx_classifier(
            &env.path(MODEL),
            8,
            16,
            u64::from(LABEL_COUNT),
            1,
        )
        .expect("fixture model");
        env.write(LABELS_FILE, LABELS);
        env
    }

    pub fn path(&self, name: &str) -> PathBuf {
        self.dir.path().join(name)
    }

    pub fn write(&self, name: &str, bytes: &[u8]) -> PathBuf {
        let path = self.path(name);
        fs::write(&path, bytes).expect("write into the temp dir");
        path
    }

    pub fn read(&self, name: &str) -> Vec<u8> {
        fs::read(self.path(name)).expect("read from the temp dir")
    }

    pub fn key_id(&self) -> KeyId {
        key_id(&self.key)
    }

    /// Runs `ampoule ARGS` in the test's directory, with no SOURCE_DATE_EPOCH from outside.
    pub fn run<I, S>(&self, args: I) -> Run
    where
        I: IntoIterator<Item = S>,
        S: AsRef<OsStr>,
    {
        self.run_env(args, &[])
    }

    pub fn run_env<I, S>(&self, args: I, vars: &[(&str, &str)]) -> Run
    where
        I: IntoIterator<Item = S>,
        S: AsRef<OsStr>,
    {
        let mut command = Command::new(env!("CARGO_BIN_EXE_ampoule"));
        command
            .args(args)
            .current_dir(self.dir.path())
            .env_remove("SOURCE_DATE_EPOCH");
        for (k, v) in vars {
            command.env(k, v);
        }
        let out = command.output().expect("the ampoule binary runs");
        Run {
            code: out.status.code().expect("exited, not killed by a signal"),
            stdout: String::from_utf8(out.stdout).expect("stdout is UTF-8"),
            stderr: String::from_utf8(out.stderr).expect("stderr is UTF-8"),
        }
    }

    /// Packs the fixture model in-process with the real writer, signed by the test key.
    pub fn pack(&self, version: &str, out: &str) -> PathBuf {
        let labels = ampoule_verify::labels::parse_labels(LABELS).expect("fixture labels");
        let spec = PackSpec {
            model: self.path(MODEL),
            model_path: "model.onnx".into(),
            labels,
            name: NAME.into(),
            version: Version::parse(version).expect("a SemVer version"),
            requires_app: VersionReq::parse(REQUIRES_APP).expect("a SemVer requirement"),
            created: CREATED.parse().expect("an RFC 3339 time"),
            model_signature: ampoule_verify::model::read_model_signature_file(&self.path(MODEL))
                .expect("the fixture model reads"),
            metadata: None,
        };
        let out = self.path(out);
        pack(
            &spec,
            Some(&self.key),
            &out,
            &indicatif::ProgressBar::hidden(),
        )
        .expect("pack");
        bundle_check::assert_readers_accept(
            env!("CARGO_BIN_EXE_ampoule"),
            &out,
            Some(&self.path(PUBLIC)),
            "model.onnx",
        );
        out
    }

    /// Every path under the directory (hidden ones too), sorted, with file sizes: what a
    /// refused command must leave exactly as it found.
    pub fn listing(&self) -> Vec<String> {
        fn walk(root: &Path, dir: &Path, out: &mut Vec<String>) {
            for e in fs::read_dir(dir).expect("readable dir") {
                let e = e.expect("dir entry");
                let path = e.path();
                let meta = fs::symlink_metadata(&path).expect("metadata");
                let rel = path.strip_prefix(root).expect("under root").display();
                out.push(format!("{rel} {}", meta.len()));
                if meta.is_dir() {
                    walk(root, &path, out);
                }
            }
        }
        let mut out = Vec::new();
        walk(self.dir.path(), self.dir.path(), &mut out);
        out.sort();
        out
    }

    /// Writes `bundle` and runs `ampoule verify` on it with `--extract`, asserting exit code
    /// 1, exactly `expected` as the error, and that the directory is unchanged afterwards
    /// (no extract directory, no staging `.partial` directory beside it).
    pub fn assert_refused(&self, bundle: &[u8], extra: &[&str], expected: &str) {
        self.write("hostile.ampoule", bundle);
        let before = self.listing();
        let mut args = vec!["verify", "hostile.ampoule", "--trust", PUBLIC];
        if !extra.contains(&"--app-version") {
            args.extend_from_slice(&["--app-version", APP_VERSION]);
        }
        args.extend_from_slice(&["--extract", "unpacked"]);
        args.extend_from_slice(extra);
        let run = self.run(&args);
        assert_eq!(
            (run.code, run.stderr.as_str(), run.stdout.as_str()),
            (1, format!("ampoule: error: {expected}\n").as_str(), ""),
            "ampoule {args:?}"
        );
        assert_eq!(
            self.listing(),
            before,
            "a refused verify left something behind"
        );
    }

    /// [`Env::assert_refused`] for a file whose layout is not a bundle's: since issue 12 the
    /// message names the file as not a valid bundle, gives `reason` (which quotes none of the
    /// file's bytes), and says what to check.
    pub fn assert_not_a_bundle(&self, bundle: &[u8], extra: &[&str], reason: &str) {
        self.assert_refused(bundle, extra, &not_a_bundle("hostile.ampoule", reason));
    }

    /// [`Env::assert_not_a_bundle`], and the library's own refusal of the same bytes,
    /// exactly: the command line names only the rule (the file's bytes are not shown), and
    /// this keeps the library's message, which names the entry and what it held, pinned.
    pub fn assert_not_a_bundle_because(&self, bundle: &[u8], reason: &str, library: &str) {
        self.assert_not_a_bundle(bundle, &[], reason);
        let path = self.write("library.ampoule", bundle);
        let trusted: ampoule_verify::TrustedKeys =
            [PublicKey::from_verifying_key(&self.key.verifying_key()).expect("not weak")]
                .into_iter()
                .collect();
        let verifier =
            ampoule_verify::Verifier::new(trusted, Version::parse(APP_VERSION).expect("a version"))
                .expect("a verifier");
        let err = verifier
            .verify_path(&path)
            .and_then(|mut v| v.check_contents())
            .expect_err("the library refuses it too");
        assert_eq!(err.kind(), ampoule_verify::ErrorKind::Malformed);
        assert_eq!(err.to_string(), library);
        fs::remove_file(path).expect("remove");
    }

    /// Like [`Env::assert_refused`] for a bundle that must pass.
    pub fn assert_accepted(&self, bundle: &[u8]) -> Run {
        self.write("candidate.ampoule", bundle);
        let run = self.run([
            "verify",
            "candidate.ampoule",
            "--trust",
            PUBLIC,
            "--app-version",
            APP_VERSION,
        ]);
        assert_eq!(run.code, 0, "{run:?}");
        run
    }
}

/// One regular file of an inner or outer tar, laid out by the library's own ustar writer.
pub fn tar_entry(name: &str, data: &[u8]) -> Vec<u8> {
    tar_entry_with_header(tar::header(name, data.len() as u64, CREATED_UNIX), data)
}

pub fn tar_entry_with_header(header: [u8; 512], data: &[u8]) -> Vec<u8> {
    let mut out = header.to_vec();
    out.extend_from_slice(data);
    out.resize(out.len() + tar::padding(data.len() as u64) as usize, 0);
    out
}

/// A tar of these entries followed by the end-of-archive marker.
pub fn tar_of(entries: &[Vec<u8>]) -> Vec<u8> {
    let mut out = entries.concat();
    out.extend_from_slice(&tar::END_OF_ARCHIVE);
    out
}

/// Sets a header's type flag and link name and recomputes its checksum the way POSIX
/// describes it (the sum of all bytes with the checksum field read as eight spaces).
pub fn retyped(mut header: [u8; 512], flag: u8, link: &str) -> [u8; 512] {
    header[156] = flag;
    header[157..157 + link.len()].copy_from_slice(link.as_bytes());
    fix_checksum(&mut header);
    header
}

pub fn header_sum(header: &[u8; 512]) -> u32 {
    header
        .iter()
        .enumerate()
        .map(|(i, &b)| {
            if (148..156).contains(&i) {
                32
            } else {
                u32::from(b)
            }
        })
        .sum()
}

pub fn fix_checksum(header: &mut [u8; 512]) {
    let sum = header_sum(header);
    header[148..156].copy_from_slice(format!("{sum:06o}\0 ").as_bytes());
}

/// zstd level 3 with default parameters, as a plain single frame.
pub fn zstd(data: &[u8]) -> Vec<u8> {
    zstd::encode_all(data, 3).expect("zstd compresses in memory")
}

/// The parts of a bundle before they are laid out: the manifest to sign, the payload and, in
/// format 2, the chunk list.
#[derive(Clone)]
pub struct Draft {
    pub model: Vec<u8>,
    pub labels: Vec<u8>,
    pub manifest: Manifest,
    pub payload: Vec<u8>,
    pub chunks: Option<Vec<u8>>,
}

impl Draft {
    /// A correct draft: the fixture model and labels in a standard inner tar.
    pub fn good() -> Draft {
        let model = model_bytes(20 * 1024);
        let inner = tar_of(&[
            tar_entry("model.onnx", &model),
            tar_entry(entry::LABELS, LABELS),
        ]);
        Draft::with_payload(model, LABELS.to_vec(), zstd(&inner))
    }

    /// A correct format 2 draft: the fixture model (grown to make several chunks) and labels,
    /// the inner tar in chunks of 64 KiB, each a zstd frame bound by the chunk list.
    pub fn chunked() -> Draft {
        let model = model_bytes(200 * 1024);
        let inner = tar_of(&[
            tar_entry("model.onnx", &model),
            tar_entry(entry::LABELS, LABELS),
        ]);
        Draft::with_chunks(model, LABELS.to_vec(), &inner, CHUNK_BYTES)
    }

    /// A format 2 draft whose manifest declares `model` and `labels` and binds `inner` cut
    /// into chunks of `chunk_bytes`, compressed by the library's writer.
    pub fn with_chunks(model: Vec<u8>, labels: Vec<u8>, inner: &[u8], chunk_bytes: u32) -> Draft {
        let (payload, chunks) = ampoule_verify::bundle::chunked_payload(inner, chunk_bytes, 3)
            .expect("zstd compresses in memory");
        let mut draft = Draft::with_payload(model, labels, payload);
        draft.manifest.format = ampoule_verify::format::FORMAT_VERSION;
        draft.manifest.payload.sha256 = None;
        draft.manifest.payload.chunk_bytes = Some(chunk_bytes);
        draft.manifest.payload.chunks_sha256 = Some(Digest::of(&chunks));
        draft.chunks = Some(chunks);
        draft
    }

    /// A format 1 draft whose manifest declares `model` and `labels` and binds `payload` as it
    /// is.
    pub fn with_payload(model: Vec<u8>, labels: Vec<u8>, payload: Vec<u8>) -> Draft {
        let manifest = Manifest {
            format: 1,
            name: NAME.into(),
            version: Version::new(1, 0, 0),
            created: Timestamp::from_unix(CREATED_UNIX).expect("in range"),
            requires_app: VersionReq::parse(REQUIRES_APP).expect("a requirement"),
            payload: Payload {
                compression: Compression::Zstd,
                size: payload.len() as u64,
                sha256: Some(Digest::of(&payload)),
                chunk_bytes: None,
                chunks_sha256: None,
            },
            files: vec![
                FileEntry {
                    path: "model.onnx".into(),
                    role: Role::Model,
                    size: model.len() as u64,
                    sha256: Digest::of(&model),
                },
                FileEntry {
                    path: entry::LABELS.into(),
                    role: Role::Labels,
                    size: labels.len() as u64,
                    sha256: Digest::of(&labels),
                },
            ],
            label_count: LABEL_COUNT,
            model: None,
            metadata: None,
        };
        Draft {
            model,
            labels,
            manifest,
            payload,
            chunks: None,
        }
    }

    /// The bundle, with the manifest written by the library and signed by `key`.
    pub fn signed(&self, key: &SigningKey) -> Vec<u8> {
        let manifest = self.manifest.to_json();
        assemble_with(
            &manifest,
            &signatures(&[key], &manifest),
            self.chunks.as_deref(),
            &self.payload,
        )
    }
}

/// The chunk size of [`Draft::chunked`]: 64 KiB, the smallest the format allows.
pub const CHUNK_BYTES: u32 = 64 * 1024;

/// A signatures document with one signature per key over `manifest`, made the documented
/// way: Ed25519 over the manifest context followed by the manifest's exact bytes.
pub fn signatures(keys: &[&SigningKey], manifest: &[u8]) -> Vec<u8> {
    let mut doc = Signatures::default();
    for key in keys {
        doc.insert(SignatureEntry {
            key_id: key_id(key),
            signature: key
                .sign(&signed_bytes(context::MANIFEST, manifest))
                .to_bytes(),
        });
    }
    doc.to_json()
}

/// Lays out a format 1 bundle with the library's writer.
pub fn assemble(manifest: &[u8], signatures: &[u8], payload: &[u8]) -> Vec<u8> {
    assemble_with(manifest, signatures, None, payload)
}

/// Lays out a bundle with the library's writer, with a chunk list when given (format 2).
pub fn assemble_with(
    manifest: &[u8],
    signatures: &[u8],
    chunks: Option<&[u8]>,
    payload: &[u8],
) -> Vec<u8> {
    let mut out = Vec::new();
    write_bundle(
        &mut out,
        CREATED_UNIX,
        (manifest, signatures, chunks),
        &mut &payload[..],
        payload.len() as u64,
    )
    .expect("writing into memory");
    out
}

/// A general-purpose tool (openssl, GNU tar, zstd), or `None` with the reason printed when it
/// is not installed.
pub fn tool(name: &str) -> Option<Command> {
    match Command::new(name).arg("--version").output() {
        Ok(_) => Some(Command::new(name)),
        Err(e) => {
            eprintln!("skipped: the {name} command is not available ({e}); interop not checked");
            None
        }
    }
}

/// Runs a tool, asserting success, and returns its stdout.
pub fn run_tool(mut command: Command) -> Vec<u8> {
    let out = command.output().expect("the tool runs");
    assert!(
        out.status.success(),
        "{command:?} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    out.stdout
}

/// The refusal of `file`, given as a bundle, whose layout is not a bundle's (issue 12).
pub fn not_a_bundle(file: &str, reason: &str) -> String {
    format!(
        "{file} is not a valid bundle: {reason}; check that it names a bundle made by \
         'ampoule pack' and that it was copied whole"
    )
}
