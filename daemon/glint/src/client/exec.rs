//! `glint listen --exec`: runs a handler command per alert, up to `concurrency` at once, each with a
//! timeout, the alert's JSON on stdin and its key fields in `GLINT_ALERT_*` environment variables. A failed
//! handler is retried with backoff up to a limit. The state file moves past an alert only once its handler
//! and every earlier one succeeded, so a restart resumes at the first alert not yet handled (at-least-once:
//! handlers that succeeded after a failed one run again).

use std::collections::VecDeque;
use std::io::Write as _;
use std::path::PathBuf;
use std::process::{Child, Command, Stdio};
use std::sync::{Arc, Condvar, Mutex};
use std::time::{Duration, Instant};

use anyhow::Context;
use glint_wire::pb;

use crate::alerts;

/// First wait before retrying a failed handler; doubled per attempt up to [`RETRY_MAX`].
const RETRY_FIRST: Duration = Duration::from_millis(500);
const RETRY_MAX: Duration = Duration::from_secs(30);
/// How often a running handler is checked for its exit.
const POLL: Duration = Duration::from_millis(10);

/// How handlers run.
#[derive(Debug, Clone)]
pub(crate) struct ExecOptions {
    /// Shell command (run with `sh -c`).
    pub(crate) cmd: String,
    /// Handlers running at once, at least 1.
    pub(crate) concurrency: usize,
    /// Time one attempt may take before it is killed.
    pub(crate) timeout: Duration,
    /// Attempts after the first for a handler that failed or timed out.
    pub(crate) retries: u32,
    /// Where the last sequence number handled in order is kept.
    pub(crate) state_file: Option<PathBuf>,
}

/// The environment a handler gets (documented in README.md, "Receiving alerts").
pub(crate) fn alert_env(a: &pb::Alert) -> Vec<(&'static str, String)> {
    let mut env = vec![
        ("GLINT_ALERT_ID", a.id.clone()),
        ("GLINT_ALERT_KIND", alerts::kind_name(a.kind).to_string()),
        ("GLINT_ALERT_SEQ", a.seq.to_string()),
        ("GLINT_ALERT_INSTRUMENT", a.instrument.clone()),
    ];
    if let Some(t) = &a.trigger {
        env.push(("GLINT_ALERT_RA_DEG", format!("{}", t.ra_deg)));
        env.push(("GLINT_ALERT_DEC_DEG", format!("{}", t.dec_deg)));
        env.push(("GLINT_ALERT_ERROR_RADIUS_DEG", format!("{}", t.error_radius_deg)));
        env.push(("GLINT_ALERT_SIGMA", format!("{}", t.sigma)));
        env.push(("GLINT_ALERT_TIME_UTC", t.end_utc.clone()));
    }
    if let Some(x) = &a.assessment {
        env.push(("GLINT_ALERT_VERDICT", alerts::verdict_name(x.verdict).to_string()));
    }
    if !a.withdrawn_id.is_empty() {
        env.push(("GLINT_ALERT_WITHDRAWN_ID", a.withdrawn_id.clone()));
    }
    env
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Status {
    Running,
    Succeeded,
    Failed,
}

#[derive(Debug, Default)]
struct PoolState {
    running: usize,
    /// Submitted alerts not yet committed to the state file, in sequence order.
    order: VecDeque<(u64, Status)>,
    /// Newest sequence number written to the state file.
    committed: Option<u64>,
    /// (seq, id, why) of every handler that failed for good.
    failed: Vec<(u64, String, String)>,
    /// A state file that could not be written.
    state_error: Option<String>,
}

/// What the handlers did, once all have finished.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub(crate) struct ExecReport {
    /// (seq, id, why) of handlers that failed after their retries.
    pub(crate) failed: Vec<(u64, String, String)>,
    /// The sequence number the state file holds now, if it was written.
    pub(crate) committed: Option<u64>,
    /// A state-file write error, if any.
    pub(crate) state_error: Option<String>,
}

/// Runs handlers on their own threads, at most `concurrency` at once.
pub(crate) struct ExecPool {
    opts: Arc<ExecOptions>,
    shared: Arc<(Mutex<PoolState>, Condvar)>,
    threads: Vec<std::thread::JoinHandle<()>>,
}

fn lock(m: &Mutex<PoolState>) -> std::sync::MutexGuard<'_, PoolState> {
    m.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
}

impl ExecPool {
    /// A pool with nothing running.
    pub(crate) fn new(opts: ExecOptions) -> Self {
        Self {
            opts: Arc::new(ExecOptions {
                concurrency: opts.concurrency.max(1),
                ..opts
            }),
            shared: Arc::new((Mutex::new(PoolState::default()), Condvar::new())),
            threads: Vec::new(),
        }
    }

    /// Starts the handler of `a`, waiting first while `concurrency` handlers run.
    pub(crate) fn submit(&mut self, a: &pb::Alert, json: String) {
        {
            let (m, cv) = &*self.shared;
            let mut g = lock(m);
            while g.running >= self.opts.concurrency {
                g = cv.wait(g).unwrap_or_else(std::sync::PoisonError::into_inner);
            }
            g.running += 1;
            g.order.push_back((a.seq, Status::Running));
        }
        self.threads.retain(|t| !t.is_finished());
        let (opts, shared) = (self.opts.clone(), self.shared.clone());
        let (seq, id, env) = (a.seq, a.id.clone(), alert_env(a));
        self.threads.push(std::thread::spawn(move || {
            let result = run_with_retries(&opts, &json, &env, &id);
            let (m, cv) = &*shared;
            let mut g = lock(m);
            g.running -= 1;
            let ok = result.is_ok();
            if let Err(why) = result {
                eprintln!("glint listen: handler for {id} (seq {seq}) failed: {why}");
                g.failed.push((seq, id, why));
            }
            if let Some(slot) = g.order.iter_mut().find(|(s, _)| *s == seq) {
                slot.1 = if ok { Status::Succeeded } else { Status::Failed };
            }
            advance(&opts, &mut g);
            cv.notify_all();
        }));
    }

    /// Waits for every handler and says what happened.
    pub(crate) fn finish(self) -> ExecReport {
        for t in self.threads {
            let _ = t.join();
        }
        let g = lock(&self.shared.0);
        let mut failed = g.failed.clone();
        failed.sort();
        ExecReport {
            failed,
            committed: g.committed,
            state_error: g.state_error.clone(),
        }
    }
}

/// Moves the state file over the succeeded handlers at the front of the order; stops at the first one
/// running or failed.
fn advance(opts: &ExecOptions, g: &mut PoolState) {
    let mut newest = None;
    while let Some(&(seq, Status::Succeeded)) = g.order.front() {
        newest = Some(seq);
        g.order.pop_front();
    }
    let (Some(seq), Some(path)) = (newest, opts.state_file.as_ref()) else {
        return;
    };
    match crate::client::write_state(path, seq) {
        Ok(()) => g.committed = Some(seq),
        Err(e) => {
            eprintln!("glint listen: {e:#}");
            g.state_error = Some(format!("{e:#}"));
        }
    }
}

fn run_with_retries(
    opts: &ExecOptions,
    json: &str,
    env: &[(&'static str, String)],
    id: &str,
) -> Result<(), String> {
    let mut wait = RETRY_FIRST;
    let mut attempt = 1;
    loop {
        match run_once(opts, json, env, attempt) {
            Ok(()) => return Ok(()),
            Err(why) if attempt > opts.retries => {
                return Err(format!("{why} (after {attempt} attempts)"));
            }
            Err(why) => {
                eprintln!(
                    "glint listen: handler for {id} failed ({why}); attempt {} in {:.1} s",
                    attempt + 1,
                    wait.as_secs_f64()
                );
                std::thread::sleep(wait);
                wait = (wait * 2).min(RETRY_MAX);
                attempt += 1;
            }
        }
    }
}

fn kill_group(child: &mut Child) {
    // The handler runs in its own process group, so whatever it started goes with it.
    let _ = Command::new("kill")
        .args(["-KILL", "--", &format!("-{}", child.id())])
        .stderr(Stdio::null())
        .status();
    let _ = child.kill();
    let _ = child.wait();
}

fn run_once(
    opts: &ExecOptions,
    json: &str,
    env: &[(&'static str, String)],
    attempt: u32,
) -> Result<(), String> {
    use std::os::unix::process::CommandExt as _;
    let mut child = Command::new("sh")
        .arg("-c")
        .arg(&opts.cmd)
        .stdin(Stdio::piped())
        .envs(env.iter().map(|(k, v)| (*k, v.as_str())))
        .env("GLINT_ALERT_ATTEMPT", attempt.to_string())
        .process_group(0)
        .spawn()
        .with_context(|| format!("cannot run '{}'", opts.cmd))
        .map_err(|e| format!("{e:#}"))?;
    if let Some(mut stdin) = child.stdin.take() {
        let input = format!("{json}\n");
        // On its own thread: a handler that does not read a large input must not stall the timeout.
        std::thread::spawn(move || {
            let _ = stdin.write_all(input.as_bytes());
        });
    }
    let started = Instant::now();
    loop {
        match child.try_wait() {
            Ok(Some(status)) if status.success() => return Ok(()),
            Ok(Some(status)) => return Err(format!("exited with {status}")),
            Ok(None) if started.elapsed() >= opts.timeout => {
                kill_group(&mut child);
                return Err(format!(
                    "timed out after {:.1} s and was killed",
                    opts.timeout.as_secs_f64()
                ));
            }
            Ok(None) => std::thread::sleep(POLL),
            Err(e) => {
                kill_group(&mut child);
                return Err(format!("waiting for it: {e}"));
            }
        }
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    fn alert(seq: u64) -> pb::Alert {
        pb::Alert {
            seq,
            id: format!("GL-x-{seq}"),
            kind: pb::AlertKind::Flash as i32,
            instrument: "x".into(),
            ..Default::default()
        }
    }

    #[test]
    fn state_file_stops_before_the_first_failed_handler() {
        let dir = tempfile::tempdir().unwrap();
        let state = dir.path().join("state");
        // Seq 3 fails every time; the others succeed, 1 slowly, so later ones finish first.
        let cmd = "if [ \"$GLINT_ALERT_SEQ\" = 3 ]; then exit 75; fi; if [ \"$GLINT_ALERT_SEQ\" = 1 ]; then sleep 0.3; fi; cat >/dev/null";
        let mut pool = ExecPool::new(ExecOptions {
            cmd: cmd.into(),
            concurrency: 4,
            timeout: Duration::from_secs(10),
            retries: 1,
            state_file: Some(state.clone()),
        });
        for s in 1..=5 {
            pool.submit(&alert(s), "{}".into());
        }
        let report = pool.finish();
        assert_eq!(report.failed.len(), 1);
        assert_eq!(report.failed[0].0, 3);
        assert_eq!(report.committed, Some(2));
        assert_eq!(std::fs::read_to_string(&state).unwrap().trim(), "2");
    }
}
