//! What one pass measures from every seeded test (the engine's `TestTap`): per timescale, the tests by
//! background (for the predicted rate at any threshold), the p-value histogram, a randomised p-value
//! histogram (uniform under background whatever the Poisson discreteness), and every seed whose smallest
//! p-value over the timescales reached a loose level, kept so the trigger rate at every stricter threshold
//! comes from this one pass (docs/science.md section 4).

use std::collections::BTreeMap;
use std::sync::{Arc, Mutex};

use glint_science::poisson::{ln_pmf, ln_sf};
use rand::{RngExt, SeedableRng};
use serde::{Deserialize, Serialize};

/// Background bins per decade: a test's b is represented by the mean of its bin (0.5% wide).
pub(crate) const B_BINS_PER_DECADE: f64 = 200.0;
/// ln p histogram: bins of this width from 0 down to `LNP_BINS` bins (the last holds everything rarer).
pub(crate) const LNP_BIN: f64 = 0.25;
pub(crate) const LNP_BINS: usize = 240;
/// Randomised p-value histogram bins (21: an even number of degrees of freedom, whose chi-square tail
/// is a Poisson sum).
pub(crate) const RAND_BINS: usize = 21;

/// A kept seed: time, direction and ln p per timescale tested (NaN for one not tested).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct SeedRec {
    pub(crate) t: i64,
    pub(crate) v: [f64; 3],
    pub(crate) ln_p: Vec<f64>,
}

impl SeedRec {
    /// The smallest ln p over the timescales tested.
    pub(crate) fn min_ln_p(&self) -> f64 {
        self.ln_p
            .iter()
            .copied()
            .filter(|x| !x.is_nan())
            .fold(f64::INFINITY, f64::min)
    }
}

/// Tests of one timescale in one background bin: how many and the sum of their b.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub(crate) struct BBin {
    pub(crate) tests: u64,
    pub(crate) sum_b: f64,
}

/// Everything one pass measured through the tap.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub(crate) struct TapData {
    /// Per timescale: background bin (round(log10 b x 200)) -> tests.
    pub(crate) b_bins: Vec<BTreeMap<i32, BBin>>,
    /// Per timescale: tests by ln p bin.
    pub(crate) ln_p_hist: Vec<Vec<u64>>,
    /// Per timescale: randomised p-values by bin of width 1/RAND_BINS.
    pub(crate) rand_hist: Vec<Vec<u64>>,
    /// Seeds whose smallest ln p reached `keep_ln_p`, in time order.
    pub(crate) seeds: Vec<SeedRec>,
    /// The level seeds were kept at.
    pub(crate) keep_ln_p: f64,
}

impl TapData {
    fn new(k: usize, keep_ln_p: f64) -> Self {
        Self {
            b_bins: vec![BTreeMap::new(); k],
            ln_p_hist: vec![vec![0; LNP_BINS]; k],
            rand_hist: vec![vec![0; RAND_BINS]; k],
            seeds: Vec::new(),
            keep_ln_p,
        }
    }

    /// Tests made on timescale `k`.
    pub(crate) fn tests(&self, k: usize) -> u64 {
        self.b_bins
            .get(k)
            .map_or(0, |m| m.values().map(|b| b.tests).sum())
    }
}

/// The tap the engine calls; the data sits behind a mutex so the pass can take it back afterwards.
#[derive(Debug)]
pub(crate) struct Tap {
    data: Arc<Mutex<TapData>>,
    rng: rand_pcg::Pcg64,
    ln_p: Vec<f64>,
}

impl Tap {
    /// A tap for `k` timescales keeping seeds at or below `keep_ln_p`, its randomisation seeded by `seed`.
    pub(crate) fn new(k: usize, keep_ln_p: f64, seed: u64) -> (Self, Arc<Mutex<TapData>>) {
        let data = Arc::new(Mutex::new(TapData::new(k, keep_ln_p)));
        (
            Self {
                data: Arc::clone(&data),
                rng: rand_pcg::Pcg64::seed_from_u64(seed),
                ln_p: Vec::with_capacity(k),
            },
            data,
        )
    }
}

/// The background bin of b.
pub(crate) fn b_bin(b: f64) -> i32 {
    (b.max(1e-300).log10() * B_BINS_PER_DECADE).round() as i32
}

impl glint_engine::TestTap for Tap {
    fn seed(&mut self, t_ns: i64, v: [f64; 3], tests: &[(u64, f64)]) {
        // A poisoned lock means a panic elsewhere in this pass; the pass is lost anyway.
        let Ok(mut d) = self.data.lock() else { return };
        self.ln_p.clear();
        let mut min = f64::INFINITY;
        for (k, &(n, b)) in tests.iter().enumerate() {
            // Given the seed, the others are Poisson(b): p = P(N >= n - 1 | b) (docs/science.md section 4).
            let m = n.saturating_sub(1);
            let lp = if m == 0 { 0.0 } else { ln_sf(m, b) };
            self.ln_p.push(lp);
            min = min.min(lp);
            let e = d.b_bins[k].entry(b_bin(b)).or_default();
            e.tests += 1;
            e.sum_b += b;
            let bin = ((-lp / LNP_BIN) as usize).min(LNP_BINS - 1);
            d.ln_p_hist[k][bin] += 1;
            // Randomised p: P(N > m) + U P(N = m), exactly uniform under background (mid-p's randomised
            // sibling); P(N > m) = p - P(N = m).
            let u: f64 = self.rng.random();
            let pr = (lp.exp() - (1.0 - u) * ln_pmf(m, b).exp()).clamp(0.0, 1.0);
            let rb = ((pr * RAND_BINS as f64) as usize).min(RAND_BINS - 1);
            d.rand_hist[k][rb] += 1;
        }
        if min <= d.keep_ln_p {
            let ln_p = self.ln_p.clone();
            d.seeds.push(SeedRec { t: t_ns, v, ln_p });
        }
    }
}
