//! The audit ledger's Merkle tree, hashed exactly as RFC 9162 section 2.1 defines, its proofs,
//! and its signed tree heads.
//!
//! The release side appends every publish and withdraw to a ledger; a device checks, with a few
//! dozen hashes, that the release it installs was logged (an inclusion proof) and that the ledger
//! it sees today extends the one it saw before (a consistency proof), so history cannot be
//! rewritten without the device noticing. Writer and reader take hashing, proof algorithms and
//! the tree head's signed bytes from this one module, so the two cannot disagree.
//!
//! ```
//! use ampoule_verify::merkle::{self, MemoryTree};
//!
//! let tree: MemoryTree = ["fox", "badger", "hare"]
//!     .iter()
//!     .map(|entry| merkle::leaf_hash(entry.as_bytes()))
//!     .collect();
//! let proof = merkle::inclusion_proof(&tree, 1, 3)?;
//! let leaf = merkle::leaf_hash(b"badger");
//! merkle::verify_inclusion(1, 3, &leaf, &proof, &tree.root())?;
//! assert!(merkle::verify_inclusion(1, 3, &merkle::leaf_hash(b"fox"), &proof, &tree.root()).is_err());
//! # Ok::<(), ampoule_verify::Error>(())
//! ```

use std::fmt;
use std::io;

use serde::de::{SeqAccess, Visitor};
use serde::{Deserialize, Deserializer, Serialize};
use sha2::{Digest as _, Sha256};

use crate::error::{Error, ErrorKind, Result};
use crate::format::digest::Digest;
use crate::format::keys::{KeyId, TrustedKeys};
use crate::format::limit;
use crate::format::signature::SignatureEntry;
use crate::format::signature::SignatureReport;
use crate::format::signed::{SignedDocument, Signers, kind};

/// The most hashes a proof may hold. An inclusion proof in a tree of n leaves has at most
/// ceil(log2 n) hashes and a consistency proof at most ceil(log2 n) + 1 (RFC 9162 sections
/// 2.1.3 and 2.1.4), so 64 covers every tree of up to 2^63 leaves.
pub const MAX_PROOF_HASHES: usize = 64;

/// The largest signed tree head document a reader accepts, in bytes: room for
/// [`limit::SIGNATURES`] signatures with plenty to spare.
pub const MAX_SIGNED_TREE_HEAD_BYTES: usize = limit::TREE_HEAD_BYTES as usize;

/// RFC 9162 section 2.1.1: the byte hashed in front of a leaf's data.
const LEAF_PREFIX: u8 = 0x00;
/// RFC 9162 section 2.1.1: the byte hashed in front of two child hashes.
const NODE_PREFIX: u8 = 0x01;

/// The hash of a leaf: SHA-256(0x00 || data).
pub fn leaf_hash(data: &[u8]) -> Digest {
    let mut hasher = Sha256::new();
    hasher.update([LEAF_PREFIX]);
    hasher.update(data);
    Digest::from_bytes(hasher.finalize().into())
}

/// The hash of an interior node: SHA-256(0x01 || left || right).
pub fn node_hash(left: &Digest, right: &Digest) -> Digest {
    let mut hasher = Sha256::new();
    hasher.update([NODE_PREFIX]);
    hasher.update(left.as_bytes());
    hasher.update(right.as_bytes());
    Digest::from_bytes(hasher.finalize().into())
}

/// The root of the empty tree: SHA-256 of no bytes.
pub fn empty_root() -> Digest {
    Digest::of(b"")
}

/// The root (RFC 9162 MTH) of a tree whose leaves have these hashes.
pub fn root(leaf_hashes: &[Digest]) -> Digest {
    // A binary counter of complete subtrees: pushing leaf i merges as many pairs as i + 1 has
    // trailing zero bits. What stays are the subtrees of n's binary decomposition, largest first,
    // which is exactly how MTH splits at the largest power of two below n.
    let mut frontier: Vec<Digest> = Vec::with_capacity(64);
    for (i, leaf) in leaf_hashes.iter().enumerate() {
        frontier.push(*leaf);
        let mut count = i as u64 + 1;
        while count & 1 == 0 {
            let right = frontier
                .pop()
                .expect("a merge has two subtrees on the stack");
            let left = frontier
                .pop()
                .expect("a merge has two subtrees on the stack");
            frontier.push(node_hash(&left, &right));
            count >>= 1;
        }
    }
    fold_frontier(&frontier).unwrap_or_else(empty_root)
}

/// Combines complete subtrees (largest and leftmost first) into the hash of their union.
pub fn fold_frontier(subtrees: &[Digest]) -> Option<Digest> {
    let (last, rest) = subtrees.split_last()?;
    Some(
        rest.iter()
            .rev()
            .fold(*last, |acc, left| node_hash(left, &acc)),
    )
}

/// Where proof generation reads stored hashes from: the release side's files or memory.
///
/// Only complete subtrees are asked for, so a store that keeps, per level, the hash of every
/// complete subtree of 2^level leaves can serve any proof with O(log n) reads.
pub trait NodeSource {
    /// How many leaves the store holds.
    fn leaf_count(&self) -> u64;

    /// The hash of the complete subtree of `2^level` leaves whose first leaf is
    /// `index << level`; level 0 holds the leaf hashes. Only subtrees that lie entirely
    /// within [`leaf_count`](NodeSource::leaf_count) are asked for.
    fn node(&self, level: u32, index: u64) -> io::Result<Digest>;
}

/// The largest power of two strictly below `n`, for `n > 1` (the split point `k` of RFC 9162).
fn split_point(n: u64) -> u64 {
    debug_assert!(n > 1);
    1u64 << (63 - (n - 1).leading_zeros())
}

/// MTH of the leaves `[lo, hi)`. Every range the proof algorithms ask for starts at a multiple
/// of the largest power of two in its size, so its binary decomposition is made of stored
/// complete subtrees.
fn subtree_hash<S: NodeSource + ?Sized>(source: &S, lo: u64, hi: u64) -> Result<Digest> {
    debug_assert!(lo < hi);
    let mut pieces = [Digest::from_bytes([0; 32]); 64];
    let mut count = 0;
    let mut start = lo;
    while start < hi {
        let level = 63 - (hi - start).leading_zeros();
        debug_assert_eq!(
            start % (1u64 << level),
            0,
            "subtree [{lo}, {hi}) is not aligned"
        );
        let index = start >> level;
        pieces[count] = source.node(level, index).map_err(|e| {
            Error::io(
                format!("reading the stored hash of level {level}, index {index}"),
                e,
            )
        })?;
        count += 1;
        start += 1u64 << level;
    }
    Ok(fold_frontier(&pieces[..count]).expect("a non-empty range has at least one subtree"))
}

/// The root of the first `tree_size` leaves of `source`.
pub fn tree_root<S: NodeSource + ?Sized>(source: &S, tree_size: u64) -> Result<Digest> {
    check_stored(source, tree_size)?;
    if tree_size == 0 {
        return Ok(empty_root());
    }
    subtree_hash(source, 0, tree_size)
}

fn check_stored<S: NodeSource + ?Sized>(source: &S, tree_size: u64) -> Result<()> {
    let stored = source.leaf_count();
    if tree_size > stored {
        return Err(Error::new(
            ErrorKind::Proof,
            format!("tree size {tree_size} is larger than the {stored} leaves stored"),
        ));
    }
    Ok(())
}

/// The inclusion proof (RFC 9162 section 2.1.3.1, PATH) of leaf `leaf_index` in the tree of the
/// first `tree_size` leaves, ordered from the leaf's sibling up to the root's child.
pub fn inclusion_proof<S: NodeSource + ?Sized>(
    source: &S,
    leaf_index: u64,
    tree_size: u64,
) -> Result<Vec<Digest>> {
    check_stored(source, tree_size)?;
    check_leaf_index(leaf_index, tree_size)?;
    let (mut lo, mut hi) = (0, tree_size);
    let mut path = Vec::new();
    // PATH appends the sibling after recursing, so walking down from the root collects the
    // hashes in reverse.
    while hi - lo > 1 {
        let k = split_point(hi - lo);
        if leaf_index < lo + k {
            path.push(subtree_hash(source, lo + k, hi)?);
            hi = lo + k;
        } else {
            path.push(subtree_hash(source, lo, lo + k)?);
            lo += k;
        }
    }
    path.reverse();
    Ok(path)
}

/// The consistency proof (RFC 9162 section 2.1.4.1, PROOF) that the tree of the first
/// `old_size` leaves is a prefix of the tree of the first `new_size`. Empty when `old_size` is
/// 0 or equals `new_size`, where nothing needs proving beyond comparing roots.
pub fn consistency_proof<S: NodeSource + ?Sized>(
    source: &S,
    old_size: u64,
    new_size: u64,
) -> Result<Vec<Digest>> {
    check_stored(source, new_size)?;
    check_sizes(old_size, new_size)?;
    let mut path = Vec::new();
    if old_size == 0 || old_size == new_size {
        return Ok(path);
    }
    let (mut lo, mut hi, mut m) = (0, new_size, old_size);
    // SUBPROOF's flag: whether the subtree still starts at leaf 0 of the old tree, whose root
    // the verifier already knows and so is left out.
    let mut whole = true;
    loop {
        let size = hi - lo;
        if m == size {
            if !whole {
                path.push(subtree_hash(source, lo, hi)?);
            }
            break;
        }
        let k = split_point(size);
        if m <= k {
            path.push(subtree_hash(source, lo + k, hi)?);
            hi = lo + k;
        } else {
            path.push(subtree_hash(source, lo, lo + k)?);
            lo += k;
            m -= k;
            whole = false;
        }
    }
    path.reverse();
    Ok(path)
}

fn check_leaf_index(leaf_index: u64, tree_size: u64) -> Result<()> {
    if leaf_index >= tree_size {
        return Err(Error::new(
            ErrorKind::Proof,
            format!("leaf index {leaf_index} is not below tree size {tree_size}"),
        ));
    }
    Ok(())
}

fn check_sizes(old_size: u64, new_size: u64) -> Result<()> {
    if old_size > new_size {
        return Err(Error::new(
            ErrorKind::Proof,
            format!(
                "tree size {old_size} is larger than tree size {new_size}; a ledger never shrinks"
            ),
        ));
    }
    Ok(())
}

fn check_proof_len(proof: &[Digest]) -> Result<()> {
    if proof.len() > MAX_PROOF_HASHES {
        return Err(Error::new(
            ErrorKind::TooLarge,
            format!(
                "proof has {} hashes, more than the limit of {MAX_PROOF_HASHES}",
                proof.len()
            ),
        ));
    }
    Ok(())
}

/// Checks an inclusion proof (RFC 9162 section 2.1.3.2): that the leaf with hash `leaf` sits at
/// `leaf_index` in the tree of `tree_size` leaves whose root is `root`.
pub fn verify_inclusion(
    leaf_index: u64,
    tree_size: u64,
    leaf: &Digest,
    proof: &[Digest],
    root: &Digest,
) -> Result<()> {
    check_proof_len(proof)?;
    check_leaf_index(leaf_index, tree_size)?;
    let refused = || {
        Error::new(
            ErrorKind::Proof,
            format!(
                "inclusion proof of leaf {leaf_index} in tree size {tree_size} does not \
                 lead to root {root}"
            ),
        )
    };
    let (mut f, mut s) = (leaf_index, tree_size - 1);
    let mut r = *leaf;
    for p in proof {
        if s == 0 {
            return Err(refused());
        }
        if f & 1 == 1 || f == s {
            r = node_hash(p, &r);
            while f & 1 == 0 && f != 0 {
                f >>= 1;
                s >>= 1;
            }
        } else {
            r = node_hash(&r, p);
        }
        f >>= 1;
        s >>= 1;
    }
    if s == 0 && r == *root {
        Ok(())
    } else {
        Err(refused())
    }
}

/// Checks a consistency proof (RFC 9162 section 2.1.4.2): that the tree of `old_size` leaves
/// with root `old_root` is a prefix of the tree of `new_size` leaves with root `new_root`.
///
/// Equal sizes need an empty proof and equal roots; an old size of 0 needs an empty proof and
/// the empty tree's root, since the empty tree is a prefix of every tree.
pub fn verify_consistency(
    old_size: u64,
    new_size: u64,
    old_root: &Digest,
    new_root: &Digest,
    proof: &[Digest],
) -> Result<()> {
    check_proof_len(proof)?;
    check_sizes(old_size, new_size)?;
    let refused = || {
        Error::new(
            ErrorKind::Proof,
            format!(
                "consistency proof from tree size {old_size} (root {old_root}) to tree size \
                 {new_size} (root {new_root}) does not verify"
            ),
        )
    };
    if old_size == 0 || old_size == new_size {
        let expected = if old_size == 0 {
            empty_root()
        } else {
            *new_root
        };
        return if proof.is_empty() && *old_root == expected {
            Ok(())
        } else {
            Err(refused())
        };
    }
    // RFC 9162: when the old size is a power of two, the old root is itself the first node.
    let first = if old_size.is_power_of_two() {
        Some(*old_root)
    } else {
        None
    };
    let mut path = first.iter().chain(proof.iter());
    let Some(start) = path.next() else {
        return Err(refused());
    };
    let (mut f, mut s) = (old_size - 1, new_size - 1);
    while f & 1 == 1 {
        f >>= 1;
        s >>= 1;
    }
    let (mut fr, mut sr) = (*start, *start);
    for c in path {
        if s == 0 {
            return Err(refused());
        }
        if f & 1 == 1 || f == s {
            fr = node_hash(c, &fr);
            sr = node_hash(c, &sr);
            while f & 1 == 0 && f != 0 {
                f >>= 1;
                s >>= 1;
            }
        } else {
            sr = node_hash(&sr, c);
        }
        f >>= 1;
        s >>= 1;
    }
    if fr == *old_root && sr == *new_root && s == 0 {
        Ok(())
    } else {
        Err(refused())
    }
}

/// A tree with every level's complete-subtree hashes held in memory; for tests, and for tools
/// that build a small tree at once.
#[derive(Clone, Debug, Default)]
pub struct MemoryTree {
    levels: Vec<Vec<Digest>>,
}

impl MemoryTree {
    /// An empty tree.
    pub fn new() -> Self {
        Self::default()
    }

    /// Appends a leaf by its hash (see [`leaf_hash`]); returns its index.
    pub fn push(&mut self, leaf: Digest) -> u64 {
        let index = self.len();
        let mut hash = leaf;
        let mut level = 0;
        loop {
            if self.levels.len() == level {
                self.levels.push(Vec::new());
            }
            let nodes = &mut self.levels[level];
            nodes.push(hash);
            // An even count completes a pair, whose parent belongs one level up.
            if nodes.len() % 2 == 1 {
                break;
            }
            hash = node_hash(&nodes[nodes.len() - 2], &nodes[nodes.len() - 1]);
            level += 1;
        }
        index
    }

    /// How many leaves the tree holds.
    pub fn len(&self) -> u64 {
        self.levels.first().map_or(0, |leaves| leaves.len() as u64)
    }

    /// Whether the tree has no leaf.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The root of the whole tree.
    pub fn root(&self) -> Digest {
        tree_root(self, self.len()).expect("a memory tree holds every node it is asked for")
    }
}

impl FromIterator<Digest> for MemoryTree {
    fn from_iter<I: IntoIterator<Item = Digest>>(iter: I) -> Self {
        let mut tree = MemoryTree::new();
        for leaf in iter {
            tree.push(leaf);
        }
        tree
    }
}

impl NodeSource for MemoryTree {
    fn leaf_count(&self) -> u64 {
        self.len()
    }

    fn node(&self, level: u32, index: u64) -> io::Result<Digest> {
        self.levels
            .get(level as usize)
            .and_then(|nodes| nodes.get(usize::try_from(index).ok()?))
            .copied()
            .ok_or_else(|| {
                io::Error::new(
                    io::ErrorKind::NotFound,
                    format!("no node at level {level}, index {index}"),
                )
            })
    }
}

/// A proof document's list of hashes, refused while parsing once it passes
/// [`MAX_PROOF_HASHES`], so a hostile proof cannot make the reader allocate.
fn bounded_hashes<'de, D: Deserializer<'de>>(deserializer: D) -> Result<Vec<Digest>, D::Error> {
    struct Bounded;
    impl<'de> Visitor<'de> for Bounded {
        type Value = Vec<Digest>;

        fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
            write!(f, "a list of at most {MAX_PROOF_HASHES} hashes")
        }

        fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Self::Value, A::Error> {
            let mut hashes = Vec::with_capacity(seq.size_hint().unwrap_or(0).min(MAX_PROOF_HASHES));
            while let Some(hash) = seq.next_element()? {
                if hashes.len() == MAX_PROOF_HASHES {
                    return Err(serde::de::Error::custom(format!(
                        "proof has more than {MAX_PROOF_HASHES} hashes"
                    )));
                }
                hashes.push(hash);
            }
            Ok(hashes)
        }
    }
    deserializer.deserialize_seq(Bounded)
}

/// An inclusion proof as it travels in a feed: which leaf, in which tree size, and the path.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InclusionProof {
    /// The leaf's index, from 0.
    pub leaf_index: u64,
    /// The size of the tree the proof leads to.
    pub tree_size: u64,
    /// The audit path, leaf level first.
    #[serde(deserialize_with = "bounded_hashes")]
    pub hashes: Vec<Digest>,
}

impl InclusionProof {
    /// Checks that `leaf` is in the tree `head` describes, at this proof's index.
    pub fn verify(&self, leaf: &Digest, head: &TreeHead) -> Result<()> {
        if self.tree_size != head.tree_size {
            return Err(Error::new(
                ErrorKind::Proof,
                format!(
                    "inclusion proof is for tree size {}, but the tree head has size {}",
                    self.tree_size, head.tree_size
                ),
            ));
        }
        verify_inclusion(
            self.leaf_index,
            self.tree_size,
            leaf,
            &self.hashes,
            &head.root_hash,
        )
    }
}

/// A consistency proof between two tree sizes, as it travels in a feed.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ConsistencyProof {
    /// The size of the older tree.
    pub old_size: u64,
    /// The size of the newer tree.
    pub new_size: u64,
    /// The proof's hashes, as RFC 9162 section 2.1.4.1 orders them.
    #[serde(deserialize_with = "bounded_hashes")]
    pub hashes: Vec<Digest>,
}

impl ConsistencyProof {
    /// Checks that the tree `old` describes is a prefix of the tree `new` describes.
    pub fn verify(&self, old: &TreeHead, new: &TreeHead) -> Result<()> {
        if (self.old_size, self.new_size) != (old.tree_size, new.tree_size) {
            return Err(Error::new(
                ErrorKind::Proof,
                format!(
                    "consistency proof is from tree size {} to {}, but the tree heads have \
                     sizes {} and {}",
                    self.old_size, self.new_size, old.tree_size, new.tree_size
                ),
            ));
        }
        verify_consistency(
            self.old_size,
            self.new_size,
            &old.root_hash,
            &new.root_hash,
            &self.hashes,
        )
    }
}

/// What a tree head states: the ledger had `tree_size` entries with root `root_hash` at `time`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TreeHead {
    /// How many entries the ledger held.
    pub tree_size: u64,
    /// The Merkle tree root over those entries.
    pub root_hash: Digest,
    /// When the head was made, in seconds since the Unix epoch.
    pub time: u64,
}

impl TreeHead {
    /// The bytes every signature covers (after [`crate::format::context::TREE_HEAD`]): the head as JSON with
    /// keys in sorted order and no whitespace, which is also its RFC 8785 canonical form,
    /// since it holds only a hex string and integers far below 2^53.
    pub fn signed_document(&self) -> Vec<u8> {
        format!(
            "{{\"root_hash\":\"{}\",\"time\":{},\"tree_size\":{}}}",
            self.root_hash, self.time, self.tree_size
        )
        .into_bytes()
    }
}

/// One signature over a tree head's [`signed_document`](TreeHead::signed_document): the same
/// entry every signed document carries, under [`crate::format::context::TREE_HEAD`].
pub type TreeHeadSignature = SignatureEntry;

/// A tree head with its signatures, as the ledger stores it and a feed carries it.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SignedTreeHead {
    tree_size: u64,
    root_hash: Digest,
    time: u64,
    signatures: Vec<TreeHeadSignature>,
}

impl SignedTreeHead {
    /// Joins a head and signatures made over its [`signed_document`](TreeHead::signed_document).
    pub fn new(head: TreeHead, signatures: Vec<TreeHeadSignature>) -> Self {
        SignedTreeHead {
            tree_size: head.tree_size,
            root_hash: head.root_hash,
            time: head.time,
            signatures,
        }
    }

    /// What the head states (not yet verified).
    pub fn head(&self) -> TreeHead {
        TreeHead {
            tree_size: self.tree_size,
            root_hash: self.root_hash,
            time: self.time,
        }
    }

    /// The signatures carried.
    pub fn signatures(&self) -> &[TreeHeadSignature] {
        &self.signatures
    }

    /// Parses a signed tree head, refusing oversized input, unknown and duplicate fields.
    pub fn from_json(json: &[u8]) -> Result<Self> {
        if json.len() > MAX_SIGNED_TREE_HEAD_BYTES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "signed tree head is {} bytes, more than the limit of \
                     {MAX_SIGNED_TREE_HEAD_BYTES}",
                    json.len()
                ),
            ));
        }
        let parsed: SignedTreeHead = serde_json::from_slice(json).map_err(|e| {
            Error::new(
                ErrorKind::Malformed,
                format!("signed tree head is not valid: {e}"),
            )
        })?;
        if parsed.signatures.len() > limit::SIGNATURES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "signed tree head carries {} signatures, more than the limit of {}",
                    parsed.signatures.len(),
                    limit::SIGNATURES
                ),
            ));
        }
        Ok(parsed)
    }

    /// The head as one line of compact JSON (no newline inside), as the ledger writes it.
    pub fn to_json(&self) -> Vec<u8> {
        serde_json::to_vec(self).expect("a signed tree head always serializes")
    }

    /// Checks the signatures under the rule every signed document follows
    /// ([`crate::format::signed`]): at least `threshold` distinct trusted keys must have signed
    /// validly; other signatures are ignored.
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Signature`] when fewer keys signed, or the threshold is not usable with
    /// `trusted`; [`ErrorKind::TooLarge`] over the signature cap.
    pub fn verify(&self, trusted: &TrustedKeys, threshold: usize) -> Result<VerifiedTreeHead> {
        if threshold == 0 {
            return Err(Error::new(
                ErrorKind::Signature,
                "a signature threshold of 0 would accept an unsigned tree head",
            ));
        }
        let signers = Signers::<kind::TreeHead>::new(trusted.clone(), threshold)?;
        let report = self.check(&signers)?;
        Ok(VerifiedTreeHead {
            head: self.head(),
            signers: report.valid,
        })
    }

    /// Checks the signatures against the tree-head signers.
    pub(crate) fn check(&self, signers: &Signers<kind::TreeHead>) -> Result<SignatureReport> {
        let head = self.head();
        let document = head.signed_document();
        SignedDocument::<kind::TreeHead>::new(&document, &self.signatures)?.check(
            signers,
            format_args!("tree head of size {}", head.tree_size),
        )
    }
}

/// A tree head whose signatures met the threshold; only [`SignedTreeHead::verify`] makes one.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct VerifiedTreeHead {
    head: TreeHead,
    signers: Vec<KeyId>,
}

impl VerifiedTreeHead {
    /// What the head states.
    pub fn head(&self) -> &TreeHead {
        &self.head
    }

    /// The trusted keys whose signatures verified, each once, in key-id order.
    pub fn signers(&self) -> &[KeyId] {
        &self.signers
    }
}

/// Parses a signed tree head and checks that at least `threshold` trusted keys signed it
/// (pass 1 until threshold signing is configured).
pub fn verify_tree_head(
    json: &[u8],
    trusted: &TrustedKeys,
    threshold: usize,
) -> Result<VerifiedTreeHead> {
    SignedTreeHead::from_json(json)?.verify(trusted, threshold)
}
