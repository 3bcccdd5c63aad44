//! `ledger/trust-sets/<tree size>.json`: for one tree head of the audit ledger, the proofs
//! that the newest trust-set entries are in it, so that a device following several rotations
//! at once can prove that every trust set it accepts was logged in the ledger its feed proves,
//! and nobody can rotate one device in secret.
//!
//! For each trust-set entry the file holds the signed tree head its own append made (of size
//! k, the entry its last leaf), the entry's inclusion proof in that head, and the consistency
//! proof from that head to the file's head (of size n). Why this shape: whoever holds a
//! trust-set threshold can make a valid successor set that names tree-head keys of their own,
//! and sign a forked ledger with them. The head of size k is therefore checked against the
//! tree-head keys of the set **before** the one the entry logs, keys the device trusted
//! already; the consistency proof then binds that head to the feed's head, which the device
//! verified (and proved to extend the head it remembers). A secret set thus needs the old
//! tree-head keys too, the separate capability the documented configuration keeps away from
//! the publishing runner.
//!
//! Why a file per tree head: a trust-set entry is appended once, long before most feeds that
//! lead a device to it, and a consistency proof holds only for the sizes it was made for. The
//! release side writes one file with every append (as it writes a consistency step), so
//! whichever head a feed carries, the device finds the proofs against exactly that head in one
//! small, immutable, static file. The file itself needs no signature.
//!
//! ```json
//! {"tree_size": 9,
//!  "trust_sets": [
//!    {"entry": "<the exact stored text of a trust-set entry>",
//!     "tree_head": <the signed tree head of size 5 that its append made>,
//!     "inclusion": {"leaf_index": 4, "tree_size": 5, "hashes": ["<64 hex>"]},
//!     "consistency": {"old_size": 5, "new_size": 9, "hashes": ["<64 hex>"]}}]}
//! ```
//!
//! At most [`MAX_SETS`] entries (the newest, oldest first), proofs of at most 64 hashes; both
//! layers refuse unknown fields and duplicate keys.

use serde::{Deserialize, Serialize};

use crate::error::{Error, ErrorKind, Result};
use crate::format::digest::Digest;
use crate::format::ledger_entry::{LEDGER_DIR, Record};
use crate::format::merkle::{
    ConsistencyProof, InclusionProof, SignedTreeHead, TreeHead, leaf_hash,
};
use crate::format::signed::{Signers, kind};
use crate::format::trust_set::MAX_WALK;

/// The directory of these files inside the ledger directory.
pub const DIR: &str = "trust-sets";

/// The most trust-set entries one file proves: the newest ones, as many as a device follows
/// in one update ([`MAX_WALK`]).
pub const MAX_SETS: usize = MAX_WALK as usize;

/// The largest file a device reads: [`MAX_SETS`] entries, each with two proofs of 64 hashes
/// and a signed tree head, fit.
pub const MAX_BYTES: u64 = 1024 * 1024;

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

/// One trust-set entry, the head its append made, and the proofs from the entry to that head
/// and from that head to the file's.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrustSetProof {
    /// The entry's exact stored text (the leaf's data).
    pub entry: String,
    /// The signed tree head right after the entry was appended.
    pub tree_head: SignedTreeHead,
    /// The entry's proof against `tree_head`.
    pub inclusion: InclusionProof,
    /// From `tree_head` to the head of [`TrustSetProofs::tree_size`] entries.
    pub consistency: ConsistencyProof,
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
    /// that digest, included in the tree head its append made, that head signed by `before`
    /// (the tree-head keys and threshold of the trust set the device accepted `version` from),
    /// and consistent with `head`.
    pub fn prove(
        &self,
        version: u64,
        sha256: &Digest,
        head: &TreeHead,
        before: &Signers<kind::TreeHead>,
    ) -> Result<()> {
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
            let logged = proof.tree_head.head();
            proof.tree_head.check(before).map_err(|e| {
                refuse(format!(
                    "the tree head of size {} that logs it is not signed by the tree-head keys \
                     trusted before it: {e}",
                    logged.tree_size
                ))
            })?;
            proof
                .inclusion
                .verify(&leaf_hash(proof.entry.as_bytes()), &logged)
                .map_err(|e| {
                    refuse(format!(
                        "its inclusion proof in the tree head of size {} does not verify: {e}",
                        logged.tree_size
                    ))
                })?;
            return proof.consistency.verify(&logged, head).map_err(|e| {
                refuse(format!(
                    "the tree head of size {} that logs it is not consistent with the feed's: \
                     {e}",
                    logged.tree_size
                ))
            });
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn files_over_their_caps_are_refused_unread() {
        let big = vec![b' '; MAX_BYTES as usize + 1];
        assert_eq!(
            TrustSetProofs::from_json(&big)
                .expect_err("too big")
                .to_string(),
            "trust-set proofs file is 1048577 bytes, more than the limit of 1048576"
        );
        let extra = br#"{"tree_size": 1, "trust_sets": [], "note": 1}"#;
        let e = TrustSetProofs::from_json(extra).expect_err("unknown field");
        assert!(
            e.to_string()
                .starts_with("trust-set proofs file is not valid: unknown field `note`"),
            "{e}"
        );
        let twice = br#"{"tree_size": 1, "tree_size": 2, "trust_sets": []}"#;
        let e = TrustSetProofs::from_json(twice).expect_err("duplicate");
        assert!(
            e.to_string()
                .starts_with("trust-set proofs file is not valid: duplicate field `tree_size`"),
            "{e}"
        );
    }

    /// The caps hold at their limits and refuse one past them, the file round-trips through
    /// what the release side writes, and a feed's reference names the file: each kills a
    /// mutant the crate's tests missed (MUTANTS.md).
    #[test]
    fn caps_hold_at_their_limits_and_the_file_round_trips() {
        let at_cap = vec![b' '; MAX_BYTES as usize];
        let e = TrustSetProofs::from_json(&at_cap).expect_err("only spaces");
        assert_ne!(e.kind(), ErrorKind::TooLarge, "{e}");

        let head = TreeHead {
            tree_size: 5,
            root_hash: Digest::of(b"root"),
            time: 1_796_083_200,
        };
        let proof = TrustSetProof {
            entry: "an entry".into(),
            tree_head: SignedTreeHead::new(head, Vec::new()),
            inclusion: InclusionProof {
                leaf_index: 4,
                tree_size: 5,
                hashes: vec![Digest::of(b"left")],
            },
            consistency: ConsistencyProof {
                old_size: 5,
                new_size: 9,
                hashes: vec![Digest::of(b"old"), Digest::of(b"new")],
            },
        };
        let full = TrustSetProofs {
            tree_size: 9,
            trust_sets: vec![proof.clone(); MAX_SETS],
        };
        let bytes = full.to_json();
        assert_eq!(bytes.last(), Some(&b'\n'));
        assert_eq!(TrustSetProofs::from_json(&bytes).expect("32 proofs"), full);
        let mut over = full;
        over.trust_sets.push(proof);
        let e = TrustSetProofs::from_json(&over.to_json()).expect_err("33 proofs");
        assert_eq!(e.kind(), ErrorKind::TooLarge);
        assert_eq!(
            e.to_string(),
            "trust-set proofs file holds 33 proofs, more than the limit of 32"
        );

        assert_eq!(path(9), "ledger/trust-sets/9.json");
        assert_eq!(reference(9), "../ledger/trust-sets/9.json");
    }

    #[test]
    fn proofs_for_another_head_prove_nothing() {
        let proofs = TrustSetProofs {
            tree_size: 4,
            trust_sets: Vec::new(),
        };
        let head = TreeHead {
            tree_size: 5,
            root_hash: Digest::of(b"root"),
            time: 0,
        };
        let key = ed25519_dalek::SigningKey::from_bytes(&[1; 32]).verifying_key();
        let keys = [crate::format::keys::PublicKey::from_verifying_key(&key).expect("not weak")]
            .into_iter()
            .collect();
        let signers = Signers::new(keys, 1).expect("one key");
        let sha256 = Digest::of(b"set");
        assert_eq!(
            proofs
                .prove(2, &sha256, &head, &signers)
                .expect_err("other head")
                .to_string(),
            format!(
                "trust set version 2 (sha256 {sha256}) is not in the ledger the feed proves \
                 (the proofs are for a tree of size 4, the feed's head has size 5); refusing \
                 a trust set that may have been rotated in secret"
            )
        );
        let same_size = TrustSetProofs {
            tree_size: 5,
            trust_sets: Vec::new(),
        };
        assert_eq!(
            same_size
                .prove(2, &sha256, &head, &signers)
                .expect_err("not logged")
                .kind(),
            ErrorKind::Proof
        );
    }
}
