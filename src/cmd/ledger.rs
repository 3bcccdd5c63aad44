//! `ampoule ledger`: the auditor's view of a release tree's ledger. `list` shows what was
//! shipped, `check` recomputes and cross-checks everything (exit 1 on problems), `prove` prints
//! a bundle's inclusion proof. With `--url` the files are fetched over HTTP(S) into a
//! temporary copy of the tree first, so every check runs on exactly the same code.

use std::cell::Cell;
use std::collections::BTreeSet;
use std::fs;
use std::path::{Path, PathBuf};

use ampoule_verify::feed::resolve;
use ampoule_verify::fetch::{Transfer, fetch_to_file};
use ampoule_verify::ledger::{
    Event, LEDGER_DIR, LedgerVerifier, MAX_ENTRY_BYTES, Record, step_path,
};
use ampoule_verify::merkle::{self, MAX_SIGNED_TREE_HEAD_BYTES, SignedTreeHead};
use ampoule_verify::{Digest, DocumentKind, ErrorKind, KeyId, Timestamp};
use anyhow::{Context, Result, bail};
use serde_json::{Value, json};
use tempfile::TempDir;

use crate::Refused;
use crate::cli::{
    LedgerArgs, LedgerCheckArgs, LedgerCommand, LedgerListArgs, LedgerProveArgs, LedgerSourceArgs,
};
use crate::cmd::{load_trust, load_trust_set};
use crate::failure::{Failure, Kind, count};
use crate::output::{Output, failed_report, shown};
use crate::release::ledger_audit::{self as audit, AuditReport};
use crate::release::ledger_storage::{
    ENTRIES, Entry, HASHES, Ledger, OFFSETS, TREE_HEAD, TREE_HEADS,
};

pub fn run(args: LedgerArgs, out: &Output) -> Result<()> {
    match args.command {
        LedgerCommand::List(args) => list(args, out),
        LedgerCommand::Check(args) => check(args, out),
        LedgerCommand::Prove(args) => prove(args, out),
    }
}

/// How [`mirror`] may size what it downloads from a served tree.
#[derive(Clone, Copy)]
enum Sizing<'a> {
    /// The served tree head must verify under these keys before anything is sized from it.
    Verified(&'a LedgerVerifier),
    /// The tree head is not verified (`ledger list` without `--trust`): all downloads
    /// together stop at this many bytes, whatever the head claims.
    Unverified { max_bytes: u64 },
}

/// A release tree to read: the given directory, or a temporary copy of a served one.
struct Source {
    root: PathBuf,
    shown: String,
    _copy: Option<TempDir>,
}

impl Source {
    fn open(args: &LedgerSourceArgs, whole_tree: bool, sizing: Sizing<'_>) -> Result<Source> {
        match (&args.tree, &args.url) {
            (Some(tree), _) => {
                if !tree.join(LEDGER_DIR).join(ENTRIES).is_file() {
                    bail!(
                        "{} has no ledger ({LEDGER_DIR}/{ENTRIES}); publish to the tree first",
                        tree.display()
                    );
                }
                Ok(Source {
                    root: tree.clone(),
                    shown: tree.display().to_string(),
                    _copy: None,
                })
            }
            (None, Some(url)) => {
                let copy = tempfile::tempdir().context("cannot create a temporary directory")?;
                mirror(url, copy.path(), whole_tree, sizing)?;
                Ok(Source {
                    root: copy.path().to_path_buf(),
                    shown: url.clone(),
                    _copy: Some(copy),
                })
            }
            (None, None) => bail!("give --tree DIR or --url URL"),
        }
    }

    fn ledger(&self) -> Result<Ledger> {
        Ledger::open(&self.root.join(LEDGER_DIR))
    }
}

/// The largest record file (history, index) fetched, as the release side bounds them.
const RECORD_BYTES: u64 = 16 * 1024 * 1024;
/// Slack for bytes an interrupted append left past the tree head in a served file.
const SLACK_BYTES: u64 = 64 * 1024 * 1024;

/// Copies what the checks read from the tree served at `base` into `root`: the ledger's files
/// and, for `check`, the consistency steps, histories, index and published bundles. Files the
/// server does not have are left out, and the checks report them missing.
///
/// Download sizes follow from the tree head, so a hostile server's head could otherwise ask
/// for any amount of disk: with [`Sizing::Verified`] the head is checked before anything else
/// is fetched, and with [`Sizing::Unverified`] every download together stops at a fixed
/// number of bytes (issue 10 item 6).
fn mirror(base: &str, root: &Path, whole_tree: bool, sizing: Sizing<'_>) -> Result<()> {
    let base = if base.ends_with('/') {
        base.to_string()
    } else {
        format!("{base}/")
    };
    let transfer = Transfer::default();
    let budget = Cell::new(match sizing {
        Sizing::Verified(_) => u64::MAX,
        Sizing::Unverified { max_bytes } => max_bytes,
    });
    let exhausted = Cell::new(false);
    let over_budget = || match sizing {
        Sizing::Unverified { max_bytes } => format!(
            "stopped after {max_bytes} bytes from {base} (--max-bytes): its tree head is not \
             verified, so it cannot size the downloads; give --trust or --trust-set, or a \
             larger --max-bytes"
        ),
        Sizing::Verified(_) => unreachable!("a verified head sets no byte budget"),
    };
    let fetch = |rel: &str, max: u64| -> Result<()> {
        if exhausted.get() {
            bail!("{}", over_budget());
        }
        let url = resolve(&base, rel)?;
        let dest = root.join(rel);
        if let Some(dir) = dest.parent() {
            fs::create_dir_all(dir)
                .with_context(|| format!("cannot create directory {}", dir.display()))?;
        }
        let left = budget.get();
        let cap = max.min(left);
        match fetch_to_file(&url, &dest, cap, &transfer) {
            Ok(written) => {
                budget.set(left - written.min(left));
                Ok(())
            }
            Err(e) => {
                // A failed fetch may leave an empty or partial file; the checks must see the
                // file as missing, not as one with other content.
                let _ = fs::remove_file(&dest);
                if e.kind() == ErrorKind::TooLarge && cap < max {
                    exhausted.set(true);
                    return Err(anyhow::Error::new(e).context(over_budget()));
                }
                Err(anyhow::Error::new(e).context(format!("cannot fetch {url}")))
            }
        }
    };
    let ledger = |name: &str| format!("{LEDGER_DIR}/{name}");
    fetch(&ledger(TREE_HEAD), MAX_SIGNED_TREE_HEAD_BYTES as u64 + 2)?;
    let head = fs::read(root.join(ledger(TREE_HEAD))).context("cannot read the fetched head")?;
    let head = SignedTreeHead::from_json(head.strip_suffix(b"\n").unwrap_or(&head))
        .with_context(|| format!("{base}{} is not a signed tree head", ledger(TREE_HEAD)))?;
    if let Sizing::Verified(verifier) = sizing {
        verifier.verify_head(&head).with_context(|| {
            format!(
                "the tree head at {base}{} is refused, and nothing was sized from it or \
                 downloaded after it",
                ledger(TREE_HEAD)
            )
        })?;
    }
    let size = head.head().tree_size;
    fetch(
        &ledger(ENTRIES),
        size.saturating_mul(MAX_ENTRY_BYTES as u64 + 1) + SLACK_BYTES,
    )?;
    fetch(&ledger(OFFSETS), size.saturating_mul(8) + SLACK_BYTES)?;
    fetch(
        &ledger(TREE_HEADS),
        (size + 1).saturating_mul(MAX_SIGNED_TREE_HEAD_BYTES as u64 + 1),
    )?;
    for level in 0..(64 - size.leading_zeros()) {
        fetch(
            &format!("{LEDGER_DIR}/{HASHES}/level-{level:02}.bin"),
            (size >> level) * 32 + SLACK_BYTES,
        )?;
    }
    // Optional files: what is missing is reported by the checks, not here.
    let heads = fs::read(root.join(ledger(TREE_HEADS))).context("cannot read the fetched log")?;
    let mut sizes: Vec<u64> = heads
        .split(|&b| b == b'\n')
        .filter_map(|line| SignedTreeHead::from_json(line).ok())
        .map(|h| h.head().tree_size)
        .collect();
    sizes.pop();
    if whole_tree {
        for old in sizes {
            let _ = fetch(&step_path(old), ampoule_verify::ledger::MAX_STEP_BYTES);
        }
        let _ = fetch(crate::release::tree::INDEX_FILE, RECORD_BYTES);
    }
    let index: crate::release::tree::Index = fs::read(root.join(crate::release::tree::INDEX_FILE))
        .ok()
        .and_then(|b| serde_json::from_slice(&b).ok())
        .unwrap_or_default();
    let ledger = Ledger::open(&root.join(LEDGER_DIR))?;
    let mut channels = BTreeSet::new();
    let mut bundles = BTreeSet::new();
    let mut deltas = std::collections::BTreeMap::new();
    let mut trust_sets = BTreeSet::new();
    for item in ledger.entries()? {
        let entry = match Record::from_bytes(&item?.1) {
            Ok(Record::Bundle(entry)) => entry,
            Ok(Record::TrustSet(t)) => {
                trust_sets.insert(t.trust_set_version);
                continue;
            }
            Err(_) => continue,
        };
        channels.insert(entry.channel.clone());
        if entry.event == Event::Publish {
            bundles.insert(entry.bundle_digest);
        }
        for delta in entry.offered().map_or(&[][..], |o| &o.deltas[..]) {
            deltas.insert(delta.sha256, delta.size);
        }
    }
    // `list` shows each publish's rollout from the histories, so they are fetched for it too.
    for channel in channels {
        let _ = fetch(
            &format!("{}/{channel}.json", crate::release::tree::HISTORY_DIR),
            RECORD_BYTES,
        );
    }
    if exhausted.get() {
        bail!("{}", over_budget());
    }
    if !whole_tree {
        return Ok(());
    }
    for version in trust_sets {
        // Larger than any valid trust set, so that a grown file is reported changed, not missing.
        let _ = fetch(
            &format!("{}/{version}.json", crate::release::tree::TRUST_DIR),
            RECORD_BYTES,
        );
    }
    for digest in bundles {
        // The index says how big each bundle is; one it does not list is not fetched.
        if let Some(size) = index
            .releases
            .iter()
            .find(|r| r.sha256 == digest)
            .map(|r| r.size)
        {
            let _ = fetch(
                &format!(
                    "{}/{digest}.{}",
                    crate::release::tree::BUNDLES_DIR,
                    ampoule_verify::format::BUNDLE_EXTENSION
                ),
                size,
            );
        }
    }
    for (digest, size) in deltas {
        // The entry logs each delta's size; a larger file is not fetched and is reported
        // missing.
        let _ = fetch(
            &format!(
                "{}/{digest}.{}",
                crate::release::tree::BUNDLES_DIR,
                ampoule_verify::format::delta::EXTENSION
            ),
            size,
        );
    }
    if exhausted.get() {
        bail!("{}", over_budget());
    }
    Ok(())
}

fn time_text(secs: u64) -> String {
    Timestamp::from_unix(secs).map_or_else(|| secs.to_string(), |t| t.to_string())
}

/// A logged delta as `ledger list` shows it: a way to send the release it rebuilds to devices
/// on its base, with the base named as a release when the tree's bundles say which.
fn delta_json(
    delta: &ampoule_verify::ledger::DeltaRef,
    releases: &audit::Releases,
    bundle_size: Option<u64>,
) -> Value {
    let base = releases.get(&delta.base).map(|list| {
        list.iter()
            .map(|r| json!({"name": r.name, "version": r.version.to_string(), "bundle_sha256": r.bundle}))
            .collect::<Vec<_>>()
    });
    json!({
        "base": delta.base,
        "base_releases": base,
        "size": delta.size,
        "sha256": delta.sha256,
        "bundle_size": bundle_size,
    })
}

/// The text line under an entry for one of its deltas.
fn delta_line(
    delta: &ampoule_verify::ledger::DeltaRef,
    offered: &ampoule_verify::ledger::Offered,
    releases: &audit::Releases,
    bundle_size: Option<u64>,
) -> String {
    let base = releases.get(&delta.base).map_or_else(
        || "a base not in this tree".to_string(),
        |list| {
            list.iter()
                .map(|r| format!("{} {}", shown(&r.name), r.version))
                .collect::<Vec<_>>()
                .join(" or ")
        },
    );
    let share = bundle_size.map_or_else(String::new, |b| {
        format!(
            ", {:.2}% of the {b}-byte bundle",
            delta.size as f64 * 100.0 / b.max(1) as f64
        )
    });
    format!(
        "    delta to {} {} from {base} (base {}): {} bytes{share}, sha256 {}\n",
        shown(&offered.bundle),
        offered.version,
        &delta.base.to_string()[..16],
        delta.size,
        &delta.sha256.to_string()[..16],
    )
}

fn entry_json(
    index: u64,
    record: &Record,
    deltas: &dyn Fn(&ampoule_verify::ledger::Offered) -> Value,
) -> Value {
    match record {
        Record::Bundle(entry) => json!({
            "index": index,
            "time": time_text(entry.time),
            "event": entry.event.to_string(),
            "channel": entry.channel,
            "bundle": entry.bundle,
            "version": entry.version.to_string(),
            "bundle_sha256": entry.bundle_digest,
            "manifest_sha256": entry.manifest_digest,
            "key_ids": entry.key_ids.iter().map(|k| k.to_string()).collect::<Vec<_>>(),
            "feed_sequence": entry.feed_sequence,
            // Format 2 (issue 10): what the entry's feed offers after the change, or null for
            // nothing; format-1 entries do not say (null too: read `format`).
            "format": entry.format,
            "offered": entry.offered.as_ref().map(|o| o.as_ref().map(|o| json!({
                "bundle": o.bundle,
                "version": o.version.to_string(),
                "bundle_sha256": o.bundle_digest,
                "manifest_sha256": o.manifest_digest,
                "rollout_percent": o.rollout_percent,
                "deltas": deltas(o),
            }))),
        }),
        Record::TrustSet(entry) => json!({
            "index": index,
            "time": time_text(entry.time),
            "event": entry.event.to_string(),
            "trust_set_version": entry.trust_set_version,
            "trust_set_sha256": entry.trust_set_digest,
            "key_ids": entry.key_ids.iter().map(|k| k.to_string()).collect::<Vec<_>>(),
        }),
    }
}

/// Key ids joined by `separator`, each cut to its first `chars` characters.
fn key_list(ids: &[KeyId], separator: &str, chars: usize) -> String {
    let ids: Vec<String> = ids
        .iter()
        .map(|k| k.to_string().chars().take(chars).collect())
        .collect();
    ids.join(separator)
}

/// One CSV field (RFC 4180): quoted when it holds a comma, quote or line break.
fn csv_field(text: &str) -> String {
    if text.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", text.replace('"', "\"\""))
    } else {
        text.to_string()
    }
}

fn list(args: LedgerListArgs, out: &Output) -> Result<()> {
    if args.csv && out.json() {
        bail!("--csv and --json print different formats; choose one");
    }
    if let Some(channel) = &args.channel {
        crate::cmd::check_channel_arg(channel)?;
    }
    let verifier = match (&args.trust_set, args.trust.is_empty()) {
        (Some(path), _) => Some(LedgerVerifier::from_trust_set(&load_trust_set(path)?)?),
        (None, false) => Some(LedgerVerifier::new(load_trust(&args.trust)?, 1)?),
        (None, true) => None,
    };
    let sizing = verifier.as_ref().map_or(
        Sizing::Unverified {
            max_bytes: args.max_bytes,
        },
        Sizing::Verified,
    );
    let source = Source::open(&args.source, false, sizing)?;
    let ledger = source.ledger()?;
    let mut rows = Vec::new();
    // The complete subtrees of every entry read so far, for the root the tree head must sign.
    let mut frontier: Vec<Digest> = Vec::new();
    for item in ledger.entries()? {
        let (index, bytes) = item?;
        push_leaf(&mut frontier, index, merkle::leaf_hash(&bytes));
        let record =
            Record::from_bytes(&bytes).with_context(|| format!("entry {index} of the ledger"))?;
        // A trust-set publish renews every channel's feed, so it belongs to each channel's list.
        let shown = match &record {
            Record::Bundle(entry) => args.channel.as_ref().is_none_or(|c| *c == entry.channel),
            Record::TrustSet(_) => true,
        };
        if shown {
            rows.push((index, record));
        }
    }
    let signers = match &verifier {
        Some(verifier) => Some(authenticate(&ledger, verifier, &frontier)?),
        None => None,
    };
    let authenticity = match &signers {
        Some(ids) => format!(
            "authenticated: the entries hash to the root of the tree head, signed by {}",
            key_list(ids, ", ", usize::MAX)
        ),
        None => "unauthenticated: no --trust or --trust-set was given, so neither the tree \
                 head nor the entries were checked"
            .to_string(),
    };
    if signers.is_none() && args.csv {
        // CSV has no room for it; the list must not pass for a checked one.
        out.note(&format!("warning: {authenticity}"));
    }
    let rollouts = rollouts_from_history(&source.root, &rows);
    // Deltas name their base by its files' digest; the tree's bundles say which release that
    // is, and the index how big each bundle is (neither is covered by the ledger).
    let releases = audit::logged_releases(&source.root, &ledger);
    let index: crate::release::tree::Index = crate::release::files::read_bounded(
        &source.root.join(crate::release::tree::INDEX_FILE),
        RECORD_BYTES,
        "the index",
    )
    .ok()
    .and_then(|b| serde_json::from_slice(&b).ok())
    .unwrap_or_default();
    let bundle_size = |sha256: &Digest| {
        index
            .releases
            .iter()
            .find(|r| r.sha256 == *sha256)
            .map(|r| r.size)
    };
    let deltas_json = |o: &ampoule_verify::ledger::Offered| -> Value {
        o.deltas
            .iter()
            .map(|d| delta_json(d, &releases, bundle_size(&o.bundle_digest)))
            .collect()
    };
    let rollout_of = |record: &Record| match record {
        Record::Bundle(e) if e.event == Event::Publish => {
            rollouts.get(&(e.channel.clone(), e.feed_sequence)).copied()
        }
        _ => None,
    };
    if args.csv {
        let mut text = String::from(
            "index,time,event,channel,bundle,version,bundle_sha256,manifest_sha256,key_ids,\
             feed_sequence,trust_set_version,trust_set_sha256,rollout_percent_from_history,\
             deltas\n",
        );
        for (index, record) in &rows {
            let fields = match record {
                Record::Bundle(e) => [
                    index.to_string(),
                    time_text(e.time),
                    e.event.to_string(),
                    e.channel.clone(),
                    e.bundle.clone(),
                    e.version.to_string(),
                    e.bundle_digest.to_string(),
                    e.manifest_digest.to_string(),
                    key_list(&e.key_ids, " ", usize::MAX),
                    e.feed_sequence.to_string(),
                    String::new(),
                    String::new(),
                    rollout_of(record).map_or_else(String::new, |r| r.to_string()),
                    // Each delta the entry's feed offers: base:size:sha256, space-separated.
                    e.offered()
                        .map(|o| {
                            o.deltas
                                .iter()
                                .map(|d| format!("{}:{}:{}", d.base, d.size, d.sha256))
                                .collect::<Vec<_>>()
                                .join(" ")
                        })
                        .unwrap_or_default(),
                ],
                Record::TrustSet(e) => [
                    index.to_string(),
                    time_text(e.time),
                    e.event.to_string(),
                    String::new(),
                    String::new(),
                    String::new(),
                    String::new(),
                    String::new(),
                    key_list(&e.key_ids, " ", usize::MAX),
                    String::new(),
                    e.trust_set_version.to_string(),
                    e.trust_set_digest.to_string(),
                    String::new(),
                    String::new(),
                ],
            };
            let fields: Vec<String> = fields.iter().map(|f| csv_field(f)).collect();
            text.push_str(&fields.join(","));
            text.push('\n');
        }
        return out.result(&text, Value::Null);
    }
    let head = ledger.tree_head().map(|h| h.head());
    let mut shown_deltas = BTreeSet::new();
    let mut table = vec![[
        "#".to_string(),
        "time".into(),
        "event".into(),
        "channel".into(),
        "bundle".into(),
        "version".into(),
        "sha256".into(),
        "signed by".into(),
        "sequence".into(),
        "rollout*".into(),
    ]];
    for (index, record) in &rows {
        table.push(match record {
            Record::Bundle(e) => [
                index.to_string(),
                time_text(e.time),
                e.event.to_string(),
                shown(&e.channel).into_owned(),
                shown(&e.bundle).into_owned(),
                e.version.to_string(),
                e.bundle_digest.to_string()[..16].to_string(),
                key_list(&e.key_ids, ",", 8),
                e.feed_sequence.to_string(),
                rollout_of(record).map_or_else(|| "-".into(), |r| format!("{r}%")),
            ],
            Record::TrustSet(e) => [
                index.to_string(),
                time_text(e.time),
                e.event.to_string(),
                "-".into(),
                "trust set".into(),
                e.trust_set_version.to_string(),
                e.trust_set_digest.to_string()[..16].to_string(),
                key_list(&e.key_ids, ",", 8),
                "-".into(),
                "-".into(),
            ],
        });
    }
    let widths: Vec<usize> = (0..10)
        .map(|i| {
            table
                .iter()
                .map(|r| r[i].chars().count())
                .max()
                .unwrap_or(0)
        })
        .collect();
    let mut human = String::new();
    for (i, row) in table.iter().enumerate() {
        let cells: Vec<String> = row
            .iter()
            .zip(&widths)
            .map(|(c, w)| format!("{c:<w$}"))
            .collect();
        human.push_str(cells.join("  ").trim_end());
        human.push('\n');
        // A delta is a way to send the release, not a release: a line under the publish
        // entry that first offered it (a renewal or a withdraw offering it again adds none).
        if let Some((_, Record::Bundle(e))) = i.checked_sub(1).and_then(|r| rows.get(r))
            && let Some(o) = e.offered()
            && e.event == Event::Publish
        {
            for d in &o.deltas {
                if shown_deltas.insert(d.sha256) {
                    human.push_str(&delta_line(d, o, &releases, bundle_size(&o.bundle_digest)));
                }
            }
        }
    }
    human.push_str(
        "* rollout: from the tree's history/ files, which the ledger does not cover (a later \
         ledger entry format will log it)\n",
    );
    if !shown_deltas.is_empty() {
        human.push_str(
            "deltas: each is a way to send the release above it to devices on its base, not a \
             release; the base is named from the tree's bundles (ledger check verifies each)\n",
        );
    }
    if let Some(h) = &head {
        human.push_str(&format!(
            "{} of {} shown; tree head size {}, root {}, {}\n",
            rows.len(),
            count(h.tree_size, "entry", "entries"),
            h.tree_size,
            h.root_hash,
            time_text(h.time)
        ));
    }
    human.push_str(&authenticity);
    human.push_str(if signers.is_some() {
        " (the history's consistency: run ledger check)\n"
    } else {
        "\n"
    });
    out.result(
        &human,
        json!({
            "ok": true,
            "source": source.shown,
            "authenticated": signers.is_some(),
            "tree_head_signed_by": signers
                .as_ref()
                .map(|ids| ids.iter().map(|k| k.to_string()).collect::<Vec<_>>()),
            "tree_size": head.map(|h| h.tree_size),
            "root_hash": head.map(|h| h.root_hash),
            "entries": rows.iter().map(|(i, e)| {
                let mut entry = entry_json(*i, e, &deltas_json);
                if let Some(rollout) = rollout_of(e) {
                    entry["rollout_percent_from_history"] = json!(rollout);
                }
                entry
            }).collect::<Vec<_>>(),
            "rollout_source": "history/ files of the tree, not covered by the ledger",
        }),
    )
}

/// Adds leaf `index` to the complete subtrees in `frontier` (RFC 9162 section 2.1.1).
fn push_leaf(frontier: &mut Vec<Digest>, index: u64, leaf: Digest) {
    frontier.push(leaf);
    let mut count = index + 1;
    while count & 1 == 0 {
        let right = frontier.pop().expect("a merge has two subtrees");
        let left = frontier.pop().expect("a merge has two subtrees");
        frontier.push(merkle::node_hash(&left, &right));
        count >>= 1;
    }
}

/// Checks the ledger's tree head under `verifier` and that the entries listed (folded into
/// `frontier`) hash to its root; returns the keys that signed it.
fn authenticate(
    ledger: &Ledger,
    verifier: &LedgerVerifier,
    frontier: &[Digest],
) -> Result<Vec<KeyId>> {
    let Some(signed) = ledger.tree_head() else {
        bail!("the ledger has no tree head, so nothing in it can be authenticated");
    };
    let report = verifier
        .verify_head(signed)
        .context("the ledger's tree head is refused")?;
    let head = signed.head();
    let root = merkle::fold_frontier(frontier).unwrap_or_else(merkle::empty_root);
    if root != head.root_hash {
        return Err(Refused(format!(
            "the ledger's {} hash to root {root}, but its signed tree head of size {} has \
                 root {}: the entries are not the ones the head signed (run ledger check)",
            count(head.tree_size, "entry", "entries"),
            head.tree_size,
            head.root_hash
        ))
        .into());
    }
    Ok(report.valid)
}

/// The rollout of each publish, by channel and feed sequence, as the tree's history files
/// record it. The ledger entry does not hold the rollout yet, so what this gives is only as
/// trustworthy as the tree's files; the listing says so. A missing or unreadable history
/// gives nothing for its channel.
fn rollouts_from_history(
    root: &Path,
    rows: &[(u64, Record)],
) -> std::collections::BTreeMap<(String, u64), u8> {
    use crate::release::tree_records::{Event as HistoryEvent, HISTORY_DIR, History};
    let channels: BTreeSet<&str> = rows
        .iter()
        .filter_map(|(_, r)| match r {
            Record::Bundle(e) => Some(e.channel.as_str()),
            Record::TrustSet(_) => None,
        })
        .collect();
    let mut rollouts = std::collections::BTreeMap::new();
    for channel in channels {
        let path = root.join(HISTORY_DIR).join(format!("{channel}.json"));
        let Ok(bytes) = crate::release::files::read_bounded(&path, RECORD_BYTES, "a history file")
        else {
            continue;
        };
        let Ok(history) = serde_json::from_slice::<History>(&bytes) else {
            continue;
        };
        for event in history.events {
            if let HistoryEvent::Publish {
                sequence, release, ..
            } = event
            {
                rollouts.insert((channel.to_string(), sequence), release.rollout_percent);
            }
        }
    }
    rollouts
}

fn check(args: LedgerCheckArgs, out: &Output) -> Result<()> {
    let (keys, heads) = match &args.trust_set {
        Some(path) => {
            let set = load_trust_set(path)?;
            (
                set.keys_for(DocumentKind::TreeHead).0,
                LedgerVerifier::from_trust_set(&set)?,
            )
        }
        None => {
            let keys = load_trust(&args.trust)?;
            (keys.clone(), LedgerVerifier::new(keys, 1)?)
        }
    };
    let since = match &args.since {
        Some(path) => {
            let bytes = crate::cmd::external::read_bounded(
                path,
                MAX_SIGNED_TREE_HEAD_BYTES as u64 + 2,
                "a saved tree head",
            )?;
            let trimmed = bytes.strip_suffix(b"\n").unwrap_or(&bytes);
            Some(
                SignedTreeHead::from_json(trimmed)
                    .with_context(|| format!("{} is not a signed tree head", path.display()))?,
            )
        }
        None => None,
    };
    let source = Source::open(&args.source, true, Sizing::Verified(&heads))?;
    let report = audit::check(&source.root, &keys, &heads, since.as_ref())?;
    print_report(&source, &report, out)
}

/// Prints the audit's report; with problems, the report itself is the error document (a
/// second one would confuse a JSON reader), and only the summary line goes to stderr.
fn print_report(source: &Source, report: &AuditReport, out: &Output) -> Result<()> {
    let mut human = format!(
        "ledger of {}: {}, root {}\nchecked {} (signatures, roots, consistency steps) and {}\n",
        source.shown,
        count(report.tree_size, "entry", "entries"),
        report
            .root_hash
            .map_or_else(|| "none".to_string(), |d| d.to_string()),
        count(report.heads_checked, "tree head", "tree heads"),
        count(report.bundles_checked, "bundle", "bundles"),
    );
    if report.deltas_checked > 0 {
        human.push_str(&format!(
            "checked {} (file, carried manifest and signatures, base), {} rebuilt from its base \
             to the release's files\n",
            count(report.deltas_checked, "delta", "deltas"),
            report.deltas_rebuilt
        ));
    }
    if let Some(size) = report.since {
        human.push_str(&format!(
            "consistent with the saved tree head of size {size}: the history only grew\n"
        ));
    }
    for w in &report.warnings {
        human.push_str(&format!("warning: {w}\n"));
    }
    for p in &report.problems {
        human.push_str(&format!("problem: {p}\n"));
    }
    if report.problems.is_empty() {
        human.push_str("ok: no problems found\n");
    }
    let doc = json!({
            "ok": true,
            "source": source.shown,
            "tree_size": report.tree_size,
            "root_hash": report.root_hash,
            "tree_heads_checked": report.heads_checked,
            "bundles_checked": report.bundles_checked,
            "deltas_checked": report.deltas_checked,
            "deltas_rebuilt": report.deltas_rebuilt,
            "consistent_since": report.since,
            "problems": report.problems,
            "warnings": report.warnings,
    });
    if report.problems.is_empty() {
        return out.result(&human, doc);
    }
    let message = format!(
        "ledger check found {}",
        count(report.problems.len(), "problem", "problems")
    );
    out.result(&human, failed_report(doc, &message, Kind::LedgerProblems))?;
    Err(Failure::reported(Kind::LedgerProblems, message))
}

fn prove(args: LedgerProveArgs, out: &Output) -> Result<()> {
    let is_digest = args.bundle.len() == 64
        && args
            .bundle
            .bytes()
            .all(|b| matches!(b, b'0'..=b'9' | b'a'..=b'f'));
    let sha256: Digest = if is_digest && !Path::new(&args.bundle).exists() {
        args.bundle
            .parse()
            .map_err(|_| anyhow::anyhow!("'{}' is not a sha256", args.bundle))?
    } else {
        let file = fs::File::open(&args.bundle)
            .with_context(|| format!("cannot open bundle {}", args.bundle))?;
        ampoule_verify::digest::hash_reader(file, u64::MAX)
            .with_context(|| format!("cannot read bundle {}", args.bundle))?
            .0
    };
    let source = Source::open(
        &LedgerSourceArgs {
            tree: Some(args.tree.clone()),
            url: None,
        },
        false,
        Sizing::Unverified { max_bytes: 0 },
    )?;
    let ledger = source.ledger()?;
    let Some((index, bytes)) =
        ledger.find_last(|e| e.event == Event::Publish && e.bundle_digest == sha256)?
    else {
        return Err(Refused(format!(
            "bundle {sha256} was never published: no publish entry in the ledger of {} names it",
            source.shown
        ))
        .into());
    };
    let entry = Entry::from_bytes(&bytes)?;
    let head = ledger
        .tree_head()
        .context("the ledger has entries but no tree head")?
        .head();
    let proof = ledger.inclusion_proof(index, head.tree_size)?;
    let leaf = merkle::leaf_hash(&bytes);
    proof
        .verify(&leaf, &head)
        .context("the ledger's own inclusion proof does not verify: run ledger check")?;
    let text = String::from_utf8(bytes).context("a ledger entry is not UTF-8")?;
    let mut human = format!(
        "{} {} (sha256 {sha256}) was published on channel {} at {}: entry {index}\n\
         tree head: size {}, root {}, {}\nleaf hash: {leaf}\ninclusion proof ({}, leaf level first):\n",
        entry.bundle,
        entry.version,
        entry.channel,
        time_text(entry.time),
        head.tree_size,
        head.root_hash,
        time_text(head.time),
        count(proof.hashes.len(), "hash", "hashes")
    );
    for h in &proof.hashes {
        human.push_str(&format!("  {h}\n"));
    }
    human.push_str("verified: the proof leads from the entry to the tree head's root\n");
    out.result(
        &human,
        json!({
            "ok": true,
            "entry": text,
            "leaf_hash": leaf,
            "tree_head": ledger.tree_head(),
            "inclusion": proof,
        }),
    )
}
