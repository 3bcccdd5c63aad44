//! Files the release side writes appear whole or not at all: each is written to a temporary
//! file in its destination's directory, flushed to disk, made readable by the web server that
//! publishes it, renamed into place, and the directory flushed. One place for this, so bundles,
//! feeds, records and request files all get the same guarantees.

use std::fs::{self, File};
use std::io::Write;
use std::path::Path;

use anyhow::{Context, Result};
use tempfile::NamedTempFile;

/// The name prefix of temporary files, so leftovers of a crash are easy to recognise.
pub const TEMP_PREFIX: &str = ".ampoule-partial-";

/// How the finished file takes its place.
pub enum Placement<'a> {
    /// As a new file; an existing one is never replaced.
    New,
    /// Replacing an existing file, once `check` accepted the new one.
    Replace(&'a dyn Fn(File) -> Result<()>),
}

/// A replacement that needs no check of the new file.
pub const REPLACE: Placement<'static> = Placement::Replace(&|_| Ok(()));

fn dir_of(path: &Path) -> &Path {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    }
}

/// Refuses to write `path` into a directory that does not exist, naming that directory:
/// the temporary file's own error would name a file the user never saw.
pub fn check_dir_of(path: &Path) -> Result<()> {
    let dir = dir_of(path);
    if !dir.is_dir() {
        anyhow::bail!(
            "cannot write {}: directory {} does not exist; create it first or choose another \
             path",
            path.display(),
            dir.display()
        );
    }
    Ok(())
}

/// The temporary file for `path`: in the same directory, so the final rename is atomic.
pub fn temp_beside(path: &Path) -> Result<NamedTempFile> {
    let dir = dir_of(path);
    check_dir_of(path)?;
    tempfile::Builder::new()
        .prefix(TEMP_PREFIX)
        .tempfile_in(dir)
        .with_context(|| format!("cannot create a temporary file in {}", dir.display()))
}

/// Flushes `temp`, runs the placement's check, gives it mode 0644 (published files are read
/// by a web server; nothing secret goes through here) and renames it to `out`. Returns the
/// file's length.
pub fn place(out: &Path, temp: NamedTempFile, placement: Placement<'_>) -> Result<u64> {
    temp.as_file()
        .sync_all()
        .with_context(|| format!("cannot flush {} to disk", out.display()))?;
    if let Placement::Replace(check) = placement {
        check(temp.reopen()?)?;
    }
    let len = temp.as_file().metadata()?.len();
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        fs::set_permissions(temp.path(), fs::Permissions::from_mode(0o644))
            .with_context(|| format!("cannot set the permissions of {}", out.display()))?;
    }
    if matches!(placement, Placement::Replace(_)) {
        temp.persist(out)
            .map_err(|e| e.error)
            .with_context(|| format!("cannot replace {}", out.display()))?;
    } else {
        temp.persist_noclobber(out)
            .map_err(|e| e.error)
            .with_context(|| format!("cannot create {} (does it exist already?)", out.display()))?;
    }
    let dir = dir_of(out);
    File::open(dir)
        .and_then(|d| d.sync_all())
        .with_context(|| format!("cannot flush directory {} to disk", dir.display()))?;
    Ok(len)
}

/// Writes `bytes` to `path` whole or not at all.
pub fn write_bytes(path: &Path, bytes: &[u8], placement: Placement<'_>) -> Result<()> {
    let mut temp = temp_beside(path)?;
    temp.write_all(bytes)
        .with_context(|| format!("cannot write {}", path.display()))?;
    place(path, temp, placement).map(|_| ())
}
