//! The channel feed: the small signed document a device polls to learn which bundle is current
//! on its channel, and the checks that make a stale, replayed or foreign feed useless.
//!
//! A feed file is an envelope holding the signed feed text as a JSON string and the signatures
//! over that text's exact UTF-8 bytes (in the shape bundles use, under [`crate::format::context::FEED`]):
//!
//! ```json
//! {
//!   "feed": "{\"format\":1,\"channel\":\"stable\",\"sequence\":3,...}",
//!   "signatures": [{ "key_id": "...", "signature": "..." }]
//! }
//! ```
//!
//! Carrying the text as a string keeps the signed bytes exact without a canonical JSON form,
//! and lets the device check the signature before it parses the feed itself. Both layers are
//! parsed into derived structs that refuse unknown fields and duplicate keys.
//!
//! The feed binds the release's name, version, size and the SHA-256 of the whole bundle file,
//! so a device downloads at most the signed number of bytes and can tell a wrong file before it
//! opens it. `release: null` means the channel has nothing current (every release on it was
//! withdrawn): a device keeps what it has. A feed from a tree that publishes trust sets also
//! names the tree's current one (`trust_set`: version, relative path, SHA-256), so that
//! devices learn of key rotations; `fetch::Updater::check_with` (feature `fetch`) follows
//! one.
//!
//! Freshness: a feed carries `issued` and `expires`; a device refuses one that expired or was
//! issued in the future, each beyond an allowed clock skew (5 minutes by default, a common
//! allowance for devices whose clocks drift between syncs). The `sequence` only ever grows: a
//! lower one than the device accepted before is a replay and is refused. An equal sequence is
//! the same feed fetched again, which is what every poll between two publishes returns, so it
//! is accepted (and still must not be expired); when the device also remembers the digest of
//! the feed it accepted, an equal sequence with different content is refused, since a
//! publisher never signs two feeds under one sequence.

use std::fmt;

use semver::{Version, VersionReq};
use serde::{Deserialize, Deserializer, Serialize};

use crate::check::bundle::{VerifiedBundle, Verifier};
use crate::check::ledger_proof::{LedgerCheck, LedgerVerifier, Walk};
use crate::check::trust::TrustSet;
use crate::error::{Error, ErrorKind, Result};
use crate::format::digest::Digest;
use crate::format::keys::{KeyId, TrustedKeys};
use crate::format::ledger_entry::{
    DeltaRef, ENTRY_FORMAT, Entry, FeedLedger, LEGACY_ENTRY_FORMAT, MAX_DELTAS, Record,
    invalid as not_published,
};
use crate::format::manifest::check_name;
use crate::format::signature::{SignatureEntry, SignatureReport};
use crate::format::signed::{SignedDocument, Signers, kind};
use crate::format::time::Timestamp;
use crate::format::{FEED_FORMAT_VERSION, ROLLOUT_DOMAIN, delta, limit};

/// The clock skew a device allows unless the app sets its own: 5 minutes.
pub const DEFAULT_CLOCK_SKEW_SECS: u64 = 300;

/// The release a channel currently offers.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Release {
    /// The bundle's name (the model line), as in its manifest.
    pub name: String,
    /// The bundle's version, as in its manifest.
    pub version: Version,
    /// The app versions the bundle works with, as in its manifest; lets a device skip a
    /// download it could not install.
    pub requires_app: VersionReq,
    /// The exact size of the bundle file in bytes; a download stops there.
    pub size: u64,
    /// SHA-256 of the whole bundle file.
    pub sha256: Digest,
    /// Where the bundle is, relative to the feed's own URL (RFC 3986 relative reference made
    /// only of path segments, such as `../bundles/<sha256>.ampoule`).
    pub path: String,
    /// Absolute `http` or `https` URLs of the same file, tried in order after `path`.
    pub mirrors: Vec<String>,
    /// The share of devices that should take this release, 0 to 100 percent.
    pub rollout_percent: u8,
    /// Deltas that rebuild this release from an older release's files (feed format 2; a
    /// format-1 feed has none), at most 8, each for another base. A delta is
    /// only a way to send this release: each names its base by the digest of the base's files,
    /// and its file is `<sha256>.ampoule-delta` beside the bundle at `path`.
    #[serde(default)]
    pub deltas: Vec<DeltaRef>,
}

/// A channel feed (format 2; format 1 is format 2 without `deltas`). Field order here is the order in the JSON.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Feed {
    /// The feed format version; always [`FEED_FORMAT_VERSION`].
    pub format: u32,
    /// The channel this feed is for (`stable`, `beta`).
    pub channel: String,
    /// Grows with every feed the channel publishes; never repeats, never goes down.
    pub sequence: u64,
    /// When the feed was signed.
    pub issued: Timestamp,
    /// After this instant the feed must not be trusted any more.
    pub expires: Timestamp,
    /// The current release, or `null` when the channel has nothing current.
    #[serde(deserialize_with = "required_option")]
    pub release: Option<Release>,
    /// The release tree's current trust set, so that devices learn of key rotations and
    /// revocations; absent in trees that publish none.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub trust_set: Option<TrustSetRef>,
    /// The audit ledger's proof for this feed: signed tree head, the entry this feed's own
    /// change appended and its inclusion proof, and a consistency proof (see `format/ledger_entry.rs`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub ledger: Option<FeedLedger>,
}

/// Where a feed's trust set is and what it must be: a device on an older trust set fetches
/// it, checks the digest, and accepts it only through [`crate::TrustSet::accept_successor`].
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrustSetRef {
    /// The trust set's version.
    pub version: u64,
    /// Where the trust-set file is, relative to the feed's own URL (path segments only, such
    /// as `../trust/2.json`).
    pub path: String,
    /// SHA-256 of the trust-set file's exact bytes.
    pub sha256: Digest,
}

impl TrustSetRef {
    /// Checks every field against the format's rules.
    pub fn validate(&self) -> Result<()> {
        if self.version == 0 {
            return Err(invalid(
                "feed trust_set version is 0; trust-set versions start at 1".into(),
            ));
        }
        check_relative_path("trust_set", &self.path)?;
        Ok(())
    }

    /// The trust-set file's URL: `path` resolved against the feed's URL.
    pub fn url(&self, feed_url: &str) -> Result<String> {
        resolve(feed_url, &self.path)
    }
}

/// Makes `release` required in the JSON: `null` must be written out, a missing field is an
/// error (serde would otherwise read a missing `Option` as `None`).
fn required_option<'de, D: Deserializer<'de>, T: Deserialize<'de>>(
    d: D,
) -> std::result::Result<Option<T>, D::Error> {
    Option::deserialize(d)
}

/// The file a channel serves: the feed's exact text and the signatures over it.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SignedFeed {
    /// The feed document's exact text; the signatures cover its UTF-8 bytes.
    pub feed: String,
    /// Signatures over `context::FEED || feed`, in key-id order.
    pub signatures: Vec<SignatureEntry>,
}

fn invalid(message: String) -> Error {
    Error::new(ErrorKind::Feed, message)
}

/// Checks a channel name: the same rule as bundle names (1 to 64 lowercase letters, digits,
/// `-`, `_`, `.`, starting with a letter or digit), so a channel name is always a safe file name.
pub fn check_channel(name: &str) -> Result<()> {
    check_name(name).map_err(|_| {
        invalid(format!(
            "channel name '{}' is not allowed: use 1 to {} lowercase letters, digits, '-', '_' or '.', \
             starting with a letter or digit",
            name.chars().take(80).collect::<String>().escape_debug(),
            limit::NAME_BYTES
        ))
    })
}

/// Whether `path` is a relative reference made only of path segments: no scheme, no leading
/// `/`, no query, fragment or percent-escapes, no empty or `.` segments, and not ending in `..`.
/// Refuses a feed `path` field (of `what`: release, trust_set) that is not a relative path of
/// plain segments.
fn check_relative_path(what: &str, path: &str) -> Result<()> {
    if is_relative_path(path) {
        return Ok(());
    }
    Err(invalid(format!(
        "feed {what} path '{}' is not a relative path of plain segments \
         (letters, digits, '-', '.', '_', '~', and leading '..')",
        path.chars().take(120).collect::<String>().escape_debug()
    )))
}

fn is_relative_path(path: &str) -> bool {
    let segment_ok = |s: &str| {
        !s.is_empty()
            && s != "."
            && s.bytes()
                .all(|b| b.is_ascii_alphanumeric() || b"-._~".contains(&b))
    };
    !path.is_empty()
        && path.len() <= limit::URL_BYTES
        && path.split('/').all(segment_ok)
        && path.rsplit('/').next() != Some("..")
}

/// Whether `url` is an absolute `http` or `https` URL of printable ASCII with a host.
fn is_absolute_http_url(url: &str) -> bool {
    let rest = url
        .strip_prefix("https://")
        .or_else(|| url.strip_prefix("http://"));
    let printable = url
        .bytes()
        .all(|b| b.is_ascii_graphic() && !b"\"<>\\^`{|}#".contains(&b));
    match rest {
        Some(rest) => {
            let host = rest.split(['/', '?']).next().unwrap_or("");
            printable && url.len() <= limit::URL_BYTES && !host.is_empty()
        }
        None => false,
    }
}

impl Release {
    pub_for_release! {
        /// Checks every field against the format's rules.
        fn validate(&self) -> Result<()> {
            check_name(&self.name).map_err(|e| invalid(format!("feed release: {e}")))?;
            if self.rollout_percent > 100 {
                return Err(invalid(format!(
                    "feed release rollout_percent is {}; it must be 0 to 100",
                    self.rollout_percent
                )));
            }
            check_relative_path("release", &self.path)?;
            if self.mirrors.len() > limit::MIRRORS {
                return Err(invalid(format!(
                    "feed release lists {} mirrors, over the limit of {}",
                    self.mirrors.len(),
                    limit::MIRRORS
                )));
            }
            if let Some(bad) = self.mirrors.iter().find(|m| !is_absolute_http_url(m)) {
                return Err(invalid(format!(
                    "feed release mirror '{}' is not an absolute http or https URL",
                    bad.chars().take(120).collect::<String>().escape_debug()
                )));
            }
            self.validate_deltas()
        }
    }

    /// The delta rules: at most [`MAX_DELTAS`], one per base, each smaller than the bundle
    /// (a delta as large as the bundle saves a device nothing) and not the bundle itself.
    fn validate_deltas(&self) -> Result<()> {
        if self.deltas.len() > MAX_DELTAS {
            return Err(invalid(format!(
                "feed release lists {} deltas, over the limit of {MAX_DELTAS}",
                self.deltas.len()
            )));
        }
        for (i, delta) in self.deltas.iter().enumerate() {
            if delta.size == 0 || delta.size >= self.size {
                return Err(invalid(format!(
                    "feed release delta {} is {} bytes; a delta is at least 1 byte and smaller \
                     than its bundle ({} bytes)",
                    delta.sha256, delta.size, self.size
                )));
            }
            if delta.sha256 == self.sha256 {
                return Err(invalid(format!(
                    "feed release delta {} has the bundle's own digest",
                    delta.sha256
                )));
            }
            if self.deltas[..i].iter().any(|d| d.base == delta.base) {
                return Err(invalid(format!(
                    "feed release lists two deltas for base {}; a base has at most one",
                    delta.base
                )));
            }
        }
        Ok(())
    }

    pub_for_release! {
        /// The URL of one of this release's deltas: `<sha256>.ampoule-delta` resolved against
        /// the bundle's URL (`path` resolved against the feed's URL).
        fn delta_url(&self, feed_url: &str, delta: &DeltaRef) -> Result<String> {
            let bundle = resolve(feed_url, &self.path)?;
            resolve(&bundle, &format!("{}.{}", delta.sha256, delta::EXTENSION))
        }
    }

    pub_for_release! {
        /// The URLs to try for the bundle, in order: `path` resolved against the feed's URL,
        /// then the mirrors.
        fn urls(&self, feed_url: &str) -> Result<Vec<String>> {
            let mut urls = vec![resolve(feed_url, &self.path)?];
            urls.extend(self.mirrors.iter().cloned());
            Ok(urls)
        }
    }
}

impl Feed {
    /// Parses feed text strictly (no unknown fields, no duplicate keys) and validates it.
    pub fn from_json(bytes: &[u8]) -> Result<Feed> {
        let feed: Feed = serde_json::from_slice(bytes)
            .map_err(|e| invalid(format!("signed feed is not valid: {e}")))?;
        feed.validate()?;
        Ok(feed)
    }

    /// The feed text as the publisher signs it: compact JSON in field order.
    pub fn to_json(&self) -> String {
        serde_json::to_string(self).expect("a feed of plain strings and numbers always serializes")
    }

    /// Checks every field against the format's rules.
    pub fn validate(&self) -> Result<()> {
        if !(1..=FEED_FORMAT_VERSION).contains(&self.format) {
            return Err(invalid(format!(
                "feed format {} is not supported (this reader knows formats 1 to \
                 {FEED_FORMAT_VERSION})",
                self.format
            )));
        }
        if self.format == 1 && self.release.as_ref().is_some_and(|r| !r.deltas.is_empty()) {
            return Err(invalid(
                "feed format 1 lists deltas; deltas came with format 2".into(),
            ));
        }
        check_channel(&self.channel)?;
        if self.expires <= self.issued {
            return Err(invalid(format!(
                "feed expires at {}, not after it was issued at {}",
                self.expires, self.issued
            )));
        }
        if let Some(release) = &self.release {
            release.validate()?;
        }
        if let Some(trust_set) = &self.trust_set {
            trust_set.validate()?;
        }
        Ok(())
    }
}

impl SignedFeed {
    /// Parses a feed file's envelope strictly, refusing it unread when it is over
    /// [`limit::FEED_BYTES`]. The feed inside is not parsed: its signature comes first.
    pub fn from_json(bytes: &[u8]) -> Result<SignedFeed> {
        if bytes.len() as u64 > limit::FEED_BYTES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "feed is {} bytes, over the limit of {} bytes",
                    bytes.len(),
                    limit::FEED_BYTES
                ),
            ));
        }
        let signed: SignedFeed = serde_json::from_slice(bytes)
            .map_err(|e| invalid(format!("feed is not valid: {e}")))?;
        if signed.signatures.len() > limit::SIGNATURES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "feed holds {} signatures, over the limit of {}",
                    signed.signatures.len(),
                    limit::SIGNATURES
                ),
            ));
        }
        Ok(signed)
    }

    /// The feed file as the publisher writes it: pretty JSON, signatures in key-id order, a
    /// final newline.
    pub fn to_json(&self) -> Vec<u8> {
        let mut sorted = self.clone();
        sorted.signatures.sort_by_key(|s| s.key_id);
        let mut bytes =
            serde_json::to_vec_pretty(&sorted).expect("a feed envelope of strings serializes");
        bytes.push(b'\n');
        bytes
    }
}

/// What a device accepts as its channel's feed. Trusted keys and the channel are required.
#[derive(Debug, Clone)]
pub struct FeedVerifier {
    signers: Signers<kind::Feed>,
    channel: String,
    skew_secs: u64,
    last: Option<(u64, Option<Digest>)>,
    /// The version and expiry of the trust set the keys came from, if they did.
    trust: Option<(u64, Timestamp)>,
    ledger: Option<LedgerVerifier>,
    expiry: Expiry,
}

/// Whether a feed's `expires` is checked. Always, except in an offline install
/// ([`crate::Device::install_offline`]): a device without a network cannot tell a fresh feed
/// from a stale one, so the one check it cannot make is not made. Crate-private, so that no
/// app can switch expiry off for a feed it fetched.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Expiry {
    Checked,
    NotCheckedOffline,
}

impl FeedVerifier {
    /// A verifier for feeds of `channel` signed by one of `keys`. Refuses an empty key set and
    /// a channel name that no feed could carry.
    pub fn new(keys: TrustedKeys, channel: impl Into<String>) -> Result<Self> {
        if keys.is_empty() {
            return Err(Error::new(
                ErrorKind::Key,
                "no trusted keys given; a feed verifier needs at least one public key",
            ));
        }
        let channel = channel.into();
        check_channel(&channel)?;
        Ok(FeedVerifier {
            signers: Signers::new(keys, 1)?,
            channel,
            skew_secs: DEFAULT_CLOCK_SKEW_SECS,
            last: None,
            trust: None,
            ledger: None,
            expiry: Expiry::Checked,
        })
    }

    /// A verifier for feeds of `channel` under a verified trust set: signed by the set's
    /// threshold of distinct keys with the feed role. Once the set has expired, every feed is
    /// refused: an expired set's keys only ever authorise a successor set.
    pub fn from_trust_set(trust: &TrustSet, channel: impl Into<String>) -> Result<Self> {
        let signers = trust.signers::<kind::Feed>()?;
        let mut verifier = Self::new(signers.keys().clone(), channel)?;
        verifier.signers = signers;
        verifier.trust = Some((trust.version(), trust.expires()));
        Ok(verifier)
    }

    /// This verifier with the feed keys and threshold of `trust` instead of its own; the
    /// channel, clock skew and last accepted feed stay, and so does a ledger requirement, its
    /// tree heads then checked with the tree-head keys of `trust`. For a device that just
    /// accepted a newer trust set.
    pub fn with_trust_set(self, trust: &TrustSet) -> Result<Self> {
        let mut next = Self::from_trust_set(trust, self.channel)?;
        next.skew_secs = self.skew_secs;
        next.last = self.last;
        next.expiry = self.expiry;
        // Dropping the requirement here would let a rotation switch the ledger check off.
        next.ledger = self.ledger.map(|l| l.with_trust_set(trust)).transpose()?;
        Ok(next)
    }

    /// The version of the trust set this verifier's keys came from, if they came from one.
    pub fn trust_set_version(&self) -> Option<u64> {
        self.trust.map(|(version, _)| version)
    }

    /// Requires at least `n` distinct trusted keys to have signed (at least 1).
    pub fn threshold(mut self, n: usize) -> Self {
        self.signers = self.signers.with_threshold(n);
        self
    }

    /// How far the device's clock may be off, in seconds, when checking `issued` and `expires`.
    pub fn clock_skew_secs(mut self, secs: u64) -> Self {
        self.skew_secs = secs;
        self
    }

    /// The sequence of the feed this device accepted last, and that feed's digest if the
    /// device kept it ([`VerifiedFeed::digest`]): lower sequences are refused as replays, and
    /// an equal sequence with another digest is refused as a second feed under one sequence.
    pub fn last_accepted(mut self, sequence: u64, digest: Option<Digest>) -> Self {
        self.last = Some((sequence, digest));
        self
    }

    /// Requires every feed to carry a ledger proof that `ledger` accepts (see
    /// [`LedgerVerifier::check`]); the verified tree head is then in [`VerifiedFeed::ledger`].
    pub fn require_ledger(mut self, ledger: LedgerVerifier) -> Self {
        self.ledger = Some(ledger);
        self
    }

    /// This verifier for an offline install: every check but the feed's expiry (see
    /// [`Expiry`]).
    pub(crate) fn offline(mut self) -> Self {
        self.expiry = Expiry::NotCheckedOffline;
        self
    }

    /// Checks the envelope's signatures alone, the feed text unparsed.
    pub(crate) fn check_signatures(&self, signed: &SignedFeed) -> Result<SignatureReport> {
        SignedDocument::<kind::Feed>::new(signed.feed.as_bytes(), &signed.signatures)?
            .check(&self.signers, "feed")
    }

    /// The sequence of the feed the device accepted last, if any.
    pub(crate) fn last_sequence(&self) -> Option<u64> {
        self.last.map(|(sequence, _)| sequence)
    }

    /// Whether a feed expiring at `expires` is still current at `now`, under the same skew
    /// and the same offline rule as [`FeedVerifier::verify`].
    pub(crate) fn is_current(&self, expires: Timestamp, now: Timestamp) -> bool {
        self.expiry != Expiry::Checked
            || expires.unix().saturating_add(self.skew_secs) >= now.unix()
    }

    /// The channel this verifier accepts.
    pub fn channel(&self) -> &str {
        &self.channel
    }

    /// Checks a feed file: size, envelope, signatures by trusted keys over the exact feed
    /// text, then the feed itself, its channel, its times against `now`, and its sequence.
    ///
    /// With [`require_ledger`](FeedVerifier::require_ledger), a device that missed ledger
    /// appends needs the tree's consistency steps: use
    /// [`verify_with_steps`](FeedVerifier::verify_with_steps) (the updater does).
    pub fn verify(&self, bytes: &[u8], now: Timestamp) -> Result<VerifiedFeed> {
        self.verify_with_steps(bytes, now, &mut |size| {
            Err(Error::new(
                ErrorKind::Proof,
                format!(
                    "the feed's ledger proof does not start at tree size {size}, which this \
                     device saw last; fetch {} from the release tree to catch up",
                    crate::format::ledger_entry::step_path(size)
                ),
            ))
        })
    }

    /// As [`verify`](FeedVerifier::verify), fetching `ledger/consistency/<size>.json` of the
    /// feed's release tree through `step` when the ledger check needs it.
    pub fn verify_with_steps(
        &self,
        bytes: &[u8],
        now: Timestamp,
        step: &mut dyn FnMut(u64) -> Result<Vec<u8>>,
    ) -> Result<VerifiedFeed> {
        let (feed, walk) = self.verify_before_steps(bytes, now)?;
        if let Some(mut walk) = walk {
            while let Some(size) = walk.needs() {
                let bytes = step(size)?;
                walk.advance(&bytes)?;
            }
        }
        Ok(feed)
    }

    /// [`FeedVerifier::verify_with_steps`] up to the ledger's consistency steps: the feed,
    /// valid only once the returned walk (if any) has reached its end.
    pub(crate) fn verify_before_steps(
        &self,
        bytes: &[u8],
        now: Timestamp,
    ) -> Result<(VerifiedFeed, Option<Walk>)> {
        if let Some((version, expires)) = self.trust
            && now > expires
        {
            return Err(Error::new(
                ErrorKind::TrustSet,
                format!(
                    "trust set version {version} expired at {expires} (it is now {now}); a newer \
                     trust set signed by the keys trusted now is needed"
                ),
            ));
        }
        let signed = SignedFeed::from_json(bytes)?;
        let report = self.check_signatures(&signed)?;
        let feed = Feed::from_json(signed.feed.as_bytes())?;
        if feed.channel != self.channel {
            return Err(invalid(format!(
                "feed is for channel '{}' but this device follows channel '{}'",
                feed.channel, self.channel
            )));
        }
        let stale = |message: String| Err(Error::new(ErrorKind::Stale, message));
        if feed.issued.unix() > now.unix().saturating_add(self.skew_secs) {
            // Signed by trusted keys, so the clock is the likelier fault: a failure to retry
            // once the clock is set, not a refusal of the feed.
            return Err(Error::new(
                ErrorKind::Clock,
                format!(
                    "feed was issued at {}, after this device's clock ({now}) by more than the \
                 allowed {} s; check the device clock",
                    feed.issued, self.skew_secs
                ),
            ));
        }
        if self.expiry == Expiry::Checked
            && feed.expires.unix().saturating_add(self.skew_secs) < now.unix()
        {
            return stale(format!(
                "feed expired at {} (device clock {now}, allowed skew {} s); the publisher \
                 must publish a fresh feed",
                feed.expires, self.skew_secs
            ));
        }
        let digest = Digest::of(signed.feed.as_bytes());
        let mut is_new = true;
        if let Some((last, last_digest)) = self.last {
            if feed.sequence < last {
                return stale(format!(
                    "feed sequence {} is lower than {last}, the last one this device accepted; \
                     refusing a replayed older feed",
                    feed.sequence
                ));
            }
            if feed.sequence == last {
                if let Some(d) = last_digest.filter(|d| *d != digest) {
                    return stale(format!(
                        "feed sequence {last} was accepted before with digest {d}, but this feed \
                         under the same sequence has digest {digest}; a publisher never signs \
                         two feeds under one sequence"
                    ));
                }
                is_new = false;
            }
        }
        let (ledger, walk) = match &self.ledger {
            Some(verifier) => {
                let (check, walk) = verifier.check_before_steps(&feed)?;
                (Some(check), walk)
            }
            None => (None, None),
        };
        let verified = VerifiedFeed {
            feed,
            digest,
            report,
            is_new,
            ledger,
            bytes: bytes.to_vec(),
        };
        Ok((verified, walk))
    }
}

/// A feed that passed every check of the device's feed verifier (signatures, channel,
/// freshness, sequence, the ledger's proofs). Only this crate can make one.
#[derive(Clone)]
pub struct VerifiedFeed {
    feed: Feed,
    digest: Digest,
    report: SignatureReport,
    is_new: bool,
    ledger: Option<LedgerCheck>,
    /// The feed file exactly as it was verified: the store keeps it, and believes the
    /// sequence and tree head it remembers only as far as this signed document backs them.
    bytes: Vec<u8>,
}

impl fmt::Debug for VerifiedFeed {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("VerifiedFeed")
            .field("channel", &self.feed.channel)
            .field("sequence", &self.feed.sequence)
            .field("release", &self.feed.release.as_ref().map(|r| &r.version))
            .field("signers", &self.report.valid)
            .finish_non_exhaustive()
    }
}

impl VerifiedFeed {
    /// The feed file exactly as it was verified.
    pub(crate) fn signed_bytes(&self) -> &[u8] {
        &self.bytes
    }

    pub_for_release! {
        /// What the ledger check established, when the verifier required one: the device
        /// remembers its tree head ([`crate::Store::remember_tree_head`]) once it acted on the feed.
        fn ledger(&self) -> Option<&LedgerCheck> {
            self.ledger.as_ref()
        }
    }

    pub_for_release! {
        /// The verified feed.
        fn feed(&self) -> &Feed {
            &self.feed
        }
    }

    /// The current release, if the channel has one.
    pub fn release(&self) -> Option<&Release> {
        self.feed.release.as_ref()
    }

    pub_for_release! {
        /// The trust set the feed names, if it names one.
        fn trust_set(&self) -> Option<&TrustSetRef> {
            self.feed.trust_set.as_ref()
        }
    }

    /// When the feed stops being trusted: a device that finds no newer feed by then refuses
    /// this one, so a cut-off device notices.
    pub fn expires(&self) -> Timestamp {
        self.feed.expires
    }

    /// The feed's sequence: the store remembers it (with the digest of the feed's text) once
    /// the device acted on the feed, and refuses a lower one from then on.
    pub fn sequence(&self) -> u64 {
        self.feed.sequence
    }

    pub_for_release! {
        /// SHA-256 of the signed feed text (the store keeps it; apps need not).
        fn digest(&self) -> Digest {
            self.digest
        }
    }

    pub_for_release! {
        /// Whether the sequence is higher than the last accepted one (false when this is the
        /// same feed again).
        fn is_new(&self) -> bool {
            self.is_new
        }
    }

    pub_for_release! {
        /// The trusted keys whose signatures verified.
        fn signers(&self) -> &[KeyId] {
            &self.report.valid
        }
    }
}

/// The rollout bucket of a device for a release, 0 to 9999: the first 8 bytes of
/// SHA-256(ROLLOUT_DOMAIN || length of id as 4 bytes big-endian || id || bundle digest) as a
/// big-endian integer, modulo 10000. Stable: the same device and bundle always give the same
/// bucket; a new bundle reshuffles which devices go first.
pub fn rollout_bucket(device_id: &str, bundle: &Digest) -> u16 {
    let mut hasher = crate::format::digest::Hasher::new();
    hasher.update(ROLLOUT_DOMAIN);
    hasher.update(&(device_id.len() as u32).to_be_bytes());
    hasher.update(device_id.as_bytes());
    hasher.update(bundle.as_bytes());
    let digest = hasher.finish();
    let mut first = [0u8; 8];
    first.copy_from_slice(&digest.as_bytes()[..8]);
    // 2^64 mod 10000 = 1616, so the modulo favours the lowest buckets by 1 part in about
    // 10^15: far below anything a rollout could notice.
    (u64::from_be_bytes(first) % 10_000) as u16
}

/// Whether a device takes a release rolled out to `percent` percent of devices: its bucket
/// is below `percent` × 100. 0 takes no device, 100 (or more) every device.
pub fn in_rollout(device_id: &str, bundle: &Digest, percent: u8) -> bool {
    u32::from(rollout_bucket(device_id, bundle)) < u32::from(percent.min(100)) * 100
}

/// Resolves a relative path reference against an absolute `http`/`https` base URL, as RFC 3986
/// section 5.2 does (merge, then remove dot segments); the base's query and fragment are dropped.
pub fn resolve(base: &str, reference: &str) -> Result<String> {
    let bad_base = || {
        invalid(format!(
            "'{}' is not an absolute http or https URL",
            base.chars().take(120).collect::<String>().escape_debug()
        ))
    };
    if !is_absolute_http_url(base) {
        return Err(bad_base());
    }
    let scheme_end = base.find("://").ok_or_else(bad_base)? + 3;
    let without_query = &base[..base.find(['?', '#']).unwrap_or(base.len())];
    let (origin, path) = match without_query[scheme_end..].find('/') {
        Some(i) => without_query.split_at(scheme_end + i),
        None => (without_query, ""),
    };
    if reference.starts_with('/') || reference.contains([':', '?', '#']) {
        return Err(invalid(format!(
            "'{}' is not a relative path reference",
            reference
                .chars()
                .take(120)
                .collect::<String>()
                .escape_debug()
        )));
    }
    // RFC 3986 section 5.2.3: a base with an authority and an empty path merges as "/" + ref.
    let merged = match path.rfind('/') {
        Some(i) => format!("{}{reference}", &path[..=i]),
        None => format!("/{reference}"),
    };
    Ok(format!("{origin}{}", remove_dot_segments(&merged)))
}

/// RFC 3986 section 5.2.4, step by step (paths here are at most a few kilobytes).
fn remove_dot_segments(path: &str) -> String {
    let mut input = path.to_string();
    let mut output = String::with_capacity(path.len());
    let pop = |output: &mut String| {
        let cut = output.rfind('/').unwrap_or(0);
        output.truncate(cut);
    };
    while !input.is_empty() {
        if input.starts_with("../") {
            input.replace_range(..3, "");
        } else if input.starts_with("./") || input.starts_with("/./") {
            // Steps A ("./" goes) and B ("/./" becomes "/") both drop two bytes.
            input.replace_range(..2, "");
        } else if input == "/." {
            input = "/".into();
        } else if input.starts_with("/../") {
            input.replace_range(..3, "");
            pop(&mut output);
        } else if input == "/.." {
            input = "/".into();
            pop(&mut output);
        } else if input == "." || input == ".." {
            input.clear();
        } else {
            let start = usize::from(input.starts_with('/'));
            let end = input[start..].find('/').map_or(input.len(), |i| i + start);
            output.push_str(&input[..end]);
            input.replace_range(..end, "");
        }
    }
    output
}

/// What a verified feed means for one device, decided before a byte of the bundle is fetched.
#[derive(Debug)]
pub(crate) enum Decision {
    /// The channel offers nothing.
    NothingOffered,
    /// The release is not newer than the highest version the device accepted.
    UpToDate,
    /// The release needs another app version.
    NeedsOtherApp(Release),
    /// The release is rolled out to a share of devices without this one.
    NotInRollout(u16),
    /// Download and check this release.
    Fetch(Release),
}

impl VerifiedFeed {
    /// Decides by the bundle name the app runs, the highest version it accepted, its version
    /// and the rollout. A feed offering another model line than the app runs is refused.
    pub(crate) fn decide(&self, bundles: &Verifier, device_id: &str) -> Result<Decision> {
        let Some(release) = self.release().cloned() else {
            return Ok(Decision::NothingOffered);
        };
        if let Some(name) = bundles.required_name()
            && release.name != name
        {
            return Err(Error::new(
                ErrorKind::Policy,
                format!(
                    "feed offers bundle '{}' but this app accepts only '{name}'",
                    release.name
                ),
            ));
        }
        let newer = |installed: &Version| {
            release.version.cmp_precedence(installed) == std::cmp::Ordering::Greater
        };
        if !bundles.installed_version().is_none_or(newer) {
            return Ok(Decision::UpToDate);
        }
        if let Some(app) = bundles.app_version()
            && !release.requires_app.matches(app)
        {
            return Ok(Decision::NeedsOtherApp(release));
        }
        let bucket = rollout_bucket(device_id, &release.sha256);
        if !in_rollout(device_id, &release.sha256, release.rollout_percent) {
            return Ok(Decision::NotInRollout(bucket));
        }
        Ok(Decision::Fetch(release))
    }

    /// Checks a verified bundle against what this feed offered: the same name and version,
    /// and (with the ledger) the manifest the feed's entry logs for its offer, so a bundle signed but never
    /// published is refused even when a feed points to it.
    pub(crate) fn check_bundle(&self, release: &Release, bundle: &VerifiedBundle) -> Result<()> {
        self.check_manifest(release, bundle.manifest(), bundle.manifest_bytes())
    }

    /// Whether the feed's ledger entry logs the manifest of what it offers: once
    /// [`VerifiedFeed::check_manifest`] passed, a manifest is then proven to be the offered
    /// release's own, whoever served it.
    pub(crate) fn logs_offered_manifest(&self) -> bool {
        self.ledger()
            .and_then(|l| l.entry.as_ref())
            .and_then(|e| e.offered())
            .is_some()
    }

    /// [`VerifiedFeed::check_bundle`] on a manifest alone (its parsed form and exact bytes):
    /// the session checks a bundle's head with it before the payload is downloaded.
    pub(crate) fn check_manifest(
        &self,
        release: &Release,
        m: &crate::format::manifest::Manifest,
        manifest_bytes: &[u8],
    ) -> Result<()> {
        if m.name != release.name || m.version != release.version {
            return Err(Error::new(
                ErrorKind::Feed,
                format!(
                    "feed announced {} {} but the bundle it points to is {} {}",
                    release.name, release.version, m.name, m.version
                ),
            ));
        }
        let logged = self
            .ledger()
            .and_then(|l| l.entry.as_ref())
            .and_then(|e| e.offered());
        if let Some(offered) = logged {
            let manifest_sha256 = Digest::of(manifest_bytes);
            if manifest_sha256 != offered.manifest_digest {
                return Err(Error::new(
                    ErrorKind::Proof,
                    format!(
                        "bundle {} {} ({}) was signed but never published: its manifest has \
                         sha256 {manifest_sha256}, but the ledger's entry logs {}",
                        m.name, m.version, release.sha256, offered.manifest_digest
                    ),
                ));
            }
        }
        Ok(())
    }
}

/// The part of the ledger check that reads a feed: its entry, the release it must log, and the
/// inclusion proof; the tree head's signatures and the walk come from `check/ledger_proof.rs`.
impl LedgerVerifier {
    /// Checks the ledger object of an already authenticated `feed`: the tree head's
    /// signatures; that the entry it carries is the one its own change appended (format 2,
    /// the feed's channel and sequence, offering what the feed offers) and the head's last
    /// leaf; and that the tree extends the remembered head. `step` fetches
    /// `ledger/consistency/<size>.json` when the device missed appends.
    pub fn check(
        &self,
        feed: &Feed,
        step: &mut dyn FnMut(u64) -> Result<Vec<u8>>,
    ) -> Result<LedgerCheck> {
        let (check, walk) = self.check_before_steps(feed)?;
        if let Some(mut walk) = walk {
            while let Some(size) = walk.needs() {
                let bytes = step(size)?;
                walk.advance(&bytes)?;
            }
        }
        Ok(check)
    }

    /// [`LedgerVerifier::check`] up to the consistency steps: the result, and the walk still
    /// to make when the feed's proof does not start at the remembered head.
    pub(crate) fn check_before_steps(&self, feed: &Feed) -> Result<(LedgerCheck, Option<Walk>)> {
        let refuse = |why: String| {
            let what = match &feed.release {
                Some(r) => format!(
                    "feed sequence {} offers {} {} (sha256 {}), but the ledger does not log that \
                     as channel {}'s current release",
                    feed.sequence, r.name, r.version, r.sha256, feed.channel
                ),
                None => format!(
                    "feed sequence {} offers nothing, but the ledger does not log that as \
                     channel {}'s current state",
                    feed.sequence, feed.channel
                ),
            };
            not_published(format!("{what}: {why}"))
        };
        let Some(ledger) = &feed.ledger else {
            return Err(refuse(
                "the feed carries no ledger proof, and this device requires one".into(),
            ));
        };
        let report = self.verify_head(&ledger.tree_head)?;
        let head = ledger.tree_head.head();
        let entry = feed_entry(feed, ledger, &head).map_err(refuse)?;
        let walk = match &self.remembered {
            Some(seen) => Walk::start(seen, &head, &ledger.consistency)?,
            None => None,
        };
        let check = LedgerCheck {
            tree_head: head,
            signers: report.valid,
            entry: Some(entry),
        };
        Ok((check, walk))
    }
}

/// The entry a feed carries, checked to be the one its own change appended: format 2, the
/// feed's channel and sequence, offering exactly what the feed offers, and the last leaf of
/// the signed tree head the feed carries. Being the last leaf makes it the newest entry of the
/// whole ledger at that head, so of its channel too: an older entry (a withdrawn release's
/// publish) is never the last leaf of a head that logged something after it. Returns the
/// reason, for the caller's message, when it is not.
fn feed_entry(
    feed: &Feed,
    ledger: &FeedLedger,
    head: &crate::format::merkle::TreeHead,
) -> std::result::Result<Entry, String> {
    let (Some(text), Some(inclusion)) = (&ledger.entry, &ledger.inclusion) else {
        return Err("the feed carries no ledger entry".into());
    };
    let entry = match Record::from_bytes(text.as_bytes()).map_err(|e| e.to_string())? {
        Record::Bundle(entry) => entry,
        Record::TrustSet(t) => {
            return Err(format!(
                "the ledger entry the feed carries logs trust set version {}, not the feed's \
                 own change",
                t.trust_set_version
            ));
        }
    };
    if !entry.is_bound() {
        return Err(format!(
            "the ledger entry the feed carries is in the old entry format (format \
             {LEGACY_ENTRY_FORMAT}), which does not bind a feed; the publisher must publish or \
             renew the channel with a version of ampoule that writes format {ENTRY_FORMAT}"
        ));
    }
    if entry.channel != feed.channel {
        return Err(format!(
            "the ledger entry the feed carries is for channel {}",
            entry.channel
        ));
    }
    if entry.feed_sequence != feed.sequence {
        return Err(format!(
            "the ledger entry the feed carries was appended for feed sequence {}, not {}",
            entry.feed_sequence, feed.sequence
        ));
    }
    let describe = |o: Option<(&str, &Version, &Digest, u8)>| match o {
        Some((name, version, sha256, rollout)) => {
            format!("{name} {version} (sha256 {sha256}) at {rollout}% rollout")
        }
        None => "nothing".to_string(),
    };
    let logged = entry.offered().map(|o| {
        (
            o.bundle.as_str(),
            &o.version,
            &o.bundle_digest,
            o.rollout_percent,
        )
    });
    let offered = feed
        .release
        .as_ref()
        .map(|r| (r.name.as_str(), &r.version, &r.sha256, r.rollout_percent));
    let same = match (logged, offered) {
        (None, None) => true,
        (Some(a), Some(b)) => a == b,
        _ => false,
    };
    if !same {
        return Err(format!(
            "the ledger entry the feed carries offers {}, not {}",
            describe(logged),
            describe(offered)
        ));
    }
    let logged_deltas = entry.offered().map_or(&[][..], |o| &o.deltas[..]);
    let offered_deltas = feed.release.as_ref().map_or(&[][..], |r| &r.deltas[..]);
    if logged_deltas != offered_deltas {
        return Err(format!(
            "the ledger entry the feed carries lists {} delta(s) for this release, and the feed \
             {} that differ from them; a feed offers only the deltas the ledger logged",
            logged_deltas.len(),
            offered_deltas.len()
        ));
    }
    let last = head.tree_size.checked_sub(1);
    if Some(inclusion.leaf_index) != last {
        return Err(format!(
            "the ledger entry the feed carries is entry {} of the tree head of size {}, not its \
             newest; an older entry is not the channel's current state",
            inclusion.leaf_index, head.tree_size
        ));
    }
    inclusion
        .verify(&crate::format::merkle::leaf_hash(text.as_bytes()), head)
        .map_err(|e| {
            format!(
                "the ledger entry the feed carries is not in the ledger's tree head of size {} \
                 ({e})",
                head.tree_size
            )
        })?;
    Ok(entry)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn resolves_the_rfc_3986_examples() {
        // RFC 3986 section 5.4.1 (normal examples) and 5.4.2 (abnormal examples), the ones
        // that are relative path references; base "http://a/b/c/d;p?q".
        let base = "http://a/b/c/d;p?q";
        for (reference, expected) in [
            ("g", "http://a/b/c/g"),
            ("./g", "http://a/b/c/g"),
            ("g/", "http://a/b/c/g/"),
            (";x", "http://a/b/c/;x"),
            ("g;x", "http://a/b/c/g;x"),
            (".", "http://a/b/c/"),
            ("./", "http://a/b/c/"),
            ("..", "http://a/b/"),
            ("../", "http://a/b/"),
            ("../g", "http://a/b/g"),
            ("../..", "http://a/"),
            ("../../", "http://a/"),
            ("../../g", "http://a/g"),
            ("../../../g", "http://a/g"),
            ("../../../../g", "http://a/g"),
            ("g.", "http://a/b/c/g."),
            (".g", "http://a/b/c/.g"),
            ("g..", "http://a/b/c/g.."),
            ("..g", "http://a/b/c/..g"),
            ("./../g", "http://a/b/g"),
            ("./g/.", "http://a/b/c/g/"),
            ("g/./h", "http://a/b/c/g/h"),
            ("g/../h", "http://a/b/c/h"),
            ("g;x=1/./y", "http://a/b/c/g;x=1/y"),
            ("g;x=1/../y", "http://a/b/c/y"),
        ] {
            assert_eq!(
                resolve(base, reference).as_deref().ok(),
                Some(expected),
                "{reference}"
            );
        }
        assert_eq!(
            resolve("http://127.0.0.1:8080", "bundles/x")
                .ok()
                .as_deref(),
            Some("http://127.0.0.1:8080/bundles/x")
        );
    }

    #[test]
    fn release_paths_are_plain_relative_segments() {
        for good in ["../bundles/ab.ampoule", "bundles/x-1.0.0.ampoule", "a"] {
            assert!(is_relative_path(good), "{good}");
        }
        for bad in [
            "",
            "/bundles/x",
            "http://x/y",
            "a//b",
            "./a",
            "a/..",
            "a%2e",
            "a?b",
            "a\\b",
        ] {
            assert!(!is_relative_path(bad), "{bad}");
        }
    }
}
