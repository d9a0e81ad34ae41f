//! glint's simulated observatories: a scenario (an instrument and its sources) becomes a deterministic stream
//! of producer frames, the same bytes on every run for the same scenario and seed, plus truth records
//! saying what each source put in. The `glint simulate` command writes the frames into a recording.
//!
//! ```no_run
//! # fn main() -> Result<(), glint_sim::SimError> {
//! let scenario = glint_sim::load_scenario(std::path::Path::new("deploy/scenarios/demo.toml"))?;
//! let mut sim = glint_sim::Simulator::new(&scenario, scenario.seed)?;
//! for frame in sim.by_ref() { /* write the frame */ let _ = frame; }
//! for record in sim.truth() { println!("{}", serde_json::to_string(&record).unwrap_or_default()); }
//! # Ok(()) }
//! ```

pub mod draw;
pub mod scenario;
pub mod scramble;
pub mod simulator;
pub mod sky;

use std::path::PathBuf;

pub use scenario::{Problem, Scenario, Source, load_scenario, parse_scenario};
pub use scramble::scramble_times;
pub use simulator::{SimStats, Simulator, TimescaleCount, TruthRecord};

/// The ladder of search timescales, s, for which truth records count each source's photons.
pub const TIMESCALES_S: [f64; 8] = [0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0];

/// Why a scenario could not be loaded or simulated.
#[derive(Debug, thiserror::Error)]
pub enum SimError {
    /// The scenario file could not be read.
    #[error("cannot read {}: {source}", path.display())]
    Io {
        /// The file.
        path: PathBuf,
        /// The operating system's error.
        #[source]
        source: std::io::Error,
    },
    /// The text is not TOML of the scenario's shape.
    #[error("{what} is not a valid scenario file: {message}")]
    Toml {
        /// Which file.
        what: String,
        /// The parser's message, with the line.
        message: String,
    },
    /// The scenario has problems; every one is listed, each naming its key.
    #[error("scenario {scenario} has {} problem(s):\n{}", problems.len(), list(problems))]
    Invalid {
        /// Scenario name.
        scenario: String,
        /// One entry per fault.
        problems: Vec<Problem>,
    },
    /// The instrument response could not be built.
    #[error("instrument response: {0}")]
    Science(#[from] glint_science::ScienceError),
}

fn list(problems: &[Problem]) -> String {
    problems
        .iter()
        .map(|p| format!("  {p}"))
        .collect::<Vec<_>>()
        .join("\n")
}
