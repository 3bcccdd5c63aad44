//! One module per subcommand: each turns its raw arguments into checked settings, does the
//! work through `ampoule_verify` and `pack`, and reports through `Output`.

pub mod demo;
pub mod diff;
pub mod external;
pub mod inspect;
pub mod keygen;
pub mod ledger;
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
use ampoule_verify::{Timestamp, TrustSet, TrustedKeys};
use anyhow::{Context, Result};
use semver::Version;

use crate::cli::PassphraseArgs;
use crate::release::keyfile::{self, PassphraseSource};

/// Loads every `--trust` key; any unreadable or weak key stops the command.
pub fn load_trust(paths: &[PathBuf]) -> Result<TrustedKeys> {
    let mut keys = TrustedKeys::new();
    for path in paths {
        keys.add(keyfile::read_public_key(path)?);
    }
    Ok(keys)
}

/// Loads a `--trust-set` file the way a device loads the set shipped with its app: signed by
/// a threshold of its own keys and not expired.
pub fn load_trust_set(path: &Path) -> Result<TrustSet> {
    let bytes = external::read_bounded(path, trust_set::MAX_BYTES, "a trust-set file")?;
    TrustSet::verify_initial(&bytes, Timestamp::now())
        .with_context(|| format!("trust set {} refused", path.display()))
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

/// The path shown for a file in messages.
pub fn shown(path: &Path) -> String {
    path.display().to_string()
}
