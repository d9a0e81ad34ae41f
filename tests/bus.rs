//! The alert bus against a real nats-server (Debian's package, installed by `.ci/run`), started by each test
//! on 127.0.0.1 on a free port with JetStream in a temporary directory: consumers see every alert once and in
//! order, a server outage and a daemon SIGKILL lose and duplicate nothing, and two daemons at two invented
//! sites with one shared burst give exactly one joint alert from `glint coincide`.

use std::collections::BTreeSet;
use std::net::TcpListener;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use async_nats::jetstream;
use futures::StreamExt;
use glint_wire::pb;
use prost::Message;

use crate::util::{self, Daemon, PRODUCER_TOKEN};

/// A nats-server child with JetStream; stopped (SIGTERM) when dropped.
struct NatsServer {
    child: Option<Child>,
    port: u16,
    store: PathBuf,
    log: PathBuf,
}

impl NatsServer {
    fn start(dir: &Path) -> Self {
        let port = TcpListener::bind("127.0.0.1:0")
            .unwrap()
            .local_addr()
            .unwrap()
            .port();
        let mut s = Self {
            child: None,
            port,
            store: dir.join("jetstream"),
            log: dir.join("nats-server.log"),
        };
        s.restart();
        s
    }

    /// Starts (again) on the same port and storage.
    fn restart(&mut self) {
        assert!(self.child.is_none());
        // Debian installs it in /usr/sbin, which a non-root PATH may lack.
        let bin = ["/usr/sbin/nats-server", "/usr/bin/nats-server"]
            .into_iter()
            .find(|p| Path::new(p).exists())
            .unwrap_or("nats-server");
        let child = Command::new(bin)
            .args(["-js", "-a", "127.0.0.1", "-p", &self.port.to_string(), "-sd"])
            .arg(&self.store)
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(&self.log).unwrap())
            .spawn()
            .expect("nats-server is installed (.ci/run installs Debian's package)");
        self.child = Some(child);
        let deadline = Instant::now() + Duration::from_secs(20);
        while std::net::TcpStream::connect(("127.0.0.1", self.port)).is_err() {
            assert!(
                Instant::now() < deadline,
                "nats-server did not listen within 20 s"
            );
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// SIGTERM and wait.
    fn stop(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = Command::new("kill").args(["-TERM", &c.id().to_string()]).status();
            let deadline = Instant::now() + Duration::from_secs(20);
            while c.try_wait().unwrap().is_none() {
                if Instant::now() > deadline {
                    let _ = c.kill();
                }
                std::thread::sleep(Duration::from_millis(20));
            }
        }
    }

    fn url(&self) -> String {
        format!("nats://127.0.0.1:{}", self.port)
    }
}

impl Drop for NatsServer {
    fn drop(&mut self) {
        self.stop();
    }
}

/// The `[bus]` block a test daemon gets: the repository's stream definition, created by the daemon.
fn bus_block(url: &str) -> String {
    let def = util::repo_root().join("deploy/nats/glint-alerts-stream.json");
    format!(
        "\n[bus]\nurl = \"{url}\"\nstream_file = \"{}\"\nack_timeout_s = 2.0\nmax_backoff_s = 0.5\n",
        def.display()
    )
}

fn rt() -> tokio::runtime::Runtime {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap()
}

/// Every message in the stream, in stream order: (subject, decoded alert).
fn stream_contents(url: &str) -> Vec<(String, pb::Alert)> {
    rt().block_on(async {
        let client = async_nats::connect(url).await.unwrap();
        let js = jetstream::new(client);
        let mut stream = match js.get_stream("GLINT_ALERTS").await {
            Ok(s) => s,
            Err(_) => return Vec::new(),
        };
        let info = stream.info().await.unwrap().clone();
        let mut out = Vec::new();
        for seq in info.state.first_sequence..=info.state.last_sequence {
            if info.state.messages == 0 {
                break;
            }
            let m = stream.get_raw_message(seq).await.unwrap();
            out.push((
                m.subject.to_string(),
                pb::Alert::decode(m.payload.as_ref()).unwrap(),
            ));
        }
        out
    })
}

/// Waits (bounded) until the stream holds at least `n` alerts; returns its contents.
fn wait_for_stream(url: &str, n: usize, within: Duration) -> Vec<(String, pb::Alert)> {
    let deadline = Instant::now() + within;
    loop {
        let got = stream_contents(url);
        if got.len() >= n || Instant::now() > deadline {
            return got;
        }
        std::thread::sleep(Duration::from_millis(200));
    }
}

/// The daemon's newest journalled sequence number, from a subscriber's Welcome.
fn last_seq(d: &Daemon) -> u64 {
    let (_, w) = util::subscriber(d.subs, util::SUBSCRIBER_TOKEN, 0, false);
    match w.body {
        Some(pb::subscriber_frame::Body::Welcome(w)) => w.last_seq,
        other => panic!("{other:?}"),
    }
}

/// Waits (bounded) until the daemon has journalled `n` alerts (the engine may still be working through the
/// last frames when the producer is done); returns what it has then.
fn wait_last_seq(d: &Daemon, n: u64, within: Duration) -> u64 {
    let deadline = Instant::now() + within;
    loop {
        let s = last_seq(d);
        if s >= n || Instant::now() > deadline {
            return s;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
}

/// The last sequence number a daemon logged when it shut down.
fn last_seq_at_shutdown(d: &Daemon) -> u64 {
    d.log_events()
        .iter()
        .rev()
        .find(|e| {
            e["message"]
                .as_str()
                .is_some_and(|m| m.starts_with("shut down in"))
        })
        .and_then(|e| e["last_seq"].as_u64())
        .unwrap_or_else(|| panic!("no shutdown line:\n{}", d.log_text()))
}

/// A scenario of `n` (at most 10) glitches (each: a flash, an `instrumental` assessment and a withdrawal),
/// 8 s apart after the acceptance warm-up, as a recording.
fn glitch_recording(dir: &Path, n: usize) -> PathBuf {
    assert!(n <= 10);
    let mut text = format!(
        r#"
[scenario]
name = "glitches"
start_utc = "2026-12-01T02:00:00Z"
duration_s = {}
seed = 5
[instrument]
id = "{}"
token = "unused"
spec_file = "INSTRUMENT_FILE"
"#,
        100 + 8 * n + 60,
        util::INSTRUMENT
    );
    // Ten distinct places at least 9 degrees apart (and near the zenith), so no two glitches join one
    // candidate while its persistence window is open.
    for i in 0..n {
        text += &format!(
            "[[source]]\nkind = \"glitch\"\nmode = \"identical_timestamps\"\nt_offset_s = {}\nphotons = 40\nra_deg = {}\ndec_deg = {}\nspread_deg = 0.2\n",
            100 + 8 * i,
            12 + 9 * (i % 5),
            -18 - 12 * ((i as i64 / 5) % 2)
        );
    }
    let rec = dir.join("glitches.glrec");
    util::write_recording(&rec, &util::sim_frames(&text));
    rec
}

/// Starts `glint feed` of a recording into a daemon.
fn feed(d: &Daemon, rec: &Path, token: &Path, speed: &str) -> Child {
    Command::new(util::glint_bin())
        .arg("feed")
        .arg(rec)
        .args(["--to", &d.ingest.to_string(), "--speed", speed, "--token-file"])
        .arg(token)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap()
}

fn assert_once_in_order(got: &[(String, pb::Alert)], journalled: u64) {
    let seqs: Vec<u64> = got.iter().map(|(_, a)| a.seq).collect();
    assert_eq!(
        seqs,
        (1..=journalled).collect::<Vec<_>>(),
        "the stream does not hold each alert once, in order"
    );
    let ids: BTreeSet<&str> = got.iter().map(|(_, a)| a.id.as_str()).collect();
    assert_eq!(ids.len(), got.len(), "an alert id appears twice");
}

#[test]
fn two_consumers_receive_every_alert_once_in_order() {
    let dir = tempfile::tempdir().unwrap();
    let nats = NatsServer::start(dir.path());
    let rec = glitch_recording(dir.path(), 6);
    let token = util::token_file(dir.path(), "producer.token", PRODUCER_TOKEN);
    let mut d = Daemon::start(dir.path(), &bus_block(&nats.url()));
    // Two durable consumers, made before any alert exists, each reading on its own while alerts flow.
    let url = nats.url();
    let consumers: Vec<_> = ["alpha", "beta"]
        .into_iter()
        .map(|name| {
            let url = url.clone();
            std::thread::spawn(move || consume(&url, name, 18, Duration::from_secs(120)))
        })
        .collect();
    let mut f = feed(&d, &rec, &token, "max");
    assert!(f.wait().unwrap().success());
    let got: Vec<Vec<pb::Alert>> = consumers.into_iter().map(|c| c.join().unwrap()).collect();
    let journalled = wait_last_seq(&d, 18, Duration::from_secs(30));
    assert_eq!(journalled, 18, "six glitches give 18 alerts");
    for (name, alerts) in ["alpha", "beta"].iter().zip(&got) {
        let seqs: Vec<u64> = alerts.iter().map(|a| a.seq).collect();
        assert_eq!(seqs, (1..=journalled).collect::<Vec<_>>(), "consumer {name}");
    }
    // Kinds and subjects: flash, assessment and withdrawal of each glitch.
    let kinds: BTreeSet<i32> = got[0].iter().map(|a| a.kind).collect();
    assert_eq!(kinds.len(), 3);
    assert_once_in_order(&stream_contents(&url), journalled);
    assert!(d.terminate().success());
}

/// A durable pull consumer `name` on the stream (waiting for the stream to appear) that takes `n` alerts and
/// acknowledges each; stops early if nothing comes for `quiet`.
fn consume(url: &str, name: &str, n: usize, quiet: Duration) -> Vec<pb::Alert> {
    rt().block_on(async {
        let client = async_nats::connect(url).await.unwrap();
        let js = jetstream::new(client);
        let deadline = Instant::now() + Duration::from_secs(30);
        let stream = loop {
            if let Ok(s) = js.get_stream("GLINT_ALERTS").await {
                break s;
            }
            assert!(Instant::now() < deadline, "the daemon did not create the stream");
            tokio::time::sleep(Duration::from_millis(50)).await;
        };
        let consumer: jetstream::consumer::PullConsumer = stream
            .get_or_create_consumer(
                name,
                jetstream::consumer::pull::Config {
                    durable_name: Some(name.into()),
                    ack_policy: jetstream::consumer::AckPolicy::Explicit,
                    ..Default::default()
                },
            )
            .await
            .unwrap();
        let mut messages = consumer.messages().await.unwrap();
        let mut out = Vec::new();
        while out.len() < n {
            match tokio::time::timeout(quiet, messages.next()).await {
                Ok(Some(Ok(m))) => {
                    let a = pb::Alert::decode(m.payload.as_ref()).unwrap();
                    // The subject names instrument and kind. (That the message id is the alert id is proved
                    // by the SIGKILL test: republished alerts are dropped as duplicates.)
                    let kind = match pb::AlertKind::try_from(a.kind).unwrap() {
                        pb::AlertKind::Flash => "flash",
                        pb::AlertKind::Assessment => "assessment",
                        pb::AlertKind::Withdrawal => "withdrawal",
                        other => panic!("unexpected {other:?}"),
                    };
                    assert_eq!(
                        m.subject.as_str(),
                        format!("glint.alerts.{}.{kind}", a.instrument)
                    );
                    out.push(a);
                    m.ack().await.unwrap();
                }
                Ok(Some(Err(e))) => panic!("consumer {name}: {e}"),
                Ok(None) | Err(_) => break,
            }
        }
        out
    })
}

#[test]
fn server_stopped_and_restarted_while_alerts_flow_loses_and_duplicates_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let mut nats = NatsServer::start(dir.path());
    let rec = glitch_recording(dir.path(), 10);
    let token = util::token_file(dir.path(), "producer.token", PRODUCER_TOKEN);
    let mut d = Daemon::start(dir.path(), &bus_block(&nats.url()));
    // 240 s of event time at 12x: alerts flow for about ten seconds from the seventh second on.
    let mut f = feed(&d, &rec, &token, "12");
    let before = wait_for_stream(&nats.url(), 3, Duration::from_secs(60));
    assert!(
        before.len() >= 3,
        "alerts did not reach the bus before the outage"
    );
    nats.stop();
    // The daemon keeps journalling meanwhile; the sink retries with backoff.
    std::thread::sleep(Duration::from_secs(4));
    nats.restart();
    assert!(f.wait().unwrap().success());
    let journalled = wait_last_seq(&d, 30, Duration::from_secs(30));
    assert_eq!(journalled, 30, "ten glitches give 30 alerts");
    let got = wait_for_stream(&nats.url(), journalled as usize, Duration::from_secs(60));
    assert_once_in_order(&got, journalled);
    let failures = d
        .log_events()
        .into_iter()
        .filter(|e| e["message"].as_str().is_some_and(|m| m.starts_with("bus:")))
        .count();
    assert!(failures >= 1, "the outage was not noticed:\n{}", d.log_text());
    println!(
        "before the outage: {} on the bus; after: {} of {journalled}; {failures} failed attempts",
        before.len(),
        got.len()
    );
    assert!(d.terminate().success());
}

#[test]
fn daemon_sigkilled_with_unacknowledged_alerts_leaves_each_alert_once_on_the_bus() {
    let dir = tempfile::tempdir().unwrap();
    let mut nats = NatsServer::start(dir.path());
    let rec = glitch_recording(dir.path(), 6);
    let token = util::token_file(dir.path(), "producer.token", PRODUCER_TOKEN);
    let mut d = Daemon::start(dir.path(), &bus_block(&nats.url()));
    let mut f = feed(&d, &rec, &token, "8");
    let first = wait_for_stream(&nats.url(), 2, Duration::from_secs(60));
    assert!(first.len() >= 2);
    // The bus goes away, so what the daemon journals from now on stays unacknowledged; then SIGKILL.
    nats.stop();
    assert!(f.wait().unwrap().success());
    let journalled = wait_last_seq(&d, 18, Duration::from_secs(30));
    assert_eq!(journalled, 18, "six glitches give 18 alerts");
    d.kill9();
    let cursor_file = dir.path().join("state/bus-GLINT_ALERTS.cursor");
    let cursor: u64 = std::fs::read_to_string(&cursor_file)
        .unwrap()
        .trim()
        .parse()
        .unwrap();
    assert!(
        cursor < journalled,
        "nothing was left unacknowledged ({cursor} of {journalled})"
    );
    // Worst case for duplicates: the cursor lost entirely, as if every acknowledgement came just before the
    // kill; the server's duplicate window must drop the republished alerts.
    std::fs::write(&cursor_file, "0\n").unwrap();
    nats.restart();
    let d2 = Daemon::start(dir.path(), &bus_block(&nats.url()));
    let got = wait_for_stream(&nats.url(), journalled as usize, Duration::from_secs(60));
    assert_once_in_order(&got, journalled);
    // The restarted daemon republished from 0; the server recognised the ones it had.
    std::thread::sleep(Duration::from_millis(500));
    assert_eq!(stream_contents(&nats.url()).len() as u64, journalled);
    println!(
        "journalled {journalled}, acknowledged before the kill {cursor}, on the bus once each: {}",
        got.len()
    );
    drop(d2);
}

#[test]
fn two_sites_with_one_shared_burst_give_one_joint_alert() {
    let dir = tempfile::tempdir().unwrap();
    let nats = NatsServer::start(dir.path());
    let token = util::token_file(dir.path(), "producer.token", PRODUCER_TOKEN);
    let mut daemons = Vec::new();
    for site in ["ventisca", "helado"] {
        let sub = dir.path().join(site);
        std::fs::create_dir_all(&sub).unwrap();
        let rec = sub.join("stream.glrec.zst");
        let out = Command::new(util::glint_bin())
            .arg("simulate")
            .arg("--scenario")
            .arg(util::repo_root().join(format!("deploy/scenarios/two-sites/{site}.toml")))
            .arg("--out")
            .arg(&rec)
            .output()
            .unwrap();
        assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
        let instrument = format!("{site}-array");
        let d = Daemon::start_edited(&sub, &bus_block(&nats.url()), &|t| {
            t.replace("ventisca-array", &instrument)
        });
        let f = feed(&d, &rec, &token, "max");
        daemons.push((d, f));
    }
    for (_, f) in &mut daemons {
        assert!(f.wait().unwrap().success());
    }
    // Each site's daemon assesses its two bursts; SIGTERM assesses whatever is still open, and the bus sink
    // publishes everything before the daemon exits.
    let mut journalled = 0;
    for (d, _) in &mut daemons {
        assert!(d.terminate().success());
        journalled += last_seq_at_shutdown(d);
    }
    let on_bus = wait_for_stream(&nats.url(), journalled as usize, Duration::from_secs(60));
    assert_eq!(on_bus.len() as u64, journalled);
    let assessments: Vec<&pb::Alert> = on_bus
        .iter()
        .map(|(_, a)| a)
        .filter(|a| a.kind == pb::AlertKind::Assessment as i32)
        .collect();
    assert!(assessments.len() >= 4, "{assessments:#?}");

    let cfg = dir.path().join("coincide.toml");
    let text = std::fs::read_to_string(util::repo_root().join("deploy/coincide.toml"))
        .unwrap()
        .replace("nats://127.0.0.1:4222", &nats.url())
        .replace(
            "/var/lib/glint-coincide",
            &dir.path().join("coincide").display().to_string(),
        );
    std::fs::write(&cfg, text).unwrap();
    let out = Command::new(util::glint_bin())
        .args(["coincide", "--idle-exit-s", "3", "--config"])
        .arg(&cfg)
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let joints = util::checked_json_lines(&String::from_utf8(out.stdout).unwrap());
    assert_eq!(joints.len(), 1, "{joints:#?}");
    let j = &joints[0];
    util::keep_example("joint", j);
    assert_eq!(j["kind"], "joint");
    let joint = &j["joint"];
    let ids: Vec<&str> = joint["alert_ids"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    let by_id = |id: &str| {
        assessments
            .iter()
            .find(|a| a.id == id)
            .copied()
            .unwrap_or_else(|| panic!("{id} is not an assessment on the bus"))
    };
    let (a, b) = (by_id(ids[0]), by_id(ids[1]));
    assert_ne!(a.instrument, b.instrument);
    // It is the shared burst: RA 35, Dec -24.
    let (ta, tb) = (a.trigger.as_ref().unwrap(), b.trigger.as_ref().unwrap());
    for t in [ta, tb] {
        assert!(
            (t.ra_deg - 35.0).abs() < 1.0 && (t.dec_deg + 24.0).abs() < 1.0,
            "{t:?}"
        );
    }
    // The joint false-alarm rate against its formula, from the two single alerts and the window.
    let w = joint["window_s"].as_f64().unwrap();
    let chance = joint["position_chance"].as_f64().unwrap();
    let seconds_per_year = 365.25 * 86_400.0;
    let expected = 2.0 * (w / seconds_per_year) * ta.far_per_year * tb.far_per_year * chance;
    let got = joint["far_per_year"].as_f64().unwrap();
    assert!((got - expected).abs() <= 1e-9 * expected, "{got} vs {expected}");
    // The window: light travel (about 1.4 ms for these sites), two clock tolerances, half of each window.
    let light = joint["light_travel_s"].as_f64().unwrap();
    assert!((1.2e-3..1.6e-3).contains(&light), "{light}");
    let half = |t: &pb::Trigger| (t.end_gps_ns - t.start_gps_ns) as f64 / 2e9;
    assert!((w - (light + 2e-6 + half(ta) + half(tb))).abs() < 1e-9, "{w}");
    // And it is on the bus, on its own subject, once.
    let on_bus = stream_contents(&nats.url());
    let joint_msgs: Vec<_> = on_bus
        .iter()
        .filter(|(_, a)| a.kind == pb::AlertKind::Joint as i32)
        .collect();
    assert_eq!(joint_msgs.len(), 1);
    assert_eq!(joint_msgs[0].1.id, j["id"].as_str().unwrap());
    println!("joint alert: {j}");
}
