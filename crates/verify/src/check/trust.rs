//! Trust sets: the signed document that says which keys may sign which kind of document, and
//! how many of them must agree, so that one stolen laptop cannot ship a model to every device
//! and a lost or leaked key can be replaced without an app release.
//!
//! A trust set lists public keys, each with the document kinds it may sign (its roles), a
//! threshold per kind, a version and an expiry. The app ships with an initial trust set that
//! is signed by a threshold of its own keys ([`TrustSet::verify_initial`]). A newer trust set
//! is accepted only if it is newer and signed by a threshold of the keys the device trusts now
//! *and* by a threshold of its own keys ([`TrustSet::accept_successor`]): the first rule makes
//! the change authorised, the second makes sure a key the new set adds really is held by
//! whoever is meant to use it. Revoking a key is publishing a new set without it.
//!
//! The file is an envelope, as feeds are: the trust-set text as a JSON string, and signatures
//! over that text's exact UTF-8 bytes under [`context::TRUST_SET`]:
//!
//! ```json
//! {
//!   "trust_set": "{\n  \"format\": 1,\n  \"version\": 2,\n ...}\n",
//!   "signatures": [{ "key_id": "...", "signature": "..." }]
//! }
//! ```
//!
//! Both layers are parsed into derived structs that refuse unknown fields and duplicate keys.
//! A [`TrustSetFile`] is only parsed and checked for shape; only a [`TrustSet`], which this
//! module alone makes, has had its signatures checked, and only it hands out keys for
//! verification ([`TrustSet::keys_for`]).
//!
//! Expiry is checked on the trust set that comes out of each function, against the `now` the
//! caller passes. The keys of the set a device trusts still authorise a successor after that
//! set expired ([`TrustSet::renew`]); without that, a device left offline past the expiry could
//! never be brought back. They never verify anything else once expired.

use std::collections::BTreeSet;

use serde::{Deserialize, Serialize};

use crate::error::{Error, ErrorKind, Result};
use crate::format::keys::{KeyId, PublicKey, TrustedKeys};
use crate::format::signature::{SignatureEntry, SignatureReport};
pub use crate::format::signed::DocumentKind;
use crate::format::signed::{Kind, SignedDocument, Signers, kind};
use crate::format::time::Timestamp;
use crate::format::{context, limit, signed_bytes, trust_set as spec};

/// One key in a trust set.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct KeyEntry {
    /// The key's id; it must be the id of `public_key`.
    pub key_id: KeyId,
    /// The raw 32-byte Ed25519 public key, as 64 lowercase hex characters.
    #[serde(with = "hex_key")]
    pub public_key: [u8; 32],
    /// The document kinds this key may sign, each once.
    pub roles: Vec<DocumentKind>,
    /// Who holds the key, for people reading the set (may be empty, at most 128 bytes).
    pub comment: String,
}

impl KeyEntry {
    /// An entry for `key` with these roles and comment.
    pub fn new(key: &PublicKey, roles: Vec<DocumentKind>, comment: impl Into<String>) -> Self {
        KeyEntry {
            key_id: key.id(),
            public_key: *key.as_bytes(),
            roles,
            comment: comment.into(),
        }
    }
}

mod hex_key {
    use serde::{Deserialize, Deserializer, Serializer};

    pub fn serialize<S: Serializer>(key: &[u8; 32], serializer: S) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(&hex::encode(key))
    }

    pub fn deserialize<'de, D: Deserializer<'de>>(deserializer: D) -> Result<[u8; 32], D::Error> {
        let text = <std::borrow::Cow<'de, str>>::deserialize(deserializer)?;
        let lower_hex = text.bytes().all(|b| matches!(b, b'0'..=b'9' | b'a'..=b'f'));
        let mut key = [0u8; 32];
        if text.len() != 64 || !lower_hex || hex::decode_to_slice(&*text, &mut key).is_err() {
            return Err(serde::de::Error::custom(
                "a public key must be 64 lowercase hex characters (32 bytes)",
            ));
        }
        Ok(key)
    }
}

/// How many distinct keys must sign each kind of document.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Thresholds {
    /// Signatures a bundle needs.
    pub bundle: u32,
    /// Signatures a feed needs.
    pub feed: u32,
    /// Signatures a signed tree head needs.
    pub tree_head: u32,
    /// Signatures a trust set needs (from the set trusted now, and from its own keys).
    pub trust_set: u32,
}

impl Thresholds {
    /// The threshold of `kind`.
    pub fn get(&self, kind: DocumentKind) -> u32 {
        match kind {
            DocumentKind::Bundle => self.bundle,
            DocumentKind::Feed => self.feed,
            DocumentKind::TreeHead => self.tree_head,
            DocumentKind::TrustSet => self.trust_set,
        }
    }

    /// Sets the threshold of `kind`.
    pub fn set(&mut self, kind: DocumentKind, threshold: u32) {
        match kind {
            DocumentKind::Bundle => self.bundle = threshold,
            DocumentKind::Feed => self.feed = threshold,
            DocumentKind::TreeHead => self.tree_head = threshold,
            DocumentKind::TrustSet => self.trust_set = threshold,
        }
    }
}

/// The trust-set document (format 1), the text the signatures cover. Field order here is the
/// order in the JSON.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrustSetBody {
    /// The format version; always [`spec::FORMAT_VERSION`].
    pub format: u32,
    /// Grows with every new trust set; a device refuses one not newer than its own.
    pub version: u64,
    /// After this instant the set must not be trusted any more.
    pub expires: Timestamp,
    /// The keys, each once.
    pub keys: Vec<KeyEntry>,
    /// The threshold of each document kind.
    pub thresholds: Thresholds,
}

fn invalid(message: String) -> Error {
    Error::new(ErrorKind::TrustSet, message)
}

impl TrustSetBody {
    /// The document as the writer stores it: pretty JSON with a final newline.
    pub fn to_json(&self) -> String {
        let mut text = serde_json::to_string_pretty(self)
            .expect("a trust set of strings and numbers always serializes");
        text.push('\n');
        text
    }

    /// Checks every field and loads every key (refusing weak ones), in the order of `keys`.
    pub fn validate(&self) -> Result<Vec<PublicKey>> {
        if self.format != spec::FORMAT_VERSION {
            return Err(invalid(format!(
                "trust set format {} is not supported (this reader knows format {}); \
                 update ampoule-verify to read newer trust sets",
                self.format,
                spec::FORMAT_VERSION
            )));
        }
        if self.version == 0 {
            return Err(invalid(
                "trust set version 0 is not allowed; versions start at 1".into(),
            ));
        }
        if self.keys.is_empty() {
            return Err(invalid(
                "trust set lists no keys; it needs at least one".into(),
            ));
        }
        if self.keys.len() > spec::MAX_KEYS {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "trust set lists {} keys, over the limit of {}",
                    self.keys.len(),
                    spec::MAX_KEYS
                ),
            ));
        }
        let mut seen = BTreeSet::new();
        let mut loaded = Vec::with_capacity(self.keys.len());
        for entry in &self.keys {
            let id = KeyId::of_raw_key(&entry.public_key);
            if entry.key_id != id {
                return Err(invalid(format!(
                    "trust set key {} does not match its public key, whose key id is {id}",
                    entry.key_id
                )));
            }
            if !seen.insert(id) {
                return Err(invalid(format!("trust set lists key {id} more than once")));
            }
            loaded.push(PublicKey::from_raw(&entry.public_key)?);
            if entry.roles.is_empty() {
                return Err(invalid(format!(
                    "trust set key {id} has no roles; give it at least one of bundle, feed, \
                     tree_head, trust_set"
                )));
            }
            let mut roles = BTreeSet::new();
            for role in &entry.roles {
                if !roles.insert(role) {
                    return Err(invalid(format!(
                        "trust set key {id} lists the role {role} more than once"
                    )));
                }
            }
            if entry.comment.len() > spec::COMMENT_BYTES
                || entry.comment.chars().any(char::is_control)
            {
                return Err(invalid(format!(
                    "trust set key {id} has a comment over {} bytes or with control characters",
                    spec::COMMENT_BYTES
                )));
            }
        }
        for kind in DocumentKind::ALL {
            let threshold = self.thresholds.get(kind);
            let holders = self.keys.iter().filter(|k| k.roles.contains(&kind)).count();
            if threshold == 0 {
                return Err(invalid(format!(
                    "trust set threshold for {kind} is 0; every threshold must be at least 1"
                )));
            }
            if threshold as usize > holders {
                return Err(invalid(format!(
                    "trust set threshold for {kind} is {threshold} but only {holders} key(s) \
                     have the {kind} role"
                )));
            }
        }
        Ok(loaded)
    }
}

/// The file: the trust-set text and the signatures over it.
#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct Envelope {
    trust_set: String,
    signatures: Vec<SignatureEntry>,
}

/// A trust-set file as read: parsed and checked for shape, keys loaded, **signatures not
/// checked**. Release-side tools edit and sign these; a device turns one into a [`TrustSet`].
#[derive(Debug, Clone)]
pub struct TrustSetFile {
    text: String,
    body: TrustSetBody,
    keys: Vec<PublicKey>,
    signatures: Vec<SignatureEntry>,
}

impl TrustSetFile {
    /// Parses a trust-set file strictly: size cap, both JSON layers without unknown fields or
    /// duplicate keys, every field valid. Signatures are parsed but not checked.
    pub fn from_json(bytes: &[u8]) -> Result<Self> {
        if bytes.len() as u64 > spec::MAX_BYTES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "trust-set file is {} bytes, over the limit of {} bytes",
                    bytes.len(),
                    spec::MAX_BYTES
                ),
            ));
        }
        let envelope: Envelope = serde_json::from_slice(bytes)
            .map_err(|e| invalid(format!("trust-set file is not valid: {e}")))?;
        if envelope.signatures.len() > limit::SIGNATURES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "trust-set file holds {} signatures, over the limit of {}",
                    envelope.signatures.len(),
                    limit::SIGNATURES
                ),
            ));
        }
        let body: TrustSetBody = serde_json::from_str(&envelope.trust_set)
            .map_err(|e| invalid(format!("trust set is not valid: {e}")))?;
        let keys = body.validate()?;
        Ok(TrustSetFile {
            text: envelope.trust_set,
            body,
            keys,
            signatures: envelope.signatures,
        })
    }

    /// A new, unsigned file holding `body` in the writer's form.
    pub fn unsigned(body: TrustSetBody) -> Result<Self> {
        let keys = body.validate()?;
        Ok(TrustSetFile {
            text: body.to_json(),
            body,
            keys,
            signatures: Vec::new(),
        })
    }

    /// The file as the writer stores it: pretty JSON, signatures in key-id order, a final
    /// newline.
    pub fn to_json(&self) -> Vec<u8> {
        let mut signatures = self.signatures.clone();
        signatures.sort_by_key(|s| s.key_id);
        let envelope = Envelope {
            trust_set: self.text.clone(),
            signatures,
        };
        let mut bytes = serde_json::to_vec_pretty(&envelope)
            .expect("a trust-set envelope of strings always serializes");
        bytes.push(b'\n');
        bytes
    }

    /// The parsed document.
    pub fn body(&self) -> &TrustSetBody {
        &self.body
    }

    /// The document's exact text, which the signatures cover.
    pub fn text(&self) -> &str {
        &self.text
    }

    /// The set's version.
    pub fn version(&self) -> u64 {
        self.body.version
    }

    /// When the set expires.
    pub fn expires(&self) -> Timestamp {
        self.body.expires
    }

    /// The signatures as stored (not checked).
    pub fn signatures(&self) -> &[SignatureEntry] {
        &self.signatures
    }

    /// Exactly the bytes a signer signs: the trust-set context, then the text.
    pub fn signing_request(&self) -> Vec<u8> {
        signed_bytes(context::TRUST_SET, self.text.as_bytes())
    }

    /// Adds a signature, replacing an older one by the same key; returns whether anything
    /// changed. Refuses to hold more than the format's limit of signatures.
    pub fn insert_signature(&mut self, entry: SignatureEntry) -> Result<bool> {
        if let Some(old) = self
            .signatures
            .iter_mut()
            .find(|s| s.key_id == entry.key_id)
        {
            let changed = old.signature != entry.signature;
            *old = entry;
            return Ok(changed);
        }
        if self.signatures.len() >= limit::SIGNATURES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "trust set version {} already carries {} signatures, the most it may hold",
                    self.body.version,
                    limit::SIGNATURES
                ),
            ));
        }
        self.signatures.push(entry);
        self.signatures.sort_by_key(|s| s.key_id);
        Ok(true)
    }

    /// The keys this file lists for `kind`, whoever signed it. Only a [`TrustSet`]'s keys
    /// are vouched for.
    pub fn keys_for(&self, kind: DocumentKind) -> TrustedKeys {
        self.body
            .keys
            .iter()
            .zip(&self.keys)
            .filter(|(entry, _)| entry.roles.contains(&kind))
            .map(|(_, key)| key.clone())
            .collect()
    }

    /// Every key this file lists, whatever its roles.
    pub fn all_keys(&self) -> TrustedKeys {
        self.keys.iter().cloned().collect()
    }

    /// The threshold of `kind`.
    pub fn threshold(&self, kind: DocumentKind) -> usize {
        self.body.thresholds.get(kind) as usize
    }

    /// Sorts this file's signatures into valid, invalid and untrusted under `keys`.
    pub fn tally(&self, keys: &TrustedKeys) -> SignatureReport {
        match self.document() {
            Ok(document) => document.tally(keys),
            // Only a file over the caps fails here, and from_json refuses those.
            Err(_) => SignatureReport::default(),
        }
    }

    /// The text and its signatures as a signed document of the trust-set kind.
    fn document(&self) -> Result<SignedDocument<'_, kind::TrustSet>> {
        SignedDocument::new(self.text.as_bytes(), &self.signatures)
    }

    /// The keys this file lists for the role of `K` and the threshold of `K`, whoever signed
    /// the file.
    fn signers<K: Kind>(&self) -> Result<Signers<K>> {
        Signers::new(self.keys_for(K::KIND), self.threshold(K::KIND))
    }

    /// Refuses the set if it expired before `now`.
    pub fn check_expiry(&self, now: Timestamp) -> Result<()> {
        if now > self.body.expires {
            return Err(invalid(format!(
                "trust set version {} expired at {} (it is now {now}); a newer trust set signed \
                 by the keys trusted now is needed",
                self.body.version, self.body.expires
            )));
        }
        Ok(())
    }

    /// Requires a threshold of this file's own trust-set keys to have signed it.
    fn check_own_signatures(&self, what: &str) -> Result<SignatureReport> {
        self.document()?
            .check(&self.signers::<kind::TrustSet>()?, what)
    }
}

/// A trust set whose signatures were checked: self-signed by a threshold of its own keys and,
/// if it replaced another, by a threshold of that one's keys too. Only this module makes one.
#[derive(Debug, Clone)]
pub struct TrustSet {
    file: TrustSetFile,
    report: SignatureReport,
}

impl TrustSet {
    /// Accepts a trust set the device trusts without a predecessor: the one shipped with the
    /// app. It must be signed by its own trust-set threshold and not be expired at `now`.
    pub fn verify_initial(bytes: &[u8], now: Timestamp) -> Result<TrustSet> {
        let set = Self::self_signed(bytes)?;
        set.file.check_expiry(now)?;
        Ok(set)
    }

    /// The trust set a device runs with after a restart: the newer of the one shipped with the
    /// app and the one it stored when it last accepted a successor (an app update may ship a
    /// newer set than the stored one). Each must be signed by its own threshold; a stored set
    /// that fails is an error, never a reason to fall back to the older initial set, which
    /// would bring revoked keys back. The chosen set must not be expired at `now`; if it is,
    /// use [`TrustSet::renew`] with a newer set.
    ///
    /// The stored set is trusted because the device accepted it through
    /// [`TrustSet::accept_successor`]: it must live where only the app can write.
    pub fn resume(initial: &[u8], stored: Option<&[u8]>, now: Timestamp) -> Result<TrustSet> {
        let set = Self::newest(initial, stored)?;
        set.file.check_expiry(now)?;
        Ok(set)
    }

    /// Like [`TrustSet::resume`] followed by [`TrustSet::accept_successor`], for a device whose
    /// trust set may have expired while it was offline: the expired set's keys may still
    /// authorise `successor`, which itself must not be expired.
    pub fn renew(
        initial: &[u8],
        stored: Option<&[u8]>,
        successor: &[u8],
        now: Timestamp,
    ) -> Result<TrustSet> {
        Self::newest(initial, stored)?.accept_successor(successor, now)
    }

    /// Accepts `bytes` as the successor of this trust set: strictly newer version, signed by
    /// a threshold of this set's trust-set keys and by a threshold of its own, and not expired
    /// at `now`. This set may itself have expired. The device then stores the new set's
    /// [`TrustSet::to_json`] bytes and uses the new set from then on.
    pub fn accept_successor(&self, bytes: &[u8], now: Timestamp) -> Result<TrustSet> {
        let next = self.accept_step(bytes)?;
        next.file.check_expiry(now)?;
        Ok(next)
    }

    /// [`TrustSet::accept_successor`] without the expiry check: one step of a device's walk
    /// through several versions at once (`trust/<n>.json`, n from its own version up to the
    /// one a feed names), where a set in the middle may have expired since it was published.
    /// Its keys then authorise only the next set, as an expired set's keys always may; the
    /// walk checks the expiry of the set it ends on, which is the one that verifies anything.
    /// The store re-checks its chain of accepted sets with it too.
    pub(crate) fn accept_step(&self, bytes: &[u8]) -> Result<TrustSet> {
        let next = TrustSetFile::from_json(bytes)?;
        let (new, old) = (next.version(), self.version());
        if new <= old {
            return Err(invalid(format!(
                "trust set version {new} is not newer than the trusted version {old}; \
                 refusing to roll trust back"
            )));
        }
        // The keys trusted now authorise the change.
        next.document()?.check(
            &self.signers::<kind::TrustSet>()?,
            format_args!("trust set version {new}, counting the keys of trusted version {old},"),
        )?;
        // A key the new set adds takes effect only if its holders signed too.
        let report =
            next.check_own_signatures(&format!("trust set version {new}, counting its own keys,"))?;
        Ok(TrustSet { file: next, report })
    }

    pub(crate) fn self_signed(bytes: &[u8]) -> Result<TrustSet> {
        let file = TrustSetFile::from_json(bytes)?;
        let report = file.check_own_signatures(&format!("trust set version {}", file.version()))?;
        Ok(TrustSet { file, report })
    }

    fn newest(initial: &[u8], stored: Option<&[u8]>) -> Result<TrustSet> {
        let initial = Self::self_signed(initial)?;
        let Some(stored) = stored else {
            return Ok(initial);
        };
        let stored = Self::self_signed(stored)?;
        Ok(if stored.version() > initial.version() {
            stored
        } else {
            initial
        })
    }

    /// The set's version.
    pub fn version(&self) -> u64 {
        self.file.version()
    }

    /// When the set expires.
    pub fn expires(&self) -> Timestamp {
        self.file.expires()
    }

    /// The parsed document.
    pub fn body(&self) -> &TrustSetBody {
        self.file.body()
    }

    /// The underlying file (text and signatures).
    pub fn file(&self) -> &TrustSetFile {
        &self.file
    }

    /// The exact bytes a device stores to resume with this set after a restart.
    pub fn to_json(&self) -> Vec<u8> {
        self.file.to_json()
    }

    /// The signature check that accepted this set, under its own keys.
    pub fn signature_report(&self) -> &SignatureReport {
        &self.report
    }

    /// The keys that may sign `kind`, and how many of them must.
    pub fn keys_for(&self, kind: DocumentKind) -> (TrustedKeys, usize) {
        (self.file.keys_for(kind), self.file.threshold(kind))
    }

    /// The threshold of `kind`.
    pub fn threshold(&self, kind: DocumentKind) -> usize {
        self.file.threshold(kind)
    }

    /// The keys holding the role of `K` in this set and the set's threshold for `K`: whose
    /// signatures count on documents of that kind.
    pub fn signers<K: Kind>(&self) -> Result<Signers<K>> {
        self.file.signers()
    }
}

#[cfg(test)]
mod tests {
    use ed25519_dalek::{Signer, SigningKey};

    use super::*;

    const NOW: u64 = 1_796_083_200; // 2026-12-01T00:00:00Z
    const YEAR: u64 = 365 * 86_400;

    fn at(secs: u64) -> Timestamp {
        Timestamp::from_unix(secs).expect("test instants are in range")
    }

    fn signer(seed: u8) -> SigningKey {
        SigningKey::from_bytes(&[seed; 32])
    }

    fn public(key: &SigningKey) -> PublicKey {
        PublicKey::from_verifying_key(&key.verifying_key()).expect("test keys are not weak")
    }

    fn id(key: &SigningKey) -> KeyId {
        public(key).id()
    }

    fn all_roles() -> Vec<DocumentKind> {
        DocumentKind::ALL.to_vec()
    }

    fn body(version: u64, keys: &[&SigningKey], bundle: u32, trust_set: u32) -> TrustSetBody {
        TrustSetBody {
            format: 1,
            version,
            expires: at(NOW + YEAR),
            keys: keys
                .iter()
                .map(|k| KeyEntry::new(&public(k), all_roles(), "trail camera team"))
                .collect(),
            thresholds: Thresholds {
                bundle,
                feed: 1,
                tree_head: 1,
                trust_set,
            },
        }
    }

    fn sign_entry(file: &TrustSetFile, key: &SigningKey) -> SignatureEntry {
        SignatureEntry {
            key_id: id(key),
            signature: key.sign(&file.signing_request()).to_bytes(),
        }
    }

    fn signed(body: TrustSetBody, signers: &[&SigningKey]) -> Vec<u8> {
        let mut file = TrustSetFile::unsigned(body).expect("test bodies are valid");
        for key in signers {
            let entry = sign_entry(&file, key);
            file.insert_signature(entry).expect("under the limit");
        }
        file.to_json()
    }

    /// A file whose body skips validation, for bodies the writer would refuse.
    fn raw_file(body: &TrustSetBody, signatures: Vec<SignatureEntry>) -> Vec<u8> {
        serde_json::to_vec(&Envelope {
            trust_set: body.to_json(),
            signatures,
        })
        .expect("serializes")
    }

    fn err(result: Result<TrustSet>) -> String {
        result.expect_err("must be refused").to_string()
    }

    #[test]
    fn initial_set_signed_by_its_own_threshold_is_accepted() {
        let (a, b, c) = (signer(1), signer(2), signer(3));
        let bytes = signed(body(1, &[&a, &b, &c], 2, 2), &[&a, &c]);
        let set = TrustSet::verify_initial(&bytes, at(NOW)).expect("accepted");
        assert_eq!(set.version(), 1);
        let (keys, threshold) = set.keys_for(DocumentKind::Bundle);
        assert_eq!((keys.len(), threshold), (3, 2));
        assert_eq!(set.threshold(DocumentKind::Feed), 1);
        let mut valid = vec![id(&a), id(&c)];
        valid.sort();
        assert_eq!(set.signature_report().valid, valid);
        // What the device stores reads back to the same set.
        let again = TrustSet::verify_initial(&set.to_json(), at(NOW)).expect("round trip");
        assert_eq!(again.body(), set.body());
        assert_eq!(again.file().text(), set.file().text());
    }

    #[test]
    fn initial_set_below_its_threshold_is_refused() {
        let (a, b, c) = (signer(1), signer(2), signer(3));
        let bytes = signed(body(1, &[&a, &b, &c], 2, 2), &[&b]);
        assert_eq!(
            err(TrustSet::verify_initial(&bytes, at(NOW))),
            format!(
                "trust set version 1 has 1 valid signature(s) by trusted keys but needs 2 (valid: {})",
                id(&b)
            )
        );
        let unsigned = signed(body(1, &[&a, &b, &c], 2, 2), &[]);
        assert_eq!(
            err(TrustSet::verify_initial(&unsigned, at(NOW))),
            "trust set version 1 is not signed; it needs a signature by a trusted key"
        );
    }

    #[test]
    fn duplicate_signatures_by_one_key_count_once() {
        let (a, b) = (signer(1), signer(2));
        let file = TrustSetFile::unsigned(body(1, &[&a, &b], 2, 2)).expect("valid");
        let twice = vec![sign_entry(&file, &a), sign_entry(&file, &a)];
        let bytes = raw_file(file.body(), twice);
        assert_eq!(
            err(TrustSet::verify_initial(&bytes, at(NOW))),
            format!(
                "trust set version 1 has 1 valid signature(s) by trusted keys but needs 2 (valid: {})",
                id(&a)
            )
        );
    }

    #[test]
    fn signatures_under_another_context_do_not_count() {
        let (a, b) = (signer(1), signer(2));
        let file = TrustSetFile::unsigned(body(1, &[&a, &b], 1, 1)).expect("valid");
        // A signature over the same text as if it were a manifest.
        let as_manifest = SignatureEntry {
            key_id: id(&a),
            signature: a
                .sign(&signed_bytes(context::MANIFEST, file.text().as_bytes()))
                .to_bytes(),
        };
        let bytes = raw_file(file.body(), vec![as_manifest]);
        assert_eq!(
            err(TrustSet::verify_initial(&bytes, at(NOW))),
            format!(
                "trust set version 1 has no valid signature by a trusted key (not matching this document: {})",
                id(&a)
            )
        );
    }

    #[test]
    fn rotation_needs_the_current_and_the_new_threshold() {
        let (a, b, c, d) = (signer(1), signer(2), signer(3), signer(4));
        let v1 =
            TrustSet::verify_initial(&signed(body(1, &[&a, &b, &c], 2, 2), &[&a, &b]), at(NOW))
                .expect("v1");
        // Replace c by d: signed by a and b, who are a threshold of both sets.
        let v2 = v1
            .accept_successor(&signed(body(2, &[&a, &b, &d], 2, 2), &[&a, &b]), at(NOW))
            .expect("v2");
        assert_eq!(v2.version(), 2);
        assert!(v2.keys_for(DocumentKind::Bundle).0.get(&id(&d)).is_some());
        assert!(v2.keys_for(DocumentKind::Bundle).0.get(&id(&c)).is_none());

        // A whole new team signed only by the old one: the new keys did not sign.
        let takeover = signed(body(3, &[&c, &d], 2, 2), &[&a, &b]);
        let mut old = [id(&a), id(&b)];
        old.sort();
        assert_eq!(
            err(v2.accept_successor(&takeover, at(NOW))),
            format!(
                "trust set version 3, counting its own keys, has 0 valid signature(s) by trusted keys \
                 but needs 2 (by keys not trusted here: {}, {})",
                old[0], old[1]
            )
        );
        // Signed by the new keys only: not authorised by the keys trusted now.
        let (e, f) = (signer(5), signer(6));
        let mut new = [id(&e), id(&f)];
        new.sort();
        let self_made = signed(body(3, &[&e, &f], 2, 2), &[&e, &f]);
        assert_eq!(
            err(v2.accept_successor(&self_made, at(NOW))),
            format!(
                "trust set version 3, counting the keys of trusted version 2, has 0 valid signature(s) \
                 by trusted keys but needs 2 (by keys not trusted here: {}, {})",
                new[0], new[1]
            )
        );
    }

    #[test]
    fn a_revoked_key_cannot_sign_a_successor() {
        let (a, b, c, x) = (signer(1), signer(2), signer(3), signer(9));
        let v1 =
            TrustSet::verify_initial(&signed(body(1, &[&a, &b, &c], 2, 2), &[&a, &b]), at(NOW))
                .expect("v1");
        // c leaked: version 2 drops it.
        let v2 = v1
            .accept_successor(&signed(body(2, &[&a, &b], 2, 2), &[&a, &b]), at(NOW))
            .expect("v2 revokes c");
        // Whoever holds c makes a set of c and a key of their own, and signs it with both.
        let forged = signed(body(3, &[&c, &x], 1, 2), &[&c, &x]);
        let mut ids = [id(&c), id(&x)];
        ids.sort();
        assert_eq!(
            err(v2.accept_successor(&forged, at(NOW))),
            format!(
                "trust set version 3, counting the keys of trusted version 2, has 0 valid signature(s) \
                 by trusted keys but needs 2 (by keys not trusted here: {}, {})",
                ids[0], ids[1]
            )
        );
        // With one remaining key and the revoked one it is still below the threshold.
        let half = signed(body(3, &[&a, &c], 1, 2), &[&a, &c]);
        assert_eq!(
            err(v2.accept_successor(&half, at(NOW))),
            format!(
                "trust set version 3, counting the keys of trusted version 2, has 1 valid signature(s) \
                 by trusted keys but needs 2 (valid: {}; by keys not trusted here: {})",
                id(&a),
                id(&c)
            )
        );
    }

    #[test]
    fn older_or_equal_versions_are_refused() {
        let (a, b) = (signer(1), signer(2));
        let v1_bytes = signed(body(1, &[&a, &b], 1, 1), &[&a]);
        let v2_bytes = signed(body(2, &[&a, &b], 1, 1), &[&a]);
        let v1 = TrustSet::verify_initial(&v1_bytes, at(NOW)).expect("v1");
        let v2 = v1.accept_successor(&v2_bytes, at(NOW)).expect("v2");
        assert_eq!(
            err(v2.accept_successor(&v1_bytes, at(NOW))),
            "trust set version 1 is not newer than the trusted version 2; refusing to roll trust back"
        );
        let v2_again = signed(body(2, &[&a], 1, 1), &[&a]);
        assert_eq!(
            err(v2.accept_successor(&v2_again, at(NOW))),
            "trust set version 2 is not newer than the trusted version 2; refusing to roll trust back"
        );
        let e = v2
            .accept_successor(&v1_bytes, at(NOW))
            .expect_err("refused");
        assert_eq!(e.kind(), ErrorKind::TrustSet);
    }

    #[test]
    fn expired_sets_are_refused_but_their_keys_can_renew() {
        let (a, b) = (signer(1), signer(2));
        let v1_bytes = signed(body(1, &[&a, &b], 1, 1), &[&a]);
        let later = NOW + YEAR + 1;
        assert_eq!(
            err(TrustSet::verify_initial(&v1_bytes, at(later))),
            "trust set version 1 expired at 2027-12-01T00:00:00Z (it is now 2027-12-01T00:00:01Z); \
             a newer trust set signed by the keys trusted now is needed"
        );
        // The last second is still inside.
        TrustSet::verify_initial(&v1_bytes, at(NOW + YEAR)).expect("not yet expired");
        assert!(TrustSet::resume(&v1_bytes, None, at(later)).is_err());

        let mut renewed = body(2, &[&a, &b], 1, 1);
        renewed.expires = at(later + YEAR);
        let v2_bytes = signed(renewed, &[&a]);
        let v2 = TrustSet::renew(&v1_bytes, None, &v2_bytes, at(later)).expect("renewed");
        assert_eq!(v2.version(), 2);

        // A successor that is itself expired is refused.
        let stale_bytes = signed(body(3, &[&a, &b], 1, 1), &[&a]);
        assert_eq!(
            err(v2.accept_successor(&stale_bytes, at(later))),
            "trust set version 3 expired at 2027-12-01T00:00:00Z (it is now 2027-12-01T00:00:01Z); \
             a newer trust set signed by the keys trusted now is needed"
        );
    }

    #[test]
    fn resume_takes_the_newer_of_initial_and_stored() {
        let (a, b) = (signer(1), signer(2));
        let v1 = signed(body(1, &[&a, &b], 1, 1), &[&a]);
        let v2 = signed(body(2, &[&b], 1, 1), &[&b]);
        let v3 = signed(body(3, &[&a, &b], 1, 1), &[&a]);
        let now = at(NOW);
        assert_eq!(TrustSet::resume(&v1, None, now).expect("v1").version(), 1);
        assert_eq!(
            TrustSet::resume(&v1, Some(&v2), now).expect("v2").version(),
            2
        );
        // An app update shipped a newer set than the stored one.
        assert_eq!(
            TrustSet::resume(&v3, Some(&v2), now).expect("v3").version(),
            3
        );
        // A damaged stored set is an error, not a fallback to the initial set.
        let mut damaged = v2.clone();
        let pos = damaged.len() - 10;
        damaged[pos] ^= 1;
        assert!(TrustSet::resume(&v1, Some(&damaged), now).is_err());
    }

    #[test]
    fn roles_and_thresholds_apply_per_kind() {
        let (a, b, ci) = (signer(1), signer(2), signer(3));
        let mut set = body(1, &[&a, &b], 2, 2);
        set.keys.push(KeyEntry::new(
            &public(&ci),
            vec![DocumentKind::Feed, DocumentKind::TreeHead],
            "ci runner",
        ));
        let trust = TrustSet::verify_initial(&signed(set, &[&a, &b]), at(NOW)).expect("valid");
        assert_eq!(trust.keys_for(DocumentKind::Bundle).0.len(), 2);
        assert_eq!(trust.keys_for(DocumentKind::Feed).0.len(), 3);
        let feed = br#"{"format":1}"#;
        let by_ci = |kind: DocumentKind| SignatureEntry {
            key_id: id(&ci),
            signature: ci.sign(&signed_bytes(kind.context(), feed)).to_bytes(),
        };
        let as_feed = [by_ci(DocumentKind::Feed)];
        let report = SignedDocument::<kind::Feed>::new(feed, &as_feed)
            .and_then(|d| d.check(&trust.signers().expect("feed signers"), "feed"))
            .expect("a feed needs one feed key");
        assert_eq!(report.valid, vec![id(&ci)]);
        // The ci key is not a bundle key, so its signature does not count for bundles.
        let as_bundle = [by_ci(DocumentKind::Bundle)];
        let e = SignedDocument::<kind::Manifest>::new(feed, &as_bundle)
            .and_then(|d| d.check(&trust.signers().expect("bundle signers"), "bundle"))
            .expect_err("not a bundle key");
        assert_eq!(
            e.to_string(),
            format!(
                "bundle has 0 valid signature(s) by trusted keys but needs 2 (by keys not trusted here: {})",
                id(&ci)
            )
        );
    }

    #[test]
    fn weak_keys_are_refused() {
        // The identity point (y = 1) has order 1: every signature would verify under it.
        let mut weak = [0u8; 32];
        weak[0] = 1;
        let a = signer(1);
        let mut set = body(1, &[&a], 1, 1);
        set.keys.push(KeyEntry {
            key_id: KeyId::of_raw_key(&weak),
            public_key: weak,
            roles: all_roles(),
            comment: String::new(),
        });
        let e = TrustSetFile::from_json(&raw_file(&set, vec![])).expect_err("weak key");
        assert_eq!(
            e.to_string(),
            format!(
                "public key {} is a weak (small-order) Ed25519 key and cannot be trusted",
                KeyId::of_raw_key(&weak)
            )
        );
        assert_eq!(e.kind(), ErrorKind::Key);
    }

    #[test]
    fn malformed_sets_are_refused_with_the_reason() {
        let (a, b) = (signer(1), signer(2));
        let check = |set: TrustSetBody, expected: String| {
            let e = TrustSetFile::from_json(&raw_file(&set, vec![])).expect_err("refused");
            assert_eq!(e.to_string(), expected);
            assert!(TrustSetFile::unsigned(set).is_err());
        };

        let mut dup = body(1, &[&a, &b], 1, 1);
        dup.keys.push(dup.keys[0].clone());
        check(
            dup,
            format!("trust set lists key {} more than once", id(&a)),
        );

        let mut wrong_id = body(1, &[&a, &b], 1, 1);
        wrong_id.keys[0].key_id = id(&b);
        check(
            wrong_id,
            format!(
                "trust set key {} does not match its public key, whose key id is {}",
                id(&b),
                id(&a)
            ),
        );

        check(
            body(1, &[&a, &b], 0, 1),
            "trust set threshold for bundle is 0; every threshold must be at least 1".into(),
        );
        check(
            body(1, &[&a, &b], 3, 1),
            "trust set threshold for bundle is 3 but only 2 key(s) have the bundle role".into(),
        );
        check(
            body(0, &[&a], 1, 1),
            "trust set version 0 is not allowed; versions start at 1".into(),
        );
        let mut no_keys = body(1, &[&a], 1, 1);
        no_keys.keys.clear();
        check(
            no_keys,
            "trust set lists no keys; it needs at least one".into(),
        );
        let mut format2 = body(1, &[&a], 1, 1);
        format2.format = 2;
        check(
            format2,
            "trust set format 2 is not supported (this reader knows format 1); update ampoule-verify \
             to read newer trust sets"
                .into(),
        );
        let mut no_roles = body(1, &[&a, &b], 1, 1);
        no_roles.keys[1].roles.clear();
        check(
            no_roles,
            format!(
                "trust set key {} has no roles; give it at least one of bundle, feed, tree_head, trust_set",
                id(&b)
            ),
        );
        let mut twice = body(1, &[&a], 1, 1);
        twice.keys[0].roles.push(DocumentKind::Feed);
        check(
            twice,
            format!(
                "trust set key {} lists the role feed more than once",
                id(&a)
            ),
        );
        let mut comment = body(1, &[&a], 1, 1);
        comment.keys[0].comment = "line\nbreak".into();
        check(
            comment,
            format!(
                "trust set key {} has a comment over 128 bytes or with control characters",
                id(&a)
            ),
        );
    }

    #[test]
    fn json_layers_refuse_duplicates_unknown_fields_and_size() {
        let a = signer(1);
        let text = body(1, &[&a], 1, 1).to_json();
        let duplicated = text.replacen("\"version\": 1,", "\"version\": 1,\n  \"version\": 7,", 1);
        let bytes = serde_json::to_vec(&serde_json::json!({
            "trust_set": duplicated, "signatures": []
        }))
        .expect("json");
        let e = TrustSetFile::from_json(&bytes).expect_err("duplicate");
        assert!(
            e.to_string()
                .starts_with("trust set is not valid: duplicate field `version`"),
            "{e}"
        );
        let extra = br#"{"trust_set": "", "signatures": [], "note": 1}"#;
        let e = TrustSetFile::from_json(extra).expect_err("unknown field");
        assert!(
            e.to_string()
                .starts_with("trust-set file is not valid: unknown field `note`"),
            "{e}"
        );
        let dup_envelope = format!(
            r#"{{"trust_set": {t}, "trust_set": {t}, "signatures": []}}"#,
            t = serde_json::to_string(&text).expect("json")
        );
        let e = TrustSetFile::from_json(dup_envelope.as_bytes()).expect_err("duplicate");
        assert!(
            e.to_string()
                .starts_with("trust-set file is not valid: duplicate field `trust_set`"),
            "{e}"
        );
        let big = vec![b' '; spec::MAX_BYTES as usize + 1];
        assert_eq!(
            TrustSetFile::from_json(&big)
                .expect_err("too big")
                .to_string(),
            "trust-set file is 65537 bytes, over the limit of 65536 bytes"
        );
    }

    /// The caps hold at their limits and refuse one past them, a key is exactly 64 lowercase
    /// hex characters, a threshold set per kind reads back, and a parsed file keeps its
    /// signatures: each assertion kills a mutant the crate's tests missed (MUTANTS.md).
    #[test]
    fn caps_hold_at_their_limits_and_keys_are_exact_hex() {
        let keys: Vec<SigningKey> = (1..=spec::MAX_KEYS as u8 + 1).map(signer).collect();
        let refs: Vec<&SigningKey> = keys.iter().collect();
        TrustSetFile::unsigned(body(1, &refs[..spec::MAX_KEYS], 1, 1)).expect("32 keys");
        let e =
            TrustSetFile::from_json(&raw_file(&body(1, &refs, 1, 1), vec![])).expect_err("33 keys");
        assert_eq!(e.kind(), ErrorKind::TooLarge);
        assert_eq!(
            e.to_string(),
            "trust set lists 33 keys, over the limit of 32"
        );

        let mut long = body(1, &[&keys[0]], 1, 1);
        long.keys[0].comment = "a".repeat(spec::COMMENT_BYTES);
        TrustSetFile::unsigned(long.clone()).expect("a comment of 128 bytes");
        long.keys[0].comment.push('a');
        assert_eq!(
            TrustSetFile::from_json(&raw_file(&long, vec![]))
                .expect_err("129 bytes")
                .to_string(),
            format!(
                "trust set key {} has a comment over 128 bytes or with control characters",
                id(&keys[0])
            )
        );

        // A file of exactly the cap is read (and refused for what it holds, not its size).
        let at_cap = vec![b' '; spec::MAX_BYTES as usize];
        let e = TrustSetFile::from_json(&at_cap).expect_err("only spaces");
        assert_ne!(e.kind(), ErrorKind::TooLarge, "{e}");

        let text = body(1, &[&keys[0]], 1, 1).to_json();
        let hex = hex::encode(keys[0].verifying_key().to_bytes());
        assert!(text.contains(&hex));
        for (bad, what) in [
            (hex.to_uppercase(), "uppercase"),
            (hex[..62].to_string(), "short"),
            (format!("{hex}00"), "long"),
        ] {
            let file = serde_json::to_vec(&Envelope {
                trust_set: text.replace(&hex, &bad),
                signatures: vec![],
            })
            .expect("serializes");
            let e = TrustSetFile::from_json(&file).expect_err(what);
            assert!(
                e.to_string()
                    .contains("a public key must be 64 lowercase hex characters (32 bytes)"),
                "{what}: {e}"
            );
        }

        let mut thresholds = Thresholds {
            bundle: 1,
            feed: 1,
            tree_head: 1,
            trust_set: 1,
        };
        for (n, kind) in (10..).zip(DocumentKind::ALL) {
            thresholds.set(kind, n);
        }
        for (n, kind) in (10..).zip(DocumentKind::ALL) {
            assert_eq!(thresholds.get(kind), n, "{kind}");
        }

        let (a, b) = (signer(1), signer(2));
        let file =
            TrustSetFile::from_json(&signed(body(1, &[&a, &b], 1, 1), &[&a, &b])).expect("parses");
        let mut signed_by: Vec<KeyId> = file.signatures().iter().map(|s| s.key_id).collect();
        signed_by.sort();
        let mut expected = vec![id(&a), id(&b)];
        expected.sort();
        assert_eq!(signed_by, expected);
    }

    /// A file lists every key whatever its roles, sorts its signatures by what they are, and
    /// replacing a key's signature says whether it changed: each kills a mutant the crate's
    /// tests missed (MUTANTS.md).
    #[test]
    fn a_file_lists_its_keys_tallies_its_signatures_and_replaces_one_per_key() {
        let (a, b, c) = (signer(1), signer(2), signer(3));
        let mut set = body(1, &[&a, &b], 1, 1);
        set.keys[1].roles = vec![DocumentKind::Feed];
        let mut file = TrustSetFile::unsigned(set).expect("valid");
        let mut listed: Vec<KeyId> = file.all_keys().iter().map(PublicKey::id).collect();
        listed.sort();
        let mut both = vec![id(&a), id(&b)];
        both.sort();
        assert_eq!(listed, both);

        let by_a = sign_entry(&file, &a);
        assert!(file.insert_signature(by_a.clone()).expect("room"));
        assert!(
            !file.insert_signature(by_a.clone()).expect("room"),
            "the same signature again"
        );
        let other = SignatureEntry {
            key_id: id(&a),
            signature: [7; 64],
        };
        assert!(
            file.insert_signature(other).expect("room"),
            "a's signature replaced"
        );
        assert_eq!(file.signatures().len(), 1);
        assert_eq!(file.signatures()[0].signature, [7; 64]);
        assert!(file.insert_signature(by_a).expect("room"));
        file.insert_signature(sign_entry(&file, &c)).expect("room");

        let report = file.tally(&file.all_keys());
        assert_eq!(report.valid, vec![id(&a)]);
        assert!(report.invalid.is_empty());
        assert_eq!(report.untrusted, vec![id(&c)]);
    }

    /// At equal versions the set shipped with the app wins over the stored one: the stored
    /// copy only ever replaces it with a newer version (a mutant taking the stored set at an
    /// equal version went unnoticed).
    #[test]
    fn at_equal_versions_the_shipped_set_wins_and_thresholds_read_back() {
        let (a, b) = (signer(1), signer(2));
        let shipped = signed(body(4, &[&a], 1, 1), &[&a]);
        let stored = signed(body(4, &[&b], 1, 1), &[&b]);
        let set = TrustSet::resume(&shipped, Some(&stored), at(NOW)).expect("resumes");
        assert_eq!(set.version(), 4);
        assert_eq!(
            set.file().text().as_bytes(),
            TrustSetFile::from_json(&shipped)
                .expect("parses")
                .text()
                .as_bytes()
        );
        let (keys, _) = set.keys_for(DocumentKind::Bundle);
        assert_eq!(
            keys.iter().map(PublicKey::id).collect::<Vec<_>>(),
            vec![id(&a)]
        );

        // A threshold other than 1 reads back per kind (`threshold` returning 1 was missed).
        let two = signed(body(5, &[&a, &b], 2, 2), &[&a, &b]);
        let set = TrustSet::resume(&two, None, at(NOW)).expect("resumes");
        assert_eq!(set.threshold(DocumentKind::Bundle), 2);
        assert_eq!(set.threshold(DocumentKind::TrustSet), 2);
        assert_eq!(set.threshold(DocumentKind::Feed), 1);
    }

    #[test]
    fn attached_signatures_must_verify() {
        let (a, b) = (signer(1), signer(2));
        let file = TrustSetFile::unsigned(body(1, &[&a], 1, 1)).expect("valid");
        let good = a.sign(&file.signing_request()).to_bytes();
        let entry = SignatureEntry::verified(
            "trust set",
            &public(&a),
            context::TRUST_SET,
            file.text().as_bytes(),
            good,
        )
        .expect("verifies");
        assert_eq!(entry.key_id, id(&a));
        let e = SignatureEntry::verified(
            "trust set",
            &public(&b),
            context::TRUST_SET,
            file.text().as_bytes(),
            good,
        )
        .expect_err("wrong key");
        assert_eq!(
            e.to_string(),
            format!(
                "signature does not verify under key {} over this trust set",
                id(&b)
            )
        );
    }

    #[test]
    fn document_kinds_parse_and_print() {
        for kind in DocumentKind::ALL {
            assert_eq!(kind.name().parse::<DocumentKind>().expect("parses"), kind);
        }
        assert_eq!(
            "manifest"
                .parse::<DocumentKind>()
                .expect_err("not a kind")
                .to_string(),
            "'manifest' is not a document kind; use bundle, feed, tree_head or trust_set"
        );
    }

    #[test]
    fn verifier_takes_the_bundle_keys_and_threshold() {
        let (a, b, ci) = (signer(1), signer(2), signer(3));
        let mut set = body(1, &[&a, &b], 2, 1);
        set.keys.push(KeyEntry::new(
            &public(&ci),
            vec![DocumentKind::Feed],
            "ci runner",
        ));
        let trust = TrustSet::verify_initial(&signed(set, &[&a]), at(NOW)).expect("valid");
        let app = semver::Version::new(2, 3, 0);
        let verifier = crate::Verifier::from_trust_set(&trust, app.clone()).expect("verifier");
        assert_eq!(verifier.threshold(), 2);
        assert_eq!(
            verifier.keys().len(),
            2,
            "the feed-only key is not a bundle key"
        );
        for (threshold, expected) in [
            (
                0,
                "a threshold of 0 signature(s) is not usable with 2 trusted key(s); it must be from 1 to the number of trusted keys",
            ),
            (
                3,
                "a threshold of 3 signature(s) is not usable with 2 trusted key(s); it must be from 1 to the number of trusted keys",
            ),
        ] {
            let e = verifier
                .clone()
                .with_threshold(threshold)
                .expect_err("refused");
            assert_eq!(e.to_string(), expected);
        }
    }

    #[test]
    fn public_types_cross_threads() {
        fn assert_send_sync<T: Send + Sync>() {}
        assert_send_sync::<TrustSet>();
        assert_send_sync::<TrustSetFile>();
        assert_send_sync::<DocumentKind>();
    }
}
