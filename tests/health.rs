//! The daemon's visible health over its HTTP surface: a load run whose `/metrics` counters equal what the
//! feed sent and the subscriber got; the silent-instrument, late-photon and producer-gone warnings (log and
//! metric) and `/healthz` 503 then 200; `glint status`; and the status page rendered by headless Chromium,
//! whose DOM must show the photons fed (and whose screenshot is kept in target/ for README).

use std::collections::BTreeMap;
use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use glint_wire::pb::{self, subscriber_frame};

use crate::hostile::{ack_of, batch, now_gps_ns};
use crate::util::{self, Daemon, Got, INSTRUMENT, PRODUCER_TOKEN, SUBSCRIBER_TOKEN};

/// `GET path` over HTTP/1.0: (status code, body).
fn http_get(addr: SocketAddr, path: &str) -> (u16, String) {
    let mut s = TcpStream::connect_timeout(&addr, Duration::from_secs(10)).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    write!(s, "GET {path} HTTP/1.0\r\nHost: localhost\r\n\r\n").unwrap();
    let mut out = String::new();
    s.read_to_string(&mut out).unwrap();
    let (head, body) = out.split_once("\r\n\r\n").expect("an HTTP answer");
    let code = head.split_whitespace().nth(1).unwrap().parse().unwrap();
    (code, body.to_string())
}

/// The samples of an exposition text: `name{labels}` -> value.
fn samples(text: &str) -> BTreeMap<String, f64> {
    text.lines()
        .filter(|l| !l.starts_with('#') && !l.is_empty())
        .filter_map(|l| {
            let (k, v) = l.rsplit_once(' ')?;
            Some((k.to_string(), v.parse().ok()?))
        })
        .collect()
}

fn sample(m: &BTreeMap<String, f64>, key: &str) -> f64 {
    *m.get(key).unwrap_or_else(|| panic!("no sample {key} in {m:#?}"))
}

fn with_metrics(dir: &Path, extra_ingest: &str) -> Daemon {
    let state = dir.join("state");
    let d = Daemon::start_with(
        dir,
        &util::config_text_with(&state, extra_ingest, "", "[metrics]\nlisten = \"127.0.0.1:0\""),
    );
    assert!(d.metrics.is_some());
    d
}

/// Polls `f` every 50 ms until it holds, for at most `secs` seconds.
fn eventually(secs: u64, what: &str, mut f: impl FnMut() -> bool) {
    let deadline = Instant::now() + Duration::from_secs(secs);
    while !f() {
        assert!(Instant::now() < deadline, "not within {secs} s: {what}");
        std::thread::sleep(Duration::from_millis(50));
    }
}

/// Feeds the demo with a subscriber attached; returns (photons fed, alerts the subscriber got, the
/// subscriber, still connected).
fn demo_load(d: &Daemon) -> (u64, Vec<pb::Alert>, util::Conn) {
    let (mut sub, welcome) = util::subscriber(d.subs, SUBSCRIBER_TOKEN, 0, false);
    assert!(
        matches!(welcome.body, Some(subscriber_frame::Body::Welcome(_))),
        "{welcome:?}"
    );
    let frames = util::demo_frames();
    let fed = util::photons_in(&frames);
    let ack = crate::live::stream_all(d.ingest, &frames);
    assert_eq!(ack.photons, fed);
    // The desk is done once its newest number stops moving; the subscriber must then have every alert.
    let addr = d.metrics.unwrap();
    let last_seq = || -> u64 {
        let (_, body) = http_get(addr, "/status");
        let v: serde_json::Value = serde_json::from_str(&body).unwrap();
        v["alerts"]["last_seq"].as_u64().unwrap()
    };
    let mut seen = (last_seq(), Instant::now());
    eventually(30, "the desk settles", || {
        let now = last_seq();
        if now != seen.0 {
            seen = (now, Instant::now());
        }
        seen.1.elapsed() > Duration::from_millis(1500)
    });
    let newest = seen.0;
    assert!(newest > 0, "the demo issued no alert");
    let mut alerts = Vec::new();
    let deadline = Instant::now() + Duration::from_secs(30);
    while alerts.last().is_none_or(|a: &pb::Alert| a.seq < newest) {
        assert!(
            Instant::now() < deadline,
            "the subscriber did not get seq {newest}"
        );
        if let Got::Frame(pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Alert(a)),
        }) = sub.recv::<pb::SubscriberFrame>(Duration::from_secs(10))
        {
            alerts.push(a);
        }
    }
    (fed, alerts, sub)
}

#[test]
fn a_load_run_shows_on_metrics_exactly_what_was_fed_and_delivered() {
    let dir = tempfile::tempdir().unwrap();
    let d = with_metrics(dir.path(), "");
    let (fed, alerts, _sub) = demo_load(&d);
    let stamped = alerts
        .iter()
        .filter(|a| a.latency.as_ref().is_some_and(|l| l.received_unix_ns > 0))
        .count() as f64;
    // The subscriber task records the send latencies once it has flushed: wait for that, then compare.
    let mut text = String::new();
    eventually(20, "every delivery's latency recorded", || {
        let (code, t) = http_get(d.metrics.unwrap(), "/metrics");
        assert_eq!(code, 200);
        text = t;
        samples(&text).get("glint_latency_seconds_count{stage=\"end_to_end\"}") == Some(&stamped)
    });
    assert!(text.ends_with("# EOF\n"), "not an OpenMetrics exposition");
    let m = samples(&text);
    let inst = format!("{{instrument=\"{INSTRUMENT}\"}}");
    assert_eq!(
        sample(&m, &format!("glint_instrument_photons_total{inst}")),
        fed as f64
    );
    assert_eq!(sample(&m, "glint_photons_total"), fed as f64);
    assert_eq!(
        sample(&m, &format!("glint_instrument_late_photons_total{inst}")),
        0.0
    );
    let kind_count = |k: i32| alerts.iter().filter(|a| a.kind == k).count() as f64;
    let flashes = kind_count(pb::AlertKind::Flash as i32);
    assert!(flashes > 0.0);
    // One flash issued per flash delivered to the one subscriber, and the two named apart.
    assert_eq!(sample(&m, "glint_alerts_total{kind=\"flash\"}"), flashes);
    assert_eq!(
        sample(&m, "glint_deliveries_total{sink=\"subscribers\",kind=\"flash\"}"),
        flashes
    );
    for (kind, name) in [
        (pb::AlertKind::Assessment, "assessment"),
        (pb::AlertKind::Withdrawal, "withdrawal"),
    ] {
        assert_eq!(
            sample(&m, &format!("glint_alerts_total{{kind=\"{name}\"}}")),
            kind_count(kind as i32),
            "{name}"
        );
    }
    // Histogram counts: one per alert decided and journalled, one per stamped alert delivered.
    assert_eq!(
        sample(&m, "glint_latency_seconds_count{stage=\"decide\"}"),
        stamped
    );
    assert_eq!(
        sample(&m, "glint_latency_seconds_count{stage=\"journal\"}"),
        stamped
    );
    assert_eq!(
        sample(&m, "glint_latency_seconds_count{stage=\"end_to_end\"}"),
        stamped
    );
    assert_eq!(
        sample(&m, "glint_latency_seconds_count{stage=\"flash_end_to_end\"}"),
        flashes
    );
    assert_eq!(
        sample(&m, "glint_latency_seconds_count{stage=\"flash_decide\"}"),
        flashes
    );
    // Each flash delivery also gives glint's own share (end to end less the journal's disk), which is less
    // than the end to end it comes from.
    assert_eq!(
        sample(&m, "glint_latency_seconds_count{stage=\"flash_own\"}"),
        flashes
    );
    assert!(
        sample(&m, "glint_latency_seconds_sum{stage=\"flash_own\"}")
            < sample(&m, "glint_latency_seconds_sum{stage=\"flash_end_to_end\"}")
    );
    assert!(sample(&m, "glint_latency_seconds_sum{stage=\"end_to_end\"}") > 0.0);
    assert!(
        m.contains_key("glint_latency_seconds_bucket{le=\"+Inf\",stage=\"end_to_end\"}")
            || m.contains_key("glint_latency_seconds_bucket{stage=\"end_to_end\",le=\"+Inf\"}")
    );
    // The subscriber has everything: no lag; the engine's live time and the running limit are there.
    assert_eq!(sample(&m, "glint_sink_cursor_lag{sink=\"subscribers\"}"), 0.0);
    assert_eq!(sample(&m, "glint_sink_running{sink=\"subscribers\"}"), 1.0);
    eventually(10, "live time and effective volume", || {
        let m = samples(&http_get(d.metrics.unwrap(), "/metrics").1);
        m.get(&format!("glint_instrument_live_seconds_total{inst}"))
            .is_some_and(|v| *v > 600.0)
            && m.get("glint_rate_density_upper_limit").is_some_and(|v| *v > 0.0)
    });
    let (code, body) = http_get(d.metrics.unwrap(), "/status");
    assert_eq!(code, 200);
    let s: serde_json::Value = serde_json::from_str(&body).unwrap();
    assert_eq!(s["instruments"][0]["photons"].as_u64(), Some(fed));
    assert_eq!(s["alerts"]["flash"].as_f64(), Some(flashes));
    assert!(s["limit"]["rate_density_ul_per_pc3_yr"].as_f64().unwrap() > 0.0);
    assert!(
        s["recent"]
            .as_array()
            .unwrap()
            .iter()
            .any(|a| !a["photon_offsets_ms"].as_array().unwrap().is_empty()),
        "no light curve among the recent alerts: {body}"
    );
    // An unknown path is not the metrics.
    assert_eq!(http_get(d.metrics.unwrap(), "/nothing-here").0, 404);
}

#[test]
fn silence_late_photons_and_a_gone_producer_are_warned_and_healthz_follows() {
    let dir = tempfile::tempdir().unwrap();
    let d = with_metrics(dir.path(), "silent_after_s = 0.5");
    let addr = d.metrics.unwrap();
    let inst = format!("{{instrument=\"{INSTRUMENT}\"}}");
    // No producer yet: silent past half a second.
    eventually(10, "healthz 503", || http_get(addr, "/healthz").0 == 503);
    let (_, body) = http_get(addr, "/healthz");
    assert!(
        body.contains(&format!("instrument {INSTRUMENT}: silent")),
        "{body}"
    );
    let m = samples(&http_get(addr, "/metrics").1);
    assert_eq!(sample(&m, &format!("glint_instrument_silent{inst}")), 1.0);
    assert_eq!(sample(&m, &format!("glint_instrument_silences_total{inst}")), 1.0);
    eventually(5, "the silence warning in the log", || {
        d.log_events().iter().any(|e| {
            e["level"] == "WARN"
                && e["message"]
                    .as_str()
                    .is_some_and(|m| m.starts_with("instrument silent"))
        })
    });
    // A producer that streams: healthy again.
    let (mut c, _) = util::producer(d.ingest, INSTRUMENT, PRODUCER_TOKEN, 1);
    let t = now_gps_ns() - 600_000_000_000;
    let mut seq = 0;
    let mut fed = 0;
    eventually(10, "healthz 200 while a producer streams", || {
        seq += 1;
        fed += 50;
        c.send(&batch(seq, t + seq as i64 * 100_000_000, 50));
        http_get(addr, "/healthz").0 == 200
    });
    let (_, body) = http_get(addr, "/healthz");
    assert!(
        body.starts_with("ok\n") && body.contains(&format!("instrument {INSTRUMENT}: ok")),
        "{body}"
    );
    // Ten photons a minute behind the watermark: dropped as late, warned, counted.
    seq += 1;
    c.send(&batch(seq, t - 60_000_000_000, 10));
    let (ack, warnings) = ack_of(&mut c, seq);
    assert_eq!((ack.photons, ack.late), (fed + 10, 10), "{ack:?}");
    assert!(
        warnings
            .iter()
            .any(|w| w.code == pb::RefusalCode::LatePhotons as i32)
    );
    let m = samples(&http_get(addr, "/metrics").1);
    assert_eq!(
        sample(&m, &format!("glint_instrument_late_photons_total{inst}")),
        10.0
    );
    assert_eq!(
        sample(&m, &format!("glint_instrument_photons_total{inst}")),
        (fed + 10) as f64
    );
    assert_eq!(sample(&m, &format!("glint_instrument_connected{inst}")), 1.0);
    // The producer goes away: a warning and a count, then silence again.
    drop(c);
    eventually(10, "silent again after the producer left", || {
        http_get(addr, "/healthz").0 == 503
    });
    let m = samples(&http_get(addr, "/metrics").1);
    assert_eq!(
        sample(&m, &format!("glint_instrument_producers_gone_total{inst}")),
        1.0
    );
    assert_eq!(sample(&m, &format!("glint_instrument_silences_total{inst}")), 2.0);
    let events = d.log_events();
    let warned = |prefix: &str| {
        events
            .iter()
            .any(|e| e["level"] == "WARN" && e["message"].as_str().is_some_and(|m| m.contains(prefix)))
    };
    assert!(warned("dropped as late"), "no late-photon warning in the log");
    assert!(
        warned("producer went away"),
        "no producer-gone warning in the log"
    );
}

#[test]
fn glint_status_prints_the_daemons_figures() {
    let dir = tempfile::tempdir().unwrap();
    let d = with_metrics(dir.path(), "");
    let frames = util::background_frames(20, 5);
    let fed = util::photons_in(&frames);
    crate::live::stream_all(d.ingest, &frames);
    let out = Command::new(util::glint_bin())
        .args(["status", "--from", &d.metrics.unwrap().to_string()])
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{text}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let row = text
        .lines()
        .find(|l| l.starts_with(INSTRUMENT))
        .unwrap_or_else(|| panic!("no row for {INSTRUMENT}:\n{text}"));
    assert_eq!(
        row.split_whitespace().nth(2),
        Some(fed.to_string().as_str()),
        "{text}"
    );
    assert!(text.contains("running upper limit (90% CL)"), "{text}");
    assert!(text.lines().any(|l| l.starts_with("subscribers ")), "{text}");
    // Nothing listening: a clear error, not a panic.
    let out = Command::new(util::glint_bin())
        .args(["status", "--from", "127.0.0.1:1"])
        .output()
        .unwrap();
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("cannot connect to 127.0.0.1:1"));
}

/// Headless Chromium on `url`, with `args` added; killed after 60 s. Returns stdout.
fn chromium(url: &str, args: &[&str]) -> String {
    let profile = tempfile::tempdir().unwrap();
    let mut child = Command::new("chromium")
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            // Lets the page's fetch of /status finish before the DOM is dumped or the picture taken.
            "--virtual-time-budget=4000",
            "--window-size=1200,900",
        ])
        .arg(format!("--user-data-dir={}", profile.path().display()))
        .args(args)
        .arg(url)
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("chromium (Debian package `chromium`, installed by .ci/run) must be installed");
    let mut out = String::new();
    let mut stdout = child.stdout.take().unwrap();
    let reader = std::thread::spawn(move || {
        let _ = stdout.read_to_string(&mut out);
        out
    });
    let deadline = Instant::now() + Duration::from_secs(60);
    loop {
        if child.try_wait().unwrap().is_some() {
            break;
        }
        if Instant::now() > deadline {
            let _ = child.kill();
            let _ = child.wait();
            panic!("chromium did not finish within 60 s");
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    reader.join().unwrap()
}

#[test]
fn the_status_page_shows_live_figures_in_headless_chromium() {
    let dir = tempfile::tempdir().unwrap();
    let d = with_metrics(dir.path(), "");
    let (fed, alerts, _sub) = demo_load(&d);
    let url = format!("http://{}/", d.metrics.unwrap());
    let dom = chromium(&url, &["--dump-dom"]);
    assert!(
        dom.contains("data-loaded=\"1\""),
        "the page's script did not render /status:\n{dom}"
    );
    let cell = format!("<td id=\"photons-{INSTRUMENT}\">{fed}</td>");
    assert!(dom.contains(&cell), "no {cell} in the rendered page:\n{dom}");
    let flashes = alerts
        .iter()
        .filter(|a| a.kind == pb::AlertKind::Flash as i32)
        .count();
    assert!(
        dom.contains(&format!("<td id=\"a-flash\">{flashes}</td>")),
        "{dom}"
    );
    assert!(dom.contains("<svg"), "no light curve drawn:\n{dom}");
    // The picture, kept for README (docs/status-page.png is a copy of one).
    let shot = util::repo_root().join("target/status-page.png");
    let _ = std::fs::remove_file(&shot);
    chromium(&url, &[&format!("--screenshot={}", shot.display())]);
    let decoder = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(&shot).unwrap()));
    let info = decoder.read_info().unwrap();
    assert_eq!((info.info().width, info.info().height), (1200, 900));
}
