//! One module per subcommand: each turns its raw arguments into checked settings, does the
//! work through `ampoule_verify` and `pack`, and reports through `Output`.

pub mod completions;
pub mod delta;
pub mod demo;
pub mod diff;
pub mod external;
pub mod inspect;
pub mod keygen;
pub mod keyid;
pub mod ledger;
pub mod man;
pub mod offline;
pub mod pack;
pub mod publish;
pub mod serve;
pub mod sign;
pub mod store;
pub mod trust;
pub mod update;
pub mod verify;
pub mod withdraw;

use std::path::{Path, PathBuf};

use ampoule_verify::format::trust_set;
use ampoule_verify::model::PolicyDocument;
use ampoule_verify::{CompatibilityPolicy, Timestamp, TrustSet, TrustSetFile, TrustedKeys};
use anyhow::{Context, Result};
use semver::Version;
use serde_json::Value;

use crate::cli::{PassphraseArgs, RequireMetaArgs};
use crate::failure::{Failure, Kind, usage};
use crate::release::keyfile::{self, PassphraseSource};

/// Loads every `--trust` key; any unreadable or weak key stops the command.
pub fn load_trust(paths: &[PathBuf]) -> Result<TrustedKeys> {
    Ok(load_trust_named(paths)?.0)
}

/// [`load_trust`], and the keys as messages name them: "ID (FILE)", comma-separated.
pub fn load_trust_named(paths: &[PathBuf]) -> Result<(TrustedKeys, String)> {
    let mut keys = TrustedKeys::new();
    let mut names = Vec::new();
    for path in paths {
        let key = keyfile::read_public_key(path)?;
        names.push(format!("{} ({})", key.id(), path.display()));
        keys.add(key);
    }
    Ok((keys, names.join(", ")))
}

/// A refusal that names signers "not trusted here", with the keys that were trusted named
/// by file: the library names keys only by id, and people know their keys by file. (Other
/// signature refusals, unsigned or not matching, are about the bundle, not the keys.)
pub fn name_trusted(err: anyhow::Error, trusted: &str) -> anyhow::Error {
    let refused_signature = err
        .chain()
        .filter_map(|c| c.downcast_ref::<ampoule_verify::Error>())
        .any(|e| {
            e.kind() == ampoule_verify::ErrorKind::Signature
                && e.to_string().contains("not trusted here")
        });
    if !refused_signature || trusted.is_empty() {
        return err;
    }
    Failure::wrap(
        Kind::Verify(ampoule_verify::ErrorKind::Signature),
        anyhow::anyhow!("{err:#}; trusted here: {trusted}"),
    )
}

/// Loads a `--trust-set` file the way a device loads the set shipped with its app: signed by
/// a threshold of its own keys and not expired.
pub fn load_trust_set(path: &Path) -> Result<TrustSet> {
    let (bytes, _) = read_trust_set_file(path)?;
    TrustSet::verify_initial(&bytes, Timestamp::now())
        .with_context(|| format!("trust set {} refused", path.display()))
}

/// Reads and parses a trust-set file named on the command line, without checking its
/// signatures or expiry. A file that cannot be read or parsed is the user's mistake (exit
/// 2); a parsed set that then fails its checks is a refusal (exit 1), left to the caller.
pub fn read_trust_set_file(path: &Path) -> Result<(Vec<u8>, TrustSetFile)> {
    let bytes = external::read_bounded(path, trust_set::MAX_BYTES, "a trust-set file")?;
    match TrustSetFile::from_json(&bytes) {
        Ok(file) => Ok((bytes, file)),
        Err(e) => Err(Failure::wrap(
            Kind::TrustSetFile,
            anyhow::Error::new(e).context(format!(
                "{} is not a valid trust-set file (give a file made by 'ampoule trust init', \
                 'add' or 'remove')",
                path.display()
            )),
        )),
    }
}

/// Where the passphrase of an encrypted key comes from: `--passphrase-env`, else the terminal.
pub fn passphrase_source(args: &PassphraseArgs) -> PassphraseSource {
    match &args.passphrase_env {
        Some(var) => PassphraseSource::Env(var.clone()),
        None => PassphraseSource::Prompt,
    }
}

/// Parses a SemVer 2.0.0 version given on the command line.
pub fn parse_version(text: &str, flag: &str) -> Result<Version> {
    Version::parse(text).with_context(|| {
        format!(
            "{flag} '{text}' is not a Semantic Versioning 2.0.0 version such as 1.2.0 or 2.0.0-rc.1"
        )
    })
}

/// Checks a channel name given on the command line: a bad one is a usage error (exit 2), not
/// the refusal the same check means for a channel named in a feed.
pub fn check_channel_arg(channel: &str) -> Result<()> {
    ampoule_verify::feed::check_channel(channel).map_err(usage)
}

/// The app's metadata requirements from `--require-meta KEY=VALUE`, as a compatibility
/// policy; `None` when there are none. VALUE is JSON when it reads as a number, boolean,
/// array or quoted string, and a plain string otherwise.
pub fn metadata_policy(args: &RequireMetaArgs) -> Result<Option<CompatibilityPolicy>> {
    if args.require_meta.is_empty() {
        return Ok(None);
    }
    let mut policy = CompatibilityPolicy::builder();
    for pair in &args.require_meta {
        let Some((key, text)) = pair.split_once('=') else {
            return Err(usage(anyhow::anyhow!(
                "--require-meta '{pair}' is not KEY=VALUE, like preprocess.colour_order=rgb"
            )));
        };
        let value = match serde_json::from_str::<serde_json::Value>(text) {
            Ok(v @ (Value::Number(_) | Value::Bool(_) | Value::Array(_) | Value::String(_))) => v,
            _ => Value::String(text.to_string()),
        };
        policy = policy.require_metadata(key, value);
    }
    Ok(Some(policy.build().map_err(usage)?))
}

/// The bytes of the app's policy document from `--policy FILE`, read within the document's
/// cap; `None` without `--policy`.
pub fn policy_document_bytes(args: &RequireMetaArgs) -> Result<Option<Vec<u8>>> {
    let Some(path) = &args.policy else {
        return Ok(None);
    };
    let max = ampoule_verify::format::policy_document::BYTES as u64;
    crate::release::files::read_bounded(path, max, "a policy document")
        .map(Some)
        .map_err(usage)
}

/// The app's policy document from `--policy FILE`, read and checked; a refused document is a
/// usage error (exit 2) that names the file and the field.
pub fn policy_document(args: &RequireMetaArgs) -> Result<Option<PolicyDocument>> {
    let (Some(path), Some(bytes)) = (&args.policy, policy_document_bytes(args)?) else {
        return Ok(None);
    };
    PolicyDocument::parse(&bytes)
        .map(Some)
        .with_context(|| format!("--policy {}", path.display()))
        .map_err(usage)
}

/// The path shown for a file in messages.
pub fn shown(path: &Path) -> String {
    path.display().to_string()
}
