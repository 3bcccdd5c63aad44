//! Apps verify bundles on worker threads and share the verifier and its results between
//! threads; these public types must stay `Send + Sync`. A change that breaks this fails to
//! compile here rather than in an app.

use ampoule_verify::{
    Digest, Error, KeyId, Manifest, PublicKey, Timestamp, TrustedKeys, Unpacked, VerifiedBundle,
    Verifier,
};

fn assert_send_sync<T: Send + Sync>() {}

#[test]
fn public_types_cross_threads() {
    assert_send_sync::<Verifier>();
    assert_send_sync::<VerifiedBundle>();
    assert_send_sync::<Unpacked>();
    assert_send_sync::<TrustedKeys>();
    assert_send_sync::<PublicKey>();
    assert_send_sync::<KeyId>();
    assert_send_sync::<Digest>();
    assert_send_sync::<Manifest>();
    assert_send_sync::<Timestamp>();
    assert_send_sync::<Error>();
    // Errors travel through `anyhow` and `Box<dyn Error + Send + Sync>` in apps.
    let boxed: Box<dyn std::error::Error + Send + Sync + 'static> =
        Box::new(ampoule_verify::PublicKey::from_raw(&[0u8; 32]).expect_err("not a key"));
    assert!(!boxed.to_string().is_empty());
}
