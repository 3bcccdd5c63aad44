//! `ampoule delta`: make a delta from an older bundle to a newer one (issue 13), and the view
//! `ampoule inspect` gives of a delta file.

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
    let mut human = format!(
        "delta    {}\nrebuilds {} {} (manifest sha256 {})\nsize     {size} bytes ({} bytes of patches, {records} chunks)\nbase     {} (the SHA-256 of the base's files)\n",
        shown(&path.display().to_string()),
        shown(name),
        version,
        Digest::of(&head.manifest),
        head.patches_len,
        head.header.base_id(),
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
            "chunks": records,
            "chunk_bytes": chunk_bytes,
            "window_bytes": window_bytes,
        }),
    )
}
