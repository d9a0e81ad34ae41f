//! Dead-time ledger: declared dead intervals, sequence gaps and stream breaks, merged into disjoint
//! half-open intervals [start, end). Seeded tests ask it whether their window touches dead time; the
//! assessment asks how much of a persistence window was dead. Intervals older than what any window or open
//! candidate still needs are pruned, so it grows with the number of gaps in that horizon, not with uptime.

/// Disjoint, sorted dead intervals plus the running total.
#[derive(Debug, Default, Clone)]
pub(crate) struct DeadTime {
    intervals: Vec<(i64, i64)>,
    total_ns: i64,
}

impl DeadTime {
    /// Records [start, end) as dead; returns how many nanoseconds were not already dead.
    pub(crate) fn add(&mut self, start: i64, end: i64) -> i64 {
        if end <= start {
            return 0;
        }
        // Intervals touching or overlapping [start, end) are merged into one.
        let lo = self.intervals.partition_point(|&(_, e)| e < start);
        let hi = self.intervals.partition_point(|&(s, _)| s <= end);
        let mut new_start = start;
        let mut new_end = end;
        let mut already = 0i64;
        for &(s, e) in &self.intervals[lo..hi] {
            already = already.saturating_add(e.min(end).saturating_sub(s.max(start)).max(0));
            new_start = new_start.min(s);
            new_end = new_end.max(e);
        }
        self.intervals.splice(lo..hi, [(new_start, new_end)]);
        let added = end.saturating_sub(start).saturating_sub(already).max(0);
        self.total_ns = self.total_ns.saturating_add(added);
        added
    }

    /// Total dead time ever recorded (union), ns.
    pub(crate) fn total_ns(&self) -> i64 {
        self.total_ns
    }

    /// Dead nanoseconds inside [a, b).
    pub(crate) fn overlap(&self, a: i64, b: i64) -> i64 {
        if b <= a {
            return 0;
        }
        let lo = self.intervals.partition_point(|&(_, e)| e <= a);
        let mut sum = 0i64;
        for &(s, e) in &self.intervals[lo..] {
            if s >= b {
                break;
            }
            sum = sum.saturating_add(e.min(b).saturating_sub(s.max(a)).max(0));
        }
        sum
    }

    /// End of the latest dead interval starting at or before `t` (it may lie after `t` when `t` is itself
    /// inside dead time).
    pub(crate) fn last_end_at_or_before(&self, t: i64) -> Option<i64> {
        let i = self.intervals.partition_point(|&(s, _)| s <= t);
        i.checked_sub(1).map(|i| self.intervals[i].1)
    }

    /// Drops intervals that ended at or before `t`.
    pub(crate) fn prune_before(&mut self, t: i64) {
        let n = self.intervals.partition_point(|&(_, e)| e <= t);
        if n > 0 {
            self.intervals.drain(..n);
        }
    }

    /// Intervals held now.
    #[cfg(test)]
    pub(crate) fn len(&self) -> usize {
        self.intervals.len()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn merges_and_counts_union() {
        let mut d = DeadTime::default();
        assert_eq!(d.add(10, 20), 10);
        assert_eq!(d.add(15, 30), 10);
        assert_eq!(d.add(40, 50), 10);
        assert_eq!(d.add(0, 100), 100 - 30);
        assert_eq!(d.total_ns(), 100);
        assert_eq!(d.len(), 1);
        assert_eq!(d.overlap(90, 200), 10);
    }

    #[test]
    fn overlap_and_last_end() {
        let mut d = DeadTime::default();
        d.add(10, 20);
        d.add(30, 40);
        assert_eq!(d.overlap(0, 100), 20);
        assert_eq!(d.overlap(15, 35), 10);
        assert_eq!(d.overlap(20, 30), 0);
        assert_eq!(d.last_end_at_or_before(5), None);
        assert_eq!(d.last_end_at_or_before(12), Some(20));
        assert_eq!(d.last_end_at_or_before(25), Some(20));
        assert_eq!(d.last_end_at_or_before(30), Some(40));
        d.prune_before(20);
        assert_eq!(d.len(), 1);
        assert_eq!(d.total_ns(), 20, "pruning keeps the running total");
    }
}
