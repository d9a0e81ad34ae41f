//! The tuning report's figures, each drawn once per backend with plotters: SVG for the web, PNG (the
//! bitmap backend, encoded here) for everything else. The font is the one compiled into the binary for the
//! email light curves (`deploy/fonts/`), so a bare host renders the same pictures.

use std::path::Path;

use plotters::coord::Shift;
use plotters::prelude::*;

use super::analyse::Report;

/// Width and height of every figure, pixels.
const W: u32 = 1000;
const H: u32 = 600;

/// Why a figure could not be drawn or written.
#[derive(Debug, thiserror::Error)]
pub(crate) enum PlotError {
    #[error("the embedded font does not load")]
    Font,
    #[error("drawing {0}: {1}")]
    Draw(&'static str, String),
    #[error("writing {0}: {1}")]
    Io(String, std::io::Error),
    #[error("encoding {0} as PNG: {1}")]
    Png(&'static str, png::EncodingError),
}

type DrawResult = Result<(), String>;

fn e<E: std::fmt::Debug>(x: E) -> String {
    format!("{x:?}")
}

/// Every figure's legend: the series labels in a framed, half-transparent box at `at`.
fn legend<'a, DB: DrawingBackend + 'a, CT: plotters::coord::CoordTranslate>(
    c: &mut ChartContext<'a, DB, CT>,
    at: SeriesLabelPosition,
) -> DrawResult {
    c.configure_series_labels()
        .position(at)
        .background_style(WHITE.mix(0.8))
        .border_style(BLACK)
        .label_font(("sans-serif", 12))
        .draw()
        .map_err(e)
}

const COLOURS: [RGBColor; 8] = [
    RGBColor(31, 119, 180),
    RGBColor(255, 127, 14),
    RGBColor(44, 160, 44),
    RGBColor(214, 39, 40),
    RGBColor(148, 103, 189),
    RGBColor(140, 86, 75),
    RGBColor(227, 119, 194),
    RGBColor(127, 127, 127),
];

fn colour(i: usize) -> RGBColor {
    COLOURS[i % COLOURS.len()]
}

/// Draws `name` with `f` on both backends and writes `<dir>/<name>.svg` and `.png`.
fn both(
    dir: &Path,
    name: &'static str,
    f_svg: &dyn Fn(&DrawingArea<SVGBackend<'_>, Shift>) -> DrawResult,
    f_png: &dyn Fn(&DrawingArea<BitMapBackend<'_>, Shift>) -> DrawResult,
) -> Result<(), PlotError> {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (W, H)).into_drawing_area();
        root.fill(&WHITE).map_err(|x| PlotError::Draw(name, e(x)))?;
        f_svg(&root).map_err(|x| PlotError::Draw(name, x))?;
        root.present().map_err(|x| PlotError::Draw(name, e(x)))?;
    }
    let p = dir.join(format!("{name}.svg"));
    std::fs::write(&p, svg).map_err(|x| PlotError::Io(p.display().to_string(), x))?;
    let mut buf = vec![0u8; (W * H * 3) as usize];
    {
        let root = BitMapBackend::with_buffer(&mut buf, (W, H)).into_drawing_area();
        root.fill(&WHITE).map_err(|x| PlotError::Draw(name, e(x)))?;
        f_png(&root).map_err(|x| PlotError::Draw(name, x))?;
        root.present().map_err(|x| PlotError::Draw(name, e(x)))?;
    }
    let mut out = Vec::new();
    {
        let mut enc = png::Encoder::new(&mut out, W, H);
        enc.set_color(png::ColorType::Rgb);
        enc.set_depth(png::BitDepth::Eight);
        let mut w = enc.write_header().map_err(|x| PlotError::Png(name, x))?;
        w.write_image_data(&buf).map_err(|x| PlotError::Png(name, x))?;
    }
    let p = dir.join(format!("{name}.png"));
    std::fs::write(&p, out).map_err(|x| PlotError::Io(p.display().to_string(), x))?;
    Ok(())
}

/// One figure through both backends.
macro_rules! figure {
    ($dir:expr, $name:expr, $r:expr, $f:ident) => {
        both(
            $dir,
            $name,
            &|a: &DrawingArea<SVGBackend<'_>, Shift>| $f(a, $r),
            &|a: &DrawingArea<BitMapBackend<'_>, Shift>| $f(a, $r),
        )
    };
}

/// Writes every figure into `dir`; returns their base names.
pub(crate) fn write_all(dir: &Path, r: &Report) -> Result<Vec<&'static str>, PlotError> {
    if !crate::sinks::email::plot::font_ready() {
        return Err(PlotError::Font);
    }
    let mut names = vec!["trigger_rate", "pvalues"];
    figure!(dir, "trigger_rate", r, trigger_rate)?;
    figure!(dir, "pvalues", r, pvalues)?;
    if r.injections.is_some() {
        figure!(dir, "efficiency", r, efficiency)?;
        figure!(dir, "skymap", r, skymap)?;
        figure!(dir, "verdicts", r, verdicts)?;
        names.extend(["efficiency", "skymap", "verdicts"]);
    }
    Ok(names)
}

fn log_range(values: impl Iterator<Item = f64>, pad: f64) -> (f64, f64) {
    let (lo, hi) = values
        .filter(|v| v.is_finite() && *v > 0.0)
        .fold((f64::INFINITY, 0.0f64), |(a, b), v| (a.min(v), b.max(v)));
    if hi <= 0.0 {
        return (0.1, 10.0);
    }
    (lo / pad, hi * pad)
}

/// Left: tests crossing per hour against the per-seed threshold, per timescale, with the prediction.
/// Right: candidates per year against the configured false-alarm rate, calibrated and nominal bounds.
fn trigger_rate<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, r: &Report) -> DrawResult {
    let Some(bg) = r.background.first() else {
        return Ok(());
    };
    let (left, right) = root.split_horizontally(W / 2);
    let hours = (bg.live_seconds / 3600.0).max(1e-9);
    let xs = log_range(
        bg.timescales.iter().flat_map(|t| {
            t.levels
                .iter()
                .filter(|l| l.predicted >= 1e-3 || l.measured > 0)
                .map(|l| l.p)
        }),
        2.0,
    );
    let ys = log_range(
        bg.timescales.iter().flat_map(|t| {
            t.levels
                .iter()
                .flat_map(|l| [l.measured as f64 / hours, l.predicted / hours])
        }),
        3.0,
    );
    let mut c = ChartBuilder::on(&left)
        .caption("Tests crossing per hour (background)", ("sans-serif", 20))
        .margin(10)
        .x_label_area_size(40)
        .y_label_area_size(60)
        .build_cartesian_2d((xs.0..xs.1).log_scale(), (ys.0.max(1e-3)..ys.1).log_scale())
        .map_err(e)?;
    c.configure_mesh()
        .x_desc("per-seed p-value threshold")
        .y_desc("crossings per hour")
        .x_label_formatter(&|v| format!("{v:.0e}"))
        .y_label_formatter(&|v| format!("{v:.0e}"))
        .draw()
        .map_err(e)?;
    for (k, t) in bg.timescales.iter().enumerate() {
        let col = colour(k);
        c.draw_series(LineSeries::new(
            t.levels
                .iter()
                .filter(|l| l.predicted > 0.0)
                .map(|l| (l.p, l.predicted / hours)),
            col.stroke_width(1),
        ))
        .map_err(e)?
        .label(format!("{} s", t.timescale_s))
        .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 15, y)], col));
        c.draw_series(
            t.levels
                .iter()
                .filter(|l| l.measured > 0)
                .map(|l| Circle::new((l.p, l.measured as f64 / hours), 3, col.filled())),
        )
        .map_err(e)?;
    }
    legend(&mut c, SeriesLabelPosition::UpperLeft)?;
    let live_yr = bg.live_seconds / glint_engine::SECONDS_PER_YEAR;
    let pts: Vec<(f64, f64, f64)> = bg
        .far_levels
        .iter()
        .map(|l| {
            (
                l.far_per_year,
                l.candidates_calibrated as f64 / live_yr,
                l.candidates_nominal as f64 / live_yr,
            )
        })
        .collect();
    let xs = log_range(pts.iter().map(|p| p.0), 2.0);
    let ys = log_range(pts.iter().flat_map(|p| [p.0, p.1, p.2]), 3.0);
    let mut c = ChartBuilder::on(&right)
        .caption("Candidates per year vs configured FAR", ("sans-serif", 20))
        .margin(10)
        .x_label_area_size(40)
        .y_label_area_size(60)
        .build_cartesian_2d((xs.0..xs.1).log_scale(), (ys.0..ys.1).log_scale())
        .map_err(e)?;
    c.configure_mesh()
        .x_desc("configured false-alarm rate [1/yr]")
        .y_desc("measured [1/yr]")
        .x_label_formatter(&|v| format!("{v:.0e}"))
        .y_label_formatter(&|v| format!("{v:.0e}"))
        .draw()
        .map_err(e)?;
    c.draw_series(LineSeries::new(
        pts.iter().map(|p| (p.0, p.0)),
        BLACK.stroke_width(1),
    ))
    .map_err(e)?
    .label("prediction (measured = configured)")
    .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 15, y)], BLACK));
    let cal = if r.calibration.is_some() {
        "calibrated bound (what alerts use)"
    } else {
        "nominal bound (no calibration)"
    };
    c.draw_series(
        pts.iter()
            .filter(|p| p.1 > 0.0)
            .map(|p| Circle::new((p.0, p.1), 4, colour(0).filled())),
    )
    .map_err(e)?
    .label(cal)
    .legend(|(x, y)| Circle::new((x + 7, y), 4, colour(0).filled()));
    // Poisson 1 sigma bars on the calibrated counts.
    c.draw_series(
        bg.far_levels
            .iter()
            .filter(|l| l.candidates_calibrated > 0)
            .map(|l| {
                let n = l.candidates_calibrated as f64;
                PathElement::new(
                    vec![
                        (l.far_per_year, (n - n.sqrt()).max(0.5) / live_yr),
                        (l.far_per_year, (n + n.sqrt()) / live_yr),
                    ],
                    colour(0),
                )
            }),
    )
    .map_err(e)?;
    if r.calibration.is_some() {
        c.draw_series(
            pts.iter()
                .filter(|p| p.2 > 0.0)
                .map(|p| TriangleMarker::new((p.0, p.2), 4, colour(1).filled())),
        )
        .map_err(e)?
        .label("nominal bound F/(K R)")
        .legend(|(x, y)| TriangleMarker::new((x + 7, y), 4, colour(1).filled()));
    }
    legend(&mut c, SeriesLabelPosition::UpperLeft)?;
    Ok(())
}

/// Left: randomised p-values of the smallest timescale (flat under background). Right: tests by ln p on
/// every timescale against the Poisson prediction.
fn pvalues<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, r: &Report) -> DrawResult {
    let Some(bg) = r.background.first() else {
        return Ok(());
    };
    let Some(t0) = bg.timescales.first() else {
        return Ok(());
    };
    let (left, right) = root.split_horizontally(W / 2);
    let nb = t0.randomised_hist.len().max(1);
    let total: u64 = t0.randomised_hist.iter().sum();
    let expect = total as f64 / nb as f64;
    let ymax = t0.randomised_hist.iter().copied().max().unwrap_or(1) as f64;
    let ymin = t0.randomised_hist.iter().copied().min().unwrap_or(0) as f64;
    let sd0 = (total as f64 / nb as f64).sqrt();
    // Zoomed on the flat level: +-5 sigma or the data, whichever is wider.
    let (ylo, yhi) = (
        (ymin - sd0).min(total as f64 / nb as f64 - 5.0 * sd0).max(0.0),
        (ymax + sd0).max(total as f64 / nb as f64 + 5.0 * sd0),
    );
    let mut c = ChartBuilder::on(&left)
        .caption(
            format!(
                "Randomised p, {} s timescale (chi2/dof {:.1}/{})",
                t0.timescale_s, t0.randomised_chi2, t0.randomised_dof
            ),
            ("sans-serif", 18),
        )
        .margin(10)
        .x_label_area_size(40)
        .y_label_area_size(70)
        .build_cartesian_2d(0.0..1.0, ylo..yhi.max(ylo + 1.0))
        .map_err(e)?;
    c.configure_mesh()
        .x_desc("randomised p-value")
        .y_desc("tests")
        .y_label_formatter(&|v| format!("{v:.2e}"))
        .draw()
        .map_err(e)?;
    c.draw_series(t0.randomised_hist.iter().enumerate().map(|(i, &n)| {
        let a = i as f64 / nb as f64;
        Rectangle::new(
            [(a, ylo), (a + 1.0 / nb as f64, n as f64)],
            colour(0).mix(0.6).filled(),
        )
    }))
    .map_err(e)?;
    let sd = expect.sqrt();
    for (y, style) in [
        (expect, RED.stroke_width(2)),
        (expect - 3.0 * sd, RED.stroke_width(1)),
        (expect + 3.0 * sd, RED.stroke_width(1)),
    ] {
        c.draw_series(LineSeries::new(vec![(0.0, y), (1.0, y)], style))
            .map_err(e)?;
    }
    let bin = bg.ln_p_bin;
    let maxbin = bg
        .timescales
        .iter()
        .map(|t| t.ln_p_hist.iter().rposition(|&n| n > 0).unwrap_or(0))
        .max()
        .unwrap_or(0)
        + 2;
    let xmax = maxbin as f64 * bin / std::f64::consts::LN_10;
    let ys = log_range(
        bg.timescales
            .iter()
            .flat_map(|t| t.ln_p_hist.iter().map(|&n| n as f64)),
        3.0,
    );
    let mut c = ChartBuilder::on(&right)
        .caption("Tests by p-value, all timescales", ("sans-serif", 18))
        .margin(10)
        .x_label_area_size(40)
        .y_label_area_size(70)
        .build_cartesian_2d(0.0..xmax.max(1.0), (0.3..ys.1.max(10.0)).log_scale())
        .map_err(e)?;
    c.configure_mesh()
        .x_desc("-log10 p (per seed)")
        .y_desc("tests per bin")
        .y_label_formatter(&|v| format!("{v:.0e}"))
        .draw()
        .map_err(e)?;
    let last = bg.timescales.len().saturating_sub(1);
    for (k, t) in bg.timescales.iter().enumerate() {
        if k != 0 && k != last / 2 && k != last {
            continue;
        }
        let col = colour(k);
        let x = |i: usize| (i as f64 + 0.5) * bin / std::f64::consts::LN_10;
        c.draw_series(LineSeries::new(
            t.ln_p_hist_predicted
                .iter()
                .enumerate()
                .take(maxbin)
                .filter(|(_, v)| **v > 0.3)
                .map(|(i, v)| (x(i), *v)),
            col.stroke_width(1),
        ))
        .map_err(e)?
        .label(format!("{} s", t.timescale_s))
        .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 15, y)], col));
        c.draw_series(
            t.ln_p_hist
                .iter()
                .enumerate()
                .filter(|(_, n)| **n > 0)
                .map(|(i, n)| Circle::new((x(i), *n as f64), 2, col.filled())),
        )
        .map_err(e)?;
    }
    legend(&mut c, SeriesLabelPosition::UpperRight)?;
    Ok(())
}

/// Efficiency against distance: overall with binomial errors, per timescale, `glint reach`'s best
/// timescale, r50 and r90.
fn efficiency<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, r: &Report) -> DrawResult {
    let Some(inj) = &r.injections else { return Ok(()) };
    let xs = log_range(inj.distances.iter().map(|d| d.distance_pc), 1.3);
    let mut c = ChartBuilder::on(root)
        .caption(
            format!(
                "Detection efficiency, {} injections{}",
                inj.count,
                inj.zenith_deg
                    .map_or(" over the field of view".to_owned(), |z| format!(
                        " at zenith {z} deg"
                    ))
            ),
            ("sans-serif", 20),
        )
        .margin(10)
        .x_label_area_size(40)
        .y_label_area_size(50)
        .build_cartesian_2d((xs.0..xs.1).log_scale(), 0.0..1.05)
        .map_err(e)?;
    c.configure_mesh()
        .x_desc("distance [pc]")
        .y_desc("efficiency")
        .x_label_formatter(&|v| format!("{v:.3}"))
        .draw()
        .map_err(e)?;
    let k_all = r.search.ladder_s.len();
    for k in 0..k_all {
        let col = colour(k).mix(0.7);
        c.draw_series(LineSeries::new(
            inj.distances.iter().map(|d| (d.distance_pc, d.per_timescale[k])),
            col.stroke_width(1),
        ))
        .map_err(e)?
        .label(format!("{} s", r.search.ladder_s[k]))
        .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 15, y)], col));
    }
    c.draw_series(LineSeries::new(
        inj.distances.iter().map(|d| (d.distance_pc, d.efficiency)),
        BLACK.stroke_width(3),
    ))
    .map_err(e)?
    .label("overall (flash matched)")
    .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 15, y)], BLACK.stroke_width(3)));
    c.draw_series(inj.distances.iter().map(|d| {
        PathElement::new(
            vec![
                (d.distance_pc, (d.efficiency - d.sigma).max(0.0)),
                (d.distance_pc, (d.efficiency + d.sigma).min(1.0)),
            ],
            BLACK.stroke_width(2),
        )
    }))
    .map_err(e)?;
    let reach_best: Vec<(f64, f64)> = inj
        .distances
        .iter()
        .filter(|d| !d.reach_per_timescale.is_empty())
        .map(|d| {
            (
                d.distance_pc,
                d.reach_per_timescale.iter().copied().fold(0.0, f64::max),
            )
        })
        .collect();
    if !reach_best.is_empty() {
        c.draw_series(DashedLineSeries::new(reach_best, 6, 4, RED.stroke_width(2)))
            .map_err(e)?
            .label("glint reach, best timescale")
            .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 15, y)], RED.stroke_width(2)));
    }
    for (v, name) in [(inj.r50_pc, "r50"), (inj.r90_pc, "r90")] {
        if let Some(v) = v {
            c.draw_series(LineSeries::new(vec![(v, 0.0), (v, 1.0)], BLUE.stroke_width(1)))
                .map_err(e)?;
            c.draw_series(std::iter::once(Text::new(
                format!("{name} {v:.4} pc"),
                (v, if name == "r50" { 0.52 } else { 0.92 }),
                ("sans-serif", 14),
            )))
            .map_err(e)?;
        }
    }
    legend(&mut c, SeriesLabelPosition::UpperRight)?;
    Ok(())
}

/// Left: injected positions (filled: detected, open: missed) and recovered ones (crosses, joined by a line),
/// in RA offset from the field's mean RA against Dec. Right: recovered minus injected position of every
/// detected injection, degrees on the sky, with the search radius.
fn skymap<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, r: &Report) -> DrawResult {
    let Some(inj) = &r.injections else { return Ok(()) };
    let (left, right) = root.split_horizontally(W * 3 / 5);
    let (sx, sy) = inj.outcomes.iter().fold((0.0, 0.0), |(x, y), o| {
        let (s, c) = o.injection.ra_deg.to_radians().sin_cos();
        (x + c, y + s)
    });
    let centre = sy.atan2(sx).to_degrees().rem_euclid(360.0);
    let off = |ra: f64| (ra - centre + 540.0).rem_euclid(360.0) - 180.0;
    let (xlo, xhi, dlo, dhi) =
        inj.outcomes
            .iter()
            .fold((0.0f64, 0.0f64, 90.0f64, -90.0f64), |(a, b, c, d), o| {
                let x = off(o.injection.ra_deg);
                (
                    a.min(x),
                    b.max(x),
                    c.min(o.injection.dec_deg),
                    d.max(o.injection.dec_deg),
                )
            });
    let mut c = ChartBuilder::on(&left)
        .caption("Injected (o) and recovered (x) positions", ("sans-serif", 20))
        .margin(10)
        .x_label_area_size(40)
        .y_label_area_size(50)
        .build_cartesian_2d(
            (xhi + 2.0)..(xlo - 2.0),
            (dlo - 2.0).max(-90.0)..(dhi + 2.0).min(90.0),
        )
        .map_err(e)?;
    c.configure_mesh()
        .x_desc(format!("RA - {centre:.1} [deg]"))
        .y_desc("Dec [deg]")
        .draw()
        .map_err(e)?;
    let mut offsets = Vec::new();
    for o in &inj.outcomes {
        let p = (off(o.injection.ra_deg), o.injection.dec_deg);
        if let (Some(ra), Some(dec)) = (o.recovered_ra_deg, o.recovered_dec_deg) {
            let q = (off(ra), dec);
            c.draw_series(std::iter::once(PathElement::new(vec![p, q], colour(3))))
                .map_err(e)?;
            c.draw_series(std::iter::once(Cross::new(q, 3, colour(3))))
                .map_err(e)?;
            c.draw_series(std::iter::once(Circle::new(p, 3, colour(0).filled())))
                .map_err(e)?;
            let dra = ((ra - o.injection.ra_deg + 540.0).rem_euclid(360.0) - 180.0)
                * o.injection.dec_deg.to_radians().cos();
            offsets.push((dra, dec - o.injection.dec_deg));
        } else {
            c.draw_series(std::iter::once(Circle::new(p, 3, colour(7))))
                .map_err(e)?;
        }
    }
    let rad = r.search.search_radius_deg;
    let lim = offsets
        .iter()
        .fold(rad, |m, (x, y)| m.max(x.abs()).max(y.abs()))
        .min(3.0 * rad)
        * 1.1;
    let mut c = ChartBuilder::on(&right)
        .caption(
            format!("Recovered - injected ({} detected)", offsets.len()),
            ("sans-serif", 18),
        )
        .margin(10)
        .x_label_area_size(40)
        .y_label_area_size(50)
        .build_cartesian_2d(-lim..lim, -lim..lim)
        .map_err(e)?;
    c.configure_mesh()
        .x_desc("dRA cos Dec [deg]")
        .y_desc("dDec [deg]")
        .draw()
        .map_err(e)?;
    c.draw_series(LineSeries::new(
        (0..=100).map(|i| {
            let a = f64::from(i) / 100.0 * std::f64::consts::TAU;
            (rad * a.cos(), rad * a.sin())
        }),
        BLACK.stroke_width(1),
    ))
    .map_err(e)?
    .label("search radius")
    .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 15, y)], BLACK));
    c.draw_series(offsets.iter().map(|&p| Cross::new(p, 3, colour(3))))
        .map_err(e)?;
    legend(&mut c, SeriesLabelPosition::UpperRight)?;
    Ok(())
}

/// The verdicts the detected injections got, per distance.
fn verdicts<DB: DrawingBackend>(root: &DrawingArea<DB, Shift>, r: &Report) -> DrawResult {
    let Some(inj) = &r.injections else { return Ok(()) };
    let names: Vec<String> = inj.verdicts.keys().cloned().collect();
    let ymax = inj.verdicts.values().copied().max().unwrap_or(1) as f64 * 1.2;
    let n = names.len().max(1);
    let mut c = ChartBuilder::on(root)
        .caption(
            format!(
                "Verdicts of {} detected injections",
                inj.verdicts.values().sum::<u64>()
            ),
            ("sans-serif", 20),
        )
        .margin(10)
        .x_label_area_size(40)
        .y_label_area_size(50)
        .build_cartesian_2d(0.0..n as f64, 0.0..ymax.max(1.0))
        .map_err(e)?;
    c.configure_mesh()
        .disable_x_mesh()
        .x_labels(0)
        .y_desc("injections")
        .draw()
        .map_err(e)?;
    // Stacked by distance, nearest at the bottom.
    let ds: Vec<f64> = inj.distances.iter().map(|d| d.distance_pc).collect();
    for (i, name) in names.iter().enumerate() {
        let mut base = 0.0;
        for (j, &d) in ds.iter().enumerate() {
            let cnt = inj
                .outcomes
                .iter()
                .filter(|o| o.detected && (o.injection.distance_pc - d).abs() < 1e-12)
                .filter(|o| o.verdict.clone().unwrap_or_else(|| "not assessed".into()) == *name)
                .count() as f64;
            if cnt > 0.0 {
                c.draw_series(std::iter::once(Rectangle::new(
                    [(i as f64 + 0.15, base), (i as f64 + 0.85, base + cnt)],
                    colour(j).mix(0.8).filled(),
                )))
                .map_err(e)?;
            }
            base += cnt;
        }
        c.draw_series(std::iter::once(Text::new(
            format!("{name} ({base})"),
            (i as f64 + 0.2, base + ymax * 0.03),
            ("sans-serif", 16),
        )))
        .map_err(e)?;
    }
    for (j, &d) in ds.iter().enumerate() {
        let col = colour(j);
        c.draw_series(std::iter::once(Rectangle::new(
            [(0.0, 0.0), (0.0, 0.0)],
            col.filled(),
        )))
        .map_err(e)?
        .label(format!("{d} pc"))
        .legend(move |(x, y)| Rectangle::new([(x, y - 5), (x + 10, y + 5)], col.filled()));
    }
    legend(&mut c, SeriesLabelPosition::UpperRight)?;
    Ok(())
}
