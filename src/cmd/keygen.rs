//! `ampoule keygen`: a new Ed25519 key pair, secret key owner-only and never overwritten.

use anyhow::{Result, bail};
use serde_json::json;

use crate::cli::KeygenArgs;
use crate::cmd::passphrase_source;
use crate::output::Output;
use crate::release::keyfile;

pub fn run(args: KeygenArgs, out: &Output) -> Result<()> {
    if args.secret == args.public {
        bail!("--secret and --public name the same file; give two different paths");
    }
    for path in [&args.secret, &args.public] {
        if std::fs::symlink_metadata(path).is_ok() {
            bail!(
                "{} already exists; keygen never overwrites a key file (choose another path, \
                 or move the old file away first if you are sure it is not needed)",
                path.display()
            );
        }
    }
    let key = keyfile::generate_key();
    let public = ampoule_verify::PublicKey::from_verifying_key(&key.verifying_key())?;
    let encrypt = args.encrypt.then(|| passphrase_source(&args.passphrase));
    keyfile::write_secret_key(&args.secret, &key, encrypt.as_ref())?;
    if let Err(e) = keyfile::write_public_key(&args.public, &public) {
        // A secret key without its public half is useless and dangerous to leave lying around.
        let _ = std::fs::remove_file(&args.secret);
        return Err(e);
    }
    let human = format!(
        "key id {}\nsecret key: {} (owner-only{}; keep it secret and backed up)\npublic key: {} (give this to apps as a trusted key)",
        public.id(),
        args.secret.display(),
        if args.encrypt { ", encrypted" } else { "" },
        args.public.display(),
    );
    out.result(
        &human,
        json!({
            "ok": true,
            "key_id": public.id().to_string(),
            "secret_key": args.secret,
            "public_key": args.public,
            "encrypted": args.encrypt,
        }),
    )
}
