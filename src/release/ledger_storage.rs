//! The audit ledger: an append-only log of every publish and withdraw, kept as a Merkle tree
//! hashed as RFC 9162 section 2.1 defines, in plain files that static hosting can serve.
//!
//! An auditor uses it to see exactly what was shipped, when and signed by whom, and to prove
//! that the log was never rewritten; a device gets an inclusion proof of the release it installs
//! and a consistency proof between tree heads. Appends are serialized by a lock file, and a
//! crash at any point leaves the ledger at its previous signed tree head: data is written and
//! synced first, and only then does an atomic rename publish the new head.
//!
//! Layout of a ledger directory (every number big-endian, every hash 32 bytes):
//!
//! - `entries.jsonl`: the entries, one per line; a leaf's data is its line without the newline.
//! - `entries.idx`: for each entry, the byte offset in `entries.jsonl` just past its newline
//!   (8 bytes per entry), so any entry is found without scanning.
//! - `hashes/level-NN.bin`: at level NN, the hash of every complete subtree of 2^NN leaves, in
//!   order (level 00 holds the leaf hashes). Any proof reads O(log n) of them.
//! - `tree-head.json`: the latest signed tree head, replaced atomically after each append.
//! - `tree-heads.jsonl`: every signed tree head the ledger ever had, one per line, oldest first.
//! - `lock`: held exclusively while appending.
//!
//! Bytes beyond what the current tree head covers are the remains of an interrupted append:
//! readers never look at them, and the next append truncates them away under the lock.

use std::fs::{self, File, OpenOptions};
use std::io::{BufRead, BufReader, BufWriter, Read, Write};
use std::ops::Range;
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};

use ampoule_verify::merkle::{
    self, ConsistencyProof, InclusionProof, NodeSource, SignedTreeHead, TreeHead, TreeHeadSignature,
};
use ampoule_verify::{Digest, KeyId, TrustedKeys, format};
use anyhow::{Context, Result, bail, ensure};
use ed25519_dalek::{Signer, SigningKey};

use crate::failure::count;

/// The entries file.
pub const ENTRIES: &str = "entries.jsonl";
/// The file of entry end offsets.
pub const OFFSETS: &str = "entries.idx";
/// The directory of per-level hash files.
pub const HASHES: &str = "hashes";
/// The latest signed tree head.
pub const TREE_HEAD: &str = "tree-head.json";
/// Every signed tree head, oldest first.
pub const TREE_HEADS: &str = "tree-heads.jsonl";
/// The lock file appends hold.
pub const LOCK: &str = "lock";
/// Where a new tree head is written before it is renamed into place.
const TREE_HEAD_TEMP: &str = "tree-head.json.tmp";

/// The entries and their size limit are part of the format, so they live in ampoule-verify.
pub use ampoule_verify::ledger::{Entry, Event, MAX_ENTRY_BYTES};

const HASH_BYTES: u64 = Digest::LEN as u64;
const OFFSET_BYTES: u64 = 8;
const BUFFER_BYTES: usize = 64 * 1024;

/// The hash file of one tree level.
fn level_file(level: u32) -> String {
    format!("level-{level:02}.bin")
}

/// How many levels hold at least one complete subtree in a tree of `size` leaves.
fn level_count(size: u64) -> u32 {
    64 - size.leading_zeros()
}

/// What a full [`Ledger::check`] found.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct CheckReport {
    /// The number of entries checked.
    pub tree_size: u64,
    /// The root all of them hash to, which the current tree head signs.
    pub root_hash: Digest,
    /// How many logged tree heads were checked against the entries.
    pub heads_checked: u64,
    /// Whether the current head is the head log's last line; false only after a crash between
    /// publishing a head and logging it, which the next append repairs.
    pub head_logged: bool,
    /// Bytes left behind by an interrupted append, beyond the current tree head.
    pub uncommitted_bytes: u64,
}

/// An open ledger directory.
#[derive(Debug)]
pub struct Ledger {
    dir: PathBuf,
    head: Option<SignedTreeHead>,
    entries: File,
    offsets: File,
    levels: Vec<File>,
}

impl Ledger {
    /// Makes an empty ledger in `dir` (created if missing) and opens it.
    pub fn create(dir: &Path) -> Result<Self> {
        fs::create_dir_all(dir.join(HASHES))
            .with_context(|| format!("cannot create ledger directory {}", dir.display()))?;
        ensure!(
            !dir.join(ENTRIES).exists(),
            "{} already holds a ledger",
            dir.display()
        );
        // The entries file goes last: its presence is what marks a directory as a ledger.
        for name in [OFFSETS, TREE_HEADS, LOCK, ENTRIES] {
            File::create_new(dir.join(name))
                .with_context(|| format!("cannot create {}", dir.join(name).display()))?;
        }
        sync_dir(&dir.join(HASHES))?;
        sync_dir(dir)?;
        Self::open(dir)
    }

    /// Opens an existing ledger for reading and appending. Opening changes nothing on disk,
    /// so it works on a read-only copy; only [`append`](Ledger::append) writes.
    pub fn open(dir: &Path) -> Result<Self> {
        ensure!(
            dir.join(ENTRIES).is_file(),
            "{} is not a ledger (it has no {ENTRIES}); create one first",
            dir.display()
        );
        let mut ledger = Ledger {
            dir: dir.to_path_buf(),
            head: None,
            entries: open_read(&dir.join(ENTRIES))?,
            offsets: open_read(&dir.join(OFFSETS))?,
            levels: Vec::new(),
        };
        ledger.reload()?;
        Ok(ledger)
    }

    /// Reads the current tree head again, picking up appends made through other handles.
    pub fn reload(&mut self) -> Result<()> {
        let head = read_tree_head(&self.dir)?;
        let size = head.as_ref().map_or(0, |h| h.head().tree_size);
        let mut levels = Vec::new();
        for level in 0..level_count(size) {
            let path = self.dir.join(HASHES).join(level_file(level));
            let file = open_read(&path)?;
            let needed = (size >> level) * HASH_BYTES;
            ensure_len(&file, &path, needed, size)?;
            levels.push(file);
        }
        ensure_len(
            &self.offsets,
            &self.dir.join(OFFSETS),
            size * OFFSET_BYTES,
            size,
        )?;
        self.head = head;
        self.levels = levels;
        let entries_len = self.committed_entries_len()?;
        ensure_len(&self.entries, &self.dir.join(ENTRIES), entries_len, size)?;
        Ok(())
    }

    /// The directory the ledger lives in.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// The latest signed tree head; `None` until the first append.
    pub fn tree_head(&self) -> Option<&SignedTreeHead> {
        self.head.as_ref()
    }

    /// How many entries the latest tree head covers.
    pub fn size(&self) -> u64 {
        self.head.as_ref().map_or(0, |h| h.head().tree_size)
    }

    /// Appends one entry and signs the new tree head with every key in `keys`; returns the
    /// entry's index. Waits while another process appends.
    pub fn append(&mut self, entry: &[u8], keys: &[&SigningKey], time: u64) -> Result<u64> {
        Ok(self.append_batch([entry], keys, time)?.start)
    }

    /// Appends a publish or withdraw entry; see [`append`](Ledger::append).
    pub fn append_entry(&mut self, entry: &Entry, keys: &[&SigningKey], time: u64) -> Result<u64> {
        self.append(&entry.to_bytes(), keys, time)
    }

    /// Appends one entry like [`Ledger::append`], and adds the signatures `outside` returns for
    /// the new head (a tree-head key held outside this process) before the head is committed.
    /// If `outside` fails, nothing is appended.
    pub fn append_with_outside(
        &mut self,
        entry: &[u8],
        keys: &[&SigningKey],
        outside: OutsideSignatures<'_>,
        time: u64,
    ) -> Result<u64> {
        check_signing_keys(keys)?;
        let lock = self.lock()?;
        self.reload()?;
        self.truncate_uncommitted()?;
        let result = self.write_and_commit([entry], keys, Some(outside), time);
        if result.is_err() {
            let _ = self.truncate_uncommitted();
        }
        drop(lock);
        Ok(result?.start)
    }

    /// Appends several entries under one new tree head; returns their indexes. Either all of
    /// them are in the ledger afterwards or, after an error or crash, none.
    pub fn append_batch<I>(
        &mut self,
        entries: I,
        keys: &[&SigningKey],
        time: u64,
    ) -> Result<Range<u64>>
    where
        I: IntoIterator,
        I::Item: AsRef<[u8]>,
    {
        check_signing_keys(keys)?;
        let lock = self.lock()?;
        // Another process may have appended since this handle last looked.
        self.reload()?;
        self.truncate_uncommitted()?;
        let result = self.write_and_commit(entries, keys, None, time);
        if result.is_err() {
            // Best effort: leave no uncommitted bytes behind; the next append would remove them
            // anyway, and readers never see them.
            let _ = self.truncate_uncommitted();
        }
        drop(lock);
        result
    }

    fn lock(&self) -> Result<File> {
        let path = self.dir.join(LOCK);
        let file = OpenOptions::new()
            .create(true)
            .truncate(false)
            .write(true)
            .open(&path)
            .with_context(|| format!("cannot open lock file {}", path.display()))?;
        file.lock()
            .with_context(|| format!("cannot lock {}", path.display()))?;
        Ok(file)
    }

    fn write_and_commit<I>(
        &mut self,
        entries: I,
        keys: &[&SigningKey],
        outside: Option<OutsideSignatures<'_>>,
        time: u64,
    ) -> Result<Range<u64>>
    where
        I: IntoIterator,
        I::Item: AsRef<[u8]>,
    {
        let start = self.size();
        if let Some(previous) = &self.head {
            let previous = previous.head().time;
            ensure!(
                time >= previous,
                "time {time} is before the current tree head's time {previous}; \
                 check the clock"
            );
        }
        let mut frontier = self.frontier()?;
        let mut writer = Appender::new(&self.dir, self.committed_entries_len()?)?;
        let mut size = start;
        for entry in entries {
            let entry = entry.as_ref();
            check_entry(size, entry)?;
            writer.entry(entry)?;
            let mut hash = merkle::leaf_hash(entry);
            writer.node(0, &hash)?;
            frontier.push(hash);
            let (mut count, mut level) = (size + 1, 0);
            while count & 1 == 0 {
                let right = frontier.pop().expect("a merge has two subtrees");
                let left = frontier.pop().expect("a merge has two subtrees");
                hash = merkle::node_hash(&left, &right);
                level += 1;
                writer.node(level, &hash)?;
                frontier.push(hash);
                count >>= 1;
            }
            size += 1;
        }
        if size == start {
            return Ok(start..start);
        }
        writer.finish()?;
        let head = TreeHead {
            tree_size: size,
            root_hash: merkle::fold_frontier(&frontier).expect("a non-empty tree"),
            time,
        };
        let mut signed = sign_tree_head(head, keys);
        if let Some(outside) = outside {
            let mut signatures = signed.signatures().to_vec();
            signatures.extend(outside(&head)?);
            signed = SignedTreeHead::new(head, signatures);
        }
        self.commit(&signed)?;
        self.reload()?;
        Ok(start..size)
    }

    /// Publishes a new tree head: written and synced aside, renamed over the old one, the
    /// directory synced; then logged. A crash before the rename leaves the old head; a crash
    /// after it but before logging is repaired by the next append.
    fn commit(&self, signed: &SignedTreeHead) -> Result<()> {
        let mut line = signed.to_json();
        line.push(b'\n');
        let temp = self.dir.join(TREE_HEAD_TEMP);
        let mut file =
            File::create(&temp).with_context(|| format!("cannot create {}", temp.display()))?;
        file.write_all(&line)
            .and_then(|()| file.sync_all())
            .with_context(|| format!("cannot write {}", temp.display()))?;
        fs::rename(&temp, self.dir.join(TREE_HEAD))
            .with_context(|| format!("cannot rename {} into place", temp.display()))?;
        sync_dir(&self.dir)?;
        self.log_head(&line)
    }

    fn log_head(&self, line: &[u8]) -> Result<()> {
        let path = self.dir.join(TREE_HEADS);
        let mut log = OpenOptions::new()
            .append(true)
            .open(&path)
            .with_context(|| format!("cannot open {}", path.display()))?;
        log.write_all(line)
            .and_then(|()| log.sync_data())
            .with_context(|| format!("cannot append to {}", path.display()))
    }

    /// Cuts every file back to what the current tree head covers and makes sure the head log
    /// ends with the current head. Only called under the lock.
    fn truncate_uncommitted(&self) -> Result<()> {
        let size = self.size();
        truncate_to(&self.dir.join(OFFSETS), size * OFFSET_BYTES)?;
        truncate_to(&self.dir.join(ENTRIES), self.committed_entries_len()?)?;
        for level in 0..64 {
            let path = self.dir.join(HASHES).join(level_file(level));
            if path.exists() {
                truncate_to(&path, (size >> level) * HASH_BYTES)?;
            }
        }
        self.repair_head_log()
    }

    fn repair_head_log(&self) -> Result<()> {
        let path = self.dir.join(TREE_HEADS);
        let log = open_read(&path)?;
        let len = file_len(&log, &path)?;
        // A logged line is at most a signed tree head and its newline.
        let window = len.min(merkle::MAX_SIGNED_TREE_HEAD_BYTES as u64 * 2 + 2);
        let mut tail = vec![0u8; window as usize];
        log.read_exact_at(&mut tail, len - window)
            .with_context(|| format!("cannot read {}", path.display()))?;
        // A torn last line (no newline yet) was never a committed part of the log.
        let complete = match tail.iter().rposition(|&b| b == b'\n') {
            Some(end) => end + 1,
            None if window == len => 0,
            None => bail!("{} ends with an overlong line", path.display()),
        };
        if (complete as u64) < window {
            truncate_to(&path, len - window + complete as u64)?;
        }
        let tail = &tail[..complete];
        let last = match tail[..tail.len().saturating_sub(1)]
            .iter()
            .rposition(|&b| b == b'\n')
        {
            Some(start) => &tail[start + 1..],
            None if window == len => tail,
            None => bail!("{} ends with an overlong line", path.display()),
        };
        let Some(current) = &self.head else {
            ensure!(
                last.is_empty(),
                "{} holds tree heads, but the ledger has no {TREE_HEAD}",
                path.display()
            );
            return Ok(());
        };
        let mut line = current.to_json();
        line.push(b'\n');
        if last == line.as_slice() {
            return Ok(());
        }
        if !last.is_empty() {
            let logged = SignedTreeHead::from_json(last)
                .with_context(|| format!("the last line of {} is damaged", path.display()))?;
            ensure!(
                logged.head().tree_size < current.head().tree_size,
                "{} ends with a tree head of size {}, but {TREE_HEAD} has size {}",
                path.display(),
                logged.head().tree_size,
                current.head().tree_size
            );
        }
        self.log_head(&line)
    }

    /// The complete subtrees of the current tree's binary decomposition, largest first.
    fn frontier(&self) -> Result<Vec<Digest>> {
        let size = self.size();
        let stored = self.stored();
        let mut frontier = Vec::with_capacity(64);
        let mut start = 0;
        for level in (0..64).rev() {
            if size & (1 << level) != 0 {
                frontier.push(
                    stored
                        .node(level, start >> level)
                        .context("cannot read the ledger's stored hashes")?,
                );
                start += 1 << level;
            }
        }
        Ok(frontier)
    }

    fn stored(&self) -> StoredNodes<'_> {
        StoredNodes {
            levels: &self.levels,
            size: self.size(),
        }
    }

    fn offset_after(&self, index: u64) -> Result<u64> {
        let mut bytes = [0u8; OFFSET_BYTES as usize];
        self.offsets
            .read_exact_at(&mut bytes, index * OFFSET_BYTES)
            .with_context(|| format!("cannot read the offset of entry {index} in {OFFSETS}"))?;
        Ok(u64::from_be_bytes(bytes))
    }

    fn committed_entries_len(&self) -> Result<u64> {
        match self.size() {
            0 => Ok(0),
            size => self.offset_after(size - 1),
        }
    }

    fn check_index(&self, index: u64) -> Result<()> {
        ensure!(
            index < self.size(),
            "entry {index} is not in the ledger, which has {}",
            count(self.size(), "entry", "entries")
        );
        Ok(())
    }

    /// The stored bytes of entry `index`.
    pub fn entry(&self, index: u64) -> Result<Vec<u8>> {
        self.check_index(index)?;
        let start = match index {
            0 => 0,
            _ => self.offset_after(index - 1)?,
        };
        let end = self.offset_after(index)?;
        let len = end
            .checked_sub(start + 1)
            .filter(|&len| len <= MAX_ENTRY_BYTES as u64)
            .with_context(|| {
                format!("{OFFSETS} is damaged: entry {index} spans bytes {start} to {end}")
            })?;
        let mut bytes = vec![0u8; len as usize + 1];
        self.entries
            .read_exact_at(&mut bytes, start)
            .with_context(|| format!("cannot read entry {index} from {ENTRIES}"))?;
        ensure!(
            bytes.pop() == Some(b'\n'),
            "{ENTRIES} is damaged: entry {index} does not end with a newline"
        );
        Ok(bytes)
    }

    /// The stored leaf hash of entry `index`.
    pub fn leaf_hash(&self, index: u64) -> Result<Digest> {
        self.check_index(index)?;
        Ok(self.stored().node(0, index)?)
    }

    /// The root of the tree of the first `tree_size` entries.
    pub fn root_at(&self, tree_size: u64) -> Result<Digest> {
        Ok(merkle::tree_root(&self.stored(), tree_size)?)
    }

    /// The proof that entry `index` is in the tree of the first `tree_size` entries.
    pub fn inclusion_proof(&self, index: u64, tree_size: u64) -> Result<InclusionProof> {
        Ok(InclusionProof {
            leaf_index: index,
            tree_size,
            hashes: merkle::inclusion_proof(&self.stored(), index, tree_size)?,
        })
    }

    /// The proof that the tree of the first `old_size` entries is a prefix of the tree of the
    /// first `new_size`.
    pub fn consistency_proof(&self, old_size: u64, new_size: u64) -> Result<ConsistencyProof> {
        Ok(ConsistencyProof {
            old_size,
            new_size,
            hashes: merkle::consistency_proof(&self.stored(), old_size, new_size)?,
        })
    }

    /// The latest logged tree head smaller than the current one: the head the last append
    /// started from. Reads only the end of the head log.
    pub fn previous_head(&self) -> Result<Option<SignedTreeHead>> {
        let size = self.size();
        let path = self.dir.join(TREE_HEADS);
        let log = open_read(&path)?;
        let len = file_len(&log, &path)?;
        // The current head, possibly not logged yet, and the one before it, each with a newline.
        let window = len.min(merkle::MAX_SIGNED_TREE_HEAD_BYTES as u64 * 3 + 3);
        let mut tail = vec![0u8; window as usize];
        log.read_exact_at(&mut tail, len - window)
            .with_context(|| format!("cannot read {}", path.display()))?;
        let mut lines: Vec<&[u8]> = tail.split(|&b| b == b'\n').collect();
        // A torn last line was never committed, and a cut first line is not whole.
        lines.pop();
        if window < len && !lines.is_empty() {
            lines.remove(0);
        }
        for line in lines.into_iter().rev().filter(|l| !l.is_empty()) {
            let head = SignedTreeHead::from_json(line)
                .with_context(|| format!("{} holds a damaged tree head", path.display()))?;
            if head.head().tree_size < size {
                return Ok(Some(head));
            }
        }
        Ok(None)
    }

    /// The latest entry, searching back from the newest, for which `wanted` holds.
    pub fn find_last(&self, wanted: impl Fn(&Entry) -> bool) -> Result<Option<(u64, Vec<u8>)>> {
        for index in (0..self.size()).rev() {
            let bytes = self.entry(index)?;
            // Entries this tool did not write are never what a search is after.
            if let Ok(entry) = Entry::from_bytes(&bytes)
                && wanted(&entry)
            {
                return Ok(Some((index, bytes)));
            }
        }
        Ok(None)
    }

    /// Every committed entry in order, read as a stream.
    pub fn entries(&self) -> Result<Entries> {
        let path = self.dir.join(ENTRIES);
        Ok(Entries {
            reader: BufReader::with_capacity(BUFFER_BYTES, open_read(&path)?),
            next: 0,
            size: self.size(),
            line: Vec::new(),
        })
    }

    /// Recomputes every hash from the entries and compares it with the stored ones, checks each
    /// logged tree head's signature and that its root matches the entries it covers, and that
    /// the log holds no head beyond or beside the current one. Memory use does not grow with
    /// the ledger.
    pub fn check(&self, trusted: &TrustedKeys) -> Result<CheckReport> {
        let size = self.size();
        if let Some(head) = &self.head {
            head.verify(trusted, 1)
                .with_context(|| format!("{TREE_HEAD} is not validly signed"))?;
        }
        let dir = &self.dir;
        let mut entries = Entries {
            reader: BufReader::with_capacity(BUFFER_BYTES, open_read(&dir.join(ENTRIES))?),
            next: 0,
            size,
            line: Vec::with_capacity(1024),
        };
        let mut offsets = BufReader::with_capacity(BUFFER_BYTES, open_read(&dir.join(OFFSETS))?);
        let mut levels = Vec::new();
        for level in 0..level_count(size) {
            let path = dir.join(HASHES).join(level_file(level));
            levels.push(BufReader::with_capacity(BUFFER_BYTES, open_read(&path)?));
        }
        let mut heads = HeadLog::open(&dir.join(TREE_HEADS), trusted)?;
        let mut frontier: Vec<Digest> = Vec::with_capacity(64);
        let mut position = 0u64;
        let mut last_logged: Option<SignedTreeHead> = None;
        for index in 0..size {
            let line = entries.next_line()?;
            position += line.len() as u64 + 1;
            let mut stored_end = [0u8; OFFSET_BYTES as usize];
            offsets
                .read_exact(&mut stored_end)
                .with_context(|| format!("cannot read {OFFSETS} at entry {index}"))?;
            let stored_end = u64::from_be_bytes(stored_end);
            ensure!(
                stored_end == position,
                "entry {index} ends at byte {position} of {ENTRIES}, but {OFFSETS} says {stored_end}"
            );
            let mut hash = merkle::leaf_hash(line);
            compare_stored(&mut levels[0], 0, index, &hash)?;
            frontier.push(hash);
            let (mut count, mut level) = (index + 1, 0usize);
            while count & 1 == 0 {
                let right = frontier.pop().expect("a merge has two subtrees");
                let left = frontier.pop().expect("a merge has two subtrees");
                hash = merkle::node_hash(&left, &right);
                level += 1;
                let node = ((index + 1) >> level) - 1;
                compare_stored(&mut levels[level], level, node, &hash)?;
                frontier.push(hash);
                count >>= 1;
            }
            while let Some(logged) = heads.next_at(index + 1)? {
                let root = merkle::fold_frontier(&frontier).expect("a non-empty tree");
                ensure!(
                    logged.head().root_hash == root,
                    "logged tree head of size {} has root {}, but the entries hash to {root}",
                    index + 1,
                    logged.head().root_hash
                );
                last_logged = Some(logged);
            }
        }
        heads.finish(size)?;
        let root_hash = merkle::fold_frontier(&frontier).unwrap_or_else(merkle::empty_root);
        if let Some(head) = &self.head {
            ensure!(
                head.head().root_hash == root_hash,
                "{TREE_HEAD} has root {}, but the entries hash to {root_hash}",
                head.head().root_hash
            );
        }
        let head_logged = match (&self.head, &last_logged) {
            (None, _) => true,
            (Some(head), Some(logged)) if logged == head => true,
            // A crash between publishing a head and logging it; the next append logs it.
            (Some(_), None) => false,
            (Some(_), Some(logged)) if logged.head().tree_size < size => false,
            (Some(_), Some(_)) => {
                bail!("{TREE_HEAD} differs from the tree head of the same size in {TREE_HEADS}")
            }
        };
        let mut uncommitted = heads.torn;
        let mut count_extra = |name: &Path, committed: u64| -> Result<()> {
            let len = file_len(&open_read(name)?, name)?;
            uncommitted += len.saturating_sub(committed);
            Ok(())
        };
        count_extra(&dir.join(ENTRIES), position)?;
        count_extra(&dir.join(OFFSETS), size * OFFSET_BYTES)?;
        for level in 0..64 {
            let path = dir.join(HASHES).join(level_file(level));
            if path.exists() {
                count_extra(&path, (size >> level) * HASH_BYTES)?;
            }
        }
        Ok(CheckReport {
            tree_size: size,
            root_hash,
            heads_checked: heads.checked,
            head_logged,
            uncommitted_bytes: uncommitted,
        })
    }
}

/// The ledger's stored hashes as a [`NodeSource`], limited to the committed tree.
struct StoredNodes<'a> {
    levels: &'a [File],
    size: u64,
}

impl NodeSource for StoredNodes<'_> {
    fn leaf_count(&self) -> u64 {
        self.size
    }

    fn node(&self, level: u32, index: u64) -> std::io::Result<Digest> {
        let file = self.levels.get(level as usize).ok_or_else(|| {
            std::io::Error::new(
                std::io::ErrorKind::NotFound,
                format!("no hash file for level {level}"),
            )
        })?;
        let mut bytes = [0u8; Digest::LEN];
        file.read_exact_at(&mut bytes, index * HASH_BYTES)?;
        Ok(Digest::from_bytes(bytes))
    }
}

/// A stream of the committed entries, from the first.
pub struct Entries {
    reader: BufReader<File>,
    next: u64,
    size: u64,
    line: Vec<u8>,
}

impl Entries {
    fn next_line(&mut self) -> Result<&[u8]> {
        let index = self.next;
        self.line.clear();
        (&mut self.reader)
            .take(MAX_ENTRY_BYTES as u64 + 1)
            .read_until(b'\n', &mut self.line)
            .with_context(|| format!("cannot read entry {index} from {ENTRIES}"))?;
        ensure!(
            self.line.pop() == Some(b'\n'),
            "entry {index} in {ENTRIES} is cut short or longer than {MAX_ENTRY_BYTES} bytes"
        );
        self.next += 1;
        Ok(&self.line)
    }
}

impl Iterator for Entries {
    type Item = Result<(u64, Vec<u8>)>;

    fn next(&mut self) -> Option<Self::Item> {
        if self.next == self.size {
            return None;
        }
        let index = self.next;
        Some(self.next_line().map(|line| (index, line.to_vec())))
    }
}

/// The head log read as a stream, each head verified as it is reached.
struct HeadLog<'a> {
    reader: BufReader<File>,
    trusted: &'a TrustedKeys,
    pending: Option<SignedTreeHead>,
    previous: Option<TreeHead>,
    checked: u64,
    torn: u64,
    line: Vec<u8>,
}

impl<'a> HeadLog<'a> {
    fn open(path: &Path, trusted: &'a TrustedKeys) -> Result<Self> {
        let mut log = HeadLog {
            reader: BufReader::with_capacity(BUFFER_BYTES, open_read(path)?),
            trusted,
            pending: None,
            previous: None,
            checked: 0,
            torn: 0,
            line: Vec::new(),
        };
        log.pending = log.read()?;
        Ok(log)
    }

    fn read(&mut self) -> Result<Option<SignedTreeHead>> {
        self.line.clear();
        let number = self.checked + 1;
        (&mut self.reader)
            .take(merkle::MAX_SIGNED_TREE_HEAD_BYTES as u64 + 1)
            .read_until(b'\n', &mut self.line)
            .with_context(|| format!("cannot read {TREE_HEADS}"))?;
        if self.line.last() != Some(&b'\n') {
            // Without a newline the line is either overlong or a torn append at the end,
            // which was never a committed part of the log.
            ensure!(
                self.line.len() <= merkle::MAX_SIGNED_TREE_HEAD_BYTES,
                "line {number} of {TREE_HEADS} is longer than a signed tree head can be"
            );
            self.torn = self.line.len() as u64;
            return Ok(None);
        }
        self.line.pop();
        let signed = SignedTreeHead::from_json(&self.line)
            .with_context(|| format!("line {number} of {TREE_HEADS} is not a signed tree head"))?;
        let head = signed.head();
        signed.verify(self.trusted, 1).with_context(|| {
            format!(
                "line {number} of {TREE_HEADS} (tree size {}) is not validly signed",
                head.tree_size
            )
        })?;
        if let Some(previous) = self.previous {
            ensure!(
                head.tree_size > previous.tree_size,
                "line {number} of {TREE_HEADS} has tree size {}, not above the previous {}",
                head.tree_size,
                previous.tree_size
            );
            ensure!(
                head.time >= previous.time,
                "line {number} of {TREE_HEADS} has time {}, before the previous {}",
                head.time,
                previous.time
            );
        } else {
            ensure!(head.tree_size > 0, "line 1 of {TREE_HEADS} has tree size 0");
        }
        self.previous = Some(head);
        self.checked += 1;
        Ok(Some(signed))
    }

    /// The next logged head if it covers exactly `size` entries.
    fn next_at(&mut self, size: u64) -> Result<Option<SignedTreeHead>> {
        match &self.pending {
            Some(head) if head.head().tree_size == size => {
                let head = self.pending.take();
                self.pending = self.read()?;
                Ok(head)
            }
            _ => Ok(None),
        }
    }

    fn finish(&self, size: u64) -> Result<()> {
        if let Some(head) = &self.pending {
            bail!(
                "{TREE_HEADS} holds a tree head of size {}, but the ledger has {}",
                head.head().tree_size,
                count(size, "entry", "entries")
            );
        }
        Ok(())
    }
}

/// Buffered writers for one append; nothing is visible to readers until the new head.
struct Appender {
    dir: PathBuf,
    entries: BufWriter<File>,
    offsets: BufWriter<File>,
    /// Opened when first written, so an append syncs only the files it changed.
    levels: Vec<Option<BufWriter<File>>>,
    position: u64,
    created: bool,
}

impl Appender {
    fn new(dir: &Path, position: u64) -> Result<Self> {
        let mut created = false;
        let mut open = |name: &str| -> Result<BufWriter<File>> {
            let file = open_append(&dir.join(name), &mut created)?;
            Ok(BufWriter::with_capacity(BUFFER_BYTES, file))
        };
        let (entries, offsets) = (open(ENTRIES)?, open(OFFSETS)?);
        Ok(Appender {
            dir: dir.to_path_buf(),
            entries,
            offsets,
            levels: Vec::new(),
            position,
            created,
        })
    }

    fn entry(&mut self, entry: &[u8]) -> Result<()> {
        self.position += entry.len() as u64 + 1;
        self.entries
            .write_all(entry)
            .and_then(|()| self.entries.write_all(b"\n"))
            .and_then(|()| self.offsets.write_all(&self.position.to_be_bytes()))
            .with_context(|| format!("cannot append to {ENTRIES}"))
    }

    fn node(&mut self, level: usize, hash: &Digest) -> Result<()> {
        if self.levels.len() <= level {
            self.levels.resize_with(level + 1, || None);
        }
        let name = level_file(level as u32);
        let writer = match &mut self.levels[level] {
            Some(writer) => writer,
            slot => {
                let file = open_append(&self.dir.join(HASHES).join(&name), &mut self.created)?;
                slot.insert(BufWriter::with_capacity(BUFFER_BYTES, file))
            }
        };
        writer
            .write_all(hash.as_bytes())
            .with_context(|| format!("cannot append to {HASHES}/{name}"))
    }

    /// Flushes and syncs everything written, so the head that follows never names lost data.
    fn finish(self) -> Result<()> {
        let writers = [self.entries, self.offsets]
            .into_iter()
            .chain(self.levels.into_iter().flatten());
        for writer in writers {
            let file = writer
                .into_inner()
                .map_err(|e| e.into_error())
                .context("cannot write the ledger")?;
            file.sync_data().context("cannot sync the ledger")?;
        }
        if self.created {
            sync_dir(&self.dir.join(HASHES))?;
        }
        Ok(())
    }
}

/// Signatures over a new tree head made outside this process, added before it is committed.
pub type OutsideSignatures<'a> = &'a dyn Fn(&TreeHead) -> Result<Vec<TreeHeadSignature>>;

/// The keys that sign a tree head: at least one, none twice.
pub fn check_signing_keys(keys: &[&SigningKey]) -> Result<()> {
    ensure!(
        !keys.is_empty(),
        "a tree head needs at least one signing key"
    );
    let ids: Vec<KeyId> = keys.iter().map(|k| key_id(k)).collect();
    for (i, id) in ids.iter().enumerate() {
        ensure!(!ids[..i].contains(id), "signing key {id} is given twice");
    }
    Ok(())
}

/// An entry the ledger can store as entry `index`: bounded, one line of UTF-8.
pub fn check_entry(index: u64, entry: &[u8]) -> Result<()> {
    ensure!(
        entry.len() <= MAX_ENTRY_BYTES,
        "entry {index} is {} bytes, more than the limit of {MAX_ENTRY_BYTES}",
        entry.len()
    );
    ensure!(
        !entry.contains(&b'\n'),
        "entry {index} contains a newline; entries are stored one per line"
    );
    ensure!(
        std::str::from_utf8(entry).is_ok(),
        "entry {index} is not UTF-8 text"
    );
    Ok(())
}

/// Signs `head` with every key: Ed25519 over the tree-head context and the head's document.
pub fn sign_tree_head(head: TreeHead, keys: &[&SigningKey]) -> SignedTreeHead {
    let bytes = format::signed_bytes(format::context::TREE_HEAD, &head.signed_document());
    let signatures = keys
        .iter()
        .map(|key| TreeHeadSignature {
            key_id: key_id(key),
            signature: key.sign(&bytes).to_bytes(),
        })
        .collect();
    SignedTreeHead::new(head, signatures)
}

fn key_id(key: &SigningKey) -> KeyId {
    KeyId::of_raw_key(key.verifying_key().as_bytes())
}

fn read_tree_head(dir: &Path) -> Result<Option<SignedTreeHead>> {
    let path = dir.join(TREE_HEAD);
    let file = match File::open(&path) {
        Ok(file) => file,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(e).with_context(|| format!("cannot open {}", path.display())),
    };
    let mut json = Vec::new();
    file.take(merkle::MAX_SIGNED_TREE_HEAD_BYTES as u64 + 2)
        .read_to_end(&mut json)
        .with_context(|| format!("cannot read {}", path.display()))?;
    if json.last() == Some(&b'\n') {
        json.pop();
    }
    let head = SignedTreeHead::from_json(&json)
        .with_context(|| format!("{} is damaged", path.display()))?;
    Ok(Some(head))
}

fn compare_stored(
    reader: &mut BufReader<File>,
    level: usize,
    index: u64,
    computed: &Digest,
) -> Result<()> {
    let mut bytes = [0u8; Digest::LEN];
    reader.read_exact(&mut bytes).with_context(|| {
        format!(
            "cannot read {HASHES}/{} at index {index}",
            level_file(level as u32)
        )
    })?;
    let stored = Digest::from_bytes(bytes);
    ensure!(
        stored == *computed,
        "stored hash at level {level}, index {index} is {stored}, but the entries give {computed}"
    );
    Ok(())
}

fn open_read(path: &Path) -> Result<File> {
    File::open(path).with_context(|| format!("cannot open {}", path.display()))
}

fn open_append(path: &Path, created: &mut bool) -> Result<File> {
    *created |= !path.exists();
    OpenOptions::new()
        .create(true)
        .append(true)
        .open(path)
        .with_context(|| format!("cannot open {} for appending", path.display()))
}

fn file_len(file: &File, path: &Path) -> Result<u64> {
    Ok(file
        .metadata()
        .with_context(|| format!("cannot read the size of {}", path.display()))?
        .len())
}

fn ensure_len(file: &File, path: &Path, needed: u64, size: u64) -> Result<()> {
    let len = file_len(file, path)?;
    ensure!(
        len >= needed,
        "the ledger is damaged: {} holds {len} bytes, but the tree head of size {size} needs {needed}",
        path.display()
    );
    Ok(())
}

fn truncate_to(path: &Path, len: u64) -> Result<()> {
    let file = OpenOptions::new()
        .write(true)
        .open(path)
        .with_context(|| format!("cannot open {} for writing", path.display()))?;
    let current = file_len(&file, path)?;
    ensure!(
        current >= len,
        "the ledger is damaged: {} holds {current} bytes, {len} expected",
        path.display()
    );
    if current > len {
        file.set_len(len)
            .and_then(|()| file.sync_all())
            .with_context(|| format!("cannot truncate {}", path.display()))?;
    }
    Ok(())
}

fn sync_dir(dir: &Path) -> Result<()> {
    File::open(dir)
        .and_then(|d| d.sync_all())
        .with_context(|| format!("cannot sync directory {}", dir.display()))
}

#[cfg(test)]
mod tests {
    use super::*;
    use ampoule_verify::PublicKey;
    use ampoule_verify::merkle::MemoryTree;
    use serde::Deserialize;
    use std::process::Command;
    use std::time::{Duration, Instant};

    /// Values published with transparency-dev/merkle and the Certificate Transparency test
    /// suites, RFC 6962 section 2.1 hashing (sources named inside the file).
    const RFC6962: &str = include_str!("../../crates/verify/tests/data/merkle-rfc6962.json");

    #[derive(Deserialize)]
    struct Vectors {
        leaf_inputs_hex: Vec<String>,
        root_hash_by_tree_size: Vec<Digest>,
        inclusion_proofs: Vec<Inclusion>,
        consistency_proofs: Vec<Consistency>,
    }

    #[derive(Deserialize)]
    struct Inclusion {
        leaf_index: u64,
        tree_size: u64,
        path: Vec<Digest>,
    }

    #[derive(Deserialize)]
    struct Consistency {
        size1: u64,
        size2: u64,
        proof: Vec<Digest>,
    }

    fn key(seed: u8) -> SigningKey {
        SigningKey::from_bytes(&[seed; 32])
    }

    fn trusted(keys: &[&SigningKey]) -> TrustedKeys {
        keys.iter()
            .map(|k| PublicKey::from_verifying_key(&k.verifying_key()).expect("strong test key"))
            .collect()
    }

    fn sample_entry(i: u64) -> Entry {
        let animals = [
            "fox",
            "roe-deer",
            "wild-boar",
            "badger",
            "hare",
            "empty-frame",
        ];
        Entry {
            // Legacy entries: these tests are about storage, not the entry format.
            format: ampoule_verify::ledger::LEGACY_ENTRY_FORMAT,
            offered: None,
            event: if i % 7 == 6 {
                Event::Withdraw
            } else {
                Event::Publish
            },
            channel: if i.is_multiple_of(2) {
                "stable"
            } else {
                "beta"
            }
            .to_string(),
            bundle: format!("trailcam-{}", animals[(i % 6) as usize]),
            version: semver::Version::new(1, i / 10, i % 10),
            bundle_digest: Digest::of(&i.to_be_bytes()),
            manifest_digest: Digest::of(&(!i).to_be_bytes()),
            key_ids: vec![key_id(&key(1))],
            time: 1_767_225_600 + i * 60,
            feed_sequence: i + 1,
        }
    }

    fn filled(dir: &Path, count: u64) -> Ledger {
        let mut ledger = Ledger::create(dir).expect("create");
        let k = key(1);
        for i in 0..count {
            ledger
                .append_entry(&sample_entry(i), &[&k], 1_767_225_600 + i)
                .expect("append");
        }
        ledger
    }

    fn memory_tree(ledger: &Ledger) -> MemoryTree {
        ledger
            .entries()
            .expect("entries")
            .map(|e| merkle::leaf_hash(&e.expect("entry").1))
            .collect()
    }

    #[test]
    fn published_rfc6962_leaves_give_the_published_roots_and_proofs() {
        let v: Vectors = serde_json::from_str(RFC6962).expect("vectors parse");
        let dir = tempfile::tempdir().expect("tempdir");
        let mut ledger = Ledger::create(dir.path()).expect("create");
        let k = key(1);
        assert_eq!(
            ledger.root_at(0).expect("root"),
            v.root_hash_by_tree_size[0]
        );
        for (i, input) in v.leaf_inputs_hex.iter().enumerate() {
            let data = hex::decode(input).expect("hex");
            assert_eq!(ledger.append(&data, &[&k], 10).expect("append"), i as u64);
            let head = ledger.tree_head().expect("a head").head();
            assert_eq!(head.tree_size, i as u64 + 1);
            assert_eq!(
                head.root_hash,
                v.root_hash_by_tree_size[i + 1],
                "size {}",
                i + 1
            );
        }
        let reopened = Ledger::open(dir.path()).expect("open");
        for case in &v.inclusion_proofs {
            let proof = reopened
                .inclusion_proof(case.leaf_index, case.tree_size)
                .expect("proof");
            assert_eq!(proof.hashes, case.path);
        }
        for case in &v.consistency_proofs {
            let proof = reopened
                .consistency_proof(case.size1, case.size2)
                .expect("proof");
            assert_eq!(proof.hashes, case.proof);
        }
        let report = reopened.check(&trusted(&[&k])).expect("check");
        assert_eq!(report.root_hash, v.root_hash_by_tree_size[8]);
        assert_eq!(report.heads_checked, 8);
    }

    #[test]
    fn proofs_match_a_memory_tree_and_verify_against_signed_heads() {
        let dir = tempfile::tempdir().expect("tempdir");
        let mut ledger = Ledger::create(dir.path()).expect("create");
        let (k1, k2) = (key(1), key(2));
        let keys = trusted(&[&k1, &k2]);
        let mut heads = Vec::new();
        let mut next = 0u64;
        for batch in [1u64, 2, 5, 1, 13, 8, 1, 32, 3, 34] {
            let entries: Vec<Vec<u8>> = (next..next + batch)
                .map(|i| sample_entry(i).to_bytes())
                .collect();
            let range = ledger
                .append_batch(&entries, &[&k1, &k2], 100 + next)
                .expect("append");
            assert_eq!(range, next..next + batch);
            next += batch;
            let signed = ledger.tree_head().expect("head");
            let verified = signed.verify(&keys, 2).expect("both keys signed");
            heads.push(*verified.head());
        }
        let memory = memory_tree(&ledger);
        for head in &heads {
            assert_eq!(
                ledger.root_at(head.tree_size).expect("root"),
                head.root_hash
            );
            for index in (0..head.tree_size).step_by(7) {
                let proof = ledger
                    .inclusion_proof(index, head.tree_size)
                    .expect("proof");
                assert_eq!(
                    proof.hashes,
                    merkle::inclusion_proof(&memory, index, head.tree_size).expect("memory")
                );
                let leaf = ledger.leaf_hash(index).expect("leaf");
                assert_eq!(
                    leaf,
                    merkle::leaf_hash(&ledger.entry(index).expect("entry"))
                );
                proof.verify(&leaf, head).expect("inclusion verifies");
            }
            for old in &heads {
                if old.tree_size <= head.tree_size {
                    let proof = ledger
                        .consistency_proof(old.tree_size, head.tree_size)
                        .expect("proof");
                    proof.verify(old, head).expect("consistency verifies");
                }
            }
        }
        let report = ledger.check(&keys).expect("check");
        assert_eq!(
            report,
            CheckReport {
                tree_size: 100,
                root_hash: memory.root(),
                heads_checked: 10,
                head_logged: true,
                uncommitted_bytes: 0
            }
        );
        let err = ledger.inclusion_proof(100, 100).expect_err("past the end");
        assert_eq!(err.to_string(), "leaf index 100 is not below tree size 100");
        let err = ledger.consistency_proof(1, 101).expect_err("past the end");
        assert_eq!(
            err.to_string(),
            "tree size 101 is larger than the 100 leaves stored"
        );
    }

    #[test]
    fn torn_writes_beyond_the_tree_head_are_ignored_then_truncated() {
        let dir = tempfile::tempdir().expect("tempdir");
        let ledger = filled(dir.path(), 11);
        let before = ledger.tree_head().cloned().expect("head");
        // What a crash halfway through an append leaves: data past the head, and a new head
        // written aside but never renamed into place.
        let mut torn_bytes = 0;
        let mut torn = |name: &str, bytes: &[u8]| {
            let mut f = OpenOptions::new()
                .append(true)
                .open(dir.path().join(name))
                .expect("open");
            f.write_all(bytes).expect("write");
            torn_bytes += bytes.len() as u64;
        };
        torn(ENTRIES, b"{\"event\":\"publish\",\"chan");
        torn(OFFSETS, &[0, 0, 0]);
        torn("hashes/level-00.bin", &[7; 45]);
        torn("hashes/level-03.bin", &[7; 32]);
        torn(TREE_HEADS, b"{\"tree_size\":12,\"root");
        fs::write(dir.path().join(TREE_HEAD_TEMP), b"{\"tree_size\":12").expect("write");
        fs::write(dir.path().join("hashes/level-04.bin"), [9; 32]).expect("write");

        let k = key(1);
        let mut reopened = Ledger::open(dir.path()).expect("open");
        assert_eq!(reopened.tree_head(), Some(&before));
        assert_eq!(
            Entry::from_bytes(&reopened.entry(10).expect("entry")).expect("parse"),
            sample_entry(10)
        );
        let report = reopened.check(&trusted(&[&k])).expect("check");
        assert_eq!(report.tree_size, 11);
        // The new level file's 32 bytes count too; the unrenamed head is not ledger data.
        assert_eq!(report.uncommitted_bytes, torn_bytes + 32);

        reopened
            .append_entry(&sample_entry(11), &[&k], 1_767_230_000)
            .expect("append after the crash");
        let report = reopened.check(&trusted(&[&k])).expect("check");
        assert_eq!(report.tree_size, 12);
        assert_eq!(report.uncommitted_bytes, 0);
        assert_eq!(report.heads_checked, 12);
        assert_eq!(report.root_hash, memory_tree(&reopened).root());
    }

    #[test]
    fn a_head_renamed_but_not_logged_is_logged_by_the_next_append() {
        let dir = tempfile::tempdir().expect("tempdir");
        let k = key(1);
        let ledger = filled(dir.path(), 5);
        let log = fs::read(dir.path().join(TREE_HEADS)).expect("read");
        let cut = log[..log.len() - 1]
            .iter()
            .rposition(|&b| b == b'\n')
            .expect("several lines")
            + 1;
        fs::write(dir.path().join(TREE_HEADS), &log[..cut]).expect("write");
        let report = ledger.check(&trusted(&[&k])).expect("check");
        assert_eq!((report.heads_checked, report.head_logged), (4, false));
        let mut ledger = Ledger::open(dir.path()).expect("open");
        ledger
            .append_entry(&sample_entry(5), &[&k], 1_767_240_000)
            .expect("append");
        let report = ledger.check(&trusted(&[&k])).expect("check");
        assert_eq!((report.tree_size, report.heads_checked), (6, 6));
        assert!(report.head_logged);

        // A logged head of the current size that is not the current head is a rewrite.
        let other = sign_tree_head(ledger.tree_head().expect("head").head(), &[&key(2)]);
        let mut log = fs::read(dir.path().join(TREE_HEADS)).expect("read");
        let cut = log[..log.len() - 1]
            .iter()
            .rposition(|&b| b == b'\n')
            .expect("several lines")
            + 1;
        log.truncate(cut);
        log.extend_from_slice(&other.to_json());
        log.push(b'\n');
        fs::write(dir.path().join(TREE_HEADS), log).expect("write");
        let err = ledger
            .check(&trusted(&[&k, &key(2)]))
            .expect_err("two heads of one size");
        assert_eq!(
            err.to_string(),
            "tree-head.json differs from the tree head of the same size in tree-heads.jsonl"
        );
    }

    /// Not a test on its own: the child process of `a_killed_appender_leaves_a_signed_tree`,
    /// which appends until it is killed. Without the variable it does nothing.
    #[test]
    fn crash_helper_child_appends_until_killed() {
        let Some(dir) = std::env::var_os("AMPOULE_LEDGER_CRASH_DIR") else {
            return;
        };
        let dir = PathBuf::from(dir);
        let mut ledger = Ledger::open(&dir).expect("open");
        let k = key(1);
        let mut i = ledger.size();
        loop {
            let batch = 1 + i % 17;
            let entries: Vec<Vec<u8>> =
                (i..i + batch).map(|j| sample_entry(j).to_bytes()).collect();
            ledger
                .append_batch(&entries, &[&k], 1_767_225_600 + i)
                .expect("append");
            i += batch;
        }
    }

    #[test]
    fn a_killed_appender_leaves_a_signed_tree() {
        let dir = tempfile::tempdir().expect("tempdir");
        drop(Ledger::create(dir.path()).expect("create"));
        let k = key(1);
        let exe = std::env::current_exe().expect("test binary");
        let mut seen = 0;
        let mut seed = Instant::now().elapsed().subsec_nanos() as u64 | 1;
        for round in 0..5 {
            let mut child = Command::new(&exe)
                .args([
                    "--exact",
                    "release::ledger_storage::tests::crash_helper_child_appends_until_killed",
                    "--nocapture",
                ])
                .env("AMPOULE_LEDGER_CRASH_DIR", dir.path())
                .spawn()
                .expect("spawn the appender");
            // Let it commit a few heads, then kill it at an arbitrary point of an append.
            let deadline = Instant::now() + Duration::from_secs(20);
            while fs::metadata(dir.path().join(TREE_HEADS)).map_or(0, |m| m.len())
                < 2000 * (round + 1)
                && Instant::now() < deadline
            {
                std::thread::sleep(Duration::from_millis(2));
            }
            seed ^= seed << 13;
            seed ^= seed >> 7;
            seed ^= seed << 17;
            std::thread::sleep(Duration::from_micros(seed % 20_000));
            child.kill().expect("kill");
            child.wait().expect("reap");

            let mut ledger = Ledger::open(dir.path()).expect("open after the kill");
            assert!(ledger.size() >= seen, "the ledger shrank");
            let report = ledger.check(&trusted(&[&k])).expect("check after the kill");
            assert_eq!(report.root_hash, memory_tree(&ledger).root());
            let index = ledger
                .append_entry(
                    &sample_entry(ledger.size()),
                    &[&k],
                    1_767_225_600 + ledger.size(),
                )
                .expect("append after the kill");
            let report = ledger.check(&trusted(&[&k])).expect("check");
            assert_eq!((report.tree_size, report.uncommitted_bytes), (index + 1, 0));
            seen = ledger.size();
        }
        assert!(seen > 5);
    }

    #[test]
    fn concurrent_appends_are_serialized() {
        let dir = tempfile::tempdir().expect("tempdir");
        drop(Ledger::create(dir.path()).expect("create"));
        let threads: Vec<_> = (0..2u64)
            .map(|t| {
                let dir = dir.path().to_path_buf();
                std::thread::spawn(move || {
                    let mut ledger = Ledger::open(&dir).expect("open");
                    let k = key(1);
                    for i in 0..40 {
                        ledger
                            .append_entry(&sample_entry(t * 1000 + i), &[&k], 5)
                            .expect("append");
                    }
                })
            })
            .collect();
        for thread in threads {
            thread.join().expect("appender thread");
        }
        let ledger = Ledger::open(dir.path()).expect("open");
        let report = ledger.check(&trusted(&[&key(1)])).expect("check");
        assert_eq!((report.tree_size, report.heads_checked), (80, 80));
        let mut sequences: Vec<u64> = ledger
            .entries()
            .expect("entries")
            .map(|e| {
                Entry::from_bytes(&e.expect("entry").1)
                    .expect("parse")
                    .feed_sequence
            })
            .collect();
        sequences.sort_unstable();
        let mut expected: Vec<u64> = (0..40).chain(1000..1040).map(|i| i + 1).collect();
        expected.sort_unstable();
        assert_eq!(sequences, expected);
    }

    fn flip_byte(path: &Path, at: u64) {
        let mut bytes = fs::read(path).expect("read");
        bytes[at as usize] ^= 0x20;
        fs::write(path, bytes).expect("write");
    }

    #[test]
    fn check_finds_tampering_and_names_it() {
        let dir = tempfile::tempdir().expect("tempdir");
        let k = key(1);
        let keys = trusted(&[&k]);
        let ledger = filled(dir.path(), 20);
        let leaf3 = ledger.leaf_hash(3).expect("leaf");
        let start3 = ledger.offset_after(2).expect("offset");
        let entries = dir.path().join(ENTRIES);

        // A rewritten entry (same length) no longer matches its stored leaf hash.
        flip_byte(&entries, start3 + 12);
        let changed = merkle::leaf_hash(&ledger.entry(3).expect("entry"));
        let err = ledger.check(&keys).expect_err("rewritten entry");
        assert_eq!(
            err.to_string(),
            format!("stored hash at level 0, index 3 is {leaf3}, but the entries give {changed}")
        );
        flip_byte(&entries, start3 + 12);
        ledger.check(&keys).expect("restored");

        // A rewritten interior hash: level 2, index 1 covers entries 4..8.
        let level2 = dir.path().join(HASHES).join(level_file(2));
        flip_byte(&level2, 32);
        let err = ledger.check(&keys).expect_err("rewritten node");
        assert!(
            err.to_string()
                .starts_with("stored hash at level 2, index 1 is "),
            "{err}"
        );
        flip_byte(&level2, 32);

        // The same data checked against a key the ledger was never signed with.
        let err = ledger.check(&trusted(&[&key(2)])).expect_err("untrusted");
        assert_eq!(err.to_string(), "tree-head.json is not validly signed");
        assert!(
            format!("{err:#}").contains("has no valid signature by a trusted key"),
            "{err:#}"
        );

        // A rewritten root in the current head breaks its signature.
        let head_path = dir.path().join(TREE_HEAD);
        let text = fs::read_to_string(&head_path).expect("read");
        let root = ledger
            .tree_head()
            .expect("head")
            .head()
            .root_hash
            .to_string();
        let other = Digest::of(b"rewritten").to_string();
        fs::write(&head_path, text.replace(&root, &other)).expect("write");
        let reopened = Ledger::open(dir.path()).expect("open");
        let err = reopened.check(&keys).expect_err("rewritten head");
        assert!(
            format!("{err:#}").contains(
                "tree head of size 20 has no valid signature by a trusted key (not matching this document"
            ),
            "{err:#}"
        );
    }

    #[test]
    fn rewritten_history_fails_the_consistency_proof() {
        let k = key(1);
        let (a, b) = (
            tempfile::tempdir().expect("dir"),
            tempfile::tempdir().expect("dir"),
        );
        let honest = filled(a.path(), 12);
        let seen = *honest
            .tree_head()
            .expect("head")
            .verify(&trusted(&[&k]), 1)
            .expect("verified")
            .head();
        let mut forged = Ledger::create(b.path()).expect("create");
        for i in 0..20 {
            let mut entry = sample_entry(i);
            if i == 4 {
                entry.version = semver::Version::new(9, 9, 9);
            }
            forged.append_entry(&entry, &[&k], 1).expect("append");
        }
        let new = forged.tree_head().expect("head").head();
        let proof = forged.consistency_proof(12, 20).expect("proof");
        let err = proof
            .verify(&seen, &new)
            .expect_err("history was rewritten");
        assert!(
            err.to_string()
                .starts_with("consistency proof from tree size 12 (root "),
            "{err}"
        );
    }

    #[test]
    fn bad_entries_and_arguments_are_refused_and_change_nothing() {
        let dir = tempfile::tempdir().expect("tempdir");
        let mut ledger = filled(dir.path(), 3);
        let k = key(1);
        let before = ledger.tree_head().cloned();
        let big = vec![b'a'; MAX_ENTRY_BYTES + 1];
        let cases: [(&[u8], &str); 3] = [
            (
                b"{\"a\":1}\n{\"b\":2}",
                "entry 4 contains a newline; entries are stored one per line",
            ),
            (b"\xff\xfe", "entry 4 is not UTF-8 text"),
            (&big, "entry 4 is 65537 bytes, more than the limit of 65536"),
        ];
        for (entry, message) in cases {
            let err = ledger
                .append_batch([&b"{}"[..], entry], &[&k], 1_800_000_000)
                .expect_err(message);
            assert_eq!(err.to_string(), message);
            assert_eq!(ledger.tree_head(), before.as_ref());
        }
        let err = ledger.append(b"{}", &[&k], 5).expect_err("time backwards");
        assert_eq!(
            err.to_string(),
            "time 5 is before the current tree head's time 1767225602; check the clock"
        );
        let err = ledger
            .append(b"{}", &[], 1_800_000_000)
            .expect_err("no key");
        assert_eq!(
            err.to_string(),
            "a tree head needs at least one signing key"
        );
        let err = ledger
            .append(b"{}", &[&k, &k], 1_800_000_000)
            .expect_err("same key twice");
        assert_eq!(
            err.to_string(),
            format!("signing key {} is given twice", key_id(&k))
        );
        assert_eq!(
            ledger
                .append_batch(Vec::<Vec<u8>>::new(), &[&k], 1_800_000_000)
                .expect("empty"),
            3..3
        );
        let report = ledger.check(&trusted(&[&k])).expect("check");
        assert_eq!((report.tree_size, report.uncommitted_bytes), (3, 0));
        let err = ledger.entry(3).expect_err("past the end");
        assert_eq!(
            err.to_string(),
            "entry 3 is not in the ledger, which has 3 entries"
        );
    }

    #[test]
    fn opening_refuses_what_is_not_a_sound_ledger() {
        let dir = tempfile::tempdir().expect("tempdir");
        let err = Ledger::open(dir.path()).expect_err("empty dir");
        assert_eq!(
            err.to_string(),
            format!(
                "{} is not a ledger (it has no entries.jsonl); create one first",
                dir.path().display()
            )
        );
        drop(filled(dir.path(), 9));
        let err = Ledger::create(dir.path()).expect_err("exists");
        assert_eq!(
            err.to_string(),
            format!("{} already holds a ledger", dir.path().display())
        );
        let level1 = dir.path().join(HASHES).join(level_file(1));
        let bytes = fs::read(&level1).expect("read");
        fs::write(&level1, &bytes[..64]).expect("write");
        let err = Ledger::open(dir.path()).expect_err("short hash file");
        assert_eq!(
            err.to_string(),
            format!(
                "the ledger is damaged: {} holds 64 bytes, but the tree head of size 9 needs 128",
                level1.display()
            )
        );
    }

    #[test]
    fn entries_round_trip_and_refuse_unknown_and_duplicate_fields() {
        let entry = sample_entry(6);
        let bytes = entry.to_bytes();
        assert_eq!(Entry::from_bytes(&bytes).expect("parse"), entry);
        let text = String::from_utf8(bytes).expect("utf-8");
        assert!(text.starts_with("{\"event\":\"withdraw\",\"channel\":\"stable\""));
        let unknown = text.replacen('{', "{\"note\":1,", 1);
        let err = Entry::from_bytes(unknown.as_bytes()).expect_err("unknown field");
        assert!(
            format!("{err:#}").contains("unknown field `note`"),
            "{err:#}"
        );
        let duplicate = text.replacen('{', "{\"channel\":\"beta\",", 1);
        let err = Entry::from_bytes(duplicate.as_bytes()).expect_err("duplicate field");
        assert!(
            format!("{err:#}").contains("duplicate field `channel`"),
            "{err:#}"
        );
    }

    #[test]
    fn records_tell_trust_set_entries_from_bundle_entries() {
        use ampoule_verify::ledger::{Record, TrustSetEntry};
        let bundle = sample_entry(2);
        assert_eq!(
            Record::from_bytes(&bundle.to_bytes()).expect("parse"),
            Record::Bundle(bundle.clone())
        );
        let trust = TrustSetEntry {
            event: Event::TrustSet,
            trust_set_version: 7,
            trust_set_digest: Digest::of(b"a trust set"),
            key_ids: bundle.key_ids.clone(),
            time: 1_796_083_200,
        };
        let bytes = trust.to_bytes();
        assert_eq!(
            Record::from_bytes(&bytes).expect("parse"),
            Record::TrustSet(trust.clone())
        );
        let text = String::from_utf8(bytes).expect("utf-8");
        assert!(text.starts_with("{\"event\":\"trust_set\",\"trust_set_version\":7,"));
        // A second event field could make two readers see two kinds of entry.
        let twice = text.replacen('{', "{\"event\":\"publish\",", 1);
        let err = Record::from_bytes(twice.as_bytes()).expect_err("duplicate event");
        assert!(err.to_string().contains("duplicate field `event`"), "{err}");
        // Bundle fields under a trust_set event are neither kind.
        let mut disguised = bundle;
        disguised.event = Event::TrustSet;
        let err = Entry::from_bytes(&disguised.to_bytes()).expect_err("not a bundle entry");
        assert_eq!(
            err.to_string(),
            "ledger entry has event trust_set but the fields of a bundle entry"
        );
        let err = Record::from_bytes(&disguised.to_bytes()).expect_err("not a trust-set entry");
        assert!(
            err.to_string()
                .starts_with("ledger entry is not valid: unknown field `channel`"),
            "{err}"
        );
    }
}
