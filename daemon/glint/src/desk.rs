//! The alert desk: the one place findings become alerts. It numbers them (global, gap-free sequence), links
//! assessments and withdrawals to their flash, appends them to the journal and fsyncs before anyone sees them,
//! then publishes the new sequence number. Subscribers never get a queue from here: each keeps its own cursor
//! and reads from the desk's in-memory tail of recent alerts or, when further behind, from the journal on disk,
//! so a slow or absent subscriber cannot hold up ingest or the other subscribers.

use std::collections::{BTreeSet, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex, RwLock};

use glint_engine::Finding;
use glint_wire::pb;
use tokio::sync::watch;

use crate::alerts::{self, Sequencer};
use crate::config::JournalConfig;
use crate::journal::{self, Journal, JournalError, OpenReport};
use crate::metrics::{Metrics, Stage};
use crate::timefmt::{now_unix_ns, unix_ns_to_gps_ns};

/// Alerts kept in memory for subscribers that are nearly caught up (older ones are read from disk).
pub(crate) const TAIL_CAPACITY: usize = 1024;

/// Wall-clock stamps that travel with a finding from the ingest socket to the desk.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub(crate) struct Stamps {
    /// When the frame that produced the finding was read, Unix ns (0 for findings of `finish`).
    pub(crate) received_unix_ns: i64,
    /// When the engine returned the finding, Unix ns.
    pub(crate) decided_unix_ns: i64,
}

/// Why the desk could not issue an alert.
#[derive(Debug, thiserror::Error)]
pub(crate) enum DeskError {
    /// The journal failed; the desk stops issuing (a daemon that cannot journal must not send).
    #[error("{0}")]
    Journal(#[from] JournalError),
    /// An earlier journal failure stopped the desk.
    #[error("the alert desk stopped after a journal failure")]
    Stopped,
}

/// Why an operator's withdrawal was refused.
#[derive(Debug, thiserror::Error)]
pub(crate) enum WithdrawError {
    /// No alert with this id in the journal kept.
    #[error("no alert with id '{0}' in the journal (it may be older than the retention)")]
    NotFound(String),
    /// The alert is itself a withdrawal.
    #[error("'{0}' is a withdrawal; withdrawals cannot be withdrawn")]
    IsWithdrawal(String),
    /// A withdrawal of this alert was already issued.
    #[error("'{0}' is already withdrawn")]
    AlreadyWithdrawn(String),
    /// The reason is empty.
    #[error("a withdrawal needs a reason")]
    NoReason,
    /// The desk failed.
    #[error("{0}")]
    Desk(#[from] DeskError),
}

struct Inner {
    journal: Journal,
    sequencer: Sequencer,
    /// Ids of withdrawn alerts within the journal kept (grows with withdrawals, bounded by retention).
    withdrawn: BTreeSet<String>,
    stopped: bool,
}

/// Numbers, journals and publishes alerts. Shared (`Arc`) by engine threads, subscriber tasks and operators.
pub(crate) struct Desk {
    inner: Mutex<Inner>,
    tail: RwLock<VecDeque<Arc<pb::Alert>>>,
    published: watch::Sender<u64>,
    journal_dir: PathBuf,
    metrics: Arc<Metrics>,
}

impl std::fmt::Debug for Desk {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Desk")
            .field("journal_dir", &self.journal_dir)
            .field("last_seq", &self.last_seq())
            .finish()
    }
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    // A panic while holding the lock leaves consistent data (every write is a whole step), so go on.
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}

impl Desk {
    /// Opens the journal in `dir` (cutting a torn tail, applying retention) and loads its newest alerts into
    /// the in-memory tail.
    pub(crate) fn open(
        dir: &Path,
        cfg: &JournalConfig,
        metrics: Arc<Metrics>,
    ) -> Result<(Self, OpenReport), DeskError> {
        let mut tail = VecDeque::with_capacity(TAIL_CAPACITY);
        let mut withdrawn = BTreeSet::new();
        let (journal, report) = Journal::open(
            dir,
            cfg.segment_bytes,
            cfg.retention,
            now_unix_ns(),
            &mut |rec: &journal::Record| {
                if !rec.alert.withdrawn_id.is_empty() {
                    withdrawn.insert(rec.alert.withdrawn_id.clone());
                }
                if tail.len() == TAIL_CAPACITY {
                    tail.pop_front();
                }
                tail.push_back(Arc::new(rec.alert.clone()));
            },
        )?;
        // A torn tail was cut after its records were seen: keep only what the journal still holds.
        let last = journal.last_seq();
        tail.retain(|a: &Arc<pb::Alert>| a.seq <= last && a.seq >= journal.first_seq());
        let (published, _) = watch::channel(last);
        let desk = Self {
            inner: Mutex::new(Inner {
                sequencer: Sequencer::starting_at(last + 1),
                journal,
                withdrawn,
                stopped: false,
            }),
            tail: RwLock::new(tail),
            published,
            journal_dir: dir.to_path_buf(),
            metrics,
        };
        Ok((desk, report))
    }

    /// Newest published (journalled and fsynced) sequence number.
    pub(crate) fn last_seq(&self) -> u64 {
        *self.published.borrow()
    }

    /// Watches the newest published sequence number.
    pub(crate) fn watch(&self) -> watch::Receiver<u64> {
        self.published.subscribe()
    }

    /// Issues the findings of one engine step as alerts: numbered in order, journalled, fsynced once, then
    /// published. Returns the alerts issued (with their latency stamps up to the journal).
    pub(crate) fn issue(
        &self,
        instrument: &str,
        findings: &[Finding],
        stamps: Stamps,
    ) -> Result<Vec<Arc<pb::Alert>>, DeskError> {
        if findings.is_empty() {
            return Ok(Vec::new());
        }
        let mut g = lock(&self.inner);
        let now = now_unix_ns();
        let issued_gps = unix_ns_to_gps_ns(now);
        let mut alerts = Vec::with_capacity(findings.len());
        for f in findings {
            let a = g.sequencer.assign(instrument, f, issued_gps);
            alerts.push(a);
        }
        self.commit(&mut g, alerts, stamps, now)
    }

    /// An operator's withdrawal of the alert `alert_id`: journalled and published like any alert. Runs file
    /// I/O: call it from a blocking thread.
    pub(crate) fn withdraw(
        &self,
        alert_id: &str,
        reason: &str,
        operator: &str,
    ) -> Result<Arc<pb::Alert>, WithdrawError> {
        let reason = reason.trim();
        if reason.is_empty() {
            return Err(WithdrawError::NoReason);
        }
        let target = self
            .find(alert_id)?
            .ok_or_else(|| WithdrawError::NotFound(alert_id.to_string()))?;
        if target.kind == pb::AlertKind::Withdrawal as i32 {
            return Err(WithdrawError::IsWithdrawal(alert_id.to_string()));
        }
        let mut g = lock(&self.inner);
        if g.withdrawn.contains(alert_id) {
            return Err(WithdrawError::AlreadyWithdrawn(alert_id.to_string()));
        }
        let now = now_unix_ns();
        let issued_gps = unix_ns_to_gps_ns(now);
        let mut a = g.sequencer.operator_withdrawal(alert_id, reason, issued_gps);
        // The withdrawal names the instrument and carries the trigger of what it withdraws, so a subscriber
        // filtering by place can match it; the id is stamped again from those.
        a.instrument = target.instrument.clone();
        a.trigger = target.trigger.clone();
        let seq = a.seq;
        alerts::stamp(&mut a, seq, issued_gps);
        tracing::warn!(alert = alert_id, withdrawal = %a.id, operator, reason, "operator withdrawal");
        let mut out = self.commit(&mut g, vec![a], Stamps::default(), now)?;
        out.pop().ok_or(WithdrawError::Desk(DeskError::Stopped))
    }

    fn commit(
        &self,
        g: &mut Inner,
        mut alerts: Vec<pb::Alert>,
        stamps: Stamps,
        now: i64,
    ) -> Result<Vec<Arc<pb::Alert>>, DeskError> {
        if g.stopped {
            return Err(DeskError::Stopped);
        }
        let written = alerts
            .iter()
            .try_for_each(|a| g.journal.append(a, now))
            .and_then(|()| g.journal.sync());
        if let Err(e) = written {
            g.stopped = true;
            return Err(e.into());
        }
        let journaled = now_unix_ns();
        let mut out = Vec::with_capacity(alerts.len());
        let mut tail = self
            .tail
            .write()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        for a in alerts.iter_mut() {
            if !a.withdrawn_id.is_empty() {
                g.withdrawn.insert(a.withdrawn_id.clone());
            }
            if stamps.received_unix_ns != 0 {
                a.latency = Some(pb::Latency {
                    received_unix_ns: stamps.received_unix_ns,
                    decided_unix_ns: stamps.decided_unix_ns,
                    journaled_unix_ns: journaled,
                    ..Default::default()
                });
                self.metrics
                    .record(Stage::Decide, stamps.received_unix_ns, stamps.decided_unix_ns);
                self.metrics
                    .record(Stage::Journal, stamps.decided_unix_ns, journaled);
                if a.kind == pb::AlertKind::Flash as i32 {
                    let (r, d) = (stamps.received_unix_ns, stamps.decided_unix_ns);
                    self.metrics.record(Stage::FlashDecide, r, d);
                }
            }
            self.metrics.count_alert(a.kind);
            let a = Arc::new(std::mem::take(a));
            if tail.len() == TAIL_CAPACITY {
                tail.pop_front();
            }
            tail.push_back(a.clone());
            out.push(a);
        }
        drop(tail);
        if let Some(last) = out.last() {
            self.published.send_replace(last.seq);
        }
        Ok(out)
    }

    /// Makes sure everything appended is on disk (every commit already fsyncs; this is the shutdown stage).
    pub(crate) fn sync(&self) -> Result<(), DeskError> {
        Ok(lock(&self.inner).journal.sync()?)
    }

    /// Up to `max` published alerts with seq > `after`, oldest first, from memory when the tail holds them;
    /// `None` when they must be read from disk (see [`read_from_disk`](Self::read_from_disk)).
    pub(crate) fn read_cached(&self, after: u64, max: usize) -> Option<Vec<Arc<pb::Alert>>> {
        let upto = self.last_seq();
        if after >= upto {
            return Some(Vec::new());
        }
        let tail = self
            .tail
            .read()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        let front = tail.front()?.seq;
        if front > after + 1 {
            return None;
        }
        let skip = usize::try_from(after + 1 - front).unwrap_or(usize::MAX);
        Some(
            tail.iter()
                .skip(skip)
                .take_while(|a| a.seq <= upto)
                .take(max)
                .cloned()
                .collect(),
        )
    }

    /// Like [`read_cached`](Self::read_cached) but from the journal files: blocking I/O.
    pub(crate) fn read_from_disk(&self, after: u64, max: usize) -> Result<Vec<Arc<pb::Alert>>, JournalError> {
        let upto = self.last_seq();
        Ok(journal::read_after(&self.journal_dir, after, upto, max)?
            .into_iter()
            .map(Arc::new)
            .collect())
    }

    /// The alert with this id, from memory or disk (blocking I/O).
    fn find(&self, id: &str) -> Result<Option<Arc<pb::Alert>>, DeskError> {
        let Some(seq) = id.rsplit('-').next().and_then(|s| s.parse::<u64>().ok()) else {
            return Ok(None);
        };
        if seq == 0 || seq > self.last_seq() {
            return Ok(None);
        }
        let found = match self.read_cached(seq - 1, 1) {
            Some(v) => v.into_iter().next(),
            None => journal::read_one(&self.journal_dir, seq)?.map(Arc::new),
        };
        Ok(found.filter(|a| a.id == id))
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
pub(crate) mod tests {
    use super::*;
    use std::time::Duration;

    pub(crate) fn journal_cfg() -> JournalConfig {
        JournalConfig {
            segment_bytes: 1 << 20,
            retention: Duration::from_secs(86_400),
        }
    }

    /// Issues `n` made-up flash alerts straight through the commit path (no engine needed).
    pub(crate) fn issue_test_flashes(desk: &Desk, n: usize, received_unix_ns: i64) -> Vec<Arc<pb::Alert>> {
        let mut g = lock(&desk.inner);
        let now = now_unix_ns();
        let mut alerts = Vec::new();
        for _ in 0..n {
            let seq = g.sequencer.next_seq();
            let mut a = g.sequencer.operator_withdrawal("x", "y", unix_ns_to_gps_ns(now));
            a.kind = pb::AlertKind::Flash as i32;
            a.withdrawn_id.clear();
            a.reason.clear();
            a.instrument = "ventisca-array".into();
            a.trigger = Some(pb::Trigger {
                sigma: 4.0 + (seq % 5) as f64,
                end_gps_ns: 1_400_000_000_000_000_000,
                ..Default::default()
            });
            alerts::stamp(&mut a, seq, unix_ns_to_gps_ns(now));
            alerts.push(a);
        }
        let stamps = Stamps {
            received_unix_ns,
            decided_unix_ns: received_unix_ns,
        };
        desk.commit(&mut g, alerts, stamps, now).unwrap()
    }

    #[test]
    fn alerts_are_numbered_journalled_published_and_read_back() {
        let tmp = tempfile::tempdir().unwrap();
        let m = Arc::new(Metrics::new());
        let (desk, _) = Desk::open(tmp.path(), &journal_cfg(), m.clone()).unwrap();
        let mut w = desk.watch();
        assert_eq!(desk.last_seq(), 0);
        let got = issue_test_flashes(&desk, 3, now_unix_ns());
        assert_eq!(got.iter().map(|a| a.seq).collect::<Vec<_>>(), vec![1, 2, 3]);
        assert!(w.has_changed().unwrap());
        assert_eq!(*w.borrow_and_update(), 3);
        let l = got[0].latency.unwrap();
        assert!(l.journaled_unix_ns >= l.decided_unix_ns && l.decided_unix_ns > 0);
        assert_eq!(m.percentiles(Stage::Journal).count, 3);
        // Memory and disk agree.
        let mem = desk.read_cached(1, 10).unwrap();
        let disk = desk.read_from_disk(1, 10).unwrap();
        assert_eq!(
            mem.iter().map(|a| a.id.clone()).collect::<Vec<_>>(),
            disk.iter().map(|a| a.id.clone()).collect::<Vec<_>>()
        );
        assert_eq!(mem.len(), 2);
        // Operator withdrawal by id, then a second one is refused.
        let id = got[1].id.clone();
        let wd = desk
            .withdraw(&id, "cosmic-ray shower in the camera", "ops")
            .unwrap();
        assert_eq!(
            (wd.seq, wd.withdrawn_id.as_str(), wd.kind),
            (4, id.as_str(), pb::AlertKind::Withdrawal as i32)
        );
        assert_eq!(wd.instrument, "ventisca-array");
        assert!(matches!(
            desk.withdraw(&id, "again", "ops"),
            Err(WithdrawError::AlreadyWithdrawn(_))
        ));
        assert!(matches!(
            desk.withdraw(&wd.id, "x", "ops"),
            Err(WithdrawError::IsWithdrawal(_))
        ));
        assert!(matches!(
            desk.withdraw("GL-nope-1", "x", "ops"),
            Err(WithdrawError::NotFound(_))
        ));
        assert!(matches!(
            desk.withdraw(&got[0].id, "  ", "ops"),
            Err(WithdrawError::NoReason)
        ));
        drop(desk);
        // Reopened: numbering continues, the tail is reloaded, the withdrawal is remembered.
        let (desk, rep) = Desk::open(tmp.path(), &journal_cfg(), m).unwrap();
        assert_eq!((desk.last_seq(), rep.records), (4, 4));
        assert_eq!(desk.read_cached(0, 10).unwrap().len(), 4);
        assert!(matches!(
            desk.withdraw(&id, "again", "ops"),
            Err(WithdrawError::AlreadyWithdrawn(_))
        ));
        assert_eq!(issue_test_flashes(&desk, 1, 0)[0].seq, 5);
    }

    #[test]
    fn old_alerts_come_from_disk_once_the_tail_has_moved_on() {
        let tmp = tempfile::tempdir().unwrap();
        let (desk, _) = Desk::open(tmp.path(), &journal_cfg(), Arc::new(Metrics::new())).unwrap();
        let n = TAIL_CAPACITY + 10;
        issue_test_flashes(&desk, n, 0);
        assert!(desk.read_cached(0, 5).is_none());
        let first = desk.read_from_disk(0, 5).unwrap();
        assert_eq!(
            first.iter().map(|a| a.seq).collect::<Vec<_>>(),
            vec![1, 2, 3, 4, 5]
        );
        let recent = desk.read_cached(n as u64 - 3, 100).unwrap();
        assert_eq!(
            recent.iter().map(|a| a.seq).collect::<Vec<_>>(),
            vec![n as u64 - 2, n as u64 - 1, n as u64]
        );
    }
}
