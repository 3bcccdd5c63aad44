//! Small files around signing: the request an outside signer signs, the raw signature it
//! hands back, and trust-set files. An outside signer (an HSM, an offline machine, openssl)
//! sees only the exact bytes to sign, so the secret key never has to touch this tool.

use std::fs;
use std::path::Path;

use ampoule_verify::PublicKey;
use ampoule_verify::format::signed_bytes;
use ampoule_verify::signature::SignatureEntry;
use anyhow::{Result, bail};
use ed25519_dalek::Signer;

use crate::Refused;
use crate::cli::SignerArgs;
use crate::cmd::passphrase_source;
use crate::release::atomic::{Placement, REPLACE, write_bytes};
pub use crate::release::files::read_bounded;
use crate::release::keyfile;

/// Reads a raw 64-byte Ed25519 signature (RFC 8032 section 5.1.6), as
/// `openssl pkeyutl -sign -rawin` writes it.
pub fn read_raw_signature(path: &Path) -> Result<[u8; 64]> {
    let bytes = read_bounded(path, 64, "a raw Ed25519 signature")?;
    <[u8; 64]>::try_from(bytes.as_slice()).map_err(|_| {
        anyhow::anyhow!(
            "{} is {} bytes; a raw Ed25519 signature is exactly 64 bytes (as \
             'openssl pkeyutl -sign -rawin' writes it, not hex or base64)",
            path.display(),
            bytes.len()
        )
    })
}

/// Writes `bytes` to `path` through a temporary file that is flushed and then renamed into
/// place; `replace` says whether an existing file may be replaced. Mode 0644: these files
/// (requests, trust sets) hold nothing secret and are meant to be passed around.
pub fn write_file(path: &Path, bytes: &[u8], replace: bool) -> Result<()> {
    if !replace && fs::symlink_metadata(path).is_ok() {
        bail!(
            "{} already exists; choose another output name or remove it first (nothing was written)",
            path.display()
        );
    }
    let placement = if replace { REPLACE } else { Placement::New };
    write_bytes(path, bytes, placement)
}

/// A key named in messages: its id, and the file given for it on the command line (the
/// secret key with --key, the public key with --attach), so people can tell which is which.
pub fn key_named(signer: &SignerArgs, public: &PublicKey) -> String {
    match signer.key.as_ref().or(signer.pubkey.as_ref()) {
        Some(file) => format!("{} ({})", public.id(), file.display()),
        None => public.id().to_string(),
    }
}

/// A document to sign, and how its command is named in messages.
pub struct ToSign<'a> {
    /// The document in messages ("bundle's manifest", "trust set version 2").
    pub what: &'a str,
    /// Its signing context.
    pub context: &'a [u8],
    /// Its exact bytes.
    pub document: &'a [u8],
    /// The file that holds it, left unchanged when a signature is refused.
    pub file: &'a Path,
    /// The command that exports its request ("ampoule sign").
    pub command: &'a str,
    /// What the file is ("bundle", "trust set").
    pub noun: &'a str,
}

/// A signature over the document: made here with `--key`, or made elsewhere and attached
/// with `--attach` and `--pubkey`. Either way it is verified (strict Ed25519) before it is
/// accepted, so a wrong key or a signature over other bytes changes nothing.
pub fn signature(signer: &SignerArgs, doc: &ToSign<'_>) -> Result<(SignatureEntry, PublicKey)> {
    match (&signer.key, &signer.attach, &signer.pubkey) {
        (Some(key), _, _) => {
            let key = keyfile::read_secret_key(key, &passphrase_source(&signer.passphrase))?;
            let public = PublicKey::from_verifying_key(&key.verifying_key())?;
            let signature = key
                .sign(&signed_bytes(doc.context, doc.document))
                .to_bytes();
            let entry =
                SignatureEntry::verified(doc.what, &public, doc.context, doc.document, signature)?;
            Ok((entry, public))
        }
        (None, Some(sig), Some(pubkey)) => {
            let public = keyfile::read_public_key(pubkey)?;
            let entry = SignatureEntry::verified(
                doc.what,
                &public,
                doc.context,
                doc.document,
                read_raw_signature(sig)?,
            )
            .map_err(|e| {
                Refused(format!(
                    "{e}; {} was left unchanged (sign exactly the bytes '{} --export-request' \
                     wrote for this {}, with the secret key of {})",
                    doc.file.display(),
                    doc.command,
                    doc.noun,
                    pubkey.display()
                ))
            })?;
            Ok((entry, public))
        }
        _ => bail!("give --key, --export-request, or --attach with --pubkey"),
    }
}
