//! `ampoule store`: look into an on-device store, roll it back, clean it up; the library's
//! `Store` from the command line, for scripts and tests on the device side.

use ampoule_verify::store::{RELEASES_DIR, Release, STATE_FILE};
use ampoule_verify::{Store, Timestamp, Verifier};
use anyhow::{Context, Result, anyhow};
use serde_json::{Value, json};

use crate::cli::{StoreArgs, StoreCommand, StoreOptions};
use crate::cmd::{load_trust, parse_version, read_trust_set_file};
use crate::failure::{count, usage};
use crate::output::{Output, shown};

pub fn run(args: StoreArgs, out: &Output) -> Result<()> {
    match args.command {
        StoreCommand::Status(o) => status(&o, out),
        StoreCommand::Rollback(o) => rollback(&o, out),
        StoreCommand::Gc(o) => gc(&o, out),
    }
}

/// Opens the store with the app's verifier: its trusted keys (or the newest trust set the
/// store accepted, starting from the one given) and its version. Returns the version of the
/// trust set in use, if any.
fn open(o: &StoreOptions) -> Result<(Store, Option<u64>)> {
    // The library makes a store where there is none (an app's first start); a command that
    // only looks at one, rolls it back or cleans it up must not leave an empty one behind a
    // mistyped path.
    // A store that lost its state but kept releases is damaged, not absent: the library
    // says so.
    if !o.store.join(STATE_FILE).exists() && !o.store.join(RELEASES_DIR).exists() {
        return Err(usage(anyhow!(
            "{} is not a store (it has no {STATE_FILE}); give the directory an app keeps its \
             models in, or make one with 'ampoule update --store {}'",
            o.store.display(),
            o.store.display()
        )));
    }
    let app_version = parse_version(&o.app_version, "--app-version")?;
    let (verifier, trust_set) = match &o.trust_set {
        Some(path) => {
            let (initial, _) = read_trust_set_file(path)?;
            // Signatures only, at the earliest instant: an expired set still checks the model
            // the device verified and runs (expiry stops new installs, which this is not).
            let unexpired = Timestamp::from_unix(0).expect("the epoch is a timestamp");
            let trust = Store::load_trust_set(&o.store, &initial, unexpired)
                .with_context(|| format!("trust set {} refused", path.display()))?;
            (
                Verifier::from_trust_set(&trust, app_version)?,
                Some(trust.version()),
            )
        }
        None => (Verifier::new(load_trust(&o.trust)?, app_version)?, None),
    };
    Ok((Store::open(&o.store, verifier)?, trust_set))
}

fn release_json(r: &Release) -> Value {
    json!({
        "name": r.manifest.name,
        "version": r.manifest.version.to_string(),
        "dir": r.dir,
        "model": r.model,
        "labels": r.labels.len(),
        "manifest_sha256": r.manifest_sha256,
        "signers": r.signers.iter().map(|k| k.to_string()).collect::<Vec<_>>(),
    })
}

fn status(o: &StoreOptions, out: &Output) -> Result<()> {
    let (store, trust_set) = open(o)?;
    // The full check an app makes before it loads the model: digests and signatures.
    let current = store.open_current()?;
    let state = store.state()?;
    let mut human = match &current {
        Some(r) => format!(
            "current  {} {} ({}; model {}) checked: digests and signatures match\n",
            shown(&r.manifest.name),
            r.manifest.version,
            count(r.labels.len(), "label", "labels"),
            r.model.display()
        ),
        None => "current  nothing installed\n".to_string(),
    };
    let or_none = |v: Option<String>| v.unwrap_or_else(|| "none".into());
    human.push_str(&format!(
        "previous {}\nhighest  {} (never lowered: anything not newer is refused)\n",
        or_none(state.previous.as_ref().map(|p| p.version.to_string())),
        or_none(state.highest_version.as_ref().map(|v| v.to_string())),
    ));
    for (channel, c) in &state.channels {
        human.push_str(&format!(
            "channel  {channel}: feed sequence {}\n",
            or_none(c.highest_sequence.map(|s| s.to_string()))
        ));
    }
    human.push_str(&match trust_set {
        Some(version) => format!(
            "trust    trust set version {version} (the newer of --trust-set and the one the store \
             accepted)\n"
        ),
        None => "trust    no trust set: the keys given with --trust\n".to_string(),
    });
    if let Some(head) = &state.tree_head {
        human.push_str(&format!(
            "ledger   largest tree head seen: size {}, root {}\n",
            head.tree_size, head.root_hash
        ));
    }
    // A trust chain the store holds but cannot prove from the shipped set is not believed:
    // say why, so that whoever looks knows something else wrote the store.
    let ignored = match &o.trust_set {
        Some(path) => {
            let (initial, _) = read_trust_set_file(path)?;
            store.trust_chain(&initial)?.2
        }
        None => None,
    };
    if let Some(why) = &ignored {
        human.push_str(&format!(
            "ignored  {} (not believed: the device runs on the trust sets before it)\n",
            why.escape_debug()
        ));
    }
    // Names come from whoever planted them: shown escaped.
    for removed in &state.removed {
        human.push_str(&format!(
            "removed  {} (planted in the store by someone else; the update removed it without \
             following it)\n",
            removed.escape_debug()
        ));
    }
    out.result(
        &human,
        json!({
            "ok": true,
            "removed": state.removed,
            "trust_chain_ignored": ignored,
            "current": current.as_ref().map(release_json),
            "previous": state.previous.as_ref().map(|p| p.version.to_string()),
            "highest_version": state.highest_version.as_ref().map(|v| v.to_string()),
            "channels": state.channels.iter().map(|(name, c)| {
                (name.clone(), json!({ "highest_sequence": c.highest_sequence }))
            }).collect::<serde_json::Map<_, _>>(),
            "tree_head_size": state.tree_head.as_ref().map(|h| h.tree_size),
            "trust_set_version": trust_set,
        }),
    )
}

fn rollback(o: &StoreOptions, out: &Output) -> Result<()> {
    let (store, _) = open(o)?;
    let from = store.state()?.current.map(|c| c.version.to_string());
    let back = store.rollback()?;
    let human = format!(
        "rolled back from {} to {} {}; {} stays refused, and so is anything not newer than it",
        from.as_deref().unwrap_or("nothing"),
        shown(&back.manifest.name),
        back.manifest.version,
        from.as_deref().unwrap_or("it"),
    );
    out.result(
        &human,
        json!({ "ok": true, "from": from, "current": release_json(&back) }),
    )
}

fn gc(o: &StoreOptions, out: &Output) -> Result<()> {
    let (store, _) = open(o)?;
    let removed = store.gc()?;
    let human = if removed.is_empty() {
        "nothing to remove: the store holds only its current and previous releases".to_string()
    } else {
        let list: Vec<String> = removed.iter().map(|p| p.display().to_string()).collect();
        format!("removed {}", list.join(", "))
    };
    out.result(&human, json!({ "ok": true, "removed": removed }))
}
