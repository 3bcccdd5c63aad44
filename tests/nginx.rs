//! The release tree served by a general-purpose web server (nginx, started by the test as a
//! plain process on 127.0.0.1 with a config in the test's temp dir): the device's feed fetch,
//! a Range resume and the whole update check work against it, not only against our own server.
//! Skipped, and says so, where /usr/sbin/nginx is not installed (CI installs it).

use std::path::Path;

use ampoule_verify::fetch::{Transfer, Update, Updater, download, fetch_feed};
use ampoule_verify::{Digest, FeedVerifier, Timestamp, Verifier};
use semver::Version;

mod tree_common;
use tree_common::*;

#[test]
fn fetch_resume_and_update_against_nginx() {
    if !Path::new(NGINX).exists() {
        println!("skipped: nginx not installed");
        return;
    }
    let dir = setup();
    let d = dir.path();
    let bundle = pack(d, "1.0.0", 0, "k.pem");
    publish(d, &bundle, "stable", "100");
    let nginx = start_nginx(d, &d.join("tree"));

    let feed_url = format!("{}/feeds/stable.json", nginx.base);
    let bytes = fetch_feed(&feed_url, &Transfer::new()).expect("feed from nginx");
    let feed = FeedVerifier::new(keys(d), "stable")
        .expect("verifier")
        .verify(&bytes, Timestamp::now())
        .expect("feed verifies");
    let release = feed.release().expect("a release").clone();

    // Resume: the first third is on disk already, nginx must answer the Range request.
    let original = std::fs::read(d.join(&bundle)).expect("bundle");
    let partial = d.join("resume.partial");
    std::fs::write(&partial, &original[..original.len() / 3]).expect("prefix");
    download(
        &release.urls(&feed_url).expect("urls"),
        &partial,
        release.size,
        &release.sha256,
        &Transfer::new(),
    )
    .expect("resumed download from nginx");
    assert_eq!(
        Digest::of(&std::fs::read(&partial).expect("file")),
        release.sha256
    );
    let log = std::fs::read_to_string(d.join("nginx/access.log")).expect("access log");
    let bundle_path = format!("/feeds/../bundles/{}.ampoule", release.sha256);
    assert!(
        !log.contains(&bundle_path),
        "the client resolved '..' itself"
    );
    assert!(
        log.lines().any(|l| l.contains(&format!(
            "GET /bundles/{}.ampoule HTTP/1.1\" 206 ",
            release.sha256
        ))),
        "nginx answered 206: {log}"
    );

    std::fs::create_dir(d.join("downloads")).expect("downloads");
    let updater = Updater::new(
        feed_url,
        FeedVerifier::new(keys(d), "stable").expect("verifier"),
        Verifier::new(keys(d), Version::new(2, 3, 0)).expect("verifier"),
        "camera-0042",
        d.join("downloads"),
    );
    match updater.check(Timestamp::now()).expect("update check") {
        Update::Ready { bundle, .. } => {
            assert_eq!(bundle.manifest().version, Version::new(1, 0, 0));
        }
        other => panic!("expected a bundle, got {other:?}"),
    }
}
