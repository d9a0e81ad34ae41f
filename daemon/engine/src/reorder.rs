//! Reorder stage: photons wait here until the watermark (latest time seen minus the reorder tolerance, or a
//! producer's promise that nothing older follows, whichever is later) passes them, then leave in time order
//! with a total tie-break on their other fields, so the same photons give the same sequence whatever batches
//! they came in. Photons already behind the watermark when they arrive are late: counted and dropped, never
//! slipped into the past. Holds at most (rate x tolerance) photons.

use std::collections::VecDeque;

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

/// The reorder buffer and its watermark. Pending photons are kept sorted: a batch is sorted on arrival
/// and merged in, which costs O(batch log batch) plus the overlap with what is already waiting (nothing when
/// batches arrive in order, the usual case).
#[derive(Debug, Default)]
pub(crate) struct Reorder {
    pending: VecDeque<Photon>,
    merge: Vec<Photon>,
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

    /// Takes photons that are not late (any order); `batch` is left empty.
    pub(crate) fn push_all(&mut self, batch: &mut Vec<Photon>) {
        batch.sort_unstable_by_key(Photon::key);
        let Some(first) = batch.first().map(Photon::key) else {
            return;
        };
        if self.pending.back().is_none_or(|b| b.key() <= first) {
            self.pending.extend(batch.drain(..));
            return;
        }
        // Merge the waiting photons that sort after the batch's first with the batch.
        let keep = self.pending.partition_point(|p| p.key() <= first);
        self.merge.clear();
        self.merge.extend(self.pending.drain(keep..));
        let (mut i, mut j) = (0, 0);
        while i < self.merge.len() && j < batch.len() {
            if batch[j].key() < self.merge[i].key() {
                self.pending.push_back(batch[j]);
                j += 1;
            } else {
                self.pending.push_back(self.merge[i]);
                i += 1;
            }
        }
        self.pending.extend(self.merge.drain(i..));
        self.pending.extend(batch.drain(j..));
        batch.clear();
    }

    /// Moves the watermark forward (never back).
    pub(crate) fn advance_watermark(&mut self, w: i64) {
        self.watermark = Some(self.watermark.map_or(w, |old| old.max(w)));
    }

    /// Time of the oldest pending photon.
    pub(crate) fn next_time(&self) -> Option<i64> {
        self.pending.front().map(|p| p.t)
    }

    /// Pops the oldest pending photon if it is older than `limit`.
    pub(crate) fn pop_before(&mut self, limit: i64) -> Option<Photon> {
        if self.pending.front().is_some_and(|p| p.t < limit) {
            self.pending.pop_front()
        } else {
            None
        }
    }

    /// Heap bytes, from capacities.
    pub(crate) fn heap_bytes(&self) -> usize {
        (self.pending.capacity() + self.merge.capacity()) * size_of::<Photon>()
    }

    /// Photons waiting.
    pub(crate) fn len(&self) -> usize {
        self.pending.len()
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
        r.push_all(&mut vec![ph(5, 2.0), ph(9, 0.0)]);
        r.push_all(&mut vec![ph(3, 1.0), ph(5, 1.0)]);
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

    #[test]
    fn merging_batches_gives_the_sorted_union() {
        // Batches overlapping in time in every way: the release order is the sorted order of all photons.
        let mut r = Reorder::default();
        let mut all = Vec::new();
        let mut x = 12345u64;
        for b in 0..50 {
            let mut batch = Vec::new();
            for _ in 0..20 {
                x = x
                    .wrapping_mul(6364136223846793005)
                    .wrapping_add(1442695040888963407);
                let t = b * 10 + (x >> 60) as i64;
                let p = ph(t, (x >> 40) as f64);
                batch.push(p);
                all.push(p);
            }
            r.push_all(&mut batch);
            assert!(batch.is_empty());
        }
        all.sort_by_key(Photon::key);
        let mut got = Vec::new();
        while let Some(p) = r.pop_before(i64::MAX) {
            got.push(p);
        }
        assert_eq!(got, all);
    }
}
