//! The smallest app built on ampoule-verify: a trail camera that checks its channel once and
//! installs a newer species model if there is one. It exists so that an app developer has a
//! whole program to start from, and `tests/example_app.rs` runs it against a release tree
//! served by `ampoule serve`, so it cannot drift from the library.
//!
//! ```text
//! trail_camera --store DIR --feed URL --trust-set FILE --app-version X [--device-id ID]
//! ```
//!
//! It prints one line: the outcome's name, then the installed version or the error. The exit
//! code tells a script what to do next: 0 when nothing is wrong (installed, up to date, not in
//! the rollout yet, nothing offered, needs another app), 1 when a check refused something (a
//! person has to look), 2 when the update could not finish or the arguments are wrong (try
//! again later, or fix the call).

use std::path::PathBuf;
use std::process::ExitCode;

use ampoule_verify::Transfer;
use ampoule_verify::{App, Device, Outcome, Timestamp, Trust, Version};

const USAGE: &str =
    "usage: trail_camera --store DIR --feed URL --trust-set FILE --app-version X [--device-id ID]";

/// The arguments as given; checked once, in `main`.
struct Args {
    store: PathBuf,
    feed: String,
    trust_set: PathBuf,
    app_version: String,
    device_id: Option<String>,
}

/// Hand-parsed, because an example should show the library and nothing else.
fn parse(mut args: impl Iterator<Item = String>) -> Result<Args, String> {
    let (mut store, mut feed, mut trust_set, mut app_version, mut device_id) =
        (None, None, None, None, None);
    while let Some(flag) = args.next() {
        let slot = match flag.as_str() {
            "--store" => &mut store,
            "--feed" => &mut feed,
            "--trust-set" => &mut trust_set,
            "--app-version" => &mut app_version,
            "--device-id" => &mut device_id,
            other => return Err(format!("unknown argument '{other}'")),
        };
        let value = args.next().ok_or_else(|| format!("{flag} needs a value"))?;
        if slot.replace(value).is_some() {
            return Err(format!("{flag} is given twice"));
        }
    }
    let missing = |name: &str| format!("{name} is required");
    Ok(Args {
        store: store.ok_or_else(|| missing("--store"))?.into(),
        feed: feed.ok_or_else(|| missing("--feed"))?,
        trust_set: trust_set.ok_or_else(|| missing("--trust-set"))?.into(),
        app_version: app_version.ok_or_else(|| missing("--app-version"))?,
        device_id,
    })
}

/// The channel is the feed's file name (`.../feeds/<channel>.json`), as the release tree
/// lays it out; the device refuses a feed that names another channel anyway.
fn channel_of(feed_url: &str) -> Option<&str> {
    let path = feed_url.split(['?', '#']).next()?;
    path.rsplit('/').next()?.strip_suffix(".json")
}

fn main() -> ExitCode {
    let args = match parse(std::env::args().skip(1)) {
        Ok(args) => args,
        Err(why) => {
            eprintln!("trail_camera: {why}\n{USAGE}");
            return ExitCode::from(2);
        }
    };
    let (Ok(version), Some(channel)) =
        (args.app_version.parse::<Version>(), channel_of(&args.feed))
    else {
        eprintln!(
            "trail_camera: --app-version must be a version like 2.3.0 and --feed must end in \
             /<channel>.json\n{USAGE}"
        );
        return ExitCode::from(2);
    };
    let shipped = match std::fs::read(&args.trust_set) {
        Ok(bytes) => bytes,
        Err(e) => {
            eprintln!("failed: cannot read {}: {e}", args.trust_set.display());
            return ExitCode::from(2);
        }
    };
    let device = Trust::shipped_trust_set(shipped)
        .map(|trust| App::new(trust, version))
        .and_then(|app| match args.device_id {
            Some(id) => app.device_id(id),
            None => Ok(app),
        })
        .and_then(|app| Device::open(&args.store, channel, app, Timestamp::now()));
    let device = match device {
        Ok(device) => device,
        // Trust the device cannot use (an expired set, say) is a refusal; a store it cannot
        // open is a failure.
        Err(e) if e.kind().is_refusal() => {
            eprintln!("refused: {e}");
            return ExitCode::from(1);
        }
        Err(e) => {
            eprintln!("failed: {e}");
            return ExitCode::from(2);
        }
    };

    let report = device.update(&args.feed, &Transfer::new(), Timestamp::now());
    match &report.outcome {
        Outcome::Installed(installed) => {
            println!("installed {}", installed.release.manifest.version);
            ExitCode::SUCCESS
        }
        Outcome::NeedsOtherApp { reason } => {
            println!("needs_other_app: {reason}");
            ExitCode::SUCCESS
        }
        Outcome::UpToDate | Outcome::NotInRollout { .. } | Outcome::NothingOffered => {
            println!("{}", report.outcome.name());
            ExitCode::SUCCESS
        }
        Outcome::Refused(e) => {
            eprintln!("refused: {e}");
            ExitCode::from(1)
        }
        Outcome::Failed(e) => {
            eprintln!("failed: {e}");
            ExitCode::from(2)
        }
        // An outcome newer than this program: it cannot say whether all is well.
        other => {
            eprintln!("{}: not known to this app", other.name());
            ExitCode::from(2)
        }
    }
}
