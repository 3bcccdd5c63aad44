//! A fault-injecting TCP proxy on 127.0.0.1, written for the load test (`tests/fleet.rs`) and
//! the fleet benchmark (`benches/fleet.rs`), issue 15: it stands between devices and a server
//! of the release tree (the built-in one or nginx) and, for a seeded share of the connections,
//! does one of the things a bad network or a bad web server does ([`Fault`]). Every other
//! connection passes byte for byte. It counts the bytes it sends to the client, so a test or
//! a benchmark knows what each device cost.
//!
//! Each connection's fault is drawn from the plan's seed and the connection's number alone, so
//! a proxy that serves one device (each device gets its own, and a device makes its requests
//! one after another) repeats its faults on a rerun with the same seed. A plan can also force a
//! fault on the nth request whose request line holds a pattern (the feed, a delta), so that a
//! short run meets every fault where it matters.
//!
//! Plain std threads and sockets: one thread accepts, one thread per connection relays the
//! answer (and applies the fault), one more copies whatever else the client sends upstream.
//! Every socket has a read timeout, so no thread outlives its connection by long.
#![allow(dead_code)]

use std::io::{self, Read, Write};
use std::net::{Shutdown, SocketAddr, TcpListener, TcpStream};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::thread::{self, JoinHandle};
use std::time::{Duration, Instant};

/// How long a relayed socket may stay silent before the proxy gives up on it (a stall is
/// the proxy's own silence, not this).
const IDLE: Duration = Duration::from_secs(30);
/// The most bytes of a request or response head the proxy reads before giving up parsing.
const MAX_HEAD: usize = 64 * 1024;

/// One thing a bad network or web server does to a connection.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Fault {
    /// The request is read, then the connection is closed (FIN) before any response.
    Drop,
    /// The connection is closed with the request unread, so the kernel answers with a reset
    /// (RFC 1122 section 4.2.2.13: a close with received data pending sends a RST; Linux does).
    Reset,
    /// The response is cut inside its body (or, for a body under two bytes, inside its head)
    /// and the connection closed.
    Truncate,
    /// The proxy sends nothing more, either before the status line or after part of the body,
    /// for longer than the client's timeouts (the plan's `stall`), then closes.
    Stall,
    /// The whole connection trickles: small pieces with pauses, slower than a loopback link
    /// by orders of magnitude but faster than the client's minimum rate.
    Slow,
    /// One bit of one byte in the response body is flipped; everything else passes.
    Corrupt,
}

impl Fault {
    pub const ALL: [Fault; 6] = [
        Fault::Drop,
        Fault::Reset,
        Fault::Truncate,
        Fault::Stall,
        Fault::Slow,
        Fault::Corrupt,
    ];

    pub fn name(self) -> &'static str {
        match self {
            Fault::Drop => "drop",
            Fault::Reset => "reset",
            Fault::Truncate => "truncate",
            Fault::Stall => "stall",
            Fault::Slow => "slow",
            Fault::Corrupt => "corrupt",
        }
    }
}

/// Which connections get which fault, and how the timed faults behave.
#[derive(Clone, Debug)]
pub struct Plan {
    pub seed: u64,
    /// Each fault's share of the connections, in thousandths; the rest pass untouched.
    pub per_mille: Vec<(Fault, u32)>,
    /// Faults applied whatever the draw: to the `nth` connection (from 0) whose request line
    /// contains `pattern` (`""` counts every connection).
    pub forced: Vec<Forced>,
    /// How long a stalled connection stays silent before the proxy closes it: longer than the
    /// client's read timeout, so the client gives up first.
    pub stall: Duration,
    /// A slow connection's piece size and the pause after each piece.
    pub slow_piece: usize,
    pub slow_pause: Duration,
}

impl Plan {
    /// No faults: every connection passes.
    pub fn clean() -> Plan {
        Plan {
            seed: 0,
            per_mille: Vec::new(),
            forced: Vec::new(),
            stall: Duration::from_secs(5),
            slow_piece: 4096,
            slow_pause: Duration::from_millis(20),
        }
    }

    /// The same share for every fault, in thousandths.
    pub fn every_fault(seed: u64, per_mille: u32, stall: Duration) -> Plan {
        Plan {
            seed,
            per_mille: Fault::ALL.iter().map(|f| (*f, per_mille)).collect(),
            ..Plan::clean()
        }
        .stall(stall)
    }

    pub fn stall(mut self, stall: Duration) -> Plan {
        self.stall = stall;
        self
    }

    /// Applies `fault` to the `nth` connection (from 0) whose request line contains `pattern`.
    pub fn force(mut self, pattern: &str, nth: u64, fault: Fault) -> Plan {
        self.forced.push(Forced {
            pattern: pattern.to_string(),
            nth,
            fault,
        });
        self
    }

    /// The fault of connection `connection`, whose request line is `request`, given how many
    /// earlier connections matched each forced rule (updated here); and a number that places
    /// the fault (which byte, where to cut).
    fn draw(&self, connection: u64, request: &str, matched: &mut [u64]) -> (Option<Fault>, u64) {
        let mut rng = SplitMix64(self.seed ^ connection.wrapping_mul(0xa076_1d64_78bd_642f));
        let roll = rng.next() % 1000;
        let place = rng.next();
        let mut forced = None;
        for (rule, count) in self.forced.iter().zip(matched.iter_mut()) {
            if request.contains(&rule.pattern) {
                if *count == rule.nth && forced.is_none() {
                    forced = Some(rule.fault);
                }
                *count += 1;
            }
        }
        if forced.is_some() {
            return (forced, place);
        }
        let mut upto = 0;
        for (fault, share) in &self.per_mille {
            upto += u64::from(*share);
            if roll < upto {
                return (Some(*fault), place);
            }
        }
        (None, place)
    }

    /// One line a failure report prints, so that a run can be repeated.
    pub fn describe(&self) -> String {
        let shares: Vec<String> = self
            .per_mille
            .iter()
            .map(|(f, s)| format!("{} {:.1}%", f.name(), f64::from(*s) / 10.0))
            .collect();
        let forced: Vec<String> = self
            .forced
            .iter()
            .map(|r| {
                format!(
                    "{} on connection {} of those requesting '{}'",
                    r.fault.name(),
                    r.nth,
                    r.pattern
                )
            })
            .collect();
        format!(
            "seed {:#x}; shares: {}; forced: {}; stall {} ms; slow {} bytes per {} ms",
            self.seed,
            if shares.is_empty() {
                "none".to_string()
            } else {
                shares.join(", ")
            },
            if forced.is_empty() {
                "none".to_string()
            } else {
                forced.join(", ")
            },
            self.stall.as_millis(),
            self.slow_piece,
            self.slow_pause.as_millis()
        )
    }
}

/// A fault a plan applies whatever the draw.
#[derive(Clone, Debug)]
pub struct Forced {
    pub pattern: String,
    pub nth: u64,
    pub fault: Fault,
}

/// splitmix64 (Steele, Lea and Flood, "Fast splittable pseudorandom number generators",
/// OOPSLA 2014), as `src/release/synth.rs` uses it: enough to spread faults reproducibly.
struct SplitMix64(u64);

impl SplitMix64 {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }
}

/// What happened on one connection.
#[derive(Clone, Debug)]
pub struct Record {
    /// The connection's number, from 0 in the order accepted.
    pub number: u64,
    /// The request line (`GET /feeds/stable.json HTTP/1.1`), or what arrived of it.
    pub request: String,
    /// The fault applied, if any (a drawn fault that had nothing to act on, such as a
    /// corruption of an empty body, is not applied and says so in `detail`).
    pub fault: Option<Fault>,
    /// Where the fault hit.
    pub detail: String,
    /// Bytes sent to the client on this connection, head and body.
    pub bytes: u64,
}

struct Shared {
    upstream: SocketAddr,
    plan: Plan,
    stop: AtomicBool,
    bytes: AtomicU64,
    records: Mutex<Vec<Record>>,
    /// For each of the plan's forced rules, how many connections matched it so far.
    matched: Mutex<Vec<u64>>,
}

impl Shared {
    fn update(&self, number: u64, change: impl FnOnce(&mut Record)) {
        let mut records = self
            .records
            .lock()
            .expect("no thread panics holding the records");
        if let Some(record) = records.iter_mut().find(|r| r.number == number) {
            change(record);
        }
    }
}

/// A proxy listening on a free port of 127.0.0.1, stopped when dropped.
pub struct Proxy {
    addr: SocketAddr,
    shared: Arc<Shared>,
    thread: Option<JoinHandle<()>>,
}

impl Proxy {
    pub fn start(upstream: SocketAddr, plan: Plan) -> io::Result<Proxy> {
        let listener = TcpListener::bind("127.0.0.1:0")?;
        let addr = listener.local_addr()?;
        let plan_rules = plan.forced.len();
        let shared = Arc::new(Shared {
            upstream,
            plan,
            stop: AtomicBool::new(false),
            bytes: AtomicU64::new(0),
            records: Mutex::new(Vec::new()),
            matched: Mutex::new(vec![0; plan_rules]),
        });
        let accepting = Arc::clone(&shared);
        let thread = thread::Builder::new()
            .name("fault-proxy".into())
            .spawn(move || accept(&listener, &accepting))?;
        Ok(Proxy {
            addr,
            shared,
            thread: Some(thread),
        })
    }

    /// The URL of a path of the tree, through the proxy.
    pub fn url(&self, path: &str) -> String {
        format!("http://{}/{path}", self.addr)
    }

    pub fn plan(&self) -> &Plan {
        &self.shared.plan
    }

    /// Every connection accepted so far, in order (one still open shows what it did so far).
    pub fn records(&self) -> Vec<Record> {
        self.shared
            .records
            .lock()
            .expect("no thread panics holding the records")
            .clone()
    }

    /// Bytes sent to clients so far, over every connection.
    pub fn bytes_sent(&self) -> u64 {
        self.shared.bytes.load(Ordering::SeqCst)
    }
}

impl Drop for Proxy {
    fn drop(&mut self) {
        self.shared.stop.store(true, Ordering::SeqCst);
        // The accept loop checks the flag after each connection: one more wakes it.
        let _ = TcpStream::connect(self.addr);
        if let Some(thread) = self.thread.take() {
            let _ = thread.join();
        }
    }
}

fn accept(listener: &TcpListener, shared: &Arc<Shared>) {
    for (number, stream) in (0u64..).zip(listener.incoming()) {
        if shared.stop.load(Ordering::SeqCst) {
            return;
        }
        let Ok(client) = stream else { continue };
        shared
            .records
            .lock()
            .expect("no thread panics holding the records")
            .push(Record {
                number,
                request: String::new(),
                fault: None,
                detail: String::new(),
                bytes: 0,
            });
        let shared = Arc::clone(shared);
        let _ = thread::Builder::new()
            .name(format!("fault-proxy-{number}"))
            .spawn(move || {
                if let Err(e) = relay(&shared, client, number) {
                    shared.update(number, |r| {
                        if r.detail.is_empty() {
                            r.detail = format!("relay ended: {e}");
                        }
                    });
                }
            });
    }
}

/// The request line, peeked (left unread) once it has arrived whole.
fn peek_request_line(client: &TcpStream) -> io::Result<String> {
    let started = Instant::now();
    let mut buf = [0u8; 4096];
    loop {
        let n = client.peek(&mut buf)?;
        if n == 0 {
            return Err(io::Error::new(
                io::ErrorKind::UnexpectedEof,
                "closed before a request",
            ));
        }
        if buf[..n].contains(&b'\n') || n == buf.len() || started.elapsed() > IDLE {
            return Ok(first_line(&buf[..n]));
        }
        thread::sleep(Duration::from_millis(2));
    }
}

/// Writes to the client, counting what it sent.
struct ToClient<'a> {
    stream: TcpStream,
    shared: &'a Shared,
    number: u64,
}

impl ToClient<'_> {
    fn send(&mut self, bytes: &[u8]) -> io::Result<()> {
        self.stream.write_all(bytes)?;
        let n = bytes.len() as u64;
        self.shared.bytes.fetch_add(n, Ordering::SeqCst);
        self.shared.update(self.number, |r| r.bytes += n);
        Ok(())
    }

    fn close(&self) {
        let _ = self.stream.shutdown(Shutdown::Both);
    }
}

/// Reads until the end of an HTTP head (`\r\n\r\n`): returns the head and whatever arrived
/// after it.
fn read_head(stream: &mut TcpStream) -> io::Result<(Vec<u8>, Vec<u8>)> {
    let mut buf = Vec::new();
    let mut chunk = [0u8; 8192];
    loop {
        if let Some(end) = buf.windows(4).position(|w| w == b"\r\n\r\n") {
            let rest = buf.split_off(end + 4);
            return Ok((buf, rest));
        }
        if buf.len() > MAX_HEAD {
            return Err(io::Error::other("head over 64 KiB"));
        }
        let n = stream.read(&mut chunk)?;
        if n == 0 {
            return Err(io::Error::new(
                io::ErrorKind::UnexpectedEof,
                "closed inside a head",
            ));
        }
        buf.extend_from_slice(&chunk[..n]);
    }
}

fn first_line(head: &[u8]) -> String {
    let line = head.split(|b| *b == b'\r').next().unwrap_or_default();
    String::from_utf8_lossy(line).into_owned()
}

/// The Content-Length of a response head, if it states one.
fn content_length(head: &[u8]) -> Option<u64> {
    String::from_utf8_lossy(head).lines().find_map(|line| {
        let (name, value) = line.split_once(':')?;
        name.trim()
            .eq_ignore_ascii_case("content-length")
            .then(|| value.trim().parse().ok())
            .flatten()
    })
}

/// Sleeps for `total`, in short steps, ending early when the proxy stops.
fn pause(shared: &Shared, total: Duration) {
    let end = Instant::now() + total;
    while Instant::now() < end && !shared.stop.load(Ordering::SeqCst) {
        thread::sleep(Duration::from_millis(20));
    }
}

fn relay(shared: &Shared, mut client: TcpStream, number: u64) -> io::Result<()> {
    client.set_read_timeout(Some(IDLE))?;
    client.set_nodelay(true)?;
    let note = |detail: String| shared.update(number, |r| r.detail = detail);
    let line = peek_request_line(&client)?;
    let (fault, place) = {
        let mut matched = shared
            .matched
            .lock()
            .expect("no thread panics holding the counts");
        shared.plan.draw(number, &line, &mut matched)
    };
    shared.update(number, |r| {
        r.request = line;
        r.fault = fault;
    });

    if fault == Some(Fault::Reset) {
        note("closed with the request unread (reset)".into());
        drop(client);
        return Ok(());
    }
    let (request, more) = read_head(&mut client)?;
    if fault == Some(Fault::Drop) {
        note("request read, closed before any response".into());
        let _ = client.shutdown(Shutdown::Both);
        return Ok(());
    }
    let is_head = request.starts_with(b"HEAD ");

    let mut upstream = TcpStream::connect(shared.upstream)?;
    upstream.set_read_timeout(Some(IDLE))?;
    upstream.set_nodelay(true)?;
    upstream.write_all(&request)?;
    upstream.write_all(&more)?;
    // Anything else the client sends (another request on a kept-alive connection) goes up
    // as it comes; the client's close becomes the upstream's end of input.
    {
        let mut from = client.try_clone()?;
        let mut to = upstream.try_clone()?;
        thread::Builder::new()
            .name(format!("fault-proxy-{number}-up"))
            .spawn(move || {
                let _ = io::copy(&mut from, &mut to);
                let _ = to.shutdown(Shutdown::Write);
            })?;
    }
    let mut out = ToClient {
        stream: client,
        shared,
        number,
    };
    let result = answer(
        shared,
        &mut upstream,
        &mut out,
        fault,
        place,
        is_head,
        &note,
    );
    out.close();
    let _ = upstream.shutdown(Shutdown::Both);
    result
}

/// Relays the upstream's answer to the client, applying `fault` to the first response.
fn answer(
    shared: &Shared,
    upstream: &mut TcpStream,
    out: &mut ToClient<'_>,
    fault: Option<Fault>,
    place: u64,
    is_head: bool,
    note: &dyn Fn(String),
) -> io::Result<()> {
    let plan = &shared.plan;
    let mut chunk = vec![0u8; 64 * 1024];
    match fault {
        None | Some(Fault::Drop | Fault::Reset) => copy(upstream, out, &mut chunk, None),
        Some(Fault::Slow) => {
            note(format!(
                "sent in pieces of {} bytes every {} ms",
                plan.slow_piece,
                plan.slow_pause.as_millis()
            ));
            copy(
                upstream,
                out,
                &mut chunk,
                Some((plan.slow_piece, plan.slow_pause, shared)),
            )
        }
        Some(Fault::Stall) if place.is_multiple_of(3) => {
            note(format!(
                "silent before the status line for {} ms, then closed",
                plan.stall.as_millis()
            ));
            pause(shared, plan.stall);
            Ok(())
        }
        Some(fault @ (Fault::Stall | Fault::Truncate | Fault::Corrupt)) => {
            let (head, mut body) = read_head(upstream)?;
            let length = if is_head {
                0
            } else {
                content_length(&head).unwrap_or(0)
            };
            // Read the whole first body, so the fault's place is a byte offset in it.
            while (body.len() as u64) < length {
                let n = upstream.read(&mut chunk)?;
                if n == 0 {
                    break;
                }
                body.extend_from_slice(&chunk[..n]);
            }
            let length = length.min(body.len() as u64);
            match fault {
                Fault::Truncate if length >= 2 => {
                    let cut = 1 + place % (length - 1);
                    note(format!("cut after {cut} of {length} body bytes"));
                    out.send(&head)?;
                    out.send(&body[..cut as usize])
                }
                Fault::Truncate => {
                    let cut = 1 + place % (head.len() as u64 - 1);
                    note(format!(
                        "cut after {cut} of the {} head bytes (a body of {length})",
                        head.len()
                    ));
                    out.send(&head[..cut as usize])
                }
                Fault::Stall => {
                    let sent = if length == 0 { 0 } else { place % length };
                    note(format!(
                        "silent after {sent} of {length} body bytes for {} ms, then closed",
                        plan.stall.as_millis()
                    ));
                    out.send(&head)?;
                    out.send(&body[..sent as usize])?;
                    pause(shared, plan.stall);
                    Ok(())
                }
                _ if length == 0 => {
                    shared.update(out.number, |r| {
                        r.fault = None;
                        r.detail = "corrupt drawn, not applied: no body".into();
                    });
                    out.send(&head)?;
                    out.send(&body)?;
                    copy(upstream, out, &mut chunk, None)
                }
                _ => {
                    let at = (place % length) as usize;
                    let bit = 1u8 << ((place >> 32) % 8);
                    note(format!(
                        "bit {bit:#04x} of body byte {at} of {length} flipped"
                    ));
                    body[at] ^= bit;
                    out.send(&head)?;
                    out.send(&body)?;
                    copy(upstream, out, &mut chunk, None)
                }
            }
        }
    }
}

/// Copies the rest of the upstream's bytes to the client, in paced pieces when asked.
fn copy(
    upstream: &mut TcpStream,
    out: &mut ToClient<'_>,
    chunk: &mut [u8],
    pieces: Option<(usize, Duration, &Shared)>,
) -> io::Result<()> {
    loop {
        let n = match upstream.read(chunk) {
            Ok(0) => return Ok(()),
            Ok(n) => n,
            Err(e) => return Err(e),
        };
        match pieces {
            None => out.send(&chunk[..n])?,
            Some((size, gap, shared)) => {
                for piece in chunk[..n].chunks(size.max(1)) {
                    out.send(piece)?;
                    pause(shared, gap);
                }
            }
        }
    }
}
