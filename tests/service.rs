//! `glint run` under a service manager's notify protocol (`Type=notify`): READY only once the listeners
//! answer, watchdog pings while healthy, STOPPING on SIGTERM. The test plays the service manager with a
//! Unix datagram socket of its own, as systemd does.

use std::net::TcpStream;
use std::os::unix::net::UnixDatagram;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use crate::util::{config_text, glint_bin};

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
