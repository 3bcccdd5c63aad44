//! The check every pack test can run on a valid bundle it made: the device's hand-written
//! reader (`ampoule verify --extract`, which reads the outer archive and the payload's inner
//! one) accepts it, and, where GNU tar is on PATH, `tar tf` lists exactly the entries in order
//! (four in format 2, three in format 1), and the decompressed payload lists exactly the model
//! and `labels.txt`. In format 2 the chunk list's records (FORMAT.md: a 4-byte little-endian
//! size, then a SHA-256) are checked here by hand against the payload's bytes.
//!
//! Included by tests/common and tests/tree_common with `#[path]`.
#![allow(dead_code)]

use std::fs::File;
use std::path::Path;
use std::process::Command;

use ampoule_verify::bundle::read_layout;
use ampoule_verify::format::entry;

/// Whether GNU tar is on PATH (`tar --version` names it).
pub fn gnu_tar() -> bool {
    Command::new("tar")
        .arg("--version")
        .output()
        .is_ok_and(|o| o.status.success() && String::from_utf8_lossy(&o.stdout).contains("GNU tar"))
}

/// `tar tf FILE` with GNU tar: the entry names, in order.
pub fn gnu_tar_names(file: &Path) -> Vec<String> {
    let out = Command::new("tar")
        .arg("tf")
        .arg(file)
        .output()
        .expect("tar runs");
    assert!(
        out.status.success(),
        "GNU tar refused {}: {}",
        file.display(),
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout)
        .expect("tar prints UTF-8 names")
        .lines()
        .map(str::to_string)
        .collect()
}

/// Asserts that `bundle` passes the device's reader and GNU tar, with `model_path` as the
/// model's name in the payload. With `trust` (the signer's public key file) the whole device
/// check runs (`ampoule verify --extract`); without it, the device's layout reader.
pub fn assert_readers_accept(bin: &str, bundle: &Path, trust: Option<&Path>, model_path: &str) {
    let scratch = tempfile::tempdir().expect("a temporary directory");
    if let Some(trust) = trust {
        assert_device_accepts(bin, bundle, trust, model_path, scratch.path());
    }
    let mut file = File::open(bundle).expect("open the bundle");
    let len = file.metadata().expect("bundle size").len();
    let layout = read_layout(&mut file, len).expect("the device reads the layout");
    if !gnu_tar() {
        return;
    }
    let expected: &[&str] = match layout.chunks {
        Some(_) => &entry::OUTER,
        None => &entry::OUTER_FORMAT_1,
    };
    assert_eq!(
        gnu_tar_names(bundle),
        expected,
        "GNU tar's listing of {}",
        bundle.display()
    );
    // The payload's inner archive, decompressed, for GNU tar too.
    let bytes = std::fs::read(bundle).expect("read the bundle");
    let start = usize::try_from(layout.payload_offset).expect("fits");
    let end = start + usize::try_from(layout.payload_len).expect("fits");
    if let Some(list) = &layout.chunks {
        let mut at = start;
        for record in list.chunks(36) {
            let size = u32::from_le_bytes(record[..4].try_into().expect("a whole record"));
            let chunk = &bytes[at..at + size as usize];
            assert_eq!(
                ampoule_verify::Digest::of(chunk).as_bytes()[..],
                record[4..],
                "a chunk's digest"
            );
            at += size as usize;
        }
        assert_eq!(at, end, "the chunks cover the payload exactly");
    }
    let inner = zstd::decode_all(&bytes[start..end]).expect("the payload decompresses");
    let inner_path = scratch.path().join("payload.tar");
    std::fs::write(&inner_path, inner).expect("write the inner archive");
    assert_eq!(
        gnu_tar_names(&inner_path),
        [model_path, entry::LABELS],
        "GNU tar's listing of the payload of {}",
        bundle.display()
    );
}

/// `ampoule verify --trust TRUST --extract` accepts `bundle` and unpacks model and labels.
fn assert_device_accepts(bin: &str, bundle: &Path, trust: &Path, model_path: &str, scratch: &Path) {
    let extract = scratch.join("extracted");
    let out = Command::new(bin)
        .arg("verify")
        .arg(bundle)
        .arg("--trust")
        .arg(trust)
        .arg("--quiet")
        .arg("--extract")
        .arg(&extract)
        .output()
        .expect("the ampoule binary runs");
    assert!(
        out.status.success(),
        "the device's reader (ampoule verify --extract) refused {}: {}",
        bundle.display(),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(extract.join(model_path).is_file() && extract.join(entry::LABELS).is_file());
}
