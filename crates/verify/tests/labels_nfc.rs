//! The label rule's NFC check (issue 10 item 7) against an outside reference: Python's
//! standard-library `unicodedata.is_normalized('NFC', s)`, run once on every code point and on
//! strings built from characters that compose, decompose or reorder. The check's tables are
//! Unicode 14.0.0 (`crates/verify/src/format/unicode.rs`); a Python with another Unicode
//! version is not a reference for them, and the test then says so and checks nothing more.

use std::io::Write;
use std::process::{Command, Stdio};

use ampoule_verify::format::unicode::VERSION;
use ampoule_verify::labels::is_nfc;

/// Runs `script` under python3 with `input` on stdin; `None` when python3 is missing or its
/// Unicode version is not the tables'.
fn python(script: &str, input: &str) -> Option<String> {
    let mut child = match Command::new("python3")
        .args(["-c", script])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .spawn()
    {
        Ok(child) => child,
        Err(e) => {
            println!("skipped: python3 is not available ({e})");
            return None;
        }
    };
    child
        .stdin
        .take()
        .expect("stdin")
        .write_all(input.as_bytes())
        .expect("write to python3");
    let out = child.wait_with_output().expect("python3 runs");
    assert!(out.status.success(), "python3 failed");
    let text = String::from_utf8(out.stdout).expect("UTF-8");
    let (version, rest) = text.split_once('\n').expect("a version line");
    if version != VERSION {
        println!("skipped: python3 has Unicode {version}, the tables are {VERSION}");
        return None;
    }
    Some(rest.to_string())
}

#[test]
fn every_single_code_point_agrees_with_python() {
    let script = "import unicodedata as u\n\
                  print(u.unidata_version)\n\
                  print(' '.join(str(c) for c in range(0x110000) if not 0xD800 <= c < 0xE000 \
                  and not u.is_normalized('NFC', chr(c))))";
    let Some(out) = python(script, "") else {
        return;
    };
    let python_not_nfc: Vec<u32> = out
        .split_whitespace()
        .map(|n| n.parse().expect("a number"))
        .collect();
    let ours: Vec<u32> = (0..0x11_0000u32)
        .filter_map(char::from_u32)
        .filter(|c| !is_nfc(c.encode_utf8(&mut [0; 4])))
        .map(u32::from)
        .collect();
    assert_eq!(ours.len(), python_not_nfc.len());
    assert_eq!(ours, python_not_nfc);
}

#[test]
fn strings_that_compose_and_reorder_agree_with_python() {
    // Starters that compose, composites, marks of several classes, Hangul jamo and syllables,
    // vowel signs that compose (Tamil, Bengali), a nukta, kana and voicing marks, a singleton.
    let pool: Vec<char> = [
        0x61, 0x65, 0x73, 0x75, 0xE9, 0xFC, 0x1E61, 0x1E63, 0x1E69, 0x1D6, 0x0300, 0x0301, 0x0304,
        0x0307, 0x0308, 0x031B, 0x0323, 0x0345, 0x03B1, 0x1F71, 0x1100, 0x1161, 0x11AB, 0xAC00,
        0xAC04, 0x0B95, 0x0BC6, 0x0BBE, 0x0BCA, 0x0BD7, 0x09C7, 0x09BE, 0x0915, 0x093C, 0x304B,
        0x3099, 0x304C, 0x212B, 0x0627, 0x0653, 0x0654, 0x0622, 0x05D0, 0x05B7, 0x0F71, 0x0F72,
        0x0F80, 0x1B05, 0x1B35,
    ]
    .into_iter()
    .map(|c| char::from_u32(c).expect("a character"))
    .collect();
    let mut strings: Vec<String> = Vec::new();
    for &a in &pool {
        for &b in &pool {
            strings.push([a, b].iter().collect());
        }
    }
    let mut state: u64 = 0x2545_f491_4f6c_dd1d;
    for _ in 0..20_000 {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        let len = 1 + (state % 6) as usize;
        let mut s = String::new();
        let mut r = state;
        for _ in 0..len {
            s.push(pool[(r % pool.len() as u64) as usize]);
            r /= pool.len() as u64;
            if r == 0 {
                r = state.rotate_left(17);
            }
        }
        strings.push(s);
    }
    let input: String = strings
        .iter()
        .map(|s| {
            let points: Vec<String> = s.chars().map(|c| u32::from(c).to_string()).collect();
            points.join(" ") + "\n"
        })
        .collect();
    let script = "import sys, unicodedata as u\n\
                  print(u.unidata_version)\n\
                  for line in sys.stdin:\n\
                  \x20   s = ''.join(chr(int(n)) for n in line.split())\n\
                  \x20   print(int(u.is_normalized('NFC', s)))";
    let Some(out) = python(script, &input) else {
        return;
    };
    let answers: Vec<bool> = out.lines().map(|l| l == "1").collect();
    assert_eq!(answers.len(), strings.len());
    let mut disagree = Vec::new();
    for (s, &reference) in strings.iter().zip(&answers) {
        if is_nfc(s) != reference {
            disagree.push(s.escape_unicode().to_string());
        }
    }
    assert!(
        disagree.is_empty(),
        "{} of {} strings disagree with Python, first: {:?}",
        disagree.len(),
        strings.len(),
        disagree.first()
    );
    // The corpus is not trivial: both answers occur often.
    let nfc = answers.iter().filter(|&&a| a).count();
    assert!(
        nfc > 1000 && answers.len() - nfc > 1000,
        "{nfc} of {}",
        answers.len()
    );
}
