//! `glint run`: the live daemon. Binds the ingest and subscriber listeners, starts one engine thread per
//! instrument (fed by a bounded channel, issuing findings through the alert desk; evaporation fits go to one
//! fit worker), and stops in stages on SIGTERM/SIGINT within `daemon.shutdown_deadline`: stop accepting,
//! drain the engines (open candidates are assessed as cut short) and the fit worker, fsync the journal, say
//! goodbye to subscribers, give the email sink a short grace (its cursors are on disk), and let the bus sink
//! (when `[bus]` is set) publish what is left. A second signal exits at once.
//! Bound addresses are logged and written to `state_dir/ports.json` (useful with port 0).

pub(crate) mod diskspace;
pub(crate) mod driver;
pub(crate) mod health;
pub(crate) mod hostprobe;
pub(crate) mod ingest;
pub(crate) mod loopback;
pub(crate) mod notify;
pub(crate) mod resume;
#[cfg(test)]
mod tests;

use std::fs::File;
use std::future::Future;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

use anyhow::{Context, anyhow, bail};
use glint_wire::pb;
use glint_wire::recording::{Compression, RotatingWriter, RotationPolicy};
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

use crate::config::{Config, InstrumentConfig};
use crate::desk::Desk;
use crate::desk::issuing::{self, Issuer};
use crate::desk::journal::{OpenReport, QUARANTINE};
use crate::metrics::{Metrics, Watermarks};
use crate::net::{Gate, RefusalLog};
use crate::serve::driver::InstrumentDriver;
use crate::sinks::subscribers::{self, Hub};
use ingest::{EngineMsg, IngestShared, Slot};

/// Runs the daemon until `shutdown` resolves (or a fatal error), then stops in stages. Each SIGHUP reloads
/// the configuration from `config_path` (the embedded default when None) and applies what can change
/// without a restart (see [`Daemon::reload`]).
pub(crate) async fn run(
    cfg: Config,
    config_path: Option<PathBuf>,
    shutdown: impl Future<Output = ()>,
) -> anyhow::Result<()> {
    use tokio::signal::unix::{SignalKind, signal};
    let mut hangups = signal(SignalKind::hangup()).context("cannot install the SIGHUP handler")?;
    let mut daemon = Daemon::start(cfg).await?;
    let status = format!(
        "ingest {}, subscribers {}",
        daemon.ingest_addr, daemon.subscribers_addr
    );
    notify::ready(&status);
    let pings = CancellationToken::new();
    let fatal = daemon.fatal.clone();
    tokio::spawn(notify::watchdog(pings.clone(), move || !fatal.is_cancelled()));
    tokio::pin!(shutdown);
    loop {
        tokio::select! {
            () = &mut shutdown => break,
            () = daemon.fatal.cancelled() => {
                tracing::error!("stopping after a fatal error");
                break;
            }
            _ = hangups.recv() => {
                notify::reloading();
                match crate::config::load_config(config_path.as_ref()) {
                    Ok(new) => {
                        let notes = daemon.reload(&new);
                        tracing::info!(
                            config = %config_path.as_ref().map_or("<embedded default>".into(), |p| p.display().to_string()),
                            "SIGHUP: configuration reloaded{}",
                            if notes.is_empty() { "; nothing that can change without a restart changed".to_string() } else { format!(": {}", notes.join("; ")) }
                        );
                    }
                    Err(e) => tracing::error!("SIGHUP: the configuration does not load, the running one stays: {e}"),
                }
                notify::ready(&status);
            }
        }
    }
    notify::stopping();
    pings.cancel();
    let fatal = daemon.fatal.is_cancelled();
    daemon.shutdown().await?;
    if fatal {
        bail!("the daemon stopped after a fatal error (see the log)");
    }
    Ok(())
}

/// A running daemon: its addresses, shared state and the handles needed to stop it.
pub(crate) struct Daemon {
    /// Bound ingest address.
    pub(crate) ingest_addr: SocketAddr,
    /// Bound subscriber address.
    pub(crate) subscribers_addr: SocketAddr,
    /// Latency histograms and counters.
    pub(crate) metrics: Arc<Metrics>,
    /// The alert desk.
    pub(crate) desk: Arc<Desk>,
    /// The subscriber side, whose tokens a reload replaces.
    hub: Arc<Hub>,
    /// The email sink, whose recipients a reload replaces.
    email: Option<crate::sinks::email::EmailSinks>,
    deadline: Duration,
    stop_accept: CancellationToken,
    closing: CancellationToken,
    fatal: CancellationToken,
    ingest_tasks: TaskTracker,
    /// The bus sink, when `[bus]` is configured.
    bus_tasks: TaskTracker,
    subscriber_tasks: TaskTracker,
    email_tasks: TaskTracker,
    ingest: Arc<IngestShared>,
    engines: Vec<(String, std::thread::JoinHandle<()>)>,
    engines_done: tokio::sync::mpsc::Receiver<String>,
    fit_worker: Option<std::thread::JoinHandle<()>>,
    _lock: PidLock,
}

/// Keeps a second daemon off the same state directory (two writers would corrupt the journal): a file
/// holding the owner's pid, taken over only when that process is gone (e.g. after SIGKILL), removed on drop.
struct PidLock {
    path: PathBuf,
}

impl PidLock {
    fn take(path: &Path) -> anyhow::Result<Self> {
        if let Ok(text) = std::fs::read_to_string(path) {
            if let Ok(pid) = text.trim().parse::<u32>() {
                let alive = pid != std::process::id()
                    && std::fs::read(format!("/proc/{pid}/cmdline")).is_ok_and(|c| {
                        c.split(|b| *b == 0)
                            .next()
                            .is_some_and(|exe| exe.ends_with(b"glint"))
                    });
                if alive {
                    bail!(
                        "another glint daemon (pid {pid}) is using this state directory ({})",
                        path.display()
                    );
                }
            }
        }
        write_atomic(path, format!("{}\n", std::process::id()).as_bytes())
            .with_context(|| format!("cannot write {}", path.display()))?;
        Ok(Self {
            path: path.to_path_buf(),
        })
    }
}

impl Drop for PidLock {
    fn drop(&mut self) {
        let _ = std::fs::remove_file(&self.path);
    }
}

/// Logs what opening the journal found: damage and lost numbers as errors (never silently), a torn tail and
/// numbers skipped after an unclean stop as warnings.
fn log_open_report(report: &OpenReport, last_seq: u64) {
    if let Some(t) = &report.torn {
        tracing::warn!(
            segment = %t.path.display(),
            offset = t.offset,
            bytes_cut = t.bytes_cut,
            reason = %t.reason,
            "journal: cut a torn tail left by a crash (a copy is in the quarantine directory)"
        );
    }
    for d in &report.damaged {
        tracing::error!(
            segment = %d.path.display(),
            offset = d.offset,
            bytes = d.bytes,
            reason = %d.reason,
            quarantined = %d.quarantined.as_ref().map(|q| q.display().to_string()).unwrap_or_default(),
            "journal: corruption, {} affected; the records after it are kept",
            d.seqs()
        );
    }
    for g in &report.gaps {
        if g.lost {
            tracing::error!(from = g.from, to = g.to, reason = %g.reason, "journal: alerts missing");
        } else {
            tracing::warn!(from = g.from, to = g.to, reason = %g.reason, "journal: numbers skipped");
        }
    }
    if let Some(p) = &report.high_water_problem {
        tracing::error!("journal: {p}; numbering continues from the newest record");
    }
    for d in &report.deleted {
        tracing::info!(segment = %d.display(), "journal: deleted segment past retention");
    }
    tracing::info!(
        records = report.records,
        segments = report.segments,
        damaged = report.damaged.len(),
        lost_seqs = report.lost_seqs(),
        last_seq,
        next_seq = report.next_seq,
        "journal open"
    );
}

fn state_path(state_dir: &Path, instrument: &str) -> PathBuf {
    state_dir.join(format!("acceptance-{instrument}.bin"))
}

/// Writes a file atomically: temporary file, fsync, rename. A failed write (a full disk, say) removes its
/// temporary file rather than leave it behind.
fn write_atomic(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    use std::io::Write as _;
    let tmp = path.with_extension("tmp");
    let written = File::create(&tmp)
        .and_then(|mut f| f.write_all(bytes).and_then(|()| f.sync_all()))
        .and_then(|()| std::fs::rename(&tmp, path));
    if written.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    written
}

impl Daemon {
    /// Opens the state directory and journal, binds both listeners, starts the engine threads and the
    /// listener tasks.
    pub(crate) async fn start(cfg: Config) -> anyhow::Result<Self> {
        let state_dir = cfg.daemon.state_dir.clone();
        std::fs::create_dir_all(&state_dir)
            .with_context(|| format!("cannot create state_dir {}", state_dir.display()))?;
        let lock = PidLock::take(&state_dir.join("glint.pid"))?;
        let journal_dir = state_dir.join("journal");
        diskspace::remove_temporaries(&[&state_dir, &journal_dir, &journal_dir.join(QUARANTINE)]);
        let (disk_warn, disk_min) = (cfg.daemon.disk_warn_free_bytes, cfg.daemon.disk_min_free_bytes);
        let free = diskspace::check_at_start(&state_dir, disk_warn, disk_min)?;
        let ids: Vec<String> = cfg.instruments.iter().map(|i| i.id.clone()).collect();
        let metrics = Arc::new(Metrics::for_instruments(&ids));
        metrics
            .disk_free_bytes
            .store(i64::try_from(free).unwrap_or(i64::MAX), Ordering::Relaxed);
        // Cancelled by anything that must stop the daemon, a journal failure first among them.
        let fatal = CancellationToken::new();
        let (desk, report) = Desk::open(
            &state_dir.join("journal"),
            &cfg.journal,
            metrics.clone(),
            fatal.clone(),
        )
        .with_context(|| {
            format!(
                "cannot open the journal in {}",
                state_dir.join("journal").display()
            )
        })?;
        log_open_report(&report, desk.last_seq());
        metrics.journal_damaged.store(
            report.damaged.len() as u64 + u64::from(report.torn.is_some()),
            Ordering::Relaxed,
        );
        metrics
            .journal_lost_seqs
            .store(report.lost_seqs(), Ordering::Relaxed);
        let desk = Arc::new(desk);
        tokio::spawn(diskspace::watch(
            state_dir.clone(),
            disk_warn,
            disk_min,
            desk.clone(),
            metrics.clone(),
            fatal.clone(),
            fatal.child_token(),
        ));
        let watermarks = Arc::new(Watermarks::new(
            cfg.instruments.iter().map(|i| i.id.clone()).collect(),
        ));

        let ingest_listener = TcpListener::bind(cfg.ingest.listen)
            .await
            .with_context(|| format!("cannot listen on {} (ingest.listen)", cfg.ingest.listen))?;
        let sub_listener = TcpListener::bind(cfg.subscribers.listen)
            .await
            .with_context(|| format!("cannot listen on {} (subscribers.listen)", cfg.subscribers.listen))?;
        let ingest_addr = ingest_listener.local_addr()?;
        let subscribers_addr = sub_listener.local_addr()?;
        let ingest_tls = cfg
            .ingest
            .tls
            .as_ref()
            .map(crate::tls::acceptor)
            .transpose()
            .context("ingest TLS")?;
        let sub_tls = cfg
            .subscribers
            .tls
            .as_ref()
            .map(crate::tls::acceptor)
            .transpose()
            .context("subscriber TLS")?;

        let (done_tx, engines_done) = tokio::sync::mpsc::channel(cfg.instruments.len().max(1));
        let mut slots = Vec::new();
        let mut engines = Vec::new();
        let (fit_tx, fit_worker) =
            issuing::start_fit_worker(desk.clone(), fatal.clone()).context("cannot start the fit worker")?;
        for (index, inst) in cfg.instruments.iter().enumerate() {
            let (tx, rx) = async_channel::bounded(cfg.ingest.queue_batches.get());
            let mut driver =
                InstrumentDriver::live(inst).with_context(|| format!("instrument {}", inst.id))?;
            let sp = state_path(&state_dir, &inst.id);
            match std::fs::read(&sp) {
                Ok(blob) => match driver.load_state(&blob) {
                    Ok(()) => {
                        tracing::info!(instrument = %inst.id, file = %sp.display(), "loaded saved engine state")
                    }
                    Err(e) => {
                        tracing::warn!(instrument = %inst.id, file = %sp.display(), "saved engine state not used: {e}")
                    }
                },
                Err(e) if e.kind() == std::io::ErrorKind::NotFound => {}
                Err(e) => {
                    tracing::warn!(instrument = %inst.id, file = %sp.display(), "cannot read saved engine state: {e}")
                }
            }
            let resume_file = resume::path(&state_dir, &inst.id);
            let point = match resume::load(&resume_file, &inst.id) {
                Ok(p) => p,
                Err(e) => {
                    tracing::warn!(instrument = %inst.id, "resume point not used, starting afresh: {e}");
                    None
                }
            };
            // Photons up to the newest trigger already journalled were searched, even if the state saved
            // after them was lost in a crash.
            let floor = [
                point.map(|p| p.watermark_gps_ns),
                desk.issued_through(&inst.id).map(|t| t.saturating_add(1)),
            ]
            .into_iter()
            .flatten()
            .max();
            if let Some(f) = floor {
                driver.resume_after(f);
                tracing::info!(
                    instrument = %inst.id,
                    resume_after = %crate::timefmt::gps_ns_to_utc(f),
                    last_seq = point.map_or(0, |p| p.last_seq),
                    "resuming: photons before this time were searched before the restart and are counted and dropped"
                );
            }
            let ns = |s: f64| (s * 1e9).round() as i64;
            let slot = Slot::new(
                inst.id.clone(),
                inst.token.clone(),
                tx,
                ns(inst.search.reorder_tolerance_s),
                ns(inst.search.max_clock_jump_s),
            );
            slot.resume_seq(point.map_or(0, |p| p.last_seq));
            slots.push(slot);
            let ctx = EngineThread {
                index,
                id: inst.id.clone(),
                issuer: Issuer::new(
                    &inst.id,
                    driver.reorder_tolerance_ns(),
                    desk.clone(),
                    fit_tx.clone(),
                    fatal.clone(),
                ),
                driver,
                rx,
                watermarks: watermarks.clone(),
                state_file: sp,
                resume_file,
                last_seq: point.map_or(0, |p| p.last_seq),
                behind_reported: 0,
                save_every: cfg.daemon.state_save_interval,
                recorder: recorder(&cfg, inst)?,
                hello: None,
                metrics: metrics.clone(),
                dead_day: (0, 0),
            };
            let done = done_tx.clone();
            let handle = std::thread::Builder::new()
                .name(format!("engine-{}", inst.id))
                .spawn(move || {
                    let id = ctx.id.clone();
                    ctx.run();
                    let _ = done.blocking_send(id);
                })
                .context("cannot start an engine thread")?;
            engines.push((inst.id.clone(), handle));
        }
        // The engine threads hold the only senders: the worker ends once they have.
        drop(fit_tx);
        for w in cfg.startup_warnings() {
            tracing::warn!("{w}");
        }
        let ingest = Arc::new(IngestShared {
            slots,
            max_frame: cfg.daemon.max_frame_bytes,
            ack_every: cfg.ingest.ack_every.get(),
            metrics: metrics.clone(),
            gate: Arc::new(Gate::new(
                cfg.ingest.gate,
                RefusalLog::new("ingest", metrics.clone(), |m| &m.refused_connections),
            )),
            keepalive: cfg.ingest.keepalive,
            frame_timeout: cfg.ingest.frame_timeout,
            max_future_ns: i64::try_from(cfg.ingest.max_future.as_nanos()).unwrap_or(i64::MAX),
        });
        tokio::spawn(health::watch(
            ingest.clone(),
            metrics.clone(),
            cfg.ingest.silent_after,
            fatal.child_token(),
        ));
        health::effective_volumes(&cfg.instruments, &metrics);
        let closing = CancellationToken::new();
        let hub = Arc::new(Hub {
            gate: Arc::new(Gate::new(
                cfg.subscribers.gate,
                RefusalLog::new("subscribers", metrics.clone(), |m| {
                    &m.refused_subscriber_connections
                }),
            )),
            desk: desk.clone(),
            cfg: cfg.subscribers.clone(),
            tokens: std::sync::RwLock::new(Arc::new(cfg.subscribers.clone())),
            max_frame: cfg.daemon.max_frame_bytes,
            watermarks,
            metrics: metrics.clone(),
            closing: closing.clone(),
        });
        let stop_accept = CancellationToken::new();
        let ingest_tasks = TaskTracker::new();
        let subscriber_tasks = TaskTracker::new();
        let email_tasks = TaskTracker::new();
        let mut email_sinks = None;
        if let Some(email) = &cfg.email {
            // A quarter of the shutdown deadline to mail what the last stages journalled; the rest waits for
            // the next start, the cursors being on disk.
            let responses = cfg
                .instruments
                .iter()
                .map(|i| (i.id.clone(), i.response.clone()))
                .collect();
            email_sinks = Some(
                crate::sinks::email::start(
                    email,
                    responses,
                    &state_dir,
                    &crate::sinks::email::Wiring {
                        desk: &desk,
                        metrics: &metrics,
                        closing: &closing,
                        tracker: &email_tasks,
                    },
                    cfg.daemon.shutdown_deadline / 4,
                )
                .context("cannot start the email sink")?,
            );
        }
        tokio::spawn(ingest::serve(
            ingest_listener,
            ingest_tls,
            ingest.clone(),
            ingest_tasks.clone(),
            stop_accept.clone(),
        ));
        tokio::spawn(subscribers::serve(
            sub_listener,
            sub_tls,
            hub.clone(),
            subscriber_tasks.clone(),
            stop_accept.clone(),
        ));
        let bus_tasks = TaskTracker::new();
        if let Some(bus) = cfg.bus.clone() {
            bus_tasks.spawn(crate::sinks::bus::run(
                bus,
                desk.clone(),
                state_dir.clone(),
                metrics.clone(),
                closing.clone(),
            ));
        }
        let mut metrics_addr = None;
        if let Some(addr) = cfg.metrics_listen {
            let l = TcpListener::bind(addr)
                .await
                .with_context(|| format!("cannot listen on {addr} (metrics.listen)"))?;
            metrics_addr = Some(l.local_addr()?);
            let surface = crate::http::Surface::new(metrics.clone(), desk.clone(), cfg.ingest.silent_after);
            tokio::spawn(crate::http::serve(l, surface, stop_accept.clone()));
        }
        tracing::info!(
            version = env!("CARGO_PKG_VERSION"),
            config = %cfg.source_name,
            state_dir = %state_dir.display(),
            ingest = %ingest_addr,
            subscribers = %subscribers_addr,
            metrics = %metrics_addr.map(|a| a.to_string()).unwrap_or_else(|| "off".into()),
            "glint {} started with {}: ingest on {ingest_addr}, subscribers on {subscribers_addr}{}",
            env!("CARGO_PKG_VERSION"),
            cfg.source_name,
            metrics_addr.map(|a| format!(", metrics on {a}")).unwrap_or_default()
        );
        let ports = serde_json::json!({
            "ingest": ingest_addr.to_string(),
            "subscribers": subscribers_addr.to_string(),
            "metrics": metrics_addr.map(|a| a.to_string()),
            "pid": std::process::id(),
        });
        let ports_path = state_dir.join("ports.json");
        write_atomic(&ports_path, ports.to_string().as_bytes())
            .with_context(|| format!("cannot write {}", ports_path.display()))?;
        Ok(Self {
            ingest_addr,
            subscribers_addr,
            metrics,
            desk,
            hub,
            email: email_sinks,
            deadline: cfg.daemon.shutdown_deadline,
            stop_accept,
            closing,
            fatal,
            ingest_tasks,
            subscriber_tasks,
            bus_tasks,
            email_tasks,
            ingest,
            engines,
            engines_done,
            fit_worker: Some(fit_worker),
            _lock: lock,
        })
    }

    /// Applies a reloaded configuration without dropping a stream: the subscriber and operator tokens (new
    /// requests are checked against them; connected subscribers stay) and the email recipients (added,
    /// removed, changed; the others untouched). Everything else needs a restart. Returns what changed.
    pub(crate) fn reload(&mut self, new: &Config) -> Vec<String> {
        let mut notes = self.hub.reload_tokens(&new.subscribers);
        match (self.email.as_mut(), new.email.as_ref()) {
            (Some(e), cfg) => notes.extend(e.reload(cfg)),
            (None, Some(_)) => notes.push("an [email] section was added: it applies after a restart".into()),
            (None, None) => {}
        }
        notes
    }

    /// Stops in stages within the configured deadline.
    pub(crate) async fn shutdown(mut self) -> anyhow::Result<()> {
        let started = Instant::now();
        let end = tokio::time::Instant::now() + self.deadline;
        let late = |stage: &str| {
            anyhow!(
                "shutdown deadline of {:.1} s passed while {stage}",
                self.deadline.as_secs_f64()
            )
        };
        // 1. Stop accepting; producers are told the daemon is going and their connections end.
        self.stop_accept.cancel();
        self.ingest_tasks.close();
        tokio::time::timeout_at(end, self.ingest_tasks.wait())
            .await
            .map_err(|_| late("closing producer connections"))?;
        // 2. Drain the engines: each takes what is queued, assesses its open candidates, saves its state.
        for slot in &self.ingest.slots {
            slot.tx.close();
        }
        let mut left = self.engines.len();
        while left > 0 {
            match tokio::time::timeout_at(end, self.engines_done.recv()).await {
                Ok(Some(id)) => {
                    tracing::info!(instrument = %id, "engine drained");
                    left -= 1;
                }
                Ok(None) => break,
                Err(_) => return Err(late("draining the engines")),
            }
        }
        for (_, h) in self.engines.drain(..) {
            let _ = h.join();
        }
        // The fits the engines deferred, the last assessments among them: the worker ends once it has run
        // them all, since the engine threads held its only senders.
        if let Some(worker) = self.fit_worker.take() {
            let joined = tokio::time::timeout_at(end, tokio::task::spawn_blocking(move || worker.join()))
                .await
                .map_err(|_| late("running the last evaporation fits"))?;
            if !matches!(joined, Ok(Ok(()))) {
                tracing::error!("the fit worker failed; assessments it held may be missing");
            }
        }
        // 3. Journal on disk (every alert already was before it was sent; this covers the last ones).
        let desk = self.desk.clone();
        tokio::task::spawn_blocking(move || desk.sync())
            .await?
            .context("final journal fsync")?;
        // 4. Goodbye to subscribers: what is left, then a closing heartbeat.
        self.closing.cancel();
        self.subscriber_tasks.close();
        self.email_tasks.close();
        tokio::time::timeout_at(end, self.subscriber_tasks.wait())
            .await
            .map_err(|_| late("saying goodbye to subscribers"))?;
        tokio::time::timeout_at(end, self.email_tasks.wait())
            .await
            .map_err(|_| late("keeping the email cursors"))?;
        // 5. The bus sink publishes what is left while the bus answers; what it could not is in the journal
        // and goes out after the next start, so running out of time here is not a failed shutdown.
        self.bus_tasks.close();
        if tokio::time::timeout_at(end, self.bus_tasks.wait()).await.is_err() {
            tracing::warn!(
                "the bus sink did not finish within the shutdown deadline; the next start resumes it"
            );
        }
        tracing::info!(
            last_seq = self.desk.last_seq(),
            "shut down in {:.2} s",
            started.elapsed().as_secs_f64()
        );
        Ok(())
    }
}

fn recorder(cfg: &Config, inst: &InstrumentConfig) -> anyhow::Result<Option<RotatingWriter>> {
    if !cfg.ingest.record {
        return Ok(None);
    }
    let policy = RotationPolicy {
        max_bytes: std::num::NonZeroU64::new(cfg.ingest.record_rotate_bytes),
        max_duration_ns: std::num::NonZeroU64::new(
            u64::try_from(cfg.ingest.record_rotate.as_nanos()).unwrap_or(u64::MAX),
        ),
    };
    let dir = cfg.daemon.state_dir.join("recordings");
    // Named by the UTC time of each file's first photon, so a directory of recordings reads as a calendar.
    let w = RotatingWriter::new(&dir, inst.id.clone(), Compression::Zstd(3), policy)
        .with_context(|| format!("cannot record into {}", dir.display()))?
        .with_time_names(|ns| format!("{}Z", crate::timefmt::gps_ns_to_id_stamp(ns)));
    Ok(Some(w))
}

/// Photons behind the resume point between two log lines about them.
const BEHIND_LOG_EVERY: u64 = 1_000_000;
/// How often an engine thread publishes its health figures (while it has work; once more when it ends).
const HEALTH_EVERY: Duration = Duration::from_millis(200);

/// One instrument's engine, on its own thread.
struct EngineThread {
    index: usize,
    id: String,
    issuer: Issuer,
    driver: InstrumentDriver,
    rx: async_channel::Receiver<EngineMsg>,
    watermarks: Arc<Watermarks>,
    state_file: PathBuf,
    /// Where the resume point is kept, and the highest frame seq taken (kept in it).
    resume_file: PathBuf,
    last_seq: u64,
    /// Photons behind the resume point already counted in the metrics.
    behind_reported: u64,
    save_every: Duration,
    recorder: Option<RotatingWriter>,
    /// The producer's Hello, until the first frame after it is recorded.
    hello: Option<pb::Hello>,
    /// Where the instrument's health figures go.
    metrics: Arc<Metrics>,
    /// The host's UTC day (days since 1970) and the engine's dead time when it began, ns.
    dead_day: (i64, i64),
}

impl EngineThread {
    fn run(mut self) {
        let mut last_save = Instant::now();
        let mut last_health = Instant::now();
        let mut event_ns = 0;
        // Takes messages until ingest closes the channel (shutdown); then drains.
        while let Ok(msg) = self.rx.recv_blocking() {
            match msg {
                EngineMsg::Hello(h) => {
                    // Recorded with the first frame after it, at that frame's event time: a file opened at
                    // time 0 would rotate at its first frame, splitting the stream with a spurious reconnect.
                    self.hello = Some(h);
                    continue;
                }
                EngineMsg::Health => {
                    self.publish_health();
                    last_health = Instant::now();
                    continue;
                }
                EngineMsg::StreamBreak => {
                    tracing::info!(instrument = %self.id, "stream break: dead time until the producer's next frame");
                    self.driver.stream_break();
                    continue;
                }
                EngineMsg::Batch(b, received) => {
                    self.last_seq = self.last_seq.max(b.seq);
                    self.issuer.note_batch(&b.time_gps_ns, received);
                    event_ns = event_ns.max(b.time_gps_ns.iter().copied().max().unwrap_or(0));
                    let mut step = self.issuer.step(received);
                    let taken = self.driver.on_batch(&b, &mut step);
                    step.end();
                    if let Err(r) = taken {
                        tracing::warn!(instrument = %self.id, seq = r.seq, code = r.code.as_str_name(), "engine refused a batch: {}", r.detail);
                    }
                    // Recorded after the search, so compressing it never delays an alert.
                    self.record(pb::producer_frame::Body::Batch(b), event_ns);
                }
                EngineMsg::Status(s, received) => {
                    self.last_seq = self.last_seq.max(s.seq);
                    event_ns = event_ns.max(s.now_gps_ns);
                    let mut step = self.issuer.step(received);
                    let taken = self.driver.on_status(&s, &mut step);
                    step.end();
                    if let Err(r) = taken {
                        tracing::warn!(instrument = %self.id, seq = r.seq, code = r.code.as_str_name(), "engine refused a status frame: {}", r.detail);
                    }
                    self.record(pb::producer_frame::Body::Status(s), event_ns);
                }
            }
            let watermark = self.driver.watermark_ns();
            if let Some(w) = watermark {
                event_ns = event_ns.max(w);
                self.watermarks.set(self.index, w);
            }
            self.issuer.after_step(watermark);
            self.count_behind_resume();
            // No save after each alert: that would put an fsync on the engine thread behind every flash, and
            // the journal already holds the floor an alert sets (the newest trigger issued, see `start`).
            if last_health.elapsed() >= HEALTH_EVERY {
                self.publish_health();
                last_health = Instant::now();
            }
            if last_save.elapsed() >= self.save_every {
                self.save();
                self.save_resume();
                last_save = Instant::now();
            }
        }
        let mut step = self.issuer.step(0);
        self.driver.finish(&mut step);
        step.end();
        self.save();
        self.save_resume();
        self.count_behind_resume();
        self.publish_health();
        let st = self.driver.engine_stats();
        tracing::info!(
            instrument = %self.id,
            photons = st.photons_in,
            late = st.late,
            behind_resume = self.driver.counters().behind_resume,
            stream_breaks = st.stream_breaks,
            seq_gaps = st.seq_gaps,
            dead_s = st.dead_ns as f64 / 1e9,
            live_s = st.live_ns as f64 / 1e9,
            "engine finished"
        );
        if let Some(w) = self.recorder.take() {
            if let Err(e) = w.finish() {
                tracing::warn!(instrument = %self.id, "recording not finished cleanly: {e}");
            }
        }
    }

    /// The engine's figures for the health endpoints: watermark, dead and live time, open candidates.
    fn publish_health(&mut self) {
        let Some(h) = self.metrics.instruments.get(self.index) else {
            return;
        };
        let st = self.driver.engine_stats();
        let day = crate::timefmt::now_unix_ns().div_euclid(86_400_000_000_000);
        if day != self.dead_day.0 {
            // A new UTC day (or the first figures): today's dead time counts from here.
            let base = if self.dead_day.0 == 0 { 0 } else { st.dead_ns };
            self.dead_day = (day, base);
        }
        h.watermark_gps_ns
            .store(self.driver.watermark_ns().unwrap_or(0), Ordering::Relaxed);
        h.dead_ns.store(st.dead_ns, Ordering::Relaxed);
        h.dead_today_ns
            .store(st.dead_ns - self.dead_day.1, Ordering::Relaxed);
        h.live_ns.store(st.live_ns, Ordering::Relaxed);
        h.open_candidates.store(st.open_candidates, Ordering::Relaxed);
    }

    fn save(&self) {
        let blob = self.driver.save_state();
        match write_atomic(&self.state_file, &blob) {
            Ok(()) => tracing::debug!(instrument = %self.id, bytes = blob.len(), "engine state saved"),
            Err(e) => {
                tracing::warn!(instrument = %self.id, file = %self.state_file.display(), "cannot save engine state: {e}")
            }
        }
    }

    /// Keeps the resume point: the engine's watermark (never behind a floor still in force) and the highest
    /// seq taken. Nothing is written before the first photon of a first start.
    fn save_resume(&self) {
        let watermark = [self.driver.watermark_ns(), self.driver.resume_floor()]
            .into_iter()
            .flatten()
            .max();
        let Some(watermark_gps_ns) = watermark else {
            return;
        };
        let point = resume::ResumePoint {
            watermark_gps_ns,
            last_seq: self.last_seq,
        };
        if let Err(e) = resume::save(&self.resume_file, &self.id, point) {
            tracing::warn!(instrument = %self.id, "cannot keep the resume point: {e}");
        }
    }

    /// Moves newly dropped photons behind the resume point to the metrics; logs the first drop and then at
    /// most one line per [`BEHIND_LOG_EVERY`] photons, so a whole recording fed again gives a few lines.
    fn count_behind_resume(&mut self) {
        let behind = self.driver.counters().behind_resume;
        let new = behind - self.behind_reported;
        if new == 0 {
            return;
        }
        self.metrics
            .photons_behind_resume
            .fetch_add(new, Ordering::Relaxed);
        if self.behind_reported == 0 || behind / BEHIND_LOG_EVERY != self.behind_reported / BEHIND_LOG_EVERY {
            tracing::warn!(
                instrument = %self.id,
                photons = behind,
                resume_after = %self.driver.resume_floor().map(crate::timefmt::gps_ns_to_utc).unwrap_or_default(),
                "photons behind the resume point dropped: they were searched before the restart"
            );
        }
        self.behind_reported = behind;
    }

    fn record(&mut self, body: pb::producer_frame::Body, event_ns: i64) {
        let Some(w) = self.recorder.as_mut() else {
            return;
        };
        let header = self.hello.take().map(|h| pb::ProducerFrame {
            body: Some(pb::producer_frame::Body::Hello(h)),
        });
        let frame = pb::ProducerFrame { body: Some(body) };
        let result = header
            .map_or(Ok(None), |h| w.set_header(h, event_ns))
            .and_then(|_| w.write_frame(&frame, event_ns));
        if let Err(e) = result {
            tracing::error!(instrument = %self.id, "recording stopped: {e}");
            self.recorder = None;
        }
    }
}
