//! The deltas a publish offers (issue 13): which earlier releases of the channel serve as
//! bases, the deltas made from them to the new release, which are kept, and how they take
//! their place in the release tree beside the bundles.
//!
//! A delta is a way to send a release, not a release: publish makes one from each of the
//! channel's last N earlier releases of the same bundle name (newest first, withdrawn ones
//! included, since the devices that installed them before the withdraw still run them), with
//! [`delta::make`], which needs no key. Each is written content-addressed as
//! `bundles/<sha256>.ampoule-delta`; the feed lists it and the ledger entry logs it
//! (base digest, size, SHA-256).
//!
//! A delta is kept only when it saves at least a quarter of the bundle's bytes
//! ([`kept`]). A device that takes a delta first hashes its installed files in full, and when
//! applying fails it downloads the full bundle as well, so a delta that saves little costs a
//! device more than it saves in the bad case, and costs the tree its storage and a place in
//! the feed's eight. (A quarter is this project's rule of thumb, not a standard.)
//!
//! Deltas are made into a staging directory inside `bundles/` (named with the temporary
//! prefix, removed on drop), so nothing is half-written: [`Staged::place`] renames each
//! finished file to its content address just before the ledger append, as the bundle is.

use std::fs::File;
use std::path::{Path, PathBuf};

use ampoule_verify::bundle::Unverified;
use ampoule_verify::format::BUNDLE_EXTENSION;
use ampoule_verify::format::delta::EXTENSION as DELTA_EXTENSION;
use ampoule_verify::format::delta_file::base_id;
use ampoule_verify::ledger::{DeltaRef, MAX_DELTAS};
use ampoule_verify::manifest::Manifest;
use ampoule_verify::{Digest, digest::hash_reader};
use anyhow::{Context, Result, bail};
use semver::Version;
use tempfile::TempDir;

use super::atomic::TEMP_PREFIX;
use super::delta;
use super::tree_records::{BUNDLES_DIR, Event, History};

/// How many earlier releases publish makes deltas from when `--deltas` is not given.
pub const DEFAULT_BASES: usize = 3;

/// A delta is kept when it is at most this share of its bundle's size, in percent (see the
/// module documentation for why).
pub const MAX_SHARE_PERCENT: u64 = 75;

/// Whether a delta of `delta` bytes is worth offering for a bundle of `bundle` bytes: smaller
/// than the bundle (the feed's rule) and at most [`MAX_SHARE_PERCENT`] of it.
pub fn kept(delta: u64, bundle: u64) -> bool {
    delta < bundle && u128::from(delta) * 100 <= u128::from(bundle) * u128::from(MAX_SHARE_PERCENT)
}

/// The path of a delta in the tree rooted at `root`.
pub fn delta_path(root: &Path, sha256: &Digest) -> PathBuf {
    root.join(BUNDLES_DIR)
        .join(format!("{sha256}.{DELTA_EXTENSION}"))
}

/// Checks the `--deltas` count: the feed lists at most [`MAX_DELTAS`].
pub fn check_count(bases: usize) -> Result<()> {
    if bases > MAX_DELTAS {
        bail!(
            "--deltas {bases} is over {MAX_DELTAS}, the most deltas a feed lists for a release; \
             give 0 to {MAX_DELTAS}"
        );
    }
    Ok(())
}

/// One earlier release of the channel that publish tried as a base.
#[derive(Debug, Clone)]
pub struct Base {
    pub name: String,
    pub version: Version,
    /// The SHA-256 of the base's bundle file.
    pub bundle: Digest,
}

/// A delta publish offers.
#[derive(Debug, Clone)]
pub struct Offered {
    /// The release it leads from (unknown for a delta kept on a renewal, whose base the feed
    /// names only by digest).
    pub from: Option<Base>,
    /// As the feed lists it and the ledger logs it.
    pub reference: DeltaRef,
    /// Whether the file is new in the tree (false: made before, by another publish).
    pub new: bool,
}

/// A base publish tried and did not offer a delta from, and why.
#[derive(Debug, Clone)]
pub struct Skipped {
    pub from: Base,
    /// The delta's size, when it was made.
    pub size: Option<u64>,
    pub reason: String,
}

/// The deltas of one publish: those offered, those skipped, and the staged files.
#[derive(Debug, Default)]
pub struct Deltas {
    pub offered: Vec<Offered>,
    pub skipped: Vec<Skipped>,
    /// Deltas dropped from a renewal because their files are gone or changed.
    pub dropped: Vec<(DeltaRef, String)>,
    staging: Option<TempDir>,
    files: Vec<(PathBuf, Digest)>,
}

impl Deltas {
    /// The list the feed and the ledger entry carry.
    pub fn references(&self) -> Vec<DeltaRef> {
        self.offered.iter().map(|o| o.reference.clone()).collect()
    }

    /// Renames each staged delta to `bundles/<sha256>.ampoule-delta` under `root`. A file
    /// already there with the same digest is kept; one with other bytes (damaged) is replaced.
    pub fn place(&mut self, root: &Path) -> Result<()> {
        for (staged, sha256) in self.files.drain(..) {
            let dest = delta_path(root, &sha256);
            if let Ok(existing) = File::open(&dest)
                && hash_reader(existing, u64::MAX).is_ok_and(|(d, _)| d == sha256)
            {
                continue;
            }
            std::fs::rename(&staged, &dest)
                .with_context(|| format!("cannot create {}", dest.display()))?;
        }
        let dir = root.join(BUNDLES_DIR);
        File::open(&dir)
            .and_then(|d| d.sync_all())
            .with_context(|| format!("cannot flush directory {}", dir.display()))?;
        self.staging = None;
        Ok(())
    }
}

/// The channel's earlier releases of `target`'s name that are older than it, newest publish
/// first, each once: the bases publish tries, at most `count`.
pub fn bases(history: &History, target: &Manifest, target_sha: &Digest, count: usize) -> Vec<Base> {
    let mut found: Vec<Base> = Vec::new();
    for event in history.events.iter().rev() {
        let Event::Publish { release, .. } = event else {
            continue;
        };
        if found.len() == count {
            break;
        }
        // A delta for another bundle name is never made, nor one from the release to itself,
        // nor one leading back to an older version.
        let older = release.version.cmp_precedence(&target.version).is_lt();
        if release.name != target.name
            || release.sha256 == *target_sha
            || !older
            || found.iter().any(|b| b.bundle == release.sha256)
        {
            continue;
        }
        found.push(Base {
            name: release.name.clone(),
            version: release.version.clone(),
            bundle: release.sha256,
        });
    }
    found
}

/// Makes a delta from each of `bases` (bundle files in the tree at `root`) to `target` (a
/// checked bundle file of `target_size` bytes), in a staging directory made in `staging_in`
/// (the tree's `bundles/` for a publish, a temporary directory for a dry run), and keeps the
/// ones [`kept`] accepts, one per base digest.
pub fn make(
    root: &Path,
    bases: &[Base],
    target: &Path,
    target_manifest: &Manifest,
    target_size: u64,
    staging_in: &Path,
) -> Result<Deltas> {
    let mut deltas = Deltas::default();
    if bases.is_empty() {
        return Ok(deltas);
    }
    let staging = tempfile::Builder::new()
        .prefix(TEMP_PREFIX)
        .tempdir_in(staging_in)
        .with_context(|| format!("cannot create a directory in {}", staging_in.display()))?;
    let mut seen: Vec<(Digest, Version)> = Vec::new();
    for (i, base) in bases.iter().enumerate() {
        let skip = |size: Option<u64>, reason: String| Skipped {
            from: base.clone(),
            size,
            reason,
        };
        let path = root
            .join(BUNDLES_DIR)
            .join(format!("{}.{BUNDLE_EXTENSION}", base.bundle));
        let base_manifest = match base_bundle(&path, &base.bundle) {
            Ok(m) => m,
            Err(reason) => {
                deltas.skipped.push(skip(None, reason));
                continue;
            }
        };
        let id = base_id(&base_manifest.files);
        if id == base_id(&target_manifest.files) {
            deltas.skipped.push(skip(
                None,
                "it holds the same files as the new release; a device on it has them already"
                    .into(),
            ));
            continue;
        }
        if let Some((_, version)) = seen.iter().find(|(d, _)| *d == id) {
            deltas.skipped.push(skip(
                None,
                format!("it holds the same files as {version}, whose delta serves it too"),
            ));
            continue;
        }
        seen.push((id, base.version.clone()));
        let out = staging.path().join(format!("{i}.{DELTA_EXTENSION}"));
        let made = delta::make(&path, target, &out).with_context(|| {
            format!(
                "cannot make the delta from {} {} ({}); nothing was published",
                base.name,
                base.version,
                path.display()
            )
        })?;
        if !kept(made.size, target_size) {
            let percent = made.size.saturating_mul(100) / target_size.max(1);
            let reason = if made.size >= target_size {
                format!(
                    "the delta ({} bytes) is not smaller than the bundle ({target_size} bytes)",
                    made.size
                )
            } else {
                format!(
                    "the delta ({} bytes) is {percent}% of the bundle ({target_size} bytes); a \
                     delta is offered only at {MAX_SHARE_PERCENT}% or less",
                    made.size
                )
            };
            deltas.skipped.push(skip(Some(made.size), reason));
            std::fs::remove_file(&out)
                .with_context(|| format!("cannot remove {}", out.display()))?;
            continue;
        }
        let new = !delta_path(root, &made.sha256).is_file();
        deltas.files.push((out, made.sha256));
        deltas.offered.push(Offered {
            from: Some(base.clone()),
            reference: DeltaRef {
                base: id,
                size: made.size,
                sha256: made.sha256,
            },
            new,
        });
    }
    deltas.staging = Some(staging);
    Ok(deltas)
}

/// The manifest of the base bundle at `path`, which must be the file its name says; else why
/// it cannot serve as a base.
fn base_bundle(path: &Path, sha256: &Digest) -> std::result::Result<Manifest, String> {
    let found = File::open(path)
        .and_then(|f| hash_reader(f, u64::MAX))
        .map_err(|e| format!("its bundle {} cannot be read ({e})", path.display()))?;
    if found.0 != *sha256 {
        return Err(format!(
            "its bundle {} has sha256 {}, not the published one: run 'ampoule ledger check'",
            path.display(),
            found.0
        ));
    }
    Unverified::open(path)
        .map(|b| b.manifest)
        .map_err(|e| format!("its bundle {} cannot be read ({e})", path.display()))
}

/// The deltas a renewal offers again: those the current release lists, at most `count`, each
/// whose file is still in the tree with its logged size and SHA-256 (a missing or changed one
/// is dropped, and said so: devices would only fail on it).
pub fn renewed(root: &Path, listed: &[DeltaRef], count: usize) -> Deltas {
    let mut deltas = Deltas::default();
    for reference in listed {
        if deltas.offered.len() == count {
            deltas.dropped.push((
                reference.clone(),
                format!("--deltas {count} offers at most {count}"),
            ));
            continue;
        }
        let path = delta_path(root, &reference.sha256);
        let found =
            File::open(&path).and_then(|f| hash_reader(f, reference.size.saturating_add(1)));
        match found {
            Ok((sha256, size)) if sha256 == reference.sha256 && size == reference.size => {
                deltas.offered.push(Offered {
                    from: None,
                    reference: reference.clone(),
                    new: false,
                })
            }
            Ok(_) => deltas.dropped.push((
                reference.clone(),
                format!("{} differs from what was published", path.display()),
            )),
            Err(e) => deltas.dropped.push((
                reference.clone(),
                format!("{} cannot be read ({e})", path.display()),
            )),
        }
    }
    deltas
}
