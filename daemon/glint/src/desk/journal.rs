//! The alert journal: every alert the desk issues is appended here and fsynced before any subscriber sees it.
//! Append-only segment files in `state_dir/journal`, a CRC32 per record, rotation by size and deletion of old
//! segments by age. On open every record is checked: only a torn tail (the unfinished end of the newest
//! segment) is cut; a damaged stretch anywhere else is copied to `quarantine/` and skipped by scanning for the
//! next valid record, so no intact record is ever lost. Numbers are never reused: `high_water` keeps durably
//! the highest number that may have been handed out. Subscribers read old alerts back from here.
//!
//! Layout: `segment-<first seq, 20 digits>.gjl` = magic `GLINTJNL`, u32 format version (LE), then records
//! `u32 len | u32 crc32(payload) | payload`, payload = `i64 written_unix_ns | protobuf glint.v1.Alert`.
//! Sequence numbers increase strictly; a jump is a gap (damage, a lost segment, or numbers skipped).

use std::fs::{self, File, OpenOptions};
use std::io::{self, BufReader, Read, Seek, SeekFrom, Write};
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
/// The durable high-water file in the journal directory.
pub(crate) const HIGH_WATER: &str = "high_water";
/// Where damaged bytes are copied, inside the journal directory.
pub(crate) const QUARANTINE: &str = "quarantine";
/// Numbers reserved ahead in `high_water`: it is rewritten once per this many alerts, not once per fsync,
/// at the price of a gap of at most this many never-issued numbers after an unclean stop.
const RESERVE: u64 = 256;

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
    /// A segment has a format version this build cannot read.
    #[error("journal segment {path} has a bad header ({detail})")]
    BadHeader {
        /// The segment.
        path: PathBuf,
        /// What was wrong.
        detail: String,
    },
    /// An alert handed to `append` does not come after the newest one.
    #[error("journal expected alert seq {expected} or later, got {got}")]
    OutOfSequence {
        /// The lowest number allowed next.
        expected: u64,
        /// The alert's seq.
        got: u64,
    },
    /// There is no journal where one was expected (offline commands).
    #[error("no journal in {0} (no segment files)")]
    Missing(PathBuf),
}

fn io_err(path: &Path, action: &'static str) -> impl FnOnce(io::Error) -> JournalError {
    let path = path.to_path_buf();
    move |source| JournalError::Io { path, action, source }
}

/// A torn tail cut from the newest segment on open.
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

/// A damaged stretch of a segment, skipped (never cut) by open and by readers.
#[derive(Debug, Clone, PartialEq, Eq)]
pub(crate) struct Damage {
    /// The segment.
    pub(crate) path: PathBuf,
    /// Offset of the first damaged byte.
    pub(crate) offset: u64,
    /// Damaged bytes (up to the next valid record, or the end of the file).
    pub(crate) bytes: u64,
    /// What was wrong at `offset`.
    pub(crate) reason: String,
    /// Newest intact seq before it in the journal (0 if none) and oldest intact one after it, if any.
    pub(crate) after_seq: u64,
    /// See `after_seq`.
    pub(crate) before_seq: Option<u64>,
    /// Copy of the damaged bytes, when open made one.
    pub(crate) quarantined: Option<PathBuf>,
}

impl Damage {
    /// The sequence numbers the damage may have held, as text.
    pub(crate) fn seqs(&self) -> String {
        match self.before_seq {
            Some(b) if b > self.after_seq + 1 => format!("seq {}-{}", self.after_seq + 1, b - 1),
            Some(_) => "no sequence number (between records)".into(),
            None => format!("seq {} and later", self.after_seq + 1),
        }
    }
}

/// Sequence numbers the journal cannot deliver, inclusive.
#[derive(Debug, Clone, PartialEq, Eq)]
pub(crate) struct SeqGap {
    /// First missing number.
    pub(crate) from: u64,
    /// Last missing number.
    pub(crate) to: u64,
    /// Why, in words a subscriber can act on.
    pub(crate) reason: String,
    /// True when alerts were (or may have been) issued and are lost; false for numbers never issued.
    pub(crate) lost: bool,
}

/// What `Journal::open` (or the read-only `verify`) found.
#[derive(Debug, Clone, Default)]
pub(crate) struct OpenReport {
    /// Records found intact, all segments.
    pub(crate) records: u64,
    /// Segments kept.
    pub(crate) segments: usize,
    /// Oldest and newest intact sequence numbers (0 when empty).
    pub(crate) first_seq: u64,
    /// See `first_seq`.
    pub(crate) last_seq: u64,
    /// The number the next alert gets.
    pub(crate) next_seq: u64,
    /// The torn tail cut (or, read-only, that would be cut) from the newest segment, if any.
    pub(crate) torn: Option<TornTail>,
    /// Damaged stretches skipped and quarantined, oldest first.
    pub(crate) damaged: Vec<Damage>,
    /// Holes in the sequence, oldest first (lost records and numbers never issued alike).
    pub(crate) gaps: Vec<SeqGap>,
    /// A problem with the high-water file (unreadable or damaged), if any.
    pub(crate) high_water_problem: Option<String>,
    /// Segments deleted by retention.
    pub(crate) deleted: Vec<PathBuf>,
}

impl OpenReport {
    /// Sequence numbers of alerts lost to damage or missing segments.
    pub(crate) fn lost_seqs(&self) -> u64 {
        self.gaps
            .iter()
            .filter(|g| g.lost)
            .map(|g| g.to - g.from + 1)
            .sum()
    }

    /// True when nothing is damaged, lost or torn.
    pub(crate) fn is_clean(&self) -> bool {
        self.torn.is_none()
            && self.damaged.is_empty()
            && self.lost_seqs() == 0
            && self.high_water_problem.is_none()
    }
}

/// One record read back.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Record {
    /// Wall-clock time it was written, Unix ns.
    pub(crate) written_unix_ns: i64,
    /// The alert.
    pub(crate) alert: pb::Alert,
}

/// What a segment reader found next.
#[derive(Debug, Clone, PartialEq)]
enum Item {
    Record(Box<Record>),
    /// Bytes `offset..offset+bytes` are not records; `resumes` when a valid record follows them.
    Damaged {
        offset: u64,
        bytes: u64,
        reason: String,
        resumes: bool,
    },
    End,
}

/// Checks one record's payload against its CRC, decodes it and checks it comes after `prev`.
fn decode_record(payload: &[u8], crc: u32, prev: u64) -> Result<Record, String> {
    let actual = crc32fast::hash(payload);
    if actual != crc {
        return Err(format!("CRC mismatch (stored {crc:08x}, computed {actual:08x})"));
    }
    let mut ts = [0u8; 8];
    ts.copy_from_slice(&payload[..8]);
    let alert = pb::Alert::decode(&payload[8..]).map_err(|e| format!("record does not decode: {e}"))?;
    if alert.seq <= prev {
        return Err(format!("record seq {} does not follow seq {prev}", alert.seq));
    }
    Ok(Record {
        written_unix_ns: i64::from_le_bytes(ts),
        alert,
    })
}

/// A valid record starting at `buf[0]`, with its length in bytes.
fn record_at(buf: &[u8], prev: u64) -> Option<u64> {
    if buf.len() < RECORD_HEADER_LEN as usize {
        return None;
    }
    let len = u32::from_le_bytes([buf[0], buf[1], buf[2], buf[3]]);
    if !(8..=MAX_RECORD_BYTES).contains(&len) {
        return None;
    }
    let end = RECORD_HEADER_LEN as usize + len as usize;
    if buf.len() < end {
        return None;
    }
    let crc = u32::from_le_bytes([buf[4], buf[5], buf[6], buf[7]]);
    decode_record(&buf[RECORD_HEADER_LEN as usize..end], crc, prev).ok()?;
    Some(end as u64)
}

/// How a segment's header read.
enum Header {
    Ok,
    /// Shorter than a header: a crash right after creating the segment, or damage.
    Short(u64),
    /// Wrong magic or version, but records follow: damage to the header only.
    Damaged(String),
}

/// Reads the records of one segment in order, resynchronising past damage.
struct SegmentReader {
    path: PathBuf,
    file: BufReader<File>,
    offset: u64,
    /// Seq of the last record returned (or the caller's floor): a record must come after it.
    prev: u64,
}

impl SegmentReader {
    fn open(path: &Path, prev: u64) -> Result<(Self, Header), JournalError> {
        let file = File::open(path).map_err(io_err(path, "open"))?;
        let mut file = BufReader::new(file);
        let mut header = [0u8; HEADER_LEN as usize];
        let got = read_full(&mut file, &mut header).map_err(io_err(path, "read"))?;
        let mut reader = Self {
            path: path.to_path_buf(),
            file,
            offset: HEADER_LEN,
            prev,
        };
        if got < header.len() {
            reader.offset = got as u64;
            return Ok((reader, Header::Short(got as u64)));
        }
        let version = u32::from_le_bytes([header[8], header[9], header[10], header[11]]);
        if header[..8] == MAGIC && version == FORMAT_VERSION {
            return Ok((reader, Header::Ok));
        }
        let detail = if header[..8] == MAGIC {
            format!("format version {version}, this build reads {FORMAT_VERSION}")
        } else {
            "magic is not GLINTJNL".to_string()
        };
        // A whole header of the right magic and a newer version is a journal this build cannot read; a
        // damaged header in front of readable records is damage like any other.
        if header[..8] == MAGIC && !reader.first_record_valid()? {
            return Err(JournalError::BadHeader {
                path: path.to_path_buf(),
                detail,
            });
        }
        Ok((reader, Header::Damaged(detail)))
    }

    /// Whether any valid record follows the header (a damaged header) or none does (an unknown format).
    fn first_record_valid(&mut self) -> Result<bool, JournalError> {
        let mut rest = Vec::new();
        self.file
            .read_to_end(&mut rest)
            .map_err(io_err(&self.path, "read"))?;
        self.seek(HEADER_LEN)?;
        Ok((0..rest.len()).any(|p| record_at(&rest[p..], self.prev).is_some()))
    }

    fn seek(&mut self, to: u64) -> Result<(), JournalError> {
        self.file
            .seek(SeekFrom::Start(to))
            .map_err(io_err(&self.path, "seek"))?;
        self.offset = to;
        Ok(())
    }

    /// The next record, a damaged stretch, or the end. I/O errors other than a short read are errors.
    fn next(&mut self) -> Result<Item, JournalError> {
        let start = self.offset;
        let mut head = [0u8; RECORD_HEADER_LEN as usize];
        let n = read_full(&mut self.file, &mut head).map_err(io_err(&self.path, "read"))?;
        if n == 0 {
            return Ok(Item::End);
        }
        if n < head.len() {
            return self.resync(start, format!("record header cut short ({n} of 8 bytes)"));
        }
        let len = u32::from_le_bytes([head[0], head[1], head[2], head[3]]);
        let crc = u32::from_le_bytes([head[4], head[5], head[6], head[7]]);
        if !(8..=MAX_RECORD_BYTES).contains(&len) {
            return self.resync(start, format!("record length {len} is impossible"));
        }
        let mut payload = vec![0u8; len as usize];
        let n = read_full(&mut self.file, &mut payload).map_err(io_err(&self.path, "read"))?;
        if n < payload.len() {
            return self.resync(start, format!("record cut short ({n} of {len} bytes)"));
        }
        match decode_record(&payload, crc, self.prev) {
            Ok(rec) => {
                self.offset = start + RECORD_HEADER_LEN + u64::from(len);
                self.prev = rec.alert.seq;
                Ok(Item::Record(Box::new(rec)))
            }
            Err(reason) => self.resync(start, reason),
        }
    }

    /// Scans forward from a bad record at `bad` for the next valid one (CRC, decode and order all check).
    fn resync(&mut self, bad: u64, reason: String) -> Result<Item, JournalError> {
        self.seek(bad + 1)?;
        let mut rest = Vec::new();
        self.file
            .read_to_end(&mut rest)
            .map_err(io_err(&self.path, "read"))?;
        let found = (0..rest.len()).find(|&p| record_at(&rest[p..], self.prev).is_some());
        let (bytes, resumes) = match found {
            Some(p) => (p as u64 + 1, true),
            None => (rest.len() as u64 + 1, false),
        };
        self.seek(bad + bytes)?;
        Ok(Item::Damaged {
            offset: bad,
            bytes,
            reason,
            resumes,
        })
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

/// Writes a file atomically and durably: temporary file, fsync, rename, fsync of the directory.
pub(crate) fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), JournalError> {
    let mut tmp = path.as_os_str().to_owned();
    tmp.push(".tmp");
    let tmp = PathBuf::from(tmp);
    let written = File::create(&tmp)
        .and_then(|mut f| f.write_all(bytes).and_then(|()| f.sync_all()))
        .and_then(|()| fs::rename(&tmp, path));
    if let Err(e) = written {
        // Never leave an empty or partial temporary file behind (a full disk is the usual cause).
        let _ = fs::remove_file(&tmp);
        return Err(io_err(path, "write")(e));
    }
    match path.parent() {
        Some(dir) => sync_dir(dir),
        None => Ok(()),
    }
}

/// The durable high-water state: the highest number that may have been handed out, where the journal
/// starts after retention, the active segment, whether the last stop was clean, and the gaps only this file
/// can explain (numbers skipped after an unclean stop, records lost at the end).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
struct HighWater {
    reserved: u64,
    retained_from: u64,
    active: u64,
    clean: bool,
    gaps: Vec<SeqGap>,
}

impl HighWater {
    fn encode(&self) -> String {
        let mut s = format!(
            "glint journal high-water 1\nreserved {}\nretained_from {}\nactive {}\nclean {}\n",
            self.reserved,
            self.retained_from,
            self.active,
            u8::from(self.clean)
        );
        for g in &self.gaps {
            let reason = g.reason.replace(['\n', '\r'], " ");
            s.push_str(&format!(
                "gap {} {} {} {reason}\n",
                g.from,
                g.to,
                u8::from(g.lost)
            ));
        }
        let crc = crc32fast::hash(s.as_bytes());
        s.push_str(&format!("crc {crc:08x}\n"));
        s
    }

    fn decode(text: &str) -> Result<Self, String> {
        let body_end = text.rfind("crc ").ok_or("no crc line")?;
        let (body, crc_line) = text.split_at(body_end);
        let stored = u32::from_str_radix(crc_line.trim_start_matches("crc ").trim(), 16)
            .map_err(|_| "crc line is not hex".to_string())?;
        if crc32fast::hash(body.as_bytes()) != stored {
            return Err("CRC mismatch".into());
        }
        let mut hw = Self::default();
        let mut lines = body.lines();
        if lines.next() != Some("glint journal high-water 1") {
            return Err("unknown first line".into());
        }
        let num = |v: Option<&str>| -> Result<u64, String> {
            v.and_then(|v| v.parse().ok())
                .ok_or_else(|| "bad number".to_string())
        };
        for line in lines {
            let mut parts = line.splitn(5, ' ');
            match parts.next() {
                Some("reserved") => hw.reserved = num(parts.next())?,
                Some("retained_from") => hw.retained_from = num(parts.next())?,
                Some("active") => hw.active = num(parts.next())?,
                Some("clean") => hw.clean = num(parts.next())? == 1,
                Some("gap") => {
                    let from = num(parts.next())?;
                    let to = num(parts.next())?;
                    let lost = num(parts.next())? == 1;
                    let reason = parts.next().unwrap_or("").to_string();
                    hw.gaps.push(SeqGap {
                        from,
                        to,
                        reason,
                        lost,
                    });
                }
                _ => return Err(format!("unknown line '{line}'")),
            }
        }
        Ok(hw)
    }

    /// The file's state; `Ok(None)` when there is none (a journal written before it existed).
    fn read(dir: &Path) -> Result<Option<Self>, String> {
        let path = dir.join(HIGH_WATER);
        match fs::read_to_string(&path) {
            Ok(t) => Self::decode(&t)
                .map(Some)
                .map_err(|e| format!("{} is damaged ({e})", path.display())),
            Err(e) if e.kind() == io::ErrorKind::NotFound => Ok(None),
            Err(e) => Err(format!("cannot read {}: {e}", path.display())),
        }
    }

    fn write(&self, dir: &Path) -> Result<(), JournalError> {
        write_atomic(&dir.join(HIGH_WATER), self.encode().as_bytes())
    }

    /// The gap it knows of that covers `from..=to`, if any.
    fn covering(&self, from: u64, to: u64) -> Option<&SeqGap> {
        self.gaps.iter().find(|g| g.from <= from && to <= g.to)
    }
}

/// Copies `bytes` bytes at `offset` of `path` to the quarantine directory (once per damaged stretch).
fn quarantine(dir: &Path, path: &Path, offset: u64, bytes: u64) -> Result<PathBuf, JournalError> {
    let qdir = dir.join(QUARANTINE);
    fs::create_dir_all(&qdir).map_err(io_err(&qdir, "create directory"))?;
    let name = path
        .file_name()
        .map_or_else(|| "segment".into(), |n| n.to_string_lossy().into_owned());
    let out = qdir.join(format!("{name}.at-{offset}.bad"));
    if fs::metadata(&out).is_ok_and(|m| m.len() == bytes) {
        return Ok(out);
    }
    let mut f = File::open(path).map_err(io_err(path, "open"))?;
    f.seek(SeekFrom::Start(offset)).map_err(io_err(path, "seek"))?;
    let mut buf = Vec::new();
    f.take(bytes)
        .read_to_end(&mut buf)
        .map_err(io_err(path, "read"))?;
    write_atomic(&out, &buf)?;
    Ok(out)
}

/// Whether a scan may repair (cut a torn tail, rewrite a short header, quarantine) or only look.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Mode {
    Repair,
    ReadOnly,
}

/// What a scan of every segment found.
struct Scanned {
    report: OpenReport,
    segments: Vec<Segment>,
    /// Length of the newest segment after any cut.
    active_len: u64,
    /// The newest segment ended in a torn tail or a bad header.
    tail_damaged: bool,
    hw: Option<HighWater>,
}

/// Reads every segment oldest first, handing each intact record to `on_record`, and works out damage and
/// gaps. In `Repair` mode it cuts a torn tail, rewrites a newest segment's short header and quarantines.
fn scan(dir: &Path, mode: Mode, on_record: &mut dyn FnMut(&Record)) -> Result<Scanned, JournalError> {
    let listed = list_segments(dir)?;
    let mut report = OpenReport::default();
    let hw = match HighWater::read(dir) {
        Ok(h) => h,
        Err(e) => {
            report.high_water_problem = Some(e);
            None
        }
    };
    let mut segments = Vec::new();
    // The number the first record should carry: where retention last left the journal.
    let expected_first = hw
        .as_ref()
        .map(|h| h.retained_from)
        .filter(|r| *r > 0)
        .or_else(|| listed.first().map(|(f, _)| *f))
        .unwrap_or(1);
    // Records must increase strictly (`last_seq`); a jump past `floor + 1` is a gap. They differ only
    // before the first record: records older than `retained_from` are not a gap, nor out of order.
    let mut last_seq = 0;
    let mut floor = expected_first.saturating_sub(1);
    let mut seen_any = false;
    let mut pending_damage: Option<String> = None;
    let mut crossed_boundary = true;
    let mut active_len = HEADER_LEN;
    let mut tail_damaged = false;
    let n = listed.len();
    for (i, (first_seq, path)) in listed.into_iter().enumerate() {
        let newest = i + 1 == n;
        let name = path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        let (mut reader, header) = SegmentReader::open(&path, last_seq)?;
        match header {
            Header::Ok => {}
            Header::Short(got) if newest => {
                // A crash right after creating the newest segment: nothing was ever written to it.
                report.torn = Some(TornTail {
                    path: path.clone(),
                    offset: 0,
                    bytes_cut: got,
                    reason: format!("segment header cut short ({got} of {HEADER_LEN} bytes)"),
                });
                if mode == Mode::Repair {
                    write_header(&path)?;
                }
                segments.push(Segment {
                    first_seq,
                    path,
                    newest_unix_ns: 0,
                });
                continue;
            }
            Header::Short(got) => {
                let reason = format!("segment shorter than its header ({got} bytes)");
                pending_damage = Some(format!("{name} is damaged ({reason})"));
                report.damaged.push(Damage {
                    path: path.clone(),
                    offset: 0,
                    bytes: got,
                    reason,
                    after_seq: last_seq,
                    before_seq: None,
                    quarantined: None,
                });
                segments.push(Segment {
                    first_seq,
                    path,
                    newest_unix_ns: 0,
                });
                continue;
            }
            Header::Damaged(reason) => {
                let quarantined = match mode {
                    Mode::Repair => Some(quarantine(dir, &path, 0, HEADER_LEN)?),
                    Mode::ReadOnly => None,
                };
                report.damaged.push(Damage {
                    path: path.clone(),
                    offset: 0,
                    bytes: HEADER_LEN,
                    reason: format!("bad segment header ({reason})"),
                    after_seq: last_seq,
                    before_seq: None,
                    quarantined,
                });
            }
        }
        let mut newest_unix_ns = 0;
        loop {
            match reader.next()? {
                Item::End => break,
                Item::Record(rec) => {
                    let seq = rec.alert.seq;
                    if seq > floor + 1 {
                        let (from, to) = (floor + 1, seq - 1);
                        report.gaps.push(explain_gap(
                            from,
                            to,
                            hw.as_ref(),
                            pending_damage.as_deref(),
                            crossed_boundary,
                            seen_any,
                        ));
                    }
                    // Damage found since the previous record learns which record followed it.
                    for d in report
                        .damaged
                        .iter_mut()
                        .rev()
                        .take_while(|d| d.before_seq.is_none())
                    {
                        d.before_seq = Some(seq);
                    }
                    on_record(&rec);
                    report.records += 1;
                    if !seen_any {
                        report.first_seq = seq;
                    }
                    seen_any = true;
                    newest_unix_ns = rec.written_unix_ns;
                    last_seq = seq;
                    floor = floor.max(seq);
                    pending_damage = None;
                    crossed_boundary = false;
                }
                Item::Damaged {
                    offset,
                    bytes,
                    reason,
                    resumes,
                } if newest && !resumes => {
                    // The unfinished end of the newest segment: cut, after keeping a copy.
                    tail_damaged = true;
                    if mode == Mode::Repair {
                        quarantine(dir, &path, offset, bytes)?;
                        let f = OpenOptions::new()
                            .write(true)
                            .open(&path)
                            .map_err(io_err(&path, "open"))?;
                        f.set_len(offset).map_err(io_err(&path, "truncate"))?;
                        f.sync_all().map_err(io_err(&path, "sync"))?;
                    }
                    report.torn = Some(TornTail {
                        path: path.clone(),
                        offset,
                        bytes_cut: bytes,
                        reason,
                    });
                    reader.offset = offset;
                    break;
                }
                Item::Damaged {
                    offset,
                    bytes,
                    reason,
                    ..
                } => {
                    let quarantined = match mode {
                        Mode::Repair => Some(quarantine(dir, &path, offset, bytes)?),
                        Mode::ReadOnly => None,
                    };
                    pending_damage = Some(format!(
                        "corrupt record(s) in {name} at offset {offset} ({reason}); the bytes are quarantined"
                    ));
                    report.damaged.push(Damage {
                        path: path.clone(),
                        offset,
                        bytes,
                        reason,
                        after_seq: last_seq,
                        before_seq: None,
                        quarantined,
                    });
                }
            }
        }
        if newest {
            active_len = reader.offset;
        }
        crossed_boundary = true;
        segments.push(Segment {
            first_seq,
            path,
            newest_unix_ns,
        });
    }
    report.last_seq = if seen_any { last_seq } else { 0 };
    if !seen_any {
        report.first_seq = 0;
    }
    report.segments = segments.len();
    Ok(Scanned {
        report,
        segments,
        active_len,
        tail_damaged,
        hw,
    })
}

/// Says why `from..=to` is missing between two intact records.
fn explain_gap(
    from: u64,
    to: u64,
    hw: Option<&HighWater>,
    damage: Option<&str>,
    crossed_boundary: bool,
    seen_any: bool,
) -> SeqGap {
    if let Some(known) = hw.and_then(|h| h.covering(from, to)) {
        return SeqGap {
            from,
            to,
            reason: known.reason.clone(),
            lost: known.lost,
        };
    }
    let reason = match damage {
        Some(d) => d.to_string(),
        None if crossed_boundary && !seen_any => {
            "the oldest journal segment(s) are missing (deleted or lost, not by retention)".to_string()
        }
        None if crossed_boundary => "a journal segment is missing (deleted or lost)".to_string(),
        None => "records missing from the journal".to_string(),
    };
    SeqGap {
        from,
        to,
        reason,
        lost: true,
    }
}

/// Decides the next number after a scan, and the gap at the end of the journal it implies, if any.
fn next_after_scan(s: &Scanned) -> (u64, Option<SeqGap>) {
    let last = s
        .report
        .last_seq
        .max(s.segments.last().map_or(0, |g| g.first_seq.saturating_sub(1)));
    let Some(hw) = &s.hw else {
        // No high-water file (an older journal, or a damaged file): the records are all there is to go by.
        return (last + 1, None);
    };
    if hw.reserved <= last {
        return (last + 1, None);
    }
    let (from, to) = (last + 1, hw.reserved);
    if let Some(known) = hw.covering(from, to) {
        return (to + 1, Some(known.clone()));
    }
    // The segment the file calls active (or a newer one) is still there: the end was not lost wholesale.
    let active_kept = s.segments.last().is_some_and(|g| g.first_seq >= hw.active);
    let gap = if hw.clean || !active_kept {
        SeqGap {
            from,
            to,
            reason: "the newest records of the journal are missing (newest segment lost or cut)".into(),
            lost: true,
        }
    } else {
        // An unclean stop: numbers up to the reservation may have been handed out but not confirmed (a torn
        // tail), so none is given again.
        SeqGap {
            from,
            to,
            reason: format!(
                "numbers reserved before an unclean stop and not issued{}",
                if s.tail_damaged {
                    " (a torn tail was cut)"
                } else {
                    ""
                }
            ),
            lost: false,
        }
    };
    (to + 1, Some(gap))
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
    /// The lowest number the next record may carry.
    next_seq: u64,
    hw: HighWater,
    /// Bytes appended since the last `sync`.
    unsynced: bool,
}

impl Journal {
    /// Opens (or creates) the journal in `dir`: checks every record's CRC (handing each intact one to
    /// `on_record`), cuts a torn tail off the newest segment, quarantines damage elsewhere (keeping every
    /// record after it), deletes segments past retention (never the newest), and positions for appending
    /// after the highest number ever handed out.
    pub(crate) fn open(
        dir: &Path,
        segment_bytes: u64,
        retention: Duration,
        now_unix_ns: i64,
        on_record: &mut dyn FnMut(&Record),
    ) -> Result<(Self, OpenReport), JournalError> {
        fs::create_dir_all(dir).map_err(io_err(dir, "create directory"))?;
        let scanned = scan(dir, Mode::Repair, on_record)?;
        let (next_seq, tail_gap) = next_after_scan(&scanned);
        let Scanned {
            mut report,
            mut segments,
            active_len,
            hw,
            ..
        } = scanned;
        let mut hw = hw.unwrap_or_default();
        if let Some(g) = tail_gap {
            if hw.covering(g.from, g.to).is_none() {
                hw.gaps.push(g.clone());
            }
            report.gaps.push(g);
        }
        let active = match segments.last() {
            Some(s) => OpenOptions::new()
                .append(true)
                .open(&s.path)
                .map_err(io_err(&s.path, "open"))?,
            None => {
                let path = dir.join(segment_name(next_seq));
                let f = create_segment(&path)?;
                sync_dir(dir)?;
                segments.push(Segment {
                    first_seq: next_seq,
                    path,
                    newest_unix_ns: 0,
                });
                f
            }
        };
        hw.reserved = hw.reserved.max(next_seq - 1);
        hw.clean = false;
        hw.active = segments.last().map_or(next_seq, |s| s.first_seq);
        hw.retained_from = segments.first().map_or(next_seq, |s| s.first_seq);
        hw.write(dir)?;
        let mut journal = Self {
            dir: dir.to_path_buf(),
            segment_bytes,
            retention,
            segments,
            active,
            active_len,
            last_seq: report.last_seq,
            next_seq,
            hw,
            unsynced: false,
        };
        report.deleted = journal.apply_retention(now_unix_ns)?;
        report.segments = journal.segments.len();
        report.next_seq = next_seq;
        Ok((journal, report))
    }

    /// Sequence number of the newest record (0 for an empty journal).
    pub(crate) fn last_seq(&self) -> u64 {
        self.last_seq
    }

    /// The number the next alert must carry at least (past every number ever handed out).
    pub(crate) fn next_seq(&self) -> u64 {
        self.next_seq
    }

    /// Reserves every number up to `upto` (and a block beyond) in the high-water file at once, so a batch
    /// of many alerts pays for one write of it rather than one per block. `append` reserves by itself too.
    pub(crate) fn reserve(&mut self, upto: u64) -> Result<(), JournalError> {
        if upto > self.hw.reserved || self.hw.clean {
            self.hw.reserved = self.hw.reserved.max(upto + RESERVE - 1);
            self.hw.clean = false;
            self.hw.write(&self.dir)?;
        }
        Ok(())
    }

    /// Appends one alert (its `seq` at least `next_seq`). Not durable until [`sync`](Self::sync).
    pub(crate) fn append(&mut self, alert: &pb::Alert, now_unix_ns: i64) -> Result<(), JournalError> {
        if alert.seq < self.next_seq {
            return Err(JournalError::OutOfSequence {
                expected: self.next_seq,
                got: alert.seq,
            });
        }
        let mut hw_changed = false;
        if self.active_len >= self.segment_bytes && self.active_len > HEADER_LEN {
            self.rotate(alert.seq, now_unix_ns)?;
            hw_changed = true;
        }
        if alert.seq > self.hw.reserved || self.hw.clean {
            // Durable before the record: a restart never hands out a number that may already be on disk.
            self.hw.reserved = self.hw.reserved.max(alert.seq + RESERVE - 1);
            self.hw.clean = false;
            hw_changed = true;
        }
        if hw_changed {
            self.hw.write(&self.dir)?;
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
        self.next_seq = alert.seq + 1;
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

    /// Syncs and records a clean stop: the next open continues right after the newest number, no gap.
    /// An append after this simply reserves again.
    pub(crate) fn mark_clean(&mut self) -> Result<(), JournalError> {
        self.sync()?;
        self.hw.reserved = self.next_seq - 1;
        self.hw.clean = true;
        self.hw.write(&self.dir)
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
        self.hw.active = first_seq;
        let deleted = self.apply_retention(now_unix_ns)?;
        for d in deleted {
            tracing::info!(segment = %d.display(), "journal: deleted segment past retention");
        }
        Ok(())
    }

    /// Deletes closed segments whose newest record is older than the retention. The newest segment always
    /// stays, so numbering continues after a restart. The high-water file learns the new start first, so a
    /// deletion is never mistaken for a lost segment.
    fn apply_retention(&mut self, now_unix_ns: i64) -> Result<Vec<PathBuf>, JournalError> {
        let keep_ns = i64::try_from(self.retention.as_nanos()).unwrap_or(i64::MAX);
        let cutoff = now_unix_ns.saturating_sub(keep_ns);
        let doomed = self
            .segments
            .iter()
            .take(self.segments.len().saturating_sub(1))
            .take_while(|s| s.newest_unix_ns < cutoff)
            .count();
        if doomed == 0 {
            return Ok(Vec::new());
        }
        self.hw.retained_from = self.segments[doomed].first_seq;
        let from = self.hw.retained_from;
        self.hw.gaps.retain(|g| g.to >= from);
        self.hw.write(&self.dir)?;
        let mut deleted = Vec::new();
        for s in self.segments.drain(..doomed) {
            match fs::remove_file(&s.path) {
                Ok(()) => deleted.push(s.path),
                Err(e) if e.kind() == io::ErrorKind::NotFound => {}
                Err(e) => return Err(io_err(&s.path, "delete")(e)),
            }
        }
        sync_dir(&self.dir)?;
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

/// Reads up to `max` alerts with `after < seq <= upto`, oldest first, from the segments in `dir`; numbers
/// the journal does not hold are simply absent (the desk turns them into gaps). Used by subscribers resuming
/// from older than the desk's in-memory tail; runs on a blocking thread. Damaged stretches are skipped.
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
    let mut prev = 0;
    for (_, path) in &segments[start..] {
        let mut reader = match SegmentReader::open(path, prev) {
            Ok((r, _)) => r,
            // Deleted by retention between the listing and the open: the next segment follows.
            Err(JournalError::Io { source, .. }) if source.kind() == io::ErrorKind::NotFound => continue,
            Err(e) => return Err(e),
        };
        loop {
            match reader.next()? {
                Item::Record(rec) => {
                    let seq = rec.alert.seq;
                    prev = seq;
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
                Item::End => break,
                Item::Damaged { offset, reason, .. } => {
                    tracing::debug!(segment = %path.display(), offset, %reason, "journal: skipping a damaged stretch");
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

/// Checks a journal without changing a byte of it: every CRC, the order, gaps, missing segments, the
/// high-water file; hands every intact record to `on_record`. For the offline `glint journal` command.
pub(crate) fn verify(dir: &Path, on_record: &mut dyn FnMut(&Record)) -> Result<OpenReport, JournalError> {
    if list_segments(dir)?.is_empty() {
        return Err(JournalError::Missing(dir.to_path_buf()));
    }
    let scanned = scan(dir, Mode::ReadOnly, on_record)?;
    let (next_seq, tail_gap) = next_after_scan(&scanned);
    let mut report = scanned.report;
    report.gaps.extend(tail_gap);
    report.next_seq = next_seq;
    Ok(report)
}

/// Files in the quarantine directory with their sizes.
pub(crate) fn quarantined_files(dir: &Path) -> Vec<(PathBuf, u64)> {
    let mut out: Vec<(PathBuf, u64)> = fs::read_dir(dir.join(QUARANTINE))
        .map(|rd| {
            rd.filter_map(Result::ok)
                .map(|e| (e.path(), e.metadata().map(|m| m.len()).unwrap_or(0)))
                .collect()
        })
        .unwrap_or_default();
    out.sort();
    out
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
        let err = j.append(&alert(3), 10).unwrap_err();
        assert!(
            matches!(err, JournalError::OutOfSequence { expected: 6, got: 3 }),
            "{err}"
        );
        j.mark_clean().unwrap();
        drop(j);
        let (j, rep) = open(tmp.path(), 1 << 20, 20);
        assert_eq!((j.last_seq(), rep.records, j.next_seq()), (5, 5, 6));
        assert!(rep.torn.is_none() && rep.is_clean() && rep.gaps.is_empty());
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
        // The bytes cut are kept aside.
        let q = quarantined_files(tmp.path());
        assert_eq!(q.len(), 1);
        assert_eq!(q[0].1, torn.bytes_cut);
        // Number 3 may have reached someone before the damage: it is never given again.
        let next = j.next_seq();
        assert!(next > 3, "next {next}");
        assert_eq!(rep.gaps.len(), 1);
        assert!(!rep.gaps[0].lost, "{:?}", rep.gaps);
        j.append(&alert(next), 30).unwrap();
        j.sync().unwrap();
        assert_eq!(
            seqs(&read_after(tmp.path(), 0, next, 10).unwrap()),
            vec![1, 2, next]
        );
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
        // Retention is no gap: the high-water file knows where the journal now starts.
        assert!(rep.gaps.iter().all(|g| !g.lost), "{:?}", rep.gaps);
        assert!(rep.damaged.is_empty());
        let next = j.next_seq();
        j.append(&alert(next), 400 * DAY_NS).unwrap();
        drop(j);
        let mut got = Vec::new();
        let rep = verify(tmp.path(), &mut |r| got.push(r.alert.seq)).unwrap();
        assert_eq!(got, vec![7, next]);
        assert_eq!(rep.lost_seqs(), 0, "{:?}", rep.gaps);
    }

    #[test]
    fn damaged_header_of_an_older_segment_is_reported_and_its_records_kept() {
        let tmp = tempfile::tempdir().unwrap();
        let per = record_len(&alert(1));
        let (mut j, _) = open(tmp.path(), HEADER_LEN + 3 * per, 1);
        for s in 1..=6 {
            j.append(&alert(s), 10).unwrap();
        }
        j.sync().unwrap();
        drop(j);
        let first = tmp.path().join(segment_name(1));
        let mut bytes = fs::read(&first).unwrap();
        bytes[..4].copy_from_slice(b"NOPE");
        fs::write(&first, &bytes).unwrap();
        let (_, rep) = open(tmp.path(), HEADER_LEN + 3 * per, 20);
        assert_eq!(rep.records, 6);
        assert_eq!(rep.damaged.len(), 1, "{:?}", rep.damaged);
        assert!(rep.damaged[0].reason.contains("magic"), "{:?}", rep.damaged);
        assert_eq!(rep.damaged[0].path, first);
        assert_eq!(rep.lost_seqs(), 0);
    }

    #[test]
    fn a_newer_format_is_an_error_not_damage() {
        let tmp = tempfile::tempdir().unwrap();
        let mut bytes = MAGIC.to_vec();
        bytes.extend_from_slice(&7u32.to_le_bytes());
        bytes.extend_from_slice(&[0xab; 40]);
        fs::write(tmp.path().join(segment_name(1)), &bytes).unwrap();
        fs::write(tmp.path().join(segment_name(5)), b"").unwrap();
        let err = Journal::open(tmp.path(), 1 << 20, Duration::from_secs(60), 0, &mut |_| {}).unwrap_err();
        let text = err.to_string();
        assert!(
            text.contains(&segment_name(1)) && text.contains("format version 7"),
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
        let next = j.next_seq();
        assert!(next > 1);
        j.append(&alert(next), 30).unwrap();
        j.sync().unwrap();
        assert_eq!(seqs(&read_after(tmp.path(), 0, next, 10).unwrap()), vec![1, next]);
    }

    /// Byte ranges of each record in a journal: (seq, segment path, start, end).
    fn record_spans(dir: &Path) -> Vec<(u64, PathBuf, u64, u64)> {
        let mut out = Vec::new();
        for (_, path) in list_segments(dir).unwrap() {
            let (mut r, _) = SegmentReader::open(&path, 0).unwrap();
            loop {
                let start = r.offset;
                match r.next().unwrap() {
                    Item::Record(rec) => out.push((rec.alert.seq, path.clone(), start, r.offset)),
                    Item::End => break,
                    Item::Damaged { .. } => panic!("template journal is damaged"),
                }
            }
        }
        out
    }

    #[test]
    fn corrupt_middle_record_is_quarantined_and_every_other_record_kept() {
        let tmp = tempfile::tempdir().unwrap();
        let (mut j, _) = open(tmp.path(), 1 << 20, 1);
        for s in 1..=30 {
            j.append(&alert(s), 10).unwrap();
        }
        j.mark_clean().unwrap();
        drop(j);
        let spans = record_spans(tmp.path());
        let (_, path, start, end) = spans[9].clone();
        let mut bytes = fs::read(&path).unwrap();
        for b in &mut bytes[start as usize + 12..start as usize + 16] {
            *b ^= 0xff;
        }
        fs::write(&path, &bytes).unwrap();
        let (mut j, rep) = open(tmp.path(), 1 << 20, 20);
        assert!(rep.torn.is_none(), "{:?}", rep.torn);
        assert_eq!(rep.records, 29);
        assert_eq!(rep.damaged.len(), 1);
        let d = &rep.damaged[0];
        assert_eq!(
            (d.offset, d.bytes, d.after_seq, d.before_seq),
            (start, end - start, 9, Some(11))
        );
        assert!(d.reason.contains("CRC"), "{}", d.reason);
        let q = d.quarantined.clone().unwrap();
        assert_eq!(fs::read(&q).unwrap(), bytes[start as usize..end as usize]);
        assert_eq!(rep.gaps.len(), 1);
        assert_eq!(
            (rep.gaps[0].from, rep.gaps[0].to, rep.gaps[0].lost),
            (10, 10, true)
        );
        assert!(rep.gaps[0].reason.contains("offset"), "{}", rep.gaps[0].reason);
        // The file is not cut, every other record reads back, and numbering goes on after 30.
        assert_eq!(file_len(&path), bytes.len() as u64);
        let want: Vec<u64> = (1..=30).filter(|s| *s != 10).collect();
        assert_eq!(seqs(&read_after(tmp.path(), 0, 30, 100).unwrap()), want);
        assert_eq!(j.next_seq(), 31);
        assert!(j.append(&alert(10), 30).is_err());
        j.append(&alert(31), 30).unwrap();
        j.sync().unwrap();
        // A second open finds the same damage and makes no second copy.
        drop(j);
        let (_, rep) = open(tmp.path(), 1 << 20, 40);
        assert_eq!((rep.records, rep.damaged.len()), (30, 1));
        assert_eq!(quarantined_files(tmp.path()).len(), 1);
    }

    #[test]
    fn lost_segments_are_gaps_and_numbers_are_never_reused() {
        let tmp = tempfile::tempdir().unwrap();
        let per = record_len(&alert(1));
        let seg = HEADER_LEN + 3 * per;
        let (mut j, _) = open(tmp.path(), seg, 1);
        for s in 1..=10 {
            j.append(&alert(s), 10).unwrap();
        }
        j.mark_clean().unwrap();
        drop(j);
        // Segments hold 1-3, 4-6, 7-9, 10. Lose the first, a middle one and the newest.
        for first in [1, 4, 10] {
            fs::remove_file(tmp.path().join(segment_name(first))).unwrap();
        }
        let untouched = fs::read(tmp.path().join(segment_name(7))).unwrap();
        let rep = verify(tmp.path(), &mut |_| {}).unwrap();
        assert_eq!(fs::read(tmp.path().join(segment_name(7))).unwrap(), untouched);
        assert!(!rep.is_clean());
        let ranges: Vec<(u64, u64, bool)> = rep.gaps.iter().map(|g| (g.from, g.to, g.lost)).collect();
        assert_eq!(ranges, vec![(1, 6, true), (10, 10, true)]);
        assert!(rep.gaps[0].reason.contains("missing"), "{}", rep.gaps[0].reason);
        let (mut j, rep) = open(tmp.path(), seg, 20);
        assert_eq!((rep.records, rep.lost_seqs()), (3, 7));
        assert_eq!(j.next_seq(), 11);
        j.append(&alert(11), 30).unwrap();
        j.sync().unwrap();
        assert_eq!(
            seqs(&read_after(tmp.path(), 0, 11, 100).unwrap()),
            vec![7, 8, 9, 11]
        );
    }

    #[test]
    fn an_unclean_stop_skips_the_reserved_numbers_once_and_remembers_why() {
        let tmp = tempfile::tempdir().unwrap();
        let (mut j, _) = open(tmp.path(), 1 << 20, 1);
        for s in 1..=5 {
            j.append(&alert(s), 10).unwrap();
        }
        j.sync().unwrap();
        drop(j); // no mark_clean: a crash
        let (mut j, rep) = open(tmp.path(), 1 << 20, 20);
        let next = j.next_seq();
        assert_eq!(next, RESERVE + 1);
        assert_eq!(rep.gaps.len(), 1);
        assert!(!rep.gaps[0].lost && rep.is_clean(), "{:?}", rep.gaps);
        j.append(&alert(next), 30).unwrap();
        j.mark_clean().unwrap();
        drop(j);
        // Reopened cleanly: the gap inside the segment is known (not damage) and numbering follows on.
        let (j, rep) = open(tmp.path(), 1 << 20, 40);
        assert_eq!(j.next_seq(), next + 1);
        assert!(rep.is_clean(), "{rep:?}");
        assert_eq!(
            rep.gaps
                .iter()
                .map(|g| (g.from, g.to, g.lost))
                .collect::<Vec<_>>(),
            vec![(6, RESERVE, false)]
        );
    }

    /// A tiny deterministic generator (xorshift64*), so the damage is the same on every run.
    struct Rng(u64);

    impl Rng {
        fn next(&mut self) -> u64 {
            self.0 ^= self.0 >> 12;
            self.0 ^= self.0 << 25;
            self.0 ^= self.0 >> 27;
            self.0.wrapping_mul(0x2545_f491_4f6c_dd1d)
        }

        fn below(&mut self, n: u64) -> u64 {
            if n == 0 { 0 } else { self.next() % n }
        }
    }

    #[test]
    fn random_damage_never_loses_an_intact_record_nor_reuses_a_number() {
        const RECORDS: u64 = 300;
        const ROUNDS: usize = 1000;
        // Memory-backed when the machine has it: the rounds fsync a great deal and test no disk.
        let shm = Path::new("/dev/shm");
        let root = if shm.is_dir() {
            tempfile::tempdir_in(shm).unwrap()
        } else {
            tempfile::tempdir().unwrap()
        };
        let per = record_len(&alert(1));
        let seg = HEADER_LEN + 29 * per;
        let mut rng = Rng(0x9e37_79b9_7f4a_7c15);
        let mut rounds = 0;
        let (mut damaged_opens, mut quarantined, mut damages) = (0, 0, 0);
        for clean in [false, true] {
            let template = root.path().join(format!("template-{clean}"));
            let (mut j, _) = open(&template, seg, 1);
            for s in 1..=RECORDS {
                j.append(&alert(s), 10).unwrap();
            }
            if clean {
                j.mark_clean().unwrap();
            } else {
                j.sync().unwrap();
            }
            drop(j);
            let spans = record_spans(&template);
            let files: Vec<(PathBuf, Vec<u8>)> = list_segments(&template)
                .unwrap()
                .into_iter()
                .map(|(_, p)| {
                    let b = fs::read(&p).unwrap();
                    (p, b)
                })
                .collect();
            assert!(files.len() >= 8, "{} segments", files.len());
            let hw = fs::read(template.join(HIGH_WATER)).unwrap();
            for round in 0..ROUNDS {
                let dir = root.path().join(format!("r-{clean}-{round}"));
                fs::create_dir_all(&dir).unwrap();
                fs::write(dir.join(HIGH_WATER), &hw).unwrap();
                let mut bytes: Vec<Option<Vec<u8>>> = files.iter().map(|(_, b)| Some(b.clone())).collect();
                // Touched byte ranges per segment; a record overlapping one is no longer intact.
                let mut touched: Vec<Vec<(u64, u64)>> = vec![Vec::new(); files.len()];
                for _ in 0..1 + rng.below(3) {
                    damages += 1;
                    let f = rng.below(files.len() as u64) as usize;
                    let Some(b) = bytes[f].as_mut() else { continue };
                    let len = b.len() as u64;
                    match rng.below(4) {
                        0 => {
                            for _ in 0..1 + rng.below(4) {
                                let at = rng.below(len);
                                b[at as usize] ^= 1 + rng.below(255) as u8;
                                touched[f].push((at, at + 1));
                            }
                        }
                        1 => {
                            let at = rng.below(len);
                            b.truncate(at as usize);
                            touched[f].push((at, u64::MAX));
                        }
                        2 => {
                            bytes[f] = None;
                            touched[f].push((0, u64::MAX));
                        }
                        _ => {
                            let at = rng.below(len);
                            let end = (at + 1 + rng.below(200)).min(len);
                            b[at as usize..end as usize].fill(0);
                            touched[f].push((at, end));
                        }
                    }
                }
                for ((path, _), b) in files.iter().zip(&bytes) {
                    if let Some(b) = b {
                        fs::write(dir.join(path.file_name().unwrap()), b).unwrap();
                    }
                }
                let intact: Vec<u64> = spans
                    .iter()
                    .filter(|(_, p, start, end)| {
                        let f = files.iter().position(|(fp, _)| fp == p).unwrap();
                        touched[f].iter().all(|(a, b)| *b <= *start || *a >= *end)
                    })
                    .map(|(s, ..)| *s)
                    .collect();
                let mut seen = Vec::new();
                let (mut j, rep) =
                    Journal::open(&dir, seg, Duration::from_secs(86_400), 20, &mut |r: &Record| {
                        seen.push(r.alert.clone())
                    })
                    .unwrap_or_else(|e| panic!("round {round} (clean {clean}): open failed: {e}"));
                damaged_opens += usize::from(!rep.damaged.is_empty() || rep.torn.is_some());
                quarantined += rep.damaged.iter().filter(|d| d.quarantined.is_some()).count();
                // Nothing invented: every record read is the one written with that number.
                for a in &seen {
                    assert_eq!(*a, alert(a.seq), "round {round}: record {} altered", a.seq);
                }
                let seen: Vec<u64> = seen.iter().map(|a| a.seq).collect();
                let read = seqs(&read_after(&dir, 0, u64::MAX, usize::MAX).unwrap());
                for s in &intact {
                    assert!(
                        seen.contains(s),
                        "round {round} (clean {clean}): intact record {s} lost at open"
                    );
                    assert!(
                        read.contains(s),
                        "round {round} (clean {clean}): intact record {s} not read back"
                    );
                }
                let next = j.next_seq();
                assert!(
                    next > RECORDS,
                    "round {round} (clean {clean}): number {next} reused"
                );
                if round % 10 == 0 {
                    j.append(&alert(next), 30).unwrap();
                    j.sync().unwrap();
                    drop(j);
                    let (j, _) =
                        Journal::open(&dir, seg, Duration::from_secs(86_400), 40, &mut |_| {}).unwrap();
                    assert!(j.next_seq() > next, "round {round}: number reused after reopen");
                    assert_eq!(read_one(&dir, next).unwrap(), Some(alert(next)));
                }
                fs::remove_dir_all(&dir).unwrap();
                rounds += 1;
            }
        }
        println!(
            "{rounds} rounds, {damages} damages, {damaged_opens} opens found damage, {quarantined} stretches quarantined"
        );
        assert_eq!(rounds, 2 * ROUNDS);
        // The damage was real: most rounds found something to repair or skip.
        assert!(
            damaged_opens > rounds / 2,
            "{damaged_opens} of {rounds} opens saw damage"
        );
        assert!(quarantined > 0);
    }
}
