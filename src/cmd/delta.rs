//! `ampoule delta`: make a delta from an older bundle to a newer one (issue 13), and the views
//! `ampoule inspect` and `ampoule diff` give of a delta file: a way to send a release, not a
//! release of its own.

use std::fs::File;
use std::io::{BufReader, Read};
use std::path::Path;

use ampoule_verify::Digest;
use ampoule_verify::format::delta::HEADER;
use ampoule_verify::format::delta_file::{self, Header};
use ampoule_verify::manifest::{FileEntry, Manifest};
use anyhow::{Context, Result};
use serde_json::{Value, json};

use crate::cli::DeltaArgs;
use crate::failure::bundle_error;
use crate::output::{Output, shown};
use crate::release::delta;

pub fn run(args: DeltaArgs, out: &Output) -> Result<()> {
    let made = delta::make(&args.from, &args.bundle, &args.out)?;
    let h = &made.header;
    let human = format!(
        "wrote {}: {} bytes, sha256 {}\nrebuilds {} {} from base {} ({} chunks, {} copied unchanged)\n",
        shown(&args.out.display().to_string()),
        made.size,
        made.sha256,
        shown(&h.name),
        h.version,
        h.base_id(),
        h.records,
        made.copies
    );
    out.result(
        &human,
        json!({
            "delta": args.out.display().to_string(),
            "size": made.size,
            "sha256": made.sha256.to_string(),
            "name": h.name,
            "version": h.version.to_string(),
            "base": h.base_id().to_string(),
            "base_files": files_json(&h.base),
            "chunks": h.records,
            "copied_chunks": made.copies,
        }),
    )
}

/// Whether the file at `path` is a delta: its first tar entry is the delta header.
pub fn is_delta(path: &Path) -> bool {
    let mut first = [0u8; 100];
    File::open(path)
        .and_then(|mut f| f.read_exact(&mut first))
        .is_ok()
        && first.starts_with(HEADER.as_bytes())
        && first[HEADER.len()] == 0
}

fn files_json(files: &[FileEntry]) -> Value {
    files
        .iter()
        .map(|f| json!({"path": f.path, "size": f.size, "sha256": f.sha256.to_string()}))
        .collect()
}

/// `ampoule inspect` on a delta: what it rebuilds, from which base, and what applying takes.
/// Nothing is checked against trust here: a device checks the carried signatures.
pub fn inspect(path: &Path, out: &Output) -> Result<()> {
    let file = File::open(path).with_context(|| format!("cannot open {}", path.display()))?;
    let size = file.metadata()?.len();
    let head =
        delta_file::read_head(&mut BufReader::new(file)).map_err(|e| bundle_error(path, e))?;
    let manifest = Manifest::from_json(&head.manifest).map_err(|e| bundle_error(path, e))?;
    let Header {
        name,
        version,
        base,
        chunk_bytes,
        window_bytes,
        records,
        ..
    } = &head.header;
    let rebuilt: u64 = manifest.files.iter().map(|f| f.size).sum();
    let mut human = format!(
        "delta    {}\nrebuilds {} {} (manifest sha256 {})\nsize     {size} bytes ({} bytes of patches, {records} chunks), for {rebuilt} bytes of files\nbase     {} (the SHA-256 of the base's files)\nwhat     not a release: a way to send {} {} to a device that holds exactly the base files below; it carries that release's signed manifest and rebuilds only its files\n",
        shown(&path.display().to_string()),
        shown(name),
        version,
        Digest::of(&head.manifest),
        head.patches_len,
        head.header.base_id(),
        shown(&manifest.name),
        manifest.version,
    );
    for f in base {
        human.push_str(&format!(
            "from     {:<16} {:>12} bytes  sha256 {}\n",
            shown(&f.path),
            f.size,
            f.sha256
        ));
    }
    for f in &manifest.files {
        human.push_str(&format!(
            "to       {:<16} {:>12} bytes  sha256 {}\n",
            shown(&f.path),
            f.size,
            f.sha256
        ));
    }
    human.push_str(&format!(
        "memory   chunks of at most {chunk_bytes} bytes, base windows of at most {window_bytes} bytes\n\
         signed   carries the release's manifest and signatures; a device checks them before any patch\n"
    ));
    if manifest.name != *name || manifest.version != *version {
        human.push_str(&format!(
            "WARNING  the header names {} {} but the carried manifest is {} {}\n",
            shown(name),
            version,
            shown(&manifest.name),
            manifest.version
        ));
    }
    out.result(
        &human,
        json!({
            "delta": path.display().to_string(),
            "size": size,
            "name": name,
            "version": version.to_string(),
            "manifest_sha256": Digest::of(&head.manifest).to_string(),
            "base": head.header.base_id().to_string(),
            "base_files": files_json(base),
            "files": files_json(&manifest.files),
            "patches_size": head.patches_len,
            "rebuilt_size": rebuilt,
            "kind": "delta",
            "chunks": records,
            "chunk_bytes": chunk_bytes,
            "window_bytes": window_bytes,
        }),
    )
}

/// `ampoule diff` with a delta on one side: a delta is not a release, so there is nothing to
/// compare it with; this says how it relates to the bundle on the other side (its base, the
/// release it rebuilds, or neither) and with which sizes, and how to compare the releases.
pub fn diff(old: &Path, new: &Path, out: &Output) -> Result<()> {
    let (delta, bundle) = match (is_delta(old), is_delta(new)) {
        (true, true) => {
            return Err(crate::failure::usage(anyhow::anyhow!(
                "{} and {} are both deltas; a delta is a way to send a release, not a release, \
                 and diff compares releases: give their bundles",
                old.display(),
                new.display()
            )));
        }
        (true, false) => (old, new),
        _ => (new, old),
    };
    let file = File::open(delta).with_context(|| format!("cannot open {}", delta.display()))?;
    let delta_size = file.metadata()?.len();
    let head =
        delta_file::read_head(&mut BufReader::new(file)).map_err(|e| bundle_error(delta, e))?;
    let manifest = Manifest::from_json(&head.manifest).map_err(|e| bundle_error(delta, e))?;
    let other =
        ampoule_verify::bundle::Unverified::open(bundle).map_err(|e| bundle_error(bundle, e))?;
    let o = &other.manifest;
    let base = head.header.base_id();
    let rebuilt: u64 = manifest.files.iter().map(|f| f.size).sum();
    let (relation, says) = if delta_file::base_id(&o.files) == base {
        (
            "base",
            format!(
                "{} ({} {}) is the delta's base: a device that holds its files can take the delta \
                 instead of the {} {} bundle",
                shown(&bundle.display().to_string()),
                shown(&o.name),
                o.version,
                shown(&manifest.name),
                manifest.version
            ),
        )
    } else if other.layout.manifest == head.manifest {
        (
            "release",
            format!(
                "{} is the release the delta rebuilds ({} {}, the same signed manifest): the \
                 delta is another way to send it",
                shown(&bundle.display().to_string()),
                shown(&o.name),
                o.version
            ),
        )
    } else {
        (
            "unrelated",
            format!(
                "{} ({} {}) is neither the delta's base nor the release it rebuilds",
                shown(&bundle.display().to_string()),
                shown(&o.name),
                o.version
            ),
        )
    };
    let human = format!(
        "{} is a delta, not a release: a way to send {} {} to devices on base {base}\n{says}\n\
         sizes: delta {delta_size} bytes, bundle {} {} bytes, files the delta rebuilds {rebuilt} \
         bytes\nto see what changed between two releases, diff their bundles: ampoule diff \
         OLD.ampoule NEW.ampoule\n",
        shown(&delta.display().to_string()),
        shown(&manifest.name),
        manifest.version,
        shown(&bundle.display().to_string()),
        other.layout.file_len,
    );
    out.result(
        &human,
        json!({
            "ok": true,
            "delta": delta.display().to_string(),
            "rebuilds": {
                "name": manifest.name,
                "version": manifest.version.to_string(),
                "manifest_sha256": Digest::of(&head.manifest).to_string(),
            },
            "base": base.to_string(),
            "bundle": bundle.display().to_string(),
            "bundle_release": {"name": o.name, "version": o.version.to_string()},
            "relation": relation,
            "delta_size": delta_size,
            "bundle_size": other.layout.file_len,
            "rebuilt_size": rebuilt,
        }),
    )
}
