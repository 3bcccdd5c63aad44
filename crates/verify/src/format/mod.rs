//! The one definition of the ampoule bundle format: entry names, size caps and signing contexts.
//!
//! The release-side writer and the device-side reader both take every name and limit from here,
//! so the two halves cannot drift apart. FORMAT.md at the repository root describes the same
//! format in prose for anyone writing a second reader.

// The documents of the format, each read strictly and within its caps. Nothing here checks a
// signature against trust or decides anything: that is `check/`, the layer above.
pub mod bundle;
pub mod chunks;
pub mod delta_file;
pub mod digest;
pub mod keys;
pub mod labels;
pub mod ledger_entry;
pub mod manifest;
pub mod merkle;
pub mod metadata;
pub mod model;
pub mod signature;
pub mod signed;
pub mod tar;
pub mod time;
pub mod trust_proofs;
// Generated tables (crates/verify/tools/unicode_tables.py), kept as written.
#[rustfmt::skip]
pub mod unicode;

/// The format version written into every manifest. Format 2 (issue 13) binds the payload by
/// the SHA-256 of each of its chunks ([`entry::CHUNKS`]), so a reader checks every chunk just
/// before the decoder sees it and hashing overlaps decoding; format 1 bound it by one SHA-256
/// of the whole payload, checked before decoding started. A reader reads both, and refuses
/// any other value.
pub const FORMAT_VERSION: u32 = 2;

/// The oldest manifest format a reader still reads: bundles packed before format 2 verify
/// and install as they always did.
pub const OLDEST_FORMAT_VERSION: u32 = 1;

/// The format version written into every feed. A reader also reads format 1, which is format
/// 2 without the release's `deltas`, and refuses any other value.
pub const FEED_FORMAT_VERSION: u32 = 2;

/// The file extension of a bundle (without the dot).
pub const BUNDLE_EXTENSION: &str = "ampoule";

/// The newest reading rules for model files (the manifest model object's `rules`): 1 is the
/// reader before issue 11 (ONNX initializers only, a dimension of -1 refused); 2 also counts
/// the weights of Constant nodes and of subgraphs and reads a dimension of -1 as unknown. `pack`
/// writes the oldest rules that read the model the same, so verifiers that know only rules 1
/// still install what reads alike; a device re-reads a model under the rules its manifest
/// names, and refuses rules it does not know.
pub const MODEL_READING_RULES: u32 = 2;

/// Names of the entries of the outer tar, in the only order a reader accepts.
pub mod entry {
    /// The manifest: UTF-8 JSON, the document every signature covers.
    pub const MANIFEST: &str = "manifest.json";
    /// The signatures over the manifest's exact bytes: UTF-8 JSON.
    pub const SIGNATURES: &str = "signatures.json";
    /// Format 2: the SHA-256 of each chunk of the payload entry, 32 raw bytes per chunk, in
    /// order; the manifest binds this entry by its own SHA-256 (`payload.chunks_sha256`).
    pub const CHUNKS: &str = "chunks.sha256";
    /// The zstd-compressed inner tar holding the model file and the label list.
    pub const PAYLOAD: &str = "payload.tar.zst";
    /// All outer entries of a bundle in the current format (2), in order.
    pub const OUTER: [&str; 4] = [MANIFEST, SIGNATURES, CHUNKS, PAYLOAD];
    /// All outer entries of a format 1 bundle, in order: no chunk list.
    pub const OUTER_FORMAT_1: [&str; 3] = [MANIFEST, SIGNATURES, PAYLOAD];
    /// The label list inside the payload: UTF-8, one label per line.
    pub const LABELS: &str = "labels.txt";
    /// The stem of the model file inside the payload; the extension of the packed file is kept.
    pub const MODEL_STEM: &str = "model";
}

/// Hard caps that hold whatever the app's own policy says; every length read from a bundle is
/// checked against one of these before anything is allocated.
pub mod limit {
    /// The manifest's largest size in bytes.
    pub const MANIFEST_BYTES: u64 = 64 * 1024;
    /// The signatures document's largest size in bytes.
    pub const SIGNATURES_BYTES: u64 = 64 * 1024;
    /// The most bytes before a bundle's payload: four 512-byte tar headers and the three
    /// small entries at their caps (274 KiB). A device downloads and checks this head
    /// (manifest, signatures, chunk list, policy, and the bundle's exact size, which follows
    /// from them) before it asks for the payload (issue 10).
    pub const HEAD_BYTES: u64 = 4 * 512 + MANIFEST_BYTES + SIGNATURES_BYTES + CHUNK_LIST_BYTES;
    /// Format 2: the smallest chunk of the inner tar (the decoded size of one chunk of the
    /// payload), as a power of two: 2^16 bytes = 64 KiB.
    pub const CHUNK_LOG_MIN: u32 = 16;
    /// Format 2: the largest chunk of the inner tar, as a power of two: 2^22 bytes = 4 MiB. A
    /// reader holds a few chunks at a time (compressed: one being checked, one queued, one
    /// being decoded; and their decoded bytes), so this bounds its memory whatever the
    /// payload's size. Writers use 512 KiB for inner tars up to 2 GiB.
    pub const CHUNK_LOG_MAX: u32 = 22;
    /// Format 2: the most chunks one payload may have. With chunks of 4 MiB, that covers the
    /// largest inner tar the format allows (16 GiB, more than a tar size field describes).
    pub const CHUNKS: u64 = 4096;
    /// Format 2: the largest chunk list ([`super::entry::CHUNKS`]): 36 bytes per chunk.
    pub const CHUNK_LIST_BYTES: u64 = CHUNKS * 36;
    /// The most signatures one bundle may carry.
    pub const SIGNATURES: usize = 32;
    /// The zstd window the decoder accepts, as a power of two: 2^23 bytes = 8 MiB.
    pub const WINDOW_LOG: u32 = 23;
    /// The longest model-file extension (after `model.`), in ASCII letters and digits.
    pub const MODEL_EXTENSION_CHARS: usize = 16;
    /// The longest bundle name, in bytes.
    pub const NAME_BYTES: usize = 64;
    /// The most labels a label list may hold.
    pub const LABELS: usize = 100_000;
    /// The longest single label, in bytes.
    pub const LABEL_BYTES: usize = 256;
    /// The largest label file, in bytes; it is read into memory to be checked.
    pub const LABELS_FILE_BYTES: u64 = 4 * 1024 * 1024;
    /// The largest bundle a tar size field can describe in ustar octal (11 digits).
    pub const TAR_ENTRY_BYTES: u64 = 0o77777777777;
    /// The largest feed document (envelope and signatures included), in bytes. A device
    /// stops reading a feed at this size.
    pub const FEED_BYTES: u64 = 64 * 1024;
    /// The most mirrors one feed may list for its release.
    pub const MIRRORS: usize = 8;
    /// The longest URL or relative path a feed may hold, in bytes.
    pub const URL_BYTES: usize = 2048;
    /// The largest signed tree head (head and signatures, as JSON), in bytes.
    pub const TREE_HEAD_BYTES: u64 = 16 * 1024;
    /// The largest `metadata` object of a manifest, in bytes of its compact JSON (no white
    /// space; what `serde_json::to_vec` writes). It counts toward [`MANIFEST_BYTES`] too,
    /// where it is stored pretty-printed.
    pub const METADATA_BYTES: usize = 16 * 1024;
    /// The deepest `metadata` object: the object itself is level 1, and each object or array
    /// inside adds one, so a key has at most 8 segments (`a.b.c.d.e.f.g.h`).
    pub const METADATA_DEPTH: usize = 8;
    /// The longest segment of a metadata key (`[a-z0-9_]`, at least one byte), in bytes.
    pub const METADATA_KEY_BYTES: usize = 64;
}

/// Deltas (issue 13): a way to send a full release to a device that holds an older one. A
/// delta carries the release's manifest and signatures exactly as the bundle signers made
/// them, and patches that rebuild the release's files from the base release's files, chunk
/// by chunk, so that applying one needs a fixed amount of memory whatever the model's size.
/// The layout and the patch records are in [`crate::format::delta_file`].
pub mod delta {
    use super::entry;

    /// The file extension of a delta (without the dot).
    pub const EXTENSION: &str = "ampoule-delta";
    /// The format version in the header entry; a reader refuses any other value.
    pub const FORMAT_VERSION: u32 = 1;
    /// The first entry: the delta's own header (JSON), which names the base by its files.
    pub const HEADER: &str = "delta.json";
    /// The last entry: the patch records, one per chunk of the rebuilt files.
    pub const PATCHES: &str = "patches.bin";
    /// All outer entries in order: header, the carried manifest and signatures, patches.
    pub const OUTER: [&str; 4] = [HEADER, entry::MANIFEST, entry::SIGNATURES, PATCHES];
    /// The largest header entry, in bytes.
    pub const HEADER_BYTES: u64 = 16 * 1024;
    /// The largest chunk of a rebuilt file one record may produce: 4 MiB.
    pub const CHUNK_BYTES: u32 = 4 * 1024 * 1024;
    /// The largest window of a base file one record may refer to: 8 MiB. With the chunk, the
    /// record's compressed bytes and the decoder, applying a delta needs about 17 MiB
    /// whatever the model's size.
    pub const WINDOW_BYTES: u32 = 8 * 1024 * 1024;
    /// The largest compressed patch of one record: a chunk that does not compress at all,
    /// plus zstd's frame overhead (well under 1/128 of the chunk, RFC 8878 section 3.1.1.2).
    pub const PATCH_BYTES: u32 = CHUNK_BYTES + CHUNK_BYTES / 128;
    /// The zstd window a patch frame may declare, as a power of two: 2^24 bytes covers the
    /// reference window and the chunk together. Frames are decoded whole into a buffer of the
    /// chunk's size, so this bounds what the frame may ask for, not memory the decoder takes.
    pub const WINDOW_LOG: u32 = 24;
    /// The size of one record's fixed header in [`PATCHES`].
    pub const RECORD_BYTES: usize = 24;
    /// The domain string hashed ahead of the base's file list to name the base by one digest
    /// (the `base` of a delta in a feed or ledger entry).
    pub const BASE_DOMAIN: &[u8] = b"ampoule-delta-base-v1\n";
}

/// The domain string hashed ahead of a device id and a bundle digest to place a device in or
/// out of a rollout, so that the same ids give unrelated answers in any other use of SHA-256.
pub const ROLLOUT_DOMAIN: &[u8] = b"ampoule-rollout-v1\n";

/// Domain-separation contexts: each signature covers `context || document bytes`, so a
/// signature made for one kind of document can never verify as another kind.
///
/// Every context has the form `ampoule-sig-v1:<kind>` followed by a newline. The documents
/// signed are JSON objects beginning with `{`, so no context is a prefix of another's input.
pub mod context {
    /// Signatures over a bundle manifest.
    pub const MANIFEST: &[u8] = b"ampoule-sig-v1:manifest\n";
    /// Signatures over a channel feed.
    pub const FEED: &[u8] = b"ampoule-sig-v1:feed\n";
    /// Signatures over a ledger's signed tree head.
    pub const TREE_HEAD: &[u8] = b"ampoule-sig-v1:tree-head\n";
    /// Signatures over a trust set.
    pub const TRUST_SET: &[u8] = b"ampoule-sig-v1:trust-set\n";
}

/// Trust sets: the signed list of keys allowed to sign each document kind, with thresholds.
pub mod trust_set {
    /// The format version written into every trust set; a reader refuses any other value.
    pub const FORMAT_VERSION: u32 = 1;
    /// The largest trust-set file (envelope and signatures included), in bytes.
    pub const MAX_BYTES: u64 = 64 * 1024;
    /// The most keys one trust set may list.
    pub const MAX_KEYS: usize = 32;
    /// The longest comment on a key, in bytes.
    pub const COMMENT_BYTES: usize = 128;
    /// The most trust-set versions a device follows in one update, from its own to the one
    /// a feed names, each accepted as the successor of the one before: enough for years of
    /// rotations by a device left in a drawer, yet a bound on what a server can make it
    /// fetch. A device further behind needs an app that ships a newer trust set.
    pub const MAX_WALK: u64 = 32;

    /// Where trust set `version` is, relative to a feed's URL (`feeds/<channel>.json`):
    /// `../trust/<version>.json`.
    pub fn reference(version: u64) -> String {
        format!("../{}/{version}.json", super::tree::TRUST_DIR)
    }
}

/// The directories of a release tree that devices read, relative to its root. The release
/// side writes them; an offline file ([`offline`]) names its entries after them.
pub mod tree {
    /// Each channel's signed feed, `feeds/<channel>.json`.
    pub const FEEDS_DIR: &str = "feeds";
    /// Every bundle published, `bundles/<sha256>.ampoule`, named by the file's SHA-256.
    pub const BUNDLES_DIR: &str = "bundles";
    /// Every trust set published, `trust/<version>.json`.
    pub const TRUST_DIR: &str = "trust";
}

/// Offline files (`.ampoule-offline`): what a device would have fetched for one update of one
/// channel, in one ustar archive, for a technician to carry on an SD card.
///
/// Entries are named by their paths in the release tree, so a reference in the feed resolved
/// against [`offline::feed_url`] names an entry (see [`offline::entry_of_url`]). In order:
/// [`offline::HEADER`], the channel's feed, the trust set the feed names (if any) with the
/// versions before it by ascending version (at most [`trust_set::MAX_WALK`] in all), the
/// ledger's trust-set proofs for the feed's head ([`trust_proofs`]), the ledger's consistency
/// steps in ascending size (any number up to
/// [`crate::format::ledger_entry::MAX_STEPS`]), and the bundle the feed offers (if any).
pub mod offline {
    use serde::{Deserialize, Serialize};

    use crate::format::digest::Digest;

    /// The file extension of an offline file (without the dot).
    pub const EXTENSION: &str = "ampoule-offline";
    /// The format version in [`HEADER`]; a reader refuses any other value.
    pub const FORMAT_VERSION: u32 = 1;
    /// The first entry: `{"format":1,"channel":"<name>"}`, which says what the file is.
    pub const HEADER: &str = "offline.json";
    /// The largest [`HEADER`] entry, in bytes.
    pub const HEADER_BYTES: u64 = 1024;
    /// The base URL the device reads the file's feed under. `.invalid` is reserved (RFC 6761
    /// section 6.4), so nothing here can ever reach a network: a reference that resolves
    /// outside the file's entries finds nothing.
    pub const BASE_URL: &str = "https://offline.invalid/";

    /// What [`HEADER`] holds, in this field order; unknown fields and duplicate keys are
    /// refused.
    #[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
    #[serde(deny_unknown_fields)]
    pub struct Header {
        /// Always [`FORMAT_VERSION`].
        pub format: u32,
        /// The channel whose feed the file carries.
        pub channel: String,
    }

    impl Header {
        /// The header of an offline file for `channel`.
        pub fn new(channel: impl Into<String>) -> Header {
            Header {
                format: FORMAT_VERSION,
                channel: channel.into(),
            }
        }

        /// The entry's bytes as the writer writes them: compact JSON, no final newline.
        pub fn to_json(&self) -> String {
            serde_json::to_string(self).expect("a header of a number and a string serializes")
        }
    }

    /// The feed's entry: `feeds/<channel>.json`.
    pub fn feed_entry(channel: &str) -> String {
        format!("{}/{channel}.json", super::tree::FEEDS_DIR)
    }

    /// The trust set's entry: `trust/<version>.json`.
    pub fn trust_set_entry(version: u64) -> String {
        format!("{}/{version}.json", super::tree::TRUST_DIR)
    }

    /// A consistency step's entry: `ledger/consistency/<old size>.json`.
    pub fn step_entry(old_size: u64) -> String {
        crate::format::ledger_entry::step_path(old_size)
    }

    /// The bundle's entry, by the SHA-256 of the whole bundle file the feed declares:
    /// `bundles/<sha256>.ampoule`.
    pub fn bundle_entry(sha256: &Digest) -> String {
        format!(
            "{}/{sha256}.{}",
            super::tree::BUNDLES_DIR,
            super::BUNDLE_EXTENSION
        )
    }

    /// The URL a device reads the feed of `channel` under.
    pub fn feed_url(channel: &str) -> String {
        format!("{BASE_URL}{}", feed_entry(channel))
    }

    /// The entry name a resolved URL stands for; `None` for a URL outside [`BASE_URL`].
    pub fn entry_of_url(url: &str) -> Option<&str> {
        url.strip_prefix(BASE_URL).filter(|name| !name.is_empty())
    }
}

/// The app's policy document (issue 14): its compatibility policy, the bundle name it runs and
/// its size limits as one JSON file that the C interface and the CLI's `--policy` read (FORMAT.md,
/// "The policy document"). The app writes it, but it is parsed as strictly as anything
/// untrusted, within these caps, since a C caller may hand over any bytes.
pub mod policy_document {
    /// The document format this reader knows (`"policy_format"`); any other value is refused.
    pub const FORMAT_VERSION: u64 = 1;
    /// The largest document, in bytes.
    pub const BYTES: usize = 64 * 1024;
    /// The deepest nesting of arrays and objects (the document itself is depth 1).
    pub const DEPTH: usize = 8;
    /// The longest string, key or value, in bytes.
    pub const STRING_BYTES: usize = 1024;
    /// The most members of one object or items of one array.
    pub const ITEMS: usize = 1024;
    /// The most inputs, and the most outputs, a document states.
    pub const TENSORS: usize = 64;
    /// The most metadata requirements.
    pub const METADATA: usize = 64;
}

/// The bytes a signer signs: the context followed by the document.
pub fn signed_bytes(context: &[u8], document: &[u8]) -> Vec<u8> {
    let mut bytes = Vec::with_capacity(context.len() + document.len());
    bytes.extend_from_slice(context);
    bytes.extend_from_slice(document);
    bytes
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn contexts_are_distinct_and_none_prefixes_another() {
        let all = [
            context::MANIFEST,
            context::FEED,
            context::TREE_HEAD,
            context::TRUST_SET,
        ];
        for (i, a) in all.iter().enumerate() {
            for (j, b) in all.iter().enumerate() {
                if i != j {
                    assert!(!b.starts_with(a), "{a:?} prefixes {b:?}");
                }
            }
        }
    }
}
