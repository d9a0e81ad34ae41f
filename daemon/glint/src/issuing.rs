//! From an engine's findings to the alert desk in a live run. Flashes go to the desk at once, stamped with the
//! arrival of the photon that completed them; assessments whose evaporation fit the engine deferred go to
//! the fit worker (one thread per daemon, behind a bounded queue), which runs the fit and then issues them,
//! so a slow fit never holds up an engine thread nor the flashes arriving meanwhile.

use std::collections::VecDeque;
use std::sync::Arc;
use std::sync::mpsc;

use glint_engine::{Finding, Flash};
use tokio_util::sync::CancellationToken;

use crate::desk::{Desk, Stamps};
use crate::timefmt::now_unix_ns;

/// Assessments waiting for the fit worker. When the queue is full the engine thread waits (the same policy
/// as the journal: nothing is dropped, ingest slows down).
pub(crate) const FIT_QUEUE: usize = 64;
/// Photon-time buffers kept for reuse by [`Arrivals`].
const SPARE_BUFFERS: usize = 16;

/// Issues findings through the desk and logs each alert. A desk failure (the journal cannot be written)
/// stops the daemon: one that cannot journal must not send.
pub(crate) fn issue(desk: &Desk, instrument: &str, findings: &[Finding], stamps: Stamps, fatal: &CancellationToken) {
    if findings.is_empty() {
        return;
    }
    match desk.issue(instrument, findings, stamps) {
        Ok(alerts) => {
            for a in alerts {
                tracing::info!(instrument, seq = a.seq, id = %a.id, kind = crate::alerts::kind_name(a.kind), "alert issued");
            }
        }
        Err(e) => {
            tracing::error!(instrument, "cannot issue {} alert(s): {e}", findings.len());
            fatal.cancel();
        }
    }
}

/// A batch as read from the producer: its latest photon time, when its frame was read, its photon times.
#[derive(Debug)]
struct Arrived {
    latest: i64,
    received_unix_ns: i64,
    /// Sorted.
    times: Vec<i64>,
}

/// When recent batches were read, so a flash is stamped with the arrival of the photon that completed it
/// (the last of its photons to arrive) rather than of the frame whose watermark released it: the time a
/// photon waits in the reorder stage is part of the latency a subscriber sees.
///
/// Memory: one time per photon of the batches whose latest photon is no older than the watermark minus the
/// reorder tolerance (about twice the tolerance of the stream), plus a few reused buffers.
#[derive(Debug, Default)]
pub(crate) struct Arrivals {
    batches: VecDeque<Arrived>,
    spare: Vec<Vec<i64>>,
}

impl Arrivals {
    /// Notes a batch read at `received_unix_ns`.
    pub(crate) fn note(&mut self, times: &[i64], received_unix_ns: i64) {
        let Some(&latest) = times.iter().max() else { return };
        let mut sorted = self.spare.pop().unwrap_or_default();
        sorted.clear();
        sorted.extend_from_slice(times);
        sorted.sort_unstable();
        self.batches.push_back(Arrived {
            latest,
            received_unix_ns,
            times: sorted,
        });
    }

    /// Forgets the batches whose photons are all older than `t`. Call with the watermark minus the reorder
    /// tolerance: a flash still to come ends at or after the watermark, and only its photons within the
    /// tolerance of its end can have arrived after the one at its end (older ones would have been late).
    pub(crate) fn forget_before(&mut self, t: i64) {
        while self.batches.front().is_some_and(|b| b.latest < t) {
            if let Some(b) = self.batches.pop_front() {
                if self.spare.len() < SPARE_BUFFERS {
                    self.spare.push(b.times);
                }
            }
        }
    }

    /// When the photon at time `t` was read: the first batch holding that time (with several, the earliest,
    /// which can only make the latency look longer).
    fn arrival(&self, t: i64) -> Option<i64> {
        self.batches
            .iter()
            .find(|b| b.times.binary_search(&t).is_ok())
            .map(|b| b.received_unix_ns)
    }

    /// When the last of the flash's photons arrived, Unix ns; None when none of its batches is remembered.
    pub(crate) fn completed(&self, f: &Flash, reorder_tolerance_ns: i64) -> Option<i64> {
        let from = f.end_ns.saturating_sub(reorder_tolerance_ns.max(0));
        f.photons
            .iter()
            .filter(|p| p.time_ns >= from)
            .filter_map(|p| self.arrival(p.time_ns))
            .max()
    }

    /// Batches remembered.
    #[cfg(test)]
    fn len(&self) -> usize {
        self.batches.len()
    }
}
