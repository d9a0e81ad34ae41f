//! Restarts that do not repeat themselves, through the real binary: a recording fed, the daemon stopped and
//! started again, the same recording fed again (resuming after `Welcome.last_seq`, then forced from the
//! start): no alert is issued twice, and the photons behind the resume point are counted and logged.

use std::path::Path;
use std::process::Command;

use glint_wire::pb;

use crate::util::{self, Daemon, INSTRUMENT, PRODUCER_TOKEN};

/// Every alert in the state directory's journal, as JSON (read offline with `glint journal export`).
fn journal(state: &Path) -> Vec<serde_json::Value> {
    let out = Command::new(util::glint_bin())
        .args(["journal", "export", "--state-dir"])
        .arg(state)
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    String::from_utf8_lossy(&out.stdout)
        .lines()
        .map(util::checked_json)
        .collect()
}

/// What makes an engine alert the same alert: its kind and its trigger's window.
fn identity(a: &serde_json::Value) -> String {
    format!(
        "{} {} {}",
        a["kind"], a["trigger"]["start_utc"], a["trigger"]["end_utc"]
    )
}

fn metric(text: &str, name: &str) -> u64 {
    text.lines()
        .find_map(|l| l.strip_prefix(name).and_then(|v| v.trim().parse().ok()))
        .unwrap_or_else(|| panic!("no {name} in:\n{text}"))
}

#[test]
fn feeding_the_same_recording_after_a_restart_issues_no_alert_twice() {
    let dir = tempfile::tempdir().unwrap();
    let frames = util::demo_frames();
    let photons = util::photons_in(&frames);
    let rec = dir.path().join("demo.glrec");
    util::write_recording(&rec, &frames);
    let token = util::token_file(dir.path(), "producer.token", PRODUCER_TOKEN);
    let state = dir.path().join("state");
    let config = util::config_text_with(&state, "", "", "[metrics]\nlisten = \"127.0.0.1:0\"");

    let mut d = Daemon::start_with(dir.path(), &config);
    let first = util::feed(&d, &rec, &token, &[]);
    assert!(!first.contains("resumed after"), "{first}");
    assert!(d.terminate().success(), "{}", d.log_text());
    let before = journal(&state);
    let engine_alerts: Vec<_> = before
        .iter()
        .filter(|a| a["trigger"].is_object())
        .map(identity)
        .collect();
    assert!(engine_alerts.len() >= 2, "the demo raised too little: {before:?}");
    let resume: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(state.join(format!("resume-{INSTRUMENT}.json"))).unwrap(),
    )
    .unwrap();
    let last_seq = frames
        .iter()
        .map(|f| match &f.body {
            Some(pb::producer_frame::Body::Batch(b)) => b.seq,
            Some(pb::producer_frame::Body::Status(s)) => s.seq,
            _ => 0,
        })
        .max()
        .unwrap();
    assert_eq!(resume["last_seq"], last_seq, "{resume}");

    // The same recording again: the Welcome says where to resume, and the feed sends nothing.
    let mut d = Daemon::start_with(dir.path(), &config);
    let again = util::feed(&d, &rec, &token, &[]);
    assert!(
        again.contains(&format!("resumed after seq {last_seq}"))
            && again.contains(&format!("{photons} photons")),
        "{again}"
    );
    // Forced from the start: the daemon takes the frames and drops every photon as already searched.
    let forced = util::feed(&d, &rec, &token, &["--from-start"]);
    assert!(!forced.contains("resumed after"), "{forced}");
    // The ack says the frames were taken into the engine's queue; the engine drops them a moment later.
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(60);
    loop {
        let m = d.metrics_text();
        let behind = metric(&m, "glint_photons_behind_resume_total ");
        if behind == photons {
            break;
        }
        assert!(
            behind < photons && std::time::Instant::now() < deadline,
            "{behind} of {photons} photons counted behind the resume point:\n{m}"
        );
        std::thread::sleep(std::time::Duration::from_millis(100));
    }
    assert!(d.terminate().success(), "{}", d.log_text());
    let logged = d.log_events();
    assert!(
        logged.iter().any(|e| e["message"]
            .as_str()
            .is_some_and(|m| m.starts_with("photons behind the resume point dropped"))),
        "no log line about the dropped photons:\n{}",
        d.log_text()
    );
    let finished = logged
        .iter()
        .find(|e| e["message"] == "engine finished")
        .expect("engine finished line");
    assert_eq!(finished["behind_resume"], photons, "{finished}");

    let after = journal(&state);
    let mut seen = std::collections::BTreeSet::new();
    for a in after.iter().filter(|a| a["trigger"].is_object()) {
        assert!(seen.insert(identity(a)), "issued twice: {a}");
    }
    assert_eq!(
        after.len(),
        before.len(),
        "alerts issued after the restart: {after:?}"
    );
}
