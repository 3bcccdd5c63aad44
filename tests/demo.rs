//! `ampoule demo` runs the whole story and every attack in it is refused.

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
            "install",
            "update",
            "replay",
            "tamper",
            "incompatible",
            "forgery"
        ]
    );
    let error_of = |name: &str| -> String {
        doc["steps"]
            .as_array()
            .and_then(|a| a.iter().find(|s| s["step"] == name))
            .and_then(|s| s["detail"]["error"].as_str())
            .unwrap_or_default()
            .to_string()
    };
    assert_eq!(
        error_of("replay"),
        "bundle version 1.0.0 is not newer than the installed version 1.1.0; refusing a downgrade or reinstall"
    );
    assert!(
        error_of("tamper").starts_with("payload digest mismatch"),
        "{}",
        error_of("tamper")
    );
    assert!(
        error_of("forgery").starts_with("bundle has no valid signature by a trusted key"),
        "{}",
        error_of("forgery")
    );
    assert_eq!(
        error_of("labels"),
        "the label list has 6 labels, but output 'species' has 7 classes (shape [N, 7])"
    );
    assert_eq!(
        error_of("incompatible"),
        "input 'image' has shape [N, 3, 128, 128], the app expects [*, 3, 96, 96]: dimension 2 is 128, not 96"
    );
    assert!(work.join("camera/model-1.1.0/labels.txt").is_file());
}
