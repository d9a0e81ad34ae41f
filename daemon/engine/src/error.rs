//! Errors the engine returns. A refused frame (clock jump, malformed batch) leaves the engine's state exactly
//! as it was, so the caller can report it and carry on with the next frame.

use thiserror::Error;

/// Everything that can go wrong inside the engine.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum EngineError {
    /// The configuration has one or more problems; each names its key.
    #[error("invalid engine configuration: {}", .0.join("; "))]
    Config(Vec<String>),
    /// A frame's time is too far ahead of the stream: refused rather than flushing every window.
    #[error(
        "clock jump in frame seq {seq}: time {time_ns} ns is {ahead_ns} ns ahead of stream time {stream_ns} ns \
         (limit {limit_ns} ns); frame refused"
    )]
    ClockJump {
        /// Sequence number of the refused frame.
        seq: u64,
        /// The offending time, GPS ns.
        time_ns: i64,
        /// Stream time before the frame, GPS ns.
        stream_ns: i64,
        /// How far ahead it was, ns.
        ahead_ns: i64,
        /// The configured `max_clock_jump_ns`.
        limit_ns: i64,
    },
    /// A frame the caller should have refused in validation (columns of unequal length, a value out of
    /// range, a dead interval ending before it starts). Refused whole; the engine is unchanged.
    #[error("invalid frame seq {seq}: {detail}")]
    InvalidFrame {
        /// Sequence number of the frame.
        seq: u64,
        /// What was wrong and where.
        detail: String,
    },
    /// A saved state blob could not be read.
    #[error("cannot load engine state: {0}")]
    State(String),
}
