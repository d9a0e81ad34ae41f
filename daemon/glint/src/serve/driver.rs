//! The per-instrument driver shared by live runs and replays: validates each producer frame, keeps the
//! per-stream counters, and feeds the synchronous engine. The daemon's engine thread and `glint replay` both
//! call exactly this code, so the same photons give the same findings either way.

use glint_engine::{AssessConfig, Engine, EngineConfig, EngineError, EngineStats, FindingSink};
use glint_wire::pb::{self, producer_frame::Body};
use glint_wire::validate;

use crate::config::InstrumentConfig;

/// Builds the engine's configuration from an instrument's checked config.
pub(crate) fn engine_config(inst: &InstrumentConfig, search_enabled: bool) -> EngineConfig {
    let s = &inst.search;
    let a = &inst.assess;
    let ns = |secs: f64| (secs * 1e9).round() as i64;
    EngineConfig {
        instrument: inst.id.clone(),
        response: inst.response.clone(),
        ladder_s: s.ladder_s.clone(),
        search_radius_deg: s.search_radius_deg,
        far_per_year: s.far_per_year,
        rate_window_s: s.rate_window_s,
        acceptance_tau_s: s.acceptance_tau_s,
        warmup_photons: s.warmup_photons,
        reorder_tolerance_ns: ns(s.reorder_tolerance_s),
        max_clock_jump_ns: ns(s.max_clock_jump_s),
        acceptance_prior_cos_power: s
            .acceptance_prior
            .then_some(inst.spec.background.zenith_cos_power),
        assess: AssessConfig {
            persistence_min_s: a.persistence_min_s,
            persistence_timescale_factor: a.persistence_timescale_factor,
            pre_window_s: a.pre_window_s,
            post_sigma_max: a.post_sigma_max,
            pre_sigma_max: a.pre_sigma_max,
            all_sky_sigma_max: a.all_sky_sigma_max,
            identical_fraction_max: a.identical_fraction_max,
            spread_ratio_max: a.spread_ratio_max,
            spread_sigma_max: a.spread_sigma_max,
            shape_log_ratio_min: a.shape_log_ratio_min,
            shape_p_max: a.shape_p_max,
            max_dead_fraction: a.max_dead_fraction,
            background_spectral_index: inst.spec.background.spectral_index,
            ..AssessConfig::default()
        },
        search_enabled,
        defer_fit: false,
        trials: inst.trials.clone(),
    }
}

/// Why a frame was not taken. The connection (or the replay) goes on; the frame's photons are counted as
/// refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{detail}")]
pub(crate) struct Refused {
    /// Wire code for the producer.
    pub(crate) code: pb::RefusalCode,
    /// What was wrong, naming the column and photon where it applies.
    pub(crate) detail: String,
    /// Sequence number of the refused frame.
    pub(crate) seq: u64,
}

/// Counters of one instrument's stream, summed over connections.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub(crate) struct StreamCounters {
    /// Photon batches taken.
    pub(crate) batches: u64,
    /// Status frames taken.
    pub(crate) statuses: u64,
    /// Photons taken into the engine.
    pub(crate) photons: u64,
    /// Photons in refused batches.
    pub(crate) refused_photons: u64,
    /// Frames refused (validation or clock jump).
    pub(crate) refused_frames: u64,
    /// Frames refused as clock jumps.
    pub(crate) clock_jumps: u64,
    /// Photons dropped because they lie behind the resume point of a restart (searched before it).
    pub(crate) behind_resume: u64,
}

/// One instrument's engine with validation and counters in front of it.
pub(crate) struct InstrumentDriver {
    engine: Engine,
    reorder_tolerance_ns: i64,
    counters: StreamCounters,
    /// Photons before this time were searched before a restart: dropped until the engine's watermark passes it.
    resume_floor: Option<i64>,
}

impl InstrumentDriver {
    /// A driver for one configured instrument; `search_enabled = false` runs validation and reorder only.
    pub(crate) fn new(inst: &InstrumentConfig, search_enabled: bool) -> Result<Self, EngineError> {
        Self::with_config(engine_config(inst, search_enabled))
    }

    /// The live daemon's driver: the search on, and assessments leave the engine with their evaporation fit
    /// pending, for the fit worker to run, so a slow fit never holds up the photons behind it.
    pub(crate) fn live(inst: &InstrumentConfig) -> Result<Self, EngineError> {
        let mut cfg = engine_config(inst, true);
        cfg.defer_fit = true;
        Self::with_config(cfg)
    }

    /// A driver that measures the effective trials (`glint calibrate`): the search at a loose nominal rate,
    /// without the instrument's calibration.
    pub(crate) fn measuring(inst: &InstrumentConfig, loose_far_per_year: f64) -> Result<Self, EngineError> {
        let cfg = engine_config(inst, true);
        Self::with_config(glint_engine::trials::measuring_config(&cfg, loose_far_per_year))
    }

    fn with_config(cfg: EngineConfig) -> Result<Self, EngineError> {
        let reorder_tolerance_ns = cfg.reorder_tolerance_ns;
        Ok(Self {
            engine: Engine::new(cfg)?,
            reorder_tolerance_ns,
            counters: StreamCounters::default(),
            resume_floor: None,
        })
    }

    /// The reorder tolerance the engine uses, nanoseconds.
    pub(crate) fn reorder_tolerance_ns(&self) -> i64 {
        self.reorder_tolerance_ns
    }

    /// Checks a batch without taking it: what ingest uses to answer a producer at once.
    pub(crate) fn check_batch(batch: &pb::PhotonBatch, reorder_tolerance_ns: i64) -> Result<(), Refused> {
        validate::validate_batch(batch, reorder_tolerance_ns).map_err(|e| Refused {
            code: e.refusal_code(),
            detail: e.to_string(),
            seq: batch.seq,
        })
    }

    /// After a restart: photons before `floor_ns` (GPS ns) were searched before it, so they are counted
    /// ([`StreamCounters::behind_resume`]) and dropped here, never handed to the engine again.
    pub(crate) fn resume_after(&mut self, floor_ns: i64) {
        self.resume_floor = Some(floor_ns);
    }

    /// The resume floor still in force, if any: what a resume point must not fall behind.
    pub(crate) fn resume_floor(&self) -> Option<i64> {
        self.resume_floor
    }

    /// The part of `batch` at or after the resume floor: `None` when the batch is wholly behind it (all its
    /// photons counted), a filtered copy when it straddles it, the batch itself otherwise.
    fn past_floor<'b>(
        &mut self,
        batch: &'b pb::PhotonBatch,
    ) -> Option<std::borrow::Cow<'b, pb::PhotonBatch>> {
        use std::borrow::Cow;
        let Some(floor) = self.resume_floor else {
            return Some(Cow::Borrowed(batch));
        };
        if self.engine.watermark_ns().is_some_and(|w| w >= floor) {
            self.resume_floor = None;
            return Some(Cow::Borrowed(batch));
        }
        let behind = batch.time_gps_ns.iter().filter(|&&t| t < floor).count();
        if behind == 0 {
            return Some(Cow::Borrowed(batch));
        }
        self.counters.behind_resume += behind as u64;
        if behind == batch.time_gps_ns.len() {
            return None;
        }
        let keep: Vec<bool> = batch.time_gps_ns.iter().map(|&t| t >= floor).collect();
        fn pick<T: Copy>(col: &[T], keep: &[bool]) -> Vec<T> {
            // Optional columns may be empty: they stay empty.
            if col.len() != keep.len() {
                return col.to_vec();
            }
            col.iter()
                .zip(keep)
                .filter(|(_, k)| **k)
                .map(|(v, _)| *v)
                .collect()
        }
        Some(Cow::Owned(pb::PhotonBatch {
            seq: batch.seq,
            time_gps_ns: pick(&batch.time_gps_ns, &keep),
            ra_deg: pick(&batch.ra_deg, &keep),
            dec_deg: pick(&batch.dec_deg, &keep),
            zenith_deg: pick(&batch.zenith_deg, &keep),
            azimuth_deg: pick(&batch.azimuth_deg, &keep),
            energy_gev: pick(&batch.energy_gev, &keep),
            psf68_deg: pick(&batch.psf68_deg, &keep),
            gammaness: pick(&batch.gammaness, &keep),
            complete_before_gps_ns: batch.complete_before_gps_ns,
        }))
    }

    /// Validates and takes a photon batch.
    pub(crate) fn on_batch(
        &mut self,
        batch: &pb::PhotonBatch,
        out: &mut dyn FindingSink,
    ) -> Result<(), Refused> {
        let n = batch.time_gps_ns.len() as u64;
        let checked = Self::check_batch(batch, self.reorder_tolerance_ns).and_then(|()| {
            let Some(part) = self.past_floor(batch) else {
                return Ok(());
            };
            self.engine
                .push_batch(&part, out)
                .map_err(|e| self.engine_refusal(e, batch.seq))
        });
        match checked {
            Ok(()) => {
                self.counters.batches += 1;
                self.counters.photons += n;
                Ok(())
            }
            Err(r) => {
                self.counters.refused_frames += 1;
                self.counters.refused_photons += n;
                Err(r)
            }
        }
    }

    /// Validates and takes a status frame.
    pub(crate) fn on_status(
        &mut self,
        status: &pb::StreamStatus,
        out: &mut dyn FindingSink,
    ) -> Result<(), Refused> {
        if self
            .resume_floor
            .is_some_and(|f| status.now_gps_ns < f && self.engine.watermark_ns().is_none_or(|w| w < f))
        {
            // Searched before the restart, its dead time included.
            self.counters.statuses += 1;
            return Ok(());
        }
        let checked = validate::validate_status(status)
            .map_err(|e| Refused {
                code: e.refusal_code(),
                detail: e.to_string(),
                seq: status.seq,
            })
            .and_then(|()| {
                self.engine
                    .push_status(status, out)
                    .map_err(|e| self.engine_refusal(e, status.seq))
            });
        match checked {
            Ok(()) => {
                self.counters.statuses += 1;
                Ok(())
            }
            Err(r) => {
                self.counters.refused_frames += 1;
                Err(r)
            }
        }
    }

    /// Takes any producer frame. A `Hello` inside a stream (a recording that spans a reconnect) marks a
    /// stream break: the gap until the next frame is dead time.
    pub(crate) fn on_frame(
        &mut self,
        frame: &pb::ProducerFrame,
        out: &mut dyn FindingSink,
    ) -> Result<(), Refused> {
        match &frame.body {
            Some(Body::Batch(b)) => self.on_batch(b, out),
            Some(Body::Status(s)) => self.on_status(s, out),
            Some(Body::Hello(_)) => {
                self.stream_break();
                Ok(())
            }
            None => {
                self.counters.refused_frames += 1;
                Err(Refused {
                    code: pb::RefusalCode::MalformedFrame,
                    detail: "frame has no body".into(),
                    seq: 0,
                })
            }
        }
    }

    fn engine_refusal(&mut self, e: EngineError, seq: u64) -> Refused {
        let code = if matches!(e, EngineError::ClockJump { .. }) {
            self.counters.clock_jumps += 1;
            pb::RefusalCode::ClockJump
        } else {
            pb::RefusalCode::InvalidBatch
        };
        Refused {
            code,
            detail: e.to_string(),
            seq,
        }
    }

    /// The producer went away: dead time until its next frame.
    pub(crate) fn stream_break(&mut self) {
        self.engine.stream_break();
    }

    /// End of input: flushes the reorder stage and assesses open candidates (as cut short).
    pub(crate) fn finish(&mut self, out: &mut dyn FindingSink) {
        self.engine.finish(out);
    }

    /// The engine's event time, GPS ns.
    pub(crate) fn watermark_ns(&self) -> Option<i64> {
        self.engine.watermark_ns()
    }

    /// Stream counters.
    pub(crate) fn counters(&self) -> StreamCounters {
        self.counters
    }

    /// The engine's own statistics.
    pub(crate) fn engine_stats(&self) -> EngineStats {
        self.engine.stats()
    }

    /// The engine's persistent state (acceptance map).
    pub(crate) fn save_state(&self) -> Vec<u8> {
        self.engine.save_state()
    }

    /// Restores the engine's persistent state.
    pub(crate) fn load_state(&mut self, blob: &[u8]) -> Result<(), EngineError> {
        self.engine.load_state(blob)
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    fn batch(seq: u64, times: &[i64]) -> pb::PhotonBatch {
        let n = times.len();
        pb::PhotonBatch {
            seq,
            time_gps_ns: times.to_vec(),
            ra_deg: vec![10.0; n],
            dec_deg: vec![-20.0; n],
            zenith_deg: vec![20.0; n],
            azimuth_deg: vec![90.0; n],
            energy_gev: vec![500.0; n],
            ..Default::default()
        }
    }

    #[test]
    fn photons_behind_the_resume_floor_are_counted_and_never_reach_the_engine() {
        let cfg = crate::config::Config::embedded_default().unwrap();
        let mut d = InstrumentDriver::new(&cfg.instruments[0], false).unwrap();
        let t0 = 1_400_000_000_000_000_000;
        d.resume_after(t0 + 1_000);
        let mut out = Vec::new();
        // Wholly behind, then straddling, then past the floor.
        d.on_batch(&batch(1, &[t0, t0 + 10, t0 + 20]), &mut out).unwrap();
        d.on_batch(&batch(2, &[t0 + 900, t0 + 1_000, t0 + 1_100]), &mut out)
            .unwrap();
        d.on_batch(&batch(3, &[t0 + 2_000]), &mut out).unwrap();
        assert_eq!(d.counters().behind_resume, 4);
        assert_eq!(d.engine_stats().photons_in, 3);
        assert_eq!(d.engine_stats().late, 0);
        // A status frame from before the floor is taken without touching the engine.
        let status = pb::StreamStatus {
            seq: 4,
            now_gps_ns: t0 + 500,
            ..Default::default()
        };
        d.on_status(&status, &mut out).unwrap();
        assert_eq!(d.counters().statuses, 1);
        assert!(out.is_empty());
    }
}
