//! One update as a sequence of steps the app drives: [`Session::advance`] says what it needs
//! (a small document, the bundle) or how the update ended. An app with its own HTTP stack, a
//! platform transfer service or no network at all answers each request in its own way; the
//! checks and their order are the same for all of them.

use std::fs::File;
use std::path::{Path, PathBuf};

use serde::Deserialize;

use crate::check::bundle::Verifier;
use crate::check::feed::{
    Decision, Expiry, FeedVerifier, Release, SignedFeed, TrustSetRef, VerifiedFeed,
};
use crate::check::ledger_proof::{LedgerVerifier, Walk};
use crate::check::trust::TrustSet;
use crate::error::{Error, ErrorKind, Result};
use crate::format::chunks::Watch;
use crate::format::delta_file::base_id;
use crate::format::digest::{Digest, Hasher};
use crate::format::ledger_entry::{self as ledger, DeltaRef};
use crate::format::signed::{Signers, kind};
use crate::format::time::Timestamp;
use crate::format::trust_proofs::{self, TrustSetProofs};
use crate::format::{FEED_FORMAT_VERSION, limit, trust_set};
use crate::payload::delta::VerifiedDelta;
use crate::store::{HeldLock, Store, StoreState};

use super::device::store_verifier;
use super::refusals;
use super::{Device, Held, Ledger, Outcome, Report};

/// What an update needs next, or how it ended.
#[derive(Debug)]
#[non_exhaustive]
// Returned once per step and matched at once, never stored: boxing the report would only
// make every caller write `*report`.
#[allow(clippy::large_enum_variant)]
pub enum Next {
    /// Fetch this small document and hand its bytes to [`Session::provide`].
    Fetch(Fetch),
    /// Download the bundle and tell the session with [`Session::downloaded`].
    Download(Download),
    /// The update ended.
    Done(Report),
}

/// A small document the update needs: a trust set on the way to the one the feed names, the
/// ledger's proofs that those trust sets were logged, or a consistency step of the ledger.
/// Its bytes are checked when handed in; stop reading at [`Fetch::max_bytes`].
#[derive(Debug, Clone)]
pub struct Fetch {
    url: String,
    what: &'static str,
    max_bytes: u64,
}

impl Fetch {
    /// The document's URL, resolved against the feed's.
    pub fn url(&self) -> &str {
        &self.url
    }

    pub_for_release! {
        /// What it is, for messages: `trust set`, `trust-set proofs` or `consistency step`.
        fn what(&self) -> &'static str {
            self.what
        }
    }

    /// The most bytes the document may have.
    pub fn max_bytes(&self) -> u64 {
        self.max_bytes
    }
}

/// The bundle to download, from the first of [`Download::urls`] that works, into
/// [`Download::file`] until it holds [`Download::size`] bytes.
///
/// When the feed offers a delta for the release the device runs, the session asks for that
/// delta instead (a smaller file, in one part, which rebuilds the same release from the
/// installed files); if it cannot be had or fails any check, the session asks for the bundle
/// next, in the same update. An app downloads either the same way.
///
/// A bundle larger than its head (at most 274 KiB) is asked for in two parts, both into the
/// same file: first its head, whose signed manifest the session checks (signatures, the app's
/// policy, and the bundle's exact size, which must be the size the feed states), then the
/// whole bundle. Resume from the file's length with an HTTP Range request each time; never
/// write more than `size` bytes.
#[derive(Debug, Clone)]
pub struct Download {
    urls: Vec<String>,
    size: u64,
    sha256: Digest,
    path: PathBuf,
    /// The store's directory and the file's name in its download directory, to open it again
    /// without following links.
    store: PathBuf,
    name: String,
    /// Whether this asks for the head only; the whole bundle's size is then `whole`.
    pub(crate) head: bool,
    pub(crate) whole: u64,
    /// How many bytes the file held from an earlier update when this one began (for the
    /// `fetch` driver's messages).
    #[cfg_attr(not(feature = "fetch"), allow(dead_code))]
    pub(crate) earlier: u64,
    /// The delta asked for instead of the bundle, when it is one.
    pub(crate) delta: Option<DeltaRef>,
    /// The file's length when this request was made, to count the bytes it downloaded.
    from: u64,
    /// Format 2, once the head checked: the chunks where they lie in the file, so that the
    /// download keeps every chunk that checked when the whole file's digest is wrong.
    pub(crate) watch: Option<Box<Watch>>,
}

impl Download {
    /// Where the bundle is, in the order to try.
    pub fn urls(&self) -> &[String] {
        &self.urls
    }

    /// How many bytes the file must hold when [`Session::downloaded`] is called: the head's
    /// length first, then the whole bundle's (or the delta's). Never write more.
    pub fn size(&self) -> u64 {
        self.size
    }

    /// The whole file's SHA-256 (the bundle's or the delta's), as the feed declares it; the
    /// session checks it once the whole file is there.
    pub fn sha256(&self) -> &Digest {
        &self.sha256
    }

    /// The file in the store's download directory where the bundle belongs, for messages.
    /// Write through [`Download::file`], not through this path: the store's directory may be
    /// writable by others, and only `file` refuses a link planted at the name.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The file to download into, opened without following links and checked (a regular
    /// file with one link, on the store's file system). Its length is how many bytes of this
    /// very bundle a previous try already wrote (the session resumes only a file the store
    /// started); ask for the rest (an HTTP Range request) and append it at the end.
    ///
    /// # Errors
    ///
    /// [`ErrorKind::Store`] when the file was replaced since the session prepared it; I/O
    /// errors.
    pub fn file(&self) -> Result<File> {
        self.downloads()?.open_file_rw(&self.name).map_err(|e| {
            Error::new(
                ErrorKind::Store,
                format!(
                    "{} was replaced during the update ({}); the next update removes it and \
                     downloads again",
                    self.path.display(),
                    e.into_io()
                ),
            )
        })
    }

    /// Removes the file (a link at its name is unlinked, never followed): its bytes were
    /// proven wrong.
    pub(crate) fn discard(&self) {
        if let Ok(dir) = self.downloads() {
            let _ = dir.remove(&self.name);
        }
    }

    /// The store's download directory, opened without following links.
    fn downloads(&self) -> Result<crate::dir::Dir> {
        let root = crate::dir::Dir::open_root(&self.store, false)
            .map_err(|e| Error::io(format!("cannot open store {}", self.store.display()), e))?;
        let dir = root.open_dir(crate::store::DOWNLOADS_DIR).map_err(|e| {
            Error::new(
                ErrorKind::Store,
                format!(
                    "{} was replaced during the update ({}); the next update makes it again",
                    root.join(crate::store::DOWNLOADS_DIR).display(),
                    e.into_io()
                ),
            )
        })?;
        Ok(dir)
    }
}

/// One update in progress (see [`Device::begin`]). It holds the store's download lock until
/// it is dropped.
pub struct Session<'d> {
    device: &'d Device,
    lock: Option<HeldLock>,
    feed_url: String,
    feed_bytes: Vec<u8>,
    now: Timestamp,
    held: Option<Held>,
    store: Option<Store>,
    feed: Option<VerifiedFeed>,
    rotated_to: Option<u64>,
    /// Trust sets accepted in memory on the way to the one the feed names, stored only once
    /// the feed verified under it and the ledger proved every one of them.
    pending: Option<Pending>,
    answer: Option<Vec<u8>>,
    state: State,
    expiry: Expiry,
    /// Whether this update asked for a delta already: never two in one update.
    delta_tried: bool,
    /// The delta the release was installed from, for the report.
    delta_used: Option<Digest>,
    /// Why an offered delta was not used, for the report.
    delta_refused: Option<Error>,
    /// The bytes the update's completed downloads added to the store.
    downloaded: u64,
}

/// A walk through the tree's trust sets, from the device's own version up to the one the
/// feed names: each `trust/<n>.json` accepted as the successor of the one before.
struct TrustWalk {
    /// What the (not yet verified) feed names; the feed is verified under the set the walk
    /// ends on, and must then name exactly that set.
    named: TrustSetRef,
    /// The set accepted last (the device's own at the start).
    last: TrustSet,
    /// Every set accepted on the way (see [`Accepted`]).
    accepted: Vec<Accepted>,
}

/// One set a walk accepted: its version, the SHA-256 of the file fetched, and the tree-head
/// keys of the set it succeeded, which must have signed the head that logs it.
struct Accepted {
    version: u64,
    sha256: Digest,
    /// The set itself, stored in the device's trust chain once the walk is proven.
    set: TrustSet,
    before: Signers<kind::TreeHead>,
}

/// The outcome of a finished walk, not stored yet.
struct Pending {
    /// The device's version before the walk, reported until the new set is stored.
    before: u64,
    /// The set the walk ended on, which the session now verifies with.
    set: TrustSet,
    /// Every set accepted on the way, for the ledger's proofs.
    accepted: Vec<Accepted>,
}

enum State {
    Start,
    TrustSet(Fetch, Box<TrustWalk>),
    Proofs(Fetch, Box<VerifiedFeed>, Option<Walk>),
    Steps(Fetch, Walk, Box<VerifiedFeed>),
    Decide,
    Download(Download, Release),
    Downloaded {
        path: PathBuf,
        release: Release,
        checked: bool,
        head: Option<Download>,
        /// The bytes the store's file held from an earlier update when this one began.
        earlier: u64,
        /// The delta downloaded instead of the bundle, when it is one.
        delta: Option<DeltaRef>,
        /// The chunks of the bundle downloaded, once its head checked.
        watch: Option<Box<Watch>>,
    },
    /// The delta asked for could not be downloaded: the bundle comes next.
    #[cfg_attr(not(feature = "fetch"), allow(dead_code))]
    DeltaFailed(Release, DeltaRef, Error),
    Failed(Error),
    Ended,
}

/// How one step of the machine ended.
#[allow(clippy::large_enum_variant)] // one at a time, moved straight into the next state
enum Step {
    Go(State),
    Ask(State, Next),
    End(Outcome),
}

impl std::fmt::Debug for Session<'_> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Session")
            .field("feed_url", &self.feed_url)
            .field("now", &self.now)
            .field("rotated_to", &self.rotated_to)
            .finish_non_exhaustive()
    }
}

impl<'d> Session<'d> {
    pub(crate) fn new(
        device: &'d Device,
        lock: Result<HeldLock>,
        feed_url: &str,
        feed_bytes: Vec<u8>,
        now: Timestamp,
    ) -> Session<'d> {
        let (lock, state) = match lock {
            Ok(file) => (Some(file), State::Start),
            Err(e) => (None, State::Failed(e)),
        };
        Session {
            device,
            lock,
            feed_url: feed_url.to_string(),
            feed_bytes,
            now,
            held: None,
            store: None,
            feed: None,
            rotated_to: None,
            pending: None,
            answer: None,
            state,
            expiry: Expiry::Checked,
            delta_tried: false,
            delta_used: None,
            delta_refused: None,
            downloaded: 0,
        }
    }

    /// This session for an offline install: the feed's expiry is not checked (see
    /// [`Expiry`]), and nothing else changes.
    pub(crate) fn offline(mut self) -> Session<'d> {
        self.expiry = Expiry::NotCheckedOffline;
        self
    }

    /// Runs the update as far as it can go without the app, and says what it needs or how
    /// it ended. Call it again after answering a [`Next::Fetch`] or [`Next::Download`];
    /// unanswered, it asks again. After [`Next::Done`] it keeps returning a failure.
    pub fn advance(&mut self) -> Next {
        loop {
            let state = std::mem::replace(&mut self.state, State::Ended);
            let result = match state {
                State::Failed(e) => Ok(Step::End(Outcome::from_error(e))),
                state => self.step(state),
            };
            match result {
                Ok(Step::Go(state)) => self.state = state,
                Ok(Step::Ask(state, next)) => {
                    self.state = state;
                    return next;
                }
                Ok(Step::End(outcome)) => return Next::Done(self.report(outcome)),
                Err(e) => return Next::Done(self.report(Outcome::from_error(e))),
            }
        }
    }

    /// Hands in the bytes of the document the last [`Next::Fetch`] asked for.
    pub fn provide(&mut self, bytes: Vec<u8>) {
        self.answer = Some(bytes);
    }

    /// Says the bundle of the last [`Next::Download`] is complete at `path` (normally
    /// [`Download::path`]). Its size and SHA-256 are checked before anything else reads it,
    /// and a bundle in the download directory is removed once installed or refused. A file in
    /// the download directory whose size or SHA-256 is wrong keeps the chunks before the
    /// first one that does not check against the bundle's signed chunk list (format 2), and
    /// the next update asks only for the rest.
    ///
    /// Called when nothing was asked for (twice for one download, say), it changes nothing.
    pub fn downloaded(&mut self, path: &Path) {
        if let State::Download(want, release) = &self.state {
            // Only counted: the size and digest checks open the file again.
            let len = std::fs::symlink_metadata(path).map_or(0, |m| m.len());
            self.downloaded += len.min(want.size).saturating_sub(want.from);
            self.state = State::Downloaded {
                path: path.to_path_buf(),
                release: release.clone(),
                checked: false,
                head: want.head.then(|| want.clone()),
                earlier: want.earlier,
                delta: want.delta.clone(),
                watch: want.watch.clone(),
            };
        }
    }

    /// The download of the last [`Next::Download`] is at its path, and its size and digest
    /// were checked while it streamed (or was copied). `received` counts the bytes it took,
    /// when some came twice (a chunk that did not check is fetched again); otherwise they
    /// are the ones the file lacked.
    pub(crate) fn downloaded_and_checked(&mut self, received: Option<u64>) {
        if let State::Download(want, release) = &self.state {
            self.downloaded += received.unwrap_or(want.size.saturating_sub(want.from));
            self.state = State::Downloaded {
                path: want.path.clone(),
                release: release.clone(),
                checked: !want.head,
                head: want.head.then(|| want.clone()),
                earlier: want.earlier,
                delta: want.delta.clone(),
                watch: want.watch.clone(),
            };
        }
    }

    /// The delta of the last [`Next::Download`] could not be downloaded (`fetch` driver):
    /// the session asks for the bundle next, in the same update. For a bundle, or when the
    /// app cancelled, `error` comes back for [`Session::fail_with`].
    #[cfg(feature = "fetch")]
    pub(crate) fn delta_failed(&mut self, error: Error) -> Result<()> {
        match &self.state {
            State::Download(want, release) if error.kind() != ErrorKind::Cancelled => {
                let Some(delta) = want.delta.clone() else {
                    return Err(error);
                };
                self.state = State::DeltaFailed(release.clone(), delta, error);
                Ok(())
            }
            _ => Err(error),
        }
    }

    /// Ends the update because the app could not fetch what was asked; `why` says what
    /// went wrong (a status, a timeout). The outcome is [`Outcome::Failed`] with
    /// [`ErrorKind::Network`]: the store keeps its model, and a partial download stays for
    /// the next try. When the download asked for was a delta, it is remembered instead, and
    /// the next update asks for the full bundle.
    pub fn fail(self, why: impl std::fmt::Display) -> Report {
        self.fail_with(Error::new(ErrorKind::Network, why.to_string()))
    }

    pub(crate) fn fail_with(mut self, error: Error) -> Report {
        if let State::Download(want, _) = &self.state
            && let Some(delta) = &want.delta
            && error.kind() == ErrorKind::Network
        {
            self.remember_delta(delta, &error);
        }
        self.report(Outcome::from_error(error))
    }

    fn report(&mut self, outcome: Outcome) -> Report {
        // Driving a finished session again is the app's mistake, not a refusal of anything.
        self.state = State::Failed(Error::new(
            ErrorKind::Settings,
            "this update already ended; start another",
        ));
        Report {
            outcome,
            feed: self.feed.take(),
            rotated_to: self.rotated_to,
            // A walk not stored is not what the device holds.
            trust_set_version: match &self.pending {
                Some(p) => Some(p.before),
                None => self.held.as_ref().and_then(Held::set).map(|s| s.version()),
            },
            removed: self.device.store().take_removed(),
            delta: self.delta_used,
            delta_refused: self.delta_refused.take(),
            downloaded: self.downloaded,
        }
    }

    fn store(&self) -> Result<&Store> {
        self.store
            .as_ref()
            .ok_or_else(|| Error::new(ErrorKind::Store, "the update has no store yet"))
    }

    fn held(&self) -> Result<&Held> {
        self.held
            .as_ref()
            .ok_or_else(|| Error::new(ErrorKind::Store, "the update holds no trust yet"))
    }

    fn step(&mut self, state: State) -> Result<Step> {
        match state {
            State::Start => self.start(),
            State::TrustSet(want, walk) => match self.answer.take() {
                None => Ok(Step::Ask(
                    State::TrustSet(want.clone(), walk),
                    Next::Fetch(want),
                )),
                Some(bytes) => self.trust_step(&want, *walk, &bytes),
            },
            State::Proofs(want, feed, walk) => match self.answer.take() {
                None => Ok(Step::Ask(
                    State::Proofs(want.clone(), feed, walk),
                    Next::Fetch(want),
                )),
                Some(bytes) => {
                    self.prove_trust_sets(&bytes, &feed)?;
                    self.after_feed(*feed, walk)
                }
            },
            State::Steps(want, mut walk, feed) => match self.answer.take() {
                None => Ok(Step::Ask(
                    State::Steps(want.clone(), walk, feed),
                    Next::Fetch(want),
                )),
                Some(bytes) => {
                    walk.advance(&bytes)?;
                    self.walk_or_decide(walk, *feed)
                }
            },
            State::Decide => self.decide(),
            State::Download(want, release) => Ok(Step::Ask(
                State::Download(want.clone(), release),
                Next::Download(want),
            )),
            State::Downloaded {
                path,
                release,
                head: Some(want),
                ..
            } => self.check_head(&path, want, release),
            State::Downloaded {
                path,
                release,
                checked,
                head: None,
                earlier,
                delta: None,
                watch,
            } => self.install(&path, &release, checked, earlier, watch),
            State::Downloaded {
                path,
                release,
                checked,
                head: None,
                earlier,
                delta: Some(delta),
                ..
            } => match self.install_delta(&path, &release, &delta, checked, earlier) {
                // Another update holding the store, or the app stopping this one: the bundle
                // would meet the same.
                Err(e) if !matches!(e.kind(), ErrorKind::Cancelled | ErrorKind::Locked) => {
                    self.fall_back(release, &delta, e)
                }
                done => done,
            },
            State::DeltaFailed(release, delta, error) => self.fall_back(release, &delta, error),
            State::Failed(e) => Ok(Step::End(Outcome::from_error(e))),
            State::Ended => Err(Error::new(
                ErrorKind::Settings,
                "this update already ended; start another",
            )),
        }
    }

    /// Loads the trust held now and checks the feed under it.
    fn start(&mut self) -> Result<Step> {
        let device = self.device;
        let held = device.held()?;
        let mut store = device.store().clone();
        if let Some(set) = held.set() {
            store = store.with_trust_set(set)?;
        }
        let state = store.state()?;
        if let Some(followed) = &state.channel
            && followed != device.channel()
        {
            return Err(Error::new(
                ErrorKind::Policy,
                format!(
                    "store {} follows channel '{followed}', not '{}'; switching channels is an \
                     explicit step (Device::switch_channel, or `ampoule update --switch-channel`)",
                    store.dir().display(),
                    device.channel()
                ),
            ));
        }
        self.held = Some(held);
        self.store = Some(store);
        self.check_feed()
    }

    /// Verifies the feed under the trust held now. When the feed names a newer trust set than
    /// the device's, walks to it first (see [`Session::walk_trust`]), and verifies the feed
    /// under the set the walk ends on.
    fn check_feed(&mut self) -> Result<Step> {
        if self.pending.is_none()
            && let Some(set) = self.held()?.set()
        {
            if let Some(named) = named_trust_set(&self.feed_bytes)
                && named.version > set.version()
            {
                return self.walk_trust(set.clone(), named);
            }
            if let Err(e) = set.file().check_expiry(self.now) {
                return Err(Error::new(
                    ErrorKind::TrustSet,
                    format!(
                        "{e}; the feed names no newer trust set. The model in use stays and still \
                         opens, but nothing new installs until the release tree publishes a \
                         successor signed by the keys of version {} (ampoule publish \
                         --trust-set) or the app ships a newer trust set; if the device clock \
                         is wrong, set it",
                        set.version()
                    ),
                ));
            }
        }
        let state = self.store()?.state()?;
        let feeds = self.feed_verifier(&state)?;
        let (feed, walk) = match feeds.verify_before_steps(&self.feed_bytes, self.now) {
            Ok(checked) => checked,
            Err(e) => {
                if let Some(format) = newer_feed_format(&feeds, &self.feed_bytes, self.now) {
                    return Ok(Step::End(Outcome::NeedsOtherApp {
                        reason: format!(
                            "the feed is in format {format}, and this app's ampoule-verify reads \
                             format {FEED_FORMAT_VERSION}; update the app"
                        ),
                    }));
                }
                return Err(e);
            }
        };
        let Some(pending) = &self.pending else {
            return self.after_feed(feed, walk);
        };
        // The feed verified under the set the walk ended on; it must name exactly that set
        // (the walk read the name before the feed's signatures could be checked).
        let (version, sha256) = pending
            .accepted
            .last()
            .map(|a| (a.version, a.sha256))
            .ok_or_else(|| Error::new(ErrorKind::TrustSet, "the trust-set walk accepted no set"))?;
        match feed.trust_set() {
            Some(named) if named.version == version && named.sha256 == sha256 => {}
            named => {
                return Err(Error::new(
                    ErrorKind::Feed,
                    format!(
                        "the verified feed names {}, not trust set version {version} (sha256 \
                         {sha256}) that the update walked to",
                        named.map_or_else(
                            || "no trust set".to_string(),
                            |n| format!("trust set version {} (sha256 {})", n.version, n.sha256)
                        )
                    ),
                ));
            }
        }
        // Every set the walk accepted must be in the ledger the feed proves.
        match feed.ledger() {
            Some(check) => {
                let want = Fetch {
                    url: crate::check::feed::resolve(
                        &self.feed_url,
                        &trust_proofs::reference(check.tree_head.tree_size),
                    )?,
                    what: "trust-set proofs",
                    max_bytes: trust_proofs::MAX_BYTES,
                };
                Ok(Step::Go(State::Proofs(want, Box::new(feed), walk)))
            }
            // Only through dangerous::skip_ledger, whose documentation says what is lost.
            None => self.after_feed(feed, walk),
        }
    }

    /// Starts the walk from the device's trust set `own` to the one the feed names: for each
    /// version after its own, `trust/<n>.json` (relative to the feed), each accepted only as
    /// the successor of the one before, at most [`trust_set::MAX_WALK`] of them. The feed is
    /// not verified yet (its keys may be among those the walk leads to), so nothing it says
    /// is trusted: each set is checked by the signatures of the one before, the last must be
    /// the file the feed names, and the feed must then verify under it and name it.
    fn walk_trust(&mut self, own: TrustSet, named: TrustSetRef) -> Result<Step> {
        let gap = named.version - own.version();
        if gap > trust_set::MAX_WALK {
            return Err(Error::new(
                ErrorKind::TrustSet,
                format!(
                    "the feed names trust set version {}, {gap} versions after this device's \
                     version {}; a device follows at most {} versions in one update, so it \
                     cannot reach it. Ship an app with trust set version {} or newer",
                    named.version,
                    own.version(),
                    trust_set::MAX_WALK,
                    named.version - trust_set::MAX_WALK
                ),
            ));
        }
        let walk = TrustWalk {
            named,
            accepted: Vec::new(),
            last: own,
        };
        self.next_trust_set(walk)
    }

    fn next_trust_set(&self, walk: TrustWalk) -> Result<Step> {
        let want = Fetch {
            url: crate::check::feed::resolve(
                &self.feed_url,
                &trust_set::reference(walk.last.version() + 1),
            )?,
            what: "trust set",
            max_bytes: trust_set::MAX_BYTES,
        };
        Ok(Step::Go(State::TrustSet(want, Box::new(walk))))
    }

    /// Accepts the trust set the walk asked for as the successor of the one before; fetches
    /// the next one, or, at the version the feed names, verifies the feed under it.
    fn trust_step(&mut self, want: &Fetch, mut walk: TrustWalk, bytes: &[u8]) -> Result<Step> {
        let version = walk.last.version() + 1;
        let next = walk.last.accept_step(bytes).map_err(|e| {
            e.context(format_args!(
                "the trust set at {} (version {version} of the walk from version {} to {}) was \
                 refused",
                want.url,
                walk.accepted
                    .first()
                    .map_or(walk.last.version(), |a| a.version - 1),
                walk.named.version
            ))
        })?;
        if next.version() != version {
            return Err(Error::new(
                ErrorKind::TrustSet,
                format!(
                    "{} holds trust set version {}, not {version}; a release tree keeps each \
                     trust set under its own version, and a device follows them one version \
                     at a time",
                    want.url,
                    next.version()
                ),
            ));
        }
        let sha256 = Digest::of(bytes);
        walk.accepted.push(Accepted {
            version,
            sha256,
            before: walk.last.signers::<kind::TreeHead>()?,
            set: next.clone(),
        });
        walk.last = next;
        if version < walk.named.version {
            return self.next_trust_set(walk);
        }
        if sha256 != walk.named.sha256 {
            return Err(Error::new(
                ErrorKind::Digest,
                format!(
                    "trust set downloaded from {} has SHA-256 {sha256}, but the feed declares {}",
                    want.url, walk.named.sha256
                ),
            ));
        }
        walk.last.file().check_expiry(self.now).map_err(|e| {
            e.context(format_args!(
                "the trust set at {} that the feed names",
                want.url
            ))
        })?;
        let before = self.held()?.set().map_or(0, TrustSet::version);
        self.store = Some(self.store()?.clone().with_trust_set(&walk.last)?);
        self.held = Some(Held::Set(walk.last.clone()));
        self.pending = Some(Pending {
            before,
            set: walk.last,
            accepted: walk.accepted,
        });
        self.check_feed().map_err(|e| {
            e.context(format_args!(
                "feed refused under the new trust set version {version}"
            ))
        })
    }

    /// Checks that the ledger the feed proves logs every trust set the walk accepted, with
    /// the proofs file for the feed's tree head.
    fn prove_trust_sets(&self, bytes: &[u8], feed: &VerifiedFeed) -> Result<()> {
        let (Some(pending), Some(check)) = (&self.pending, feed.ledger()) else {
            return Ok(());
        };
        let proofs = TrustSetProofs::from_json(bytes)?;
        for set in &pending.accepted {
            proofs.prove(set.version, &set.sha256, &check.tree_head, &set.before)?;
        }
        Ok(())
    }

    /// The feed passed its own checks (and any trust-set proofs): walk the consistency steps
    /// it needs, or decide.
    fn after_feed(&mut self, feed: VerifiedFeed, walk: Option<Walk>) -> Result<Step> {
        match walk {
            Some(walk) => self.walk_or_decide(walk, feed),
            None => {
                self.keep_trust_set()?;
                self.feed = Some(feed);
                Ok(Step::Go(State::Decide))
            }
        }
    }

    /// Stores the trust set a walk ended on, now that the feed verified under it and the
    /// ledger proved every set on the way.
    fn keep_trust_set(&mut self) -> Result<()> {
        if let Some(pending) = self.pending.take() {
            let initial = self.device.app().shipped_trust_set().ok_or_else(|| {
                Error::new(
                    ErrorKind::TrustSet,
                    "a trust-set rotation needs a device that runs on trust sets",
                )
            })?;
            // Each set of the walk in turn: the store's chain holds only successors.
            let store = self.store()?;
            let result = pending
                .accepted
                .iter()
                .try_for_each(|step| store.save_trust_set(initial, &step.set));
            if let Err(e) = result {
                self.pending = Some(pending);
                return Err(e);
            }
            self.rotated_to = Some(pending.set.version());
        }
        Ok(())
    }

    /// The feed passed every check after a walk through the tree's consistency steps: it is
    /// the update's feed from now on, and its tree head (signed, and proven to extend the one
    /// remembered) is remembered at once, so a failed download or a refused bundle does not
    /// make the next update fetch the same steps again. Without a walk the head is remembered
    /// only with what the update does with the feed, and a refusal leaves the store as it was.
    fn proven(&mut self, feed: VerifiedFeed) -> Result<Step> {
        self.store()?.remember_feed_tree_head(&feed)?;
        self.keep_trust_set()?;
        self.feed = Some(feed);
        Ok(Step::Go(State::Decide))
    }

    fn walk_or_decide(&mut self, walk: Walk, feed: VerifiedFeed) -> Result<Step> {
        match walk.needs() {
            None => self.proven(feed),
            Some(size) => {
                let want = Fetch {
                    url: crate::check::feed::resolve(
                        &self.feed_url,
                        &ledger::step_reference(size),
                    )?,
                    what: "consistency step",
                    max_bytes: ledger::MAX_STEP_BYTES,
                };
                Ok(Step::Go(State::Steps(want, walk, Box::new(feed))))
            }
        }
    }

    /// Decides by the feed alone: nothing offered, not newer, another app, rollout, size.
    fn decide(&mut self) -> Result<Step> {
        let feed = self
            .feed
            .clone()
            .ok_or_else(|| Error::new(ErrorKind::Feed, "no verified feed to decide on"))?;
        let store = self.store()?.clone();
        let state = store.state()?;
        let bundles = self.bundle_verifier(&state)?;
        let app = self.device.app();
        let release = match feed.decide(&bundles, self.device.device_id())? {
            Decision::NothingOffered => {
                return self.settle(&store, &feed, Outcome::NothingOffered);
            }
            Decision::UpToDate => return self.settle(&store, &feed, Outcome::UpToDate),
            Decision::NeedsOtherApp(release) => {
                let reason = format!(
                    "{} {} requires app {}, and this app is {}",
                    release.name, release.version, release.requires_app, app.version
                );
                return self.settle(&store, &feed, Outcome::NeedsOtherApp { reason });
            }
            Decision::NotInRollout(bucket) => {
                return self.settle(&store, &feed, Outcome::NotInRollout { bucket });
            }
            Decision::Fetch(release) => release,
        };
        if release.size > app.max_bundle_bytes {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "feed offers {} {} as a bundle of {} bytes, over this app's limit of {} \
                     bytes; nothing was downloaded",
                    release.name, release.version, release.size, app.max_bundle_bytes
                ),
            ));
        }
        // A bundle refused before, under the same app and trust, is not downloaded again.
        let app_print = refusals::fingerprint(app, self.held()?, &bundles);
        let downloads = self.device.downloads()?;
        if let Some(refusal) =
            refusals::recall(&downloads, &release.sha256, &app_print, self.now, "bundle")
                .filter(|e| e.kind().is_refusal())
        {
            return Err(refusal);
        }
        let delta = self.pick_delta(&store, &release, &app_print)?;
        self.download(release, delta)
    }

    /// The delta to download instead of the bundle, if the feed offers one for the installed
    /// release's files. The store checks the current release in full first (its manifest
    /// against the state, its signatures and the app's policy, every file's size and
    /// SHA-256); the delta's base must be the digest of that manifest's files (FORMAT.md
    /// "Deltas"): matched by digest, never by version. None offline, after a delta was tried
    /// in this update, when no delta matches, when the check failed, or when the delta was
    /// remembered as failed (both noted for the report).
    fn pick_delta(
        &mut self,
        store: &Store,
        release: &Release,
        app_print: &Digest,
    ) -> Result<Option<DeltaRef>> {
        if self.delta_tried || release.deltas.is_empty() || self.expiry == Expiry::NotCheckedOffline
        {
            return Ok(None);
        }
        let installed = match store.open_current() {
            Ok(Some(installed)) => installed,
            Ok(None) => return Ok(None),
            Err(e) => {
                self.delta_refused = Some(e.context(
                    "no delta used, the installed release failed the store's check; the full \
                     bundle is downloaded instead",
                ));
                return Ok(None);
            }
        };
        let base = base_id(&installed.manifest.files);
        let Some(delta) = release.deltas.iter().find(|d| d.base == base) else {
            return Ok(None);
        };
        if let Some(refusal) = refusals::recall(
            &self.device.downloads()?,
            &delta.sha256,
            app_print,
            self.now,
            "delta",
        ) {
            self.delta_refused = Some(refusal.context(format_args!("delta {}", delta.sha256)));
            return Ok(None);
        }
        Ok(Some(delta.clone()))
    }

    /// Asks for the bundle of `release`, or for `delta` instead, into the store's download
    /// directory (resuming what this store started there).
    fn download(&mut self, release: Release, delta: Option<DeltaRef>) -> Result<Step> {
        let (sha256, size) = match &delta {
            Some(d) => (d.sha256, d.size),
            None => (release.sha256, release.size),
        };
        let name = format!("{sha256}.ampoule.partial");
        let lock = self
            .lock
            .as_ref()
            .ok_or_else(|| Error::new(ErrorKind::Locked, "the session does not hold the lock"))?;
        // Made (or checked for resuming) now, so that the app only ever opens a file the
        // store prepared.
        let earlier = self
            .device
            .partial_download(lock.file(), &name, size)?
            .metadata()
            .map_or(0, |m| m.len());
        // The head of a bundle first when it is larger than one: its signed manifest fixes
        // the bundle's size before the payload is asked for. A delta, smaller than its
        // bundle, comes whole, and its carried manifest is checked before its patches are read.
        let head = delta.is_none() && size > limit::HEAD_BYTES;
        let urls = match &delta {
            Some(d) => vec![release.delta_url(&self.feed_url, d)?],
            None => release.urls(&self.feed_url)?,
        };
        self.delta_tried |= delta.is_some();
        let want = Download {
            urls,
            size: if head { limit::HEAD_BYTES } else { size },
            sha256,
            path: self.device.downloads_path().join(&name),
            store: self.device.store().dir().to_path_buf(),
            name,
            head,
            whole: size,
            earlier,
            delta,
            from: earlier,
            watch: None,
        };
        self.device.sweep_downloads(Some(&want.name));
        Ok(Step::Go(State::Download(want, release)))
    }

    /// Gives up the delta of this update for the full bundle: remembers it when `error`
    /// shows it failed (so the next update does not download it again), says why in the
    /// report, and asks for the bundle. The delta's partial file goes with the next sweep.
    fn fall_back(&mut self, release: Release, delta: &DeltaRef, error: Error) -> Result<Step> {
        self.remember_delta(delta, &error);
        self.delta_refused = Some(error.context(format_args!(
            "delta {} not used; the full bundle is downloaded instead",
            delta.sha256
        )));
        self.download(release, None)
    }

    /// Remembers a delta that failed with `error` (a refusal, or a transfer that failed after
    /// its retries), like a refused bundle, so that the next update takes the full bundle
    /// and can resume it. Best effort.
    fn remember_delta(&self, delta: &DeltaRef, error: &Error) {
        let remember = error.kind().is_refusal() || error.kind() == ErrorKind::Network;
        let (Ok(held), Ok(state)) = (self.held(), self.store().and_then(Store::state)) else {
            return;
        };
        if let (true, Ok(bundles), Ok(dir)) = (
            remember,
            self.bundle_verifier(&state),
            self.device.downloads(),
        ) {
            let app_print = refusals::fingerprint(self.device.app(), held, &bundles);
            refusals::remember_any(&dir, &delta.sha256, error, &app_print, self.now);
        }
    }

    /// Records the feed, so that an older one is refused from now on, and the tree head it
    /// proved, and drops downloads no update asks for any more.
    fn settle(&mut self, store: &Store, feed: &VerifiedFeed, outcome: Outcome) -> Result<Step> {
        store.record_feed(feed)?;
        store.remember_feed_tree_head(feed)?;
        self.device.sweep_downloads(None);
        Ok(Step::End(outcome))
    }

    /// Checks the head of the bundle being downloaded (see [`Download`]), then asks for the
    /// whole bundle. A refusal here costs at most the head's bytes, and is remembered.
    fn check_head(&mut self, path: &Path, head: Download, release: Release) -> Result<Step> {
        let store = self.store()?.clone();
        let bundles = self.bundle_verifier(&store.state()?)?;
        let app_print = refusals::fingerprint(self.device.app(), self.held()?, &bundles);
        let ours = path == head.path;
        // No digest covers the head yet: whoever serves the file chose it. A refusal is
        // remembered only once the head is proven to be the offered release's own (its
        // manifest is the one the feed's ledger entry logs), so that a web server that served
        // something else, or a damaged head, delays nothing beyond this update.
        let refuse = |e: Error, proven: bool| {
            if e.kind().is_refusal() {
                if ours {
                    head.discard();
                }
                if proven && let Ok(dir) = self.device.downloads() {
                    refusals::remember(&dir, &release.sha256, &e, &app_print, self.now);
                }
            }
            e
        };
        let mut file = if ours {
            head.file()?
        } else {
            File::open(path).map_err(|e| Error::io(format!("cannot open {}", path.display()), e))?
        };
        let have = file
            .metadata()
            .map_err(|e| Error::io(format!("cannot read {}", path.display()), e))?
            .len();
        if have < head.size {
            return Err(Error::new(
                ErrorKind::Network,
                format!(
                    "the download at {} holds {have} bytes, but the bundle's first {} were asked \
                     for; the next update resumes it",
                    path.display(),
                    head.size
                ),
            ));
        }
        let checked = bundles
            .check_head(&mut file)
            .map_err(|e| refuse(e, false))?;
        let (manifest, manifest_bytes, len) =
            (checked.manifest, checked.manifest_bytes, checked.len);
        // The release the feed offers, and the manifest its ledger entry logs.
        let feed = self
            .feed
            .as_ref()
            .ok_or_else(|| Error::new(ErrorKind::Feed, "no verified feed to check the head on"))?;
        feed.check_manifest(&release, &manifest, &manifest_bytes)
            .map_err(|e| {
                refuse(
                    e.context("refused before its payload was downloaded"),
                    false,
                )
            })?;
        let proven = feed.logs_offered_manifest();
        bundles
            .check_head_policy(&manifest, len)
            .map_err(|e| refuse(e, proven))?;
        if len != release.size {
            return Err(refuse(
                Error::new(
                    ErrorKind::Feed,
                    format!(
                        "feed offers {} {} as {} bytes, but its signed manifest makes the bundle \
                     {len} bytes; refusing it before its payload is downloaded",
                        release.name, release.version, release.size
                    ),
                ),
                proven,
            ));
        }
        let want = Download {
            size: head.whole,
            head: false,
            from: have,
            watch: checked.watch.map(Box::new),
            ..head
        };
        Ok(Step::Go(State::Download(want, release)))
    }

    /// Checks the downloaded file and the bundle in it, then installs it.
    fn install(
        &mut self,
        path: &Path,
        release: &Release,
        checked: bool,
        earlier: u64,
        watch: Option<Box<Watch>>,
    ) -> Result<Step> {
        let feed = self
            .feed
            .clone()
            .ok_or_else(|| Error::new(ErrorKind::Feed, "no verified feed to install from"))?;
        let store = self.store()?.clone();
        // The store's own partial download is opened without following links; a file the
        // app downloaded elsewhere is the app's to name.
        let ours = self.ours(path);
        let app_print = refusals::fingerprint(
            self.device.app(),
            self.held()?,
            &self.bundle_verifier(&store.state()?)?,
        );
        let discard = |e: Error| {
            // The bytes are the ones the feed signed, yet the bundle is refused: keeping
            // them would only refuse them again on every update, and so would downloading
            // them again (the refusal is remembered).
            if e.kind().is_refusal() {
                if let Some(name) = &ours {
                    self.device.remove_partial(name);
                }
                if let Ok(dir) = self.device.downloads() {
                    refusals::remember(&dir, &release.sha256, &e, &app_print, self.now);
                }
            }
            e
        };
        // One open of the file: the bytes hashed against the feed are the bytes verified and
        // unpacked, even if the path is replaced meanwhile.
        let mut file = match &ours {
            Some(name) => self.device.open_partial(name)?,
            None => File::open(path)
                .map_err(|e| Error::io(format!("cannot open {}", path.display()), e))?,
        };
        if !checked {
            let kept = if ours.is_some() { earlier } else { 0 };
            if let Err(wrong) = check_file(
                &mut file,
                path,
                release.size,
                &release.sha256,
                kept,
                watch.map(|w| *w),
            ) {
                // Bytes that are not the file the feed signed: the server or the transfer is
                // at fault, not the bundle, so nothing is remembered. The store's own file
                // keeps the chunks that checked and loses the rest.
                if let Some(name) = &ours
                    && wrong.error.kind().is_refusal()
                    && (wrong.keep == 0
                        || file
                            .set_len(wrong.keep)
                            .and_then(|()| file.sync_data())
                            .is_err())
                {
                    self.device.remove_partial(name);
                }
                return Err(wrong.error);
            }
        }
        let bundles = self.bundle_verifier(&store.state()?)?;
        let bundle = bundles.verify_file(file).map_err(discard)?;
        feed.check_bundle(release, &bundle).map_err(discard)?;
        let installed = store.install_from_feed(bundle, &feed).map_err(discard)?;
        self.installed(ours.as_deref(), installed, &store, &feed)
    }

    /// Checks the downloaded delta against the feed, reads its head and checks the manifest
    /// it carries as a bundle's (signatures, the app's policy, the release the feed offers
    /// and its ledger entry logs), then has the store rebuild and install the release from
    /// the current release's files, through the same install as a bundle. Any error here
    /// makes the caller fall back to the bundle.
    fn install_delta(
        &mut self,
        path: &Path,
        release: &Release,
        delta: &DeltaRef,
        checked: bool,
        earlier: u64,
    ) -> Result<Step> {
        let feed = self
            .feed
            .clone()
            .ok_or_else(|| Error::new(ErrorKind::Feed, "no verified feed to install from"))?;
        let store = self.store()?.clone();
        let ours = self.ours(path);
        let mut file = match &ours {
            Some(name) => self.device.open_partial(name)?,
            None => File::open(path)
                .map_err(|e| Error::io(format!("cannot open {}", path.display()), e))?,
        };
        if !checked {
            let kept = if ours.is_some() { earlier } else { 0 };
            check_file(&mut file, path, delta.size, &delta.sha256, kept, None)
                .map_err(|wrong| wrong.error)?;
        }
        let bundles = self.bundle_verifier(&store.state()?)?;
        let verified = VerifiedDelta::read(&bundles, file)?;
        feed.check_manifest(release, verified.manifest(), verified.manifest_bytes())?;
        if verified.base() != delta.base {
            return Err(Error::new(
                ErrorKind::Digest,
                format!(
                    "delta {} applies to base {}, but the feed lists it for base {}",
                    delta.sha256,
                    verified.base(),
                    delta.base
                ),
            ));
        }
        let installed = store.install_delta_from_feed(verified, &feed)?;
        self.delta_used = Some(delta.sha256);
        self.installed(ours.as_deref(), installed, &store, &feed)
    }

    /// The name of `path` in the store's download directory, when the app used the file the
    /// session prepared there; a file the app downloaded elsewhere is the app's to name.
    fn ours(&self, path: &Path) -> Option<String> {
        (path.parent() == Some(self.device.downloads_path().as_path()))
            .then(|| path.file_name().map(|n| n.to_string_lossy().into_owned()))
            .flatten()
    }

    /// The end of an install, from a bundle or a delta: the download removed, the remembered
    /// refusal forgotten, the tree head remembered, old releases collected.
    fn installed(
        &mut self,
        ours: Option<&str>,
        installed: crate::store::Installed,
        store: &Store,
        feed: &VerifiedFeed,
    ) -> Result<Step> {
        if let Some(name) = ours {
            self.device.remove_partial(name);
        }
        if let Ok(dir) = self.device.downloads() {
            refusals::forget(&dir);
        }
        // The model is installed whatever happens next: a failure to remember the head now
        // only means the next update proves it again, so it must not turn the outcome into a
        // failure that says the old model was kept.
        let _ = store.remember_feed_tree_head(feed);
        // The release before the previous one is no rollback target any more: free its space
        // now. A failure here changes nothing that matters (the next update sweeps again).
        let _ = store.gc();
        Ok(Step::End(Outcome::Installed(Box::new(installed))))
    }

    fn feed_verifier(&self, state: &StoreState) -> Result<FeedVerifier> {
        let channel = self.device.channel();
        let mut feeds = match self.held()? {
            Held::Set(set) => FeedVerifier::from_trust_set(set, channel)?,
            Held::Pinned(p) => {
                FeedVerifier::new(p.feed.keys().clone(), channel)?.threshold(p.feed.threshold())
            }
        };
        if let Some((sequence, digest)) = state.last_feed(channel) {
            feeds = feeds.last_accepted(sequence, digest);
        }
        if self.expiry == Expiry::NotCheckedOffline {
            feeds = feeds.offline();
        }
        if self.device.app().ledger == Ledger::Required {
            let heads = match self.held()? {
                Held::Set(set) => LedgerVerifier::from_trust_set(set)?,
                Held::Pinned(p) => {
                    LedgerVerifier::new(p.tree_head.keys().clone(), p.tree_head.threshold())?
                }
            };
            feeds = feeds.require_ledger(heads.remembered(state.tree_head));
        }
        Ok(feeds)
    }

    fn bundle_verifier(&self, state: &StoreState) -> Result<Verifier> {
        store_verifier(self.device.app(), self.held()?, state)
    }
}

/// A downloaded file that is not the one the feed declares, and how many of its first bytes
/// are still proven: the chunks before the first one that did not check (format 2, once the
/// head checked), or none.
struct WrongFile {
    error: Error,
    keep: u64,
}

/// Checks an open downloaded file against the size and SHA-256 the verified feed declares
/// (the bundle's or a delta's), and leaves it at its start for the bundle's own checks.
/// `kept` is how many of its bytes the store kept from an earlier update: a wrong digest then
/// names both sources, since either may be the wrong one. With `watch`, the chunks are checked
/// in the same read, so that a wrong file keeps the chunks that checked.
fn check_file(
    file: &mut File,
    path: &Path,
    declared_size: u64,
    declared: &Digest,
    kept: u64,
    mut watch: Option<Watch>,
) -> std::result::Result<(), WrongFile> {
    let io = |e| WrongFile {
        error: Error::io(format!("cannot read {}", path.display()), e),
        keep: 0,
    };
    let mut hasher = Hasher::new();
    let mut bad = None;
    let mut limited = std::io::Read::take(&*file, declared_size.saturating_add(1));
    let mut buf = vec![0u8; 256 * 1024];
    loop {
        let n = match std::io::Read::read(&mut limited, &mut buf) {
            Ok(0) => break,
            Ok(n) => n,
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => continue,
            Err(e) => return Err(io(e)),
        };
        hasher.update(&buf[..n]);
        if let (Some(w), None) = (&mut watch, &bad)
            && let Err(chunk) = w.feed(&buf[..n])
        {
            bad = Some(chunk);
        }
    }
    std::io::Seek::rewind(file).map_err(io)?;
    let size = hasher.len();
    let sha256 = hasher.finish();
    let wrong_size = size != declared_size;
    if !wrong_size && sha256 == *declared {
        return Ok(());
    }
    // The chunks before the first wrong one are the bundle's own: keep them for the next
    // try. Past the declared size nothing is anyone's.
    let keep = watch.as_ref().map_or(0, Watch::good_len).min(declared_size);
    let kept_note = match (&bad, keep) {
        (_, 0) => String::new(),
        (Some(chunk), keep) => format!(
            "; {chunk}. The first {keep} bytes, the head and {} chunks that checked, are kept, \
             and the next update downloads the rest again",
            watch.as_ref().map_or(0, Watch::checked)
        ),
        (None, keep) => format!(
            "; the first {keep} bytes, the head and {} chunks that checked, are kept, and the \
             next update downloads the rest again",
            watch.as_ref().map_or(0, Watch::checked)
        ),
    };
    let message = if wrong_size {
        format!(
            "downloaded file {} is {size} bytes{}, but the feed declares {} bytes{kept_note}",
            path.display(),
            if size > declared_size { " or more" } else { "" },
            declared_size
        )
    } else if keep > 0 {
        format!(
            "downloaded file {} has SHA-256 {sha256}, but the feed declares {declared}{kept_note}",
            path.display(),
        )
    } else if kept == 0 {
        format!(
            "downloaded file {} has SHA-256 {sha256}, but the feed declares {}",
            path.display(),
            declared
        )
    } else {
        format!(
            "the {kept} bytes kept in {} from an earlier update and the {} bytes the app \
             downloaded after them have SHA-256 {sha256} together, but the feed declares {}; \
             both were discarded, and the next update downloads the whole file again",
            path.display(),
            size - kept.min(size),
            declared
        )
    };
    Err(WrongFile {
        error: Error::new(ErrorKind::Digest, message),
        keep,
    })
}

/// The format of a feed whose format is newer than this crate reads, but which this device
/// would otherwise take: its signatures meet `feeds`' threshold, and the fields every format
/// keeps (`channel`, `sequence`, `expires`) show it is this device's channel, not older than
/// the feed it accepted last, and current. `None` for any other feed, which is refused as
/// usual, so neither a stranger nor a replayed or foreign signed feed can make a device
/// report that it needs another app.
fn newer_feed_format(feeds: &FeedVerifier, bytes: &[u8], now: Timestamp) -> Option<u32> {
    #[derive(Deserialize)]
    struct Lasting {
        format: u32,
        channel: String,
        sequence: u64,
        expires: Timestamp,
    }
    if bytes.len() as u64 > limit::FEED_BYTES {
        return None;
    }
    let signed = SignedFeed::from_json(bytes).ok()?;
    feeds.check_signatures(&signed).ok()?;
    let lasting = serde_json::from_str::<Lasting>(&signed.feed).ok()?;
    let ours = lasting.channel == feeds.channel()
        && feeds
            .last_sequence()
            .is_none_or(|last| lasting.sequence >= last)
        && feeds.is_current(lasting.expires, now);
    (ours && lasting.format > FEED_FORMAT_VERSION).then_some(lasting.format)
}

/// The trust set a feed names, read **without** verifying the feed: a device behind on
/// trust sets may not hold the keys that signed it. Only where to walk is taken from it;
/// see [`Session::walk_trust`] for why that is safe. `None` for anything that does not parse,
/// which the feed's own check then refuses.
fn named_trust_set(bytes: &[u8]) -> Option<TrustSetRef> {
    if bytes.len() as u64 > limit::FEED_BYTES {
        return None;
    }
    let signed = SignedFeed::from_json(bytes).ok()?;
    #[derive(Deserialize)]
    struct Named {
        trust_set: Option<TrustSetRef>,
    }
    let named = serde_json::from_str::<Named>(&signed.feed)
        .ok()?
        .trust_set?;
    named.validate().ok()?;
    Some(named)
}
