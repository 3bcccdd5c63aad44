//! The step-by-step update, held between C calls: an app with its own HTTP stack starts an
//! update on the feed it fetched, then asks what the update needs next, fetches it, and hands
//! it in, one call at a time, until the update is done.
//!
//! The library's [`Session`] borrows its [`Device`], and a C caller holds the session across
//! calls, so it cannot live in the handle registry beside the device it borrows. It lives on a
//! thread of its own instead, which owns a reference to the device and the session, and
//! answers one command at a time over a channel: no unsafe code, no self-referential type,
//! and the store's update lock is released when that thread ends. Freeing the handle ends the
//! thread and waits for it, so once `ampoule_session_free` returns the store is free for the
//! next update.
//!
//! The bundle's bytes never pass through that thread: the caller's thread writes them into
//! the file the session names, opened through [`Download::file`] (no link followed), and never
//! past the size the session asked for.

use std::fs::File;
use std::io::{Seek, SeekFrom, Write};
use std::path::PathBuf;
use std::sync::mpsc::{self, Receiver, Sender};
use std::sync::{Arc, Mutex, MutexGuard, PoisonError};
use std::thread::JoinHandle;

use ampoule_verify::update::{Download, Fetch, Next, Session};
use ampoule_verify::{Device, Outcome, Timestamp};

use crate::status::{Failure, Status};

/// What the caller's thread asks of the session's thread.
enum Command {
    Advance,
    Provide(Vec<u8>),
    Downloaded(PathBuf),
    Fail(String),
}

/// What the session's thread answers to `Advance` and `Fail`, and once at its start.
enum Reply {
    /// The session exists, and holds the store's update lock unless another update has it.
    Started,
    Next(Box<Next>),
    /// The session was ended by `Fail` before: nothing more to do.
    Ended,
}

/// What the update needs next, or how it ended, for `ampoule_update_next`.
pub enum Step {
    /// Fetch the step's URL (at most `max_bytes`) and hand it in with
    /// [`UpdateSession::provide`].
    Fetch { max_bytes: u64 },
    /// Download into the session's file, from `offset` up to `size` bytes.
    Download {
        size: u64,
        offset: u64,
        sha256: [u8; 32],
    },
    /// The update ended with this outcome.
    Done(Outcome),
    /// The app ended the update with [`UpdateSession::fail`] already.
    Ended,
}

/// What the session asked for last and the caller has not answered yet.
enum Asked {
    Nothing,
    Fetch(Fetch),
    Download {
        want: Box<Download>,
        /// The download file, opened when the step was asked for (its length is the offset).
        file: File,
    },
    Ended,
}

/// One update in progress, driven from C (see the module documentation).
pub struct UpdateSession {
    driver: Mutex<Driver>,
}

struct Driver {
    commands: Option<Sender<Command>>,
    replies: Receiver<Reply>,
    thread: Option<JoinHandle<()>>,
    asked: Asked,
}

impl Drop for Driver {
    fn drop(&mut self) {
        // Closing the channel ends the thread's loop; it drops the session, which releases
        // the store's update lock, before the join returns.
        self.commands = None;
        if let Some(thread) = self.thread.take() {
            let _ = thread.join();
        }
    }
}

fn gone() -> Failure {
    Failure::new(
        Status::Panic,
        "internal error: the update's thread stopped; the panic was stopped at the C boundary. \
         Please report this as a bug in ampoule-verify",
    )
}

/// The session's thread: runs `session` one command at a time until the channel closes.
fn serve(mut session: Option<Session<'_>>, commands: &Receiver<Command>, replies: &Sender<Reply>) {
    for command in commands {
        let reply = match (command, session.as_mut()) {
            (Command::Advance, Some(s)) => Reply::Next(Box::new(s.advance())),
            (Command::Provide(bytes), Some(s)) => {
                s.provide(bytes);
                continue;
            }
            (Command::Downloaded(path), Some(s)) => {
                s.downloaded(&path);
                continue;
            }
            (Command::Fail(why), Some(_)) => match session.take() {
                Some(s) => Reply::Next(Box::new(Next::Done(s.fail(why)))),
                None => Reply::Ended,
            },
            (Command::Provide(_) | Command::Downloaded(_), None) => continue,
            (Command::Advance | Command::Fail(_), None) => Reply::Ended,
        };
        if replies.send(reply).is_err() {
            return;
        }
    }
}

fn hex_digest(hex: &str) -> Result<[u8; 32], Failure> {
    let mut out = [0u8; 32];
    let bytes = hex.as_bytes();
    if bytes.len() != 64 {
        return Err(Failure::new(
            Status::Other,
            format!("the feed's SHA-256 '{hex}' is not 64 hex digits"),
        ));
    }
    for (i, pair) in bytes.chunks_exact(2).enumerate() {
        let text = std::str::from_utf8(pair).unwrap_or("");
        out[i] = u8::from_str_radix(text, 16).map_err(|_| {
            Failure::new(
                Status::Other,
                format!("the feed's SHA-256 '{hex}' is not 64 hex digits"),
            )
        })?;
    }
    Ok(out)
}

impl UpdateSession {
    /// Starts an update of `device` on the feed bytes the app fetched from `feed_url`. The
    /// session takes the store's update lock now; when another update holds it, the first
    /// step is the outcome `Failed` with [`Status::Locked`]. It returns once the lock is
    /// taken or found held.
    pub fn begin(
        device: Arc<Device>,
        feed_url: String,
        feed: Vec<u8>,
        now: Timestamp,
    ) -> Result<UpdateSession, Failure> {
        let (commands, received) = mpsc::channel();
        let (replies, answers) = mpsc::channel();
        let thread = std::thread::Builder::new()
            .name("ampoule-update".into())
            .spawn(move || {
                let session = device.begin(&feed_url, feed, now);
                if replies.send(Reply::Started).is_err() {
                    return;
                }
                // A panic ends the thread: the caller sees the channel close (`gone`), and
                // the session, lock included, is dropped while unwinding.
                serve(Some(session), &received, &replies);
            })
            .map_err(|e| {
                Failure::new(Status::Io, format!("cannot start the update's thread: {e}"))
            })?;
        // The lock is taken (or found held) before this call returns, so two sessions begun
        // one after the other take it in that order.
        match answers.recv() {
            Ok(Reply::Started) => {}
            _ => return Err(gone()),
        }
        Ok(UpdateSession {
            driver: Mutex::new(Driver {
                commands: Some(commands),
                replies: answers,
                thread: Some(thread),
                asked: Asked::Nothing,
            }),
        })
    }

    /// Calls from several threads on one session take turns here.
    fn driver(&self) -> MutexGuard<'_, Driver> {
        // A panic caught at the boundary while the lock was held leaves a driver whose channel
        // still works or reports `gone`; both are safe to go on with.
        self.driver.lock().unwrap_or_else(PoisonError::into_inner)
    }

    /// What the update needs next, or how it ended.
    pub fn next(&self) -> Result<Step, Failure> {
        let mut driver = self.driver();
        // Whatever was asked and not answered is asked again.
        driver.asked = Asked::Nothing;
        let step = match driver.ask(Command::Advance)? {
            Reply::Started | Reply::Ended => {
                driver.asked = Asked::Ended;
                return Ok(Step::Ended);
            }
            Reply::Next(next) => *next,
        };
        match step {
            Next::Fetch(want) => {
                let max_bytes = want.max_bytes();
                driver.asked = Asked::Fetch(want);
                Ok(Step::Fetch { max_bytes })
            }
            Next::Download(want) => {
                let opened = match want.file() {
                    Ok(file) => file
                        .metadata()
                        .map(|m| (file, m.len()))
                        .map_err(|e| format!("cannot read {}: {e}", want.path().display())),
                    Err(e) => Err(e.to_string()),
                };
                let (file, offset) = match opened {
                    Ok(opened) => opened,
                    // The file the session prepared cannot be had: the update ends here, as
                    // the library's own driver would end it.
                    Err(why) => return driver.end(why),
                };
                let step = Step::Download {
                    size: want.size(),
                    offset,
                    sha256: hex_digest(&want.sha256().to_string())?,
                };
                driver.asked = Asked::Download {
                    want: Box::new(want),
                    file,
                };
                Ok(step)
            }
            Next::Done(report) => {
                driver.asked = Asked::Ended;
                Ok(Step::Done(report.outcome))
            }
            _ => driver.end("the update asked for a step this ABI version does not know".into()),
        }
    }

    /// The URL at `index` of the last step: the document's, or the bundle's mirrors in order.
    pub fn url(&self, index: usize) -> Result<String, Failure> {
        let driver = self.driver();
        let urls: Vec<&str> = match &driver.asked {
            Asked::Fetch(want) => vec![want.url()],
            Asked::Download { want, .. } => want.urls().iter().map(String::as_str).collect(),
            Asked::Nothing | Asked::Ended => {
                return Err(Failure::argument(
                    "no step asks for a URL now: call ampoule_update_next first",
                ));
            }
        };
        urls.get(index).map(|u| u.to_string()).ok_or_else(|| {
            Failure::new(
                Status::NotFound,
                format!(
                    "URL index {index} is out of range: the step has {} URL(s)",
                    urls.len()
                ),
            )
        })
    }

    /// The number of URLs of the last step.
    pub fn url_count(&self) -> usize {
        match &self.driver().asked {
            Asked::Fetch(_) => 1,
            Asked::Download { want, .. } => want.urls().len(),
            Asked::Nothing | Asked::Ended => 0,
        }
    }

    /// Hands in the document the last step asked for.
    pub fn provide(&self, bytes: &[u8]) -> Result<(), Failure> {
        let mut driver = self.driver();
        let Asked::Fetch(want) = &driver.asked else {
            return Err(Failure::argument(
                "the update asked for no document: ampoule_update_provide answers a \
                 AMPOULE_STEP_FETCH step only",
            ));
        };
        if bytes.len() as u64 > want.max_bytes() {
            return Err(Failure::new(
                Status::TooLarge,
                format!(
                    "the document from {} is {} bytes, over the step's limit of {} bytes; stop \
                     reading at max_bytes and end the update with ampoule_update_fail",
                    want.url(),
                    bytes.len(),
                    want.max_bytes()
                ),
            ));
        }
        driver.send(Command::Provide(bytes.to_vec()))?;
        driver.asked = Asked::Nothing;
        Ok(())
    }

    /// Appends `bytes` to the download file, never past the size the step asked for.
    pub fn write(&self, bytes: &[u8]) -> Result<(), Failure> {
        let mut driver = self.driver();
        let Asked::Download { want, file } = &mut driver.asked else {
            return Err(Failure::argument(
                "the update asked for no download: ampoule_update_write answers a \
                 AMPOULE_STEP_DOWNLOAD step only",
            ));
        };
        let io = |e: std::io::Error| {
            Failure::new(
                Status::Io,
                format!("cannot write {}: {e}", want.path().display()),
            )
        };
        let have = file.seek(SeekFrom::End(0)).map_err(io)?;
        if have.saturating_add(bytes.len() as u64) > want.size() {
            return Err(Failure::new(
                Status::TooLarge,
                format!(
                    "{} more bytes would make {} bytes, over the {} the step asked for; nothing \
                     was written (ask the server for bytes {}-{} only)",
                    bytes.len(),
                    have.saturating_add(bytes.len() as u64),
                    want.size(),
                    have,
                    want.size().saturating_sub(1)
                ),
            ));
        }
        file.write_all(bytes).map_err(io)
    }

    /// Says the download the last step asked for is complete; the session checks it next.
    pub fn downloaded(&self) -> Result<(), Failure> {
        let mut driver = self.driver();
        let Asked::Download { want, .. } = &driver.asked else {
            return Err(Failure::argument(
                "the update asked for no download: ampoule_update_downloaded answers a \
                 AMPOULE_STEP_DOWNLOAD step only",
            ));
        };
        let path = want.path().to_path_buf();
        driver.send(Command::Downloaded(path))?;
        driver.asked = Asked::Nothing;
        Ok(())
    }

    /// Ends the update because the app could not fetch what was asked.
    pub fn fail(&self, why: &str) -> Result<Step, Failure> {
        self.driver().end(why.to_string())
    }
}

impl Driver {
    fn send(&self, command: Command) -> Result<(), Failure> {
        self.commands
            .as_ref()
            .ok_or_else(gone)?
            .send(command)
            .map_err(|_| gone())
    }

    fn ask(&self, command: Command) -> Result<Reply, Failure> {
        self.send(command)?;
        self.replies.recv().map_err(|_| gone())
    }

    /// Ends the update with the app's reason, and says how it ended.
    fn end(&mut self, why: String) -> Result<Step, Failure> {
        self.asked = Asked::Ended;
        match self.ask(Command::Fail(why))? {
            Reply::Next(next) => match *next {
                Next::Done(report) => Ok(Step::Done(report.outcome)),
                _ => Ok(Step::Ended),
            },
            Reply::Started | Reply::Ended => Ok(Step::Ended),
        }
    }
}
