//! A small static file server for a release tree, for the demo and the tests only: in
//! production the tree is plain files that any web server, CDN or object store serves.
//!
//! It answers GET and HEAD with the file's bytes, honours one byte range per request
//! (`bytes=N-`, `bytes=N-M` and the suffix form `bytes=-N`, RFC 9110 section 14.1.2) so that
//! devices can resume, and ignores any other Range header by sending the whole file, as RFC
//! 9110 allows. Paths with `..`, percent-escapes, backslashes or a segment starting with a dot
//! are refused, so nothing outside the tree and no temporary or lock file is ever served.

use std::fs::File;
use std::io::{self, Read, Seek, SeekFrom};
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::pin::Pin;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::task::{Context, Poll};
use std::time::Duration;

use hyper::body::{Body, Bytes, Frame, SizeHint};
use hyper::header::{self, HeaderValue};
use hyper::server::conn::http1;
use hyper::service::service_fn;
use hyper::{Method, Request, Response, StatusCode};
use hyper_util::rt::{TokioIo, TokioTimer};

/// How much of a file one body frame carries.
const CHUNK: u64 = 64 * 1024;

/// A response body: a short message, or a byte span of an open file read chunk by chunk.
pub enum ServeBody {
    Bytes(Option<Bytes>),
    File { file: File, remaining: u64 },
}

impl Body for ServeBody {
    type Data = Bytes;
    type Error = io::Error;

    fn poll_frame(
        self: Pin<&mut Self>,
        _cx: &mut Context<'_>,
    ) -> Poll<Option<Result<Frame<Bytes>, io::Error>>> {
        match self.get_mut() {
            ServeBody::Bytes(bytes) => Poll::Ready(bytes.take().map(|b| Ok(Frame::data(b)))),
            ServeBody::File { remaining: 0, .. } => Poll::Ready(None),
            ServeBody::File { file, remaining } => {
                // A blocking read of a local file: this server is for demos and tests, where a
                // 64 KiB read from disk is far quicker than the network it feeds.
                let mut buf = vec![0u8; (*remaining).min(CHUNK) as usize];
                if let Err(e) = file.read_exact(&mut buf) {
                    return Poll::Ready(Some(Err(e)));
                }
                *remaining -= buf.len() as u64;
                Poll::Ready(Some(Ok(Frame::data(Bytes::from(buf)))))
            }
        }
    }

    fn is_end_stream(&self) -> bool {
        match self {
            ServeBody::Bytes(b) => b.is_none(),
            ServeBody::File { remaining, .. } => *remaining == 0,
        }
    }

    fn size_hint(&self) -> SizeHint {
        match self {
            ServeBody::Bytes(b) => SizeHint::with_exact(b.as_ref().map_or(0, |b| b.len() as u64)),
            ServeBody::File { remaining, .. } => SizeHint::with_exact(*remaining),
        }
    }
}

fn text(status: StatusCode, message: &str) -> Response<ServeBody> {
    let mut response = Response::new(ServeBody::Bytes(Some(Bytes::from(format!("{message}\n")))));
    *response.status_mut() = status;
    response.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("text/plain; charset=utf-8"),
    );
    response
}

/// The file a request path names inside `root`, or why it names none.
fn resolve(root: &Path, path: &str) -> Result<PathBuf, (StatusCode, &'static str)> {
    let relative = path.strip_prefix('/').unwrap_or(path);
    let segments: Vec<&str> = relative.split('/').collect();
    let forbidden =
        path.contains(['%', '\\', '\0']) || segments.iter().any(|s| *s == ".." || *s == ".");
    if forbidden {
        return Err((
            StatusCode::BAD_REQUEST,
            "paths with '..', '.', '%' or '\\' are not served",
        ));
    }
    if segments.iter().any(|s| s.is_empty() || s.starts_with('.')) {
        return Err((StatusCode::NOT_FOUND, "not found"));
    }
    Ok(segments.iter().fold(root.to_path_buf(), |p, s| p.join(s)))
}

/// A single byte range `(first, last)` within a file of `len` bytes: `Ok(None)` when the
/// header is absent, not a single range, or not understood (the whole file is sent), and
/// `Err(())` when it is a valid range that does not overlap the file (416).
fn byte_range(header: Option<&HeaderValue>, len: u64) -> Result<Option<(u64, u64)>, ()> {
    let Some(spec) = header
        .and_then(|h| h.to_str().ok())
        .and_then(|h| h.strip_prefix("bytes="))
    else {
        return Ok(None);
    };
    let Some((first, last)) = spec.trim().split_once('-') else {
        return Ok(None);
    };
    let number = |s: &str| -> Option<u64> {
        (!s.is_empty() && s.bytes().all(|b| b.is_ascii_digit()))
            .then(|| s.parse().ok())
            .flatten()
    };
    match (number(first), number(last)) {
        (Some(first), _) if first >= len => Err(()),
        (Some(first), Some(last)) if last >= first => Ok(Some((first, last.min(len - 1)))),
        (Some(first), None) if last.is_empty() => Ok(Some((first, len - 1))),
        (None, Some(suffix)) if first.is_empty() => {
            if suffix == 0 || len == 0 {
                Err(())
            } else {
                Ok(Some((len - suffix.min(len), len - 1)))
            }
        }
        _ => Ok(None),
    }
}

fn content_type(path: &Path) -> &'static str {
    match path.extension().and_then(|e| e.to_str()) {
        Some("json") => "application/json",
        _ => "application/octet-stream",
    }
}

/// Answers one request from the files under `root`.
pub fn handle<B>(root: &Path, request: &Request<B>) -> Response<ServeBody> {
    let head = match *request.method() {
        Method::GET => false,
        Method::HEAD => true,
        _ => {
            let mut response = text(
                StatusCode::METHOD_NOT_ALLOWED,
                "only GET and HEAD are served",
            );
            response
                .headers_mut()
                .insert(header::ALLOW, HeaderValue::from_static("GET, HEAD"));
            return response;
        }
    };
    let path = match resolve(root, request.uri().path()) {
        Ok(path) => path,
        Err((status, message)) => return text(status, message),
    };
    let opened = File::open(&path).and_then(|f| {
        let meta = f.metadata()?;
        Ok((f, meta))
    });
    let (mut file, len) = match opened {
        Ok((f, meta)) if meta.is_file() => (f, meta.len()),
        _ => return text(StatusCode::NOT_FOUND, "not found"),
    };
    let (status, first, count) = match byte_range(request.headers().get(header::RANGE), len) {
        Ok(None) => (StatusCode::OK, 0, len),
        Ok(Some((first, last))) => (StatusCode::PARTIAL_CONTENT, first, last - first + 1),
        Err(()) => {
            let mut response = text(StatusCode::RANGE_NOT_SATISFIABLE, "range not satisfiable");
            if let Ok(v) = HeaderValue::from_str(&format!("bytes */{len}")) {
                response.headers_mut().insert(header::CONTENT_RANGE, v);
            }
            return response;
        }
    };
    if first > 0 && file.seek(SeekFrom::Start(first)).is_err() {
        return text(StatusCode::INTERNAL_SERVER_ERROR, "cannot read the file");
    }
    let body = if head {
        ServeBody::Bytes(None)
    } else {
        ServeBody::File {
            file,
            remaining: count,
        }
    };
    let mut response = Response::new(body);
    *response.status_mut() = status;
    let headers = response.headers_mut();
    headers.insert(header::CONTENT_LENGTH, HeaderValue::from(count));
    headers.insert(header::ACCEPT_RANGES, HeaderValue::from_static("bytes"));
    headers.insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static(content_type(&path)),
    );
    if status == StatusCode::PARTIAL_CONTENT {
        let range = format!("bytes {first}-{}/{len}", first + count - 1);
        if let Ok(v) = HeaderValue::from_str(&range) {
            headers.insert(header::CONTENT_RANGE, v);
        }
    }
    response
}

/// Serves `root` on `addr` until the process is stopped, calling `ready` with the bound
/// address first.
pub fn run(root: PathBuf, addr: SocketAddr, ready: impl FnOnce(SocketAddr)) -> io::Result<()> {
    let listener = std::net::TcpListener::bind(addr)?;
    ready(listener.local_addr()?);
    serve_until(root, listener, &AtomicBool::new(false), None)
}

/// A server running on a background thread of this process (for the demo, tests and
/// benchmarks), stopped by [`Server::shutdown`] or when dropped.
pub struct Server {
    addr: SocketAddr,
    stop: Arc<AtomicBool>,
    served: Arc<AtomicU64>,
    thread: Option<std::thread::JoinHandle<io::Result<()>>>,
}

impl Server {
    /// Binds `addr` (port 0 picks a free port) and serves `root` from a background thread.
    pub fn start(root: PathBuf, addr: SocketAddr) -> io::Result<Server> {
        let listener = std::net::TcpListener::bind(addr)?;
        let addr = listener.local_addr()?;
        let stop = Arc::new(AtomicBool::new(false));
        let flag = Arc::clone(&stop);
        let served = Arc::new(AtomicU64::new(0));
        let count = Arc::clone(&served);
        let thread = std::thread::Builder::new()
            .name("ampoule-serve".into())
            .spawn(move || serve_until(root, listener, &flag, Some(count)))?;
        Ok(Server {
            addr,
            stop,
            served,
            thread: Some(thread),
        })
    }

    /// How many bytes of files this server has answered with so far (the bodies of 200 and
    /// 206 answers, as their lengths state them), for tests that count what a client cost.
    pub fn bytes_served(&self) -> u64 {
        self.served.load(Ordering::SeqCst)
    }

    /// The address the server listens on.
    pub fn addr(&self) -> SocketAddr {
        self.addr
    }

    /// The URL of a path in the tree, like `feeds/stable.json`.
    pub fn url(&self, path: &str) -> String {
        format!("http://{}/{path}", self.addr)
    }

    /// Stops accepting, ends open connections and waits for the thread.
    pub fn shutdown(mut self) -> io::Result<()> {
        self.stop_thread()
    }

    fn stop_thread(&mut self) -> io::Result<()> {
        let Some(thread) = self.thread.take() else {
            return Ok(());
        };
        self.stop.store(true, Ordering::SeqCst);
        // The accept loop checks the flag after each connection: one more wakes it.
        let _ = std::net::TcpStream::connect(self.addr);
        thread
            .join()
            .map_err(|_| io::Error::other("the server thread panicked"))?
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        let _ = self.stop_thread();
    }
}

/// Serves `root` on `listener` until `stop` is set (checked after each accepted connection);
/// dropping the runtime then ends the connections still open.
fn serve_until(
    root: PathBuf,
    listener: std::net::TcpListener,
    stop: &AtomicBool,
    served: Option<Arc<AtomicU64>>,
) -> io::Result<()> {
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_io()
        .enable_time()
        .build()?;
    let root = Arc::new(root);
    listener.set_nonblocking(true)?;
    runtime.block_on(async move {
        let listener = tokio::net::TcpListener::from_std(listener)?;
        loop {
            let accepted = listener.accept().await;
            if stop.load(Ordering::SeqCst) {
                return Ok(());
            }
            let (stream, _) = match accepted {
                Ok(conn) => conn,
                // Out of file descriptors or a connection reset before accept: keep serving.
                Err(_) => {
                    tokio::time::sleep(Duration::from_millis(50)).await;
                    continue;
                }
            };
            let root = Arc::clone(&root);
            let served = served.clone();
            tokio::spawn(async move {
                let service = service_fn(move |request: Request<hyper::body::Incoming>| {
                    let response = handle(&root, &request);
                    if let (Some(served), ServeBody::File { remaining, .. }) =
                        (&served, response.body())
                    {
                        served.fetch_add(*remaining, Ordering::SeqCst);
                    }
                    async move { Ok::<_, std::convert::Infallible>(response) }
                });
                let _ = http1::Builder::new()
                    .timer(TokioTimer::new())
                    .header_read_timeout(Duration::from_secs(10))
                    .serve_connection(TokioIo::new(stream), service)
                    .await;
            });
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ranges() {
        let h = |s: &'static str| HeaderValue::from_static(s);
        assert_eq!(byte_range(None, 10), Ok(None));
        assert_eq!(byte_range(Some(&h("bytes=0-")), 10), Ok(Some((0, 9))));
        assert_eq!(byte_range(Some(&h("bytes=4-")), 10), Ok(Some((4, 9))));
        assert_eq!(byte_range(Some(&h("bytes=2-5")), 10), Ok(Some((2, 5))));
        assert_eq!(byte_range(Some(&h("bytes=2-99")), 10), Ok(Some((2, 9))));
        assert_eq!(byte_range(Some(&h("bytes=-3")), 10), Ok(Some((7, 9))));
        assert_eq!(byte_range(Some(&h("bytes=-30")), 10), Ok(Some((0, 9))));
        assert_eq!(byte_range(Some(&h("bytes=10-")), 10), Err(()));
        assert_eq!(byte_range(Some(&h("bytes=-0")), 10), Err(()));
        for ignored in [
            "bytes=5-2",
            "bytes=0-1,4-5",
            "items=0-1",
            "bytes=a-b",
            "bytes=-",
        ] {
            assert_eq!(byte_range(Some(&h(ignored)), 10), Ok(None), "{ignored}");
        }
    }
}
