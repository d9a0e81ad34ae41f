//! `glint listen --exec` against a real daemon: handlers run concurrently up to `--exec-concurrency`, each
//! with a timeout, the alert's JSON on stdin and `GLINT_ALERT_*` in its environment; a failed handler is
//! retried; the state file moves past an alert only once its handler and every earlier one succeeded; the
//! exit code says when handlers failed. Alerts are operator test alerts (fast).

use std::path::Path;
use std::process::{Command, Output};
use std::time::{Duration, Instant};

use crate::email::test_alert;
use crate::util::{self, Daemon, SUBSCRIBER_TOKEN};

/// A daemon holding `n` test alerts (seq 1..=n).
fn daemon_with_alerts(dir: &Path, n: usize) -> Daemon {
    let d = Daemon::start(dir, "");
    for i in 0..n {
        assert_eq!(test_alert(&d, &format!("exec {i}")).seq, i as u64 + 1);
    }
    d
}

/// Runs `glint listen --exec CMD` over the journal from the state file (or from the start), for `n` alerts.
fn listen(d: &Daemon, dir: &Path, n: usize, cmd: &str, extra: &[&str]) -> Output {
    let token = util::token_file(dir, "sub.token", SUBSCRIBER_TOKEN);
    Command::new(util::glint_bin())
        .args([
            "listen",
            "--from",
            &d.subs.to_string(),
            "--json",
            "--timeout-s",
            "60",
        ])
        .args(["--max-alerts", &n.to_string(), "--exec", cmd, "--token-file"])
        .arg(&token)
        .arg("--state-file")
        .arg(dir.join("listen.state"))
        .args(extra)
        .output()
        .unwrap()
}

fn state(dir: &Path) -> Option<u64> {
    std::fs::read_to_string(dir.join("listen.state"))
        .ok()
        .map(|t| t.trim().parse().unwrap())
}

#[test]
fn exec_handlers_run_concurrently_up_to_the_limit_with_json_and_environment() {
    let dir = tempfile::tempdir().unwrap();
    let d = daemon_with_alerts(dir.path(), 8);
    let out_dir = dir.path().join("out");
    std::fs::create_dir_all(&out_dir).unwrap();
    // Each handler notes its start and end (ns), keeps its stdin and its GLINT_ALERT_* variables.
    let cmd = format!(
        "o={o}; echo \"start $(date +%s%N)\" >> $o/t-$GLINT_ALERT_SEQ; cat > $o/in-$GLINT_ALERT_SEQ.json; \
         env | grep '^GLINT_ALERT_' | sort > $o/env-$GLINT_ALERT_SEQ; sleep 1; \
         echo \"end $(date +%s%N)\" >> $o/t-$GLINT_ALERT_SEQ",
        o = out_dir.display()
    );
    let out = listen(
        &d,
        dir.path(),
        8,
        &cmd,
        &["--replay-all", "--exec-concurrency", "4"],
    );
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let mut spans = Vec::new();
    for seq in 1..=8u64 {
        let t = std::fs::read_to_string(out_dir.join(format!("t-{seq}"))).unwrap();
        let v: Vec<u128> = t
            .lines()
            .map(|l| l.split(' ').nth(1).unwrap().parse().unwrap())
            .collect();
        assert_eq!(v.len(), 2, "handler {seq} ran once: {t}");
        spans.push((v[0], v[1]));
        let json =
            util::checked_json(&std::fs::read_to_string(out_dir.join(format!("in-{seq}.json"))).unwrap());
        let env = std::fs::read_to_string(out_dir.join(format!("env-{seq}"))).unwrap();
        assert_eq!(json["seq"], seq);
        for want in [
            format!("GLINT_ALERT_ID={}", json["id"].as_str().unwrap()),
            format!("GLINT_ALERT_SEQ={seq}"),
            "GLINT_ALERT_KIND=test".to_string(),
            "GLINT_ALERT_INSTRUMENT=test".to_string(),
            "GLINT_ALERT_ATTEMPT=1".to_string(),
        ] {
            assert!(env.lines().any(|l| l == want), "{want} not in\n{env}");
        }
    }
    // Most handlers running at one instant: exactly the limit.
    let most = spans
        .iter()
        .map(|&(s, _)| spans.iter().filter(|&&(a, b)| a <= s && s < b).count())
        .max()
        .unwrap();
    assert_eq!(most, 4, "handlers overlapping: {spans:?}");
    assert_eq!(state(dir.path()), Some(8));
}

#[test]
fn exec_handler_past_its_timeout_is_killed_and_the_exit_code_says_so() {
    let dir = tempfile::tempdir().unwrap();
    let d = daemon_with_alerts(dir.path(), 2);
    let started = Instant::now();
    let out = listen(
        &d,
        dir.path(),
        2,
        "sleep 30",
        &["--replay-all", "--exec-timeout-s", "0.5", "--exec-retries", "1"],
    );
    let took = started.elapsed();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(3), "{stderr}");
    assert!(stderr.contains("timed out after 0.5 s"), "{stderr}");
    assert!(stderr.contains("2 handler(s) failed"), "{stderr}");
    assert!(
        took < Duration::from_secs(20),
        "took {took:?}: the handlers were not killed"
    );
    assert_eq!(
        state(dir.path()),
        None,
        "the state file moved past a failed handler"
    );
}

#[test]
fn exec_failed_handler_is_retried_with_backoff_and_succeeds() {
    let dir = tempfile::tempdir().unwrap();
    let d = daemon_with_alerts(dir.path(), 3);
    let done = dir.path().join("done");
    // Fails (75, "try again") on the first two attempts, succeeds on the third.
    let cmd = format!(
        "if [ \"$GLINT_ALERT_ATTEMPT\" -lt 3 ]; then exit 75; fi; echo $GLINT_ALERT_SEQ >> {}",
        done.display()
    );
    let out = listen(&d, dir.path(), 3, &cmd, &["--replay-all", "--exec-retries", "2"]);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "{stderr}");
    assert_eq!(
        stderr.matches("failed (exited with exit status: 75)").count(),
        6,
        "{stderr}"
    );
    let mut seqs: Vec<u64> = std::fs::read_to_string(&done)
        .unwrap()
        .lines()
        .map(|l| l.parse().unwrap())
        .collect();
    seqs.sort_unstable();
    assert_eq!(seqs, vec![1, 2, 3]);
    assert_eq!(state(dir.path()), Some(3));
}

#[test]
fn exec_state_file_moves_only_past_handlers_that_succeeded_in_order() {
    let dir = tempfile::tempdir().unwrap();
    let d = daemon_with_alerts(dir.path(), 5);
    let log = dir.path().join("handled");
    // Seq 3 fails every time; 4 and 5 succeed, but the state file must not pass 3.
    let failing = format!(
        "if [ \"$GLINT_ALERT_SEQ\" = 3 ]; then exit 1; fi; echo $GLINT_ALERT_SEQ >> {}",
        log.display()
    );
    let out = listen(
        &d,
        dir.path(),
        5,
        &failing,
        &["--replay-all", "--exec-retries", "1"],
    );
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(3), "{stderr}");
    assert!(stderr.contains("the state file stops at seq 2"), "{stderr}");
    assert_eq!(state(dir.path()), Some(2));
    // The next run resumes at 3: the failed one runs again, and so do those after it (at-least-once).
    let good = format!("echo $GLINT_ALERT_SEQ >> {}", log.display());
    let out = listen(&d, dir.path(), 3, &good, &[]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert_eq!(state(dir.path()), Some(5));
    let mut handled: Vec<u64> = std::fs::read_to_string(&log)
        .unwrap()
        .lines()
        .map(|l| l.parse().unwrap())
        .collect();
    handled.sort_unstable();
    assert_eq!(handled, vec![1, 2, 3, 4, 4, 5, 5]);
}
