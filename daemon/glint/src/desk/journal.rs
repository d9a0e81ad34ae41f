//! The alert journal: every alert the desk issues is appended here and fsynced before any subscriber sees it.
//! Append-only segment files in `state_dir/journal`, a CRC32 per record, the torn tail of a crash cut (and
//! logged) on start, rotation by size and deletion of old segments by age. Subscribers read old alerts back
//! from here, so the journal is also the cursor store that lets a slow or restarted subscriber resume.
//!
//! Layout: `segment-<first seq, 20 digits>.gjl` = magic `GLINTJNL`, u32 format version (LE), then records
//! `u32 len | u32 crc32(payload) | payload`, payload = `i64 written_unix_ns | protobuf glint.v1.Alert`.

use std::fs::{self, File, OpenOptions};
use std::io::{self, BufReader, Read, Write};
use std::path::{Path, PathBuf};
use std::time::Duration;

use glint_wire::pb;
use prost::Message;

/// Magic bytes opening every segment.
const MAGIC: [u8; 8] = *b"GLINTJNL";
/// Format version written after the magic.
const FORMAT_VERSION: u32 = 1;
/// Bytes of the segment header.
const HEADER_LEN: u64 = 12;
/// Bytes of a record header (length and CRC).
const RECORD_HEADER_LEN: u64 = 8;
/// A record longer than this is taken as corruption rather than allocated (an alert is a few KiB).
const MAX_RECORD_BYTES: u32 = 64 << 20;
const SEGMENT_PREFIX: &str = "segment-";
const SEGMENT_SUFFIX: &str = ".gjl";

/// Why the journal could not be opened, written or read.
#[derive(Debug, thiserror::Error)]
pub(crate) enum JournalError {
    /// A file operation failed.
    #[error("journal {action} {path}: {source}")]
    Io {
        /// The file or directory.
        path: PathBuf,
        /// What was being done.
        action: &'static str,
        /// The operating system's error.
        source: io::Error,
    },
    /// A segment does not start with the journal magic or has a version this build cannot read.
    #[error("journal segment {path} has a bad header ({detail})")]
    BadHeader {
        /// The segment.
        path: PathBuf,
        /// What was wrong.
        detail: String,
    },
    /// An alert handed to `append` does not continue the sequence.
    #[error("journal expected alert seq {expected}, got {got}")]
    OutOfSequence {
        /// `last_seq + 1`.
        expected: u64,
        /// The alert's seq.
        got: u64,
    },
}

fn io_err(path: &Path, action: &'static str) -> impl FnOnce(io::Error) -> JournalError {
    let path = path.to_path_buf();
    move |source| JournalError::Io { path, action, source }
}

/// A torn or corrupt tail cut from the newest segment on open.
#[derive(Debug, Clone, PartialEq, Eq)]
pub(crate) struct TornTail {
    /// The segment that was cut.
    pub(crate) path: PathBuf,
    /// Offset of the first bad byte, where the file now ends.
    pub(crate) offset: u64,
    /// Bytes removed.
    pub(crate) bytes_cut: u64,
    /// Why the tail was bad.
    pub(crate) reason: String,
}

/// What `Journal::open` found.
#[derive(Debug, Clone, Default)]
pub(crate) struct OpenReport {
    /// Records found intact, all segments.
    pub(crate) records: u64,
    /// Segments kept.
    pub(crate) segments: usize,
    /// The torn tail cut from the newest segment, if any.
    pub(crate) torn: Option<TornTail>,
    /// Corrupt records found in older segments (readers skip the rest of such a segment).
    pub(crate) corrupt_older: Vec<String>,
    /// Segments deleted by retention.
    pub(crate) deleted: Vec<PathBuf>,
}

/// One record read back.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Record {
    /// Wall-clock time it was written, Unix ns.
    pub(crate) written_unix_ns: i64,
    /// The alert.
    pub(crate) alert: pb::Alert,
}

/// Why reading stopped inside a segment.
#[derive(Debug, Clone, PartialEq, Eq)]
enum Stop {
    /// Clean end of file.
    End,
    /// A record cut short or failing its CRC or decode, at this offset.
    Bad { offset: u64, reason: String },
}

/// Reads the records of one segment in order.
struct SegmentReader {
    path: PathBuf,
    file: BufReader<File>,
    offset: u64,
}

impl SegmentReader {
    fn open(path: &Path) -> Result<Self, JournalError> {
        let file = File::open(path).map_err(io_err(path, "open"))?;
        let mut file = BufReader::new(file);
        let mut header = [0u8; HEADER_LEN as usize];
        let mut got = 0;
        while got < header.len() {
            match file.read(&mut header[got..]) {
                Ok(0) => break,
                Ok(n) => got += n,
                Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
                Err(e) => return Err(io_err(path, "read")(e)),
            }
        }
        if got < header.len() {
            return Err(JournalError::BadHeader {
                path: path.to_path_buf(),
                detail: format!("only {got} bytes"),
            });
        }
        if header[..8] != MAGIC {
            return Err(JournalError::BadHeader {
                path: path.to_path_buf(),
                detail: "magic is not GLINTJNL".into(),
            });
        }
        let version = u32::from_le_bytes([header[8], header[9], header[10], header[11]]);
        if version != FORMAT_VERSION {
            return Err(JournalError::BadHeader {
                path: path.to_path_buf(),
                detail: format!("format version {version}, this build reads {FORMAT_VERSION}"),
            });
        }
        Ok(Self {
            path: path.to_path_buf(),
            file,
            offset: HEADER_LEN,
        })
    }

    /// The next record, or why there is none. I/O errors other than a short read are returned as errors.
    fn next(&mut self) -> Result<Result<Record, Stop>, JournalError> {
        let start = self.offset;
        let bad = |reason: String| {
            Ok(Err(Stop::Bad {
                offset: start,
                reason,
            }))
        };
        let mut head = [0u8; RECORD_HEADER_LEN as usize];
        match read_full(&mut self.file, &mut head).map_err(io_err(&self.path, "read"))? {
            0 => return Ok(Err(Stop::End)),
            n if n < head.len() => return bad(format!("record header cut short ({n} of 8 bytes)")),
            _ => {}
        }
        let len = u32::from_le_bytes([head[0], head[1], head[2], head[3]]);
        let crc = u32::from_le_bytes([head[4], head[5], head[6], head[7]]);
        if !(8..=MAX_RECORD_BYTES).contains(&len) {
            return bad(format!("record length {len} is impossible"));
        }
        let mut payload = vec![0u8; len as usize];
        let n = read_full(&mut self.file, &mut payload).map_err(io_err(&self.path, "read"))?;
        if n < payload.len() {
            return bad(format!("record cut short ({n} of {len} bytes)"));
        }
        let actual = crc32fast::hash(&payload);
        if actual != crc {
            return bad(format!("CRC mismatch (stored {crc:08x}, computed {actual:08x})"));
        }
        let written_unix_ns = i64::from_le_bytes([
            payload[0], payload[1], payload[2], payload[3], payload[4], payload[5], payload[6], payload[7],
        ]);
        let alert = match pb::Alert::decode(&payload[8..]) {
            Ok(a) => a,
            Err(e) => return bad(format!("record does not decode: {e}")),
        };
        self.offset = start + RECORD_HEADER_LEN + u64::from(len);
        Ok(Ok(Record {
            written_unix_ns,
            alert,
        }))
    }
}

/// Reads until `buf` is full or the file ends; returns the bytes read.
fn read_full(r: &mut impl Read, buf: &mut [u8]) -> io::Result<usize> {
    let mut got = 0;
    while got < buf.len() {
        match r.read(&mut buf[got..]) {
            Ok(0) => break,
            Ok(n) => got += n,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
            Err(e) => return Err(e),
        }
    }
    Ok(got)
}

/// A closed or active segment on disk.
#[derive(Debug, Clone)]
struct Segment {
    first_seq: u64,
    path: PathBuf,
    /// Time of its newest record, Unix ns (0 when empty).
    newest_unix_ns: i64,
}

fn segment_name(first_seq: u64) -> String {
    format!("{SEGMENT_PREFIX}{first_seq:020}{SEGMENT_SUFFIX}")
}

/// Segments in `dir`, oldest first.
fn list_segments(dir: &Path) -> Result<Vec<(u64, PathBuf)>, JournalError> {
    let mut out = Vec::new();
    let entries = match fs::read_dir(dir) {
        Ok(e) => e,
        Err(e) if e.kind() == io::ErrorKind::NotFound => return Ok(out),
        Err(e) => return Err(io_err(dir, "list")(e)),
    };
    for entry in entries {
        let entry = entry.map_err(io_err(dir, "list"))?;
        let name = entry.file_name();
        let Some(name) = name.to_str() else { continue };
        let first = name
            .strip_prefix(SEGMENT_PREFIX)
            .and_then(|r| r.strip_suffix(SEGMENT_SUFFIX));
        if let Some(first_seq) = first.and_then(|f| f.parse::<u64>().ok()) {
            out.push((first_seq, entry.path()));
        }
    }
    out.sort();
    Ok(out)
}

fn sync_dir(dir: &Path) -> Result<(), JournalError> {
    File::open(dir)
        .and_then(|d| d.sync_all())
        .map_err(io_err(dir, "sync directory"))
}

/// The writer side: owned by the alert desk, one per daemon.
///
/// Memory is one entry per segment on disk (bounded by retention); the segment being written stays open.
#[derive(Debug)]
pub(crate) struct Journal {
    dir: PathBuf,
    segment_bytes: u64,
    retention: Duration,
    segments: Vec<Segment>,
    active: File,
    active_len: u64,
    last_seq: u64,
    /// Bytes appended since the last `sync`.
    unsynced: bool,
}

impl Journal {
    /// Opens (or creates) the journal in `dir`: checks every record's CRC (handing each intact one to
    /// `on_record`), cuts a torn tail off the newest segment, deletes segments past retention (never the
    /// newest), and positions for appending.
    pub(crate) fn open(
        dir: &Path,
        segment_bytes: u64,
        retention: Duration,
        now_unix_ns: i64,
        on_record: &mut dyn FnMut(&Record),
    ) -> Result<(Self, OpenReport), JournalError> {
        fs::create_dir_all(dir).map_err(io_err(dir, "create directory"))?;
        let listed = list_segments(dir)?;
        let mut report = OpenReport::default();
        let mut segments = Vec::new();
        let mut last_seq = 0;
        let n = listed.len();
        let mut active_len = HEADER_LEN;
        for (i, (first_seq, path)) in listed.into_iter().enumerate() {
            let newest = i + 1 == n;
            let mut reader = match SegmentReader::open(&path) {
                Ok(r) => r,
                Err(JournalError::BadHeader { detail, .. }) if newest => {
                    // A crash right after creating the newest segment can leave its header short: rewrite it.
                    report.torn = Some(TornTail {
                        path: path.clone(),
                        offset: 0,
                        bytes_cut: fs::metadata(&path).map(|m| m.len()).unwrap_or(0),
                        reason: format!("bad header ({detail})"),
                    });
                    write_header(&path)?;
                    segments.push(Segment {
                        first_seq,
                        path,
                        newest_unix_ns: 0,
                    });
                    continue;
                }
                Err(e) => return Err(e),
            };
            let mut newest_unix_ns = 0;
            let stop = loop {
                match reader.next()? {
                    Ok(rec) => {
                        on_record(&rec);
                        report.records += 1;
                        newest_unix_ns = rec.written_unix_ns;
                        last_seq = rec.alert.seq;
                    }
                    Err(stop) => break stop,
                }
            };
            if let Stop::Bad { offset, reason } = stop {
                if newest {
                    let len = fs::metadata(&path).map_err(io_err(&path, "stat"))?.len();
                    let f = OpenOptions::new()
                        .write(true)
                        .open(&path)
                        .map_err(io_err(&path, "open"))?;
                    f.set_len(offset).map_err(io_err(&path, "truncate"))?;
                    f.sync_all().map_err(io_err(&path, "sync"))?;
                    report.torn = Some(TornTail {
                        path: path.clone(),
                        offset,
                        bytes_cut: len - offset,
                        reason,
                    });
                } else {
                    report
                        .corrupt_older
                        .push(format!("{} at offset {offset}: {reason}", path.display()));
                }
            }
            if newest {
                active_len = reader.offset;
            }
            segments.push(Segment {
                first_seq,
                path,
                newest_unix_ns,
            });
        }
        // An empty newest segment still fixes where numbering continues.
        if let Some(s) = segments.last() {
            last_seq = last_seq.max(s.first_seq.saturating_sub(1));
        }
        let active = match segments.last() {
            Some(s) => OpenOptions::new()
                .append(true)
                .open(&s.path)
                .map_err(io_err(&s.path, "open"))?,
            None => {
                let path = dir.join(segment_name(last_seq + 1));
                let f = create_segment(&path)?;
                sync_dir(dir)?;
                segments.push(Segment {
                    first_seq: last_seq + 1,
                    path,
                    newest_unix_ns: 0,
                });
                f
            }
        };
        let mut journal = Self {
            dir: dir.to_path_buf(),
            segment_bytes,
            retention,
            segments,
            active,
            active_len,
            last_seq,
            unsynced: false,
        };
        report.deleted = journal.apply_retention(now_unix_ns)?;
        report.segments = journal.segments.len();
        Ok((journal, report))
    }

    /// Sequence number of the newest record (0 for an empty journal).
    pub(crate) fn last_seq(&self) -> u64 {
        self.last_seq
    }

    /// Appends one alert (its `seq` must be `last_seq + 1`). Not durable until [`sync`](Self::sync).
    pub(crate) fn append(&mut self, alert: &pb::Alert, now_unix_ns: i64) -> Result<(), JournalError> {
        if alert.seq != self.last_seq + 1 {
            return Err(JournalError::OutOfSequence {
                expected: self.last_seq + 1,
                got: alert.seq,
            });
        }
        if self.active_len >= self.segment_bytes && self.active_len > HEADER_LEN {
            self.rotate(alert.seq, now_unix_ns)?;
        }
        let body_len = alert.encoded_len();
        let mut payload = Vec::with_capacity(8 + body_len);
        payload.extend_from_slice(&now_unix_ns.to_le_bytes());
        // Writing into a Vec with enough capacity cannot fail.
        let _ = alert.encode(&mut payload);
        let len = u32::try_from(payload.len()).unwrap_or(u32::MAX);
        let mut rec = Vec::with_capacity(payload.len() + 8);
        rec.extend_from_slice(&len.to_le_bytes());
        rec.extend_from_slice(&crc32fast::hash(&payload).to_le_bytes());
        rec.extend_from_slice(&payload);
        let path = self.active_path().to_path_buf();
        self.active.write_all(&rec).map_err(io_err(&path, "append"))?;
        self.active_len += rec.len() as u64;
        self.last_seq = alert.seq;
        self.unsynced = true;
        if let Some(s) = self.segments.last_mut() {
            s.newest_unix_ns = now_unix_ns;
        }
        Ok(())
    }

    /// Makes every appended record durable (fdatasync).
    pub(crate) fn sync(&mut self) -> Result<(), JournalError> {
        if self.unsynced {
            let path = self.active_path().to_path_buf();
            self.active.sync_data().map_err(io_err(&path, "fsync"))?;
            self.unsynced = false;
        }
        Ok(())
    }

    fn active_path(&self) -> &Path {
        self.segments
            .last()
            .map_or(self.dir.as_path(), |s| s.path.as_path())
    }

    fn rotate(&mut self, first_seq: u64, now_unix_ns: i64) -> Result<(), JournalError> {
        self.sync()?;
        let path = self.dir.join(segment_name(first_seq));
        self.active = create_segment(&path)?;
        sync_dir(&self.dir)?;
        self.active_len = HEADER_LEN;
        self.segments.push(Segment {
            first_seq,
            path,
            newest_unix_ns: 0,
        });
        let deleted = self.apply_retention(now_unix_ns)?;
        for d in deleted {
            tracing::info!(segment = %d.display(), "journal: deleted segment past retention");
        }
        Ok(())
    }

    /// Deletes closed segments whose newest record is older than the retention. The newest segment always
    /// stays, so numbering continues after a restart.
    fn apply_retention(&mut self, now_unix_ns: i64) -> Result<Vec<PathBuf>, JournalError> {
        let keep_ns = i64::try_from(self.retention.as_nanos()).unwrap_or(i64::MAX);
        let cutoff = now_unix_ns.saturating_sub(keep_ns);
        let mut deleted = Vec::new();
        while self.segments.len() > 1 && self.segments[0].newest_unix_ns < cutoff {
            let s = self.segments.remove(0);
            match fs::remove_file(&s.path) {
                Ok(()) => deleted.push(s.path),
                Err(e) if e.kind() == io::ErrorKind::NotFound => {}
                Err(e) => return Err(io_err(&s.path, "delete")(e)),
            }
        }
        if !deleted.is_empty() {
            sync_dir(&self.dir)?;
        }
        Ok(deleted)
    }

    /// Sequence number of the oldest record still kept (`last_seq + 1` when empty).
    pub(crate) fn first_seq(&self) -> u64 {
        self.segments.first().map_or(self.last_seq + 1, |s| s.first_seq)
    }
}

/// Writes the segment header (magic and format version) and makes it durable.
fn write_header_to(f: &mut File, path: &Path) -> Result<(), JournalError> {
    let mut header = Vec::with_capacity(HEADER_LEN as usize);
    header.extend_from_slice(&MAGIC);
    header.extend_from_slice(&FORMAT_VERSION.to_le_bytes());
    f.write_all(&header).map_err(io_err(path, "write header"))?;
    f.sync_all().map_err(io_err(path, "sync"))
}

fn write_header(path: &Path) -> Result<(), JournalError> {
    let mut f = OpenOptions::new()
        .write(true)
        .truncate(true)
        .open(path)
        .map_err(io_err(path, "open"))?;
    write_header_to(&mut f, path)
}

fn create_segment(path: &Path) -> Result<File, JournalError> {
    let mut f = OpenOptions::new()
        .create_new(true)
        .append(true)
        .open(path)
        .map_err(io_err(path, "create"))?;
    write_header_to(&mut f, path)?;
    Ok(f)
}

/// Reads up to `max` alerts with `after < seq <= upto`, oldest first, from the segments in `dir`. Used by
/// subscribers resuming from older than the desk's in-memory tail; runs on a blocking thread. A corrupt
/// record ends the read of its segment (logged) and reading goes on with the next segment.
pub(crate) fn read_after(
    dir: &Path,
    after: u64,
    upto: u64,
    max: usize,
) -> Result<Vec<pb::Alert>, JournalError> {
    let mut out = Vec::new();
    if after >= upto || max == 0 {
        return Ok(out);
    }
    let segments = list_segments(dir)?;
    // The last segment whose first seq is <= after + 1 holds the first record wanted.
    let start = segments
        .iter()
        .rposition(|(first, _)| *first <= after + 1)
        .unwrap_or(0);
    for (_, path) in &segments[start..] {
        let mut reader = match SegmentReader::open(path) {
            Ok(r) => r,
            // Deleted by retention between the listing and the open: the next segment follows.
            Err(JournalError::Io { source, .. }) if source.kind() == io::ErrorKind::NotFound => continue,
            Err(e) => return Err(e),
        };
        loop {
            match reader.next()? {
                Ok(rec) => {
                    let seq = rec.alert.seq;
                    if seq > upto {
                        return Ok(out);
                    }
                    if seq > after {
                        out.push(rec.alert);
                        if out.len() >= max {
                            return Ok(out);
                        }
                    }
                }
                Err(Stop::End) => break,
                Err(Stop::Bad { offset, reason }) => {
                    // Records past `upto` may still be in flight in the active segment; only complain below it.
                    if out.last().map_or(after, |a| a.seq) < upto {
                        tracing::error!(segment = %path.display(), offset, %reason, "journal: corrupt record, skipping the rest of the segment");
                    }
                    break;
                }
            }
        }
    }
    Ok(out)
}

/// Reads the one alert with sequence number `seq`, if the journal still holds it.
pub(crate) fn read_one(dir: &Path, seq: u64) -> Result<Option<pb::Alert>, JournalError> {
    Ok(read_after(dir, seq.saturating_sub(1), seq, 1)?
        .into_iter()
        .find(|a| a.seq == seq))
}

/// Bytes of the record for `alert` (header included), for tests and size planning.
#[cfg(test)]
fn record_len(alert: &pb::Alert) -> u64 {
    RECORD_HEADER_LEN + 8 + alert.encoded_len() as u64
}

#[cfg(test)]
fn file_len(path: &Path) -> u64 {
    fs::metadata(path).map(|m| m.len()).unwrap_or(0)
}

#[cfg(test)]
mod tests {
    use super::*;

    const DAY_NS: i64 = 86_400_000_000_000;

    fn alert(seq: u64) -> pb::Alert {
        pb::Alert {
            seq,
            id: format!("GL-test-{seq}"),
            kind: pb::AlertKind::Flash as i32,
            instrument: "ventisca-array".into(),
            trigger: Some(pb::Trigger {
                counts: seq * 3,
                sigma: 5.5,
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    fn open(dir: &Path, segment_bytes: u64, now: i64) -> (Journal, OpenReport) {
        Journal::open(dir, segment_bytes, Duration::from_secs(86_400), now, &mut |_| {}).unwrap()
    }

    fn seqs(v: &[pb::Alert]) -> Vec<u64> {
        v.iter().map(|a| a.seq).collect()
    }

    #[test]
    fn records_round_trip_and_numbering_continues_after_reopen() {
        let tmp = tempfile::tempdir().unwrap();
        let (mut j, rep) = open(tmp.path(), 1 << 20, 1);
        assert_eq!((j.last_seq(), rep.records, rep.segments), (0, 0, 1));
        for s in 1..=5 {
            j.append(&alert(s), 10).unwrap();
        }
        j.sync().unwrap();
        let err = j.append(&alert(9), 10).unwrap_err();
        assert!(
            matches!(err, JournalError::OutOfSequence { expected: 6, got: 9 }),
            "{err}"
        );
        drop(j);
        let (j, rep) = open(tmp.path(), 1 << 20, 20);
        assert_eq!((j.last_seq(), rep.records), (5, 5));
        assert!(rep.torn.is_none());
        let got = read_after(tmp.path(), 2, 5, 100).unwrap();
        assert_eq!(got, (3..=5).map(alert).collect::<Vec<_>>());
        assert_eq!(read_one(tmp.path(), 4).unwrap(), Some(alert(4)));
        assert_eq!(read_one(tmp.path(), 6).unwrap(), None);
        // `upto` bounds the read even though more records exist.
        assert_eq!(seqs(&read_after(tmp.path(), 0, 3, 100).unwrap()), vec![1, 2, 3]);
        assert_eq!(seqs(&read_after(tmp.path(), 0, 5, 2).unwrap()), vec![1, 2]);
    }

    #[test]
    fn crc_mismatch_in_newest_segment_is_cut_and_reported() {
        let tmp = tempfile::tempdir().unwrap();
        let (mut j, _) = open(tmp.path(), 1 << 20, 1);
        for s in 1..=3 {
            j.append(&alert(s), 10).unwrap();
        }
        j.sync().unwrap();
        let path = tmp.path().join(segment_name(1));
        drop(j);
        // Flip one byte inside the payload of record 3 (its last byte).
        let mut bytes = fs::read(&path).unwrap();
        let n = bytes.len();
        bytes[n - 1] ^= 0x55;
        fs::write(&path, &bytes).unwrap();
        let (mut j, rep) = open(tmp.path(), 1 << 20, 20);
        let torn = rep.torn.expect("the corrupt record must be reported");
        assert!(torn.reason.contains("CRC mismatch"), "{}", torn.reason);
        assert_eq!(torn.bytes_cut, record_len(&alert(3)));
        assert_eq!(torn.offset + torn.bytes_cut, n as u64);
        assert_eq!(j.last_seq(), 2);
        assert_eq!(file_len(&path), torn.offset);
        // The journal continues at 3, and the new record 3 reads back.
        j.append(&alert(3), 30).unwrap();
        j.sync().unwrap();
        assert_eq!(seqs(&read_after(tmp.path(), 0, 3, 10).unwrap()), vec![1, 2, 3]);
    }

    #[test]
    fn torn_write_at_every_cut_point_keeps_every_whole_record() {
        let tmp = tempfile::tempdir().unwrap();
        let (mut j, _) = open(tmp.path(), 1 << 20, 1);
        j.append(&alert(1), 10).unwrap();
        j.append(&alert(2), 10).unwrap();
        j.sync().unwrap();
        drop(j);
        let path = tmp.path().join(segment_name(1));
        let full = fs::read(&path).unwrap();
        let first_end = (HEADER_LEN + record_len(&alert(1))) as usize;
        // Cut anywhere inside record 2: record 1 survives, the partial record 2 is cut and logged.
        for cut in first_end + 1..full.len() {
            fs::write(&path, &full[..cut]).unwrap();
            let (j, rep) = open(tmp.path(), 1 << 20, 20);
            assert_eq!(j.last_seq(), 1, "cut at {cut}");
            let torn = rep.torn.unwrap_or_else(|| panic!("cut at {cut} not reported"));
            assert_eq!(
                (torn.offset, torn.bytes_cut),
                (first_end as u64, (cut - first_end) as u64)
            );
        }
        // A cut exactly at a record boundary is no tear at all.
        fs::write(&path, &full[..first_end]).unwrap();
        let (j, rep) = open(tmp.path(), 1 << 20, 20);
        assert_eq!((j.last_seq(), rep.torn), (1, None));
    }

    #[test]
    fn rotates_by_size_and_reads_across_segments() {
        let tmp = tempfile::tempdir().unwrap();
        let per = record_len(&alert(1));
        // Room for about three records per segment.
        let (mut j, _) = open(tmp.path(), HEADER_LEN + 3 * per, 1);
        for s in 1..=10 {
            j.append(&alert(s), 10).unwrap();
            j.sync().unwrap();
        }
        let names: Vec<u64> = list_segments(tmp.path())
            .unwrap()
            .into_iter()
            .map(|(f, _)| f)
            .collect();
        assert_eq!(names, vec![1, 4, 7, 10]);
        assert_eq!(
            seqs(&read_after(tmp.path(), 2, 10, 100).unwrap()),
            (3..=10).collect::<Vec<_>>()
        );
        assert_eq!(seqs(&read_after(tmp.path(), 6, 8, 100).unwrap()), vec![7, 8]);
        drop(j);
        let (j, rep) = open(tmp.path(), HEADER_LEN + 3 * per, 20);
        assert_eq!((j.last_seq(), rep.records, rep.segments), (10, 10, 4));
    }

    #[test]
    fn retention_deletes_old_closed_segments_but_never_the_newest() {
        let tmp = tempfile::tempdir().unwrap();
        let per = record_len(&alert(1));
        let seg = HEADER_LEN + 2 * per;
        let (mut j, _) = Journal::open(tmp.path(), seg, Duration::from_secs(86_400), 0, &mut |_| {}).unwrap();
        // Records 1-4 written on day 0, 5-6 on day 2, 7 on day 3.
        for s in 1..=4 {
            j.append(&alert(s), 0).unwrap();
        }
        for s in 5..=6 {
            j.append(&alert(s), 2 * DAY_NS).unwrap();
        }
        j.sync().unwrap();
        // Rotation on day 3 applies a one-day retention: the two day-0 segments go, day 2 stays.
        j.append(&alert(7), 3 * DAY_NS).unwrap();
        j.sync().unwrap();
        let names: Vec<u64> = list_segments(tmp.path())
            .unwrap()
            .into_iter()
            .map(|(f, _)| f)
            .collect();
        assert_eq!(names, vec![5, 7]);
        assert_eq!(j.first_seq(), 5);
        // Reading from before the oldest kept record starts at the oldest kept.
        assert_eq!(seqs(&read_after(tmp.path(), 0, 7, 100).unwrap()), vec![5, 6, 7]);
        drop(j);
        // Years later, a reopen keeps only the newest segment, and numbering continues.
        let (mut j, rep) = Journal::open(
            tmp.path(),
            seg,
            Duration::from_secs(86_400),
            400 * DAY_NS,
            &mut |_| {},
        )
        .unwrap();
        assert_eq!(rep.deleted.len(), 1);
        assert_eq!((j.last_seq(), j.first_seq()), (7, 7));
        j.append(&alert(8), 400 * DAY_NS).unwrap();
    }

    #[test]
    fn bad_header_in_older_segment_is_an_error_naming_the_file() {
        let tmp = tempfile::tempdir().unwrap();
        fs::write(tmp.path().join(segment_name(1)), b"NOTAJOURNAL!").unwrap();
        fs::write(tmp.path().join(segment_name(5)), b"").unwrap();
        let err = Journal::open(tmp.path(), 1 << 20, Duration::from_secs(60), 0, &mut |_| {}).unwrap_err();
        let text = err.to_string();
        assert!(
            text.contains(&segment_name(1)) && text.contains("magic"),
            "{text}"
        );
    }

    #[test]
    fn empty_newest_segment_from_a_crash_during_rotation_is_repaired() {
        let tmp = tempfile::tempdir().unwrap();
        let (mut j, _) = open(tmp.path(), 1 << 20, 1);
        j.append(&alert(1), 10).unwrap();
        j.sync().unwrap();
        drop(j);
        // Crash after creating segment 2 but before its header was written.
        fs::write(tmp.path().join(segment_name(2)), b"GLI").unwrap();
        let (mut j, rep) = open(tmp.path(), 1 << 20, 20);
        assert_eq!(j.last_seq(), 1);
        assert!(rep.torn.is_some());
        j.append(&alert(2), 30).unwrap();
        j.sync().unwrap();
        assert_eq!(seqs(&read_after(tmp.path(), 0, 2, 10).unwrap()), vec![1, 2]);
    }
}
