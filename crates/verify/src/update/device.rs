//! A device: one store following one channel for one app, with the device id that places it
//! in rollouts and the lock that keeps two updates apart.
//!
//! ```text
//! STORE/
//!   device-id          the id made on first use (unless the app gives its own)
//!   downloads/
//!     lock             held for a whole update
//!     <sha256>.ampoule.partial   a bundle being downloaded, named by its feed's SHA-256
//!   ...                the store's own files (see crate::store)
//! ```

use std::fs::{self, File, TryLockError};
use std::io::{self, Read, Write};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use crate::check::bundle::Verifier;
use crate::error::{Error, ErrorKind, Result};
use crate::format::time::Timestamp;
use crate::store::{Release, Store, StoreState};

#[cfg(feature = "fetch")]
use super::Report;
use super::{App, Held, Session};

/// The file in the store directory that holds the device id made on first use.
const DEVICE_ID_FILE: &str = "device-id";
/// The directory in the store directory where bundles download (and resume) before install.
pub(crate) const DOWNLOADS_DIR: &str = "downloads";
/// The lock file in [`DOWNLOADS_DIR`], held for a whole update.
const DOWNLOAD_LOCK: &str = "lock";
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
    /// signed by its own threshold and not expired at `now`. A store follows one channel: the
    /// first feed it accepts sets it, and an update on another channel is refused until
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
        let held = Held::load(&app.trust, dir, now)?;
        let store = Store::open(dir, bundle_verifier(&app, &held)?)?.wait_for_lock(app.lock_wait);
        let device_id = match &app.device_id {
            Some(id) => id.clone(),
            None => stored_device_id(dir)?,
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
        let removed = self.store.gc()?;
        // Downloads only while no update holds them.
        if let Ok(_lock) = self.lock_downloads() {
            self.sweep_downloads(None);
        }
        Ok(removed)
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
                super::Next::Download(want) => {
                    match crate::net::download(
                        want.urls(),
                        want.path(),
                        want.size(),
                        want.sha256(),
                        transfer,
                    ) {
                        // The download checked size and SHA-256 as it streamed.
                        Ok(()) => session.downloaded_and_checked(),
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
        let held = self.held(Timestamp::now())?;
        let mut store = self.store.clone();
        if let Some(set) = held.set() {
            store = store.with_trust_set(set)?;
        }
        let verifier = store_verifier(&self.app, &held, &store.state()?)?;
        store.install_without_feed(verifier.verify_path(bundle)?)
    }

    /// Removes everything in the download directory but its lock and `keep` (the download in
    /// progress): partial downloads of releases no feed offers any more would otherwise stay
    /// for good. Links are removed, never followed. Best effort: a file that cannot be removed
    /// now is tried again at the next update.
    pub(crate) fn sweep_downloads(&self, keep: Option<&Path>) {
        let dir = self.store.dir().join(DOWNLOADS_DIR);
        // Someone with write access to the store could make `downloads` a link to a directory
        // elsewhere; listing through it would delete that directory's files. Only a real
        // directory is swept.
        if !fs::symlink_metadata(&dir).is_ok_and(|meta| meta.is_dir()) {
            return;
        }
        let Ok(entries) = fs::read_dir(&dir) else {
            return;
        };
        for entry in entries.flatten() {
            let path = entry.path();
            if entry.file_name() == DOWNLOAD_LOCK || Some(path.as_path()) == keep {
                continue;
            }
            match entry.file_type() {
                Ok(kind) if kind.is_dir() => {
                    let _ = fs::remove_dir_all(&path);
                }
                Ok(_) => {
                    let _ = fs::remove_file(&path);
                }
                Err(_) => {}
            }
        }
    }

    pub(crate) fn app(&self) -> &App {
        &self.app
    }

    /// The trust held now and the verifiers built on it.
    pub(crate) fn held(&self, now: Timestamp) -> Result<Held> {
        Held::load(&self.app.trust, self.store.dir(), now)
    }

    /// The downloads directory, created if missing.
    pub(crate) fn downloads(&self) -> Result<PathBuf> {
        let dir = self.store.dir().join(DOWNLOADS_DIR);
        fs::create_dir_all(&dir)
            .map_err(|e| Error::io(format!("cannot create {}", dir.display()), e))?;
        Ok(dir)
    }

    /// Holds `downloads/lock` for a whole update: a second updater on the same store fails
    /// at once instead of writing the same partial download.
    fn lock_downloads(&self) -> Result<File> {
        let path = self.downloads()?.join(DOWNLOAD_LOCK);
        let file = File::options()
            .create(true)
            .truncate(false)
            .write(true)
            .open(&path)
            .map_err(|e| Error::io(format!("cannot open {}", path.display()), e))?;
        let deadline = Instant::now() + self.app.lock_wait;
        loop {
            match file.try_lock() {
                Ok(()) => return Ok(file),
                Err(TryLockError::WouldBlock) if Instant::now() < deadline => {
                    std::thread::sleep(LOCK_POLL);
                }
                Err(TryLockError::WouldBlock) => {
                    return Err(Error::new(
                        ErrorKind::Locked,
                        format!(
                            "another update is running on store {}; try again when it has \
                             finished",
                            self.store.dir().display()
                        ),
                    ));
                }
                Err(TryLockError::Error(e)) => {
                    return Err(Error::io(format!("cannot lock {}", path.display()), e));
                }
            }
        }
    }
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
/// copied store copies the id too.
fn stored_device_id(store_dir: &Path) -> Result<String> {
    let path = store_dir.join(DEVICE_ID_FILE);
    let mut random = [0u8; 16];
    getrandom::fill(&mut random).map_err(|e| {
        Error::io(
            "cannot get random bytes for a device id",
            io::Error::other(e.to_string()),
        )
    })?;
    let fresh = hex::encode(random);
    match fs::OpenOptions::new()
        .write(true)
        .create_new(true)
        .open(&path)
    {
        Ok(mut file) => {
            file.write_all(format!("{fresh}\n").as_bytes())
                .and_then(|()| file.sync_all())
                .map_err(|e| Error::io(format!("cannot write {}", path.display()), e))?;
            return Ok(fresh);
        }
        Err(e) if e.kind() == io::ErrorKind::AlreadyExists => {}
        Err(e) => return Err(Error::io(format!("cannot create {}", path.display()), e)),
    }
    let mut text = String::new();
    File::open(&path)
        .and_then(|f| f.take(DEVICE_ID_BYTES as u64 + 2).read_to_string(&mut text))
        .map_err(|e| Error::io(format!("cannot read {}", path.display()), e))?;
    let id = text.trim_end_matches('\n');
    check_device_id(id).map_err(|e| {
        Error::new(
            ErrorKind::Store,
            format!(
                "{} is damaged ({e}); remove it to make a new id (the device then takes a new \
                 place in rollouts)",
                path.display()
            ),
        )
    })?;
    Ok(id.to_string())
}
