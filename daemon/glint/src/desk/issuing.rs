//! From an engine's findings to the alert desk in a live run. Each finding goes to the desk the moment the
//! engine decides it, a flash stamped with the arrival of the photon that completed it; assessments whose
//! evaporation fit the engine deferred go to the fit worker (one thread per daemon, behind a bounded queue),
//! which runs the fit and then issues them, so a slow fit never holds up an engine thread nor the flashes
//! arriving meanwhile.

use std::collections::VecDeque;
use std::sync::Arc;
use std::sync::mpsc;

use glint_engine::{Finding, FindingSink, Flash};
use tokio_util::sync::CancellationToken;

use crate::desk::{Desk, Stamps};
use crate::timefmt::now_unix_ns;

/// Assessments waiting for the fit worker. When the queue is full the engine thread waits (the same policy
/// as the journal: nothing is dropped, ingest slows down).
pub(crate) const FIT_QUEUE: usize = 64;
/// Photon-time buffers kept for reuse by [`Arrivals`].
const SPARE_BUFFERS: usize = 16;

/// Hands findings to the desk, which numbers them at once and journals them on its own thread. A desk that
/// has stopped (the journal failed) stops the daemon: one that cannot journal must not send.
pub(crate) fn issue(
    desk: &Desk,
    instrument: &str,
    findings: &[Finding],
    stamps: Stamps,
    fatal: &CancellationToken,
) {
    if let Err(e) = desk.issue(instrument, findings, stamps) {
        tracing::error!(instrument, "cannot issue {} alert(s): {e}", findings.len());
        fatal.cancel();
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

/// One engine thread's way to the desk: issues each finding the moment the engine decides it (a flash
/// stamped with the arrival of its last photon), hands assessments whose fit is pending to the fit worker.
#[derive(Debug)]
pub(crate) struct Issuer {
    instrument: Arc<str>,
    tolerance_ns: i64,
    arrivals: Arrivals,
    desk: Arc<Desk>,
    fits: mpsc::SyncSender<FitTask>,
    fatal: CancellationToken,
}

impl Issuer {
    /// An issuer for one instrument whose engine holds photons up to `tolerance_ns` for reordering.
    pub(crate) fn new(
        instrument: &str,
        tolerance_ns: i64,
        desk: Arc<Desk>,
        fits: mpsc::SyncSender<FitTask>,
        fatal: CancellationToken,
    ) -> Self {
        Self {
            instrument: Arc::from(instrument),
            tolerance_ns,
            arrivals: Arrivals::default(),
            desk,
            fits,
            fatal,
        }
    }

    /// Notes a batch read at `received_unix_ns`, before the engine takes it.
    pub(crate) fn note_batch(&mut self, times: &[i64], received_unix_ns: i64) {
        self.arrivals.note(times, received_unix_ns);
    }

    /// Forgets arrivals older than any flash still to come can need (see [`Arrivals::forget_before`]).
    pub(crate) fn after_step(&mut self, watermark_ns: Option<i64>) {
        if let Some(w) = watermark_ns {
            self.arrivals.forget_before(w.saturating_sub(self.tolerance_ns));
        }
    }

    /// The sink for one engine step on a frame read at `received_unix_ns` (0 for the final flush). Call
    /// [`Step::end`] once the engine returns.
    pub(crate) fn step(&mut self, received_unix_ns: i64) -> Step<'_> {
        Step {
            issuer: self,
            received_unix_ns,
            deferred: None,
        }
    }
}

/// The findings of one engine step, issued as they come.
#[derive(Debug)]
pub(crate) struct Step<'a> {
    issuer: &'a mut Issuer,
    received_unix_ns: i64,
    /// An assessment whose fit is pending, held until the next finding shows whether the withdrawal of the
    /// same candidate follows it (the two must reach the desk together: a withdrawal links to its flash and
    /// must never overtake the assessment).
    deferred: Option<FitTask>,
}

impl Step<'_> {
    /// Sends the held assessment, if any, to the fit worker.
    fn hand_over(&mut self) {
        if let Some(task) = self.deferred.take() {
            let i = &*self.issuer;
            defer(&i.fits, task, &i.desk, &i.fatal);
        }
    }

    /// The step is over: the held assessment goes to the fit worker.
    pub(crate) fn end(mut self) {
        self.hand_over();
    }
}

impl FindingSink for Step<'_> {
    fn emit(&mut self, finding: Finding) {
        let received = self.received_unix_ns;
        match finding {
            Finding::Assessment(a) if a.fit_job.is_some() => {
                self.hand_over();
                self.deferred = Some(FitTask {
                    instrument: self.issuer.instrument.clone(),
                    findings: vec![Finding::Assessment(a)],
                    received_unix_ns: received,
                });
            }
            Finding::Withdrawal(w)
                if self.deferred.as_ref().is_some_and(|t| {
                    matches!(t.findings.last(), Some(Finding::Assessment(a)) if a.candidate == w.candidate)
                }) =>
            {
                if let Some(t) = self.deferred.as_mut() {
                    t.findings.push(Finding::Withdrawal(w));
                }
                self.hand_over();
            }
            f => {
                self.hand_over();
                let decided = now_unix_ns();
                let i = &*self.issuer;
                // A flash is stamped with the arrival of the photon that completed it, which may have waited
                // in the reorder stage for a later frame: that wait is part of the latency a subscriber sees.
                let received = match &f {
                    Finding::Flash(x) if received != 0 => i.arrivals.completed(x, i.tolerance_ns).unwrap_or(received),
                    _ => received,
                };
                let stamps = Stamps {
                    received_unix_ns: received,
                    decided_unix_ns: decided,
                };
                issue(&i.desk, &i.instrument, std::slice::from_ref(&f), stamps, &i.fatal);
            }
        }
    }
}

/// Assessments of one engine step whose fit is still to run, each with the withdrawal that follows it when
/// instrumental (a withdrawal must not overtake its assessment: the desk links both to the flash).
#[derive(Debug)]
pub(crate) struct FitTask {
    /// Instrument the findings belong to.
    pub(crate) instrument: Arc<str>,
    /// The findings, in the engine's order.
    pub(crate) findings: Vec<Finding>,
    /// Receipt of the frame that decided them; the decided stamp is set once the fits have run.
    pub(crate) received_unix_ns: i64,
}

impl FitTask {
    /// Runs the pending fits and issues the findings.
    fn complete(mut self, desk: &Desk, fatal: &CancellationToken) {
        for f in &mut self.findings {
            if let Finding::Assessment(a) = f {
                if let Some(job) = a.fit_job.take() {
                    a.fit = job.run();
                }
            }
        }
        let stamps = Stamps {
            received_unix_ns: self.received_unix_ns,
            decided_unix_ns: now_unix_ns(),
        };
        issue(desk, &self.instrument, &self.findings, stamps, fatal);
    }
}

/// The daemon's fit worker: runs the evaporation fits the engines deferred, one at a time, and issues the
/// assessments. It ends once every sender is dropped and the queue is drained, so shutdown waits for it
/// after the engines and before the journal's final fsync.
pub(crate) fn start_fit_worker(
    desk: Arc<Desk>,
    fatal: CancellationToken,
) -> std::io::Result<(mpsc::SyncSender<FitTask>, std::thread::JoinHandle<()>)> {
    let (tx, rx) = mpsc::sync_channel::<FitTask>(FIT_QUEUE);
    let handle = std::thread::Builder::new()
        .name("fit-worker".into())
        .spawn(move || {
            while let Ok(task) = rx.recv() {
                task.complete(&desk, &fatal);
            }
        })?;
    Ok((tx, handle))
}

/// Hands a task to the fit worker; if the worker is gone (it cannot be, short of a panic), runs it here so no
/// assessment is lost.
pub(crate) fn defer(tx: &mpsc::SyncSender<FitTask>, task: FitTask, desk: &Desk, fatal: &CancellationToken) {
    if let Err(mpsc::SendError(task)) = tx.send(task) {
        tracing::error!(instrument = %task.instrument, "the fit worker has stopped: running the fit on the engine thread");
        task.complete(desk, fatal);
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
pub(crate) mod tests {
    use super::*;
    use glint_engine::PhotonRec;

    /// A flash made of photons at `times`, for tests here and in the desk.
    pub(crate) fn flash(times: &[i64]) -> Flash {
        Flash {
            candidate: 1,
            start_ns: times[0] - 1,
            end_ns: *times.last().unwrap(),
            ra_deg: 10.0,
            dec_deg: -20.0,
            error_radius_deg: 0.1,
            search_radius_deg: 0.5,
            timescale_s: 0.1,
            counts: times.len() as u64,
            background: 0.1,
            p_value: 1e-9,
            ln_p: -20.7,
            sigma: 6.0,
            far_per_year: 0.1,
            sigma_post_trials: 1.3,
            zenith_deg: 10.0,
            flags: Vec::new(),
            all_sky_sigma: 0.0,
            identical_time_fraction: 0.0,
            spread_sigma: 0.0,
            photons: times
                .iter()
                .map(|&t| PhotonRec {
                    time_ns: t,
                    ra_deg: 10.0,
                    dec_deg: -20.0,
                    energy_gev: 500.0,
                    zenith_deg: 10.0,
                    azimuth_deg: 0.0,
                })
                .collect(),
        }
    }

    #[test]
    fn a_flash_is_stamped_with_the_arrival_of_its_last_photon_to_arrive() {
        const TOL: i64 = 20;
        let mut a = Arrivals::default();
        a.note(&[100, 105, 110], 1_000);
        // Out of order: the photon at 108 comes in the next batch, after the one at 110.
        a.note(&[120, 108, 125], 2_000);
        a.note(&[130, 140], 3_000);
        // The flash ending at 110 was completed by the photon at 108, read at 2000.
        assert_eq!(a.completed(&flash(&[100, 108, 110]), TOL), Some(2_000));
        // Photons older than the tolerance before the end cannot have come after it: not looked at.
        assert_eq!(a.completed(&flash(&[108, 130, 140]), 0), Some(3_000));
        assert_eq!(a.completed(&flash(&[108, 140]), TOL), Some(3_000));
        assert_eq!(a.completed(&flash(&[999]), TOL), None);
        // Forgetting drops whole batches whose photons are all older than the bound, oldest first.
        a.forget_before(111);
        assert_eq!(a.len(), 2);
        assert_eq!(a.completed(&flash(&[100, 108, 110]), TOL), Some(2_000));
        a.forget_before(126);
        assert_eq!(a.len(), 1);
        assert_eq!(a.completed(&flash(&[125]), TOL), None);
        a.note(&[], 4_000);
        assert_eq!(a.len(), 1, "an empty batch holds no arrival");
    }
}
