//! glint's statistics and physics, with no I/O and no clock: Poisson tails and significances, critical-count
//! tables for the trigger, confidence limits, Hawking evaporation and the final-burst spectrum, instrument
//! response, and the reach and rate limits that follow from them.

pub mod calibration;
pub mod critical;
pub mod error;
pub mod geometry;
pub mod hawking;
pub mod instrument;
pub mod limits;
pub mod poisson;
pub mod reach;

pub use error::ScienceError;
