//! The verifier's error type: a kind a program can match on, and a message a person can act on.
//!
//! The message text is part of the API (tests assert it): lowercase, no trailing period, and it
//! names the offending value (entry, key id, expected and found digest, declared and actual size).

use std::fmt;
use std::io;

/// What went wrong, for programs that react differently to different refusals.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
#[non_exhaustive]
pub enum ErrorKind {
    /// Reading or writing a file failed; the bundle itself may be fine.
    Io,
    /// The bundle's layout is wrong: entries, tar headers, trailing bytes, truncation.
    Malformed,
    /// A declared or actual size is over a cap.
    TooLarge,
    /// No valid signature by a trusted key, or a signature did not verify.
    Signature,
    /// A key could not be loaded, or is weak.
    Key,
    /// A digest did not match what the manifest declares.
    Digest,
    /// The manifest is not valid: JSON, field values, unknown format version.
    Manifest,
    /// The bundle is valid but the app's policy refuses it (name, version, app range).
    Policy,
    /// The destination for extraction or installation is not usable.
    Destination,
    /// A model file is not valid in the format its name declares (ONNX, safetensors), or it
    /// is over a reader's cap.
    Model,
    /// The model or label list does not fit what the app's code expects (tensor names,
    /// dtypes, shapes, label count).
    Incompatible,
    /// An inclusion or consistency proof of the audit ledger did not verify.
    Proof,
    /// The on-device store's files are damaged, inconsistent, or were changed outside the store.
    Store,
    /// Another process is updating the store; try again later.
    Locked,
    /// A trust set is not valid, has expired, or is not newer than the one trusted now.
    TrustSet,
    /// A feed is not valid: envelope, JSON, field values, channel, format version.
    Feed,
    /// A validly signed feed is not current: expired, or older than the one accepted before
    /// (a replay). One issued in the future is [`ErrorKind::Clock`].
    Stale,
    /// A transfer failed: connection, timeout, HTTP status, redirect, a server that sent
    /// fewer or more bytes than the feed declares. Trying again later may work.
    Network,
    /// A setting the app gave is not usable (a device id, a bundle or channel name); fix the
    /// app's configuration.
    Settings,
    /// The app cancelled a transfer; a partial download is kept for the next try.
    Cancelled,
    /// This device's clock cannot be right: a validly signed feed was issued after it (a
    /// board without a real-time clock that booted in 1970, say), or it reads earlier than a
    /// time the device verified before. Nothing was changed; set the clock (network time) and
    /// try again.
    Clock,
}

impl ErrorKind {
    /// Whether this is a refusal of the bundle (as opposed to an I/O or usage problem).
    pub fn is_refusal(self) -> bool {
        !matches!(
            self,
            ErrorKind::Io
                | ErrorKind::Destination
                | ErrorKind::Locked
                | ErrorKind::Network
                | ErrorKind::Settings
                | ErrorKind::Cancelled
                | ErrorKind::Clock
        )
    }
}

/// An error from reading, verifying or installing a bundle.
#[derive(Debug)]
pub struct Error {
    kind: ErrorKind,
    message: String,
    source: Option<io::Error>,
}

impl Error {
    /// Makes an error of `kind` with a message.
    pub(crate) fn new(kind: ErrorKind, message: impl Into<String>) -> Self {
        Error {
            kind,
            message: message.into(),
            source: None,
        }
    }

    /// An I/O error with what was being done when it happened.
    pub(crate) fn io(doing: impl Into<String>, source: io::Error) -> Self {
        Error {
            kind: ErrorKind::Io,
            message: doing.into(),
            source: Some(source),
        }
    }

    /// Puts `prefix` (which names where the error happened) before the message.
    pub(crate) fn context(mut self, prefix: impl std::fmt::Display) -> Self {
        self.message = format!("{prefix}: {}", self.message);
        self
    }

    /// What went wrong.
    pub fn kind(&self) -> ErrorKind {
        self.kind
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match &self.source {
            Some(source) => write!(f, "{}: {}", self.message, source),
            None => f.write_str(&self.message),
        }
    }
}

impl std::error::Error for Error {
    fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
        // The source's text is already in Display; exposing it again would print it twice
        // in error chains.
        None
    }
}

/// Shorthand for results of this crate.
pub type Result<T, E = Error> = std::result::Result<T, E>;
