#!/usr/bin/env python3
"""Writes crates/verify/src/format/unicode.rs: the fixed Unicode tables of the label rule
(issue 10 item 7), from Python's standard-library `unicodedata` (its Unicode version is the
tables' version; Python 3.11 has Unicode 14.0.0).

    python3 crates/verify/tools/unicode_tables.py > crates/verify/src/format/unicode.rs

The tables:
- INVISIBLE: code points a label may not hold (except in the contexts labels.rs allows):
  General_Category Cf (format characters) from unicodedata, the line and paragraph separators
  (Zl, Zp), and the Default_Ignorable_Code_Point ranges of DerivedCoreProperties.txt that are
  not Cf (listed below by hand: unicodedata does not carry that property).
- NFC_NO: code points with NFC_Quick_Check=No, i.e. those NFC never outputs: normalize('NFC', c)
  differs from c.
- CCC: the canonical combining class of every code point whose class is not 0.
- PAIRS: every primary composite (canonical decomposition into two code points, not excluded
  from composition), as (first, second) -> composite; Hangul syllables are algorithmic.
"""
import sys
import unicodedata as u

EXPECTED = "14.0.0"
if u.unidata_version != EXPECTED:
    sys.exit(f"this Python has Unicode {u.unidata_version}; the tables are {EXPECTED}")

ALL = [c for c in range(0x110000) if not 0xD800 <= c < 0xE000]

# Default_Ignorable_Code_Point (DerivedCoreProperties.txt, Unicode 14.0) outside Cf, from the
# file's own list (from memory; the Cf part is taken from unicodedata above):
# 034F CGJ; 115F..1160 Hangul fillers; 17B4..17B5 Khmer inherent vowels; 180B..180D, 180F
# Mongolian free variation selectors; 2065 (reserved); 3164 Hangul filler; FE00..FE0F
# variation selectors; FFA0 halfwidth Hangul filler; FFF0..FFF8 (reserved); E0000..E0FFF
# (tags, variation selectors 17-256, reserved).
IGNORABLE = [
    (0x034F, 0x034F), (0x115F, 0x1160), (0x17B4, 0x17B5), (0x180B, 0x180D), (0x180F, 0x180F),
    (0x2065, 0x2065), (0x3164, 0x3164), (0xFE00, 0xFE0F), (0xFFA0, 0xFFA0), (0xFFF0, 0xFFF8),
    (0xE0000, 0xE0FFF),
]


def ranges(points):
    out = []
    for c in sorted(points):
        if out and out[-1][1] == c - 1:
            out[-1][1] = c
        else:
            out.append([c, c])
    return out


invisible = {c for c in ALL if u.category(chr(c)) in ("Cf", "Zl", "Zp")}
for lo, hi in IGNORABLE:
    invisible.update(range(lo, hi + 1))
nfc_no = [c for c in ALL if u.normalize("NFC", chr(c)) != chr(c)]
ccc = []
for c in ALL:
    k = u.combining(chr(c))
    if k:
        if ccc and ccc[-1][1] == c - 1 and ccc[-1][2] == k:
            ccc[-1][1] = c
        else:
            ccc.append([c, c, k])
pairs = []
for c in ALL:
    d = u.decomposition(chr(c))
    if not d or d.startswith("<"):
        continue
    parts = [int(x, 16) for x in d.split()]
    if len(parts) == 2 and u.normalize("NFC", chr(c)) == chr(c):
        pairs.append((parts[0], parts[1], c))
pairs.sort()
seconds = sorted({p[1] for p in pairs})
assert len(seconds) <= 64 and max(p[0] for p in pairs) < 1 << 24
assert all(hi - lo < 256 for lo, hi, _ in ccc)
by_composite = sorted(range(len(pairs)), key=lambda i: pairs[i][2])


def rows(items, per_line):
    lines = []
    for i in range(0, len(items), per_line):
        lines.append("    " + " ".join(items[i:i + per_line]))
    return "\n".join(lines)


out = sys.stdout
out.write(f"""//! Fixed Unicode {EXPECTED} tables for the label rule ([`crate::format::labels`]), written by
//! `crates/verify/tools/unicode_tables.py` from Python's `unicodedata`; do not edit by hand.
//! Their size is part of what this crate adds to an app (CHANGELOG, issue 10 item 7).

/// Unicode version of these tables.
pub const VERSION: &str = "{EXPECTED}";

/// Inclusive ranges a label may not hold outside the contexts the label rule allows: format
/// characters (Cf), line and paragraph separators, and default-ignorable code points.
pub(crate) const INVISIBLE: &[(u32, u32)] = &[
""")
out.write(rows([f"(0x{lo:X}, 0x{hi:X})," for lo, hi in ranges(invisible)], 4) + "\n];\n\n")
out.write("""/// Inclusive ranges of NFC_Quick_Check=No: code points NFC never outputs.
pub(crate) const NFC_NO: &[(u32, u32)] = &[
""")
out.write(rows([f"(0x{lo:X}, 0x{hi:X})," for lo, hi in ranges(nfc_no)], 4) + "\n];\n\n")
out.write("""/// Code points with a canonical combining class other than 0: `start << 8 | (len - 1)`,
/// sorted, with the class of each range in [`CCC_CLASS`].
pub(crate) const CCC_RANGE: &[u32] = &[
""")
out.write(rows([f"0x{lo << 8 | (hi - lo):X}," for lo, hi, _ in ccc], 8) + "\n];\n\n")
out.write("/// The canonical combining class of each [`CCC_RANGE`].\npub(crate) const CCC_CLASS: &[u8] = &[\n")
out.write(rows([f"{k}," for _, _, k in ccc], 16) + "\n];\n\n")
out.write("/// The second code points of [`PAIRS`].\npub(crate) const SECONDS: &[u32] = &[\n")
out.write(rows([f"0x{s:X}," for s in seconds], 8) + "\n];\n\n")
out.write("""/// Primary composites, sorted: `(first << 6 | index of second in SECONDS, composite)`.
pub(crate) const PAIRS: &[(u32, u32)] = &[
""")
out.write(rows([f"(0x{f << 6 | seconds.index(s):X}, 0x{c:X})," for f, s, c in pairs], 4) + "\n];\n\n")
out.write("/// Indices into [`PAIRS`], sorted by composite.\npub(crate) const BY_COMPOSITE: &[u16] = &[\n")
out.write(rows([f"{i}," for i in by_composite], 16) + "\n];\n")
