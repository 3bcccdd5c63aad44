//! SHA-256 digests (FIPS 180-4) as a newtype, and the streaming helpers that compute them.
//!
//! Every byte of a bundle is covered by a digest the signature binds; the verifier computes
//! them while it streams, never by loading a file into memory.

use std::fmt;
use std::io::{self, Read, Write};
use std::str::FromStr;

use serde::{Deserialize, Deserializer, Serialize, Serializer};
use sha2::{Digest as _, Sha256};

/// A SHA-256 digest, shown and serialized as 64 lowercase hex characters.
#[derive(Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Digest([u8; 32]);

impl Digest {
    pub_for_release! {
        /// The digest's length in bytes.
        const LEN: usize = 32;
    }

    pub_for_release! {
        /// Wraps raw digest bytes.
        const fn from_bytes(bytes: [u8; 32]) -> Self {
            Digest(bytes)
        }
    }

    pub_for_release! {
        /// The raw digest bytes.
        const fn as_bytes(&self) -> &[u8; 32] {
            &self.0
        }
    }

    pub_for_release! {
        /// The SHA-256 digest of `data`.
        fn of(data: &[u8]) -> Self {
            Digest(Sha256::digest(data).into())
        }
    }

    pub_for_release! {
        /// Lowercase hex.
        fn to_hex(&self) -> String {
            hex::encode(self.0)
        }
    }
}

impl fmt::Display for Digest {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.to_hex())
    }
}

impl fmt::Debug for Digest {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "Digest({self})")
    }
}

/// The text was not 64 lowercase hex characters.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ParseDigestError(String);

impl fmt::Display for ParseDigestError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "'{}' is not a SHA-256 digest (64 lowercase hex characters)",
            self.0.escape_debug()
        )
    }
}

impl std::error::Error for ParseDigestError {}

impl FromStr for Digest {
    type Err = ParseDigestError;

    fn from_str(s: &str) -> Result<Self, Self::Err> {
        let shown = || ParseDigestError(s.chars().take(80).collect());
        // Uppercase hex would give the same bytes under two spellings; one spelling only.
        if s.len() != 64 || !s.bytes().all(|b| matches!(b, b'0'..=b'9' | b'a'..=b'f')) {
            return Err(shown());
        }
        let mut bytes = [0u8; 32];
        hex::decode_to_slice(s, &mut bytes).map_err(|_| shown())?;
        Ok(Digest(bytes))
    }
}

impl Serialize for Digest {
    fn serialize<S: Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        serializer.serialize_str(&self.to_hex())
    }
}

impl<'de> Deserialize<'de> for Digest {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        let text = <std::borrow::Cow<'de, str>>::deserialize(deserializer)?;
        text.parse().map_err(serde::de::Error::custom)
    }
}

/// An incremental SHA-256 hasher that also counts the bytes it has seen.
#[derive(Clone, Default)]
pub struct Hasher {
    inner: Sha256,
    len: u64,
}

impl Hasher {
    /// A fresh hasher.
    pub fn new() -> Self {
        Self::default()
    }

    /// Feeds bytes.
    pub fn update(&mut self, data: &[u8]) {
        self.inner.update(data);
        self.len += data.len() as u64;
    }

    /// How many bytes were fed so far.
    pub fn len(&self) -> u64 {
        self.len
    }

    /// Whether no byte was fed yet.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// The digest of everything fed.
    pub fn finish(self) -> Digest {
        Digest(self.inner.finalize().into())
    }
}

impl Write for Hasher {
    fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
        self.update(buf);
        Ok(buf.len())
    }

    fn flush(&mut self) -> io::Result<()> {
        Ok(())
    }
}

/// Hashes everything a reader yields, reading at most `limit` bytes; returns the digest and
/// the number of bytes read. The caller compares the count with what it expected.
pub fn hash_reader<R: Read>(reader: R, limit: u64) -> io::Result<(Digest, u64)> {
    let mut hasher = Hasher::new();
    let mut limited = reader.take(limit);
    let mut buf = vec![0u8; 256 * 1024];
    loop {
        let n = match limited.read(&mut buf) {
            Ok(0) => break,
            Ok(n) => n,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => continue,
            Err(e) => return Err(e),
        };
        hasher.update(&buf[..n]);
    }
    let len = hasher.len();
    Ok((hasher.finish(), len))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parse_refuses_uppercase_short_and_non_hex() {
        let good = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad";
        assert_eq!(good.parse::<Digest>().map(|d| d.to_hex()), Ok(good.into()));
        for bad in [
            &good.to_uppercase()[..],
            &good[..63],
            &good.replace('a', "g")[..],
        ] {
            assert!(bad.parse::<Digest>().is_err(), "{bad} parsed");
        }
        // Found by cargo-mutants (issue 15): the refusal's text and the Debug form.
        assert_eq!(
            "ABC".parse::<Digest>().expect_err("short").to_string(),
            "'ABC' is not a SHA-256 digest (64 lowercase hex characters)"
        );
        let digest: Digest = good.parse().expect("good");
        assert_eq!(format!("{digest:?}"), format!("Digest({good})"));
    }

    /// FIPS 180-4 (and FIPS 180-2 Appendix B.1): SHA-256 of "abc".
    const ABC: &str = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad";

    #[test]
    fn the_hasher_counts_and_hashes_what_is_written_to_it() {
        // Found by cargo-mutants (issue 15): `Write` and `is_empty` were never exercised.
        let mut hasher = Hasher::new();
        assert!(hasher.is_empty());
        assert_eq!(hasher.write(b"ab").expect("write"), 2);
        assert!(!hasher.is_empty());
        std::io::copy(&mut &b"c"[..], &mut hasher).expect("copy");
        assert_eq!(hasher.len(), 3);
        assert_eq!(hasher.finish().to_hex(), ABC);
    }

    /// Yields "abc" after one interrupted read, then fails for good if `then_fail`.
    struct Interrupting {
        calls: u32,
        then_fail: bool,
    }

    impl Read for Interrupting {
        fn read(&mut self, buf: &mut [u8]) -> io::Result<usize> {
            self.calls += 1;
            match self.calls {
                1 => Err(io::ErrorKind::Interrupted.into()),
                2 => {
                    buf[..3].copy_from_slice(b"abc");
                    Ok(3)
                }
                _ if self.then_fail => Err(io::Error::other("the disk went away")),
                _ => Ok(0),
            }
        }
    }

    #[test]
    fn hash_reader_retries_an_interrupted_read_and_stops_at_a_real_error() {
        // Found by cargo-mutants (issue 15): an interrupted read (a signal) is retried, any
        // other error ends the hashing.
        let reader = Interrupting {
            calls: 0,
            then_fail: false,
        };
        let (digest, len) = hash_reader(reader, 1024).expect("interrupted once, then read");
        assert_eq!((digest.to_hex().as_str(), len), (ABC, 3));
        let failing = Interrupting {
            calls: 0,
            then_fail: true,
        };
        let err = hash_reader(failing, 1024).expect_err("a real error");
        assert_eq!(err.to_string(), "the disk went away");
    }
}
