//! The store's memory of feeds (issue 3): `Store::record_feed` after a check that installed
//! nothing, and `Store::install_from_feed`, so that a replayed older feed, or a second feed
//! under an accepted sequence, is refused next time. Digests in expected messages come from
//! GNU coreutils' `sha256sum` over the signed feed text, not from the crate.

mod common;

use std::path::Path;
use std::process::Command;

use ampoule_verify::feed::{Feed, Release, SignedFeed};
use ampoule_verify::format::{context, signed_bytes};
use ampoule_verify::signature::SignatureEntry;
use ampoule_verify::{Digest, ErrorKind, FeedVerifier, Store, Timestamp, VerifiedFeed};
use common::{NAME, key_id, model_bytes, signing_key, trusted, verifier, write_bundle};
use ed25519_dalek::Signer;

fn ts(text: &str) -> Timestamp {
    text.parse().expect("test timestamps are well-formed")
}

const NOW: &str = "2026-12-02T08:00:00Z";

/// A feed of `stable` under `sequence` offering `version` (or nothing), with the bundle digest
/// given (the store never reads it), signed by the trusted key; and its signed text.
fn feed(sequence: u64, version: Option<&str>, salt: &str) -> (Vec<u8>, String) {
    let release = version.map(|v| Release {
        name: NAME.into(),
        version: v.parse().expect("version"),
        requires_app: "*".parse().expect("requirement"),
        size: 1,
        sha256: Digest::of(salt.as_bytes()),
        path: "../bundles/x.ampoule".into(),
        mirrors: vec![],
        rollout_percent: 100,
        deltas: Vec::new(),
    });
    let text = Feed {
        format: 1,
        channel: "stable".into(),
        sequence,
        issued: ts("2026-12-01T08:00:00Z"),
        expires: ts("2026-12-08T08:00:00Z"),
        release,
        trust_set: None,
        ledger: None,
    }
    .to_json();
    let key = signing_key();
    let envelope = SignedFeed {
        feed: text.clone(),
        signatures: vec![SignatureEntry {
            key_id: key_id(&key),
            signature: key
                .sign(&signed_bytes(context::FEED, text.as_bytes()))
                .to_bytes(),
        }],
    };
    (envelope.to_json(), text)
}

/// Verifies a feed as a device that has accepted nothing yet.
fn verified(bytes: &[u8]) -> VerifiedFeed {
    FeedVerifier::new(trusted(), "stable")
        .expect("verifier")
        .verify(bytes, ts(NOW))
        .expect("the test feed verifies")
}

/// SHA-256 of `text` as GNU coreutils computes it.
fn sha256sum(dir: &Path, text: &str) -> String {
    let path = dir.join("feed-text");
    std::fs::write(&path, text).expect("write");
    let out = Command::new("sha256sum")
        .arg(&path)
        .output()
        .expect("sha256sum runs");
    assert!(out.status.success(), "sha256sum failed");
    String::from_utf8(out.stdout).expect("utf-8")[..64].to_string()
}

#[test]
fn record_feed_remembers_sequence_and_digest_and_refuses_replays_issue_3() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let store = Store::open(&tmp.path().join("store"), verifier()).expect("store");
    let (bytes2, text2) = feed(2, Some("1.0.0"), "a");
    assert!(store.record_feed(&verified(&bytes2)).expect("recorded"));
    let state = store.state().expect("state");
    let stable = &state.channels["stable"];
    assert_eq!(stable.highest_sequence, Some(2));
    assert_eq!(stable.highest_version, None);
    let digest = sha256sum(tmp.path(), &text2);
    assert_eq!(stable.feed_sha256.map(|d| d.to_hex()), Some(digest.clone()));
    assert_eq!(
        state
            .last_feed("stable")
            .map(|(s, d)| (s, d.map(|d| d.to_hex()))),
        Some((2, Some(digest.clone())))
    );
    assert_eq!(state.last_feed("beta"), None);

    // The same feed again writes nothing.
    let before = std::fs::read(tmp.path().join("store/state.json")).expect("state.json");
    assert!(!store.record_feed(&verified(&bytes2)).expect("same feed"));
    assert_eq!(
        std::fs::read(tmp.path().join("store/state.json")).expect("state.json"),
        before
    );

    // A device that verified an older feed before reading the store still cannot record it.
    let (bytes1, _) = feed(1, Some("1.0.0"), "a");
    let e = store.record_feed(&verified(&bytes1)).expect_err("replay");
    assert_eq!(e.kind(), ErrorKind::Policy);
    assert_eq!(
        e.to_string(),
        "feed sequence 1 for channel 'stable' is lower than 2, the highest this store accepted; \
         refusing a replayed feed"
    );
    // Another feed under sequence 2.
    let (other, other_text) = feed(2, Some("1.0.0"), "b");
    let e = store
        .record_feed(&verified(&other))
        .expect_err("two feeds, one sequence");
    assert_eq!(
        e.to_string(),
        format!(
            "feed sequence 2 for channel 'stable' was accepted with digest {digest}, but this \
             feed under the same sequence has digest {}; refusing it",
            sha256sum(tmp.path(), &other_text)
        )
    );
    assert_eq!(
        std::fs::read(tmp.path().join("store/state.json")).expect("state.json"),
        before,
        "refusals change nothing"
    );

    // And the device's own feed check refuses them too, with what the store kept.
    let (sequence, digest) = state.last_feed("stable").expect("last feed");
    let device = FeedVerifier::new(trusted(), "stable")
        .expect("verifier")
        .last_accepted(sequence, digest);
    let e = device.verify(&bytes1, ts(NOW)).expect_err("replay");
    assert_eq!(e.kind(), ErrorKind::Stale);
    assert!(device.verify(&other, ts(NOW)).is_err());
    assert!(device.verify(&bytes2, ts(NOW)).is_ok());
}

#[test]
fn install_from_feed_records_the_feed_and_needs_the_offered_release_issue_3() {
    let tmp = tempfile::tempdir().expect("temp dir");
    let store = Store::open(&tmp.path().join("store"), verifier()).expect("store");
    let v1 = write_bundle(tmp.path(), "1.0.0", &model_bytes(1, 4096));
    let bundle = || verifier().verify_path(&v1).expect("bundle verifies");

    let (offers_other, _) = feed(3, Some("1.1.0"), "a");
    let e = store
        .install_from_feed(bundle(), &verified(&offers_other))
        .expect_err("not the offered release");
    assert_eq!(e.kind(), ErrorKind::Feed);
    assert_eq!(
        e.to_string(),
        "bundle trailcam-species 1.0.0 is not the release feed sequence 3 offers (trailcam-species 1.1.0)"
    );
    let (offers_nothing, _) = feed(3, None, "a");
    let e = store
        .install_from_feed(bundle(), &verified(&offers_nothing))
        .expect_err("nothing offered");
    assert_eq!(
        e.to_string(),
        "bundle trailcam-species 1.0.0 is not the release feed sequence 3 offers (nothing)"
    );
    assert_eq!(store.state().expect("state").current, None);

    let (good, text) = feed(4, Some("1.0.0"), "a");
    let installed = store
        .install_from_feed(bundle(), &verified(&good))
        .expect("installed");
    assert_eq!(installed.release.manifest.version.to_string(), "1.0.0");
    let state = store.state().expect("state");
    let stable = &state.channels["stable"];
    assert_eq!(stable.highest_sequence, Some(4));
    assert_eq!(
        stable.highest_version.as_ref().map(|v| v.to_string()),
        Some("1.0.0".into())
    );
    assert_eq!(
        stable.feed_sha256.map(|d| d.to_hex()),
        Some(sha256sum(tmp.path(), &text))
    );

    // The same sequence with another digest cannot install the next version either.
    let v2 = write_bundle(tmp.path(), "1.1.0", &model_bytes(2, 4096));
    let (forked, _) = feed(4, Some("1.1.0"), "b");
    let e = store
        .install_from_feed(
            verifier().verify_path(&v2).expect("bundle"),
            &verified(&forked),
        )
        .expect_err("second feed under sequence 4");
    assert!(
        e.to_string()
            .starts_with("feed sequence 4 for channel 'stable' was accepted with digest "),
        "{e}"
    );
    assert_eq!(store.state().expect("state"), state);
}
