//! One table of signature cases run against all four signed documents, each through the entry
//! point a device uses: a bundle through `Verifier::verify_path`, a feed through
//! `FeedVerifier::verify`, a signed tree head through `LedgerVerifier::verify_head`, a trust
//! set through `TrustSet::verify_initial`. The rule under test is FORMAT.md's "Counting
//! signatures": distinct key ids holding the role, each signature valid over the kind's
//! context; everything else is ignored and named in the refusal.
//!
//! Ed25519 signatures come from ed25519-dalek (RFC 8032) over `context || document`, the
//! contexts of `format::context`.

mod common;

use ampoule_verify::feed::{Feed, SignedFeed};
use ampoule_verify::format::{context, limit, signed_bytes};
use ampoule_verify::ledger::LedgerVerifier;
use ampoule_verify::merkle::{SignedTreeHead, TreeHead};
use ampoule_verify::signature::{SignatureEntry, Signatures};
use ampoule_verify::trust::{KeyEntry, Thresholds, TrustSetBody};
use ampoule_verify::{
    Digest, DocumentKind, ErrorKind, FeedVerifier, KeyId, PublicKey, Timestamp, TrustSet,
    TrustSetFile, TrustedKeys, Verifier,
};
use ed25519_dalek::{Signer, SigningKey};

const NOW: u64 = 1_796_083_200; // 2026-12-01T00:00:00Z

fn at(secs: u64) -> Timestamp {
    Timestamp::from_unix(secs).expect("test instants are in range")
}

fn key(seed: u8) -> SigningKey {
    SigningKey::from_bytes(&[seed; 32])
}

fn public(key: &SigningKey) -> PublicKey {
    PublicKey::from_verifying_key(&key.verifying_key()).expect("test keys are not weak")
}

fn id(key: &SigningKey) -> KeyId {
    public(key).id()
}

/// Two keys holding the role under test.
fn a() -> SigningKey {
    key(11)
}
fn b() -> SigningKey {
    key(12)
}
/// A key the device trusts, but only for another role.
fn other_role() -> SigningKey {
    key(13)
}
/// A key the device does not know.
fn stranger() -> SigningKey {
    key(14)
}

/// One signature to put on a document.
#[derive(Clone)]
struct Sig {
    key: SigningKey,
    /// The context it is made under: the document's own, or another kind's.
    context: &'static [u8],
    /// Flip a bit of the signature after signing.
    corrupt: bool,
}

fn sig(key: SigningKey, context: &'static [u8]) -> Sig {
    Sig {
        key,
        context,
        corrupt: false,
    }
}

fn make(sig: &Sig, document: &[u8]) -> SignatureEntry {
    let mut signature = sig
        .key
        .sign(&signed_bytes(sig.context, document))
        .to_bytes();
    if sig.corrupt {
        signature[17] ^= 0x40;
    }
    SignatureEntry {
        key_id: id(&sig.key),
        signature,
    }
}

/// How one document kind is signed and checked.
trait Case {
    /// The kind's own context.
    fn context(&self) -> &'static [u8];
    /// Another kind's context, for the cross-kind replay case.
    fn other_context(&self) -> &'static [u8];
    /// How the refusal names the document.
    fn what(&self) -> String;
    /// Signs the document with `sigs` and checks it as a device does, the role's threshold
    /// being `threshold`; the key ids that counted, or the error.
    fn check(&self, sigs: &[Sig], threshold: usize) -> Result<Vec<KeyId>, (ErrorKind, String)>;
}

fn role_keys() -> TrustedKeys {
    [public(&a()), public(&b())].into_iter().collect()
}

fn refused(e: ampoule_verify::Error) -> (ErrorKind, String) {
    (e.kind(), e.to_string())
}

struct BundleCase {
    dir: tempfile::TempDir,
}

impl Case for BundleCase {
    fn context(&self) -> &'static [u8] {
        context::MANIFEST
    }
    fn other_context(&self) -> &'static [u8] {
        context::FEED
    }
    fn what(&self) -> String {
        "bundle".into()
    }
    fn check(&self, sigs: &[Sig], threshold: usize) -> Result<Vec<KeyId>, (ErrorKind, String)> {
        let sigs = sigs.to_vec();
        // Signatures as carried, in the order given: repeated keys and oversized lists too.
        let path = common::write_bundle_signed_by(
            self.dir.path(),
            common::NAME,
            "1.0.0",
            b"model bytes",
            &move |manifest| Signatures {
                signatures: sigs.iter().map(|s| make(s, manifest)).collect(),
            },
        );
        let verifier = Verifier::new(role_keys(), common::APP_VERSION.parse().expect("app"))
            .and_then(|v| v.with_threshold(threshold))
            .map_err(refused)?;
        let verified = verifier.verify_path(&path).map_err(refused);
        std::fs::remove_file(&path).expect("remove test bundle");
        Ok(verified?.signers().to_vec())
    }
}

struct FeedCase;

impl FeedCase {
    fn text() -> String {
        Feed {
            format: 1,
            channel: "stable".into(),
            sequence: 4,
            issued: at(NOW - 3600),
            expires: at(NOW + 86_400),
            release: None,
            trust_set: None,
            ledger: None,
        }
        .to_json()
    }
}

impl Case for FeedCase {
    fn context(&self) -> &'static [u8] {
        context::FEED
    }
    fn other_context(&self) -> &'static [u8] {
        context::TREE_HEAD
    }
    fn what(&self) -> String {
        "feed".into()
    }
    fn check(&self, sigs: &[Sig], threshold: usize) -> Result<Vec<KeyId>, (ErrorKind, String)> {
        let text = Self::text();
        let signed = SignedFeed {
            signatures: sigs.iter().map(|s| make(s, text.as_bytes())).collect(),
            feed: text,
        };
        // Serialized by hand so that the order and repeats stay as given.
        let bytes = serde_json::to_vec(&signed).expect("feed envelope");
        let verifier = FeedVerifier::new(role_keys(), "stable")
            .map_err(refused)?
            .threshold(threshold);
        let verified = verifier.verify(&bytes, at(NOW)).map_err(refused)?;
        Ok(verified.signers().to_vec())
    }
}

struct TreeHeadCase;

impl TreeHeadCase {
    fn head() -> TreeHead {
        TreeHead {
            tree_size: 8,
            root_hash: Digest::of(b"a ledger root"),
            time: NOW,
        }
    }
}

impl Case for TreeHeadCase {
    fn context(&self) -> &'static [u8] {
        context::TREE_HEAD
    }
    fn other_context(&self) -> &'static [u8] {
        context::TRUST_SET
    }
    fn what(&self) -> String {
        "tree head of size 8".into()
    }
    fn check(&self, sigs: &[Sig], threshold: usize) -> Result<Vec<KeyId>, (ErrorKind, String)> {
        let head = Self::head();
        let document = head.signed_document();
        let signed = SignedTreeHead::new(head, sigs.iter().map(|s| make(s, &document)).collect());
        // Through its JSON, as a feed or the ledger carries it.
        let signed = SignedTreeHead::from_json(&signed.to_json()).map_err(refused)?;
        let verifier = LedgerVerifier::new(role_keys(), threshold).map_err(refused)?;
        Ok(verifier.verify_head(&signed).map_err(refused)?.valid)
    }
}

struct TrustSetCase;

impl TrustSetCase {
    /// A set listing the two role keys for every kind and a third key for feeds only; the
    /// trust-set threshold is the one under test.
    fn text(threshold: usize) -> TrustSetFile {
        let every = DocumentKind::ALL.to_vec();
        TrustSetFile::unsigned(TrustSetBody {
            format: 1,
            version: 1,
            expires: at(NOW + 365 * 86_400),
            keys: vec![
                KeyEntry::new(&public(&a()), every.clone(), "survey office"),
                KeyEntry::new(&public(&b()), every, "field station"),
                KeyEntry::new(&public(&other_role()), vec![DocumentKind::Feed], "runner"),
            ],
            thresholds: Thresholds {
                bundle: 1,
                feed: 1,
                tree_head: 1,
                trust_set: threshold as u32,
            },
        })
        .expect("a valid trust set")
    }
}

impl Case for TrustSetCase {
    fn context(&self) -> &'static [u8] {
        context::TRUST_SET
    }
    fn other_context(&self) -> &'static [u8] {
        context::MANIFEST
    }
    fn what(&self) -> String {
        "trust set version 1".into()
    }
    fn check(&self, sigs: &[Sig], threshold: usize) -> Result<Vec<KeyId>, (ErrorKind, String)> {
        let file = Self::text(threshold);
        let text = file.text().to_string();
        let envelope = serde_json::json!({
            "trust_set": text,
            "signatures": sigs.iter().map(|s| make(s, text.as_bytes())).collect::<Vec<_>>(),
        });
        let bytes = serde_json::to_vec(&envelope).expect("trust-set envelope");
        let set = TrustSet::verify_initial(&bytes, at(NOW)).map_err(refused)?;
        Ok(set.signature_report().valid.clone())
    }
}

fn sorted(mut ids: Vec<KeyId>) -> Vec<KeyId> {
    ids.sort();
    ids
}

fn run_table(case: &dyn Case) {
    let what = case.what();
    let own = case.context();
    let ok = |sigs: &[Sig], threshold: usize, expected: Vec<KeyId>, name: &str| {
        let got = case
            .check(sigs, threshold)
            .unwrap_or_else(|e| panic!("{what}: {name}: refused: {e:?}"));
        assert_eq!(sorted(got), sorted(expected), "{what}: {name}");
    };
    let refuse = |sigs: &[Sig], threshold: usize, expected: String, name: &str| {
        let (kind, message) = case
            .check(sigs, threshold)
            .expect_err(&format!("{what}: {name} must be refused"));
        assert_eq!(kind, ErrorKind::Signature, "{what}: {name}: {message}");
        assert_eq!(message, expected, "{what}: {name}");
    };

    // Valid: one role key at threshold 1, two at threshold 2.
    ok(&[sig(a(), own)], 1, vec![id(&a())], "valid");
    ok(
        &[sig(a(), own), sig(b(), own)],
        2,
        vec![id(&a()), id(&b())],
        "valid at threshold 2",
    );

    // The same key twice counts once.
    refuse(
        &[sig(a(), own), sig(a(), own)],
        2,
        format!(
            "{what} has 1 valid signature(s) by trusted keys but needs 2 (valid: {})",
            id(&a())
        ),
        "the same key twice",
    );

    // An untrusted key does not count.
    refuse(
        &[sig(stranger(), own)],
        1,
        format!(
            "{what} has no valid signature by a trusted key (by keys not trusted here: {})",
            id(&stranger())
        ),
        "untrusted key",
    );

    // A key trusted for another role does not count for this one.
    refuse(
        &[sig(other_role(), own)],
        1,
        format!(
            "{what} has no valid signature by a trusted key (by keys not trusted here: {})",
            id(&other_role())
        ),
        "wrong role",
    );

    // A bad signature by a trusted key is ignored: alone it is named, beside a good one it
    // vetoes nothing.
    let bad = Sig {
        corrupt: true,
        ..sig(a(), own)
    };
    refuse(
        std::slice::from_ref(&bad),
        1,
        format!(
            "{what} has no valid signature by a trusted key (not matching this document: {})",
            id(&a())
        ),
        "bad signature by a trusted key",
    );
    ok(
        &[bad, sig(b(), own)],
        1,
        vec![id(&b())],
        "bad signature beside a good one",
    );

    // A signature made for another kind of document over the same bytes does not verify.
    refuse(
        &[sig(a(), case.other_context())],
        1,
        format!(
            "{what} has no valid signature by a trusted key (not matching this document: {})",
            id(&a())
        ),
        "another kind's context",
    );

    // Below the threshold.
    refuse(
        &[sig(a(), own)],
        2,
        format!(
            "{what} has 1 valid signature(s) by trusted keys but needs 2 (valid: {})",
            id(&a())
        ),
        "below threshold",
    );

    // No signatures at all.
    refuse(
        &[],
        1,
        format!("{what} is not signed; it needs a signature by a trusted key"),
        "unsigned",
    );

    // Over the cap: one more signature than the format allows, valid ones among them.
    let mut many = vec![sig(a(), own), sig(b(), own)];
    many.extend((0..limit::SIGNATURES as u8 - 1).map(|i| sig(key(100 + i), own)));
    assert_eq!(many.len(), limit::SIGNATURES + 1);
    let (kind, message) = case
        .check(&many, 1)
        .expect_err(&format!("{what}: over the cap must be refused"));
    assert_eq!(kind, ErrorKind::TooLarge, "{what}: over the cap: {message}");
    assert!(
        message.contains(&format!("{} signatures", limit::SIGNATURES + 1))
            && message.contains(&format!("the limit of {}", limit::SIGNATURES)),
        "{what}: over the cap: {message}"
    );
    // At the cap exactly, the valid ones count.
    many.pop();
    ok(&many, 2, vec![id(&a()), id(&b())], "at the cap");
}

#[test]
fn one_rule_for_bundles() {
    run_table(&BundleCase {
        dir: tempfile::tempdir().expect("temp dir"),
    });
}

#[test]
fn one_rule_for_feeds() {
    run_table(&FeedCase);
}

#[test]
fn one_rule_for_tree_heads() {
    run_table(&TreeHeadCase);
}

#[test]
fn one_rule_for_trust_sets() {
    run_table(&TrustSetCase);
}
