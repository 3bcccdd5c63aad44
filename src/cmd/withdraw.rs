//! `ampoule withdraw`: pulls a channel's current release, signing a feed that falls back to
//! the release before it (or to nothing) under a higher sequence.

use ampoule_verify::Timestamp;
use anyhow::Result;

use crate::cli::WithdrawArgs;
use crate::cmd::passphrase_source;
use crate::cmd::publish::{read_tree_head_keys, report};
use crate::output::Output;
use crate::release::keyfile;
use crate::release::tree::{FEEDS_DIR, Signing, Tree, parse_duration};

pub fn run(args: WithdrawArgs, out: &Output) -> Result<()> {
    let expires_in_secs = parse_duration(&args.expires_in)?;
    crate::cmd::check_channel_arg(&args.channel)?;
    let key = keyfile::read_secret_key(&args.key, &passphrase_source(&args.passphrase))?;
    let tree_head_keys = read_tree_head_keys(&args.tree_head_key, &args.passphrase)?;
    if !args.tree.join(FEEDS_DIR).is_dir() {
        anyhow::bail!(
            "{} is not a release tree (it has no {FEEDS_DIR}/ directory); publish to it first",
            args.tree.display()
        );
    }
    let tree = Tree::lock_waiting(&args.tree, std::time::Duration::from_secs(args.lock_wait))?;
    let signing = Signing {
        key: &key,
        key_file: Some(&args.key),
        now: Timestamp::now(),
        expires_in_secs,
        tree_head_keys: &tree_head_keys,
    };
    let change = tree.withdraw(&args.channel, &signing)?;
    drop(tree);
    report(&change, &args.key, out)
}
