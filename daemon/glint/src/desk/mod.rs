//! The alert desk: the one place findings become alerts. It numbers them (global, gap-free sequence) and links
//! assessments and withdrawals to their flash on the issuing thread; its own journal thread appends them to the
//! journal and fsyncs (one fsync for all that queued meanwhile) before anyone sees them, then publishes the new
//! sequence number. Subscribers never get a queue from here: each keeps its own cursor and reads from the
//! desk's in-memory tail of recent alerts or, when further behind, from the journal on disk, so a slow or
//! absent subscriber cannot hold up ingest or the other subscribers.

pub(crate) mod issuing;
pub(crate) mod journal;

use std::collections::{BTreeMap, BTreeSet, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::{Arc, Condvar, Mutex, RwLock};

use glint_engine::Finding;
use glint_wire::pb;
use tokio::sync::watch;
use tokio_util::sync::CancellationToken;

use crate::alerts::{self, Sequencer};
use crate::config::JournalConfig;
use crate::metrics::{Metrics, Stage};
use crate::timefmt::{now_unix_ns, unix_ns_to_gps_ns};
use journal::{Journal, JournalError, OpenReport, SeqGap};

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
    /// The journal failed while writing these alerts; the desk has stopped.
    #[error("the journal failed: {0}")]
    Failed(String),
    /// An earlier journal failure stopped the desk.
    #[error("the alert desk stopped after a journal failure")]
    Stopped,
    /// The desk refuses new alerts before the journal's disk fills (see `daemon.disk_min_free_bytes`).
    #[error("the alert desk refuses new alerts: {0}")]
    Refused(String),
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

/// Alerts numbered and waiting for the committer. When this many wait, whoever issues the next one waits too
/// (the same policy as everywhere else: nothing is dropped, ingest slows down). A batch larger than this is
/// still taken whole when nothing else waits.
pub(crate) const COMMIT_QUEUE: usize = 4096;

/// What a caller waiting on its alerts (an operator's withdrawal, a test) gets back once they are journalled.
type Reply = std::sync::mpsc::SyncSender<Result<Vec<Arc<pb::Alert>>, DeskError>>;

/// Alerts of one issuing call, numbered, on their way to the journal.
struct Pending {
    alerts: Vec<pb::Alert>,
    stamps: Stamps,
    reply: Option<Reply>,
}

/// The numbering side of the desk: cheap, taken by engine threads, the fit worker and operators.
struct Numbering {
    sequencer: Sequencer,
    /// Ids of withdrawn alerts within the journal kept (grows with withdrawals, bounded by retention). Noted
    /// when the withdrawal is numbered, so a second one of the same alert is refused even before the first is
    /// on disk.
    withdrawn: BTreeSet<String>,
    /// Flash id -> the id of its assessment, within the journal kept: withdrawing a flash withdraws its
    /// assessment with it.
    assessed: BTreeMap<String, String>,
    queue: Vec<Pending>,
    queued_alerts: usize,
    /// Newest sequence number handed out, and newest one journalled and published.
    assigned: u64,
    committed: u64,
    /// The journal failed: nothing more is numbered.
    stopped: bool,
    /// Why new alerts are refused (the disk is nearly full), if they are.
    refusing: Option<String>,
    /// The desk is being dropped: the committer drains the queue and ends.
    closing: bool,
}

/// State shared by the desk's handle and its committer thread.
struct Shared {
    numbering: Mutex<Numbering>,
    /// Wakes the committer when alerts are queued.
    queued: Condvar,
    /// Wakes issuers waiting for room and flushes waiting for the queue to drain.
    settled: Condvar,
    /// Only the committer appends; `sync` at shutdown and nothing else also takes it.
    journal: Mutex<Journal>,
    tail: RwLock<VecDeque<Arc<pb::Alert>>>,
    published: watch::Sender<u64>,
    metrics: Arc<Metrics>,
    /// Cancelled when the journal fails, which stops the daemon: one that cannot journal must not send.
    failure: CancellationToken,
    /// The previous commit's disk work (writes and fdatasync), host clock `[start, end)` Unix ns: an alert
    /// queued while it ran waited on its rest too. Only the committer thread touches it.
    last_write: Mutex<(i64, i64)>,
}

/// Numbers, journals and publishes alerts. Shared (`Arc`) by engine threads, the fit worker, subscriber
/// tasks and operators.
///
/// Numbering happens on the caller's thread, under a lock held for microseconds. Writing and fsyncing happen
/// on the desk's own committer thread, which takes every alert queued while the previous fsync ran and
/// writes them with one fsync (group commit). So an engine thread never waits on the disk: a slow fsync
/// delays the alerts in it, not the photons behind them, and one fsync covers alerts that arrive together.
pub(crate) struct Desk {
    shared: Arc<Shared>,
    committer: Option<std::thread::JoinHandle<()>>,
    journal_dir: PathBuf,
    /// Holes in the sequence found at open, with their reasons, for the gaps subscribers are sent.
    known_gaps: Vec<SeqGap>,
    /// Per instrument, the latest trigger end (GPS ns) of a flash or assessment in the journal at open.
    issued_through: BTreeMap<String, i64>,
}

impl std::fmt::Debug for Desk {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Desk")
            .field("journal_dir", &self.journal_dir)
            .field("last_seq", &self.last_seq())
            .finish()
    }
}

/// The flash an assessment belongs to, by id.
fn linked_flash(a: &pb::Alert) -> Option<&str> {
    (a.kind == pb::AlertKind::Assessment as i32)
        .then_some(a.assessment.as_ref())
        .flatten()
        .map(|x| x.flash_id.as_str())
        .filter(|id| !id.is_empty())
}

fn lock<T>(m: &Mutex<T>) -> std::sync::MutexGuard<'_, T> {
    // A panic while holding the lock leaves consistent data (every write is a whole step), so go on.
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}

fn wait<'a, T>(c: &Condvar, g: std::sync::MutexGuard<'a, T>) -> std::sync::MutexGuard<'a, T> {
    c.wait(g).unwrap_or_else(std::sync::PoisonError::into_inner)
}

impl Desk {
    /// Opens the journal in `dir` (cutting a torn tail, applying retention), loads its newest alerts into
    /// the in-memory tail and starts the committer thread. `failure` is cancelled if the journal ever fails.
    pub(crate) fn open(
        dir: &Path,
        cfg: &JournalConfig,
        metrics: Arc<Metrics>,
        failure: CancellationToken,
    ) -> Result<(Self, OpenReport), DeskError> {
        let mut tail = VecDeque::with_capacity(TAIL_CAPACITY);
        let mut withdrawn = BTreeSet::new();
        let mut issued_through = BTreeMap::new();
        let mut assessed = BTreeMap::new();
        let (journal, report) = Journal::open(
            dir,
            cfg.segment_bytes,
            cfg.retention,
            now_unix_ns(),
            &mut |rec: &journal::Record| {
                if !rec.alert.withdrawn_id.is_empty() {
                    withdrawn.insert(rec.alert.withdrawn_id.clone());
                }
                if let Some(flash) = linked_flash(&rec.alert) {
                    assessed.insert(flash.to_string(), rec.alert.id.clone());
                }
                let engine_kind = rec.alert.kind == pb::AlertKind::Flash as i32
                    || rec.alert.kind == pb::AlertKind::Assessment as i32;
                if let (true, Some(t)) = (engine_kind, rec.alert.trigger.as_ref()) {
                    let e = issued_through
                        .entry(rec.alert.instrument.clone())
                        .or_insert(t.end_gps_ns);
                    *e = (*e).max(t.end_gps_ns);
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
        // Numbering resumes past every number ever handed out, not just past the newest record kept.
        let next = journal.next_seq();
        let shared = Arc::new(Shared {
            numbering: Mutex::new(Numbering {
                sequencer: Sequencer::starting_at(next),
                withdrawn,
                assessed,
                queue: Vec::new(),
                queued_alerts: 0,
                assigned: next - 1,
                committed: next - 1,
                stopped: false,
                refusing: None,
                closing: false,
            }),
            queued: Condvar::new(),
            settled: Condvar::new(),
            journal: Mutex::new(journal),
            tail: RwLock::new(tail),
            published,
            metrics,
            failure,
            last_write: Mutex::new((0, 0)),
        });
        let s = shared.clone();
        let committer = std::thread::Builder::new()
            .name("journal".into())
            .spawn(move || s.run_committer())
            .map_err(|e| {
                DeskError::Journal(JournalError::Io {
                    path: dir.to_path_buf(),
                    action: "start the thread for",
                    source: e,
                })
            })?;
        let desk = Self {
            shared,
            committer: Some(committer),
            journal_dir: dir.to_path_buf(),
            known_gaps: report.gaps.clone(),
            issued_through,
        };
        Ok((desk, report))
    }

    /// The latest trigger end (GPS ns) of a flash or assessment of `instrument` that the journal held when
    /// the desk opened: photons up to it were searched before, whatever the engine's saved state says.
    pub(crate) fn issued_through(&self, instrument: &str) -> Option<i64> {
        self.issued_through.get(instrument).copied()
    }

    /// Newest published (journalled and fsynced) sequence number.
    pub(crate) fn last_seq(&self) -> u64 {
        *self.shared.published.borrow()
    }

    /// Watches the newest published sequence number.
    pub(crate) fn watch(&self) -> watch::Receiver<u64> {
        self.shared.published.subscribe()
    }

    /// Numbers the findings of one engine step and queues them for the journal; returns at once. They are
    /// published, and reach subscribers, once the committer has fsynced them. An error means the journal
    /// failed earlier and the desk issues nothing more.
    pub(crate) fn issue(
        &self,
        instrument: &str,
        findings: &[Finding],
        stamps: Stamps,
    ) -> Result<(), DeskError> {
        if findings.is_empty() {
            return Ok(());
        }
        // Room for each finding and the withdrawal an operator's earlier word may add to it.
        let mut g = self.room_for(2 * findings.len())?;
        let issued_gps = unix_ns_to_gps_ns(now_unix_ns());
        let mut alerts = Vec::with_capacity(findings.len());
        for f in findings {
            if let Finding::Withdrawal(_) = f {
                // The engine withdraws a flash an operator already withdrew: said once is enough.
                let a = g.sequencer.peek_withdrawn(instrument, f);
                if a.is_some_and(|id| g.withdrawn.contains(id.as_str())) {
                    g.sequencer.forget(instrument, f);
                    continue;
                }
            }
            let a = g.sequencer.assign(instrument, f, issued_gps);
            let flash = linked_flash(&a)
                .filter(|id| g.withdrawn.contains(*id))
                .map(str::to_string);
            alerts.push(a);
            if let Some(flash) = flash {
                // An operator withdrew the flash while its candidate was open: the assessment goes with it.
                let target = alerts.last().cloned().unwrap_or_default();
                let reason = format!("withdrawn with its flash {flash}, which an operator withdrew");
                alerts.push(g.sequencer.withdrawal_of(&target, &reason, issued_gps));
                tracing::warn!(alert = %target.id, flash = %flash, "assessment withdrawn with its flash");
            }
        }
        self.shared.enqueue(&mut g, alerts, stamps, None);
        Ok(())
    }

    /// Waits until the queue has room for `n` alerts (or is empty) and returns the numbering lock.
    fn room_for(&self, n: usize) -> Result<std::sync::MutexGuard<'_, Numbering>, DeskError> {
        let mut g = lock(&self.shared.numbering);
        loop {
            if g.stopped {
                return Err(DeskError::Stopped);
            }
            if let Some(why) = &g.refusing {
                return Err(DeskError::Refused(why.clone()));
            }
            if g.queued_alerts == 0 || g.queued_alerts + n <= COMMIT_QUEUE {
                return Ok(g);
            }
            g = wait(&self.shared.settled, g);
        }
    }

    /// Queues alerts already numbered under `g` and waits until they are journalled and published.
    fn issue_and_wait(
        &self,
        mut g: std::sync::MutexGuard<'_, Numbering>,
        alerts: Vec<pb::Alert>,
        stamps: Stamps,
    ) -> Result<Vec<Arc<pb::Alert>>, DeskError> {
        let (tx, rx) = std::sync::mpsc::sync_channel(1);
        self.shared.enqueue(&mut g, alerts, stamps, Some(tx));
        drop(g);
        rx.recv().map_err(|_| DeskError::Stopped)?
    }

    /// An operator's withdrawal of the alert `alert_id`: journalled and published like any alert; returns once
    /// it is on disk. Runs file I/O and waits: call it from a blocking thread.
    ///
    /// Withdrawing a flash withdraws its assessment too (now if it was issued, else the moment it is); each
    /// withdrawal's reason says so. Withdrawing an assessment withdraws it alone, and its reason says the
    /// flash still stands. Returns the withdrawal of `alert_id` first, then any issued with it.
    pub(crate) fn withdraw(
        &self,
        alert_id: &str,
        reason: &str,
        operator: &str,
    ) -> Result<Vec<Arc<pb::Alert>>, WithdrawError> {
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
        let mut g = self.room_for(1)?;
        if g.withdrawn.contains(alert_id) {
            return Err(WithdrawError::AlreadyWithdrawn(alert_id.to_string()));
        }
        let issued_gps = unix_ns_to_gps_ns(now_unix_ns());
        let is_flash = target.kind == pb::AlertKind::Flash as i32;
        let assessment = if is_flash {
            g.assessed
                .get(alert_id)
                .filter(|a| !g.withdrawn.contains(a.as_str()))
                .cloned()
        } else {
            None
        };
        let assessment = match assessment {
            Some(id) => self.find(&id)?,
            None => None,
        };
        let said = match (&assessment, is_flash, linked_flash(&target)) {
            (Some(a), _, _) => format!("{reason} (its assessment {} is withdrawn with it)", a.id),
            (None, true, _) => format!("{reason} (its assessment, when issued, is withdrawn with it)"),
            (None, false, Some(flash)) => format!(
                "{reason} (this assessment only: its flash {flash} still stands; withdraw the flash to retract the detection)"
            ),
            (None, false, None) => reason.to_string(),
        };
        let mut out = vec![g.sequencer.withdrawal_of(&target, &said, issued_gps)];
        tracing::warn!(alert = alert_id, withdrawal = %out[0].id, operator, reason, "operator withdrawal");
        if let Some(a) = assessment {
            let why = format!("{reason} (withdrawn with its flash {alert_id})");
            out.push(g.sequencer.withdrawal_of(&a, &why, issued_gps));
            tracing::warn!(alert = %a.id, withdrawal = %out[1].id, operator, flash = alert_id, "operator withdrawal of the flash's assessment");
        }
        Ok(self.issue_and_wait(g, out, Stamps::default())?)
    }

    /// An operator's TEST alert: journalled and published like any alert, so it reaches every sink; it
    /// carries no trigger. Returns once it is on disk. Runs file I/O and waits: call it from a blocking thread.
    pub(crate) fn issue_test(&self, operator: &str, note: &str) -> Result<Arc<pb::Alert>, DeskError> {
        let g = self.room_for(1)?;
        let issued_gps = unix_ns_to_gps_ns(now_unix_ns());
        let mut g = g;
        let a = g.sequencer.test_alert(operator, note, issued_gps);
        tracing::info!(alert = %a.id, operator, note, "operator test alert");
        let mut out = self.issue_and_wait(g, vec![a], Stamps::default())?;
        out.pop().ok_or(DeskError::Stopped)
    }

    /// Issues `n` TEST alerts (kind TEST, no trigger: they name no real event) for `instrument`, journalled
    /// and published like any alert; returns once they are on disk. What `glint bench-bus` measures the bus
    /// sink with. Blocking.
    pub(crate) fn issue_test_alerts(
        &self,
        instrument: &str,
        n: usize,
    ) -> Result<Vec<Arc<pb::Alert>>, DeskError> {
        let g = self.room_for(n)?;
        let mut g = g;
        let now = now_unix_ns();
        let issued_gps = unix_ns_to_gps_ns(now);
        let alerts = (0..n)
            .map(|_| {
                let mut a = g.sequencer.operator_withdrawal("", "", issued_gps);
                a.kind = pb::AlertKind::Test as i32;
                a.instrument = instrument.to_string();
                a.reason = "test alert: names no real event".into();
                let seq = a.seq;
                alerts::stamp(&mut a, seq, issued_gps);
                a
            })
            .collect();
        let stamps = Stamps {
            received_unix_ns: now,
            decided_unix_ns: now,
        };
        self.issue_and_wait(g, alerts, stamps)
    }

    /// Waits until every alert numbered so far is journalled, then makes sure the journal is on disk (every
    /// commit already fsyncs; this is the shutdown stage) and records a clean stop, so the next start
    /// numbers on without a gap. Blocking.
    pub(crate) fn sync(&self) -> Result<(), DeskError> {
        let mut g = lock(&self.shared.numbering);
        while g.committed < g.assigned && !g.stopped {
            g = wait(&self.shared.settled, g);
        }
        if g.stopped {
            return Err(DeskError::Stopped);
        }
        drop(g);
        Ok(lock(&self.shared.journal).mark_clean()?)
    }

    /// Refuses every new alert from now on with `why` (alerts already numbered are still journalled).
    pub(crate) fn refuse(&self, why: String) {
        lock(&self.shared.numbering).refusing = Some(why);
        self.shared.settled.notify_all();
    }
}

impl Drop for Desk {
    /// The committer drains what is queued, then ends; a desk that did not fail records a clean stop.
    fn drop(&mut self) {
        lock(&self.shared.numbering).closing = true;
        self.shared.queued.notify_all();
        if let Some(h) = self.committer.take() {
            let _ = h.join();
        }
        if !lock(&self.shared.numbering).stopped {
            if let Err(e) = lock(&self.shared.journal).mark_clean() {
                tracing::warn!("journal: cannot record a clean stop: {e}");
            }
        }
    }
}

impl Shared {
    fn enqueue(&self, g: &mut Numbering, alerts: Vec<pb::Alert>, stamps: Stamps, reply: Option<Reply>) {
        for a in &alerts {
            if !a.withdrawn_id.is_empty() {
                g.withdrawn.insert(a.withdrawn_id.clone());
            }
            if let Some(flash) = linked_flash(a) {
                g.assessed.insert(flash.to_string(), a.id.clone());
            }
        }
        if let Some(last) = alerts.last() {
            g.assigned = g.assigned.max(last.seq);
        }
        g.queued_alerts += alerts.len();
        g.queue.push(Pending {
            alerts,
            stamps,
            reply,
        });
        self.queued.notify_one();
    }

    /// The committer thread: takes everything queued, appends it, fsyncs once, publishes, and again.
    fn run_committer(&self) {
        loop {
            let mut g = lock(&self.numbering);
            while g.queue.is_empty() && !g.closing {
                g = wait(&self.queued, g);
            }
            if g.queue.is_empty() {
                return;
            }
            let batch = std::mem::take(&mut g.queue);
            g.queued_alerts = 0;
            drop(g);
            self.settled.notify_all();
            self.commit(batch);
        }
    }

    fn commit(&self, batch: Vec<Pending>) {
        let now = now_unix_ns();
        let write_start = now;
        let written = {
            let mut j = lock(&self.journal);
            let newest = batch.iter().flat_map(|p| &p.alerts).map(|a| a.seq).max();
            newest
                .map_or(Ok(()), |n| j.reserve(n))
                .and_then(|()| {
                    batch
                        .iter()
                        .flat_map(|p| &p.alerts)
                        .try_for_each(|a| j.append(a, now))
                })
                .and_then(|()| j.sync())
        };
        if let Err(e) = written {
            let n: usize = batch.iter().map(|p| p.alerts.len()).sum();
            tracing::error!("cannot journal {n} alert(s), the desk stops: {e}");
            let mut g = lock(&self.numbering);
            g.stopped = true;
            // Whatever was queued behind them is not journalled either.
            g.queue.clear();
            g.queued_alerts = 0;
            drop(g);
            self.failure.cancel();
            self.settled.notify_all();
            for p in batch {
                if let Some(r) = p.reply {
                    let _ = r.send(Err(DeskError::Failed(e.to_string())));
                }
            }
            return;
        }
        let journaled = now_unix_ns();
        let previous = std::mem::replace(&mut *lock(&self.last_write), (write_start, journaled));
        self.metrics
            .journal_fsyncs
            .fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        // Stamped, counted and logged outside the tail's lock: subscriber tasks read the tail meanwhile.
        let mut replies = Vec::new();
        let mut done = Vec::new();
        for p in batch {
            let mut out = Vec::with_capacity(p.alerts.len());
            for mut a in p.alerts {
                let wait = disk_wait_ns(p.stamps.decided_unix_ns, previous, (write_start, journaled));
                self.stamp_latency(&mut a, p.stamps, journaled, wait);
                self.metrics.count_alert(&a);
                out.push(Arc::new(a));
            }
            done.extend(out.iter().cloned());
            if let Some(r) = p.reply {
                replies.push((r, out));
            }
        }
        let last = done.last().map(|a| a.seq);
        {
            let mut tail = self
                .tail
                .write()
                .unwrap_or_else(std::sync::PoisonError::into_inner);
            for a in &done {
                if tail.len() == TAIL_CAPACITY {
                    tail.pop_front();
                }
                tail.push_back(a.clone());
            }
        }
        if let Some(last) = last {
            self.published.send_replace(last);
            lock(&self.numbering).committed = last;
            self.settled.notify_all();
        }
        for a in &done {
            tracing::info!(instrument = %a.instrument, seq = a.seq, id = %a.id, kind = alerts::kind_name(a.kind), verdict = a.assessment.as_ref().map_or("", |x| alerts::verdict_name(x.verdict)), "alert issued");
        }
        for (r, out) in replies {
            let _ = r.send(Ok(out));
        }
    }

    fn stamp_latency(&self, a: &mut pb::Alert, stamps: Stamps, journaled: i64, fsync_wait_ns: i64) {
        if stamps.received_unix_ns == 0 {
            return;
        }
        a.latency = Some(pb::Latency {
            received_unix_ns: stamps.received_unix_ns,
            decided_unix_ns: stamps.decided_unix_ns,
            journaled_unix_ns: journaled,
            fsync_wait_ns,
            ..Default::default()
        });
        let (r, d) = (stamps.received_unix_ns, stamps.decided_unix_ns);
        self.metrics.record(Stage::Decide, r, d);
        self.metrics.record(Stage::Journal, d, journaled);
        if a.kind == pb::AlertKind::Flash as i32 {
            self.metrics.record(Stage::FlashDecide, r, d);
        }
    }
}

/// How long an alert decided at `decided` waited on the journal's disk work: all of its own commit's
/// (`own`, writes and fdatasync) and whatever of the previous commit (`previous`) was still running after
/// it was decided, since the committer takes a new batch only when the previous one is on disk. Host clock,
/// Unix ns; never negative.
fn disk_wait_ns(decided: i64, previous: (i64, i64), own: (i64, i64)) -> i64 {
    let before = (previous.1 - decided.max(previous.0)).max(0);
    (own.1 - own.0).max(0) + before
}

/// The alerts of `iter` numbered `after + 1`, `after + 2`, ... up to `upto`, at most `max`: the run stops
/// at the first number missing, so a reader never steps over a gap without being told.
fn contiguous<'a>(
    iter: impl Iterator<Item = &'a Arc<pb::Alert>>,
    after: u64,
    upto: u64,
    max: usize,
) -> Vec<Arc<pb::Alert>> {
    (after + 1..)
        .zip(iter)
        .take_while(|(expect, a)| a.seq == *expect && a.seq <= upto)
        .take(max)
        .map(|(_, a)| a.clone())
        .collect()
}

impl Desk {
    /// Published alerts numbered `after + 1`, `after + 2`, ... (at most `max`, stopping at the first number
    /// missing), from memory when the tail holds them; `None` when they must be read from disk (see
    /// [`read_from_disk`](Self::read_from_disk)). Empty when `after + 1` is itself missing: a gap, which
    /// [`gap_after`](Self::gap_after) describes.
    pub(crate) fn read_cached(&self, after: u64, max: usize) -> Option<Vec<Arc<pb::Alert>>> {
        let upto = self.last_seq();
        if after >= upto {
            return Some(Vec::new());
        }
        let tail = self
            .shared
            .tail
            .read()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        // Numbers in the tail increase but need not be contiguous: look the position up by number.
        if tail.front()?.seq > after + 1 {
            return None;
        }
        let start = tail.partition_point(|a| a.seq <= after);
        Some(contiguous(tail.range(start..), after, upto, max))
    }

    /// Like [`read_cached`](Self::read_cached) but from the journal files: blocking I/O.
    pub(crate) fn read_from_disk(&self, after: u64, max: usize) -> Result<Vec<Arc<pb::Alert>>, JournalError> {
        let upto = self.last_seq();
        let read: Vec<Arc<pb::Alert>> = journal::read_after(&self.journal_dir, after, upto, max)?
            .into_iter()
            .map(Arc::new)
            .collect();
        Ok(contiguous(read.iter(), after, upto, max))
    }

    /// The gap a reader at `after` has reached: the numbers from `after + 1` up to the next one the journal
    /// holds (or the newest published), with the reason. `None` when `after + 1` is readable after all (it
    /// was published meanwhile). Blocking I/O.
    pub(crate) fn gap_after(&self, after: u64) -> Result<Option<pb::Gap>, JournalError> {
        let upto = self.last_seq();
        if after >= upto {
            return Ok(None);
        }
        let cached = {
            let tail = self
                .shared
                .tail
                .read()
                .unwrap_or_else(std::sync::PoisonError::into_inner);
            match tail.front() {
                Some(f) if f.seq <= after + 1 => Some(tail.iter().map(|a| a.seq).find(|s| *s > after)),
                _ => None,
            }
        };
        let next_held = match cached {
            Some(n) => n,
            None => journal::read_after(&self.journal_dir, after, upto, 1)?
                .first()
                .map(|a| a.seq),
        };
        let to = match next_held {
            Some(n) if n == after + 1 => return Ok(None),
            Some(n) => n - 1,
            None => upto,
        };
        let from = after + 1;
        let first_kept = lock(&self.shared.journal).first_seq();
        let reason = match self.known_gaps.iter().find(|g| g.from <= to && from <= g.to) {
            Some(g) => g.reason.clone(),
            None if to < first_kept => "older than the journal's retention (deleted)".to_string(),
            None => "not in the journal (damaged or deleted while the daemon ran)".to_string(),
        };
        Ok(Some(pb::Gap {
            from_seq: from,
            to_seq: to,
            reason,
        }))
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

    /// A desk on a fresh journal in `dir`.
    fn open_desk(dir: &Path, metrics: Arc<Metrics>) -> (Desk, OpenReport) {
        Desk::open(dir, &journal_cfg(), metrics, CancellationToken::new()).unwrap()
    }

    /// Issues `n` made-up flash alerts straight through the commit path (no engine needed).
    pub(crate) fn issue_test_flashes(desk: &Desk, n: usize, received_unix_ns: i64) -> Vec<Arc<pb::Alert>> {
        issue_test_flashes_with_photons(desk, n, 0, received_unix_ns)
    }

    /// Test flashes carrying `photons` photons each (about 28 bytes apiece on the wire).
    pub(crate) fn issue_test_flashes_with_photons(
        desk: &Desk,
        n: usize,
        photons: usize,
        received_unix_ns: i64,
    ) -> Vec<Arc<pb::Alert>> {
        let mut g = desk.room_for(n).unwrap();
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
                photon_time_gps_ns: (0..photons as i64)
                    .map(|i| 1_400_000_000_000_000_000 - i)
                    .collect(),
                photon_ra_deg: vec![10.0; photons],
                photon_dec_deg: vec![-20.0; photons],
                photon_energy_gev: vec![500.0; photons],
                ..Default::default()
            });
            alerts::stamp(&mut a, seq, unix_ns_to_gps_ns(now));
            alerts.push(a);
        }
        let stamps = Stamps {
            received_unix_ns,
            decided_unix_ns: received_unix_ns,
        };
        desk.issue_and_wait(g, alerts, stamps).unwrap()
    }

    #[test]
    fn the_disk_wait_counts_the_own_commit_and_the_rest_of_the_one_running() {
        // Decided at 100 while the previous commit ran [50, 180): 80 of it, then its own [180, 230): 50.
        assert_eq!(disk_wait_ns(100, (50, 180), (180, 230)), 130);
        // Decided after the previous one ended: its own only.
        assert_eq!(disk_wait_ns(200, (50, 180), (210, 230)), 20);
        // Decided before the previous one began (queued behind a busy committer): all of it.
        assert_eq!(disk_wait_ns(10, (50, 180), (180, 230)), 180);
        // A clock step backwards never gives a negative wait.
        assert_eq!(disk_wait_ns(100, (0, 0), (230, 180)), 0);
    }

    #[test]
    fn alerts_are_numbered_journalled_published_and_read_back() {
        let tmp = tempfile::tempdir().unwrap();
        let m = Arc::new(Metrics::new());
        let (desk, _) = open_desk(tmp.path(), m.clone());
        let mut w = desk.watch();
        assert_eq!(desk.last_seq(), 0);
        let got = issue_test_flashes(&desk, 3, now_unix_ns());
        assert_eq!(got.iter().map(|a| a.seq).collect::<Vec<_>>(), vec![1, 2, 3]);
        assert!(w.has_changed().unwrap());
        assert_eq!(*w.borrow_and_update(), 3);
        let l = got[0].latency.unwrap();
        assert!(l.journaled_unix_ns >= l.decided_unix_ns && l.decided_unix_ns > 0);
        // The disk's share is part of decided -> journaled, never more; the journal's fdatasync takes time.
        assert!(l.fsync_wait_ns > 0, "{l:?}");
        assert!(
            l.fsync_wait_ns <= l.journaled_unix_ns - l.decided_unix_ns,
            "{l:?}"
        );
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
        // A flash with no assessment yet: one withdrawal, saying the assessment will follow it.
        assert_eq!(wd.len(), 1);
        let wd = wd[0].clone();
        assert!(
            wd.reason
                .contains("its assessment, when issued, is withdrawn with it"),
            "{}",
            wd.reason
        );
        // Its id carries the withdrawn flash's trigger time, like the flash's own id.
        assert_eq!(wd.id.rsplit_once('-').unwrap().0, id.rsplit_once('-').unwrap().0);
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
        let (desk, rep) = open_desk(tmp.path(), m);
        assert_eq!((desk.last_seq(), rep.records), (4, 4));
        assert_eq!(desk.read_cached(0, 10).unwrap().len(), 4);
        assert!(matches!(
            desk.withdraw(&id, "again", "ops"),
            Err(WithdrawError::AlreadyWithdrawn(_))
        ));
        assert_eq!(issue_test_flashes(&desk, 1, 0)[0].seq, 5);
    }

    #[test]
    fn a_lost_segment_is_read_as_an_explicit_gap_from_memory_and_disk() {
        let tmp = tempfile::tempdir().unwrap();
        let cfg = JournalConfig {
            segment_bytes: 4096,
            retention: Duration::from_secs(86_400),
        };
        let m = Arc::new(Metrics::new());
        let (desk, _) = Desk::open(tmp.path(), &cfg, m.clone(), CancellationToken::new()).unwrap();
        issue_test_flashes(&desk, 150, 0);
        drop(desk);
        let mut segs: Vec<_> = std::fs::read_dir(tmp.path())
            .unwrap()
            .map(|e| e.unwrap().path())
            .filter(|p| p.extension().is_some_and(|x| x == "gjl"))
            .collect();
        segs.sort();
        assert!(segs.len() >= 3, "{segs:?}");
        let first_of = |p: &Path| -> u64 {
            let n = p.file_stem().unwrap().to_str().unwrap();
            n.trim_start_matches("segment-").parse().unwrap()
        };
        let (lost_from, lost_to) = (first_of(&segs[1]), first_of(&segs[2]) - 1);
        std::fs::remove_file(&segs[1]).unwrap();
        let (desk, rep) = Desk::open(tmp.path(), &cfg, m, CancellationToken::new()).unwrap();
        assert_eq!(rep.lost_seqs(), lost_to - lost_from + 1);
        assert_eq!(desk.last_seq(), 150);
        let before = lost_from - 1;
        // Memory and disk both stop at the hole rather than step over it.
        let mem = desk.read_cached(0, 1000).unwrap();
        assert_eq!(mem.last().unwrap().seq, before);
        let disk = desk.read_from_disk(0, 1000).unwrap();
        assert_eq!(disk.len() as u64, before);
        assert!(desk.read_cached(before, 10).unwrap().is_empty());
        let gap = desk.gap_after(before).unwrap().unwrap();
        assert_eq!((gap.from_seq, gap.to_seq), (lost_from, lost_to));
        assert!(gap.reason.contains("missing"), "{}", gap.reason);
        assert_eq!(desk.read_cached(lost_to, 1).unwrap()[0].seq, lost_to + 1);
        assert_eq!(desk.gap_after(lost_to).unwrap(), None);
        // New alerts number on after 150.
        assert_eq!(issue_test_flashes(&desk, 1, 0)[0].seq, 151);
    }

    #[test]
    fn old_alerts_come_from_disk_once_the_tail_has_moved_on() {
        let tmp = tempfile::tempdir().unwrap();
        let (desk, _) = open_desk(tmp.path(), Arc::new(Metrics::new()));
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

    /// Flashes of `candidates` from one instrument, as an engine would hand them over.
    fn flashes(candidates: std::ops::Range<u64>) -> Vec<Finding> {
        candidates
            .map(|c| {
                let mut f = crate::desk::issuing::tests::flash(&[1_000, 2_000]);
                f.candidate = c;
                // Tells the flashes apart in the journal (alerts do not carry the engine's candidate).
                f.end_ns = 10_000 + c as i64;
                Finding::Flash(f)
            })
            .collect()
    }

    #[test]
    fn issuing_does_not_wait_for_the_disk_and_one_fsync_covers_what_queued_meanwhile() {
        let tmp = tempfile::tempdir().unwrap();
        let m = Arc::new(Metrics::new());
        let (desk, _) = open_desk(tmp.path(), m.clone());
        let desk = Arc::new(desk);
        let fsyncs = || m.journal_fsyncs.load(std::sync::atomic::Ordering::Relaxed);
        // A disk that does not answer: hold the journal while an engine issues 100 flashes one by one.
        let held = lock(&desk.shared.journal);
        let (done_tx, done) = std::sync::mpsc::channel();
        let d = desk.clone();
        let engine = std::thread::spawn(move || {
            for f in flashes(0..100) {
                d.issue("ventisca-array", std::slice::from_ref(&f), Stamps::default())
                    .unwrap();
            }
            done_tx.send(()).unwrap();
        });
        // Had issuing waited on the journal, this would time out.
        done.recv_timeout(Duration::from_secs(10))
            .expect("issuing waited for the journal");
        engine.join().unwrap();
        assert_eq!(desk.last_seq(), 0, "nothing is published before it is journalled");
        drop(held);
        desk.sync().unwrap();
        assert_eq!(desk.last_seq(), 100);
        // The committer took at most the first flash before it blocked; the other 99 went in one fsync.
        assert!(fsyncs() <= 2, "{} fsyncs for 100 alerts", fsyncs());
        let disk = desk.read_from_disk(0, 200).unwrap();
        assert_eq!(
            disk.iter().map(|a| a.seq).collect::<Vec<_>>(),
            (1..=100).collect::<Vec<_>>()
        );
    }

    #[test]
    fn issuers_on_several_threads_get_one_gap_free_order_each_keeping_its_own() {
        let tmp = tempfile::tempdir().unwrap();
        let (desk, _) = open_desk(tmp.path(), Arc::new(Metrics::new()));
        let desk = Arc::new(desk);
        let threads: Vec<_> = (0..4)
            .map(|i| {
                let d = desk.clone();
                std::thread::spawn(move || {
                    let inst = format!("inst-{i}");
                    // Singly and in small groups, as engine steps and the fit worker do.
                    let all = flashes(0..300);
                    for chunk in all.chunks(1 + i) {
                        d.issue(&inst, chunk, Stamps::default()).unwrap();
                    }
                })
            })
            .collect();
        for t in threads {
            t.join().unwrap();
        }
        desk.sync().unwrap();
        assert_eq!(desk.last_seq(), 1200);
        let disk = desk.read_from_disk(0, 2000).unwrap();
        assert_eq!(
            disk.iter().map(|a| a.seq).collect::<Vec<_>>(),
            (1..=1200).collect::<Vec<_>>()
        );
        // Each issuer's alerts are in the order it issued them (candidate order here).
        for i in 0..4 {
            let inst = format!("inst-{i}");
            let mine: Vec<i64> = disk
                .iter()
                .filter(|a| a.instrument == inst)
                .map(|a| a.trigger.as_ref().unwrap().end_gps_ns - 10_000)
                .collect();
            assert_eq!(mine, (0..300).collect::<Vec<_>>(), "{inst}");
        }
    }
}
