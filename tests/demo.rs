//! `ampoule demo` runs the whole story and every attack in it is refused.

#[path = "bundle_check/mod.rs"]
mod bundle_check;

use std::process::Command;

#[test]
fn demo_runs_and_refuses_every_attack() {
    let dir = tempfile::tempdir().expect("temp dir");
    let work = dir.path().join("demo");
    let out = Command::new(env!("CARGO_BIN_EXE_ampoule"))
        .args(["--json", "demo", "--dir"])
        .arg(&work)
        .output()
        .expect("run ampoule demo");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let doc: serde_json::Value = serde_json::from_slice(&out.stdout).expect("demo --json is JSON");
    // Every bundle the demo packed (the served copy it tampers with is in the tree, not here)
    // passes the device's layout reader and GNU tar (issue 12 item 7).
    let mut bundles = 0;
    for entry in std::fs::read_dir(&work).expect("demo dir") {
        let path = entry.expect("entry").path();
        if path.extension().is_some_and(|e| e == "ampoule") {
            bundle_check::assert_readers_accept(
                env!("CARGO_BIN_EXE_ampoule"),
                &path,
                None,
                "model.onnx",
            );
            bundles += 1;
        }
    }
    assert!(
        bundles >= 3,
        "the demo packs several bundles, found {bundles}"
    );
    let steps: Vec<&str> = doc["steps"]
        .as_array()
        .expect("steps")
        .iter()
        .map(|s| s["step"].as_str().expect("step name"))
        .collect();
    assert_eq!(
        steps,
        [
            "keygen",
            "pack",
            "pack",
            "labels",
            "publish",
            "install",
            "rollout",
            "rollout-in",
            "rollout-out",
            "replay",
            "tamper",
            "withdraw",
            "feed-replay",
            "trust-set",
            "rotate",
            "revoke",
            "revoked",
            "audit",
            "incompatible",
            "forgery"
        ]
    );
    let step = |name: &str| -> serde_json::Value {
        doc["steps"]
            .as_array()
            .and_then(|a| a.iter().find(|s| s["step"] == name))
            .cloned()
            .unwrap_or_default()
    };
    let error_of = |name: &str| -> String {
        step(name)["detail"]["error"]
            .as_str()
            .unwrap_or_default()
            .to_string()
    };
    // The auditor's ledger check: three trust sets, the five publishes, the renewal of the
    // feed that named trust set v3 and the three withdraws, and exactly one finding, the
    // bundle the demo flipped on the server.
    let audit = step("audit");
    assert_eq!(audit["detail"]["entries"], 12);
    let problems = audit["detail"]["problems"].as_array().expect("problems");
    assert_eq!(problems.len(), 1, "{problems:?}");
    let finding = problems[0].as_str().unwrap_or_default();
    assert!(
        finding.starts_with("entry 3: bundle trailcam-species 1.1.1 (bundles/")
            && finding.contains("differs from what was published"),
        "{finding}"
    );
    assert_eq!(
        error_of("labels"),
        "the label list has 6 labels, but output 'species' has 7 classes (shape [N, 7])"
    );
    assert_eq!(
        error_of("replay"),
        "bundle version 1.0.0 is not newer than 1.1.0, the highest version this store accepted; \
         refusing a downgrade or reinstall"
    );
    // The flipped byte's chunk does not match the bundle's signed chunk list (issue 13): the
    // message names the chunk, both digests and the URL on the demo's own server, and keeps
    // the chunks before it for the next try.
    let tamper = error_of("tamper");
    assert!(
        tamper.starts_with("payload chunk ")
            && tamper.contains(", but the bundle's signed chunk list declares ")
            && tamper.contains(", in the bytes from http://127.0.0.1:")
            && tamper.ends_with("are kept, and the next try downloads from there"),
        "{tamper}"
    );
    assert_eq!(
        error_of("feed-replay"),
        "feed sequence 2 is lower than 6, the last one this device accepted; refusing a replayed older feed"
    );
    assert_eq!(
        error_of("incompatible"),
        "input 'image' has shape [N, 3, 128, 128], the app expects [*, 3, 96, 96]: dimension 2 is 128, not 96"
    );
    // Key rotation: the bundle signed with the field-laptop key that trust set v3 revokes is
    // refused in the update that took v3, naming that key.
    let field_key = step("trust-set")["detail"]["field_key_id"]
        .as_str()
        .expect("field key id")
        .to_string();
    assert_eq!(step("trust-set")["detail"]["sequence"], 7);
    assert_eq!(step("revoke")["detail"]["sequence"], 9);
    assert_eq!(
        error_of("revoked"),
        format!(
            "bundle has no valid signature by a trusted key (by keys not trusted here: {field_key})"
        )
    );
    assert!(
        error_of("forgery").starts_with("bundle has no valid signature by a trusted key"),
        "{}",
        error_of("forgery")
    );

    // The rollout split one camera in and one out, and each kept its model when the channel
    // was withdrawn.
    let camera_in = step("rollout-in")["detail"]["camera"]
        .as_str()
        .expect("camera in")
        .to_string();
    let camera_out = step("rollout-out")["detail"]["camera"]
        .as_str()
        .expect("camera out")
        .to_string();
    assert_ne!(camera_in, camera_out);
    assert!(
        step("rollout-out")["detail"]["bucket"]
            .as_u64()
            .expect("bucket")
            >= 5000
    );
    let kept = &step("withdraw")["detail"]["kept"];
    assert_eq!(kept[&camera_in], "1.1.0");
    assert_eq!(kept[&camera_out], "1.0.0");
    assert_eq!(step("withdraw")["detail"]["sequence"], 6);

    // What the stores hold on disk agrees: read state.json directly.
    let state = |camera: &str| -> serde_json::Value {
        let path = work.join("cameras").join(camera).join("state.json");
        serde_json::from_slice(&std::fs::read(path).expect("state.json")).expect("state JSON")
    };
    // Both took v1.1.2 (signed with the field-laptop key) under trust set v2, refused v1.1.3
    // under v3, and keep v3 in their stores.
    for (camera, previous) in [(&camera_in, "1.1.0"), (&camera_out, "1.0.0")] {
        let s = state(camera);
        assert_eq!(s["current"]["version"], "1.1.2", "{camera}");
        assert_eq!(s["previous"]["version"], previous, "{camera}");
        assert_eq!(s["channels"]["stable"]["highest_version"], "1.1.2");
        assert_eq!(s["channels"]["stable"]["highest_sequence"], 7);
        // The store's trust chain: every set after the shipped one, the newest last.
        let chain: serde_json::Value = serde_json::from_slice(
            &std::fs::read(work.join("cameras").join(camera).join("trust-chain.json"))
                .expect("trust-chain.json"),
        )
        .expect("chain JSON");
        let newest = chain["sets"]
            .as_array()
            .and_then(|sets| sets.last())
            .and_then(|set| set.as_str())
            .expect("a stored set");
        let stored =
            ampoule_verify::TrustSetFile::from_json(newest.as_bytes()).expect("stored trust set");
        assert_eq!(stored.version(), 3, "{camera}");
        assert!(
            stored
                .keys_for(ampoule_verify::DocumentKind::Bundle)
                .get(&field_key.parse().expect("key id"))
                .is_none()
        );
    }
    let model = step("rollout-in")["detail"]["model"]
        .as_str()
        .expect("model path")
        .to_string();
    assert!(std::path::Path::new(&model).is_file(), "{model}");
}

#[test]
fn issue12_the_demo_inputs_compiled_in_equal_the_demo_folder() {
    // An installed `ampoule demo` runs from the compiled-in copies; they must be the files a
    // reader of demo/ sees, and every file there must be compiled in.
    let folder = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo");
    let mut on_disk: Vec<String> = std::fs::read_dir(&folder)
        .expect("the demo folder")
        .map(|e| {
            e.expect("an entry")
                .file_name()
                .into_string()
                .expect("UTF-8")
        })
        .collect();
    on_disk.sort();
    let mut embedded: Vec<String> = ampoule::cmd::demo::INPUTS
        .iter()
        .map(|(name, _)| name.to_string())
        .collect();
    embedded.sort();
    assert_eq!(embedded, on_disk);
    for (name, text) in ampoule::cmd::demo::INPUTS {
        let file = std::fs::read_to_string(folder.join(name)).expect("a demo input");
        assert_eq!(*text, file, "demo/{name} differs from the copy compiled in");
    }
}

#[test]
fn issue12_an_installed_demo_runs_outside_the_checkout() {
    // Run from a directory with no demo/ folder: the inputs come from the binary, and the
    // kept directory holds them beside what the demo made.
    let dir = tempfile::tempdir().expect("temp dir");
    let out = Command::new(env!("CARGO_BIN_EXE_ampoule"))
        .args(["--quiet", "demo", "--dir", "kept"])
        .current_dir(dir.path())
        .output()
        .expect("run ampoule demo");
    assert_eq!(
        (
            out.status.code(),
            out.stdout.as_slice(),
            out.stderr.as_slice()
        ),
        (Some(0), &b""[..], &b""[..])
    );
    for (name, text) in ampoule::cmd::demo::INPUTS {
        let file = std::fs::read_to_string(dir.path().join("kept").join(name)).expect("input");
        assert_eq!(*text, file);
    }
}
