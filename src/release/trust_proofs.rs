//! The release tree's `ledger/trust-sets/<tree size>.json` files: with every append, once the
//! tree has a trust set, the proofs that the newest trust-set entries are in the new tree head,
//! so that a device following several rotations at once proves each trust set it accepts was
//! logged in the ledger its feed proves (the format, and why it has this shape, is in
//! `ampoule_verify::format::trust_proofs`).
//!
//! Each file is written once, after its append, and never changed, like a consistency step.
//! What it proves comes from the file of the head before (each entry, the signed head its
//! append made, and its inclusion proof there, none of which change), plus the new entry when
//! it is a trust-set entry; only the consistency proofs to the new head are computed. Only when
//! that file is missing (a ledger written before these files existed, or a crash between an
//! append and this write) are the entries and the head log read through to find them. A tree
//! that never published a trust set gets none.

use std::collections::BTreeMap;
use std::io::{BufRead, BufReader};
use std::path::Path;

use ampoule_verify::format::tree::TRUST_DIR;
use ampoule_verify::format::trust_proofs::{self, MAX_SETS, TrustSetProof, TrustSetProofs};
use ampoule_verify::ledger::Record;
use ampoule_verify::merkle::SignedTreeHead;
use anyhow::{Context, Result, bail};

use crate::release::ledger_storage::{Ledger, TREE_HEADS};
use crate::release::tree_records::write_atomic;

/// What stays the same for a trust-set entry from one head's file to the next.
struct Logged {
    entry: String,
    tree_head: SignedTreeHead,
    inclusion: ampoule_verify::merkle::InclusionProof,
}

/// Writes the proofs file for `ledger`'s current head, which the append of `entry` (at
/// `index`, alone) made from the head of `old_size` entries.
pub fn write(root: &Path, ledger: &Ledger, old_size: u64, index: u64, entry: &[u8]) -> Result<()> {
    let is_trust_set = matches!(Record::from_bytes(entry), Ok(Record::TrustSet(_)));
    let before = std::fs::read(root.join(trust_proofs::path(old_size)))
        .ok()
        .and_then(|bytes| TrustSetProofs::from_json(&bytes).ok())
        .filter(|p| p.tree_size == old_size);
    let mut logged: Vec<Logged> = match before {
        Some(proofs) => proofs
            .trust_sets
            .into_iter()
            .map(|p| Logged {
                entry: p.entry,
                tree_head: p.tree_head,
                inclusion: p.inclusion,
            })
            .collect(),
        None if is_trust_set || root.join(TRUST_DIR).is_dir() => scan(ledger, old_size)?,
        None => return Ok(()),
    };
    let head = ledger
        .tree_head()
        .cloned()
        .context("the ledger has no tree head right after an append")?;
    let size = head.head().tree_size;
    if is_trust_set {
        logged.push(Logged {
            entry: String::from_utf8(entry.to_vec())
                .with_context(|| format!("ledger entry {index} is not UTF-8"))?,
            inclusion: ledger.inclusion_proof(index, size)?,
            tree_head: head,
        });
    }
    if logged.is_empty() {
        return Ok(());
    }
    let skip = logged.len().saturating_sub(MAX_SETS);
    let mut trust_sets = Vec::with_capacity(logged.len() - skip);
    for set in logged.into_iter().skip(skip) {
        let consistency = ledger.consistency_proof(set.tree_head.head().tree_size, size)?;
        trust_sets.push(TrustSetProof {
            entry: set.entry,
            tree_head: set.tree_head,
            inclusion: set.inclusion,
            consistency,
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

/// The trust-set entries among the first `size` entries, each with the signed head its append
/// made (the head of one more entry, from the head log), read through.
fn scan(ledger: &Ledger, size: u64) -> Result<Vec<Logged>> {
    let mut found = Vec::new();
    for item in ledger.entries()? {
        let (index, bytes) = item?;
        if index >= size {
            break;
        }
        if let Ok(Record::TrustSet(_)) = Record::from_bytes(&bytes) {
            found.push((index, bytes));
        }
    }
    if found.is_empty() {
        return Ok(Vec::new());
    }
    let mut wanted: BTreeMap<u64, Option<SignedTreeHead>> =
        found.iter().map(|(i, _)| (i + 1, None)).collect();
    let path = ledger.dir().join(TREE_HEADS);
    let log =
        std::fs::File::open(&path).with_context(|| format!("cannot read {}", path.display()))?;
    for line in BufReader::new(log).split(b'\n') {
        let line = line.with_context(|| format!("cannot read {}", path.display()))?;
        // A torn last line was never committed.
        let Ok(head) = SignedTreeHead::from_json(&line) else {
            continue;
        };
        if let Some(slot) = wanted.get_mut(&head.head().tree_size) {
            *slot = Some(head);
        }
    }
    let mut logged = Vec::with_capacity(found.len());
    for (index, bytes) in found {
        let Some(Some(tree_head)) = wanted.remove(&(index + 1)) else {
            bail!(
                "{} holds no tree head of size {}, the head that logged the trust-set entry {index}",
                path.display(),
                index + 1
            );
        };
        logged.push(Logged {
            entry: String::from_utf8(bytes)
                .with_context(|| format!("ledger entry {index} is not UTF-8"))?,
            inclusion: ledger.inclusion_proof(index, index + 1)?,
            tree_head,
        });
    }
    Ok(logged)
}
