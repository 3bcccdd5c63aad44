// (The release-tree tests share these; tests/common holds the bundle-level helpers.)
//! Helpers shared by the integration tests: run the binary, make keys and bundles of an
//! invented trail-camera model, publish them into a release tree.
#![allow(dead_code)]

#[path = "../bundle_check/mod.rs"]
pub mod bundle_check;

use std::net::{TcpListener, TcpStream};
use std::path::Path;
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

use ampoule_verify::feed::{Feed, SignedFeed};
use ampoule_verify::signed::Signers;
use ampoule_verify::{
    App, Digest, FeedVerifier, PublicKey, Timestamp, Trust, TrustedKeys, Version,
};

pub const BIN: &str = env!("CARGO_BIN_EXE_ampoule");

pub fn run(dir: &Path, args: &[&str]) -> Output {
    Command::new(BIN)
        .args(args)
        .current_dir(dir)
        .output()
        .expect("the ampoule binary runs")
}

pub fn ok(dir: &Path, args: &[&str]) -> String {
    let out = run(dir, args);
    assert!(
        out.status.success(),
        "ampoule {args:?} failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

pub fn refused(dir: &Path, args: &[&str]) -> (i32, String) {
    let out = run(dir, args);
    assert!(!out.status.success(), "ampoule {args:?} succeeded");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stderr).trim_end().to_string(),
    )
}

/// A temp dir with a feed/release key and the inputs of a small trail-camera model.
pub fn setup() -> tempfile::TempDir {
    let dir = tempfile::tempdir().expect("tempdir");
    let d = dir.path();
    ok(d, &["keygen", "--secret", "k.pem", "--public", "k.pub"]);
    std::fs::write(
        d.join("labels.txt"),
        "fox\nroe deer\nwild boar\nbadger\nhare\nempty frame\n",
    )
    .expect("labels");
    dir
}

/// Packs version `version` of the model line, with model bytes that depend on `variant`.
pub fn pack(d: &Path, version: &str, variant: u8, key: &str) -> String {
    let model = format!("model-{version}-{variant}.bin");
    write_model(d, &model, variant);
    let out = format!("species-{version}-{variant}.ampoule");
    pack_model(d, &model, version, key, &out);
    // The tests name key pairs X.pem and X.pub.
    let public = d.join(format!("{}.pub", key.trim_end_matches(".pem")));
    bundle_check::assert_readers_accept(
        BIN,
        &d.join(&out),
        public.is_file().then_some(public.as_path()),
        "model.bin",
    );
    out
}

/// Packs the model file `model` in `d` as `version` of the trail-camera line, signed with
/// `key`, into `out`.
pub fn pack_model(d: &Path, model: &str, version: &str, key: &str, out: &str) {
    let run = pack_model_with(d, model, version, key, out, &[]);
    assert!(
        run.status.success(),
        "ampoule pack failed: {}",
        String::from_utf8_lossy(&run.stderr)
    );
}

/// [`pack_model`] with `extra` arguments, whatever its outcome.
pub fn pack_model_with(
    d: &Path,
    model: &str,
    version: &str,
    key: &str,
    out: &str,
    extra: &[&str],
) -> Output {
    let mut args = vec![
        "pack",
        "--model",
        model,
        "--labels",
        "labels.txt",
        "--name",
        "trailcam-species",
        "--version",
        version,
        "--requires-app",
        ">=2.0.0, <3.0.0",
        "--created",
        "2026-12-01T08:00:00Z",
        "--key",
        key,
        "-o",
        out,
    ];
    args.extend_from_slice(extra);
    run(d, &args)
}

/// Writes the invented model bytes of `variant` (40,000 bytes) to `d/name`.
pub fn write_model(d: &Path, name: &str, variant: u8) {
    let bytes: Vec<u8> = (0..40_000u32)
        .map(|i| (i.wrapping_mul(31) as u8) ^ variant)
        .collect();
    std::fs::write(d.join(name), bytes).expect("model");
}

/// Packs `version` with a 300,000-byte model that does not compress (a linear congruential
/// sequence, the constants of Numerical Recipes' `ranqd1`, from memory), so the bundle is
/// larger than its head (274 KiB) and the session asks for the head first.
pub fn pack_large(d: &Path, version: &str) -> String {
    let model = format!("large-{version}.bin");
    std::fs::write(d.join(&model), incompressible(300_000, 0x2545_f491)).expect("model");
    let out = format!("large-{version}.ampoule");
    pack_model(d, &model, version, "k.pem", &out);
    out
}

/// `len` bytes that do not compress: the high bytes of a linear congruential sequence
/// started at `seed` (the constants of Numerical Recipes' `ranqd1`, from memory).
pub fn incompressible(len: usize, seed: u32) -> Vec<u8> {
    let mut x = seed;
    (0..len)
        .map(|_| {
            x = x.wrapping_mul(1_664_525).wrapping_add(1_013_904_223);
            (x >> 24) as u8
        })
        .collect()
}

/// Packs `version` with an incompressible model of `len` bytes: a format 2 bundle of about
/// `len / 512 KiB` chunks. Returns the bundle's file name and the model's bytes.
pub fn pack_chunky(d: &Path, version: &str, len: usize) -> (String, Vec<u8>) {
    let bytes = incompressible(len, 0x2545_f491 ^ len as u32);
    let model = format!("chunky-{version}.bin");
    std::fs::write(d.join(&model), &bytes).expect("model");
    let out = format!("chunky-{version}.ampoule");
    pack_model(d, &model, version, "k.pem", &out);
    (out, bytes)
}

/// Re-signs the channel's feed after `change` edits its text, as someone holding the feed key
/// alone could (the ledger entry and tree head stay the genuine ones).
pub fn resign_feed(d: &Path, channel: &str, change: impl Fn(&str) -> String) {
    let path = d.join(format!("tree/feeds/{channel}.json"));
    let signed = ampoule_verify::feed::SignedFeed::from_json(&std::fs::read(&path).expect("feed"))
        .expect("feed");
    let text = change(&signed.feed);
    assert_ne!(text, signed.feed, "the change changed nothing");
    std::fs::write(&path, signed_feed_file(d, "k.pem", text).to_json()).expect("feed");
}

/// Publishes a large 1.0.0 on `stable`, then re-signs the feed (with the feed key alone) so
/// that it states a size of 90 MiB; returns the bundle's real size and the size claimed.
pub fn publish_with_overstated_size(d: &Path) -> (u64, u64) {
    let bundle = pack_large(d, "1.0.0");
    let real = std::fs::metadata(d.join(&bundle)).expect("bundle").len();
    assert!(real > ampoule_verify::format::limit::HEAD_BYTES);
    publish(d, &bundle, "stable", "100");
    let claimed = 90 * 1024 * 1024u64;
    resign_feed(d, "stable", |text| {
        text.replacen(
            &format!("\"size\":{real}"),
            &format!("\"size\":{claimed}"),
            1,
        )
    });
    (real, claimed)
}

pub fn publish(d: &Path, bundle: &str, channel: &str, rollout: &str) -> serde_json::Value {
    let out = ok(
        d,
        &[
            "--json",
            "publish",
            bundle,
            "--tree",
            "tree",
            "--channel",
            channel,
            "--key",
            "k.pem",
            "--rollout",
            rollout,
        ],
    );
    serde_json::from_str(&out).expect("publish --json prints JSON")
}

pub fn keys(d: &Path) -> TrustedKeys {
    let pem = std::fs::read_to_string(d.join("k.pub")).expect("public key");
    [PublicKey::from_pem(&pem).expect("key")]
        .into_iter()
        .collect()
}

/// The camera app of the library-level tests: the test key (`k.pub`) pinned for every role,
/// app version 2.3.0, device id `camera-7`.
pub fn pinned_app(d: &Path) -> App {
    pinned_app_own_id(d)
        .device_id("camera-7")
        .expect("device id")
}

/// [`pinned_app`] without a device id: the store makes and keeps its own.
pub fn pinned_app_own_id(d: &Path) -> App {
    pinned_app_version(d, Version::new(2, 3, 0))
}

/// [`pinned_app_own_id`] as app version `version`.
pub fn pinned_app_version(d: &Path, version: Version) -> App {
    let keys = keys(d);
    let trust = Trust::pinned(
        Signers::new(keys.clone(), 1).expect("bundle signers"),
        Signers::new(keys.clone(), 1).expect("feed signers"),
        Signers::new(keys, 1).expect("tree-head signers"),
    );
    // Tests in one binary start `ampoule` processes while others hold a store's lock; a started
    // process briefly holds a copy of every open file, so a test device waits a little.
    App::new(trust, version).wait_for_lock(std::time::Duration::from_secs(5))
}

/// A feed file whose text is `text`, signed by the secret key in `d/<key>` alone: for tests
/// that change what a genuine publisher would never sign.
pub fn signed_feed_file(d: &Path, key: &str, text: String) -> SignedFeed {
    let key = ampoule::release::keyfile::read_secret_key(
        &d.join(key),
        &ampoule::release::keyfile::PassphraseSource::None,
    )
    .expect("the test key");
    SignedFeed {
        signatures: vec![ampoule_verify::signature::SignatureEntry {
            key_id: ampoule_verify::KeyId::of_raw_key(key.verifying_key().as_bytes()),
            signature: ed25519_dalek::Signer::sign(
                &key,
                &ampoule_verify::format::signed_bytes(
                    ampoule_verify::format::context::FEED,
                    text.as_bytes(),
                ),
            )
            .to_bytes(),
        }],
        feed: text,
    }
}

pub fn read_feed(d: &Path, channel: &str) -> Feed {
    let bytes = std::fs::read(d.join(format!("tree/feeds/{channel}.json"))).expect("feed");
    let verified = FeedVerifier::new(keys(d), channel)
        .expect("verifier")
        .verify(&bytes, Timestamp::now())
        .expect("the published feed verifies");
    let signed = SignedFeed::from_json(&bytes).expect("envelope");
    assert_eq!(verified.digest(), Digest::of(signed.feed.as_bytes()));
    verified.feed().clone()
}

/// `ampoule serve` of `d/<tree>` on a free port of 127.0.0.1, stopped when dropped.
pub struct Served {
    pub child: std::process::Child,
    /// `127.0.0.1:PORT`, as the server's first line reports it.
    pub addr: String,
}

impl Drop for Served {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

pub fn serve_tree(d: &Path, tree: &str) -> Served {
    use std::io::{BufRead, BufReader};
    let mut child = Command::new(BIN)
        .args(["serve", "--tree", tree, "--addr", "127.0.0.1:0"])
        .current_dir(d)
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("serve starts");
    let mut line = String::new();
    BufReader::new(child.stdout.take().expect("stdout"))
        .read_line(&mut line)
        .expect("serve prints its address");
    let addr = line
        .trim_end()
        .rsplit_once(" at http://")
        .map(|(_, a)| a.trim_end_matches('/').to_string())
        .unwrap_or_else(|| panic!("unexpected first line {line:?}"));
    Served { child, addr }
}

/// The newest trust set a store keeps: the last of `trust-chain.json`, as stored; `None` when
/// the store keeps none.
pub fn newest_stored_trust_set(store: &Path) -> Option<Vec<u8>> {
    let bytes = std::fs::read(store.join("trust-chain.json")).ok()?;
    let chain: serde_json::Value = serde_json::from_slice(&bytes).expect("chain JSON");
    chain["sets"]
        .as_array()
        .and_then(|sets| sets.last())
        .and_then(|set| set.as_str())
        .map(|text| text.as_bytes().to_vec())
}

/// Where Debian's nginx package puts the server (`.ci/run` installs it).
pub const NGINX: &str = "/usr/sbin/nginx";

/// nginx serving a release tree, stopped when dropped.
pub struct Nginx {
    pub child: std::process::Child,
    /// `http://127.0.0.1:PORT`
    pub base: String,
}

impl Drop for Nginx {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// Starts nginx in the foreground, single process (`master_process off`, so it never switches
/// to another user that could not read the temp dir), serving `root` on a free port.
pub fn start_nginx(work: &Path, root: &Path) -> Nginx {
    let port = TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .expect("a free port")
        .port();
    let prefix = work.join("nginx");
    std::fs::create_dir_all(prefix.join("tmp")).expect("nginx dirs");
    let p = prefix.display();
    let conf = format!(
        "daemon off;\nmaster_process off;\nworker_processes 1;\npid {p}/nginx.pid;\n\
         error_log {p}/error.log;\nevents {{ worker_connections 512; }}\n\
         http {{\n  access_log {p}/access.log;\n  client_body_temp_path {p}/tmp/body;\n\
         proxy_temp_path {p}/tmp/proxy;\n  fastcgi_temp_path {p}/tmp/fastcgi;\n\
         uwsgi_temp_path {p}/tmp/uwsgi;\n  scgi_temp_path {p}/tmp/scgi;\n\
         types {{ application/json json; application/octet-stream ampoule; }}\n\
         server {{\n    listen 127.0.0.1:{port};\n    root {};\n    location / {{ }}\n  }}\n}}\n",
        root.display()
    );
    let conf_path = prefix.join("nginx.conf");
    std::fs::write(&conf_path, conf).expect("nginx.conf");
    let child = Command::new(NGINX)
        .arg("-p")
        .arg(&prefix)
        .arg("-e")
        .arg(prefix.join("error.log"))
        .arg("-c")
        .arg(&conf_path)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .expect("nginx starts");
    let mut nginx = Nginx {
        child,
        base: format!("http://127.0.0.1:{port}"),
    };
    let started = Instant::now();
    while TcpStream::connect(("127.0.0.1", port)).is_err() {
        let exited = nginx.child.try_wait().ok().flatten();
        if exited.is_some() || started.elapsed() > Duration::from_secs(10) {
            let log = std::fs::read_to_string(prefix.join("error.log")).unwrap_or_default();
            panic!("nginx did not start ({exited:?}): {log}");
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    nginx
}
