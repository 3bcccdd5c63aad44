//! Feed checks a device makes: every refusal with its exact message, the freshness and replay
//! rules, and the rollout decision's stability and fairness.

use ampoule_verify::feed::{Feed, Release, SignedFeed, in_rollout, rollout_bucket};
use ampoule_verify::format::{context, signed_bytes};
use ampoule_verify::ledger::DeltaRef;
use ampoule_verify::signature::SignatureEntry;
use ampoule_verify::{Digest, ErrorKind, FeedVerifier, KeyId, PublicKey, Timestamp, TrustedKeys};
use ed25519_dalek::{Signer, SigningKey};

fn key(seed: u8) -> SigningKey {
    SigningKey::from_bytes(&[seed; 32])
}

fn public(key: &SigningKey) -> PublicKey {
    PublicKey::from_verifying_key(&key.verifying_key()).expect("a generated key is not weak")
}

fn id(key: &SigningKey) -> KeyId {
    public(key).id()
}

fn ts(text: &str) -> Timestamp {
    text.parse().expect("test timestamps are well-formed")
}

fn release() -> Release {
    Release {
        name: "trailcam-species".into(),
        version: semver::Version::new(1, 1, 0),
        requires_app: ">=2.0.0, <3.0.0".parse().expect("valid requirement"),
        size: 123_456,
        sha256: Digest::of(b"bundle bytes"),
        path: format!("../bundles/{}.ampoule", Digest::of(b"bundle bytes")),
        mirrors: vec!["https://mirror.example.invalid/bundles/x.ampoule".into()],
        rollout_percent: 25,
        deltas: Vec::new(),
    }
}

fn feed(sequence: u64) -> Feed {
    Feed {
        format: 1,
        channel: "stable".into(),
        sequence,
        issued: ts("2026-12-01T08:00:00Z"),
        expires: ts("2026-12-08T08:00:00Z"),
        release: Some(release()),
        trust_set: None,
        ledger: None,
    }
}

fn sign_text(text: &str, keys: &[&SigningKey]) -> Vec<u8> {
    let signatures = keys
        .iter()
        .map(|k| SignatureEntry {
            key_id: id(k),
            signature: k
                .sign(&signed_bytes(context::FEED, text.as_bytes()))
                .to_bytes(),
        })
        .collect();
    SignedFeed {
        feed: text.to_string(),
        signatures,
    }
    .to_json()
}

fn signed(feed: &Feed, keys: &[&SigningKey]) -> Vec<u8> {
    sign_text(&feed.to_json(), keys)
}

fn verifier() -> FeedVerifier {
    let trusted: TrustedKeys = [public(&key(1))].into_iter().collect();
    FeedVerifier::new(trusted, "stable").expect("a valid verifier")
}

const NOW: &str = "2026-12-02T12:00:00Z";

fn refusal(verifier: &FeedVerifier, bytes: &[u8], now: &str) -> (ErrorKind, String) {
    let err = verifier
        .verify(bytes, ts(now))
        .expect_err("the feed must be refused");
    (err.kind(), err.to_string())
}

#[test]
fn feed_types_cross_threads() {
    fn send_sync<T: Send + Sync>() {}
    send_sync::<FeedVerifier>();
    send_sync::<ampoule_verify::VerifiedFeed>();
    send_sync::<Feed>();
}

#[test]
fn a_good_feed_verifies() {
    let bytes = signed(&feed(3), &[&key(1)]);
    let ok = verifier().verify(&bytes, ts(NOW)).expect("good feed");
    assert_eq!(ok.sequence(), 3);
    assert!(ok.is_new());
    assert_eq!(ok.signers(), &[id(&key(1))]);
    assert_eq!(ok.release(), Some(&release()));
    assert_eq!(ok.digest(), Digest::of(feed(3).to_json().as_bytes()));
}

#[test]
fn bad_signature_is_refused() {
    let mut doc: SignedFeed = serde_json::from_slice(&signed(&feed(3), &[&key(1)])).expect("json");
    // The signature of another text by the same key: valid Ed25519, wrong document.
    doc.signatures[0].signature = key(1).sign(b"something else").to_bytes();
    assert_eq!(
        refusal(&verifier(), &doc.to_json(), NOW),
        (
            ErrorKind::Signature,
            format!(
                "feed has no valid signature by a trusted key (not matching this document: {})",
                id(&key(1))
            )
        )
    );
}

#[test]
fn feed_text_changed_after_signing_is_refused() {
    let mut doc: SignedFeed = serde_json::from_slice(&signed(&feed(3), &[&key(1)])).expect("json");
    doc.feed = doc
        .feed
        .replace("\"rollout_percent\":25", "\"rollout_percent\":100");
    assert_eq!(
        refusal(&verifier(), &doc.to_json(), NOW).1,
        format!(
            "feed has no valid signature by a trusted key (not matching this document: {})",
            id(&key(1))
        )
    );
}

#[test]
fn unknown_key_is_refused() {
    assert_eq!(
        refusal(&verifier(), &signed(&feed(3), &[&key(2)]), NOW),
        (
            ErrorKind::Signature,
            format!(
                "feed has no valid signature by a trusted key (by keys not trusted here: {})",
                id(&key(2))
            )
        )
    );
    assert_eq!(
        refusal(&verifier(), &signed(&feed(3), &[]), NOW).1,
        "feed is not signed; it needs a signature by a trusted key"
    );
}

#[test]
fn a_manifest_signature_does_not_count_for_a_feed() {
    let text = feed(3).to_json();
    let doc = SignedFeed {
        feed: text.clone(),
        signatures: vec![SignatureEntry {
            key_id: id(&key(1)),
            signature: key(1)
                .sign(&signed_bytes(context::MANIFEST, text.as_bytes()))
                .to_bytes(),
        }],
    };
    assert_eq!(
        refusal(&verifier(), &doc.to_json(), NOW).0,
        ErrorKind::Signature
    );
}

#[test]
fn expired_feed_is_refused_beyond_the_skew() {
    let bytes = signed(&feed(3), &[&key(1)]);
    // Within the 5-minute default skew after expiry: still accepted.
    assert!(
        verifier()
            .verify(&bytes, ts("2026-12-08T08:05:00Z"))
            .is_ok()
    );
    assert_eq!(
        refusal(&verifier(), &bytes, "2026-12-08T08:05:01Z"),
        (
            ErrorKind::Stale,
            "feed expired at 2026-12-08T08:00:00Z (device clock 2026-12-08T08:05:01Z, allowed \
             skew 300 s); the publisher must publish a fresh feed"
                .into()
        )
    );
    let strict = verifier().clock_skew_secs(0);
    assert_eq!(
        refusal(&strict, &bytes, "2026-12-08T08:00:01Z").1,
        "feed expired at 2026-12-08T08:00:00Z (device clock 2026-12-08T08:00:01Z, allowed \
         skew 0 s); the publisher must publish a fresh feed"
    );
}

#[test]
fn feed_from_the_future_is_refused_beyond_the_skew() {
    let bytes = signed(&feed(3), &[&key(1)]);
    assert!(
        verifier()
            .verify(&bytes, ts("2026-12-01T07:55:00Z"))
            .is_ok()
    );
    assert_eq!(
        refusal(&verifier(), &bytes, "2026-12-01T07:54:59Z"),
        (
            // A wrong clock, not a refusal of the feed (issue 10 item 4).
            ErrorKind::Clock,
            "feed was issued at 2026-12-01T08:00:00Z, after this device's clock \
             (2026-12-01T07:54:59Z) by more than the allowed 300 s; check the device clock"
                .into()
        )
    );
}

#[test]
fn lower_sequence_is_a_replay() {
    let bytes = signed(&feed(3), &[&key(1)]);
    assert_eq!(
        refusal(&verifier().last_accepted(4, None), &bytes, NOW),
        (
            ErrorKind::Stale,
            "feed sequence 3 is lower than 4, the last one this device accepted; refusing a \
             replayed older feed"
                .into()
        )
    );
    let newer = verifier().last_accepted(2, None).verify(&bytes, ts(NOW));
    assert!(newer.expect("higher sequence").is_new());
}

#[test]
fn equal_sequence_is_the_same_feed_again() {
    let bytes = signed(&feed(3), &[&key(1)]);
    let digest = Digest::of(feed(3).to_json().as_bytes());
    let again = verifier()
        .last_accepted(3, Some(digest))
        .verify(&bytes, ts(NOW))
        .expect("same feed again");
    assert!(!again.is_new());
    let mut other = feed(3);
    other.release = None;
    let other_digest = Digest::of(other.to_json().as_bytes());
    assert_eq!(
        refusal(
            &verifier().last_accepted(3, Some(digest)),
            &signed(&other, &[&key(1)]),
            NOW
        )
        .1,
        format!(
            "feed sequence 3 was accepted before with digest {digest}, but this feed under the \
             same sequence has digest {other_digest}; a publisher never signs two feeds under \
             one sequence"
        )
    );
    // Without a stored digest the device cannot tell, and takes it as the same feed.
    let ok = verifier()
        .last_accepted(3, None)
        .verify(&signed(&other, &[&key(1)]), ts(NOW));
    assert!(!ok.expect("accepted").is_new());
}

#[test]
fn wrong_channel_is_refused() {
    let mut beta = feed(3);
    beta.channel = "beta".into();
    assert_eq!(
        refusal(&verifier(), &signed(&beta, &[&key(1)]), NOW),
        (
            ErrorKind::Feed,
            "feed is for channel 'beta' but this device follows channel 'stable'".into()
        )
    );
}

#[test]
fn malformed_json_is_refused() {
    let bytes = signed(&feed(3), &[&key(1)]);
    assert_eq!(
        refusal(&verifier(), &bytes[..40], NOW),
        (
            ErrorKind::Feed,
            "feed is not valid: EOF while parsing a string at line 2 column 38".into()
        )
    );
    assert_eq!(
        refusal(&verifier(), b"{\"feed\": 1, \"signatures\": []}", NOW).1,
        "feed is not valid: invalid type: integer `1`, expected a string at line 1 column 10"
    );
    // A signed text that is not a feed: the signature holds, the parse refuses.
    assert_eq!(
        refusal(&verifier(), &sign_text("{\"format\":1}", &[&key(1)]), NOW).1,
        "signed feed is not valid: missing field `channel` at line 1 column 12"
    );
}

#[test]
fn duplicate_keys_are_refused_in_both_layers() {
    let text = feed(3).to_json();
    let sig = key(1)
        .sign(&signed_bytes(context::FEED, text.as_bytes()))
        .to_bytes();
    let envelope = format!(
        r#"{{"feed": {}, "feed": {}, "signatures": [{{"key_id": "{}", "signature": "{}"}}]}}"#,
        serde_json::to_string(&text).expect("string"),
        serde_json::to_string(&text).expect("string"),
        id(&key(1)),
        hex::encode(sig)
    );
    let (kind, message) = refusal(&verifier(), envelope.as_bytes(), NOW);
    assert_eq!(kind, ErrorKind::Feed);
    assert!(
        message.starts_with("feed is not valid: duplicate field `feed` at line 1 column"),
        "{message}"
    );
    // The inner text repeats "sequence", with a valid signature over that exact text.
    let doubled = text.replace("\"sequence\":3,", "\"sequence\":3,\"sequence\":9,");
    assert_eq!(
        refusal(&verifier(), &sign_text(&doubled, &[&key(1)]), NOW).1,
        "signed feed is not valid: duplicate field `sequence` at line 1 column 54"
    );
}

#[test]
fn unknown_fields_and_missing_release_are_refused() {
    let text = feed(3)
        .to_json()
        .replace("\"format\":1,", "\"format\":1,\"extra\":true,");
    let (_, message) = refusal(&verifier(), &sign_text(&text, &[&key(1)]), NOW);
    assert!(
        message.starts_with("signed feed is not valid: unknown field `extra`"),
        "{message}"
    );
    let mut no_release = feed(3);
    no_release.release = None;
    let text = no_release.to_json().replace(",\"release\":null", "");
    assert_eq!(
        refusal(&verifier(), &sign_text(&text, &[&key(1)]), NOW).1,
        "signed feed is not valid: missing field `release` at line 1 column 109"
    );
}

#[test]
fn a_withdrawn_channel_has_release_null() {
    let mut empty = feed(4);
    empty.release = None;
    let bytes = signed(&empty, &[&key(1)]);
    assert!(String::from_utf8_lossy(&bytes).contains(r#"\"release\":null"#));
    let ok = verifier().verify(&bytes, ts(NOW)).expect("empty channel");
    assert_eq!(ok.release(), None);
}

#[test]
fn field_values_are_checked() {
    type Change = Box<dyn Fn(&mut Feed)>;
    let cases: Vec<(Change, &str)> = vec![
        (
            Box::new(|f| f.format = 3),
            "feed format 3 is not supported (this reader knows formats 1 to 2)",
        ),
        (
            Box::new(|f| f.expires = f.issued),
            "feed expires at 2026-12-01T08:00:00Z, not after it was issued at 2026-12-01T08:00:00Z",
        ),
        (
            Box::new(|f| f.release.as_mut().expect("release").rollout_percent = 101),
            "feed release rollout_percent is 101; it must be 0 to 100",
        ),
        (
            Box::new(|f| f.release.as_mut().expect("release").path = "/etc/passwd".into()),
            "feed release path '/etc/passwd' is not a relative path of plain segments \
             (letters, digits, '-', '.', '_', '~', and leading '..')",
        ),
        (
            Box::new(|f| f.release.as_mut().expect("release").mirrors = vec!["ftp://x/y".into()]),
            "feed release mirror 'ftp://x/y' is not an absolute http or https URL",
        ),
        (
            Box::new(|f| f.channel = "Stable".into()),
            "channel name 'Stable' is not allowed: use 1 to 64 lowercase letters, digits, '-', \
             '_' or '.', starting with a letter or digit",
        ),
    ];
    for (change, expected) in cases {
        let mut f = feed(3);
        change(&mut f);
        let (kind, message) = refusal(&verifier(), &signed(&f, &[&key(1)]), NOW);
        assert_eq!((kind, message.as_str()), (ErrorKind::Feed, expected));
    }
}

/// A delta the feed lists: `n` picks its base and file.
fn delta(n: u8, size: u64) -> DeltaRef {
    DeltaRef {
        base: Digest::of(&[b'b', n]),
        size,
        sha256: Digest::of(&[b'd', n]),
    }
}

#[test]
fn issue13_a_feed_lists_deltas_within_their_rules() {
    // Format 2 (FORMAT.md "Channel feeds"): up to 8 deltas, one per base, each smaller than
    // the bundle (123,456 bytes here) and not the bundle itself.
    let with = |deltas: Vec<DeltaRef>| {
        let mut f = feed(3);
        f.format = 2;
        f.release.as_mut().expect("release").deltas = deltas;
        f
    };
    let eight: Vec<DeltaRef> = (0..8).map(|n| delta(n, 1000)).collect();
    let ok = verifier()
        .verify(&signed(&with(eight.clone()), &[&key(1)]), ts(NOW))
        .expect("eight deltas");
    assert_eq!(ok.release().expect("release").deltas, eight);

    let bundle = Digest::of(b"bundle bytes");
    let mut own = delta(1, 1000);
    own.sha256 = bundle;
    let mut format_1 = with(vec![delta(1, 1000)]);
    format_1.format = 1;
    let nine: Vec<DeltaRef> = (0..9).map(|n| delta(n, 1000)).collect();
    let cases: Vec<(Feed, String)> = vec![
        (
            format_1,
            "feed format 1 lists deltas; deltas came with format 2".into(),
        ),
        (
            with(nine),
            "feed release lists 9 deltas, over the limit of 8".into(),
        ),
        (
            with(vec![delta(1, 1000), delta(1, 2000)]),
            format!(
                "feed release lists two deltas for base {}; a base has at most one",
                delta(1, 0).base
            ),
        ),
        (
            with(vec![delta(1, 123_456)]),
            format!(
                "feed release delta {} is 123456 bytes; a delta is at least 1 byte and smaller \
                 than its bundle (123456 bytes)",
                delta(1, 0).sha256
            ),
        ),
        (
            with(vec![delta(1, 0)]),
            format!(
                "feed release delta {} is 0 bytes; a delta is at least 1 byte and smaller than \
                 its bundle (123456 bytes)",
                delta(1, 0).sha256
            ),
        ),
        (
            with(vec![own]),
            format!("feed release delta {bundle} has the bundle's own digest"),
        ),
    ];
    for (f, expected) in cases {
        let (kind, message) = refusal(&verifier(), &signed(&f, &[&key(1)]), NOW);
        assert_eq!(
            (kind, message.as_str()),
            (ErrorKind::Feed, expected.as_str())
        );
    }
}

#[test]
fn a_delta_is_fetched_beside_its_bundle() {
    // RFC 3986 section 5.2: `<sha256>.ampoule-delta` resolved against the bundle's URL.
    let r = release();
    let d = delta(1, 1000);
    assert_eq!(
        r.delta_url(
            "https://updates.example.invalid/reserve/feeds/stable.json",
            &d
        )
        .expect("url"),
        format!(
            "https://updates.example.invalid/reserve/bundles/{}.ampoule-delta",
            d.sha256
        )
    );
}

#[test]
fn oversized_feed_is_refused_unparsed() {
    let mut bytes = signed(&feed(3), &[&key(1)]);
    bytes.resize(64 * 1024 + 1, b' ');
    assert_eq!(
        refusal(&verifier(), &bytes, NOW),
        (
            ErrorKind::TooLarge,
            "feed is 65537 bytes, over the limit of 65536 bytes".into()
        )
    );
}

#[test]
fn threshold_needs_distinct_keys() {
    let trusted: TrustedKeys = [public(&key(1)), public(&key(2))].into_iter().collect();
    let two = FeedVerifier::new(trusted, "stable")
        .expect("verifier")
        .threshold(2);
    assert!(
        two.verify(&signed(&feed(3), &[&key(1), &key(2)]), ts(NOW))
            .is_ok()
    );
    assert_eq!(
        refusal(&two, &signed(&feed(3), &[&key(1), &key(1)]), NOW).1,
        format!(
            "feed has 1 valid signature(s) by trusted keys but needs 2 (valid: {})",
            id(&key(1))
        )
    );
}

#[test]
fn verifier_needs_keys_and_a_valid_channel() {
    assert_eq!(
        FeedVerifier::new(TrustedKeys::new(), "stable")
            .expect_err("no keys")
            .to_string(),
        "no trusted keys given; a feed verifier needs at least one public key"
    );
    let trusted: TrustedKeys = [public(&key(1))].into_iter().collect();
    assert_eq!(
        FeedVerifier::new(trusted, "../etc")
            .expect_err("bad channel")
            .kind(),
        ErrorKind::Feed
    );
}

#[test]
fn rollout_bucket_matches_an_independent_computation() {
    // Python 3 hashlib: h = sha256(b"ampoule-rollout-v1\n" + len(id).to_bytes(4, "big")
    //   + id.encode() + digest).digest(); int.from_bytes(h[:8], "big") % 10000
    let digest_a = Digest::from_bytes(std::array::from_fn(|i| i as u8));
    let digest_b = Digest::from_bytes([0xab; 32]);
    assert_eq!(rollout_bucket("camera-0001", &digest_a), 532);
    assert_eq!(rollout_bucket("fox-ridge-07", &digest_b), 7122);
    assert!(!in_rollout("camera-0001", &digest_a, 5));
    assert!(in_rollout("camera-0001", &digest_a, 6));
    assert!(!in_rollout("fox-ridge-07", &digest_b, 0));
    assert!(in_rollout("fox-ridge-07", &digest_b, 100));
}

#[test]
fn rollout_is_stable_and_fair_over_ten_thousand_devices() {
    let digest = Digest::of(b"trailcam-species 1.1.0");
    let n = 10_000u32;
    for percent in [1u8, 10, 25, 50, 90] {
        let ids: Vec<String> = (0..n).map(|i| format!("camera-{i:05}")).collect();
        let inside = ids
            .iter()
            .filter(|id| in_rollout(id, &digest, percent))
            .count() as f64;
        // Each device is in with probability p, independently if SHA-256 behaves like a random
        // function: the count is Binomial(n, p), standard deviation sqrt(n p (1 - p)). Four
        // standard deviations (a two-sided chance of about 6e-5 for a fair hash) is the
        // tolerance: for p = 0.5 that is 200 devices, 2 percentage points.
        let p = f64::from(percent) / 100.0;
        let mean = f64::from(n) * p;
        let sd = (f64::from(n) * p * (1.0 - p)).sqrt();
        assert!(
            (inside - mean).abs() <= 4.0 * sd,
            "{percent}%: {inside} of {n} devices, expected {mean} ± {}",
            4.0 * sd
        );
        // Same answer every time, and a device inside at p is inside at every higher percent.
        for id in ids.iter().take(500) {
            let first = in_rollout(id, &digest, percent);
            assert_eq!(first, in_rollout(id, &digest, percent));
            if first {
                assert!(in_rollout(id, &digest, percent.saturating_add(10).min(100)));
            }
        }
    }
}
