//! `glint status`: a running daemon's health as tables in the terminal, read from its `/status` (the JSON of
//! `http/status.rs`) with one plain HTTP/1.0 GET over a socket, bounded in time. The address is `--from`, or
//! the configuration's `metrics.listen`.

use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream, ToSocketAddrs};
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

use anyhow::{Context, anyhow, bail};

use crate::config::config_or_exit;
use crate::http::status::Status;

/// Arguments of `glint status`.
#[derive(Debug, clap::Args)]
pub(crate) struct StatusArgs {
    /// The daemon's HTTP address (its `metrics.listen`), e.g. 127.0.0.1:7603.
    #[arg(long, value_name = "ADDR")]
    from: Option<String>,
    /// Configuration whose `metrics.listen` to ask when `--from` is not given.
    #[arg(long)]
    config: Option<PathBuf>,
    /// Print the JSON as read instead of tables.
    #[arg(long)]
    json: bool,
}

/// How long the whole request may take.
const TIMEOUT: Duration = Duration::from_secs(5);
/// The most a `/status` answer may hold.
const MAX_BYTES: u64 = 4 << 20;

/// Runs `glint status`.
pub(crate) fn run(args: &StatusArgs) -> anyhow::Result<ExitCode> {
    let addr = match &args.from {
        Some(a) => a
            .to_socket_addrs()
            .with_context(|| format!("--from {a}: not an address"))?
            .next()
            .ok_or_else(|| anyhow!("--from {a}: no address"))?,
        None => {
            let cfg = config_or_exit(args.config.as_ref())?;
            cfg.metrics_listen.ok_or_else(|| {
                anyhow!(
                    "{} sets no metrics.listen: give the daemon's HTTP address with --from",
                    cfg.source_name
                )
            })?
        }
    };
    let body = get(addr, "/status")?;
    if args.json {
        println!("{body}");
        return Ok(ExitCode::SUCCESS);
    }
    let s: Status =
        serde_json::from_str(&body).context("the answer of /status is not glint's status JSON")?;
    print!("{}", table(&s));
    // 1, the exit code of an error while running, while an instrument is silent: scripts can test it.
    Ok(if s.healthy {
        ExitCode::SUCCESS
    } else {
        ExitCode::from(1)
    })
}

/// The body of `GET path` from `addr`, which must answer 200.
fn get(addr: SocketAddr, path: &str) -> anyhow::Result<String> {
    let mut sock =
        TcpStream::connect_timeout(&addr, TIMEOUT).with_context(|| format!("cannot connect to {addr}"))?;
    sock.set_read_timeout(Some(TIMEOUT))?;
    sock.set_write_timeout(Some(TIMEOUT))?;
    write!(
        sock,
        "GET {path} HTTP/1.0\r\nHost: {addr}\r\nAccept: application/json\r\n\r\n"
    )?;
    let mut raw = Vec::new();
    sock.take(MAX_BYTES)
        .read_to_end(&mut raw)
        .with_context(|| format!("reading the answer from {addr}"))?;
    let text = String::from_utf8(raw).context("the answer is not UTF-8")?;
    let (head, body) = text
        .split_once("\r\n\r\n")
        .ok_or_else(|| anyhow!("{addr} did not answer HTTP"))?;
    let status_line = head.lines().next().unwrap_or_default();
    if status_line.split_whitespace().nth(1) != Some("200") {
        bail!(
            "{addr}{path} answered '{}'",
            crate::logging::untrusted(status_line)
        );
    }
    Ok(body.to_string())
}

fn dur(s: f64) -> String {
    if s < 120.0 {
        format!("{s:.1} s")
    } else if s < 7200.0 {
        format!("{:.1} min", s / 60.0)
    } else {
        format!("{:.2} h", s / 3600.0)
    }
}

/// The status as the tables `glint status` prints.
pub(crate) fn table(s: &Status) -> String {
    use std::fmt::Write as _;
    let mut o = String::new();
    let health = if s.healthy { "healthy" } else { "UNHEALTHY" };
    let _ = writeln!(
        o,
        "{} at {}, up {}: {health}",
        s.server,
        s.now_utc,
        dur(s.uptime_s)
    );
    let _ = writeln!(
        o,
        "\n{:<16} {:>9} {:>12} {:>9} {:>8} {:>8} {:>10} {:>10} {:>5} {:>10} {:>10}",
        "instrument",
        "producer",
        "photons",
        "rate/s",
        "late",
        "refused",
        "last frame",
        "event lag",
        "cand",
        "dead today",
        "live"
    );
    for i in &s.instruments {
        let _ = writeln!(
            o,
            "{:<16} {:>9} {:>12} {:>9.0} {:>8} {:>8} {:>10} {:>10} {:>5} {:>10} {:>10}{}",
            i.id,
            if i.connected { "connected" } else { "none" },
            i.photons,
            i.rate_hz,
            i.late,
            i.refused,
            dur(i.seconds_since_frame),
            i.event_lag_s.map_or("-".into(), dur),
            i.open_candidates,
            dur(i.dead_today_s),
            dur(i.live_s),
            if i.silent { "  SILENT" } else { "" }
        );
    }
    let a = &s.alerts;
    let _ = writeln!(
        o,
        "\nalerts: {} flashes, {} assessments ({} isolated), {} withdrawals; last seq {}",
        a.flash, a.assessment, a.isolated, a.withdrawal, a.last_seq
    );
    let _ = writeln!(
        o,
        "\n{:<12} {:>8} {:>8} {:>9} {:>18}",
        "sink", "running", "lag", "failures", "flashes delivered"
    );
    for k in &s.sinks {
        let _ = writeln!(
            o,
            "{:<12} {:>8} {:>8} {:>9} {:>18}",
            k.sink, k.running, k.lag, k.failures, k.flash_deliveries
        );
    }
    let _ = writeln!(
        o,
        "\n{:<18} {:>8} {:>9} {:>9} {:>9} {:>9}",
        "latency (ms)", "n", "p50", "p99", "p99.9", "max"
    );
    for l in s.latency.iter().filter(|l| l.count > 0) {
        let _ = writeln!(
            o,
            "{:<18} {:>8} {:>9.3} {:>9.3} {:>9.3} {:>9.3}",
            l.stage, l.count, l.p50_ms, l.p99_ms, l.p999_ms, l.max_ms
        );
    }
    let l = &s.limit;
    let ul = l
        .rate_density_ul_per_pc3_yr
        .map_or("none yet (no exposure)".to_string(), |v| {
            format!("{v:.3e} per pc^3 per yr")
        });
    let _ = writeln!(
        o,
        "\nrunning upper limit ({:.0}% CL): {ul}; live {}, exposure {:.3e} pc^3 yr, {} isolated (mu_UL {:.3})",
        l.cl * 100.0,
        dur(l.live_s),
        l.exposure_pc3_yr,
        l.isolated,
        l.mu_ul
    );
    o
}
