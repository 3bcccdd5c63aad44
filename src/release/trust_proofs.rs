//! The release tree's `ledger/trust-sets/<tree size>.json` files: with every append, the
//! inclusion proofs of the newest trust-set entries against the new tree head, so that a
//! device following several rotations at once proves each trust set it accepts was logged in
//! the ledger its feed proves (the format is in `ampoule_verify::format::trust_proofs`).
//!
//! Each file is written once, after its append, and never changed, like a consistency step.
//! Which entries it proves comes from the file of the head before (their leaf indices), plus
//! the new entry when it is a trust-set entry; only when that file is missing (a ledger
//! written before these files existed, or a crash between an append and this write) is the
//! ledger read through to find them. A tree that never published a trust set gets none.

use std::path::Path;

use ampoule_verify::format::tree::TRUST_DIR;
use ampoule_verify::format::trust_proofs::{self, MAX_SETS, TrustSetProof, TrustSetProofs};
use ampoule_verify::ledger::Record;
use anyhow::{Context, Result};

use crate::release::ledger_storage::Ledger;
use crate::release::tree_records::write_atomic;

/// Writes the proofs file for `ledger`'s current head, which the append of `entry` (at
/// `index`) made from the head of `old_size` entries.
pub fn write(root: &Path, ledger: &Ledger, old_size: u64, index: u64, entry: &[u8]) -> Result<()> {
    let is_trust_set = matches!(Record::from_bytes(entry), Ok(Record::TrustSet(_)));
    let before = std::fs::read(root.join(trust_proofs::path(old_size)))
        .ok()
        .and_then(|bytes| TrustSetProofs::from_json(&bytes).ok())
        .filter(|p| p.tree_size == old_size);
    let mut indices: Vec<u64> = match before {
        Some(proofs) => proofs
            .trust_sets
            .iter()
            .map(|p| p.inclusion.leaf_index)
            .filter(|&i| i < old_size)
            .collect(),
        None if is_trust_set || root.join(TRUST_DIR).is_dir() => scan(ledger, old_size)?,
        None => return Ok(()),
    };
    if is_trust_set {
        indices.push(index);
    }
    if indices.is_empty() {
        return Ok(());
    }
    let skip = indices.len().saturating_sub(MAX_SETS);
    let size = ledger.size();
    let mut trust_sets = Vec::with_capacity(indices.len() - skip);
    for &i in &indices[skip..] {
        let text = String::from_utf8(ledger.entry(i)?)
            .with_context(|| format!("ledger entry {i} is not UTF-8"))?;
        trust_sets.push(TrustSetProof {
            entry: text,
            inclusion: ledger.inclusion_proof(i, size)?,
        });
    }
    let path = root.join(trust_proofs::path(size));
    let dir = path.parent().expect("a proofs path has a directory");
    std::fs::create_dir_all(dir)
        .with_context(|| format!("cannot create directory {}", dir.display()))?;
    let file = TrustSetProofs {
        tree_size: size,
        trust_sets,
    };
    write_atomic(&path, &file.to_json())
}

/// The indices of the trust-set entries among the first `size` entries, read through.
fn scan(ledger: &Ledger, size: u64) -> Result<Vec<u64>> {
    let mut found = Vec::new();
    for item in ledger.entries()? {
        let (index, bytes) = item?;
        if index >= size {
            break;
        }
        if let Ok(Record::TrustSet(_)) = Record::from_bytes(&bytes) {
            found.push(index);
        }
    }
    Ok(found)
}
