//! Devices updating at once through the fault-injecting proxy (issue 15), shared by the load
//! test (`tests/fleet.rs`, 10 devices) and the fleet benchmark (`benches/fleet.rs`, 50): each
//! device is a thread that opens its own store with the library's public API and calls
//! `Device::update` the way an app's polling loop would, again on a retryable outcome, up to a
//! bounded count; every device gets its own proxy, so the proxy's log says which faults hit
//! which of its updates.
//!
//! After every update the device's store is checked from outside the library: the current
//! release opens (the store's own full check) and is the old or the new version, and no
//! temporary or staging file is left. At the end of a round the current release's files are
//! hashed again with the `sha2` crate and compared with the manifest and with the files the
//! release was packed from, and the store holds nothing half-written.
#![allow(dead_code)]

#[path = "../proxy/mod.rs"]
pub mod proxy;

use std::collections::BTreeMap;
use std::io::Read;
use std::path::{Path, PathBuf};
use std::sync::{Arc, mpsc};
use std::time::{Duration, Instant};

use ampoule_verify::{App, Device, ErrorKind, Outcome, Timestamp, Transfer, Version};
use proxy::{Fault, Proxy, Record};
use sha2::{Digest as _, Sha256};

/// What a round asks of every device.
#[derive(Clone, Debug)]
pub struct Goal {
    /// The version every device must end on.
    pub version: Version,
    /// Whether the channel offers it as an install (`false`: the device holds it already and
    /// must find itself up to date, after a withdraw say).
    pub installs: bool,
    /// The files it was packed from, by their name in the release: (name, SHA-256 in hex).
    pub files: Vec<(String, String)>,
    /// How many updates one device may run before the round fails.
    pub max_attempts: usize,
}

/// One update of one device.
#[derive(Debug)]
pub struct Attempt {
    /// The outcome's name.
    pub outcome: &'static str,
    /// The outcome's error, when it has one: its kind and text.
    pub error: Option<(ErrorKind, String)>,
    /// Why a delta the feed offered was not used, when it was not: its kind and text.
    pub delta_refused: Option<(ErrorKind, String)>,
    /// The connections the device made during this update, with what the proxy did to each.
    pub connections: Vec<Record>,
    pub delta: bool,
    pub downloaded: u64,
    /// How long `Device::update` took.
    pub time: Duration,
}

/// One device's round.
#[derive(Debug)]
pub struct Poll {
    pub device: usize,
    pub attempts: Vec<Attempt>,
    /// From the first update's start to the last one's end (the store's open included).
    pub time: Duration,
    /// Bytes the device's proxy sent it during the round, HTTP heads included.
    pub bytes: u64,
    /// Whether the update that installed used a delta.
    pub delta: bool,
}

/// A device of the fleet: its store and its proxy.
pub struct Member {
    pub index: usize,
    pub store: PathBuf,
    pub proxy: Arc<Proxy>,
}

/// The transfer limits the devices use: timeouts short enough that a stalled connection costs
/// seconds, not the library's default of nearly a minute. The library waits for a response's
/// head for the connect and the read timeout together, and for each piece of a body for the
/// read timeout; the proxy's stall must be longer than the sum.
pub fn transfer(connect: Duration, read: Duration) -> Transfer {
    Transfer::new()
        .connect_timeout(connect)
        .read_timeout(read)
        .total_timeout(Duration::from_secs(120))
}

/// SHA-256 of a file, with the `sha2` crate (not the library's digest code), in hex.
pub fn sha256_file(path: &Path) -> String {
    let mut file =
        std::fs::File::open(path).unwrap_or_else(|e| panic!("cannot open {}: {e}", path.display()));
    let mut hasher = Sha256::new();
    let mut buf = vec![0u8; 64 * 1024];
    loop {
        let n = file
            .read(&mut buf)
            .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
        if n == 0 {
            break;
        }
        hasher.update(&buf[..n]);
    }
    hex::encode(hasher.finalize())
}

/// The store's `state.json`, read as plain JSON: the current and previous release directories.
fn releases_named(store: &Path) -> Result<(Option<String>, Option<String>), String> {
    let text = std::fs::read(store.join("state.json"))
        .map_err(|e| format!("{}/state.json: {e}", store.display()))?;
    let state: serde_json::Value =
        serde_json::from_slice(&text).map_err(|e| format!("state.json is not JSON: {e}"))?;
    let name = |which: &str| state[which]["release"].as_str().map(str::to_string);
    Ok((name("current"), name("previous")))
}

/// Every path in `dir`, recursively, relative to it.
fn walk(dir: &Path, base: &Path, out: &mut Vec<String>) {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    for entry in entries.flatten() {
        let path = entry.path();
        let relative = path
            .strip_prefix(base)
            .expect("under the base")
            .to_string_lossy()
            .into_owned();
        let is_dir = entry.file_type().is_ok_and(|t| t.is_dir());
        out.push(relative);
        if is_dir {
            walk(&path, base, out);
        }
    }
}

/// What the store's layout (FORMAT.md, "The device's store, file by file") writes only for
/// the moment of a change: a temporary file before its rename, a staging directory before
/// its rename. None may outlive an update. With `finished`, a partial download may not
/// either (after a failed transfer it is kept on purpose, for the next update to resume).
pub fn half_written(store: &Path, finished: bool) -> Vec<String> {
    let mut paths = Vec::new();
    walk(store, store, &mut paths);
    paths
        .into_iter()
        .filter(|p| {
            let name = p.rsplit('/').next().unwrap_or(p);
            name.contains(".tmp-")
                || name.starts_with(".staging-")
                || (finished && name.ends_with(".partial"))
        })
        .collect()
}

/// The end state of a device: on `goal`'s version, its files hashed again against the
/// manifest and against the files the release was packed from, only the current and previous
/// releases kept, nothing half-written.
pub fn check_store(store: &Path, goal: &Goal) -> Result<(), String> {
    let (current, previous) = releases_named(store)?;
    let current = current.ok_or("state.json names no current release")?;
    let dir = store.join("releases").join(&current);
    let manifest: serde_json::Value = serde_json::from_slice(
        &std::fs::read(dir.join("manifest.json")).map_err(|e| format!("manifest.json: {e}"))?,
    )
    .map_err(|e| format!("manifest.json is not JSON: {e}"))?;
    if manifest["version"].as_str() != Some(goal.version.to_string().as_str()) {
        return Err(format!(
            "current release {current} has version {}, not {}",
            manifest["version"], goal.version
        ));
    }
    let declared = manifest["files"]
        .as_array()
        .ok_or("manifest lists no files")?;
    let mut names: Vec<String> = std::fs::read_dir(&dir)
        .map_err(|e| format!("{}: {e}", dir.display()))?
        .flatten()
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .collect();
    names.sort();
    let mut expected: Vec<String> = declared
        .iter()
        .filter_map(|f| f["path"].as_str().map(str::to_string))
        .chain(["manifest.json".to_string(), "signatures.json".to_string()])
        .collect();
    expected.sort();
    if names != expected {
        return Err(format!(
            "release {current} holds {names:?}, its manifest {expected:?}"
        ));
    }
    for file in declared {
        let path = file["path"].as_str().ok_or("a file without a path")?;
        let on_disk = dir.join(path);
        let found = sha256_file(&on_disk);
        let size = std::fs::metadata(&on_disk).map(|m| m.len()).unwrap_or(0);
        if Some(found.as_str()) != file["sha256"].as_str() || Some(size) != file["size"].as_u64() {
            return Err(format!(
                "{path} has SHA-256 {found} ({size} bytes), the manifest {} ({} bytes)",
                file["sha256"], file["size"]
            ));
        }
        if let Some((_, packed)) = goal.files.iter().find(|(name, _)| name == path)
            && *packed != found
        {
            return Err(format!(
                "{path} has SHA-256 {found}, the file packed as {} {packed}",
                goal.version
            ));
        }
    }
    let mut kept: Vec<String> = std::fs::read_dir(store.join("releases"))
        .map_err(|e| format!("releases/: {e}"))?
        .flatten()
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .collect();
    kept.sort();
    let mut named: Vec<String> = [Some(current), previous].into_iter().flatten().collect();
    named.sort();
    if kept != named {
        return Err(format!(
            "releases/ holds {kept:?}, state.json names {named:?}"
        ));
    }
    let left = half_written(store, true);
    if !left.is_empty() {
        return Err(format!("half-written files left in the store: {left:?}"));
    }
    let mut paths = Vec::new();
    walk(store, store, &mut paths);
    let unknown: Vec<&String> = paths
        .iter()
        .filter(|p| {
            !(STORE_LAYOUT.contains(&p.as_str())
                || p.starts_with("releases/")
                || (p.starts_with("feeds/") && p.ends_with(".json") && p.matches('/').count() == 1))
        })
        .collect();
    if !unknown.is_empty() {
        return Err(format!(
            "the store holds what its layout (FORMAT.md) does not: {unknown:?}"
        ));
    }
    Ok(())
}

/// Every path a store at rest may hold besides its releases and kept feeds: FORMAT.md's table
/// "The device's store, file by file", without the temporary files and partial downloads.
const STORE_LAYOUT: &[&str] = &[
    "state.json",
    "lock",
    "device-id",
    "highest.json",
    "trust-chain.json",
    "trust-set.json",
    "feeds",
    "releases",
    "downloads",
    "downloads/lock",
    "downloads/refused.json",
];

/// Whether an update that did not install is explained by what the proxy did during it: a
/// refusal only by a corrupted byte (the bytes then differ from what was signed), a failure
/// only by a fault that breaks a transfer, and always with kind `network` (retryable).
fn explained(outcome: &Outcome, connections: &[Record]) -> Result<(), String> {
    let faults: Vec<Fault> = connections.iter().filter_map(|r| r.fault).collect();
    match outcome {
        Outcome::Refused(e) if !faults.contains(&Fault::Corrupt) => Err(format!(
            "refused (kind {:?}) with no byte corrupted: {e}",
            e.kind()
        )),
        Outcome::Failed(e) if e.kind() != ErrorKind::Network => Err(format!(
            "failed with kind {:?}, not a retryable network failure: {e}",
            e.kind()
        )),
        Outcome::Failed(e) if faults.iter().all(|f| *f == Fault::Slow) => Err(format!(
            "failed with no connection broken (faults {faults:?}): {e}"
        )),
        Outcome::Refused(_) | Outcome::Failed(_) => Ok(()),
        other => Err(format!("unexpected outcome {other:?}")),
    }
}

fn kind_and_text(error: &ampoule_verify::Error) -> (ErrorKind, String) {
    (error.kind(), error.to_string())
}

/// One device's round: updates until it reaches the goal, checking the store after each.
pub fn poll(
    member: &Member,
    app: App,
    goal: &Goal,
    transfer: &Transfer,
) -> Result<Poll, (Vec<Attempt>, String)> {
    let started = Instant::now();
    let bytes_before = member.proxy.bytes_sent();
    let mut attempts = Vec::new();
    let device = match Device::open(&member.store, "stable", app, Timestamp::now()) {
        Ok(device) => device,
        Err(e) => return Err((attempts, format!("the store does not open: {e}"))),
    };
    let before = device
        .current()
        .map_err(|e| {
            (
                Vec::new(),
                format!("the current release does not open: {e}"),
            )
        })?
        .map(|r| r.manifest.version);
    let feed = member.proxy.url("feeds/stable.json");
    while attempts.len() < goal.max_attempts {
        let seen = member.proxy.records().len();
        let start = Instant::now();
        let report = device.update(&feed, transfer, Timestamp::now());
        let time = start.elapsed();
        let connections = member.proxy.records().split_off(seen);
        let attempt = Attempt {
            outcome: report.outcome.name(),
            error: report.outcome.error().map(kind_and_text),
            delta_refused: report.delta_refused.as_ref().map(kind_and_text),
            connections,
            delta: report.delta.is_some(),
            downloaded: report.downloaded,
            time,
        };
        // The old or the new verified model, whatever happened, and nothing mid-write.
        let now = match device.current() {
            Ok(release) => release.map(|r| r.manifest.version),
            Err(e) => {
                attempts.push(attempt);
                return Err((attempts, format!("the current release does not open: {e}")));
            }
        };
        let why = if now != before && now.as_ref() != Some(&goal.version) {
            Some(format!(
                "the store holds {now:?}, neither the old {before:?} nor the new {}",
                goal.version
            ))
        } else {
            let left = half_written(&member.store, false);
            (!left.is_empty()).then(|| format!("half-written files after the update: {left:?}"))
        };
        if let Some(why) = why {
            attempts.push(attempt);
            return Err((attempts, why));
        }
        let done = match &report.outcome {
            Outcome::Installed(installed) if goal.installs => {
                let version = &installed.release.manifest.version;
                if *version != goal.version {
                    attempts.push(attempt);
                    return Err((
                        attempts,
                        format!("installed {version}, not {}", goal.version),
                    ));
                }
                true
            }
            Outcome::UpToDate if !goal.installs && now.as_ref() == Some(&goal.version) => true,
            outcome => {
                if let Err(why) = explained(outcome, &attempt.connections) {
                    attempts.push(attempt);
                    return Err((attempts, why));
                }
                false
            }
        };
        let delta = attempt.delta;
        attempts.push(attempt);
        if done {
            if let Err(why) = check_store(&member.store, goal) {
                return Err((attempts, why));
            }
            return Ok(Poll {
                device: member.index,
                attempts,
                time: started.elapsed(),
                bytes: member.proxy.bytes_sent() - bytes_before,
                delta,
            });
        }
    }
    Err((
        attempts,
        format!(
            "not on {} after {} updates",
            goal.version, goal.max_attempts
        ),
    ))
}

/// A readable account of a device's updates, for a failure message.
pub fn account(member: &Member, attempts: &[Attempt]) -> String {
    let mut text = format!(
        "device {} (store {}, proxy plan: {})\n",
        member.index,
        member.store.display(),
        member.proxy.plan().describe()
    );
    for (n, attempt) in attempts.iter().enumerate() {
        text.push_str(&format!("  update {}: {}", n + 1, attempt.outcome));
        if let Some((kind, message)) = &attempt.error {
            text.push_str(&format!(" ({kind:?}): {message}"));
        }
        if let Some((kind, message)) = &attempt.delta_refused {
            text.push_str(&format!("; delta not used ({kind:?}): {message}"));
        }
        text.push_str(&format!("; {} bytes downloaded\n", attempt.downloaded));
        for c in &attempt.connections {
            text.push_str(&format!(
                "    connection {}: {} -> {}{} ({} bytes)\n",
                c.number,
                c.request,
                c.fault.map_or("passed", Fault::name),
                if c.detail.is_empty() {
                    String::new()
                } else {
                    format!(": {}", c.detail)
                },
                c.bytes
            ));
        }
    }
    text
}

/// Runs one round on every member at once, each in its own thread, and waits at most
/// `deadline` for all of them: a device that hangs fails the round, naming itself.
pub fn round(
    members: &[Member],
    app: &App,
    goal: &Goal,
    transfer: &Transfer,
    deadline: Duration,
) -> Result<Vec<Poll>, String> {
    let (tx, rx) = mpsc::channel();
    for (slot, member) in members.iter().enumerate() {
        let member = Member {
            index: member.index,
            store: member.store.clone(),
            proxy: Arc::clone(&member.proxy),
        };
        let (tx, app, goal, transfer) = (tx.clone(), app.clone(), goal.clone(), transfer.clone());
        std::thread::Builder::new()
            .name(format!("device-{}", member.index))
            .spawn(move || {
                let result = poll(&member, app, &goal, &transfer)
                    .map_err(|(attempts, why)| format!("{why}\n{}", account(&member, &attempts)));
                let _ = tx.send((slot, result));
            })
            .map_err(|e| format!("cannot start a device thread: {e}"))?;
    }
    drop(tx);
    let end = Instant::now() + deadline;
    let mut results: BTreeMap<usize, Result<Poll, String>> = BTreeMap::new();
    while results.len() < members.len() {
        let left = end.saturating_duration_since(Instant::now());
        match rx.recv_timeout(left) {
            Ok((slot, result)) => {
                results.insert(slot, result);
            }
            Err(_) => {
                let waiting: Vec<String> = members
                    .iter()
                    .enumerate()
                    .filter(|(slot, _)| !results.contains_key(slot))
                    .map(|(_, m)| {
                        let open: Vec<String> = m
                            .proxy
                            .records()
                            .iter()
                            .rev()
                            .take(4)
                            .map(|r| format!("{} {:?} {}", r.request, r.fault, r.detail))
                            .collect();
                        format!("device {} (last connections: {open:?})", m.index)
                    })
                    .collect();
                return Err(format!(
                    "the round did not finish within {} s; still running: {waiting:?}",
                    deadline.as_secs()
                ));
            }
        }
    }
    let failures: Vec<String> = results
        .values()
        .filter_map(|r| r.as_ref().err().cloned())
        .collect();
    if !failures.is_empty() {
        return Err(failures.join("\n"));
    }
    Ok(results.into_values().filter_map(Result::ok).collect())
}
