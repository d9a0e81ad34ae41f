//! The trigger threshold of docs/science.md section 4: the per-seed p-value bound `F / (K R)` and the critical
//! count `n*(b)`, tabulated over the background so the engine's hot path is one table read and an integer
//! compare. The table rounds the background up to its next grid point, so its threshold is never below the
//! exact one.

use crate::error::{ScienceError, arg};
use crate::poisson;

/// Most entries a [`CriticalTable`] may hold (4 MiB of `u32`).
const MAX_TABLE_ENTRIES: u64 = 1 << 20;

/// The per-seed p-value bound `F / (K R)`: a false-alarm rate `far_per_s` (per second) split over
/// `n_timescales` timescales and over the seeds, which arrive at the all-sky rate `all_sky_rate_hz`.
pub fn per_seed_bound(
    far_per_s: f64,
    n_timescales: usize,
    all_sky_rate_hz: f64,
) -> Result<f64, ScienceError> {
    let far = arg::positive("far_per_s", far_per_s)?;
    let rate = arg::positive("all_sky_rate_hz", all_sky_rate_hz)?;
    if n_timescales == 0 {
        return Err(ScienceError::InvalidArgument {
            name: "n_timescales",
            value: 0.0,
            expected: "at least one timescale",
        });
    }
    // usize -> f64 is exact for any realistic ladder length.
    Ok(far / (n_timescales as f64 * rate))
}

/// Whether `m` further photons on background `b` are rare enough: `ln P(N >= m | b) <= ln_bound`.
fn rare_enough(m: u64, b: f64, ln_bound: f64) -> bool {
    poisson::ln_sf(m, b) <= ln_bound
}

/// The smallest `n >= 1` with `P(N >= n - 1 | b) <= bound`: the count in a window (seed included) at
/// which a seeded test on background `b` crosses.
pub fn critical_count(b: f64, bound: f64) -> Result<u32, ScienceError> {
    let b = arg::non_negative("b", b)?;
    let bound = arg::positive("bound", bound)?;
    let ln_bound = bound.ln();
    // m counts the photons besides the seed; P(N >= 0) = 1, so m = 0 only passes a bound >= 1.
    if rare_enough(0, b, ln_bound) {
        return Ok(1);
    }
    let limit = u64::from(u32::MAX) - 1;
    let mut lo = 0_u64; // fails
    // b is finite and >= 0 here, so the cast saturates at most.
    let mut hi = (b.ceil() as u64).clamp(1, limit);
    while !rare_enough(hi, b, ln_bound) {
        if hi >= limit {
            return Err(ScienceError::OutOfRange {
                what: "critical count",
                detail: format!("background {b} with bound {bound} needs more than {limit} counts"),
            });
        }
        lo = hi;
        hi = hi.saturating_mul(2).min(limit);
    }
    while hi - lo > 1 {
        let mid = lo + (hi - lo) / 2;
        if rare_enough(mid, b, ln_bound) {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    // hi <= u32::MAX - 1, so hi + 1 fits.
    u32::try_from(hi + 1).map_err(|_| ScienceError::OutOfRange {
        what: "critical count",
        detail: format!("{} does not fit in u32", hi + 1),
    })
}

/// The chance that a seed on background `b` crosses a threshold of `critical` counts by background alone,
/// `P(N >= critical - 1 | b)`: the engine sums it over seeds to predict its false-alarm count.
pub fn false_crossing_probability(b: f64, critical: u32) -> f64 {
    poisson::sf(u64::from(critical.saturating_sub(1)), b)
}

/// Critical counts over a grid of backgrounds, looked up from the bits of `b` without a logarithm.
///
/// Grid points are the `f64` values whose bit patterns are whole multiples of `2^shift`, from the largest
/// such value at or below `b_min` up to the first at or above `b_max`: within each octave they are evenly
/// spaced, and neighbours differ by a factor of at most `1 + 2^-(52 - shift)`, chosen to be no more than
/// `10^(1 / points_per_decade)`. A lookup rounds `b` up to its grid point, so the count returned is never
/// below the exact critical count of `b`, and equal to it at grid points.
///
/// Memory: one `u32` per grid point, `points_per_decade`-ish per decade (at most 2^20 entries).
#[derive(Debug, Clone, PartialEq)]
pub struct CriticalTable {
    bound: f64,
    base_bits: u64,
    shift: u32,
    mask: u64,
    first: f64,
    last: f64,
    counts: Vec<u32>,
}

impl CriticalTable {
    /// Tabulates `critical_count(b, bound)` from `b_min` to `b_max` (both > 0) with at least
    /// `points_per_decade` points per decade.
    pub fn new(bound: f64, b_min: f64, b_max: f64, points_per_decade: u32) -> Result<Self, ScienceError> {
        let bound = arg::positive("bound", bound)?;
        let b_min = arg::positive("b_min", b_min)?;
        let b_max = arg::positive("b_max", b_max)?;
        if b_max <= b_min {
            return Err(ScienceError::InvalidArgument {
                name: "b_max",
                value: b_max,
                expected: "a number greater than b_min",
            });
        }
        if points_per_decade == 0 {
            return Err(ScienceError::InvalidArgument {
                name: "points_per_decade",
                value: 0.0,
                expected: "at least 1",
            });
        }
        // Mantissa bits kept: the smallest k with 2^-k <= 10^(1/ppd) - 1.
        let step = 10f64.powf(1.0 / f64::from(points_per_decade)) - 1.0;
        let kept = (-step.log2()).ceil().clamp(0.0, 52.0) as u32;
        let shift = 52 - kept;
        let mask = (1_u64 << shift) - 1;
        let base_bits = b_min.to_bits() & !mask;
        let span = b_max.to_bits() - base_bits;
        let n_points = span.div_ceil(1_u64 << shift) + 1;
        if n_points > MAX_TABLE_ENTRIES {
            return Err(ScienceError::OutOfRange {
                what: "critical table",
                detail: format!(
                    "{n_points} grid points for b in [{b_min}, {b_max}] at {points_per_decade} per decade \
                     (at most {MAX_TABLE_ENTRIES})"
                ),
            });
        }
        let point = |i: u64| f64::from_bits(base_bits + (i << shift));
        let ln_bound = bound.ln();
        let mut counts = Vec::with_capacity(n_points as usize);
        // The critical count never falls as b grows, so each entry starts from the previous one; m is the
        // count besides the seed.
        let mut m = u64::from(critical_count(point(0), bound)?) - 1;
        for i in 0..n_points {
            let b = point(i);
            while !rare_enough(m, b, ln_bound) {
                m += 1;
            }
            counts.push(u32::try_from(m + 1).map_err(|_| ScienceError::OutOfRange {
                what: "critical count",
                detail: format!("background {b} needs more than u32::MAX counts"),
            })?);
        }
        Ok(Self {
            bound,
            base_bits,
            shift,
            mask,
            first: point(0),
            last: point(n_points - 1),
            counts,
        })
    }

    /// The critical count for background `b`, rounded up to the grid.
    ///
    /// `b` at or below the first grid point (including 0 and negative values) uses the first entry, which is
    /// never below the exact count there; `b` above the last grid point is computed exactly (slow path, a
    /// few microseconds); an infinite or NaN `b` gives `u32::MAX`, a threshold nothing reaches.
    #[inline]
    pub fn critical(&self, b: f64) -> u32 {
        if b > self.first {
            if b <= self.last {
                // Positive f64 bit patterns order like their values, so this is b's grid point, rounded up.
                let idx = (b.to_bits() - self.base_bits + self.mask) >> self.shift;
                return self.counts.get(idx as usize).copied().unwrap_or(u32::MAX);
            }
            return critical_count(b, self.bound).unwrap_or(u32::MAX);
        }
        if b.is_nan() {
            u32::MAX
        } else {
            self.counts.first().copied().unwrap_or(u32::MAX)
        }
    }

    /// The per-seed p-value bound the table was built for.
    pub fn bound(&self) -> f64 {
        self.bound
    }

    /// Number of grid points.
    pub fn len(&self) -> usize {
        self.counts.len()
    }

    /// Always false: a table has at least one grid point.
    pub fn is_empty(&self) -> bool {
        self.counts.is_empty()
    }

    /// The background at grid point `i`, or None past the end.
    pub fn grid_point(&self, i: usize) -> Option<f64> {
        (i < self.counts.len()).then(|| f64::from_bits(self.base_bits + ((i as u64) << self.shift)))
    }

    /// The tabulated critical count at grid point `i`, or None past the end.
    pub fn entry(&self, i: usize) -> Option<u32> {
        self.counts.get(i).copied()
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    #[test]
    fn bound_is_far_over_trials() {
        // docs/science.md section 4: bound = F / (K R).
        let b = per_seed_bound(1.0 / 3.15576e7, 8, 250.0).unwrap();
        assert!((b - 1.0 / (3.15576e7 * 8.0 * 250.0)).abs() < 1e-25);
        assert!(per_seed_bound(0.0, 8, 250.0).is_err());
        assert!(per_seed_bound(1e-8, 0, 250.0).is_err());
        assert!(per_seed_bound(1e-8, 8, f64::NAN).is_err());
        assert!(per_seed_bound(-1e-8, 8, 1.0).is_err());
    }

    #[test]
    fn critical_count_definition() {
        // docs/science.md section 4: smallest n with P(N >= n - 1 | b) <= bound.
        for &(b, bound) in &[
            (0.01, 1e-9),
            (0.5, 1e-6),
            (3.0, 1e-3),
            (40.0, 1e-12),
            (1e4, 1e-10),
        ] {
            let n = critical_count(b, bound).unwrap();
            assert!(n >= 2);
            assert!(poisson::sf(u64::from(n - 1), b) <= bound, "b={b}");
            assert!(poisson::sf(u64::from(n - 2), b) > bound, "b={b}");
        }
        // [calc] from the formula: b = 0 leaves only the seed, so one more photon is already rare.
        assert_eq!(critical_count(0.0, 1e-9).unwrap(), 2);
        assert_eq!(critical_count(5.0, 1.0).unwrap(), 1);
    }

    #[test]
    fn critical_count_rejects_bad_input() {
        assert!(matches!(
            critical_count(-1.0, 1e-9),
            Err(ScienceError::InvalidArgument { name: "b", .. })
        ));
        assert!(matches!(
            critical_count(f64::NAN, 1e-9),
            Err(ScienceError::InvalidArgument { name: "b", .. })
        ));
        assert!(matches!(
            critical_count(1.0, 0.0),
            Err(ScienceError::InvalidArgument { name: "bound", .. })
        ));
        assert!(matches!(
            critical_count(1.0, f64::NAN),
            Err(ScienceError::InvalidArgument { .. })
        ));
        assert!(matches!(
            critical_count(f64::INFINITY, 1e-9),
            Err(ScienceError::InvalidArgument { .. })
        ));
    }

    #[test]
    fn table_is_exact_at_grid_points_and_never_below_between() {
        let bound = 1.6e-11;
        let t = CriticalTable::new(bound, 1e-5, 300.0, 64).unwrap();
        assert!(t.len() > 64 * 7);
        for i in 0..t.len() {
            let g = t.grid_point(i).unwrap();
            assert_eq!(
                t.entry(i).unwrap(),
                critical_count(g, bound).unwrap(),
                "grid point {g}"
            );
            assert_eq!(t.critical(g), t.entry(i).unwrap());
        }
        // Off-grid backgrounds, spread over the whole range: never below exact, monotone in b.
        let mut prev = 0;
        let mut b = 1e-6;
        while b < 400.0 {
            let got = t.critical(b);
            assert!(got >= critical_count(b, bound).unwrap(), "b={b}");
            assert!(got >= prev, "not monotone at b={b}");
            prev = got;
            b *= 1.0137;
        }
        // Neighbouring grid points are at most 10^(1/64) apart.
        for i in 1..t.len() {
            let r = t.grid_point(i).unwrap() / t.grid_point(i - 1).unwrap();
            assert!(r <= 10f64.powf(1.0 / 64.0) + 1e-12);
        }
    }

    #[test]
    fn table_edges() {
        let bound = 1e-9;
        let t = CriticalTable::new(bound, 0.01, 10.0, 20).unwrap();
        let first = t.entry(0).unwrap();
        assert_eq!(t.critical(0.0), first);
        assert_eq!(t.critical(-3.0), first);
        assert_eq!(t.critical(1e-9), first);
        assert_eq!(t.critical(f64::NAN), u32::MAX);
        assert_eq!(t.critical(f64::INFINITY), u32::MAX);
        // Beyond the table: exact.
        assert_eq!(t.critical(50.0), critical_count(50.0, bound).unwrap());
        assert_eq!(t.bound(), bound);
        assert!(!t.is_empty());
        assert!(t.grid_point(t.len()).is_none());
    }

    #[test]
    fn table_rejects_bad_input() {
        assert!(CriticalTable::new(0.0, 0.01, 10.0, 20).is_err());
        assert!(CriticalTable::new(1e-9, 0.0, 10.0, 20).is_err());
        assert!(CriticalTable::new(1e-9, 10.0, 1.0, 20).is_err());
        assert!(CriticalTable::new(1e-9, 0.01, f64::NAN, 20).is_err());
        assert!(CriticalTable::new(1e-9, 0.01, 10.0, 0).is_err());
        assert!(matches!(
            CriticalTable::new(1e-9, 1e-300, 1e300, 100_000),
            Err(ScienceError::OutOfRange { .. })
        ));
    }
}
