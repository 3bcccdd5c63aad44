//! The release side's ustar writer: the bundle's outer archive and the payload's inner one,
//! with headers from the `tar` crate.
//!
//! Every header is built by hand from `tar::Header::new_ustar()` (see ../shared/CRATES.md):
//! mode 0644, owner and group 0 with empty names, the bundle's chosen time, the size, a
//! regular-file type. Nothing comes from the file system, so two packs of the same inputs at
//! the same time give the same bytes. The device reads these archives with its own strict
//! reader (`ampoule_verify::tar`); names, the layout of the blocks and the size limit come
//! from there, so what is written here is what it accepts.

use std::io::{self, Read, Write};

use ampoule_verify::format::{entry, limit};
use ampoule_verify::tar::{END_OF_ARCHIVE, padding};

/// The header of a regular file `name` of `size` bytes, stamped `mtime` (capped, like the
/// size, at what 11 octal digits hold, so no field ever takes the GNU base-256 form).
pub fn header(name: &str, size: u64, mtime: u64) -> io::Result<tar::Header> {
    if size > limit::TAR_ENTRY_BYTES {
        return Err(io::Error::other(format!(
            "tar entry {name:?} would be {size} bytes, over the ustar maximum of {} bytes",
            limit::TAR_ENTRY_BYTES
        )));
    }
    let mut h = tar::Header::new_ustar();
    // set_path would accept a path with a prefix; entry names are plain and short.
    if name.is_empty() || name.len() > 100 || name.contains(['/', '\\']) {
        return Err(io::Error::other(format!(
            "tar entry name {name:?} is not a plain name of at most 100 bytes"
        )));
    }
    h.set_path(name)?;
    h.set_entry_type(tar::EntryType::Regular);
    h.set_mode(0o644);
    h.set_uid(0);
    h.set_gid(0);
    h.set_username("")?;
    h.set_groupname("")?;
    h.set_mtime(mtime.min(limit::TAR_ENTRY_BYTES));
    h.set_size(size);
    h.set_cksum();
    Ok(h)
}

/// Writes one header's bytes.
pub fn write_header<W: Write>(out: &mut W, name: &str, size: u64, mtime: u64) -> io::Result<()> {
    out.write_all(header(name, size, mtime)?.as_bytes())
}

/// Writes the zero padding after `size` bytes of entry data.
pub fn write_padding<W: Write>(out: &mut W, size: u64) -> io::Result<()> {
    out.write_all(&[0u8; 512][..padding(size) as usize])
}

/// Writes a whole small entry: header, data, padding.
pub fn write_entry<W: Write>(out: &mut W, name: &str, data: &[u8], mtime: u64) -> io::Result<()> {
    write_header(out, name, data.len() as u64, mtime)?;
    out.write_all(data)?;
    write_padding(out, data.len() as u64)
}

/// Writes the end-of-archive marker.
pub fn write_end<W: Write>(out: &mut W) -> io::Result<()> {
    out.write_all(&END_OF_ARCHIVE)
}

/// The small entries of a bundle: the manifest, the signatures and, in format 2, the chunk
/// list.
#[derive(Clone, Copy)]
pub struct Small<'a> {
    pub manifest: &'a [u8],
    pub signatures: &'a [u8],
    /// `None` for a format 1 bundle (re-signing one keeps its layout).
    pub chunks: Option<&'a [u8]>,
}

/// Writes everything of a bundle before the payload's bytes: the manifest, signatures and
/// chunk list entries and the payload's header, `ampoule_verify::bundle::payload_offset`
/// bytes in all.
pub fn write_head<W: Write>(
    out: &mut W,
    mtime: u64,
    small: Small<'_>,
    payload_len: u64,
) -> io::Result<()> {
    write_entry(out, entry::MANIFEST, small.manifest, mtime)?;
    write_entry(out, entry::SIGNATURES, small.signatures, mtime)?;
    if let Some(chunks) = small.chunks {
        write_entry(out, entry::CHUNKS, chunks, mtime)?;
    }
    write_header(out, entry::PAYLOAD, payload_len, mtime)
}

/// Writes everything of a bundle after the payload's `payload_len` bytes: its padding and the
/// end-of-archive marker.
pub fn write_tail<W: Write>(out: &mut W, payload_len: u64) -> io::Result<()> {
    write_padding(out, payload_len)?;
    write_end(out)
}

/// Writes a whole bundle; `payload` must yield exactly `payload_len` bytes. The copy is a
/// plain `io::copy`, so file to file it runs in the kernel where the file system allows.
pub fn write_bundle<W: Write, R: Read>(
    out: &mut W,
    mtime: u64,
    small: Small<'_>,
    payload: &mut R,
    payload_len: u64,
) -> io::Result<()> {
    write_head(out, mtime, small, payload_len)?;
    let copied = io::copy(&mut payload.take(payload_len), out)?;
    if copied != payload_len {
        return Err(io::Error::new(
            io::ErrorKind::UnexpectedEof,
            format!("payload ended after {copied} of {payload_len} bytes"),
        ));
    }
    write_tail(out, payload_len)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ampoule_verify::tar::{Block, parse_header};

    #[test]
    fn headers_are_deterministic_and_pass_the_device_reader() {
        let a = header(entry::MANIFEST, 1234, 1_764_547_200).expect("header");
        let b = header(entry::MANIFEST, 1234, 1_764_547_200).expect("header");
        assert_eq!(a.as_bytes(), b.as_bytes());
        assert_eq!(
            parse_header(a.as_bytes(), "bundle").expect("the device reader accepts it"),
            Block::File {
                name: entry::MANIFEST.into(),
                size: 1234
            }
        );
        let h = a.as_bytes();
        assert_eq!(&h[100..108], b"0000644\0", "mode");
        assert_eq!(&h[108..116], b"0000000\0", "uid");
        assert_eq!(&h[116..124], b"0000000\0", "gid");
        assert_eq!(&h[257..265], b"ustar\x0000", "POSIX magic and version");
        assert!(
            h[265..329].iter().all(|&b| b == 0),
            "empty user and group names"
        );
        assert_eq!(h[156], b'0', "a regular file");
    }

    #[test]
    fn headers_refuse_paths_and_oversized_entries() {
        assert!(header("a/b", 1, 0).is_err());
        assert!(header(&"x".repeat(101), 1, 0).is_err());
        assert!(header("x", limit::TAR_ENTRY_BYTES + 1, 0).is_err());
    }
}
