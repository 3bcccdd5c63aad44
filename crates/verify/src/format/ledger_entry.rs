//! The audit ledger's documents, as the release side writes them and devices and auditors read
//! them: the entry appended for every publish and withdraw (and the one for every trust-set
//! publish), the `ledger` object every feed carries, and the consistency steps a release tree
//! serves. The checks a device makes with them live in `check/feed.rs` (the feed's entry) and
//! `check/ledger_proof.rs` (tree heads, the consistency walk).
//!
//! One entry format binds each feed (format 2, issue 10): every feed carries the entry its own
//! change appended, with the feed's sequence and what the feed offers afterwards (`offered`:
//! release, rollout and the deltas the feed lists, or `null`), as the last leaf of
//! the tree head it carries. So a device can tell the channel's newest logged state from an
//! older one that a thief of the feed key re-signs. Entries written before (format 1: no
//! `format`, no `offered`) stay readable for auditors; devices refuse them in a feed.
//!
//! Which bytes are the leaf: the entry exactly as the ledger stores it (one line of compact
//! JSON, [`Entry::to_bytes`]). The feed carries that text, and the device checks that it
//! matches the feed (channel, sequence, offer) before hashing it, so the device never has to
//! rebuild a JSON serialization byte for byte.
//!
//! Consistency for devices that missed publishes: the feed carries a proof from the tree head
//! just before its own, which suffices for a device that saw every head. Every append also
//! writes one static file, `ledger/consistency/<old size>.json` (a [`ConsistencyStep`]): the
//! head that followed the head of that size, and the proof between them. A device that
//! remembers an older head walks these files from its own size up to the feed's head, one
//! per missed append, each proof checked before the next file is asked for.

use std::fmt;

use serde::{Deserialize, Serialize};

use crate::error::{Error, ErrorKind, Result};
use crate::format::digest::Digest;
use crate::format::keys::KeyId;
use crate::format::merkle::{ConsistencyProof, InclusionProof, SignedTreeHead};

/// The largest ledger entry, in bytes; a publish entry is a few hundred.
pub const MAX_ENTRY_BYTES: usize = 64 * 1024;

/// The largest consistency step file a device reads: a signed tree head and a proof of at
/// most [`merkle::MAX_PROOF_HASHES`] hashes fit with room to spare.
pub const MAX_STEP_BYTES: u64 = 32 * 1024;

/// The most consistency steps a device walks in one check: far more publishes than years of
/// daily releases, yet a bound on what a hostile server can make it fetch.
pub const MAX_STEPS: usize = 20_000;

/// The most deltas one ledger entry (and one feed) may list for its release. A delta is a way to send a release to devices
/// on one of a few recent bases, so a handful suffices.
pub const MAX_DELTAS: usize = 8;

/// The ledger's directory in a release tree.
pub const LEDGER_DIR: &str = "ledger";

/// The directory of consistency steps inside the ledger directory.
pub const CONSISTENCY_DIR: &str = "consistency";

/// Where the consistency step from the head of `old_size` entries lives, relative to the
/// release tree's root.
pub fn step_path(old_size: u64) -> String {
    format!("{LEDGER_DIR}/{CONSISTENCY_DIR}/{old_size}.json")
}

/// The same file as a reference relative to a feed's URL (`feeds/<channel>.json`).
pub fn step_reference(old_size: u64) -> String {
    format!("../{}", step_path(old_size))
}

pub(crate) fn invalid(message: String) -> Error {
    Error::new(ErrorKind::Proof, message)
}

/// What happened to a bundle on a channel.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
#[non_exhaustive]
pub enum Event {
    /// The bundle was published on the channel (or its feed renewed).
    Publish,
    /// The bundle was withdrawn from the channel.
    Withdraw,
    /// A trust set was published in the release tree (a [`TrustSetEntry`], not an [`Entry`]).
    #[serde(rename = "trust_set")]
    TrustSet,
}

impl fmt::Display for Event {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            Event::Publish => "publish",
            Event::Withdraw => "withdraw",
            Event::TrustSet => "trust_set",
        })
    }
}

/// The ledger-entry format this version writes (`"format": 2`): every feed carries the entry
/// its own change appended, with the feed's sequence and the release the feed offers after the
/// change (`offered`), so a device can check that a feed is the channel's newest logged state.
pub const ENTRY_FORMAT: u32 = 2;

/// Entries written before the feed binding carry no `format` field and no `offered` object.
/// Ledgers are append-only, so auditors keep reading them; devices refuse a feed that carries
/// one (see [`Entry::is_bound`]).
pub const LEGACY_ENTRY_FORMAT: u32 = 1;

fn legacy_format() -> u32 {
    LEGACY_ENTRY_FORMAT
}

fn is_legacy(format: &u32) -> bool {
    *format == LEGACY_ENTRY_FORMAT
}

/// Tells a missing field (`None`, a legacy entry) from an explicit `null` (`Some(None)`,
/// nothing offered).
fn present<'de, D: serde::Deserializer<'de>, T: Deserialize<'de>>(
    d: D,
) -> std::result::Result<Option<Option<T>>, D::Error> {
    Option::<T>::deserialize(d).map(Some)
}

/// One ledger entry of a bundle: a publish (or renewal) or withdraw, with everything an auditor
/// needs to match it against a bundle and a feed. Field order here is the order in the JSON.
///
/// In format 2 the bundle fields name the release the event is about (the one published, or
/// the one pulled), and `offered` names what the channel's feed offers right after the change:
/// for a publish the same release, for a withdraw the release before it or `null`.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Entry {
    /// [`ENTRY_FORMAT`]; absent (read as [`LEGACY_ENTRY_FORMAT`]) in entries written before the
    /// feed binding.
    #[serde(default = "legacy_format", skip_serializing_if = "is_legacy")]
    pub format: u32,
    /// Publish or withdraw.
    pub event: Event,
    /// The channel's name.
    pub channel: String,
    /// The bundle's name.
    pub bundle: String,
    /// The bundle's version.
    pub version: semver::Version,
    /// SHA-256 of the whole bundle file.
    pub bundle_digest: Digest,
    /// SHA-256 of the bundle's exact manifest bytes.
    pub manifest_digest: Digest,
    /// The keys whose signatures over the manifest were checked when it was published.
    pub key_ids: Vec<KeyId>,
    /// When it happened, in seconds since the Unix epoch.
    pub time: u64,
    /// The sequence of the feed that carried the change (format 2: that feed carries this
    /// entry, so the two are equal).
    pub feed_sequence: u64,
    /// Format 2: what the channel's feed offers after the change (`null`: nothing). Absent in
    /// legacy entries: `None`; an explicit `null`: `Some(None)`.
    #[serde(
        default,
        deserialize_with = "present",
        skip_serializing_if = "Option::is_none"
    )]
    pub offered: Option<Option<Offered>>,
}

/// The release a feed offers, as its ledger entry logs it: enough to match the feed's
/// `release` (name, version, SHA-256, rollout) and the bundle's manifest it leads to.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Offered {
    /// The bundle's name.
    pub bundle: String,
    /// The bundle's version.
    pub version: semver::Version,
    /// SHA-256 of the whole bundle file.
    pub bundle_digest: Digest,
    /// SHA-256 of the bundle's exact manifest bytes.
    pub manifest_digest: Digest,
    /// The share of devices the feed offers it to, 0 to 100 percent.
    pub rollout_percent: u8,
    /// Deltas that rebuild this release from an older one, exactly as the feed lists them (at
    /// most [`MAX_DELTAS`]).
    pub deltas: Vec<DeltaRef>,
}

/// One delta of a release, as the feed lists it and the ledger logs it.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DeltaRef {
    /// SHA-256 identifying the base release's files the delta applies to.
    pub base: Digest,
    /// The delta file's exact size in bytes.
    pub size: u64,
    /// SHA-256 of the delta file.
    pub sha256: Digest,
}

impl Entry {
    /// The entry as one line of compact JSON (without the newline), the bytes the ledger hashes.
    pub fn to_bytes(&self) -> Vec<u8> {
        serde_json::to_vec(self).expect("a ledger entry always serializes")
    }

    /// Parses an entry as stored, refusing oversized input, unknown and duplicate fields, an
    /// unknown format, and a format-2 entry whose fields disagree with each other.
    pub fn from_bytes(bytes: &[u8]) -> Result<Self> {
        if bytes.len() > MAX_ENTRY_BYTES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "ledger entry is {} bytes, more than the limit of {MAX_ENTRY_BYTES}",
                    bytes.len()
                ),
            ));
        }
        let entry: Entry = serde_json::from_slice(bytes)
            .map_err(|e| invalid(format!("ledger entry is not valid: {e}")))?;
        if entry.event == Event::TrustSet {
            return Err(invalid(
                "ledger entry has event trust_set but the fields of a bundle entry".to_string(),
            ));
        }
        entry.validate()?;
        Ok(entry)
    }

    /// Whether the entry binds its feed (format 2): only such an entry can show a device that
    /// a feed is its channel's newest logged state.
    pub fn is_bound(&self) -> bool {
        self.format == ENTRY_FORMAT
    }

    /// What the feed that carried a format-2 entry offers; `None` for nothing offered and for
    /// legacy entries (which do not say).
    pub fn offered(&self) -> Option<&Offered> {
        self.offered.as_ref().and_then(Option::as_ref)
    }

    /// The rules between an entry's own fields.
    fn validate(&self) -> Result<()> {
        match (self.format, &self.offered) {
            (LEGACY_ENTRY_FORMAT, None) => return Ok(()),
            (LEGACY_ENTRY_FORMAT, Some(_)) => {
                return Err(invalid(
                    "ledger entry has an offered field but no format; entries with offered \
                     are format 2"
                        .into(),
                ));
            }
            (ENTRY_FORMAT, Some(_)) => {}
            (ENTRY_FORMAT, None) => {
                return Err(invalid(
                    "ledger entry of format 2 has no offered field (null when the feed offers \
                     nothing)"
                        .into(),
                ));
            }
            (other, _) => {
                return Err(invalid(format!(
                    "ledger entry format {other} is not supported (this reader knows formats \
                     {LEGACY_ENTRY_FORMAT} and {ENTRY_FORMAT})"
                )));
            }
        }
        if let Some(offered) = self.offered() {
            if offered.rollout_percent > 100 {
                return Err(invalid(format!(
                    "ledger entry offers a rollout of {} percent; it must be 0 to 100",
                    offered.rollout_percent
                )));
            }
            if offered.deltas.len() > MAX_DELTAS {
                return Err(Error::new(
                    ErrorKind::TooLarge,
                    format!(
                        "ledger entry lists {} deltas, over the limit of {}",
                        offered.deltas.len(),
                        MAX_DELTAS
                    ),
                ));
            }
        }
        if self.event == Event::Publish {
            let same = self.offered().is_some_and(|o| {
                o.bundle == self.bundle
                    && o.version == self.version
                    && o.bundle_digest == self.bundle_digest
                    && o.manifest_digest == self.manifest_digest
            });
            if !same {
                return Err(invalid(format!(
                    "publish entry of {} {} offers another release than the one it publishes",
                    self.bundle, self.version
                )));
            }
        }
        Ok(())
    }
}

/// The ledger entry of a trust-set publish: which version went into the release tree, the
/// SHA-256 of its exact file, and who signed it, so that an auditor sees every change of the
/// keys devices trust. It has fields of its own rather than bundle fields left empty, so no
/// reader can mistake it for the entry of a release.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrustSetEntry {
    /// Always [`Event::TrustSet`].
    pub event: Event,
    /// The trust set's version.
    pub trust_set_version: u64,
    /// SHA-256 of the trust-set file as published (`trust/<version>.json`).
    pub trust_set_digest: Digest,
    /// The keys whose signatures over the trust set were checked when it was published.
    pub key_ids: Vec<KeyId>,
    /// When it happened, in seconds since the Unix epoch.
    pub time: u64,
}

impl TrustSetEntry {
    /// The entry as one line of compact JSON, the bytes the ledger hashes.
    pub fn to_bytes(&self) -> Vec<u8> {
        serde_json::to_vec(self).expect("a ledger entry always serializes")
    }
}

/// Any ledger entry, told apart by its `event` field.
#[derive(Clone, Debug, PartialEq, Eq)]
// A bundle entry is a few hundred bytes larger than a trust-set entry since format 2 logs the
// offer too; records are parsed one at a time or listed once for a person, so boxing would
// only add an allocation per entry.
#[allow(clippy::large_enum_variant)]
pub enum Record {
    /// A publish or withdraw of a bundle.
    Bundle(Entry),
    /// A trust-set publish.
    TrustSet(TrustSetEntry),
}

/// Only the `event` field, to know which kind of entry to parse; the parse that follows
/// refuses unknown fields.
#[derive(Deserialize)]
struct EventOnly {
    event: Event,
}

impl Record {
    /// Parses an entry of either kind as stored, refusing oversized input, unknown and
    /// duplicate fields.
    pub fn from_bytes(bytes: &[u8]) -> Result<Self> {
        if bytes.len() > MAX_ENTRY_BYTES {
            return Entry::from_bytes(bytes).map(Record::Bundle);
        }
        let kind: EventOnly = serde_json::from_slice(bytes)
            .map_err(|e| invalid(format!("ledger entry is not valid: {e}")))?;
        if kind.event != Event::TrustSet {
            return Entry::from_bytes(bytes).map(Record::Bundle);
        }
        serde_json::from_slice(bytes)
            .map(Record::TrustSet)
            .map_err(|e| invalid(format!("ledger entry is not valid: {e}")))
    }

    /// The entry's bytes as the ledger stores them.
    pub fn to_bytes(&self) -> Vec<u8> {
        match self {
            Record::Bundle(e) => e.to_bytes(),
            Record::TrustSet(e) => e.to_bytes(),
        }
    }

    /// When it happened, in seconds since the Unix epoch.
    pub fn time(&self) -> u64 {
        match self {
            Record::Bundle(e) => e.time,
            Record::TrustSet(e) => e.time,
        }
    }
}

/// The `ledger` object of a feed: the signed tree head made by the append that produced the
/// feed, the entry that append added (format 2: the head's last leaf) with its inclusion
/// proof, and the consistency proof from the tree head before this one.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FeedLedger {
    /// The ledger's tree head right after the append.
    pub tree_head: SignedTreeHead,
    /// The exact stored bytes of the entry the feed's own change appended, as text. (Feeds
    /// written before the feed binding carried the offered release's publish entry instead,
    /// and none when they offered nothing; devices refuse those.)
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub entry: Option<String>,
    /// The proof that `entry` is in the tree `tree_head` describes.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub inclusion: Option<InclusionProof>,
    /// The proof that the tree head before this one (size 0 for the first) is a prefix.
    pub consistency: ConsistencyProof,
}

/// A file `ledger/consistency/<old size>.json`: the tree head that followed the head of
/// `proof.old_size` entries, and the proof between the two.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ConsistencyStep {
    /// The next tree head.
    pub tree_head: SignedTreeHead,
    /// From the older size to `tree_head`'s size.
    pub proof: ConsistencyProof,
}

impl ConsistencyStep {
    /// Parses a step file, refusing it unread when it is over [`MAX_STEP_BYTES`].
    pub fn from_json(bytes: &[u8]) -> Result<Self> {
        if bytes.len() as u64 > MAX_STEP_BYTES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "consistency step is {} bytes, more than the limit of {MAX_STEP_BYTES}",
                    bytes.len()
                ),
            ));
        }
        serde_json::from_slice(bytes)
            .map_err(|e| invalid(format!("consistency step is not valid: {e}")))
    }

    /// The file as the release side writes it: pretty JSON and a final newline.
    pub fn to_json(&self) -> Vec<u8> {
        let mut bytes =
            serde_json::to_vec_pretty(self).expect("a consistency step always serializes");
        bytes.push(b'\n');
        bytes
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const DIGEST: &str = "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855";

    /// A format-2 publish entry of trailcam-species 1.0.0 with `deltas` in its offer.
    fn publish(deltas: &str) -> String {
        format!(
            "{{\"format\":2,\"event\":\"publish\",\"channel\":\"stable\",\"bundle\":\
             \"trailcam-species\",\"version\":\"1.0.0\",\"bundle_digest\":\"{DIGEST}\",\
             \"manifest_digest\":\"{DIGEST}\",\"key_ids\":[],\"time\":1,\"feed_sequence\":1,\
             \"offered\":{{\"bundle\":\"trailcam-species\",\"version\":\"1.0.0\",\
             \"bundle_digest\":\"{DIGEST}\",\"manifest_digest\":\"{DIGEST}\",\
             \"rollout_percent\":100,\"deltas\":[{deltas}]}}}}"
        )
    }

    fn delta() -> String {
        format!("{{\"base\":\"{DIGEST}\",\"size\":45285,\"sha256\":\"{DIGEST}\"}}")
    }

    #[test]
    fn issue10_format_2_entries_parse_round_trip_and_bound_their_deltas() {
        let none = publish("");
        let entry = Entry::from_bytes(none.as_bytes()).expect("a format-2 entry");
        assert!(entry.is_bound());
        assert_eq!(entry.to_bytes(), none.as_bytes(), "byte for byte");

        let eight = vec![delta(); MAX_DELTAS].join(",");
        let entry = Entry::from_bytes(publish(&eight).as_bytes()).expect("eight deltas");
        assert_eq!(entry.offered().map(|o| o.deltas.len()), Some(MAX_DELTAS));

        let nine = vec![delta(); MAX_DELTAS + 1].join(",");
        let err = Entry::from_bytes(publish(&nine).as_bytes()).expect_err("nine deltas");
        assert_eq!(
            err.to_string(),
            "ledger entry lists 9 deltas, over the limit of 8"
        );
        assert_eq!(err.kind(), ErrorKind::TooLarge);
    }

    #[test]
    fn issue10_an_entry_whose_fields_disagree_is_refused() {
        let cases = [
            (
                publish("").replace("\"format\":2", "\"format\":3"),
                "ledger entry format 3 is not supported (this reader knows formats 1 and 2)",
            ),
            (
                publish("").replace("\"format\":2,", ""),
                "ledger entry has an offered field but no format; entries with offered are \
                 format 2",
            ),
            (
                publish("").replace("\"rollout_percent\":100", "\"rollout_percent\":101"),
                "ledger entry offers a rollout of 101 percent; it must be 0 to 100",
            ),
        ];
        for (text, message) in &cases {
            let err = Entry::from_bytes(text.as_bytes()).expect_err(message);
            assert_eq!(err.to_string(), *message);
        }
        // A publish whose offer names another release.
        let other = publish("").replace(
            "\"offered\":{\"bundle\":\"trailcam-species\",\"version\":\"1.0.0\"",
            "\"offered\":{\"bundle\":\"trailcam-species\",\"version\":\"0.9.0\"",
        );
        assert_eq!(
            Entry::from_bytes(other.as_bytes())
                .expect_err("another release")
                .to_string(),
            "publish entry of trailcam-species 1.0.0 offers another release than the one it \
             publishes"
        );
        // Format 2 without offered (null must be written out when nothing is offered).
        let cut = publish("");
        let cut = &cut[..cut.find(",\"offered\"").expect("offered")];
        let err = Entry::from_bytes(format!("{cut}}}").as_bytes()).expect_err("no offered");
        assert_eq!(
            err.to_string(),
            "ledger entry of format 2 has no offered field (null when the feed offers nothing)"
        );
    }
}
