//! glint's trigger engine: a synchronous state machine driven by event time. Frames go in through
//! [`Engine::push_batch`] and [`Engine::push_status`], findings go to a caller's [`FindingSink`] as they are decided. No I/O, no
//! clock, no random numbers, no hash-map order in the outputs: live runs and replays give the same findings.
//!
//! Pipeline: reorder (watermark) -> sky index + background model -> seeded multi-timescale test
//! (docs/science.md section 4) -> candidates -> assessment (with the evaporation fit in [`fit`]).

mod assess;
mod background;
mod candidate;
mod config;
mod dead;
mod engine;
mod error;
mod finding;
pub mod fit;
mod localise;
mod reorder;
mod shape;
mod sky;
mod stats;
pub mod trials;

pub use config::{AssessConfig, EngineConfig};
pub use engine::{Engine, EngineStats, SECONDS_PER_YEAR, TestTap};
pub use error::EngineError;
pub use finding::{Assessment, Finding, FindingSink, Flash, PhotonRec, Verdict, Withdrawal, flags};
pub use fit::{FitInput, FitJob, FitResult};
