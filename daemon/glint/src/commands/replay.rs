//! `glint replay`: runs recordings through the same per-instrument driver and engine as the live daemon, as
//! fast as the CPU allows, and prints the alerts as JSON lines followed by one summary line. The alert lines
//! carry no wall-clock value, so the same recordings give byte-identical alerts run after run.

use std::collections::BTreeMap;
use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Instant;

use anyhow::Context;
use glint_engine::Finding;
use glint_wire::pb::producer_frame::Body;
use serde::Serialize;

use crate::alerts::{self, Sequencer};
use crate::config::config_or_exit;
use crate::fits::InputFrames;
use crate::progress::Progress;
use crate::serve::driver::InstrumentDriver;

/// Arguments of `glint replay`.
#[derive(Debug, clap::Args)]
pub(crate) struct ReplayArgs {
    /// Recordings (.glrec or .glrec.zst) or FITS event lists (.fits, .evt), replayed in the order given.
    #[arg(required = true)]
    files: Vec<PathBuf>,
    /// Configuration file; the embedded default when omitted.
    #[arg(long)]
    config: Option<PathBuf>,
    /// Also write the alert lines (without the summary) to this file.
    #[arg(long)]
    alerts_out: Option<PathBuf>,
    /// Decode, validate and reorder only, to read off the cost of the search itself.
    #[arg(long)]
    no_search: bool,
    /// Treat every recording as this instrument, whatever its Hello says.
    #[arg(long)]
    instrument: Option<String>,
    /// Print only the summary line, not the alerts, and no progress.
    #[arg(long)]
    quiet: bool,
    /// Run every instrument at this false-alarm rate per year instead of the configured one.
    #[arg(long)]
    far_per_year: Option<f64>,
    /// A truth file (`glint simulate --truth`, JSON lines): the summary says which sources got a flash.
    #[arg(long)]
    truth: Option<PathBuf>,
    /// Put each alert's photons in its JSON: the trigger's `photon_time_gps_ns`, `photon_ra_deg`,
    /// `photon_dec_deg` and `photon_energy_gev` columns (docs/alerts.md).
    #[arg(long)]
    photons: bool,
    /// Seconds between progress lines when stderr is not a terminal.
    #[arg(long, default_value_t = 10.0, hide = true)]
    progress_every: f64,
}

/// One source of a truth file with a place and a time.
#[derive(Debug, serde::Deserialize)]
struct TruthLine {
    index: usize,
    kind: String,
    ra_deg: Option<f64>,
    dec_deg: Option<f64>,
    t_gps_ns: i64,
}

/// A flash, for matching against the truth.
#[derive(Debug, Clone)]
struct FlashSeen {
    id: String,
    end_ns: i64,
    ra_deg: f64,
    dec_deg: f64,
    match_deg: f64,
}

/// Truth sources against flashes: a source is found by the nearest flash within the engine's merge radius
/// ending within `TRUTH_WINDOW_S` of its reference time.
#[derive(Debug, Serialize)]
struct TruthSummary {
    sources: usize,
    found: usize,
    missed: Vec<usize>,
    flashes_unmatched: usize,
    matches: Vec<TruthMatch>,
}

#[derive(Debug, Serialize)]
struct TruthMatch {
    index: usize,
    kind: String,
    alert: String,
    dt_s: f64,
    separation_deg: f64,
}

/// Flashes end at most the longest timescale after a burst's reference time, and a burst's photons come
/// at most its emission window before it; two minutes either way covers the default ladder.
const TRUTH_WINDOW_S: f64 = 120.0;

fn read_truth(path: &std::path::Path) -> anyhow::Result<Vec<TruthLine>> {
    let text = std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    let mut out = Vec::new();
    for (i, line) in text.lines().enumerate().filter(|(_, l)| !l.trim().is_empty()) {
        let t: TruthLine = serde_json::from_str(line)
            .with_context(|| format!("{} line {}: not a truth record", path.display(), i + 1))?;
        if t.ra_deg.is_some() && t.dec_deg.is_some() && t.kind != "steady" {
            out.push(t);
        }
    }
    Ok(out)
}

fn match_truth(truth: &[TruthLine], flashes: &[FlashSeen]) -> TruthSummary {
    let mut used = vec![false; flashes.len()];
    let mut matches = Vec::new();
    let mut missed = Vec::new();
    for t in truth {
        let (Some(ra), Some(dec)) = (t.ra_deg, t.dec_deg) else {
            continue;
        };
        let best = flashes
            .iter()
            .enumerate()
            .map(|(i, f)| (i, f, glint_sim::sky::separation_deg(ra, dec, f.ra_deg, f.dec_deg)))
            .filter(|(_, f, sep)| {
                *sep <= f.match_deg && ((f.end_ns - t.t_gps_ns) as f64 * 1e-9).abs() <= TRUTH_WINDOW_S
            })
            .min_by(|a, b| a.2.total_cmp(&b.2));
        match best {
            Some((i, f, sep)) => {
                used[i] = true;
                matches.push(TruthMatch {
                    index: t.index,
                    kind: t.kind.clone(),
                    alert: f.id.clone(),
                    dt_s: (f.end_ns - t.t_gps_ns) as f64 * 1e-9,
                    separation_deg: sep,
                });
            }
            None => missed.push(t.index),
        }
    }
    TruthSummary {
        sources: truth.len(),
        found: matches.len(),
        missed,
        flashes_unmatched: used.iter().filter(|u| !**u).count(),
        matches,
    }
}

/// Two input files whose photons overlap in time for the same instrument: the later file's photons before
/// the earlier file's end reach the engine late. Replay says so instead of counting them silently.
#[derive(Debug, Serialize)]
struct Overlap {
    file: String,
    overlaps: String,
    instrument: String,
    seconds: f64,
}

/// The replay's closing line.
#[derive(Debug, Serialize)]
struct Summary {
    schema_version: u32,
    kind: &'static str,
    files: usize,
    photons: u64,
    refused_photons: u64,
    refused_frames: u64,
    late_photons: u64,
    overlapping_files: u64,
    overlaps: Vec<Overlap>,
    live_seconds: f64,
    dead_seconds: f64,
    alerts: BTreeMap<&'static str, u64>,
    verdicts: BTreeMap<&'static str, u64>,
    wall_seconds: f64,
    photons_per_second: f64,
    /// `--far-per-year` when given (every field is present: null otherwise).
    far_per_year: Option<f64>,
    /// The match against `--truth` when given.
    truth: Option<TruthSummary>,
}

struct Out {
    stdout: BufWriter<std::io::StdoutLock<'static>>,
    file: Option<BufWriter<File>>,
    quiet: bool,
}

impl Out {
    fn alert(&mut self, line: &str) -> std::io::Result<()> {
        if !self.quiet {
            writeln!(self.stdout, "{line}")?;
        }
        if let Some(f) = &mut self.file {
            writeln!(f, "{line}")?;
        }
        Ok(())
    }
}

/// Runs `glint replay`.
pub(crate) fn run(args: &ReplayArgs) -> anyhow::Result<ExitCode> {
    let mut cfg = config_or_exit(args.config.as_ref())?;
    crate::logging::init(&cfg.daemon.log_level, cfg.daemon.log_format);
    if let Some(far) = args.far_per_year {
        if !(far.is_finite() && far > 0.0) {
            anyhow::bail!("--far-per-year must be a positive number, got {far}");
        }
        for inst in &mut cfg.instruments {
            inst.search.far_per_year = far;
        }
    }
    let truth = args.truth.as_deref().map(read_truth).transpose()?;
    let mut flashes_seen: Vec<FlashSeen> = Vec::new();
    let file = match &args.alerts_out {
        Some(p) => Some(BufWriter::new(
            File::create(p).with_context(|| format!("creating {}", p.display()))?,
        )),
        None => None,
    };
    let mut out = Out {
        stdout: BufWriter::new(std::io::stdout().lock()),
        file,
        quiet: args.quiet,
    };
    let mut drivers: BTreeMap<String, InstrumentDriver> = BTreeMap::new();
    let mut seq = Sequencer::starting_at(1);
    let mut alerts_by_kind: BTreeMap<&'static str, u64> = BTreeMap::new();
    let mut verdicts: BTreeMap<&'static str, u64> = BTreeMap::new();
    let mut findings: Vec<Finding> = Vec::new();
    let started = Instant::now();
    let photons = args.photons;

    let mut emit =
        |id: &str, d: &InstrumentDriver, found: &mut Vec<Finding>, out: &mut Out| -> anyhow::Result<()> {
            for f in found.drain(..) {
                // Event time, not wall time, so replays are reproducible.
                let issued = d.watermark_ns().unwrap_or(0);
                let alert = seq.assign(id, &f, issued);
                if let Finding::Flash(fl) = &f {
                    let r = fl.search_radius_deg;
                    flashes_seen.push(FlashSeen {
                        id: alert.id.clone(),
                        end_ns: fl.end_ns,
                        ra_deg: fl.ra_deg,
                        dec_deg: fl.dec_deg,
                        match_deg: (3.0 * r).max(r + 1.0),
                    });
                }
                *alerts_by_kind.entry(alerts::kind_name(alert.kind)).or_default() += 1;
                if let Some(a) = &alert.assessment {
                    *verdicts.entry(alerts::verdict_name(a.verdict)).or_default() += 1;
                }
                let json = alerts::alert_json_with(&alert, alerts::JsonOptions { photons });
                out.alert(&json.to_string())?;
            }
            Ok(())
        };

    let total_bytes: u64 = args
        .files
        .iter()
        .map(|p| std::fs::metadata(p).map(|m| m.len()).unwrap_or(0))
        .sum();
    let mut bytes_before = 0u64;
    let mut photons_read = 0u64;
    let every = std::time::Duration::from_secs_f64(args.progress_every.clamp(0.0, 86_400.0));
    let mut progress = Progress::new("replay", args.quiet, every);
    // Photon time span of every file read so far, per instrument: (file, first, last).
    let mut spans: BTreeMap<String, Vec<(String, i64, i64)>> = BTreeMap::new();
    let mut overlaps: Vec<Overlap> = Vec::new();

    for path in &args.files {
        // The error names the file already.
        let mut reader =
            InputFrames::open(path, &cfg, args.instrument.as_deref(), cfg.daemon.max_frame_bytes)?;
        let mut current: Option<String> = args.instrument.clone();
        let mut file_spans: BTreeMap<String, (i64, i64)> = BTreeMap::new();
        while let Some(frame) = reader.next() {
            let frame = frame.with_context(|| format!("reading {}", path.display()))?;
            if let Some(Body::Hello(h)) = &frame.body {
                if args.instrument.is_none() {
                    current = Some(h.instrument.clone());
                }
            }
            let Some(id) = current.clone() else {
                anyhow::bail!(
                    "{}: the recording does not start with a Hello; give --instrument",
                    path.display()
                );
            };
            if !drivers.contains_key(&id) {
                let inst = cfg.instrument(&id).with_context(|| {
                    format!(
                        "{}: instrument '{id}' is not in {} (give --instrument or --config)",
                        path.display(),
                        cfg.source_name
                    )
                })?;
                drivers.insert(id.clone(), InstrumentDriver::new(inst, !args.no_search)?);
                // A fresh driver has seen no stream yet: its first Hello is not a break.
                if matches!(frame.body, Some(Body::Hello(_))) {
                    continue;
                }
            }
            if let Some(Body::Batch(b)) = &frame.body {
                if let (Some(lo), Some(hi)) = (b.time_gps_ns.iter().min(), b.time_gps_ns.iter().max()) {
                    let e = file_spans.entry(id.clone()).or_insert((*lo, *hi));
                    *e = (e.0.min(*lo), e.1.max(*hi));
                    photons_read += b.time_gps_ns.len() as u64;
                    let done = (bytes_before + reader.bytes_done()) as f64 / total_bytes.max(1) as f64;
                    progress.update(photons_read, Some(*hi), Some(done));
                }
            }
            let Some(d) = drivers.get_mut(&id) else { continue };
            if let Err(r) = d.on_frame(&frame, &mut findings) {
                tracing::warn!(file = %path.display(), seq = r.seq, code = ?r.code, "frame refused: {}", r.detail);
            }
            emit(&id, d, &mut findings, &mut out)?;
        }
        bytes_before += reader.size();
        let name = path.display().to_string();
        for (id, (lo, hi)) in file_spans {
            let earlier = spans.entry(id.clone()).or_default();
            if let Some((prev, _, prev_hi)) = earlier.iter().filter(|e| e.2 > lo).max_by_key(|e| e.2) {
                let seconds = (prev_hi.min(&hi) - lo) as f64 / 1e9;
                tracing::warn!(
                    file = %name,
                    earlier = %prev,
                    instrument = %id,
                    "recordings overlap in time by {seconds:.3} s: photons before {} reach the engine late",
                    crate::timefmt::gps_ns_to_utc(*prev_hi)
                );
                overlaps.push(Overlap {
                    file: name.clone(),
                    overlaps: prev.clone(),
                    instrument: id.clone(),
                    seconds,
                });
            }
            earlier.push((name.clone(), lo, hi));
        }
    }
    progress.finish();
    for (id, d) in &mut drivers {
        d.finish(&mut findings);
        emit(id, d, &mut findings, &mut out)?;
    }

    let wall = started.elapsed().as_secs_f64();
    let mut s = Summary {
        schema_version: alerts::JSON_SCHEMA_VERSION,
        kind: "summary",
        files: args.files.len(),
        photons: 0,
        refused_photons: 0,
        refused_frames: 0,
        late_photons: 0,
        overlapping_files: overlaps.len() as u64,
        overlaps,
        live_seconds: 0.0,
        dead_seconds: 0.0,
        alerts: alerts_by_kind,
        verdicts,
        wall_seconds: wall,
        photons_per_second: 0.0,
        far_per_year: args.far_per_year,
        truth: truth.as_ref().map(|t| match_truth(t, &flashes_seen)),
    };
    for d in drivers.values() {
        let c = d.counters();
        let e = d.engine_stats();
        s.photons += c.photons;
        s.refused_photons += c.refused_photons;
        s.refused_frames += c.refused_frames;
        s.late_photons += e.late;
        s.live_seconds += e.live_ns as f64 / 1e9;
        s.dead_seconds += e.dead_ns as f64 / 1e9;
    }
    s.photons_per_second = if wall > 0.0 { s.photons as f64 / wall } else { 0.0 };
    writeln!(out.stdout, "{}", serde_json::to_string(&s)?)?;
    out.stdout.flush()?;
    if let Some(f) = &mut out.file {
        f.flush()?;
    }
    Ok(ExitCode::SUCCESS)
}
