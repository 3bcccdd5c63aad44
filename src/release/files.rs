//! Reading the files a user names (key files, trust sets, signatures): whole, but never more
//! than the caller's cap, so a wrong path to a huge file fails at once instead of filling memory.

use std::fs::File;
use std::io::Read;
use std::path::Path;

use anyhow::{Context, Result, bail};

/// Reads a whole file of at most `max` bytes, refusing a larger one before reading it all.
pub fn read_bounded(path: &Path, max: u64, what: &str) -> Result<Vec<u8>> {
    let file = File::open(path).with_context(|| format!("cannot open {}", path.display()))?;
    let mut bytes = Vec::new();
    file.take(max + 1)
        .read_to_end(&mut bytes)
        .with_context(|| format!("cannot read {}", path.display()))?;
    if bytes.len() as u64 > max {
        bail!("{} is over {max} bytes; that is not {what}", path.display());
    }
    Ok(bytes)
}
