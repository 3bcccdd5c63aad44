//! A library built without `fetch` still exports `ampoule_update` (one header fits both
//! builds), and it says what is missing: `AMPOULE_UNSUPPORTED`, outcome `FAILED`, a message
//! naming the feature and the step-by-step update. `.ci/run` runs this crate's tests alone
//! (`cargo test -p ampoule-verify-ffi`), where `fetch` is off; in the workspace's run the
//! C test's build turns it on and this file is empty.
#![cfg(not(feature = "fetch"))]
// Calling the C interface from Rust takes raw pointers, as a C caller passes them.
#![allow(unsafe_code)]

use ampoule_verify_ffi::ffi::{
    AmpouleOutcome, AmpouleRelease, AmpouleRoleKeys, AmpouleStore, ampoule_store_free,
    ampoule_store_open_with_pinned_keys, ampoule_update,
};
use ampoule_verify_ffi::status::{AmpouleError, MESSAGE_BYTES, Status};

fn error() -> AmpouleError {
    AmpouleError {
        code: -1,
        message_len: 0,
        message: [0; MESSAGE_BYTES],
    }
}

fn message(err: &AmpouleError) -> String {
    String::from_utf8_lossy(&err.message[..err.message_len as usize]).into_owned()
}

#[test]
fn issue14_without_fetch_the_url_update_is_unsupported() {
    let dir = tempfile::tempdir().expect("a temporary directory");
    let store_dir = dir.path().join("camera");
    let store_dir = store_dir.to_str().expect("a UTF-8 path");
    // Any usable Ed25519 key: the public key of RFC 8032 section 7.1, TEST 1 (written from
    // memory; only its being a valid key matters here).
    let key: [u8; 32] = [
        0xd7, 0x5a, 0x98, 0x01, 0x82, 0xb1, 0x0a, 0xb7, 0xd5, 0x4b, 0xfe, 0xd3, 0xc9, 0x64, 0x07,
        0x3a, 0x0e, 0xe1, 0x72, 0xf3, 0xda, 0xa6, 0x23, 0x25, 0xaf, 0x02, 0x1a, 0x68, 0xf7, 0x07,
        0x51, 0x1a,
    ];
    let keys = AmpouleRoleKeys {
        keys: key.as_ptr(),
        keys_len: key.len(),
        threshold: 1,
    };
    let mut store = AmpouleStore { id: 0 };
    let mut err = error();
    // SAFETY: every pointer points at its length's bytes (or the output it names) for the call.
    let status = unsafe {
        ampoule_store_open_with_pinned_keys(
            store_dir.as_ptr().cast(),
            store_dir.len(),
            c"stable".as_ptr(),
            6,
            &keys,
            &keys,
            &keys,
            c"2.3.0".as_ptr(),
            5,
            std::ptr::null(),
            0,
            1_764_662_400,
            &mut store,
            &mut err,
        )
    };
    assert_eq!(status, Status::Ok as i32, "{}", message(&err));

    let url = "http://127.0.0.1:9/feeds/stable.json";
    let mut outcome = AmpouleOutcome {
        kind: 0,
        rollout_bucket: 0,
        installed: AmpouleRelease { id: 0 },
    };
    // SAFETY: as above.
    let status = unsafe {
        ampoule_update(
            store,
            url.as_ptr().cast(),
            url.len(),
            1_764_662_400,
            &mut outcome,
            &mut err,
        )
    };
    assert_eq!(status, Status::Unsupported as i32);
    assert_eq!(err.code, Status::Unsupported as i32);
    assert_eq!(outcome.kind, 7, "FAILED");
    assert_eq!(
        message(&err),
        "this build of the library has no HTTP(S) client: build ampoule-verify-ffi with \
         --features fetch, or drive the update with the app's own HTTP (ampoule_update_begin)"
    );
    // SAFETY: `err` is ours, writable for the call.
    let freed = unsafe { ampoule_store_free(store, &mut err) };
    assert_eq!(freed, Status::Ok as i32);
}
