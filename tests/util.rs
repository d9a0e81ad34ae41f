//! Helpers shared by the integration tests: locate (and if needed build) the `glint` binary, start a daemon on
//! loopback port 0 and learn its ports from `state_dir/ports.json`, speak the wire protocol over blocking
//! sockets with timeouts, and make photon streams with the simulator.

use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::Once;
use std::time::{Duration, Instant};

use glint_wire::pb;
use prost::Message;

/// Producer token in the test configuration.
pub(crate) const PRODUCER_TOKEN: &str = "test-producer-token";
/// Subscriber token in the test configuration.
pub(crate) const SUBSCRIBER_TOKEN: &str = "test-subscriber-token";
/// Operator token in the test configuration.
pub(crate) const OPERATOR_TOKEN: &str = "test-operator-token";
/// The instrument in the test configuration.
pub(crate) const INSTRUMENT: &str = "ventisca-array";
/// Frame size limit in the test configuration, bytes.
pub(crate) const MAX_FRAME: usize = 1 << 20;

/// The workspace root.
pub(crate) fn repo_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("workspace root")
        .to_path_buf()
}

/// Runs `cmd` to its end, asserts that it succeeded (printing its stdout and stderr if not) and returns
/// its stdout.
pub(crate) fn stdout_ok(cmd: &mut Command) -> String {
    let out = cmd.output().unwrap();
    let text = String::from_utf8_lossy(&out.stdout).to_string();
    assert!(
        out.status.success(),
        "{cmd:?} failed: {text}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    text
}

/// Feeds `rec` to the daemon at max speed with `glint feed` (plus `extra` arguments); returns its stdout.
pub(crate) fn feed(d: &Daemon, rec: &Path, token: &Path, extra: &[&str]) -> String {
    stdout_ok(
        Command::new(glint_bin())
            .arg("feed")
            .arg(rec)
            .args(["--to", &d.ingest.to_string(), "--speed", "max", "--token-file"])
            .arg(token)
            .args(extra),
    )
}

/// Path of the `glint` binary for this build profile; built once per test run if cargo has not built it
/// (`cargo test -p glint-tests` builds only this crate).
pub(crate) fn glint_bin() -> PathBuf {
    static BUILD: Once = Once::new();
    let mut p = std::env::current_exe().expect("test binary path");
    p.pop();
    if p.ends_with("deps") {
        p.pop();
    }
    let bin = p.join("glint");
    BUILD.call_once(|| {
        let release = p.file_name().is_some_and(|n| n == "release");
        let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".into());
        let mut cmd = Command::new(cargo);
        cmd.args(["build", "-q", "-p", "glint", "--bin", "glint"])
            .current_dir(repo_root());
        if release {
            cmd.arg("--release");
        }
        let status = cmd.status().expect("run cargo build");
        assert!(status.success(), "cargo build -p glint failed");
    });
    bin
}

/// A test configuration: loopback port 0 everywhere, JSON logs, short heartbeats and timeouts.
pub(crate) fn config_text(state_dir: &Path, extra_subscribers: &str) -> String {
    config_text_with(state_dir, "", extra_subscribers, "")
}

/// [`config_text`] with lines added to `[ingest]`, to `[subscribers]`, and after `[journal]` (e.g. a
/// `[metrics]` section).
pub(crate) fn config_text_with(
    state_dir: &Path,
    extra_ingest: &str,
    extra_subscribers: &str,
    extra_sections: &str,
) -> String {
    format!(
        r#"
[daemon]
state_dir = "{}"
log_level = "info"
log_format = "json"
max_frame_bytes = {MAX_FRAME}
shutdown_deadline_s = 30.0

[ingest]
listen = "127.0.0.1:0"
queue_batches = 64
ack_every = 16
{extra_ingest}

[subscribers]
listen = "127.0.0.1:0"
tokens = ["{SUBSCRIBER_TOKEN}"]
operator_token = "{OPERATOR_TOKEN}"
heartbeat_s = 0.5
{extra_subscribers}

[journal]

{extra_sections}

[[instrument]]
id = "{INSTRUMENT}"
token = "{PRODUCER_TOKEN}"
spec_file = "builtin:ventisca-array"
"#,
        state_dir.display()
    )
}

/// A `glint run` child process. Killed when dropped.
pub(crate) struct Daemon {
    child: Option<Child>,
    /// Ingest address.
    pub(crate) ingest: SocketAddr,
    /// Subscriber address.
    pub(crate) subs: SocketAddr,
    /// Metrics address, when the configuration has one.
    pub(crate) metrics: Option<SocketAddr>,
    log: PathBuf,
}

impl Daemon {
    /// Starts a daemon with its state in `dir/state` (kept across restarts) and waits for its ports.
    pub(crate) fn start(dir: &Path, extra_subscribers: &str) -> Self {
        Self::start_edited(dir, extra_subscribers, &|t| t.to_string())
    }

    /// Like [`start`](Self::start), with the configuration text passed through `edit` first.
    pub(crate) fn start_edited(dir: &Path, extra_subscribers: &str, edit: &dyn Fn(&str) -> String) -> Self {
        let state = dir.join("state");
        Self::start_with(dir, &edit(&config_text(&state, extra_subscribers)))
    }

    /// Starts a daemon with this configuration text (its state_dir should be `dir/state`).
    pub(crate) fn start_with(dir: &Path, config: &str) -> Self {
        let state = dir.join("state");
        std::fs::create_dir_all(&state).unwrap();
        let ports = state.join("ports.json");
        let _ = std::fs::remove_file(&ports);
        let cfg = dir.join("glint.toml");
        std::fs::write(&cfg, config).unwrap();
        // One log per start, so a restarted daemon's lines can be told from the first one's.
        let n = (0..)
            .find(|i| !dir.join(format!("daemon-{i}.log")).exists())
            .unwrap();
        let log = dir.join(format!("daemon-{n}.log"));
        let child = Command::new(glint_bin())
            .args(["run", "--config"])
            .arg(&cfg)
            .env_remove("RUST_LOG")
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(&log).unwrap())
            .spawn()
            .expect("start glint run");
        let mut d = Self {
            child: Some(child),
            ingest: "127.0.0.1:1".parse().unwrap(),
            subs: "127.0.0.1:1".parse().unwrap(),
            metrics: None,
            log,
        };
        let deadline = Instant::now() + Duration::from_secs(30);
        loop {
            if let Ok(text) = std::fs::read_to_string(&ports) {
                let v: serde_json::Value = serde_json::from_str(&text).unwrap();
                d.ingest = v["ingest"].as_str().unwrap().parse().unwrap();
                d.subs = v["subscribers"].as_str().unwrap().parse().unwrap();
                d.metrics = v["metrics"].as_str().map(|a| a.parse().unwrap());
                return d;
            }
            if let Some(status) = d.child.as_mut().unwrap().try_wait().unwrap() {
                panic!(
                    "glint run exited with {status} before listening:\n{}",
                    d.log_text()
                );
            }
            assert!(
                Instant::now() < deadline,
                "no ports.json after 30 s:\n{}",
                d.log_text()
            );
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// The daemon's process id.
    pub(crate) fn pid(&self) -> u32 {
        self.child.as_ref().expect("daemon running").id()
    }

    /// The daemon's resident memory, bytes (VmRSS of /proc/PID/status).
    pub(crate) fn rss_bytes(&self) -> u64 {
        let status = std::fs::read_to_string(format!("/proc/{}/status", self.pid())).unwrap();
        let kb: u64 = status
            .lines()
            .find_map(|l| l.strip_prefix("VmRSS:"))
            .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
            .expect("VmRSS in /proc/PID/status");
        kb * 1024
    }

    /// The metrics endpoint's text.
    pub(crate) fn metrics_text(&self) -> String {
        let addr = self.metrics.expect("metrics configured");
        let mut s = TcpStream::connect_timeout(&addr, Duration::from_secs(10)).unwrap();
        s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
        s.write_all(b"GET /metrics HTTP/1.0\r\nHost: localhost\r\n\r\n")
            .unwrap();
        let mut out = String::new();
        s.read_to_string(&mut out).unwrap();
        out
    }

    /// Everything the daemon logged so far.
    pub(crate) fn log_text(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// The log as JSON objects (lines that do not parse are skipped).
    pub(crate) fn log_events(&self) -> Vec<serde_json::Value> {
        self.log_text()
            .lines()
            .filter_map(|l| serde_json::from_str(l).ok())
            .collect()
    }

    /// SIGKILL: no chance to clean up.
    pub(crate) fn kill9(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }

    /// SIGTERM, then waits (bounded) for the exit status.
    pub(crate) fn terminate(&mut self) -> std::process::ExitStatus {
        let mut c = self.child.take().expect("daemon running");
        let status = Command::new("kill")
            .args(["-TERM", &c.id().to_string()])
            .status()
            .unwrap();
        assert!(status.success());
        let deadline = Instant::now() + Duration::from_secs(60);
        loop {
            if let Some(s) = c.try_wait().unwrap() {
                return s;
            }
            if Instant::now() > deadline {
                let _ = c.kill();
                panic!("daemon did not exit within 60 s of SIGTERM:\n{}", self.log_text());
            }
            std::thread::sleep(Duration::from_millis(20));
        }
    }
}

impl Drop for Daemon {
    fn drop(&mut self) {
        self.kill9();
    }
}

/// A blocking framed connection.
pub(crate) struct Conn {
    pub(crate) stream: TcpStream,
    buf: Vec<u8>,
}

/// What a read brought.
#[derive(Debug)]
pub(crate) enum Got<M> {
    /// A frame.
    Frame(M),
    /// The peer closed the connection (or reset it).
    Closed,
    /// Nothing within the timeout.
    Timeout,
}

impl Conn {
    /// Connects with a 10 s timeout.
    pub(crate) fn connect(addr: SocketAddr) -> Self {
        let stream = TcpStream::connect_timeout(&addr, Duration::from_secs(10)).expect("connect");
        stream.set_nodelay(true).unwrap();
        stream.set_write_timeout(Some(Duration::from_secs(20))).unwrap();
        Self {
            stream,
            buf: Vec::new(),
        }
    }

    /// Sends one frame.
    pub(crate) fn send<M: Message>(&mut self, m: &M) {
        let mut out = Vec::new();
        glint_wire::encode_frame(m, usize::MAX, &mut out).unwrap();
        self.stream.write_all(&out).expect("write frame");
    }

    /// Sends raw bytes.
    pub(crate) fn send_raw(&mut self, bytes: &[u8]) {
        self.stream.write_all(bytes).expect("write bytes");
    }

    /// Reads one frame, waiting at most `timeout`.
    pub(crate) fn recv<M: Message + Default>(&mut self, timeout: Duration) -> Got<M> {
        let deadline = Instant::now() + timeout;
        loop {
            if let Some((m, used)) =
                glint_wire::decode_frame::<M>(&self.buf, 64 << 20).expect("daemon sent a bad frame")
            {
                self.buf.drain(..used);
                return Got::Frame(m);
            }
            let left = deadline.saturating_duration_since(Instant::now());
            if left.is_zero() {
                return Got::Timeout;
            }
            self.stream
                .set_read_timeout(Some(left.max(Duration::from_millis(1))))
                .unwrap();
            let mut chunk = [0u8; 65536];
            match self.stream.read(&mut chunk) {
                Ok(0) => return Got::Closed,
                Ok(n) => self.buf.extend_from_slice(&chunk[..n]),
                Err(e)
                    if matches!(
                        e.kind(),
                        std::io::ErrorKind::WouldBlock | std::io::ErrorKind::TimedOut
                    ) => {}
                Err(e) if e.kind() == std::io::ErrorKind::ConnectionReset => return Got::Closed,
                Err(e) => panic!("read: {e}"),
            }
        }
    }
}

/// A producer's Hello.
pub(crate) fn hello(instrument: &str, token: &str, schema_version: u32) -> pb::ProducerFrame {
    pb::ProducerFrame {
        body: Some(pb::producer_frame::Body::Hello(pb::Hello {
            instrument: instrument.into(),
            token: token.into(),
            schema_version,
            producer: "glint-tests".into(),
        })),
    }
}

/// Connects a producer and returns the connection with the daemon's first reply.
pub(crate) fn producer(
    addr: SocketAddr,
    instrument: &str,
    token: &str,
    schema: u32,
) -> (Conn, pb::IngestReply) {
    let mut c = Conn::connect(addr);
    c.send(&hello(instrument, token, schema));
    match c.recv::<pb::IngestReply>(Duration::from_secs(10)) {
        Got::Frame(r) => (c, r),
        other => panic!("no reply to Hello: {other:?}"),
    }
}

/// Asserts that a reply is a refusal with `code`, and that the daemon then closes the connection.
pub(crate) fn assert_refused_and_closed(
    c: &mut Conn,
    first: Option<pb::IngestReply>,
    code: pb::RefusalCode,
) -> String {
    let reply = first.unwrap_or_else(|| match c.recv::<pb::IngestReply>(Duration::from_secs(10)) {
        Got::Frame(r) => r,
        other => panic!("expected a refusal {code:?}, got {other:?}"),
    });
    let Some(pb::ingest_reply::Body::Refusal(r)) = reply.body else {
        panic!("expected a refusal {code:?}, got {reply:?}")
    };
    assert_eq!(r.code, code as i32, "refusal code; detail: {}", r.detail);
    assert!(!r.detail.is_empty());
    match c.recv::<pb::IngestReply>(Duration::from_secs(10)) {
        Got::Closed => {}
        other => panic!("connection not closed after refusal {code:?}: {other:?}"),
    }
    r.detail
}

/// A subscriber connection after its Welcome.
pub(crate) fn subscriber(
    addr: SocketAddr,
    token: &str,
    resume_after: u64,
    replay_all: bool,
) -> (Conn, pb::SubscriberFrame) {
    let mut c = Conn::connect(addr);
    let sub = pb::Subscribe {
        token: token.into(),
        kinds: vec![],
        min_sigma: 0.0,
        resume_after,
        client: "glint-tests".into(),
        schema_version: 1,
        replay_all,
    };
    c.send(&pb::SubscriberRequest {
        body: Some(pb::subscriber_request::Body::Subscribe(sub)),
    });
    match c.recv::<pb::SubscriberFrame>(Duration::from_secs(10)) {
        Got::Frame(f) => (c, f),
        other => panic!("no reply to Subscribe: {other:?}"),
    }
}

/// Frames of a scenario given as TOML text (its `spec_file` may name `INSTRUMENT_FILE`, replaced by the
/// repository's file), Hello first.
pub(crate) fn sim_frames(scenario_toml: &str) -> Vec<pb::ProducerFrame> {
    let spec = repo_root().join("deploy/instruments/ventisca-array.toml");
    let text = scenario_toml.replace("INSTRUMENT_FILE", &spec.display().to_string());
    let s = glint_sim::parse_scenario(&text, &repo_root(), "test").expect("scenario");
    glint_sim::Simulator::new(&s, s.seed)
        .expect("simulator")
        .collect()
}

/// The built-in demo scenario's frames (a glitch, two evaporation bursts, an afterglow-like burst).
pub(crate) fn demo_frames() -> Vec<pb::ProducerFrame> {
    let text = std::fs::read_to_string(repo_root().join("deploy/scenarios/demo.toml")).unwrap();
    sim_frames(&text.replace("../instruments/ventisca-array.toml", "INSTRUMENT_FILE"))
}

/// Background only, `seconds` long, starting at the demo's start time.
pub(crate) fn background_frames(seconds: u32, seed: u64) -> Vec<pb::ProducerFrame> {
    sim_frames(&format!(
        r#"
[scenario]
name = "background"
start_utc = "2026-12-01T02:00:00Z"
duration_s = {seconds}
seed = {seed}
batch_max_photons = 256
batch_max_s = 0.01
[instrument]
id = "{INSTRUMENT}"
token = "unused"
spec_file = "INSTRUMENT_FILE"
"#
    ))
}

/// Writes frames as a `.glrec` recording.
pub(crate) fn write_recording(path: &Path, frames: &[pb::ProducerFrame]) {
    let mut w = glint_wire::RecordingWriter::create(path).unwrap();
    for f in frames {
        w.write_frame(f).unwrap();
    }
    w.finish().unwrap();
}

/// Photons in a list of frames.
pub(crate) fn photons_in(frames: &[pb::ProducerFrame]) -> u64 {
    frames
        .iter()
        .map(|f| match &f.body {
            Some(pb::producer_frame::Body::Batch(b)) => b.time_gps_ns.len() as u64,
            _ => 0,
        })
        .sum()
}

/// Writes a token file.
pub(crate) fn token_file(dir: &Path, name: &str, token: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, format!("{token}\n")).unwrap();
    p
}

/// The JSON Schema of every JSON line glint writes (docs/alert.schema.json), compiled once.
pub(crate) fn line_schema() -> &'static jsonschema::Validator {
    static SCHEMA: std::sync::OnceLock<jsonschema::Validator> = std::sync::OnceLock::new();
    SCHEMA.get_or_init(|| {
        let text = std::fs::read_to_string(repo_root().join("docs/alert.schema.json")).unwrap();
        let schema: serde_json::Value = serde_json::from_str(&text).unwrap();
        jsonschema::draft202012::new(&schema).expect("docs/alert.schema.json is a valid draft 2020-12 schema")
    })
}

/// Parses one JSON line glint wrote and checks it against docs/alert.schema.json, failing the test with every
/// violation when it does not validate. Every test that reads glint's JSON lines reads them through this.
pub(crate) fn checked_json(line: &str) -> serde_json::Value {
    let v: serde_json::Value =
        serde_json::from_str(line).unwrap_or_else(|e| panic!("not a JSON line ({e}): {line}"));
    let errors: Vec<String> = line_schema()
        .iter_errors(&v)
        .map(|e| format!("{} at {}", e, e.instance_path()))
        .collect();
    assert!(
        errors.is_empty(),
        "a JSON line does not validate against docs/alert.schema.json:\n  {}\nline: {line}",
        errors.join("\n  ")
    );
    v
}

/// Every non-empty line of `text`, each through [`checked_json`].
pub(crate) fn checked_json_lines(text: &str) -> Vec<serde_json::Value> {
    text.lines()
        .filter(|l| !l.trim().is_empty())
        .map(checked_json)
        .collect()
}

/// Keeps one JSON line as the example of its kind when `GLINT_EXAMPLES_DIR` is set (to regenerate the
/// examples in docs/alerts.md: `GLINT_EXAMPLES_DIR=/tmp/ex cargo test --release -p glint-tests contract`).
/// `name` is the file stem, e.g. "flash" or "withdrawal-automatic".
pub(crate) fn keep_example(name: &str, v: &serde_json::Value) {
    if let Some(dir) = std::env::var_os("GLINT_EXAMPLES_DIR") {
        std::fs::create_dir_all(&dir).unwrap();
        let text = serde_json::to_string_pretty(v).unwrap();
        std::fs::write(Path::new(&dir).join(format!("{name}.json")), text + "\n").unwrap();
    }
}
