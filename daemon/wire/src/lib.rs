//! glint's wire contract: the `glint.v1` protobuf types generated from `proto/`, the length-delimited framing
//! every socket and recording uses, validation of decoded photon batches, and `.glrec` recording files.
//! No tokio here: framing is pure functions over bytes so the daemon, replay and tests share it.

/// Types generated from `proto/glint/v1/*.proto` (package `glint.v1`).
#[allow(missing_docs, unreachable_pub, clippy::all, rustdoc::broken_intra_doc_links)]
pub mod pb {
    include!(concat!(env!("OUT_DIR"), "/glint.v1.rs"));
}

pub mod framing;
pub mod recording;
pub mod validate;

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is the failure report
mod fuzz_tests;
#[cfg(test)]
mod testdata;

pub use framing::{DEFAULT_MAX_FRAME_BYTES, FrameDecoder, FrameError, decode_frame, encode_frame};
pub use recording::{
    Compression, RecordingError, RecordingReader, RecordingWriter, RotatingWriter, RotationPolicy,
};
pub use validate::{BatchError, HelloError, StatusError, validate_batch, validate_hello, validate_status};

/// Schema version this build reads and writes (`Hello.schema_version`, `Welcome.schema_version`).
pub const SCHEMA_VERSION: u32 = 1;
