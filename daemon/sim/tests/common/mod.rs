//! Shared fixtures for glint-sim's tests: small invented instruments (test fixtures, not check values),
//! scenario text builders and helpers that pull photons out of producer frames.

#![allow(dead_code, clippy::unwrap_used)] // each test binary uses part of the fixtures; tests may unwrap

use std::path::Path;

use glint_sim::{Scenario, Simulator, parse_scenario};
use glint_wire::pb::{ProducerFrame, producer_frame::Body};

/// A ground array at an invented site: 45 deg field, cos^2 acceptance, 200 Hz background.
pub(crate) const GROUND: &str = r#"
[instrument]
id = "test-array"
token = "test-token"
[instrument.site]
kind = "ground"
latitude_deg = -26.3
longitude_deg = -68.4
[instrument.response]
max_zenith_deg = 45.0
energy_min_gev = 300.0
energy_max_gev = 200000.0
clock_precision_ns = 100
[instrument.response.effective_area]
energy_gev = [300.0, 1000.0, 10000.0, 100000.0]
zenith_deg = [0.0, 30.0, 45.0]
area_m2 = [[100.0, 2000.0, 30000.0, 80000.0], [60.0, 1500.0, 25000.0, 70000.0], [20.0, 600.0, 15000.0, 60000.0]]
[instrument.response.psf68_deg]
energy_gev = [300.0, 10000.0]
value = [1.2, 0.2]
[instrument.response.energy_resolution]
energy_gev = [300.0, 10000.0]
value = [0.5, 0.3]
[instrument.background]
rate_hz = 200.0
zenith_cos_power = 2.0
spectral_index = 2.6
"#;

/// A space telescope that does not drift: a source at its pointing stays on axis. Almost no background.
pub(crate) const SPACE_FIXED: &str = r#"
[instrument]
id = "test-space"
token = "test-token"
[instrument.site]
kind = "space"
pointing_ra_deg = 212.0
pointing_dec_deg = -8.5
ra_drift_deg_per_s = 0.0
[instrument.response]
max_zenith_deg = 58.0
energy_min_gev = 0.05
energy_max_gev = 150.0
clock_precision_ns = 500
[instrument.response.effective_area]
energy_gev = [0.05, 0.7, 8.0, 150.0]
zenith_deg = [0.0, 40.0, 58.0]
area_m2 = [[0.12, 0.5, 0.61, 0.49], [0.08, 0.36, 0.44, 0.35], [0.01, 0.07, 0.09, 0.07]]
[instrument.response.psf68_deg]
energy_gev = [0.05, 0.7, 8.0]
value = [4.2, 1.1, 0.2]
[instrument.response.energy_resolution]
energy_gev = [0.05, 150.0]
value = [0.25, 0.14]
[instrument.background]
rate_hz = 0.01
zenith_cos_power = 1.3
spectral_index = 2.3
"#;

/// A `[scenario]` header.
pub(crate) fn header(name: &str, duration_s: f64) -> String {
    format!(
        "[scenario]\nname = \"{name}\"\nstart_utc = \"2026-12-01T02:00:00Z\"\nduration_s = {duration_s}\nseed = 7\n\
         batch_max_photons = 64\nbatch_max_s = 0.01\njitter_s = 0.002\nstatus_period_s = 1.0\n"
    )
}

/// Parses scenario text (panics with the problems listed when it is invalid).
pub(crate) fn scenario(text: &str) -> Scenario {
    match parse_scenario(text, Path::new("."), "test") {
        Ok(s) => s,
        Err(e) => panic!("{e}"),
    }
}

/// Every frame of a run.
pub(crate) fn frames(s: &Scenario, seed: u64) -> Vec<ProducerFrame> {
    Simulator::new(s, seed).unwrap().collect()
}

/// One photon as read back from a batch.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Seen {
    pub(crate) t: i64,
    pub(crate) ra: f64,
    pub(crate) dec: f64,
    pub(crate) zenith: f32,
    pub(crate) azimuth: f32,
    pub(crate) energy: f32,
}

/// All photons of the frames, in the order they were sent.
pub(crate) fn photons(frames: &[ProducerFrame]) -> Vec<Seen> {
    let mut out = Vec::new();
    for f in frames {
        if let Some(Body::Batch(b)) = &f.body {
            for i in 0..b.time_gps_ns.len() {
                out.push(Seen {
                    t: b.time_gps_ns[i],
                    ra: b.ra_deg[i],
                    dec: b.dec_deg[i],
                    zenith: b.zenith_deg[i],
                    azimuth: b.azimuth_deg[i],
                    energy: b.energy_gev[i],
                });
            }
        }
    }
    out
}
