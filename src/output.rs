//! How the CLI talks: human text or `--json` on stdout (nothing on success with `--quiet`),
//! errors once on stderr, and progress bars on stderr only when it is a terminal and the
//! work is long.

use std::io::{IsTerminal, Write};
use std::sync::{Arc, Mutex};

use ampoule_verify::{Progress, ProgressFn, Stage};
use indicatif::{ProgressBar, ProgressStyle};
use serde_json::Value;

use crate::failure::Kind;

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
            eprintln!("ampoule: {text}");
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
        eprintln!("ampoule: error: {err:#}");
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
