//! Signatures as every signed document carries them, and the report of who signed.
//!
//! Every signed document kind (bundle manifest, feed, tree head, trust set) carries its
//! signatures in this shape, and every check goes through [`crate::format::signed::SignedDocument`],
//! so "signed by a trusted key" means the same thing everywhere: strict Ed25519 over the
//! kind's context and the document's exact bytes, one vote per distinct key, and signatures
//! that do not verify ignored.

use std::fmt;

use serde::{Deserialize, Serialize};

use crate::error::{Error, ErrorKind, Result};
use crate::format::keys::{KeyId, PublicKey};
use crate::format::limit;

/// One signature in the signatures document.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SignatureEntry {
    /// The id of the key that made the signature.
    pub key_id: KeyId,
    /// The raw 64-byte Ed25519 signature as 128 lowercase hex characters.
    #[serde(with = "hex_signature")]
    pub signature: [u8; 64],
}

impl SignatureEntry {
    /// Accepts a raw signature made elsewhere (an external signer, an HSM, openssl) only if it
    /// verifies strictly under `key` over `context || document`; `what` names the document in
    /// the message.
    pub fn verified(
        what: &str,
        key: &PublicKey,
        context: &[u8],
        document: &[u8],
        signature: [u8; 64],
    ) -> Result<SignatureEntry> {
        if !key.verify(context, document, &signature) {
            return Err(Error::new(
                ErrorKind::Signature,
                format!(
                    "signature does not verify under key {} over this {what}",
                    key.id()
                ),
            ));
        }
        Ok(SignatureEntry {
            key_id: key.id(),
            signature,
        })
    }
}

/// The signatures document (`signatures.json`): signatures over the manifest's exact bytes,
/// kept in key-id order.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Signatures {
    /// The signatures, in key-id order.
    pub signatures: Vec<SignatureEntry>,
}

impl Signatures {
    /// Parses the signatures document strictly.
    pub fn from_json(bytes: &[u8]) -> Result<Signatures> {
        let sigs: Signatures = serde_json::from_slice(bytes).map_err(|e| {
            Error::new(
                ErrorKind::Signature,
                format!("signatures.json is not valid: {e}"),
            )
        })?;
        if sigs.signatures.len() > limit::SIGNATURES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "signatures.json holds {} signatures, over the limit of {}",
                    sigs.signatures.len(),
                    limit::SIGNATURES
                ),
            ));
        }
        Ok(sigs)
    }

    /// The document as the writer stores it: pretty JSON, signatures sorted by key id, a
    /// final newline.
    pub fn to_json(&self) -> Vec<u8> {
        let mut sorted = self.clone();
        sorted.signatures.sort_by_key(|s| s.key_id);
        let mut bytes =
            serde_json::to_vec_pretty(&sorted).expect("signatures of hex strings always serialize");
        bytes.push(b'\n');
        bytes
    }

    /// Adds a signature, replacing an older one by the same key. Returns whether anything
    /// changed.
    pub fn insert(&mut self, entry: SignatureEntry) -> bool {
        if let Some(old) = self
            .signatures
            .iter_mut()
            .find(|s| s.key_id == entry.key_id)
        {
            let changed = old.signature != entry.signature;
            *old = entry;
            return changed;
        }
        self.signatures.push(entry);
        self.signatures.sort_by_key(|s| s.key_id);
        true
    }
}

mod hex_signature {
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(sig: &[u8; 64], serializer: S) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(&hex::encode(sig))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(deserializer: D) -> Result<[u8; 64], D::Error> {
        let text = <std::borrow::Cow<'de, str>>::deserialize(deserializer)?;
        let lower_hex = text.bytes().all(|b| matches!(b, b'0'..=b'9' | b'a'..=b'f'));
        let mut sig = [0u8; 64];
        if text.len() != 128 || !lower_hex || hex::decode_to_slice(&*text, &mut sig).is_err() {
            return Err(serde::de::Error::custom(
                "a signature must be 128 lowercase hex characters (64 bytes)",
            ));
        }
        Ok(sig)
    }
}

/// What a signature check found.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct SignatureReport {
    /// Trusted keys whose signature verified, each once, in key-id order.
    pub valid: Vec<KeyId>,
    /// Trusted keys whose signature did not verify over this document.
    pub invalid: Vec<KeyId>,
    /// Keys that signed but are not trusted; their signatures were not checked.
    pub untrusted: Vec<KeyId>,
}

fn list(ids: &[KeyId]) -> String {
    ids.iter()
        .map(KeyId::to_string)
        .collect::<Vec<_>>()
        .join(", ")
}

impl fmt::Display for SignatureReport {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let mut parts = Vec::new();
        if !self.valid.is_empty() {
            parts.push(format!("valid: {}", list(&self.valid)));
        }
        if !self.invalid.is_empty() {
            parts.push(format!(
                "not matching this document: {}",
                list(&self.invalid)
            ));
        }
        if !self.untrusted.is_empty() {
            parts.push(format!(
                "by keys not trusted here: {}",
                list(&self.untrusted)
            ));
        }
        if parts.is_empty() {
            parts.push("no signatures".into());
        }
        f.write_str(&parts.join("; "))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn entry(key: u8, signature: u8) -> SignatureEntry {
        SignatureEntry {
            key_id: KeyId::of_raw_key(&[key; 32]),
            signature: [signature; 64],
        }
    }

    #[test]
    fn insert_replaces_a_keys_signature_and_says_whether_anything_changed() {
        // Found by cargo-mutants (issue 15): `sign` on a bundle a key signed already must
        // replace that key's signature, not add a second one, and report no change when the
        // signature is the same bytes.
        let mut sigs = Signatures::default();
        assert!(sigs.insert(entry(2, 1)));
        assert!(sigs.insert(entry(1, 1)));
        assert!(
            !sigs.insert(entry(2, 1)),
            "the same signature again changes nothing"
        );
        assert!(
            sigs.insert(entry(2, 9)),
            "a new signature by the same key replaces it"
        );
        let mut ids = vec![entry(1, 0).key_id, entry(2, 0).key_id];
        ids.sort();
        assert_eq!(
            sigs.signatures.iter().map(|s| s.key_id).collect::<Vec<_>>(),
            ids
        );
        let two = sigs
            .signatures
            .iter()
            .find(|s| s.key_id == entry(2, 0).key_id)
            .expect("key 2");
        assert_eq!(two.signature, [9; 64]);
    }
}
