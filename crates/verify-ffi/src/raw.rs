//! The caller's memory: every read of an input and every write of an output goes through
//! here, so the crate's unsafe code is these few functions and the exported entry points.
//!
//! Each input comes as a pointer and an explicit length. The length is checked against the
//! field's cap before a slice is formed, so a length that does not belong to the pointer (a
//! `-1` turned into `SIZE_MAX`, a buffer's capacity passed instead of its length) is refused
//! without reading past anything; a NUL byte inside a string's length is refused for the same
//! reason. What a pointer points at cannot be checked: a wrong pointer with a plausible length
//! is the caller's bug, as in any C interface.

#![allow(unsafe_code)]

use std::ffi::{c_char, c_void};

use crate::status::{AmpouleError, Failure, Status};

/// Bytes the caller passed: `ptr` to `len` bytes. A null pointer with length 0 is absent.
///
/// # Safety
///
/// A non-null `ptr` points at `len` readable bytes that stay unchanged while `'a` lasts (the
/// call).
pub(crate) unsafe fn bytes<'a>(
    ptr: *const u8,
    len: usize,
    max: usize,
    what: &str,
) -> Result<Option<&'a [u8]>, Failure> {
    if ptr.is_null() {
        return if len == 0 {
            Ok(None)
        } else {
            Err(Failure::argument(format!(
                "{what} is a null pointer with length {len}"
            )))
        };
    }
    if len > max {
        return Err(Failure::argument(format!(
            "{what} has length {len}, over its limit of {max} bytes; is the length the \
             string's own?"
        )));
    }
    // SAFETY: `ptr` is not null, and the C contract of every entry point is that a non-null
    // input pointer points at `len` readable bytes that stay unchanged during the call;
    // `len` is at most `max`, far below `isize::MAX`, so the slice is within one allocation's
    // limit. The slice lives only for this call.
    Ok(Some(unsafe { std::slice::from_raw_parts(ptr, len) }))
}

/// Bytes that must be given.
///
/// # Safety
///
/// As [`bytes`].
pub(crate) unsafe fn required<'a>(
    ptr: *const u8,
    len: usize,
    max: usize,
    what: &str,
) -> Result<&'a [u8], Failure> {
    // SAFETY: the caller's promise is the one `bytes` needs.
    match unsafe { bytes(ptr, len, max, what) }? {
        Some(bytes) if !bytes.is_empty() => Ok(bytes),
        _ => Err(Failure::argument(format!(
            "{what} is empty (a null pointer or length 0)"
        ))),
    }
}

/// A UTF-8 string that must be given, with no NUL byte inside its length.
///
/// # Safety
///
/// As [`bytes`].
pub(crate) unsafe fn string<'a>(
    ptr: *const c_char,
    len: usize,
    max: usize,
    what: &str,
) -> Result<&'a str, Failure> {
    // SAFETY: the caller's promise is the one `bytes` needs; `c_char` and `u8` have the same
    // size and alignment.
    text(unsafe { required(ptr.cast(), len, max, what) }?, what)
}

/// Bytes as UTF-8 without a NUL byte.
pub(crate) fn text<'a>(bytes: &'a [u8], what: &str) -> Result<&'a str, Failure> {
    let text = std::str::from_utf8(bytes).map_err(|e| {
        Failure::argument(format!(
            "{what} is not UTF-8: {e}; pass the string's UTF-8 bytes and their length"
        ))
    })?;
    if let Some(at) = text.find('\0') {
        return Err(Failure::argument(format!(
            "{what} holds a NUL byte at offset {at} of its length {}; pass the string's own \
             length, without the terminating NUL",
            text.len()
        )));
    }
    Ok(text)
}

/// Writes `value` through the output pointer `out`.
///
/// # Safety
///
/// A non-null `out` points at a writable, aligned `T` that nothing else uses during the call.
pub(crate) unsafe fn put<T>(out: *mut T, value: T, what: &str) -> Result<(), Failure> {
    if out.is_null() {
        return Err(Failure::argument(format!("{what} is a null pointer")));
    }
    // SAFETY: `out` is not null; the C contract is that an output pointer points at a
    // writable, aligned `T` the caller owns for the call. `T` is a `repr(C)` struct or an
    // integer with no drop glue, so overwriting it leaks nothing.
    unsafe { out.write(value) };
    Ok(())
}

/// Copies `value` into the caller's buffer `buf` of `cap` bytes and stores its length in
/// `len`. The length is stored even when the buffer is too small, so the caller can ask with
/// a null buffer of capacity 0, allocate, and call again.
///
/// # Safety
///
/// A non-null `buf` points at `cap` writable bytes, and `len` is as [`put`] needs.
pub(crate) unsafe fn copy_out(
    value: &[u8],
    buf: *mut u8,
    cap: usize,
    len: *mut usize,
    what: &str,
) -> Result<(), Failure> {
    // SAFETY: the caller's promise for `len` is the one `put` needs.
    unsafe { put(len, value.len(), "the length output") }?;
    if buf.is_null() && cap != 0 {
        return Err(Failure::argument(format!(
            "the buffer for {what} is a null pointer with capacity {cap}"
        )));
    }
    if value.len() > cap {
        return Err(Failure::new(
            Status::BufferTooSmall,
            format!(
                "{what} is {} bytes, the buffer holds {cap}; call again with a buffer of at \
                 least {} bytes",
                value.len(),
                value.len()
            ),
        ));
    }
    if !value.is_empty() {
        // SAFETY: `buf` is not null (a null buffer has capacity 0, and `value` is not empty,
        // so it would have failed the capacity check above); the C contract is that it points
        // at `cap` writable bytes, and `value.len() <= cap`. Rust's `value` cannot overlap
        // the caller's buffer: it is memory this library owns.
        unsafe { std::ptr::copy_nonoverlapping(value.as_ptr(), buf, value.len()) };
    }
    Ok(())
}

/// Fills the caller's error object, when there is one.
///
/// # Safety
///
/// As [`put`]: a non-null `err` points at a writable `ampoule_error` the caller owns.
pub(crate) unsafe fn fill_error(err: *mut AmpouleError, status: Status, message: &str) {
    if err.is_null() {
        return;
    }
    // SAFETY: `err` is not null and, by the caller's promise, points at a writable, aligned
    // `ampoule_error` that nothing else uses during the call; every bit pattern is a valid
    // value of its integer and byte-array fields, so forming a reference to it is sound.
    let err = unsafe { &mut *err };
    err.set(status, message);
}

/// The C type of a progress callback (`ampoule_progress_fn`).
pub type ProgressFn = unsafe extern "C" fn(*mut c_void, i32, u64, u64);

/// A progress callback the caller registered: its function, and the context pointer it gets
/// back on every call, untouched.
#[derive(Clone, Copy)]
pub(crate) struct Callback {
    function: ProgressFn,
    context: *mut c_void,
}

// SAFETY: the context pointer is never read here, only passed back to the caller's function;
// the header's contract for ampoule_store_set_progress is that the function may be called from
// any thread with that context, so moving and sharing the pair between threads is the
// caller's promise.
unsafe impl Send for Callback {}
// SAFETY: as for `Send`: nothing here reads through the pointer.
unsafe impl Sync for Callback {}

impl Callback {
    pub(crate) fn new(function: ProgressFn, context: *mut c_void) -> Callback {
        Callback { function, context }
    }

    /// Calls the caller's function with its context and one report.
    pub(crate) fn call(self, stage: i32, done: u64, total: u64) {
        // SAFETY: the header's contract: the function is a valid `ampoule_progress_fn` for as
        // long as it is registered, callable from any thread with this context, and returns.
        unsafe { (self.function)(self.context, stage, done, total) }
    }
}
