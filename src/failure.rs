//! The command line's error contract: every error ends in one exit code and one documented
//! `kind`, whichever layer raised it. Scripts branch on these, so they are decided here, once,
//! and the README's table of kinds is checked against [`KINDS`] by a test.
//!
//! Exit 2 means the command could not run as asked (a usage error, a file that could not be
//! read or written, a key or trust-set file that does not parse): fixing the command line or
//! the file may help. Exit 1 means a document was looked at and refused: a file given as a
//! bundle that is not a valid bundle, a signature, digest, version, size or policy check, a
//! trust set that is not signed as required or has expired, problems found by `ledger check`.
//!
//! Errors are classified by walking their chain from the outside in: the first typed cause
//! decides. A command that knows better than the library (a channel name typed by a user is a
//! usage error, while the same check on a feed is a refusal) wraps the error in a [`Failure`]
//! of its own kind.

use std::fmt;
use std::path::{Path, PathBuf};

use ampoule_verify::ErrorKind;
use ampoule_verify::format::{entry, limit};

/// Exit codes, documented in `--help` and the README.
pub mod exit {
    /// Success.
    pub const OK: u8 = 0;
    /// A bundle (or feed, trust set, ledger) was refused: verification or policy said no.
    pub const REFUSED: u8 = 1;
    /// Wrong usage, or a file could not be read or written.
    pub const USAGE_OR_IO: u8 = 2;
}

/// What went wrong, as `--json` error documents name it in `kind`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// The command line, or a value given in it, is wrong.
    Usage,
    /// A file could not be read or written.
    Io,
    /// A key file given on the command line is not a usable key file.
    KeyFile,
    /// A trust-set file given on the command line does not parse.
    TrustSetFile,
    /// A check of the release side said no (a publish the tree cannot take, a signature
    /// that does not verify).
    Refused,
    /// A file given as a bundle is not a valid bundle.
    NotABundle,
    /// `ledger check` found problems.
    LedgerProblems,
    /// `diff --fail-on breaking` found a breaking change.
    BreakingChange,
    /// An error of the verifier library, with its own kind.
    Verify(ErrorKind),
}

/// Every kind an error document can carry, with its exit code, in the README's order.
pub const KINDS: &[(&str, u8)] = &[
    ("usage", exit::USAGE_OR_IO),
    ("io", exit::USAGE_OR_IO),
    ("key_file", exit::USAGE_OR_IO),
    ("trust_set_file", exit::USAGE_OR_IO),
    ("destination", exit::USAGE_OR_IO),
    ("locked", exit::USAGE_OR_IO),
    ("network", exit::USAGE_OR_IO),
    ("settings", exit::USAGE_OR_IO),
    ("cancelled", exit::USAGE_OR_IO),
    ("clock", exit::USAGE_OR_IO),
    ("refused", exit::REFUSED),
    ("not_a_bundle", exit::REFUSED),
    ("ledger_problems", exit::REFUSED),
    ("breaking_change", exit::REFUSED),
    ("malformed", exit::REFUSED),
    ("too_large", exit::REFUSED),
    ("signature", exit::REFUSED),
    ("key", exit::REFUSED),
    ("digest", exit::REFUSED),
    ("manifest", exit::REFUSED),
    ("policy", exit::REFUSED),
    ("model", exit::REFUSED),
    ("incompatible", exit::REFUSED),
    ("proof", exit::REFUSED),
    ("store", exit::REFUSED),
    ("trust_set", exit::REFUSED),
    ("feed", exit::REFUSED),
    ("stale", exit::REFUSED),
];

impl Kind {
    /// The name in `--json` error documents.
    pub fn name(self) -> &'static str {
        match self {
            Kind::Usage => "usage",
            Kind::Io => "io",
            Kind::KeyFile => "key_file",
            Kind::TrustSetFile => "trust_set_file",
            Kind::Refused => "refused",
            Kind::NotABundle => "not_a_bundle",
            Kind::LedgerProblems => "ledger_problems",
            Kind::BreakingChange => "breaking_change",
            Kind::Verify(kind) => verify_kind_name(kind),
        }
    }

    /// The exit code: 1 for a refusal, 2 for everything that kept the command from running.
    pub fn exit_code(self) -> u8 {
        match self {
            Kind::Usage | Kind::Io | Kind::KeyFile | Kind::TrustSetFile => exit::USAGE_OR_IO,
            Kind::Refused | Kind::NotABundle | Kind::LedgerProblems | Kind::BreakingChange => {
                exit::REFUSED
            }
            Kind::Verify(kind) if kind.is_refusal() => exit::REFUSED,
            Kind::Verify(_) => exit::USAGE_OR_IO,
        }
    }
}

fn verify_kind_name(kind: ErrorKind) -> &'static str {
    match kind {
        ErrorKind::Io => "io",
        ErrorKind::Malformed => "malformed",
        ErrorKind::TooLarge => "too_large",
        ErrorKind::Signature => "signature",
        ErrorKind::Key => "key",
        ErrorKind::Digest => "digest",
        ErrorKind::Manifest => "manifest",
        ErrorKind::Policy => "policy",
        ErrorKind::Destination => "destination",
        ErrorKind::Model => "model",
        ErrorKind::Incompatible => "incompatible",
        ErrorKind::Proof => "proof",
        ErrorKind::Store => "store",
        ErrorKind::Locked => "locked",
        ErrorKind::TrustSet => "trust_set",
        ErrorKind::Feed => "feed",
        ErrorKind::Stale => "stale",
        ErrorKind::Network => "network",
        ErrorKind::Settings => "settings",
        ErrorKind::Cancelled => "cancelled",
        ErrorKind::Clock => "clock",
        // A kind added to the library later still gets a documented name and the library's
        // own verdict on whether it is a refusal.
        other if other.is_refusal() => "refused",
        _ => "io",
    }
}

/// The kind and exit code of an error: the first typed cause from the outside in decides;
/// an error with none is an I/O error if an `io::Error` caused it, else a usage error.
pub fn classify(err: &anyhow::Error) -> Kind {
    for cause in err.chain() {
        if let Some(f) = cause.downcast_ref::<Failure>() {
            return f.kind;
        }
        if cause.downcast_ref::<Refused>().is_some() {
            return Kind::Refused;
        }
        if cause.downcast_ref::<NotABundle>().is_some() {
            return Kind::NotABundle;
        }
        if let Some(e) = cause.downcast_ref::<ampoule_verify::Error>() {
            return Kind::Verify(e.kind());
        }
    }
    if err
        .chain()
        .any(|c| c.downcast_ref::<std::io::Error>().is_some())
    {
        Kind::Io
    } else {
        Kind::Usage
    }
}

/// Whether the command already printed its own output for this error (a report with
/// `"ok": false`), so only the one-line message on stderr is still due.
pub fn is_reported(err: &anyhow::Error) -> bool {
    err.chain()
        .filter_map(|c| c.downcast_ref::<Failure>())
        .any(|f| f.reported)
}

/// An error whose kind the command decided. Its text is the wrapped error's whole chain.
#[derive(Debug)]
pub struct Failure {
    kind: Kind,
    reported: bool,
    error: anyhow::Error,
}

impl fmt::Display for Failure {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{:#}", self.error)
    }
}

// No source(): Display already holds the chain, and classify must stop at this kind rather
// than find the library's kind inside it.
impl std::error::Error for Failure {}

impl Failure {
    /// `err` as an error of `kind`; its text stays the same.
    pub fn wrap(kind: Kind, err: impl Into<anyhow::Error>) -> anyhow::Error {
        anyhow::Error::new(Failure {
            kind,
            reported: false,
            error: err.into(),
        })
    }

    /// A failure whose report the command has already printed (on stdout, with `--json` as
    /// a document carrying `ok`, `error`, `exit_code` and `kind`).
    pub fn reported(kind: Kind, message: String) -> anyhow::Error {
        anyhow::Error::new(Failure {
            kind,
            reported: true,
            error: anyhow::Error::msg(message),
        })
    }
}

/// `err` as a usage error (exit 2).
pub fn usage(err: impl Into<anyhow::Error>) -> anyhow::Error {
    Failure::wrap(Kind::Usage, err)
}

/// A refusal that did not come from `ampoule-verify` but must exit like one.
#[derive(Debug)]
pub struct Refused(pub String);

impl fmt::Display for Refused {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for Refused {}

/// A file given as a bundle that fails the bundle's layout checks (tar headers, entries).
/// Whatever the file holds, the message names the file and the rule it broke and never
/// shows the file's bytes: it may be a key, a model or someone's notes given by mistake.
#[derive(Debug)]
pub struct NotABundle {
    path: PathBuf,
    reason: String,
    /// Whether the layout was wrong (the file may be no bundle at all, or cut short).
    layout: bool,
}

impl fmt::Display for NotABundle {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "{} is not a valid bundle: {}",
            self.path.display(),
            self.reason
        )?;
        if self.layout {
            f.write_str(
                "; check that it names a bundle made by 'ampoule pack' and that it was copied \
                 whole",
            )?;
        }
        Ok(())
    }
}

impl std::error::Error for NotABundle {}

/// Turns a failure to read `path` as a bundle into [`NotABundle`] when the file broke the
/// bundle's layout rules; other errors (I/O, signatures, policy, digests, the manifest)
/// pass through unchanged, since they are about a file laid out as a bundle. The manifest is
/// parsed only once the layout held (and, when verifying, once its signature did), so a
/// file that merely happens to be given as a bundle never reaches it.
pub fn bundle_error(path: &Path, err: impl Into<anyhow::Error>) -> anyhow::Error {
    let err = err.into();
    let Some(e) = err
        .chain()
        .find_map(|c| c.downcast_ref::<ampoule_verify::Error>())
    else {
        return err;
    };
    let text = e.to_string();
    let (reason, layout) = match e.kind() {
        // The layout decides whether the file is a bundle at all.
        ErrorKind::Malformed if shows_no_file_bytes(&text) => (text, true),
        ErrorKind::Malformed => (layout_reason(&text), true),
        // A size refusal that quotes nothing from the file is about a bundle that is one
        // (too large for this app): it stays as the library says.
        ErrorKind::TooLarge if shows_no_file_bytes(&text) => return err,
        ErrorKind::TooLarge => (
            "an entry declares a size over the format's limits".to_string(),
            false,
        ),
        _ => return err,
    };
    anyhow::Error::new(NotABundle {
        path: path.to_path_buf(),
        reason,
        layout,
    })
}

/// The rule a layout refusal names, matched on the fixed words of the library's message
/// (its tests pin them), for the messages that also quote what the file held.
const LAYOUT_RULES: &[(&str, &str)] = &[
    (
        "checksum",
        "has a tar header whose checksum does not match: the file is damaged or not a bundle",
    ),
    (
        "is not a POSIX ustar header",
        "has a header that is not a POSIX ustar header; write bundles with 'tar --format=ustar'",
    ),
    (
        "only regular files are allowed",
        "has an entry that is not a regular file (a link, device, directory or extended \
         header); only regular files are allowed",
    ),
    (
        "ustar name prefix field",
        "has an entry name in the ustar prefix field; entry names are short plain file names",
    ),
    (
        "is empty or not printable UTF-8",
        "has an entry name that is empty or not printable UTF-8",
    ),
    (
        "is a path",
        "has an entry name that is a path; bundles hold only plain file names",
    ),
    (
        "is not a relative path",
        "has an entry name that is not a relative path of plain names",
    ),
    (
        "unreadable size field",
        "has a tar header whose size field is not an octal number",
    ),
    (
        "is not allowed: entry",
        "has an entry that is not the one its place calls for",
    ),
    (
        "after its last declared entry",
        "has an extra entry after its last declared entry",
    ),
];

fn layout_reason(text: &str) -> String {
    let subject = if text.starts_with("payload") {
        "its payload"
    } else {
        "it"
    };
    match LAYOUT_RULES.iter().find(|(words, _)| text.contains(words)) {
        Some((_, rule)) => format!("{subject} {rule}"),
        None => "its layout is not a bundle's (a POSIX ustar file of manifest.json, \
                 signatures.json, chunks.sha256 and payload.tar.zst, in that order)"
            .to_string(),
    }
}

/// Whether a library message quotes only the format's own entry names: the library quotes
/// what it read (an entry name, a header field, a JSON token), and that may be any byte of
/// whatever file was given.
fn shows_no_file_bytes(text: &str) -> bool {
    if text.chars().any(|c| c.is_control()) {
        return false;
    }
    let known = |quoted: &str| {
        entry::OUTER.contains(&quoted)
            || quoted == entry::LABELS
            || quoted
                .strip_prefix(entry::MODEL_STEM)
                .and_then(|rest| rest.strip_prefix('.'))
                .is_some_and(|ext| {
                    !ext.is_empty()
                        && ext.len() <= limit::MODEL_EXTENSION_CHARS
                        && ext.bytes().all(|b| b.is_ascii_alphanumeric())
                })
    };
    // An apostrophe between letters ("this app's") is English, not a quote.
    let chars: Vec<char> = text.chars().collect();
    let is_quote = |i: usize, q: char| {
        chars[i] == q
            && !(q == '\''
                && i > 0
                && i + 1 < chars.len()
                && chars[i - 1].is_alphanumeric()
                && chars[i + 1].is_alphanumeric())
    };
    for quote in ['\'', '"', '`'] {
        let marks: Vec<usize> = (0..chars.len()).filter(|&i| is_quote(i, quote)).collect();
        // An unbalanced quote means quoted text runs on to the end: not shown.
        if marks.len() % 2 == 1 {
            return false;
        }
        for pair in marks.chunks(2) {
            let inside: String = chars[pair[0] + 1..pair[1]].iter().collect();
            if !known(&inside) {
                return false;
            }
        }
    }
    true
}

/// Counts in messages: "1 hash", "2 hashes".
pub fn count<N: fmt::Display + PartialEq + From<u8>>(n: N, one: &str, many: &str) -> String {
    if n == N::from(1) {
        format!("1 {one}")
    } else {
        format!("{n} {many}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_kind_name_is_in_the_documented_list_with_its_exit_code() {
        let kinds = [
            Kind::Usage,
            Kind::Io,
            Kind::KeyFile,
            Kind::TrustSetFile,
            Kind::Refused,
            Kind::NotABundle,
            Kind::LedgerProblems,
            Kind::BreakingChange,
        ]
        .into_iter()
        .chain(
            [
                ErrorKind::Io,
                ErrorKind::Malformed,
                ErrorKind::TooLarge,
                ErrorKind::Signature,
                ErrorKind::Key,
                ErrorKind::Digest,
                ErrorKind::Manifest,
                ErrorKind::Policy,
                ErrorKind::Destination,
                ErrorKind::Model,
                ErrorKind::Incompatible,
                ErrorKind::Proof,
                ErrorKind::Store,
                ErrorKind::Locked,
                ErrorKind::TrustSet,
                ErrorKind::Feed,
                ErrorKind::Stale,
                ErrorKind::Network,
                ErrorKind::Settings,
                ErrorKind::Cancelled,
                ErrorKind::Clock,
            ]
            .map(Kind::Verify),
        );
        for kind in kinds {
            assert!(
                KINDS.contains(&(kind.name(), kind.exit_code())),
                "{kind:?} is {} with exit {}, not in KINDS",
                kind.name(),
                kind.exit_code()
            );
        }
    }

    #[test]
    fn messages_quoting_anything_but_entry_names_are_not_shown() {
        for (text, shown) in [
            (
                "bundle header of entry 'manifest.json' is truncated: the file ended early",
                true,
            ),
            ("payload entry 'model.onnx' is missing", true),
            ("bundle entry 'aaaa' has an unreadable tar checksum", false),
            ("manifest.json is not valid: unknown field `secret`", false),
            ("entry 'manifest.json' is 'x", false),
            ("entry 'model.' is odd", false),
            ("name \"ustar\u{0}\" here", false),
            (
                "bundle is 20 bytes, over this app's limit of 10 bytes",
                true,
            ),
            ("the payload's entry 'x' is odd", false),
        ] {
            assert_eq!(shows_no_file_bytes(text), shown, "{text}");
        }
    }

    #[test]
    fn counts_use_the_singular_for_one() {
        assert_eq!(count(1usize, "hash", "hashes"), "1 hash");
        assert_eq!(count(0usize, "hash", "hashes"), "0 hashes");
        assert_eq!(count(2u64, "problem", "problems"), "2 problems");
    }
}
