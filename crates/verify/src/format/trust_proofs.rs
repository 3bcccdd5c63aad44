//! `ledger/trust-sets/<tree size>.json`: for one tree head of the audit ledger, the
//! inclusion proofs of the newest trust-set entries in it, so that a device following several
//! rotations at once can prove that every trust set it accepts was logged in the ledger its
//! feed proves, and nobody can rotate one device in secret.
//!
//! Why a file per tree head: a trust-set entry is appended once, long before most feeds that
//! lead a device to it, and an inclusion proof holds only for the tree size it was made for.
//! The release side writes one file with every append (as it writes a consistency step), so
//! whichever head a feed carries, the device finds the proofs against exactly that head in
//! one small, immutable, static file, and needs no signature on it: the feed's head is
//! already verified, and each proof leads to its root.
//!
//! ```json
//! {"tree_size": 9,
//!  "trust_sets": [
//!    {"entry": "<the exact stored text of a trust-set entry>",
//!     "inclusion": {"leaf_index": 4, "tree_size": 9, "hashes": ["<64 hex>"]}}]}
//! ```
//!
//! At most [`MAX_SETS`] entries (the newest), each at most 64 hashes; both layers refuse
//! unknown fields and duplicate keys.

use serde::{Deserialize, Serialize};

use crate::error::{Error, ErrorKind, Result};
use crate::format::digest::Digest;
use crate::format::ledger_entry::{LEDGER_DIR, Record};
use crate::format::merkle::{InclusionProof, TreeHead, leaf_hash};
use crate::format::trust_set::MAX_WALK;

/// The directory of these files inside the ledger directory.
pub const DIR: &str = "trust-sets";

/// The most trust-set entries one file proves: the newest ones, as many as a device follows
/// in one update ([`MAX_WALK`]).
pub const MAX_SETS: usize = MAX_WALK as usize;

/// The largest file a device reads: [`MAX_SETS`] proofs of 64 hashes and their entries fit.
pub const MAX_BYTES: u64 = 256 * 1024;

/// Where the file for the head of `tree_size` entries is, relative to the release tree's root.
pub fn path(tree_size: u64) -> String {
    format!("{LEDGER_DIR}/{DIR}/{tree_size}.json")
}

/// The same file as a reference relative to a feed's URL (`feeds/<channel>.json`).
pub fn reference(tree_size: u64) -> String {
    format!("../{}", path(tree_size))
}

/// The file: the tree size its proofs lead to, and one proof per trust-set entry.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrustSetProofs {
    /// The size of the tree head every proof leads to.
    pub tree_size: u64,
    /// The newest trust-set entries in that tree, oldest first.
    pub trust_sets: Vec<TrustSetProof>,
}

/// One trust-set entry and its inclusion proof.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrustSetProof {
    /// The entry's exact stored text (the leaf's data).
    pub entry: String,
    /// Its proof against the head of [`TrustSetProofs::tree_size`] entries.
    pub inclusion: InclusionProof,
}

fn not_logged(message: String) -> Error {
    Error::new(ErrorKind::Proof, message)
}

impl TrustSetProofs {
    /// Parses a file, refusing it unread when it is over [`MAX_BYTES`], and refusing more
    /// than [`MAX_SETS`] proofs.
    pub fn from_json(bytes: &[u8]) -> Result<Self> {
        if bytes.len() as u64 > MAX_BYTES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "trust-set proofs file is {} bytes, more than the limit of {MAX_BYTES}",
                    bytes.len()
                ),
            ));
        }
        let proofs: TrustSetProofs = serde_json::from_slice(bytes)
            .map_err(|e| not_logged(format!("trust-set proofs file is not valid: {e}")))?;
        if proofs.trust_sets.len() > MAX_SETS {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "trust-set proofs file holds {} proofs, more than the limit of {MAX_SETS}",
                    proofs.trust_sets.len()
                ),
            ));
        }
        Ok(proofs)
    }

    /// The file as the release side writes it: compact JSON and a final newline.
    pub fn to_json(&self) -> Vec<u8> {
        let mut bytes = serde_json::to_vec(self).expect("trust-set proofs always serialize");
        bytes.push(b'\n');
        bytes
    }

    /// Checks that the ledger whose verified head is `head` logs trust set `version` with
    /// the SHA-256 `sha256` of its exact file: an entry of this file for that version, with
    /// that digest, whose inclusion proof leads to `head`'s root.
    pub fn prove(&self, version: u64, sha256: &Digest, head: &TreeHead) -> Result<()> {
        let refuse = |why: String| {
            not_logged(format!(
                "trust set version {version} (sha256 {sha256}) is not in the ledger the feed \
                 proves ({why}); refusing a trust set that may have been rotated in secret"
            ))
        };
        if self.tree_size != head.tree_size {
            return Err(refuse(format!(
                "the proofs are for a tree of size {}, the feed's head has size {}",
                self.tree_size, head.tree_size
            )));
        }
        let mut logged_other = None;
        for proof in &self.trust_sets {
            let Ok(Record::TrustSet(entry)) = Record::from_bytes(proof.entry.as_bytes()) else {
                continue;
            };
            if entry.trust_set_version != version {
                continue;
            }
            if entry.trust_set_digest != *sha256 {
                logged_other = Some(entry.trust_set_digest);
                continue;
            }
            if proof.inclusion.tree_size != head.tree_size {
                return Err(refuse(format!(
                    "its proof leads to a tree of size {}",
                    proof.inclusion.tree_size
                )));
            }
            return proof
                .inclusion
                .verify(&leaf_hash(proof.entry.as_bytes()), head)
                .map_err(|e| refuse(format!("its inclusion proof does not verify: {e}")));
        }
        Err(refuse(match logged_other {
            Some(other) => format!("the ledger logs that version with sha256 {other}"),
            None => format!(
                "no trust-set entry for it among the {} the tree proves at size {}",
                self.trust_sets.len(),
                head.tree_size
            ),
        }))
    }
}
