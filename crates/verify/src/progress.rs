//! Progress reports of the long steps (download, hashing, unpacking), shared by every layer
//! that reports them, so none of those layers has to import another to do so.

use std::sync::Arc;

/// Which long-running step a progress report is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum Stage {
    /// Hashing the compressed payload whole before unpacking: format 1 bundles only. A
    /// format 2 bundle's chunks are hashed as they are unpacked, within [`Stage::Unpack`].
    HashPayload,
    /// Decompressing and checking (and possibly writing) the payload's files.
    Unpack,
    /// Downloading the bundle file (the `fetch` feature's `Transfer::on_progress`).
    Download,
}

/// A progress report: `done` of `total` bytes of `stage`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Progress {
    /// The step.
    pub stage: Stage,
    /// Bytes done so far.
    pub done: u64,
    /// Bytes the step will take in all.
    pub total: u64,
}

/// A callback for progress reports.
pub type ProgressFn = Arc<dyn Fn(Progress) + Send + Sync>;
