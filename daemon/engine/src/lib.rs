//! glint's trigger engine: a synchronous state machine driven by event time. Photons go in through
//! `push`, time moves through `advance`, findings come out into a caller's buffer. No I/O, no clock, no
//! random numbers, no hash-map order in the outputs: live runs and replays give the same findings.

mod background;
mod dead;
mod error;
mod reorder;
mod sky;

pub use error::EngineError;
