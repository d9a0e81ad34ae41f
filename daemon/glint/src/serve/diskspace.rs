//! Free space on the state directory's file system: checked before the daemon starts and every few seconds
//! while it runs. Below the warning threshold it logs; below the minimum it has the desk refuse new alerts
//! and stops the daemon cleanly while the journal can still write, rather than let a full disk fail an
//! fsync halfway through a batch. Also removes temporary files an interrupted atomic write left behind.

use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::Duration;

use tokio_util::sync::CancellationToken;

use crate::desk::Desk;
use crate::metrics::Metrics;

/// How often the running daemon looks.
const CHECK_EVERY: Duration = Duration::from_secs(2);

/// Bytes an unprivileged process may still write on the file system holding `path`.
pub(crate) fn free_bytes(path: &Path) -> std::io::Result<u64> {
    let s = rustix::fs::statvfs(path)?;
    Ok(s.f_bavail.saturating_mul(s.f_frsize))
}

/// Where free space stands against the thresholds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Level {
    Fine,
    Low,
    TooLow,
}

pub(crate) fn level(free: u64, warn: u64, min: u64) -> Level {
    if min > 0 && free < min {
        Level::TooLow
    } else if warn > 0 && free < warn {
        Level::Low
    } else {
        Level::Fine
    }
}

fn mib(b: u64) -> String {
    format!("{:.1} MiB", b as f64 / f64::from(1u32 << 20))
}

/// Checks before start: an error when there is too little room to run, a warning when little.
pub(crate) fn check_at_start(dir: &Path, warn: u64, min: u64) -> anyhow::Result<u64> {
    let free = free_bytes(dir)
        .map_err(|e| anyhow::anyhow!("cannot read the free space of {}: {e}", dir.display()))?;
    match level(free, warn, min) {
        Level::TooLow => anyhow::bail!(
            "refusing to start: only {} free on the file system of {} (daemon.disk_min_free_bytes is {}); \
             make room first",
            mib(free),
            dir.display(),
            mib(min)
        ),
        Level::Low => tracing::warn!(
            free_bytes = free,
            "little disk space left for {}: {} free, below daemon.disk_warn_free_bytes ({})",
            dir.display(),
            mib(free),
            mib(warn)
        ),
        Level::Fine => {}
    }
    Ok(free)
}

/// Watches free space until `stop`; below the minimum, the desk refuses new alerts and `fatal` is cancelled.
pub(crate) async fn watch(
    dir: std::path::PathBuf,
    warn: u64,
    min: u64,
    desk: Arc<Desk>,
    metrics: Arc<Metrics>,
    fatal: CancellationToken,
    stop: CancellationToken,
) {
    let mut was = Level::Fine;
    loop {
        tokio::select! {
            () = tokio::time::sleep(CHECK_EVERY) => {}
            () = stop.cancelled() => return,
        }
        let d = dir.clone();
        let free = match tokio::task::spawn_blocking(move || free_bytes(&d)).await {
            Ok(Ok(f)) => f,
            Ok(Err(e)) => {
                tracing::warn!("cannot read the free space of {}: {e}", dir.display());
                continue;
            }
            Err(_) => continue,
        };
        metrics
            .disk_free_bytes
            .store(i64::try_from(free).unwrap_or(i64::MAX), Ordering::Relaxed);
        let now = level(free, warn, min);
        match now {
            Level::TooLow => {
                let why = format!(
                    "only {} free on the file system of {} (daemon.disk_min_free_bytes is {})",
                    mib(free),
                    dir.display(),
                    mib(min)
                );
                tracing::error!(
                    free_bytes = free,
                    "disk nearly full, refusing new alerts and stopping: {why}"
                );
                desk.refuse(why);
                fatal.cancel();
                return;
            }
            Level::Low if was == Level::Fine => tracing::warn!(
                free_bytes = free,
                "little disk space left: {} free, below daemon.disk_warn_free_bytes ({})",
                mib(free),
                mib(warn)
            ),
            Level::Fine if was != Level::Fine => tracing::info!(free_bytes = free, "disk space recovered"),
            _ => {}
        }
        was = now;
    }
}

/// Removes `*.tmp` files (left by an atomic write that was interrupted, often by a full disk) from `dirs`.
/// Run after the state directory's lock is taken, so no other daemon is writing them.
pub(crate) fn remove_temporaries(dirs: &[&Path]) -> usize {
    let mut removed = 0;
    for dir in dirs {
        let Ok(entries) = std::fs::read_dir(dir) else {
            continue;
        };
        for e in entries.filter_map(Result::ok) {
            let p = e.path();
            if p.extension().is_some_and(|x| x == "tmp") && p.is_file() && std::fs::remove_file(&p).is_ok() {
                tracing::info!(file = %p.display(), "removed a temporary file left by an interrupted write");
                removed += 1;
            }
        }
    }
    removed
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn levels_follow_the_thresholds_and_zero_turns_a_check_off() {
        assert_eq!(level(10, 100, 50), Level::TooLow);
        assert_eq!(level(60, 100, 50), Level::Low);
        assert_eq!(level(100, 100, 50), Level::Fine);
        assert_eq!(level(0, 0, 0), Level::Fine);
        assert_eq!(level(10, 100, 0), Level::Low);
    }

    #[test]
    fn free_space_is_read_and_an_impossible_minimum_refuses_to_start() {
        let tmp = tempfile::tempdir().unwrap();
        let free = free_bytes(tmp.path()).unwrap();
        assert!(free > 0);
        let err = check_at_start(tmp.path(), u64::MAX, u64::MAX).unwrap_err();
        assert!(err.to_string().contains("refusing to start"), "{err}");
        assert!(check_at_start(tmp.path(), 0, 0).is_ok());
    }

    #[test]
    fn temporaries_are_removed_and_nothing_else() {
        let tmp = tempfile::tempdir().unwrap();
        std::fs::write(tmp.path().join("ports.tmp"), b"").unwrap();
        std::fs::write(tmp.path().join("high_water.tmp"), b"x").unwrap();
        std::fs::write(tmp.path().join("ports.json"), b"{}").unwrap();
        assert_eq!(remove_temporaries(&[tmp.path()]), 2);
        assert!(tmp.path().join("ports.json").exists());
        assert!(!tmp.path().join("ports.tmp").exists());
    }
}
