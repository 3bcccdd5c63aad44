//! Issue 13 item 4, for updates: a format 2 bundle's download is checked chunk by chunk as it
//! arrives, and resumed after the last chunk that checked. The real binary updates a store
//! through a proxy written here, in front of the in-process server, which damages the first
//! bundle transfer once (one flipped byte, or a connection cut) and counts the bundle bytes
//! it passes on. Expected sizes come from the bundle's own layout, read with the tar format's
//! 512-byte blocks (POSIX.1-1988 ustar), and the installed model is compared byte for byte
//! with the file that was packed.

use std::io::{Read, Write};
use std::net::{Shutdown, SocketAddr, TcpListener, TcpStream};
use std::path::Path;
use std::process::Output;
use std::sync::Arc;
use std::sync::Mutex;
use std::sync::atomic::{AtomicU64, Ordering};

use ampoule::release::serve::Server;
use ampoule_verify::Digest;

mod tree_common;
use tree_common::*;

/// What the proxy does to the bundle transfers whose range runs to the end of the file (the
/// payload, asked for once the head checked); every other transfer passes untouched.
#[derive(Clone, Copy)]
enum Fault {
    /// The first such transfer: flip the low bit of the byte at this offset of its body.
    Flip(u64),
    /// The first such transfer: close the connection after this many bytes of its body;
    /// every later one: close it before any response, so the update gives up.
    Cut(u64),
}

struct Proxy {
    addr: SocketAddr,
    fault: Arc<Mutex<Option<Fault>>>,
    /// Response body bytes passed on for bundle requests (`.ampoule`), all transfers. Bytes
    /// the client stopped reading are counted too: they were sent.
    bundle_bytes: Arc<AtomicU64>,
    /// Where each payload transfer began: the first byte of its open range.
    starts: Arc<Mutex<Vec<u64>>>,
}

impl Proxy {
    fn start(upstream: SocketAddr, fault: Fault) -> Proxy {
        let listener = TcpListener::bind("127.0.0.1:0").expect("bind 127.0.0.1");
        let addr = listener.local_addr().expect("addr");
        let proxy = Proxy {
            addr,
            fault: Arc::new(Mutex::new(Some(fault))),
            bundle_bytes: Arc::new(AtomicU64::new(0)),
            starts: Arc::new(Mutex::new(Vec::new())),
        };
        let (fault, counted, starts) = (
            proxy.fault.clone(),
            proxy.bundle_bytes.clone(),
            proxy.starts.clone(),
        );
        std::thread::spawn(move || {
            for client in listener.incoming() {
                let Ok(client) = client else { return };
                let (fault, counted, starts) = (fault.clone(), counted.clone(), starts.clone());
                std::thread::spawn(move || relay(client, upstream, &fault, &counted, &starts));
            }
        });
        proxy
    }

    /// From now on every transfer passes untouched, and the count starts again.
    fn heal(&self) {
        *self.fault.lock().expect("fault") = None;
        self.bundle_bytes.store(0, Ordering::SeqCst);
    }

    fn bundle_bytes(&self) -> u64 {
        self.bundle_bytes.load(Ordering::SeqCst)
    }

    fn starts(&self) -> Vec<u64> {
        self.starts.lock().expect("starts").clone()
    }
}

/// One request and its response per connection: the proxy asks the server to close after it.
fn relay(
    mut client: TcpStream,
    upstream: SocketAddr,
    fault: &Mutex<Option<Fault>>,
    counted: &AtomicU64,
    starts: &Mutex<Vec<u64>>,
) {
    let mut request = Vec::new();
    let mut byte = [0u8; 1];
    while !request.ends_with(b"\r\n\r\n") {
        match client.read(&mut byte) {
            Ok(1) => request.push(byte[0]),
            _ => return,
        }
    }
    let text = String::from_utf8_lossy(&request).to_ascii_lowercase();
    let bundle = text.lines().next().is_some_and(|l| l.contains(".ampoule "));
    // An open range ("bytes=N-") is the payload's transfer; the head's range has an end.
    let open_range = text.lines().find_map(|l| {
        let range = l
            .strip_prefix("range: bytes=")?
            .trim_end()
            .strip_suffix('-')?;
        range.parse::<u64>().ok()
    });
    if let (true, Some(start)) = (bundle, open_range) {
        starts.lock().expect("starts").push(start);
    }
    let transfers = starts.lock().expect("starts").len();
    let fault = match *fault.lock().expect("fault") {
        Some(fault) if bundle && open_range.is_some() => match transfers {
            1 => Some(fault),
            _ if matches!(fault, Fault::Cut(_)) => return,
            _ => None,
        },
        _ => None,
    };
    let mut forwarded: Vec<u8> = Vec::new();
    for line in String::from_utf8_lossy(&request).split("\r\n") {
        if !line.is_empty() && !line.to_ascii_lowercase().starts_with("connection:") {
            forwarded.extend_from_slice(line.as_bytes());
            forwarded.extend_from_slice(b"\r\n");
        }
    }
    forwarded.extend_from_slice(b"Connection: close\r\n\r\n");
    let Ok(mut server) = TcpStream::connect(upstream) else {
        return;
    };
    if server.write_all(&forwarded).is_err() {
        return;
    }
    let mut head = Vec::new();
    let mut body_seen = 0u64;
    let mut buf = vec![0u8; 16 * 1024];
    loop {
        let n = match server.read(&mut buf) {
            Ok(0) | Err(_) => break,
            Ok(n) => n,
        };
        let mut data = buf[..n].to_vec();
        // Split off the response head once; offsets below count body bytes only.
        let mut body_from = 0;
        if !head.ends_with(b"\r\n\r\n") {
            while body_from < data.len() && !head.ends_with(b"\r\n\r\n") {
                head.push(data[body_from]);
                body_from += 1;
            }
        }
        let body = &mut data[body_from..];
        let mut cut = false;
        match fault {
            Some(Fault::Flip(at)) if (body_seen..body_seen + body.len() as u64).contains(&at) => {
                body[(at - body_seen) as usize] ^= 1;
            }
            Some(Fault::Cut(after)) if body_seen + body.len() as u64 >= after => {
                let keep = body_from + (after - body_seen) as usize;
                data.truncate(keep);
                cut = true;
            }
            _ => {}
        }
        let sent_body = (data.len() - body_from) as u64;
        if bundle {
            counted.fetch_add(sent_body, Ordering::SeqCst);
        }
        body_seen += sent_body;
        if client.write_all(&data).is_err() || cut {
            break;
        }
    }
    let _ = client.shutdown(Shutdown::Both);
}

/// Where the payload starts in a bundle: after the ustar entries before it, each a 512-byte
/// header and its data padded to 512 bytes, found by walking the headers (the size field is
/// octal at offset 124, the name at offset 0).
fn payload_offset(bundle: &[u8]) -> u64 {
    let mut at = 0usize;
    loop {
        let header = &bundle[at..at + 512];
        let name = String::from_utf8_lossy(&header[..100]);
        let size_field = String::from_utf8_lossy(&header[124..136]);
        let size =
            usize::from_str_radix(size_field.trim_matches(|c: char| c == '\0' || c == ' '), 8)
                .expect("octal size");
        if name.trim_end_matches('\0') == "payload.tar.zst" {
            return (at + 512) as u64;
        }
        at += 512 + size.div_ceil(512) * 512;
    }
}

fn update(d: &Path, proxy: &Proxy) -> Output {
    let url = format!("http://{}/feeds/stable.json", proxy.addr);
    run(
        d,
        &[
            "update",
            "--store",
            "cam",
            "--feed",
            &url,
            "--trust",
            "k.pub",
            "--app-version",
            "2.3.0",
            "--json",
        ],
    )
}

fn installed_model(d: &Path, out: &Output) -> Vec<u8> {
    assert!(
        out.status.success(),
        "update failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let doc: serde_json::Value = serde_json::from_slice(&out.stdout).expect("JSON");
    std::fs::read(d.join(doc["model"].as_str().expect("model path"))).expect("installed model")
}

fn serve(d: &Path) -> Server {
    Server::start(d.join("tree"), "127.0.0.1:0".parse().expect("addr")).expect("server starts")
}

const HEAD: u64 = ampoule_verify::format::limit::HEAD_BYTES;

#[test]
fn issue13_a_chunk_damaged_in_transit_is_fetched_again_from_that_chunk() {
    let dir = setup();
    let d = dir.path();
    let (bundle, model) = pack_chunky(d, "1.0.0", 4 << 20);
    publish(d, &bundle, "stable", "100");
    let bytes = std::fs::read(d.join(&bundle)).expect("bundle");
    let size = bytes.len() as u64;
    let server = serve(d);
    // A byte of the payload's third chunk or so, 1.2 MiB past the head's end.
    let proxy = Proxy::start(server.addr(), Fault::Flip(1_200_000));

    let out = update(d, &proxy);
    let installed = installed_model(d, &out);
    assert!(installed == model, "the installed model is the packed one");
    // One update: the head, the payload from the head's end, and the payload again from
    // the damaged chunk's first byte, which lies less than one chunk (at most 512 KiB and a
    // few bytes, compressed) before the damaged byte, and after the payload's start.
    let flipped = HEAD + 1_200_000;
    let starts = proxy.starts();
    assert_eq!(starts.len(), 2, "two payload transfers: {starts:?}");
    assert_eq!(starts[0], HEAD);
    assert!(
        starts[1] <= flipped && flipped - starts[1] <= 525_000,
        "resumed at {}, the damaged byte is at {flipped}",
        starts[1]
    );
    assert!(starts[1] > payload_offset(&bytes), "not from the start");
    // The update counts what it received: the bundle once, and again the damaged chunk's
    // bytes and whatever arrived with its last byte in the same read (the HTTP client hands
    // a body on in pieces of up to some hundreds of KB). Starting over would cost the whole
    // bundle twice.
    let doc: serde_json::Value = serde_json::from_slice(&out.stdout).expect("JSON");
    let downloaded = doc["downloaded_bytes"].as_u64().expect("count");
    assert!(
        downloaded > size && downloaded < size + (1536 << 10),
        "{downloaded} bytes downloaded for a {size}-byte bundle"
    );
}

#[test]
fn issue13_a_partial_download_altered_in_the_store_keeps_the_chunks_before_the_change() {
    let dir = setup();
    let d = dir.path();
    let (bundle, model) = pack_chunky(d, "1.0.0", 4 << 20);
    publish(d, &bundle, "stable", "100");
    let bytes = std::fs::read(d.join(&bundle)).expect("bundle");
    let size = bytes.len() as u64;
    let digest = Digest::of(&bytes);
    let server = serve(d);

    // The first update breaks off 2.5 MB into the payload's transfer.
    let cut = Proxy::start(server.addr(), Fault::Cut(2_500_000));
    let out = update(d, &cut);
    assert!(!out.status.success(), "the transfer was cut");
    let partial = d.join(format!("cam/downloads/{digest}.ampoule.partial"));
    let kept = std::fs::metadata(&partial).expect("partial kept").len();
    assert_eq!(
        kept,
        HEAD + 2_500_000,
        "everything received is kept for resuming"
    );

    // Someone with write access to the store changes one byte 1 MB into the payload.
    let payload = payload_offset(&bytes);
    let altered_at = payload + 1_000_000;
    let mut file = std::fs::read(&partial).expect("partial");
    file[altered_at as usize] ^= 0x80;
    std::fs::write(&partial, &file).expect("alter the partial download");

    cut.heal();
    let out = update(d, &cut);
    let installed = installed_model(d, &out);
    assert!(installed == model, "the installed model is the packed one");
    // The resumed download began at the altered chunk's first byte: after the chunks before
    // it, which checked, and before the altered byte. Chunks are at most 512 KiB and a few
    // bytes each, compressed, so that byte's chunk starts less than one chunk before it.
    let served = cut.bundle_bytes();
    let resumed_at = size - served;
    assert!(
        resumed_at <= altered_at && altered_at - resumed_at <= 525_000,
        "resumed at {resumed_at}, the altered byte is at {altered_at}"
    );
    assert!(
        resumed_at > payload,
        "the chunks before the altered one were kept"
    );
}
