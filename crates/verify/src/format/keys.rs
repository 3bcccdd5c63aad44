//! Public keys the device trusts, their key ids, and strict Ed25519 verification (RFC 8032).
//!
//! A key id is derived from the key itself, so it cannot be chosen to impersonate another key:
//! it is the first 16 bytes of SHA-256 over the key's DER SubjectPublicKeyInfo (RFC 8410),
//! shown as 32 lowercase hex characters. The same value comes out of
//! `openssl pkey -pubin -in KEY.pem -outform DER | openssl dgst -sha256` (its first 32 hex digits).

use std::collections::BTreeMap;
use std::fmt;
use std::str::FromStr;

use ed25519_dalek::pkcs8::DecodePublicKey;
use ed25519_dalek::{Signature, VerifyingKey};
use serde::{Deserialize, Deserializer, Serialize, Serializer};

use crate::error::{Error, ErrorKind, Result};
use crate::format::digest::Digest;
use crate::format::signed_bytes;

/// The DER prefix of an Ed25519 SubjectPublicKeyInfo (RFC 8410 section 4): SEQUENCE,
/// AlgorithmIdentifier with OID 1.3.101.112, BIT STRING of 32 bytes. The raw key follows.
pub const ED25519_SPKI_PREFIX: [u8; 12] = [
    0x30, 0x2a, 0x30, 0x05, 0x06, 0x03, 0x2b, 0x65, 0x70, 0x03, 0x21, 0x00,
];

/// A key's stable identifier (see the module documentation for how it is derived).
#[derive(Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct KeyId([u8; 16]);

impl KeyId {
    pub_for_release! {
        /// The key id of a raw 32-byte Ed25519 public key.
        fn of_raw_key(raw: &[u8; 32]) -> Self {
            let mut der = [0u8; 44];
            der[..12].copy_from_slice(&ED25519_SPKI_PREFIX);
            der[12..].copy_from_slice(raw);
            let digest = Digest::of(&der);
            let mut id = [0u8; 16];
            id.copy_from_slice(&digest.as_bytes()[..16]);
            KeyId(id)
        }
    }
}

impl fmt::Display for KeyId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&hex::encode(self.0))
    }
}

impl fmt::Debug for KeyId {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "KeyId({self})")
    }
}

impl FromStr for KeyId {
    type Err = Error;

    fn from_str(s: &str) -> Result<Self> {
        let mut id = [0u8; 16];
        let lower_hex = s.bytes().all(|b| matches!(b, b'0'..=b'9' | b'a'..=b'f'));
        if s.len() != 32 || !lower_hex || hex::decode_to_slice(s, &mut id).is_err() {
            return Err(Error::new(
                ErrorKind::Malformed,
                format!(
                    "'{}' is not a key id (32 lowercase hex characters)",
                    s.chars().take(80).collect::<String>().escape_debug()
                ),
            ));
        }
        Ok(KeyId(id))
    }
}

impl Serialize for KeyId {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.collect_str(self)
    }
}

impl<'de> Deserialize<'de> for KeyId {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        let text = <std::borrow::Cow<'de, str>>::deserialize(deserializer)?;
        text.parse().map_err(serde::de::Error::custom)
    }
}

/// An Ed25519 public key that passed the weak-key check, with its key id.
#[derive(Clone, PartialEq, Eq)]
pub struct PublicKey {
    key: VerifyingKey,
    id: KeyId,
}

impl PublicKey {
    /// Loads a key from raw 32 bytes, refusing encodings that are not a point and
    /// small-order (weak) keys, under which forged signatures would verify.
    ///
    /// # Errors
    ///
    /// [`crate::ErrorKind::Key`] for bytes that are not an Ed25519 point, or a weak key.
    pub fn from_raw(raw: &[u8; 32]) -> Result<Self> {
        let id = KeyId::of_raw_key(raw);
        let key = VerifyingKey::from_bytes(raw).map_err(|_| {
            Error::new(
                ErrorKind::Key,
                format!("public key {id} is not a valid Ed25519 point"),
            )
        })?;
        if key.is_weak() {
            return Err(Error::new(
                ErrorKind::Key,
                format!(
                    "public key {id} is a weak (small-order) Ed25519 key and cannot be trusted"
                ),
            ));
        }
        Ok(PublicKey { key, id })
    }

    /// Loads a key from SubjectPublicKeyInfo PEM (RFC 8410 section 4, `-----BEGIN PUBLIC KEY-----`).
    ///
    /// # Errors
    ///
    /// [`crate::ErrorKind::Key`] for text that is not such a PEM block, a key of another
    /// algorithm, or a weak key.
    pub fn from_pem(pem: &str) -> Result<Self> {
        // A certificate or secret key given by mistake would otherwise be reported as a
        // Base64 or ASN.1 fault deep inside it; name what the file holds instead.
        let label = pem
            .trim_start()
            .strip_prefix("-----BEGIN ")
            .and_then(|rest| rest.split_once("-----"))
            .map(|(label, _)| label);
        if let Some(label) = label.filter(|&l| l != "PUBLIC KEY") {
            return Err(Error::new(
                ErrorKind::Key,
                format!(
                    "PEM block '{}' is not an Ed25519 public key; expected a \
                     '-----BEGIN PUBLIC KEY-----' block as written by keygen or 'openssl pkey -pubout'",
                    crate::format::tar::shown(label.as_bytes())
                ),
            ));
        }
        let key = VerifyingKey::from_public_key_pem(pem.trim()).map_err(|e| {
            Error::new(
                ErrorKind::Key,
                format!(
                    "not an Ed25519 public key in SubjectPublicKeyInfo PEM ({e}); \
                     expected a '-----BEGIN PUBLIC KEY-----' block as written by keygen \
                     or 'openssl pkey -pubout'"
                ),
            )
        })?;
        Self::from_raw(key.as_bytes())
    }

    pub_for_release! {
        /// Wraps a key from `ed25519-dalek`, with the same weak-key check as [`PublicKey::from_raw`].
        fn from_verifying_key(key: &VerifyingKey) -> Result<Self> {
            Self::from_raw(key.as_bytes())
        }
    }

    /// The key's id.
    pub fn id(&self) -> KeyId {
        self.id
    }

    pub_for_release! {
        /// The raw 32-byte key.
        fn as_bytes(&self) -> &[u8; 32] {
            self.key.as_bytes()
        }
    }

    pub_for_release! {
        /// The underlying `ed25519-dalek` key.
        fn verifying_key(&self) -> &VerifyingKey {
            &self.key
        }
    }

    pub_for_release! {
        /// The key as SubjectPublicKeyInfo PEM, byte-identical to `openssl pkey -pubout`.
        fn to_pem(&self) -> String {
            use ed25519_dalek::pkcs8::EncodePublicKey;
            use ed25519_dalek::pkcs8::spki::der::pem::LineEnding;
            self.key
                .to_public_key_pem(LineEnding::LF)
                .expect("encoding a 32-byte Ed25519 key as PEM cannot fail")
        }
    }

    pub_for_release! {
        /// Checks `signature` over `context || document` with RFC 8032 strict verification
        /// (`verify_strict`, which also refuses non-canonical and small-order components).
        fn verify(&self, context: &[u8], document: &[u8], signature: &[u8; 64]) -> bool {
            let signature = Signature::from_bytes(signature);
            self.key
                .verify_strict(&signed_bytes(context, document), &signature)
                .is_ok()
        }
    }
}

impl fmt::Debug for PublicKey {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "PublicKey({})", self.id)
    }
}

/// The set of keys a device trusts, looked up by key id.
#[derive(Clone, Debug, Default)]
pub struct TrustedKeys {
    keys: BTreeMap<KeyId, PublicKey>,
}

impl TrustedKeys {
    /// An empty set; a verifier refuses to be built from one.
    pub fn new() -> Self {
        Self::default()
    }

    /// Adds a key; adding the same key twice keeps one.
    pub fn add(&mut self, key: PublicKey) -> &mut Self {
        self.keys.insert(key.id(), key);
        self
    }

    pub_for_release! {
        /// The key with this id, if trusted.
        fn get(&self, id: &KeyId) -> Option<&PublicKey> {
            self.keys.get(id)
        }
    }

    // Counting the keys is the release tools' business (`inspect` says whether it checked
    // signatures); an app hands its keys to `Trust` and never needs the count, so these two
    // left the app's API to make room for the signed metadata's reader (issue 11).
    pub_for_release! {
        /// How many distinct keys are trusted.
        fn len(&self) -> usize {
            self.keys.len()
        }
    }

    pub_for_release! {
        /// Whether no key is trusted.
        fn is_empty(&self) -> bool {
            self.keys.is_empty()
        }
    }

    pub_for_release! {
        /// The trusted keys in key-id order.
        fn iter(&self) -> impl Iterator<Item = &PublicKey> {
            self.keys.values()
        }
    }
}

impl FromIterator<PublicKey> for TrustedKeys {
    fn from_iter<I: IntoIterator<Item = PublicKey>>(iter: I) -> Self {
        let mut keys = TrustedKeys::new();
        for key in iter {
            keys.add(key);
        }
        keys
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// RFC 8032 section 7.1, TEST 1: the public key.
    const TEST_1: [u8; 32] = [
        0xd7, 0x5a, 0x98, 0x01, 0x82, 0xb1, 0x0a, 0xb7, 0xd5, 0x4b, 0xfe, 0xd3, 0xc9, 0x64, 0x07,
        0x3a, 0x0e, 0xe1, 0x72, 0xf3, 0xda, 0xa6, 0x23, 0x25, 0xaf, 0x02, 0x1a, 0x68, 0xf7, 0x07,
        0x51, 0x1a,
    ];

    #[test]
    fn key_ids_are_lowercase_hex_and_debug_names_them() {
        // Found by cargo-mutants (issue 15): an uppercase id of the right length was never
        // tried, and the Debug forms (an app's logs) were never read.
        let key = PublicKey::from_raw(&TEST_1).expect("RFC 8032 TEST 1 key");
        let id = key.id();
        let text = id.to_string();
        assert_eq!(text.parse::<KeyId>().expect("own id"), id);
        let upper = text.to_uppercase();
        assert_ne!(upper, text, "the id has letters");
        assert_eq!(
            upper.parse::<KeyId>().expect_err("uppercase").to_string(),
            format!("'{upper}' is not a key id (32 lowercase hex characters)")
        );
        assert_eq!(format!("{id:?}"), format!("KeyId({text})"));
        assert_eq!(format!("{key:?}"), format!("PublicKey({text})"));
    }
}
