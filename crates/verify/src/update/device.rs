//! A device: one store following one channel for one app, with the device id that places it
//! in rollouts and the lock that keeps two updates apart.
//!
//! ```text
//! STORE/
//!   device-id          the id made on first use (unless the app gives its own)
//!   downloads/
//!     lock             held for a whole update; holds the name of the partial download
//!                      this store started, the only one it resumes
//!     <sha256>.ampoule.partial   a bundle being downloaded, or the delta the update chose
//!                      instead, named by the SHA-256 the feed lists for it
//!
//! Every file and directory here is opened without following links and checked as
//! `crate::dir` describes; anything planted at one of these names is removed (a link is
//! unlinked, never followed) and reported in the update's outcome.
//!   ...                the store's own files (see crate::store)
//! ```

use std::fs::{File, TryLockError};
use std::io::{self, Read, Seek, SeekFrom, Write};
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use crate::check::bundle::Verifier;
use crate::dir::{Dir, Found, Refused};
use crate::error::{Error, ErrorKind, Result};
use crate::format::time::Timestamp;
use crate::store::{
    DOWNLOAD_LOCK, DOWNLOADS_DIR, HeldLock, Release, Store, StoreState, open_own_file,
};

#[cfg(feature = "fetch")]
use super::Report;
use super::{App, Held, Session};

/// The file in the store directory that holds the device id made on first use.
const DEVICE_ID_FILE: &str = "device-id";
/// The longest device id accepted.
pub const DEVICE_ID_BYTES: usize = 128;
/// How often a waiting update tries the lock again.
const LOCK_POLL: Duration = Duration::from_millis(20);

/// One device following one channel into one store, for one app (see the module
/// documentation of [`crate::update`]).
#[derive(Debug)]
pub struct Device {
    app: App,
    store: Store,
    channel: String,
    device_id: String,
}

impl Device {
    /// Opens (or creates) the store in `dir` for `app`, following `channel`. The trust the
    /// device holds is checked now: the newer of the shipped and the stored trust set must be
    /// signed by its own threshold. A set that expired by `now` still opens the store and
    /// still checks the release the device verified and runs ([`Device::current`]): expiry
    /// stops new installs, not the running model, and the next update renews the set through
    /// the tree (or reports why it cannot). A store follows one channel: the first feed it
    /// accepts sets it, and an update on another channel is refused until
    /// [`Device::switch_channel`].
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Settings`] for a channel name no feed can carry; [`ErrorKind::TrustSet`] or
    /// [`ErrorKind::Signature`] for trust the device cannot use; [`ErrorKind::Store`] for a
    /// damaged store; I/O errors.
    pub fn open(dir: &Path, channel: &str, app: App, now: Timestamp) -> Result<Device> {
        crate::check::feed::check_channel(channel)
            .map_err(|e| Error::new(ErrorKind::Settings, e.to_string()))?;
        // Expiry is the update's to check (see above); `now` stays in the signature so that
        // an app's call reads the same whichever way expiry is handled.
        let _ = now;
        let held = Held::load(&app.trust, dir)?;
        let mut store =
            Store::open(dir, bundle_verifier(&app, &held)?)?.wait_for_lock(app.lock_wait);
        if let Some(initial) = app.shipped_trust_set() {
            store = store.with_trust_chain(initial);
        }
        // What the store remembers of feeds and tree heads is believed only as far as the
        // kept signed feeds prove it, under the signers the device holds.
        store = match &held {
            Held::Set(set) => store.with_documents(set.signers()?, set.signers()?),
            Held::Pinned(p) => store.with_documents(p.feed.clone(), p.tree_head.clone()),
        };
        let device_id = match &app.device_id {
            Some(id) => id.clone(),
            // A clean-up in another process (not under the lock the id is made without) may
            // remove the temporary file of a new id before it is renamed: one more try.
            None => stored_device_id(&store).or_else(|_| stored_device_id(&store))?,
        };
        Ok(Device {
            app,
            store,
            channel: channel.to_string(),
            device_id,
        })
    }

    /// The on-device store, for the release side's tools and tests; apps use the calls below.
    #[cfg(feature = "release")]
    pub fn store(&self) -> &Store {
        &self.store
    }

    #[cfg(not(feature = "release"))]
    pub(crate) fn store(&self) -> &Store {
        &self.store
    }

    /// Makes the previous release current again, when the app's own health check fails on a
    /// new model. The previous release is checked in full first. The release rolled back from
    /// stays refused: only a newer version installs next.
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Policy`] when there is no previous release; the check's refusal when the
    /// previous release fails it; [`ErrorKind::Locked`] while an update runs; I/O errors.
    pub fn rollback(&self) -> Result<Release> {
        self.store.rollback()
    }

    /// Removes releases other than the current and the previous one, what crashed updates
    /// left behind, and downloads no update is using; returns the releases and leftovers
    /// removed. Every update does this too.
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Locked`] while an update runs; I/O errors.
    pub fn gc(&self) -> Result<Vec<PathBuf>> {
        // The store's gc removes downloads too, while no update holds them.
        self.store.gc()
    }

    /// Makes the store follow this device's channel from now on (see [`Device::open`]); the
    /// highest version it accepted stays, so nothing older installs from the new channel.
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Locked`] while an update runs; I/O errors.
    pub fn switch_channel(&self) -> Result<()> {
        self.store.switch_channel(&self.channel)
    }

    /// The channel this device follows.
    pub fn channel(&self) -> &str {
        &self.channel
    }

    /// The id that places this device in rollouts.
    pub fn device_id(&self) -> &str {
        &self.device_id
    }

    /// The current release, checked in full before the app loads it: the manifest's digest
    /// against the store's state, its signatures under the trust held, the app's policy, and
    /// every file's size and SHA-256 (one read of the model); `None` before the first install.
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Store`], [`ErrorKind::Digest`] or a signature refusal when the store was
    /// changed outside ampoule-verify; I/O errors.
    pub fn current(&self) -> Result<Option<Release>> {
        self.store.open_current()
    }

    /// Starts an update on the feed bytes the app fetched from `feed_url` itself, at clock
    /// time `now`. The session asks for anything else it needs (see [`Session::advance`]).
    pub fn begin(&self, feed_url: &str, feed: Vec<u8>, now: Timestamp) -> Session<'_> {
        Session::new(self, self.lock_downloads(), feed_url, feed, now)
    }

    /// Runs a whole update over HTTP(S): fetches the feed at `feed_url`, anything the
    /// session asks for, and the bundle (resuming a partial download), within `transfer`'s
    /// limits. The same [`Session`] an app with its own HTTP drives.
    #[cfg(feature = "fetch")]
    pub fn update(
        &self,
        feed_url: &str,
        transfer: &crate::net::Transfer,
        now: Timestamp,
    ) -> Report {
        // Locked before the feed is fetched, so a second updater costs no transfer.
        let lock = match self.lock_downloads() {
            Ok(lock) => lock,
            Err(e) => return Report::ended_early(e),
        };
        let feed = match crate::net::fetch_feed(feed_url, transfer) {
            Ok(bytes) => bytes,
            Err(e) => return Report::ended_early(e),
        };
        let mut session = Session::new(self, Ok(lock), feed_url, feed, now);
        loop {
            match session.advance() {
                super::Next::Fetch(want) => {
                    match crate::net::fetch_capped(
                        want.url(),
                        transfer,
                        want.max_bytes(),
                        want.what(),
                    ) {
                        Ok(bytes) => session.provide(bytes),
                        Err(e) => return session.fail_with(e),
                    }
                }
                super::Next::Download(want) if want.head => {
                    let done = want.file().and_then(|mut file| {
                        crate::net::download_head(
                            want.urls(),
                            &mut file,
                            want.path(),
                            want.size(),
                            transfer,
                        )
                    });
                    match done {
                        Ok(()) => session.downloaded_and_checked(None),
                        Err(e) => return session.fail_with(e),
                    }
                }
                super::Next::Download(want) => {
                    let mut file = match want.file() {
                        Ok(file) => file,
                        Err(e) => return session.fail_with(e),
                    };
                    let partial = crate::net::Partial {
                        file: &mut file,
                        path: want.path(),
                        size: want.size(),
                        sha256: want.sha256(),
                        earlier: want.earlier,
                        watch: want.watch.as_deref(),
                    };
                    match crate::net::download_into(want.urls(), partial, transfer) {
                        // The download checked size and SHA-256 as it streamed.
                        Ok(received) => session.downloaded_and_checked(Some(received)),
                        // A delta that cannot be had: the bundle next, in this update.
                        Err(e) if want.delta.is_some() => {
                            if let Err(e) = session.delta_failed(e) {
                                return session.fail_with(e);
                            }
                        }
                        Err(e) => return session.fail_with(e),
                    }
                }
                super::Next::Done(report) => return report,
            }
        }
    }

    /// Verifies the bundle file under the trust held now and installs it with no feed; only
    /// through [`crate::dangerous::install_bundle_without_feed`].
    pub(crate) fn install_without_feed(&self, bundle: &Path) -> Result<crate::store::Installed> {
        let held = self.held()?;
        // Expiry stops new installs, this one included.
        held.check_unexpired(Timestamp::now())?;
        let mut store = self.store.clone();
        if let Some(set) = held.set() {
            store = store.with_trust_set(set)?;
        }
        let verifier = store_verifier(&self.app, &held, &store.state()?)?;
        store.install_without_feed(verifier.verify_path(bundle)?)
    }

    /// Removes everything in the download directory but its lock, the remembered refusal and
    /// `keep` (the download in progress); see `Store::sweep_downloads`. The caller holds the
    /// download lock.
    pub(crate) fn sweep_downloads(&self, keep: Option<&str>) {
        if let Ok(dir) = self.downloads() {
            self.store.sweep_downloads(&dir, keep, true);
        }
    }

    /// Opens the partial download `name` in the download directory to write the bundle of
    /// `size` bytes into, at its end. A file is resumed only when this store started it (its
    /// name is the one recorded in the download lock `lock`) and it passes the store's checks
    /// (a regular file with one link, on the store's file system, not longer than `size`).
    /// Anything else at the name is removed, never followed, and a new file made and recorded.
    pub(crate) fn partial_download(&self, lock: &File, name: &str, size: u64) -> Result<File> {
        let dir = self.downloads()?;
        let path = dir.join(name);
        let recorded = recorded_partial(lock);
        if recorded.as_deref() == Some(name) {
            match dir.open_file_rw(name) {
                Ok(file) if file.metadata().is_ok_and(|m| m.len() <= size) => return Ok(file),
                Ok(_) | Err(Refused::Missing) => {}
                Err(Refused::Planted(why)) => {
                    self.store
                        .note_removed(format!("{} ({why})", path.display()));
                }
                Err(Refused::Io(e)) => {
                    return Err(Error::io(format!("cannot open {}", path.display()), e));
                }
            }
        }
        // Whatever is at the name was not started by this store, or cannot be resumed. A
        // link or special file there was planted: say so.
        if let Ok(Some(found @ (Found::Link | Found::Other))) = dir.found(name) {
            self.store
                .note_removed(format!("{} ({})", path.display(), found.describe()));
        }
        dir.remove(name)
            .map_err(|e| Error::io(format!("cannot remove {}", path.display()), e))?;
        let file = dir
            .create_new(name)
            .map_err(|e| Error::io(format!("cannot create {}", path.display()), e))?;
        record_partial(lock, name).map_err(|e| {
            Error::io(
                format!("cannot record the download in {}", path.display()),
                e,
            )
        })?;
        Ok(file)
    }

    /// The partial download `name`, opened again with the store's checks, for the download
    /// itself or the install after it.
    pub(crate) fn open_partial(&self, name: &str) -> Result<File> {
        let dir = self.downloads()?;
        dir.open_file_rw(name).map_err(|e| {
            let path = dir.join(name);
            match e {
                Refused::Planted(why) => Error::new(
                    ErrorKind::Store,
                    format!(
                        "{} was replaced during the update ({why}); the next update removes it \
                         and downloads again",
                        path.display()
                    ),
                ),
                other => Error::io(format!("cannot open {}", path.display()), other.into_io()),
            }
        })
    }

    /// Removes the partial download `name` (a link there is unlinked, never followed).
    pub(crate) fn remove_partial(&self, name: &str) {
        if let Ok(dir) = self.downloads() {
            let _ = dir.remove(name);
        }
    }

    pub(crate) fn app(&self) -> &App {
        &self.app
    }

    /// The trust held now (possibly expired: see [`Held::load`]).
    pub(crate) fn held(&self) -> Result<Held> {
        Held::load(&self.app.trust, self.store.dir())
    }

    /// The downloads directory, created if missing, opened without following a link
    /// (something else at its name is removed and reported).
    pub(crate) fn downloads(&self) -> Result<Dir> {
        let root = Dir::open_root(self.store.dir(), false).map_err(|e| {
            Error::io(
                format!("cannot open store {}", self.store.dir().display()),
                e,
            )
        })?;
        self.store.downloads(&root)
    }

    /// The downloads directory's path, for the names a session gives the app.
    pub(crate) fn downloads_path(&self) -> PathBuf {
        self.store.dir().join(DOWNLOADS_DIR)
    }

    /// Holds `downloads/lock` for a whole update: a second updater on the same store fails
    /// at once instead of writing the same partial download.
    fn lock_downloads(&self) -> Result<HeldLock> {
        let dir = self.downloads()?;
        let path = dir.join(DOWNLOAD_LOCK);
        let mut file = open_own_file(&dir, DOWNLOAD_LOCK, &mut |what| {
            self.store.note_removed(what)
        })?;
        let deadline = Instant::now() + self.app.lock_wait;
        loop {
            file = match HeldLock::try_take(file) {
                Ok(held) => return Ok(held),
                Err((file, TryLockError::WouldBlock)) if Instant::now() < deadline => {
                    std::thread::sleep(LOCK_POLL);
                    file
                }
                Err((_, TryLockError::WouldBlock)) => {
                    return Err(Error::new(
                        ErrorKind::Locked,
                        format!(
                            "another update is running on store {}; try again when it has \
                             finished",
                            self.store.dir().display()
                        ),
                    ));
                }
                Err((_, TryLockError::Error(e))) => {
                    return Err(Error::io(format!("cannot lock {}", path.display()), e));
                }
            };
        }
    }
}

/// The longest partial-download name the download lock records.
const PARTIAL_NAME_BYTES: u64 = 128;

/// The partial download the store started, as the download lock records it.
fn recorded_partial(lock: &File) -> Option<String> {
    let mut bytes = vec![0u8; PARTIAL_NAME_BYTES as usize + 1];
    let n = lock.read_at(&mut bytes, 0).ok()?;
    bytes.truncate(n);
    String::from_utf8(bytes).ok().filter(|s| !s.is_empty())
}

/// Records `name` in the download lock as the partial download this store started.
fn record_partial(mut lock: &File, name: &str) -> io::Result<()> {
    lock.set_len(0)?;
    lock.seek(SeekFrom::Start(0))?;
    lock.write_all(name.as_bytes())?;
    lock.sync_data()
}

/// The bundle verifier of `app` under the trust held.
pub(crate) fn bundle_verifier(app: &App, held: &Held) -> Result<Verifier> {
    let mut verifier = match held {
        Held::Set(set) => Verifier::from_trust_set(set, app.version.clone())?,
        Held::Pinned(p) => Verifier::new(p.bundle.keys().clone(), app.version.clone())?
            .with_threshold(p.bundle.threshold())?,
    };
    if let Some(name) = &app.bundle_name {
        verifier = verifier.require_name(name.clone());
    }
    if let Some(policy) = &app.policy {
        verifier = verifier.compatibility(policy.clone());
    }
    if let Some(progress) = &app.progress {
        verifier = verifier.on_progress(progress.clone());
    }
    Ok(verifier
        .max_bundle_bytes(app.max_bundle_bytes)
        .max_unpacked_bytes(app.max_unpacked_bytes))
}

/// The app's bundle verifier under the trust held, with the store's model line and the
/// highest version it ever accepted (not the current one: after a rollback the store refuses
/// everything up to it, so downloading it would be wasted).
pub(crate) fn store_verifier(app: &App, held: &Held, state: &StoreState) -> Result<Verifier> {
    let mut bundles = bundle_verifier(app, held)?;
    if let Some(name) = &state.name
        && bundles.required_name().is_none()
    {
        bundles = bundles.require_name(name.clone());
    }
    if let Some(highest) = &state.highest_version {
        bundles = bundles.installed(highest.clone());
    }
    Ok(bundles)
}

/// Checks a device id: 1 to [`DEVICE_ID_BYTES`] printable ASCII characters, no spaces.
pub(crate) fn check_device_id(id: &str) -> Result<()> {
    if id.is_empty() || id.len() > DEVICE_ID_BYTES || !id.bytes().all(|b| b.is_ascii_graphic()) {
        return Err(Error::new(
            ErrorKind::Settings,
            format!(
                "device id '{}' is not usable: use 1 to {DEVICE_ID_BYTES} printable ASCII \
                 characters without spaces",
                id.chars().take(140).collect::<String>().escape_debug()
            ),
        ));
    }
    Ok(())
}

/// The device id kept in the store directory, made from 128 random bits on the first call.
/// It lives beside the store so that one device keeps its rollout place across runs; a
/// copied store copies the id too. Something other than an id the store wrote at the name (a
/// link, dangling or not, a FIFO, a hard link, a file that holds no usable id) is removed,
/// reported, and a new id made: the device then takes a new place in rollouts, as it would had
/// the file been deleted. A trail camera has nobody to delete it, so a damaged id must not stop
/// its updates. The id is written whole or not at all (a temporary file renamed into place), so
/// a reader never sees half of one; two processes making one at once each use their own for
/// that run, and the one renamed last is kept.
fn stored_device_id(store: &Store) -> Result<String> {
    let root = Dir::open_root(store.dir(), false)
        .map_err(|e| Error::io(format!("cannot open store {}", store.dir().display()), e))?;
    let path = root.join(DEVICE_ID_FILE);
    match root.open_file(DEVICE_ID_FILE) {
        Ok(file) => {
            let mut bytes = Vec::new();
            file.take(DEVICE_ID_BYTES as u64 + 2)
                .read_to_end(&mut bytes)
                .map_err(|e| Error::io(format!("cannot read {}", path.display()), e))?;
            let text = String::from_utf8_lossy(&bytes);
            let id = text.trim_end_matches('\n');
            match check_device_id(id) {
                Ok(()) => return Ok(id.to_string()),
                Err(e) => store.note_removed(format!("{} ({e})", path.display())),
            }
        }
        Err(Refused::Missing) => {}
        Err(Refused::Planted(why)) => {
            root.remove(DEVICE_ID_FILE)
                .map_err(|e| Error::io(format!("cannot remove {}", path.display()), e))?;
            store.note_removed(format!("{} ({why})", path.display()));
        }
        Err(Refused::Io(e)) => return Err(Error::io(format!("cannot read {}", path.display()), e)),
    }
    let mut random = [0u8; 16];
    getrandom::fill(&mut random).map_err(|e| {
        Error::io(
            "cannot get random bytes for a device id",
            io::Error::other(e.to_string()),
        )
    })?;
    let fresh = hex::encode(random);
    crate::store::replace_own_file(&root, DEVICE_ID_FILE, format!("{fresh}\n").as_bytes())?;
    Ok(fresh)
}
