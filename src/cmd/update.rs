//! `ampoule update`: the device flow from the command line, for scripts and tests. It opens
//! the store, checks the channel's feed with what the store remembers, installs a newer bundle
//! or records the feed, and says in one line what happened.

use std::fs::{File, TryLockError};
use std::sync::Arc;

use ampoule_verify::fetch::Transfer;
use ampoule_verify::format::trust_set;
use ampoule_verify::{DocumentKind, Progress, Stage, Store, Timestamp, Verifier};
use anyhow::{Context, Result, bail};
use serde_json::{Value, json};

use crate::cli::UpdateArgs;
use crate::cmd::external::read_bounded;
use crate::cmd::{load_trust, parse_version};
use crate::device::{
    Checked, DOWNLOAD_LOCK, DOWNLOADS_DIR, Device, Outcome, check_device_id, stored_device_id,
};
use crate::output::Output;

pub fn run(args: UpdateArgs, out: &Output) -> Result<()> {
    let app_version = parse_version(&args.app_version, "--app-version")?;
    let channel = match &args.channel {
        Some(channel) => channel.clone(),
        None => channel_of(&args.feed)?,
    };
    ampoule_verify::feed::check_channel(&channel)?;
    if let Some(id) = &args.device_id {
        check_device_id(id)?;
    }
    let now = Timestamp::now();
    let (bundles, feed_keys, tree_head_keys, trust_set) = match &args.trust_set {
        Some(path) => {
            // As an app starts: the set it shipped with, or the newer one its store accepted
            // through a feed since.
            let initial = read_bounded(path, trust_set::MAX_BYTES, "a trust-set file")?;
            let trust = Store::load_trust_set(&args.store, &initial, now)
                .with_context(|| format!("trust set {} refused", path.display()))?;
            (
                Verifier::from_trust_set(&trust, app_version.clone())?,
                trust.keys_for(DocumentKind::Feed),
                trust.keys_for(DocumentKind::TreeHead),
                Some(trust),
            )
        }
        None => {
            let keys = load_trust(&args.trust)?;
            (
                Verifier::new(keys.clone(), app_version.clone())?,
                (keys.clone(), 1),
                (keys, 1),
                None,
            )
        }
    };
    // Without the ledger a bundle signed with a stolen key but never published would pass.
    let ledger_keys = (!args.dangerous_skip_ledger).then_some(tree_head_keys);
    let mut bundles = bundles.on_progress(out.verify_progress());
    if let Some(name) = &args.name {
        bundles = bundles.require_name(name.clone());
    }
    if let Some(max) = args.max_size {
        bundles = bundles.max_bundle_bytes(max).max_unpacked_bytes(max);
    }

    let store = Store::open(&args.store, bundles.clone())?;
    let device_id = match args.device_id {
        Some(id) => id,
        None => stored_device_id(&args.store)?,
    };
    let download_dir = args.store.join(DOWNLOADS_DIR);
    std::fs::create_dir_all(&download_dir)
        .with_context(|| format!("cannot create {}", download_dir.display()))?;
    let _lock = lock_downloads(&download_dir)?;

    let device = Device {
        store,
        feed_url: args.feed.clone(),
        channel: channel.clone(),
        feed_keys,
        ledger_keys,
        bundles,
        device_id: device_id.clone(),
        download_dir,
        transfer: Transfer::new().on_progress(download_progress(out)),
        trust_set,
    };
    let checked = device.check_rotating(now)?;
    report(&device, &checked, &app_version, out)
}

/// The channel named by a feed URL's file name: `.../feeds/<channel>.json`.
pub fn channel_of(feed_url: &str) -> Result<String> {
    let path = feed_url.split(['?', '#']).next().unwrap_or_default();
    let file = path.rsplit('/').next().unwrap_or_default();
    match file.strip_suffix(".json") {
        Some(name) if ampoule_verify::feed::check_channel(name).is_ok() => Ok(name.to_string()),
        _ => bail!(
            "cannot tell the channel from --feed '{feed_url}' (it does not end in \
             /<channel>.json); give --channel"
        ),
    }
}

/// Holds `downloads/lock` for the whole update: a second updater on the same store fails at
/// once instead of writing the same partial download.
fn lock_downloads(dir: &std::path::Path) -> Result<File> {
    let path = dir.join(DOWNLOAD_LOCK);
    let file = File::options()
        .create(true)
        .truncate(false)
        .write(true)
        .open(&path)
        .with_context(|| format!("cannot open {}", path.display()))?;
    match file.try_lock() {
        Ok(()) => Ok(file),
        Err(TryLockError::WouldBlock) => bail!(
            "another update is running on store {}; try again when it has finished",
            dir.parent().unwrap_or(dir).display()
        ),
        Err(TryLockError::Error(e)) => {
            Err(e).with_context(|| format!("cannot lock {}", path.display()))
        }
    }
}

/// A progress bar for the download, shown only on a terminal for large files.
fn download_progress(out: &Output) -> ampoule_verify::ProgressFn {
    let bars = out.verify_progress();
    Arc::new(move |p: Progress| {
        if p.stage == Stage::Download {
            bars(p);
        }
    })
}

fn report(
    device: &Device,
    checked: &Checked,
    app_version: &semver::Version,
    out: &Output,
) -> Result<()> {
    let outcome = &checked.outcome;
    let feed = outcome.feed();
    let state = device.store.state()?;
    let current = state.current.as_ref();
    let keeping = match (current, &state.name) {
        (Some(c), Some(name)) => format!("keeping {name} {}", c.version),
        _ => "nothing installed yet".to_string(),
    };
    let channel = &device.channel;
    let sequence = feed.sequence();
    let human = match outcome {
        Outcome::Updated { installed, .. } => {
            let m = &installed.release.manifest;
            let what = match &installed.replaced {
                Some(old) => format!("updated {} {old} -> {}", m.name, m.version),
                None => format!("installed {} {}", m.name, m.version),
            };
            format!(
                "{what} from channel {channel} (feed sequence {sequence}): {} labels, model at {}",
                installed.release.labels.len(),
                installed.release.model.display()
            )
        }
        Outcome::UpToDate { .. } => format!(
            "up to date: channel {channel} offers {} (feed sequence {sequence}); {keeping}",
            offered_text(outcome)
        ),
        Outcome::NotInRollout { bucket, .. } => format!(
            "not in the rollout yet: channel {channel} offers {} to {}% of devices, and device \
             {} is in bucket {bucket} of 10000 (feed sequence {sequence}); {keeping}",
            offered_text(outcome),
            outcome.offered().map_or(0, |r| r.rollout_percent),
            device.device_id
        ),
        Outcome::NothingCurrent { .. } => format!(
            "channel {channel} offers nothing: every release on it was withdrawn (feed sequence \
             {sequence}); {keeping}"
        ),
        Outcome::NeedsOtherApp { .. } => format!(
            "channel {channel} offers {}, which requires app {}, and this app is {app_version} \
             (feed sequence {sequence}); {keeping}",
            offered_text(outcome),
            outcome
                .offered()
                .map_or_else(String::new, |r| r.requires_app.to_string())
        ),
    };
    let human = match &checked.rotated {
        Some(next) => format!("trust set rotated to version {}; {human}", next.version()),
        None => human,
    };
    let offered = outcome.offered().map(|r| {
        json!({
            "name": r.name,
            "version": r.version.to_string(),
            "sha256": r.sha256,
            "size": r.size,
            "rollout_percent": r.rollout_percent,
            "requires_app": r.requires_app.to_string(),
        })
    });
    let installed = current.map(|c| {
        json!({
            "name": state.name,
            "version": c.version.to_string(),
            "release": c.release,
            "manifest_sha256": c.manifest_sha256,
        })
    });
    let mut doc = json!({
        "ok": true,
        "outcome": outcome.name(),
        "channel": channel,
        "sequence": sequence,
        "feed_sha256": feed.digest(),
        "feed_expires": feed.feed().expires,
        "device_id": device.device_id,
        "offered": offered,
        "current": installed,
        "store": device.store.dir(),
    });
    if let Some(trust) = checked.rotated.as_ref().or(device.trust_set.as_ref()) {
        doc["trust_set_version"] = json!(trust.version());
        doc["trust_set_rotated"] = json!(checked.rotated.is_some());
    }
    match outcome {
        Outcome::Updated { installed, .. } => {
            doc["replaced"] = installed
                .replaced
                .as_ref()
                .map_or(Value::Null, |v| v.to_string().into());
            doc["model"] = json!(installed.release.model);
        }
        Outcome::NotInRollout { bucket, .. } => doc["bucket"] = json!(bucket),
        _ => {}
    }
    out.result(&human, doc)
}

fn offered_text(outcome: &Outcome) -> String {
    outcome
        .offered()
        .map_or_else(|| "nothing".into(), |r| format!("{} {}", r.name, r.version))
}
