//! Hostile peers against the real daemon on 127.0.0.1: a producer that stalls mid-frame, floods of
//! unauthenticated connections that announce huge frames and stall or reconnect at once, absurd and late
//! photon times, log forgery through peer-supplied names, `glint feed` losing its daemon, and the
//! configuration checks that must refuse what `run` would refuse.

use std::io::Write;
use std::net::{SocketAddr, TcpStream};
use std::process::{Command, Stdio};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::thread;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use glint_wire::pb::{self, RefusalCode, ingest_reply, subscriber_frame};

use crate::util::{self, Conn, Daemon, Got, INSTRUMENT, PRODUCER_TOKEN, SUBSCRIBER_TOKEN};

/// The host clock as GPS nanoseconds (GPS - UTC = 18 s since 2017).
pub(crate) fn now_gps_ns() -> i64 {
    let unix = SystemTime::now().duration_since(UNIX_EPOCH).unwrap();
    (unix.as_nanos() as i64) - 315_964_800_000_000_000 + 18_000_000_000
}

/// A valid batch of `n` photons from `t0`, 1 ms apart.
pub(crate) fn batch(seq: u64, t0: i64, n: usize) -> pb::ProducerFrame {
    pb::ProducerFrame {
        body: Some(pb::producer_frame::Body::Batch(pb::PhotonBatch {
            seq,
            time_gps_ns: (0..n).map(|i| t0 + i as i64 * 1_000_000).collect(),
            ra_deg: vec![120.0; n],
            dec_deg: vec![20.0; n],
            zenith_deg: vec![30.0; n],
            azimuth_deg: vec![90.0; n],
            energy_gev: vec![80.0; n],
            ..Default::default()
        })),
    }
}

fn encoded(m: &impl prost::Message) -> Vec<u8> {
    let mut out = Vec::new();
    glint_wire::encode_frame(m, usize::MAX, &mut out).unwrap();
    out
}

/// Reads replies until an Ack of at least `seq`, collecting the warnings on the way.
pub(crate) fn ack_of(c: &mut Conn, seq: u64) -> (pb::Ack, Vec<pb::Refusal>) {
    let mut warnings = Vec::new();
    let deadline = Instant::now() + Duration::from_secs(30);
    loop {
        assert!(Instant::now() < deadline, "no ack of seq {seq}");
        match c.recv::<pb::IngestReply>(Duration::from_secs(30)) {
            Got::Frame(pb::IngestReply {
                body: Some(ingest_reply::Body::Ack(a)),
            }) if a.seq >= seq => return (a, warnings),
            Got::Frame(pb::IngestReply {
                body: Some(ingest_reply::Body::Refusal(r)),
            }) => warnings.push(r),
            Got::Frame(_) => {}
            other => panic!("waiting for the ack of seq {seq}: {other:?}"),
        }
    }
}

fn is_welcome(r: &pb::IngestReply) -> bool {
    matches!(r.body, Some(ingest_reply::Body::Welcome(_)))
}

fn refusal_code(r: &pb::IngestReply) -> Option<i32> {
    match &r.body {
        Some(ingest_reply::Body::Refusal(x)) => Some(x.code),
        _ => None,
    }
}

#[test]
fn a_producer_stalled_mid_frame_releases_its_instrument_within_the_frame_timeout() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    let d = Daemon::start_with(
        dir.path(),
        &util::config_text_with(&state, "frame_timeout_s = 2.0", "", ""),
    );
    let (mut stalled, r) = util::producer(d.ingest, INSTRUMENT, PRODUCER_TOKEN, 1);
    assert!(is_welcome(&r), "{r:?}");
    let frame = encoded(&batch(1, now_gps_ns() - 60_000_000_000, 200));
    stalled.send_raw(&frame[..frame.len() / 2]);
    let stalled_at = Instant::now();
    // The real producer is told the instrument is busy until the stalled one is cut off.
    let (_, first) = util::producer(d.ingest, INSTRUMENT, PRODUCER_TOKEN, 1);
    assert_eq!(
        refusal_code(&first),
        Some(RefusalCode::InstrumentBusy as i32),
        "{first:?}"
    );
    let got_in = loop {
        let (c, r) = util::producer(d.ingest, INSTRUMENT, PRODUCER_TOKEN, 1);
        if is_welcome(&r) {
            break (c, stalled_at.elapsed());
        }
        assert_eq!(
            refusal_code(&r),
            Some(RefusalCode::InstrumentBusy as i32),
            "{r:?}"
        );
        assert!(
            stalled_at.elapsed() < Duration::from_secs(20),
            "the instrument was never released"
        );
        thread::sleep(Duration::from_millis(100));
    };
    println!(
        "the instrument was free again {:.2} s after the producer stalled",
        got_in.1.as_secs_f64()
    );
    // The frame timeout is 2 s, checked every eighth of it; a generous bound for a loaded machine.
    assert!(
        got_in.1 >= Duration::from_millis(1900),
        "released too early: {:?}",
        got_in.1
    );
    assert!(
        got_in.1 < Duration::from_secs(6),
        "released too late: {:?}",
        got_in.1
    );
    // The stalled producer was told why.
    match stalled.recv::<pb::IngestReply>(Duration::from_secs(5)) {
        Got::Frame(r) => assert_eq!(
            refusal_code(&r),
            Some(RefusalCode::ProtocolViolation as i32),
            "{r:?}"
        ),
        other => panic!("the stalled producer heard nothing: {other:?}"),
    }
}

/// Opens `n` connections to `addr` that each send a frame header announcing `announce` bytes and a little
/// of the body, then stall.
fn stalled_connections(addr: SocketAddr, n: usize, announce: u64) -> Vec<TcpStream> {
    let mut v = Vec::new();
    for _ in 0..n {
        let mut s = TcpStream::connect_timeout(&addr, Duration::from_secs(10)).unwrap();
        let mut head = Vec::new();
        prost::encoding::encode_varint(announce, &mut head);
        head.extend_from_slice(&[0x0a; 100]);
        // The daemon may already have hung up on an earlier one; a failed write is fine.
        let _ = s.write_all(&head);
        v.push(s);
    }
    v
}

/// Connects and closes (with a reset, so no TIME_WAIT piles up) as fast as it can until `stop`, at most
/// `max` times; returns how many connections it made.
fn reconnect_flood(addrs: [SocketAddr; 2], stop: Arc<AtomicBool>, max: u64) -> thread::JoinHandle<u64> {
    thread::spawn(move || {
        let mut n = 0u64;
        while !stop.load(Ordering::Relaxed) && n < max {
            let addr = addrs[(n % 2) as usize];
            if let Ok(s) = TcpStream::connect_timeout(&addr, Duration::from_secs(2)) {
                let _ = socket2::SockRef::from(&s).set_linger(Some(Duration::ZERO));
            }
            n += 1;
        }
        n
    })
}

/// Stops the flood however the test ends.
struct StopOnDrop(Arc<AtomicBool>);

impl Drop for StopOnDrop {
    fn drop(&mut self) {
        self.0.store(true, Ordering::Relaxed);
    }
}

#[test]
fn unauthenticated_floods_neither_grow_memory_nor_lock_out_real_peers() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    // A 64 MiB frame limit: a daemon reserving what is announced would hold 300 x 64 MiB per port.
    let cfg = util::config_text_with(&state, "", "", "").replace(
        &format!("max_frame_bytes = {}", util::MAX_FRAME),
        "max_frame_bytes = 67108864",
    );
    let d = Daemon::start_with(dir.path(), &cfg);
    let rss_idle = d.rss_bytes();
    let mut held = Vec::new();
    for addr in [d.ingest, d.subs] {
        // Just under the frame limit, far beyond it, and small enough to be read (these stall in the pool of
        // unauthenticated connections until their deadline or eviction).
        held.extend(stalled_connections(addr, 100, 64 * 1024 * 1024 - 1));
        held.extend(stalled_connections(addr, 100, 1 << 40));
        held.extend(stalled_connections(addr, 100, 4000));
    }
    thread::sleep(Duration::from_millis(500));
    let rss_stalled = d.rss_bytes();

    let stop = Arc::new(AtomicBool::new(false));
    let flood = reconnect_flood([d.ingest, d.subs], stop.clone(), 200_000);
    let _stop_on_panic = StopOnDrop(stop.clone());
    // The flood is in full swing before the real peers come, and goes on while they do.
    thread::sleep(Duration::from_secs(1));
    let started = Instant::now();
    let (mut producers, mut subscribers, mut busy_retries) = (0, 0, 0);
    let peak = AtomicU64::new(0);
    for _ in 0..40 {
        // A producer: Welcome (a busy refusal means the previous one is still being released, so it got
        // past the gate; it is retried and counted).
        for attempt in 0.. {
            assert!(attempt < 50, "the producer never got its Welcome");
            let (c, r) = util::producer(d.ingest, INSTRUMENT, PRODUCER_TOKEN, 1);
            drop(c);
            if is_welcome(&r) {
                producers += 1;
                break;
            }
            assert_eq!(
                refusal_code(&r),
                Some(RefusalCode::InstrumentBusy as i32),
                "{r:?}"
            );
            busy_retries += 1;
            thread::sleep(Duration::from_millis(20));
        }
        let (_c, f) = util::subscriber(d.subs, SUBSCRIBER_TOKEN, 0, false);
        assert!(
            matches!(f.body, Some(subscriber_frame::Body::Welcome(_))),
            "{f:?}"
        );
        subscribers += 1;
        peak.fetch_max(d.rss_bytes(), Ordering::Relaxed);
        thread::sleep(Duration::from_millis(25));
    }
    let legit_s = started.elapsed().as_secs_f64();
    stop.store(true, Ordering::Relaxed);
    let flooded = flood.join().unwrap();
    let rss_peak = peak.load(Ordering::Relaxed).max(d.rss_bytes());
    println!(
        "RSS idle {:.1} MB, with 600 stalled connections {:.1} MB, peak under a flood of {flooded} reconnects {:.1} MB; \
         {producers}/40 producers and {subscribers}/40 subscribers got in within {legit_s:.1} s ({busy_retries} busy retries)",
        rss_idle as f64 / 1e6,
        rss_stalled as f64 / 1e6,
        rss_peak as f64 / 1e6
    );
    assert!(
        rss_stalled < 100_000_000,
        "RSS {rss_stalled} bytes with stalled connections"
    );
    assert!(rss_peak < 100_000_000, "RSS {rss_peak} bytes under the flood");
    assert_eq!((producers, subscribers), (40, 40));
    assert!(flooded > 100, "the flood hardly ran ({flooded} connections)");
    // Refused connections are summarised, not logged one by one.
    let refusal_lines = d
        .log_events()
        .iter()
        .filter(|e| {
            e["message"].as_str().is_some_and(|m| {
                m.contains("refused a connection")
                    || m.contains("refused ") && m.contains(" connections in the last")
            })
        })
        .count();
    assert!(
        refusal_lines <= 20,
        "{refusal_lines} refusal log lines for {flooded} connections"
    );
    drop(held);
}

#[test]
fn an_absurd_first_batch_is_refused_and_late_photons_are_counted_in_acks_and_metrics() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    let d = Daemon::start_with(
        dir.path(),
        &util::config_text_with(&state, "", "", "[metrics]\nlisten = \"127.0.0.1:0\""),
    );
    let (mut c, r) = util::producer(d.ingest, INSTRUMENT, PRODUCER_TOKEN, 1);
    assert!(is_welcome(&r), "{r:?}");
    // The first batch of the connection, at the far end of the i64 range.
    c.send(&batch(1, i64::MAX - 10_000_000, 5));
    match c.recv::<pb::IngestReply>(Duration::from_secs(10)) {
        Got::Frame(pb::IngestReply {
            body: Some(ingest_reply::Body::Refusal(r)),
        }) => {
            assert_eq!(r.code, RefusalCode::TimeOutOfRange as i32, "{r:?}");
            assert_eq!(r.seq, 1);
            assert!(r.detail.contains("max_future_s"), "{}", r.detail);
        }
        other => panic!("the absurd batch was not refused: {other:?}"),
    }
    // Time goes on normally after it: 100 photons an hour ago, then 10 photons older than the watermark.
    let t = now_gps_ns() - 3_600_000_000_000;
    c.send(&batch(2, t, 100));
    c.send(&batch(3, t - 10_000_000_000, 10));
    let (ack, warnings) = ack_of(&mut c, 3);
    assert_eq!((ack.photons, ack.refused, ack.late), (110, 5, 10), "{ack:?}");
    assert!(
        warnings
            .iter()
            .any(|w| w.code == RefusalCode::LatePhotons as i32 && w.seq == 3),
        "no late warning: {warnings:?}"
    );
    let m = d.metrics_text();
    assert!(m.contains("glint_late_photons_total 10"), "{m}");
    assert!(m.contains("glint_refused_photons_total 5"), "{m}");
    // The watermark stayed in this century: a photon now is taken, not late.
    c.send(&batch(4, t + 2_000_000_000, 3));
    let (ack, _) = ack_of(&mut c, 4);
    assert_eq!((ack.photons, ack.late), (113, 10), "{ack:?}");
}

#[test]
fn newlines_in_peer_supplied_names_forge_no_log_line() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    let cfg = util::config_text(&state, "").replace("log_format = \"json\"", "log_format = \"text\"");
    let d = Daemon::start_with(dir.path(), &cfg);
    let forged = "\n2026-12-05T00:00:00.000000Z  INFO glint: FORGED line";
    // A producer name (logged when it connects), an instrument id (refused), a subscriber's client name.
    let mut c = Conn::connect(d.ingest);
    c.send(&pb::ProducerFrame {
        body: Some(pb::producer_frame::Body::Hello(pb::Hello {
            instrument: INSTRUMENT.into(),
            token: PRODUCER_TOKEN.into(),
            schema_version: 1,
            producer: format!("evil{forged}"),
        })),
    });
    assert!(matches!(c.recv::<pb::IngestReply>(Duration::from_secs(10)), Got::Frame(r) if is_welcome(&r)));
    let (mut bad, r) = util::producer(d.ingest, &format!("x{forged}"), PRODUCER_TOKEN, 1);
    let detail = util::assert_refused_and_closed(&mut bad, Some(r), RefusalCode::BadToken);
    assert!(!detail.contains('\n'), "{detail}");
    let mut s = Conn::connect(d.subs);
    s.send(&pb::SubscriberRequest {
        body: Some(pb::subscriber_request::Body::Subscribe(pb::Subscribe {
            token: SUBSCRIBER_TOKEN.into(),
            client: format!("client{forged}"),
            schema_version: 1,
            ..Default::default()
        })),
    });
    assert!(matches!(
        s.recv::<pb::SubscriberFrame>(Duration::from_secs(10)),
        Got::Frame(_)
    ));
    // A 4 MiB instrument id is refused before it is read, and echoed nowhere.
    let mut huge = Conn::connect(d.ingest);
    // The daemon hangs up after the length prefix, so the write may fail part way, and the refusal may be
    // lost to the reset that unread bytes cause; either way the connection ends.
    let _ = huge
        .stream
        .write_all(&encoded(&util::hello(&"a".repeat(4 << 20), PRODUCER_TOKEN, 1)));
    match huge.recv::<pb::IngestReply>(Duration::from_secs(10)) {
        Got::Frame(r) => assert_eq!(refusal_code(&r), Some(RefusalCode::FrameTooLarge as i32), "{r:?}"),
        Got::Closed => {}
        Got::Timeout => panic!("a 4 MiB Hello was neither refused nor hung up on"),
    }
    drop((c, s));
    thread::sleep(Duration::from_millis(300));
    let log = d.log_text();
    assert!(
        log.contains("evil\\n2026"),
        "the producer name is not in the log, escaped:\n{log}"
    );
    for line in log.lines() {
        assert!(
            !line.starts_with("2026-12-05T00:00:00.000000Z"),
            "forged line: {line}"
        );
        assert!(line.len() < 2000, "a log line of {} bytes", line.len());
    }
}

#[test]
fn feed_exits_non_zero_when_the_daemon_is_killed_under_it() {
    let dir = tempfile::tempdir().unwrap();
    let mut d = Daemon::start(dir.path(), "");
    let rec = dir.path().join("bg.glrec");
    util::write_recording(&rec, &util::background_frames(120, 5));
    let token = util::token_file(dir.path(), "producer.token", PRODUCER_TOKEN);
    let mut feed = Command::new(util::glint_bin())
        .args(["feed"])
        .arg(&rec)
        .args(["--to", &d.ingest.to_string(), "--speed", "10", "--token-file"])
        .arg(&token)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    thread::sleep(Duration::from_millis(2000));
    assert!(
        feed.try_wait().unwrap().is_none(),
        "feed ended before the daemon was killed"
    );
    d.kill9();
    let deadline = Instant::now() + Duration::from_secs(60);
    let status = loop {
        if let Some(s) = feed.try_wait().unwrap() {
            break s;
        }
        assert!(
            Instant::now() < deadline,
            "feed did not exit within 60 s of the daemon's death"
        );
        thread::sleep(Duration::from_millis(50));
    };
    let out = feed.wait_with_output().unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(!status.success(), "feed exited 0; stderr: {stderr}");
    assert!(stderr.contains("before the recording did"), "{stderr}");
}

fn check_config(dir: &std::path::Path, text: &str, env: &[(&str, &str)]) -> (bool, String) {
    let p = dir.join("check.toml");
    std::fs::write(&p, text).unwrap();
    let mut cmd = Command::new(util::glint_bin());
    cmd.arg("check-config").arg(&p);
    for (k, v) in env {
        cmd.env(k, v);
    }
    let out = cmd.output().unwrap();
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    (out.status.success(), text)
}

#[test]
fn check_config_refuses_what_run_would_and_ignores_stray_environment() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    // check-config also wants the state directory to exist and be writable.
    std::fs::create_dir_all(&state).unwrap();
    let good = util::config_text(&state, "");
    let (ok, out) = check_config(dir.path(), &good, &[]);
    assert!(ok, "{out}");

    // A PEM file that holds no certificate.
    let pem = dir.path().join("empty.pem");
    std::fs::write(&pem, "-----BEGIN NOTHING-----\n-----END NOTHING-----\n").unwrap();
    let tls = good.replace(
        "queue_batches = 64",
        &format!(
            "queue_batches = 64\ntls_cert = \"{0}\"\ntls_key = \"{0}\"",
            pem.display()
        ),
    );
    let (ok, out) = check_config(dir.path(), &tls, &[]);
    assert!(
        !ok && out.contains("ingest.tls_cert") && out.contains("no PEM certificate"),
        "{out}"
    );

    // Both listeners on one port.
    let clash = good.replacen("listen = \"127.0.0.1:0\"", "listen = \"127.0.0.1:7777\"", 2);
    let (ok, out) = check_config(dir.path(), &clash, &[]);
    assert!(
        !ok && out.contains("subscribers.listen") && out.contains("clashes"),
        "{out}"
    );

    // Out-of-range sizes, each named.
    let sizes = good
        .replace(
            &format!("max_frame_bytes = {}", util::MAX_FRAME),
            "max_frame_bytes = 10",
        )
        .replace("[journal]", "[journal]\nsegment_bytes = -1")
        .replace("queue_batches = 64", "queue_batches = 0\nrecord_rotate_bytes = 0");
    let (ok, out) = check_config(dir.path(), &sizes, &[]);
    assert!(!ok, "{out}");
    for key in [
        "daemon.max_frame_bytes",
        "journal.segment_bytes",
        "ingest.queue_batches",
        "ingest.record_rotate_bytes",
    ] {
        assert!(out.contains(key), "{key} not named:\n{out}");
    }

    // A stray GLINT_* variable is listed as ignored, not fatal; a real override still applies.
    let (ok, out) = check_config(
        dir.path(),
        &good,
        &[("GLINT_HOME", "/opt/glint"), ("GLINT_DAEMON__LOG_LEVEL", "debug")],
    );
    assert!(ok, "{out}");
    assert!(out.contains("GLINT_HOME") && out.contains("ignored"), "{out}");
    assert!(!out.contains("GLINT_DAEMON__LOG_LEVEL"), "{out}");
    let (ok, out) = check_config(dir.path(), &good, &[("GLINT_INGEST__QUEUE_BATCHES", "-3")]);
    assert!(!ok && out.contains("ingest.queue_batches"), "{out}");

    // Valid but worth a warning: metrics on every address, plain ingest on a public address by permission.
    let public = good
        .replace("[journal]", "[metrics]\nlisten = \"0.0.0.0:0\"\n\n[journal]")
        .replacen(
            "listen = \"127.0.0.1:0\"",
            "listen = \"0.0.0.0:0\"\nallow_plain_remote = true",
            1,
        );
    let (ok, out) = check_config(dir.path(), &public, &[]);
    assert!(ok, "{out}");
    assert!(out.contains("warning: metrics.listen"), "{out}");
    assert!(out.contains("warning: ingest.listen"), "{out}");
}

#[test]
fn a_filter_with_an_unknown_alert_kind_is_refused_naming_it() {
    let dir = tempfile::tempdir().unwrap();
    let d = Daemon::start(dir.path(), "");
    let mut c = Conn::connect(d.subs);
    c.send(&pb::SubscriberRequest {
        body: Some(pb::subscriber_request::Body::Subscribe(pb::Subscribe {
            token: SUBSCRIBER_TOKEN.into(),
            kinds: vec![pb::AlertKind::Flash as i32, 99],
            schema_version: 1,
            ..Default::default()
        })),
    });
    match c.recv::<pb::SubscriberFrame>(Duration::from_secs(10)) {
        Got::Frame(pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Refusal(r)),
        }) => {
            assert_eq!(r.code, RefusalCode::BadRequest as i32);
            assert!(
                r.detail.contains("99") && r.detail.contains("FLASH"),
                "{}",
                r.detail
            );
        }
        other => panic!("expected a refusal: {other:?}"),
    }
}
