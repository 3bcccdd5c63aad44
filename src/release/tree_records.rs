//! The release tree's layout and the records it keeps beside the published files (each
//! channel's history, the index of names and versions): the part of the tree that the
//! ledger's audit reads as well as the tree itself writes, so the two never import each other.

use std::path::Path;

use ampoule_verify::feed::Release;
use ampoule_verify::{Digest, Timestamp};
use anyhow::Result;
use semver::Version;
use serde::{Deserialize, Serialize};

pub use ampoule_verify::format::tree::{BUNDLES_DIR, FEEDS_DIR, TRUST_DIR};
pub const HISTORY_DIR: &str = "history";
pub const INDEX_FILE: &str = "index.json";
pub const LOCK_FILE: &str = ".lock";
/// The largest history or index file read back; far above years of daily publishing.
pub(crate) const RECORD_FILE_BYTES: u64 = 16 * 1024 * 1024;

/// One change to a channel, as the history records it.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(tag = "action", rename_all = "lowercase", deny_unknown_fields)]
pub enum Event {
    /// A release became current (or the current one was renewed with a new rollout).
    Publish {
        sequence: u64,
        time: Timestamp,
        release: Release,
    },
    /// The current release was pulled; the one before it (if any) is current again.
    Withdraw {
        sequence: u64,
        time: Timestamp,
        name: String,
        version: Version,
        sha256: Digest,
    },
    /// The feed was signed again, unchanged but for naming a newly published trust set.
    #[serde(rename = "trust_set")]
    TrustSet {
        sequence: u64,
        time: Timestamp,
        version: u64,
        sha256: Digest,
    },
}

impl Event {
    pub fn sequence(&self) -> u64 {
        match self {
            Event::Publish { sequence, .. }
            | Event::Withdraw { sequence, .. }
            | Event::TrustSet { sequence, .. } => *sequence,
        }
    }
}

/// A channel's history: the events in order, from which the current release follows.
#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct History {
    pub events: Vec<Event>,
}

impl History {
    /// The releases that were published and not withdrawn, oldest first; the last is current.
    /// Publishing a bundle that is already on the stack moves it to the top.
    pub fn stack(&self) -> Vec<Release> {
        let mut stack: Vec<Release> = Vec::new();
        for event in &self.events {
            match event {
                Event::Publish { release, .. } => {
                    stack.retain(|r| r.sha256 != release.sha256);
                    stack.push(release.clone());
                }
                Event::Withdraw { sha256, .. } => stack.retain(|r| r.sha256 != *sha256),
                Event::TrustSet { .. } => {}
            }
        }
        stack
    }

    pub fn last_sequence(&self) -> u64 {
        self.events.iter().map(Event::sequence).max().unwrap_or(0)
    }
}

/// One name and version in the tree. A version, once published, always means these bytes.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct IndexEntry {
    pub name: String,
    pub version: Version,
    pub sha256: Digest,
    pub size: u64,
    pub first_published: Timestamp,
}

#[derive(Debug, Clone, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Index {
    pub releases: Vec<IndexEntry>,
}

/// What a publish or withdraw wrote.
/// Writes `bytes` to `path` atomically: temporary file in the same directory, flush, rename,
/// flush the directory.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    crate::release::atomic::write_bytes(path, bytes, crate::release::atomic::REPLACE)
}
