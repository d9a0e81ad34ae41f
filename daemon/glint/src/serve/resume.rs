//! Where each instrument's engine resumes after a restart: its watermark and the highest frame seq it took,
//! kept in `state_dir/resume-<instrument>.json` (a few hundred bytes, atomic write and rename, at the
//! state-save cadence and at shutdown). Photons
//! behind the resume point are counted and dropped before the engine, never searched twice, so a restart
//! (or a producer that sends the same frames again) cannot raise the same alerts again. The journal adds
//! a second floor: no photon at or before the newest trigger the instrument already issued is searched again.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

/// Larger files are not ours (the real one is a few hundred bytes).
const MAX_BYTES: u64 = 4096;

/// One instrument's resume point.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
pub(crate) struct ResumePoint {
    /// Every photon before this time (GPS ns) was searched (or dropped as late) before the stop.
    pub(crate) watermark_gps_ns: i64,
    /// Highest producer frame seq the engine took; the daemon's `Welcome.last_seq` starts from it.
    pub(crate) last_seq: u64,
}

/// Why a resume file was not used.
#[derive(Debug, thiserror::Error)]
pub(crate) enum ResumeError {
    /// Reading or writing failed.
    #[error("{path}: {source}")]
    Io {
        /// The file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The file is not a resume point of this instrument.
    #[error("{path}: not a resume point: {why}")]
    Invalid {
        /// The file.
        path: PathBuf,
        /// What was wrong.
        why: String,
    },
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct File {
    instrument: String,
    watermark_gps_ns: i64,
    last_seq: u64,
    /// For people reading the file; not read back.
    watermark_utc: String,
}

/// The file of one instrument's resume point.
pub(crate) fn path(state_dir: &Path, instrument: &str) -> PathBuf {
    state_dir.join(format!("resume-{instrument}.json"))
}

/// Reads a resume point; `Ok(None)` when there is none (a first start).
pub(crate) fn load(path: &Path, instrument: &str) -> Result<Option<ResumePoint>, ResumeError> {
    let io = |source| ResumeError::Io {
        path: path.to_path_buf(),
        source,
    };
    let invalid = |why: String| ResumeError::Invalid {
        path: path.to_path_buf(),
        why,
    };
    let len = match std::fs::metadata(path) {
        Ok(m) => m.len(),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(e) => return Err(io(e)),
    };
    if len > MAX_BYTES {
        return Err(invalid(format!("{len} bytes (at most {MAX_BYTES})")));
    }
    let text = std::fs::read_to_string(path).map_err(io)?;
    let f: File = serde_json::from_str(&text).map_err(|e| invalid(e.to_string()))?;
    if f.instrument != instrument {
        return Err(invalid(format!(
            "it belongs to instrument '{}'",
            crate::logging::untrusted(&f.instrument)
        )));
    }
    Ok(Some(ResumePoint {
        watermark_gps_ns: f.watermark_gps_ns,
        last_seq: f.last_seq,
    }))
}

/// Writes a resume point atomically (temporary file, fsync, rename).
pub(crate) fn save(path: &Path, instrument: &str, p: ResumePoint) -> Result<(), ResumeError> {
    let f = File {
        instrument: instrument.to_string(),
        watermark_gps_ns: p.watermark_gps_ns,
        last_seq: p.last_seq,
        watermark_utc: crate::timefmt::gps_ns_to_utc(p.watermark_gps_ns),
    };
    let text = serde_json::to_string_pretty(&f).map_err(|e| ResumeError::Invalid {
        path: path.to_path_buf(),
        why: e.to_string(),
    })?;
    super::write_atomic(path, text.as_bytes()).map_err(|source| ResumeError::Io {
        path: path.to_path_buf(),
        source,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_resume_point_survives_a_round_trip_and_foreign_or_damaged_files_are_refused() {
        let dir = tempfile::tempdir().unwrap();
        let p = path(dir.path(), "alpha");
        assert_eq!(load(&p, "alpha").unwrap(), None);
        let point = ResumePoint {
            watermark_gps_ns: 1_400_000_000_123_456_789,
            last_seq: 42,
        };
        save(&p, "alpha", point).unwrap();
        assert_eq!(load(&p, "alpha").unwrap(), Some(point));
        let e = load(&p, "beta").unwrap_err().to_string();
        assert!(e.contains("belongs to instrument 'alpha'"), "{e}");
        std::fs::write(&p, "{ not json").unwrap();
        assert!(matches!(load(&p, "alpha"), Err(ResumeError::Invalid { .. })));
        std::fs::write(&p, vec![b' '; 5000]).unwrap();
        let e = load(&p, "alpha").unwrap_err().to_string();
        assert!(e.contains("5000 bytes"), "{e}");
    }
}
