//! The engine proper: frames in, event time forward, findings out. It wires the reorder stage, the dead-time
//! ledger, the sky index, the background model, the seeded multi-timescale test (docs/science.md section 4),
//! the candidates and their assessment. Everything happens in event time as released photons and the
//! watermark pass; nothing reads a clock.

use glint_science::calibration::sigma_post_trials;
use glint_science::critical::{CriticalTable, false_crossing_probability, per_seed_bound};
use glint_science::geometry::disc_solid_angle_sr;
use glint_science::poisson::{ln_sf, sigma_from_ln_p};

use crate::assess::{extension_sigma, identical_time_fraction};
use glint_wire::pb::{PhotonBatch, StreamStatus};

use crate::assess::{self, AssessInput};
use crate::background::{AcceptanceMap, AllSky, N_BINS};
use crate::candidate::{CandPhoton, Candidate, LateSigns};
use crate::config::EngineConfig;
use crate::dead::DeadTime;
use crate::error::EngineError;
use crate::finding::{Finding, FindingSink, Flash, PhotonRec, flags as flag};
use crate::localise::{LocPhoton, Localisation, localise};
use crate::reorder::{Photon, Reorder};
use crate::sky::{Disc, SkyIndex, Step, radec_of, unit_vector};
use crate::stats::{count_sigma, finite_sigma};

/// Seconds in a Julian year (365.25 days): the unit of every false-alarm rate.
pub const SECONDS_PER_YEAR: f64 = 31_557_600.0;
/// Critical tables span the backgrounds the current model can produce, widened by this factor each way
/// (a lower b uses the first entry, a higher threshold: conservative; a higher b is computed exactly).
const TABLE_MARGIN: f64 = 2.0;
/// Grid density of the critical tables.
const TABLE_POINTS_PER_DECADE: u32 = 50;
/// The thresholds are rebuilt when the all-sky rate has moved by more than this fraction since the last
/// build, so a test's background is within this of R(t) x dt x a x Omega.
const RATE_REBUILD_FRACTION: f64 = 0.02;
/// ... and at least this often in event time (also picks up the slowly changing acceptance map).
const MODEL_REFRESH_NS: i64 = 60_000_000_000;

/// Counters and gauges, for metrics, the replay summary and the calibration tests. Vectors are indexed by
/// timescale (the ladder's order).
#[derive(Debug, Clone, PartialEq, Default)]
pub struct EngineStats {
    /// Photons taken in (late ones included, refused frames not).
    pub photons_in: u64,
    /// Photons released from the reorder stage in time order.
    pub released: u64,
    /// Photons dropped because they arrived behind the watermark.
    pub late: u64,
    /// Photons waiting in the reorder stage.
    pub pending: u64,
    /// Frames refused as clock jumps.
    pub refused_clock_jump: u64,
    /// Frames refused as malformed (the caller's validation should have caught them).
    pub refused_invalid: u64,
    /// Sequence gaps turned into dead time.
    pub seq_gaps: u64,
    /// Stream breaks reported by the caller.
    pub stream_breaks: u64,
    /// Declared dead intervals that ended behind the watermark (too late to stop tests already made).
    pub dead_declared_late: u64,
    /// Dead time recorded (union of intervals), ns.
    pub dead_ns: i64,
    /// Live time: the span from the stream's first time to the processed time, minus dead time, ns.
    pub live_ns: i64,
    /// Released photons that seeded tests (at least one timescale tested).
    pub seeds_tested: u64,
    /// Released photons not tested because the model was warming up (acceptance map below `warmup_photons`
    /// or less than half the rate window live).
    pub seeds_warmup: u64,
    /// Released photons outside the field of view or in an acceptance bin with no weight.
    pub seeds_outside_fov: u64,
    /// Tests made, per timescale.
    pub tests: Vec<u64>,
    /// Tests skipped because the window touched dead time or reached before the stream began.
    pub skipped_dead: Vec<u64>,
    /// Tests that crossed their threshold, per timescale.
    pub crossings: Vec<u64>,
    /// Predicted false crossings, per timescale: the sum over tests of P(N >= n*(b) - 1 | b)
    /// (docs/science.md section 4).
    pub predicted_false_crossings: Vec<f64>,
    /// Candidates opened (one per flash).
    pub candidates: u64,
    /// Candidates that crossed on each timescale at least once.
    pub candidates_per_timescale: Vec<u64>,
    /// Crossings not reported because `max_open_candidates` were already open.
    pub candidates_suppressed: u64,
    /// Candidates open now.
    pub open_candidates: u64,
    /// Flash findings emitted.
    pub flashes: u64,
    /// Assessment findings emitted.
    pub assessments: u64,
    /// Withdrawal findings emitted.
    pub withdrawals: u64,
    /// All-sky rate the current thresholds were built for, Hz (0 before the first build).
    pub all_sky_rate_hz: f64,
    /// Threshold rebuilds so far.
    pub model_builds: u64,
    /// Decayed weight of the acceptance map (effective photon count).
    pub acceptance_weight: f64,
    /// True once the warm-up rule is met.
    pub warm: bool,
    /// Photons held in the sky index.
    pub held_photons: u64,
    /// Active HEALPix pixels of the sky index.
    pub active_pixels: u64,
    /// HEALPix depth of the sky index.
    pub sky_depth: u8,
    /// Heap bytes held by the engine's photon state (sky index, release-order ring, all-sky times, reorder
    /// buffer, open candidates), from the containers' capacities; fixed tables not included.
    pub held_bytes: u64,
}

/// Sees every seeded test as it is made: the seed's time and direction and, per timescale tested (the
/// ladder's order, possibly fewer than the ladder near dead time), the counts (seed included) and the
/// background. `glint tune` measures p-value distributions and trigger rates at every threshold from one pass
/// with it; the engine's findings do not depend on whether a tap is set.
pub trait TestTap: Send + std::fmt::Debug {
    /// One seed's tests.
    fn seed(&mut self, t_ns: i64, v: [f64; 3], tests: &[(u64, f64)]);
}

/// Derived constants of a configuration.
#[derive(Debug)]
struct Params {
    ladder_ns: Vec<i64>,
    /// The ladder as the sky index's walk compares ages with it.
    steps: Vec<Step>,
    k: usize,
    longest_ns: i64,
    cos_r: f64,
    omega_r: f64,
    far_per_s: f64,
    rate_window_ns: i64,
    pre_ns: i64,
    sky_retention_ns: i64,
    allsky_retention_ns: i64,
    refresh_ns: i64,
}

fn secs_to_ns(s: f64) -> i64 {
    // Inputs are checked to lie within a day or so; the cast cannot saturate in practice.
    (s * 1e9).round() as i64
}

impl Params {
    fn new(cfg: &EngineConfig) -> Self {
        let ladder_ns: Vec<i64> = cfg.ladder_s.iter().map(|&s| secs_to_ns(s).max(1)).collect();
        let longest_ns = ladder_ns.last().copied().unwrap_or(1);
        let r = cfg.search_radius_deg;
        let pre_ns = secs_to_ns(cfg.assess.pre_window_s);
        let rate_window_ns = secs_to_ns(cfg.rate_window_s).max(1);
        Self {
            k: ladder_ns.len(),
            steps: ladder_ns.iter().map(|&dt| Step::new(dt)).collect(),
            cos_r: r.to_radians().cos(),
            omega_r: disc_solid_angle_sr(r),
            far_per_s: cfg.far_per_year / SECONDS_PER_YEAR,
            sky_retention_ns: longest_ns.saturating_add(pre_ns),
            allsky_retention_ns: rate_window_ns
                .saturating_add(longest_ns)
                .max(longest_ns.saturating_mul(2).saturating_add(pre_ns)),
            refresh_ns: MODEL_REFRESH_NS
                .min(secs_to_ns(cfg.acceptance_tau_s / 10.0))
                .max(1),
            ladder_ns,
            longest_ns,
            rate_window_ns,
            pre_ns,
        }
    }
}

/// Thresholds and backgrounds for one snapshot of (R, acceptance map); per (bin, timescale) entries are
/// filled on first use, so the hot path is a table read and an integer compare.
#[derive(Debug)]
struct Model {
    rate_hz: f64,
    table: CriticalTable,
    dens: Vec<f64>,
    /// Critical count per (bin, timescale); 0 = not computed yet, u32::MAX = no acceptance there.
    crit: Vec<u32>,
    b: Vec<f64>,
    pfalse: Vec<f64>,
    taken_at: i64,
}

/// A seed's lowest-p crossing: group index, timescale, counts, background, ln p, and the mask of every
/// timescale that crossed at that seed.
#[derive(Debug, Clone, Copy)]
struct Crossing {
    i: usize,
    k: usize,
    n: u64,
    b: f64,
    ln_p: f64,
    mask: u64,
}

/// A released photon with what the search derives from it.
#[derive(Debug, Clone, Copy)]
struct Released {
    p: Photon,
    v: [f64; 3],
    bin: Option<u16>,
    slot: u32,
}

/// Where the stream is in event time.
#[derive(Debug, Default)]
struct StreamClock {
    start: Option<i64>,
    latest: Option<i64>,
    last_seq: Option<u64>,
    /// Set by `stream_break`: the stream time when the producer went away.
    broken_from: Option<i64>,
    broken: bool,
    processed_to: Option<i64>,
}

/// One instrument's trigger engine.
///
/// # Call order and time
///
/// Feed frames in the order they arrived: [`push_batch`](Self::push_batch) for photons,
/// [`push_status`](Self::push_status) for stream status (time moving on through quiet periods, declared dead
/// time), [`stream_break`](Self::stream_break) when the producer disconnects, and
/// [`finish`](Self::finish) at the end of input. Each call appends findings to the caller's buffer.
///
/// Time only moves forward. The watermark (latest time seen minus the reorder tolerance, or the producer's
/// promise `complete_before_gps_ns` when that is later) never goes back; photons behind it on arrival are
/// counted as late and dropped; a frame more than `max_clock_jump_ns` ahead of the stream is refused with
/// [`EngineError::ClockJump`] and leaves the engine unchanged (after a stream break the next frame may start
/// anywhere: the gap becomes dead time). Everything downstream of the reorder stage sees photons in time
/// order, so the same frames always give the same findings, and batches shuffled within the reorder
/// tolerance, or carrying promises that are kept, give the same findings too (promises change only when).
///
/// [`save_state`](Self::save_state) and [`load_state`](Self::load_state) carry the acceptance map across
/// restarts; load before the first frame.
///
/// # Search, candidates, assessment
///
/// Every released photon seeds one test per timescale (docs/science.md section 4) unless its window touches dead
/// time or reaches before the stream began (counted in `skipped_dead`). No test runs until the warm-up rule
/// is met: the acceptance map holds `warmup_photons` of decayed weight (a configured cos-power prior counts
/// as that much weight; a loaded map meets it at once) and half the rate window was live. Thresholds are
/// rebuilt when the all-sky rate moves by more than 2% or every min(60 s, tau / 10) of event time.
///
/// The first crossing opens a candidate and emits a [`Flash`] at once. A later crossing whose seed lies
/// within max(3 r, r + 3 sigma_PSF) of the candidate's position (sigma at the instrument's lowest energy)
/// and no later than its first crossing plus the longest timescale updates it (its best trigger is the
/// lowest p); one after that but inside the persistence window is only counted (`crossings_after_flash`), unless it is more significant than the best so far and
/// comes within the longest timescale's persistence window (300 s by default) of the first crossing: then it
/// becomes the best trigger and the last crossing. A burst that brightens to a sudden end, as an evaporating
/// black hole does, so has its best trigger at its end however early it first crossed. The candidate stays
/// open for the persistence window, max(`persistence_min_s`, `persistence_timescale_factor` x the best
/// trigger's timescale) after its last crossing, and is assessed when the watermark passes its end.
///
/// # Memory
///
/// Held state grows with (event rate x (longest timescale + pre-window)) for the sky index, with (event rate
/// x max(rate window + longest, 2 longest + pre-window)) for the all-sky times, with the reorder tolerance for
/// pending photons, and with the open candidates (each at most `max_photons`, at most `max_open_candidates`
/// of them); never with uptime.
#[derive(Debug)]
pub struct Engine {
    cfg: EngineConfig,
    p: Params,
    reorder: Reorder,
    dead: DeadTime,
    sky: SkyIndex,
    accept: AcceptanceMap,
    all_sky: AllSky,
    model: Option<Model>,
    rate_ok: bool,
    warm: bool,
    cands: Vec<Candidate>,
    next_id: u64,
    clock: StreamClock,
    stats: EngineStats,
    group: Vec<Released>,
    incoming: Vec<Photon>,
    hist: Vec<u32>,
    flash_buf: Vec<(PhotonRec, [f64; 3])>,
    tap: Option<Box<dyn TestTap>>,
    tap_buf: Vec<(u64, f64)>,
}

impl Engine {
    /// Builds an engine after checking the configuration.
    pub fn new(cfg: EngineConfig) -> Result<Self, EngineError> {
        cfg.check()?;
        let p = Params::new(&cfg);
        let mut accept = AcceptanceMap::new(cfg.response.max_zenith_deg(), cfg.acceptance_tau_s);
        if let Some(power) = cfg.acceptance_prior_cos_power {
            accept.seed_prior(power, cfg.warmup_photons.max(1) as f64);
        }
        let mut sky = SkyIndex::new(cfg.search_radius_deg);
        sky.follow_windows(&p.ladder_ns);
        let stats = EngineStats {
            tests: vec![0; p.k],
            skipped_dead: vec![0; p.k],
            crossings: vec![0; p.k],
            predicted_false_crossings: vec![0.0; p.k],
            candidates_per_timescale: vec![0; p.k],
            sky_depth: sky.depth(),
            ..EngineStats::default()
        };
        Ok(Self {
            hist: vec![0; p.k],
            p,
            reorder: Reorder::default(),
            dead: DeadTime::default(),
            sky,
            accept,
            all_sky: AllSky::default(),
            model: None,
            rate_ok: false,
            warm: false,
            cands: Vec::new(),
            next_id: 1,
            clock: StreamClock::default(),
            stats,
            group: Vec::new(),
            incoming: Vec::new(),
            flash_buf: Vec::new(),
            tap: None,
            tap_buf: Vec::new(),
            cfg,
        })
    }

    /// Counts every seed's disc exactly, without the sub-pixel bound that spares most of those counts; the
    /// findings and counters are the same either way (a test holds the two against each other). Call before
    /// the first frame.
    #[doc(hidden)]
    pub fn count_every_seed_exactly(&mut self) {
        self.sky.stop_following();
    }

    /// Sets (or with None removes) the tap that sees every seeded test. A tap wants every seed's counts,
    /// not only those the sub-pixel bound lets through, so with a tap set every disc is counted exactly.
    pub fn set_tap(&mut self, tap: Option<Box<dyn TestTap>>) {
        self.tap = tap;
    }

    /// The configuration the engine runs with.
    pub fn config(&self) -> &EngineConfig {
        &self.cfg
    }

    /// Current watermark: every photon older than it has been released; None before the first frame.
    pub fn watermark_ns(&self) -> Option<i64> {
        self.reorder.watermark()
    }

    /// Counters and gauges.
    pub fn stats(&self) -> EngineStats {
        let mut s = self.stats.clone();
        s.pending = self.reorder.len() as u64;
        s.dead_ns = self.dead.total_ns();
        s.live_ns = match (self.clock.start, self.clock.processed_to) {
            (Some(a), Some(b)) => b.saturating_sub(a).saturating_sub(s.dead_ns).max(0),
            _ => 0,
        };
        s.open_candidates = self.cands.len() as u64;
        s.all_sky_rate_hz = self.model.as_ref().map_or(0.0, |m| m.rate_hz);
        s.acceptance_weight = self.accept.weight();
        s.warm = self.warm;
        s.held_photons = self.sky.len() as u64;
        s.active_pixels = self.sky.active_pixels() as u64;
        s.held_bytes = (self.sky.heap_bytes()
            + self.all_sky.heap_bytes()
            + self.reorder.heap_bytes()
            + self
                .cands
                .iter()
                .map(|c| c.photons.capacity() * size_of::<CandPhoton>())
                .sum::<usize>()) as u64;
        s
    }

    /// The acceptance map as a versioned, CRC-checked blob.
    pub fn save_state(&self) -> Vec<u8> {
        self.accept.save(&self.cfg.instrument)
    }

    /// Loads an acceptance map saved by [`save_state`](Self::save_state) for the same instrument and field of
    /// view; the warm-up rule is then met at once. A corrupt or foreign blob is an error and changes nothing.
    pub fn load_state(&mut self, blob: &[u8]) -> Result<(), EngineError> {
        self.accept.load(blob, &self.cfg.instrument)?;
        self.model = None;
        Ok(())
    }

    /// Takes a photon batch (already validated by the caller), releases what the watermark allows and runs
    /// the search on it. A promise in the batch (`complete_before_gps_ns`, at most its latest time + 1) moves
    /// the watermark up to it at once.
    pub fn push_batch(&mut self, batch: &PhotonBatch, out: &mut dyn FindingSink) -> Result<(), EngineError> {
        let n = batch.time_gps_ns.len();
        let bad = |detail: String| EngineError::InvalidFrame {
            seq: batch.seq,
            detail,
        };
        let columns = [
            ("ra_deg", batch.ra_deg.len()),
            ("dec_deg", batch.dec_deg.len()),
            ("zenith_deg", batch.zenith_deg.len()),
            ("azimuth_deg", batch.azimuth_deg.len()),
            ("energy_gev", batch.energy_gev.len()),
        ];
        for (name, len) in columns {
            if len != n {
                self.stats.refused_invalid += 1;
                return Err(bad(format!("column {name} has {len} entries, expected {n}")));
            }
        }
        for i in 0..n {
            let (ra, dec) = (batch.ra_deg[i], batch.dec_deg[i]);
            if !ra.is_finite() || !dec.is_finite() || !(-90.0..=90.0).contains(&dec) {
                self.stats.refused_invalid += 1;
                return Err(bad(format!(
                    "photon {i}: direction ({ra}, {dec}) is not a valid ICRS position"
                )));
            }
            let (e, z, a) = (batch.energy_gev[i], batch.zenith_deg[i], batch.azimuth_deg[i]);
            if !(e.is_finite() && e > 0.0 && z.is_finite() && a.is_finite()) {
                self.stats.refused_invalid += 1;
                return Err(bad(format!(
                    "photon {i}: energy {e} GeV, zenith {z} deg, azimuth {a} deg must be finite, energy > 0"
                )));
            }
        }
        let promise = batch.complete_before_gps_ns;
        let newest = batch.time_gps_ns.iter().max();
        if promise != 0 && (promise < 0 || newest.is_none_or(|&t| promise > t.saturating_add(1))) {
            self.stats.refused_invalid += 1;
            return Err(bad(format!(
                "complete_before_gps_ns = {promise} must be 0 or at most the latest photon time + 1 ({})",
                newest.map_or_else(|| "no photons".to_owned(), |t| t.saturating_add(1).to_string())
            )));
        }
        let Some((&tmin, &tmax)) = batch.time_gps_ns.iter().min().zip(newest) else {
            if self.clock.latest.is_some() && !self.clock.broken {
                self.note_seq(batch.seq, None);
            }
            return Ok(());
        };
        self.check_clock(batch.seq, tmax)?;
        self.begin_frame(batch.seq, tmin);
        let mut incoming = std::mem::take(&mut self.incoming);
        incoming.clear();
        for i in 0..n {
            let t = batch.time_gps_ns[i];
            if self.reorder.is_late(t) {
                self.stats.late += 1;
                continue;
            }
            incoming.push(Photon {
                t,
                ra: batch.ra_deg[i],
                dec: batch.dec_deg[i],
                energy: batch.energy_gev[i],
                zenith: batch.zenith_deg[i],
                azimuth: batch.azimuth_deg[i],
            });
        }
        self.reorder.push_all(&mut incoming);
        self.incoming = incoming;
        self.stats.photons_in += n as u64;
        self.move_time(tmax);
        if promise > 0 {
            self.reorder.advance_watermark(promise);
        }
        self.advance(out);
        Ok(())
    }

    /// Takes a stream status: time moves on to `now - tolerance` and declared dead intervals are recorded.
    pub fn push_status(
        &mut self,
        status: &StreamStatus,
        out: &mut dyn FindingSink,
    ) -> Result<(), EngineError> {
        let mut newest = status.now_gps_ns;
        for (i, d) in status.dead.iter().enumerate() {
            if d.end_gps_ns < d.start_gps_ns {
                self.stats.refused_invalid += 1;
                return Err(EngineError::InvalidFrame {
                    seq: status.seq,
                    detail: format!(
                        "dead interval {i} ends ({}) before it starts ({})",
                        d.end_gps_ns, d.start_gps_ns
                    ),
                });
            }
            newest = newest.max(d.end_gps_ns);
        }
        self.check_clock(status.seq, newest)?;
        self.begin_frame(status.seq, status.now_gps_ns);
        let w = self.reorder.watermark();
        for d in &status.dead {
            if w.is_some_and(|w| d.end_gps_ns <= w) {
                self.stats.dead_declared_late += 1;
            }
            self.add_dead(d.start_gps_ns, d.end_gps_ns);
        }
        self.move_time(status.now_gps_ns);
        self.advance(out);
        Ok(())
    }

    /// The producer went away: the time until the next frame is dead, the next frame may start a new sequence
    /// and is not checked for a clock jump.
    pub fn stream_break(&mut self) {
        if let Some(latest) = self.clock.latest {
            self.clock.broken_from = Some(latest);
        }
        self.clock.broken = true;
        self.stats.stream_breaks += 1;
    }

    /// End of input: releases every pending photon, assesses the candidates whose persistence window the data
    /// covered, and assesses the rest as undecided (cut short).
    pub fn finish(&mut self, out: &mut dyn FindingSink) {
        let Some(latest) = self.clock.latest else { return };
        self.reorder.advance_watermark(latest.saturating_add(1));
        self.advance(out);
        let cands = std::mem::take(&mut self.cands);
        for c in cands {
            let close = self.close_of(&c);
            let cut = close > latest;
            self.emit_assessment(c, close.min(latest), cut, out);
        }
    }

    fn check_clock(&mut self, seq: u64, t: i64) -> Result<(), EngineError> {
        if let Some(latest) = self.clock.latest {
            let limit = self.cfg.max_clock_jump_ns;
            if !self.clock.broken && t.saturating_sub(latest) > limit {
                self.stats.refused_clock_jump += 1;
                return Err(EngineError::ClockJump {
                    seq,
                    time_ns: t,
                    stream_ns: latest,
                    ahead_ns: t.saturating_sub(latest),
                    limit_ns: limit,
                });
            }
        }
        Ok(())
    }

    /// Stream start, stream breaks and sequence gaps, for a frame whose first time is `first_t`.
    fn begin_frame(&mut self, seq: u64, first_t: i64) {
        if self.clock.start.is_none() {
            self.clock.start = Some(first_t);
        }
        if self.clock.broken {
            self.clock.broken = false;
            self.clock.last_seq = None;
            if let Some(from) = self.clock.broken_from.take() {
                self.add_dead(from.saturating_add(1), first_t);
            }
        }
        self.note_seq(seq, Some(first_t));
    }

    fn note_seq(&mut self, seq: u64, first_t: Option<i64>) {
        if let (Some(last), Some(latest)) = (self.clock.last_seq, self.clock.latest) {
            if seq > last.saturating_add(1) {
                self.stats.seq_gaps += 1;
                if let Some(t) = first_t {
                    self.add_dead(latest.saturating_add(1), t);
                }
            }
        }
        self.clock.last_seq = Some(seq);
    }

    fn add_dead(&mut self, start: i64, end: i64) {
        let start = self.clock.start.map_or(start, |s| start.max(s));
        self.dead.add(start, end);
    }

    fn move_time(&mut self, t: i64) {
        let latest = self.clock.latest.map_or(t, |l| l.max(t));
        self.clock.latest = Some(latest);
        self.reorder
            .advance_watermark(latest.saturating_sub(self.cfg.reorder_tolerance_ns));
    }

    /// Releases every photon behind the watermark, group by group of equal time, assessing candidates whose
    /// persistence window ended before each group, then those that ended before the watermark.
    fn advance(&mut self, out: &mut dyn FindingSink) {
        let Some(w) = self.reorder.watermark() else { return };
        while let Some(t) = self.reorder.next_time().filter(|&t| t < w) {
            self.assess_due(t, out);
            self.group.clear();
            while let Some(p) = self.reorder.pop_before(t.saturating_add(1)) {
                self.group.push(Released {
                    p,
                    v: [0.0; 3],
                    bin: None,
                    slot: 0,
                });
            }
            self.release_group(t, out);
        }
        self.assess_due(w, out);
        let processed = self.clock.processed_to.map_or(w, |p| p.max(w));
        self.clock.processed_to = Some(processed);
    }

    fn release_group(&mut self, t: i64, out: &mut dyn FindingSink) {
        self.stats.released += self.group.len() as u64;
        self.clock.processed_to = Some(self.clock.processed_to.map_or(t, |p| p.max(t)));
        if !self.cfg.search_enabled {
            return;
        }
        for i in 0..self.group.len() {
            let p = self.group[i].p;
            let v = unit_vector(p.ra, p.dec);
            let bin = self.accept.bin(p.zenith, p.azimuth);
            self.all_sky.push(t);
            if let Some(b) = bin {
                self.accept.add(t, b);
            }
            let slot = self.sky.insert(&p, v);
            self.group[i] = Released { p, v, bin, slot };
            for c in &mut self.cands {
                if dot(v, c.pos0) >= self.p.cos_r {
                    if c.photons.len() < self.cfg.assess.max_photons {
                        c.photons.push(CandPhoton { t, energy: p.energy });
                    } else {
                        c.capped = true;
                    }
                }
            }
        }
        self.sky.advance_windows(t);
        self.sky.evict_before(t.saturating_sub(self.p.sky_retention_ns));
        self.all_sky
            .evict_before(t.saturating_sub(self.p.allsky_retention_ns));
        let oldest_needed = self
            .cands
            .iter()
            .map(|c| c.span_start.saturating_sub(self.p.pre_ns).min(c.t_last))
            .min()
            .unwrap_or(i64::MAX)
            .min(t.saturating_sub(self.p.allsky_retention_ns));
        self.dead.prune_before(oldest_needed);
        self.refresh_model(t);
        for i in 0..self.group.len() {
            self.seed(i, out);
        }
    }

    fn refresh_model(&mut self, t: i64) {
        let start = self.clock.start.unwrap_or(t);
        let rate = self.all_sky.rate_hz(t, self.p.rate_window_ns, &self.dead, start);
        self.rate_ok = rate.is_some();
        if !self.warm && (self.accept.loaded() || self.accept.weight() >= self.cfg.warmup_photons as f64) {
            self.warm = true;
        }
        let Some(r) = rate else { return };
        if !self.warm {
            return;
        }
        let stale = match &self.model {
            None => true,
            Some(m) => {
                (r / m.rate_hz - 1.0).abs() > RATE_REBUILD_FRACTION
                    || t.saturating_sub(m.taken_at) >= self.p.refresh_ns
            }
        };
        if !stale {
            return;
        }
        let mut dens = self
            .model
            .as_mut()
            .map(|m| std::mem::take(&mut m.dens))
            .unwrap_or_default();
        self.accept.densities(&mut dens);
        // The table only needs to cover r x dt x a x Omega over the ladder and the bins with acceptance.
        let (a_min, a_max) = dens
            .iter()
            .filter(|&&a| a > 0.0)
            .fold((f64::INFINITY, 0.0f64), |(lo, hi), &a| (lo.min(a), hi.max(a)));
        let scale = r * self.p.omega_r;
        let (b_lo, b_hi) = if a_max > 0.0 {
            let lo = (scale * self.cfg.ladder_s[0] * a_min / TABLE_MARGIN).clamp(1e-30, 1.0);
            let hi = (scale * self.cfg.ladder_s[self.p.k - 1] * a_max * TABLE_MARGIN).clamp(lo * 10.0, 1e9);
            (lo, hi)
        } else {
            (1e-6, 1.0)
        };
        let built = per_seed_bound(self.p.far_per_s, self.p.k, r)
            .map(|nominal| {
                self.cfg
                    .trials
                    .as_ref()
                    .map_or(nominal, |c| c.bound(self.p.far_per_s, self.p.k, r))
            })
            .and_then(|bound| CriticalTable::new(bound, b_lo, b_hi, TABLE_POINTS_PER_DECADE));
        match built {
            Ok(table) => {
                let n = N_BINS * self.p.k;
                self.model = Some(Model {
                    rate_hz: r,
                    table,
                    dens,
                    crit: vec![0; n],
                    b: vec![0.0; n],
                    pfalse: vec![0.0; n],
                    taken_at: t,
                });
                self.stats.model_builds += 1;
            }
            Err(_) => {
                if let Some(m) = self.model.as_mut() {
                    m.dens = dens;
                }
                self.rate_ok = false;
            }
        }
    }

    /// The seeded test of one released photon on every timescale (docs/science.md section 4).
    fn seed(&mut self, i: usize, out: &mut dyn FindingSink) {
        let g = self.group[i];
        let k_all = self.p.k;
        let Some(bin) = g.bin else {
            self.stats.seeds_outside_fov += 1;
            return;
        };
        let model = match &self.model {
            Some(m) if self.rate_ok && self.warm => m,
            _ => {
                self.stats.seeds_warmup += 1;
                return;
            }
        };
        if model.dens[usize::from(bin)] <= 0.0 {
            self.stats.seeds_outside_fov += 1;
            return;
        }
        // Windows (t - dt, t] may not touch dead time nor reach before the stream began.
        let t = g.p.t;
        let start = self.clock.start.unwrap_or(t);
        let horizon = self.dead.last_end_at_or_before(t).map_or(start, |e| e.max(start));
        let kmax = if horizon > t {
            0
        } else {
            let avail = t - horizon;
            self.p.ladder_ns.partition_point(|&d| d <= avail)
        };
        for k in kmax..k_all {
            self.stats.skipped_dead[k] += 1;
        }
        if kmax == 0 {
            return;
        }
        self.stats.seeds_tested += 1;
        let Some(model) = self.model.as_mut() else { return };
        let base = usize::from(bin) * k_all;
        self.tap_buf.clear();
        // Thresholds first: they do not depend on the counts.
        for k in 0..kmax {
            let idx = base + k;
            if model.crit[idx] == 0 {
                let a = model.dens[usize::from(bin)];
                let b = model.rate_hz * self.cfg.ladder_s[k] * a * self.p.omega_r;
                let c = model.table.critical(b);
                model.crit[idx] = c.max(1);
                model.b[idx] = b;
                model.pfalse[idx] = false_crossing_probability(b, c);
            }
        }
        // The exact count is needed only where the sub-pixel bound reaches a critical count: elsewhere no
        // timescale can cross, and the zero counts below cross none either (every critical count is >= 1).
        self.hist.iter_mut().for_each(|h| *h = 0);
        if self.tap.is_some() || self.sky.may_cross(g.slot, g.v, &model.crit[base..base + kmax]) {
            self.sky.count_disc(
                g.slot,
                &Disc::new(g.v, self.p.cos_r),
                t,
                &self.p.steps[..kmax],
                &mut self.hist,
            );
        }
        let mut n = 0u64;
        let mut mask = 0u64;
        let mut best: Option<(usize, u64, f64, f64)> = None;
        for k in 0..kmax {
            n += u64::from(self.hist[k]);
            let idx = base + k;
            let crit = model.crit[idx];
            if self.tap.is_some() {
                self.tap_buf.push((n, model.b[idx]));
            }
            self.stats.tests[k] += 1;
            self.stats.predicted_false_crossings[k] += model.pfalse[idx];
            if n >= u64::from(crit) {
                self.stats.crossings[k] += 1;
                mask |= 1 << k;
                let b = model.b[idx];
                let ln_p = ln_sf(n - 1, b);
                if best.is_none_or(|(_, _, _, l)| ln_p < l) {
                    best = Some((k, n, b, ln_p));
                }
            }
        }
        if let Some(tap) = self.tap.as_mut() {
            tap.seed(t, g.v, &self.tap_buf);
        }
        if let Some((k, n, b, ln_p)) = best {
            self.on_crossing(
                Crossing {
                    i,
                    k,
                    n,
                    b,
                    ln_p,
                    mask,
                },
                out,
            );
        }
    }

    fn on_crossing(&mut self, x: Crossing, out: &mut dyn FindingSink) {
        let Crossing {
            i,
            k,
            n,
            b,
            ln_p,
            mask,
        } = x;
        let g = self.group[i];
        let t = g.p.t;
        let dt = self.p.ladder_ns[k];
        let found = self.cands.iter().position(|c| {
            dot(g.v, c.pos0) >= c.cos_merge && t <= c.t_last.saturating_add(self.persistence_ns(c))
        });
        if let Some(ci) = found {
            let c = &self.cands[ci];
            // A burst that brightens to its end (an evaporating black hole's light curve rises as
            // tau^-1/2 until it stops dead) keeps giving more significant crossings after the span limit:
            // they move the best trigger, so the flash ends where the burst does.
            let brighter = ln_p < c.best.ln_p && t <= c.extend_limit;
            if t > c.span_limit && !brighter {
                self.cands[ci].late_crossings += 1;
                return;
            }
            let released = self.all_sky.released();
            let new_bits = mask & !self.cands[ci].mask;
            for kk in 0..self.p.k {
                if new_bits & (1 << kk) != 0 {
                    self.stats.candidates_per_timescale[kk] += 1;
                }
            }
            let start = t.saturating_sub(dt);
            let c = &mut self.cands[ci];
            c.mask |= mask;
            c.t_last = c.t_last.max(t);
            c.span_start = c.span_start.min(start);
            if ln_p < c.best.ln_p {
                let id = c.id;
                let mut flash = self.build_flash(i, k, n, b, ln_p, id);
                let (all_sky, expected) = self.flash_signs(&mut flash, g.bin);
                let pre_all_sky = self.pre_all_sky(pre_end(&flash));
                let c = &mut self.cands[ci];
                c.best = flash;
                c.best_all_sky = all_sky;
                c.best_all_sky_expected = expected;
                c.released_at_best = released;
                c.pre_all_sky = pre_all_sky;
            }
            return;
        }
        if self.cands.len() >= self.cfg.assess.max_open_candidates {
            self.stats.candidates_suppressed += 1;
            return;
        }
        let id = self.next_id;
        self.next_id += 1;
        let mut flash = self.build_flash(i, k, n, b, ln_p, id);
        // The instrumental signs need no later data: they go out on the flash itself, so a follow-up acting
        // on it knows at once. One walk of a cone a few search radii wide over the flash window.
        let (all_sky, expected) = self.flash_signs(&mut flash, g.bin);
        // Out first: what follows (the candidate's photons back through the pre-window) is for the
        // assessment, and walking it would delay the alert.
        out.emit(Finding::Flash(flash.clone()));
        let pos0 = unit_vector(flash.ra_deg, flash.dec_deg);
        // The seeds scatter by the PSF at their own energies, the widest at the lowest: with the flash's
        // median energy instead, a bright soft source's low-energy seeds cross outside the radius and split
        // it into several candidates.
        let resp = &self.cfg.response;
        let sigma = resp.psf_sigma_deg(resp.energy_min_gev());
        let r = self.cfg.search_radius_deg;
        let merge_deg = (3.0 * r).max(r + 3.0 * sigma).min(90.0);
        let start = t.saturating_sub(dt);
        let mut photons = Vec::new();
        let mut capped = false;
        let from = start
            .saturating_sub(self.p.longest_ns)
            .saturating_sub(self.p.pre_ns);
        let cos_r = self.p.cos_r;
        let max = self.cfg.assess.max_photons;
        self.sky.for_each_in_cone(
            flash.ra_deg,
            flash.dec_deg,
            self.cfg.search_radius_deg * 1.01,
            from,
            |h, c| {
                if dot(h.v, pos0) >= cos_r {
                    photons.push((
                        h.t,
                        c.ra.to_bits(),
                        c.dec.to_bits(),
                        CandPhoton {
                            t: h.t,
                            energy: c.energy,
                        },
                    ));
                }
            },
        );
        photons.sort_by_key(|x| (x.0, x.1, x.2));
        if photons.len() > max {
            // Keep the newest: the flash and what follows matter more than the far pre-window.
            photons.drain(..photons.len() - max);
            capped = true;
        }
        let photons: Vec<CandPhoton> = photons.into_iter().map(|x| x.3).collect();
        for kk in 0..self.p.k {
            if mask & (1 << kk) != 0 {
                self.stats.candidates_per_timescale[kk] += 1;
            }
        }
        self.stats.candidates += 1;
        self.stats.flashes += 1;
        self.cands.push(Candidate {
            id,
            pos0,
            cos_merge: merge_deg.to_radians().cos(),
            bin0: g.bin.unwrap_or(0),
            zenith0: f64::from(g.p.zenith),
            span_limit: t.saturating_add(self.p.longest_ns),
            extend_limit: t.saturating_add(self.longest_persistence_ns()),
            span_start: start,
            t_last: t,
            mask,
            pre_all_sky: self.pre_all_sky(pre_end(&flash)),
            released_at_best: self.all_sky.released(),
            best: flash,
            best_all_sky: all_sky,
            best_all_sky_expected: expected,
            photons,
            capped,
            late_crossings: 0,
            late_signs: None,
        });
    }

    /// All-sky photons in (end - pre, end].
    fn pre_all_sky(&self, start: i64) -> u64 {
        self.all_sky.count(start.saturating_sub(self.p.pre_ns), start)
    }

    /// The instrumental signs of a flash, set on it (`flags` and the numbers behind them): an all-sky jump,
    /// identical timestamps, and a spread wider than the PSF. Returns the all-sky photons in the flash window
    /// with the flash's own source left out and their expectation from the rate over the rate window just
    /// before it (outside the flash, so a jump is not diluted). The source is left out with a cone of
    /// max(3 r, r + 4 sigma_PSF) at the instrument's lowest energy: a bright soft source puts most of its
    /// photons outside the search disc, and its PSF's wings must not look like an all-sky jump (4 sigma holds
    /// all but exp(-8) of a Gaussian PSF's photons). The photons of that cone are also those the spread test
    /// reads: a cluster wider than the PSF puts most of them outside the search disc.
    fn flash_signs(&self, f: &mut Flash, bin: Option<u16>) -> (u64, f64) {
        let resp = &self.cfg.response;
        let r = self.cfg.search_radius_deg;
        let own_deg = (3.0 * r)
            .max(r + 4.0 * resp.psf_sigma_deg(resp.energy_min_gev()))
            .min(90.0);
        let (centre, cos_own) = (unit_vector(f.ra_deg, f.dec_deg), own_deg.to_radians().cos());
        let mut cone: Vec<(f64, f64)> = Vec::new();
        let end = f.end_ns;
        self.sky.for_each_in_cone(
            f.ra_deg,
            f.dec_deg,
            own_deg,
            f.start_ns.saturating_add(1),
            |h, c| {
                let cos_d = dot(h.v, centre);
                if h.t <= end && cos_d >= cos_own {
                    cone.push((cos_d.clamp(-1.0, 1.0).acos().to_degrees(), f64::from(c.energy)));
                }
            },
        );
        let own = cone.len() as u64;
        let counts = self.all_sky.count(f.start_ns, f.end_ns).saturating_sub(own);
        let start = self.clock.start.unwrap_or(f.start_ns);
        let live = |a: i64, b: i64| {
            let a = a.max(start);
            (b.saturating_sub(a) - self.dead.overlap(a.saturating_add(1), b.saturating_add(1))).max(0)
        };
        let before_from = f.start_ns.saturating_sub(self.p.rate_window_ns);
        let before_live = live(before_from, f.start_ns);
        let rate = if before_live >= self.p.rate_window_ns / 2 && before_live > 0 {
            self.all_sky.count(before_from.max(start), f.start_ns) as f64 / (before_live as f64 * 1e-9)
        } else {
            self.model.as_ref().map_or(0.0, |m| m.rate_hz)
        };
        let a = self
            .model
            .as_ref()
            .zip(bin)
            .map_or(0.0, |(m, b)| m.dens[usize::from(b)]);
        let own_fraction = (a * disc_solid_angle_sr(own_deg)).clamp(0.0, 1.0);
        let window_s = live(f.start_ns, f.end_ns) as f64 * 1e-9;
        let expected = rate * window_s * (1.0 - own_fraction);

        let a_cfg = &self.cfg.assess;
        f.all_sky_sigma = if expected > 0.0 {
            count_sigma(counts, expected).1
        } else {
            0.0
        };
        let times: Vec<i64> = f.photons.iter().map(|p| p.time_ns).collect();
        f.identical_time_fraction = identical_time_fraction(&times, resp.clock_precision_ns());
        let cone_background = self.model.as_ref().map_or(0.0, |m| m.rate_hz) * window_s * own_fraction;
        f.spread_sigma = extension_sigma(&cone, cone_background, own_deg, resp);
        f.flags.clear();
        if f.all_sky_sigma > a_cfg.all_sky_sigma_max {
            f.flags.push(flag::ALL_SKY_JUMP.into());
        }
        if f.identical_time_fraction > a_cfg.identical_fraction_max {
            f.flags.push(flag::IDENTICAL_TIMESTAMPS.into());
        }
        if f.spread_sigma > a_cfg.spread_sigma_max {
            f.flags.push(flag::WIDE_SPREAD.into());
        }
        (counts, expected)
    }

    fn build_flash(&mut self, i: usize, k: usize, n: u64, b: f64, ln_p: f64, id: u64) -> Flash {
        let g = self.group[i];
        let t = g.p.t;
        let dt = self.p.ladder_ns[k];
        let mut buf = std::mem::take(&mut self.flash_buf);
        buf.clear();
        let mut slots = [0u32; 9];
        let ns = self.sky.neighbourhood(g.slot, g.v, &mut slots);
        for &s in &slots[..ns] {
            for h in self.sky.bucket(s).held.iter().rev() {
                if t - h.t >= dt {
                    break;
                }
                if dot(h.v, g.v) >= self.p.cos_r {
                    let Some(c) = self.sky.cold_of(s, &h) else {
                        continue;
                    };
                    let p = c.photon(h.t);
                    buf.push((
                        PhotonRec {
                            time_ns: p.t,
                            ra_deg: p.ra,
                            dec_deg: p.dec,
                            energy_gev: f64::from(p.energy),
                            zenith_deg: f64::from(p.zenith),
                            azimuth_deg: f64::from(p.azimuth),
                        },
                        h.v,
                    ));
                }
            }
        }
        buf.sort_by(|a, b| {
            let ka = (
                a.0.time_ns,
                a.0.ra_deg.to_bits(),
                a.0.dec_deg.to_bits(),
                a.0.energy_gev.to_bits(),
            );
            let kb = (
                b.0.time_ns,
                b.0.ra_deg.to_bits(),
                b.0.dec_deg.to_bits(),
                b.0.energy_gev.to_bits(),
            );
            ka.cmp(&kb)
        });
        let mut sum = [0.0f64; 3];
        for (_, v) in &buf {
            sum = [sum[0] + v[0], sum[1] + v[1], sum[2] + v[2]];
        }
        let loc = self.localise_window(normalise(sum), b, t.saturating_sub(dt), t);
        let (ra, dec) = radec_of(loc.centre);
        let resp = &self.cfg.response;
        let rate = self.model.as_ref().map_or(0.0, |m| m.rate_hz);
        let ln_trials = (self.p.k as f64 * rate * SECONDS_PER_YEAR).ln();
        let fraction = self.cfg.trials.as_ref().map_or(1.0, |c| c.fraction(ln_p));
        let far = (ln_p.min(0.0) + ln_trials).exp() * fraction;
        let far = if far.is_finite() { far } else { 0.0 };
        let photons: Vec<PhotonRec> = buf.iter().map(|x| x.0).collect();
        self.flash_buf = buf;
        Flash {
            candidate: id,
            start_ns: t.saturating_sub(dt),
            end_ns: t,
            ra_deg: ra,
            dec_deg: dec,
            error_radius_deg: loc.radius90_deg.hypot(resp.systematic_deg()),
            search_radius_deg: self.cfg.search_radius_deg,
            timescale_s: self.cfg.ladder_s[k],
            counts: n,
            background: b,
            p_value: ln_p.exp(),
            ln_p,
            sigma: finite_sigma(sigma_from_ln_p(ln_p)),
            flags: Vec::new(),
            all_sky_sigma: 0.0,
            identical_time_fraction: 0.0,
            spread_sigma: 0.0,
            far_per_year: if far.is_finite() { far } else { 0.0 },
            sigma_post_trials: finite_sigma(sigma_post_trials(far)),
            zenith_deg: f64::from(g.p.zenith),
            photons,
        }
    }

    /// The flash's position and 90% region by the mixture likelihood (`localise.rs`, docs/science.md section
    /// 4) over the window's photons within twice the search radius of the disc photons' mean, the background
    /// density the disc's `b` over its solid angle.
    fn localise_window(&self, start: [f64; 3], b: f64, after: i64, until: i64) -> Localisation {
        let region = 2.0 * self.cfg.search_radius_deg;
        let (ra, dec) = radec_of(start);
        let resp = &self.cfg.response;
        let mut ph = Vec::new();
        self.sky
            .for_each_in_cone(ra, dec, region, after.saturating_add(1), |h, c| {
                if h.t <= until {
                    ph.push(LocPhoton {
                        v: h.v,
                        sigma_rad: resp.psf_sigma_deg(f64::from(c.energy)).to_radians(),
                    });
                }
            });
        localise(&ph, start, region, b / self.p.omega_r)
    }

    fn persistence_ns(&self, c: &Candidate) -> i64 {
        let a = &self.cfg.assess;
        secs_to_ns(
            a.persistence_min_s
                .max(a.persistence_timescale_factor * c.best.timescale_s),
        )
    }

    /// The persistence window of the longest timescale: how long after its first crossing a candidate may
    /// still take a more significant crossing.
    fn longest_persistence_ns(&self) -> i64 {
        let a = &self.cfg.assess;
        let longest_s = self.cfg.ladder_s.last().copied().unwrap_or(0.0);
        secs_to_ns(
            a.persistence_min_s
                .max(a.persistence_timescale_factor * longest_s),
        )
    }

    fn close_of(&self, c: &Candidate) -> i64 {
        c.t_last.saturating_add(self.persistence_ns(c))
    }

    /// Re-measures the instrumental signs of each open candidate's best flash once photons up to its window's
    /// end plus its timescale are released (before `t`): a cluster that crossed early shows its full spread
    /// there. The flash has long gone out; the assessment carries what this finds (`late_instrumental`). The
    /// sky index still holds the photons: the longest timescale twice is within its retention.
    fn late_signs_due(&mut self, t: i64) {
        for i in 0..self.cands.len() {
            let c = &self.cands[i];
            let len = c.best.end_ns.saturating_sub(c.best.start_ns);
            let until = c.best.end_ns.saturating_add(len);
            let done = c
                .late_signs
                .as_ref()
                .is_some_and(|l| l.best_end_ns == c.best.end_ns);
            if done || until >= t {
                continue;
            }
            let mut f = c.best.clone();
            f.end_ns = until;
            let bin = Some(c.bin0);
            self.flash_signs(&mut f, bin);
            let best_end_ns = self.cands[i].best.end_ns;
            self.cands[i].late_signs = Some(LateSigns {
                best_end_ns,
                flags: f.flags,
                all_sky_sigma: f.all_sky_sigma,
                identical_time_fraction: f.identical_time_fraction,
                spread_sigma: f.spread_sigma,
            });
        }
    }

    /// Assesses every candidate whose persistence window closed before `t` (all its photons are released).
    fn assess_due(&mut self, t: i64, out: &mut dyn FindingSink) {
        if self.cands.is_empty() {
            return;
        }
        self.late_signs_due(t);
        let mut i = 0;
        while i < self.cands.len() {
            let close = self.close_of(&self.cands[i]);
            if close < t {
                let c = self.cands.remove(i);
                self.emit_assessment(c, close, false, out);
            } else {
                i += 1;
            }
        }
    }

    fn emit_assessment(&mut self, c: Candidate, close: i64, cut_short: bool, out: &mut dyn FindingSink) {
        let dens = self.model.as_ref().map_or(0.0, |m| m.dens[usize::from(c.bin0)]);
        let rate = self.model.as_ref().map_or(0.0, |m| m.rate_hz);
        // The post-flash window runs from the end of the best trigger's window (see assess.rs).
        let post_all_sky = self.all_sky.released().saturating_sub(c.released_at_best);
        let dead_post_ns = self
            .dead
            .overlap(c.best.end_ns.saturating_add(1), close.saturating_add(1));
        let input = AssessInput {
            cand: &c,
            close,
            cut_short,
            dead_post_ns,
            post_all_sky,
            density: dens,
            omega_r: self.p.omega_r,
            rate_hz: rate,
            search_radius_deg: self.cfg.search_radius_deg,
            longest_ns: self.p.longest_ns,
            pre_ns: self.p.pre_ns,
            response: &self.cfg.response,
            cfg: &self.cfg.assess,
        };
        let (mut assessment, withdrawal) = assess::assess(&input);
        if !self.cfg.defer_fit {
            if let Some(job) = assessment.fit_job.take() {
                assessment.fit = job.run();
            }
        }
        self.stats.assessments += 1;
        out.emit(Finding::Assessment(assessment));
        if let Some(w) = withdrawal {
            self.stats.withdrawals += 1;
            out.emit(Finding::Withdrawal(w));
        }
    }
}

/// Last instant of a flash's pre-window: just before its earliest photon, so emission at the spot that
/// merged crossings folded into the candidate's span (a precursor) lies in the pre-window, not before it.
pub(crate) fn pre_end(f: &Flash) -> i64 {
    f.photons
        .iter()
        .map(|p| p.time_ns)
        .min()
        .unwrap_or(f.end_ns)
        .saturating_sub(1)
}

fn normalise(v: [f64; 3]) -> [f64; 3] {
    let n = dot(v, v).sqrt();
    if n > 0.0 && n.is_finite() {
        [v[0] / n, v[1] / n, v[2] / n]
    } else {
        v
    }
}

pub(crate) fn dot(a: [f64; 3], b: [f64; 3]) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}
