//! Issue 10 item 1: every row of FORMAT.md's table "The device's store, file by file", planted
//! three ways by someone who can write the store directory (an SD card, a shared folder) and
//! nothing else: a symbolic link to the app's own data outside the store, a garbage file, and a
//! well-formed forgery made with a key of their own. Once the attacker stops writing, the next
//! genuine update installs (at most one update fails on the way, naming the cause), or the
//! store refuses with what was planted and how to clear it, and doing as it says lets the next
//! update install. After every case nothing outside the store was written or removed, the store
//! holds no link and no file with a second hard link, the floor is the genuine release, and the
//! update after it finds the device up to date.
//!
//! The device is the hardest one to keep honest: it runs on trust sets (shipped with version 1,
//! walked to version 2 through the tree), keeps its own device id, and is driven step by step
//! as an app with its own HTTP stack drives it. The table below must name every row of
//! FORMAT.md's table, so a new file in the store cannot go untested.

mod tree_common;

use std::io::{Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::OnceLock;

use ampoule_verify::update::Next;
use ampoule_verify::{App, Device, Digest, Outcome, Report, Timestamp, Trust, Version};
use tree_common::*;

/// Any base works: each URL maps back to a file of the tree.
const BASE: &str = "https://models.example.invalid/";
const OUTSIDE_FILE: &[u8] = b"the app's own data";

/// The release tree and the store every case starts from: a camera that walked from trust set
/// 1 to 2 and installed 1.0.0, while the tree has since published 1.1.0.
struct Scenario {
    dir: tempfile::TempDir,
    /// `1.1.0`'s SHA-256, which anyone can read in the public feed.
    offered: Digest,
    /// A bundle of 9.0.0 signed by the intruder's own key, which no trust set lists.
    intruders_bundle: PathBuf,
}

impl Scenario {
    fn d(&self) -> &Path {
        self.dir.path()
    }
    fn template(&self) -> PathBuf {
        self.d().join("template-store")
    }
    fn partial(&self) -> String {
        format!("{}.ampoule.partial", self.offered)
    }
    /// An entry of the intruder's bundle, as the bundle carries it.
    fn intruders(&self, entry: &str) -> String {
        let out = std::process::Command::new("tar")
            .args(["-xOf"])
            .arg(&self.intruders_bundle)
            .arg(entry)
            .output()
            .expect("tar runs");
        assert!(out.status.success(), "tar -xOf {entry}");
        String::from_utf8(out.stdout).expect("UTF-8")
    }
}

fn scenario() -> &'static Scenario {
    static SCENARIO: OnceLock<Scenario> = OnceLock::new();
    SCENARIO.get_or_init(|| {
        let dir = setup();
        let d = dir.path();
        ok(
            d,
            &["keygen", "--secret", "second.pem", "--public", "second.pub"],
        );
        ok(
            d,
            &[
                "keygen",
                "--secret",
                "intruder.pem",
                "--public",
                "intruder.pub",
            ],
        );
        ok(
            d,
            &[
                "trust",
                "init",
                "--key",
                "k.pub",
                "--expires-in",
                "365d",
                "-o",
                "trust-1.json",
            ],
        );
        ok(d, &["trust", "sign", "trust-1.json", "--key", "k.pem"]);
        ok(
            d,
            &[
                "trust",
                "add",
                "trust-1.json",
                "--key",
                "second.pub",
                "--expires-in",
                "365d",
                "-o",
                "trust-2.json",
            ],
        );
        ok(d, &["trust", "sign", "trust-2.json", "--key", "k.pem"]);
        ok(
            d,
            &[
                "publish",
                "--trust-set",
                "trust-2.json",
                "--tree",
                "tree",
                "--key",
                "k.pem",
            ],
        );
        publish(d, &pack(d, "1.0.0", 0, "k.pem"), "stable", "100");
        let cam = d.join("cam");
        let device = Device::open(&cam, "stable", app(d), Timestamp::now()).expect("open");
        assert_eq!(installed(&update(&device, d)), Some(Version::new(1, 0, 0)));
        drop(device);
        assert!(
            cam.join("trust-chain.json").is_file(),
            "the camera walked to trust set 2"
        );
        copy_tree(&cam, &d.join("template-store"));
        let v2 = pack(d, "1.1.0", 1, "k.pem");
        publish(d, &v2, "stable", "100");
        let offered = Digest::of(&std::fs::read(d.join(&v2)).expect("bundle"));
        let intruders = pack(d, "9.0.0", 9, "intruder.pem");
        Scenario {
            offered,
            intruders_bundle: d.join(intruders),
            dir,
        }
    })
}

/// The camera app: shipped with trust set 1, app version 2.3.0, its device id kept by the
/// store.
fn app(d: &Path) -> App {
    let shipped = std::fs::read(d.join("trust-1.json")).expect("trust-1.json");
    App::new(
        Trust::shipped_trust_set(shipped).expect("a valid shipped set"),
        Version::new(2, 3, 0),
    )
    .wait_for_lock(std::time::Duration::from_secs(5))
}

/// One update of `stable` driven by hand: fetches are answered from the tree's files, the
/// download is written through the store's own file, appended at its end (as the crate
/// documents), whatever it already holds.
fn update(device: &Device, d: &Path) -> Report {
    let tree_file = |url: &str| {
        d.join("tree").join(
            url.strip_prefix(BASE)
                .unwrap_or_else(|| panic!("asked for {url}, outside the tree")),
        )
    };
    let url = format!("{BASE}feeds/stable.json");
    let feed = std::fs::read(tree_file(&url)).expect("feed");
    let mut session = device.begin(&url, feed, Timestamp::now());
    loop {
        match session.advance() {
            Next::Fetch(want) => {
                session.provide(std::fs::read(tree_file(want.url())).expect("asked-for file"));
            }
            Next::Download(want) => {
                let served = std::fs::read(tree_file(&want.urls()[0])).expect("bundle");
                let upto = (want.size() as usize).min(served.len());
                let mut file = want.file().expect("the store's download file");
                let have = file.metadata().expect("size").len() as usize;
                file.seek(SeekFrom::End(0)).expect("seek");
                file.write_all(&served[have.min(upto)..upto])
                    .expect("write");
                session.downloaded(want.path());
            }
            Next::Done(report) => return report,
            other => panic!("unexpected step {other:?}"),
        }
    }
}

fn installed(report: &Report) -> Option<Version> {
    match &report.outcome {
        Outcome::Installed(i) => Some(i.release.manifest.version.clone()),
        _ => None,
    }
}

fn copy_tree(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).expect("mkdir");
    for entry in std::fs::read_dir(from).expect("read dir") {
        let entry = entry.expect("entry");
        let target = to.join(entry.file_name());
        if entry.file_type().expect("type").is_dir() {
            copy_tree(&entry.path(), &target);
        } else {
            std::fs::copy(entry.path(), &target).expect("copy");
        }
    }
}

/// One case's paths: the store, and the app's own data beside it, which links point at.
struct Case<'a> {
    s: &'a Scenario,
    store: PathBuf,
    outside: PathBuf,
}

impl Case<'_> {
    fn at(&self, name: &str) -> PathBuf {
        self.store.join(name)
    }
    /// The file of the app's own that planted links point at.
    fn victim(&self) -> PathBuf {
        self.outside.join("photos.db")
    }
    /// Removes what is at `name` in the store, whatever it is.
    fn clear(&self, name: &str) {
        let path = self.at(name);
        match std::fs::symlink_metadata(&path) {
            Ok(m) if m.is_dir() => std::fs::remove_dir_all(&path).expect("remove dir"),
            Ok(_) => std::fs::remove_file(&path).expect("remove"),
            Err(_) => {}
        }
    }
    fn link(&self, name: &str, to: &Path) {
        self.clear(name);
        std::os::unix::fs::symlink(to, self.at(name)).expect("plant a link");
    }
    fn write(&self, name: &str, bytes: impl AsRef<[u8]>) {
        self.clear(name);
        std::fs::write(self.at(name), bytes).expect("plant a file");
    }
    /// Rewrites `state.json` after `change` edits it, as well-formed JSON.
    fn edit_state(&self, change: impl FnOnce(&mut serde_json::Value)) {
        let mut state: serde_json::Value =
            serde_json::from_slice(&std::fs::read(self.at("state.json")).expect("state"))
                .expect("json");
        change(&mut state);
        self.write(
            "state.json",
            serde_json::to_vec_pretty(&state).expect("json"),
        );
    }

    /// Writes the intruder's signed manifest and signatures into the directory `dir`.
    fn intruders_release(&self, dir: &str) {
        for entry in ["manifest.json", "signatures.json"] {
            self.write(&format!("{dir}/{entry}"), self.s.intruders(entry));
        }
    }
    /// The one release directory in `releases/` (1.0.0's).
    fn release_dir(&self) -> String {
        let names: Vec<String> = std::fs::read_dir(self.at("releases"))
            .expect("releases")
            .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
            .collect();
        assert_eq!(names.len(), 1, "{names:?}");
        format!("releases/{}", names[0])
    }
}

/// Garbage: bytes no part of the store writes.
const GARBAGE: &[u8] = b"\x00\xff{\"not\": json\n\x1b[2J";

/// What the device must do after a plant.
enum Then {
    /// The next update installs 1.1.0.
    Installs,
    /// The next update fails with a message containing this text (the cause named), and the
    /// one after it installs.
    InstallsAfterOneFailure(&'static str),
    /// Opening the store is refused with a message containing this text, which says how to
    /// clear it; after doing that (the function), the next update installs.
    Refused(&'static str, fn(&Case)),
}

struct Plant {
    /// The row of FORMAT.md's table, its first cell as written there.
    row: &'static str,
    kind: &'static str,
    plant: fn(&Case),
    then: Then,
}

/// What state.json's refusal asks for: remove it and move the store's other files aside.
fn start_afresh(c: &Case) {
    c.clear("state.json");
    std::fs::rename(&c.store, c.store.with_extension("aside")).expect("move aside");
}

fn plants() -> Vec<Plant> {
    use Then::*;
    vec![
        Plant {
            row: "`state.json`",
            kind: "link",
            plant: |c| {
                std::fs::rename(c.at("state.json"), c.victim()).expect("move");
                c.link("state.json", &c.victim());
            },
            then: Refused(
                "state.json is a symbolic link where the store keeps a file",
                start_afresh,
            ),
        },
        Plant {
            row: "`state.json`",
            kind: "garbage",
            plant: |c| c.write("state.json", GARBAGE),
            then: Refused("state.json", start_afresh),
        },
        Plant {
            row: "`state.json`",
            kind: "forged",
            plant: |c| {
                c.edit_state(|state| {
                    state["highest_version"] = "999.0.0".into();
                    state["channels"]["stable"]["highest_version"] = "999.0.0".into();
                    state["channels"]["stable"]["highest_sequence"] = u64::MAX.into();
                    state["name"] = "someone-elses-line".into();
                    state["tree_head"] = serde_json::json!({
                        "tree_size": 1_000_000,
                        "root_hash": "ab".repeat(32),
                        "time": 1_800_000_000u64,
                    });
                });
            },
            then: Installs,
        },
        Plant {
            row: "`feeds/<channel>.json`",
            kind: "link",
            plant: |c| c.link("feeds/stable.json", &c.victim()),
            then: Installs,
        },
        Plant {
            row: "`feeds/<channel>.json`",
            kind: "link (the directory)",
            plant: |c| c.link("feeds", &c.outside),
            then: Installs,
        },
        Plant {
            row: "`feeds/<channel>.json`",
            kind: "garbage",
            plant: |c| c.write("feeds/stable.json", GARBAGE),
            then: Installs,
        },
        Plant {
            row: "`feeds/<channel>.json`",
            kind: "forged",
            plant: |c| {
                // The genuine kept feed at the largest sequence, signed by the intruder.
                let kept = ampoule_verify::feed::SignedFeed::from_json(
                    &std::fs::read(c.at("feeds/stable.json")).expect("kept feed"),
                )
                .expect("feed");
                let text = kept.feed.replacen(
                    "\"sequence\":1,",
                    &format!("\"sequence\":{},", u64::MAX),
                    1,
                );
                assert_ne!(text, kept.feed);
                c.write(
                    "feeds/stable.json",
                    signed_feed_file(c.s.d(), "intruder.pem", text).to_json(),
                );
            },
            then: Installs,
        },
        Plant {
            row: "`highest.json`",
            kind: "link",
            plant: |c| c.link("highest.json", &c.victim()),
            then: Installs,
        },
        Plant {
            row: "`highest.json`",
            kind: "garbage",
            plant: |c| c.write("highest.json", GARBAGE),
            then: Installs,
        },
        Plant {
            row: "`highest.json`",
            kind: "forged",
            plant: |c| {
                // 9.0.0's manifest, signed by the intruder, with state.json naming it.
                let kept = serde_json::json!({
                    "manifest": c.s.intruders("manifest.json"),
                    "signatures": c.s.intruders("signatures.json"),
                });
                c.write("highest.json", kept.to_string());
                c.edit_state(|state| state["highest_version"] = "9.0.0".into());
            },
            then: Installs,
        },
        Plant {
            row: "`.state.json.tmp-*`, `.trust-set.json.tmp-*`, `.own.tmp-*`",
            kind: "link",
            plant: |c| {
                c.link(".state.json.tmp-1-1", &c.victim());
                c.link(".trust-set.json.tmp-1-1", &c.victim());
                c.link(".own.tmp-1-1", &c.victim());
            },
            then: Installs,
        },
        Plant {
            row: "`.state.json.tmp-*`, `.trust-set.json.tmp-*`, `.own.tmp-*`",
            kind: "garbage",
            plant: |c| {
                c.write(".state.json.tmp-1-1", GARBAGE);
                c.write(".trust-set.json.tmp-1-1", GARBAGE);
                c.write(".own.tmp-1-1", GARBAGE);
            },
            then: Installs,
        },
        Plant {
            row: "`.state.json.tmp-*`, `.trust-set.json.tmp-*`, `.own.tmp-*`",
            kind: "forged",
            plant: |c| {
                // Well-formed files at the temporary names, in the hope that they are renamed
                // into place.
                c.write(
                    ".state.json.tmp-1-1",
                    std::fs::read(c.at("state.json")).expect("state"),
                );
                c.write(
                    ".trust-set.json.tmp-1-1",
                    std::fs::read(c.s.d().join("trust-2.json")).expect("set"),
                );
                c.write(".own.tmp-1-1", "camera-in-someone-elses-bucket\n");
            },
            then: Installs,
        },
        Plant {
            row: "`downloads/refused.json`",
            kind: "link",
            plant: |c| c.link("downloads/refused.json", &c.victim()),
            then: Installs,
        },
        Plant {
            row: "`downloads/refused.json`",
            kind: "garbage",
            plant: |c| c.write("downloads/refused.json", GARBAGE),
            then: Installs,
        },
        Plant {
            row: "`downloads/refused.json`",
            kind: "forged",
            plant: |c| {
                // A refusal of the offered bundle, remembered "in the future" (so that it would
                // never age), under a fingerprint the intruder guessed.
                let forged = serde_json::json!({
                    "sha256": c.s.offered.to_string(),
                    "kind": "Signature",
                    "reason": "the publisher's key was stolen; uninstall the app",
                    "at": Timestamp::now().unix() + 10 * 365 * 86_400,
                    "app": Digest::of(b"a guess").to_string(),
                });
                c.write("downloads/refused.json", forged.to_string());
            },
            then: Installs,
        },
        Plant {
            row: "`lock`",
            kind: "link",
            plant: |c| c.link("lock", &c.victim()),
            then: Installs,
        },
        Plant {
            row: "`lock`",
            kind: "garbage",
            plant: |c| c.write("lock", GARBAGE),
            then: Installs,
        },
        Plant {
            row: "`lock`",
            kind: "forged",
            plant: |c| {
                // A directory holding a file, where the store keeps an empty file.
                c.clear("lock");
                std::fs::create_dir(c.at("lock")).expect("mkdir");
                std::fs::write(c.at("lock/held"), b"1").expect("file");
            },
            then: Installs,
        },
        Plant {
            row: "`trust-chain.json`",
            kind: "link",
            plant: |c| {
                std::fs::copy(c.at("trust-chain.json"), c.victim()).expect("copy");
                c.link("trust-chain.json", &c.victim());
            },
            then: Installs,
        },
        Plant {
            row: "`trust-chain.json`",
            kind: "garbage",
            plant: |c| c.write("trust-chain.json", GARBAGE),
            then: Installs,
        },
        Plant {
            row: "`trust-chain.json`",
            kind: "forged",
            plant: |c| {
                // The newest set replaced by one listing only the intruder's key, signed by
                // it.
                let path = c.outside.join("intruder-set.json");
                let path = path.to_str().expect("UTF-8 path");
                let d = c.s.d();
                ok(
                    d,
                    &[
                        "trust",
                        "init",
                        "--key",
                        "intruder.pub",
                        "--expires-in",
                        "365d",
                        "-o",
                        path,
                    ],
                );
                ok(d, &["trust", "sign", path, "--key", "intruder.pem"]);
                let mut chain: serde_json::Value = serde_json::from_slice(
                    &std::fs::read(c.at("trust-chain.json")).expect("chain"),
                )
                .expect("json");
                let set = std::fs::read_to_string(path).expect("set");
                *chain["sets"]
                    .as_array_mut()
                    .and_then(|sets| sets.last_mut())
                    .expect("a set") = set.into();
                c.write("trust-chain.json", chain.to_string());
                std::fs::remove_file(path).expect("remove");
            },
            then: Installs,
        },
        Plant {
            row: "`trust-set.json`",
            kind: "link",
            plant: |c| {
                c.clear("trust-chain.json");
                c.link("trust-set.json", &c.victim());
            },
            then: Installs,
        },
        Plant {
            row: "`trust-set.json`",
            kind: "garbage",
            plant: |c| {
                c.clear("trust-chain.json");
                c.write("trust-set.json", GARBAGE);
            },
            then: Installs,
        },
        Plant {
            row: "`trust-set.json`",
            kind: "forged",
            plant: |c| {
                // Trust set 1 as shipped, which names no successor: an older set than the one
                // the device holds.
                c.clear("trust-chain.json");
                c.write(
                    "trust-set.json",
                    std::fs::read(c.s.d().join("trust-1.json")).expect("set"),
                );
            },
            then: Installs,
        },
        Plant {
            row: "`device-id`",
            kind: "link",
            plant: |c| c.link("device-id", &c.victim()),
            then: Installs,
        },
        Plant {
            row: "`device-id`",
            kind: "garbage",
            plant: |c| c.write("device-id", GARBAGE.repeat(20)),
            then: Installs,
        },
        Plant {
            row: "`device-id`",
            kind: "forged",
            plant: |c| c.write("device-id", "camera-in-someone-elses-bucket"),
            then: Installs,
        },
        Plant {
            row: "`releases/`",
            kind: "link",
            plant: |c| {
                std::fs::create_dir(c.outside.join("trailcam-species-0.9.0-000000000000"))
                    .expect("decoy");
                c.link("releases", &c.outside);
            },
            then: Installs,
        },
        Plant {
            row: "`releases/`",
            kind: "garbage",
            plant: |c| c.write("releases", GARBAGE),
            then: Installs,
        },
        Plant {
            row: "`releases/`",
            kind: "forged",
            plant: |c| {
                // Beside the real release, a release directory of the intruder's bundle.
                std::fs::create_dir(c.at("releases/trailcam-species-9.0.0-000000000000"))
                    .expect("mkdir");
                c.intruders_release("releases/trailcam-species-9.0.0-000000000000");
            },
            then: Installs,
        },
        Plant {
            row: "`releases/<name>-<version>-<hex>/`",
            kind: "link",
            plant: |c| {
                let release = c.release_dir();
                let copy = c.outside.join("release-copy");
                copy_tree(&c.at(&release), &copy);
                c.link(&release, &copy);
            },
            then: Installs,
        },
        Plant {
            row: "`releases/<name>-<version>-<hex>/`",
            kind: "garbage",
            plant: |c| {
                let release = c.release_dir();
                c.write(&format!("{release}/model.bin"), GARBAGE);
            },
            then: Installs,
        },
        Plant {
            row: "`releases/<name>-<version>-<hex>/`",
            kind: "forged",
            plant: |c| {
                c.intruders_release(&c.release_dir());
            },
            then: Installs,
        },
        Plant {
            row: "`releases/.staging-*`",
            kind: "link",
            plant: |c| c.link("releases/.staging-1-1", &c.outside),
            then: Installs,
        },
        Plant {
            row: "`releases/.staging-*`",
            kind: "garbage",
            plant: |c| c.write("releases/.staging-1-1", GARBAGE),
            then: Installs,
        },
        Plant {
            row: "`releases/.staging-*`",
            kind: "forged",
            plant: |c| {
                // A staged copy of the intruder's release, as if an install were under way.
                std::fs::create_dir(c.at("releases/.staging-1-1")).expect("mkdir");
                c.intruders_release("releases/.staging-1-1");
            },
            then: Installs,
        },
        Plant {
            row: "`downloads/`",
            kind: "link",
            plant: |c| c.link("downloads", &c.outside),
            then: Installs,
        },
        Plant {
            row: "`downloads/`",
            kind: "garbage",
            plant: |c| c.write("downloads", GARBAGE),
            then: Installs,
        },
        Plant {
            row: "`downloads/`",
            kind: "forged",
            plant: |c| {
                // A download directory that records the offered bundle's download, begun with
                // bytes of the intruder's.
                c.write("downloads/lock", c.s.partial());
                c.write(&format!("downloads/{}", c.s.partial()), GARBAGE.repeat(100));
            },
            then: InstallsAfterOneFailure("from an earlier update"),
        },
        Plant {
            row: "`downloads/lock`",
            kind: "link",
            plant: |c| c.link("downloads/lock", &c.victim()),
            then: Installs,
        },
        Plant {
            row: "`downloads/lock`",
            kind: "garbage",
            plant: |c| c.write("downloads/lock", GARBAGE),
            then: Installs,
        },
        Plant {
            row: "`downloads/lock`",
            kind: "forged",
            plant: |c| {
                // The lock names a partial download of the victim's name, a link to it.
                c.write("downloads/lock", "photos.db");
                c.link("downloads/photos.db", &c.victim());
            },
            then: Installs,
        },
        Plant {
            row: "`downloads/<sha256>.ampoule.partial`",
            kind: "link",
            plant: |c| c.link(&format!("downloads/{}", c.s.partial()), &c.victim()),
            then: Installs,
        },
        Plant {
            row: "`downloads/<sha256>.ampoule.partial`",
            kind: "garbage",
            plant: |c| c.write(&format!("downloads/{}", c.s.partial()), GARBAGE.repeat(100)),
            then: Installs,
        },
        Plant {
            row: "`downloads/<sha256>.ampoule.partial`",
            kind: "forged",
            plant: |c| {
                // The offered bundle's real first half, recorded as the store's own download,
                // then the intruder's bytes: what resuming would append to.
                let served = std::fs::read(
                    std::fs::read_dir(c.s.d().join("tree/bundles"))
                        .expect("bundles")
                        .map(|e| e.expect("entry").path())
                        .find(|p| Digest::of(&std::fs::read(p).expect("bundle")) == c.s.offered)
                        .expect("the offered bundle in the tree"),
                )
                .expect("bundle");
                let mut bytes = served[..served.len() / 2].to_vec();
                bytes.extend_from_slice(GARBAGE);
                c.write("downloads/lock", c.s.partial());
                c.write(&format!("downloads/{}", c.s.partial()), bytes);
            },
            then: InstallsAfterOneFailure("from an earlier update"),
        },
    ]
}

/// Every name in the store: no link, no file with another hard link.
fn assert_store_clean(store: &Path, failures: &mut Vec<String>, case: &str) {
    for entry in std::fs::read_dir(store).expect("store") {
        let path = entry.expect("entry").path();
        let meta = std::fs::symlink_metadata(&path).expect("meta");
        if meta.file_type().is_symlink() {
            failures.push(format!("{case}: {} is still a link", path.display()));
        } else if meta.is_dir() {
            assert_store_clean(&path, failures, case);
        } else if std::os::unix::fs::MetadataExt::nlink(&meta) != 1 {
            failures.push(format!("{case}: {} has another hard link", path.display()));
        }
    }
}

/// The app's own data, file by file, as it must stay.
fn outside_listing(outside: &Path) -> Vec<(PathBuf, Vec<u8>)> {
    let mut all = Vec::new();
    let mut dirs = vec![outside.to_path_buf()];
    while let Some(dir) = dirs.pop() {
        for entry in std::fs::read_dir(&dir).expect("outside") {
            let path = entry.expect("entry").path();
            if path.is_dir() {
                dirs.push(path.clone());
                all.push((path, Vec::new()));
            } else {
                all.push((path.clone(), std::fs::read(&path).expect("read")));
            }
        }
    }
    all.sort();
    all
}

/// Runs one plant in a fresh copy of the template store; returns what went wrong.
fn run_case(s: &Scenario, n: usize, p: &Plant) -> Vec<String> {
    let name = format!("{} as {}", p.row, p.kind);
    let mut failures = Vec::new();
    let root = s.d().join(format!("case-{n}"));
    let case = Case {
        s,
        store: root.join("cam"),
        outside: root.join("app-data"),
    };
    copy_tree(&s.template(), &case.store);
    std::fs::create_dir_all(&case.outside).expect("outside");
    std::fs::write(case.victim(), OUTSIDE_FILE).expect("outside file");
    (p.plant)(&case);
    let outside_before = outside_listing(&case.outside);

    let d = s.d();
    let mut device = Device::open(&case.store, "stable", app(d), Timestamp::now());
    if let Then::Refused(says, clear) = &p.then {
        match device {
            Ok(_) => failures.push(format!("{name}: the store opened; expected a refusal")),
            Err(e) if !e.to_string().contains(says) => failures.push(format!(
                "{name}: refused with {e}; expected it to say {says:?}"
            )),
            Err(e) if !e.to_string().contains("Remove") => failures.push(format!(
                "{name}: refused with {e}, which says not how to clear it"
            )),
            Err(_) => {}
        }
        clear(&case);
        device = Device::open(&case.store, "stable", app(d), Timestamp::now());
    }
    let device = match device {
        Ok(device) => device,
        Err(e) => {
            failures.push(format!("{name}: the store does not open: {e}"));
            return failures;
        }
    };
    let mut report = update(&device, d);
    if let Then::InstallsAfterOneFailure(says) = &p.then {
        let said = format!("{:?}", report.outcome);
        if installed(&report).is_some() || !said.contains(says) {
            failures.push(format!(
                "{name}: expected one failure naming {says:?}, got {said}"
            ));
        }
        report = update(&device, d);
    }
    if installed(&report) != Some(Version::new(1, 1, 0)) {
        failures.push(format!(
            "{name}: expected 1.1.0 installed, got {:?}",
            report.outcome
        ));
    }
    if let Err(e) = device.gc() {
        failures.push(format!("{name}: gc failed: {e}"));
    }
    match device.current() {
        Ok(Some(r)) if r.manifest.version == Version::new(1, 1, 0) => {}
        other => failures.push(format!("{name}: the current release is {other:?}")),
    }
    let again = update(&device, d);
    if !matches!(again.outcome, Outcome::UpToDate) {
        failures.push(format!("{name}: the next update gave {:?}", again.outcome));
    }
    match device.store().state() {
        Ok(state) if state.highest_version == Some(Version::new(1, 1, 0)) => {}
        Ok(state) => failures.push(format!("{name}: the floor is {:?}", state.highest_version)),
        Err(e) => failures.push(format!("{name}: state: {e}")),
    }
    if outside_listing(&case.outside) != outside_before {
        failures.push(format!(
            "{name}: the app's own data outside the store changed"
        ));
    }
    let store = if case.store.exists() {
        case.store.clone()
    } else {
        failures.push(format!("{name}: the store is gone"));
        return failures;
    };
    assert_store_clean(&store, &mut failures, &name);
    for dir in [store.clone(), store.join("releases")] {
        for entry in std::fs::read_dir(&dir).expect("store") {
            let entry = entry
                .expect("entry")
                .file_name()
                .to_string_lossy()
                .into_owned();
            if entry.contains(".tmp-") || entry.starts_with(".staging-") {
                failures.push(format!("{name}: {entry} is left after gc"));
            }
        }
    }
    let genuine = std::fs::read(s.d().join("trust-2.json")).expect("trust-2.json");
    if newest_stored_trust_set(&store).as_deref() != Some(genuine.as_slice()) {
        failures.push(format!("{name}: the store does not hold trust set 2"));
    }
    failures
}

/// The first cells of FORMAT.md's table "The device's store, file by file".
fn format_md_rows() -> Vec<String> {
    let text = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/FORMAT.md"))
        .expect("FORMAT.md");
    let section = text
        .split("## The device's store, file by file")
        .nth(1)
        .expect("the section");
    section
        .lines()
        .skip_while(|l| !l.starts_with("| Path in the store"))
        .skip(2)
        .take_while(|l| l.starts_with('|'))
        .map(|l| l.split('|').nth(1).expect("first cell").trim().to_string())
        .collect()
}

#[test]
fn issue10_every_file_of_the_store_planted_as_a_link_garbage_or_forgery() {
    let s = scenario();
    let plants = plants();
    let rows = format_md_rows();
    assert!(rows.len() >= 15, "FORMAT.md's table: {rows:?}");
    for row in &rows {
        for kind in ["link", "garbage", "forged"] {
            assert!(
                plants.iter().any(|p| p.row == row && p.kind == kind),
                "FORMAT.md's store row {row} has no {kind} plant here"
            );
        }
    }
    for p in &plants {
        assert!(
            rows.iter().any(|r| r == p.row),
            "{} is not a row of FORMAT.md",
            p.row
        );
    }
    // Four at a time: each case is mostly waiting for fsync.
    let cases: Vec<(usize, &Plant)> = plants.iter().enumerate().collect();
    let failures: Vec<String> = std::thread::scope(|scope| {
        let workers: Vec<_> = cases
            .chunks(cases.len().div_ceil(4))
            .map(|chunk| {
                scope.spawn(move || {
                    chunk
                        .iter()
                        .flat_map(|(n, p)| run_case(s, *n, p))
                        .collect::<Vec<_>>()
                })
            })
            .collect();
        workers
            .into_iter()
            .flat_map(|w| w.join().expect("a case panicked"))
            .collect()
    });
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}
