//! One signed-document type and one rule for counting its signatures, shared by the four
//! kinds of document this crate checks: the bundle manifest, the channel feed, the ledger's
//! signed tree head and the trust set.
//!
//! A kind is a type ([`kind::Manifest`], [`kind::Feed`], [`kind::TreeHead`],
//! [`kind::TrustSet`]) that carries its signing context and its size cap, so no caller passes
//! either by hand and a feed's keys cannot be used to check a manifest: [`Signers`] are typed
//! by the kind they may sign.
//!
//! # The rule
//!
//! A document counts as signed when at least `threshold` **distinct** key ids that hold the
//! kind's role each carry a signature that verifies strictly (Ed25519, RFC 8032, with
//! `verify_strict`) over the kind's context followed by the document's exact bytes.
//! Everything else in the signature list is ignored, not refused:
//!
//! - a signature by a key that is not trusted, or that is trusted only for other roles;
//! - a signature by a trusted key that does not verify (made over other bytes, under another
//!   kind's context, or simply garbage);
//! - a second signature by a key that already counted.
//!
//! Refusing the whole document on a bad signature by a trusted key would let anyone who can
//! alter an envelope (the web server, the network, a mirror) veto a document that enough real
//! keys signed, by appending one entry under a trusted key id. Ignoring it costs nothing: a
//! bad entry never counts towards the threshold. What was ignored is reported
//! ([`SignatureReport`]) and named in the refusal when the threshold is not met.

use std::collections::BTreeSet;
use std::fmt;
use std::marker::PhantomData;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

use crate::error::{Error, ErrorKind, Result};
use crate::format::keys::TrustedKeys;
use crate::format::signature::{SignatureEntry, SignatureReport};
use crate::format::{context, limit};

/// A kind of signed document, each with its own signing context and threshold.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum DocumentKind {
    /// A bundle (its manifest).
    Bundle,
    /// A channel feed.
    Feed,
    /// A ledger's signed tree head.
    TreeHead,
    /// A trust set.
    TrustSet,
}

impl DocumentKind {
    /// Every kind, in the order thresholds are written.
    pub const ALL: [DocumentKind; 4] = [
        DocumentKind::Bundle,
        DocumentKind::Feed,
        DocumentKind::TreeHead,
        DocumentKind::TrustSet,
    ];

    /// The kind's name in trust-set JSON (`bundle`, `feed`, `tree_head`, `trust_set`).
    pub fn name(self) -> &'static str {
        match self {
            DocumentKind::Bundle => "bundle",
            DocumentKind::Feed => "feed",
            DocumentKind::TreeHead => "tree_head",
            DocumentKind::TrustSet => "trust_set",
        }
    }

    /// The signing context of this kind (see [`crate::format::context`]).
    pub fn context(self) -> &'static [u8] {
        match self {
            DocumentKind::Bundle => context::MANIFEST,
            DocumentKind::Feed => context::FEED,
            DocumentKind::TreeHead => context::TREE_HEAD,
            DocumentKind::TrustSet => context::TRUST_SET,
        }
    }

    /// How messages name a document of this kind ("bundle", "tree head").
    pub fn described(self) -> &'static str {
        match self {
            DocumentKind::Bundle => "bundle",
            DocumentKind::Feed => "feed",
            DocumentKind::TreeHead => "tree head",
            DocumentKind::TrustSet => "trust set",
        }
    }
}

impl fmt::Display for DocumentKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for DocumentKind {
    type Err = Error;

    fn from_str(s: &str) -> Result<Self> {
        DocumentKind::ALL
            .into_iter()
            .find(|k| k.name() == s)
            .ok_or_else(|| {
                Error::new(
                    ErrorKind::TrustSet,
                    format!(
                        "'{}' is not a document kind; use bundle, feed, tree_head or trust_set",
                        s.chars().take(40).collect::<String>().escape_debug()
                    ),
                )
            })
    }
}

/// A kind of signed document as a type: its [`DocumentKind`] (and so its signing context and
/// role) and the largest signed document of the kind. Sealed: the four kinds are the format.
pub trait Kind: sealed::Sealed + Send + Sync + 'static {
    /// The kind's role and context.
    const KIND: DocumentKind;
    /// The largest signed document of this kind, in bytes, checked before any signature.
    const MAX_BYTES: u64;
}

mod sealed {
    pub trait Sealed {}
}

/// The four kinds as types.
pub mod kind {
    use super::{DocumentKind, Kind, sealed};
    use crate::format::{limit, trust_set};

    /// A bundle's manifest, signed under the context `ampoule-sig-v1:manifest`.
    #[derive(Debug, Clone, Copy)]
    pub struct Manifest;
    /// A channel feed's text, signed under the context `ampoule-sig-v1:feed`.
    #[derive(Debug, Clone, Copy)]
    pub struct Feed;
    /// A ledger tree head's signed form, under the context `ampoule-sig-v1:tree-head`.
    #[derive(Debug, Clone, Copy)]
    pub struct TreeHead;
    /// A trust set's text, signed under the context `ampoule-sig-v1:trust-set`.
    #[derive(Debug, Clone, Copy)]
    pub struct TrustSet;

    impl sealed::Sealed for Manifest {}
    impl sealed::Sealed for Feed {}
    impl sealed::Sealed for TreeHead {}
    impl sealed::Sealed for TrustSet {}

    impl Kind for Manifest {
        const KIND: DocumentKind = DocumentKind::Bundle;
        const MAX_BYTES: u64 = limit::MANIFEST_BYTES;
    }
    impl Kind for Feed {
        const KIND: DocumentKind = DocumentKind::Feed;
        const MAX_BYTES: u64 = limit::FEED_BYTES;
    }
    impl Kind for TreeHead {
        const KIND: DocumentKind = DocumentKind::TreeHead;
        const MAX_BYTES: u64 = limit::TREE_HEAD_BYTES;
    }
    impl Kind for TrustSet {
        const KIND: DocumentKind = DocumentKind::TrustSet;
        const MAX_BYTES: u64 = trust_set::MAX_BYTES;
    }
}

/// Who may sign documents of kind `K`, and how many of them must: the keys holding the role,
/// from a verified trust set or pinned in the app for this role alone.
pub struct Signers<K: Kind> {
    keys: TrustedKeys,
    threshold: usize,
    kind: PhantomData<K>,
}

impl<K: Kind> Clone for Signers<K> {
    fn clone(&self) -> Self {
        Signers {
            keys: self.keys.clone(),
            threshold: self.threshold,
            kind: PhantomData,
        }
    }
}

impl<K: Kind> fmt::Debug for Signers<K> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Signers")
            .field("kind", &K::KIND)
            .field("keys", &self.keys)
            .field("threshold", &self.threshold)
            .finish()
    }
}

impl<K: Kind> Signers<K> {
    /// `threshold` of `keys` must sign. Refuses an empty key set, a threshold of 0 (which
    /// would accept unsigned documents) and one above the number of keys (which nothing
    /// could meet).
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Key`] for an empty key set or an unusable threshold.
    pub fn new(keys: TrustedKeys, threshold: usize) -> Result<Self> {
        if keys.is_empty() {
            return Err(Error::new(
                ErrorKind::Key,
                format!(
                    "no trusted keys given for {} documents; at least one public key is needed",
                    K::KIND
                ),
            ));
        }
        if threshold == 0 || threshold > keys.len() {
            return Err(Error::new(
                ErrorKind::Key,
                format!(
                    "a threshold of {threshold} signature(s) is not usable with {} trusted \
                     key(s); it must be from 1 to the number of trusted keys",
                    keys.len()
                ),
            ));
        }
        Ok(Signers {
            keys,
            threshold,
            kind: PhantomData,
        })
    }

    /// These keys with another threshold (at least 1), for builders that cannot fail; a
    /// threshold above the number of keys then refuses every document.
    pub(crate) fn with_threshold(mut self, threshold: usize) -> Self {
        self.threshold = threshold.max(1);
        self
    }

    pub_for_release! {
        /// The keys whose signatures count.
        fn keys(&self) -> &TrustedKeys {
            &self.keys
        }
    }

    pub_for_release! {
        /// How many distinct keys must have signed.
        fn threshold(&self) -> usize {
            self.threshold
        }
    }
}

/// A document of kind `K` as carried: its exact signed bytes (without the context) and the
/// signatures that came with it. Making one checks the kind's caps; [`SignedDocument::check`]
/// applies the rule of this module.
pub struct SignedDocument<'a, K: Kind> {
    document: &'a [u8],
    signatures: &'a [SignatureEntry],
    kind: PhantomData<K>,
}

impl<'a, K: Kind> SignedDocument<'a, K> {
    /// Refuses a document over `K::MAX_BYTES` and more than [`limit::SIGNATURES`] signatures
    /// before anything is verified.
    pub fn new(document: &'a [u8], signatures: &'a [SignatureEntry]) -> Result<Self> {
        if document.len() as u64 > K::MAX_BYTES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "signed {} is {} bytes, over the limit of {} bytes",
                    K::KIND.described(),
                    document.len(),
                    K::MAX_BYTES
                ),
            ));
        }
        if signatures.len() > limit::SIGNATURES {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "{} carries {} signatures, over the limit of {}",
                    K::KIND.described(),
                    signatures.len(),
                    limit::SIGNATURES
                ),
            ));
        }
        Ok(SignedDocument {
            document,
            signatures,
            kind: PhantomData,
        })
    }

    /// Sorts every signature into valid, invalid or untrusted under `keys`, counting each
    /// key once; nothing is required. For tools that show who signed.
    pub fn tally(&self, keys: &TrustedKeys) -> SignatureReport {
        let context = K::KIND.context();
        let (mut valid, mut invalid, mut untrusted) =
            (BTreeSet::new(), BTreeSet::new(), BTreeSet::new());
        for sig in self.signatures {
            match keys.get(&sig.key_id) {
                Some(key) if key.verify(context, self.document, &sig.signature) => {
                    valid.insert(sig.key_id);
                }
                Some(_) => {
                    invalid.insert(sig.key_id);
                }
                None => {
                    untrusted.insert(sig.key_id);
                }
            }
        }
        // A key that made one good and one bad signature still counts as valid once.
        let invalid = invalid.difference(&valid).copied().collect();
        SignatureReport {
            valid: valid.into_iter().collect(),
            invalid,
            untrusted: untrusted.into_iter().collect(),
        }
    }

    /// Requires `signers.threshold()` distinct keys of `signers` to have signed (the rule in
    /// the module documentation). `what` names the document in the refusal ("bundle", "tree
    /// head of size 8").
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Signature`] when fewer keys signed validly; the message lists the valid,
    /// non-matching and untrusted signers.
    pub fn check(&self, signers: &Signers<K>, what: impl fmt::Display) -> Result<SignatureReport> {
        let report = self.tally(&signers.keys);
        let threshold = signers.threshold;
        if report.valid.len() >= threshold {
            return Ok(report);
        }
        let message = if self.signatures.is_empty() {
            format!("{what} is not signed; it needs a signature by a trusted key")
        } else if threshold == 1 {
            format!("{what} has no valid signature by a trusted key ({report})")
        } else {
            format!(
                "{what} has {} valid signature(s) by trusted keys but needs {threshold} ({report})",
                report.valid.len()
            )
        };
        Err(Error::new(ErrorKind::Signature, message))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn kinds_have_distinct_contexts_and_the_caps_of_the_format() {
        let contexts = [
            <kind::Manifest as Kind>::KIND.context(),
            <kind::Feed as Kind>::KIND.context(),
            <kind::TreeHead as Kind>::KIND.context(),
            <kind::TrustSet as Kind>::KIND.context(),
        ];
        for (i, a) in contexts.iter().enumerate() {
            for b in &contexts[i + 1..] {
                assert_ne!(a, b);
            }
        }
        assert_eq!(<kind::Manifest as Kind>::MAX_BYTES, limit::MANIFEST_BYTES);
        assert_eq!(
            <kind::TrustSet as Kind>::MAX_BYTES,
            crate::format::trust_set::MAX_BYTES
        );
    }

    #[test]
    fn signers_refuse_unusable_thresholds() {
        let key = crate::format::keys::PublicKey::from_raw(&[
            0xd7, 0x5a, 0x98, 0x01, 0x82, 0xb1, 0x0a, 0xb7, 0xd5, 0x4b, 0xfe, 0xd3, 0xc9, 0x64,
            0x07, 0x3a, 0x0e, 0xe1, 0x72, 0xf3, 0xda, 0xa6, 0x23, 0x25, 0xaf, 0x02, 0x1a, 0x68,
            0xf7, 0x07, 0x51, 0x1a,
        ])
        .expect("RFC 8032 section 7.1 TEST 1 public key");
        let keys: TrustedKeys = [key].into_iter().collect();
        assert!(Signers::<kind::Feed>::new(keys.clone(), 1).is_ok());
        for bad in [0, 2] {
            let err = Signers::<kind::Feed>::new(keys.clone(), bad).expect_err("threshold");
            assert_eq!(err.kind(), ErrorKind::Key);
        }
        let err = Signers::<kind::Feed>::new(TrustedKeys::new(), 1).expect_err("no keys");
        assert_eq!(
            err.to_string(),
            "no trusted keys given for feed documents; at least one public key is needed"
        );
        // Debug output (an app's logs) names the kind, the keys and the threshold.
        let shown = format!(
            "{:?}",
            Signers::<kind::TreeHead>::new(keys, 1).expect("signers")
        );
        assert!(
            shown.starts_with("Signers { kind: TreeHead, keys: "),
            "{shown}"
        );
        assert!(shown.ends_with(", threshold: 1 }"), "{shown}");
    }

    /// Why `SignedDocument::new` refused a document of kind `K`.
    fn refusal<K: Kind>(document: &[u8], signatures: &[SignatureEntry]) -> String {
        match SignedDocument::<K>::new(document, signatures) {
            Ok(_) => panic!("accepted"),
            Err(e) => e.to_string(),
        }
    }

    #[test]
    fn refusals_name_the_kind_of_document() {
        // Found by cargo-mutants (issue 15): no test read the kind's name in a refusal.
        let big = vec![b' '; limit::TREE_HEAD_BYTES as usize + 1];
        let err = refusal::<kind::TreeHead>(&big, &[]);
        assert!(err.starts_with("signed tree head is "), "{err}");
        let entry = SignatureEntry {
            key_id: crate::format::keys::KeyId::of_raw_key(&[7; 32]),
            signature: [0; 64],
        };
        let many = vec![entry; limit::SIGNATURES + 1];
        assert_eq!(
            refusal::<kind::TrustSet>(b"{}", &many),
            "trust set carries 33 signatures, over the limit of 32"
        );
        assert!(refusal::<kind::Manifest>(b"{}", &many).starts_with("bundle carries 33 "));
        assert!(refusal::<kind::Feed>(b"{}", &many).starts_with("feed carries 33 "));
    }
}
