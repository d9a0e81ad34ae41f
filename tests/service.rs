//! `glint run` under a service manager's notify protocol (`Type=notify`): READY only once the listeners
//! answer, watchdog pings while healthy, STOPPING on SIGTERM. The test plays the service manager with a
//! Unix datagram socket of its own, as systemd does. SIGHUP reloads tokens with RELOADING/READY around it,
//! while a producer streams and a subscriber stays connected.

use std::net::TcpStream;
use std::os::unix::net::UnixDatagram;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use crate::util::{self, Conn, Got, INSTRUMENT, PRODUCER_TOKEN, SUBSCRIBER_TOKEN, config_text, glint_bin};

/// Datagrams received until `until` returns true or the deadline passes.
fn receive_until(sock: &UnixDatagram, deadline: Instant, mut until: impl FnMut(&str) -> bool) -> Vec<String> {
    let mut got = Vec::new();
    let mut buf = [0u8; 4096];
    while Instant::now() < deadline {
        match sock.recv(&mut buf) {
            Ok(n) => {
                let msg = String::from_utf8_lossy(&buf[..n]).into_owned();
                let stop = until(&msg);
                got.push(msg);
                if stop {
                    break;
                }
            }
            Err(e)
                if e.kind() == std::io::ErrorKind::WouldBlock || e.kind() == std::io::ErrorKind::TimedOut => {
            }
            Err(e) => panic!("notify socket: {e}"),
        }
    }
    got
}

#[test]
fn ready_after_the_listeners_answer_then_watchdog_pings_then_stopping() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    std::fs::create_dir_all(&state).unwrap();
    let cfg = dir.path().join("glint.toml");
    std::fs::write(&cfg, config_text(&state, "")).unwrap();
    let notify_path = dir.path().join("notify.sock");
    let sock = UnixDatagram::bind(&notify_path).unwrap();
    sock.set_read_timeout(Some(Duration::from_millis(100))).unwrap();

    let mut child = Command::new(glint_bin())
        .args(["run", "--config"])
        .arg(&cfg)
        .env("NOTIFY_SOCKET", &notify_path)
        .env("WATCHDOG_USEC", "400000")
        .env_remove("RUST_LOG")
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();

    let deadline = Instant::now() + Duration::from_secs(30);
    let before = receive_until(&sock, deadline, |m| m.lines().any(|l| l == "READY=1"));
    let ready = before.last().cloned().unwrap_or_default();
    assert!(
        ready.lines().any(|l| l == "READY=1"),
        "no READY within 30 s: {before:?}"
    );
    // At READY the listeners are bound and say so in ports.json; both accept a connection at once.
    let ports: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(state.join("ports.json")).unwrap()).unwrap();
    for key in ["ingest", "subscribers"] {
        let addr: std::net::SocketAddr = ports[key].as_str().unwrap().parse().unwrap();
        TcpStream::connect_timeout(&addr, Duration::from_secs(2)).unwrap();
        assert!(
            ready.contains(&addr.to_string()),
            "STATUS does not name {key} {addr}: {ready}"
        );
    }

    // Pings at half the 400 ms interval: at least three in a second.
    let mut pings = 0;
    let window = Instant::now() + Duration::from_secs(1);
    let _ = receive_until(&sock, window, |m| {
        if m.lines().any(|l| l == "WATCHDOG=1") {
            pings += 1;
        }
        false
    });
    assert!(pings >= 3, "{pings} watchdog pings in 1 s");

    let kill = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(kill.success());
    let after = receive_until(&sock, Instant::now() + Duration::from_secs(30), |m| {
        m.lines().any(|l| l == "STOPPING=1")
    });
    assert!(
        after.iter().any(|m| m.lines().any(|l| l == "STOPPING=1")),
        "no STOPPING after SIGTERM: {after:?}"
    );
    let status = child.wait().unwrap();
    assert!(status.success(), "{status}");
}

/// The producer's frames after the Hello, and the seq of the last one.
fn frames_after_hello(frames: &[glint_wire::pb::ProducerFrame]) -> Vec<glint_wire::pb::ProducerFrame> {
    frames
        .iter()
        .filter(|f| !matches!(f.body, Some(glint_wire::pb::producer_frame::Body::Hello(_))))
        .cloned()
        .collect()
}

fn seq_of(f: &glint_wire::pb::ProducerFrame) -> u64 {
    match &f.body {
        Some(glint_wire::pb::producer_frame::Body::Batch(b)) => b.seq,
        Some(glint_wire::pb::producer_frame::Body::Status(s)) => s.seq,
        _ => 0,
    }
}

/// Reads replies until the ack of `seq`.
fn wait_ack(c: &mut Conn, seq: u64) -> glint_wire::pb::Ack {
    use glint_wire::pb::{IngestReply, ingest_reply};
    let deadline = Instant::now() + Duration::from_secs(60);
    loop {
        assert!(Instant::now() < deadline, "no ack of seq {seq} within 60 s");
        match c.recv::<IngestReply>(Duration::from_secs(60)) {
            Got::Frame(IngestReply {
                body: Some(ingest_reply::Body::Ack(a)),
            }) if a.seq >= seq => return a,
            Got::Frame(_) => {}
            other => panic!("waiting for the ack of seq {seq}: {other:?}"),
        }
    }
}

#[test]
fn sighup_reloads_subscriber_tokens_while_a_feed_streams_and_subscribers_stay() {
    use glint_wire::pb::{self, subscriber_frame};
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    std::fs::create_dir_all(&state).unwrap();
    let cfg = dir.path().join("glint.toml");
    let text = config_text(&state, "");
    std::fs::write(&cfg, &text).unwrap();
    let notify_path = dir.path().join("notify.sock");
    let sock = UnixDatagram::bind(&notify_path).unwrap();
    sock.set_read_timeout(Some(Duration::from_millis(100))).unwrap();
    let log = dir.path().join("daemon.log");
    let mut child = Command::new(glint_bin())
        .args(["run", "--config"])
        .arg(&cfg)
        .env("NOTIFY_SOCKET", &notify_path)
        .env_remove("RUST_LOG")
        .stdout(Stdio::null())
        .stderr(std::fs::File::create(&log).unwrap())
        .spawn()
        .unwrap();
    let ready = receive_until(&sock, Instant::now() + Duration::from_secs(30), |m| {
        m.lines().any(|l| l == "READY=1")
    });
    assert!(ready.iter().any(|m| m.contains("READY=1")), "{ready:?}");
    let ports: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(state.join("ports.json")).unwrap()).unwrap();
    let ingest: std::net::SocketAddr = ports["ingest"].as_str().unwrap().parse().unwrap();
    let subs: std::net::SocketAddr = ports["subscribers"].as_str().unwrap().parse().unwrap();

    // A subscriber with the old token, and a producer half-way through its stream.
    let (mut old_sub, welcome) = util::subscriber(subs, SUBSCRIBER_TOKEN, 0, false);
    assert!(
        matches!(welcome.body, Some(subscriber_frame::Body::Welcome(_))),
        "{welcome:?}"
    );
    let frames = frames_after_hello(&util::background_frames(60, 5));
    let half = frames.len() / 2;
    let (mut producer, reply) = util::producer(ingest, INSTRUMENT, PRODUCER_TOKEN, 1);
    assert!(
        matches!(reply.body, Some(pb::ingest_reply::Body::Welcome(_))),
        "{reply:?}"
    );
    for f in &frames[..half] {
        producer.send(f);
    }
    wait_ack(&mut producer, seq_of(&frames[half - 1]));

    // New tokens, then SIGHUP.
    let new_token = "reloaded-subscriber-token";
    std::fs::write(&cfg, text.replace(SUBSCRIBER_TOKEN, new_token)).unwrap();
    let hup = Command::new("kill")
        .args(["-HUP", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(hup.success());
    let around = receive_until(&sock, Instant::now() + Duration::from_secs(30), |m| {
        m.lines().any(|l| l == "READY=1")
    });
    let reloading = around.iter().position(|m| m.lines().any(|l| l == "RELOADING=1"));
    let ready = around.iter().position(|m| m.lines().any(|l| l == "READY=1"));
    assert!(
        matches!((reloading, ready), (Some(a), Some(b)) if a < b),
        "no RELOADING=1 then READY=1 around the reload: {around:?}"
    );

    // The stream goes on on the same connection, every photon taken.
    for f in &frames[half..] {
        producer.send(f);
    }
    let ack = wait_ack(&mut producer, seq_of(frames.last().unwrap()));
    assert_eq!(ack.photons, util::photons_in(&frames), "{ack:?}");
    // The subscriber accepted before the reload still gets its heartbeats.
    let mut beats = 0;
    let until = Instant::now() + Duration::from_secs(5);
    while beats < 2 && Instant::now() < until {
        if let Got::Frame(pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Heartbeat(_)),
        }) = old_sub.recv::<pb::SubscriberFrame>(Duration::from_secs(5))
        {
            beats += 1;
        }
    }
    assert_eq!(beats, 2, "the subscriber connected before the reload was dropped");
    // New requests are checked against the new tokens.
    let (_new, welcome) = util::subscriber(subs, new_token, 0, false);
    assert!(
        matches!(welcome.body, Some(subscriber_frame::Body::Welcome(_))),
        "{welcome:?}"
    );
    let (_refused, refusal) = util::subscriber(subs, SUBSCRIBER_TOKEN, 0, false);
    assert!(
        matches!(&refusal.body, Some(subscriber_frame::Body::Refusal(r)) if r.code == pb::RefusalCode::BadToken as i32),
        "the old token still works: {refusal:?}"
    );
    let logged = std::fs::read_to_string(&log).unwrap();
    assert!(
        logged.contains("SIGHUP: configuration reloaded: subscriber tokens reloaded (1 before, 1 now)"),
        "{logged}"
    );
    assert!(!logged.contains(new_token), "a token reached the log");

    Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(child.wait().unwrap().success());
}
