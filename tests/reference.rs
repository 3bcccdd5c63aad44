//! Published references through the release tool and the device's checks: RFC 8410 keys as
//! `--trust` input, and the Semantic Versioning 2.0.0 precedence rules (items 10 and 11)
//! through the downgrade check.

mod common;

use std::path::Path;

use ampoule_verify::{KeyId, PublicKey, TrustedKeys, Verifier};
use common::*;
use ed25519_dalek::SigningKey;
use semver::Version;

/// RFC 8410 section 10.1: the Ed25519 public key sample (SubjectPublicKeyInfo PEM).
const RFC8410_PUBLIC: &[u8] = include_bytes!("data/rfc8410-10.1-public.pem");
/// RFC 8410 section 10.2: the sample certificate, for an X25519 key.
const RFC8410_X25519_CERT: &[u8] = include_bytes!("data/rfc8410-10.2-x25519-cert.pem");
/// RFC 8410 section 10.3: the raw private key of the section 10.1 public key.
const RFC8410_SECRET_RAW: &str = "d4ee72dbf913584ad5b6d8f1f769f8ad3afe7c28cbf1d4fbe097a88f44755842";

#[test]
fn rfc8410_public_key_is_a_trust_input() {
    let env = Env::new();
    let secret: [u8; 32] = hex::decode(RFC8410_SECRET_RAW)
        .expect("hex")
        .try_into()
        .expect("32 bytes");
    let rfc_key = SigningKey::from_bytes(&secret);
    env.write("rfc8410-10.1-public.pem", RFC8410_PUBLIC);
    env.write("signed.ampoule", &Draft::good().signed(&rfc_key));
    let run = env.run([
        "verify",
        "signed.ampoule",
        "--trust",
        "rfc8410-10.1-public.pem",
        "--app-version",
        APP_VERSION,
    ]);
    assert_eq!(run.code, 0, "{run:?}");
    let id = KeyId::of_raw_key(rfc_key.verifying_key().as_bytes());
    assert_eq!(
        run.stdout.lines().next(),
        Some(
            format!(
                "OK trailcam-species 1.0.0: signed by {id} (1 needed); payload and 2 files match their digests; 6 labels"
            )
            .as_str()
        )
    );
    // The same bundle is refused when only the test's own key is trusted.
    let run = env.run(["verify", "signed.ampoule", "--trust", PUBLIC]);
    assert_eq!(
        (run.code, run.stderr),
        (
            1,
            format!(
                "ampoule: error: bundle has no valid signature by a trusted key (by keys not trusted here: {id}); \
                 trusted here: {} ({PUBLIC})\n",
                env.key_id()
            )
        )
    );
}

#[test]
fn issue_2_rfc8410_x25519_certificate_is_refused_as_trust() {
    let env = Env::new();
    env.write("cert.pem", RFC8410_X25519_CERT);
    let bundle = env.pack("1.0.0", "b.ampoule");
    let run = env.run([
        "verify".as_ref(),
        bundle.as_os_str(),
        "--trust".as_ref(),
        "cert.pem".as_ref(),
    ]);
    // Exit 2 since issue 12: a key file that does not parse as a key is a usage error.
    assert_eq!(
        (run.code, run.stderr.as_str(), run.stdout.as_str()),
        (
            2,
            "ampoule: error: cannot read public key cert.pem: PEM block 'CERTIFICATE' is not an \
             Ed25519 public key; expected a '-----BEGIN PUBLIC KEY-----' block as written by keygen \
             or 'openssl pkey -pubout'\n",
            ""
        )
    );
}

/// The versions of a SemVer vector file, one per line after the source comment.
fn versions(text: &str) -> Vec<&str> {
    assert!(
        text.starts_with("# "),
        "a vector file names its source first"
    );
    text.lines().filter(|l| !l.starts_with('#')).collect()
}

/// Semantic Versioning 2.0.0 item 11 (and item 2's example): each line has lower precedence
/// than the next.
const CHAINS: [(&str, &str); 3] = [
    (
        "semver-2.0.0-item11-prerelease.txt",
        include_str!("data/semver-2.0.0-item11-prerelease.txt"),
    ),
    (
        "semver-2.0.0-item11-normal.txt",
        include_str!("data/semver-2.0.0-item11-normal.txt"),
    ),
    (
        "semver-2.0.0-item2-increment.txt",
        include_str!("data/semver-2.0.0-item2-increment.txt"),
    ),
];
/// Semantic Versioning 2.0.0 item 10: pairs that differ only in build metadata.
const BUILD_PAIRS: &str = include_str!("data/semver-2.0.0-item10-build.txt");

fn verifier(env: &Env, installed: &str) -> Verifier {
    let key = PublicKey::from_verifying_key(&env.key.verifying_key()).expect("not weak");
    let keys: TrustedKeys = [key].into_iter().collect();
    Verifier::new(keys, Version::parse(APP_VERSION).expect("version"))
        .expect("one key")
        .installed(Version::parse(installed).expect("version"))
}

fn check(env: &Env, bundle: &Path, installed: &str) -> Result<(), String> {
    verifier(env, installed)
        .verify_path(bundle)
        .map(|_| ())
        .map_err(|e| e.to_string())
}

fn not_newer(bundle: &str, installed: &str) -> Result<(), String> {
    Err(format!(
        "bundle version {bundle} is not newer than the installed version {installed}; \
         refusing a downgrade or reinstall"
    ))
}

#[test]
fn semver_precedence_chains_through_the_downgrade_check() {
    let env = Env::new();
    let mut pairs = 0;
    for (file, text) in CHAINS {
        let chain = versions(text);
        assert!(chain.len() >= 3, "{file}");
        let bundles: Vec<_> = chain
            .iter()
            .map(|v| env.pack(v, &format!("{file}-{v}.ampoule")))
            .collect();
        for (i, pair) in chain.windows(2).enumerate() {
            let (older, newer) = (pair[0], pair[1]);
            assert_eq!(
                check(&env, &bundles[i + 1], older),
                Ok(()),
                "{file}: {newer} over {older}"
            );
            assert_eq!(
                check(&env, &bundles[i], newer),
                not_newer(older, newer),
                "{file}: {older} over {newer}"
            );
            assert_eq!(
                check(&env, &bundles[i], older),
                not_newer(older, older),
                "{file}: {older} again"
            );
            pairs += 1;
        }
        // Precedence is transitive: the last of the chain is newer than the first.
        let last = chain.len() - 1;
        assert_eq!(check(&env, &bundles[last], chain[0]), Ok(()), "{file}");
    }
    assert_eq!(pairs, 7 + 3 + 2);
}

#[test]
fn semver_build_metadata_never_makes_a_bundle_newer() {
    let env = Env::new();
    let pairs: Vec<(&str, &str)> = versions(BUILD_PAIRS)
        .into_iter()
        .map(|l| l.split_once(' ').expect("two versions"))
        .collect();
    assert_eq!(pairs.len(), 4);
    for (i, (a, b)) in pairs.into_iter().enumerate() {
        let bundle_a = env.pack(a, &format!("a{i}.ampoule"));
        let bundle_b = env.pack(b, &format!("b{i}.ampoule"));
        assert_eq!(check(&env, &bundle_a, b), not_newer(a, b));
        assert_eq!(check(&env, &bundle_b, a), not_newer(b, a));
    }
}

#[test]
fn installed_through_the_cli() {
    // The same rule through `ampoule verify --installed`: 1.0.0 is newer than 1.0.0-rc.1
    // (Semantic Versioning 2.0.0 item 11), the other way round is refused.
    let env = Env::new();
    env.pack("1.0.0-rc.1", "rc.ampoule");
    env.pack("1.0.0", "final.ampoule");
    let ok = env.run([
        "verify",
        "final.ampoule",
        "--trust",
        PUBLIC,
        "--installed",
        "1.0.0-rc.1",
    ]);
    assert_eq!(ok.code, 0, "{ok:?}");
    let refused = env.run([
        "verify",
        "rc.ampoule",
        "--trust",
        PUBLIC,
        "--installed",
        "1.0.0",
    ]);
    assert_eq!(
        (refused.code, refused.stderr),
        (
            1,
            "ampoule: error: bundle version 1.0.0-rc.1 is not newer than the installed version \
             1.0.0; refusing a downgrade or reinstall\n"
                .to_string()
        )
    );
}
