//! Key rotation on the device (issue 5): the store keeps the newest trust set it accepted and
//! refuses older ones or damaged files, feeds are checked with a trust set's feed keys and
//! threshold, a feed's `trust_set` reference is validated like its release path, and a
//! rotation keeps the ledger requirement.

use ampoule_verify::feed::{Feed, SignedFeed, TrustSetRef};
use ampoule_verify::format::{context, signed_bytes};
use ampoule_verify::signature::SignatureEntry;
use ampoule_verify::store::{TRUST_CHAIN_FILE, TRUST_SET_FILE};
use ampoule_verify::trust::{KeyEntry, Thresholds, TrustSetBody};
use ampoule_verify::{
    Digest, DocumentKind, ErrorKind, FeedVerifier, KeyId, PublicKey, Store, Timestamp, TrustSet,
    TrustSetFile, Verifier,
};
use ed25519_dalek::{Signer, SigningKey};

const NOW: u64 = 1_796_083_200; // 2026-12-01T00:00:00Z
const YEAR: u64 = 365 * 86_400;

fn at(secs: u64) -> Timestamp {
    Timestamp::from_unix(secs).expect("test instants are in range")
}

fn key(seed: u8) -> SigningKey {
    SigningKey::from_bytes(&[seed; 32])
}

fn public(k: &SigningKey) -> PublicKey {
    PublicKey::from_verifying_key(&k.verifying_key()).expect("test keys are not weak")
}

fn id(k: &SigningKey) -> KeyId {
    public(k).id()
}

/// A trust set of `keys` with every role, `feed_only` keys with just the feed role, bundle
/// and trust-set thresholds of 2 (1 for feeds), signed by `signers`.
fn trust_set(
    version: u64,
    keys: &[&SigningKey],
    feed_only: &[&SigningKey],
    signers: &[&SigningKey],
) -> Vec<u8> {
    let mut entries: Vec<KeyEntry> = keys
        .iter()
        .map(|k| KeyEntry::new(&public(k), DocumentKind::ALL.to_vec(), "survey team"))
        .collect();
    entries.extend(
        feed_only
            .iter()
            .map(|k| KeyEntry::new(&public(k), vec![DocumentKind::Feed], "publishing runner")),
    );
    let body = TrustSetBody {
        format: 1,
        version,
        expires: at(NOW + YEAR),
        keys: entries,
        thresholds: Thresholds {
            bundle: 2,
            feed: 1,
            tree_head: 1,
            trust_set: 2,
        },
    };
    let mut file = TrustSetFile::unsigned(body).expect("test trust sets are valid");
    for k in signers {
        let entry = SignatureEntry {
            key_id: id(k),
            signature: k.sign(&file.signing_request()).to_bytes(),
        };
        file.insert_signature(entry).expect("under the limit");
    }
    file.to_json()
}

/// Version 1 trusts a, b, c and the feed key f; version 2 revokes c.
fn v1_v2() -> (Vec<u8>, Vec<u8>) {
    let (a, b, c, f) = (key(1), key(2), key(3), key(4));
    (
        trust_set(1, &[&a, &b, &c], &[&f], &[&a, &b]),
        trust_set(2, &[&a, &b], &[&f], &[&a, &b]),
    )
}

fn store_in(dir: &std::path::Path, trust: &TrustSet) -> Store {
    let verifier =
        Verifier::from_trust_set(trust, "2.3.0".parse().expect("version")).expect("bundle keys");
    Store::open(dir, verifier).expect("store opens")
}

/// The chain file's sets, as stored.
fn stored_chain(store_dir: &std::path::Path) -> Vec<String> {
    let bytes = std::fs::read(store_dir.join(TRUST_CHAIN_FILE)).expect("stored");
    let json: serde_json::Value = serde_json::from_slice(&bytes).expect("json");
    assert_eq!(json["format"], 1);
    json["sets"]
        .as_array()
        .expect("sets")
        .iter()
        .map(|v| v.as_str().expect("text").to_string())
        .collect()
}

#[test]
fn issue5_the_store_keeps_the_newest_trust_set_and_refuses_older_ones() {
    let (v1, v2) = v1_v2();
    let dir = tempfile::tempdir().expect("tempdir");
    let store_dir = dir.path().join("store");
    // Nothing stored yet: the set shipped with the app.
    let trust = Store::load_trust_set(&store_dir, &v1, at(NOW)).expect("initial");
    assert_eq!(trust.version(), 1);
    let store = store_in(&store_dir, &trust);
    assert_eq!(store.trust_chain(&v1).expect("readable").1, 0);

    let next = trust
        .accept_successor(&v2, at(NOW))
        .expect("v2 is a successor");
    store.save_trust_set(&v1, &next).expect("saved");
    assert_eq!(
        stored_chain(&store_dir),
        [String::from_utf8(next.to_json()).expect("utf-8")],
        "the exact bytes of the accepted set, after the shipped one"
    );
    let (newest, proven, ignored) = store.trust_chain(&v1).expect("readable");
    assert_eq!((newest.version(), proven, ignored), (2, 1, None));
    // After a restart the app still ships version 1; the stored version 2 wins.
    let resumed = store.trust_set(&v1, at(NOW)).expect("resumed");
    assert_eq!(resumed.version(), 2);
    assert!(
        resumed
            .keys_for(DocumentKind::Bundle)
            .0
            .get(&id(&key(3)))
            .is_none(),
        "the revoked key stays revoked after a restart"
    );
    // Saving the same set again changes nothing; saving the older one is a rollback.
    store.save_trust_set(&v1, &next).expect("idempotent");
    let older = TrustSet::verify_initial(&v1, at(NOW)).expect("v1 alone is valid");
    let e = store
        .save_trust_set(&v1, &older)
        .expect_err("rollback of trust");
    assert_eq!(e.kind(), ErrorKind::TrustSet);
    assert_eq!(
        e.to_string(),
        format!(
            "trust set version 1 is not newer than version 2, the highest store {} accepted; \
             refusing to roll trust back",
            store_dir.display()
        )
    );
    // A different version 2 (signed by other keys of version 1) is not the stored one.
    let (a, c, f) = (key(1), key(3), key(4));
    let other_v2 = older
        .accept_successor(&trust_set(2, &[&a, &c], &[&f], &[&a, &c]), at(NOW))
        .expect("a valid successor of version 1");
    assert_eq!(
        store
            .save_trust_set(&v1, &other_v2)
            .expect_err("same version, other content")
            .to_string(),
        format!(
            "trust set version 2 is not newer than version 2, the highest store {} accepted; \
             refusing to roll trust back",
            store_dir.display()
        )
    );
    assert_eq!(
        stored_chain(&store_dir),
        [String::from_utf8(next.to_json()).expect("utf-8")],
        "refusals leave the stored chain alone"
    );
    // No temporary file is left in the store directory.
    let names: Vec<String> = std::fs::read_dir(&store_dir)
        .expect("list")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    assert!(
        names.iter().all(|n| !n.starts_with('.')),
        "leftovers: {names:?}"
    );
}

/// Issue 10 item 1 changed issue 5's rule. A damaged chain used to be an error "never a
/// reason to fall back to the shipped set"; but whoever can damage the file can delete the
/// store, which falls back just as well, while the error locked the device out for good. Now
/// the chain is believed exactly as far as each set is a successor of the one before, from the
/// set shipped with the app; the rest is ignored, said, and dropped at the next rotation.
#[test]
fn issue10_a_damaged_stored_trust_chain_is_believed_only_as_far_as_it_is_proven() {
    let (v1, v2) = v1_v2();
    let dir = tempfile::tempdir().expect("tempdir");
    let store_dir = dir.path().join("store");
    let trust = TrustSet::verify_initial(&v1, at(NOW)).expect("v1");
    let store = store_in(&store_dir, &trust);
    let v2_set = trust.accept_successor(&v2, at(NOW)).expect("v2");
    store.save_trust_set(&v1, &v2_set).expect("saved");
    let path = store_dir.join(TRUST_CHAIN_FILE);

    // One changed hex digit in the first signature: that signature no longer verifies, and
    // the stored set falls below its own threshold of 2.
    let text = String::from_utf8(std::fs::read(&path).expect("stored")).expect("utf-8");
    let at_sig = text.find("\\\"signature\\\": \\\"").expect("a signature") + 18;
    let mut bytes = text.into_bytes();
    bytes[at_sig] = if bytes[at_sig] == b'0' { b'1' } else { b'0' };
    std::fs::write(&path, &bytes).expect("tamper");
    let mut signers = [id(&key(1)), id(&key(2))];
    signers.sort();
    let loaded = Store::load_trust_set(&store_dir, &v1, at(NOW)).expect("the shipped set");
    assert_eq!(loaded.version(), 1);
    let (_, proven, ignored) = store.trust_chain(&v1).expect("readable");
    assert_eq!(proven, 0);
    assert_eq!(
        ignored.expect("said"),
        format!(
            "set 1 of trust-chain.json is not a successor of trust set version 1: trust set \
             version 2, counting the keys of trusted version 1, has 1 valid signature(s) by \
             trusted keys but needs 2 (valid: {}; not matching this document: {})",
            signers[1], signers[0]
        )
    );
    // Saving the genuine set again replaces what was not proven.
    store.save_trust_set(&v1, &v2_set).expect("saved again");
    assert_eq!(
        Store::load_trust_set(&store_dir, &v1, at(NOW))
            .expect("v2")
            .version(),
        2
    );

    // Not a chain at all, or over the cap: ignored, and said.
    std::fs::write(&path, b"{\"trust_set\": 1}").expect("tamper");
    assert_eq!(
        Store::load_trust_set(&store_dir, &v1, at(NOW))
            .expect("v1")
            .version(),
        1
    );
    assert_eq!(
        store.trust_chain(&v1).expect("readable").2.expect("said"),
        "trust-chain.json is not valid: unknown field `trust_set`, expected `format` or `sets` \
         at line 1 column 12"
    );
    std::fs::write(&path, vec![b' '; 64 * 1024 * 65 + 1]).expect("tamper");
    assert_eq!(
        store.trust_chain(&v1).expect("readable").2.expect("said"),
        format!("trust-chain.json is over {} bytes", 64 * 1024 * 65)
    );
}

/// Issue 10 item 1: a trust set written into the store and signed only by the writer's own
/// key (valid on its own, a successor of nothing the device trusts) is not believed, in the
/// chain file or in the one-set file stores used to keep.
#[test]
fn issue10_a_self_signed_trust_set_planted_in_the_store_is_not_believed() {
    let (v1, _) = v1_v2();
    let dir = tempfile::tempdir().expect("tempdir");
    let store_dir = dir.path().join("store");
    let trust = TrustSet::verify_initial(&v1, at(NOW)).expect("v1");
    let store = store_in(&store_dir, &trust);
    // Two keys of the writer's own, to meet the test sets' thresholds of 2.
    let (mallory, mallet, runner) = (key(9), key(10), key(11));
    let planted = trust_set(2, &[&mallory, &mallet], &[&runner], &[&mallory, &mallet]);
    let planted_set = TrustSet::verify_initial(&planted, at(NOW)).expect("valid on its own");
    assert_eq!(planted_set.version(), 2);
    let planted_text = String::from_utf8(planted.clone()).expect("utf-8");
    for (file, bytes) in [
        (TRUST_SET_FILE, planted.clone()),
        (
            TRUST_CHAIN_FILE,
            serde_json::to_vec(&serde_json::json!({"format": 1, "sets": [planted_text]}))
                .expect("json"),
        ),
    ] {
        std::fs::write(store_dir.join(file), &bytes).expect("plant");
        let loaded = Store::load_trust_set(&store_dir, &v1, at(NOW)).expect("the shipped set");
        assert_eq!(loaded.version(), 1, "{file}");
        assert!(
            loaded
                .keys_for(DocumentKind::Bundle)
                .0
                .get(&id(&mallory))
                .is_none(),
            "{file}: the planted key is not trusted"
        );
        let ignored = store.trust_chain(&v1).expect("readable").2.expect("said");
        assert!(
            ignored.starts_with(&format!(
                "set 1 of {file} is not a successor of trust set version 1: trust set version \
                 2, counting the keys of trusted version 1, has 0 valid signature(s) by trusted \
                 keys but needs"
            )),
            "{ignored}"
        );
        std::fs::remove_file(store_dir.join(file)).expect("clean");
    }
}

#[test]
fn issue5_an_expired_trust_set_is_renewed_through_the_store() {
    let (v1, _) = v1_v2();
    let (a, b, f) = (key(1), key(2), key(4));
    let dir = tempfile::tempdir().expect("tempdir");
    let store_dir = dir.path().join("store");
    let store = store_in(
        &store_dir,
        &TrustSet::verify_initial(&v1, at(NOW)).expect("v1"),
    );
    let later = NOW + YEAR + 1;
    assert_eq!(
        store
            .trust_set(&v1, at(later))
            .expect_err("expired")
            .to_string(),
        "trust set version 1 expired at 2027-12-01T00:00:00Z (it is now 2027-12-01T00:00:01Z); \
         a newer trust set signed by the keys trusted now is needed"
    );
    // A successor valid a year longer, signed by the expired set's keys.
    let mut body = TrustSetFile::from_json(&trust_set(2, &[&a, &b], &[&f], &[]))
        .expect("valid")
        .body()
        .clone();
    body.expires = at(later + YEAR);
    let mut file = TrustSetFile::unsigned(body).expect("valid");
    for k in [&a, &b] {
        let signature = k.sign(&file.signing_request()).to_bytes();
        file.insert_signature(SignatureEntry {
            key_id: id(k),
            signature,
        })
        .expect("under the limit");
    }
    let renewed = store
        .renew_trust_set(&v1, &file.to_json(), at(later))
        .expect("renewed");
    assert_eq!(renewed.version(), 2);
    assert_eq!(
        store
            .trust_set(&v1, at(later))
            .expect("stored set is current")
            .version(),
        2
    );
}

fn feed_text(trust_set: Option<TrustSetRef>) -> String {
    Feed {
        format: 1,
        channel: "stable".into(),
        sequence: 4,
        issued: at(NOW),
        expires: at(NOW + 7 * 86_400),
        release: None,
        trust_set,
        ledger: None,
    }
    .to_json()
}

fn signed_feed(text: &str, keys: &[&SigningKey]) -> Vec<u8> {
    SignedFeed {
        feed: text.to_string(),
        signatures: keys
            .iter()
            .map(|k| SignatureEntry {
                key_id: id(k),
                signature: k
                    .sign(&signed_bytes(context::FEED, text.as_bytes()))
                    .to_bytes(),
            })
            .collect(),
    }
    .to_json()
}

#[test]
fn issue5_feeds_are_checked_with_the_trust_sets_feed_keys() {
    let (v1, _) = v1_v2();
    let trust = TrustSet::verify_initial(&v1, at(NOW)).expect("v1");
    let feeds = FeedVerifier::from_trust_set(&trust, "stable").expect("feed verifier");
    assert_eq!(feeds.trust_set_version(), Some(1));
    let reference = TrustSetRef {
        version: 1,
        path: "../trust/1.json".into(),
        sha256: Digest::of(&v1),
    };
    let text = feed_text(Some(reference.clone()));
    // The reference is the last field, and absent when there is none.
    assert!(
        text.ends_with(&format!(
            ",\"trust_set\":{{\"version\":1,\"path\":\"../trust/1.json\",\"sha256\":\"{}\"}}}}",
            Digest::of(&v1)
        )),
        "{text}"
    );
    assert!(!feed_text(None).contains("trust_set"));
    // The feed-only key signs feeds.
    let ok = feeds
        .verify(&signed_feed(&text, &[&key(4)]), at(NOW))
        .expect("signed by a feed key");
    assert_eq!(ok.trust_set(), Some(&reference));
    // A key the set does not list does not.
    let e = feeds
        .verify(&signed_feed(&text, &[&key(9)]), at(NOW))
        .expect_err("not a feed key");
    assert_eq!(
        e.to_string(),
        format!(
            "feed has no valid signature by a trusted key (by keys not trusted here: {})",
            id(&key(9))
        )
    );
    // Once the set expired, no feed verifies under it.
    let e = feeds
        .verify(&signed_feed(&text, &[&key(4)]), at(NOW + YEAR + 1))
        .expect_err("expired trust set");
    assert_eq!(e.kind(), ErrorKind::TrustSet);
    assert_eq!(
        e.to_string(),
        "trust set version 1 expired at 2027-12-01T00:00:00Z (it is now 2027-12-01T00:00:01Z); \
         a newer trust set signed by the keys trusted now is needed"
    );
}

#[test]
fn issue5_a_feeds_trust_set_reference_is_validated() {
    let good = TrustSetRef {
        version: 2,
        path: "../trust/2.json".into(),
        sha256: Digest::of(b"x"),
    };
    assert_eq!(
        good.url("http://127.0.0.1:8000/feeds/stable.json").ok(),
        Some("http://127.0.0.1:8000/trust/2.json".to_string())
    );
    for (bad, expected) in [
        (
            TrustSetRef {
                version: 0,
                ..good.clone()
            },
            "feed trust_set version is 0; trust-set versions start at 1",
        ),
        (
            TrustSetRef {
                path: "https://elsewhere.invalid/2.json".into(),
                ..good.clone()
            },
            "feed trust_set path 'https://elsewhere.invalid/2.json' is not a relative path of \
             plain segments (letters, digits, '-', '.', '_', '~', and leading '..')",
        ),
        (
            TrustSetRef {
                path: "/trust/2.json".into(),
                ..good.clone()
            },
            "feed trust_set path '/trust/2.json' is not a relative path of plain segments \
             (letters, digits, '-', '.', '_', '~', and leading '..')",
        ),
    ] {
        let text = feed_text(Some(bad));
        let e = Feed::from_json(text.as_bytes()).expect_err("refused");
        assert_eq!(e.kind(), ErrorKind::Feed);
        assert_eq!(e.to_string(), expected);
    }
    // Unknown fields inside the reference are refused like everywhere else in a feed.
    let text = feed_text(Some(good)).replace("\"version\":2,", "\"version\":2,\"size\":9,");
    assert!(
        Feed::from_json(text.as_bytes())
            .expect_err("unknown field")
            .to_string()
            .starts_with("signed feed is not valid: unknown field `size`"),
        "{text}"
    );
}

#[test]
fn issue5_a_rotation_keeps_the_ledger_requirement() {
    let (v1, v2) = v1_v2();
    let one = TrustSet::verify_initial(&v1, at(NOW)).expect("v1");
    let two = one.accept_successor(&v2, at(NOW)).expect("v2");
    let feeds = FeedVerifier::from_trust_set(&one, "stable")
        .expect("feed verifier")
        .require_ledger(
            ampoule_verify::ledger::LedgerVerifier::from_trust_set(&one)
                .expect("tree-head signers"),
        )
        .with_trust_set(&two)
        .expect("rotated");
    assert_eq!(feeds.trust_set_version(), Some(2));
    // A feed without a ledger proof, signed by the feed key both sets trust: the rotated
    // verifier still requires the ledger (before this was fixed it let the feed through).
    let e = feeds
        .verify(&signed_feed(&feed_text(None), &[&key(4)]), at(NOW))
        .expect_err("no ledger proof");
    assert_eq!(
        e.to_string(),
        "feed sequence 4 offers nothing, but the ledger does not log that as channel stable's \
         current state: the feed carries no ledger proof, and this device requires one"
    );
    assert_eq!(e.kind(), ErrorKind::Proof);
}
