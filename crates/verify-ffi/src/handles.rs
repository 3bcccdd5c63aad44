//! Handles: what a C caller holds instead of a pointer. A handle is a number, a type tag in its
//! top 16 bits and a serial number below, looked up in a registry of live objects on every
//! call. The library never dereferences anything a caller passes as a handle, so a freed, a
//! double-freed, a made-up or another type's handle is refused with `AMPOULE_INVALID_HANDLE`,
//! never read. Serial numbers are not reused, so a stale copy of a freed handle can never name
//! a newer object.
//!
//! A call takes a reference-counted copy of the object out of the registry and works on that,
//! so another thread freeing the handle meanwhile ends nothing: the call finishes on its copy,
//! and later calls are refused.

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex, MutexGuard, PoisonError};

use ampoule_verify::{Device, Release};

use crate::ffi::AmpouleTransfer;
use crate::raw::Callback;
use crate::session::UpdateSession;
use crate::status::Failure;

/// The tag of a store handle ("ST").
pub const STORE_TAG: u64 = 0x5354;
/// The tag of a release handle ("RL").
pub const RELEASE_TAG: u64 = 0x524c;
/// The tag of an update session's handle ("SE").
pub const SESSION_TAG: u64 = 0x5345;
const SERIAL_BITS: u32 = 48;

/// A store's progress callback, which `ampoule_store_set_progress` sets and its updates call.
pub(crate) type ProgressSlot = Mutex<Option<Callback>>;

/// What a store handle keeps beside its store: the progress callback, the limits
/// `ampoule_store_set_transfer` set for `ampoule_update`, and the cancel flag of each
/// `ampoule_update` running on this handle, which `ampoule_update_cancel` sets.
pub(crate) struct StoreSlots {
    pub(crate) progress: Arc<ProgressSlot>,
    pub(crate) transfer: Mutex<AmpouleTransfer>,
    running: Mutex<Vec<Arc<AtomicBool>>>,
}

/// The cancel flag of one running `ampoule_update`, registered with its store handle until
/// dropped.
#[cfg_attr(not(feature = "fetch"), allow(dead_code))]
pub(crate) struct Running<'a> {
    slots: &'a StoreSlots,
    pub(crate) flag: Arc<AtomicBool>,
}

impl Drop for Running<'_> {
    fn drop(&mut self) {
        lock(&self.slots.running).retain(|flag| !Arc::ptr_eq(flag, &self.flag));
    }
}

/// Locks one of a handle's slots. A panic while one was held (caught at the boundary) leaves
/// its value whole: every change to a slot is one assignment or one push or removal.
pub(crate) fn lock<T>(slot: &Mutex<T>) -> MutexGuard<'_, T> {
    slot.lock().unwrap_or_else(PoisonError::into_inner)
}

impl StoreSlots {
    pub(crate) fn new(progress: Arc<ProgressSlot>) -> StoreSlots {
        StoreSlots {
            progress,
            transfer: Mutex::new(AmpouleTransfer::default()),
            running: Mutex::new(Vec::new()),
        }
    }

    /// Registers the cancel flag of an `ampoule_update` that starts now.
    #[cfg_attr(not(feature = "fetch"), allow(dead_code))]
    pub(crate) fn start(&self) -> Running<'_> {
        let flag = Arc::new(AtomicBool::new(false));
        lock(&self.running).push(flag.clone());
        Running { slots: self, flag }
    }

    /// Sets the cancel flag of every `ampoule_update` running on this handle, and says how
    /// many there were.
    pub(crate) fn cancel(&self) -> usize {
        let running = lock(&self.running);
        for flag in running.iter() {
            flag.store(true, Ordering::Relaxed);
        }
        running.len()
    }
}

/// One live object.
#[derive(Clone)]
enum Entry {
    Store(Arc<Device>, Arc<StoreSlots>),
    Release(Arc<Release>),
    Session(Arc<UpdateSession>),
}

struct Registry {
    next: u64,
    live: BTreeMap<u64, Entry>,
}

static REGISTRY: Mutex<Registry> = Mutex::new(Registry {
    next: 1,
    live: BTreeMap::new(),
});

fn registry() -> MutexGuard<'static, Registry> {
    // A panic while the lock was held (caught at the boundary) leaves the map itself whole:
    // every change to it is one insert or remove.
    REGISTRY.lock().unwrap_or_else(PoisonError::into_inner)
}

fn add(tag: u64, entry: Entry) -> Result<u64, Failure> {
    let mut registry = registry();
    let serial = registry.next;
    if serial >= 1 << SERIAL_BITS {
        return Err(Failure::argument(
            "this process has made 2^48 handles; no more can be made",
        ));
    }
    registry.next += 1;
    let id = (tag << SERIAL_BITS) | serial;
    registry.live.insert(id, entry);
    Ok(id)
}

fn get(id: u64, tag: u64) -> Option<Entry> {
    if id >> SERIAL_BITS != tag {
        return None;
    }
    registry().live.get(&id).cloned()
}

fn remove(id: u64, tag: u64) -> bool {
    if id >> SERIAL_BITS != tag {
        return false;
    }
    let removed = registry().live.remove(&id);
    // Dropped after the registry's lock is released: the last reference to a session waits
    // for its thread to end.
    removed.is_some()
}

/// Registers a store, with the progress slot its app reports to, and returns its handle.
pub(crate) fn add_store(device: Device, progress: Arc<ProgressSlot>) -> Result<u64, Failure> {
    add(
        STORE_TAG,
        Entry::Store(Arc::new(device), Arc::new(StoreSlots::new(progress))),
    )
}

/// Registers a release and returns its handle.
pub fn add_release(release: Release) -> Result<u64, Failure> {
    add(RELEASE_TAG, Entry::Release(Arc::new(release)))
}

/// Registers an update session and returns its handle.
pub fn add_session(session: UpdateSession) -> Result<u64, Failure> {
    add(SESSION_TAG, Entry::Session(Arc::new(session)))
}

/// The store a handle names.
pub fn store(id: u64) -> Result<Arc<Device>, Failure> {
    match get(id, STORE_TAG) {
        Some(Entry::Store(device, _)) => Ok(device),
        _ => Err(Failure::handle("the store handle")),
    }
}

/// The slots (progress callback, transfer limits, running updates) of the store a handle
/// names.
pub(crate) fn slots(id: u64) -> Result<Arc<StoreSlots>, Failure> {
    match get(id, STORE_TAG) {
        Some(Entry::Store(_, slots)) => Ok(slots),
        _ => Err(Failure::handle("the store handle")),
    }
}

/// The release a handle names.
pub fn release(id: u64) -> Result<Arc<Release>, Failure> {
    match get(id, RELEASE_TAG) {
        Some(Entry::Release(release)) => Ok(release),
        _ => Err(Failure::handle("the release handle")),
    }
}

/// The update session a handle names.
pub fn session(id: u64) -> Result<Arc<UpdateSession>, Failure> {
    match get(id, SESSION_TAG) {
        Some(Entry::Session(session)) => Ok(session),
        _ => Err(Failure::handle("the session handle")),
    }
}

/// Frees an update session's handle; the session ends once no call uses it any more.
pub fn free_session(id: u64) -> Result<(), Failure> {
    if remove(id, SESSION_TAG) {
        Ok(())
    } else {
        Err(Failure::handle("the session handle"))
    }
}

/// Frees a store handle.
pub fn free_store(id: u64) -> Result<(), Failure> {
    if remove(id, STORE_TAG) {
        Ok(())
    } else {
        Err(Failure::handle("the store handle"))
    }
}

/// Frees a release handle.
pub fn free_release(id: u64) -> Result<(), Failure> {
    if remove(id, RELEASE_TAG) {
        Ok(())
    } else {
        Err(Failure::handle("the release handle"))
    }
}
