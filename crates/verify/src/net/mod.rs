//! Fetching feeds and bundles over HTTP(S) for a device, behind the `fetch` feature, and the
//! update flow that ties fetch, feed check, rollout, download and bundle check together.
//!
//! The API is blocking: each call builds a small single-threaded tokio runtime, does its work
//! and drops it, so an app without async code needs none, and an app without this feature
//! pulls in no async runtime at all. Every transfer is bounded: a feed stops at
//! [`limit::FEED_BYTES`], a bundle at the size its signed feed declares (checked against
//! Content-Length before the body and counted per frame while it streams), and each request
//! has a connect timeout, a per-read timeout, a total deadline and a minimum rate, because the
//! hyper client has no timeouts of its own. A bundle is hashed while it streams into a partial
//! file; an interrupted download resumes with an HTTP Range request (RFC 9110 section 14),
//! accepted only when the server answers 206 with exactly the Content-Range asked for.
//!
//! Redirects are never followed: a 3xx answer is an error naming where it pointed. That rules
//! out a redirect to another scheme or host by construction; the feed and its mirrors name
//! the final URLs.

use std::fs::{File, OpenOptions};
use std::io::{Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use http_body_util::{BodyExt, Empty};
use hyper::body::{Bytes, Incoming};
use hyper::{Request, Response, StatusCode, Uri, header};
use hyper_rustls::HttpsConnector;
use hyper_util::client::legacy::Client;
use hyper_util::client::legacy::connect::HttpConnector;
use hyper_util::rt::{TokioExecutor, TokioTimer};

use crate::check::bundle::{VerifiedBundle, Verifier};
use crate::check::feed::{
    Decision, Feed, FeedVerifier, Release, SignedFeed, TrustSetRef, VerifiedFeed, resolve,
};
use crate::check::trust::TrustSet;
use crate::error::{Error, ErrorKind, Result};
use crate::format::chunks::Watch;
use crate::format::digest::{Digest, Hasher};
use crate::format::ledger_entry as ledger;
use crate::format::time::Timestamp;
use crate::format::{limit, trust_set};
use crate::progress::{Progress, ProgressFn, Stage};
use crate::store::Store;

/// Limits of one transfer. The defaults suit a weak cellular link: generous per-read and total
/// times, and a low minimum rate that still ends a connection dripping a few bytes at a time.
#[derive(Clone)]
pub struct Transfer {
    connect_timeout: Duration,
    read_timeout: Duration,
    total_timeout: Duration,
    min_rate: u64,
    rate_window: Duration,
    attempts: u32,
    tls_roots: Option<Vec<Vec<u8>>>,
    progress: Option<ProgressFn>,
    cancel: Option<Arc<AtomicBool>>,
}

impl std::fmt::Debug for Transfer {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Transfer")
            .field("connect_timeout", &self.connect_timeout)
            .field("read_timeout", &self.read_timeout)
            .field("total_timeout", &self.total_timeout)
            .field("min_rate", &self.min_rate)
            .field("rate_window", &self.rate_window)
            .field("attempts", &self.attempts)
            .field("tls_roots", &self.tls_roots.as_ref().map(Vec::len))
            .field("progress", &self.progress.is_some())
            .field("cancel", &self.cancel.is_some())
            .finish()
    }
}

impl Default for Transfer {
    fn default() -> Self {
        Transfer {
            connect_timeout: Duration::from_secs(20),
            read_timeout: Duration::from_secs(30),
            total_timeout: Duration::from_secs(60 * 60),
            min_rate: 256,
            rate_window: Duration::from_secs(60),
            attempts: 3,
            tls_roots: None,
            progress: None,
            cancel: None,
        }
    }
}

impl Transfer {
    /// The defaults: connect 20 s, read 30 s, total 1 h, at least 256 bytes/s over 60 s,
    /// 3 attempts per source.
    pub fn new() -> Self {
        Self::default()
    }

    /// How long opening the TCP connection may take (at most 366 days).
    pub fn connect_timeout(mut self, t: Duration) -> Self {
        self.connect_timeout = t.min(LONGEST);
        self
    }

    /// How long the response headers, and then each piece of the body, may take to arrive
    /// (at most 366 days).
    pub fn read_timeout(mut self, t: Duration) -> Self {
        self.read_timeout = t.min(LONGEST);
        self
    }

    /// How long one request may take in all, body included (at most 366 days).
    pub fn total_timeout(mut self, t: Duration) -> Self {
        self.total_timeout = t.min(LONGEST);
        self
    }

    /// The slowest acceptable transfer: fewer than `bytes_per_sec` on average over any
    /// `window` (1 ms to 366 days) ends it.
    pub fn min_rate(mut self, bytes_per_sec: u64, window: Duration) -> Self {
        self.min_rate = bytes_per_sec;
        self.rate_window = window.clamp(Duration::from_millis(1), LONGEST);
        self
    }

    /// Trusts only these CA certificates (DER) for HTTPS, instead of the public web PKI roots
    /// built in (Mozilla's list, from the `webpki-roots` crate): for servers under the team's
    /// own certificate authority.
    pub fn only_tls_roots_der(mut self, roots: Vec<Vec<u8>>) -> Self {
        self.tls_roots = Some(roots);
        self
    }

    /// Calls `progress` while a bundle downloads, with [`Stage::Download`] and the bytes of
    /// the file held so far (a resumed download starts above zero) out of its signed size.
    pub fn on_progress(mut self, progress: ProgressFn) -> Self {
        self.progress = Some(progress);
        self
    }

    /// Stops the transfer once `flag` is set (from any thread), between two pieces of the
    /// body: the update ends as [`ErrorKind::Cancelled`], and the bytes of the bundle received
    /// so far stay in the partial file, so the next update resumes from there.
    pub fn cancel_when(mut self, flag: Arc<AtomicBool>) -> Self {
        self.cancel = Some(flag);
        self
    }

    fn cancelled(&self, url: &str) -> Result<()> {
        match &self.cancel {
            Some(flag) if flag.load(Ordering::Relaxed) => Err(Error::new(
                ErrorKind::Cancelled,
                format!(
                    "transfer from {url} was cancelled; what arrived of a bundle is kept for the \
                     next update"
                ),
            )),
            _ => Ok(()),
        }
    }

    /// How many times one source is tried while each try makes progress (at least 1).
    pub fn attempts_per_source(mut self, n: u32) -> Self {
        self.attempts = n.max(1);
        self
    }
}

/// The longest any of a transfer's waits may be set to: 366 days. A longer one is taken as
/// this, so that a deadline (now plus the wait) can always be computed: "no limit" from an
/// app, such as `Duration::MAX` or a C caller's `UINT64_MAX` milliseconds, means this.
const LONGEST: Duration = Duration::from_secs(366 * 24 * 60 * 60);

type HttpsClient = Client<HttpsConnector<HttpConnector>, Empty<Bytes>>;

fn network(message: String) -> Error {
    Error::new(ErrorKind::Network, message)
}

/// An error and its sources on one line, so "client error (Connect)" also says why.
fn chain(err: &dyn std::error::Error) -> String {
    let mut text = err.to_string();
    let mut source = err.source();
    while let Some(s) = source {
        let s_text = s.to_string();
        if !text.contains(&s_text) {
            text.push_str(": ");
            text.push_str(&s_text);
        }
        source = s.source();
    }
    text
}

/// One blocking session: a single-threaded runtime and a client without idle connections.
struct Session {
    runtime: tokio::runtime::Runtime,
    client: HttpsClient,
    transfer: Transfer,
}

impl Session {
    fn new(transfer: &Transfer) -> Result<Self> {
        let runtime = tokio::runtime::Builder::new_current_thread()
            .enable_io()
            .enable_time()
            .build()
            .map_err(|e| Error::io("cannot start the network runtime", e))?;
        let tls = rustls::ClientConfig::builder_with_provider(Arc::new(
            rustls::crypto::ring::default_provider(),
        ))
        .with_safe_default_protocol_versions()
        .map_err(|e| network(format!("cannot set up TLS: {e}")))?;
        let tls = match &transfer.tls_roots {
            None => hyper_rustls::ConfigBuilderExt::with_webpki_roots(tls).with_no_client_auth(),
            Some(roots) => {
                let mut store = rustls::RootCertStore::empty();
                for (i, der) in roots.iter().enumerate() {
                    store
                        .add(rustls::pki_types::CertificateDer::from(der.clone()))
                        .map_err(|e| {
                            network(format!("TLS root certificate {} is not usable: {e}", i + 1))
                        })?;
                }
                tls.with_root_certificates(store).with_no_client_auth()
            }
        };
        let mut http = HttpConnector::new();
        http.set_connect_timeout(Some(transfer.connect_timeout));
        http.enforce_http(false);
        let https = hyper_rustls::HttpsConnectorBuilder::new()
            .with_tls_config(tls)
            .https_or_http()
            .enable_http1()
            .wrap_connector(http);
        // The runtime lives only as long as the call: keep no idle connections around it.
        let client = Client::builder(TokioExecutor::new())
            .pool_max_idle_per_host(0)
            .pool_timer(TokioTimer::new())
            .build(https);
        Ok(Session {
            runtime,
            client,
            transfer: transfer.clone(),
        })
    }

    /// Sends a GET and waits for the response headers. Refuses anything but 2xx, naming the
    /// status; a 3xx is reported with where it pointed and not followed.
    async fn get(&self, url: &str, from: u64, deadline: Instant) -> Result<Response<Incoming>> {
        self.get_range(url, from, None, deadline).await
    }

    /// GET from byte `from` up to byte `last` (inclusive) when given, else to the end.
    async fn get_range(
        &self,
        url: &str,
        from: u64,
        last: Option<u64>,
        deadline: Instant,
    ) -> Result<Response<Incoming>> {
        self.transfer.cancelled(url)?;
        let uri = parse_url(url)?;
        let mut request = Request::get(uri).header(
            header::USER_AGENT,
            concat!("ampoule-verify/", env!("CARGO_PKG_VERSION")),
        );
        match last {
            Some(last) => {
                request = request.header(header::RANGE, format!("bytes={from}-{last}"));
            }
            None if from > 0 => {
                request = request.header(header::RANGE, format!("bytes={from}-"));
            }
            None => {}
        }
        let request = request
            .body(Empty::new())
            .map_err(|e| network(format!("cannot make a request for {url}: {e}")))?;
        let wait = (Instant::now() + self.transfer.connect_timeout + self.transfer.read_timeout)
            .min(deadline);
        let response =
            match tokio::time::timeout_at(wait.into(), self.client.request(request)).await {
                Ok(Ok(response)) => response,
                Ok(Err(e)) => return Err(network(format!("cannot reach {url}: {}", chain(&e)))),
                Err(_) if wait >= deadline => return Err(self.took_too_long(url)),
                Err(_) => {
                    return Err(network(format!(
                        "no response from {url} within {} s (connect and read timeouts)",
                        (self.transfer.connect_timeout + self.transfer.read_timeout).as_secs_f64()
                    )));
                }
            };
        let status = response.status();
        if status.is_redirection() {
            let location = response
                .headers()
                .get(header::LOCATION)
                .map(|v| String::from_utf8_lossy(v.as_bytes()).into_owned())
                .unwrap_or_default();
            return Err(network(format!(
                "server answered {} for {url} with a redirect to '{}'; redirects are not \
                 followed, so give the final URL instead",
                shown_status(status),
                location
                    .chars()
                    .take(200)
                    .collect::<String>()
                    .escape_debug()
            )));
        }
        if !status.is_success() {
            return Err(network(format!(
                "server answered {} for {url}",
                shown_status(status)
            )));
        }
        Ok(response)
    }
}

impl Session {
    fn took_too_long(&self, url: &str) -> Error {
        network(format!(
            "transfer from {url} took longer than the limit of {} s",
            self.transfer.total_timeout.as_secs_f64()
        ))
    }
}

fn shown_status(status: StatusCode) -> String {
    match status.canonical_reason() {
        Some(reason) => format!("{} {reason}", status.as_u16()),
        None => status.as_u16().to_string(),
    }
}

fn parse_url(url: &str) -> Result<Uri> {
    let bad = || {
        network(format!(
            "'{}' is not an http or https URL",
            url.chars().take(200).collect::<String>().escape_debug()
        ))
    };
    let uri: Uri = url.parse().map_err(|_| bad())?;
    match (uri.scheme_str(), uri.authority()) {
        (Some("http" | "https"), Some(_)) => Ok(uri),
        _ => Err(bad()),
    }
}

/// The declared Content-Length, if any; a value that is not a number is an error.
fn content_length(response: &Response<Incoming>, url: &str) -> Result<Option<u64>> {
    match response.headers().get(header::CONTENT_LENGTH) {
        None => Ok(None),
        Some(v) => v
            .to_str()
            .ok()
            .and_then(|s| s.parse::<u64>().ok())
            .map(Some)
            .ok_or_else(|| {
                network(format!(
                    "server sent a Content-Length for {url} that is not a number"
                ))
            }),
    }
}

/// Refuses a 206 answer whose Content-Range is not the `expected` one asked for.
fn check_content_range(response: &Response<Incoming>, url: &str, expected: &str) -> Result<()> {
    content_range_is(response, url, expected, |got| got == expected)
}

/// Refuses a 206 answer whose Content-Range does not start with `expected`.
fn check_content_range_prefix(
    response: &Response<Incoming>,
    url: &str,
    expected: &str,
) -> Result<()> {
    content_range_is(response, url, &format!("{expected}*"), |got| {
        got.strip_prefix(expected)
            .is_some_and(|total| !total.is_empty() && total.bytes().all(|b| b.is_ascii_digit()))
    })
}

fn content_range_is(
    response: &Response<Incoming>,
    url: &str,
    expected: &str,
    fits: impl Fn(&str) -> bool,
) -> Result<()> {
    let got = response
        .headers()
        .get(header::CONTENT_RANGE)
        .map(|v| String::from_utf8_lossy(v.as_bytes()).into_owned())
        .unwrap_or_default();
    if !fits(&got) {
        return Err(network(format!(
            "server answered 206 Partial Content for {url} with Content-Range '{}', but \
             '{expected}' was asked for",
            got.chars().take(100).collect::<String>().escape_debug()
        )));
    }
    Ok(())
}

/// Why reading a body stopped early.
enum BodyError {
    /// The connection failed mid-body (reset, closed before the declared length, bad framing).
    Broken(String),
    /// A timeout, the rate check, or the sink refused the data.
    Refused(Error),
}

/// Reads a body frame by frame, giving each piece of data to `sink`, under the per-read
/// timeout, the total deadline and the minimum rate.
async fn read_body(
    transfer: &Transfer,
    url: &str,
    mut body: Incoming,
    deadline: Instant,
    mut sink: impl FnMut(&[u8]) -> Result<()>,
) -> std::result::Result<(), BodyError> {
    let mut window_start = Instant::now();
    let mut window_bytes: u64 = 0;
    loop {
        transfer.cancelled(url).map_err(BodyError::Refused)?;
        let wait = (Instant::now() + transfer.read_timeout).min(deadline);
        let frame = match tokio::time::timeout_at(wait.into(), body.frame()).await {
            Ok(None) => return Ok(()),
            Ok(Some(Ok(frame))) => frame,
            Ok(Some(Err(e))) => return Err(BodyError::Broken(chain(&e))),
            Err(_) if wait >= deadline => {
                return Err(BodyError::Refused(network(format!(
                    "transfer from {url} took longer than the limit of {} s",
                    transfer.total_timeout.as_secs_f64()
                ))));
            }
            Err(_) => {
                return Err(BodyError::Refused(network(format!(
                    "no data from {url} for {} s (read timeout)",
                    transfer.read_timeout.as_secs_f64()
                ))));
            }
        };
        let Ok(data) = frame.into_data() else {
            continue;
        };
        sink(&data).map_err(BodyError::Refused)?;
        window_bytes += data.len() as u64;
        let elapsed = window_start.elapsed();
        if elapsed >= transfer.rate_window {
            let wanted = u128::from(transfer.min_rate) * elapsed.as_millis();
            if u128::from(window_bytes) * 1000 < wanted {
                return Err(BodyError::Refused(network(format!(
                    "transfer from {url} is too slow: below the minimum of {} bytes per second \
                     over {} s",
                    transfer.min_rate,
                    transfer.rate_window.as_secs_f64()
                ))));
            }
            window_start = Instant::now();
            window_bytes = 0;
        }
    }
}

/// Fetches a feed file: at most [`limit::FEED_BYTES`], refused early when the server declares
/// more. The bytes are unverified: give them to [`FeedVerifier::verify`].
pub fn fetch_feed(url: &str, transfer: &Transfer) -> Result<Vec<u8>> {
    fetch_capped(url, transfer, limit::FEED_BYTES, "feed")
}

/// Fetches a trust-set file: at most [`trust_set::MAX_BYTES`], refused early when the server
/// declares more. The bytes are unverified: give them to [`TrustSet::accept_successor`].
pub fn fetch_trust_set(url: &str, transfer: &Transfer) -> Result<Vec<u8>> {
    fetch_capped(url, transfer, trust_set::MAX_BYTES, "trust set")
}

/// Fetches a small document whole, at most `cap` bytes; `what` names it in messages.
pub(crate) fn fetch_capped(
    url: &str,
    transfer: &Transfer,
    cap: u64,
    what: &str,
) -> Result<Vec<u8>> {
    let session = Session::new(transfer)?;
    session.runtime.block_on(async {
        let deadline = Instant::now() + transfer.total_timeout;
        let response = session.get(url, 0, deadline).await?;
        if let Some(len) = content_length(&response, url)?
            && len > cap
        {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!(
                    "server declares {len} bytes for the {what} at {url}, over the limit of {cap} bytes"
                ),
            ));
        }
        let mut bytes = Vec::new();
        read_body(transfer, url, response.into_body(), deadline, |data| {
            if (bytes.len() + data.len()) as u64 > cap {
                return Err(Error::new(
                    ErrorKind::TooLarge,
                    format!("{what} at {url} is over the limit of {cap} bytes; stopped reading"),
                ));
            }
            bytes.extend_from_slice(data);
            Ok(())
        })
        .await
        .map_err(|e| match e {
            BodyError::Broken(why) => network(format!(
                "{what} transfer from {url} broke off after {} bytes: {why}",
                bytes.len()
            )),
            BodyError::Refused(e) => e,
        })?;
        Ok(bytes)
    })
}

/// Fetches `url` into a new file `dest` (replacing it), stopping with an error past `max`
/// bytes; returns the length. For tools that copy a release tree's files, such as an
/// auditor's ledger check over HTTP; the bytes are unverified.
pub fn fetch_to_file(url: &str, dest: &Path, max: u64, transfer: &Transfer) -> Result<u64> {
    let session = Session::new(transfer)?;
    let mut file = File::create(dest)
        .map_err(|e| Error::io(format!("cannot create {}", dest.display()), e))?;
    session.runtime.block_on(async {
        let deadline = Instant::now() + transfer.total_timeout;
        let response = session.get(url, 0, deadline).await?;
        if let Some(len) = content_length(&response, url)?
            && len > max
        {
            return Err(Error::new(
                ErrorKind::TooLarge,
                format!("server declares {len} bytes for {url}, over the limit of {max} bytes"),
            ));
        }
        let mut written = 0u64;
        read_body(transfer, url, response.into_body(), deadline, |data| {
            if written + data.len() as u64 > max {
                return Err(Error::new(
                    ErrorKind::TooLarge,
                    format!("{url} is over the limit of {max} bytes; stopped reading"),
                ));
            }
            file.write_all(data)
                .map_err(|e| Error::io(format!("cannot write {}", dest.display()), e))?;
            written += data.len() as u64;
            Ok(())
        })
        .await
        .map_err(|e| match e {
            BodyError::Broken(why) => network(format!(
                "transfer from {url} broke off after {written} bytes: {why}"
            )),
            BodyError::Refused(e) => e,
        })?;
        Ok(written)
    })
}

/// What the partial file holds before a request: its length, the hash of those bytes and,
/// with a `watch`, the watch fed with them. A chunk in it that does not check is cut off with
/// everything after it, and the rest is read again: the download resumes after the last
/// chunk that checked.
fn resume_state(
    file: &mut File,
    path: &Path,
    size: u64,
    watch: Option<&Watch>,
) -> Result<(u64, Hasher, Option<Watch>)> {
    let io = |doing: &str, e| Error::io(format!("cannot {doing} {}", path.display()), e);
    let mut len = file
        .metadata()
        .map_err(|e| io("read the size of", e))?
        .len();
    if len > size {
        file.set_len(0).map_err(|e| io("truncate", e))?;
        len = 0;
    }
    let mut buf = vec![0u8; 256 * 1024];
    // Each cut shortens the file, so this ends; without a change meanwhile, after one cut
    // every chunk left checks.
    loop {
        file.seek(SeekFrom::Start(0)).map_err(|e| io("read", e))?;
        let mut hasher = Hasher::new();
        let mut watching = watch.map(Watch::restart);
        let mut reader = std::io::Read::take(&mut *file, len);
        let mut cut = None;
        loop {
            let n = std::io::Read::read(&mut reader, &mut buf).map_err(|e| io("read", e))?;
            if n == 0 {
                break;
            }
            hasher.update(&buf[..n]);
            if let Some(w) = &mut watching
                && w.feed(&buf[..n]).is_err()
            {
                cut = Some(w.good_len());
                break;
            }
        }
        match cut {
            Some(good) => {
                file.set_len(good).map_err(|e| io("truncate", e))?;
                len = good;
            }
            None => return Ok((hasher.len(), hasher, watching)),
        }
    }
}

/// The file a download completes, and what it must hold when complete.
pub(crate) struct Partial<'a> {
    /// Opened for reading and writing.
    pub file: &'a mut File,
    /// Its path, for messages.
    pub path: &'a Path,
    pub size: u64,
    pub sha256: &'a Digest,
    /// How many of the bytes already in the file came from an earlier update (see
    /// [`download_into`]).
    pub earlier: u64,
    /// Format 2, once the head checked: the chunks to check as they arrive.
    pub watch: Option<&'a Watch>,
}

impl Session {
    /// One try at completing the partial file from one URL. `received` counts the bytes
    /// it received.
    async fn download_once(
        &self,
        url: &str,
        partial: &mut Partial<'_>,
        received: &mut u64,
    ) -> Result<()> {
        let Partial {
            file,
            path,
            size,
            sha256,
            earlier,
            watch,
        } = partial;
        let (path, size, sha256, earlier, watch) = (*path, *size, *sha256, *earlier, *watch);
        let io = |doing: &str, e| Error::io(format!("cannot {doing} {}", path.display()), e);
        let (mut have, mut hasher, mut watching) = resume_state(file, path, size, watch)?;
        // How many of the bytes hashed below were kept from an earlier try rather than sent
        // by `url` now: a digest mismatch names both sources.
        let mut kept = have.min(earlier);
        if have < size || size == 0 {
            let deadline = Instant::now() + self.transfer.total_timeout;
            let response = self.get(url, have, deadline).await?;
            let declared = content_length(&response, url)?;
            match response.status() {
                StatusCode::PARTIAL_CONTENT => {
                    let expected = format!("bytes {have}-{}/{size}", size.saturating_sub(1));
                    check_content_range(&response, url, &expected)?;
                }
                StatusCode::OK => {
                    if have > 0 {
                        // The server ignored the Range request and sends the whole file.
                        file.set_len(0).map_err(|e| io("truncate", e))?;
                        have = 0;
                        hasher = Hasher::new();
                        watching = watch.map(Watch::restart);
                    }
                }
                other => {
                    return Err(network(format!(
                        "server answered {} for {url}; expected 200 OK or 206 Partial Content",
                        shown_status(other)
                    )));
                }
            }
            let remaining = size - have;
            // A length other than the signed one, larger or smaller, is the server's fault
            // (exit 2, kind network), not the release's: the feed and bundle may be fine.
            if let Some(len) = declared
                && len != remaining
            {
                return Err(network(format!(
                    "server declares {len} bytes for {url}, but {remaining} of the {size} \
                     bytes the feed signed were expected"
                )));
            }
            file.seek(SeekFrom::Start(have))
                .map_err(|e| io("seek in", e))?;
            let start = have;
            kept = have.min(earlier);
            let mut overrun = false;
            let mut bad_chunk = None;
            // Plain blocking writes: this runtime runs nothing else, and a local disk keeps up
            // with any network a device has.
            let result = read_body(
                &self.transfer,
                url,
                response.into_body(),
                deadline,
                |data| {
                    if have + data.len() as u64 > size {
                        overrun = true;
                        return Err(network(format!(
                            "server sent more than the {size} bytes the feed declares for {url}; \
                         stopped reading"
                        )));
                    }
                    file.write_all(data).map_err(|e| io("write", e))?;
                    hasher.update(data);
                    have += data.len() as u64;
                    *received += data.len() as u64;
                    if let Some(w) = &mut watching
                        && let Err(chunk) = w.feed(data)
                    {
                        bad_chunk = Some((chunk, w.good_len(), w.checked()));
                        return Err(Error::new(ErrorKind::Digest, "a chunk did not check"));
                    }
                    if let Some(progress) = &self.transfer.progress {
                        progress(Progress {
                            stage: Stage::Download,
                            done: have,
                            total: size,
                        });
                    }
                    Ok(())
                },
            )
            .await;
            if let Some((chunk, good, checked)) = bad_chunk {
                // Every chunk before this one checked: keep them, and ask for the rest again.
                file.set_len(good).map_err(|e| io("truncate", e))?;
                return Err(Error::new(
                    ErrorKind::Digest,
                    format!(
                        "{chunk}, in the bytes from {url}; the first {good} bytes (the head and \
                         {checked} chunks that checked) are kept, and the next try downloads from there"
                    ),
                ));
            }
            // Flushed so that a resume after a power cut finds what was written. With a
            // watch it is not needed: a resume checks the kept chunks again and cuts the file
            // where its bytes went missing, and the install reads the file from the page
            // cache and checks it all again; the file is removed once installed, so most of
            // its bytes never reach the disk (a phone's flash is spared 80 MB of writes).
            if watch.is_none() {
                file.sync_data().map_err(|e| io("flush", e))?;
            }
            match result {
                Err(BodyError::Refused(e)) if overrun => {
                    // Nothing this server sent can be trusted as a prefix.
                    file.set_len(0).map_err(|e| io("truncate", e))?;
                    return Err(e);
                }
                Err(BodyError::Refused(e)) => return Err(e),
                Err(BodyError::Broken(why)) => {
                    return Err(network(format!(
                        "transfer from {url} broke off after {have} of {size} bytes \
                         ({} in this try): {why}",
                        have - start
                    )));
                }
                Ok(()) if have < size => {
                    return Err(network(format!(
                        "transfer from {url} ended after {have} of {size} bytes"
                    )));
                }
                Ok(()) => {}
            }
        }
        let got = hasher.finish();
        if got != *sha256 {
            // Either source may be the wrong one; neither is kept.
            file.set_len(0).map_err(|e| io("truncate", e))?;
            let message = if kept == 0 {
                format!(
                    "file downloaded from {url} has SHA-256 {got}, but the feed declares \
                     {sha256}; the partial file was discarded"
                )
            } else if kept >= size {
                format!(
                    "the {kept} bytes kept in {} from an earlier try have SHA-256 {got}, but the \
                     feed declares {sha256} (nothing was fetched from {url}); they were \
                     discarded, and the next try downloads the whole file again",
                    path.display()
                )
            } else {
                format!(
                    "the {kept} bytes kept in {} from an earlier try and the {} bytes from {url} \
                     have SHA-256 {got} together, but the feed declares {sha256}; both were \
                     discarded, and the next try downloads the whole file again",
                    path.display(),
                    size - kept
                )
            };
            return Err(Error::new(ErrorKind::Digest, message));
        }
        Ok(())
    }
}

/// Completes `partial`: a file of exactly `size` bytes with SHA-256 `sha256`, trying `urls`
/// in order. Bytes already in the file are kept and the rest is asked for with a Range
/// request; one source is tried again while its tries make progress. On success the file holds exactly the expected
/// bytes. A failure keeps a correct-looking prefix for the next call, and empties the file
/// when the bytes were proven wrong (digest) or too many.
///
/// `earlier` says how many of the bytes already in the file came from an earlier update (the
/// rest, if any, is the bundle's head fetched from these URLs just now): a digest mismatch
/// names the kept bytes as a source of their own only then.
///
/// With `watch` (a format 2 bundle whose head checked), each chunk is checked as its last
/// byte arrives, and kept bytes as they are read again: a chunk that does not check is cut
/// off with what follows it, and the download goes on after the last chunk that checked,
/// from the same source up to `attempts` times in all, else from the next.
///
/// Returns how many bytes the tries received, those fetched twice included.
pub(crate) fn download_into(
    urls: &[String],
    mut partial: Partial<'_>,
    transfer: &Transfer,
) -> Result<u64> {
    if urls.is_empty() {
        return Err(network("no URL to download from".into()));
    }
    let session = Session::new(transfer)?;
    let mut failures: Vec<Error> = Vec::new();
    let mut received = 0;
    for url in urls {
        for attempt in 1..=transfer.attempts {
            let before = partial.file.metadata().map(|m| m.len()).unwrap_or(0);
            let result =
                session
                    .runtime
                    .block_on(session.download_once(url, &mut partial, &mut received));
            let err = match result {
                Ok(()) => return Ok(received),
                Err(e) => e,
            };
            let after = partial.file.metadata().map(|m| m.len()).unwrap_or(0);
            // A transfer that broke off after bytes that came whole: the same source again.
            // A chunk that did not check (the file was cut back to the chunks before it, after
            // the head): the same source again too, at most `attempts` times, since a bit
            // flipped on the way costs one chunk. A whole file proven wrong was emptied: never.
            let retry = match err.kind() {
                ErrorKind::Network => after > before,
                ErrorKind::Digest => after > 0,
                _ => false,
            };
            if !retry || attempt == transfer.attempts {
                failures.push(err);
                break;
            }
        }
    }
    if failures.len() == 1 {
        return Err(failures.remove(0));
    }
    let kind = failures.last().map_or(ErrorKind::Network, Error::kind);
    let all = failures
        .iter()
        .map(Error::to_string)
        .collect::<Vec<_>>()
        .join("; ");
    Err(Error::new(
        kind,
        format!("download failed from all {} sources: {all}", failures.len()),
    ))
}

/// Makes `file` (named `partial` in messages) hold the first `upto` bytes of the file at the
/// first of `urls` that works: the bundle's head, which the session checks before it asks for
/// the payload. Bytes already there are kept; the rest is asked for with a Range request, and
/// a server that ignores it is read only up to `upto`. Nothing is written past `upto`. The
/// whole file's length the server states is not checked here: the feed states one, and the
/// head's signed manifest settles which is true.
pub fn download_head(
    urls: &[String],
    file: &mut File,
    partial: &Path,
    upto: u64,
    transfer: &Transfer,
) -> Result<()> {
    let io = |doing: &str, e| Error::io(format!("cannot {doing} {}", partial.display()), e);
    let have = file
        .metadata()
        .map_err(|e| io("read the size of", e))?
        .len();
    if have >= upto {
        return Ok(());
    }
    let Some(url) = urls.first() else {
        return Err(network("no URL to download from".into()));
    };
    let session = Session::new(transfer)?;
    session.runtime.block_on(async {
        let deadline = Instant::now() + transfer.total_timeout;
        let response = session
            .get_range(url, have, Some(upto - 1), deadline)
            .await?;
        let mut have = have;
        match response.status() {
            StatusCode::PARTIAL_CONTENT => {
                // The range must be the one asked for; the total after the slash is the
                // server's word against the feed's, which the head's signed manifest settles.
                let expected = format!("bytes {have}-{}/", upto - 1);
                check_content_range_prefix(&response, url, &expected)?;
            }
            StatusCode::OK => {
                // The whole file comes: keep only its first `upto` bytes.
                file.set_len(0).map_err(|e| io("truncate", e))?;
                have = 0;
            }
            other => {
                return Err(network(format!(
                    "server answered {} for {url}; expected 200 OK or 206 Partial Content",
                    shown_status(other)
                )));
            }
        }
        file.seek(SeekFrom::Start(have))
            .map_err(|e| io("seek in", e))?;
        let mut enough = false;
        let result = read_body(transfer, url, response.into_body(), deadline, |data| {
            let room = (upto - have).min(data.len() as u64) as usize;
            file.write_all(&data[..room]).map_err(|e| io("write", e))?;
            have += room as u64;
            if have == upto {
                // Stop reading: the rest is the payload, asked for once the head passed.
                enough = true;
                return Err(Error::new(ErrorKind::Cancelled, "the head is complete"));
            }
            Ok(())
        })
        .await;
        file.sync_data().map_err(|e| io("flush", e))?;
        match result {
            _ if enough => Ok(()),
            Err(BodyError::Refused(e)) => Err(e),
            Err(BodyError::Broken(why)) => Err(network(format!(
                "transfer of the bundle's head from {url} broke off after {have} of {upto} \
                 bytes: {why}"
            ))),
            Ok(()) => Err(network(format!(
                "transfer of the bundle's head from {url} ended after {have} of {upto} bytes"
            ))),
        }
    })
}

/// [`download_into`] the file at `partial`, opened (or created) by path: for the release
/// side's tools and tests, which name their own files. A device's store opens its partial
/// downloads without following links instead (`Download::file`).
pub fn download(
    urls: &[String],
    partial: &Path,
    size: u64,
    sha256: &Digest,
    transfer: &Transfer,
) -> Result<()> {
    let mut file = OpenOptions::new()
        .read(true)
        .write(true)
        .create(true)
        .truncate(false)
        .open(partial)
        .map_err(|e| Error::io(format!("cannot open {}", partial.display()), e))?;
    let partial = Partial {
        file: &mut file,
        path: partial,
        size,
        sha256,
        earlier: u64::MAX,
        watch: None,
    };
    download_into(urls, partial, transfer).map(|_| ())
}

/// What one update check found. The device stores the feed's sequence and digest
/// ([`VerifiedFeed::sequence`], [`VerifiedFeed::digest`]) whatever the outcome.
#[derive(Debug)]
#[non_exhaustive]
pub enum Update {
    /// The channel has nothing current; keep what is installed.
    NothingCurrent {
        /// The verified feed.
        feed: VerifiedFeed,
    },
    /// The current release is not newer than the installed version.
    UpToDate {
        /// The verified feed.
        feed: VerifiedFeed,
    },
    /// The current release needs another app version than this one.
    NeedsOtherApp {
        /// The verified feed.
        feed: VerifiedFeed,
    },
    /// The release is rolled out to a share of devices that does not include this one yet.
    NotInRollout {
        /// The verified feed.
        feed: VerifiedFeed,
    },
    /// A newer bundle was downloaded and passed every check; install it with the store.
    Ready {
        /// The verified feed.
        feed: VerifiedFeed,
        /// The verified bundle, its file kept open.
        bundle: Box<VerifiedBundle>,
        /// Where the downloaded bundle is; remove it once installed.
        path: PathBuf,
    },
}

impl Update {
    /// The verified feed, whatever the outcome.
    pub fn feed(&self) -> &VerifiedFeed {
        match self {
            Update::NothingCurrent { feed }
            | Update::UpToDate { feed }
            | Update::NeedsOtherApp { feed }
            | Update::NotInRollout { feed }
            | Update::Ready { feed, .. } => feed,
        }
    }
}

/// The device's update check: fetch the feed, verify it, decide by version, app range and
/// rollout, download the bundle into the download directory, verify it. Installing is left to
/// the caller, who gets the [`VerifiedBundle`].
#[derive(Debug, Clone)]
pub struct Updater {
    feed_url: String,
    feeds: FeedVerifier,
    bundles: Verifier,
    device_id: String,
    download_dir: PathBuf,
    transfer: Transfer,
    trust: Option<TrustSet>,
}

impl Updater {
    /// An updater polling `feed_url`, checking feeds with `feeds` and bundles with `bundles`
    /// (whose installed version, app version and name decide what is worth downloading),
    /// placing this device in rollouts by `device_id`, downloading into `download_dir`.
    pub fn new(
        feed_url: impl Into<String>,
        feeds: FeedVerifier,
        bundles: Verifier,
        device_id: impl Into<String>,
        download_dir: impl Into<PathBuf>,
    ) -> Self {
        Updater {
            feed_url: feed_url.into(),
            feeds,
            bundles,
            device_id: device_id.into(),
            download_dir: download_dir.into(),
            transfer: Transfer::default(),
            trust: None,
        }
    }

    /// Runs on a trust set: feeds and bundles are checked with its keys and thresholds
    /// (replacing those of the verifiers given to [`Updater::new`], whose other settings
    /// stay), and a feed that names a newer trust set rotates to it within the check (see
    /// [`Updater::check_with`]).
    pub fn with_trust_set(mut self, trust: TrustSet) -> Result<Self> {
        self.feeds = self.feeds.with_trust_set(&trust)?;
        self.bundles = self.bundles.with_trust_set(&trust)?;
        self.trust = Some(trust);
        Ok(self)
    }

    /// The trust set this updater starts each check with, if it runs on one.
    pub fn trust_set(&self) -> Option<&TrustSet> {
        self.trust.as_ref()
    }

    /// The transfer limits for the feed and the bundle.
    pub fn transfer(mut self, transfer: Transfer) -> Self {
        self.transfer = transfer;
        self
    }

    /// Where the bundle of `release` is downloaded to: named by its digest, so a partial file
    /// is only ever resumed with bytes of the same file.
    pub fn download_path(&self, release: &Release) -> PathBuf {
        self.download_dir
            .join(format!("{}.ampoule.partial", release.sha256))
    }

    /// Runs one check against the clock time `now`. On a trust set, a rotation the feed
    /// announces applies to this check only and is not kept: an app that stores its trust set
    /// uses [`Updater::check_with`].
    pub fn check(&self, now: Timestamp) -> Result<Update> {
        self.check_with(now, &mut |_| Ok(()))
    }

    /// Verifies a feed; a device that missed ledger appends catches up through the tree's
    /// consistency steps, fetched next to the feed.
    fn verify_feed(
        &self,
        verifier: &FeedVerifier,
        bytes: &[u8],
        now: Timestamp,
    ) -> Result<VerifiedFeed> {
        verifier.verify_with_steps(bytes, now, &mut |size| {
            let url = resolve(&self.feed_url, &ledger::step_reference(size))?;
            fetch_capped(
                &url,
                &self.transfer,
                ledger::MAX_STEP_BYTES,
                "consistency step",
            )
        })
    }

    /// Runs one check against the clock time `now`, following a trust-set rotation.
    ///
    /// The feed is verified under the current trust set first. If it names a newer trust set
    /// (see [`crate::check::feed::TrustSetRef`]), that file is fetched (bounded like the feed), its
    /// SHA-256 checked against the feed, and accepted only through
    /// [`TrustSet::accept_successor`]; `on_trust_set` then gets it to store (normally
    /// [`crate::Store::save_trust_set`]) before anything else happens, and an error from it
    /// ends the check. The feed must verify under the new set as well, and the bundle is
    /// checked with the new set's keys: a key the rotation revokes no longer counts in the same
    /// update. A trust set the feed names that does not verify as a successor ends the check
    /// with that refusal, so that a revocation is never silently skipped. A feed naming the
    /// current trust set or an older one changes nothing: the device keeps the newest set it
    /// accepted.
    pub fn check_with(
        &self,
        now: Timestamp,
        on_trust_set: &mut dyn FnMut(&TrustSet) -> Result<()>,
    ) -> Result<Update> {
        let bytes = fetch_feed(&self.feed_url, &self.transfer)?;
        let mut feed = self.verify_feed(&self.feeds, &bytes, now)?;
        let mut rotated = None;
        if let (Some(current), Some(named)) = (&self.trust, feed.trust_set())
            && named.version > current.version()
        {
            let next = self.rotate(current, named, now)?;
            on_trust_set(&next)?;
            let under_next = self.feeds.clone().with_trust_set(&next)?;
            feed = self.verify_feed(&under_next, &bytes, now).map_err(|e| {
                e.context(format_args!(
                    "feed refused under the new trust set version {}",
                    next.version()
                ))
            })?;
            rotated = Some(self.bundles.clone().with_trust_set(&next)?);
        }
        let bundles = rotated.as_ref().unwrap_or(&self.bundles);
        let release = match feed.decide(bundles, &self.device_id)? {
            Decision::NothingOffered => return Ok(Update::NothingCurrent { feed }),
            Decision::UpToDate => return Ok(Update::UpToDate { feed }),
            Decision::NeedsOtherApp(_) => return Ok(Update::NeedsOtherApp { feed }),
            Decision::NotInRollout(_) => return Ok(Update::NotInRollout { feed }),
            Decision::Fetch(release) => release,
        };
        std::fs::create_dir_all(&self.download_dir).map_err(|e| {
            Error::io(
                format!(
                    "cannot create download directory {}",
                    self.download_dir.display()
                ),
                e,
            )
        })?;
        let path = self.download_path(&release);
        download(
            &release.urls(&self.feed_url)?,
            &path,
            release.size,
            &release.sha256,
            &self.transfer,
        )?;
        let bundle = match bundles.verify_path(&path) {
            Ok(bundle) => bundle,
            Err(e) => {
                // The bytes are the ones the feed signed, yet the bundle is refused: keeping
                // them would only refuse them again on every check.
                let _ = std::fs::remove_file(&path);
                return Err(e);
            }
        };
        if let Err(e) = feed.check_bundle(&release, &bundle) {
            let _ = std::fs::remove_file(&path);
            return Err(e);
        }
        Ok(Update::Ready {
            feed,
            bundle: Box::new(bundle),
            path,
        })
    }
}

/// For a device whose trust set expired while it was offline, so that no feed verifies under
/// it any more: finds the tree's current trust set through the feed at `feed_url` and accepts
/// it through [`Store::renew_trust_set`], which stores it.
///
/// The feed is read **without** verifying it, only to learn where the trust set is: an
/// expired set's keys authorise nothing but a successor. What the feed says is not trusted:
/// the fetched set must have the SHA-256 the feed names and is accepted only if a threshold of
/// the expired set's trust-set keys (and of its own) signed it, and only if newer. Afterwards,
/// build the updater on the returned set and check as usual.
pub fn renew_expired_trust_set(
    feed_url: &str,
    transfer: &Transfer,
    store: &Store,
    initial: &[u8],
    now: Timestamp,
) -> Result<TrustSet> {
    let bytes = fetch_feed(feed_url, transfer)?;
    let signed = SignedFeed::from_json(&bytes)?;
    let feed = Feed::from_json(signed.feed.as_bytes())?;
    let Some(named) = feed.trust_set else {
        return Err(Error::new(
            ErrorKind::TrustSet,
            format!(
                "feed at {feed_url} names no trust set, so an expired trust set cannot be \
                 renewed from it"
            ),
        ));
    };
    let (url, bytes) = fetch_named_trust_set(feed_url, &named, transfer)?;
    let next = store
        .renew_trust_set(initial, &bytes, now)
        .map_err(|e| e.context(format_args!("the trust set at {url} was refused")))?;
    check_named_version(&named, &next, &url)?;
    Ok(next)
}

/// Fetches the trust set a feed names and checks its digest.
fn fetch_named_trust_set(
    feed_url: &str,
    named: &TrustSetRef,
    transfer: &Transfer,
) -> Result<(String, Vec<u8>)> {
    let url = named.url(feed_url)?;
    let bytes = fetch_trust_set(&url, transfer)?;
    let got = Digest::of(&bytes);
    if got != named.sha256 {
        return Err(Error::new(
            ErrorKind::Digest,
            format!(
                "trust set downloaded from {url} has SHA-256 {got}, but the feed declares {}",
                named.sha256
            ),
        ));
    }
    Ok((url, bytes))
}

fn check_named_version(named: &TrustSetRef, got: &TrustSet, url: &str) -> Result<()> {
    if got.version() != named.version {
        return Err(Error::new(
            ErrorKind::Feed,
            format!(
                "feed names trust set version {} but {url} holds version {}",
                named.version,
                got.version()
            ),
        ));
    }
    Ok(())
}

impl Updater {
    /// Fetches the trust set `named` by a verified feed and accepts it as the successor of
    /// `current`.
    fn rotate(&self, current: &TrustSet, named: &TrustSetRef, now: Timestamp) -> Result<TrustSet> {
        let (url, bytes) = fetch_named_trust_set(&self.feed_url, named, &self.transfer)?;
        let next = current.accept_successor(&bytes, now).map_err(|e| {
            e.context(format_args!(
                "the trust set at {url} that the feed names was refused"
            ))
        })?;
        check_named_version(named, &next, &url)?;
        Ok(next)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A wait set to "for ever" is capped, so that `Instant::now() + wait`, which every
    /// deadline computes, cannot overflow: before the cap, `Duration::MAX` from an app made
    /// the first request panic (found while the C interface grew its limits).
    #[test]
    fn waits_set_beyond_366_days_are_capped_and_deadlines_compute() {
        let t = Transfer::new()
            .connect_timeout(Duration::MAX)
            .read_timeout(Duration::MAX)
            .total_timeout(Duration::from_millis(u64::MAX))
            .min_rate(1, Duration::MAX);
        for wait in [
            t.connect_timeout,
            t.read_timeout,
            t.total_timeout,
            t.rate_window,
        ] {
            assert_eq!(wait, LONGEST);
        }
        let now = Instant::now();
        assert!(now + t.connect_timeout + t.read_timeout > now + t.total_timeout / 2);
        let short = Transfer::new()
            .read_timeout(Duration::from_millis(200))
            .min_rate(1, Duration::ZERO);
        assert_eq!(short.read_timeout, Duration::from_millis(200));
        assert_eq!(short.rate_window, Duration::from_millis(1));
    }

    #[test]
    fn public_types_cross_threads() {
        fn send_sync<T: Send + Sync>() {}
        send_sync::<Transfer>();
        send_sync::<Updater>();
        send_sync::<Update>();
    }

    #[test]
    fn urls_must_be_http_or_https() {
        for bad in ["ftp://x/y", "file:///etc/passwd", "/relative", "http://"] {
            assert!(parse_url(bad).is_err(), "{bad}");
        }
        assert!(parse_url("https://127.0.0.1:8443/feeds/stable.json").is_ok());
    }
}
