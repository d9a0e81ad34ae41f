//! An open candidate: what the engine collects about one flash while its persistence window runs, and what
//! the assessment reads when it closes. A plain record shared by the engine (which fills it) and the
//! assessment (which reads it), so neither reaches into the other.

use crate::finding::Flash;

/// A photon of a candidate's disc, kept for the assessment and the fit.
#[derive(Debug, Clone, Copy)]
pub(crate) struct CandPhoton {
    pub(crate) t: i64,
    pub(crate) energy: f32,
}

/// An open candidate: a flash and the crossings merged into it, waiting for its persistence window.
#[derive(Debug)]
pub(crate) struct Candidate {
    pub(crate) id: u64,
    /// Centre of the candidate's disc (the first flash's position) and its acceptance bin.
    pub(crate) pos0: [f64; 3],
    /// Crossings whose seed lies within max(3 r, r + 3 sigma_PSF) of `pos0` (sigma at the instrument's
    /// lowest energy) belong to this candidate: a burst's photons, hence its seeds, scatter by the PSF around
    /// the source.
    pub(crate) cos_merge: f64,
    pub(crate) bin0: u16,
    pub(crate) zenith0: f64,
    /// Crossings with seed time up to here update the candidate; later ones within the persistence window
    /// are only counted, unless more significant than `best` and no later than `extend_limit`.
    pub(crate) span_limit: i64,
    /// A more significant crossing up to here still moves the best trigger and the last crossing: the first
    /// crossing plus the persistence window of the longest timescale.
    pub(crate) extend_limit: i64,
    /// Earliest window start and latest seed time over the merged crossings: the flash span.
    pub(crate) span_start: i64,
    pub(crate) t_last: i64,
    pub(crate) mask: u64,
    pub(crate) best: Flash,
    pub(crate) best_all_sky: u64,
    pub(crate) best_all_sky_expected: f64,
    /// All-sky photons in the pre-window (span_start - pre, span_start].
    pub(crate) pre_all_sky: u64,
    /// Photons released when the best crossing was processed (all those with time <= best.end_ns): the
    /// post-flash window starts there.
    pub(crate) released_at_best: u64,
    /// Photons in the disc from (first window start - longest - pre) on, in time order.
    pub(crate) photons: Vec<CandPhoton>,
    pub(crate) capped: bool,
    pub(crate) late_crossings: u64,
    /// The best flash's instrumental signs measured again once its window had run as long again past its
    /// end (None until then, or after the best flash changed).
    pub(crate) late_signs: Option<LateSigns>,
}

/// Instrumental signs of the best flash re-measured over (start, end + its timescale]: a glitch that crossed
/// before all its photons had arrived shows its spread only there. The flash went out at once without them;
/// the assessment reads them.
#[derive(Debug, Clone)]
pub(crate) struct LateSigns {
    /// End of the best flash's window they were measured for (a later best flash needs its own).
    pub(crate) best_end_ns: i64,
    pub(crate) flags: Vec<String>,
    pub(crate) all_sky_sigma: f64,
    pub(crate) identical_time_fraction: f64,
    pub(crate) spread_sigma: f64,
}
