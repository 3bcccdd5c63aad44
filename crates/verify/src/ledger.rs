//! The audit ledger as devices and auditors read it: the entry the release side appends for
//! every publish and withdraw (and the one for every trust-set publish), the `ledger` object a feed carries for the release it names, the
//! consistency steps a release tree serves, and the checks a device makes before it trusts a
//! release: the tree head is signed by trusted keys, the release's publish entry is in it, and
//! the ledger only ever grew since the largest tree head the device saw before.
//!
//! A bundle signed with a stolen key and sent to one device in a feed of its own is refused
//! unless its publish entry is in a signed ledger that extends what the device saw; to put it
//! there the thief must either publish it for every auditor to see, or fork the ledger, which
//! the device exposes the next time it sees the real one (that head is not consistent with the
//! forked head it remembers, and it refuses).
//!
//! Which bytes are the leaf: the entry exactly as the ledger stores it (one line of compact
//! JSON, [`Entry::to_bytes`]). The feed carries that text, and the device checks that it names
//! the release the feed offers (event, channel, bundle name, version, bundle SHA-256) before
//! hashing it, so the device never has to rebuild a JSON serialization byte for byte.
//!
//! Consistency for devices that missed publishes: the feed carries a proof from the tree head
//! just before its own, which suffices for a device that saw every head. Every append also
//! writes one static file, `ledger/consistency/<old size>.json` (a [`ConsistencyStep`]): the
//! head that followed the head of that size, and the proof between them. A device that
//! remembers an older head walks these files from its own size up to the feed's head, one
//! per missed append, each proof checked before the next file is asked for.

use std::fmt;

use serde::{Deserialize, Serialize};

use crate::digest::Digest;
use crate::error::{Error, ErrorKind, Result};
use crate::feed::Feed;
use crate::keys::{KeyId, TrustedKeys};
use crate::merkle::{self, ConsistencyProof, InclusionProof, SignedTreeHead, TreeHead};
use crate::signature::SignatureReport;
use crate::signed::{Signers, kind};
use crate::trust::TrustSet;

/// The largest ledger entry, in bytes; a publish entry is a few hundred.
pub const MAX_ENTRY_BYTES: usize = 64 * 1024;

/// The largest consistency step file a device reads: a signed tree head and a proof of at
/// most [`merkle::MAX_PROOF_HASHES`] hashes fit with room to spare.
pub const MAX_STEP_BYTES: u64 = 32 * 1024;

/// The most consistency steps a device walks in one check: far more publishes than years of
/// daily releases, yet a bound on what a hostile server can make it fetch.
pub const MAX_STEPS: usize = 20_000;

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

fn invalid(message: String) -> Error {
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

/// One ledger entry of a bundle: a publish or withdraw, with everything an auditor needs to
/// match it against a bundle and a feed. Field order here is the order in the JSON.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Entry {
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
    /// The sequence of the feed that carried the change.
    pub feed_sequence: u64,
}

impl Entry {
    /// The entry as one line of compact JSON (without the newline), the bytes the ledger hashes.
    pub fn to_bytes(&self) -> Vec<u8> {
        serde_json::to_vec(self).expect("a ledger entry always serializes")
    }

    /// Parses an entry as stored, refusing oversized input, unknown and duplicate fields.
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
        Ok(entry)
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
/// feed, the publish entry of the release the feed names with its inclusion proof, and the
/// consistency proof from the tree head before this one.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FeedLedger {
    /// The ledger's tree head right after the append.
    pub tree_head: SignedTreeHead,
    /// The exact stored bytes of the publish entry of the feed's release, as text; absent
    /// when the feed names no release.
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

/// Checks a tree head's signatures: `threshold` distinct trusted keys over
/// [`crate::format::context::TREE_HEAD`] and [`TreeHead::signed_document`], the rule every signed document
/// of this crate follows ([`crate::signed`]).
pub fn check_tree_head(
    signed: &SignedTreeHead,
    keys: &TrustedKeys,
    threshold: usize,
) -> Result<SignatureReport> {
    signed.check(&Signers::new(keys.clone(), threshold)?)
}

/// What the ledger check of a feed established.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct LedgerCheck {
    /// The verified tree head: the device remembers it (see [`crate::Store::remember_tree_head`]).
    pub tree_head: TreeHead,
    /// The trusted keys that signed it.
    pub signers: Vec<KeyId>,
    /// The publish entry of the feed's release, checked to be in the tree.
    pub entry: Option<Entry>,
}

/// The device's ledger checks, given to [`crate::FeedVerifier::require_ledger`]: whose
/// signatures a tree head needs, and the largest tree head this device verified before.
#[derive(Clone, Debug)]
pub struct LedgerVerifier {
    signers: Signers<kind::TreeHead>,
    remembered: Option<TreeHead>,
}

impl LedgerVerifier {
    /// Tree heads must be signed by `threshold` (at least 1) distinct keys of `keys`.
    pub fn new(keys: TrustedKeys, threshold: usize) -> Result<Self> {
        if keys.is_empty() {
            return Err(Error::new(
                ErrorKind::Key,
                "no trusted keys given; a ledger verifier needs at least one public key",
            ));
        }
        Ok(LedgerVerifier {
            signers: Signers::new(keys, 1)?.with_threshold(threshold),
            remembered: None,
        })
    }

    /// Tree heads must be signed as the trust set requires for `tree_head` documents.
    pub fn from_trust_set(trust: &TrustSet) -> Result<Self> {
        Ok(LedgerVerifier {
            signers: trust.signers()?,
            remembered: None,
        })
    }

    /// This verifier with the tree-head keys and threshold of `trust` instead of its own; the
    /// remembered tree head stays. For a device that just accepted a newer trust set.
    pub fn with_trust_set(self, trust: &TrustSet) -> Result<Self> {
        Ok(LedgerVerifier {
            signers: trust.signers()?,
            remembered: self.remembered,
        })
    }

    /// The largest tree head this device verified before: a smaller one, or one that does not
    /// extend it, is refused.
    pub fn remembered(mut self, head: Option<TreeHead>) -> Self {
        self.remembered = head;
        self
    }

    /// Checks a tree head's signatures under this verifier's trust.
    pub fn verify_head(&self, signed: &SignedTreeHead) -> Result<SignatureReport> {
        signed.check(&self.signers)
    }

    /// Checks the ledger object of an already authenticated `feed`: the tree head's
    /// signatures, that the release the feed names is the one its entry logs and that the
    /// entry is in the tree, and that the tree extends the remembered head. `step` fetches
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
        let Some(ledger) = &feed.ledger else {
            let what = match &feed.release {
                Some(r) => format!(
                    "bundle {} {} (sha256 {}) was signed but never published: feed sequence {} \
                     carries no ledger proof",
                    r.name, r.version, r.sha256, feed.sequence
                ),
                None => format!(
                    "feed sequence {} carries no ledger proof, and this device requires one",
                    feed.sequence
                ),
            };
            return Err(invalid(what));
        };
        let report = self.verify_head(&ledger.tree_head)?;
        let head = ledger.tree_head.head();
        let entry = match &feed.release {
            None => None,
            Some(release) => {
                let never = |why: String| {
                    invalid(format!(
                        "bundle {} {} (sha256 {}) was signed but never published: {why}",
                        release.name, release.version, release.sha256
                    ))
                };
                let (Some(text), Some(inclusion)) = (&ledger.entry, &ledger.inclusion) else {
                    return Err(never("the feed carries no ledger entry for it".to_string()));
                };
                let entry = match Record::from_bytes(text.as_bytes())? {
                    Record::Bundle(entry) => entry,
                    Record::TrustSet(t) => {
                        return Err(never(format!(
                            "the ledger entry the feed carries logs trust set version {}, not \
                             a publish of this bundle",
                            t.trust_set_version
                        )));
                    }
                };
                let mismatch = [
                    ("event", entry.event.to_string(), Event::Publish.to_string()),
                    ("channel", entry.channel.clone(), feed.channel.clone()),
                    ("bundle", entry.bundle.clone(), release.name.clone()),
                    (
                        "version",
                        entry.version.to_string(),
                        release.version.to_string(),
                    ),
                    (
                        "bundle_digest",
                        entry.bundle_digest.to_string(),
                        release.sha256.to_string(),
                    ),
                ]
                .into_iter()
                .find(|(_, found, wanted)| found != wanted);
                if let Some((field, found, wanted)) = mismatch {
                    return Err(never(format!(
                        "the ledger entry the feed carries has {field} {found}, not {wanted}"
                    )));
                }
                if entry.feed_sequence > feed.sequence {
                    return Err(never(format!(
                        "the ledger entry the feed carries is for feed sequence {}, after this \
                         feed's {}",
                        entry.feed_sequence, feed.sequence
                    )));
                }
                inclusion
                    .verify(&merkle::leaf_hash(text.as_bytes()), &head)
                    .map_err(|e| {
                        never(format!(
                            "its publish entry is not in the ledger's tree head of size {} ({e})",
                            head.tree_size
                        ))
                    })?;
                Some(entry)
            }
        };
        let walk = match &self.remembered {
            Some(seen) => Walk::start(seen, &head, &ledger.consistency)?,
            None => None,
        };
        let check = LedgerCheck {
            tree_head: head,
            signers: report.valid,
            entry,
        };
        Ok((check, walk))
    }
}

/// The walk from the tree head a device remembers up to a feed's tree head, one consistency
/// step file at a time, each proof checked before the next file is asked for. It holds only
/// the head reached so far, so a caller that fetches the files itself (the step-by-step
/// update) can hand them in one by one.
#[derive(Clone, Debug)]
pub(crate) struct Walk {
    seen: TreeHead,
    current: TreeHead,
    head: TreeHead,
    feed_proof: ConsistencyProof,
    steps: usize,
    done: bool,
}

impl Walk {
    /// Starts a walk from `seen` to `head`; `None` when no step file is needed (the heads are
    /// equal or the feed's own proof starts at `seen`), after checking what can be checked.
    pub(crate) fn start(
        seen: &TreeHead,
        head: &TreeHead,
        feed_proof: &ConsistencyProof,
    ) -> Result<Option<Walk>> {
        if head.tree_size < seen.tree_size {
            return Err(Error::new(
                ErrorKind::Stale,
                format!(
                    "ledger tree head of size {} is smaller than the tree head of size {} this \
                     device saw before; refusing a rolled-back ledger",
                    head.tree_size, seen.tree_size
                ),
            ));
        }
        if head.tree_size == seen.tree_size {
            if head.root_hash != seen.root_hash {
                return Err(invalid(format!(
                    "ledger tree head of size {} has root {}, but this device saw root {} at \
                     that size; the ledger was forked or rewritten",
                    head.tree_size, head.root_hash, seen.root_hash
                )));
            }
            return Ok(None);
        }
        let mut walk = Walk {
            seen: *seen,
            current: *seen,
            head: *head,
            feed_proof: feed_proof.clone(),
            steps: 0,
            done: false,
        };
        walk.settle()?;
        Ok((!walk.done).then_some(walk))
    }

    /// The old size of the step file needed next (`ledger/consistency/<size>.json`), or
    /// `None` once the walk reached the feed's head.
    pub(crate) fn needs(&self) -> Option<u64> {
        (!self.done).then_some(self.current.tree_size)
    }

    /// Checks the step file asked for by [`Walk::needs`] and moves on.
    pub(crate) fn advance(&mut self, bytes: &[u8]) -> Result<()> {
        if self.done {
            return Ok(());
        }
        if self.steps >= MAX_STEPS {
            return Err(
                self.inconsistent(invalid(format!("more than {MAX_STEPS} consistency steps")))
            );
        }
        self.steps += 1;
        let next = ConsistencyStep::from_json(bytes).map_err(|e| self.inconsistent(e))?;
        let reached = next.tree_head.head();
        if next.proof.old_size != self.current.tree_size
            || reached.tree_size <= self.current.tree_size
            || reached.tree_size > self.head.tree_size
        {
            return Err(self.inconsistent(invalid(format!(
                "the consistency step from size {} leads from size {} to size {}",
                self.current.tree_size, next.proof.old_size, reached.tree_size
            ))));
        }
        next.proof
            .verify(&self.current, &reached)
            .map_err(|e| self.inconsistent(e))?;
        self.current = reached;
        self.settle()
    }

    /// Finishes the walk when the head reached is the feed's, or the feed's own proof starts
    /// there.
    fn settle(&mut self) -> Result<()> {
        if self.current.tree_size == self.head.tree_size {
            if self.current.root_hash != self.head.root_hash {
                return Err(self.inconsistent(invalid(format!(
                    "the consistency steps lead to root {} at size {}, not to root {}",
                    self.current.root_hash, self.current.tree_size, self.head.root_hash
                ))));
            }
            self.done = true;
        } else if self.current.tree_size == self.feed_proof.old_size {
            // The steps reached the head the feed's own proof starts from.
            self.feed_proof
                .verify(&self.current, &self.head)
                .map_err(|e| self.inconsistent(e))?;
            self.done = true;
        }
        Ok(())
    }

    fn inconsistent(&self, e: Error) -> Error {
        invalid(format!(
            "ledger tree head of size {} is not consistent with the tree head of size {} this \
             device saw before: {e}",
            self.head.tree_size, self.seen.tree_size
        ))
    }
}
