//! The golden bundles (issue 12 item 7, issue 13): fixed inputs under tests/data/golden/ (an
//! invented 768-byte "model" and the trail-camera labels), signed with the published demo-only
//! key in keys-example/, packed at a fixed time. Pack must write exactly the committed format 2
//! bundle, whose SHA-256 is pinned below; the device's reader and GNU tar (where installed) must
//! accept it. The format 1 golden bundle, which pack wrote before issue 13, stays committed
//! with its own pinned SHA-256: today's reader must still accept and unpack it. Both predate
//! signed metadata (issue 11) and are packed without it, so the format 1 bytes also prove that
//! a bundle without metadata is byte for byte what it was.

#[path = "bundle_check/mod.rs"]
mod bundle_check;

use std::os::unix::fs::PermissionsExt;
use std::path::{Path, PathBuf};
use std::process::Command;

use ampoule_verify::Digest;
use ampoule_verify::format::entry;

const BIN: &str = env!("CARGO_BIN_EXE_ampoule");

/// The SHA-256 of tests/data/golden/trailcam-species-1.0.0-format2.ampoule, computed once
/// with `sha256sum` when the golden bundle was made (issue 13). It changes only together with
/// a CHANGELOG line that says why the bundle's bytes changed.
const GOLDEN_SHA256: &str = "a0ee79b594bd57319ea2b00f89d3ac45b05811a0ce53493e8712e8a31c3c5248";

/// The SHA-256 of tests/data/golden/trailcam-species-1.0.0.ampoule, the format 1 golden
/// bundle pack wrote from issue 12 until issue 13; it never changes.
const GOLDEN_FORMAT_1_SHA256: &str =
    "3c339fa70cf73f942d08f548979130fb11028a0e03fea3d74e6fb273145e6c04";

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn golden(name: &str) -> PathBuf {
    root().join("tests/data/golden").join(name)
}

/// Packs the golden inputs into `dir/out.ampoule` with the real binary.
fn pack_golden(dir: &Path) -> PathBuf {
    // The key file is checked for owner-only permissions; a checkout gives 0644.
    let key = dir.join("demo.secret.pem");
    std::fs::copy(
        root().join("keys-example/DEMO-ONLY-release.secret.pem"),
        &key,
    )
    .expect("copy the demo key");
    std::fs::set_permissions(&key, std::fs::Permissions::from_mode(0o600)).expect("chmod 600");
    let out = dir.join("out.ampoule");
    let run = Command::new(BIN)
        .arg("pack")
        .arg("--quiet")
        .arg("--model")
        .arg(golden("species.bin"))
        .arg("--labels")
        .arg(golden("labels.txt"))
        .args(["--name", "trailcam-species", "--version", "1.0.0"])
        .args(["--requires-app", ">=2.0.0, <3.0.0"])
        .args(["--created", "2026-12-01T08:00:00Z"])
        .arg("--key")
        .arg(&key)
        .arg("-o")
        .arg(&out)
        .env_remove("SOURCE_DATE_EPOCH")
        .output()
        .expect("the ampoule binary runs");
    assert!(
        run.status.success(),
        "pack failed: {}",
        String::from_utf8_lossy(&run.stderr)
    );
    out
}

#[test]
fn issue12_the_golden_bundle_is_byte_for_byte_what_pack_writes() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let packed = std::fs::read(pack_golden(dir.path())).expect("read the packed bundle");
    let committed_path = golden("trailcam-species-1.0.0-format2.ampoule");
    let committed = std::fs::read(&committed_path).expect("read the golden bundle");
    assert_eq!(
        Digest::of(&packed).to_string(),
        GOLDEN_SHA256,
        "pack no longer writes the golden bundle's bytes"
    );
    assert!(
        packed == committed,
        "tests/data/golden/trailcam-species-1.0.0-format2.ampoule is not what pack writes"
    );

    // The device's reader, in full, and GNU tar on the outer and inner archives.
    bundle_check::assert_readers_accept(
        BIN,
        &committed_path,
        Some(&root().join("keys-example/DEMO-ONLY-release.public.pem")),
        "model.bin",
    );
    if !bundle_check::gnu_tar() {
        return;
    }
    // `tar tvf`: exactly four regular files, mode 0644, owner 0/0, stamped 08:00 that day.
    assert_listing(&committed_path, &entry::OUTER);
}

#[test]
fn issue13_the_format_1_golden_bundle_still_verifies_and_unpacks() {
    let path = golden("trailcam-species-1.0.0.ampoule");
    let bytes = std::fs::read(&path).expect("read the format 1 golden bundle");
    assert_eq!(Digest::of(&bytes).to_string(), GOLDEN_FORMAT_1_SHA256);
    // The device's reader in full (`ampoule verify --extract`), and GNU tar.
    bundle_check::assert_readers_accept(
        BIN,
        &path,
        Some(&root().join("keys-example/DEMO-ONLY-release.public.pem")),
        "model.bin",
    );
    let manifest = ampoule_verify::bundle::Unverified::open(&path)
        .expect("the layout reads")
        .manifest;
    assert_eq!(manifest.format, 1);
    if bundle_check::gnu_tar() {
        assert_listing(&path, &entry::OUTER_FORMAT_1);
    }
}

/// `tar tvf`: exactly `names`, regular files, mode 0644, owner 0/0, stamped 08:00 that day.
fn assert_listing(bundle: &Path, names: &[&str]) {
    let out = Command::new("tar")
        .arg("tvf")
        .arg(bundle)
        .env("TZ", "UTC")
        .output()
        .expect("tar runs");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let listing = String::from_utf8(out.stdout).expect("UTF-8");
    let lines: Vec<&str> = listing.lines().collect();
    assert_eq!(lines.len(), names.len(), "tar tvf listed:\n{listing}");
    for (line, name) in lines.iter().zip(names) {
        assert!(
            line.starts_with("-rw-r--r-- 0/0 ")
                && line.ends_with(&format!(" 2026-12-01 08:00 {name}")),
            "tar tvf line {line:?} for {name}"
        );
    }
}
