//! The checks a device makes of the audit ledger before it trusts a release: the tree head is
//! signed by the keys holding the tree-head role, the feed's own entry is its last leaf (that
//! part reads the feed and lives in `check/feed.rs`), and the ledger only ever grew since the
//! largest tree head the device saw before.
//!
//! A bundle signed with a stolen key and sent to one device in a feed of its own is refused
//! unless its publish entry is in a signed ledger that extends what the device saw; to put it
//! there the thief must either publish it for every auditor to see, or fork the ledger, which
//! the device exposes the next time it sees the real one (that head is not consistent with the
//! forked head it remembers, and it refuses). The documents involved are in
//! `format/ledger_entry.rs`; the part of the check that reads a feed is in `check/feed.rs`.

use crate::check::trust::TrustSet;
use crate::error::{Error, ErrorKind, Result};
use crate::format::keys::{KeyId, TrustedKeys};
use crate::format::ledger_entry::{ConsistencyStep, Entry, MAX_STEPS, invalid};
use crate::format::merkle::{ConsistencyProof, SignedTreeHead, TreeHead};
use crate::format::signature::SignatureReport;
use crate::format::signed::{Signers, kind};

/// Checks a tree head's signatures: `threshold` distinct trusted keys over
/// [`crate::format::context::TREE_HEAD`] and [`TreeHead::signed_document`], the rule every signed document
/// of this crate follows ([`crate::format::signed`]).
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
    /// The entry the feed's own change appended (format 2), checked to be the tree head's
    /// last leaf; `Some` whenever the check passed.
    pub entry: Option<Entry>,
}

/// The device's ledger checks, given to [`crate::FeedVerifier::require_ledger`]: whose
/// signatures a tree head needs, and the largest tree head this device verified before.
#[derive(Clone, Debug)]
pub struct LedgerVerifier {
    signers: Signers<kind::TreeHead>,
    pub(crate) remembered: Option<TreeHead>,
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
                     device saw before; refusing a rolled-back ledger (after a channel switch, \
                     the new channel's feed is taken once a renewal of it carries a head at \
                     least that large: 'ampoule publish' of its current bundle renews it)",
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::format::digest::Digest;
    use crate::format::merkle::{leaf_hash, root};

    /// The head of a ledger holding the first `size` of three entries (RFC 9162 hashing).
    fn head(size: u64) -> TreeHead {
        let leaves: Vec<Digest> = [&b"entry 0"[..], b"entry 1", b"entry 2"]
            .iter()
            .take(size as usize)
            .map(|e| leaf_hash(e))
            .collect();
        TreeHead {
            tree_size: size,
            root_hash: root(&leaves),
            time: 1_764_576_000,
        }
    }

    fn proof(old_size: u64, new_size: u64, hashes: Vec<Digest>) -> ConsistencyProof {
        ConsistencyProof {
            old_size,
            new_size,
            hashes,
        }
    }

    #[test]
    fn a_walk_starts_only_where_a_step_is_needed() {
        // Found by cargo-mutants (issue 15): the crate's own tests never started a walk.
        let none = proof(0, 0, vec![]);
        // The same head again: nothing to walk.
        assert!(
            Walk::start(&head(2), &head(2), &none)
                .expect("same")
                .is_none()
        );
        // The same size with another root: a fork, never accepted.
        let mut forked = head(2);
        forked.root_hash = leaf_hash(b"rewritten");
        let err = Walk::start(&head(2), &forked, &none).expect_err("forked");
        assert!(
            err.to_string()
                .contains("the ledger was forked or rewritten"),
            "{err}"
        );
        // A smaller head: rolled back.
        let err = Walk::start(&head(2), &head(1), &none).expect_err("rolled back");
        assert_eq!(err.kind(), ErrorKind::Stale);
        // The feed's own proof starts at the head the device saw: checked, no step file.
        // RFC 9162 section 2.1.4.1: from size 2 to 3, SUBPROOF(2, D[0:3], true) is
        // SUBPROOF(2, D[0:2], true) (empty: the old tree is a whole subtree) followed by
        // MTH(D[2:3]), the third leaf's hash.
        let feed = proof(2, 3, vec![leaf_hash(b"entry 2")]);
        assert!(
            Walk::start(&head(2), &head(3), &feed)
                .expect("one proof")
                .is_none()
        );
        let bad = proof(2, 3, vec![leaf_hash(b"other")]);
        assert!(Walk::start(&head(2), &head(3), &bad).is_err());
        // The feed's proof starts elsewhere: the walk asks for the step from the seen size.
        let elsewhere = proof(1, 3, vec![]);
        let walk = Walk::start(&head(2), &head(3), &elsewhere)
            .expect("a walk")
            .expect("a step is needed");
        assert_eq!(walk.needs(), Some(2));
    }

    /// A step file from the head of `from` entries to the head of `to`, its proof `hashes`.
    fn step(from: u64, to: u64, hashes: Vec<Digest>) -> Vec<u8> {
        ConsistencyStep {
            tree_head: SignedTreeHead::new(head(to), vec![]),
            proof: proof(from, to, hashes),
        }
        .to_json()
    }

    #[test]
    fn a_walk_takes_steps_that_extend_the_head_reached_and_no_others() {
        // Found by cargo-mutants (issue 15): `Walk::advance`'s bounds. Proofs from RFC 9162
        // section 2.1.4.1, worked by hand for the three-entry ledger of `head`: from size 1
        // to 2, SUBPROOF(1, D[0:2], true) = SUBPROOF(1, D[0:1], true) (empty) : MTH(D[1:2]);
        // from 1 to 3, SUBPROOF(1, D[0:2], true) : MTH(D[2:3]).
        let (e1, e2) = (leaf_hash(b"entry 1"), leaf_hash(b"entry 2"));
        let feed = proof(2, 3, vec![e2]);
        let start = || {
            Walk::start(&head(1), &head(3), &feed)
                .expect("a walk")
                .expect("a step is needed")
        };
        // One step to size 2, where the feed's own proof starts: done.
        let mut walk = start();
        assert_eq!(walk.needs(), Some(1));
        walk.advance(&step(1, 2, vec![e1]))
            .expect("the step checks");
        assert_eq!(walk.needs(), None);
        // Done is done: anything handed in later changes nothing.
        walk.advance(b"not even JSON").expect("ignored");
        assert_eq!(walk.needs(), None);
        // One step straight to the feed's head (its size is the upper bound, included).
        let mut walk = start();
        walk.advance(&step(1, 3, vec![e1, e2]))
            .expect("the step checks");
        assert_eq!(walk.needs(), None);
        // A step that does not start where the walk stands, that stays at its size, that
        // leads past the feed's head, or whose proof does not check: refused.
        let refused = |bytes: Vec<u8>, says: &str| {
            let err = start().advance(&bytes).expect_err("refused");
            assert!(err.to_string().contains(says), "{err}");
            assert!(
                err.to_string().starts_with(
                    "ledger tree head of size 3 is not consistent with the tree head of size 1"
                ),
                "{err}"
            );
        };
        refused(step(2, 3, vec![e2]), "leads from size 2 to size 3");
        refused(step(1, 1, vec![]), "leads from size 1 to size 1");
        let past = ConsistencyStep {
            tree_head: SignedTreeHead::new(
                TreeHead {
                    tree_size: 4,
                    ..head(3)
                },
                vec![],
            ),
            proof: proof(1, 4, vec![e1, e2]),
        };
        refused(past.to_json(), "leads from size 1 to size 4");
        refused(step(1, 2, vec![e2]), "consistency");
    }

    #[test]
    fn a_walk_stops_after_its_step_cap() {
        let mut walk = Walk::start(&head(1), &head(3), &proof(2, 3, vec![]))
            .expect("a walk")
            .expect("a step is needed");
        walk.steps = MAX_STEPS - 1;
        // The last step allowed is taken (and fails on its own merits here)...
        let err = walk.advance(b"{}").expect_err("not a step");
        assert!(!err.to_string().contains("consistency steps"), "{err}");
        // ...and none after it.
        let err = walk.advance(b"{}").expect_err("capped");
        assert!(
            err.to_string()
                .ends_with(&format!("more than {MAX_STEPS} consistency steps")),
            "{err}"
        );
    }

    #[test]
    fn a_tree_head_needs_its_threshold_of_trusted_signatures() {
        // Found by cargo-mutants (issue 15): `check_tree_head` replaced by a default report.
        // RFC 8032 section 7.1 TEST 1's secret key, and TEST 2's, signing the head's context
        // and document as every signed document is signed.
        use ed25519_dalek::{Signer, SigningKey};
        let secret = |hex_key: &str| {
            SigningKey::from_bytes(&hex::decode(hex_key).expect("hex").try_into().expect("32"))
        };
        let one = secret("9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60");
        let two = secret("4ccd089b28ff96da9db6c346ec114e0f5b8a319f35aba624da8cf6ed4fb8a6fb");
        let key = |k: &SigningKey| {
            crate::format::keys::PublicKey::from_raw(k.verifying_key().as_bytes()).expect("key")
        };
        let signed_by = |signers: &[&SigningKey]| {
            let document = head(2).signed_document();
            let message = [crate::format::context::TREE_HEAD, &document[..]].concat();
            let signatures = signers
                .iter()
                .map(|k| crate::format::signature::SignatureEntry {
                    key_id: key(k).id(),
                    signature: k.sign(&message).to_bytes(),
                })
                .collect();
            SignedTreeHead::new(head(2), signatures)
        };
        let keys: TrustedKeys = [key(&one), key(&two)].into_iter().collect();
        let report = check_tree_head(&signed_by(&[&one]), &keys, 1).expect("one of one");
        assert_eq!(report.valid, vec![key(&one).id()]);
        let report = check_tree_head(&signed_by(&[&two, &one]), &keys, 2).expect("two of two");
        assert_eq!(report.valid.len(), 2);
        let err = check_tree_head(&signed_by(&[&one]), &keys, 2).expect_err("one of two");
        assert_eq!(err.kind(), ErrorKind::Signature);
        let only_one: TrustedKeys = [key(&one)].into_iter().collect();
        let err = check_tree_head(&signed_by(&[&two]), &only_one, 1).expect_err("untrusted");
        assert_eq!(err.kind(), ErrorKind::Signature);
        let err = check_tree_head(&signed_by(&[]), &only_one, 1).expect_err("unsigned");
        assert_eq!(err.kind(), ErrorKind::Signature);
    }
}
