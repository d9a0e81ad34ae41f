//! Progress of long offline runs (replay, simulate, and any later campaign): on a terminal a bar redrawn in
//! place with photons, event time covered and an estimate of the time left; otherwise (a log file, a batch
//! job) one plain line every interval and a last one at the end, so a 17-hour replay is never silent.
//! Callers report cumulative figures; the reporter decides when to draw, so calling it per batch is cheap.

use std::io::{IsTerminal, Write};
use std::time::{Duration, Instant};

/// How often the bar is redrawn on a terminal.
const BAR_EVERY: Duration = Duration::from_millis(200);

/// Where the figures go.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Mode {
    Quiet,
    Bar,
    Lines,
}

/// A progress reporter writing to stderr.
#[derive(Debug)]
pub(crate) struct Progress {
    label: String,
    mode: Mode,
    every: Duration,
    started: Instant,
    last_draw: Option<Instant>,
    photons: u64,
    first_ns: Option<i64>,
    last_ns: Option<i64>,
    fraction: Option<f64>,
}

impl Progress {
    /// A reporter for the job `label` (e.g. "replay"): silent when `quiet`, a bar when stderr is a terminal,
    /// else a plain line every `line_every`.
    pub(crate) fn new(label: &str, quiet: bool, line_every: Duration) -> Self {
        let mode = if quiet {
            Mode::Quiet
        } else if std::io::stderr().is_terminal() {
            Mode::Bar
        } else {
            Mode::Lines
        };
        Self {
            label: label.to_string(),
            mode,
            every: if mode == Mode::Bar { BAR_EVERY } else { line_every },
            started: Instant::now(),
            last_draw: None,
            photons: 0,
            first_ns: None,
            last_ns: None,
            fraction: None,
        }
    }

    /// Records the figures so far: photons processed in all, the event time (GPS ns) reached, and the
    /// fraction of the whole job done when the caller knows it (for the time left). Draws when due.
    pub(crate) fn update(&mut self, photons: u64, event_ns: Option<i64>, fraction: Option<f64>) {
        self.photons = photons;
        if let Some(t) = event_ns {
            self.first_ns.get_or_insert(t);
            self.last_ns = Some(self.last_ns.map_or(t, |l| l.max(t)));
        }
        if fraction.is_some() {
            self.fraction = fraction.map(|f| f.clamp(0.0, 1.0));
        }
        if self.mode == Mode::Quiet {
            return;
        }
        let now = Instant::now();
        // The first line waits one interval too: a short run then prints only its closing line.
        let due = now.duration_since(self.last_draw.unwrap_or(self.started)) >= self.every;
        if due {
            self.last_draw = Some(now);
            self.draw(false);
        }
    }

    /// The closing line (always, unless quiet), with the final figures.
    pub(crate) fn finish(&mut self) {
        if self.mode != Mode::Quiet {
            self.fraction = Some(1.0);
            self.draw(true);
        }
    }

    /// The figures as one line of text.
    fn text(&self, done: bool) -> String {
        let wall = self.started.elapsed().as_secs_f64();
        let covered = match (self.first_ns, self.last_ns) {
            (Some(a), Some(b)) => (b - a) as f64 / 1e9,
            _ => 0.0,
        };
        let reached = self
            .last_ns
            .map(|t| format!(" up to {}", crate::timefmt::gps_ns_to_utc(t)))
            .unwrap_or_default();
        let rate = if wall > 0.0 {
            self.photons as f64 / wall
        } else {
            0.0
        };
        let mut s = format!(
            "{}: {} photons, {} of event time{reached}, {:.0} photons/s, {} elapsed",
            self.label,
            self.photons,
            human_seconds(covered),
            rate,
            human_seconds(wall)
        );
        if done {
            s.push_str(", done");
        } else if let Some(f) = self.fraction.filter(|f| *f > 0.0) {
            let left = wall * (1.0 - f) / f;
            s.push_str(&format!(
                ", {:.0}% done, about {} left",
                f * 100.0,
                human_seconds(left)
            ));
        }
        s
    }

    fn draw(&self, done: bool) {
        let text = self.text(done);
        let mut err = std::io::stderr().lock();
        // A failed write to stderr has nowhere to be reported; the run itself goes on.
        let _ = match self.mode {
            Mode::Bar => {
                let width = 24usize;
                let filled = (self.fraction.unwrap_or(0.0) * width as f64).round() as usize;
                let bar = format!(
                    "[{}{}]",
                    "#".repeat(filled),
                    ".".repeat(width - filled.min(width))
                );
                let end = if done { "\n" } else { "" };
                write!(err, "\r\x1b[2K{bar} {text}{end}")
            }
            Mode::Lines => writeln!(err, "progress: {text}"),
            Mode::Quiet => Ok(()),
        };
        let _ = err.flush();
    }
}

/// Seconds as `1h02m03s`, `2m03s` or `3.4s`.
fn human_seconds(s: f64) -> String {
    if !s.is_finite() || s < 0.0 {
        return "?".into();
    }
    let whole = s as u64;
    match whole {
        0..60 => format!("{s:.1}s"),
        60..3600 => format!("{}m{:02}s", whole / 60, whole % 60),
        _ => format!("{}h{:02}m{:02}s", whole / 3600, (whole / 60) % 60, whole % 60),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn figures_read_as_a_person_would_say_them() {
        assert_eq!(human_seconds(3.44), "3.4s");
        assert_eq!(human_seconds(123.0), "2m03s");
        assert_eq!(human_seconds(3723.0), "1h02m03s");
        let mut p = Progress::new("replay", true, Duration::from_secs(10));
        p.update(10, Some(1_480_125_618_000_000_000), Some(0.5));
        p.update(20, Some(1_480_125_678_000_000_000), None);
        let t = p.text(false);
        assert!(
            t.starts_with("replay: 20 photons, 1m00s of event time up to 2026-12-01T02:01:00"),
            "{t}"
        );
        assert!(t.contains("50% done, about"), "{t}");
        assert!(p.text(true).ends_with(", done"));
    }
}
