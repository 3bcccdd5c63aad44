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
use ampoule_verify::format::delta_file::base_id;
use ampoule_verify::format::{context, signed_bytes};
use ampoule_verify::ledger::{
    self, ConsistencyStep, Entry, Event, FeedLedger, LEDGER_DIR, Record, TrustSetEntry,
};
use ampoule_verify::merkle::{ConsistencyProof, SignedTreeHead, TreeHead};
use ampoule_verify::signature::SignatureEntry;
use ampoule_verify::{Digest, KeyId, PublicKey};
use anyhow::{Context, Result};
use ed25519_dalek::SigningKey;

use crate::failure::count;
use crate::release::ledger_storage::{ENTRIES, Ledger};
use crate::release::tree_records::write_atomic;

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

/// The checks an append of `entry` under a tree head signed by `keys` makes before it writes,
/// for a dry run: the entry's bytes, the keys, and a ledger that opens. Returns the index the
/// entry would get. Writes nothing, and makes no ledger where there is none.
pub fn preview(root: &Path, entry: &Entry, keys: &[&SigningKey]) -> Result<u64> {
    crate::release::ledger_storage::check_signing_keys(keys)?;
    let dir = ledger_dir(root);
    let size = if dir.join(ENTRIES).is_file() {
        Ledger::open(&dir)?.size()
    } else {
        0
    };
    crate::release::ledger_storage::check_entry(size, &entry.to_bytes())?;
    Ok(size)
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
        .join(crate::release::tree_records::BUNDLES_DIR)
        .join(format!(
            "{sha256}.{}",
            ampoule_verify::format::BUNDLE_EXTENSION
        ));
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

/// A tree-head signer outside this process (issue 10 item 3): a command, run with `sh -c`, that
/// reads the exact bytes to sign on stdin (the tree-head context and the head's canonical form,
/// as `sign --export-request` writes them for bundles) and writes the raw 64-byte Ed25519
/// signature on stdout, as `openssl pkeyutl -sign -rawin` does. It also finds the entry
/// appended under the head in `AMPOULE_LEDGER_ENTRY` and the head's size in
/// `AMPOULE_TREE_SIZE`, to check or log before it signs. The key stays wherever the command
/// reaches (a signing service, a hardware token); this process sees only the signature, which
/// is verified under `key` before the head is committed.
pub struct OutsideHeadSigner {
    /// The command line, run with `sh -c`.
    pub command: String,
    /// The public key its signatures must verify under.
    pub key: PublicKey,
}

impl OutsideHeadSigner {
    /// Runs the command for `head`, the head over `entry`; a failure appends nothing.
    pub fn sign(&self, head: &TreeHead, entry: &[u8]) -> Result<SignatureEntry> {
        use std::io::{Read, Write};
        use std::process::{Command, Stdio};
        let document = head.signed_document();
        let request = signed_bytes(context::TREE_HEAD, &document);
        let what = format!("the tree-head signer '{}'", self.command);
        let mut child = Command::new("sh")
            .arg("-c")
            .arg(&self.command)
            .env(
                "AMPOULE_LEDGER_ENTRY",
                String::from_utf8_lossy(entry).as_ref(),
            )
            .env("AMPOULE_TREE_SIZE", head.tree_size.to_string())
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .spawn()
            .with_context(|| format!("cannot start {what}"))?;
        let mut stdin = child.stdin.take().context("the signer's stdin")?;
        let written = stdin.write_all(&request);
        drop(stdin);
        let mut signature = Vec::new();
        let read = child
            .stdout
            .take()
            .context("the signer's stdout")?
            .take(65)
            .read_to_end(&mut signature);
        let status = child
            .wait()
            .with_context(|| format!("cannot wait for {what}"))?;
        if !status.success() {
            anyhow::bail!("{what} failed ({status}); nothing was appended and no feed was changed");
        }
        written.with_context(|| format!("cannot write the request to {what}"))?;
        read.with_context(|| format!("cannot read the signature from {what}"))?;
        let signature = <[u8; 64]>::try_from(signature.as_slice()).map_err(|_| {
            anyhow::anyhow!(
                "{what} wrote {} bytes; it must write the raw 64-byte Ed25519 signature (as \
                 'openssl pkeyutl -sign -rawin' does); nothing was appended",
                signature.len()
            )
        })?;
        SignatureEntry::verified(
            "tree head",
            &self.key,
            context::TREE_HEAD,
            &document,
            signature,
        )
        .map_err(|e| {
            crate::Refused(format!(
                "{e}: {what} did not sign this tree head with the key given for it ({}); \
                     nothing was appended",
                self.key.id()
            ))
            .into()
        })
    }
}

/// Appends the entry of a trust-set publish, before the feeds it renews are signed again.
pub fn append_trust_set(
    root: &Path,
    entry: &TrustSetEntry,
    keys: &[&SigningKey],
    outside: &[OutsideHeadSigner],
) -> Result<()> {
    append_bytes(root, &entry.to_bytes(), entry.time, keys, outside).context(
        "cannot append to the release tree's ledger; no feed was renewed for the new trust set",
    )?;
    Ok(())
}

/// Appends one entry under a new tree head and writes the consistency step to it; returns the
/// ledger, the entry's index, the new head and the proof from the head before.
fn append_bytes(
    root: &Path,
    bytes: &[u8],
    entry_time: u64,
    keys: &[&SigningKey],
    outside: &[OutsideHeadSigner],
) -> Result<(Ledger, u64, SignedTreeHead, ConsistencyProof)> {
    let mut ledger = open_or_create(root)?;
    repair_last_step(root, &ledger)?;
    let old_size = ledger.size();
    // A tree head never goes back in time, even if this machine's clock did.
    let time = ledger
        .tree_head()
        .map_or(entry_time, |h| h.head().time.max(entry_time));
    let index = if outside.is_empty() {
        ledger.append(bytes, keys, time)?
    } else {
        let mut ids: Vec<KeyId> = keys
            .iter()
            .map(|k| KeyId::of_raw_key(k.verifying_key().as_bytes()))
            .collect();
        for signer in outside {
            anyhow::ensure!(
                !ids.contains(&signer.key.id()),
                "the tree-head signer's key {} also signs here; give each outside signer a key \
                 of its own",
                signer.key.id()
            );
            ids.push(signer.key.id());
        }
        ledger.append_with_outside(
            bytes,
            keys,
            &|head| outside.iter().map(|s| s.sign(head, bytes)).collect(),
            time,
        )?
    };
    let tree_head = ledger
        .tree_head()
        .cloned()
        .context("the ledger has no tree head right after an append")?;
    let consistency = ledger.consistency_proof(old_size, tree_head.head().tree_size)?;
    if old_size > 0 {
        write_step(root, &tree_head, &consistency)?;
    }
    // Devices following several trust-set rotations prove each set against this head.
    crate::release::trust_proofs::write(root, &ledger, old_size, index, bytes)?;
    Ok((ledger, index, tree_head, consistency))
}

/// Appends `entry` to the tree's ledger under a tree head signed by every key of `keys`, writes
/// the consistency step from the previous head, and returns the feed's `ledger` object: the
/// new head, `entry` itself (the head's last leaf) and its inclusion proof. Every feed carries
/// the entry its own change appended, so a device can check that the feed is its channel's
/// newest logged state (FORMAT.md, "The feed's ledger entry").
pub fn append(
    root: &Path,
    entry: &Entry,
    keys: &[&SigningKey],
    outside: &[OutsideHeadSigner],
) -> Result<FeedLedger> {
    let bytes = entry.to_bytes();
    let (ledger, index, tree_head, consistency) =
        append_bytes(root, &bytes, entry.time, keys, outside)
            .context("cannot append to the release tree's ledger; the feed was not changed")?;
    let inclusion = ledger.inclusion_proof(index, tree_head.head().tree_size)?;
    Ok(FeedLedger {
        tree_head,
        entry: Some(String::from_utf8(bytes).context("a ledger entry is not UTF-8")?),
        inclusion: Some(inclusion),
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

/// What `ampoule ledger check` found.
#[derive(Debug, Default)]
pub struct AuditReport {
    /// Entries in the ledger.
    pub tree_size: u64,
    /// The root they hash to (the current tree head's).
    pub root_hash: Option<Digest>,
    /// Tree heads whose signatures, roots and consistency steps were checked.
    pub heads_checked: u64,
    /// Distinct bundle files checked against the entries.
    pub bundles_checked: u64,
    /// Distinct logged deltas checked against the tree (issue 13).
    pub deltas_checked: u64,
    /// Of those, the ones rebuilt from their base bundle and found to give the release's files.
    pub deltas_rebuilt: u64,
    /// Whether a saved older tree head was proven to be a prefix of the current one.
    pub since: Option<u64>,
    /// Each a reason to distrust the ledger or the tree.
    pub problems: Vec<String>,
    /// Each worth a look, none a sign of tampering.
    pub warnings: Vec<String>,
}

/// Checks the tree's ledger: every hash recomputed, every logged tree head signed as `heads`
/// requires and consistent with the one before it (through the served consistency steps), the
/// current head consistent with `since`, and every entry against the tree: version reuse with
/// different content, feed-sequence gaps, bundle files missing or different, entries no feed
/// carried, trust-set files missing or different. `keys` are the tree-head keys for the stored-hash pass (threshold checked by `heads`).
pub fn check(
    root: &Path,
    keys: &ampoule_verify::TrustedKeys,
    heads: &ampoule_verify::ledger::LedgerVerifier,
    since: Option<&ampoule_verify::merkle::SignedTreeHead>,
) -> Result<AuditReport> {
    let mut report = AuditReport::default();
    let ledger = match Ledger::open(&ledger_dir(root)) {
        Ok(ledger) => ledger,
        Err(e) => {
            report.problems.push(format!("{e:#}"));
            return Ok(report);
        }
    };
    report.tree_size = ledger.size();
    report.root_hash = ledger.tree_head().map(|h| h.head().root_hash);
    match ledger.check(keys) {
        Ok(checked) => {
            if !checked.head_logged {
                report.warnings.push(
                    "the current tree head is not in tree-heads.jsonl yet (an append stopped \
                     before logging it; the next append logs it)"
                        .into(),
                );
            }
            if checked.uncommitted_bytes > 0 {
                report.warnings.push(format!(
                    "{} bytes beyond the current tree head are left from an interrupted append \
                     (never part of the ledger; the next append removes them)",
                    checked.uncommitted_bytes
                ));
            }
        }
        Err(e) => report.problems.push(format!("{e:#}")),
    }
    check_heads(root, &ledger, heads, &mut report)?;
    if let (Some(saved), Some(current)) = (since, ledger.tree_head()) {
        check_since(&ledger, saved, current, heads, &mut report);
    } else if let Some(saved) = since {
        report.problems.push(format!(
            "the saved tree head has size {}, but the ledger is empty: its history was removed",
            saved.head().tree_size
        ));
    }
    check_entries(root, &ledger, &mut report)?;
    Ok(report)
}

fn check_since(
    ledger: &Ledger,
    saved: &ampoule_verify::merkle::SignedTreeHead,
    current: &ampoule_verify::merkle::SignedTreeHead,
    heads: &ampoule_verify::ledger::LedgerVerifier,
    report: &mut AuditReport,
) {
    let (old, new) = (saved.head(), current.head());
    if let Err(e) = heads.verify_head(saved) {
        report
            .problems
            .push(format!("the saved tree head is not validly signed: {e}"));
        return;
    }
    if old.tree_size > new.tree_size {
        report.problems.push(format!(
            "the ledger has {}, fewer than the {} of the saved tree head: its history was \
             trimmed",
            count(new.tree_size, "entry", "entries"),
            old.tree_size
        ));
        return;
    }
    let proven = ledger
        .consistency_proof(old.tree_size, new.tree_size)
        .map_err(|e| format!("{e:#}"))
        .and_then(|proof| proof.verify(&old, &new).map_err(|e| e.to_string()));
    match proven {
        Ok(()) => report.since = Some(old.tree_size),
        Err(e) => report.problems.push(format!(
            "the current tree head (size {}) is not consistent with the saved tree head of size \
             {}: the history was rewritten ({e})",
            new.tree_size, old.tree_size
        )),
    }
}

/// Each logged head: signed as `heads` requires, and reached from the one before it by the
/// consistency step the tree serves for devices.
fn check_heads(
    root: &Path,
    ledger: &Ledger,
    heads: &ampoule_verify::ledger::LedgerVerifier,
    report: &mut AuditReport,
) -> Result<()> {
    let path = ledger
        .dir()
        .join(crate::release::ledger_storage::TREE_HEADS);
    let text = match std::fs::read(&path) {
        Ok(text) => text,
        Err(e) => {
            report
                .problems
                .push(format!("cannot read {}: {e}", path.display()));
            return Ok(());
        }
    };
    let mut previous: Option<ampoule_verify::merkle::TreeHead> = None;
    for (number, line) in text.split(|&b| b == b'\n').enumerate() {
        if line.is_empty() {
            continue;
        }
        let Ok(signed) = ampoule_verify::merkle::SignedTreeHead::from_json(line) else {
            // The stored-hash pass names a damaged line already.
            continue;
        };
        let head = signed.head();
        if let Err(e) = heads.verify_head(&signed) {
            report.problems.push(format!(
                "line {} of tree-heads.jsonl (tree size {}): {e}",
                number + 1,
                head.tree_size
            ));
        }
        if let Some(old) = previous {
            let step_file = root.join(ledger::step_path(old.tree_size));
            let step = std::fs::read(&step_file)
                .map_err(|e| e.to_string())
                .and_then(|b| ConsistencyStep::from_json(&b).map_err(|e| e.to_string()))
                .and_then(|step| {
                    if step.tree_head.head() != head {
                        return Err(format!(
                            "it leads to tree size {}, not to the logged head of size {}",
                            step.tree_head.head().tree_size,
                            head.tree_size
                        ));
                    }
                    step.proof.verify(&old, &head).map_err(|e| e.to_string())
                });
            if let Err(e) = step {
                report.problems.push(format!(
                    "consistency step {}: {e}; devices that saw tree size {} cannot catch up",
                    ledger::step_path(old.tree_size),
                    old.tree_size
                ));
            }
        }
        previous = Some(head);
        report.heads_checked += 1;
    }
    Ok(())
}

/// The entries against each other and against the tree's bundles, histories and feeds.
fn check_entries(root: &Path, ledger: &Ledger, report: &mut AuditReport) -> Result<()> {
    use std::collections::{BTreeMap, BTreeSet};
    let mut versions: BTreeMap<(String, String), (u64, Digest)> = BTreeMap::new();
    let mut sequences: BTreeMap<String, (u64, u64)> = BTreeMap::new();
    let mut bundles: BTreeSet<Digest> = BTreeSet::new();
    let mut histories: BTreeMap<String, Option<BTreeSet<u64>>> = BTreeMap::new();
    let mut trust_sets = TrustSetsSeen::default();
    let mut releases = Releases::new();
    let mut deltas: BTreeSet<Digest> = BTreeSet::new();
    let mut rebuilds: Vec<Rebuild> = Vec::new();
    let entries = match ledger.entries() {
        Ok(entries) => entries,
        Err(e) => {
            report.problems.push(format!("{e:#}"));
            return Ok(());
        }
    };
    for item in entries {
        let (index, bytes) = match item {
            Ok(item) => item,
            Err(e) => {
                report.problems.push(format!("{e:#}"));
                break;
            }
        };
        let entry = match Record::from_bytes(&bytes) {
            Ok(Record::Bundle(entry)) => entry,
            Ok(Record::TrustSet(t)) => {
                check_trust_set_entry(root, index, &t, &mut trust_sets, report);
                continue;
            }
            Err(e) => {
                report.problems.push(format!("entry {index}: {e}"));
                continue;
            }
        };
        // SemVer precedence ignores build metadata, so 1.0.0+a and 1.0.0+b are one version.
        let mut version = entry.version.clone();
        version.build = semver::BuildMetadata::EMPTY;
        let key = (entry.bundle.clone(), version.to_string());
        match versions.get(&key) {
            Some((first, digest)) if *digest != entry.bundle_digest => {
                report.problems.push(format!(
                    "entry {index}: {} {} is logged with bundle {}, but entry {first} logged it \
                     with bundle {digest}: a version was reused with different content",
                    entry.bundle, entry.version, entry.bundle_digest
                ));
            }
            Some(_) => {}
            None => {
                versions.insert(key, (index, entry.bundle_digest));
            }
        }
        if let Some((before, at)) = sequences.get(&entry.channel) {
            if entry.feed_sequence <= *before {
                report.problems.push(format!(
                    "entry {index}: channel {} feed sequence {} does not follow {before} \
                     (entry {at}); a sequence was reused or went back",
                    entry.channel, entry.feed_sequence
                ));
            } else if entry.feed_sequence != before + 1 {
                report.problems.push(format!(
                    "entry {index}: sequence gap on channel {}: feed sequence {} follows {before} \
                     (entry {at}); sequences {} to {} are not in the ledger",
                    entry.channel,
                    entry.feed_sequence,
                    before + 1,
                    entry.feed_sequence - 1
                ));
            }
        }
        sequences.insert(entry.channel.clone(), (entry.feed_sequence, index));
        if entry.event == Event::Publish
            && bundles.insert(entry.bundle_digest)
            && let Some(manifest) = check_bundle(root, index, &entry, report)
        {
            releases
                .entry(base_id(&manifest.files))
                .or_default()
                .push(Release {
                    index,
                    name: manifest.name,
                    version: manifest.version,
                    bundle: entry.bundle_digest,
                });
        }
        if let Some(Some(offered)) = &entry.offered {
            for delta in &offered.deltas {
                if deltas.insert(delta.sha256)
                    && let Some(pending) =
                        check_delta(root, index, offered, delta, &releases, report)
                {
                    rebuilds.push(pending);
                }
            }
        }
        let history = histories
            .entry(entry.channel.clone())
            .or_insert_with(|| history_sequences(root, &entry.channel));
        if let Some(known) = history
            && !known.contains(&entry.feed_sequence)
        {
            report.warnings.push(format!(
                "entry {index} ({} of {} {} on channel {}, feed sequence {}) has no feed update: \
                 the channel's history has no event with that sequence (a publish or withdraw \
                 that stopped after its ledger append)",
                entry.event, entry.bundle, entry.version, entry.channel, entry.feed_sequence
            ));
        }
    }
    report.bundles_checked = bundles.len() as u64;
    report.deltas_checked = deltas.len() as u64;
    rebuild_all(root, rebuilds, report);
    Ok(())
}

/// A delta whose file and head passed, to rebuild from its base.
struct Rebuild {
    /// How problems name it (`entry <n>: delta <path> of <release> (base <id>)`).
    what: String,
    path: PathBuf,
    /// The release it rebuilds, as `<name> <version>`.
    release: String,
    base: Release,
}

/// Rebuilds each delta from its base with the library's apply, unpacking each base bundle once
/// for all the deltas from it (unpacking is most of the cost: on the 84 MiB model, most of the
/// 1.2 s one delta takes, BENCHMARKS.md).
fn rebuild_all(root: &Path, mut rebuilds: Vec<Rebuild>, report: &mut AuditReport) {
    rebuilds.sort_by_key(|r| r.base.bundle);
    for group in rebuilds.chunk_by(|a, b| a.base.bundle == b.base.bundle) {
        let base = &group[0].base;
        let unpacked = unpack_base(root, base);
        for r in group {
            let rebuilt = match &unpacked {
                Ok((work, files)) => rebuild(work.path(), files, &r.path),
                Err(e) => Err(anyhow::anyhow!("{e:#}")),
            };
            match rebuilt {
                Ok(()) => report.deltas_rebuilt += 1,
                Err(e) => report.problems.push(format!(
                    "{} does not rebuild {} from {} {} (bundle {}): {e:#}{LOGGED_BY_THIEF}",
                    r.what, r.release, base.name, base.version, base.bundle
                )),
            }
        }
    }
}

/// What a problem with a delta whose file is the one logged says of it.
const LOGGED_BY_THIEF: &str = "; publish never makes such a delta, so whoever holds the feed \
                               key logged one it did not make: devices fail on it and \
                               download the full bundle";

/// A release the ledger logged, by the digest that names its files as a delta's base.
#[derive(Debug, Clone)]
pub struct Release {
    /// The entry that first published it.
    pub index: u64,
    pub name: String,
    pub version: semver::Version,
    /// Its bundle file's SHA-256.
    pub bundle: Digest,
}

/// The releases logged so far, by base digest (two releases with the same files share one).
pub type Releases = std::collections::BTreeMap<Digest, Vec<Release>>;

/// The logged releases of the ledger whose bundles the tree at `root` holds, by base digest
/// (reading only each bundle's manifest): how `ledger list` names a delta's base.
pub fn logged_releases(root: &Path, ledger: &Ledger) -> Releases {
    let mut releases = Releases::new();
    let Ok(entries) = ledger.entries() else {
        return releases;
    };
    for (index, bytes) in entries.flatten() {
        let Ok(Record::Bundle(entry)) = Record::from_bytes(&bytes) else {
            continue;
        };
        if entry.event != Event::Publish {
            continue;
        }
        let path = bundle_path(root, &entry.bundle_digest);
        if let Ok(bundle) = Unverified::open(&path) {
            let list = releases.entry(base_id(&bundle.manifest.files)).or_default();
            if !list.iter().any(|r| r.bundle == entry.bundle_digest) {
                list.push(Release {
                    index,
                    name: bundle.manifest.name,
                    version: bundle.manifest.version,
                    bundle: entry.bundle_digest,
                });
            }
        }
    }
    releases
}

fn bundle_path(root: &Path, sha256: &Digest) -> PathBuf {
    root.join(crate::release::tree_records::BUNDLES_DIR)
        .join(format!(
            "{sha256}.{}",
            ampoule_verify::format::BUNDLE_EXTENSION
        ))
}

/// One logged delta against the tree (issue 13): its file is there with the logged size and
/// SHA-256; it carries the release's manifest and signatures byte for byte (as its bundle in
/// the tree holds them, whose manifest digest the entry logs); it names the release and the
/// logged base; that base is an earlier release of the same name in the ledger, not the
/// release itself; and, rebuilt from that base's bundle in bounded memory (the library's
/// apply), it gives exactly the files the release's manifest declares.
fn check_delta(
    root: &Path,
    index: u64,
    offered: &ampoule_verify::ledger::Offered,
    delta: &ampoule_verify::ledger::DeltaRef,
    releases: &Releases,
    report: &mut AuditReport,
) -> Option<Rebuild> {
    let name = format!(
        "{}/{}.{}",
        crate::release::tree_records::BUNDLES_DIR,
        delta.sha256,
        ampoule_verify::format::delta::EXTENSION
    );
    let path = root.join(&name);
    let what = format!(
        "entry {index}: delta {name} of {} {} (base {})",
        offered.bundle, offered.version, delta.base
    );
    let found = std::fs::File::open(&path)
        .and_then(|f| ampoule_verify::digest::hash_reader(f, delta.size.saturating_add(1)));
    match found {
        Ok((sha256, size)) if sha256 != delta.sha256 || size != delta.size => {
            let size = if size > delta.size {
                format!("over {} bytes", delta.size)
            } else {
                format!("{size} bytes")
            };
            report.problems.push(format!(
                "{what} differs from what was published: it has sha256 {sha256} ({size}), the \
                 entry logs {} ({} bytes); devices refuse it and download the full bundle: \
                 restore it from a backup",
                delta.sha256, delta.size
            ));
            return None;
        }
        Ok(_) => {}
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            report.problems.push(format!(
                "{what} is missing from the tree: devices on that base download the full \
                 bundle instead; restore it from a backup (publishing the release again stops \
                 offering it)"
            ));
            return None;
        }
        Err(e) => {
            report.problems.push(format!("{what} cannot be read: {e}"));
            return None;
        }
    }
    match delta_contents(root, &path, offered, delta, releases, index) {
        Ok(base) => Some(Rebuild {
            what,
            path,
            release: format!("{} {}", offered.bundle, offered.version),
            base,
        }),
        Err(problem) => {
            report
                .problems
                .push(format!("{what} {problem}{LOGGED_BY_THIEF}"));
            None
        }
    }
}

/// The checks of [`check_delta`] past the file's digest, but the rebuild; returns the base
/// release, or says what is wrong.
fn delta_contents(
    root: &Path,
    path: &Path,
    offered: &ampoule_verify::ledger::Offered,
    delta: &ampoule_verify::ledger::DeltaRef,
    releases: &Releases,
    index: u64,
) -> std::result::Result<Release, String> {
    use std::io::BufReader;
    let file = std::fs::File::open(path).map_err(|e| format!("cannot be read: {e}"))?;
    let head = ampoule_verify::format::delta_file::read_head(&mut BufReader::new(file))
        .map_err(|e| format!("is not a delta: {e}"))?;
    let manifest = Digest::of(&head.manifest);
    if manifest != offered.manifest_digest {
        return Err(format!(
            "carries manifest sha256 {manifest}, but the entry logs {} for the release",
            offered.manifest_digest
        ));
    }
    let bundle = Unverified::open(&bundle_path(root, &offered.bundle_digest))
        .map_err(|e| format!("cannot be compared with its release's bundle: {e}"))?;
    if head.signatures != bundle.layout.signatures {
        return Err(format!(
            "carries other signatures than the release's bundle {}",
            offered.bundle_digest
        ));
    }
    let header = &head.header;
    if header.name != offered.bundle || header.version != offered.version {
        return Err(format!(
            "names {} {} in its header",
            header.name, header.version
        ));
    }
    if header.base_id() != delta.base {
        return Err(format!("names base {} in its header", header.base_id()));
    }
    if delta.base == base_id(&bundle.manifest.files) {
        return Err("leads from the release's own files to themselves".into());
    }
    releases
        .get(&delta.base)
        .and_then(|list| {
            list.iter().find(|r| {
                r.index < index
                    && r.name == offered.bundle
                    && r.version.cmp_precedence(&offered.version).is_lt()
            })
        })
        .cloned()
        .ok_or_else(|| {
            format!(
                "has a base that is no earlier release of {} in the ledger",
                offered.bundle
            )
        })
}

/// `base`'s bundle unpacked (its payload checked against its manifest) into a temporary
/// directory, with the files' paths in manifest order.
fn unpack_base(root: &Path, base: &Release) -> Result<(tempfile::TempDir, Vec<PathBuf>)> {
    let work = tempfile::tempdir().context("cannot create a temporary directory")?;
    let dir = work.path().join("base");
    let mut bundle = Unverified::open(&bundle_path(root, &base.bundle))?;
    bundle
        .dangerous_unpack(&dir)
        .context("its base bundle does not unpack")?;
    let files = bundle
        .manifest
        .files
        .iter()
        .map(|f| dir.join(&f.path))
        .collect();
    Ok((work, files))
}

/// Rebuilds the delta at `delta` from `base` (the base files in manifest order) into a fresh
/// directory under `work`, with the library's apply: every rebuilt file must have the size and
/// SHA-256 the carried manifest declares (compared before with the logged manifest digest).
fn rebuild(work: &Path, base: &[PathBuf], delta: &Path) -> Result<()> {
    let out = tempfile::tempdir_in(work).context("cannot create a temporary directory")?;
    let mut files = base
        .iter()
        .map(std::fs::File::open)
        .collect::<std::io::Result<Vec<_>>>()?;
    ampoule_verify::payload::delta::dangerous_rebuild_for_audit(
        std::fs::File::open(delta)?,
        &mut files,
        out.path(),
    )?;
    Ok(())
}

/// The trust-set versions the ledger logged so far: each version's first entry and digest,
/// and the highest version with its entry.
#[derive(Default)]
struct TrustSetsSeen {
    versions: std::collections::BTreeMap<u64, (u64, Digest)>,
    highest: Option<(u64, u64)>,
}

/// A trust-set version is published once with one content, and versions only go up: a
/// device takes a successor only of a higher version, so anything else in the ledger means
/// some devices were shown a set others never saw. The tree's file of each version must be
/// the one logged: devices rotate onto what the tree serves, the auditor sees what was logged.
fn check_trust_set_entry(
    root: &Path,
    index: u64,
    entry: &TrustSetEntry,
    seen: &mut TrustSetsSeen,
    report: &mut AuditReport,
) {
    let version = entry.trust_set_version;
    let digest = entry.trust_set_digest;
    match seen.versions.get(&version) {
        Some((first, before)) if *before != digest => {
            report.problems.push(format!(
                "entry {index}: trust set version {version} is logged with sha256 {digest}, but \
                 entry {first} logged it with sha256 {before}: a trust-set version was reused \
                 with different content"
            ));
        }
        Some(_) => {}
        None => {
            seen.versions.insert(version, (index, digest));
            check_trust_set_file(root, index, entry, report);
        }
    }
    match seen.highest {
        Some((highest, at)) if version < highest => {
            report.problems.push(format!(
                "entry {index}: trust set version {version} follows version {highest} (entry \
                 {at}); trust-set versions went down"
            ));
        }
        _ => seen.highest = Some((version, index)),
    }
}

fn check_trust_set_file(root: &Path, index: u64, entry: &TrustSetEntry, report: &mut AuditReport) {
    let version = entry.trust_set_version;
    let name = format!("{}/{version}.json", crate::release::tree_records::TRUST_DIR);
    let what = format!(
        "entry {index}: trust set version {version} is logged with sha256 {}, but {name}",
        entry.trust_set_digest
    );
    let found = std::fs::File::open(root.join(&name))
        .and_then(|file| ampoule_verify::digest::hash_reader(file, u64::MAX));
    match found {
        Ok((digest, _)) if digest != entry.trust_set_digest => {
            report.problems.push(format!("{what} has sha256 {digest}"))
        }
        Ok(_) => {}
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => report
            .problems
            .push(format!("{what} is missing from the tree")),
        Err(e) => report.problems.push(format!("{what} cannot be read: {e}")),
    }
}

/// The feed sequences a channel's history records; `None` when the tree has no history for it
/// (a copy of the tree without its release-side records).
fn history_sequences(root: &Path, channel: &str) -> Option<std::collections::BTreeSet<u64>> {
    let path = root
        .join(crate::release::tree_records::HISTORY_DIR)
        .join(format!("{channel}.json"));
    let bytes = std::fs::read(path).ok()?;
    let history: crate::release::tree_records::History = serde_json::from_slice(&bytes).ok()?;
    Some(history.events.iter().map(|e| e.sequence()).collect())
}

/// The bundle an entry logs, against the tree; returns its manifest when the file is the one
/// logged and reads as a bundle.
fn check_bundle(
    root: &Path,
    index: u64,
    entry: &Entry,
    report: &mut AuditReport,
) -> Option<ampoule_verify::Manifest> {
    let name = format!(
        "{}/{}.{}",
        crate::release::tree_records::BUNDLES_DIR,
        entry.bundle_digest,
        ampoule_verify::format::BUNDLE_EXTENSION
    );
    let path = root.join(&name);
    let what = format!(
        "entry {index}: bundle {} {} ({name})",
        entry.bundle, entry.version
    );
    let file = match std::fs::File::open(&path) {
        Ok(file) => file,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            report
                .problems
                .push(format!("{what} is missing from the tree"));
            return None;
        }
        Err(e) => {
            report.problems.push(format!("{what} cannot be read: {e}"));
            return None;
        }
    };
    match ampoule_verify::digest::hash_reader(file, u64::MAX) {
        Ok((digest, _)) if digest != entry.bundle_digest => {
            report.problems.push(format!(
                "{what} differs from what was published: its sha256 is {digest}"
            ));
            return None;
        }
        Ok(_) => {}
        Err(e) => {
            report.problems.push(format!("{what} cannot be read: {e}"));
            return None;
        }
    }
    match Unverified::open(&path) {
        Ok(bundle) => {
            let manifest = Digest::of(&bundle.layout.manifest);
            if manifest != entry.manifest_digest {
                report.problems.push(format!(
                    "{what} has manifest sha256 {manifest}, but the entry logs {}",
                    entry.manifest_digest
                ));
            }
            if bundle.manifest.name != entry.bundle || bundle.manifest.version != entry.version {
                report.problems.push(format!(
                    "{what} holds {} {}, not what the entry names",
                    bundle.manifest.name, bundle.manifest.version
                ));
            }
            Some(bundle.manifest)
        }
        Err(e) => {
            report.problems.push(format!("{what} is not a bundle: {e}"));
            None
        }
    }
}
