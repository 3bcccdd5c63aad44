//! The exported functions, one per declaration in `include/ampoule.h` (tests/header.rs keeps
//! the two the same). Each one runs its body inside `catch_unwind`, so no panic crosses into
//! C, and turns the body's result into a status code and the caller's error object.
//!
//! Every function is `unsafe extern "C"`: its safety contract is the header's (input pointers
//! point at the bytes their lengths say, output pointers at writable objects the caller owns
//! for the call). The only unsafe blocks call the readers and writers of [`crate::raw`].

#![allow(unsafe_code)]

use std::ffi::{CStr, c_char, c_void};
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::path::Path;
use std::sync::{Arc, PoisonError};

use ampoule_verify::{
    App, Device, Outcome, Progress, ProgressFn, PublicKey, Release, Signers, Stage, Timestamp,
    Trust, TrustedKeys, Version,
};

use crate::handles;
use crate::raw::{self, Callback};
use crate::session::{Step, UpdateSession};
use crate::status::{AmpouleError, Failure, STATUSES, Status};

/// The ABI version this library implements (`AMPOULE_ABI_VERSION` in ampoule.h).
pub const ABI_VERSION: u32 = 1;

/// The longest path, directory or file, the interface takes.
const PATH_BYTES: usize = 4096;
/// The longest channel name, version or metadata key it takes (each is checked further by
/// the library's own rules).
const SHORT_BYTES: usize = 256;
/// The largest document or piece of a download handed in by one call (the session's own
/// limits, lower, are checked there).
const CHUNK_BYTES: usize = 1 << 30;
/// The largest trust set or policy document it passes on; the library's own caps are lower
/// and are checked there, with their own messages.
const DOCUMENT_BYTES: usize = 1 << 20;
/// An Ed25519 public key, raw (RFC 8032, section 5.1.5).
const KEY_BYTES: usize = 32;
/// The most keys a role may pin.
const MAX_KEYS: usize = 64;

/// A store handle (`ampoule_store`): 0 is no store.
#[repr(C)]
#[derive(Debug, Clone, Copy)]
pub struct AmpouleStore {
    pub id: u64,
}

/// A release handle (`ampoule_release`): 0 is no release.
#[repr(C)]
#[derive(Debug, Clone, Copy)]
pub struct AmpouleRelease {
    pub id: u64,
}

/// Limits of `ampoule_update`'s transfers (`ampoule_transfer`): a field left 0 keeps the
/// library's default ([`ampoule_verify::Transfer`]'s).
#[repr(C)]
#[derive(Debug, Clone, Copy, Default)]
pub struct AmpouleTransfer {
    pub connect_timeout_ms: u32,
    pub read_timeout_ms: u32,
    pub total_timeout_ms: u64,
    pub min_rate_bytes_per_sec: u64,
    pub rate_window_ms: u32,
    pub attempts_per_source: u32,
}

impl AmpouleTransfer {
    /// The library's transfer settings with these limits applied over its defaults.
    #[cfg(feature = "fetch")]
    fn apply(&self, mut transfer: ampoule_verify::Transfer) -> ampoule_verify::Transfer {
        use std::time::Duration;
        let ms = |v: u64| Duration::from_millis(v);
        if self.connect_timeout_ms > 0 {
            transfer = transfer.connect_timeout(ms(self.connect_timeout_ms.into()));
        }
        if self.read_timeout_ms > 0 {
            transfer = transfer.read_timeout(ms(self.read_timeout_ms.into()));
        }
        if self.total_timeout_ms > 0 {
            transfer = transfer.total_timeout(ms(self.total_timeout_ms));
        }
        if self.min_rate_bytes_per_sec > 0 || self.rate_window_ms > 0 {
            let defaults = AmpouleTransfer::DEFAULTS;
            let pick = |v: u64, default: u64| if v > 0 { v } else { default };
            transfer = transfer.min_rate(
                pick(self.min_rate_bytes_per_sec, defaults.min_rate_bytes_per_sec),
                ms(pick(
                    self.rate_window_ms.into(),
                    defaults.rate_window_ms.into(),
                )),
            );
        }
        if self.attempts_per_source > 0 {
            transfer = transfer.attempts_per_source(self.attempts_per_source);
        }
        transfer
    }

    /// The library's defaults, as ampoule.h states them.
    pub const DEFAULTS: AmpouleTransfer = AmpouleTransfer {
        connect_timeout_ms: 20_000,
        read_timeout_ms: 30_000,
        total_timeout_ms: 3_600_000,
        min_rate_bytes_per_sec: 256,
        rate_window_ms: 60_000,
        attempts_per_source: 3,
    };
}

/// The keys pinned for one role (`ampoule_role_keys`).
#[repr(C)]
pub struct AmpouleRoleKeys {
    /// `keys_len / 32` raw Ed25519 public keys, one after the other.
    pub keys: *const u8,
    pub keys_len: usize,
    /// How many of them must sign.
    pub threshold: u32,
}

/// What an update did (`ampoule_outcome`).
#[repr(C)]
pub struct AmpouleOutcome {
    /// One of `AMPOULE_OUTCOME_*`.
    pub kind: i32,
    /// With `AMPOULE_OUTCOME_NOT_IN_ROLLOUT`: the device's bucket, 0 to 9999.
    pub rollout_bucket: u32,
    /// With `AMPOULE_OUTCOME_INSTALLED`: the release now current, a handle the caller frees.
    pub installed: AmpouleRelease,
}

/// An update in progress, driven step by step (`ampoule_session`): 0 is no session.
#[repr(C)]
#[derive(Debug, Clone, Copy)]
pub struct AmpouleSession {
    pub id: u64,
}

/// The bytes of a SHA-256 digest (`AMPOULE_SHA256_BYTES`).
pub const SHA256_BYTES: usize = 32;

/// What the update needs next, or how it ended (`ampoule_step`).
#[repr(C)]
pub struct AmpouleStep {
    /// One of `AMPOULE_STEP_*`.
    pub kind: i32,
    /// FETCH: 1; DOWNLOAD: the mirrors, in the order to try (`ampoule_update_url`).
    pub url_count: u32,
    /// FETCH: the most bytes the document may have.
    pub max_bytes: u64,
    /// DOWNLOAD: the bytes the file holds already; ask for the rest from here.
    pub offset: u64,
    /// DOWNLOAD: the bytes the file must hold when the download is complete.
    pub size: u64,
    /// DOWNLOAD: the whole file's SHA-256, as the signed feed declares it.
    pub sha256: [u8; SHA256_BYTES],
    /// DONE: the outcome, as `ampoule_install_offline` gives it.
    pub outcome: AmpouleOutcome,
}

/// The step kinds, as `AMPOULE_STEP_*` numbers them.
pub const STEPS: &[(&str, i32)] = &[("FETCH", 1), ("DOWNLOAD", 2), ("DONE", 3)];

/// The outcome kinds, as `AMPOULE_OUTCOME_*` numbers them.
pub const OUTCOMES: &[(&str, i32)] = &[
    ("INSTALLED", 1),
    ("UP_TO_DATE", 2),
    ("NOT_IN_ROLLOUT", 3),
    ("NOTHING_OFFERED", 4),
    ("NEEDS_OTHER_APP", 5),
    ("REFUSED", 6),
    ("FAILED", 7),
];

/// The release fields `ampoule_release_field` reads, as `AMPOULE_FIELD_*` numbers them.
pub const FIELDS: &[(&str, i32)] = &[
    ("NAME", 1),
    ("VERSION", 2),
    ("CREATED", 3),
    ("REQUIRES_APP", 4),
    ("MANIFEST_SHA256", 5),
    ("MODEL_PATH", 6),
    ("LABELS_PATH", 7),
    ("DIR", 8),
    ("MANIFEST_JSON", 9),
    ("SIGNERS", 10),
];

/// Runs `body` for the function `name`, catching any panic, and reports its result.
fn call(name: &str, err: *mut AmpouleError, body: impl FnOnce() -> Result<(), Failure>) -> i32 {
    let (status, message) = match catch_unwind(AssertUnwindSafe(body)) {
        Ok(Ok(())) => (Status::Ok, String::new()),
        Ok(Err(failure)) => (failure.status, failure.message),
        Err(_) => (
            Status::Panic,
            format!(
                "internal error: {name} panicked; the panic was stopped at the C boundary. \
                 Please report this as a bug in ampoule-verify"
            ),
        ),
    };
    // SAFETY: `err` is the caller's error object; the header's contract is that it is null
    // or points at a writable `ampoule_error` the caller owns during the call.
    unsafe { raw::fill_error(err, status, &message) };
    status as i32
}

/// The clock time the caller passed.
fn time(now_unix: i64) -> Result<Timestamp, Failure> {
    u64::try_from(now_unix)
        .ok()
        .and_then(Timestamp::from_unix)
        .ok_or_else(|| {
            Failure::argument(format!(
                "now_unix {now_unix} is not a time: pass seconds since 1970-01-01T00:00:00Z"
            ))
        })
}

/// Opens the store once the trust is known: the part both open calls share.
fn open(
    dir: &str,
    channel: &str,
    trust: Trust,
    app_version: &str,
    policy: Option<&[u8]>,
    now_unix: i64,
) -> Result<u64, Failure> {
    let version = Version::parse(app_version).map_err(|e| {
        Failure::argument(format!(
            "app_version '{}' is not a Semantic Versioning 2.0.0 version: {e}",
            app_version.escape_debug()
        ))
    })?;
    let slot = Arc::new(handles::ProgressSlot::new(None));
    let mut app = App::new(trust, version).on_progress(reporter(slot.clone()));
    if let Some(policy) = policy {
        app = app
            .policy_document(policy)
            .map_err(|e| Failure::new(Status::PolicyDocument, e.to_string()))?;
    }
    let device = Device::open(Path::new(dir), channel, app, time(now_unix)?)?;
    handles::add_store(device, slot)
}

/// The stages, as `AMPOULE_STAGE_*` numbers them.
pub const STAGES: &[(&str, i32)] = &[("HASH_PAYLOAD", 1), ("UNPACK", 2), ("DOWNLOAD", 3)];

/// The library's progress reports, passed to whatever callback the store's slot holds when
/// each one comes (none: dropped).
fn reporter(slot: Arc<handles::ProgressSlot>) -> ProgressFn {
    Arc::new(move |progress: Progress| {
        // Copied out first, so a callback that sets another callback does not deadlock.
        let callback = *slot.lock().unwrap_or_else(PoisonError::into_inner);
        if let Some(callback) = callback {
            let stage = match progress.stage {
                Stage::HashPayload => 1,
                Stage::Unpack => 2,
                Stage::Download => 3,
                _ => 0,
            };
            callback.call(stage, progress.done, progress.total);
        }
    })
}

/// The ABI version; see `ampoule_abi_version` in ampoule.h.
#[unsafe(no_mangle)]
pub extern "C" fn ampoule_abi_version() -> u32 {
    ABI_VERSION
}

/// A status code's name; see `ampoule_status_name` in ampoule.h.
#[unsafe(no_mangle)]
pub extern "C" fn ampoule_status_name(status: i32) -> *const c_char {
    static NAMES: &[&CStr] = &[
        c"ok",
        c"invalid_argument",
        c"invalid_handle",
        c"buffer_too_small",
        c"policy_document",
        c"needs_other_app",
        c"panic",
        c"not_found",
        c"unsupported",
        c"io",
        c"malformed",
        c"too_large",
        c"signature",
        c"key",
        c"digest",
        c"manifest",
        c"policy",
        c"destination",
        c"model",
        c"incompatible",
        c"proof",
        c"store",
        c"locked",
        c"trust_set",
        c"feed",
        c"stale",
        c"network",
        c"settings",
        c"cancelled",
        c"clock",
        c"other",
    ];
    let name = STATUSES
        .iter()
        .zip(NAMES)
        .find(|((code, _), _)| *code as i32 == status)
        .map_or(c"unknown", |(_, name)| *name);
    name.as_ptr()
}

/// Opens a store with the trust set the app ships; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_store_open_with_trust_set(
    dir: *const c_char,
    dir_len: usize,
    channel: *const c_char,
    channel_len: usize,
    trust_set: *const u8,
    trust_set_len: usize,
    app_version: *const c_char,
    app_version_len: usize,
    policy: *const u8,
    policy_len: usize,
    now_unix: i64,
    out: *mut AmpouleStore,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_store_open_with_trust_set", err, || {
        if out.is_null() {
            return Err(Failure::argument("out is a null pointer"));
        }
        // SAFETY: the header's contract: each pointer is null or points at its length's
        // bytes (UTF-8 for strings), unchanged during the call.
        let (dir, channel, trust_set, app_version, policy) = unsafe {
            (
                raw::string(dir, dir_len, PATH_BYTES, "dir")?,
                raw::string(channel, channel_len, SHORT_BYTES, "channel")?,
                raw::required(trust_set, trust_set_len, DOCUMENT_BYTES, "trust_set")?,
                raw::string(app_version, app_version_len, SHORT_BYTES, "app_version")?,
                raw::bytes(policy, policy_len, DOCUMENT_BYTES, "policy")?,
            )
        };
        let trust = Trust::shipped_trust_set(trust_set)?;
        let id = open(dir, channel, trust, app_version, policy, now_unix)?;
        // SAFETY: `out` is null or the caller's writable `ampoule_store` (the header).
        unsafe { raw::put(out, AmpouleStore { id }, "out") }.inspect_err(|_| {
            let _ = handles::free_store(id);
        })
    })
}

/// The keys and threshold of one role from the caller's pinned keys.
///
/// # Safety
///
/// `role` is null or points at an `ampoule_role_keys` whose `keys` points at `keys_len` bytes.
unsafe fn role_keys(
    role: *const AmpouleRoleKeys,
    what: &str,
) -> Result<(TrustedKeys, usize), Failure> {
    if role.is_null() {
        return Err(Failure::argument(format!("{what} is a null pointer")));
    }
    // SAFETY: `role` is not null and, by the header's contract, points at a readable
    // `ampoule_role_keys`; its fields are plain integers and a pointer, valid in any bit pattern.
    let role = unsafe { &*role };
    // SAFETY: the header's contract: `keys` points at `keys_len` readable bytes.
    let keys = unsafe { raw::required(role.keys, role.keys_len, KEY_BYTES * MAX_KEYS, what) }?;
    if keys.len() % KEY_BYTES != 0 {
        return Err(Failure::argument(format!(
            "{what} has keys_len {}, which is not a whole number of {KEY_BYTES}-byte keys",
            keys.len()
        )));
    }
    let mut trusted = TrustedKeys::new();
    for raw_key in keys.chunks_exact(KEY_BYTES) {
        let raw_key: &[u8; KEY_BYTES] = raw_key
            .try_into()
            .map_err(|_| Failure::argument(format!("{what}: a key is not {KEY_BYTES} bytes")))?;
        trusted.add(PublicKey::from_raw(raw_key)?);
    }
    Ok((trusted, role.threshold as usize))
}

/// Opens a store with keys pinned per role; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_store_open_with_pinned_keys(
    dir: *const c_char,
    dir_len: usize,
    channel: *const c_char,
    channel_len: usize,
    bundle_keys: *const AmpouleRoleKeys,
    feed_keys: *const AmpouleRoleKeys,
    tree_head_keys: *const AmpouleRoleKeys,
    app_version: *const c_char,
    app_version_len: usize,
    policy: *const u8,
    policy_len: usize,
    now_unix: i64,
    out: *mut AmpouleStore,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_store_open_with_pinned_keys", err, || {
        if out.is_null() {
            return Err(Failure::argument("out is a null pointer"));
        }
        // SAFETY: the header's contract, as for `ampoule_store_open_with_trust_set`, and each
        // role pointer is null or points at an `ampoule_role_keys` with its keys' bytes.
        let (dir, channel, app_version, policy, bundle, feed, tree_head) = unsafe {
            (
                raw::string(dir, dir_len, PATH_BYTES, "dir")?,
                raw::string(channel, channel_len, SHORT_BYTES, "channel")?,
                raw::string(app_version, app_version_len, SHORT_BYTES, "app_version")?,
                raw::bytes(policy, policy_len, DOCUMENT_BYTES, "policy")?,
                role_keys(bundle_keys, "bundle_keys")?,
                role_keys(feed_keys, "feed_keys")?,
                role_keys(tree_head_keys, "tree_head_keys")?,
            )
        };
        let trust = Trust::pinned(
            Signers::new(bundle.0, bundle.1)?,
            Signers::new(feed.0, feed.1)?,
            Signers::new(tree_head.0, tree_head.1)?,
        );
        let id = open(dir, channel, trust, app_version, policy, now_unix)?;
        // SAFETY: `out` is null or the caller's writable `ampoule_store` (the header).
        unsafe { raw::put(out, AmpouleStore { id }, "out") }.inspect_err(|_| {
            let _ = handles::free_store(id);
        })
    })
}

/// Frees a store handle; see ampoule.h.
///
/// # Safety
///
/// `err` is null or the caller's writable `ampoule_error`.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_store_free(store: AmpouleStore, err: *mut AmpouleError) -> i32 {
    call("ampoule_store_free", err, || handles::free_store(store.id))
}

/// Installs from an offline file; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_install_offline(
    store: AmpouleStore,
    file: *const c_char,
    file_len: usize,
    now_unix: i64,
    out: *mut AmpouleOutcome,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_install_offline", err, || {
        // SAFETY: the header's contract: `file` points at `file_len` bytes of UTF-8.
        let file = unsafe { raw::string(file, file_len, PATH_BYTES, "file") }?;
        if out.is_null() {
            return Err(Failure::argument("out is a null pointer"));
        }
        let device = handles::store(store.id)?;
        let report = device.install_offline(Path::new(file), time(now_unix)?);
        let (outcome, result) = outcome_of(report.outcome)?;
        // SAFETY: `out` is not null (checked above) and is the caller's writable
        // `ampoule_outcome` (the header).
        unsafe { raw::put(out, outcome, "out") }?;
        result
    })
}

/// The C form of an update's outcome, and the status that goes with it: `Ok` for installed,
/// up to date, not in rollout and nothing offered; the refusal's or failure's kind otherwise.
/// An installed release becomes a handle the caller frees.
fn outcome_of(outcome: Outcome) -> Result<(AmpouleOutcome, Result<(), Failure>), Failure> {
    let mut out = AmpouleOutcome {
        kind: 0,
        rollout_bucket: 0,
        installed: AmpouleRelease { id: 0 },
    };
    let mut result = Ok(());
    match outcome {
        Outcome::Installed(installed) => {
            out.kind = 1;
            out.installed.id = handles::add_release(installed.release)?;
        }
        Outcome::UpToDate => out.kind = 2,
        Outcome::NotInRollout { bucket } => {
            out.kind = 3;
            out.rollout_bucket = u32::from(bucket);
        }
        Outcome::NothingOffered => out.kind = 4,
        Outcome::NeedsOtherApp { reason } => {
            out.kind = 5;
            result = Err(Failure::new(Status::NeedsOtherApp, reason));
        }
        Outcome::Refused(e) => {
            out.kind = 6;
            result = Err(e.into());
        }
        Outcome::Failed(e) => {
            out.kind = 7;
            result = Err(e.into());
        }
        other => {
            out.kind = 7;
            result = Err(Failure::new(
                Status::Other,
                format!(
                    "the update ended in an outcome this ABI version does not know: {}",
                    other.name()
                ),
            ));
        }
    }
    Ok((out, result))
}

/// Puts a release handle for `release` (or 0 for none) into `out`.
///
/// # Safety
///
/// `out` is null or the caller's writable `ampoule_release`.
unsafe fn put_release(release: Option<Release>, out: *mut AmpouleRelease) -> Result<(), Failure> {
    if out.is_null() {
        return Err(Failure::argument("out is a null pointer"));
    }
    let id = match release {
        Some(release) => handles::add_release(release)?,
        None => 0,
    };
    // SAFETY: `out` is not null and is the caller's writable `ampoule_release`.
    unsafe { raw::put(out, AmpouleRelease { id }, "out") }
}

/// The current release, fully checked; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_current(
    store: AmpouleStore,
    out: *mut AmpouleRelease,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_current", err, || {
        if out.is_null() {
            return Err(Failure::argument("out is a null pointer"));
        }
        let current = handles::store(store.id)?.current()?;
        // SAFETY: `out` is null or the caller's writable `ampoule_release` (the header).
        unsafe { put_release(current, out) }
    })
}

/// Rolls back to the previous release; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_rollback(
    store: AmpouleStore,
    out: *mut AmpouleRelease,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_rollback", err, || {
        if out.is_null() {
            return Err(Failure::argument("out is a null pointer"));
        }
        let release = handles::store(store.id)?.rollback()?;
        // SAFETY: `out` is null or the caller's writable `ampoule_release` (the header).
        unsafe { put_release(Some(release), out) }
    })
}

/// Frees a release handle; see ampoule.h.
///
/// # Safety
///
/// `err` is null or the caller's writable `ampoule_error`.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_release_free(
    release: AmpouleRelease,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_release_free", err, || {
        handles::free_release(release.id)
    })
}

/// One field of a release as text.
fn field(release: &Release, field: i32) -> Result<Vec<u8>, Failure> {
    let path = |p: &Path| p.to_string_lossy().into_owned().into_bytes();
    let manifest = &release.manifest;
    Ok(match field {
        1 => manifest.name.clone().into_bytes(),
        2 => manifest.version.to_string().into_bytes(),
        3 => manifest.created.to_string().into_bytes(),
        4 => manifest.requires_app.to_string().into_bytes(),
        5 => release.manifest_sha256.to_string().into_bytes(),
        6 => path(&release.model),
        7 => path(&release.labels_path),
        8 => path(&release.dir),
        9 => serde_json::to_vec(manifest)
            .map_err(|e| Failure::new(Status::Other, format!("the manifest as JSON: {e}")))?,
        10 => release
            .signers
            .iter()
            .map(|k| k.to_string())
            .collect::<Vec<_>>()
            .join("\n")
            .into_bytes(),
        other => {
            return Err(Failure::argument(format!(
                "field {other} is not an AMPOULE_FIELD_* value"
            )));
        }
    })
}

/// One field of a release; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_release_field(
    release: AmpouleRelease,
    which: i32,
    buf: *mut u8,
    cap: usize,
    len: *mut usize,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_release_field", err, || {
        let value = field(&*handles::release(release.id)?, which)?;
        // SAFETY: `buf` is null or `cap` writable bytes, `len` the caller's `size_t`.
        unsafe { raw::copy_out(&value, buf, cap, len, "the field") }
    })
}

/// The number of labels; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_release_label_count(
    release: AmpouleRelease,
    count: *mut usize,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_release_label_count", err, || {
        let labels = handles::release(release.id)?.labels.len();
        // SAFETY: `count` is null or the caller's writable `size_t`.
        unsafe { raw::put(count, labels, "count") }
    })
}

/// One label; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_release_label(
    release: AmpouleRelease,
    index: usize,
    buf: *mut u8,
    cap: usize,
    len: *mut usize,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_release_label", err, || {
        let release = handles::release(release.id)?;
        let label = release.labels.get(index).ok_or_else(|| {
            Failure::new(
                Status::NotFound,
                format!(
                    "label index {index} is out of range: the release has {} labels",
                    release.labels.len()
                ),
            )
        })?;
        // SAFETY: `buf` is null or `cap` writable bytes, `len` the caller's `size_t`.
        unsafe { raw::copy_out(label.as_bytes(), buf, cap, len, "the label") }
    })
}

/// A value of the signed metadata, as JSON; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_release_metadata(
    release: AmpouleRelease,
    key: *const c_char,
    key_len: usize,
    buf: *mut u8,
    cap: usize,
    len: *mut usize,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_release_metadata", err, || {
        // SAFETY: `key` is null with length 0, or points at `key_len` bytes of UTF-8.
        let key = match unsafe { raw::bytes(key.cast(), key_len, SHORT_BYTES, "key") }? {
            Some(bytes) => raw::text(bytes, "key")?,
            None => "",
        };
        let release = handles::release(release.id)?;
        let json = if key.is_empty() {
            // The whole object: the manifest's `metadata` member, `{}` when it has none.
            let manifest = serde_json::to_value(&release.manifest)
                .map_err(|e| Failure::new(Status::Other, format!("the manifest as JSON: {e}")))?;
            manifest
                .get("metadata")
                .map_or_else(|| "{}".to_string(), ToString::to_string)
        } else {
            release
                .manifest
                .metadata(key)
                .ok_or_else(|| {
                    Failure::new(
                        Status::NotFound,
                        format!(
                            "the release's signed metadata has no key '{}'",
                            key.escape_debug()
                        ),
                    )
                })?
                .to_string()
        };
        // SAFETY: `buf` is null or `cap` writable bytes, `len` the caller's `size_t`.
        unsafe { raw::copy_out(json.as_bytes(), buf, cap, len, "the metadata value") }
    })
}

/// Starts a step-by-step update; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_update_begin(
    store: AmpouleStore,
    feed_url: *const c_char,
    feed_url_len: usize,
    feed: *const u8,
    feed_len: usize,
    now_unix: i64,
    out: *mut AmpouleSession,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_update_begin", err, || {
        if out.is_null() {
            return Err(Failure::argument("out is a null pointer"));
        }
        // SAFETY: the header's contract: each pointer points at its length's bytes (UTF-8
        // for the URL), unchanged during the call.
        let (feed_url, feed) = unsafe {
            (
                raw::string(feed_url, feed_url_len, PATH_BYTES, "feed_url")?,
                raw::required(feed, feed_len, DOCUMENT_BYTES, "feed")?,
            )
        };
        let device = handles::store(store.id)?;
        let session =
            UpdateSession::begin(device, feed_url.to_string(), feed.to_vec(), time(now_unix)?)?;
        let id = handles::add_session(session)?;
        // SAFETY: `out` is not null and is the caller's writable `ampoule_session`.
        unsafe { raw::put(out, AmpouleSession { id }, "out") }
    })
}

/// The next step of an update; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_update_next(
    session: AmpouleSession,
    step: *mut AmpouleStep,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_update_next", err, || {
        if step.is_null() {
            return Err(Failure::argument("step is a null pointer"));
        }
        let session = handles::session(session.id)?;
        let mut out = AmpouleStep {
            kind: 0,
            url_count: 0,
            max_bytes: 0,
            offset: 0,
            size: 0,
            sha256: [0; SHA256_BYTES],
            outcome: AmpouleOutcome {
                kind: 0,
                rollout_bucket: 0,
                installed: AmpouleRelease { id: 0 },
            },
        };
        let mut result = Ok(());
        match session.next()? {
            Step::Fetch { max_bytes } => {
                out.kind = 1;
                out.max_bytes = max_bytes;
            }
            Step::Download {
                size,
                offset,
                sha256,
            } => {
                out.kind = 2;
                out.size = size;
                out.offset = offset;
                out.sha256 = sha256;
            }
            Step::Done(outcome) => {
                out.kind = 3;
                (out.outcome, result) = outcome_of(outcome)?;
            }
            Step::Ended => {
                out.kind = 3;
                out.outcome.kind = 7;
                result = Err(Failure::new(
                    Status::Settings,
                    "this update already ended; start another",
                ));
            }
        }
        out.url_count = u32::try_from(session.url_count()).unwrap_or(u32::MAX);
        // SAFETY: `step` is not null and is the caller's writable `ampoule_step`.
        unsafe { raw::put(step, out, "step") }?;
        result
    })
}

/// One URL of the update's current step; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_update_url(
    session: AmpouleSession,
    index: usize,
    buf: *mut u8,
    cap: usize,
    len: *mut usize,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_update_url", err, || {
        let url = handles::session(session.id)?.url(index)?;
        // SAFETY: `buf` is null or `cap` writable bytes, `len` the caller's `size_t`.
        unsafe { raw::copy_out(url.as_bytes(), buf, cap, len, "the URL") }
    })
}

/// Hands in the document a FETCH step asked for; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_update_provide(
    session: AmpouleSession,
    bytes: *const u8,
    len: usize,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_update_provide", err, || {
        // SAFETY: `bytes` is null with length 0, or points at `len` readable bytes.
        let bytes = unsafe { raw::bytes(bytes, len, CHUNK_BYTES, "bytes") }?.unwrap_or(&[]);
        handles::session(session.id)?.provide(bytes)
    })
}

/// Appends bytes of the download a DOWNLOAD step asked for; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_update_write(
    session: AmpouleSession,
    bytes: *const u8,
    len: usize,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_update_write", err, || {
        // SAFETY: `bytes` is null with length 0, or points at `len` readable bytes.
        let bytes = unsafe { raw::bytes(bytes, len, CHUNK_BYTES, "bytes") }?.unwrap_or(&[]);
        handles::session(session.id)?.write(bytes)
    })
}

/// Says the download is complete; see ampoule.h.
///
/// # Safety
///
/// `err` is null or the caller's writable `ampoule_error`.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_update_downloaded(
    session: AmpouleSession,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_update_downloaded", err, || {
        handles::session(session.id)?.downloaded()
    })
}

/// Ends the update because the app could not fetch what was asked; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_update_fail(
    session: AmpouleSession,
    why: *const c_char,
    why_len: usize,
    out: *mut AmpouleOutcome,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_update_fail", err, || {
        // SAFETY: the header's contract: `why` points at `why_len` bytes of UTF-8.
        let why = unsafe { raw::string(why, why_len, SHORT_BYTES * 4, "why") }?;
        if out.is_null() {
            return Err(Failure::argument("out is a null pointer"));
        }
        let (outcome, result) = match handles::session(session.id)?.fail(why)? {
            Step::Done(outcome) => outcome_of(outcome)?,
            _ => (
                AmpouleOutcome {
                    kind: 7,
                    rollout_bucket: 0,
                    installed: AmpouleRelease { id: 0 },
                },
                Err(Failure::new(
                    Status::Settings,
                    "this update already ended; start another",
                )),
            ),
        };
        // SAFETY: `out` is not null and is the caller's writable `ampoule_outcome`.
        unsafe { raw::put(out, outcome, "out") }?;
        result
    })
}

/// Frees an update session's handle, ending the update; see ampoule.h.
///
/// # Safety
///
/// `err` is null or the caller's writable `ampoule_error`.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_session_free(
    session: AmpouleSession,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_session_free", err, || {
        handles::free_session(session.id)
    })
}

/// The URL update, over HTTP(S) with the library's own client, the handle's transfer limits
/// and a cancel flag `ampoule_update_cancel` can set.
#[cfg(feature = "fetch")]
fn url_update(
    device: &Device,
    slots: &handles::StoreSlots,
    feed_url: &str,
    now: Timestamp,
) -> Result<(AmpouleOutcome, Result<(), Failure>), Failure> {
    let limits = *handles::lock(&slots.transfer);
    let running = slots.start();
    let transfer = limits
        .apply(ampoule_verify::Transfer::new())
        .on_progress(reporter(slots.progress.clone()))
        .cancel_when(running.flag.clone());
    outcome_of(device.update(feed_url, &transfer, now).outcome)
}

/// Without `fetch` there is no HTTP(S) client in the library: the call says so.
#[cfg(not(feature = "fetch"))]
fn url_update(
    _device: &Device,
    _slots: &handles::StoreSlots,
    _feed_url: &str,
    _now: Timestamp,
) -> Result<(AmpouleOutcome, Result<(), Failure>), Failure> {
    Ok((
        AmpouleOutcome {
            kind: 7,
            rollout_bucket: 0,
            installed: AmpouleRelease { id: 0 },
        },
        Err(Failure::new(
            Status::Unsupported,
            "this build of the library has no HTTP(S) client: build ampoule-verify-ffi with \
             --features fetch, or drive the update with the app's own HTTP \
             (ampoule_update_begin)",
        )),
    ))
}

/// Runs a whole update over HTTP(S) from the feed's URL; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_update(
    store: AmpouleStore,
    feed_url: *const c_char,
    feed_url_len: usize,
    now_unix: i64,
    out: *mut AmpouleOutcome,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_update", err, || {
        // SAFETY: the header's contract: `feed_url` points at `feed_url_len` bytes of UTF-8.
        let feed_url = unsafe { raw::string(feed_url, feed_url_len, PATH_BYTES, "feed_url") }?;
        if out.is_null() {
            return Err(Failure::argument("out is a null pointer"));
        }
        let device = handles::store(store.id)?;
        let slots = handles::slots(store.id)?;
        let (outcome, result) = url_update(&device, &slots, feed_url, time(now_unix)?)?;
        // SAFETY: `out` is not null and is the caller's writable `ampoule_outcome`.
        unsafe { raw::put(out, outcome, "out") }?;
        result
    })
}

/// Sets or clears the store's progress callback; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function: `progress` is null or a function callable from
/// any thread with `context`, until it is replaced or the store is freed.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_store_set_progress(
    store: AmpouleStore,
    progress: Option<raw::ProgressFn>,
    context: *mut c_void,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_store_set_progress", err, || {
        let slots = handles::slots(store.id)?;
        *handles::lock(&slots.progress) = progress.map(|function| Callback::new(function, context));
        Ok(())
    })
}

/// Sets the limits of this handle's `ampoule_update` transfers; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function: `limits` is null or the caller's readable
/// `ampoule_transfer`.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_store_set_transfer(
    store: AmpouleStore,
    limits: *const AmpouleTransfer,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_store_set_transfer", err, || {
        if limits.is_null() {
            return Err(Failure::argument(
                "limits is a null pointer: pass an ampoule_transfer, zeroed for the defaults",
            ));
        }
        // SAFETY: `limits` is not null and, by the header's contract, points at the caller's
        // readable `ampoule_transfer`; the struct is plain integers, so any bytes are a value.
        let limits = unsafe { *limits };
        *handles::lock(&handles::slots(store.id)?.transfer) = limits;
        Ok(())
    })
}

/// Asks the `ampoule_update` calls running on this handle to stop; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_update_cancel(
    store: AmpouleStore,
    running: *mut usize,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_update_cancel", err, || {
        let cancelled = handles::slots(store.id)?.cancel();
        if running.is_null() {
            return Ok(());
        }
        // SAFETY: `running` is not null and is the caller's writable `size_t`.
        unsafe { raw::put(running, cancelled, "running") }
    })
}

/// The device id that places this store in rollouts; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_device_id(
    store: AmpouleStore,
    buf: *mut u8,
    cap: usize,
    len: *mut usize,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_device_id", err, || {
        let device = handles::store(store.id)?;
        // SAFETY: `buf` is null or `cap` writable bytes, `len` the caller's `size_t`.
        unsafe {
            raw::copy_out(
                device.device_id().as_bytes(),
                buf,
                cap,
                len,
                "the device id",
            )
        }
    })
}

/// Makes the store follow the handle's channel; see ampoule.h.
///
/// # Safety
///
/// `err` is null or the caller's writable `ampoule_error`.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_switch_channel(
    store: AmpouleStore,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_switch_channel", err, || {
        Ok(handles::store(store.id)?.switch_channel()?)
    })
}

/// Removes what the store no longer needs; see ampoule.h.
///
/// # Safety
///
/// The header's contract for this function.
#[unsafe(no_mangle)]
pub unsafe extern "C" fn ampoule_gc(
    store: AmpouleStore,
    removed: *mut usize,
    err: *mut AmpouleError,
) -> i32 {
    call("ampoule_gc", err, || {
        if removed.is_null() {
            return Err(Failure::argument("removed is a null pointer"));
        }
        let paths = handles::store(store.id)?.gc()?;
        // SAFETY: `removed` is not null and is the caller's writable `size_t`.
        unsafe { raw::put(removed, paths.len(), "removed") }
    })
}
