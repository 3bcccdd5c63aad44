//! The release tree's audit ledger: what `publish` and `withdraw` append to `ledger/`, the
//! `ledger` object they put in the feed, and the consistency steps devices walk when they
//! missed appends. The auditor's commands (`ampoule ledger`) read what this writes.
//!
//! Order within one publish or withdraw, all under the tree lock: the ledger entry is appended
//! (its new tree head signed and committed) and the consistency step written, then the channel
//! history, then the feed. A crash therefore never leaves a feed naming a release whose publish
//! entry is not in the ledger. A crash after the append but before the feed leaves an entry no
//! feed ever carried; `ampoule ledger check` reports it as a warning ("no feed update"), since
//! the ledger then shows more than devices saw, never less. The next publish takes a sequence
//! above the ledger's too, so feed sequences in the ledger never repeat.

use std::path::{Path, PathBuf};

use ampoule_verify::bundle::Unverified;
use ampoule_verify::ledger::{self, ConsistencyStep, Entry, Event, FeedLedger, LEDGER_DIR};
use ampoule_verify::{Digest, KeyId};
use anyhow::{Context, Result};
use ed25519_dalek::SigningKey;

use crate::ledger::{ENTRIES, Ledger};
use crate::tree::write_atomic;

/// The ledger directory of the release tree at `root`.
pub fn ledger_dir(root: &Path) -> PathBuf {
    root.join(LEDGER_DIR)
}

/// Opens the tree's ledger, creating it on the first publish.
fn open_or_create(root: &Path) -> Result<Ledger> {
    let dir = ledger_dir(root);
    if dir.join(ENTRIES).is_file() {
        Ledger::open(&dir)
    } else {
        Ledger::create(&dir)
    }
}

/// The highest feed sequence the ledger logged for `channel` (0 if none), so that a publish
/// that crashed after its append never has its sequence reused.
pub fn last_sequence(root: &Path, channel: &str) -> Result<u64> {
    let dir = ledger_dir(root);
    if !dir.join(ENTRIES).is_file() {
        return Ok(0);
    }
    let ledger = Ledger::open(&dir)?;
    Ok(ledger
        .find_last(|e| e.channel == channel)?
        .and_then(|(_, bytes)| Entry::from_bytes(&bytes).ok())
        .map_or(0, |e| e.feed_sequence))
}

/// The digests and signers a withdraw entry logs for `sha256`: those of its publish entry on
/// `channel`, else read from the bundle file (a release published before the ledger existed).
pub fn withdrawn(root: &Path, channel: &str, sha256: &Digest) -> Result<(Digest, Vec<KeyId>)> {
    let dir = ledger_dir(root);
    if dir.join(ENTRIES).is_file() {
        let found = Ledger::open(&dir)?.find_last(|e| {
            e.event == Event::Publish && e.channel == channel && e.bundle_digest == *sha256
        })?;
        if let Some((_, bytes)) = found {
            let entry = Entry::from_bytes(&bytes)?;
            return Ok((entry.manifest_digest, entry.key_ids));
        }
    }
    let path = root
        .join(crate::tree::BUNDLES_DIR)
        .join(format!("{sha256}.{}", ampoule_verify::format::BUNDLE_EXTENSION));
    let bundle = Unverified::open(&path)
        .with_context(|| format!("cannot read the withdrawn bundle {}", path.display()))?;
    let mut ids: Vec<KeyId> = bundle
        .signatures
        .signatures
        .iter()
        .map(|s| s.key_id)
        .collect();
    ids.dedup();
    Ok((Digest::of(&bundle.layout.manifest), ids))
}

/// Appends `entry` to the tree's ledger under a tree head signed by every key of `keys`, writes
/// the consistency step from the previous head, and returns the feed's `ledger` object for
/// the release whose bundle is `named` on the entry's channel (its latest publish entry).
pub fn append(
    root: &Path,
    entry: &Entry,
    named: Option<&Digest>,
    keys: &[&SigningKey],
) -> Result<FeedLedger> {
    let mut ledger = open_or_create(root)?;
    repair_last_step(root, &ledger)?;
    let old_size = ledger.size();
    // A tree head never goes back in time, even if this machine's clock did.
    let time = ledger
        .tree_head()
        .map_or(entry.time, |h| h.head().time.max(entry.time));
    let index = ledger
        .append_entry(entry, keys, time)
        .context("cannot append to the release tree's ledger; the feed was not changed")?;
    let tree_head = ledger
        .tree_head()
        .cloned()
        .context("the ledger has no tree head right after an append")?;
    let new_size = tree_head.head().tree_size;
    let consistency = ledger.consistency_proof(old_size, new_size)?;
    if old_size > 0 {
        write_step(root, &tree_head, &consistency)?;
    }
    let (entry_text, inclusion) = match named {
        None => (None, None),
        Some(sha256) => {
            let found = if entry.event == Event::Publish && entry.bundle_digest == *sha256 {
                Some((index, ledger.entry(index)?))
            } else {
                ledger.find_last(|e| {
                    e.event == Event::Publish
                        && e.channel == entry.channel
                        && e.bundle_digest == *sha256
                })?
            };
            match found {
                Some((at, bytes)) => (
                    Some(String::from_utf8(bytes).context("a ledger entry is not UTF-8")?),
                    Some(ledger.inclusion_proof(at, new_size)?),
                ),
                // Published before the ledger existed: devices that require the ledger
                // refuse it, which is the truth about it.
                None => (None, None),
            }
        }
    };
    Ok(FeedLedger {
        tree_head,
        entry: entry_text,
        inclusion,
        consistency,
    })
}

fn write_step(
    root: &Path,
    tree_head: &ampoule_verify::merkle::SignedTreeHead,
    proof: &ampoule_verify::merkle::ConsistencyProof,
) -> Result<()> {
    let path = root.join(ledger::step_path(proof.old_size));
    let dir = path.parent().expect("a step path has a directory");
    std::fs::create_dir_all(dir)
        .with_context(|| format!("cannot create directory {}", dir.display()))?;
    let step = ConsistencyStep {
        tree_head: tree_head.clone(),
        proof: proof.clone(),
    };
    write_atomic(&path, &step.to_json())
}

/// Writes the step into the current head if a crash right after the last append lost it, so
/// that devices can always walk from any head the ledger ever had.
fn repair_last_step(root: &Path, ledger: &Ledger) -> Result<()> {
    let (Some(current), Some(previous)) = (ledger.tree_head(), ledger.previous_head()?) else {
        return Ok(());
    };
    let old_size = previous.head().tree_size;
    if root.join(ledger::step_path(old_size)).is_file() {
        return Ok(());
    }
    let proof = ledger.consistency_proof(old_size, current.head().tree_size)?;
    write_step(root, current, &proof)
}
