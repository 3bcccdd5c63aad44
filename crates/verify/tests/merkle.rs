//! The ledger's Merkle tree against published RFC 6962 / RFC 9162 values, property tests of
//! its proofs, and the signed tree head's encoding and signature checks.

use ampoule_verify::merkle::{
    self, ConsistencyProof, InclusionProof, MemoryTree, NodeSource, SignedTreeHead, TreeHead,
    TreeHeadSignature, consistency_proof, inclusion_proof, leaf_hash, node_hash, tree_root,
    verify_consistency, verify_inclusion, verify_tree_head,
};
use ampoule_verify::{Digest, ErrorKind, KeyId, PublicKey, TrustedKeys, format};
use ed25519_dalek::{Signer, SigningKey};
use proptest::prelude::*;
use serde::Deserialize;

/// Values published with transparency-dev/merkle and the Certificate Transparency test suites
/// (commits and files named in the file's `source` field), hashed as RFC 6962 section 2.1.
const VECTORS: &str = include_str!("data/merkle-rfc6962.json");

#[derive(Deserialize)]
struct Vectors {
    leaf_inputs_hex: Vec<String>,
    root_hash_by_tree_size: Vec<Digest>,
    leaf_hashes: Vec<Digest>,
    level1: Vec<Digest>,
    level2: Vec<Digest>,
    inclusion_proofs: Vec<Inclusion>,
    consistency_proofs: Vec<Consistency>,
    empty_root: Digest,
    leaf_hash_of_empty: Digest,
    #[serde(rename = "leaf_hash_of_ascii_L123456")]
    leaf_hash_of_ascii_l123456: Digest,
    #[serde(rename = "node_hash_of_ascii_N123_N456")]
    node_hash_of_ascii_n123_n456: Digest,
    leaf_hash_of_hex_101112131415161718191a1b1c1d1e1f: Digest,
    node_hash_left_00_1f_right_20_3f: Digest,
    real_log_inclusion: RealLog,
}

#[derive(Deserialize)]
struct Inclusion {
    leaf_index: u64,
    tree_size: u64,
    path: Vec<Digest>,
}

#[derive(Deserialize)]
struct Consistency {
    size1: u64,
    size2: u64,
    proof: Vec<Digest>,
}

#[derive(Deserialize)]
struct RealLog {
    leaf_hash: Digest,
    leaf_index: u64,
    tree_size: u64,
    root: Digest,
    path: Vec<Digest>,
}

fn vectors() -> Vectors {
    serde_json::from_str(VECTORS).expect("the vector file parses")
}

fn leaves(v: &Vectors) -> Vec<Vec<u8>> {
    v.leaf_inputs_hex
        .iter()
        .map(|h| hex::decode(h).expect("leaf inputs are hex"))
        .collect()
}

fn tree_of(v: &Vectors, n: usize) -> MemoryTree {
    leaves(v)[..n].iter().map(|d| leaf_hash(d)).collect()
}

fn digest(hex: &str) -> Digest {
    hex.parse().expect("test digest is hex")
}

// transparency-dev/merkle rfc6962/rfc6962_test.go and the CT Python merkle test (see the file).
#[test]
fn hashing_matches_published_hasher_values() {
    let v = vectors();
    assert_eq!(merkle::empty_root(), v.empty_root);
    assert_eq!(leaf_hash(b""), v.leaf_hash_of_empty);
    assert_eq!(leaf_hash(b"L123456"), v.leaf_hash_of_ascii_l123456);
    // rfc6962_test.go hashes the raw ASCII strings as the two 'child hashes'; our node hash
    // takes 32-byte digests, so rebuild SHA-256(0x01 || "N123" || "N456") by hand as well.
    let mut raw = vec![0x01];
    raw.extend_from_slice(b"N123N456");
    assert_eq!(Digest::of(&raw), v.node_hash_of_ascii_n123_n456);
    let data: Vec<u8> = (0x10..0x20).collect();
    assert_eq!(
        leaf_hash(&data),
        v.leaf_hash_of_hex_101112131415161718191a1b1c1d1e1f
    );
    let left: [u8; 32] = std::array::from_fn(|i| i as u8);
    let right: [u8; 32] = std::array::from_fn(|i| i as u8 + 0x20);
    assert_eq!(
        node_hash(&Digest::from_bytes(left), &Digest::from_bytes(right)),
        v.node_hash_left_00_1f_right_20_3f
    );
}

// transparency-dev/merkle testonly/constants.go: roots for the first 0..=8 leaves.
#[test]
fn roots_of_0_to_8_leaves_match_published() {
    let v = vectors();
    let hashes: Vec<Digest> = leaves(&v).iter().map(|d| leaf_hash(d)).collect();
    assert_eq!(hashes, v.leaf_hashes);
    let full = tree_of(&v, 8);
    for (n, expected) in v.root_hash_by_tree_size.iter().enumerate() {
        assert_eq!(merkle::root(&hashes[..n]), *expected, "root of {n} leaves");
        assert_eq!(
            tree_of(&v, n).root(),
            *expected,
            "memory tree of {n} leaves"
        );
        assert_eq!(
            tree_root(&full, n as u64).expect("stored"),
            *expected,
            "prefix {n} of the 8-leaf tree"
        );
    }
}

// transparency-dev/merkle testonly/constants.go: interior nodes of the 8-leaf tree.
#[test]
fn stored_interior_nodes_match_published() {
    let v = vectors();
    let tree = tree_of(&v, 8);
    for (i, expected) in v.level1.iter().enumerate() {
        assert_eq!(tree.node(1, i as u64).expect("stored"), *expected);
    }
    for (i, expected) in v.level2.iter().enumerate() {
        assert_eq!(tree.node(2, i as u64).expect("stored"), *expected);
    }
    assert_eq!(
        tree.node(3, 0).expect("stored"),
        v.root_hash_by_tree_size[8]
    );
}

// transparency-dev/merkle proof/verify_test.go inclusion proofs (0-based leaf indexes).
#[test]
fn published_inclusion_proofs_are_generated_and_verify() {
    let v = vectors();
    let tree = tree_of(&v, 8);
    for case in &v.inclusion_proofs {
        let generated = inclusion_proof(&tree, case.leaf_index, case.tree_size).expect("proof");
        assert_eq!(
            generated, case.path,
            "leaf {} size {}",
            case.leaf_index, case.tree_size
        );
        let root = v.root_hash_by_tree_size[case.tree_size as usize];
        let leaf = v.leaf_hashes[case.leaf_index as usize];
        verify_inclusion(case.leaf_index, case.tree_size, &leaf, &case.path, &root)
            .expect("published proof verifies");
        // The same proof must not pass for the neighbouring leaf.
        let other = v.leaf_hashes[(case.leaf_index as usize + 1) % case.tree_size as usize];
        assert!(
            verify_inclusion(case.leaf_index, case.tree_size, &other, &case.path, &root).is_err()
        );
    }
}

// transparency-dev/merkle proof/verify_test.go consistency proofs, plus (1, 1) with an empty
// proof, which both suites list.
#[test]
fn published_consistency_proofs_are_generated_and_verify() {
    let v = vectors();
    let tree = tree_of(&v, 8);
    for case in &v.consistency_proofs {
        let generated = consistency_proof(&tree, case.size1, case.size2).expect("proof");
        assert_eq!(
            generated, case.proof,
            "sizes {} to {}",
            case.size1, case.size2
        );
        let old = v.root_hash_by_tree_size[case.size1 as usize];
        let new = v.root_hash_by_tree_size[case.size2 as usize];
        verify_consistency(case.size1, case.size2, &old, &new, &case.proof)
            .expect("published proof verifies");
        assert!(verify_consistency(case.size1, case.size2, &new, &old, &case.proof).is_err());
    }
    assert_eq!(
        consistency_proof(&tree, 1, 1).expect("proof"),
        Vec::<Digest>::new()
    );
    let one = v.root_hash_by_tree_size[1];
    verify_consistency(1, 1, &one, &one, &[]).expect("equal trees are consistent");
}

// RFC 6962 section 2.1.3 (RFC 9162 section 2.1.5): the symbolic 7-leaf example, instantiated
// with the first seven published leaf inputs.
#[test]
fn rfc_seven_leaf_example_paths_and_proofs() {
    let v = vectors();
    let tree = tree_of(&v, 7);
    let [a, b, c, d, e, f, j] = std::array::from_fn(|i| v.leaf_hashes[i]);
    let (g, h, i) = (node_hash(&a, &b), node_hash(&c, &d), node_hash(&e, &f));
    let (k, l) = (node_hash(&g, &h), node_hash(&i, &j));
    assert_eq!(node_hash(&k, &l), v.root_hash_by_tree_size[7]);
    let path = |m| inclusion_proof(&tree, m, 7).expect("path");
    assert_eq!(path(0), [b, h, l]);
    assert_eq!(path(3), [c, g, l]);
    assert_eq!(path(4), [f, j, k]);
    assert_eq!(path(6), [i, k]);
    let proof = |m| consistency_proof(&tree, m, 7).expect("proof");
    assert_eq!(proof(3), [c, d, g, l]);
    assert_eq!(proof(4), [l]);
    assert_eq!(proof(6), [i, j, k]);
}

// The CT Python merkle test's inclusion proof from a production log of 3,630,887 entries.
#[test]
fn real_log_inclusion_proof_verifies() {
    let r = vectors().real_log_inclusion;
    assert_eq!(r.path.len(), 22);
    verify_inclusion(r.leaf_index, r.tree_size, &r.leaf_hash, &r.path, &r.root)
        .expect("published proof verifies");
    let err = verify_inclusion(
        r.leaf_index + 1,
        r.tree_size,
        &r.leaf_hash,
        &r.path,
        &r.root,
    )
    .expect_err("wrong index");
    assert_eq!(err.kind(), ErrorKind::Proof);
    assert_eq!(
        err.to_string(),
        format!(
            "inclusion proof of leaf 848050 in tree size 3630887 does not lead to root {}",
            r.root
        )
    );
}

#[test]
fn bad_arguments_are_refused_with_their_values() {
    let v = vectors();
    let tree = tree_of(&v, 8);
    let root = v.root_hash_by_tree_size[8];
    let err = inclusion_proof(&tree, 8, 8).expect_err("index past the end");
    assert_eq!(err.to_string(), "leaf index 8 is not below tree size 8");
    let err = inclusion_proof(&tree, 0, 9).expect_err("size past the store");
    assert_eq!(
        err.to_string(),
        "tree size 9 is larger than the 8 leaves stored"
    );
    let err = consistency_proof(&tree, 5, 4).expect_err("shrinking");
    assert_eq!(
        err.to_string(),
        "tree size 5 is larger than tree size 4; a ledger never shrinks"
    );
    let err = verify_inclusion(8, 8, &root, &[], &root).expect_err("index past the end");
    assert_eq!(err.kind(), ErrorKind::Proof);
    let long = vec![root; 65];
    let err = verify_inclusion(0, 8, &root, &long, &root).expect_err("too long");
    assert_eq!(err.kind(), ErrorKind::TooLarge);
    assert_eq!(
        err.to_string(),
        "proof has 65 hashes, more than the limit of 64"
    );
    let err = verify_consistency(1, 8, &root, &root, &long).expect_err("too long");
    assert_eq!(
        err.to_string(),
        "proof has 65 hashes, more than the limit of 64"
    );
    // An empty consistency proof between different sizes proves nothing.
    let err = verify_consistency(3, 8, &v.root_hash_by_tree_size[3], &root, &[])
        .expect_err("empty proof");
    assert_eq!(
        err.to_string(),
        format!(
            "consistency proof from tree size 3 (root {}) to tree size 8 (root {root}) does not verify",
            v.root_hash_by_tree_size[3]
        )
    );
}

#[test]
fn consistency_from_empty_and_between_equal_sizes() {
    let v = vectors();
    let empty = merkle::empty_root();
    let root = v.root_hash_by_tree_size[8];
    verify_consistency(0, 8, &empty, &root, &[]).expect("the empty tree prefixes every tree");
    assert!(
        verify_consistency(0, 8, &root, &root, &[]).is_err(),
        "old root must be empty"
    );
    assert!(
        verify_consistency(0, 8, &empty, &root, &[root]).is_err(),
        "proof must be empty"
    );
    assert!(
        verify_consistency(8, 8, &root, &empty, &[]).is_err(),
        "equal sizes, other roots"
    );
    assert!(
        verify_consistency(8, 8, &root, &root, &[root]).is_err(),
        "proof must be empty"
    );
}

#[test]
fn proof_documents_bound_their_hash_lists_and_fields() {
    let v = vectors();
    let h = format!("\"{}\"", v.leaf_hashes[0]);
    let json = |n: usize| {
        format!(
            "{{\"leaf_index\":0,\"tree_size\":8,\"hashes\":[{}]}}",
            vec![h.as_str(); n].join(",")
        )
    };
    let ok: InclusionProof = serde_json::from_str(&json(64)).expect("64 hashes parse");
    assert_eq!(ok.hashes.len(), 64);
    let err = serde_json::from_str::<InclusionProof>(&json(65)).expect_err("65 hashes");
    assert!(
        err.to_string().starts_with("proof has more than 64 hashes"),
        "{err}"
    );
    let err = serde_json::from_str::<ConsistencyProof>(
        "{\"old_size\":1,\"new_size\":2,\"hashes\":[],\"extra\":1}",
    )
    .expect_err("unknown field");
    assert!(
        err.to_string().starts_with("unknown field `extra`"),
        "{err}"
    );

    let case = &v.inclusion_proofs[0];
    let proof = InclusionProof {
        leaf_index: case.leaf_index,
        tree_size: case.tree_size,
        hashes: case.path.clone(),
    };
    let head = TreeHead {
        tree_size: 8,
        root_hash: v.root_hash_by_tree_size[8],
        time: 0,
    };
    proof.verify(&v.leaf_hashes[0], &head).expect("verifies");
    let smaller = TreeHead {
        tree_size: 7,
        ..head
    };
    assert_eq!(
        proof
            .verify(&v.leaf_hashes[0], &smaller)
            .expect_err("size")
            .to_string(),
        "inclusion proof is for tree size 8, but the tree head has size 7"
    );
    let case = &v.consistency_proofs[1];
    let proof = ConsistencyProof {
        old_size: case.size1,
        new_size: case.size2,
        hashes: case.proof.clone(),
    };
    let old = TreeHead {
        tree_size: 6,
        root_hash: v.root_hash_by_tree_size[6],
        time: 0,
    };
    proof.verify(&old, &head).expect("verifies");
    assert!(proof.verify(&head, &head).is_err());
}

fn signing_key(seed: u8) -> SigningKey {
    SigningKey::from_bytes(&[seed; 32])
}

fn public(key: &SigningKey) -> PublicKey {
    PublicKey::from_verifying_key(&key.verifying_key()).expect("test key is strong")
}

fn sign(head: &TreeHead, key: &SigningKey) -> TreeHeadSignature {
    let bytes = format::signed_bytes(format::context::TREE_HEAD, &head.signed_document());
    TreeHeadSignature {
        key_id: public(key).id(),
        signature: key.sign(&bytes).to_bytes(),
    }
}

fn sample_head() -> TreeHead {
    TreeHead {
        tree_size: 8,
        root_hash: digest("5dc9da79a70659a9ad559cb701ded9a2ab9d823aad2f4960cfe370eff4604328"),
        time: 1_767_225_600,
    }
}

// Expected bytes from Python 3's standard library:
// json.dumps({"root_hash": ..., "time": 1767225600, "tree_size": 8}, sort_keys=True,
//            separators=(",", ":"))
#[test]
fn tree_head_document_is_sorted_compact_json() {
    assert_eq!(
        String::from_utf8(sample_head().signed_document()).expect("utf-8"),
        r#"{"root_hash":"5dc9da79a70659a9ad559cb701ded9a2ab9d823aad2f4960cfe370eff4604328","time":1767225600,"tree_size":8}"#
    );
}

#[test]
fn signed_tree_head_round_trips_and_verifies() {
    let key = signing_key(7);
    let head = sample_head();
    let signed = SignedTreeHead::new(head, vec![sign(&head, &key)]);
    let json = signed.to_json();
    assert!(!json.contains(&b'\n'));
    let trusted: TrustedKeys = [public(&key)].into_iter().collect();
    let verified = verify_tree_head(&json, &trusted, 1).expect("verifies");
    assert_eq!(*verified.head(), head);
    assert_eq!(verified.signers(), [public(&key).id()]);
    assert_eq!(SignedTreeHead::from_json(&json).expect("parses"), signed);
}

#[test]
fn tree_head_signature_refusals_name_the_problem() {
    let key = signing_key(7);
    let stranger = signing_key(9);
    let head = sample_head();
    let trusted: TrustedKeys = [public(&key)].into_iter().collect();

    let by_stranger = SignedTreeHead::new(head, vec![sign(&head, &stranger)]);
    let err = by_stranger
        .verify(&trusted, 1)
        .expect_err("untrusted signer");
    assert_eq!(err.kind(), ErrorKind::Signature);
    assert_eq!(
        err.to_string(),
        format!(
            "tree head of size 8 has no valid signature by a trusted key (by keys not trusted \
             here: {})",
            public(&stranger).id()
        )
    );

    // A signature made for another head (a different root) does not carry over. Under the one
    // rule for every signed document (FORMAT.md, "Counting signatures") it does not count, and
    // the refusal names it.
    let mut other = head;
    other.root_hash = Digest::of(b"another root");
    let moved = SignedTreeHead::new(head, vec![sign(&other, &key)]);
    let err = moved
        .verify(&trusted, 1)
        .expect_err("signature for another head");
    assert_eq!(
        err.to_string(),
        format!(
            "tree head of size 8 has no valid signature by a trusted key (not matching this \
             document: {})",
            public(&key).id()
        )
    );

    // A signature over the same document under another context (a feed) is refused.
    let feed_sig = TreeHeadSignature {
        key_id: public(&key).id(),
        signature: key
            .sign(&format::signed_bytes(
                format::context::FEED,
                &head.signed_document(),
            ))
            .to_bytes(),
    };
    assert!(
        SignedTreeHead::new(head, vec![feed_sig])
            .verify(&trusted, 1)
            .is_err()
    );

    let once = SignedTreeHead::new(head, vec![sign(&head, &key)]);
    let err = once.verify(&trusted, 0).expect_err("threshold 0");
    assert_eq!(
        err.to_string(),
        "a signature threshold of 0 would accept an unsigned tree head"
    );
    let both: TrustedKeys = [public(&key), public(&stranger)].into_iter().collect();
    let err = once.verify(&both, 2).expect_err("threshold 2");
    assert_eq!(
        err.to_string(),
        format!(
            "tree head of size 8 has 1 valid signature(s) by trusted keys but needs 2 (valid: {})",
            public(&key).id()
        )
    );
    let two = SignedTreeHead::new(head, vec![sign(&head, &key), sign(&head, &stranger)]);
    assert_eq!(
        two.verify(&both, 2).expect("two signers").signers().len(),
        2
    );
    let twice = SignedTreeHead::new(head, vec![sign(&head, &key), sign(&head, &key)]);
    // The same key twice counts once.
    let err = twice.verify(&both, 2).expect_err("same key twice");
    assert_eq!(
        err.to_string(),
        format!(
            "tree head of size 8 has 1 valid signature(s) by trusted keys but needs 2 (valid: {})",
            public(&key).id()
        )
    );
    // A bad signature by a trusted key beside a good one by another is ignored, not a veto:
    // anyone who can alter the file could append it.
    let mut garbage = sign(&head, &stranger);
    garbage.signature[0] ^= 1;
    let vetoed = SignedTreeHead::new(head, vec![sign(&head, &key), garbage]);
    assert_eq!(
        vetoed.verify(&both, 1).expect("one valid signer").signers(),
        [public(&key).id()]
    );
}

#[test]
fn tree_head_json_refuses_duplicates_unknown_fields_and_bad_spellings() {
    let key = signing_key(7);
    let head = sample_head();
    let json = String::from_utf8(SignedTreeHead::new(head, vec![sign(&head, &key)]).to_json())
        .expect("utf-8");
    let parse = |text: &str| SignedTreeHead::from_json(text.as_bytes()).expect_err(text);

    let duplicate = json.replacen("{\"tree_size\":8,", "{\"tree_size\":8,\"tree_size\":9,", 1);
    let err = parse(&duplicate);
    assert_eq!(err.kind(), ErrorKind::Malformed);
    assert!(
        err.to_string()
            .starts_with("signed tree head is not valid: duplicate field `tree_size`"),
        "{err}"
    );
    let unknown = json.replacen("{\"tree_size\":8,", "{\"tree_size\":8,\"note\":\"x\",", 1);
    assert!(parse(&unknown).to_string().contains("unknown field `note`"));
    let sig_hex = hex::encode(sign(&head, &key).signature);
    let upper = json.replace(&sig_hex, &sig_hex.to_uppercase());
    assert!(
        parse(&upper)
            .to_string()
            .contains("a signature must be 128 lowercase hex characters")
    );
    let big = format!("{json}{}", " ".repeat(merkle::MAX_SIGNED_TREE_HEAD_BYTES));
    let err = parse(&big);
    assert_eq!(err.kind(), ErrorKind::TooLarge);
    assert_eq!(
        err.to_string(),
        format!(
            "signed tree head is {} bytes, more than the limit of 16384",
            big.len()
        )
    );
    let sig = format!(
        "{{\"key_id\":\"{}\",\"signature\":\"{sig_hex}\"}}",
        KeyId::of_raw_key(&[1; 32])
    );
    let many = format!(
        "{{\"tree_size\":8,\"root_hash\":\"{}\",\"time\":1,\"signatures\":[{}]}}",
        head.root_hash,
        vec![sig.as_str(); 33].join(",")
    );
    assert_eq!(
        parse(&many).to_string(),
        "signed tree head carries 33 signatures, more than the limit of 32"
    );
}

#[test]
fn public_types_cross_threads() {
    fn send_sync<T: Send + Sync>() {}
    send_sync::<MemoryTree>();
    send_sync::<SignedTreeHead>();
    send_sync::<merkle::VerifiedTreeHead>();
    send_sync::<InclusionProof>();
    send_sync::<ConsistencyProof>();
}

fn flip(d: &Digest, bit: usize) -> Digest {
    let mut bytes = *d.as_bytes();
    bytes[bit / 8 % 32] ^= 1 << (bit % 8);
    Digest::from_bytes(bytes)
}

fn random_tree(size: u64) -> MemoryTree {
    (0..size).map(|i| leaf_hash(&i.to_be_bytes())).collect()
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(96))]

    #[test]
    fn every_inclusion_proof_verifies_and_any_flipped_bit_is_refused(
        size in 1u64..600, pick in any::<u64>(), which in any::<usize>(), bit in 0usize..256,
    ) {
        let tree = random_tree(size);
        let index = pick % size;
        let root = tree.root();
        let leaf = tree.node(0, index).expect("stored");
        let proof = inclusion_proof(&tree, index, size).expect("proof");
        prop_assert!(proof.len() <= 64 - size.leading_zeros() as usize);
        prop_assert!(verify_inclusion(index, size, &leaf, &proof, &root).is_ok());
        prop_assert!(verify_inclusion(index, size, &flip(&leaf, bit), &proof, &root).is_err());
        prop_assert!(verify_inclusion(index, size, &leaf, &proof, &flip(&root, bit)).is_err());
        if !proof.is_empty() {
            let mut bad = proof.clone();
            let at = which % bad.len();
            bad[at] = flip(&bad[at], bit);
            prop_assert!(verify_inclusion(index, size, &leaf, &bad, &root).is_err());
            prop_assert!(verify_inclusion(index, size, &leaf, &proof[1..], &root).is_err());
        }
        if size > 1 {
            let other = (index + 1 + pick % (size - 1)) % size;
            prop_assert!(verify_inclusion(other, size, &leaf, &proof, &root).is_err());
        }
    }

    #[test]
    fn every_consistency_proof_verifies_and_any_flipped_bit_is_refused(
        new in 1u64..600, pick in any::<u64>(), which in any::<usize>(), bit in 0usize..256,
    ) {
        let tree = random_tree(new);
        let old = 1 + pick % new;
        let old_root = tree_root(&tree, old).expect("stored");
        let new_root = tree.root();
        let proof = consistency_proof(&tree, old, new).expect("proof");
        prop_assert!(proof.len() <= 65 - new.leading_zeros() as usize);
        prop_assert!(verify_consistency(old, new, &old_root, &new_root, &proof).is_ok());
        prop_assert!(
            verify_consistency(old, new, &flip(&old_root, bit), &new_root, &proof).is_err()
        );
        prop_assert!(
            verify_consistency(old, new, &old_root, &flip(&new_root, bit), &proof).is_err()
        );
        if !proof.is_empty() {
            let mut bad = proof.clone();
            let at = which % bad.len();
            bad[at] = flip(&bad[at], bit);
            prop_assert!(verify_consistency(old, new, &old_root, &new_root, &bad).is_err());
        }
    }
}
