//! Clients of a running daemon: the producer side (`feed`: a recording played into the ingest port) and
//! the subscriber side (`listen`: alerts read from the subscriber port, resumed after the last one seen).
//! The commands `feed`, `listen`, `withdraw`, `demo` and `bench-live` are thin shells over these.

use std::path::Path;

use anyhow::{Context, bail};

pub(crate) mod feed;
pub(crate) mod listen;

/// Reads a token file: its content with surrounding whitespace removed; an empty file is an error.
pub(crate) fn read_token(path: &Path) -> anyhow::Result<String> {
    let t = std::fs::read_to_string(path)
        .with_context(|| format!("cannot read token file {}", path.display()))?;
    let t = t.trim();
    if t.is_empty() {
        bail!("token file {} is empty", path.display());
    }
    Ok(t.to_string())
}
