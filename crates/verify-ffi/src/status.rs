//! What every call returns: a status code, and the error object the caller owns, filled with
//! the same code and a message. Nothing is kept per thread: a Kotlin coroutine or a Swift task
//! that resumes on another thread still holds its own error object.

use ampoule_verify::{Error, ErrorKind};

/// The bytes of message an error object holds (more is cut at a UTF-8 boundary).
pub const MESSAGE_BYTES: usize = 1024;

/// The status codes of the C interface (`AMPOULE_*` in ampoule.h). Codes 10 and up are the
/// library's error kinds, one each; the numbers never change within an ABI version.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(i32)]
pub enum Status {
    Ok = 0,
    InvalidArgument = 1,
    InvalidHandle = 2,
    BufferTooSmall = 3,
    PolicyDocument = 4,
    NeedsOtherApp = 5,
    Panic = 6,
    NotFound = 7,
    /// This build lacks the cargo feature the call needs (`ampoule_update`: `fetch`).
    Unsupported = 8,
    Io = 10,
    Malformed = 11,
    TooLarge = 12,
    Signature = 13,
    Key = 14,
    Digest = 15,
    Manifest = 16,
    Policy = 17,
    Destination = 18,
    Model = 19,
    Incompatible = 20,
    Proof = 21,
    Store = 22,
    Locked = 23,
    TrustSet = 24,
    Feed = 25,
    Stale = 26,
    Network = 27,
    Settings = 28,
    Cancelled = 29,
    Clock = 30,
    /// An error kind newer than this ABI version.
    Other = 99,
}

/// Every status with its name, for `ampoule_status_name` and the header check.
pub const STATUSES: &[(Status, &str)] = &[
    (Status::Ok, "ok"),
    (Status::InvalidArgument, "invalid_argument"),
    (Status::InvalidHandle, "invalid_handle"),
    (Status::BufferTooSmall, "buffer_too_small"),
    (Status::PolicyDocument, "policy_document"),
    (Status::NeedsOtherApp, "needs_other_app"),
    (Status::Panic, "panic"),
    (Status::NotFound, "not_found"),
    (Status::Unsupported, "unsupported"),
    (Status::Io, "io"),
    (Status::Malformed, "malformed"),
    (Status::TooLarge, "too_large"),
    (Status::Signature, "signature"),
    (Status::Key, "key"),
    (Status::Digest, "digest"),
    (Status::Manifest, "manifest"),
    (Status::Policy, "policy"),
    (Status::Destination, "destination"),
    (Status::Model, "model"),
    (Status::Incompatible, "incompatible"),
    (Status::Proof, "proof"),
    (Status::Store, "store"),
    (Status::Locked, "locked"),
    (Status::TrustSet, "trust_set"),
    (Status::Feed, "feed"),
    (Status::Stale, "stale"),
    (Status::Network, "network"),
    (Status::Settings, "settings"),
    (Status::Cancelled, "cancelled"),
    (Status::Clock, "clock"),
    (Status::Other, "other"),
];

impl Status {
    fn of(kind: ErrorKind) -> Status {
        match kind {
            ErrorKind::Io => Status::Io,
            ErrorKind::Malformed => Status::Malformed,
            ErrorKind::TooLarge => Status::TooLarge,
            ErrorKind::Signature => Status::Signature,
            ErrorKind::Key => Status::Key,
            ErrorKind::Digest => Status::Digest,
            ErrorKind::Manifest => Status::Manifest,
            ErrorKind::Policy => Status::Policy,
            ErrorKind::Destination => Status::Destination,
            ErrorKind::Model => Status::Model,
            ErrorKind::Incompatible => Status::Incompatible,
            ErrorKind::Proof => Status::Proof,
            ErrorKind::Store => Status::Store,
            ErrorKind::Locked => Status::Locked,
            ErrorKind::TrustSet => Status::TrustSet,
            ErrorKind::Feed => Status::Feed,
            ErrorKind::Stale => Status::Stale,
            ErrorKind::Network => Status::Network,
            ErrorKind::Settings => Status::Settings,
            ErrorKind::Cancelled => Status::Cancelled,
            ErrorKind::Clock => Status::Clock,
            _ => Status::Other,
        }
    }

    /// The status's name (`incompatible`), as the CLI's `--json` errors name the kinds.
    pub fn name(self) -> &'static str {
        STATUSES
            .iter()
            .find(|(status, _)| *status == self)
            .map_or("other", |(_, name)| name)
    }
}

/// A failed call: its status and the message for the error object.
#[derive(Debug)]
pub struct Failure {
    pub status: Status,
    pub message: String,
}

impl Failure {
    pub fn new(status: Status, message: impl Into<String>) -> Failure {
        Failure {
            status,
            message: message.into(),
        }
    }

    pub fn argument(message: impl Into<String>) -> Failure {
        Failure::new(Status::InvalidArgument, message)
    }

    pub fn handle(what: &str) -> Failure {
        Failure::new(
            Status::InvalidHandle,
            format!(
                "{what} is not a live handle: it was never returned by this library, was freed \
                 already, or is a handle of another type"
            ),
        )
    }
}

impl From<Error> for Failure {
    fn from(error: Error) -> Failure {
        Failure::new(Status::of(error.kind()), error.to_string())
    }
}

/// The error object the caller owns (`ampoule_error` in ampoule.h). The library writes it on
/// every call that takes one and never keeps a pointer to it.
#[repr(C)]
pub struct AmpouleError {
    /// The status the call returned (`AMPOULE_OK` on success).
    pub code: i32,
    /// The bytes of `message` used (UTF-8, at most `MESSAGE_BYTES - 1`).
    pub message_len: u32,
    /// The message, UTF-8, also terminated by a NUL byte after `message_len` bytes.
    pub message: [u8; MESSAGE_BYTES],
}

impl AmpouleError {
    /// Sets the code and message, cutting the message at a UTF-8 boundary to fit with its NUL.
    pub fn set(&mut self, status: Status, message: &str) {
        let mut end = message.len().min(MESSAGE_BYTES - 1);
        while !message.is_char_boundary(end) {
            end -= 1;
        }
        self.code = status as i32;
        self.message[..end].copy_from_slice(&message.as_bytes()[..end]);
        self.message[end] = 0;
        self.message_len = end as u32;
    }
}
