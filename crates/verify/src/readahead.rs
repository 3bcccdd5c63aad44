//! Reading a file on a thread of its own, ahead of whoever consumes it.
//!
//! Hashing the payload and decoding it are each bound to one core; the copy out of the page
//! cache (or the wait for the disk) need not be on the same one. Chunks travel through a
//! short bounded queue and come back for reuse, so memory stays at a few chunks.

use std::io::{self, BufRead, Read};
use std::sync::mpsc::{Receiver, Sender, SyncSender, channel, sync_channel};
use std::thread::Scope;

/// The size of each read.
const CHUNK: usize = 256 * 1024;
/// Chunks read ahead of the consumer.
const CHUNKS_IN_FLIGHT: usize = 4;

/// A buffered reader whose reads of the inner reader run on a scoped thread. Dropping it
/// stops that thread.
pub(crate) struct ReadAhead {
    chunks: Receiver<io::Result<Vec<u8>>>,
    spent: Sender<Vec<u8>>,
    current: Vec<u8>,
    pos: usize,
}

impl ReadAhead {
    /// Starts reading `inner` to its end on a thread of `scope`.
    pub(crate) fn spawn<'scope, R: Read + Send + 'scope>(
        scope: &'scope Scope<'scope, '_>,
        inner: R,
    ) -> Self {
        let (full, chunks) = sync_channel(CHUNKS_IN_FLIGHT);
        let (spent, reuse) = channel();
        scope.spawn(move || read_chunks(inner, &full, &reuse));
        ReadAhead {
            chunks,
            spent,
            current: Vec::new(),
            pos: 0,
        }
    }
}

/// Reads `reader` to its end in chunks, reusing spent buffers, and stops early when the
/// consumer has gone.
fn read_chunks<R: Read>(
    mut reader: R,
    full: &SyncSender<io::Result<Vec<u8>>>,
    reuse: &Receiver<Vec<u8>>,
) {
    loop {
        let mut buf = reuse.try_recv().unwrap_or_default();
        buf.resize(CHUNK, 0);
        let n = match reader.read(&mut buf) {
            Ok(0) => return,
            Ok(n) => n,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => continue,
            Err(e) => {
                let _ = full.send(Err(e));
                return;
            }
        };
        buf.truncate(n);
        if full.send(Ok(buf)).is_err() {
            return;
        }
    }
}

impl BufRead for ReadAhead {
    fn fill_buf(&mut self) -> io::Result<&[u8]> {
        if self.pos == self.current.len() {
            match self.chunks.recv() {
                Ok(Ok(chunk)) => {
                    let spent = std::mem::replace(&mut self.current, chunk);
                    let _ = self.spent.send(spent);
                    self.pos = 0;
                }
                Ok(Err(e)) => return Err(e),
                // The reading thread reached the end.
                Err(_) => return Ok(&[]),
            }
        }
        Ok(&self.current[self.pos..])
    }

    fn consume(&mut self, amount: usize) {
        self.pos = (self.pos + amount).min(self.current.len());
    }
}

impl Read for ReadAhead {
    fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
        let available = self.fill_buf()?;
        let n = buf.len().min(available.len());
        buf[..n].copy_from_slice(&available[..n]);
        self.consume(n);
        Ok(n)
    }
}
