//! `ampoule update`: the device flow from the command line, for scripts and tests. It opens
//! the store, checks the channel's feed with what the store remembers, installs a newer bundle
//! or records the feed, and says in one line what happened. With `--offline` the feed and
//! everything else come from an offline file instead of the network.

use std::sync::Arc;

use ampoule_verify::fetch::Transfer;
use ampoule_verify::signed::Signers;
use ampoule_verify::{
    App, Device, Outcome, Progress, Report, Stage, Store, Timestamp, Trust, dangerous,
};
use anyhow::{Context, Result, bail};
use serde_json::{Value, json};

use crate::cli::UpdateArgs;
use crate::cmd::{load_trust, parse_version};
use crate::failure::count;
use crate::output::{Output, shown};

pub fn run(args: UpdateArgs, out: &Output) -> Result<()> {
    let app_version = parse_version(&args.app_version, "--app-version")?;
    let channel = match (&args.channel, &args.feed, &args.offline) {
        (Some(channel), _, _) => channel.clone(),
        (None, Some(feed), _) => channel_of(feed)?,
        (None, None, Some(file)) => ampoule_verify::update::offline_channel(file)?,
        (None, None, None) => bail!("give --feed URL, or --offline FILE"),
    };
    crate::cmd::check_channel_arg(&channel)?;
    let now = Timestamp::now();
    let trust = match &args.trust_set {
        Some(path) => {
            // As an app starts: the set it shipped with, or the newer one its store accepted
            // through a feed since.
            let (initial, _) = crate::cmd::read_trust_set_file(path)?;
            let refused = || format!("trust set {} refused", path.display());
            let trust = Trust::shipped_trust_set(initial.clone()).with_context(refused)?;
            // Signatures only, at the earliest instant: a set that has expired still runs the
            // model the device verified, and the update renews it through the tree (or says
            // why it cannot), as an app's would.
            let unexpired = Timestamp::from_unix(0).expect("the epoch is a timestamp");
            Store::load_trust_set(&args.store, &initial, unexpired).with_context(refused)?;
            trust
        }
        None => {
            // --trust keys hold every role; --trust-bundle only bundles; --trust-feed only
            // feeds and tree heads, so a feed key never ships a model by itself.
            let bundle = load_trust(&[&args.trust[..], &args.trust_bundle[..]].concat())?;
            let feed = load_trust(&[&args.trust[..], &args.trust_feed[..]].concat())?;
            if bundle.is_empty() || feed.is_empty() {
                return Err(crate::failure::usage(anyhow::anyhow!(
                    "no key is trusted for {}; give --trust-bundle RELEASE.pem and --trust-feed \
                     FEED.pem (or --trust for a key that signs both, or --trust-set)",
                    if bundle.is_empty() {
                        "bundles"
                    } else {
                        "feeds"
                    }
                )));
            }
            Trust::pinned(
                Signers::new(bundle, 1)?,
                Signers::new(feed.clone(), 1)?,
                Signers::new(feed, 1)?,
            )
        }
    };
    let mut app = App::new(trust, app_version.clone()).on_progress(out.verify_progress());
    if let Some(id) = &args.device_id {
        app = app.device_id(id.clone())?;
    }
    // The policy document first, so that --name and --max-size win over it.
    if let (Some(path), Some(document)) = (
        &args.require_meta.policy,
        crate::cmd::policy_document_bytes(&args.require_meta)?,
    ) {
        app = app
            .policy_document(&document)
            .with_context(|| format!("--policy {}", path.display()))
            .map_err(crate::failure::usage)?;
    }
    if let Some(name) = &args.name {
        app = app.bundle_name(name.clone())?;
    }
    if let Some(max) = args.max_size {
        app = app.max_bundle_bytes(max).max_unpacked_bytes(max);
    }
    if let Some(policy) = crate::cmd::metadata_policy(&args.require_meta)? {
        app = app.compatibility(policy);
    }
    if args.dangerous_skip_ledger {
        // Without the ledger a bundle signed with a stolen key but never published would pass.
        app = dangerous::skip_ledger(app);
    }
    let device = Device::open(&args.store, &channel, app, now)?;
    if args.switch_channel {
        device.store().switch_channel(&channel)?;
    }
    let report = match (&args.offline, &args.feed) {
        (Some(file), _) => device.install_offline(file, now),
        (None, Some(feed)) => {
            let transfer = Transfer::new().on_progress(download_progress(out));
            device.update(feed, &transfer, now)
        }
        (None, None) => bail!("give --feed URL, or --offline FILE"),
    };
    let report = report.into_result()?;
    show(&device, &report, &app_version, out)
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

/// A progress bar for the download, shown only on a terminal for large files.
fn download_progress(out: &Output) -> ampoule_verify::ProgressFn {
    let bars = out.verify_progress();
    Arc::new(move |p: Progress| {
        if p.stage == Stage::Download {
            bars(p);
        }
    })
}

fn show(
    device: &Device,
    report: &Report,
    app_version: &semver::Version,
    out: &Output,
) -> Result<()> {
    let outcome = &report.outcome;
    let Some(feed) = &report.feed else {
        // Only a feed in a format this build cannot read ends without a verified feed.
        let reason = match outcome {
            Outcome::NeedsOtherApp { reason } => reason.clone(),
            other => other.name().to_string(),
        };
        return out.result(
            &reason,
            json!({ "ok": true, "outcome": "needs_other_app", "reason": reason }),
        );
    };
    let state = device.store().state()?;
    let current = state.current.as_ref();
    let keeping = match (current, &state.name) {
        (Some(c), Some(name)) => format!("keeping {name} {}", c.version),
        _ => "nothing installed yet".to_string(),
    };
    let channel = device.channel();
    let sequence = feed.sequence();
    let offered = feed.release();
    let offered_text = offered.map_or_else(
        || "nothing".to_string(),
        |r| format!("{} {}", shown(&r.name), r.version),
    );
    let human = match outcome {
        Outcome::Installed(installed) => {
            let m = &installed.release.manifest;
            let what = match &installed.replaced {
                Some(old) => format!("updated {} {old} -> {}", shown(&m.name), m.version),
                None => format!("installed {} {}", shown(&m.name), m.version),
            };
            let done = format!(
                "{what} from channel {channel} (feed sequence {sequence}): {}, model at {}",
                count(installed.release.labels.len(), "label", "labels"),
                installed.release.model.display(),
            );
            match delivery(report) {
                Some(how) => format!("{done}; {how}"),
                None => done,
            }
        }
        Outcome::UpToDate => format!(
            "up to date: channel {channel} offers {offered_text} (feed sequence {sequence}); \
             {keeping}"
        ),
        Outcome::NotInRollout { bucket } => format!(
            "not in the rollout yet: channel {channel} offers {offered_text} to {}% of devices, \
             and device {} is in bucket {bucket} of 10000 (feed sequence {sequence}); {keeping}",
            offered.map_or(0, |r| r.rollout_percent),
            device.device_id()
        ),
        Outcome::NothingOffered => format!(
            "channel {channel} offers nothing: every release on it was withdrawn (feed sequence \
             {sequence}); {keeping}"
        ),
        Outcome::NeedsOtherApp { .. } => format!(
            "channel {channel} offers {offered_text}, which requires app {}, and this app is \
             {app_version} (feed sequence {sequence}); {keeping}",
            offered.map_or_else(String::new, |r| r.requires_app.to_string())
        ),
        other => bail!("the update ended as {}", other.name()),
    };
    let human = match report.rotated_to {
        Some(version) => format!("trust set rotated to version {version}; {human}"),
        None => human,
    };
    // Planted links and the like, removed without following them (issue 10): the update went
    // on, but someone else writes the store directory. Names are shown escaped.
    let human = report.removed.iter().fold(human, |human, removed| {
        format!(
            "removed {} from the store: it was not put there by ampoule; {human}",
            removed.escape_debug()
        )
    });
    let offered_json = offered.map(|r| {
        json!({
            "name": r.name,
            "version": r.version.to_string(),
            "sha256": r.sha256,
            "size": r.size,
            "rollout_percent": r.rollout_percent,
            "requires_app": r.requires_app.to_string(),
            "deltas": r.deltas.iter().map(|d| json!({
                "base": d.base,
                "size": d.size,
                "sha256": d.sha256,
            })).collect::<Vec<_>>(),
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
        "outcome": outcome_name(outcome),
        "channel": channel,
        "sequence": sequence,
        "feed_sha256": feed.digest(),
        "feed_expires": feed.feed().expires,
        "device_id": device.device_id(),
        "offered": offered_json,
        "current": installed,
        "store": device.store().dir(),
        "removed": report.removed,
        "downloaded_bytes": report.downloaded,
        "delta": report.delta.map(|sha256| {
            let listed = offered.and_then(|r| r.deltas.iter().find(|d| d.sha256 == sha256));
            json!({
                "sha256": sha256,
                "size": listed.map(|d| d.size),
                "base": listed.map(|d| d.base),
            })
        }),
        "delta_refused": report.delta_refused.as_ref().map(ToString::to_string),
    });
    if let Some(version) = report.trust_set_version {
        doc["trust_set_version"] = json!(version);
        doc["trust_set_rotated"] = json!(report.rotated_to.is_some());
    }
    match outcome {
        Outcome::Installed(installed) => {
            doc["replaced"] = installed
                .replaced
                .as_ref()
                .map_or(Value::Null, |v| v.to_string().into());
            doc["model"] = json!(installed.release.model);
        }
        Outcome::NotInRollout { bucket } => doc["bucket"] = json!(bucket),
        _ => {}
    }
    out.result(&human, doc)
}

/// How the installed release's bytes arrived, for the text output, when a delta had a part
/// in it: the delta, or the bundle and why an offered delta was not used.
fn delivery(report: &Report) -> Option<String> {
    let bytes = count(report.downloaded, "byte", "bytes");
    let bundle = report
        .feed
        .as_ref()
        .and_then(|f| f.release())
        .map_or(0, |r| r.size);
    match (&report.delta, &report.delta_refused) {
        (Some(delta), _) => Some(format!(
            "downloaded {bytes} (delta {delta}) instead of the bundle's {}",
            count(bundle, "byte", "bytes")
        )),
        (None, Some(why)) => Some(format!("downloaded {bytes}, the full bundle: {why}")),
        (None, None) => None,
    }
}

/// The outcome's name in `update --json`, as the README documents it.
fn outcome_name(outcome: &Outcome) -> &'static str {
    match outcome {
        Outcome::Installed(_) => "updated",
        Outcome::NothingOffered => "nothing_current",
        other => other.name(),
    }
}
