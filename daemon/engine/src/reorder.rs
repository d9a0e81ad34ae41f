//! Reorder stage: photons wait here until the watermark (latest time seen minus the reorder tolerance) passes
//! them, then leave in time order with a total tie-break on their other fields, so the same photons give the
//! same sequence whatever batches they came in. Photons already behind the watermark when they arrive are late:
//! counted and dropped, never slipped into the past. Holds at most (rate x tolerance) photons.

use std::cmp::Ordering;
use std::collections::BinaryHeap;

/// One photon as the engine keeps it: wire columns, GPS nanoseconds, degrees, GeV.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Photon {
    pub(crate) t: i64,
    pub(crate) ra: f64,
    pub(crate) dec: f64,
    pub(crate) energy: f32,
    pub(crate) zenith: f32,
    pub(crate) azimuth: f32,
}

impl Photon {
    /// Total order used for release: time first, then the bit patterns of the other columns.
    fn key(&self) -> (i64, u64, u64, u32, u32, u32) {
        (
            self.t,
            self.ra.to_bits(),
            self.dec.to_bits(),
            self.energy.to_bits(),
            self.zenith.to_bits(),
            self.azimuth.to_bits(),
        )
    }
}

/// Heap entry ordered so the smallest key is on top.
#[derive(Debug, Clone, Copy)]
struct Pending(Photon);

impl PartialEq for Pending {
    fn eq(&self, other: &Self) -> bool {
        self.0.key() == other.0.key()
    }
}
impl Eq for Pending {}
impl PartialOrd for Pending {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}
impl Ord for Pending {
    fn cmp(&self, other: &Self) -> Ordering {
        other.0.key().cmp(&self.0.key())
    }
}

/// The reorder buffer and its watermark.
#[derive(Debug, Default)]
pub(crate) struct Reorder {
    heap: BinaryHeap<Pending>,
    watermark: Option<i64>,
}

impl Reorder {
    /// Current watermark: photons strictly older than it have been released (or were late).
    pub(crate) fn watermark(&self) -> Option<i64> {
        self.watermark
    }

    /// True when `t` is behind the watermark, i.e. a photon at `t` arriving now is late.
    pub(crate) fn is_late(&self, t: i64) -> bool {
        self.watermark.is_some_and(|w| t < w)
    }

    /// Takes a photon that is not late.
    pub(crate) fn push(&mut self, p: Photon) {
        self.heap.push(Pending(p));
    }

    /// Moves the watermark forward (never back).
    pub(crate) fn advance_watermark(&mut self, w: i64) {
        self.watermark = Some(self.watermark.map_or(w, |old| old.max(w)));
    }

    /// Time of the oldest pending photon.
    pub(crate) fn next_time(&self) -> Option<i64> {
        self.heap.peek().map(|p| p.0.t)
    }

    /// Pops the oldest pending photon if it is older than `limit`.
    pub(crate) fn pop_before(&mut self, limit: i64) -> Option<Photon> {
        if self.heap.peek().is_some_and(|p| p.0.t < limit) {
            self.heap.pop().map(|p| p.0)
        } else {
            None
        }
    }

    /// Photons waiting.
    pub(crate) fn len(&self) -> usize {
        self.heap.len()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ph(t: i64, ra: f64) -> Photon {
        Photon {
            t,
            ra,
            dec: 0.0,
            energy: 1.0,
            zenith: 10.0,
            azimuth: 0.0,
        }
    }

    #[test]
    fn releases_in_time_order_with_tie_break() {
        let mut r = Reorder::default();
        for p in [ph(5, 2.0), ph(3, 1.0), ph(5, 1.0), ph(9, 0.0)] {
            r.push(p);
        }
        r.advance_watermark(6);
        let mut got = Vec::new();
        while let Some(p) = r.pop_before(6) {
            got.push((p.t, p.ra));
        }
        assert_eq!(got, vec![(3, 1.0), (5, 1.0), (5, 2.0)]);
        assert_eq!(r.len(), 1);
        assert!(r.is_late(5));
        assert!(!r.is_late(6));
        r.advance_watermark(2);
        assert_eq!(r.watermark(), Some(6), "the watermark never moves back");
    }
}
