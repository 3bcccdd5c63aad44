//! `ampoule trust`: makes, edits, signs and checks trust-set files.
//!
//! Every edit writes a new, unsigned version (the old file stays as it is, since devices and
//! signers still need it), and signers then add their signatures one after another. Nothing
//! here prints or stores secret material: only key ids, public keys and signatures.

use std::path::Path;

use ampoule_verify::format::trust_set as spec;
use ampoule_verify::trust::{KeyEntry, Thresholds, TrustSetBody};
use ampoule_verify::{DocumentKind, KeyId, Timestamp, TrustSet, TrustSetFile, TrustedKeys};
use anyhow::{Context, Result, anyhow, bail};
use serde_json::{Value, json};

use crate::cli::{
    TrustAddArgs, TrustArgs, TrustCommand, TrustEditArgs, TrustInitArgs, TrustRemoveArgs,
    TrustShowArgs, TrustSignArgs,
};
use crate::cmd::external::{ToSign, key_named, signature, write_file};
use crate::cmd::{load_trust_set, read_trust_set_file};
use crate::failure::{Failure, Kind, count, usage};
use crate::output::{Output, failed_report};
use crate::release::keyfile;

/// How long a new trust set lasts unless told otherwise: a year, long enough that devices
/// syncing rarely never see it lapse, short enough that a forgotten set does not live forever.
const DEFAULT_LIFETIME_SECS: u64 = 365 * 86_400;

pub fn run(args: TrustArgs, out: &Output) -> Result<()> {
    match args.command {
        TrustCommand::Init(a) => init(a, out),
        TrustCommand::Add(a) => add(a, out),
        TrustCommand::Remove(a) => remove(a, out),
        TrustCommand::Show(a) => show(a, out),
        TrustCommand::Sign(a) => sign(a, out),
    }
}

fn read_file(path: &Path) -> Result<TrustSetFile> {
    Ok(read_trust_set_file(path)?.1)
}

fn parse_roles(list: &[String]) -> Result<Vec<DocumentKind>> {
    if list.is_empty() {
        return Ok(DocumentKind::ALL.to_vec());
    }
    list.iter()
        .map(|r| r.trim().parse::<DocumentKind>().map_err(usage))
        .collect()
}

fn apply_thresholds(list: &[String], thresholds: &mut Thresholds) -> Result<()> {
    for item in list {
        let parsed = item.split_once('=').and_then(|(kind, n)| {
            Some((
                kind.trim().parse::<DocumentKind>().ok()?,
                n.trim().parse::<u32>().ok()?,
            ))
        });
        let Some((kind, n)) = parsed else {
            bail!(
                "--threshold '{item}' is not KIND=N, where KIND is bundle, feed, tree_head or \
                 trust_set and N a whole number such as 2"
            );
        };
        thresholds.set(kind, n);
    }
    Ok(())
}

/// A duration such as `365d` or `12h`, in seconds.
fn parse_duration(text: &str) -> Result<u64> {
    let err = || anyhow!("--expires-in '{text}' is not a duration such as 365d or 12h");
    let (number, unit) = text.split_at(text.len().saturating_sub(1));
    let scale = match unit {
        "d" => 86_400,
        "h" => 3_600,
        _ => return Err(err()),
    };
    if number.is_empty() || !number.bytes().all(|b| b.is_ascii_digit()) {
        return Err(err());
    }
    number
        .parse::<u64>()
        .ok()
        .and_then(|n| n.checked_mul(scale))
        .ok_or_else(err)
}

/// The new version's expiry: `--expires-in`, `--expires`, else `default`.
fn expiry(edit: &TrustEditArgs, default: Timestamp, now: Timestamp) -> Result<Timestamp> {
    let expires = if let Some(text) = &edit.expires_in {
        now.unix()
            .checked_add(parse_duration(text)?)
            .and_then(Timestamp::from_unix)
            .ok_or_else(|| anyhow!("--expires-in '{text}' reaches past the year 9999"))?
    } else if let Some(text) = &edit.expires {
        text.parse::<Timestamp>()
            .map_err(usage)
            .with_context(|| format!("--expires '{text}' is not a UTC time"))?
    } else {
        default
    };
    if expires <= now {
        bail!(
            "the new trust set would expire at {expires}, which is not in the future (it is now \
             {now}); give --expires-in such as 365d"
        );
    }
    Ok(expires)
}

fn entries(paths: &[std::path::PathBuf], roles: &[String], comment: &str) -> Result<Vec<KeyEntry>> {
    let roles = parse_roles(roles)?;
    paths
        .iter()
        .map(|p| {
            Ok(KeyEntry::new(
                &keyfile::read_public_key(p)?,
                roles.clone(),
                comment,
            ))
        })
        .collect()
}

/// The keys that hold both the feed and the tree_head role when tree heads need one
/// signature: whoever holds one of them (a publishing runner) can alone sign a feed and the
/// tree head it carries, so the ledger no longer checks that runner (issue 10 item 3).
pub fn feed_keys_meeting_tree_head_alone(body: &TrustSetBody) -> Vec<KeyId> {
    if body.thresholds.tree_head > 1 {
        return Vec::new();
    }
    body.keys
        .iter()
        .filter(|k| {
            k.roles.contains(&DocumentKind::Feed) && k.roles.contains(&DocumentKind::TreeHead)
        })
        .map(|k| k.key_id)
        .collect()
}

/// The warning `trust init`/`add`/`remove` print when [`feed_keys_meeting_tree_head_alone`]
/// finds keys.
fn tree_head_role_warning(body: &TrustSetBody) -> Option<String> {
    let keys = feed_keys_meeting_tree_head_alone(body);
    if keys.is_empty() {
        return None;
    }
    let ids = keys
        .iter()
        .map(|k| k.to_string())
        .collect::<Vec<_>>()
        .join(", ");
    Some(format!(
        "warning: key {ids} holds both the feed and the tree_head role and tree heads need 1 \
         signature: a thief of that key alone can make devices accept feeds the ledger does not \
         check. Give the publishing runner's key --roles feed, and the tree_head role to a key \
         it does not hold (or raise --threshold tree_head=2 with one key held elsewhere); see \
         FORMAT.md, \"Who signs tree heads\""
    ))
}

/// Validates the new body, writes it unsigned and says who must sign it.
fn write_new_version(
    body: TrustSetBody,
    previous: Option<&TrustSetFile>,
    edit: &TrustEditArgs,
    out: &Output,
) -> Result<()> {
    let file = TrustSetFile::unsigned(body).context(
        "the new trust set is not valid (after removing keys, lower thresholds with \
         --threshold KIND=N)",
    )?;
    write_file(&edit.out, &file.to_json(), false)?;
    let b = file.body();
    let mut human = format!(
        "wrote trust set version {} to {} (unsigned): {}, thresholds {}, expires {}\n",
        b.version,
        edit.out.display(),
        count(b.keys.len(), "key", "keys"),
        thresholds_text(&b.thresholds),
        b.expires
    );
    human.push_str(&format!(
        "it needs {} by its own trust_set keys",
        count(b.thresholds.trust_set, "signature", "signatures")
    ));
    if let Some(prev) = previous {
        human.push_str(&format!(
            " and {} by the trust_set keys of version {}",
            prev.body().thresholds.trust_set,
            prev.version()
        ));
    }
    human.push_str(&format!(
        "; each signer runs 'ampoule trust sign {} --key SECRET.pem'\n",
        edit.out.display()
    ));
    let warning = tree_head_role_warning(b);
    if let Some(w) = &warning {
        out.note(w);
    }
    out.result(
        &human,
        json!({
            "ok": true,
            "file": edit.out,
            "version": b.version,
            "expires": b.expires,
            "keys": keys_json(b),
            "thresholds": b.thresholds,
            "previous_version": previous.map(|p| p.version()),
            "warnings": warning.into_iter().collect::<Vec<_>>(),
        }),
    )
}

fn init(args: TrustInitArgs, out: &Output) -> Result<()> {
    let now = Timestamp::now();
    let default =
        Timestamp::from_unix(now.unix().saturating_add(DEFAULT_LIFETIME_SECS)).unwrap_or(now);
    let mut thresholds = Thresholds {
        bundle: 1,
        feed: 1,
        tree_head: 1,
        trust_set: 1,
    };
    apply_thresholds(&args.edit.threshold, &mut thresholds)?;
    let body = TrustSetBody {
        format: spec::FORMAT_VERSION,
        version: 1,
        expires: expiry(&args.edit, default, now)?,
        keys: entries(&args.keys, &args.roles, &args.comment)?,
        thresholds,
    };
    write_new_version(body, None, &args.edit, out)
}

fn add(args: TrustAddArgs, out: &Output) -> Result<()> {
    let current = read_file(&args.trust_set)?;
    let mut body = current.body().clone();
    body.version = next_version(&current)?;
    body.keys
        .extend(entries(&args.keys, &args.roles, &args.comment)?);
    apply_thresholds(&args.edit.threshold, &mut body.thresholds)?;
    body.expires = expiry(&args.edit, body.expires, Timestamp::now())?;
    write_new_version(body, Some(&current), &args.edit, out)
}

fn remove(args: TrustRemoveArgs, out: &Output) -> Result<()> {
    let current = read_file(&args.trust_set)?;
    let mut ids = Vec::new();
    for text in &args.key_ids {
        ids.push(text.parse::<KeyId>().map_err(usage)?);
    }
    for path in &args.keys {
        ids.push(keyfile::read_public_key(path)?.id());
    }
    let mut body = current.body().clone();
    for id in &ids {
        if !body.keys.iter().any(|k| k.key_id == *id) {
            bail!(
                "key {id} is not in trust set version {} ({}); nothing was written",
                current.version(),
                args.trust_set.display()
            );
        }
        body.keys.retain(|k| k.key_id != *id);
    }
    body.version = next_version(&current)?;
    apply_thresholds(&args.edit.threshold, &mut body.thresholds)?;
    body.expires = expiry(&args.edit, body.expires, Timestamp::now())?;
    write_new_version(body, Some(&current), &args.edit, out)
}

fn next_version(current: &TrustSetFile) -> Result<u64> {
    current
        .version()
        .checked_add(1)
        .ok_or_else(|| anyhow!("trust set version {} is the last one", current.version()))
}

fn thresholds_text(t: &Thresholds) -> String {
    DocumentKind::ALL
        .iter()
        .map(|k| format!("{k}={}", t.get(*k)))
        .collect::<Vec<_>>()
        .join(",")
}

fn roles_text(roles: &[DocumentKind]) -> String {
    roles.iter().map(|r| r.name()).collect::<Vec<_>>().join(",")
}

fn keys_json(body: &TrustSetBody) -> Value {
    body.keys
        .iter()
        .map(|k| {
            json!({
                "key_id": k.key_id.to_string(),
                "public_key": hex::encode(k.public_key),
                "roles": k.roles,
                "comment": k.comment,
            })
        })
        .collect()
}

fn show(args: TrustShowArgs, out: &Output) -> Result<()> {
    let now = Timestamp::now();
    let (bytes, file) = read_trust_set_file(&args.trust_set)?;
    let trusted = match &args.trusted {
        Some(path) => Some(load_trust_set(path)?),
        None => None,
    };
    // Check every signature against every key either set lists, so each can be labelled.
    let mut all: TrustedKeys = file.all_keys();
    if let Some(t) = &trusted {
        for key in t.file().all_keys().iter() {
            all.add(key.clone());
        }
    }
    let report = file.tally(&all);
    let own_keys = file.keys_for(DocumentKind::TrustSet);
    let own_valid = report
        .valid
        .iter()
        .filter(|id| own_keys.get(id).is_some())
        .count();
    let own_needed = file.threshold(DocumentKind::TrustSet);
    let as_initial = TrustSet::verify_initial(&bytes, now).map(|_| ());
    let as_successor = trusted
        .as_ref()
        .map(|t| (t.version(), t.accept_successor(&bytes, now).map(|_| ())));

    let b = file.body();
    let expired = now > b.expires;
    let mut human = format!(
        "trust set  {}\nversion    {} (format {})\nexpires    {}{}\nthresholds {}\nkeys       {}\n",
        args.trust_set.display(),
        b.version,
        b.format,
        b.expires,
        if expired { "  EXPIRED" } else { "" },
        thresholds_text(&b.thresholds),
        b.keys.len()
    );
    for k in &b.keys {
        human.push_str(&format!(
            "  {}  {}  {}\n",
            k.key_id,
            roles_text(&k.roles),
            k.comment
        ));
    }
    let status = |id: &KeyId| -> &'static str {
        let listed = b.keys.iter().any(|k| k.key_id == *id);
        if report.valid.contains(id) {
            if listed {
                "valid"
            } else {
                "valid (key of the trusted set, not listed here)"
            }
        } else if report.invalid.contains(id) {
            "INVALID for this trust set"
        } else {
            "unknown key, not checked"
        }
    };
    human.push_str(&format!("signatures {}\n", file.signatures().len()));
    for s in file.signatures() {
        human.push_str(&format!("  {}  {}\n", s.key_id, status(&s.key_id)));
    }
    human.push_str(&format!(
        "own trust_set keys: {own_valid} of {}{}\n",
        count(own_needed, "needed signature", "needed signatures"),
        if own_valid >= own_needed {
            ""
        } else {
            "  NOT ENOUGH"
        }
    ));
    let verdict = |r: &ampoule_verify::Result<()>| match r {
        Ok(()) => "accepted".to_string(),
        Err(e) => format!("refused: {e}"),
    };
    human.push_str(&format!(
        "as a device's initial trust set: {}\n",
        verdict(&as_initial)
    ));
    if let Some((version, result)) = &as_successor {
        human.push_str(&format!(
            "as successor of trusted version {version}: {}\n",
            verdict(result)
        ));
    }
    // Printing "refused" is a refusal: the report is the output, and the exit code and the
    // JSON's error fields say so too, as scripts that gate a release on it expect.
    let refusal = match (&as_initial, &as_successor) {
        (Err(e), _) => Some((e, "as a device's initial trust set".to_string())),
        (Ok(()), Some((version, Err(e)))) => {
            Some((e, format!("as successor of trusted version {version}")))
        }
        _ => None,
    };
    let doc = json!({
            "ok": true,
            "file": args.trust_set,
            "format": b.format,
            "version": b.version,
            "expires": b.expires,
            "expired": expired,
            "thresholds": b.thresholds,
            "keys": keys_json(b),
            "signatures": file.signatures().iter().map(|s| json!({
                "key_id": s.key_id.to_string(),
                "status": if report.valid.contains(&s.key_id) { "valid" }
                    else if report.invalid.contains(&s.key_id) { "invalid" }
                    else { "unknown_key" },
                "listed": b.keys.iter().any(|k| k.key_id == s.key_id),
            })).collect::<Vec<_>>(),
            "own_signatures": { "valid": own_valid, "needed": own_needed },
            "as_initial": { "accepted": as_initial.is_ok(),
                "error": as_initial.as_ref().err().map(|e| e.to_string()) },
            "as_successor": as_successor.as_ref().map(|(v, r)| json!({
                "trusted_version": v,
                "accepted": r.is_ok(),
                "error": r.as_ref().err().map(|e| e.to_string()),
            })),
    });
    let Some((e, role)) = refusal else {
        return out.result(&human, doc);
    };
    let kind = Kind::Verify(e.kind());
    let message = format!("trust set {} refused {role}: {e}", args.trust_set.display());
    out.result(&human, failed_report(doc, &message, kind))?;
    Err(Failure::reported(kind, message))
}

fn sign(args: TrustSignArgs, out: &Output) -> Result<()> {
    let mut file = read_file(&args.trust_set)?;
    if let Some(request) = &args.signer.export_request {
        write_file(request, &file.signing_request(), false)?;
        let human = format!(
            "wrote the signing request for trust set version {} to {}; sign exactly these bytes \
             with Ed25519, then attach the raw 64-byte signature with 'ampoule trust sign {} \
             --attach SIG --pubkey PUB.pem'",
            file.version(),
            request.display(),
            args.trust_set.display()
        );
        return out.result(
            &human,
            json!({ "ok": true, "file": args.trust_set, "version": file.version(), "request": request }),
        );
    }
    let what = format!("trust set version {}", file.version());
    let (entry, public) = signature(
        &args.signer,
        &ToSign {
            what: &what,
            context: ampoule_verify::format::context::TRUST_SET,
            document: file.text().as_bytes(),
            file: &args.trust_set,
            command: "ampoule trust sign",
            noun: "trust set",
        },
    )?;
    let changed = file.insert_signature(entry)?;
    if changed {
        write_file(&args.trust_set, &file.to_json(), true)?;
    }
    let listed = file.body().keys.iter().any(|k| k.key_id == public.id());
    if !listed {
        out.note(&format!(
            "key {} is not listed in trust set version {}; its signature counts only for \
             devices whose current trust set lists it (as when it signs its own successor)",
            key_named(&args.signer, &public),
            file.version()
        ));
    }
    let own_keys = file.keys_for(DocumentKind::TrustSet);
    let own_valid = file.tally(&own_keys).valid.len();
    let own_needed = file.threshold(DocumentKind::TrustSet);
    let tally = format!(
        "its own trust_set keys: {own_valid} of {}",
        count(own_needed, "needed signature", "needed signatures")
    );
    let human = if changed {
        format!(
            "signed trust set version {} in {} with key {}; {tally}",
            file.version(),
            args.trust_set.display(),
            key_named(&args.signer, &public)
        )
    } else {
        format!(
            "trust set version {} in {} is already signed by key {}; nothing changed; {tally}",
            file.version(),
            args.trust_set.display(),
            key_named(&args.signer, &public)
        )
    };
    out.result(
        &human,
        json!({
            "ok": true,
            "file": args.trust_set,
            "version": file.version(),
            "key_id": public.id().to_string(),
            "listed": listed,
            "changed": changed,
            "signatures": file.signatures().iter().map(|s| s.key_id.to_string()).collect::<Vec<_>>(),
            "own_signatures": { "valid": own_valid, "needed": own_needed },
        }),
    )
}
