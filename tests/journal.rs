//! The journal against damage, through the real binary: a corrupt record in the middle and a deleted older
//! segment cost only the alerts they held, which subscribers are told about as a Gap; numbers are never
//! reused after the restart; `glint journal` reads and verifies a state directory offline.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::time::{Duration, Instant};

use glint_wire::pb::{self, subscriber_frame};
use prost::Message;

use crate::util::{self, Conn, Daemon, Got, INSTRUMENT, OPERATOR_TOKEN, SUBSCRIBER_TOKEN};

/// Records written per segment by `prefill`.
const PER_SEGMENT: u64 = 40;

/// Where one record lies: its segment file and byte range.
#[derive(Debug, Clone)]
struct Span {
    path: PathBuf,
    start: u64,
    end: u64,
}

fn made_up_alert(seq: u64) -> pb::Alert {
    pb::Alert {
        seq,
        id: format!("GL-{INSTRUMENT}-20261201T000000.000-{seq}"),
        kind: pb::AlertKind::Flash as i32,
        instrument: INSTRUMENT.into(),
        issued_utc: "2026-12-01T00:00:01.000Z".into(),
        trigger: Some(pb::Trigger {
            counts: 10 + seq,
            sigma: 5.0 + (seq % 7) as f64 * 0.25,
            ..Default::default()
        }),
        ..Default::default()
    }
}

/// Writes a journal of `n` made-up flashes into `state/journal` in the on-disk format (segment header
/// `GLINTJNL` + u32 version 1, records `u32 len | u32 crc32 | i64 written_unix_ns | Alert`), as a daemon
/// would have; returns where each record lies (index = seq - 1).
fn prefill(state: &Path, n: u64) -> Vec<Span> {
    let jdir = state.join("journal");
    std::fs::create_dir_all(&jdir).unwrap();
    let mut spans = Vec::new();
    let mut file: Vec<u8> = Vec::new();
    let mut path = PathBuf::new();
    for seq in 1..=n {
        if (seq - 1) % PER_SEGMENT == 0 {
            if !file.is_empty() {
                std::fs::write(&path, &file).unwrap();
            }
            path = jdir.join(format!("segment-{seq:020}.gjl"));
            file = b"GLINTJNL".to_vec();
            file.extend_from_slice(&1u32.to_le_bytes());
        }
        let mut payload = 1_796_083_200_000_000_000i64.to_le_bytes().to_vec();
        payload.extend_from_slice(&made_up_alert(seq).encode_to_vec());
        let start = file.len() as u64;
        file.extend_from_slice(&(payload.len() as u32).to_le_bytes());
        file.extend_from_slice(&crc32fast::hash(&payload).to_le_bytes());
        file.extend_from_slice(&payload);
        spans.push(Span {
            path: path.clone(),
            start,
            end: file.len() as u64,
        });
    }
    std::fs::write(&path, &file).unwrap();
    spans
}

/// Small segments, so the daemon's own appends rotate too.
fn small_segments(cfg: &str) -> String {
    cfg.replace("[journal]\n", "[journal]\nsegment_bytes = 4096\n")
}

/// What a replay-all subscriber got until it had seen `upto`: alert seqs and gaps (from, to, reason).
fn replay_all(addr: std::net::SocketAddr, upto: u64) -> (u64, Vec<u64>, Vec<(u64, u64, String)>) {
    let (mut c, welcome) = util::subscriber(addr, SUBSCRIBER_TOKEN, 0, true);
    let Some(subscriber_frame::Body::Welcome(w)) = welcome.body else {
        panic!("{welcome:?}")
    };
    let (mut alerts, mut gaps) = (Vec::new(), Vec::new());
    let deadline = Instant::now() + Duration::from_secs(60);
    let mut reached = 0;
    while reached < upto && Instant::now() < deadline {
        match c.recv::<pb::SubscriberFrame>(deadline.saturating_duration_since(Instant::now())) {
            Got::Frame(pb::SubscriberFrame {
                body: Some(subscriber_frame::Body::Alert(a)),
            }) => {
                reached = a.seq;
                alerts.push(a.seq);
            }
            Got::Frame(pb::SubscriberFrame {
                body: Some(subscriber_frame::Body::Gap(g)),
            }) => {
                reached = g.to_seq;
                gaps.push((g.from_seq, g.to_seq, g.reason));
            }
            Got::Frame(_) => {}
            Got::Closed | Got::Timeout => break,
        }
    }
    (w.last_seq, alerts, gaps)
}

/// An operator's withdrawal of `id`: the new alert's seq.
fn withdraw(addr: std::net::SocketAddr, id: &str) -> u64 {
    let mut c = Conn::connect(addr);
    c.send(&pb::SubscriberRequest {
        body: Some(pb::subscriber_request::Body::Withdraw(pb::WithdrawRequest {
            token: OPERATOR_TOKEN.into(),
            alert_id: id.into(),
            reason: "test of numbering after a restart".into(),
            operator: "glint-tests".into(),
        })),
    });
    match c.recv::<pb::SubscriberFrame>(Duration::from_secs(20)) {
        Got::Frame(pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Alert(a)),
        }) => a.seq,
        other => panic!("withdrawal not answered with an alert: {other:?}"),
    }
}

fn glint_journal(args: &[&str], state: &Path) -> Output {
    Command::new(util::glint_bin())
        .arg("journal")
        .args(args)
        .arg("--state-dir")
        .arg(state)
        .output()
        .unwrap()
}

fn text(o: &Output) -> String {
    format!(
        "{}{}",
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    )
}

/// Starts on a 400-alert journal, stops cleanly (so the high-water file knows 400 were issued), damages
/// it with `damage`, restarts; returns the restarted daemon.
fn damaged_restart(dir: &Path, damage: impl FnOnce(&[Span])) -> Daemon {
    let state = dir.join("state");
    let spans = prefill(&state, 400);
    let mut d = Daemon::start_edited(dir, "", &small_segments);
    let (last, alerts, gaps) = replay_all(d.subs, 400);
    assert_eq!((last, alerts.len(), gaps.len()), (400, 400, 0));
    assert!(d.terminate().success(), "{}", d.log_text());
    damage(&spans);
    // An empty temporary file, as a write interrupted by a full disk leaves: removed at start.
    std::fs::write(state.join("ports.tmp"), b"").unwrap();
    let d = Daemon::start_edited(dir, "", &small_segments);
    assert!(!state.join("ports.tmp").exists(), "temporary file left behind");
    d
}

#[test]
fn corrupt_middle_record_costs_only_that_alert_reported_as_a_gap_and_no_number_is_reused() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    let mut corrupt = None;
    let d = damaged_restart(dir.path(), |spans| {
        let s = spans[199].clone(); // seq 200
        let mut bytes = std::fs::read(&s.path).unwrap();
        for b in &mut bytes[s.start as usize + 20..s.start as usize + 24] {
            *b ^= 0x5a;
        }
        std::fs::write(&s.path, &bytes).unwrap();
        corrupt = Some(s);
    });
    let s = corrupt.unwrap();
    // Every other alert is served, in order, and the hole is a Gap frame of exactly seq 200.
    let (last, alerts, gaps) = replay_all(d.subs, 400);
    assert_eq!(last, 400, "Welcome.last_seq after the restart");
    let want: Vec<u64> = (1..=400).filter(|s| *s != 200).collect();
    assert_eq!(alerts, want);
    assert_eq!(gaps.len(), 1, "{gaps:?}");
    assert_eq!((gaps[0].0, gaps[0].1), (200, 200));
    assert!(gaps[0].2.contains("corrupt"), "{}", gaps[0].2);
    // The log names the segment, the offset and the numbers affected, and does not call it a torn tail.
    let events = d.log_events();
    let hit = events
        .iter()
        .find(|e| {
            e["fields"]["message"]
                .as_str()
                .is_some_and(|m| m.contains("corruption"))
        })
        .or_else(|| {
            events
                .iter()
                .find(|e| e["message"].as_str().is_some_and(|m| m.contains("corruption")))
        })
        .unwrap_or_else(|| panic!("corruption not logged:\n{}", d.log_text()));
    let flat = hit.to_string();
    assert!(flat.contains(&s.start.to_string()), "{flat}");
    assert!(flat.contains("segment-00000000000000000161.gjl"), "{flat}");
    assert!(flat.contains("seq 200-200"), "{flat}");
    assert!(!d.log_text().contains("torn tail"), "{}", d.log_text());
    // The damaged bytes are kept aside; the segment itself is not cut.
    let q: Vec<_> = std::fs::read_dir(state.join("journal/quarantine"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    assert_eq!(q.len(), 1, "{q:?}");
    assert_eq!(std::fs::metadata(&q[0]).unwrap().len(), s.end - s.start);
    // New alerts number on past 400.
    let new_seq = withdraw(d.subs, &made_up_alert(7).id);
    assert_eq!(new_seq, 401);
    // `glint listen` is told about the gap on stderr and carries on.
    let token = util::token_file(dir.path(), "sub.token", SUBSCRIBER_TOKEN);
    let out = Command::new(util::glint_bin())
        .args(["listen", "--from", &d.subs.to_string(), "--json", "--replay-all"])
        .args(["--timeout-s", "30", "--max-alerts", "400", "--token-file"])
        .arg(&token)
        .output()
        .unwrap();
    assert!(out.status.success(), "listen failed: {}", text(&out));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("warning: alerts 200-200"), "{stderr}");
    let seqs: Vec<u64> = String::from_utf8_lossy(&out.stdout)
        .lines()
        .map(|l| util::checked_json(l)["seq"].as_u64().unwrap())
        .collect();
    assert_eq!(seqs.len(), 400);
    assert_eq!(seqs.last(), Some(&401));
    // Offline verify agrees.
    let v = glint_journal(&["verify"], &state);
    assert_eq!(v.status.code(), Some(1), "{}", text(&v));
    let t = text(&v);
    assert!(
        t.contains("CORRUPT") && t.contains("seq 200-200") && t.contains("LOST seq 200-200"),
        "{t}"
    );
}

#[test]
fn deleted_older_segment_costs_only_its_alerts_reported_as_a_gap_and_no_number_is_reused() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    // The third segment holds 81-120.
    let d = damaged_restart(dir.path(), |spans| {
        std::fs::remove_file(&spans[80].path).unwrap();
    });
    let log = d.log_text();
    assert!(log.contains("alerts missing"), "{log}");
    let (last, alerts, gaps) = replay_all(d.subs, 400);
    assert_eq!(last, 400);
    let want: Vec<u64> = (1..=400).filter(|s| !(81..=120).contains(s)).collect();
    assert_eq!(alerts, want);
    assert_eq!(gaps.len(), 1, "{gaps:?}");
    assert_eq!((gaps[0].0, gaps[0].1), (81, 120));
    assert!(gaps[0].2.contains("segment is missing"), "{}", gaps[0].2);
    assert_eq!(withdraw(d.subs, &made_up_alert(3).id), 401);
    let v = glint_journal(&["verify"], &state);
    assert_eq!(v.status.code(), Some(1), "{}", text(&v));
    assert!(text(&v).contains("LOST seq 81-120"), "{}", text(&v));
}

#[test]
fn journal_command_verifies_lists_shows_and_exports_without_touching_the_journal() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    let spans = prefill(&state, 50);
    let snapshot = |p: &Path| std::fs::read(p).unwrap();
    let before: Vec<Vec<u8>> = spans.iter().map(|s| snapshot(&s.path)).collect();
    let v = glint_journal(&["verify"], &state);
    assert_eq!(v.status.code(), Some(0), "{}", text(&v));
    assert!(text(&v).contains("50 intact record(s), seq 1-50"), "{}", text(&v));
    let list = glint_journal(&["list"], &state);
    assert!(list.status.success(), "{}", text(&list));
    let lines: Vec<String> = String::from_utf8_lossy(&list.stdout)
        .lines()
        .map(str::to_string)
        .collect();
    assert_eq!(lines.len(), 50);
    let cols: Vec<&str> = lines[6].split('\t').collect();
    let a7 = made_up_alert(7);
    assert_eq!(
        cols,
        vec![
            "7",
            a7.id.as_str(),
            "flash",
            INSTRUMENT,
            "2026-12-01T00:00:01.000Z",
            "5.00"
        ]
    );
    for key in ["7", a7.id.as_str()] {
        let show = glint_journal(&["show", key], &state);
        assert!(show.status.success(), "{}", text(&show));
        assert!(
            String::from_utf8_lossy(&show.stdout).contains(&a7.id),
            "{}",
            text(&show)
        );
    }
    let missing = glint_journal(&["show", "999"], &state);
    assert_eq!(missing.status.code(), Some(1), "{}", text(&missing));
    let export = glint_journal(&["export"], &state);
    assert!(export.status.success(), "{}", text(&export));
    let seqs: Vec<u64> = String::from_utf8_lossy(&export.stdout)
        .lines()
        .map(|l| util::checked_json(l)["seq"].as_u64().unwrap())
        .collect();
    assert_eq!(seqs, (1..=50).collect::<Vec<_>>());
    // Damaged: a flipped byte in record 10 and a torn tail; verify reports both and changes nothing.
    let s = &spans[9];
    let mut bytes = snapshot(&s.path);
    bytes[s.start as usize + 10] ^= 0x01;
    std::fs::write(&s.path, &bytes).unwrap();
    let newest = &spans[49].path;
    let mut tail = snapshot(newest);
    tail.extend_from_slice(&[7, 0, 0]);
    std::fs::write(newest, &tail).unwrap();
    let v = glint_journal(&["verify"], &state);
    assert_eq!(v.status.code(), Some(1), "{}", text(&v));
    let t = text(&v);
    assert!(t.contains(&format!("CORRUPT {}", s.path.display())), "{t}");
    assert!(
        t.contains(&format!("offset {}", s.start)) && t.contains("seq 10-10"),
        "{t}"
    );
    assert!(t.contains("TORN TAIL") && t.contains("DAMAGED"), "{t}");
    assert_eq!(snapshot(&s.path), bytes);
    assert_eq!(snapshot(newest), tail);
    assert!(!state.join("journal/quarantine").exists());
    assert!(!state.join("journal/high_water").exists());
    // The other 49 are still listed, with a warning.
    let list = glint_journal(&["list"], &state);
    assert_eq!(String::from_utf8_lossy(&list.stdout).lines().count(), 49);
    assert!(String::from_utf8_lossy(&list.stderr).contains("damaged"));
    drop(before);
}

#[test]
fn run_refuses_to_start_on_a_disk_below_the_configured_minimum() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    std::fs::create_dir_all(&state).unwrap();
    let cfg = dir.path().join("glint.toml");
    let text_cfg = util::config_text(&state, "").replace(
        "[daemon]\n",
        "[daemon]\ndisk_warn_free_bytes = 9000000000000000000\ndisk_min_free_bytes = 9000000000000000000\n",
    );
    std::fs::write(&cfg, text_cfg).unwrap();
    let out = Command::new(util::glint_bin())
        .args(["run", "--config"])
        .arg(&cfg)
        .output()
        .unwrap();
    assert!(!out.status.success());
    let t = text(&out);
    assert!(
        t.contains("refusing to start") && t.contains("disk_min_free_bytes"),
        "{t}"
    );
    assert!(!state.join("ports.json").exists());
    // Above the minimum but below the warning threshold: it starts, and says so.
    let d = Daemon::start_edited(dir.path(), "", &|c| {
        c.replace(
            "[daemon]\n",
            "[daemon]\ndisk_warn_free_bytes = 9000000000000000000\n",
        )
    });
    assert!(d.log_text().contains("little disk space"), "{}", d.log_text());
}
