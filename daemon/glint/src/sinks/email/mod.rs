//! The email sink: alerts to people through an SMTP relay (lettre over tokio; STARTTLS or implicit TLS with
//! rustls; optional AUTH). One task per recipient, each a [`Sink`] with its own cursor into the journal
//! kept in `state_dir/email/` (atomic write and fsync after every message), so one recipient's failures
//! never hold back another's or the socket subscribers. Overflow policy: [`Overflow::Resume`]: never
//! dropped, the journal is the queue; transient failures (4xx, refused, timeout) are retried with
//! exponential backoff and jitter, a permanent rejection (5xx) is logged with recipient and alert id,
//! counted and moved past. Delivery is at-least-once: a message the relay accepted just before the daemon
//! died, with the cursor not yet written, is sent again after the restart.

pub(crate) mod message;
pub(crate) mod plot;
pub(crate) mod storm;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::Ordering;
use std::time::Duration;

use anyhow::Context;
use glint_science::instrument::InstrumentResponse;
use glint_wire::pb;
use lettre::message::header::ContentType;
use lettre::message::{Attachment, Mailbox, MultiPart};
use lettre::transport::smtp::authentication::Credentials;
use lettre::transport::smtp::client::{Certificate, Tls, TlsParameters};
use lettre::{AsyncSmtpTransport, AsyncTransport, Message, Tokio1Executor};
use serde::{Deserialize, Serialize};
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;
use tracing::Instrument;

use crate::config::{EmailConfig, EmailRecipient, EmailTls};
use crate::desk::Desk;
use crate::metrics::Metrics;
use crate::sinks::{Idle, Overflow, Sink, SinkError, drive};
use crate::timefmt::{gps_ns_to_utc, now_unix_ns, unix_ns_to_gps_ns};
use storm::{Held, Route, Storm};

/// First wait after a transient failure; doubled per failure up to `retry_max`.
const FIRST_RETRY: Duration = Duration::from_secs(1);
/// Wait before a recipient's task starts again after an error of its own (its state file unwritable).
const RESTART_AFTER: Duration = Duration::from_secs(5);

/// The relay connection settings and sender, shared by every recipient's task.
struct Mailer {
    transport: AsyncSmtpTransport<Tokio1Executor>,
    from: Mailbox,
    retry_max: Duration,
    /// Each instrument's response, for the shape of the fitted curve in the light curve.
    responses: BTreeMap<String, InstrumentResponse>,
}

/// Builds the SMTP transport from `[email]`.
fn transport(cfg: &EmailConfig) -> anyhow::Result<AsyncSmtpTransport<Tokio1Executor>> {
    let params = || -> anyhow::Result<TlsParameters> {
        let mut b = TlsParameters::builder(cfg.relay_host.clone());
        if let Some(p) = &cfg.tls_ca_file {
            let pem = std::fs::read(p).with_context(|| format!("cannot read {}", p.display()))?;
            let cert = Certificate::from_pem(&pem)
                .with_context(|| format!("{} holds no PEM certificate", p.display()))?;
            b = b.add_root_certificate(cert);
        }
        b.build_rustls().context("email TLS settings")
    };
    let tls = match cfg.tls {
        EmailTls::None => Tls::None,
        EmailTls::StartTls => Tls::Required(params()?),
        EmailTls::Implicit => Tls::Wrapper(params()?),
    };
    let mut b = AsyncSmtpTransport::<Tokio1Executor>::builder_dangerous(cfg.relay_host.clone())
        .port(cfg.relay_port)
        .timeout(Some(cfg.timeout))
        .tls(tls);
    if let Some((user, pw)) = &cfg.auth {
        b = b.credentials(Credentials::new(user.clone(), pw.expose().to_string()));
    }
    Ok(b.build())
}

/// What a recipient's task keeps on disk: its cursor and its storm control.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
struct Saved {
    /// Every alert up to this sequence number has been sent, held for a digest or skipped.
    after_seq: u64,
    /// Rate-limit history and the digest waiting.
    storm: Storm,
}

/// The state file of a recipient: its address made safe as a file name.
fn state_file(dir: &Path, address: &Mailbox) -> PathBuf {
    let slug: String = address
        .email
        .to_string()
        .to_lowercase()
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '.' || c == '-' {
                c
            } else {
                '_'
            }
        })
        .collect();
    dir.join(format!("{slug}.json"))
}

/// Writes `bytes` to `path` atomically and durably: temporary file, fsync, rename, fsync of the directory.
fn write_durable(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    use std::io::Write as _;
    let tmp = path.with_extension("tmp");
    let mut f = std::fs::File::create(&tmp)?;
    f.write_all(bytes)?;
    f.sync_all()?;
    std::fs::rename(&tmp, path)?;
    if let Some(dir) = path.parent() {
        std::fs::File::open(dir)?.sync_all()?;
    }
    Ok(())
}

fn now_s() -> f64 {
    now_unix_ns() as f64 / 1e9
}

/// Significance used by the filters and quiet hours: the trigger's post-trials significance, the alert's own
/// (a withdrawal carries the withdrawn alert's); 0 for an alert without one. Not the per-seed `sigma`, which
/// is 7 or more for every flash whatever its false-alarm rate.
fn sigma_of(a: &pb::Alert) -> f64 {
    a.trigger.as_ref().map_or(0.0, |t| t.sigma_post_trials)
}

/// What the sink's tasks share with the rest of the daemon.
#[derive(Clone, Copy)]
pub(crate) struct Wiring<'a> {
    /// The alert desk, whose journal the sink reads.
    pub(crate) desk: &'a Arc<Desk>,
    /// Counters.
    pub(crate) metrics: &'a Arc<Metrics>,
    /// Cancelled when the daemon says goodbye.
    pub(crate) closing: &'a CancellationToken,
    /// Where the tasks are spawned, to be waited for at shutdown.
    pub(crate) tracker: &'a TaskTracker,
}

/// The running email sink: one task per recipient, each with its own stop token (a child of `closing`), so
/// a configuration reload can add and remove recipients without touching the others.
pub(crate) struct EmailSinks {
    mailer: Arc<Mailer>,
    /// The relay settings the mailer was built from; a reload that changes them needs a restart.
    relay: String,
    dir: PathBuf,
    desk: Arc<Desk>,
    metrics: Arc<Metrics>,
    closing: CancellationToken,
    tracker: TaskTracker,
    grace: Duration,
    /// Running recipients by address: their settings and their stop token.
    running: BTreeMap<String, (EmailRecipient, CancellationToken, tokio::task::JoinHandle<()>)>,
}

/// The relay side of `[email]`, for telling whether a reload changed it; compared only, never printed (it
/// holds the password).
fn relay_key(cfg: &EmailConfig) -> String {
    format!(
        "{}:{} from {} tls {:?} ca {:?} auth {:?} timeout {:?} retry {:?}",
        cfg.relay_host,
        cfg.relay_port,
        cfg.from,
        cfg.tls,
        cfg.tls_ca_file,
        cfg.auth.as_ref().map(|(u, p)| (u, p.expose())),
        cfg.timeout,
        cfg.retry_max
    )
}

/// Starts one task per recipient on `tracker`. Each resumes from its cursor in `state_dir/email/`; a
/// recipient seen for the first time starts at the newest alert (the journal's history is not mailed).
/// At shutdown (`closing`) each gets `grace` to send what was journalled, then stops where it is.
pub(crate) fn start(
    cfg: &EmailConfig,
    responses: BTreeMap<String, InstrumentResponse>,
    state_dir: &Path,
    wiring: &Wiring<'_>,
    grace: Duration,
) -> anyhow::Result<EmailSinks> {
    let Wiring {
        desk,
        metrics,
        closing,
        tracker,
    } = *wiring;
    let dir = state_dir.join("email");
    std::fs::create_dir_all(&dir).with_context(|| format!("cannot create {}", dir.display()))?;
    let mailer = Arc::new(Mailer {
        transport: transport(cfg)?,
        from: cfg.from.clone(),
        retry_max: cfg.retry_max,
        responses,
    });
    let mut sinks = EmailSinks {
        mailer,
        relay: relay_key(cfg),
        dir,
        desk: desk.clone(),
        metrics: metrics.clone(),
        closing: closing.clone(),
        tracker: tracker.clone(),
        grace,
        running: BTreeMap::new(),
    };
    for r in &cfg.recipients {
        sinks.start_recipient(r.clone(), None)?;
    }
    Ok(sinks)
}

impl EmailSinks {
    /// Starts one recipient's task; `after` is the task of the same address being replaced, which must
    /// have stopped before the new one reads the cursor they share.
    fn start_recipient(
        &mut self,
        r: EmailRecipient,
        after: Option<tokio::task::JoinHandle<()>>,
    ) -> anyhow::Result<()> {
        let path = state_file(&self.dir, &r.address);
        let key = r.address.email.to_string();
        let stop = self.closing.child_token();
        let (desk, metrics, mailer, grace) = (
            self.desk.clone(),
            self.metrics.clone(),
            self.mailer.clone(),
            self.grace,
        );
        let settings = r.clone();
        let task_stop = stop.clone();
        let span = tracing::info_span!("email", recipient = %key);
        let handle = self.tracker.spawn(
            async move {
                if let Some(previous) = after {
                    let _ = previous.await;
                }
                let saved = match load_cursor(&path, &desk) {
                    Ok(s) => s,
                    Err(e) => {
                        tracing::error!("email recipient not started: {e:#}");
                        return;
                    }
                };
                tracing::info!(
                    after_seq = saved.after_seq,
                    held = saved.storm.held.len(),
                    "email recipient"
                );
                let mut sink = RecipientSink {
                    name: r.address.email.to_string(),
                    r,
                    mailer,
                    saved,
                    path,
                    metrics,
                    grace,
                };
                loop {
                    let mut cursor = sink.saved.after_seq;
                    match drive(&mut sink, &desk, &mut cursor, &task_stop).await {
                        Ok(()) => return,
                        Err(e) => tracing::error!("email delivery stopped: {e:#}; starting again"),
                    }
                    tokio::select! {
                        () = tokio::time::sleep(RESTART_AFTER) => {}
                        () = task_stop.cancelled() => return,
                    }
                }
            }
            .instrument(span),
        );
        self.running.insert(key, (settings, stop, handle));
        Ok(())
    }

    /// Applies a reloaded `[email]` (None: the section was removed): recipients added are started,
    /// recipients removed are stopped (after sending what was journalled, within the shutdown grace; their
    /// cursors stay on disk), recipients whose settings changed restart from their cursors; the others run
    /// on untouched. Relay settings are not reloaded (a restart applies them): said in the returned notes.
    pub(crate) fn reload(&mut self, cfg: Option<&EmailConfig>) -> Vec<String> {
        let mut notes = Vec::new();
        let wanted: BTreeMap<String, EmailRecipient> = cfg
            .map(|c| {
                c.recipients
                    .iter()
                    .map(|r| (r.address.email.to_string(), r.clone()))
                    .collect()
            })
            .unwrap_or_default();
        if let Some(c) = cfg {
            if relay_key(c) != self.relay {
                notes.push("email relay settings changed: they apply after a restart".to_string());
            }
        }
        let gone: Vec<String> = self
            .running
            .keys()
            .filter(|k| !wanted.contains_key(*k))
            .cloned()
            .collect();
        for k in gone {
            if let Some((_, stop, _)) = self.running.remove(&k) {
                stop.cancel();
                notes.push(format!("email recipient {k} removed"));
            }
        }
        for (k, r) in wanted {
            let previous = match self.running.get(&k) {
                Some((old, _, _)) if recipient_key(old) == recipient_key(&r) => continue,
                Some(_) => self.running.remove(&k).map(|(_, stop, handle)| {
                    stop.cancel();
                    handle
                }),
                None => None,
            };
            let what = if previous.is_some() { "changed" } else { "added" };
            match self.start_recipient(r, previous) {
                Ok(()) => notes.push(format!("email recipient {k} {what}")),
                Err(e) => notes.push(format!("email recipient {k} not started: {e:#}")),
            }
        }
        notes
    }
}

/// A recipient's settings, for telling whether a reload changed them.
fn recipient_key(r: &EmailRecipient) -> String {
    format!("{r:?}")
}

/// A recipient's cursor, or a new one at the newest alert for a recipient seen for the first time.
fn load_cursor(path: &Path, desk: &Desk) -> anyhow::Result<Saved> {
    match std::fs::read(path) {
        Ok(bytes) => serde_json::from_slice::<Saved>(&bytes)
            .with_context(|| format!("email cursor {} is not readable", path.display())),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            let s = Saved {
                after_seq: desk.last_seq(),
                storm: Storm::default(),
            };
            let bytes = serde_json::to_vec(&s)?;
            write_durable(path, &bytes).with_context(|| format!("cannot write {}", path.display()))?;
            Ok(s)
        }
        Err(e) => Err(e).with_context(|| format!("cannot read {}", path.display())),
    }
}

/// What became of one message.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Outcome {
    /// The relay accepted it.
    Sent,
    /// The relay rejected it for good (or it could not be built); logged and counted.
    Rejected,
}

/// One recipient as a [`Sink`].
struct RecipientSink {
    name: String,
    r: EmailRecipient,
    mailer: Arc<Mailer>,
    saved: Saved,
    path: PathBuf,
    metrics: Arc<Metrics>,
    grace: Duration,
}

impl RecipientSink {
    fn save(&self) -> anyhow::Result<()> {
        let bytes = serde_json::to_vec(&self.saved)?;
        write_durable(&self.path, &bytes).with_context(|| format!("cannot write {}", self.path.display()))
    }

    fn message_id(&self, local: &str) -> String {
        let slug: String = self
            .name
            .chars()
            .map(|c| if c.is_ascii_alphanumeric() { c } else { '.' })
            .collect();
        format!("<{local}.{slug}@{}>", self.mailer.from.email.domain())
    }

    /// Sends until the relay accepts or rejects for good; transient failures wait with backoff and jitter.
    async fn send(&self, msg: Message, ids: &[String]) -> Outcome {
        let mut wait = FIRST_RETRY;
        let mut attempt = 1u32;
        loop {
            match self.mailer.transport.send(msg.clone()).await {
                Ok(_) => return Outcome::Sent,
                Err(e) if e.is_permanent() => {
                    self.metrics.email_rejected.fetch_add(1, Ordering::Relaxed);
                    tracing::error!(recipient = %self.name, alerts = ?ids, "relay rejected the email for good, skipping it: {e}");
                    return Outcome::Rejected;
                }
                Err(e) => {
                    self.metrics.email_retries.fetch_add(1, Ordering::Relaxed);
                    // Jitter in [0.5, 1.5) of the wait, so recipients failing together do not retry together.
                    let jitter = 0.5 + (now_unix_ns().rem_euclid(1000) as f64) / 1000.0;
                    let pause = wait.mul_f64(jitter);
                    tracing::warn!(recipient = %self.name, alerts = ?ids, attempt, "email not sent ({e}); retrying in {:.1} s", pause.as_secs_f64());
                    tokio::time::sleep(pause).await;
                    wait = (wait * 2).min(self.mailer.retry_max);
                    attempt += 1;
                }
            }
        }
    }

    async fn send_alert(&self, a: &pb::Alert) -> Outcome {
        let ids = vec![a.id.clone()];
        let alert = a.clone();
        let mailer = self.mailer.clone();
        let png = tokio::task::spawn_blocking(move || {
            plot::light_curve_png(&alert, mailer.responses.get(&alert.instrument))
        })
        .await;
        let png = match png {
            Ok(Ok(p)) => p,
            Ok(Err(e)) => {
                tracing::error!(recipient = %self.name, alert = %a.id, "{e}");
                return self.rejected_locally(&ids);
            }
            Err(e) => {
                tracing::error!(recipient = %self.name, alert = %a.id, "drawing the light curve failed: {e}");
                return self.rejected_locally(&ids);
            }
        };
        let doc = message::alert_doc(a);
        let body = MultiPart::mixed()
            .multipart(MultiPart::alternative_plain_html(
                message::render_text(&doc),
                message::render_html(&doc),
            ))
            .singlepart(Attachment::new("lightcurve.png".to_string()).body(
                png,
                ContentType::parse("image/png").unwrap_or(ContentType::TEXT_PLAIN),
            ));
        let msg = Message::builder()
            .from(self.mailer.from.clone())
            .to(self.r.address.clone())
            .subject(message::subject(a))
            .message_id(Some(self.message_id(&a.id)))
            .multipart(body);
        match msg {
            Ok(m) => {
                let out = self.send(m, &ids).await;
                if out == Outcome::Sent {
                    self.metrics.email_sent.fetch_add(1, Ordering::Relaxed);
                    tracing::info!(recipient = %self.name, alert = %a.id, "email sent");
                }
                out
            }
            Err(e) => {
                tracing::error!(recipient = %self.name, alert = %a.id, "cannot build the email: {e}");
                self.rejected_locally(&ids)
            }
        }
    }

    fn rejected_locally(&self, ids: &[String]) -> Outcome {
        self.metrics.email_rejected.fetch_add(1, Ordering::Relaxed);
        tracing::error!(recipient = %self.name, alerts = ?ids, "email skipped");
        Outcome::Rejected
    }

    /// Sends the digest of every held alert, then forgets them (sent or rejected for good).
    async fn send_digest(&mut self) -> anyhow::Result<()> {
        let held: Vec<Held> = self.saved.storm.held.clone();
        let (Some(first), Some(last)) = (held.first(), held.last()) else {
            return Ok(());
        };
        let ids: Vec<String> = held.iter().map(|h| h.id.clone()).collect();
        let now_utc = gps_ns_to_utc(unix_ns_to_gps_ns(now_unix_ns()));
        let why = format!(
            "These alerts were held back for {}: at most {} messages per {} s{}. Nothing was dropped: every alert held is named below.",
            self.name,
            self.r.max_per_window,
            self.r.window.as_secs_f64(),
            match self.r.quiet {
                Some(q) => format!(
                    ", and quiet hours {:02}:{:02}-{:02}:{:02} UTC for alerts under {} sigma",
                    q.start_min / 60,
                    q.start_min % 60,
                    q.end_min / 60,
                    q.end_min % 60,
                    q.min_sigma
                ),
                None => String::new(),
            }
        );
        let doc = message::digest_doc(&held, &why);
        let msg = Message::builder()
            .from(self.mailer.from.clone())
            .to(self.r.address.clone())
            .subject(message::digest_subject(&held, &now_utc))
            .message_id(Some(
                self.message_id(&format!("digest-{}-{}", first.seq, last.seq)),
            ))
            .multipart(MultiPart::alternative_plain_html(
                message::render_text(&doc),
                message::render_html(&doc),
            ));
        let out = match msg {
            Ok(m) => self.send(m, &ids).await,
            Err(e) => {
                tracing::error!(recipient = %self.name, "cannot build the digest: {e}");
                self.rejected_locally(&ids)
            }
        };
        if out == Outcome::Sent {
            self.metrics.email_digests.fetch_add(1, Ordering::Relaxed);
            self.saved.storm.sent(now_s());
            tracing::info!(recipient = %self.name, alerts = held.len(), "digest sent");
        }
        self.saved.storm.held.clear();
        self.save()
    }
}

impl Sink for RecipientSink {
    fn name(&self) -> &str {
        &self.name
    }

    fn kind(&self) -> crate::metrics::SinkKind {
        crate::metrics::SinkKind::Email
    }

    fn metrics(&self) -> &crate::metrics::Metrics {
        &self.metrics
    }

    fn overflow(&self) -> Overflow {
        Overflow::Resume { grace: self.grace }
    }

    fn wants(&self, a: &pb::Alert) -> bool {
        let Ok(kind) = pb::AlertKind::try_from(a.kind) else {
            return false;
        };
        let always = matches!(kind, pb::AlertKind::Withdrawal | pb::AlertKind::Test);
        self.r.kinds.contains(&kind) && (always || self.r.min_sigma <= 0.0 || sigma_of(a) >= self.r.min_sigma)
    }

    async fn deliver(&mut self, a: &pb::Alert) -> anyhow::Result<()> {
        let now = now_s();
        let sigma = sigma_of(a);
        match self.saved.storm.route(&self.r, sigma, now) {
            Route::Send => {
                if self.send_alert(a).await == Outcome::Sent {
                    self.saved.storm.sent(now_s());
                }
            }
            Route::Hold => {
                tracing::info!(recipient = %self.name, alert = %a.id, "held for a digest");
                self.saved.storm.held.push(Held {
                    seq: a.seq,
                    id: a.id.clone(),
                    line: message::digest_line(a),
                    urgent: Storm::urgent(&self.r, sigma),
                });
            }
        }
        self.saved.after_seq = a.seq;
        self.save()?;
        if self.saved.storm.digest_due(&self.r, now_s()) {
            self.send_digest().await?;
        }
        Ok(())
    }

    async fn gap(&mut self, gap: &pb::Gap) -> anyhow::Result<()> {
        // Alerts the journal cannot give back are named in the log; the recipient cannot be mailed what the
        // daemon no longer has.
        tracing::error!(recipient = %self.name, from = gap.from_seq, to = gap.to_seq, reason = %gap.reason, "alerts missing from the journal were not emailed");
        Ok(())
    }

    async fn commit(&mut self, seq: u64) -> anyhow::Result<()> {
        if seq > self.saved.after_seq {
            self.saved.after_seq = seq;
            self.save()?;
        }
        Ok(())
    }

    async fn housekeep(&mut self) -> anyhow::Result<()> {
        if self.saved.storm.digest_due(&self.r, now_s()) {
            self.send_digest().await?;
        }
        Ok(())
    }

    async fn idle(&mut self) -> Result<Idle, SinkError> {
        match self.saved.storm.digest_wait_s(&self.r, now_s()) {
            // A little past the due time, so the window has surely moved on.
            Some(s) => tokio::time::sleep(Duration::from_secs_f64(s.max(0.0) + 0.05)).await,
            None => std::future::pending::<()>().await,
        }
        Ok(Idle::Ticked)
    }

    async fn stalled(&mut self, _err: &SinkError) {}

    async fn close(&mut self) -> anyhow::Result<()> {
        self.save()
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    #[test]
    fn state_files_are_named_by_address_and_written_whole() {
        let dir = tempfile::tempdir().unwrap();
        let a: Mailbox = "On Call <On.Call+gl@Example.org>".parse().unwrap();
        let p = state_file(dir.path(), &a);
        assert_eq!(p.file_name().unwrap(), "on.call_gl_example.org.json");
        let s = Saved {
            after_seq: 7,
            storm: Storm::default(),
        };
        write_durable(&p, &serde_json::to_vec(&s).unwrap()).unwrap();
        let back: Saved = serde_json::from_slice(&std::fs::read(&p).unwrap()).unwrap();
        assert_eq!(back, s);
        assert!(!p.with_extension("tmp").exists());
    }
}
