//! Directories of the store, opened and used without following links.
//!
//! Whoever can write the store directory (an SD card, a shared folder) can put a symbolic
//! link, a hard link or a FIFO where the store expects its own file. Checking a path first
//! and opening it afterwards leaves a gap between the two in which the path can change, so
//! nothing here does that. Every directory inside the store is opened relative to an open
//! parent directory, without following a link at the last component (`O_NOFOLLOW`), and the
//! opened handle is checked: a directory, or a regular file with one hard link, on the same
//! file system as the store. Files are created with `O_EXCL`, so a name that already exists,
//! link or not, is never written through. Removal uses `unlinkat`, which removes a link itself
//! and never its target. The path given to open the store is the app's own and may contain
//! links; only what is inside it is held to these rules.
//!
//! Paths are still kept beside every handle, for messages only.

use std::ffi::{OsStr, OsString};
use std::fs::File;
use std::io;
use std::os::fd::OwnedFd;
use std::os::unix::ffi::{OsStrExt, OsStringExt};
use std::path::{Path, PathBuf};

use rustix::fs::{AtFlags, FileType, Mode, OFlags, Stat};
use rustix::io::Errno;

/// What was found at a name inside the store, without following it.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Found {
    /// A regular file.
    File,
    /// A directory.
    Dir,
    /// A symbolic link.
    Link,
    /// A FIFO, socket or device node.
    Other,
}

impl Found {
    /// How a message names it.
    pub(crate) fn describe(self) -> &'static str {
        match self {
            Found::File => "a file",
            Found::Dir => "a directory",
            Found::Link => "a symbolic link",
            Found::Other => "a special file (FIFO, socket or device)",
        }
    }

    fn of(st: &Stat) -> Found {
        match FileType::from_raw_mode(st.st_mode) {
            FileType::RegularFile => Found::File,
            FileType::Directory => Found::Dir,
            FileType::Symlink => Found::Link,
            _ => Found::Other,
        }
    }
}

/// Why a handle inside the store is not one the store may use.
#[derive(Debug)]
pub(crate) enum Refused {
    /// Nothing is at the name.
    Missing,
    /// Something other than what was asked for is at the name (a link, a FIFO, a directory
    /// where a file belongs), or a file with more than one hard link, or on another file
    /// system. The text says which.
    Planted(String),
    /// An I/O error.
    Io(io::Error),
}

impl Refused {
    /// As an I/O error, for callers that report every failure the same way.
    pub(crate) fn into_io(self) -> io::Error {
        match self {
            Refused::Missing => io::Error::from(io::ErrorKind::NotFound),
            Refused::Planted(why) => io::Error::other(why),
            Refused::Io(e) => e,
        }
    }
}

impl From<io::Error> for Refused {
    fn from(e: io::Error) -> Self {
        Refused::Io(e)
    }
}

impl From<Errno> for Refused {
    fn from(e: Errno) -> Self {
        Refused::Io(e.into())
    }
}

/// An open directory inside (or at the root of) the store.
#[derive(Debug)]
pub(crate) struct Dir {
    fd: OwnedFd,
    path: PathBuf,
    device: u64,
}

/// One component only: never a path that could leave the directory.
fn one_name(name: &OsStr) -> io::Result<&OsStr> {
    let bytes = name.as_bytes();
    if bytes.is_empty() || bytes == b"." || bytes == b".." || bytes.contains(&b'/') {
        return Err(io::Error::new(
            io::ErrorKind::InvalidInput,
            format!("'{}' is not a single file name", name.to_string_lossy()),
        ));
    }
    Ok(name)
}

/// How deep [`Dir::remove`] goes into a directory tree.
const MAX_REMOVE_DEPTH: usize = 16;

/// Never follow a link at the last component; never block on a FIFO.
const OPEN_FLAGS: OFlags = OFlags::NOFOLLOW
    .union(OFlags::CLOEXEC)
    .union(OFlags::NONBLOCK);

#[allow(clippy::unnecessary_cast)]
fn device_of(st: &Stat) -> u64 {
    st.st_dev as u64
}

#[allow(clippy::unnecessary_cast)]
fn links_of(st: &Stat) -> u64 {
    st.st_nlink as u64
}

impl Dir {
    /// Opens the store's root directory at `path`, creating it and its parents when
    /// `create` is set. Links in `path` itself are followed: the path is the app's choice.
    pub(crate) fn open_root(path: &Path, create: bool) -> io::Result<Dir> {
        if create {
            std::fs::create_dir_all(path)?;
        }
        let fd = rustix::fs::open(
            path,
            OFlags::RDONLY | OFlags::DIRECTORY | OFlags::CLOEXEC,
            Mode::empty(),
        )?;
        let st = rustix::fs::fstat(&fd)?;
        Ok(Dir {
            fd,
            path: path.to_path_buf(),
            device: device_of(&st),
        })
    }

    /// The directory's path, for messages.
    pub(crate) fn path(&self) -> &Path {
        &self.path
    }

    /// The path of `name` in this directory, for messages.
    pub(crate) fn join(&self, name: impl AsRef<Path>) -> PathBuf {
        self.path.join(name)
    }

    fn open_at(&self, name: &OsStr, flags: OFlags, mode: Mode) -> rustix::io::Result<OwnedFd> {
        let name = one_name(name).map_err(|_| Errno::INVAL)?;
        rustix::fs::openat(&self.fd, name, flags | OPEN_FLAGS, mode)
    }

    /// What is at `name`, links not followed; `None` when nothing is.
    pub(crate) fn found(&self, name: impl AsRef<OsStr>) -> io::Result<Option<Found>> {
        let name = one_name(name.as_ref())?;
        match rustix::fs::statat(&self.fd, name, AtFlags::SYMLINK_NOFOLLOW) {
            Ok(st) => Ok(Some(Found::of(&st))),
            Err(Errno::NOENT) => Ok(None),
            Err(e) => Err(e.into()),
        }
    }

    /// Why the handle opened at `name` may not be used, if it may not.
    fn check_handle(&self, fd: &OwnedFd, name: &OsStr, want: Found) -> Result<(), Refused> {
        let st = rustix::fs::fstat(fd)?;
        let shown = name.to_string_lossy();
        let found = Found::of(&st);
        if found != want {
            return Err(Refused::Planted(format!(
                "{shown} is {} where the store keeps {}",
                found.describe(),
                want.describe()
            )));
        }
        if device_of(&st) != self.device {
            return Err(Refused::Planted(format!(
                "{shown} is on another file system than the store"
            )));
        }
        if want == Found::File && links_of(&st) != 1 {
            return Err(Refused::Planted(format!(
                "{shown} has {} hard links; a file the store wrote has one",
                links_of(&st)
            )));
        }
        Ok(())
    }

    /// The refusal for an open that failed: what is at the name, when it is the wrong kind.
    fn refused_open(&self, name: &OsStr, e: Errno, want: Found) -> Refused {
        match e {
            Errno::NOENT => Refused::Missing,
            // O_NOFOLLOW on a link, O_DIRECTORY on a file, O_NONBLOCK on a FIFO without a
            // reader, a directory opened for writing.
            Errno::LOOP | Errno::NOTDIR | Errno::NXIO | Errno::ISDIR | Errno::MLINK => {
                match self.found(name) {
                    Ok(Some(found)) => Refused::Planted(format!(
                        "{} is {} where the store keeps {}",
                        name.to_string_lossy(),
                        found.describe(),
                        want.describe()
                    )),
                    Ok(None) => Refused::Missing,
                    Err(e) => Refused::Io(e),
                }
            }
            e => Refused::Io(e.into()),
        }
    }

    /// Opens the directory `name` inside this one.
    pub(crate) fn open_dir(&self, name: impl AsRef<OsStr>) -> Result<Dir, Refused> {
        let name = name.as_ref();
        let fd = self
            .open_at(name, OFlags::RDONLY | OFlags::DIRECTORY, Mode::empty())
            .map_err(|e| self.refused_open(name, e, Found::Dir))?;
        self.check_handle(&fd, name, Found::Dir)?;
        Ok(Dir {
            fd,
            path: self.path.join(name),
            device: self.device,
        })
    }

    /// Opens the directory `name`, creating it if nothing is there.
    pub(crate) fn create_dir(&self, name: impl AsRef<OsStr>) -> Result<Dir, Refused> {
        let name = name.as_ref();
        match self.make_dir(name) {
            Err(Refused::Io(e)) if e.kind() == io::ErrorKind::AlreadyExists => self.open_dir(name),
            other => other,
        }
    }

    /// Creates the directory `name`, which must not exist, and opens it.
    pub(crate) fn make_dir(&self, name: impl AsRef<OsStr>) -> Result<Dir, Refused> {
        let name = one_name(name.as_ref())?;
        rustix::fs::mkdirat(&self.fd, name, Mode::from_raw_mode(0o755))?;
        self.open_dir(name)
    }

    /// Opens the regular file `name` for reading.
    pub(crate) fn open_file(&self, name: impl AsRef<OsStr>) -> Result<File, Refused> {
        self.open_file_with(name.as_ref(), OFlags::RDONLY)
    }

    /// Opens the regular file `name` for reading and writing, as it is.
    pub(crate) fn open_file_rw(&self, name: impl AsRef<OsStr>) -> Result<File, Refused> {
        self.open_file_with(name.as_ref(), OFlags::RDWR)
    }

    fn open_file_with(&self, name: &OsStr, flags: OFlags) -> Result<File, Refused> {
        let fd = self
            .open_at(name, flags, Mode::empty())
            .map_err(|e| self.refused_open(name, e, Found::File))?;
        self.check_handle(&fd, name, Found::File)?;
        Ok(File::from(fd))
    }

    /// Creates the file `name`, which must not exist (a link at the name counts as existing:
    /// nothing is ever written through one).
    pub(crate) fn create_new(&self, name: impl AsRef<OsStr>) -> io::Result<File> {
        let name = one_name(name.as_ref())?;
        let fd = self.open_at(
            name,
            OFlags::RDWR | OFlags::CREATE | OFlags::EXCL,
            Mode::from_raw_mode(0o644),
        )?;
        Ok(File::from(fd))
    }

    /// Opens the regular file `name` for reading and writing, creating it when nothing is
    /// there (lock files). Anything else at the name is refused as planted.
    pub(crate) fn open_or_create(&self, name: impl AsRef<OsStr>) -> Result<File, Refused> {
        let name = name.as_ref();
        match self.create_new(name) {
            Ok(file) => Ok(file),
            Err(e) if e.kind() == io::ErrorKind::AlreadyExists => self.open_file_rw(name),
            Err(e) => Err(Refused::Io(e)),
        }
    }

    /// Removes `name`: a file or link is unlinked (a link's target is never touched), a
    /// directory is removed with everything in it, each level opened without following
    /// links. Nothing at the name is not an error.
    pub(crate) fn remove(&self, name: impl AsRef<OsStr>) -> io::Result<()> {
        self.remove_at_depth(name.as_ref(), 0)
    }

    fn remove_at_depth(&self, name: &OsStr, depth: usize) -> io::Result<()> {
        let name = one_name(name)?;
        match rustix::fs::unlinkat(&self.fd, name, AtFlags::empty()) {
            Ok(()) | Err(Errno::NOENT) => return Ok(()),
            Err(Errno::ISDIR | Errno::PERM) => {}
            Err(e) => return Err(e.into()),
        }
        match self.open_dir(name) {
            // The store's own trees are two levels deep; a deeper one was planted, and is not
            // followed down far enough to exhaust the stack or the descriptors.
            Ok(_) if depth >= MAX_REMOVE_DEPTH => {
                return Err(io::Error::other(format!(
                    "{} is nested more than {MAX_REMOVE_DEPTH} directories deep; the store \
                     never makes that: remove it by hand",
                    self.join(name).display()
                )));
            }
            Ok(dir) => {
                for entry in dir.list()? {
                    dir.remove_at_depth(&entry, depth + 1)?;
                }
            }
            Err(Refused::Missing) => return Ok(()),
            Err(Refused::Io(e)) => return Err(e),
            // Replaced by a link or a file meanwhile: unlink that instead.
            Err(Refused::Planted(_)) => {
                return match rustix::fs::unlinkat(&self.fd, name, AtFlags::empty()) {
                    Ok(()) | Err(Errno::NOENT) => Ok(()),
                    Err(e) => Err(e.into()),
                };
            }
        }
        match rustix::fs::unlinkat(&self.fd, name, AtFlags::REMOVEDIR) {
            Ok(()) | Err(Errno::NOENT) => Ok(()),
            Err(e) => Err(e.into()),
        }
    }

    /// Renames `from` in this directory to `to` in `into` (which may be this directory).
    pub(crate) fn rename(
        &self,
        from: impl AsRef<OsStr>,
        into: &Dir,
        to: impl AsRef<OsStr>,
    ) -> io::Result<()> {
        let (from, to) = (one_name(from.as_ref())?, one_name(to.as_ref())?);
        rustix::fs::renameat(&self.fd, from, &into.fd, to)?;
        Ok(())
    }

    /// The names in this directory, sorted, without `.` and `..`.
    pub(crate) fn list(&self) -> io::Result<Vec<OsString>> {
        let mut names = Vec::new();
        for entry in rustix::fs::Dir::read_from(&self.fd)? {
            let entry = entry?;
            let name = entry.file_name().to_bytes();
            if name != b"." && name != b".." {
                names.push(OsString::from_vec(name.to_vec()));
            }
        }
        names.sort();
        Ok(names)
    }

    /// Flushes the directory's entries to disk (after creating, renaming or removing).
    pub(crate) fn sync(&self) -> io::Result<()> {
        rustix::fs::fsync(&self.fd)?;
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::{Read, Write};
    use std::os::unix::fs::symlink;

    fn temp() -> PathBuf {
        let dir = std::env::temp_dir().join(format!(
            "ampoule-dir-{}-{:?}",
            std::process::id(),
            std::thread::current().id()
        ));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(dir.join("store")).expect("test setup");
        std::fs::create_dir_all(dir.join("outside")).expect("test setup");
        dir
    }

    #[test]
    fn links_are_never_followed_and_removal_never_reaches_a_target() {
        let base = temp();
        let outside = base.join("outside");
        std::fs::write(outside.join("precious"), b"keep me").expect("test setup");
        let store = Dir::open_root(&base.join("store"), false).expect("test setup");
        symlink(outside.join("precious"), base.join("store/file")).expect("test setup");
        symlink(&outside, base.join("store/sub")).expect("test setup");
        symlink(outside.join("new"), base.join("store/dangling")).expect("test setup");

        assert!(
            matches!(store.open_file("file"), Err(Refused::Planted(m)) if m.contains("symbolic link"))
        );
        assert!(matches!(
            store.open_file_rw("file"),
            Err(Refused::Planted(_))
        ));
        assert!(
            matches!(store.open_dir("sub"), Err(Refused::Planted(m)) if m.contains("symbolic link"))
        );
        assert!(matches!(
            store.open_or_create("dangling"),
            Err(Refused::Planted(_))
        ));
        assert!(store.create_new("dangling").is_err());
        assert!(
            !outside.join("new").exists(),
            "a dangling link created a file outside"
        );
        assert!(matches!(store.create_dir("sub"), Err(Refused::Planted(_))));

        store.remove("file").expect("test setup");
        store.remove("sub").expect("test setup");
        let mut kept = String::new();
        File::open(outside.join("precious"))
            .expect("test setup")
            .read_to_string(&mut kept)
            .expect("test setup");
        assert_eq!(kept, "keep me");
        assert_eq!(
            store.list().expect("test setup"),
            vec![OsString::from("dangling")]
        );
        let _ = std::fs::remove_dir_all(&base);
    }

    #[test]
    fn hard_links_fifos_and_directories_are_refused_where_a_file_belongs() {
        let base = temp();
        std::fs::write(base.join("outside/victim"), b"x").expect("test setup");
        std::fs::hard_link(base.join("outside/victim"), base.join("store/hard"))
            .expect("test setup");
        std::fs::create_dir(base.join("store/adir")).expect("test setup");
        // mkfifo(1), from coreutils.
        let made = std::process::Command::new("mkfifo")
            .arg(base.join("store/fifo"))
            .status()
            .expect("test setup");
        assert!(made.success());
        let store = Dir::open_root(&base.join("store"), false).expect("test setup");
        assert!(
            matches!(store.open_file_rw("hard"), Err(Refused::Planted(m)) if m.contains("2 hard links"))
        );
        assert!(matches!(store.open_file("adir"), Err(Refused::Planted(_))));
        assert!(matches!(
            store.open_file_rw("fifo"),
            Err(Refused::Planted(_))
        ));
        assert!(matches!(store.open_file("missing"), Err(Refused::Missing)));
        // A file the store made itself passes.
        store
            .create_new("own")
            .expect("test setup")
            .write_all(b"ok")
            .expect("test setup");
        assert!(store.open_file("own").is_ok());
        let nested = store.create_dir("nested").expect("test setup");
        nested.create_new("f").expect("test setup");
        store.remove("nested").expect("test setup");
        // A planted tree deeper than the store ever makes is refused, not followed down.
        let mut deep = store.create_dir("deep").expect("test setup");
        for _ in 0..MAX_REMOVE_DEPTH + 2 {
            deep = deep.create_dir("d").expect("test setup");
        }
        let refused = store.remove("deep").expect_err("too deep");
        assert!(
            refused.to_string().contains("nested more than 16"),
            "{refused}"
        );
        assert_eq!(store.found("nested").expect("test setup"), None);
        assert!(one_name(OsStr::new("../x")).is_err());
        assert!(one_name(OsStr::new("..")).is_err());
        let _ = std::fs::remove_dir_all(&base);
    }
}
