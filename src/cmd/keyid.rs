//! `ampoule key-id`: which key is which. Messages, ledgers and trust sets name keys by id;
//! this prints the id of each key file given (public, secret or encrypted secret) and the
//! keys of each trust set with their roles, so a person can match ids to files.

use std::io::Read;
use std::path::Path;

use anyhow::{Context, Result};
use serde_json::{Value, json};

use crate::cli::KeyIdArgs;
use crate::cmd::{passphrase_source, read_trust_set_file};
use crate::output::Output;
use crate::release::keyfile::{self, KeyFileKind};

pub fn run(args: KeyIdArgs, out: &Output) -> Result<()> {
    let mut human = String::new();
    let mut files = Vec::new();
    for path in &args.files {
        let (text, doc) = if is_json(path)? {
            trust_set(path)?
        } else {
            key(path, &args)?
        };
        human.push_str(&text);
        files.push(doc);
    }
    out.result(&human, json!({ "ok": true, "files": files }))
}

/// Trust sets are JSON and key files PEM: the first non-blank byte tells them apart before
/// either reader, with its own caps and checks, reads the file.
fn is_json(path: &Path) -> Result<bool> {
    let mut head = [0u8; 64];
    let n = std::fs::File::open(path)
        .and_then(|mut f| f.read(&mut head))
        .with_context(|| format!("cannot read {}", path.display()))?;
    Ok(head[..n]
        .iter()
        .find(|b| !b.is_ascii_whitespace())
        .is_some_and(|&b| b == b'{'))
}

fn key(path: &Path, args: &KeyIdArgs) -> Result<(String, Value)> {
    let (kind, public) = keyfile::read_any_key(path, &passphrase_source(&args.passphrase))?;
    let (what, name) = match kind {
        KeyFileKind::Public => ("public key", "public_key"),
        KeyFileKind::Secret => ("secret key", "secret_key"),
        KeyFileKind::EncryptedSecret => ("encrypted secret key", "encrypted_secret_key"),
    };
    Ok((
        format!("{}: {what}, key id {}\n", path.display(), public.id()),
        json!({ "file": path, "kind": name, "key_id": public.id().to_string() }),
    ))
}

/// A trust set's keys as the file lists them; its signatures are not checked here (`trust
/// show` does that), since the question is only which id has which roles.
fn trust_set(path: &Path) -> Result<(String, Value)> {
    let (_, file) = read_trust_set_file(path)?;
    let body = file.body();
    let mut text = format!(
        "{}: trust set version {} (signatures not checked; see 'ampoule trust show')\n",
        path.display(),
        body.version
    );
    for k in &body.keys {
        let roles: Vec<&str> = k.roles.iter().map(|r| r.name()).collect();
        text.push_str(&format!("  key id {}  {}", k.key_id, roles.join(",")));
        if !k.comment.is_empty() {
            text.push_str(&format!("  {}", k.comment));
        }
        text.push('\n');
    }
    let keys: Vec<Value> = body
        .keys
        .iter()
        .map(|k| {
            json!({
                "key_id": k.key_id.to_string(),
                "roles": k.roles,
                "comment": k.comment,
            })
        })
        .collect();
    Ok((
        text,
        json!({ "file": path, "kind": "trust_set", "version": body.version, "keys": keys }),
    ))
}
