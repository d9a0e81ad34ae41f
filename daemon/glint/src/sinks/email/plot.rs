//! The light curve attached to an alert email: the trigger's photons binned over its window, the expected
//! background level, and the fitted evaporation curve when the assessment has one, drawn with plotters'
//! bitmap backend and encoded as PNG. The font (DejaVu Sans, `deploy/fonts/`) is compiled into the binary,
//! so a bare host with no fonts or fontconfig renders the same picture.

use std::sync::OnceLock;

use glint_science::hawking;
use glint_science::instrument::InstrumentResponse;
use glint_wire::pb;
use plotters::prelude::*;
use plotters::style::{FontStyle, register_font};

/// Width and height of the attached PNG, pixels.
pub(crate) const WIDTH: u32 = 900;
/// Height of the attached PNG, pixels.
pub(crate) const HEIGHT: u32 = 500;

/// DejaVu Sans, shipped in the repository with its licence (`deploy/fonts/DejaVuSans-LICENSE.txt`).
static FONT: &[u8] = include_bytes!("../../../../../deploy/fonts/DejaVuSans.ttf");

/// Why a light curve could not be drawn.
#[derive(Debug, thiserror::Error)]
pub(crate) enum PlotError {
    /// The embedded font did not load.
    #[error("the embedded font does not load")]
    Font,
    /// Drawing failed.
    #[error("drawing the light curve: {0}")]
    Draw(String),
    /// PNG encoding failed.
    #[error("encoding the light curve as PNG: {0}")]
    Png(#[from] png::EncodingError),
}

pub(crate) fn font_ready() -> bool {
    static READY: OnceLock<bool> = OnceLock::new();
    *READY.get_or_init(|| register_font("sans-serif", FontStyle::Normal, FONT).is_ok())
}

fn draw_err<E: std::fmt::Debug>(e: E) -> PlotError {
    PlotError::Draw(format!("{e:?}"))
}

/// Expected photons per bin of `[a, b]` (seconds from the window end) under the fit: the trigger's
/// background spread evenly, plus the burst. With the instrument's response the burst is the exact detected
/// count of a black hole at the fitted distance exploding at the fitted time
/// ([`glint_science::hawking::detected_counts_between`], the model the fit itself uses; all of it taken as
/// inside the disc). Without it, the fitted signal count is shared out over the window as the emitted rate
/// `(t_explosion - t)^(-1/2)` (docs/science.md section 2). Either way it stops dead at the explosion.
fn fitted_counts(
    fit: &pb::EvaporationFit,
    t: &pb::Trigger,
    response: Option<&InstrumentResponse>,
    a: f64,
    b: f64,
) -> f64 {
    let window = (t.end_gps_ns - t.start_gps_ns) as f64 / 1e9;
    if window <= 0.0 {
        return 0.0;
    }
    let te = (fit.explosion_gps_ns - t.end_gps_ns) as f64 / 1e9;
    let clip = |x: f64, y: f64| (x.min(te), y.min(te));
    let background = t.background * (b - a) / window;
    let signal = match response {
        Some(r) if fit.distance_pc > 0.0 => {
            let (x, y) = clip(a, b);
            if y <= x {
                0.0
            } else {
                hawking::detected_counts_between(r, t.zenith_deg, fit.distance_pc, te - y, te - x)
                    .unwrap_or(0.0)
            }
        }
        _ => {
            // Integral of (te - t)^(-1/2) from x to y (both before te) is 2 (sqrt(te - x) - sqrt(te - y)).
            let integral = |x: f64, y: f64| {
                let (x, y) = clip(x, y);
                if y <= x {
                    0.0
                } else {
                    2.0 * ((te - x).sqrt() - (te - y).sqrt())
                }
            };
            let whole = integral(-window, 0.0);
            if whole > 0.0 {
                fit.signal_counts * integral(a, b) / whole
            } else {
                0.0
            }
        }
    };
    background + signal
}

/// Draws the light curve of an alert as a PNG of [`WIDTH`] x [`HEIGHT`]; `response` is the instrument's,
/// when known, for the shape of the fitted curve. An alert without photons (a test, a withdrawal of one)
/// gets a frame saying so.
pub(crate) fn light_curve_png(
    a: &pb::Alert,
    response: Option<&InstrumentResponse>,
) -> Result<Vec<u8>, PlotError> {
    if !font_ready() {
        return Err(PlotError::Font);
    }
    let mut buf = vec![255u8; (WIDTH * HEIGHT * 3) as usize];
    {
        let root = BitMapBackend::with_buffer(&mut buf, (WIDTH, HEIGHT)).into_drawing_area();
        root.fill(&WHITE).map_err(draw_err)?;
        let trigger = a
            .trigger
            .as_ref()
            .filter(|t| a.kind != pb::AlertKind::Test as i32 && t.end_gps_ns > t.start_gps_ns);
        match trigger {
            Some(t) => draw_curve(&root, a, t, response)?,
            None => {
                let what = if a.kind == pb::AlertKind::Test as i32 {
                    "TEST alert: no photons, no science"
                } else {
                    "This alert carries no photons"
                };
                root.draw(&Text::new(
                    what,
                    (40, (HEIGHT / 2) as i32),
                    ("sans-serif", 30).into_font().color(&BLACK),
                ))
                .map_err(draw_err)?;
                root.draw(&Text::new(
                    format!("{} ({})", a.id, a.issued_utc),
                    (40, (HEIGHT / 2 + 45) as i32),
                    ("sans-serif", 18).into_font().color(&BLACK),
                ))
                .map_err(draw_err)?;
            }
        }
        root.present().map_err(draw_err)?;
    }
    let mut out = Vec::new();
    {
        let mut enc = png::Encoder::new(&mut out, WIDTH, HEIGHT);
        enc.set_color(png::ColorType::Rgb);
        enc.set_depth(png::BitDepth::Eight);
        let mut w = enc.write_header()?;
        w.write_image_data(&buf)?;
    }
    Ok(out)
}

fn draw_curve<DB: DrawingBackend>(
    root: &DrawingArea<DB, plotters::coord::Shift>,
    a: &pb::Alert,
    t: &pb::Trigger,
    response: Option<&InstrumentResponse>,
) -> Result<(), PlotError> {
    let window = (t.end_gps_ns - t.start_gps_ns) as f64 / 1e9;
    let n = t.photon_time_gps_ns.len();
    // Enough bins to show a shape, few enough that each holds a few photons.
    let bins = ((n as f64).sqrt() * 3.0).round().clamp(10.0, 50.0) as usize;
    let width = window / bins as f64;
    let mut counts = vec![0u32; bins];
    for &ns in &t.photon_time_gps_ns {
        let x = (ns - t.start_gps_ns) as f64 / 1e9;
        let i = ((x / width).floor().max(0.0) as usize).min(bins - 1);
        counts[i] += 1;
    }
    let background_per_bin = t.background * width / window;
    let fit = a
        .assessment
        .as_ref()
        .and_then(|x| x.fit.as_ref())
        .filter(|f| f.converged);
    let edge = |i: usize| -window + i as f64 * width;
    let fitted: Vec<f64> = fit
        .map(|f| {
            (0..bins)
                .map(|i| fitted_counts(f, t, response, edge(i), edge(i + 1)))
                .collect()
        })
        .unwrap_or_default();
    let top = counts
        .iter()
        .map(|&c| f64::from(c))
        .chain(fitted.iter().copied())
        .chain([background_per_bin, 1.0])
        .fold(0.0, f64::max)
        * 1.25;
    let unit = if window < 1.0 { 1e3 } else { 1.0 };
    let unit_name = if window < 1.0 { "ms" } else { "s" };
    let title = format!(
        "{} {}  {}  {:.1} sigma",
        a.kind_label_for_plot(),
        a.instrument,
        t.end_utc.get(..23).unwrap_or(&t.end_utc),
        t.sigma
    );
    let mut chart = ChartBuilder::on(root)
        .caption(title, ("sans-serif", 22))
        .margin(18)
        .x_label_area_size(50)
        .y_label_area_size(60)
        .build_cartesian_2d(-window * unit..0.0, 0.0..top)
        .map_err(draw_err)?;
    chart
        .configure_mesh()
        .x_desc(format!("{unit_name} before the trigger window's end"))
        .y_desc(format!("photons per {:.3} {unit_name} bin", width * unit))
        .axis_desc_style(("sans-serif", 16))
        .label_style(("sans-serif", 14))
        .draw()
        .map_err(draw_err)?;
    let bar = RGBColor(70, 110, 190);
    chart
        .draw_series(counts.iter().enumerate().map(|(i, &c)| {
            Rectangle::new(
                [(edge(i) * unit, 0.0), (edge(i + 1) * unit, f64::from(c))],
                bar.mix(0.75).filled(),
            )
        }))
        .map_err(draw_err)?
        .label(format!("{n} photons in the search disc"))
        .legend(move |(x, y)| Rectangle::new([(x, y - 5), (x + 14, y + 5)], bar.filled()));
    let grey = RGBColor(90, 90, 90);
    chart
        .draw_series(LineSeries::new(
            [(-window * unit, background_per_bin), (0.0, background_per_bin)],
            grey.stroke_width(2),
        ))
        .map_err(draw_err)?
        .label(format!("expected background ({:.3} in the window)", t.background))
        .legend(move |(x, y)| PathElement::new([(x, y), (x + 14, y)], grey.stroke_width(2)));
    if let Some(f) = fit {
        let red = RGBColor(200, 40, 40);
        let steps = (0..bins).flat_map(|i| [(edge(i) * unit, fitted[i]), (edge(i + 1) * unit, fitted[i])]);
        chart
            .draw_series(LineSeries::new(steps, red.stroke_width(3)))
            .map_err(draw_err)?
            .label(format!(
                "evaporation fit: {:.4} pc, explosion {:+.3} s",
                f.distance_pc,
                (f.explosion_gps_ns - t.end_gps_ns) as f64 / 1e9
            ))
            .legend(move |(x, y)| PathElement::new([(x, y), (x + 14, y)], red.stroke_width(3)));
    }
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperLeft)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .label_font(("sans-serif", 15))
        .draw()
        .map_err(draw_err)?;
    Ok(())
}

/// The kind (and an assessment's verdict) as the plot's title shows it.
trait PlotLabel {
    fn kind_label_for_plot(&self) -> String;
}

impl PlotLabel for pb::Alert {
    fn kind_label_for_plot(&self) -> String {
        let kind = crate::alerts::kind_name(self.kind).to_uppercase();
        match &self.assessment {
            Some(x) => format!("{kind} {}", crate::alerts::verdict_name(x.verdict)),
            None => kind,
        }
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use super::*;

    #[test]
    fn fitted_counts_hold_the_fitted_totals() {
        let t = pb::Trigger {
            start_gps_ns: 0,
            end_gps_ns: 1_000_000_000,
            background: 2.0,
            ..Default::default()
        };
        let fit = pb::EvaporationFit {
            converged: true,
            explosion_gps_ns: 900_000_000,
            signal_counts: 20.0,
            background_counts: 2.0,
            ..Default::default()
        };
        let total: f64 = (0..100)
            .map(|i| {
                fitted_counts(
                    &fit,
                    &t,
                    None,
                    -1.0 + f64::from(i) * 0.01,
                    -1.0 + f64::from(i + 1) * 0.01,
                )
            })
            .sum();
        assert!((total - 22.0).abs() < 1e-9, "{total}");
        // Nothing but background after the explosion; the burst peaks just before it.
        assert!((fitted_counts(&fit, &t, None, -0.05, 0.0) - 0.1).abs() < 1e-12);
        assert!(fitted_counts(&fit, &t, None, -0.11, -0.1) > fitted_counts(&fit, &t, None, -0.5, -0.49));
    }

    #[test]
    fn with_the_response_the_burst_rises_to_the_explosion_and_stops() {
        let cfg = crate::config::Config::from_toml(
            crate::config::EMBEDDED_DEFAULT,
            "test",
            std::path::Path::new("."),
            false,
        )
        .unwrap();
        let r = &cfg.instruments[0].response;
        let t = pb::Trigger {
            start_gps_ns: 0,
            end_gps_ns: 10_000_000_000,
            background: 1.0,
            zenith_deg: 10.0,
            ..Default::default()
        };
        let fit = pb::EvaporationFit {
            converged: true,
            explosion_gps_ns: 9_000_000_000,
            distance_pc: 0.04,
            ..Default::default()
        };
        let bin = |a: f64| fitted_counts(&fit, &t, Some(r), a, a + 0.5);
        assert!(
            (bin(-0.5) - 0.05).abs() < 1e-12,
            "only background after the explosion"
        );
        assert!(bin(-1.5) > bin(-3.0) && bin(-3.0) > bin(-8.0) && bin(-8.0) > 0.05);
    }

    #[test]
    fn png_decodes_to_the_stated_size() {
        let a = pb::Alert {
            kind: pb::AlertKind::Flash as i32,
            trigger: Some(pb::Trigger {
                start_gps_ns: 0,
                end_gps_ns: 100_000_000,
                photon_time_gps_ns: (0..12).map(|i| 90_000_000 + i * 500_000).collect(),
                background: 0.4,
                ..Default::default()
            }),
            ..Default::default()
        };
        for alert in [a, pb::Alert::default()] {
            let bytes = light_curve_png(&alert, None).unwrap();
            let dec = png::Decoder::new(std::io::Cursor::new(bytes));
            let reader = dec.read_info().unwrap();
            assert_eq!((reader.info().width, reader.info().height), (WIDTH, HEIGHT));
        }
    }
}
