//! The manifest: the one document every bundle signature covers, binding the release's identity
//! (name, version, creation time, the app versions it needs) to the digests of every byte it
//! ships.
//!
//! It is parsed into derived structs that refuse unknown fields and duplicate keys, and then
//! checked field by field ([`Manifest::validate`]) before anything trusts them.

use semver::{Version, VersionReq};
use serde::{Deserialize, Serialize};

use crate::error::{Error, ErrorKind, Result};
use crate::format::digest::Digest;
use crate::format::metadata::Metadata;
use crate::format::model::ModelSignature;
use crate::format::tar;
use crate::format::time::Timestamp;
use crate::format::{FORMAT_VERSION, OLDEST_FORMAT_VERSION, entry, limit};

/// What a file in the payload is for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
#[non_exhaustive]
pub enum Role {
    /// The model file, kept in the format it was packed in.
    Model,
    /// The label list, one label per line.
    Labels,
}

/// One file inside the payload.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FileEntry {
    /// The file's name inside the payload (`model.<ext>` or `labels.txt`).
    pub path: String,
    /// What the file is for.
    pub role: Role,
    /// Its exact size in bytes.
    pub size: u64,
    /// Its SHA-256.
    pub sha256: Digest,
}

/// How the payload is compressed; zstd (RFC 8878) is the only choice in format 1.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
#[non_exhaustive]
pub enum Compression {
    /// Zstandard, RFC 8878.
    Zstd,
}

/// The compressed payload entry, and the digests that bind it: one SHA-256 of the whole
/// payload in format 1; in format 2, the SHA-256 of the chunk list, which holds the SHA-256 of
/// each `chunk_bytes` of the payload.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Payload {
    /// The compression of the inner tar.
    pub compression: Compression,
    /// The compressed size in bytes.
    pub size: u64,
    /// Format 1 only: the SHA-256 of the compressed bytes.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sha256: Option<Digest>,
    /// Format 2 only: how many bytes of the inner tar each chunk holds before compression (the
    /// last one holds the rest), a power of two from 64 KiB to 4 MiB.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub chunk_bytes: Option<u32>,
    /// Format 2 only: the SHA-256 of the chunk list entry (`chunks.sha256`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub chunks_sha256: Option<Digest>,
}

impl Payload {
    /// Checks the digest fields against the manifest's `format`; `tar_len` is the inner tar's
    /// length, which format 2 cuts into chunks.
    fn validate(&self, format: u32, tar_len: u64) -> Result<()> {
        let chunked = (self.chunk_bytes, self.chunks_sha256);
        match (format, self.sha256, chunked) {
            (1, Some(_), (None, None)) => Ok(()),
            (1, _, _) => Err(invalid(
                "manifest format 1 binds its payload by 'sha256' alone, without 'chunk_bytes' \
                 or 'chunks_sha256'"
                    .into(),
            )),
            (_, None, (Some(chunk), Some(_))) => {
                let allowed = limit::CHUNK_LOG_MIN..=limit::CHUNK_LOG_MAX;
                if !chunk.is_power_of_two() || !allowed.contains(&chunk.trailing_zeros()) {
                    return Err(invalid(format!(
                        "manifest's payload chunk_bytes {chunk} is not allowed: use a power of two \
                         from {} to {} bytes",
                        1u64 << limit::CHUNK_LOG_MIN,
                        1u64 << limit::CHUNK_LOG_MAX
                    )));
                }
                let count = tar_len.div_ceil(u64::from(chunk));
                if count > limit::CHUNKS {
                    return Err(invalid(format!(
                        "manifest's files make an inner tar of {tar_len} bytes, {count} chunks of \
                         {chunk} bytes; a payload has at most {} chunks",
                        limit::CHUNKS
                    )));
                }
                Ok(())
            }
            _ => Err(invalid(format!(
                "manifest format {format} binds its payload by 'chunk_bytes' and \
                 'chunks_sha256', without 'sha256'"
            ))),
        }
    }
}

/// A bundle manifest (format 2, or 1 for bundles packed before issue 13). Field order here
/// is the order in the JSON.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Manifest {
    /// The format version: 2 (`format::FORMAT_VERSION`), or 1 (`OLDEST_FORMAT_VERSION`).
    #[cfg(feature = "release")]
    pub format: u32,
    /// The format version (2, or 1 for bundles packed before issue 13): it says only how the
    /// payload is bound, which the reader has checked, so an app has nothing to learn from it
    /// and it stays out of the app's API (issue 14 made room there).
    #[cfg(not(feature = "release"))]
    pub(crate) format: u32,
    /// The bundle's name: which model line this is (`trailcam-species`).
    pub name: String,
    /// The release's version (Semantic Versioning 2.0.0).
    pub version: Version,
    /// When the bundle was made.
    pub created: Timestamp,
    /// The app versions this model works with.
    pub requires_app: VersionReq,
    /// The compressed payload.
    pub payload: Payload,
    /// The files in the payload, in payload order: the model, then the labels.
    pub files: Vec<FileEntry>,
    /// How many labels the label list holds.
    pub label_count: u32,
    /// The model's tensor signature as `pack` read it (ONNX, safetensors); absent for a
    /// model in a format ampoule does not read.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub model: Option<ModelSignature>,
    /// What the release engineer recorded beyond the files (issue 11): preprocessing,
    /// evaluation, data snapshot, notes. Absent when none was given, so such a manifest is
    /// byte for byte what it was before the field existed. Apps read it through
    /// [`Manifest::metadata`].
    #[cfg(feature = "release")]
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub metadata: Option<Metadata>,
    /// See the field above: apps read it through [`Manifest::metadata`].
    #[cfg(not(feature = "release"))]
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub(crate) metadata: Option<Metadata>,
}

fn invalid(message: String) -> Error {
    Error::new(ErrorKind::Manifest, message)
}

/// Checks a bundle name: 1 to 64 bytes of lowercase ASCII letters, digits, `-`, `_` and `.`,
/// starting with a letter or digit.
pub fn check_name(name: &str) -> Result<()> {
    let ok = !name.is_empty()
        && name.len() <= limit::NAME_BYTES
        && name.as_bytes()[0].is_ascii_alphanumeric()
        && name
            .bytes()
            .all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b"-_.".contains(&b));
    if ok {
        Ok(())
    } else {
        Err(invalid(format!(
            "bundle name '{}' is not allowed: use 1 to {} lowercase letters, digits, '-', '_' or '.', \
             starting with a letter or digit",
            tar::shown(name.as_bytes()),
            limit::NAME_BYTES
        )))
    }
}

/// The payload name of a model file packed with this extension (`onnx` gives `model.onnx`);
/// `None` if the extension is not 1 to 16 lowercase ASCII letters or digits.
pub fn model_path(extension: &str) -> Option<String> {
    let ok = !extension.is_empty()
        && extension.len() <= limit::MODEL_EXTENSION_CHARS
        && extension
            .bytes()
            .all(|b| b.is_ascii_lowercase() || b.is_ascii_digit());
    ok.then(|| format!("{}.{extension}", entry::MODEL_STEM))
}

impl Manifest {
    pub_for_release! {
        /// Parses manifest bytes strictly (UTF-8 JSON, no unknown fields, no duplicate keys) and
        /// validates every field.
        fn from_json(bytes: &[u8]) -> Result<Manifest> {
            let manifest: Manifest = serde_json::from_slice(bytes)
                .map_err(|e| invalid(format!("manifest is not valid: {e}")))?;
            manifest.validate()?;
            Ok(manifest)
        }
    }

    pub_for_release! {
        /// The manifest as the writer stores it: pretty JSON with a final newline. The signed
        /// bytes are whatever the bundle holds; this is only how new bundles are written.
        fn to_json(&self) -> Vec<u8> {
            let mut bytes = serde_json::to_vec_pretty(self)
                .expect("a manifest of plain strings and numbers always serializes");
            bytes.push(b'\n');
            bytes
        }
    }

    pub_for_release! {
        /// Checks every field against the format's rules.
        fn validate(&self) -> Result<()> {
            if !(OLDEST_FORMAT_VERSION..=FORMAT_VERSION).contains(&self.format) {
                return Err(invalid(format!(
                    "manifest format {} is not supported (this reader knows formats \
                     {OLDEST_FORMAT_VERSION} to {FORMAT_VERSION}); update ampoule-verify to read \
                     newer bundles",
                    self.format
                )));
            }
            check_name(&self.name)?;
            if let Some(metadata) = &self.metadata {
                metadata.validate()?;
            }
            let [model, labels] = self.files.as_slice() else {
                return Err(invalid(format!(
                    "manifest lists {} files; format {} requires exactly two, the model then the labels",
                    self.files.len(),
                    self.format
                )));
            };
            let model_ok = model.role == Role::Model
                && model
                    .path
                    .strip_prefix(concat!("model", "."))
                    .and_then(model_path)
                    .as_deref()
                    == Some(model.path.as_str());
            if !model_ok {
                return Err(invalid(format!(
                    "manifest's first file must be the model, named 'model.<extension>', not '{}' ({:?})",
                    tar::shown(model.path.as_bytes()),
                    model.role
                )));
            }
            if labels.role != Role::Labels || labels.path != entry::LABELS {
                return Err(invalid(format!(
                    "manifest's second file must be the labels, named '{}', not '{}' ({:?})",
                    entry::LABELS,
                    tar::shown(labels.path.as_bytes()),
                    labels.role
                )));
            }
            for file in &self.files {
                if file.size > limit::TAR_ENTRY_BYTES {
                    return Err(invalid(format!(
                        "manifest declares '{}' as {} bytes, over the format's limit of {} bytes",
                        file.path,
                        file.size,
                        limit::TAR_ENTRY_BYTES
                    )));
                }
            }
            self.payload.validate(self.format, self.unpacked_tar_len())?;
            if labels.size > limit::LABELS_FILE_BYTES {
                return Err(invalid(format!(
                    "manifest declares labels.txt as {} bytes, over the format's limit of {} bytes",
                    labels.size,
                    limit::LABELS_FILE_BYTES
                )));
            }
            if self.label_count == 0 {
                return Err(invalid(
                    "manifest declares an empty label list; a bundle needs at least one label".into(),
                ));
            }
            if self.label_count as usize > limit::LABELS {
                return Err(invalid(format!(
                    "manifest declares {} labels, over the format's limit of {}",
                    self.label_count,
                    limit::LABELS
                )));
            }
            Ok(())
        }
    }

    /// The value the release engineer recorded under a dotted key of the signed metadata
    /// (`preprocess.mean`, `eval.top1`, `notes`; an object for a key with keys under it), or
    /// `None`. The manifest was validated, so a documented key has its documented type:
    /// `preprocess.colour_order` is `"rgb"` or `"bgr"`, `eval.*` are numbers.
    ///
    /// ```
    /// # fn show(release: &ampoule_verify::Release) {
    /// if let Some(mean) = release.manifest.metadata("preprocess.mean") {
    ///     println!("normalize with mean {mean}");
    /// }
    /// # }
    /// ```
    pub fn metadata(&self, key: &str) -> Option<&serde_json::Value> {
        self.metadata.as_ref()?.get(key)
    }

    pub_for_release! {
        /// The model file entry.
        fn model(&self) -> &FileEntry {
            &self.files[0]
        }
    }

    pub_for_release! {
        /// The labels file entry.
        fn labels(&self) -> &FileEntry {
            &self.files[1]
        }
    }

    pub_for_release! {
        /// The exact size of the inner tar the payload decompresses to: a header and padded data
        /// per file, then the end-of-archive marker.
        fn unpacked_tar_len(&self) -> u64 {
            self.files
                .iter()
                .map(|f| tar::entry_len(f.size))
                .sum::<u64>()
                + tar::END_OF_ARCHIVE.len() as u64
        }
    }

    pub_for_release! {
        /// How many chunks a format 2 payload has (its chunk list holds a record for each):
        /// the inner tar's length divided by `chunk_bytes`, rounded up. `None` in format 1.
        fn chunk_count(&self) -> Option<u64> {
            let chunk = u64::from(self.payload.chunk_bytes?);
            (chunk > 0).then(|| self.unpacked_tar_len().div_ceil(chunk))
        }
    }

    pub_for_release! {
        /// Parses the stored label list of this bundle and requires `label_count` labels.
        fn parse_labels(&self, bytes: &[u8]) -> Result<Vec<String>> {
            let labels = crate::format::labels::parse_stored_labels(bytes)?;
            if labels.len() != self.label_count as usize {
                return Err(invalid(format!(
                    "labels.txt holds {} labels but the manifest declares {}",
                    labels.len(),
                    self.label_count
                )));
            }
            Ok(labels)
        }
    }

    pub_for_release! {
        /// The total size of the files in the payload.
        fn files_len(&self) -> u64 {
            self.files.iter().map(|f| f.size).sum()
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn payload(sha256: bool, chunk_bytes: Option<u32>, chunks_sha256: bool) -> Payload {
        Payload {
            compression: Compression::Zstd,
            size: 1,
            sha256: sha256.then(|| Digest::of(b"payload")),
            chunk_bytes,
            chunks_sha256: chunks_sha256.then(|| Digest::of(b"list")),
        }
    }

    fn refused(result: Result<()>) -> String {
        let e = result.expect_err("refused");
        assert_eq!(e.kind(), ErrorKind::Manifest, "{e}");
        e.to_string()
    }

    #[test]
    fn each_format_binds_its_payload_its_own_way() {
        assert!(payload(true, None, false).validate(1, 1 << 20).is_ok());
        for mixed in [
            payload(true, Some(1 << 19), true),
            payload(true, Some(1 << 19), false),
            payload(true, None, true),
            payload(false, None, false),
        ] {
            assert!(
                refused(mixed.validate(1, 1 << 20))
                    .contains("format 1 binds its payload by 'sha256' alone")
            );
        }
        assert!(
            payload(false, Some(1 << 19), true)
                .validate(2, 1 << 20)
                .is_ok()
        );
        for mixed in [
            payload(true, Some(1 << 19), true),
            payload(false, Some(1 << 19), false),
            payload(false, None, true),
            payload(false, None, false),
        ] {
            assert!(
                refused(mixed.validate(2, 1 << 20))
                    .contains("format 2 binds its payload by 'chunk_bytes' and 'chunks_sha256'")
            );
        }
    }

    #[test]
    fn chunk_bytes_is_a_power_of_two_within_the_limits() {
        let with = |chunk: u32| payload(false, Some(chunk), true).validate(2, 1 << 20);
        let min = 1u32 << limit::CHUNK_LOG_MIN;
        let max = 1u32 << limit::CHUNK_LOG_MAX;
        assert!(with(min).is_ok());
        assert!(with(max).is_ok());
        for bad in [min / 2, max * 2, min + 1, 3 * min, 0] {
            assert!(
                refused(with(bad)).contains(&format!("chunk_bytes {bad} is not allowed")),
                "{bad}"
            );
        }
    }

    #[test]
    fn a_payload_has_at_most_the_chunk_cap() {
        let chunk = 1u32 << limit::CHUNK_LOG_MIN;
        let at_cap = limit::CHUNKS * u64::from(chunk);
        let p = payload(false, Some(chunk), true);
        assert!(p.validate(2, at_cap).is_ok());
        assert!(p.validate(2, at_cap - 1).is_ok());
        assert_eq!(
            refused(p.validate(2, at_cap + 1)),
            format!(
                "manifest's files make an inner tar of {} bytes, {} chunks of {chunk} bytes; a \
                 payload has at most {} chunks",
                at_cap + 1,
                limit::CHUNKS + 1,
                limit::CHUNKS
            )
        );
    }

    #[test]
    fn a_model_path_takes_1_to_16_lowercase_letters_or_digits() {
        assert_eq!(model_path("onnx").as_deref(), Some("model.onnx"));
        assert_eq!(
            model_path("safetensors").as_deref(),
            Some("model.safetensors")
        );
        assert_eq!(model_path("b1").as_deref(), Some("model.b1"));
        let longest = "a".repeat(limit::MODEL_EXTENSION_CHARS);
        assert_eq!(model_path(&longest), Some(format!("model.{longest}")));
        for bad in [
            "",
            "ONNX",
            "on-x",
            "on.x",
            "ön",
            &"a".repeat(limit::MODEL_EXTENSION_CHARS + 1),
        ] {
            assert_eq!(model_path(bad), None, "{bad:?}");
        }
    }
}
