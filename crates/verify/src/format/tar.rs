//! The subset of POSIX ustar (IEEE Std 1003.1, "pax" chapter, ustar interchange format) that
//! bundles use, written and read by hand.
//!
//! A general tar library reads extension headers into memory, skips `..` entries and follows
//! links; this module instead accepts exactly what the writer produces: regular-file headers with
//! the POSIX `ustar\0` magic, short names, octal sizes, a correct checksum, zero padding and the
//! two zero blocks at the end. Everything else is refused with the reason.
//!
//! Why the device's reader stays hand-written while the release side (`ampoule pack`, in
//! `src/release/ustar.rs`) writes its archives with the `tar` crate:
//! - Bounded reading: every size is checked against the format's caps before a byte of the
//!   entry is read, and the payload is streamed, never held; a general reader buffers GNU
//!   long names and pax extension payloads in memory before the caller sees the entry.
//! - A fixed subset: exactly the headers a bundle has (plain short names in a fixed order,
//!   regular files, the POSIX magic, a correct checksum, zero padding, nothing after the end
//!   marker), so anything else is refused with its reason rather than interpreted.
//! - No GNU or pax extensions, links, devices or directories to get wrong on a device.
//! - No dependency: the library apps embed stays small, within its size budget, and its
//!   whole reading path can be audited in this one file.
//!
//! The writer here ([`header`]) remains for the offline file, the library's `release` feature
//! and tests that lay out hostile bundles by hand; both writers' headers pass this reader, and
//! the pack tests check every bundle they make with it and with GNU tar.

use std::io::{self, Read};

use crate::error::{Error, ErrorKind, Result};
use crate::format::limit;

/// The tar block size.
pub const BLOCK: u64 = 512;

/// The end-of-archive marker: two zero blocks.
pub const END_OF_ARCHIVE: [u8; 1024] = [0u8; 1024];

/// Bytes of zero padding after `size` bytes of entry data.
pub fn padding(size: u64) -> u64 {
    (BLOCK - size % BLOCK) % BLOCK
}

/// The number of bytes one entry occupies: header, data and padding.
pub fn entry_len(size: u64) -> u64 {
    BLOCK + size + padding(size)
}

/// A ustar header for a regular file: mode 0644, owner and group 0 with empty names, the given
/// modification time. Two calls with the same arguments give the same bytes.
///
/// # Panics
/// If `name` is longer than 100 bytes or `size` does not fit 11 octal digits; callers pass
/// names from [`crate::format::entry`] and sizes checked against
/// [`limit::TAR_ENTRY_BYTES`].
pub fn header(name: &str, size: u64, mtime: u64) -> [u8; 512] {
    assert!(
        name.len() <= 100,
        "tar entry name {name:?} is over 100 bytes"
    );
    assert!(
        size <= limit::TAR_ENTRY_BYTES,
        "tar entry size {size} is over the ustar maximum"
    );
    let mut h = [0u8; 512];
    h[..name.len()].copy_from_slice(name.as_bytes());
    put_octal(&mut h[100..108], 0o644);
    put_octal(&mut h[108..116], 0);
    put_octal(&mut h[116..124], 0);
    put_octal(&mut h[124..136], size);
    put_octal(&mut h[136..148], mtime.min(limit::TAR_ENTRY_BYTES));
    h[156] = b'0';
    h[257..263].copy_from_slice(b"ustar\0");
    h[263..265].copy_from_slice(b"00");
    put_octal(&mut h[329..337], 0);
    put_octal(&mut h[337..345], 0);
    h[148..156].fill(b' ');
    let sum: u32 = h.iter().map(|&b| u32::from(b)).sum();
    // Six octal digits, NUL, space: the layout most writers use for the checksum field.
    let digits = format!("{sum:06o}");
    h[148..154].copy_from_slice(digits.as_bytes());
    h[154] = 0;
    h[155] = b' ';
    h
}

/// Writes `value` as zero-padded octal digits followed by a NUL, filling the field.
fn put_octal(field: &mut [u8], value: u64) {
    let width = field.len() - 1;
    let digits = format!("{value:0width$o}");
    field[..width].copy_from_slice(digits.as_bytes());
    field[width] = 0;
}

/// Parses an octal numeric field: optional leading spaces, octal digits, then only NULs or
/// spaces. Base-256 (GNU) and empty fields are refused.
fn parse_octal(field: &[u8]) -> Option<u64> {
    let start = field.iter().position(|&b| b != b' ')?;
    let digits_end = field[start..]
        .iter()
        .position(|&b| !(b'0'..=b'7').contains(&b))
        .map_or(field.len(), |p| start + p);
    if digits_end == start || !field[digits_end..].iter().all(|&b| b == 0 || b == b' ') {
        return None;
    }
    field[start..digits_end].iter().try_fold(0u64, |acc, &d| {
        acc.checked_mul(8)?.checked_add(u64::from(d - b'0'))
    })
}

/// A NUL-terminated text field, as bytes.
fn text_field(field: &[u8]) -> &[u8] {
    let end = field.iter().position(|&b| b == 0).unwrap_or(field.len());
    &field[..end]
}

/// Shows bytes from an untrusted header safely in a message.
pub(crate) fn shown(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes)
        .chars()
        .take(100)
        .collect::<String>()
        .escape_debug()
        .to_string()
}

/// The header checksum: the byte sum with the checksum field read as spaces.
fn checksum(h: &[u8; 512]) -> u64 {
    h.iter()
        .enumerate()
        .map(|(i, &b)| u64::from(if (148..156).contains(&i) { b' ' } else { b }))
        .sum()
}

/// Whether a block is a tar header at all (its checksum field matches), as opposed to stray
/// bytes.
fn has_valid_checksum(h: &[u8; 512]) -> bool {
    parse_octal(&h[148..156]) == Some(checksum(h))
}

/// What a header block holds, once checked.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Block {
    /// A regular file entry with this name and size.
    File {
        /// The entry name, as written (checked to be printable UTF-8 without slashes).
        name: String,
        /// The entry's data size in bytes.
        size: u64,
    },
    /// A zero block: the start of the end-of-archive marker.
    Zero,
}

/// Which entry names an archive holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Names {
    /// Plain file names without `/`: bundles and their payloads.
    Plain,
    /// Relative paths of plain names joined by single `/`s, never `.` or `..`: an offline
    /// file, whose entries mirror a release tree. Its reader then matches each name against
    /// its own fixed set.
    Paths,
}

/// Checks one 512-byte header block. `archive` names the archive in messages ("bundle",
/// "payload").
pub fn parse_header(h: &[u8; 512], archive: &str) -> Result<Block> {
    parse_header_with(h, archive, Names::Plain)
}

/// [`parse_header`] for an archive whose entry names are `names`.
pub(crate) fn parse_header_with(h: &[u8; 512], archive: &str, names: Names) -> Result<Block> {
    if h.iter().all(|&b| b == 0) {
        return Ok(Block::Zero);
    }
    let malformed = |what: String| Error::new(ErrorKind::Malformed, what);
    let name_bytes = text_field(&h[..100]);
    let name = shown(name_bytes);
    let stored = parse_octal(&h[148..156]).ok_or_else(|| {
        malformed(format!(
            "{archive} entry '{name}' has an unreadable tar checksum"
        ))
    })?;
    let sum = checksum(h);
    if stored != sum {
        return Err(malformed(format!(
            "{archive} entry '{name}' has a bad tar header checksum (stored {stored:o}, computed {sum:o}): \
             the file is damaged or not a bundle"
        )));
    }
    if &h[257..263] != b"ustar\0" || &h[263..265] != b"00" {
        return Err(malformed(format!(
            "{archive} entry '{name}' is not a POSIX ustar header (magic \"{}\"); \
             write bundles with 'tar --format=ustar'",
            shown(&h[257..265])
        )));
    }
    let kind = match h[156] {
        b'0' => None,
        b'1' => Some("a hard link"),
        b'2' => Some("a symbolic link"),
        b'3' => Some("a character device"),
        b'4' => Some("a block device"),
        b'5' => Some("a directory"),
        b'6' => Some("a FIFO"),
        b'x' | b'g' => Some("a pax extended header"),
        b'L' | b'K' => Some("a GNU long-name header"),
        _ => Some("an entry of an unknown type"),
    };
    if let Some(kind) = kind {
        return Err(malformed(format!(
            "{archive} entry '{name}' is {kind} (tar type {:?}); only regular files are allowed",
            char::from(h[156])
        )));
    }
    if !text_field(&h[345..500]).is_empty() {
        return Err(malformed(format!(
            "{archive} entry '{name}' uses the ustar name prefix field; entry names must be short plain file names"
        )));
    }
    if !text_field(&h[157..257]).is_empty() {
        return Err(malformed(format!(
            "{archive} entry '{name}' names a link target; only regular files are allowed"
        )));
    }
    let plain = std::str::from_utf8(name_bytes)
        .ok()
        .filter(|n| !n.is_empty() && n.chars().all(|c| !c.is_control()));
    let Some(plain) = plain else {
        return Err(malformed(format!(
            "{archive} entry name '{name}' is empty or not printable UTF-8"
        )));
    };
    let refusal = match names {
        Names::Plain if plain.contains(['/', '\\']) || plain == "." || plain == ".." => {
            Some("is a path; bundles hold only plain file names, nothing outside them")
        }
        Names::Paths
            if plain.contains('\\')
                || plain
                    .split('/')
                    .any(|s| s.is_empty() || s == "." || s == "..") =>
        {
            Some("is not a relative path of plain names; nothing may point outside the archive")
        }
        _ => None,
    };
    if let Some(refusal) = refusal {
        return Err(malformed(format!(
            "{archive} entry name '{name}' {refusal}"
        )));
    }
    let size = parse_octal(&h[124..136]).ok_or_else(|| {
        malformed(format!(
            "{archive} entry '{name}' has an unreadable size field \"{}\"",
            shown(&h[124..136])
        ))
    })?;
    Ok(Block::File {
        name: plain.to_string(),
        size,
    })
}

/// The error for `what` (an entry, a header) ending before its declared size.
pub(crate) fn truncated(what: &str) -> Error {
    Error::new(
        ErrorKind::Malformed,
        format!("{what} is truncated: the file ended early"),
    )
}

/// Reads exactly `buf.len()` bytes, turning a short read into a truncation error.
pub(crate) fn read_exact_or_truncated<R: Read>(
    reader: &mut R,
    buf: &mut [u8],
    what: impl FnOnce() -> String,
) -> Result<()> {
    match reader.read_exact(buf) {
        Ok(()) => Ok(()),
        Err(e) if e.kind() == io::ErrorKind::UnexpectedEof => Err(truncated(&what())),
        Err(e) => Err(Error::io(format!("cannot read {}", what()), e)),
    }
}

/// Reads and checks the zero padding after an entry of `size` bytes.
pub(crate) fn read_padding<R: Read>(
    reader: &mut R,
    size: u64,
    archive: &str,
    name: &str,
) -> Result<()> {
    let mut pad = [0u8; 512];
    let pad = &mut pad[..padding(size) as usize];
    read_exact_or_truncated(reader, pad, || format!("{archive} entry '{name}'"))?;
    if pad.iter().any(|&b| b != 0) {
        return Err(Error::new(
            ErrorKind::Malformed,
            format!("{archive} entry '{name}' has non-zero bytes in its tar padding"),
        ));
    }
    Ok(())
}

/// Reads the end-of-archive marker and checks that nothing follows it.
///
/// A header where the marker belongs is named with its own refusal (a pax header, a GNU long
/// name, a directory, a link) or as an extra entry, whatever its size.
pub(crate) fn read_end<R: Read>(reader: &mut R, archive: &str) -> Result<()> {
    let mut first = [0u8; 512];
    read_exact_or_truncated(reader, &mut first, || {
        format!("{archive} end-of-archive marker")
    })?;
    if first != [0u8; 512] && !has_valid_checksum(&first) {
        return Err(Error::new(
            ErrorKind::Malformed,
            format!(
                "{archive} has an unexpected extra entry or bytes where the end-of-archive marker belongs"
            ),
        ));
    }
    if let Block::File { name, .. } = parse_header(&first, archive)? {
        return Err(Error::new(
            ErrorKind::Malformed,
            format!(
                "{archive} has an extra entry '{}' after its last declared entry",
                shown(name.as_bytes())
            ),
        ));
    }
    let mut second = [0u8; 512];
    read_exact_or_truncated(reader, &mut second, || {
        format!("{archive} end-of-archive marker")
    })?;
    if second != [0u8; 512] {
        return Err(Error::new(
            ErrorKind::Malformed,
            format!(
                "{archive} has an unexpected extra entry or bytes where the end-of-archive marker belongs"
            ),
        ));
    }
    let mut probe = [0u8; 1];
    loop {
        return match reader.read(&mut probe) {
            Ok(0) => Ok(()),
            Ok(_) => Err(Error::new(
                ErrorKind::Malformed,
                format!("{archive} has trailing bytes after the end-of-archive marker"),
            )),
            Err(e) if e.kind() == io::ErrorKind::Interrupted => continue,
            Err(e) => Err(Error::io(
                format!("cannot read the end of the {archive}"),
                e,
            )),
        };
    }
}

/// Reads the next header block and expects the regular file `expected` (entry `index` of
/// `order`), refusing duplicates, reordering and an early end with messages that say which.
pub(crate) fn expect_entry<R: Read>(
    reader: &mut R,
    archive: &str,
    order: &[&str],
    index: usize,
) -> Result<u64> {
    let (name, size) = next_entry(reader, archive, order, index)?;
    check_entry(name, size, archive, order, index)
}

/// Reads the next header block, which must be a regular file (entry `index` of `order` is
/// named in messages), and returns its name and size without checking the name.
pub(crate) fn next_entry<R: Read>(
    reader: &mut R,
    archive: &str,
    order: &[&str],
    index: usize,
) -> Result<(String, u64)> {
    let expected = order[index];
    let mut h = [0u8; 512];
    read_exact_or_truncated(reader, &mut h, || {
        format!("{archive} header of entry '{expected}'")
    })?;
    match parse_header(&h, archive)? {
        Block::Zero => Err(Error::new(
            ErrorKind::Malformed,
            format!("{archive} ends before entry '{expected}': the entry is missing"),
        )),
        Block::File { name, size } => Ok((name, size)),
    }
}

/// Requires the entry [`next_entry`] read to be entry `index` of `order`, refusing
/// duplicates and reordering with messages that say which; returns its size.
pub(crate) fn check_entry(
    name: String,
    size: u64,
    archive: &str,
    order: &[&str],
    index: usize,
) -> Result<u64> {
    let expected = order[index];
    if name == expected {
        return Ok(size);
    }
    let message = if order[..index].contains(&name.as_str()) {
        format!("{archive} entry '{}' appears twice", shown(name.as_bytes()))
    } else if order[index..].contains(&name.as_str()) {
        format!(
            "{archive} entry '{}' is out of order: entry {} must be '{expected}'",
            shown(name.as_bytes()),
            index + 1
        )
    } else {
        format!(
            "{archive} entry '{}' is not allowed: entry {} must be '{expected}'",
            shown(name.as_bytes()),
            index + 1
        )
    };
    Err(Error::new(ErrorKind::Malformed, message))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn header_round_trips_and_is_deterministic() {
        let h = header("manifest.json", 1234, 1_764_547_200);
        assert_eq!(h, header("manifest.json", 1234, 1_764_547_200));
        assert_eq!(
            parse_header(&h, "bundle").map_err(|e| e.to_string()),
            Ok(Block::File {
                name: "manifest.json".into(),
                size: 1234
            })
        );
    }

    #[test]
    fn octal_fields_parse_strictly() {
        assert_eq!(parse_octal(b"00000001750\0"), Some(1000));
        assert_eq!(parse_octal(b"   1750 \0\0\0\0"), Some(1000));
        assert_eq!(parse_octal(b"\0\0\0\0"), None);
        assert_eq!(parse_octal(b"0017x0\0"), None);
        assert_eq!(parse_octal(&[0x80, 0, 0, 0, 0, 0, 0, 1]), None);
    }

    #[test]
    fn checksum_mismatch_is_refused() {
        let mut h = header("manifest.json", 10, 0);
        h[0] = b'n';
        let err = parse_header(&h, "bundle")
            .map(|_| ())
            .map_err(|e| e.to_string());
        assert!(
            err.as_ref()
                .is_err_and(|e| e.contains("bad tar header checksum")),
            "{err:?}"
        );
    }
}
