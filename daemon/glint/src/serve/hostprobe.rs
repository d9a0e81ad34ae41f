//! The host's own latency floor, measured by `glint bench-live` beside the daemon while the producer feeds.
//! Three probe threads run none of glint's pipeline, only the waits an alert's path is made of: a hand-off to
//! a thread blocked on a bounded async-channel (how a frame reaches an engine thread), a timed sleep (how a
//! thread that went idle gets its core back), and a small append plus fdatasync on the same file system as
//! the journal. On a virtual machine these tails come from the hypervisor, not from glint; printed next to
//! the daemon's figures they tell the two apart.
//!
//! Memory: three histograms of fixed size; the probe file grows by 512 bytes per fdatasync (a few MB over a
//! benchmark run) and is removed with the benchmark's temporary directory.

use std::io::Write;
use std::path::Path;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use hdrhistogram::Histogram;

use crate::metrics::{MAX_TRACKED_NS, Percentiles, latency_histogram as histogram};

/// Pause between hand-offs: about the frame period of a 100,000 photons/s feed.
const HANDOFF_PERIOD: Duration = Duration::from_millis(2);
/// Pause between fdatasyncs: a light load beside the journal's, which the probe must not crowd out.
const FSYNC_PERIOD: Duration = Duration::from_millis(50);
/// Bytes appended before each fdatasync: about one journal record.
const FSYNC_BYTES: usize = 512;

/// What the probes measured, nanoseconds.
#[derive(Debug)]
pub(crate) struct HostFloor {
    /// From `send_blocking` to the blocked receiver's return.
    pub(crate) handoff: Histogram<u64>,
    /// How late a 2 ms sleep returned.
    pub(crate) oversleep: Histogram<u64>,
    /// A 512-byte append plus fdatasync.
    pub(crate) fdatasync: Histogram<u64>,
}

impl HostFloor {
    fn empty() -> Self {
        Self {
            handoff: histogram(),
            oversleep: histogram(),
            fdatasync: histogram(),
        }
    }

    /// A table in the shape of the daemon's latency table (milliseconds).
    pub(crate) fn table(&self) -> String {
        let mut s = Percentiles::header("host floor (ms)") + "\n";
        for (label, h) in [
            ("thread hand-off", &self.handoff),
            ("2 ms sleep, late", &self.oversleep),
            ("append+fdatasync", &self.fdatasync),
        ] {
            s.push_str(&Percentiles::of(h).row(label));
            s.push('\n');
        }
        s
    }
}

fn nanos(d: Duration) -> u64 {
    u64::try_from(d.as_nanos())
        .unwrap_or(u64::MAX)
        .clamp(1, MAX_TRACKED_NS)
}

/// The running probe threads.
#[derive(Debug)]
pub(crate) struct HostProbe {
    stop: Arc<AtomicBool>,
    timer: JoinHandle<Histogram<u64>>,
    receiver: JoinHandle<Histogram<u64>>,
    disk: JoinHandle<std::io::Result<Histogram<u64>>>,
}

impl HostProbe {
    /// Starts the probes; the fdatasync probe appends to a new file `host-probe.bin` in `dir`.
    pub(crate) fn start(dir: &Path) -> std::io::Result<Self> {
        let stop = Arc::new(AtomicBool::new(false));
        let file = std::fs::File::create(dir.join("host-probe.bin"))?;
        let (tx, rx) = async_channel::bounded::<Instant>(1);
        let receiver = std::thread::Builder::new()
            .name("probe-recv".into())
            .spawn(move || {
                let mut h = histogram();
                while let Ok(sent) = rx.recv_blocking() {
                    let _ = h.record(nanos(sent.elapsed()));
                }
                h
            })?;
        let s = stop.clone();
        let timer = std::thread::Builder::new()
            .name("probe-timer".into())
            .spawn(move || {
                let mut late = histogram();
                while !s.load(Ordering::Relaxed) {
                    let t = Instant::now();
                    std::thread::sleep(HANDOFF_PERIOD);
                    let _ = late.record(nanos(t.elapsed().saturating_sub(HANDOFF_PERIOD)));
                    if tx.send_blocking(Instant::now()).is_err() {
                        break;
                    }
                }
                late
            })?;
        let s = stop.clone();
        let disk = std::thread::Builder::new()
            .name("probe-disk".into())
            .spawn(move || {
                let mut file = file;
                let mut h = histogram();
                let record = [0x5au8; FSYNC_BYTES];
                while !s.load(Ordering::Relaxed) {
                    let t = Instant::now();
                    file.write_all(&record)?;
                    file.sync_data()?;
                    let _ = h.record(nanos(t.elapsed()));
                    std::thread::sleep(FSYNC_PERIOD);
                }
                Ok(h)
            })?;
        Ok(Self {
            stop,
            timer,
            receiver,
            disk,
        })
    }

    /// Stops the probes and returns what they measured; a probe that failed leaves its histogram empty
    /// (and says why on stderr).
    pub(crate) fn stop(self) -> HostFloor {
        self.stop.store(true, Ordering::Relaxed);
        let mut floor = HostFloor::empty();
        // The timer thread drops the sender as it ends, which ends the receiver.
        if let Ok(h) = self.timer.join() {
            floor.oversleep = h;
        }
        if let Ok(h) = self.receiver.join() {
            floor.handoff = h;
        }
        match self.disk.join() {
            Ok(Ok(h)) => floor.fdatasync = h,
            Ok(Err(e)) => eprintln!("host probe: fdatasync probe failed: {e}"),
            Err(_) => eprintln!("host probe: fdatasync probe panicked"),
        }
        floor
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    #[test]
    fn probes_measure_every_wait_and_stop_when_told() {
        let dir = tempfile::tempdir().unwrap();
        let probe = HostProbe::start(dir.path()).unwrap();
        std::thread::sleep(Duration::from_millis(300));
        let floor = probe.stop();
        // Every sleep is followed by one hand-off, so the two counts agree (the last sleep may end after the
        // stop without a hand-off); at a 2 ms period 300 ms holds dozens of them.
        assert!(floor.oversleep.len() >= 20, "{}", floor.oversleep.len());
        assert!(floor.handoff.len() + 1 >= floor.oversleep.len());
        assert!(floor.handoff.len() <= floor.oversleep.len());
        assert!(!floor.fdatasync.is_empty());
        // The file holds exactly what was synced (the fdatasync histogram counts completed appends).
        let len = std::fs::metadata(dir.path().join("host-probe.bin"))
            .unwrap()
            .len();
        assert_eq!(len, floor.fdatasync.len() * FSYNC_BYTES as u64);
        let table = floor.table();
        assert_eq!(table.lines().count(), 4, "{table}");
        assert!(table.contains("append+fdatasync"));
    }
}
