//! A fleet of 50 devices through the fault-injecting proxy (issue 15 item 1): 1.0.0 installed
//! on fresh stores, then 3 rounds of publish (with the deltas `publish` makes by default),
//! update, and withdraw (the devices keep the withdrawn release and find themselves up to
//! date). Per round: the p50 and p95 of each device's update time (its calls to
//! `Device::update` until it reached the round's version, retries included) and the bytes the
//! proxy sent each device (HTTP heads included), which show the deltas at work: a fresh
//! install costs the bundle, a retrained release the delta.
//!
//! The devices and checks are the load test's (`tests/fleet_common`: every device ends each
//! round on the right version with its files hashed again, and every outcome other than the
//! round's goal is explained by a fault the proxy logged), from the built-in server, and from
//! nginx when it is installed. Run with `cargo bench --bench fleet`; not part of the test
//! suite. Settings, all printed so that a run can be repeated:
//!
//! - `AMPOULE_FLEET_DEVICES` (50), `AMPOULE_FLEET_ROUNDS` (3), `AMPOULE_FLEET_MODEL_MIB` (8);
//! - `AMPOULE_FLEET_SEED` (0x1501) and `AMPOULE_FLEET_SHARE`, each fault's share of the
//!   connections in thousandths (25, as in the load test; 0 runs without faults).

#[path = "../tests/fleet_common/mod.rs"]
mod fleet_common;
#[path = "../tests/tree_common/mod.rs"]
mod tree_common;

use std::net::SocketAddr;
use std::path::Path;
use std::sync::Arc;
use std::time::{Duration, Instant};

use ampoule::release::serve::Server;
use ampoule::release::synth;
use fleet_common::proxy::{Plan, Proxy};
use fleet_common::{Goal, Member, Poll, round, sha256_file};
use tree_common::*;

/// The fleet's timeouts and the proxy's stall, as in the load test.
const CONNECT: Duration = Duration::from_secs(2);
const READ: Duration = Duration::from_secs(3);
const STALL: Duration = Duration::from_secs(6);
/// A round that takes longer has hung.
const DEADLINE: Duration = Duration::from_secs(600);
const MAX_ATTEMPTS: usize = 30;

struct Settings {
    devices: usize,
    rounds: u64,
    model_bytes: u64,
    seed: u64,
    share: u32,
}

fn env_number(name: &str, default: u64) -> u64 {
    match std::env::var(name) {
        Ok(text) => {
            let parsed = match text.strip_prefix("0x") {
                Some(hex) => u64::from_str_radix(hex, 16),
                None => text.parse(),
            };
            parsed.unwrap_or_else(|_| panic!("{name}={text} is not a number"))
        }
        Err(_) => default,
    }
}

impl Settings {
    fn from_env() -> Settings {
        Settings {
            devices: env_number("AMPOULE_FLEET_DEVICES", 50) as usize,
            rounds: env_number("AMPOULE_FLEET_ROUNDS", 3),
            model_bytes: env_number("AMPOULE_FLEET_MODEL_MIB", 8) * 1024 * 1024,
            seed: env_number("AMPOULE_FLEET_SEED", 0x1501),
            share: env_number("AMPOULE_FLEET_SHARE", 25) as u32,
        }
    }
}

/// The value below which `q` of the sorted values lie (nearest rank).
fn quantile<T: Copy + Ord>(values: &[T], q: f64) -> T {
    let mut sorted = values.to_vec();
    sorted.sort();
    let rank = ((q * sorted.len() as f64).ceil() as usize).clamp(1, sorted.len());
    sorted[rank - 1]
}

fn load_average() -> String {
    std::fs::read_to_string("/proc/loadavg")
        .map(|l| l.split_whitespace().take(3).collect::<Vec<_>>().join(" "))
        .unwrap_or_else(|_| "unknown".into())
}

/// Packs `version` of the invented model with its classifier head drawn from `head_seed` (a
/// retrain changes the head alone, as `synth::write_head_model` lays it out) and publishes
/// it; returns the goal and the bundle's size.
fn release(d: &Path, settings: &Settings, version: &str, head_seed: u64) -> (Goal, u64) {
    let model = format!("model-{version}.bin");
    synth::write_head_model(&d.join(&model), settings.model_bytes, 6, head_seed)
        .expect("the model");
    let bundle = format!("species-{version}.ampoule");
    pack_model(d, &model, version, "k.pem", &bundle);
    publish(d, &bundle, "stable", "100");
    let goal = Goal {
        version: version.parse().expect("a version"),
        installs: true,
        files: vec![
            ("model.bin".into(), sha256_file(&d.join(&model))),
            ("labels.txt".into(), sha256_file(&d.join("labels.txt"))),
        ],
        max_attempts: MAX_ATTEMPTS,
    };
    (
        goal,
        std::fs::metadata(d.join(&bundle)).expect("bundle").len(),
    )
}

/// The size of the smallest delta the feed lists for `version`: the one from the release
/// before (the others lead from older releases).
fn newest_delta_size(d: &Path, version: &str) -> Option<u64> {
    let feed: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("tree/feeds/stable.json")).expect("the feed"))
            .expect("JSON");
    let text = feed["feed"].as_str()?;
    let inner: serde_json::Value = serde_json::from_str(text).ok()?;
    let release = &inner["release"];
    (release["version"].as_str() == Some(version))
        .then(|| {
            release["deltas"]
                .as_array()?
                .iter()
                .filter_map(|d| d["size"].as_u64())
                .min()
        })
        .flatten()
}

fn withdraw(d: &Path, version: &str) {
    ok(
        d,
        &[
            "withdraw",
            "--tree",
            "tree",
            "--channel",
            "stable",
            "--key",
            "k.pem",
            "--version",
            version,
        ],
    );
}

/// Each device's update time: its calls to `Device::update` in the round, retries included.
fn update_times(polls: &[Poll]) -> Vec<Duration> {
    polls
        .iter()
        .map(|p| p.attempts.iter().map(|a| a.time).sum())
        .collect()
}

/// One line of the report: the Markdown row, and the same figures as the rest of a `REPORT
/// fleet` line for benches/report (`tags` says what the round was, as `key=value` words).
fn row(name: &str, tags: &str, polls: &[Poll], wall: Duration) -> (String, String) {
    let times = update_times(polls);
    let bytes: Vec<u64> = polls.iter().map(|p| p.bytes).collect();
    let updates: usize = polls.iter().map(|p| p.attempts.len()).sum();
    let faults = polls
        .iter()
        .flat_map(|p| &p.attempts)
        .flat_map(|a| &a.connections)
        .filter(|c| c.fault.is_some())
        .count();
    let deltas = polls.iter().filter(|p| p.delta).count();
    let mean = bytes.iter().sum::<u64>() as f64 / bytes.len().max(1) as f64;
    let (p50, p95, max) = (
        quantile(&times, 0.5).as_secs_f64(),
        quantile(&times, 0.95).as_secs_f64(),
        quantile(&times, 1.0).as_secs_f64(),
    );
    let (b50, b95) = (quantile(&bytes, 0.5), quantile(&bytes, 0.95));
    let wall = wall.as_secs_f64();
    (
        format!(
            "| {name} | {updates} | {faults} | {deltas} | {p50:.2} | {p95:.2} | {max:.2} | \
             {mean:.0} | {b50} | {b95} | {wall:.1} |"
        ),
        format!(
            "{tags} updates={updates} faulty={faults} from_delta={deltas} \
             update_s={p50:.3}/{p95:.3}/{max:.3} bytes={mean:.0}/{b50}/{b95} wall_s={wall:.1}"
        ),
    )
}

/// The slowest device of a round and the faults it met, to explain the max column.
fn slowest(name: &str, polls: &[Poll]) -> String {
    let times = update_times(polls);
    let Some((i, time)) = times.iter().enumerate().max_by_key(|(_, t)| **t) else {
        return String::new();
    };
    let met: Vec<String> = polls[i]
        .attempts
        .iter()
        .flat_map(|a| &a.connections)
        .filter_map(|c| {
            let fault = c.fault?;
            let path = c.request.split(' ').nth(1).unwrap_or_default();
            let short = path.get(..path.len().min(24)).unwrap_or(path);
            Some(format!("{} on {short}… ({})", fault.name(), c.detail))
        })
        .collect();
    format!(
        "- {name}: device {}, {:.1} s in {} update(s); faults met: {}",
        polls[i].device,
        time.as_secs_f64(),
        polls[i].attempts.len(),
        if met.is_empty() {
            "none".to_string()
        } else {
            met.join("; ")
        }
    )
}

/// The whole run from one server: the report's rows, the slowest devices, and the rows'
/// `REPORT` figures.
fn fleet(
    d: &Path,
    upstream: SocketAddr,
    settings: &Settings,
) -> (Vec<String>, Vec<String>, Vec<String>) {
    let members: Vec<Member> = (0..settings.devices)
        .map(|index| {
            let plan = Plan::every_fault(
                settings.seed.wrapping_add(index as u64),
                settings.share,
                STALL,
            );
            Member {
                index,
                store: d.join(format!("cam-{index}")),
                proxy: Arc::new(Proxy::start(upstream, plan).expect("the proxy starts")),
            }
        })
        .collect();
    let app = pinned_app_own_id(d);
    let transfer = fleet_common::transfer(CONNECT, READ);
    let run = |goal: &Goal| {
        let start = Instant::now();
        let polls = round(&members, &app, goal, &transfer, DEADLINE)
            .unwrap_or_else(|why| panic!("seed {:#x}: {why}", settings.seed));
        (polls, start.elapsed())
    };
    let (mut rows, mut notes, mut reports) = (Vec::new(), Vec::new(), Vec::new());
    let mut add = |(row, report): (String, String)| {
        rows.push(row);
        reports.push(report);
    };

    let first = Goal {
        version: "1.0.0".parse().expect("a version"),
        installs: true,
        files: vec![
            ("model.bin".into(), sha256_file(&d.join("model-1.0.0.bin"))),
            ("labels.txt".into(), sha256_file(&d.join("labels.txt"))),
        ],
        max_attempts: MAX_ATTEMPTS,
    };
    let bundle = std::fs::metadata(d.join("species-1.0.0.ampoule"))
        .expect("bundle")
        .len();
    let (polls, wall) = run(&first);
    add(row(
        &format!("1.0.0 on fresh stores (bundle {bundle} bytes)"),
        &format!("round=0 step=fresh version=1.0.0 bundle_bytes={bundle}"),
        &polls,
        wall,
    ));
    notes.push(slowest("1.0.0", &polls));
    for r in 1..=settings.rounds {
        let version = format!("1.{r}.0");
        let (goal, bundle) = release(d, settings, &version, 100 + r);
        let delta_bytes = newest_delta_size(d, &version);
        let delta =
            delta_bytes.map_or_else(|| "no delta".to_string(), |n| format!("delta {n} bytes"));
        let (polls, wall) = run(&goal);
        add(row(
            &format!("round {r}: publish {version} (bundle {bundle} bytes, {delta}), update"),
            &format!(
                "round={r} step=update version={version} bundle_bytes={bundle} delta_bytes={}",
                delta_bytes.unwrap_or(0)
            ),
            &polls,
            wall,
        ));
        notes.push(slowest(&format!("round {r}, update"), &polls));
        withdraw(d, &version);
        let kept = Goal {
            installs: false,
            ..goal
        };
        let (polls, wall) = run(&kept);
        add(row(
            &format!("round {r}: withdraw {version}, devices keep it"),
            &format!("round={r} step=withdraw version={version}"),
            &polls,
            wall,
        ));
        notes.push(slowest(&format!("round {r}, withdraw"), &polls));
    }
    (rows, notes, reports)
}

fn main() {
    let settings = Settings::from_env();
    let cpus = std::thread::available_parallelism().map_or(0, |n| n.get());
    println!(
        "fleet benchmark: {} devices, {} rounds of publish, update and withdraw, a {} MiB model",
        settings.devices,
        settings.rounds,
        settings.model_bytes / (1024 * 1024)
    );
    println!(
        "faults: each of drop, reset, truncate, stall, slow, corrupt on {:.1}% of connections \
         (AMPOULE_FLEET_SHARE={}), seed {:#x} (AMPOULE_FLEET_SEED), device i draws from seed + i; \
         connect timeout {} s, read timeout {} s, stall {} s",
        f64::from(settings.share) / 10.0,
        settings.share,
        settings.seed,
        CONNECT.as_secs(),
        READ.as_secs(),
        STALL.as_secs()
    );
    println!(
        "machine: {cpus} CPUs; load average at start: {}",
        load_average()
    );

    let mut servers: Vec<&str> = vec!["the built-in server"];
    if Path::new(NGINX).exists() {
        servers.push("nginx");
    } else {
        println!("nginx not installed: the built-in server only");
    }
    for server in servers {
        let dir = setup();
        let d = dir.path();
        synth::write_head_model(&d.join("model-1.0.0.bin"), settings.model_bytes, 6, 100)
            .expect("the model");
        pack_model(
            d,
            "model-1.0.0.bin",
            "1.0.0",
            "k.pem",
            "species-1.0.0.ampoule",
        );
        publish(d, "species-1.0.0.ampoule", "stable", "100");
        let (rows, notes, reports) = if server == "nginx" {
            let nginx = start_nginx(d, &d.join("tree"));
            let addr = nginx
                .base
                .strip_prefix("http://")
                .and_then(|a| a.parse().ok())
                .expect("nginx's address");
            fleet(d, addr, &settings)
        } else {
            let built_in = Server::start(d.join("tree"), "127.0.0.1:0".parse().expect("addr"))
                .expect("the server starts");
            fleet(d, built_in.addr(), &settings)
        };
        println!("\nfrom {server}:\n");
        println!(
            "| round | updates | faulty connections | installed from a delta | update p50 (s) | \
             p95 | max | bytes per device, mean | p50 | p95 | round wall time (s) |"
        );
        println!("|---|---|---|---|---|---|---|---|---|---|---|");
        for r in rows {
            println!("{r}");
        }
        println!("\nthe slowest device of each round:\n");
        for n in notes {
            println!("{n}");
        }
        let token = if server == "nginx" {
            "nginx"
        } else {
            "built-in"
        };
        println!();
        for report in reports {
            println!(
                "REPORT fleet devices={} server={token} {report}",
                settings.devices
            );
        }
    }
    println!("\nload average at end: {}", load_average());
}
