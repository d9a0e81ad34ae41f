//! Clients of a running daemon: the producer side (`feed`: a recording played into the ingest port) and
//! the subscriber side (`listen`: alerts read from the subscriber port, resumed after the last one seen).
//! `exec` runs `listen --exec` handlers. The commands `feed`, `listen`, `withdraw`, `test-alert`, `demo` and
//! `bench-live` are thin shells over these.

use std::io::Write as _;
use std::path::Path;

use anyhow::{Context, bail};

pub(crate) mod exec;
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

/// Reads a listener's state file: the last sequence number handled (0 when the file does not exist).
pub(crate) fn read_state(path: &Path) -> anyhow::Result<u64> {
    match std::fs::read_to_string(path) {
        Ok(t) => t
            .trim()
            .parse()
            .with_context(|| format!("state file {} does not hold a sequence number", path.display())),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(0),
        Err(e) => Err(e).with_context(|| format!("cannot read state file {}", path.display())),
    }
}

/// Writes the state file atomically (temporary file, fsync, rename), so a crash leaves the old or the new value.
pub(crate) fn write_state(path: &Path, seq: u64) -> anyhow::Result<()> {
    let tmp = path.with_extension("tmp");
    let mut f = std::fs::File::create(&tmp).with_context(|| format!("cannot write {}", tmp.display()))?;
    writeln!(f, "{seq}")
        .and_then(|()| f.sync_all())
        .with_context(|| format!("cannot write {}", tmp.display()))?;
    std::fs::rename(&tmp, path)
        .with_context(|| format!("cannot rename {} to {}", tmp.display(), path.display()))
}
