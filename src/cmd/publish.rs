//! `ampoule publish`: checks a bundle, copies it into the release tree under its content
//! address and makes it the current release of a channel with a newly signed feed.

use ampoule_verify::{PublicKey, Timestamp, TrustedKeys};
use anyhow::Result;
use serde_json::{Value, json};

use crate::cli::PublishArgs;
use crate::cmd::{load_trust, passphrase_source};
use crate::keyfile;
use crate::output::Output;
use crate::tree::{Change, Signing, Tree, parse_duration};

pub fn run(args: PublishArgs, out: &Output) -> Result<()> {
    let expires_in_secs = parse_duration(&args.expires_in)?;
    ampoule_verify::feed::check_channel(&args.channel)?;
    if args.rollout > 100 {
        anyhow::bail!(
            "--rollout {} is not a percentage from 0 to 100",
            args.rollout
        );
    }
    let key = keyfile::read_secret_key(&args.key, &passphrase_source(&args.passphrase))?;
    let tree_head_keys = read_tree_head_keys(&args.tree_head_key, &args.passphrase)?;
    // Without --trust the feed key must have signed the bundle too: publishing checks the
    // bundle the way a device that trusts this key would.
    let trust = if args.trust.is_empty() {
        [PublicKey::from_verifying_key(&key.verifying_key())?]
            .into_iter()
            .collect::<TrustedKeys>()
    } else {
        load_trust(&args.trust)?
    };
    let tree = Tree::lock(&args.tree)?;
    let staged = tree.stage_bundle(&args.bundle, &trust)?;
    let signing = Signing {
        key: &key,
        now: Timestamp::now(),
        expires_in_secs,
        tree_head_keys: &tree_head_keys,
    };
    let change = tree.publish(staged, &args.channel, args.rollout, &args.mirror, &signing)?;
    drop(tree);
    report(&change, out)
}

/// Reads the `--tree-head-key` files: keys that sign the ledger's tree head besides the feed
/// key (all with the same passphrase source). Giving the feed key again is refused by the
/// ledger append, since a tree head counts each key once.
pub fn read_tree_head_keys(
    paths: &[std::path::PathBuf],
    passphrase: &crate::cli::PassphraseArgs,
) -> Result<Vec<ed25519_dalek::SigningKey>> {
    paths
        .iter()
        .map(|path| keyfile::read_secret_key(path, &passphrase_source(passphrase)))
        .collect()
}

/// Prints what a publish or withdraw changed.
pub fn report(change: &Change, out: &Output) -> Result<()> {
    let feed = &change.feed;
    let release = |r: &ampoule_verify::feed::Release| -> Value {
        json!({
            "name": r.name,
            "version": r.version.to_string(),
            "sha256": r.sha256,
            "size": r.size,
            "rollout_percent": r.rollout_percent,
            "path": r.path,
        })
    };
    let now = match &feed.release {
        Some(r) => format!(
            "{} {} ({} bytes, sha256 {}) at {}% rollout",
            r.name, r.version, r.size, r.sha256, r.rollout_percent
        ),
        None => "nothing (release: null; devices keep what they have)".into(),
    };
    let was = match &change.previous {
        Some(r) => format!("{} {}", r.name, r.version),
        None => "nothing".into(),
    };
    let ledger = feed.ledger.as_ref().map(|l| {
        let head = l.tree_head.head();
        json!({
            "tree_size": head.tree_size,
            "root_hash": head.root_hash,
            "leaf_index": l.inclusion.as_ref().map(|p| p.leaf_index),
        })
    });
    let mut human = format!(
        "channel {} now offers {now}\nwas: {was}\nfeed {} sequence {}, expires {}, signed by {}\n",
        change.channel,
        change.feed_path.display(),
        feed.sequence,
        feed.expires,
        change.signer
    );
    if let Some(l) = &feed.ledger {
        let head = l.tree_head.head();
        human.push_str(&format!(
            "ledger: entry {} logged, tree size {}, root {}\n",
            head.tree_size - 1,
            head.tree_size,
            head.root_hash
        ));
    }
    out.result(
        &human,
        json!({
            "ok": true,
            "channel": change.channel,
            "sequence": feed.sequence,
            "issued": feed.issued,
            "expires": feed.expires,
            "feed": change.feed_path,
            "signer": change.signer.to_string(),
            "release": feed.release.as_ref().map(release),
            "previous": change.previous.as_ref().map(release),
            "ledger": ledger,
        }),
    )
}
