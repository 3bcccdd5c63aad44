//! `ampoule publish`: checks a bundle, copies it into the release tree under its content
//! address and makes it the current release of a channel with a newly signed feed; or, with
//! `--trust-set`, publishes a trust set that devices take as the successor of theirs.

use std::path::Path;

use ampoule_verify::feed::{Feed, Release};
use ampoule_verify::ledger::{Entry as LedgerEntry, FeedLedger};
use ampoule_verify::{DocumentKind, KeyId, PublicKey, Timestamp, TrustSet, TrustedKeys, Verifier};
use anyhow::{Context, Result};
use serde_json::{Value, json};

use crate::cli::PublishArgs;
use crate::cmd::{load_trust_named, name_trusted, passphrase_source};
use crate::output::Output;
use crate::release::keyfile;
use crate::release::tree::{
    Action, Change, Plan, Signing, Tree, TrustSetPlan, check_bundle, parse_duration,
};
use crate::release::tree_deltas::{self, Deltas};

pub fn run(args: PublishArgs, out: &Output) -> Result<()> {
    let expires_in_secs = parse_duration(&args.expires_in)?;
    if let Some(trust_set) = &args.trust_set {
        return publish_trust_set(&args, trust_set, expires_in_secs, out);
    }
    let (Some(bundle), Some(channel)) = (&args.bundle, &args.channel) else {
        anyhow::bail!("publish needs a bundle and --channel, or --trust-set FILE");
    };
    crate::cmd::check_channel_arg(channel)?;
    if args.rollout > 100 {
        anyhow::bail!(
            "--rollout {} is not a percentage from 0 to 100",
            args.rollout
        );
    }
    tree_deltas::check_count(args.deltas)?;
    let key = keyfile::read_secret_key(&args.key, &passphrase_source(&args.passphrase))?;
    let tree_head_keys = read_tree_head_keys(&args.tree_head_key, &args.passphrase)?;
    let outside = outside_signer(&args.tree_head_signer, &args.tree_head_signer_key)?;
    let now = Timestamp::now();
    // Publishing checks the bundle the way devices will: with --trust against those keys;
    // else against the tree's trust set (its bundle keys and threshold); else the feed key
    // must have signed the bundle too.
    let (trust, trust_names) = load_trust_named(&args.trust)?;
    let feed_key = PublicKey::from_verifying_key(&key.verifying_key())?;
    let verifier = |tree: Option<&Tree>| -> Result<(Verifier, String)> {
        let current = match tree {
            Some(tree) => tree.current_trust_set()?,
            None => None,
        };
        Ok(if !args.trust.is_empty() {
            (
                ampoule_verify::dangerous::verifier_without_app_version(trust.clone())?,
                trust_names.clone(),
            )
        } else if let Some(current) = current {
            let trust = current.verified(now)?;
            let (keys, threshold) = trust.keys_for(DocumentKind::Bundle);
            // The trust set's keys have no files here; its ids are in the refusal already.
            (
                ampoule_verify::dangerous::verifier_without_app_version(keys)?
                    .with_threshold(threshold)?,
                String::new(),
            )
        } else {
            (
                ampoule_verify::dangerous::verifier_without_app_version(
                    [feed_key.clone()].into_iter().collect::<TrustedKeys>(),
                )?,
                format!(
                    "only the feed key {} ({}), since neither --trust nor a trust set in the \
                     tree names the bundle keys",
                    feed_key.id(),
                    args.key.display()
                ),
            )
        })
    };
    if !args.tree.exists() {
        // Locking makes the tree's directories, so a refused bundle would leave an empty
        // tree behind. A new tree has no trust set and no history, so these checks are the
        // only ones that can refuse: run them first. The copy is checked again once staged.
        let (check, trusted) = verifier(None)?;
        check_bundle(bundle, &check).map_err(|e| name_trusted(e, &trusted))?;
    }
    let wait = std::time::Duration::from_secs(args.lock_wait);
    if args.dry_run {
        let tree = Tree::read_only(&args.tree, wait)?;
        let (check, trusted) = verifier(Some(&tree))?;
        let facts = check_bundle(bundle, &check).map_err(|e| name_trusted(e, &trusted))?;
        let signing = Signing {
            key: &key,
            key_file: Some(&args.key),
            now,
            expires_in_secs,
            tree_head_keys: &tree_head_keys,
            outside: &outside,
        };
        tree.plan_publish(&facts, channel, args.rollout, &args.mirror, &[], &signing)?;
        // The deltas are made as a publish would make them, to show their exact sizes, but in
        // a temporary directory outside the tree, removed afterwards.
        let scratch = tempfile::tempdir().context("cannot create a temporary directory")?;
        let deltas = tree.deltas(bundle, &facts, channel, args.deltas, scratch.path())?;
        let plan = tree.plan_publish(
            &facts,
            channel,
            args.rollout,
            &args.mirror,
            &deltas.references(),
            &signing,
        )?;
        let warning = tree_head_warning(&tree, &signing)?;
        drop(tree);
        report_plan(&plan, Some(&deltas), &signing, &args.key, out)?;
        if let Some(w) = warning {
            out.note(&w);
        }
        return Ok(());
    }
    let tree = Tree::lock_waiting(&args.tree, wait)?;
    let (check, trusted) = verifier(Some(&tree))?;
    let staged = tree
        .stage_bundle_with(bundle, check)
        .map_err(|e| name_trusted(e, &trusted))?;
    let signing = Signing {
        key: &key,
        key_file: Some(&args.key),
        now,
        expires_in_secs,
        tree_head_keys: &tree_head_keys,
        outside: &outside,
    };
    let (change, deltas) = tree.publish(
        staged,
        channel,
        args.rollout,
        &args.mirror,
        args.deltas,
        &signing,
    )?;
    let warning = tree_head_warning(&tree, &signing)?;
    drop(tree);
    report(&change, Some(&deltas), &args.key, out)?;
    if let Some(w) = warning {
        out.note(&w);
    }
    Ok(())
}

/// Publishes a trust set into the tree and signs every channel's feed again to name it.
fn publish_trust_set(
    args: &PublishArgs,
    path: &Path,
    expires_in_secs: u64,
    out: &Output,
) -> Result<()> {
    let (bytes, _) = crate::cmd::read_trust_set_file(path)?;
    let key = keyfile::read_secret_key(&args.key, &passphrase_source(&args.passphrase))?;
    let tree_head_keys = read_tree_head_keys(&args.tree_head_key, &args.passphrase)?;
    let outside = outside_signer(&args.tree_head_signer, &args.tree_head_signer_key)?;
    if !args.tree.exists() {
        // As for a bundle: a set the new tree would refuse must not leave an empty tree.
        TrustSet::verify_initial(&bytes, Timestamp::now()).with_context(|| {
            format!(
                "trust set {} refused; nothing was published",
                path.display()
            )
        })?;
    }
    let wait = std::time::Duration::from_secs(args.lock_wait);
    let signing = Signing {
        key: &key,
        key_file: Some(&args.key),
        now: Timestamp::now(),
        expires_in_secs,
        tree_head_keys: &tree_head_keys,
        outside: &outside,
    };
    if args.dry_run {
        let tree = Tree::read_only(&args.tree, wait)?;
        let plan = tree.plan_trust_set(&bytes, &signing).with_context(|| {
            format!(
                "trust set {} refused; nothing would be published",
                path.display()
            )
        })?;
        drop(tree);
        return report_trust_set_plan(&args.tree, &plan, out);
    }
    let tree = Tree::lock_waiting(&args.tree, wait)?;
    let change = tree.publish_trust_set(&bytes, &signing).with_context(|| {
        format!(
            "trust set {} refused; nothing was published",
            path.display()
        )
    })?;
    if let Some(w) = tree_head_warning(&tree, &signing)? {
        out.note(&w);
    }
    // Each renewed feed was logged in the ledger as a renewal of its channel's release; the
    // trust set itself is in the tree under trust/ (its own ledger event is still to come).
    drop(tree);
    let t = &change.trust_set;
    let was = change
        .previous_version
        .map_or_else(|| "none".to_string(), |v| format!("version {v}"));
    let mut human = format!(
        "release tree {} now names trust set version {} ({}, sha256 {})\nwas: {was}\n",
        args.tree.display(),
        t.version,
        t.path.display(),
        t.sha256
    );
    for c in &change.feeds {
        human.push_str(&format!(
            "feed {} sequence {} renewed, expires {}, signed by key {} ({})\n",
            c.feed_path.display(),
            c.feed.sequence,
            c.feed.expires,
            c.signer,
            args.key.display()
        ));
    }
    if change.feeds.is_empty() {
        human.push_str("no channel has a feed yet; the next publish names this trust set\n");
    }
    out.result(
        &human,
        json!({
            "ok": true,
            "trust_set": {
                "version": t.version,
                "path": t.path,
                "sha256": t.sha256,
            },
            "previous_version": change.previous_version,
            "feeds": change.feeds.iter().map(|c| json!({
                "channel": c.channel,
                "sequence": c.feed.sequence,
                "expires": c.feed.expires,
                "feed": c.feed_path,
                "signer": c.signer.to_string(),
            })).collect::<Vec<_>>(),
        }),
    )
}

/// The warning `publish` and `withdraw` print when the feed key alone meets the tree-head
/// threshold: then a thief of the runner's feed key signs feeds and the tree heads they carry,
/// and the device's ledger checks (the feed's entry is its channel's newest) no longer hold
/// against that thief (issue 10 item 3). Under the tree's trust set the roles say; with
/// pinned keys (no trust set) the tree cannot know what devices pin, so it warns when the
/// feed key is the only key signing tree heads.
pub fn tree_head_warning(tree: &Tree, signing: &Signing<'_>) -> Result<Option<String>> {
    let feed_key = KeyId::of_raw_key(signing.key.verifying_key().as_bytes());
    let named = match signing.key_file {
        Some(file) => format!("{feed_key} ({})", file.display()),
        None => feed_key.to_string(),
    };
    let advice = "give the publishing runner's key the feed role only and sign tree heads with \
                  a key it does not hold (FORMAT.md, \"Who signs tree heads\")";
    if let Some(current) = tree.current_trust_set()? {
        let file = ampoule_verify::TrustSetFile::from_json(&current.bytes)?;
        let alone = crate::cmd::trust::feed_keys_meeting_tree_head_alone(file.body());
        return Ok(alone.contains(&feed_key).then(|| {
            format!(
                "warning: the feed key {named} alone meets the tree_head threshold of trust set \
                 version {}: whoever holds it can make devices accept feeds that the ledger does \
                 not check; {advice}",
                current.version
            )
        }));
    }
    Ok((signing.tree_head_keys.is_empty() && signing.outside.is_empty()).then(|| {
        format!(
            "warning: the ledger's tree heads are signed by the feed key {named} alone: devices \
             that also trust it for tree heads cannot tell a feed signed with a stolen feed key \
             from a genuine one; {advice}, given with --tree-head-signer or --tree-head-key"
        )
    }))
}

/// The `--tree-head-signer` commands, each with the public key (`--tree-head-signer-key`, in
/// the same order) its signatures must verify under.
pub fn outside_signer(
    commands: &[String],
    keys: &[std::path::PathBuf],
) -> Result<Vec<crate::release::ledger_audit::OutsideHeadSigner>> {
    if commands.len() != keys.len() {
        return Err(crate::Refused(format!(
            "{} --tree-head-signer command(s) but {} --tree-head-signer-key file(s): give one key \
             for each signer, in the same order",
            commands.len(),
            keys.len()
        ))
        .into());
    }
    commands
        .iter()
        .zip(keys)
        .map(|(command, key)| {
            Ok(crate::release::ledger_audit::OutsideHeadSigner {
                command: command.clone(),
                key: keyfile::read_public_key(key)?,
            })
        })
        .collect()
}

/// Reads the `--tree-head-key` files: keys that sign the ledger's tree head besides the feed
/// key (all with the same passphrase source). Giving the feed key again is refused by the
/// ledger append, since a tree head counts each key once.
pub fn read_tree_head_keys(
    paths: &[std::path::PathBuf],
    passphrase: &crate::cli::PassphraseArgs,
) -> Result<Vec<ed25519_dalek::SigningKey>> {
    paths
        .iter()
        .map(|path| keyfile::read_secret_key(path, &passphrase_source(passphrase)))
        .collect()
}

/// A release as `--json` shows it.
pub fn release_json(r: &Release) -> Value {
    json!({
        "name": r.name,
        "version": r.version.to_string(),
        "sha256": r.sha256,
        "size": r.size,
        "rollout_percent": r.rollout_percent,
        "path": r.path,
    })
}

/// What a publish or withdraw did or, in a dry run, would do; printed by [`Report::print`].
struct Report<'a> {
    action: Action,
    dry_run: bool,
    channel: &'a str,
    feed: &'a Feed,
    feed_path: &'a Path,
    previous: Option<&'a Release>,
    signer: KeyId,
    key_file: &'a Path,
    entry: &'a LedgerEntry,
    entry_index: u64,
    /// The deltas of a publish (none for a withdraw).
    deltas: Option<&'a Deltas>,
}

impl Report<'_> {
    /// The first line: in plain words, what happened to the channel.
    fn headline(&self) -> String {
        let would = if self.dry_run { "would " } else { "" };
        let channel = self.channel;
        let (name, version) = (&self.entry.bundle, &self.entry.version);
        match self.action {
            Action::Published => {
                let verb = if self.dry_run { "publish" } else { "published" };
                format!("{would}{verb} {name} {version} on channel {channel}: a new release")
            }
            Action::Renewed => {
                let verb = if self.dry_run { "renew" } else { "renewed" };
                let new = self.feed.release.as_ref().map_or(0, |r| r.rollout_percent);
                let rollout = match self.previous.map(|r| r.rollout_percent) {
                    Some(old) if old != new => format!("rollout {old}% -> {new}%"),
                    _ => format!("rollout {new}% as before"),
                };
                format!(
                    "{would}{verb} the feed only: {name} {version} is already the current \
                     release on channel {channel} (new sequence and expiry, {rollout})"
                )
            }
            Action::Withdrawn | Action::TrustSetNamed => {
                let verb = if self.dry_run { "withdraw" } else { "withdrew" };
                format!("{would}{verb} {name} {version} from channel {channel}")
            }
        }
    }

    fn print(&self, ledger: Option<&FeedLedger>, out: &Output) -> Result<()> {
        let feed = self.feed;
        let offers = match &feed.release {
            Some(r) => format!(
                "{} {} ({} bytes, sha256 {}) at {}% rollout",
                r.name, r.version, r.size, r.sha256, r.rollout_percent
            ),
            None => "nothing (release: null; devices keep what they have)".into(),
        };
        let was = match self.previous {
            Some(r) => format!("{} {}", r.name, r.version),
            None => "nothing".into(),
        };
        let entry_text = String::from_utf8_lossy(&self.entry.to_bytes()).into_owned();
        let deltas_text = self.deltas.map_or_else(String::new, |d| {
            deltas_text(d, feed.release.as_ref(), self.dry_run)
        });
        let deltas = self.deltas.map(deltas_json);
        let mut human = format!(
            "{}
",
            self.headline()
        );
        if self.dry_run {
            human.push_str(&format!(
                "channel {} would offer {offers}
now: {was}
feed {} would get sequence {}, \
                 expires {}, signed by key {} ({})
{}ledger: would append entry {}: {entry_text}
\
                 dry run: nothing was written
",
                self.channel,
                self.feed_path.display(),
                feed.sequence,
                feed.expires,
                self.signer,
                self.key_file.display(),
                deltas_text,
                self.entry_index,
            ));
        } else {
            human.push_str(&format!(
                "channel {} now offers {offers}
was: {was}
feed {} sequence {}, expires {}, \
                 signed by key {} ({})
{}",
                self.channel,
                self.feed_path.display(),
                feed.sequence,
                feed.expires,
                self.signer,
                self.key_file.display(),
                deltas_text,
            ));
        }
        let ledger = ledger.map(|l| {
            let head = l.tree_head.head();
            human.push_str(&format!(
                "ledger: entry {} logged, tree size {}, root {}\n",
                head.tree_size - 1,
                head.tree_size,
                head.root_hash
            ));
            json!({
                "tree_size": head.tree_size,
                "root_hash": head.root_hash,
                "leaf_index": l.inclusion.as_ref().map(|p| p.leaf_index),
            })
        });
        let entry: Value =
            serde_json::from_slice(&self.entry.to_bytes()).expect("a ledger entry is JSON");
        out.result(
            &human,
            json!({
                "ok": true,
                "action": self.action.name(),
                "dry_run": self.dry_run,
                "channel": self.channel,
                "sequence": feed.sequence,
                "issued": feed.issued,
                "expires": feed.expires,
                "feed": self.feed_path,
                "signer": self.signer.to_string(),
                "release": feed.release.as_ref().map(release_json),
                "previous": self.previous.map(release_json),
                "ledger_entry": entry,
                "ledger_entry_index": self.entry_index,
                "ledger": ledger,
                "deltas": deltas.as_ref().map(|d| &d["offered"]),
                "deltas_skipped": deltas.as_ref().map(|d| &d["skipped"]),
                "deltas_dropped": deltas.as_ref().map(|d| &d["dropped"]),
            }),
        )
    }
}

/// The text lines on a publish's deltas: each offered (from which release, size, share of the
/// bundle), each base skipped and why, each dropped from a renewal and why; nothing when the
/// channel has no earlier release of the name.
fn deltas_text(deltas: &Deltas, release: Option<&Release>, dry_run: bool) -> String {
    let bundle = release.map_or(0, |r| r.size).max(1);
    let path = |sha256| {
        format!(
            "{}/{sha256}.{}",
            crate::release::tree::BUNDLES_DIR,
            ampoule_verify::format::delta::EXTENSION
        )
    };
    let mut text = String::new();
    for o in &deltas.offered {
        let r = &o.reference;
        let from = o.from.as_ref().map_or_else(
            || format!("base {} (offered before)", r.base),
            |b| format!("{} {} (base {})", b.name, b.version, r.base),
        );
        let written = match (dry_run, o.new) {
            (true, _) => "would offer (made in a temporary directory for its size)",
            (false, true) => "wrote",
            (false, false) => "offers (already in the tree)",
        };
        text.push_str(&format!(
            "delta from {from}: {written} {}, {} bytes ({:.2}% of the bundle)\n",
            path(r.sha256),
            r.size,
            r.size as f64 * 100.0 / bundle as f64
        ));
    }
    for s in &deltas.skipped {
        text.push_str(&format!(
            "no delta from {} {}: {}\n",
            s.from.name, s.from.version, s.reason
        ));
    }
    for (r, why) in &deltas.dropped {
        text.push_str(&format!(
            "delta {} (base {}) no longer offered: {why}\n",
            path(r.sha256),
            r.base
        ));
    }
    text
}

/// The same for `--json`: `offered`, `skipped` and `dropped` lists.
fn deltas_json(deltas: &Deltas) -> Value {
    let base = |b: &tree_deltas::Base| json!({"name": b.name, "version": b.version.to_string(), "bundle_sha256": b.bundle});
    let path = |sha256| {
        format!(
            "{}/{sha256}.{}",
            crate::release::tree::BUNDLES_DIR,
            ampoule_verify::format::delta::EXTENSION
        )
    };
    json!({
        "offered": deltas.offered.iter().map(|o| json!({
            "from": o.from.as_ref().map(base),
            "base": o.reference.base,
            "size": o.reference.size,
            "sha256": o.reference.sha256,
            "path": path(o.reference.sha256),
            "new": o.new,
        })).collect::<Vec<_>>(),
        "skipped": deltas.skipped.iter().map(|s| json!({
            "from": base(&s.from),
            "size": s.size,
            "reason": s.reason,
        })).collect::<Vec<_>>(),
        "dropped": deltas.dropped.iter().map(|(r, why)| json!({
            "base": r.base,
            "size": r.size,
            "sha256": r.sha256,
            "reason": why,
        })).collect::<Vec<_>>(),
    })
}

/// Prints what a publish or withdraw changed.
pub fn report(
    change: &Change,
    deltas: Option<&Deltas>,
    key_file: &Path,
    out: &Output,
) -> Result<()> {
    let ledger = change.feed.ledger.as_ref();
    Report {
        action: change.action,
        dry_run: false,
        channel: &change.channel,
        feed: &change.feed,
        feed_path: &change.feed_path,
        previous: change.previous.as_ref(),
        signer: change.signer,
        key_file,
        entry: &change.entry,
        entry_index: ledger.map_or(0, |l| l.tree_head.head().tree_size - 1),
        deltas,
    }
    .print(ledger, out)
}

/// Prints what a dry run of a publish or withdraw would write.
pub fn report_plan(
    plan: &Plan,
    deltas: Option<&Deltas>,
    signing: &Signing<'_>,
    key_file: &Path,
    out: &Output,
) -> Result<()> {
    Report {
        action: plan.action,
        dry_run: true,
        channel: &plan.channel,
        feed: &plan.feed,
        feed_path: &plan.feed_path,
        previous: plan.previous.as_ref(),
        signer: KeyId::of_raw_key(signing.key.verifying_key().as_bytes()),
        key_file,
        entry: &plan.entry,
        entry_index: plan.entry_index,
        deltas,
    }
    .print(None, out)
}

/// What a trust-set publish would write, for `--dry-run`: nothing was written.
fn report_trust_set_plan(tree: &Path, plan: &TrustSetPlan, out: &Output) -> Result<()> {
    let entry = &plan.entry;
    let was = plan
        .previous_version
        .map_or_else(|| "none".to_string(), |v| format!("version {v}"));
    let mut human = format!(
        "dry run: nothing was written
would publish trust set version {} (sha256 {}) into \
         release tree {}
was: {was}
would append ledger entry: {}\n",
        entry.trust_set_version,
        entry.trust_set_digest,
        tree.display(),
        String::from_utf8_lossy(&entry.to_bytes())
    );
    for (channel, sequence, release) in &plan.renewed {
        human.push_str(&format!(
            "would renew feed {channel} as sequence {sequence}, naming {} {}\n",
            release.name, release.version
        ));
    }
    if plan.renewed.is_empty() {
        human.push_str("no channel has a release to renew a feed for\n");
    }
    let entry_json: serde_json::Value =
        serde_json::from_slice(&entry.to_bytes()).expect("a ledger entry is JSON");
    out.result(
        &human,
        serde_json::json!({
            "ok": true,
            "dry_run": true,
            "trust_set_version": entry.trust_set_version,
            "trust_set_sha256": entry.trust_set_digest,
            "previous_version": plan.previous_version,
            "ledger_entry": entry_json,
            "renewed": plan.renewed.iter().map(|(channel, sequence, release)| serde_json::json!({
                "channel": channel,
                "sequence": sequence,
                "name": release.name,
                "version": release.version.to_string(),
            })).collect::<Vec<_>>(),
        }),
    )
}
