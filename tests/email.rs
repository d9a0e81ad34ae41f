//! The email sink against a real SMTP server: `tests/smtp/server.py` (aiosmtpd) on 127.0.0.1, started and
//! stopped by each test, storing every message it accepts. Alerts come from the demo recording (every kind)
//! or from operator test alerts (fast). Shown: subjects, both body parts and a PNG of the stated size; a
//! relay that goes away and comes back; a rate limit that turns a storm into one digest; a 550 for one
//! recipient that does not delay another; SIGKILL with emails pending, then a restart.
//!
//! The tests need python3 with aiosmtpd and trustme (`.ci/run` installs them). Without it they skip with a loud message,
//! except under CI (`CI` set), where they fail: CI must run them.

use std::io::{BufRead, BufReader, Read, Write};
use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::time::{Duration, Instant};

use glint_wire::pb::{self, subscriber_frame};
use serde_json::Value;

use crate::util::{self, Conn, Daemon, Got, OPERATOR_TOKEN, SUBSCRIBER_TOKEN};

/// Whether the SMTP server can run here; `false` (with a loud message) means the test should return.
pub(crate) fn smtp_available(test: &str) -> bool {
    let ok = Command::new("python3")
        .args(["-c", "import aiosmtpd, trustme"])
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .status()
        .is_ok_and(|s| s.success());
    if !ok {
        assert!(
            std::env::var_os("CI").is_none(),
            "python3 with aiosmtpd and trustme is required under CI (.ci/run installs them)"
        );
        eprintln!(
            "\n!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!\n\
             !!! SKIPPED {test}: python3 lacks aiosmtpd or trustme; install them with\n\
             !!!     python3 -m pip install aiosmtpd==1.4.6 trustme==1.2.1\n\
             !!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!!\n"
        );
    }
    ok
}

/// A free loopback port (free when asked; the server binds it right after).
fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

/// The SMTP server process. Killed when dropped.
pub(crate) struct Smtp {
    child: Option<Child>,
    /// Its port (the same across restarts).
    pub(crate) port: u16,
    /// Where it stores messages.
    pub(crate) dir: PathBuf,
    reject: Vec<String>,
    args: Vec<String>,
}

impl Smtp {
    /// Starts a server storing into `dir`, rejecting `reject` with 550.
    pub(crate) fn start(dir: &Path, reject: &[&str]) -> Self {
        Self::start_with(dir, reject, &[])
    }

    /// Like [`start`](Self::start), with more arguments for the server (TLS, AUTH).
    pub(crate) fn start_with(dir: &Path, reject: &[&str], args: &[String]) -> Self {
        let mut s = Self {
            child: None,
            port: free_port(),
            dir: dir.to_path_buf(),
            reject: reject.iter().map(|r| (*r).to_string()).collect(),
            args: args.to_vec(),
        };
        s.up();
        s
    }

    /// Starts it again on the same port.
    pub(crate) fn up(&mut self) {
        assert!(self.child.is_none(), "already running");
        let mut cmd = Command::new("python3");
        cmd.arg(util::repo_root().join("tests/smtp/server.py"))
            .args(["--port", &self.port.to_string(), "--dir"])
            .arg(&self.dir)
            .stdout(Stdio::piped())
            .stderr(Stdio::inherit());
        for r in &self.reject {
            cmd.args(["--reject", r]);
        }
        cmd.args(&self.args);
        let mut child = cmd.spawn().expect("start tests/smtp/server.py");
        let out = child.stdout.take().unwrap();
        let (tx, rx) = mpsc::channel();
        std::thread::spawn(move || {
            let mut line = String::new();
            let _ = BufReader::new(out).read_line(&mut line);
            let _ = tx.send(line);
        });
        let line = rx.recv_timeout(Duration::from_secs(20)).unwrap_or_default();
        assert_eq!(
            line.trim(),
            format!("ready {}", self.port),
            "the SMTP server did not start"
        );
        self.child = Some(child);
    }

    /// Stops it (SIGTERM, then waits).
    pub(crate) fn down(&mut self) {
        let mut c = self.child.take().expect("running");
        let _ = Command::new("kill").args(["-TERM", &c.id().to_string()]).status();
        let deadline = Instant::now() + Duration::from_secs(10);
        while c.try_wait().unwrap().is_none() {
            if Instant::now() > deadline {
                let _ = c.kill();
            }
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// Every message stored so far, in the order accepted.
    pub(crate) fn messages(&self) -> Vec<Value> {
        let mut names: Vec<PathBuf> = std::fs::read_dir(&self.dir)
            .map(|d| d.map(|e| e.unwrap().path()).collect())
            .unwrap_or_default();
        names.retain(|p| p.extension().is_some_and(|x| x == "json"));
        names.sort();
        names
            .iter()
            .map(|p| serde_json::from_str(&std::fs::read_to_string(p).unwrap()).unwrap())
            .collect()
    }

    /// Messages to `rcpt`.
    pub(crate) fn messages_to(&self, rcpt: &str) -> Vec<Value> {
        self.messages()
            .into_iter()
            .filter(|m| m["envelope_to"].as_array().unwrap().iter().any(|t| t == rcpt))
            .collect()
    }

    /// Waits until `rcpt` has `n` messages (or the timeout), and returns them all.
    pub(crate) fn wait_for(&self, rcpt: &str, n: usize, timeout: Duration) -> Vec<Value> {
        let deadline = Instant::now() + timeout;
        loop {
            let m = self.messages_to(rcpt);
            if m.len() >= n || Instant::now() > deadline {
                return m;
            }
            std::thread::sleep(Duration::from_millis(50));
        }
    }
}

impl Drop for Smtp {
    fn drop(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = c.kill();
            let _ = c.wait();
        }
    }
}

/// An `[email]` section for the test configuration (appended after `[subscribers]`): plain SMTP to the test
/// server on loopback, short retries; each recipient is (address, extra keys).
pub(crate) fn email_section(port: u16, recipients: &[(&str, &str)]) -> String {
    let mut s = format!(
        "\n[email]\nrelay = \"127.0.0.1:{port}\"\nfrom = \"glint <glint@example.org>\"\ntls = \"none\"\ntimeout_s = 5.0\nretry_max_s = 1.0\n"
    );
    for (addr, extra) in recipients {
        s += &format!("\n[[email.recipient]]\naddress = \"{addr}\"\n{extra}\n");
    }
    s
}

/// Asks the daemon for a test alert over the subscriber port, as `glint test-alert` does.
pub(crate) fn test_alert(d: &Daemon, note: &str) -> pb::Alert {
    let mut c = Conn::connect(d.subs);
    c.send(&pb::SubscriberRequest {
        body: Some(pb::subscriber_request::Body::TestAlert(pb::TestAlertRequest {
            token: OPERATOR_TOKEN.into(),
            operator: "tests".into(),
            note: note.into(),
        })),
    });
    match c.recv::<pb::SubscriberFrame>(Duration::from_secs(20)) {
        Got::Frame(pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Alert(a)),
        }) => a,
        other => panic!("no test alert: {other:?}"),
    }
}

/// The alert id a message was sent for (its Message-ID starts with it).
fn id_of(m: &Value) -> String {
    let mid = m["message_id"].as_str().unwrap().trim_start_matches('<');
    mid.split(".oncall")
        .next()
        .unwrap()
        .split(".good")
        .next()
        .unwrap()
        .to_string()
}

fn ids(ms: &[Value]) -> Vec<String> {
    ms.iter().map(id_of).collect()
}

/// Decodes a PNG and returns its size.
fn png_size(path: &str) -> (u32, u32) {
    let dec = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(path).unwrap()));
    let mut reader = dec.read_info().unwrap();
    let mut buf = vec![0; reader.output_buffer_size()];
    let info = reader.next_frame(&mut buf).unwrap();
    (info.width, info.height)
}

fn metrics(dir: &Path) -> String {
    let ports: Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("state/ports.json")).unwrap()).unwrap();
    let addr = ports["metrics"].as_str().unwrap();
    let mut s = TcpStream::connect(addr).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    s.write_all(b"GET /metrics HTTP/1.0\r\n\r\n").unwrap();
    let mut out = String::new();
    s.read_to_string(&mut out).unwrap();
    out
}

const ONCALL: &str = "oncall@example.org";

#[test]
fn email_every_alert_kind_arrives_with_subject_both_parts_and_a_png() {
    if !smtp_available("email_every_alert_kind_arrives_with_subject_both_parts_and_a_png") {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let smtp = Smtp::start(&dir.path().join("mail"), &[]);
    let d = Daemon::start(
        dir.path(),
        &email_section(smtp.port, &[(ONCALL, "max_per_window = 1000")]),
    );
    crate::live::stream_all(d.ingest, &util::demo_frames());
    // One test alert through the command an operator uses.
    let op = util::token_file(dir.path(), "op.token", OPERATOR_TOKEN);
    let out = Command::new(util::glint_bin())
        .args([
            "test-alert",
            "--from",
            &d.subs.to_string(),
            "--note",
            "email check",
            "--token-file",
        ])
        .arg(&op)
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert!(String::from_utf8_lossy(&out.stdout).contains("issued test alert GL-test-"));
    // Every alert the journal holds, from a subscriber.
    let (mut sub, welcome) = util::subscriber(d.subs, SUBSCRIBER_TOKEN, 0, true);
    let Some(subscriber_frame::Body::Welcome(w)) = welcome.body else {
        panic!("{welcome:?}")
    };
    let mut alerts = Vec::new();
    while alerts.len() < w.last_seq as usize {
        match sub.recv::<pb::SubscriberFrame>(Duration::from_secs(20)) {
            Got::Frame(pb::SubscriberFrame {
                body: Some(subscriber_frame::Body::Alert(a)),
            }) => alerts.push(a),
            Got::Frame(_) => {}
            other => panic!("{other:?}"),
        }
    }
    let msgs = smtp.wait_for(ONCALL, alerts.len(), Duration::from_secs(60));
    assert_eq!(msgs.len(), alerts.len(), "one email per alert");
    assert_eq!(
        ids(&msgs),
        alerts.iter().map(|a| a.id.clone()).collect::<Vec<_>>(),
        "emails in alert order"
    );
    let mut kinds = std::collections::BTreeSet::new();
    for (m, a) in msgs.iter().zip(&alerts) {
        let kind = pb::AlertKind::try_from(a.kind).unwrap();
        kinds.insert(kind.as_str_name());
        let subject = m["subject"].as_str().unwrap();
        let text = m["text"].as_str().expect("a text/plain part");
        let html = m["html"].as_str().expect("a text/html part");
        let word = kind.as_str_name();
        assert!(subject.starts_with(word), "{subject}");
        assert!(subject.contains(&a.instrument), "{subject}");
        for body in [text, html] {
            assert!(body.contains(&a.id), "{body}");
            assert!(body.contains("interlocks"), "the caution is missing: {body}");
        }
        if let Some(t) = a.trigger.as_ref().filter(|_| kind != pb::AlertKind::Test) {
            let pos = format!("RA {:.2} Dec {:+.2} {:.1} sigma", t.ra_deg, t.dec_deg, t.sigma);
            assert!(subject.ends_with(&pos), "{subject} lacks {pos}");
            for body in [text, html] {
                assert!(
                    body.contains("Galactic") && body.contains("False-alarm rate"),
                    "{body}"
                );
            }
        }
        if kind == pb::AlertKind::Assessment {
            let x = a.assessment.as_ref().unwrap();
            let verdict = format!("{:?}", pb::Verdict::try_from(x.verdict).unwrap()).to_uppercase();
            assert!(text.contains(&verdict), "{text}");
        }
        if kind == pb::AlertKind::Test {
            assert!(
                subject.starts_with("TEST") && text.contains("TEST ALERT") && html.contains("TEST ALERT")
            );
            assert!(text.contains("email check"));
            assert!(!text.contains("Galactic"), "a test alert carries no science");
        }
        let att = m["attachments"].as_array().unwrap();
        assert_eq!(att.len(), 1, "{m}");
        assert_eq!(att[0]["content_type"], "image/png");
        assert_eq!(png_size(att[0]["path"].as_str().unwrap()), (900, 500));
    }
    assert_eq!(
        kinds.into_iter().collect::<Vec<_>>(),
        vec!["ASSESSMENT", "FLASH", "TEST", "WITHDRAWAL"],
        "every kind"
    );
    println!("{} alerts, {} emails", alerts.len(), msgs.len());
}

#[test]
fn email_relay_stopped_and_started_again_every_alert_arrives_once_in_order() {
    if !smtp_available("email_relay_stopped_and_started_again_every_alert_arrives_once_in_order") {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let mut smtp = Smtp::start(&dir.path().join("mail"), &[]);
    let d = Daemon::start(
        dir.path(),
        &email_section(smtp.port, &[(ONCALL, "max_per_window = 1000")]),
    );
    let mut sent = Vec::new();
    for i in 0..3 {
        sent.push(test_alert(&d, &format!("before {i}")).id);
    }
    assert_eq!(smtp.wait_for(ONCALL, 3, Duration::from_secs(30)).len(), 3);
    smtp.down();
    for i in 0..5 {
        sent.push(test_alert(&d, &format!("while down {i}")).id);
    }
    // The relay is gone: the sink retries with backoff (and logs it) while nothing can arrive.
    std::thread::sleep(Duration::from_secs(3));
    assert_eq!(smtp.messages_to(ONCALL).len(), 3);
    smtp.up();
    let msgs = smtp.wait_for(ONCALL, 8, Duration::from_secs(60));
    assert_eq!(ids(&msgs), sent, "every alert once, in order");
    std::thread::sleep(Duration::from_secs(2));
    assert_eq!(smtp.messages_to(ONCALL).len(), 8, "nothing sent twice");
    let retries = d
        .log_events()
        .iter()
        .filter(|e| e["message"].as_str().is_some_and(|m| m.contains("retrying")))
        .count();
    assert!(retries >= 1, "no retry was logged:\n{}", d.log_text());
}

#[test]
fn email_storm_two_per_minute_then_one_digest_naming_the_other_28() {
    if !smtp_available("email_storm_two_per_minute_then_one_digest_naming_the_other_28") {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let smtp = Smtp::start(&dir.path().join("mail"), &[]);
    let d = Daemon::start(
        dir.path(),
        &email_section(smtp.port, &[(ONCALL, "max_per_window = 2\nwindow_s = 60")]),
    );
    let sent: Vec<String> = (0..30)
        .map(|i| test_alert(&d, &format!("storm {i}")).id)
        .collect();
    let first = smtp.wait_for(ONCALL, 2, Duration::from_secs(20));
    assert_eq!(ids(&first), sent[..2].to_vec());
    // The window of the first message closes 60 s after it; the digest goes then.
    let all = smtp.wait_for(ONCALL, 3, Duration::from_secs(100));
    assert_eq!(all.len(), 3, "no digest after the window");
    let digest = &all[2];
    let subject = digest["subject"].as_str().unwrap();
    assert!(subject.starts_with("DIGEST 28 alerts"), "{subject}");
    for body in [digest["text"].as_str().unwrap(), digest["html"].as_str().unwrap()] {
        for id in &sent[2..] {
            assert!(body.contains(id.as_str()), "the digest does not name {id}");
        }
        for id in &sent[..2] {
            assert!(!body.contains(id.as_str()), "the digest names {id}, already sent");
        }
    }
    std::thread::sleep(Duration::from_secs(2));
    assert_eq!(smtp.messages_to(ONCALL).len(), 3, "2 messages and 1 digest");
}

#[test]
fn email_550_for_one_recipient_does_not_delay_another() {
    if !smtp_available("email_550_for_one_recipient_does_not_delay_another") {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let smtp = Smtp::start(&dir.path().join("mail"), &["bad@example.org"]);
    let extra = format!(
        "{}\n[metrics]\nlisten = \"127.0.0.1:0\"\n",
        email_section(
            smtp.port,
            &[
                ("bad@example.org", "max_per_window = 100"),
                ("good@example.org", "max_per_window = 100")
            ]
        )
    );
    let d = Daemon::start(dir.path(), &extra);
    let started = Instant::now();
    let sent: Vec<String> = (0..5).map(|i| test_alert(&d, &format!("550 {i}")).id).collect();
    let good = smtp.wait_for("good@example.org", 5, Duration::from_secs(30));
    let took = started.elapsed();
    assert_eq!(ids(&good), sent);
    assert!(
        took < Duration::from_secs(20),
        "the good recipient waited {took:?}"
    );
    assert!(smtp.messages_to("bad@example.org").is_empty());
    // Each rejection is logged with recipient and alert id, counted, and moved past (no retries).
    let deadline = Instant::now() + Duration::from_secs(20);
    let rejected = loop {
        let r: Vec<Value> = d
            .log_events()
            .into_iter()
            .filter(|e| {
                e["message"]
                    .as_str()
                    .is_some_and(|m| m.contains("rejected the email for good"))
            })
            .collect();
        if r.len() >= 5 || Instant::now() > deadline {
            break r;
        }
        std::thread::sleep(Duration::from_millis(100));
    };
    assert_eq!(rejected.len(), 5, "{}", d.log_text());
    for (e, id) in rejected.iter().zip(&sent) {
        assert_eq!(e["recipient"], "bad@example.org");
        assert!(e["alerts"].as_str().unwrap().contains(id.as_str()), "{e}");
    }
    let m = metrics(dir.path());
    assert!(m.contains("\nglint_email_rejected_total 5\n"), "{m}");
    assert!(m.contains("\nglint_email_sent_total 5\n"), "{m}");
    assert!(m.contains("\nglint_email_retries_total 0\n"), "{m}");
    let cursor: Value = serde_json::from_str(
        &std::fs::read_to_string(dir.path().join("state/email/bad_example.org.json")).unwrap(),
    )
    .unwrap();
    assert_eq!(cursor["after_seq"], 5, "the rejected alerts were not moved past");
}

#[test]
fn email_sigkill_with_emails_pending_then_restart_loses_none_and_repeats_none() {
    if !smtp_available("email_sigkill_with_emails_pending_then_restart_loses_none_and_repeats_none") {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let mut smtp = Smtp::start(&dir.path().join("mail"), &[]);
    let section = email_section(smtp.port, &[(ONCALL, "max_per_window = 1000")]);
    let mut d = Daemon::start(dir.path(), &section);
    let mut sent: Vec<String> = (0..3)
        .map(|i| test_alert(&d, &format!("before {i}")).id)
        .collect();
    assert_eq!(smtp.wait_for(ONCALL, 3, Duration::from_secs(30)).len(), 3);
    // The relay goes away; four more alerts are journalled and wait in the sink's retries.
    smtp.down();
    sent.extend((0..4).map(|i| test_alert(&d, &format!("pending {i}")).id));
    std::thread::sleep(Duration::from_millis(1500));
    d.kill9();
    smtp.up();
    let d2 = Daemon::start(dir.path(), &section);
    let msgs = smtp.wait_for(ONCALL, 7, Duration::from_secs(60));
    assert_eq!(ids(&msgs), sent, "every alert once, in order, across the kill");
    std::thread::sleep(Duration::from_secs(2));
    assert_eq!(
        smtp.messages_to(ONCALL).len(),
        7,
        "the ones sent before the kill were not sent again"
    );
    drop(d2);
}

#[test]
fn email_over_starttls_and_implicit_tls_with_auth() {
    if !smtp_available("email_over_starttls_and_implicit_tls_with_auth") {
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let pw = dir.path().join("smtp.password");
    std::fs::write(&pw, "s3cret-pass\n").unwrap();
    for (mode, extra) in [("starttls", None), ("implicit", Some("--implicit-tls"))] {
        let run = dir.path().join(mode);
        // The server makes a test CA and a certificate for localhost; the daemon trusts that CA only.
        let ca = run.join("ca.pem");
        let mut args = vec![
            "--tls-ca-out".to_string(),
            ca.display().to_string(),
            "--auth".to_string(),
            "glint:s3cret-pass".to_string(),
        ];
        args.extend(extra.map(String::from));
        let smtp = Smtp::start_with(&run.join("mail"), &[], &args);
        let section = format!(
            "\n[email]\nrelay = \"localhost:{}\"\nfrom = \"glint <glint@example.org>\"\ntls = \"{mode}\"\n\
             tls_ca_file = \"{}\"\nusername = \"glint\"\npassword_file = \"{}\"\nretry_max_s = 1.0\n\
             \n[[email.recipient]]\naddress = \"{ONCALL}\"\n",
            smtp.port,
            ca.display(),
            pw.display()
        );
        let d = Daemon::start(&run, &section);
        let id = test_alert(&d, mode).id;
        let msgs = smtp.wait_for(ONCALL, 1, Duration::from_secs(30));
        assert_eq!(ids(&msgs), vec![id], "{mode}:\n{}", d.log_text());
        assert!(msgs[0]["text"].as_str().unwrap().contains(mode));
    }
}
