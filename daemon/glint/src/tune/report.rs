//! `report.md` and `report.json` of a tuning run: the analysis written out, in words and tables for people
//! and as one JSON object for scripts, with the figures beside them.

use std::fmt::Write as _;
use std::path::Path;

use super::analyse::Report;
use super::plot;

/// Why the report could not be written.
#[derive(Debug, thiserror::Error)]
pub(crate) enum ReportError {
    #[error("writing {0}: {1}")]
    Io(String, std::io::Error),
    #[error("serialising the report: {0}")]
    Json(#[from] serde_json::Error),
    #[error(transparent)]
    Plot(#[from] plot::PlotError),
}

fn fmt_opt(x: Option<f64>, unit: &str) -> String {
    x.map_or_else(|| "not reached".to_owned(), |v| format!("{v:.4} {unit}"))
}

/// The markdown text of the report.
pub(crate) fn markdown(r: &Report, figures: &[&str], header: &str) -> String {
    let mut m = String::new();
    let s = &r.search;
    let _ = writeln!(m, "# glint tuning report: {}\n", s.instrument);
    let _ = writeln!(m, "{header}\n");
    let _ = writeln!(
        m,
        "Search: ladder {:?} s, radius {} deg, configured false-alarm rate {} per year. Live time {:.1} s \
         ({:.3} h, dead time removed). Calibration: {}.\n",
        s.ladder_s,
        s.search_radius_deg,
        s.far_per_year,
        r.live_seconds,
        r.live_seconds / 3600.0,
        r.calibration.as_deref().unwrap_or("none (nominal trials K x R)")
    );
    for bg in &r.background {
        let _ = writeln!(
            m,
            "## Background, {}\n\n{:.1} s live, {:.1} s dead, all-sky rate {:.1} Hz, {} flashes at the configured rate.\n",
            bg.name, bg.live_seconds, bg.dead_seconds, bg.rate_hz, bg.flashes
        );
        let _ = writeln!(
            m,
            "Candidates (seeds below the bound, clustered like the engine's candidates) against the configured \
             false-alarm rate F; the calibrated search promises F x live time.\n"
        );
        let _ = writeln!(
            m,
            "| F [1/yr] | p nominal | found | p calibrated | found | expected | z |"
        );
        let _ = writeln!(m, "|---|---|---|---|---|---|---|");
        for l in bg
            .far_levels
            .iter()
            .filter(|l| l.expected >= 0.5 || l.candidates_calibrated > 0)
        {
            let _ = writeln!(
                m,
                "| {:.2e} | {:.2e} | {} | {:.2e} | {} | {:.1} | {:+.1} |",
                l.far_per_year,
                l.p_nominal,
                l.candidates_nominal,
                l.p_calibrated,
                l.candidates_calibrated,
                l.expected,
                l.z
            );
        }
        let _ = writeln!(
            m,
            "\nPer timescale: tests crossing a per-seed bound p, measured against the sum over tests of \
             P(N >= n*(b) - 1 | b); sigma from the squared sizes of clusters of crossings. Randomised p-values \
             (P(N > m) + U P(N = m), uniform under background) checked against flat with chi-square.\n"
        );
        let (p0, p1) = bg.timescales.first().map_or((f64::NAN, f64::NAN), |t| {
            (
                t.levels.first().map_or(f64::NAN, |l| l.p),
                t.levels.get(4).map_or(f64::NAN, |l| l.p),
            )
        });
        let _ = writeln!(
            m,
            "| timescale [s] | tests | p <= {p0:.1e}: found / predicted (z) | p <= {p1:.1e} | randomised chi2/dof (p) |"
        );
        let _ = writeln!(m, "|---|---|---|---|---|");
        for t in &bg.timescales {
            let at = |i: usize| {
                t.levels.get(i).map_or("-".to_owned(), |l| {
                    format!("{} / {:.1} ({:+.1})", l.measured, l.predicted, l.z)
                })
            };
            let _ = writeln!(
                m,
                "| {} | {} | {} | {} | {:.1}/{} ({:.2}) |",
                t.timescale_s,
                t.tests,
                at(0),
                at(4),
                t.randomised_chi2,
                t.randomised_dof,
                t.randomised_p
            );
        }
        m.push('\n');
    }
    if let Some(inj) = &r.injections {
        let _ = writeln!(
            m,
            "## Injections\n\n{} evaporation bursts in {} passes, {}. r50 {}, r90 {}, effective volume {:.3e} pc^3. \
             Distance fit: {} converged, 90% interval covering the truth in {}.\n",
            inj.count,
            inj.passes,
            inj.zenith_deg
                .map_or("uniform over the field of view".to_owned(), |z| format!(
                    "at zenith {z} deg"
                )),
            fmt_opt(inj.r50_pc, "pc"),
            fmt_opt(inj.r90_pc, "pc"),
            inj.effective_volume_pc3,
            inj.fits,
            inj.fit_coverage
                .map_or("-".to_owned(), |c| format!("{:.1}%", 100.0 * c))
        );
        let _ = writeln!(
            m,
            "| distance [pc] | injected | detected | efficiency | best timescale | glint reach (best) | fits covering | median fit [pc] |"
        );
        let _ = writeln!(m, "|---|---|---|---|---|---|---|---|");
        for d in &inj.distances {
            let best = d.per_timescale.iter().copied().fold(0.0, f64::max);
            let reach = d.reach_per_timescale.iter().copied().fold(0.0, f64::max);
            let _ = writeln!(
                m,
                "| {} | {} | {} | {:.3} ± {:.3} | {:.3} | {:.3} | {}/{} | {} |",
                d.distance_pc,
                d.injected,
                d.detected,
                d.efficiency,
                d.sigma,
                best,
                reach,
                d.fits_covering,
                d.fits,
                d.median_fitted_pc.map_or("-".to_owned(), |x| format!("{x:.4}"))
            );
        }
        let _ = writeln!(m, "\nr50 per timescale:");
        for (t, r50) in s.ladder_s.iter().zip(&inj.r50_per_timescale_pc) {
            let _ = write!(m, " {t} s: {};", fmt_opt(*r50, "pc"));
        }
        let _ = writeln!(m, "\n\nVerdicts of the detected injections:");
        for (v, n) in &inj.verdicts {
            let _ = write!(m, " {v} {n};");
        }
        m.push_str("\n\n");
    }
    if !r.limits.is_empty() {
        let _ = writeln!(
            m,
            "## Upper limit on the local burst rate density\n\nNo burst seen in {:.3} h of live time: \
             rho_UL = mu_UL / (V_eff T) (docs/science.md section 5).\n",
            r.live_seconds / 3600.0
        );
        let _ = writeln!(m, "| CL | mu_UL | rho_UL [pc^-3 yr^-1] |\n|---|---|---|");
        for l in &r.limits {
            let _ = writeln!(
                m,
                "| {:.0}% | {:.3} | {:.3e} |",
                100.0 * l.cl,
                l.mu,
                l.per_pc3_per_yr
            );
        }
        let _ = writeln!(
            m,
            "\nFor context, published 99% limits from real searches lie between about {:.0e} and {:.0e} \
             pc^-3 yr^-1 (docs/science.md section 5).\n",
            r.published_99_range_per_pc3_yr.0, r.published_99_range_per_pc3_yr.1
        );
    }
    if !figures.is_empty() {
        m.push_str("## Figures\n\n");
        for f in figures {
            let _ = writeln!(m, "![{f}]({f}.png)\n");
        }
    }
    m
}

/// Writes `report.md`, `report.json` and the figures into `dir` (created if needed).
pub(crate) fn write(dir: &Path, r: &Report, header: &str) -> Result<(), ReportError> {
    let io = |p: &Path, e| ReportError::Io(p.display().to_string(), e);
    std::fs::create_dir_all(dir).map_err(|e| io(dir, e))?;
    let figures = plot::write_all(dir, r)?;
    let p = dir.join("report.json");
    std::fs::write(&p, serde_json::to_string_pretty(r)?).map_err(|e| io(&p, e))?;
    let p = dir.join("report.md");
    std::fs::write(&p, markdown(r, &figures, header)).map_err(|e| io(&p, e))?;
    Ok(())
}
