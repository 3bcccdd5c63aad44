//! `ampoule withdraw`: pulls a channel's current release, named by `--version`, signing a feed
//! that falls back to the release before it (or to nothing) under a higher sequence. Naming
//! the version makes a rerun safe: a version already pulled changes nothing.

use ampoule_verify::Timestamp;
use anyhow::Result;
use serde_json::json;

use crate::cli::WithdrawArgs;
use crate::cmd::passphrase_source;
use crate::cmd::publish::{
    outside_signer, read_tree_head_keys, release_json, report, report_plan, tree_head_warning,
};
use crate::output::Output;
use crate::release::keyfile;
use crate::release::tree::{
    AlreadyWithdrawn, FEEDS_DIR, Signing, Tree, Withdrawal, parse_duration,
};

pub fn run(args: WithdrawArgs, out: &Output) -> Result<()> {
    let expires_in_secs = parse_duration(&args.expires_in)?;
    crate::cmd::check_channel_arg(&args.channel)?;
    if !args.tree.join(FEEDS_DIR).is_dir() {
        anyhow::bail!(
            "{} is not a release tree (it has no {FEEDS_DIR}/ directory); publish to it first",
            args.tree.display()
        );
    }
    let wait = std::time::Duration::from_secs(args.lock_wait);
    let Some(version) = &args.version else {
        let current = Tree::read_only(&args.tree, wait)?.current(&args.channel)?;
        return Err(crate::failure::usage(anyhow::anyhow!(
            "withdraw needs --version, the release to pull: {}",
            match current {
                Some(r) => format!(
                    "the current release of channel {} is {} {} (--version {})",
                    args.channel, r.name, r.version, r.version
                ),
                None => format!("channel {} offers nothing now", args.channel),
            }
        )));
    };
    let version: semver::Version = version.parse().map_err(|e| {
        crate::failure::usage(anyhow::anyhow!(
            "--version {version} is not a version ({e}); give the current release's version, \
             like 1.1.0"
        ))
    })?;
    let key = keyfile::read_secret_key(&args.key, &passphrase_source(&args.passphrase))?;
    let tree_head_keys = read_tree_head_keys(&args.tree_head_key, &args.passphrase)?;
    let outside = outside_signer(&args.tree_head_signer, &args.tree_head_signer_key)?;
    let tree = if args.dry_run {
        Tree::read_only(&args.tree, wait)?
    } else {
        Tree::lock_waiting(&args.tree, wait)?
    };
    let signing = Signing {
        key: &key,
        key_file: Some(&args.key),
        now: Timestamp::now(),
        expires_in_secs,
        tree_head_keys: &tree_head_keys,
        outside: &outside,
    };
    if args.dry_run {
        let planned = tree.plan_withdraw(&args.channel, &version, &signing)?;
        let warning = tree_head_warning(&tree, &signing)?;
        drop(tree);
        if let Some(w) = warning {
            out.note(&w);
        }
        return match planned {
            Withdrawal::Pending(plan) => report_plan(&plan, None, &signing, &args.key, out),
            Withdrawal::Already(already) => report_already(&already, true, out),
        };
    }
    let done = tree.withdraw(&args.channel, &version, &signing)?;
    let warning = tree_head_warning(&tree, &signing)?;
    drop(tree);
    if let Some(w) = warning {
        out.note(&w);
    }
    match done {
        Withdrawal::Pending(change) => report(&change, None, &args.key, out),
        Withdrawal::Already(already) => report_already(&already, false, out),
    }
}

/// Prints that the version was withdrawn before, and what the channel offers now.
fn report_already(already: &AlreadyWithdrawn, dry_run: bool, out: &Output) -> Result<()> {
    let offers = match &already.current {
        Some(r) => format!("{} {} at {}% rollout", r.name, r.version, r.rollout_percent),
        None => "nothing (release: null)".into(),
    };
    let human = format!(
        "{} {} was already withdrawn from channel {} (feed sequence {}, {}); nothing changed \
         and no ledger entry was added\nchannel {} offers {offers}\n",
        already.name,
        already.version,
        already.channel,
        already.sequence,
        already.time,
        already.channel
    );
    out.result(
        &human,
        json!({
            "ok": true,
            "action": "already_withdrawn",
            "dry_run": dry_run,
            "channel": already.channel,
            "name": already.name,
            "version": already.version.to_string(),
            "withdrawn_sequence": already.sequence,
            "withdrawn_time": already.time,
            "release": already.current.as_ref().map(release_json),
        }),
    )
}
