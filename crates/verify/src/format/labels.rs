//! The label list: which class each model output index means. One rule set serves `pack`
//! (which normalizes what the engineer wrote) and the device (which checks what it unpacked).
//!
//! A label is what a person reads, so nothing in it may be invisible or reorder the text
//! around it (issue 10 item 7). With the Unicode 14.0 tables of [`crate::format::unicode`]:
//! - no control character, and no format character (General_Category Cf), line or paragraph
//!   separator, or default-ignorable code point: bidirectional controls (U+061C, U+200E,
//!   U+200F, U+202A..U+202E, U+2066..U+2069), U+FEFF, U+200B, U+2060, soft hyphens, Hangul
//!   fillers, variation selectors and tags, except in these contexts, where scripts and emoji
//!   need them:
//!   - U+200C (ZWNJ) and U+200D (ZWJ) between two letters of [`JOINING`]: the scripts that
//!     use them (Arabic, Syriac, N'Ko, the Indic scripts, Tibetan, Myanmar, Khmer, Mongolian)
//!     and the emoji blocks, or after U+FE0F in an emoji sequence;
//!   - U+FE0E and U+FE0F (text and emoji presentation) after an emoji ([`EMOJI`]), or after a
//!     keycap base (0-9, #, *) that U+20E3 follows;
//!   - tags U+E0020..U+E007E after U+1F3F4, closed by U+E007F (subdivision flags);
//!   - the Mongolian variation selectors and vowel separator after a Mongolian character;
//! - no leading or trailing white space, except a label that is exactly one space or exactly
//!   U+3000 (OCR dictionaries have a class for each);
//! - Normalization Form C: a label not in NFC is refused rather than normalized, so two labels
//!   that look alike are never two byte strings, the stored bytes are the ones compared and
//!   shown, and the check needs only the small tables NFC quick checks use, not a normalizer's.
//!   Duplicates are then compared byte for byte. One exception (issue 11 item 5): a label that
//!   is exactly one CJK compatibility ideograph (U+F900..U+FAFF, U+2F800..U+2FA1F), which NFC
//!   would replace by its unified ideograph. A character-level OCR model has a class for each
//!   code point its dictionary lists, and real dictionaries list both: the label list of the
//!   PP-OCRv4 recognizer in the `rapidocr-onnxruntime` 1.4.4 wheel (its model's `character`
//!   metadata, with "blank" first) has U+F92C on line 5931 and U+90CE on line 4975, U+F979 on
//!   line 6581 and U+51C9 on line 5399; refusing them would refuse that model.

use std::collections::HashSet;

use crate::error::{Error, ErrorKind, Result};
use crate::format::limit;
use crate::format::tar::shown;
use crate::format::unicode::{
    BY_COMPOSITE, CCC_CLASS, CCC_RANGE, INVISIBLE, NFC_NO, PAIRS, SECONDS,
};

/// Where U+200C and U+200D may stand between two characters: blocks of Blocks.txt (Unicode
/// 14.0) of the scripts that use them (The Unicode Standard 14.0, section 23.2, "Layout
/// Controls"; from memory) and of the emoji that ZWJ sequences join (emoji-zwj-sequences.txt).
pub(crate) const JOINING: &[(u32, u32)] = &[
    (0x0600, 0x077F),   // Arabic, Syriac, Arabic Supplement
    (0x07C0, 0x07FF),   // NKo
    (0x0860, 0x08FF),   // Syriac Supplement, Arabic Extended-B, Arabic Extended-A
    (0x0900, 0x0DFF),   // Devanagari .. Sinhala
    (0x0F00, 0x0FFF),   // Tibetan
    (0x1000, 0x109F),   // Myanmar
    (0x1780, 0x18AF),   // Khmer, Mongolian
    (0x2190, 0x21FF),   // Arrows (emoji such as U+2194, U+27A1 follow ZWJ)
    (0x2300, 0x23FF),   // Miscellaneous Technical
    (0x2600, 0x27BF),   // Miscellaneous Symbols, Dingbats
    (0x2B00, 0x2BFF),   // Miscellaneous Symbols and Arrows (U+2B1B in "black cat")
    (0xA8E0, 0xA8FF),   // Devanagari Extended
    (0xFB50, 0xFDFF),   // Arabic Presentation Forms-A
    (0xFE70, 0xFEFE),   // Arabic Presentation Forms-B (not U+FEFF)
    (0x1F000, 0x1FAFF), // the emoji blocks, skin-tone modifiers included
];

/// Emoji that U+FE0E or U+FE0F may follow: the blocks of emoji-variation-sequences.txt
/// (Unicode 14.0; from memory) and the single code points it lists outside them.
pub(crate) const EMOJI: &[(u32, u32)] = &[
    (0x00A9, 0x00A9),
    (0x00AE, 0x00AE),
    (0x203C, 0x203C),
    (0x2049, 0x2049),
    (0x2122, 0x2122),
    (0x2139, 0x2139),
    (0x2190, 0x21FF),
    (0x2300, 0x23FF),
    (0x24C2, 0x24C2),
    (0x25A0, 0x27BF),
    (0x2900, 0x297F),
    (0x2B00, 0x2BFF),
    (0x3030, 0x3030),
    (0x303D, 0x303D),
    (0x3297, 0x3297),
    (0x3299, 0x3299),
    (0x1F000, 0x1FAFF),
];

fn in_ranges(table: &[(u32, u32)], c: char) -> bool {
    let c = u32::from(c);
    let i = table.partition_point(|&(lo, _)| lo <= c);
    i > 0 && table[i - 1].1 >= c
}

/// Whether `c` is a format character, line or paragraph separator, or default-ignorable code
/// point (the table the label rule refuses outside its few contexts): text that a terminal
/// does not show as itself, or that changes how the text around it is shown.
pub fn is_invisible(c: char) -> bool {
    in_ranges(INVISIBLE, c)
}

/// Why the character at `i` of a label may not stand there, or `None` when it may.
fn invisible_at(chars: &[char], i: usize) -> Option<&'static str> {
    let c = chars[i];
    if !in_ranges(INVISIBLE, c) {
        return None;
    }
    let prev = i.checked_sub(1).map(|p| chars[p]);
    let next = chars.get(i + 1).copied();
    let allowed = match u32::from(c) {
        0x200C | 0x200D => {
            prev.is_some_and(|p| in_ranges(JOINING, p) || p == '\u{FE0F}')
                && next.is_some_and(|n| in_ranges(JOINING, n))
        }
        0xFE0E | 0xFE0F => prev.is_some_and(|p| {
            in_ranges(EMOJI, p) || (matches!(p, '0'..='9' | '#' | '*') && next == Some('\u{20E3}'))
        }),
        0x180B..=0x180F => prev.is_some_and(|p| ('\u{1800}'..='\u{18AF}').contains(&p)),
        0xE0020..=0xE007F => tag_sequence_ok(chars, i),
        _ => false,
    };
    if allowed {
        return None;
    }
    Some(match u32::from(c) {
        0x061C | 0x200E | 0x200F | 0x202A..=0x202E | 0x2066..=0x2069 => {
            "a bidirectional control, which can make text display in another order"
        }
        0x200C | 0x200D => "a joiner outside the letters or emoji it may join",
        _ => "an invisible format character",
    })
}

/// Whether the tag at `i` belongs to a subdivision-flag sequence: U+1F3F4, one or more tags
/// U+E0020..U+E007E, then U+E007F (Unicode Technical Standard #51, "Emoji Tag Sequences").
fn tag_sequence_ok(chars: &[char], i: usize) -> bool {
    let is_tag = |c: &char| ('\u{E0020}'..='\u{E007E}').contains(c);
    let start = chars[..i]
        .iter()
        .rposition(|c| !is_tag(c))
        .map_or(0, |p| p + 1);
    let end = i + chars[i..].iter().take_while(|c| is_tag(c)).count();
    let closes = if chars[i] == '\u{E007F}' { i } else { end };
    start > 0
        && chars[start - 1] == '\u{1F3F4}'
        && closes > start
        && chars.get(closes) == Some(&'\u{E007F}')
}

/// The canonical combining class of `c` (0 for starters).
fn ccc(c: u32) -> u8 {
    let i = CCC_RANGE.partition_point(|&r| r >> 8 <= c);
    match i.checked_sub(1) {
        Some(i) if c <= (CCC_RANGE[i] >> 8) + (CCC_RANGE[i] & 0xFF) => CCC_CLASS[i],
        _ => 0,
    }
}

// Hangul syllables compose and decompose by arithmetic (The Unicode Standard, section 3.12).
const S_BASE: u32 = 0xAC00;
const L_BASE: u32 = 0x1100;
const V_BASE: u32 = 0x1161;
const T_BASE: u32 = 0x11A7;
const V_COUNT: u32 = 21;
const T_COUNT: u32 = 28;
const N_COUNT: u32 = V_COUNT * T_COUNT;
const S_COUNT: u32 = 19 * N_COUNT;

/// Whether NFC may compose `c` with a character before it (NFC_Quick_Check=Maybe).
fn composes_with_previous(c: u32) -> bool {
    SECONDS.binary_search(&c).is_ok()
        || (V_BASE..V_BASE + V_COUNT).contains(&c)
        || (T_BASE + 1..T_BASE + T_COUNT).contains(&c)
}

fn compose(a: u32, b: u32) -> Option<u32> {
    if (L_BASE..L_BASE + 19).contains(&a) && (V_BASE..V_BASE + V_COUNT).contains(&b) {
        return Some(S_BASE + ((a - L_BASE) * V_COUNT + (b - V_BASE)) * T_COUNT);
    }
    if (S_BASE..S_BASE + S_COUNT).contains(&a)
        && (a - S_BASE).is_multiple_of(T_COUNT)
        && (T_BASE + 1..T_BASE + T_COUNT).contains(&b)
    {
        return Some(a + (b - T_BASE));
    }
    let second = u32::try_from(SECONDS.binary_search(&b).ok()?).ok()?;
    let key = a << 6 | second;
    let i = PAIRS.binary_search_by_key(&key, |p| p.0).ok()?;
    Some(PAIRS[i].1)
}

fn decompose(c: u32, out: &mut Vec<u32>) {
    if (S_BASE..S_BASE + S_COUNT).contains(&c) {
        let s = c - S_BASE;
        out.push(L_BASE + s / N_COUNT);
        out.push(V_BASE + (s % N_COUNT) / T_COUNT);
        if !s.is_multiple_of(T_COUNT) {
            out.push(T_BASE + s % T_COUNT);
        }
        return;
    }
    match BY_COMPOSITE.binary_search_by_key(&c, |&i| PAIRS[usize::from(i)].1) {
        Ok(i) => {
            let key = PAIRS[usize::from(BY_COMPOSITE[i])].0;
            decompose(key >> 6, out);
            out.push(SECONDS[(key & 0x3F) as usize]);
        }
        Err(_) => out.push(c),
    }
}

/// Whether `text` is in Unicode Normalization Form C (UAX #15), by the tables of Unicode 14.0:
/// the quick check of UAX #15 section 9, and where it answers "maybe", the full
/// decomposition, canonical ordering and composition, compared with the text.
pub fn is_nfc(text: &str) -> bool {
    let mut maybe = false;
    let mut last = 0u8;
    for c in text.chars() {
        if in_ranges(NFC_NO, c) {
            return false;
        }
        let class = ccc(u32::from(c));
        if class != 0 && last > class {
            return false;
        }
        last = class;
        maybe |= composes_with_previous(u32::from(c));
    }
    if !maybe {
        return true;
    }
    let mut d = Vec::new();
    for c in text.chars() {
        decompose(u32::from(c), &mut d);
    }
    for i in 1..d.len() {
        let mut j = i;
        while j > 0 && ccc(d[j]) != 0 && ccc(d[j - 1]) > ccc(d[j]) {
            d.swap(j - 1, j);
            j -= 1;
        }
    }
    let mut composed: Vec<u32> = Vec::with_capacity(d.len());
    let mut starter: Option<usize> = None;
    let mut last_class = 0u8;
    for c in d {
        let class = ccc(c);
        if let Some(s) = starter {
            let blocked = composed.len() - 1 != s && last_class >= class;
            if !blocked && let Some(both) = compose(composed[s], c) {
                composed[s] = both;
                continue;
            }
        }
        if class == 0 {
            starter = Some(composed.len());
        }
        composed.push(c);
        last_class = class;
    }
    composed.iter().copied().eq(text.chars().map(u32::from))
}

/// Why `label` breaks the rule of text a person can read (see the module documentation), as
/// the end of a sentence that starts "label on line N ('...')".
fn unreadable(label: &str) -> Option<String> {
    if label == " " || label == "\u{3000}" {
        return None;
    }
    if label.trim() != label || label.chars().any(char::is_control) {
        return Some("has leading or trailing spaces or control characters".into());
    }
    if label.is_ascii() {
        return None;
    }
    let chars: Vec<char> = label.chars().collect();
    for i in 0..chars.len() {
        if let Some(why) = invisible_at(&chars, i) {
            return Some(format!(
                "holds U+{:04X}, {why}; labels may not hold invisible or bidirectional format \
                 characters (Unicode {})",
                u32::from(chars[i]),
                crate::format::unicode::VERSION
            ));
        }
    }
    if !is_nfc(label) && !is_cjk_compatibility_ideograph(label) {
        return Some(format!(
            "is not in Unicode Normalization Form C (NFC, Unicode {}); write it composed, \
             for example with Python's unicodedata.normalize('NFC', text)",
            crate::format::unicode::VERSION
        ));
    }
    None
}

/// Whether `label` is exactly one CJK compatibility ideograph (Blocks.txt, Unicode 14.0: CJK
/// Compatibility Ideographs and its Supplement); see the module documentation.
fn is_cjk_compatibility_ideograph(label: &str) -> bool {
    let mut chars = label.chars();
    matches!(
        (chars.next(), chars.next()),
        (Some('\u{F900}'..='\u{FAFF}' | '\u{2F800}'..='\u{2FA1F}'), None)
    )
}

fn refused(message: String) -> Error {
    Error::new(ErrorKind::Manifest, message)
}

/// Parses a label file as a person wrote it: UTF-8, one label per line, `\n` or `\r\n` line
/// ends, a final newline optional. Refuses empty, duplicate, over-long or too many labels and
/// labels with leading or trailing spaces or control characters, naming the line.
pub fn parse_labels(bytes: &[u8]) -> Result<Vec<String>> {
    let text = std::str::from_utf8(bytes).map_err(|e| {
        let line = bytes[..e.valid_up_to()]
            .iter()
            .filter(|&&b| b == b'\n')
            .count()
            + 1;
        refused(format!("label list is not valid UTF-8 (line {line})"))
    })?;
    let body = text.strip_suffix('\n').unwrap_or(text);
    if body.is_empty() {
        return Err(refused(
            "label list is empty; a model needs at least one label".into(),
        ));
    }
    let mut labels = Vec::new();
    let mut seen = HashSet::new();
    for (i, raw) in body.split('\n').enumerate() {
        let line = i + 1;
        let label = raw.strip_suffix('\r').unwrap_or(raw);
        if labels.len() >= limit::LABELS {
            return Err(refused(format!(
                "label list has more than {} labels",
                limit::LABELS
            )));
        }
        if label.is_empty() {
            return Err(refused(format!("label on line {line} is empty")));
        }
        if label.len() > limit::LABEL_BYTES {
            return Err(refused(format!(
                "label on line {line} is {} bytes, over the limit of {}",
                label.len(),
                limit::LABEL_BYTES
            )));
        }
        if let Some(why) = unreadable(label) {
            return Err(refused(format!(
                "label on line {line} ('{}') {why}",
                shown(label.as_bytes())
            )));
        }
        if !seen.insert(label) {
            return Err(refused(format!(
                "label '{}' appears twice (again on line {line}); each output index needs its own label",
                shown(label.as_bytes())
            )));
        }
        labels.push(label.to_string());
    }
    Ok(labels)
}

/// The label file as bundles store it: each label followed by `\n`.
pub fn labels_file(labels: &[String]) -> Vec<u8> {
    let mut out = Vec::new();
    for label in labels {
        out.extend_from_slice(label.as_bytes());
        out.push(b'\n');
    }
    out
}

/// Parses a label file from a bundle, which must be in exactly the stored form.
pub fn parse_stored_labels(bytes: &[u8]) -> Result<Vec<String>> {
    let labels = parse_labels(bytes)?;
    if labels_file(&labels) != bytes {
        return Err(refused(
            "labels.txt is not in the stored form (one label per line, each ending in a single '\\n')"
                .into(),
        ));
    }
    Ok(labels)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn err(bytes: &[u8]) -> String {
        parse_labels(bytes).map_or_else(|e| e.to_string(), |l| format!("ok {l:?}"))
    }

    #[test]
    fn normalizes_line_ends() {
        assert_eq!(
            parse_labels(b"fox\r\nroe deer\nbadger").map_err(|e| e.to_string()),
            Ok(vec!["fox".into(), "roe deer".into(), "badger".into()])
        );
    }

    #[test]
    fn refusals_name_the_line() {
        assert_eq!(
            err(b""),
            "label list is empty; a model needs at least one label"
        );
        assert_eq!(
            err(b"\n"),
            "label list is empty; a model needs at least one label"
        );
        assert_eq!(err(b"fox\n\nhare\n"), "label on line 2 is empty");
        assert_eq!(
            err(b"fox\nhare\nfox\n"),
            "label 'fox' appears twice (again on line 3); each output index needs its own label"
        );
        assert_eq!(
            err(b"fox\n\xff\n"),
            "label list is not valid UTF-8 (line 2)"
        );
        assert_eq!(
            err(b"fox \n"),
            "label on line 1 ('fox ') has leading or trailing spaces or control characters"
        );
    }

    /// `label` alone as a label file: `None` when accepted, else the refusal's reason.
    fn why(label: &str) -> Option<String> {
        let text = format!("{label}\n");
        parse_labels(text.as_bytes()).err().map(|e| {
            let message = e.to_string();
            let at = message.find("') ").map_or(0, |p| p + 3);
            message[at..].to_string()
        })
    }

    const INVISIBLE_WHY: &str = "an invisible format character; labels may not hold invisible \
                                 or bidirectional format characters (Unicode 14.0.0)";
    const BIDI_WHY: &str = "a bidirectional control, which can make text display in another \
                            order; labels may not hold invisible or bidirectional format \
                            characters (Unicode 14.0.0)";
    const NFC_WHY: &str = "is not in Unicode Normalization Form C (NFC, Unicode 14.0.0); write \
                           it composed, for example with Python's unicodedata.normalize('NFC', \
                           text)";

    #[test]
    fn range_tables_are_sorted_and_disjoint() {
        use crate::format::unicode::{CCC_CLASS, CCC_RANGE};
        for (name, table) in [
            ("JOINING", JOINING),
            ("EMOJI", EMOJI),
            ("INVISIBLE", INVISIBLE),
            ("NFC_NO", NFC_NO),
        ] {
            assert!(
                table.iter().all(|(lo, hi)| lo <= hi) && table.windows(2).all(|w| w[0].1 < w[1].0),
                "{name} must be sorted and disjoint for its binary search"
            );
        }
        assert_eq!(CCC_RANGE.len(), CCC_CLASS.len());
        assert!(
            CCC_RANGE
                .windows(2)
                .all(|w| (w[0] >> 8) + (w[0] & 0xFF) < w[1] >> 8)
        );
        assert!(PAIRS.windows(2).all(|w| w[0].0 < w[1].0));
        assert!(
            BY_COMPOSITE
                .windows(2)
                .all(|w| { PAIRS[usize::from(w[0])].1 < PAIRS[usize::from(w[1])].1 })
        );
    }

    #[test]
    fn issue10_real_scripts_and_emoji_that_need_joiners_pass() {
        // Each from memory of the named Unicode document; the code points are written out so
        // the test does not depend on how this file's text is normalized.
        for (label, source) in [
            // emoji-zwj-sequences.txt (Unicode Emoji 14.0), RGI_Emoji_ZWJ_Sequence lines.
            ("\u{1F469}\u{200D}\u{1F4BB}", "woman technologist"),
            (
                "\u{1F469}\u{1F3FD}\u{200D}\u{1F52C}",
                "woman scientist: medium skin tone",
            ),
            (
                "\u{1F441}\u{FE0F}\u{200D}\u{1F5E8}\u{FE0F}",
                "eye in speech bubble",
            ),
            ("\u{1F3F3}\u{FE0F}\u{200D}\u{1F308}", "rainbow flag"),
            ("\u{1F43B}\u{200D}\u{2744}\u{FE0F}", "polar bear"),
            ("\u{1F408}\u{200D}\u{2B1B}", "black cat"),
            ("\u{2764}\u{FE0F}\u{200D}\u{1F525}", "heart on fire"),
            ("\u{1F9D1}\u{200D}\u{1F33E}", "farmer"),
            // emoji-test.txt (Unicode Emoji 14.0): a subdivision flag, a keycap.
            (
                "\u{1F3F4}\u{E0067}\u{E0062}\u{E0073}\u{E0063}\u{E0074}\u{E007F}",
                "flag: Scotland",
            ),
            ("\u{0031}\u{FE0F}\u{20E3}", "keycap: 1"),
            // The Unicode Standard 14.0, section 23.2 (ZWNJ in Persian): "mi-khaham".
            (
                "\u{0645}\u{06CC}\u{200C}\u{062E}\u{0648}\u{0627}\u{0647}\u{0645}",
                "Persian, ZWNJ after the prefix mi-",
            ),
            // Section 12.1 (Devanagari), ZWJ asking for a half form: ka, virama, ZWJ, ssa.
            ("\u{0915}\u{094D}\u{200D}\u{0937}", "Devanagari half form"),
            // Section 12.2 (Bengali): ra, ZWJ, virama, ya (ya-phala after ra).
            ("\u{09B0}\u{200D}\u{09CD}\u{09AF}", "Bengali ya-phala"),
            // Section 13.2 (Sinhala): "Sri", sha, al-lakuna, ZWJ, ra, ii.
            ("\u{0DC1}\u{0DCA}\u{200D}\u{0DBB}\u{0DD3}", "Sinhala Sri"),
            // Malayalam "avan" with the atomic chillu n (U+0D7B, since Unicode 5.1).
            ("\u{0D05}\u{0D35}\u{0D7B}", "Malayalam atomic chillu"),
            // NFC text whose marks the quick check can only call "maybe".
            (
                "\u{0B95}\u{0BBE}\u{0B95}\u{0BAE}\u{0BCD}",
                "Tamil kaakam (crow)",
            ),
            (
                "\u{091C}\u{093C}",
                "Devanagari ja + nukta: U+095B is excluded from composition",
            ),
            (
                "\u{B2E4}\u{B78C}\u{C950}",
                "Korean daramjwi (squirrel), precomposed",
            ),
            ("Ti\u{1EBF}ng Vi\u{1EC7}t", "Vietnamese, composed"),
            (" ", "a single space (OCR dictionaries)"),
            ("\u{3000}", "a single ideographic space (OCR dictionaries)"),
        ] {
            assert_eq!(why(label), None, "{source}: {}", label.escape_unicode());
        }
    }

    #[test]
    fn issue11_a_lone_cjk_compatibility_ideograph_is_a_label() {
        // rapidocr-onnxruntime 1.4.4, the PP-OCRv4 recognizer's label list, lines 5931 and 6581
        // (crates/verify/tests/real_models.rs reads the whole list): each is its own class
        // beside its unified ideograph (lines 4975 and 5399), which NFC would turn it into.
        for label in ["\u{F92C}", "\u{F979}", "\u{90CE}", "\u{51C9}"] {
            assert_eq!(why(label), None, "{}", label.escape_unicode());
        }
        // Blocks.txt (Unicode 14.0): the supplement's first code point, U+2F800.
        assert_eq!(why("\u{2F800}"), None);
        // Only alone: inside a longer label the NFC rule still holds, and a neighbour of the
        // blocks is not excused.
        assert_eq!(why("\u{F92C}\u{F979}"), Some(NFC_WHY.into()));
        assert_eq!(why("a\u{F92C}"), Some(NFC_WHY.into()));
        assert_eq!(why("\u{212B}"), Some(NFC_WHY.into()));
    }

    #[test]
    fn issue10_invisible_and_bidirectional_characters_are_refused() {
        for (label, reason) in [
            ("fox\u{202E}eraH", format!("holds U+202E, {BIDI_WHY}")),
            ("\u{2067}fox\u{2069}", format!("holds U+2067, {BIDI_WHY}")),
            ("\u{200F}fox", format!("holds U+200F, {BIDI_WHY}")),
            ("fox\u{061C}", format!("holds U+061C, {BIDI_WHY}")),
            ("fox\u{200B}", format!("holds U+200B, {INVISIBLE_WHY}")),
            ("\u{FEFF}fox", format!("holds U+FEFF, {INVISIBLE_WHY}")),
            ("roe\u{00AD}deer", format!("holds U+00AD, {INVISIBLE_WHY}")),
            ("fox\u{2060}", format!("holds U+2060, {INVISIBLE_WHY}")),
            ("\u{3164}", format!("holds U+3164, {INVISIBLE_WHY}")),
            ("fox\u{FE0F}", format!("holds U+FE0F, {INVISIBLE_WHY}")),
            (
                "fox\u{E0041}\u{E0042}",
                format!("holds U+E0041, {INVISIBLE_WHY}"),
            ),
            (
                "\u{1F3F4}\u{E0067}\u{E0062}",
                format!("holds U+E0067, {INVISIBLE_WHY}"),
            ),
            ("roe\u{2028}deer", format!("holds U+2028, {INVISIBLE_WHY}")),
            (
                "a\u{200D}b",
                "holds U+200D, a joiner outside the letters or emoji it may join; labels may \
                 not hold invisible or bidirectional format characters (Unicode 14.0.0)"
                    .into(),
            ),
            (
                // Malayalam "avan" in the encoding before Unicode 5.1: a trailing ZWJ.
                "\u{0D05}\u{0D35}\u{0D28}\u{0D4D}\u{200D}",
                "holds U+200D, a joiner outside the letters or emoji it may join; labels may \
                 not hold invisible or bidirectional format characters (Unicode 14.0.0)"
                    .into(),
            ),
            (
                "  ",
                "has leading or trailing spaces or control characters".into(),
            ),
            (
                "\u{3000}fox",
                "has leading or trailing spaces or control characters".into(),
            ),
        ] {
            assert_eq!(why(label), Some(reason), "{}", label.escape_unicode());
        }
    }

    #[test]
    fn issue10_labels_not_in_nfc_are_refused() {
        for label in [
            "cafe\u{0301}",             // e + combining acute: U+00E9 is NFC
            "\u{0B95}\u{0BC6}\u{0BBE}", // Tamil ko decomposed: U+0BCA is NFC
            "\u{1100}\u{1161}\u{11AB}", // Hangul jamo: U+AC04 is NFC
            "\u{095B}",                 // excluded from composition
            "\u{212B}",                 // ANGSTROM SIGN, a singleton: U+00C5
            "\u{1E61}\u{0323}",         // s dot above + dot below: U+1E69 is NFC
            "a\u{0301}\u{0323}",        // marks out of canonical order
        ] {
            assert_eq!(
                why(label),
                Some(NFC_WHY.to_string()),
                "{}",
                label.escape_unicode()
            );
        }
        // Once every label is NFC, labels that look alike are equal bytes: a duplicate.
        assert_eq!(
            err("caf\u{E9}\nhare\ncaf\u{E9}\n".as_bytes()),
            "label 'caf\u{E9}' appears twice (again on line 3); each output index needs its \
             own label"
        );
        assert_eq!(
            err("caf\u{E9}\ncafe\u{301}\n".as_bytes()),
            format!("label on line 2 ('cafe\u{301}') {NFC_WHY}")
        );
    }

    #[test]
    fn issue10_refusals_show_invisible_characters_escaped() {
        assert_eq!(
            err("fox\nhare\u{202E}xof\n".as_bytes()),
            format!("label on line 2 ('hare\\u{{202e}}xof') holds U+202E, {BIDI_WHY}")
        );
    }

    #[test]
    fn stored_form_is_exact() {
        assert!(parse_stored_labels(b"fox\nhare\n").is_ok());
        assert!(parse_stored_labels(b"fox\nhare").is_err());
        assert!(parse_stored_labels(b"fox\r\nhare\n").is_err());
    }
}
