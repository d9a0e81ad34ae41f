//! The live daemon against bad input and faults: each test starts `glint run` on loopback port 0, drives it
//! over real sockets (raw frames, or the `feed`/`listen`/`withdraw` subcommands) and checks what the issue's
//! "Bad input and faults" list asks: refusals and hang-ups that leave other producers alone, a subscriber
//! that never reads, SIGKILL and restart with exactly-once resumption, a producer reconnecting mid-stream.

use std::collections::BTreeSet;
use std::net::SocketAddr;
use std::process::Command;
use std::thread;
use std::time::{Duration, Instant};

use glint_wire::pb::{self, RefusalCode, ingest_reply, subscriber_frame};

use crate::util::{self, Conn, Daemon, Got, INSTRUMENT, OPERATOR_TOKEN, PRODUCER_TOKEN, SUBSCRIBER_TOKEN};

/// Streams `frames` (Hello excluded) as a good producer; returns the final Ack after the last frame.
pub(crate) fn stream_all(addr: SocketAddr, frames: &[pb::ProducerFrame]) -> pb::Ack {
    let (mut c, reply) = util::producer(addr, INSTRUMENT, PRODUCER_TOKEN, 1);
    assert!(
        matches!(reply.body, Some(ingest_reply::Body::Welcome(_))),
        "{reply:?}"
    );
    let mut last_seq = 0;
    for f in frames
        .iter()
        .filter(|f| !matches!(f.body, Some(pb::producer_frame::Body::Hello(_))))
    {
        if let Some(pb::producer_frame::Body::Batch(b)) = &f.body {
            last_seq = b.seq;
        }
        if let Some(pb::producer_frame::Body::Status(s)) = &f.body {
            last_seq = s.seq;
        }
        c.send(f);
    }
    wait_ack(&mut c, last_seq)
}

fn wait_ack(c: &mut Conn, seq: u64) -> pb::Ack {
    let deadline = Instant::now() + Duration::from_secs(60);
    loop {
        assert!(Instant::now() < deadline, "no ack of seq {seq} within 60 s");
        match c.recv::<pb::IngestReply>(Duration::from_secs(60)) {
            Got::Frame(pb::IngestReply {
                body: Some(ingest_reply::Body::Ack(a)),
            }) if a.seq >= seq => return a,
            Got::Frame(_) => {}
            other => panic!("waiting for the ack of seq {seq}: {other:?}"),
        }
    }
}

/// Runs `bad` against a daemon while a good producer streams; the good producer's photons must all be taken.
fn refused_while_others_run(bad: impl FnOnce(SocketAddr)) {
    let dir = tempfile::tempdir().unwrap();
    let d = Daemon::start(dir.path(), "");
    let frames = util::background_frames(20, 11);
    let expected = util::photons_in(&frames);
    let addr = d.ingest;
    // The good producer connects first, then the bad client tries its luck while it streams.
    let (mut good, reply) = util::producer(addr, INSTRUMENT, PRODUCER_TOKEN, 1);
    assert!(
        matches!(reply.body, Some(ingest_reply::Body::Welcome(_))),
        "{reply:?}"
    );
    let body: Vec<_> = frames.iter().skip(1).cloned().collect();
    let half = body.len() / 2;
    for f in &body[..half] {
        good.send(f);
    }
    bad(addr);
    for f in &body[half..] {
        good.send(f);
    }
    let last = body.iter().filter_map(|f| match &f.body {
        Some(pb::producer_frame::Body::Batch(b)) => Some(b.seq),
        Some(pb::producer_frame::Body::Status(s)) => Some(s.seq),
        _ => None,
    });
    let ack = wait_ack(&mut good, last.max().unwrap());
    assert_eq!(
        (ack.photons, ack.refused),
        (expected, 0),
        "the good producer was affected"
    );
}

#[test]
fn bad_producer_token_is_refused_and_others_unaffected() {
    refused_while_others_run(|addr| {
        let (mut c, r) = util::producer(addr, INSTRUMENT, "wrong-token-123", 1);
        util::assert_refused_and_closed(&mut c, Some(r), RefusalCode::BadToken);
    });
}

#[test]
fn unknown_instrument_is_refused_like_a_bad_token_and_others_unaffected() {
    refused_while_others_run(|addr| {
        // The token is checked first: a peer without one cannot tell which instruments exist.
        let (mut c, r) = util::producer(addr, "lumen-drift", PRODUCER_TOKEN, 1);
        let unknown = util::assert_refused_and_closed(&mut c, Some(r), RefusalCode::BadToken);
        let (mut c, r) = util::producer(addr, INSTRUMENT, "wrong-token-123", 1);
        let bad_token = util::assert_refused_and_closed(&mut c, Some(r), RefusalCode::BadToken);
        assert_eq!(unknown, bad_token);
        assert!(!unknown.contains("lumen-drift"), "{unknown}");
    });
}

#[test]
fn future_schema_is_refused_and_others_unaffected() {
    refused_while_others_run(|addr| {
        let (mut c, r) = util::producer(addr, INSTRUMENT, PRODUCER_TOKEN, 2);
        let detail = util::assert_refused_and_closed(&mut c, Some(r), RefusalCode::SchemaUnsupported);
        assert!(detail.contains('2'), "{detail}");
    });
}

#[test]
fn second_producer_for_a_busy_instrument_is_refused() {
    refused_while_others_run(|addr| {
        let (mut c, r) = util::producer(addr, INSTRUMENT, PRODUCER_TOKEN, 1);
        util::assert_refused_and_closed(&mut c, Some(r), RefusalCode::InstrumentBusy);
    });
}

#[test]
fn oversize_frame_is_refused_and_others_unaffected() {
    refused_while_others_run(|addr| {
        // A length prefix announcing one byte more than the limit; the body never needs to arrive.
        let mut c = Conn::connect(addr);
        let mut prefix = Vec::new();
        prost::encode_length_delimiter(util::MAX_FRAME + 1, &mut prefix).unwrap();
        c.send_raw(&prefix);
        let detail = util::assert_refused_and_closed(&mut c, None, RefusalCode::FrameTooLarge);
        // Before its Hello is accepted a peer is held to the small pre-authentication limit.
        assert!(detail.contains("4096"), "{detail}");
    });
}

#[test]
fn garbage_is_refused_and_others_unaffected() {
    refused_while_others_run(|addr| {
        // A 5-byte body that is not a protobuf message (field 0 is invalid).
        let mut c = Conn::connect(addr);
        c.send_raw(&[0x05, 0x00, 0xff, 0xff, 0xff, 0xff]);
        util::assert_refused_and_closed(&mut c, None, RefusalCode::MalformedFrame);
    });
}

#[test]
fn batch_before_hello_is_a_protocol_violation() {
    refused_while_others_run(|addr| {
        let mut c = Conn::connect(addr);
        c.send(&pb::ProducerFrame {
            body: Some(pb::producer_frame::Body::Batch(pb::PhotonBatch {
                seq: 1,
                ..Default::default()
            })),
        });
        util::assert_refused_and_closed(&mut c, None, RefusalCode::ProtocolViolation);
    });
}

#[test]
fn invalid_batch_is_a_warning_and_the_connection_stays() {
    let dir = tempfile::tempdir().unwrap();
    let d = Daemon::start(dir.path(), "");
    let frames = util::background_frames(5, 12);
    let (mut c, _) = util::producer(d.ingest, INSTRUMENT, PRODUCER_TOKEN, 1);
    // Batch 1 has one declination short; the rest follow unchanged.
    let mut body: Vec<_> = frames.into_iter().skip(1).collect();
    let Some(pb::producer_frame::Body::Batch(b)) = body.iter_mut().find_map(|f| {
        f.body
            .as_mut()
            .filter(|b| matches!(b, pb::producer_frame::Body::Batch(_)))
    }) else {
        panic!("no batch")
    };
    b.dec_deg.pop();
    let bad_n = b.time_gps_ns.len() as u64;
    let bad_seq = b.seq;
    let total = util::photons_in(&body);
    let last = body.len() as u64;
    for f in &body {
        c.send(f);
    }
    let mut warned = None;
    let deadline = Instant::now() + Duration::from_secs(30);
    let ack = loop {
        assert!(Instant::now() < deadline, "no final ack");
        match c.recv::<pb::IngestReply>(Duration::from_secs(30)) {
            Got::Frame(pb::IngestReply {
                body: Some(ingest_reply::Body::Refusal(r)),
            }) => warned = Some(r),
            Got::Frame(pb::IngestReply {
                body: Some(ingest_reply::Body::Ack(a)),
            }) if a.seq >= last => break a,
            Got::Frame(_) => {}
            other => panic!("connection ended: {other:?}"),
        }
    };
    let r = warned.expect("a warning for the bad batch");
    assert_eq!((r.code, r.seq), (RefusalCode::InvalidBatch as i32, bad_seq));
    assert!(r.detail.contains("dec_deg"), "{}", r.detail);
    assert_eq!((ack.photons, ack.refused), (total - bad_n, bad_n));
}

#[test]
fn subscriber_with_bad_token_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let d = Daemon::start(dir.path(), "");
    let (mut c, f) = util::subscriber(d.subs, "not-a-subscriber", 0, true);
    let Some(subscriber_frame::Body::Refusal(r)) = f.body else {
        panic!("expected a refusal, got {f:?}")
    };
    assert_eq!(r.code, RefusalCode::BadToken as i32);
    assert!(matches!(
        c.recv::<pb::SubscriberFrame>(Duration::from_secs(10)),
        Got::Closed
    ));
    // A withdrawal with a subscriber token (not the operator's) is refused too.
    let mut c = Conn::connect(d.subs);
    let req = pb::WithdrawRequest {
        token: SUBSCRIBER_TOKEN.into(),
        alert_id: "GL-x-1".into(),
        reason: "r".into(),
        operator: "t".into(),
    };
    c.send(&pb::SubscriberRequest {
        body: Some(pb::subscriber_request::Body::Withdraw(req)),
    });
    match c.recv::<pb::SubscriberFrame>(Duration::from_secs(10)) {
        Got::Frame(pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Refusal(r)),
        }) => {
            assert_eq!(r.code, RefusalCode::BadToken as i32)
        }
        other => panic!("expected a refusal, got {other:?}"),
    }
    // A good subscriber is welcomed.
    let (_c, f) = util::subscriber(d.subs, SUBSCRIBER_TOKEN, 0, true);
    assert!(
        matches!(f.body, Some(subscriber_frame::Body::Welcome(_))),
        "{f:?}"
    );
}

/// Feeds `rec` at max speed with `glint feed`; returns photons per second from its report.
fn feed_rate(d: &Daemon, rec: &std::path::Path, token: &std::path::Path) -> f64 {
    let text = util::feed(d, rec, token, &[]);
    // "... photons in X s (N photons/s) ..."
    let rate = text
        .split('(')
        .nth(1)
        .and_then(|s| s.split(' ').next())
        .and_then(|s| s.parse::<f64>().ok());
    rate.unwrap_or_else(|| panic!("no rate in feed output: {text}"))
}

/// Reads alert frames until `n` alerts arrived (or 60 s passed); returns their sequence numbers.
fn read_alerts(c: &mut Conn, n: usize, timeout: Duration) -> Vec<u64> {
    let mut seqs = Vec::new();
    let deadline = Instant::now() + timeout;
    while seqs.len() < n && Instant::now() < deadline {
        match c.recv::<pb::SubscriberFrame>(deadline.saturating_duration_since(Instant::now())) {
            Got::Frame(pb::SubscriberFrame {
                body: Some(subscriber_frame::Body::Alert(a)),
            }) => seqs.push(a.seq),
            Got::Frame(_) => {}
            Got::Closed | Got::Timeout => break,
        }
    }
    seqs
}

#[test]
fn a_subscriber_that_never_reads_does_not_slow_ingest() {
    let dir = tempfile::tempdir().unwrap();
    let rec = dir.path().join("demo.glrec");
    util::write_recording(&rec, &util::demo_frames());
    let token = util::token_file(dir.path(), "producer.token", PRODUCER_TOKEN);
    // Without subscribers.
    let d1 = Daemon::start(&dir.path().join("alone"), "");
    let alone = feed_rate(&d1, &rec, &token);
    drop(d1);
    // With three subscribers that never read a byte, and one that does.
    let d2 = Daemon::start(&dir.path().join("stuck"), "unwritable_timeout_s = 60.0");
    let stuck: Vec<_> = (0..3)
        .map(|_| util::subscriber(d2.subs, SUBSCRIBER_TOKEN, 0, true).0)
        .collect();
    let (mut reader, _) = util::subscriber(d2.subs, SUBSCRIBER_TOKEN, 0, true);
    let with_stuck = feed_rate(&d2, &rec, &token);
    println!(
        "feed rate alone: {alone:.0} photons/s; with three subscribers that never read: {with_stuck:.0} photons/s"
    );
    assert!(
        with_stuck >= 0.5 * alone,
        "ingest slowed: {with_stuck:.0} vs {alone:.0} photons/s"
    );
    // The reading subscriber still gets every alert, in order, while the others sit.
    let seqs = read_alerts(&mut reader, 3, Duration::from_secs(30));
    assert_eq!(seqs, vec![1, 2, 3], "the reading subscriber was held up");
    drop(stuck);
}

#[test]
fn sigkill_then_restart_delivers_every_journalled_alert_once_in_order() {
    let dir = tempfile::tempdir().unwrap();
    let rec = dir.path().join("demo.glrec");
    util::write_recording(&rec, &util::demo_frames());
    let token = util::token_file(dir.path(), "producer.token", PRODUCER_TOKEN);
    let mut d = Daemon::start(dir.path(), "");
    let (mut sub, _) = util::subscriber(d.subs, SUBSCRIBER_TOKEN, 0, true);
    // Twelve minutes of demo at 25x: alerts flow for about half a minute.
    let mut feed = Command::new(util::glint_bin())
        .arg("feed")
        .arg(&rec)
        .args(["--to", &d.ingest.to_string(), "--speed", "25", "--token-file"])
        .arg(&token)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let before = read_alerts(&mut sub, 2, Duration::from_secs(60));
    assert_eq!(before, vec![1, 2], "alerts did not flow before the kill");
    d.kill9();
    let _ = feed.kill();
    let _ = feed.wait();
    // Simulate a record torn by the crash: half a record header at the end of the newest segment.
    let jdir = dir.path().join("state/journal");
    let mut segs: Vec<_> = std::fs::read_dir(&jdir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    segs.sort();
    let newest = segs.last().unwrap().clone();
    let len = std::fs::metadata(&newest).unwrap().len();
    let mut f = std::fs::OpenOptions::new().append(true).open(&newest).unwrap();
    std::io::Write::write_all(&mut f, &[0x40, 0x00, 0x00]).unwrap();
    drop(f);
    let d2 = Daemon::start(dir.path(), "");
    let torn: Vec<_> = d2
        .log_events()
        .into_iter()
        .filter(|e| e["message"].as_str().is_some_and(|m| m.contains("torn tail")))
        .collect();
    assert_eq!(torn.len(), 1, "torn tail not logged:\n{}", d2.log_text());
    assert_eq!(torn[0]["bytes_cut"], 3);
    assert_eq!(torn[0]["offset"], len);
    assert_eq!(
        std::fs::metadata(&newest).unwrap().len(),
        len,
        "the torn bytes were not cut"
    );
    // Resume after the last alert the subscriber saw: the rest arrive once, in order, without a gap.
    let last_seen = *before.last().unwrap();
    let (mut sub, welcome) = util::subscriber(d2.subs, SUBSCRIBER_TOKEN, last_seen, false);
    let Some(subscriber_frame::Body::Welcome(w)) = welcome.body else {
        panic!("{welcome:?}")
    };
    let journalled = w.last_seq;
    assert!(journalled >= last_seen);
    let after = read_alerts(
        &mut sub,
        (journalled - last_seen) as usize,
        Duration::from_secs(30),
    );
    let all: Vec<u64> = before.iter().chain(after.iter()).copied().collect();
    assert_eq!(
        all,
        (1..=journalled).collect::<Vec<_>>(),
        "delivery across the restart was not exactly once in order"
    );
    // Nothing more arrives (only heartbeats).
    assert!(read_alerts(&mut sub, 1, Duration::from_secs(1)).is_empty());
    println!("journalled before the kill: {journalled}; seen live: {before:?}; resumed: {after:?}");
}

#[test]
fn producer_reconnect_mid_stream_is_dead_time_not_a_false_alert() {
    let dir = tempfile::tempdir().unwrap();
    let mut d = Daemon::start(dir.path(), "");
    let (mut sub, _) = util::subscriber(d.subs, SUBSCRIBER_TOKEN, 0, true);
    // 240 s of background; the producer is away from 90 s to 150 s (a whole rate window).
    let frames = util::background_frames(240, 21);
    let start = frames
        .iter()
        .find_map(|f| match &f.body {
            Some(pb::producer_frame::Body::Batch(b)) => b.time_gps_ns.first().copied(),
            _ => None,
        })
        .expect("a batch");
    let at = |f: &pb::ProducerFrame| match &f.body {
        Some(pb::producer_frame::Body::Batch(b)) => b.time_gps_ns.iter().copied().max().map(|t| t - start),
        Some(pb::producer_frame::Body::Status(s)) => Some(s.now_gps_ns - start),
        _ => None,
    };
    let s = 1_000_000_000_i64;
    let first: Vec<_> = frames
        .iter()
        .filter(|f| at(f).is_some_and(|t| t < 90 * s))
        .cloned()
        .collect();
    let second: Vec<_> = frames
        .iter()
        .filter(|f| at(f).is_some_and(|t| t >= 150 * s))
        .cloned()
        .collect();
    let a1 = stream_all(d.ingest, &first);
    assert_eq!(a1.photons, util::photons_in(&first));
    // Disconnected (the connection above is dropped); come back 60 s of event time later on a new connection.
    thread::sleep(Duration::from_millis(200));
    let (mut c, reply) = util::producer(d.ingest, INSTRUMENT, PRODUCER_TOKEN, 1);
    let Some(ingest_reply::Body::Welcome(w)) = reply.body else {
        panic!("{reply:?}")
    };
    assert_eq!(
        w.last_seq, a1.seq,
        "Welcome should name the last seq taken before"
    );
    let mut last = 0;
    for f in &second {
        c.send(f);
        last = match &f.body {
            Some(pb::producer_frame::Body::Batch(b)) => b.seq,
            Some(pb::producer_frame::Body::Status(st)) => st.seq,
            _ => last,
        };
    }
    let a2 = wait_ack(&mut c, last);
    assert_eq!(a2.photons, util::photons_in(&second));
    drop(c);
    assert!(
        read_alerts(&mut sub, 1, Duration::from_secs(2)).is_empty(),
        "a false alert after the reconnect"
    );
    // Graceful stop: exit 0, a closing heartbeat, and the engine's dead time covers the gap.
    let status = d.terminate();
    assert!(status.success(), "exit status {status}:\n{}", d.log_text());
    let mut closing = false;
    while let Got::Frame(f) = sub.recv::<pb::SubscriberFrame>(Duration::from_secs(5)) {
        match f.body {
            Some(subscriber_frame::Body::Heartbeat(h)) if h.closing => closing = true,
            Some(subscriber_frame::Body::Alert(a)) => panic!("false alert at shutdown: {a:?}"),
            _ => {}
        }
    }
    assert!(closing, "no closing heartbeat");
    let ev = d.log_events();
    let fin = ev
        .iter()
        .find(|e| e["message"] == "engine finished")
        .unwrap_or_else(|| panic!("no engine summary:\n{}", d.log_text()));
    let dead_s = fin["dead_s"].as_f64().unwrap();
    assert!(
        (59.0..=61.0).contains(&dead_s),
        "dead time {dead_s} s, expected the 60 s gap"
    );
    assert!(fin["stream_breaks"].as_u64().unwrap() >= 1);
    let ids: BTreeSet<_> = ev
        .iter()
        .filter(|e| e["message"] == "alert issued")
        .map(|e| e["id"].to_string())
        .collect();
    assert!(ids.is_empty(), "alerts issued: {ids:?}");
}

#[test]
fn listen_resumes_from_its_state_file_and_operator_withdraws() {
    let dir = tempfile::tempdir().unwrap();
    let d = Daemon::start(dir.path(), "");
    let a = stream_all(d.ingest, &util::demo_frames());
    assert!(a.photons > 0);
    let sub_token = util::token_file(dir.path(), "sub.token", SUBSCRIBER_TOKEN);
    let op_token = util::token_file(dir.path(), "op.token", OPERATOR_TOKEN);
    let state = dir.path().join("listen.state");
    let listen = |n: u32| {
        let out = Command::new(util::glint_bin())
            .args([
                "listen",
                "--from",
                &d.subs.to_string(),
                "--json",
                "--replay-all",
                "--timeout-s",
                "30",
            ])
            .args(["--max-alerts", &n.to_string(), "--token-file"])
            .arg(&sub_token)
            .arg("--state-file")
            .arg(&state)
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "listen failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        util::checked_json_lines(&String::from_utf8(out.stdout).unwrap())
    };
    let first = listen(2);
    assert_eq!(
        first
            .iter()
            .map(|v| v["seq"].as_u64().unwrap())
            .collect::<Vec<_>>(),
        vec![1, 2]
    );
    assert_eq!(std::fs::read_to_string(&state).unwrap().trim(), "2");
    let second = listen(1);
    assert_eq!(second[0]["seq"], 3, "listen did not resume after its state file");
    // The operator withdraws the second flash (the first, a glitch, is withdrawn automatically); a subscriber
    // sees the withdrawal naming it.
    assert_eq!(first[1]["kind"], "flash");
    let id = first[1]["id"].as_str().unwrap().to_string();
    let out = Command::new(util::glint_bin())
        .args([
            "withdraw",
            &id,
            "--reason",
            "test: not a real event",
            "--from",
            &d.subs.to_string(),
            "--token-file",
        ])
        .arg(&op_token)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "withdraw failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let (mut c, welcome) = util::subscriber(d.subs, SUBSCRIBER_TOKEN, 0, true);
    let Some(subscriber_frame::Body::Welcome(w)) = welcome.body else {
        panic!("{welcome:?}")
    };
    // The flash's withdrawal, among the newest alerts (its assessment, if issued, is withdrawn after it).
    let mut withdrawal = None;
    let mut reached = 0;
    let deadline = Instant::now() + Duration::from_secs(20);
    while reached < w.last_seq && Instant::now() < deadline {
        if let Got::Frame(pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Alert(a)),
        }) = c.recv::<pb::SubscriberFrame>(Duration::from_secs(5))
        {
            reached = a.seq;
            if a.kind == pb::AlertKind::Withdrawal as i32 && a.withdrawn_id == id {
                withdrawal = Some(a);
            }
        }
    }
    let wd = withdrawal.expect("the withdrawal alert");
    assert_eq!(
        (wd.kind, wd.withdrawn_id.as_str()),
        (pb::AlertKind::Withdrawal as i32, id.as_str())
    );
    assert!(wd.reason.contains("not a real event"));
    // Withdrawing it again is refused with a reason.
    let again = Command::new(util::glint_bin())
        .args([
            "withdraw",
            &id,
            "--reason",
            "again",
            "--from",
            &d.subs.to_string(),
            "--token-file",
        ])
        .arg(&op_token)
        .output()
        .unwrap();
    assert!(!again.status.success());
    assert!(String::from_utf8_lossy(&again.stderr).contains("already withdrawn"));
}
