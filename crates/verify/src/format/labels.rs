//! The label list: which class each model output index means. One rule set serves `pack`
//! (which normalizes what the engineer wrote) and the device (which checks what it unpacked).

use std::collections::HashSet;

use crate::error::{Error, ErrorKind, Result};
use crate::format::limit;
use crate::format::tar::shown;

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
        if label.trim() != label || label.chars().any(char::is_control) {
            return Err(refused(format!(
                "label on line {line} ('{}') has leading or trailing spaces or control characters",
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

    #[test]
    fn stored_form_is_exact() {
        assert!(parse_stored_labels(b"fox\nhare\n").is_ok());
        assert!(parse_stored_labels(b"fox\nhare").is_err());
        assert!(parse_stored_labels(b"fox\r\nhare\n").is_err());
    }
}
