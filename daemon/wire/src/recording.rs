//! `.glrec` recordings: what a producer sent, kept for replay and tuning. Layout: the 8-byte magic
//! `GLINTREC`, a little-endian u32 format version (1), then `ProducerFrame`s exactly as on the wire
//! (varint-length-delimited). A `.glrec.zst` file is that whole byte stream zstd-compressed. Readers sniff
//! compression from the content, stream one frame at a time, and report where a file stops making sense.

use std::fs::{self, File, OpenOptions};
use std::io::{self, BufRead, BufReader, BufWriter, Read, Write};
use std::num::NonZeroU64;
use std::path::{Path, PathBuf};

use prost::Message;

use crate::framing::{self, FrameError, MAX_VARINT_LEN};
use crate::pb::ProducerFrame;

/// First eight bytes of every recording (after decompression).
pub const MAGIC: [u8; 8] = *b"GLINTREC";

/// Format version written after the magic; the only one this build reads.
pub const FORMAT_VERSION: u32 = 1;

/// Bytes of magic and version before the first frame.
pub const HEADER_LEN: u64 = 12;

/// First four bytes of a zstd frame (RFC 8878, section 3.1.1).
pub const ZSTD_MAGIC: [u8; 4] = [0x28, 0xB5, 0x2F, 0xFD];

/// zstd level for compressed recordings: fast enough to keep up with a live stream.
pub const DEFAULT_ZSTD_LEVEL: i32 = 3;

/// Why a recording could not be written or read. Offsets count bytes of the uncompressed stream, magic
/// included; `path` is the file (or the name given to an in-memory reader or writer).
#[derive(Debug, thiserror::Error)]
pub enum RecordingError {
    /// An operating-system or decompression error.
    #[error("{}: cannot {action}: {source}", path.display())]
    Io {
        /// The file.
        path: PathBuf,
        /// What was being done, e.g. "open", "read", "write".
        action: &'static str,
        /// The underlying error.
        source: io::Error,
    },
    /// The file does not start with `GLINTREC` (missing bytes of a very short file read as 0).
    #[error("{}: not a glint recording (starts with {}, expected \"GLINTREC\")", path.display(), hex(found))]
    NotARecording {
        /// The file.
        path: PathBuf,
        /// Its first eight bytes.
        found: [u8; 8],
    },
    /// The format version is not [`FORMAT_VERSION`].
    #[error("{}: recording format version {found} is not supported (this build reads version {supported})", path.display())]
    UnsupportedVersion {
        /// The file.
        path: PathBuf,
        /// Version in the file.
        found: u32,
        /// [`FORMAT_VERSION`].
        supported: u32,
    },
    /// The file ends inside the header or inside the frame starting at `offset` (e.g. a recorder killed
    /// mid-write). Frames before it were read normally.
    #[error("{}: truncated: the file ends inside the frame starting at byte {offset}", path.display())]
    Truncated {
        /// The file.
        path: PathBuf,
        /// Start of the cut frame (or 0 for a cut header), uncompressed bytes.
        offset: u64,
    },
    /// The frame starting at `offset` is malformed or over the size limit.
    #[error("{}: frame at byte {offset}: {source}", path.display())]
    Frame {
        /// The file.
        path: PathBuf,
        /// Start of the frame, uncompressed bytes.
        offset: u64,
        /// What is wrong with it.
        source: FrameError,
    },
    /// A rotating writer was given a file-name prefix that is empty or contains a path separator.
    #[error("recording file prefix {prefix:?} must be non-empty and contain no path separator")]
    BadPrefix {
        /// The prefix given.
        prefix: String,
    },
}

fn hex(bytes: &[u8]) -> String {
    bytes
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect::<Vec<_>>()
        .join(" ")
}

fn io_err<'a>(path: &'a Path, action: &'static str) -> impl FnOnce(io::Error) -> RecordingError + 'a {
    move |source| RecordingError::Io {
        path: path.to_path_buf(),
        action,
        source,
    }
}

/// How a recording's bytes are stored.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Compression {
    /// Plain `.glrec`.
    None,
    /// `.glrec.zst`: the whole stream zstd-compressed at this level.
    Zstd(i32),
}

impl Compression {
    /// [`Compression::Zstd`] at [`DEFAULT_ZSTD_LEVEL`] for a path ending in `.zst`, else none.
    pub fn from_path(path: &Path) -> Self {
        if path.extension().is_some_and(|e| e == "zst") {
            Self::Zstd(DEFAULT_ZSTD_LEVEL)
        } else {
            Self::None
        }
    }

    /// File-name suffix for this compression: `.glrec` or `.glrec.zst`.
    pub fn suffix(self) -> &'static str {
        match self {
            Self::None => ".glrec",
            Self::Zstd(_) => ".glrec.zst",
        }
    }
}

enum Sink<W: Write> {
    Plain(BufWriter<W>),
    Zstd(zstd::Encoder<'static, BufWriter<W>>),
}

impl<W: Write> Sink<W> {
    fn writer(&mut self) -> &mut dyn Write {
        match self {
            Self::Plain(w) => w,
            Self::Zstd(w) => w,
        }
    }

    fn finish(self) -> io::Result<W> {
        let buffered = match self {
            Self::Plain(w) => w,
            Self::Zstd(w) => w.finish()?,
        };
        buffered.into_inner().map_err(io::IntoInnerError::into_error)
    }
}

/// Writes one recording.
///
/// Call [`finish`](Self::finish) to end it: it flushes, ends the zstd stream and reports any error. Dropping
/// the writer without `finish` does the same on a best-effort basis and ignores errors; a writer lost
/// without either (a crash) leaves a file that reads up to its last complete frame (or zstd block) and then
/// reports [`RecordingError::Truncated`].
pub struct RecordingWriter<W: Write> {
    sink: Option<Sink<W>>,
    path: PathBuf,
    scratch: Vec<u8>,
    bytes: u64,
    frames: u64,
    failed: bool,
}

impl<W: Write> std::fmt::Debug for RecordingWriter<W> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("RecordingWriter")
            .field("path", &self.path)
            .field("bytes", &self.bytes)
            .field("frames", &self.frames)
            .finish_non_exhaustive()
    }
}

impl RecordingWriter<File> {
    /// Creates (or truncates) the file at `path` and writes the header; compressed if the path ends in
    /// `.zst`.
    pub fn create(path: impl AsRef<Path>) -> Result<Self, RecordingError> {
        let path = path.as_ref();
        let file = File::create(path).map_err(io_err(path, "create"))?;
        Self::new(file, Compression::from_path(path), path)
    }

    fn create_new(path: &Path, compression: Compression) -> Result<Self, RecordingError> {
        let file = OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(path)
            .map_err(io_err(path, "create"))?;
        Self::new(file, compression, path)
    }
}

impl<W: Write> RecordingWriter<W> {
    /// Starts a recording on `inner` and writes the header. `name` is only used in error messages.
    pub fn new(inner: W, compression: Compression, name: impl Into<PathBuf>) -> Result<Self, RecordingError> {
        let path = name.into();
        let buffered = BufWriter::new(inner);
        let sink = match compression {
            Compression::None => Sink::Plain(buffered),
            Compression::Zstd(level) => {
                Sink::Zstd(zstd::Encoder::new(buffered, level).map_err(io_err(&path, "start compressing"))?)
            }
        };
        let mut w = Self {
            sink: Some(sink),
            path,
            scratch: Vec::new(),
            bytes: 0,
            frames: 0,
            failed: false,
        };
        let mut header = [0u8; HEADER_LEN as usize];
        header[..8].copy_from_slice(&MAGIC);
        header[8..].copy_from_slice(&FORMAT_VERSION.to_le_bytes());
        w.write_raw(&header)?;
        Ok(w)
    }

    fn write_raw(&mut self, bytes: &[u8]) -> Result<(), RecordingError> {
        let refuse = |why: &str| RecordingError::Io {
            path: self.path.clone(),
            action: "write",
            source: io::Error::other(why),
        };
        if self.failed {
            return Err(refuse("an earlier write failed, so the recording ends there"));
        }
        let Some(sink) = self.sink.as_mut() else {
            return Err(refuse("the recording was already finished"));
        };
        if let Err(e) = sink.writer().write_all(bytes) {
            // A frame may be half written: appending more would hide the damage mid-file.
            self.failed = true;
            return Err(io_err(&self.path, "write")(e));
        }
        self.bytes += bytes.len() as u64;
        Ok(())
    }

    /// Appends one frame, exactly as it would travel on the wire.
    pub fn write_frame(&mut self, frame: &ProducerFrame) -> Result<(), RecordingError> {
        let mut scratch = std::mem::take(&mut self.scratch);
        scratch.clear();
        // No size limit on writing: a reader needs a limit at least as large as the producer's.
        let encoded = framing::encode_frame(frame, usize::MAX, &mut scratch);
        let result = match encoded {
            Ok(()) => self.write_raw(&scratch),
            Err(source) => Err(RecordingError::Frame {
                path: self.path.clone(),
                offset: self.bytes,
                source,
            }),
        };
        self.scratch = scratch;
        result?;
        self.frames += 1;
        Ok(())
    }

    /// Pushes buffered bytes to the underlying writer; for zstd this ends the current block, so a reader
    /// of the file sees every frame written so far.
    pub fn flush(&mut self) -> Result<(), RecordingError> {
        match self.sink.as_mut() {
            Some(sink) => sink.writer().flush().map_err(io_err(&self.path, "flush")),
            None => Ok(()),
        }
    }

    /// Ends the recording (flushes, ends the zstd stream) and returns the underlying writer.
    pub fn finish(mut self) -> Result<W, RecordingError> {
        match self.sink.take() {
            Some(sink) => sink.finish().map_err(io_err(&self.path, "finish")),
            None => Err(RecordingError::Io {
                path: self.path.clone(),
                action: "finish",
                source: io::Error::other("the recording was already finished"),
            }),
        }
    }

    /// Uncompressed bytes written so far, header included.
    pub fn bytes_written(&self) -> u64 {
        self.bytes
    }

    /// Frames written so far.
    pub fn frames_written(&self) -> u64 {
        self.frames
    }

    /// The file (or name) of this recording.
    pub fn path(&self) -> &Path {
        &self.path
    }
}

impl<W: Write> Drop for RecordingWriter<W> {
    fn drop(&mut self) {
        if let Some(sink) = self.sink.take() {
            // Best effort, documented on the type: `finish` is the way to see errors.
            let _ = sink.finish();
        }
    }
}

/// When a [`RotatingWriter`] starts a new file. Limits are checked before each write, so a file may pass
/// them by one frame; every file holds at least one frame after its header frame.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct RotationPolicy {
    /// Rotate once the current file holds this many uncompressed bytes.
    pub max_bytes: Option<NonZeroU64>,
    /// Rotate once this many nanoseconds (of the caller's `now_ns`) have passed since the file was opened.
    pub max_duration_ns: Option<NonZeroU64>,
}

/// Writes a recording as a series of files `<prefix>-<seq:06>.glrec[.zst]` in one directory, rotating by
/// size or by time, so a long-running daemon never holds one unbounded file.
///
/// Time is whatever the caller passes as `now_ns` (the daemon can pass event time or wall time); the writer
/// never reads a clock. A header frame (the producer's `Hello`) registered with
/// [`set_header`](Self::set_header) is written first in every new file, so each file replays on its own.
/// Numbering continues after the highest existing file of the same prefix; files are never overwritten.
/// State is one open file and the header frame.
#[derive(Debug)]
pub struct RotatingWriter {
    dir: PathBuf,
    prefix: String,
    compression: Compression,
    policy: RotationPolicy,
    header: Option<ProducerFrame>,
    current: Option<RecordingWriter<File>>,
    opened_ns: i64,
    next_seq: u64,
    stamp: Option<fn(i64) -> String>,
}

impl RotatingWriter {
    /// Prepares to write into `dir` (created if missing). No file is opened before the first write.
    pub fn new(
        dir: impl Into<PathBuf>,
        prefix: impl Into<String>,
        compression: Compression,
        policy: RotationPolicy,
    ) -> Result<Self, RecordingError> {
        let dir = dir.into();
        let prefix = prefix.into();
        if prefix.is_empty() || prefix.contains(['/', '\\']) || prefix == "." || prefix == ".." {
            return Err(RecordingError::BadPrefix { prefix });
        }
        fs::create_dir_all(&dir).map_err(io_err(&dir, "create directory"))?;
        let next_seq = next_free_seq(&dir, &prefix)?;
        Ok(Self {
            dir,
            prefix,
            compression,
            policy,
            header: None,
            current: None,
            opened_ns: 0,
            next_seq,
            stamp: None,
        })
    }

    /// Names files `<prefix>-<stamp(t)>.glrec[.zst]` instead of numbering them, where `t` is the earliest
    /// photon time of the batch that opens the file (or the caller's `now_ns` for a frame without photons)
    /// and `stamp` renders it (the daemon passes the UTC time, which the wire crate cannot compute without
    /// a leap-second table). A name already taken gets `-2`, `-3`, ... before the suffix. The header frame
    /// then waits for the first frame of the file instead of opening one itself.
    pub fn with_time_names(mut self, stamp: fn(i64) -> String) -> Self {
        self.stamp = Some(stamp);
        self
    }

    /// Writes `frame` (normally the producer's `Hello`) now, and registers it to start every file opened
    /// after this call. Replaces an earlier header frame. Do not also pass it to `write_frame`.
    pub fn set_header(
        &mut self,
        frame: ProducerFrame,
        now_ns: i64,
    ) -> Result<Option<PathBuf>, RecordingError> {
        if self.stamp.is_some() && self.current.is_none() {
            // The next file starts with the header anyway; opening it now would name it by no photon.
            self.header = Some(frame);
            return Ok(None);
        }
        // Unset first so a file opened by this very write does not get the frame twice.
        self.header = None;
        let closed = self.write_frame(&frame, now_ns)?;
        self.header = Some(frame);
        Ok(closed)
    }

    /// Writes one frame, first rotating if the current file reached a limit. Returns the path of a file
    /// that this call completed, if any.
    pub fn write_frame(
        &mut self,
        frame: &ProducerFrame,
        now_ns: i64,
    ) -> Result<Option<PathBuf>, RecordingError> {
        let mut closed = None;
        if let Some(cur) = &self.current {
            let by_size = self
                .policy
                .max_bytes
                .is_some_and(|m| cur.bytes_written() >= m.get());
            let age = i128::from(now_ns) - i128::from(self.opened_ns);
            let by_time = self
                .policy
                .max_duration_ns
                .is_some_and(|m| age >= i128::from(m.get()));
            if by_size || by_time {
                closed = self.close_current()?;
            }
        }
        let cur = match &mut self.current {
            Some(cur) => cur,
            None => self.open_next(now_ns, frame)?,
        };
        cur.write_frame(frame)?;
        Ok(closed)
    }

    fn open_next(
        &mut self,
        now_ns: i64,
        frame: &ProducerFrame,
    ) -> Result<&mut RecordingWriter<File>, RecordingError> {
        let mut w = match self.stamp {
            None => {
                let name = format!(
                    "{}-{:06}{}",
                    self.prefix,
                    self.next_seq,
                    self.compression.suffix()
                );
                RecordingWriter::create_new(&self.dir.join(name), self.compression)?
            }
            Some(stamp) => {
                let first = match &frame.body {
                    Some(crate::pb::producer_frame::Body::Batch(b)) => {
                        b.time_gps_ns.iter().copied().min().unwrap_or(now_ns)
                    }
                    _ => now_ns,
                };
                let base = format!("{}-{}", self.prefix, stamp(first));
                let mut n = 1u32;
                loop {
                    let name = match n {
                        1 => format!("{base}{}", self.compression.suffix()),
                        _ => format!("{base}-{n}{}", self.compression.suffix()),
                    };
                    match RecordingWriter::create_new(&self.dir.join(name), self.compression) {
                        Err(RecordingError::Io { source, .. })
                            if source.kind() == io::ErrorKind::AlreadyExists && n < 10_000 =>
                        {
                            n += 1;
                        }
                        other => break other?,
                    }
                }
            }
        };
        self.next_seq += 1;
        if let Some(h) = &self.header {
            w.write_frame(h)?;
        }
        self.opened_ns = now_ns;
        Ok(self.current.insert(w))
    }

    fn close_current(&mut self) -> Result<Option<PathBuf>, RecordingError> {
        match self.current.take() {
            Some(w) => {
                let path = w.path().to_path_buf();
                w.finish()?;
                Ok(Some(path))
            }
            None => Ok(None),
        }
    }

    /// Pushes buffered bytes of the current file to the operating system.
    pub fn flush(&mut self) -> Result<(), RecordingError> {
        match &mut self.current {
            Some(w) => w.flush(),
            None => Ok(()),
        }
    }

    /// The file being written, if one is open.
    pub fn current_path(&self) -> Option<&Path> {
        self.current.as_ref().map(RecordingWriter::path)
    }

    /// Ends the current file; returns its path. Dropping the writer instead ends it on a best-effort basis.
    pub fn finish(mut self) -> Result<Option<PathBuf>, RecordingError> {
        self.close_current()
    }
}

/// The number after the highest `<prefix>-NNNNNN.glrec*` file in `dir` (1 if none).
fn next_free_seq(dir: &Path, prefix: &str) -> Result<u64, RecordingError> {
    let mut next = 1;
    for entry in fs::read_dir(dir).map_err(io_err(dir, "list"))? {
        let entry = entry.map_err(io_err(dir, "list"))?;
        let name = entry.file_name();
        let Some(rest) = name
            .to_str()
            .and_then(|n| n.strip_prefix(prefix))
            .and_then(|r| r.strip_prefix('-'))
        else {
            continue;
        };
        let Some(digits) = rest
            .strip_suffix(".glrec")
            .or_else(|| rest.strip_suffix(".glrec.zst"))
        else {
            continue;
        };
        if let Ok(seq) = digits.parse::<u64>() {
            next = next.max(seq.saturating_add(1));
        }
    }
    Ok(next)
}

type Sniffed<R> = io::Chain<io::Cursor<Vec<u8>>, R>;

enum Source<R: Read> {
    Plain(BufReader<Sniffed<R>>),
    Zstd(BufReader<zstd::Decoder<'static, BufReader<Sniffed<R>>>>),
}

impl<R: Read> Source<R> {
    fn reader(&mut self) -> &mut dyn BufRead {
        match self {
            Self::Plain(r) => r,
            Self::Zstd(r) => r,
        }
    }
}

/// Streams the frames of one recording, one at a time, through a buffered reader: memory is one frame (at
/// most the size limit) plus fixed buffers.
///
/// Iterating yields `Ok(frame)` for each frame, then ends; after the first error it yields nothing more.
pub struct RecordingReader<R: Read> {
    source: Source<R>,
    path: PathBuf,
    max_frame: usize,
    compressed: bool,
    offset: u64,
    scratch: Vec<u8>,
    done: bool,
}

impl<R: Read> std::fmt::Debug for RecordingReader<R> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("RecordingReader")
            .field("path", &self.path)
            .field("compressed", &self.compressed)
            .field("offset", &self.offset)
            .finish_non_exhaustive()
    }
}

impl RecordingReader<File> {
    /// Opens a `.glrec` or `.glrec.zst` file (compression is detected from the content) and checks its
    /// header. Frames longer than `max_frame` bytes are refused.
    pub fn open(path: impl AsRef<Path>, max_frame: usize) -> Result<Self, RecordingError> {
        let path = path.as_ref();
        let file = File::open(path).map_err(io_err(path, "open"))?;
        Self::new(file, path, max_frame)
    }
}

impl<R: Read> RecordingReader<R> {
    /// Reads a recording from `inner` (a file, a cursor over memory, ...) and checks its header. `name` is
    /// only used in error messages.
    pub fn new(mut inner: R, name: impl Into<PathBuf>, max_frame: usize) -> Result<Self, RecordingError> {
        let path = name.into();
        let mut sniff = vec![0u8; ZSTD_MAGIC.len()];
        let got = read_full(&mut inner, &mut sniff).map_err(io_err(&path, "read"))?;
        sniff.truncate(got);
        let compressed = sniff == ZSTD_MAGIC;
        let chained = io::Cursor::new(sniff).chain(inner);
        let source = if compressed {
            let decoder = zstd::Decoder::new(chained).map_err(io_err(&path, "start decompressing"))?;
            Source::Zstd(BufReader::new(decoder))
        } else {
            Source::Plain(BufReader::new(chained))
        };
        let mut r = Self {
            source,
            path,
            max_frame,
            compressed,
            offset: 0,
            scratch: Vec::new(),
            done: false,
        };
        r.read_header()?;
        Ok(r)
    }

    fn read_header(&mut self) -> Result<(), RecordingError> {
        let mut header = [0u8; HEADER_LEN as usize];
        let got = read_full(self.source.reader(), &mut header).map_err(|e| self.read_error(e, 0))?;
        let mut found = [0u8; 8];
        found.copy_from_slice(&header[..8]);
        let magic_len = got.min(MAGIC.len());
        if header[..magic_len] != MAGIC[..magic_len] {
            return Err(RecordingError::NotARecording {
                path: self.path.clone(),
                found,
            });
        }
        if got < header.len() {
            return Err(RecordingError::Truncated {
                path: self.path.clone(),
                offset: 0,
            });
        }
        let version = u32::from_le_bytes([header[8], header[9], header[10], header[11]]);
        if version != FORMAT_VERSION {
            return Err(RecordingError::UnsupportedVersion {
                path: self.path.clone(),
                found: version,
                supported: FORMAT_VERSION,
            });
        }
        self.offset = HEADER_LEN;
        Ok(())
    }

    /// An I/O error while reading the frame at `frame_start`; an unexpected end of the compressed stream
    /// means the file was cut short.
    fn read_error(&self, e: io::Error, frame_start: u64) -> RecordingError {
        if e.kind() == io::ErrorKind::UnexpectedEof {
            RecordingError::Truncated {
                path: self.path.clone(),
                offset: frame_start,
            }
        } else {
            RecordingError::Io {
                path: self.path.clone(),
                action: "read",
                source: e,
            }
        }
    }

    /// Whether the content was zstd-compressed.
    pub fn is_compressed(&self) -> bool {
        self.compressed
    }

    /// Uncompressed bytes consumed so far, header included: the start of the next frame.
    pub fn offset(&self) -> u64 {
        self.offset
    }

    /// The file (or name) being read.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The next frame, `Ok(None)` at a clean end of the recording.
    pub fn read_frame(&mut self) -> Result<Option<ProducerFrame>, RecordingError> {
        if self.done {
            return Ok(None);
        }
        let result = self.read_frame_inner();
        if !matches!(result, Ok(Some(_))) {
            self.done = true;
        }
        result
    }

    fn read_frame_inner(&mut self) -> Result<Option<ProducerFrame>, RecordingError> {
        let start = self.offset;
        let mut prefix = [0u8; MAX_VARINT_LEN];
        let mut prefix_len = 0;
        let header = loop {
            let byte = read_byte(self.source.reader()).map_err(|e| self.read_error(e, start))?;
            let Some(byte) = byte else {
                if prefix_len == 0 {
                    return Ok(None);
                }
                return Err(RecordingError::Truncated {
                    path: self.path.clone(),
                    offset: start,
                });
            };
            prefix[prefix_len] = byte;
            prefix_len += 1;
            match framing::frame_header(&prefix[..prefix_len], self.max_frame) {
                Ok(Some(h)) => break h,
                Ok(None) => {}
                Err(source) => {
                    return Err(RecordingError::Frame {
                        path: self.path.clone(),
                        offset: start,
                        source,
                    });
                }
            }
        };
        // Grow the buffer only as bytes arrive, so a lying length prefix cannot make us allocate the limit.
        self.scratch.clear();
        let want = header.body_len as u64;
        let got = self
            .source
            .reader()
            .take(want)
            .read_to_end(&mut self.scratch)
            .map_err(|e| self.read_error(e, start))?;
        if (got as u64) < want {
            return Err(RecordingError::Truncated {
                path: self.path.clone(),
                offset: start,
            });
        }
        let frame = ProducerFrame::decode(&self.scratch[..]).map_err(|e| RecordingError::Frame {
            path: self.path.clone(),
            offset: start,
            source: FrameError::Malformed(e),
        })?;
        self.offset = start + header.total_len() as u64;
        Ok(Some(frame))
    }
}

impl<R: Read> Iterator for RecordingReader<R> {
    type Item = Result<ProducerFrame, RecordingError>;

    fn next(&mut self) -> Option<Self::Item> {
        self.read_frame().transpose()
    }
}

impl<R: Read> std::iter::FusedIterator for RecordingReader<R> {}

/// Reads until `buf` is full or the input ends; returns the bytes read.
fn read_full(r: &mut (impl Read + ?Sized), buf: &mut [u8]) -> io::Result<usize> {
    let mut n = 0;
    while n < buf.len() {
        match r.read(&mut buf[n..]) {
            Ok(0) => break,
            Ok(k) => n += k,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
            Err(e) => return Err(e),
        }
    }
    Ok(n)
}

fn read_byte(r: &mut dyn BufRead) -> io::Result<Option<u8>> {
    loop {
        match r.fill_buf() {
            Ok([]) => return Ok(None),
            Ok([b, ..]) => {
                let b = *b;
                r.consume(1);
                return Ok(Some(b));
            }
            Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
            Err(e) => return Err(e),
        }
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is the failure report
mod tests {
    use super::*;
    use crate::framing::DEFAULT_MAX_FRAME_BYTES;
    use crate::pb::producer_frame::Body;
    use crate::testdata;

    fn frames() -> Vec<ProducerFrame> {
        let mut v = testdata::producer_frames();
        for seq in 2..6 {
            let batch = testdata::full_batch(seq, 1_400_000_000_000_000_000 + seq as i64 * 1_000_000, 25);
            v.push(ProducerFrame {
                body: Some(Body::Batch(batch)),
            });
        }
        v
    }

    fn read_all(path: &Path) -> Vec<ProducerFrame> {
        RecordingReader::open(path, DEFAULT_MAX_FRAME_BYTES)
            .unwrap()
            .map(Result::unwrap)
            .collect()
    }

    fn in_memory(compression: Compression, frames: &[ProducerFrame]) -> Vec<u8> {
        let mut w = RecordingWriter::new(Vec::new(), compression, "mem").unwrap();
        for f in frames {
            w.write_frame(f).unwrap();
        }
        w.finish().unwrap()
    }

    #[test]
    fn plain_and_compressed_files_round_trip() {
        let dir = tempfile::tempdir().unwrap();
        let frames = frames();
        for name in ["a.glrec", "a.glrec.zst"] {
            let path = dir.path().join(name);
            let mut w = RecordingWriter::create(&path).unwrap();
            for f in &frames {
                w.write_frame(f).unwrap();
            }
            assert_eq!(w.frames_written(), frames.len() as u64);
            let expected_bytes =
                HEADER_LEN + frames.iter().map(|f| framing::frame_len(f) as u64).sum::<u64>();
            assert_eq!(w.bytes_written(), expected_bytes);
            w.finish().unwrap();

            let raw = fs::read(&path).unwrap();
            let compressed = name.ends_with(".zst");
            assert_eq!(raw.starts_with(&ZSTD_MAGIC), compressed, "{name}");
            assert_eq!(raw.starts_with(&MAGIC), !compressed, "{name}");
            let mut r = RecordingReader::open(&path, DEFAULT_MAX_FRAME_BYTES).unwrap();
            assert_eq!(r.is_compressed(), compressed);
            let got: Vec<_> = r.by_ref().map(Result::unwrap).collect();
            assert_eq!(got, frames);
            assert_eq!(r.offset(), expected_bytes);
        }
    }

    #[test]
    fn plain_layout_is_magic_version_then_wire_frames() {
        let frames = frames();
        let bytes = in_memory(Compression::None, &frames);
        let mut expected = b"GLINTREC".to_vec();
        expected.extend_from_slice(&[1, 0, 0, 0]);
        for f in &frames {
            expected.extend_from_slice(&f.encode_length_delimited_to_vec());
        }
        assert_eq!(bytes, expected);
        // The compressed form is exactly that stream, zstd-compressed.
        let z = in_memory(Compression::Zstd(DEFAULT_ZSTD_LEVEL), &frames);
        assert_eq!(zstd::decode_all(&z[..]).unwrap(), expected);
    }

    #[test]
    fn compression_is_sniffed_not_taken_from_the_name() {
        let dir = tempfile::tempdir().unwrap();
        let frames = frames();
        let z_named_plain = dir.path().join("misnamed.glrec");
        fs::write(&z_named_plain, in_memory(Compression::Zstd(1), &frames)).unwrap();
        assert_eq!(read_all(&z_named_plain), frames);
        let plain_named_z = dir.path().join("misnamed.glrec.zst");
        fs::write(&plain_named_z, in_memory(Compression::None, &frames)).unwrap();
        assert_eq!(read_all(&plain_named_z), frames);
    }

    #[test]
    fn dropped_writer_still_ends_its_file() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("dropped.glrec.zst");
        let frames = frames();
        {
            let mut w = RecordingWriter::create(&path).unwrap();
            for f in &frames {
                w.write_frame(f).unwrap();
            }
        }
        assert_eq!(read_all(&path), frames);
    }

    #[test]
    fn rotation_by_size_gives_files_that_replay_alone() {
        let dir = tempfile::tempdir().unwrap();
        let policy = RotationPolicy {
            max_bytes: NonZeroU64::new(2000),
            max_duration_ns: None,
        };
        let mut w = RotatingWriter::new(dir.path(), "ventisca", Compression::Zstd(1), policy).unwrap();
        let hello = testdata::producer_frames().remove(0);
        assert_eq!(w.set_header(hello.clone(), 0).unwrap(), None);
        let mut sent = vec![hello.clone()];
        let mut closed = Vec::new();
        for seq in 1..=30u64 {
            let f = ProducerFrame {
                body: Some(Body::Batch(testdata::full_batch(seq, seq as i64 * 1000, 10))),
            };
            closed.extend(w.write_frame(&f, seq as i64).unwrap());
            sent.push(f);
        }
        let last = w.finish().unwrap().unwrap();
        closed.push(last);

        let mut files: Vec<PathBuf> = fs::read_dir(dir.path())
            .unwrap()
            .map(|e| e.unwrap().path())
            .collect();
        files.sort();
        assert_eq!(files, closed, "returned paths are the files, in order");
        assert!(files.len() >= 3, "expected several files, got {}", files.len());
        assert_eq!(files[0].file_name().unwrap(), "ventisca-000001.glrec.zst");
        let mut replayed = Vec::new();
        for (i, path) in files.iter().enumerate() {
            let got = read_all(path);
            assert_eq!(got[0], hello, "file {i} starts with the header frame");
            assert!(got.len() >= 2);
            // Only the first file holds the header frame as a frame of the stream.
            replayed.extend(if i == 0 { &got[..] } else { &got[1..] }.iter().cloned());
            // Limits are checked before each write: a file passes max_bytes by at most one frame.
            let plain = zstd::decode_all(&fs::read(path).unwrap()[..]).unwrap();
            assert!(plain.len() < 2000 + 1000, "{} bytes", plain.len());
        }
        assert_eq!(replayed, sent);
    }

    #[test]
    fn time_names_follow_the_first_photon_and_never_overwrite() {
        let dir = tempfile::tempdir().unwrap();
        let policy = RotationPolicy {
            max_bytes: None,
            max_duration_ns: NonZeroU64::new(100),
        };
        let batch = |seq, t0| ProducerFrame {
            body: Some(Body::Batch(testdata::full_batch(seq, t0, 2))),
        };
        let stamp: fn(i64) -> String = |ns| format!("T{ns}");
        let hello = testdata::producer_frames().remove(0);
        let mut w = RotatingWriter::new(dir.path(), "v", Compression::None, policy)
            .unwrap()
            .with_time_names(stamp);
        assert_eq!(w.set_header(hello.clone(), 0).unwrap(), None);
        assert!(w.current_path().is_none(), "the header alone opens no file");
        w.write_frame(&batch(1, 5000), 5001).unwrap();
        let closed = w.write_frame(&batch(2, 7000), 5200).unwrap().unwrap();
        assert_eq!(closed.file_name().unwrap(), "v-T5000.glrec");
        assert_eq!(read_all(&closed), vec![hello.clone(), batch(1, 5000)]);
        assert_eq!(w.current_path().unwrap().file_name().unwrap(), "v-T7000.glrec");
        w.finish().unwrap();
        // A second writer with a batch at the same time gets a new name, not the old file.
        let mut w = RotatingWriter::new(dir.path(), "v", Compression::None, policy)
            .unwrap()
            .with_time_names(stamp);
        w.write_frame(&batch(3, 5000), 0).unwrap();
        assert_eq!(
            w.finish().unwrap().unwrap().file_name().unwrap(),
            "v-T5000-2.glrec"
        );
        assert_eq!(read_all(&dir.path().join("v-T5000.glrec")).len(), 2);
    }

    #[test]
    fn rotation_by_time_and_numbering_continues() {
        let dir = tempfile::tempdir().unwrap();
        let policy = RotationPolicy {
            max_bytes: None,
            max_duration_ns: NonZeroU64::new(100),
        };
        let batch = |seq| ProducerFrame {
            body: Some(Body::Batch(testdata::full_batch(seq, 0, 2))),
        };
        let mut w = RotatingWriter::new(dir.path(), "t", Compression::None, policy).unwrap();
        assert_eq!(w.write_frame(&batch(1), 0).unwrap(), None);
        assert_eq!(w.write_frame(&batch(2), 99).unwrap(), None);
        // Time going backwards never rotates.
        assert_eq!(w.write_frame(&batch(3), -50).unwrap(), None);
        let closed = w.write_frame(&batch(4), 100).unwrap().unwrap();
        assert_eq!(closed.file_name().unwrap(), "t-000001.glrec");
        assert_eq!(read_all(&closed), vec![batch(1), batch(2), batch(3)]);
        assert_eq!(w.current_path().unwrap().file_name().unwrap(), "t-000002.glrec");
        drop(w);
        assert_eq!(read_all(&dir.path().join("t-000002.glrec")), vec![batch(4)]);
        // A new writer on the same directory never overwrites: it continues the numbering.
        let mut w = RotatingWriter::new(dir.path(), "t", Compression::None, policy).unwrap();
        w.write_frame(&batch(5), 0).unwrap();
        assert_eq!(
            w.finish().unwrap().unwrap().file_name().unwrap(),
            "t-000003.glrec"
        );
        assert!(matches!(
            RotatingWriter::new(dir.path(), "a/b", Compression::None, policy),
            Err(RecordingError::BadPrefix { .. })
        ));
    }

    #[test]
    fn truncated_recording_reads_up_to_the_cut() {
        let frames = frames();
        let bytes = in_memory(Compression::None, &frames);
        let third_start =
            HEADER_LEN as usize + framing::frame_len(&frames[0]) + framing::frame_len(&frames[1]);
        // Cut inside the third frame's body, then inside its prefix (one byte in).
        for cut in [third_start + 5, third_start + 1] {
            let mut r = RecordingReader::new(&bytes[..cut], "cut.glrec", DEFAULT_MAX_FRAME_BYTES).unwrap();
            assert_eq!(r.next().unwrap().unwrap(), frames[0]);
            assert_eq!(r.next().unwrap().unwrap(), frames[1]);
            let err = r.next().unwrap().unwrap_err();
            assert!(
                matches!(&err, RecordingError::Truncated { offset, .. } if *offset == third_start as u64),
                "{err}"
            );
            assert!(err.to_string().contains(&format!("byte {third_start}")), "{err}");
            assert!(r.next().is_none(), "reader stops after an error");
        }
        // Cut exactly between frames: a clean end.
        let r = RecordingReader::new(&bytes[..third_start], "cut.glrec", DEFAULT_MAX_FRAME_BYTES).unwrap();
        assert_eq!(r.map(Result::unwrap).count(), 2);
        // A cut header.
        let err = RecordingReader::new(&bytes[..10], "h.glrec", DEFAULT_MAX_FRAME_BYTES).unwrap_err();
        assert!(
            matches!(err, RecordingError::Truncated { offset: 0, .. }),
            "{err}"
        );
        // A compressed file cut short (a recorder that died) is truncated too, after the frames of the
        // blocks it flushed.
        let mut w = RecordingWriter::new(Vec::new(), Compression::Zstd(1), "z").unwrap();
        for f in &frames {
            w.write_frame(f).unwrap();
            w.flush().unwrap();
        }
        let z = w.finish().unwrap();
        let flushed_len = z.len() - 10;
        let r = RecordingReader::new(&z[..flushed_len], "cut.glrec.zst", DEFAULT_MAX_FRAME_BYTES).unwrap();
        let results: Vec<_> = r.collect();
        let (last, good) = results.split_last().unwrap();
        assert!(matches!(last, Err(RecordingError::Truncated { .. })), "{last:?}");
        assert!(!good.is_empty());
        for (got, want) in good.iter().zip(&frames) {
            assert_eq!(got.as_ref().unwrap(), want);
        }
    }

    #[test]
    fn wrong_magic_and_version_are_named() {
        let err =
            RecordingReader::new(&b"PK\x03\x04hello world, not a recording"[..], "x.zip", 1000).unwrap_err();
        let RecordingError::NotARecording { found, path } = &err else {
            panic!("{err:?}")
        };
        assert_eq!(found, b"PK\x03\x04hell");
        assert_eq!(path, Path::new("x.zip"));
        assert!(
            err.to_string()
                .starts_with("x.zip: not a glint recording (starts with 50 4b 03 04"),
            "{err}"
        );

        let mut bytes = in_memory(Compression::None, &frames());
        bytes[8..12].copy_from_slice(&7u32.to_le_bytes());
        let err = RecordingReader::new(&bytes[..], "v.glrec", 1000).unwrap_err();
        assert!(
            matches!(
                err,
                RecordingError::UnsupportedVersion {
                    found: 7,
                    supported: 1,
                    ..
                }
            ),
            "{err}"
        );
        assert!(err.to_string().contains("version 7"), "{err}");
    }

    #[test]
    fn frame_errors_carry_offset_and_limit() {
        let frames = frames();
        let bytes = in_memory(Compression::None, &frames);
        // The second frame (a 40-photon batch) is over a 200-byte limit.
        let mut r = RecordingReader::new(&bytes[..], "big.glrec", 200).unwrap();
        assert_eq!(r.next().unwrap().unwrap(), frames[0]);
        let err = r.next().unwrap().unwrap_err();
        let second = HEADER_LEN + framing::frame_len(&frames[0]) as u64;
        assert!(
            matches!(&err, RecordingError::Frame { offset, source: FrameError::TooLarge { max: 200, .. }, .. } if *offset == second),
            "{err}"
        );
        assert!(err.to_string().contains("limit of 200 bytes"), "{err}");

        // A body that is not a ProducerFrame.
        let mut bad = bytes[..HEADER_LEN as usize].to_vec();
        bad.extend_from_slice(&[0x02, 0x0a, 0x05]);
        let err = RecordingReader::new(&bad[..], "bad.glrec", 1000)
            .unwrap()
            .next()
            .unwrap()
            .unwrap_err();
        assert!(
            matches!(
                err,
                RecordingError::Frame {
                    offset: 12,
                    source: FrameError::Malformed(_),
                    ..
                }
            ),
            "{err}"
        );
    }

    /// Accepts `left` bytes, then fails every write.
    struct FailAfter {
        left: usize,
    }

    impl Write for FailAfter {
        fn write(&mut self, buf: &[u8]) -> io::Result<usize> {
            if self.left == 0 {
                return Err(io::Error::other("disk full"));
            }
            let n = buf.len().min(self.left);
            self.left -= n;
            Ok(n)
        }

        fn flush(&mut self) -> io::Result<()> {
            Ok(())
        }
    }

    #[test]
    fn a_failed_write_ends_the_recording() {
        // Frames larger than the writer's buffer reach the failing sink at once.
        let big = ProducerFrame {
            body: Some(Body::Batch(testdata::full_batch(1, 0, 400))),
        };
        assert!(framing::frame_len(&big) > 8192);
        let mut w = RecordingWriter::new(FailAfter { left: 100 }, Compression::None, "full.glrec").unwrap();
        let err = w.write_frame(&big).unwrap_err();
        assert!(err.to_string().contains("disk full"), "{err}");
        let small = testdata::producer_frames().remove(0);
        let err = w.write_frame(&small).unwrap_err();
        assert!(err.to_string().contains("an earlier write failed"), "{err}");
        assert_eq!(w.frames_written(), 0);
    }

    #[test]
    fn writers_and_readers_can_move_to_another_thread() {
        fn is_send<T: Send>(_: &T) -> bool {
            true
        }
        let dir = tempfile::tempdir().unwrap();
        let w =
            RotatingWriter::new(dir.path(), "s", Compression::Zstd(1), RotationPolicy::default()).unwrap();
        let path = dir.path().join("s.glrec.zst");
        RecordingWriter::create(&path).unwrap().finish().unwrap();
        let r = RecordingReader::open(&path, 100).unwrap();
        assert!(is_send(&w) && is_send(&r));
        assert_eq!(r.count(), 0);
    }

    #[test]
    fn missing_file_is_an_io_error_with_the_path() {
        let err = RecordingReader::open("/nonexistent/dir/x.glrec", 1000).unwrap_err();
        assert!(matches!(err, RecordingError::Io { action: "open", .. }));
        assert!(
            err.to_string()
                .starts_with("/nonexistent/dir/x.glrec: cannot open: "),
            "{err}"
        );
    }
}
