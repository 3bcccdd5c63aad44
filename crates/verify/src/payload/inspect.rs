//! A bundle opened without checking any signature, for the release side's tools (`inspect`,
//! `sign`, `diff`) that look at bundles they made or are about to sign. It sits above payload
//! decoding because one of its checks decompresses; nothing on a device uses it.

use std::fs::File;

use crate::error::{Error, Result};
use crate::format::bundle::{Layout, check_payload, read_layout};
use crate::format::manifest::Manifest;

/// A bundle opened without checking any signature, for release-side tools (`inspect`, `sign`,
/// `diff`) that look at bundles they made or are about to sign. A device uses
/// [`crate::Verifier`] instead: nothing here says who made the bundle.
pub struct Unverified {
    file: File,
    /// Where the pieces are.
    pub layout: Layout,
    /// The manifest, parsed strictly and validated (but not authenticated).
    pub manifest: Manifest,
    /// The signatures document, parsed strictly (no signature checked).
    pub signatures: crate::format::signature::Signatures,
}

impl Unverified {
    /// Opens the bundle at `path` and reads its layout, manifest and signatures.
    pub fn open(path: &std::path::Path) -> Result<Self> {
        let mut file = File::open(path)
            .map_err(|e| Error::io(format!("cannot open bundle {}", path.display()), e))?;
        let file_len = file
            .metadata()
            .map_err(|e| Error::io("cannot read the bundle's size", e))?
            .len();
        let layout = read_layout(&mut file, file_len)?;
        let manifest = Manifest::from_json(&layout.manifest)?;
        let signatures = crate::format::signature::Signatures::from_json(&layout.signatures)?;
        Ok(Unverified {
            file,
            layout,
            manifest,
            signatures,
        })
    }

    /// Checks every byte of the payload against the manifest without decoding it: its size,
    /// and its SHA-256 (format 1) or its chunk list and every chunk's SHA-256 (format 2).
    pub fn check_payload(&mut self) -> Result<()> {
        check_payload(&mut self.file, &self.layout, &self.manifest, None)
    }

    /// Checks the payload digest, then decompresses it and checks every file (as
    /// [`crate::VerifiedBundle::check_contents`] does), returning the labels. The name says
    /// the catch: no signature vouched for these bytes before the decoder saw them.
    pub fn dangerous_check_contents(&mut self) -> Result<Vec<String>> {
        self.check_payload()?;
        crate::payload::unpack::stream(
            &crate::payload::unpack::Source {
                file: &self.file,
                payload_offset: self.layout.payload_offset,
                manifest: &self.manifest,
                chunks: self.layout.chunks.as_deref(),
                progress: None,
            },
            None,
        )
    }

    /// Checks the payload digest, then unpacks the files into the new directory `dest` with
    /// every per-file check (sizes, digests, the inner tar's rules): for the release side's
    /// delta maker, which reads the files of two bundles it was given. As with
    /// [`Unverified::dangerous_check_contents`], no signature vouched for these bytes.
    pub fn dangerous_unpack(&mut self, dest: &std::path::Path) -> Result<()> {
        self.check_payload()?;
        crate::payload::unpack::unpack_to(
            &crate::payload::unpack::Source {
                file: &self.file,
                payload_offset: self.layout.payload_offset,
                manifest: &self.manifest,
                chunks: self.layout.chunks.as_deref(),
                progress: None,
            },
            dest,
            &|_, _| Ok(()),
        )?;
        Ok(())
    }

    /// The open bundle file (for copying its payload into a rewritten bundle).
    pub fn file_mut(&mut self) -> &mut File {
        &mut self.file
    }
}
