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
}

/// One instrument's engine with validation and counters in front of it.
pub(crate) struct InstrumentDriver {
    engine: Engine,
    reorder_tolerance_ns: i64,
    counters: StreamCounters,
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
        })
    }

    /// Sets the tap that sees every seeded test (`glint tune`).
    pub(crate) fn set_tap(&mut self, tap: Option<Box<dyn glint_engine::TestTap>>) {
        self.engine.set_tap(tap);
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

    /// Validates and takes a photon batch.
    pub(crate) fn on_batch(
        &mut self,
        batch: &pb::PhotonBatch,
        out: &mut dyn FindingSink,
    ) -> Result<(), Refused> {
        let n = batch.time_gps_ns.len() as u64;
        let checked = Self::check_batch(batch, self.reorder_tolerance_ns).and_then(|()| {
            self.engine
                .push_batch(batch, out)
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
