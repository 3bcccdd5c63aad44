//! How the CLI talks: human text or `--json` on stdout (nothing on success with `--quiet`),
//! errors once on stderr, and progress bars on stderr only when it is a terminal and the
//! work is long.

use std::io::{IsTerminal, Write};
use std::sync::{Arc, Mutex};

use ampoule_verify::{Progress, ProgressFn, Stage};
use indicatif::{ProgressBar, ProgressStyle};
use serde_json::Value;

use crate::failure::Kind;

/// Text from a bundle, feed or ledger (a label, a bundle or tensor name, a producer) as a
/// terminal can show it without being fooled (issue 10 item 7): every character that is not
/// shown as itself or that changes how the text around it is shown (controls, bidirectional
/// controls, zero-width and other invisible format characters, white space other than the
/// plain space) is written as `\u{...}`, and a backslash as `\\`, so an escaped text cannot pose
/// as another. ZWNJ, ZWJ and the emoji presentation selectors stay: they reorder nothing, and
/// the label rule allows them only where scripts and emoji need them. `--json` output is not
/// escaped this way; JSON strings carry the exact text.
pub fn shown(text: &str) -> std::borrow::Cow<'_, str> {
    escaped(text, true)
}

/// Whether a terminal must be shown `c` escaped (see [`shown`]).
fn hidden(c: char) -> bool {
    c.is_control()
        || (c.is_whitespace() && c != ' ')
        || (ampoule_verify::labels::is_invisible(c)
            && !matches!(c, '\u{200C}' | '\u{200D}' | '\u{FE0E}' | '\u{FE0F}'))
}

/// [`shown`], or with `whole_text` false the last line of defence for a whole output: line
/// breaks and backslashes stay as they are.
fn escaped(text: &str, whole_text: bool) -> std::borrow::Cow<'_, str> {
    let escape = |c: char| {
        if whole_text {
            c == '\\' || hidden(c)
        } else {
            c != '\n' && hidden(c)
        }
    };
    if !text.chars().any(escape) {
        return std::borrow::Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 16);
    for c in text.chars() {
        match c {
            '\\' if whole_text => out.push_str("\\\\"),
            c if escape(c) => out.push_str(&format!("\\u{{{:x}}}", u32::from(c))),
            c => out.push(c),
        }
    }
    std::borrow::Cow::Owned(out)
}

/// Work below this many bytes finishes too fast for a progress bar to help.
const PROGRESS_MIN_BYTES: u64 = 32 * 1024 * 1024;

/// The chosen output mode.
pub struct Output {
    json: bool,
    /// `--quiet`: no text on success, no notes, no progress bars; errors and `--json`
    /// documents are unchanged, since scripts rely on them.
    quiet: bool,
}

impl Output {
    pub fn new(json: bool, quiet: bool) -> Self {
        Output { json, quiet }
    }

    pub fn json(&self) -> bool {
        self.json
    }

    /// Whether human text (as opposed to a JSON document or nothing) is printed.
    pub fn text(&self) -> bool {
        !self.json && !self.quiet
    }

    /// Prints a command's result: `human` as text, or `value` as one JSON document.
    pub fn result(&self, human: &str, value: Value) -> anyhow::Result<()> {
        if self.quiet && !self.json {
            return Ok(());
        }
        let mut stdout = std::io::stdout().lock();
        if self.json {
            // Through io::Error, so a closed pipe is still recognised as one (serde_json's
            // error type would hide the io::ErrorKind from the caller's broken-pipe check).
            serde_json::to_writer_pretty(&mut stdout, &value).map_err(std::io::Error::from)?;
            writeln!(stdout)?;
        } else {
            // Commands escape what they print from a bundle with `shown`; this catches what
            // one did not, so no text output can carry a control to the terminal.
            let human = escaped(human, false);
            stdout.write_all(human.as_bytes())?;
            if !human.ends_with('\n') {
                writeln!(stdout)?;
            }
        }
        stdout.flush()?;
        Ok(())
    }

    /// Bytes that are the command's product (a completion script, a manual page), written
    /// as they are whatever the output mode.
    pub fn raw(&self, bytes: &[u8]) -> anyhow::Result<()> {
        let mut stdout = std::io::stdout().lock();
        stdout.write_all(bytes)?;
        stdout.flush()?;
        Ok(())
    }

    /// A note for people (warnings, hints) on stderr, never mixed into JSON.
    pub fn note(&self, text: &str) {
        if !self.quiet {
            eprintln!("ampoule: {}", escaped(text, false));
        }
    }

    /// Prints an error chain once, prefixed with the program name; with `--json` also a JSON
    /// error document on stdout so scripts can read it.
    pub fn error(&self, err: &anyhow::Error, kind: Kind) {
        self.error_line(err);
        if self.json {
            let _ = self.result("", error_document(&format!("{err:#}"), kind));
        }
    }

    /// The one line on stderr for an error whose report is already printed.
    pub fn error_line(&self, err: &anyhow::Error) {
        eprintln!("ampoule: error: {}", escaped(&format!("{err:#}"), false));
    }

    /// With `--json`, the JSON error document for a command line that did not parse; clap
    /// has already printed its own message and usage on stderr.
    pub fn usage_error(&self, err: &clap::Error) {
        if self.json {
            // clap's text minus the usage and help hints, on one line.
            let text = err.to_string();
            let lines: Vec<&str> = text
                .split("\n\nUsage:")
                .next()
                .unwrap_or_default()
                .lines()
                .map(str::trim)
                .filter(|l| !l.is_empty() && !l.starts_with("For more information"))
                .collect();
            let message = lines.join(" ");
            let message = message.trim_start_matches("error: ");
            let _ = self.result("", error_document(message, Kind::Usage));
        }
    }

    /// A progress bar for `total` bytes of work, or a hidden one when stderr is not a
    /// terminal, `--json` is on, or the work is short.
    pub fn bar(&self, total: u64, message: &str) -> ProgressBar {
        if self.json || self.quiet || total < PROGRESS_MIN_BYTES || !std::io::stderr().is_terminal()
        {
            return ProgressBar::hidden();
        }
        let bar = ProgressBar::new(total);
        bar.set_style(
            ProgressStyle::with_template(
                "{msg:>12} [{bar:32}] {bytes}/{total_bytes} {bytes_per_sec} eta {eta}",
            )
            .expect("the progress template is a constant that parses")
            .progress_chars("=> "),
        );
        bar.set_message(message.to_string());
        bar
    }

    /// A progress callback for the verifier: one bar per stage, made on the stage's first
    /// report (when its size is known) and finished when the stage completes.
    pub fn verify_progress(&self) -> ProgressFn {
        let (json, quiet) = (self.json, self.quiet);
        let bars: Mutex<Vec<(Stage, ProgressBar)>> = Mutex::new(Vec::new());
        Arc::new(move |p: Progress| {
            let Ok(mut bars) = bars.lock() else { return };
            let bar = match bars.iter().position(|(s, _)| *s == p.stage) {
                Some(i) => &bars[i].1,
                None => {
                    let label = match p.stage {
                        Stage::HashPayload => "hashing",
                        Stage::Download => "downloading",
                        _ => "checking",
                    };
                    bars.push((p.stage, Output { json, quiet }.bar(p.total, label)));
                    &bars[bars.len() - 1].1
                }
            };
            bar.set_position(p.done);
            if p.done >= p.total {
                bar.finish_and_clear();
            }
        })
    }
}

/// The fields every `--json` error carries; a report that ends in an error (`ledger check`
/// with problems, `trust show` refusing) adds them to its own document.
pub fn error_document(message: &str, kind: Kind) -> Value {
    serde_json::json!({
        "ok": false,
        "exit_code": kind.exit_code(),
        "error": message,
        "kind": kind.name(),
    })
}

/// A command's report that ends in an error: its own fields plus the error fields, with
/// `ok` false.
pub fn failed_report(mut doc: Value, message: &str, kind: Kind) -> Value {
    if let (Value::Object(doc), Value::Object(fields)) = (&mut doc, error_document(message, kind)) {
        doc.extend(fields);
    }
    doc
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn issue10_shown_escapes_what_could_fool_a_terminal() {
        // A right-to-left override would show "wild \u{202E}raob" as "wild boar".
        assert_eq!(shown("wild \u{202E}raob"), "wild \\u{202e}raob");
        assert_eq!(
            shown("\u{FEFF}fox\u{200B}\u{2066}x\u{2069}"),
            "\\u{feff}fox\\u{200b}\\u{2066}x\\u{2069}"
        );
        assert_eq!(shown("a\nb\tc\u{1b}[2J"), "a\\u{a}b\\u{9}c\\u{1b}[2J");
        assert_eq!(
            shown("roe\u{2002}deer\u{3000}"),
            "roe\\u{2002}deer\\u{3000}"
        );
        // A backslash is doubled, so a name cannot pose as an escaped one.
        assert_eq!(shown("wild \\u{202e}raob"), "wild \\\\u{202e}raob");
        // Text a person reads as it is stays unchanged, joiners in emoji and scripts too.
        for plain in [
            "roe deer",
            "\u{1F469}\u{200D}\u{1F4BB}",
            "\u{0645}\u{06CC}\u{200C}\u{062E}",
            "Ti\u{1EBF}ng Vi\u{1EC7}t",
        ] {
            assert!(
                matches!(shown(plain), std::borrow::Cow::Borrowed(_)),
                "{plain}"
            );
        }
        // The whole-output pass keeps line breaks and backslashes.
        assert_eq!(escaped("a\\b\nc\u{202E}\n", false), "a\\b\nc\\u{202e}\n");
    }
}
