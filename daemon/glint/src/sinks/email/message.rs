//! What an alert email says: a subject a phone shows whole (kind, instrument, UTC time, position,
//! significance, always in that order), and one document of headed sections rendered twice, as plain text
//! and as HTML, so both parts carry the same content. Digests name every alert they stand for. Pure: no
//! clock, no I/O.

use std::fmt::Write as _;

use glint_science::geometry::icrs_to_galactic_deg;
use glint_wire::pb;

use super::storm::Held;
use crate::alerts::{kind_name, verdict_name};
use crate::timefmt::{gps_ns_to_utc, unix_ns_to_gps_ns};

/// The caution every alert email carries: an email is a notice for people, never a command for a telescope.
pub(crate) const CAUTION: &str = "This is an automated notice from glint. Any automated follow-up it prompts must go \
through the receiving observatory's own interlocks and operator rules (pointing limits, Sun and Moon \
avoidance, safety systems); never let this message move an instrument directly.";

/// A headed block of labelled rows and free paragraphs.
#[derive(Debug, Clone, Default, PartialEq)]
pub(crate) struct Section {
    /// Heading.
    pub(crate) heading: String,
    /// Label, value.
    pub(crate) rows: Vec<(String, String)>,
    /// Paragraphs after the rows.
    pub(crate) paras: Vec<String>,
}

/// The content of one email, rendered as text and as HTML.
#[derive(Debug, Clone, Default, PartialEq)]
pub(crate) struct Doc {
    /// The first line: what this is.
    pub(crate) title: String,
    /// The sections, in order.
    pub(crate) sections: Vec<Section>,
}

impl Section {
    fn new(heading: &str) -> Self {
        Self {
            heading: heading.to_string(),
            ..Default::default()
        }
    }
    fn row(&mut self, label: &str, value: impl Into<String>) -> &mut Self {
        self.rows.push((label.to_string(), value.into()));
        self
    }
    fn para(&mut self, text: impl Into<String>) -> &mut Self {
        self.paras.push(text.into());
        self
    }
}

/// `2026-12-01T23:31:12.123456789Z` as `2026-12-01 23:31:12Z`: short enough for a subject line.
fn short_utc(iso: &str) -> String {
    let (date, rest) = iso.split_once('T').unwrap_or((iso, ""));
    let hms: String = rest.chars().take(8).collect();
    if hms.is_empty() {
        date.to_string()
    } else {
        format!("{date} {hms}Z")
    }
}

fn is_test(a: &pb::Alert) -> bool {
    a.kind == pb::AlertKind::Test as i32
}

/// The kind as the subject and title show it (an assessment names its verdict).
fn kind_label(a: &pb::Alert) -> String {
    let kind = kind_name(a.kind).to_uppercase();
    match a.assessment.as_ref() {
        Some(x) if a.kind == pb::AlertKind::Assessment as i32 => {
            format!("{kind} {}", verdict_name(x.verdict))
        }
        _ => kind,
    }
}

/// The subject line: kind, instrument, UTC time, position, significance, in that order.
pub(crate) fn subject(a: &pb::Alert) -> String {
    if is_test(a) {
        return format!(
            "TEST {} {} no position, no science (glint test alert)",
            a.instrument,
            short_utc(&a.issued_utc)
        );
    }
    let kind = kind_label(a);
    match a.trigger.as_ref() {
        Some(t) => format!(
            "{kind} {} {} RA {:.2} Dec {:+.2} {:.1} sigma",
            a.instrument,
            short_utc(&t.end_utc),
            t.ra_deg,
            t.dec_deg,
            t.sigma
        ),
        None => format!(
            "{kind} {} {} no position, no significance",
            a.instrument,
            short_utc(&a.issued_utc)
        ),
    }
}

/// One line naming an alert, as a digest lists it.
pub(crate) fn digest_line(a: &pb::Alert) -> String {
    format!("#{} {}: {}", a.seq, a.id, subject(a))
}

/// The subject of a digest.
pub(crate) fn digest_subject(held: &[Held], now_utc: &str) -> String {
    format!(
        "DIGEST {} alerts held by the rate limit or quiet hours, up to {}",
        held.len(),
        short_utc(now_utc)
    )
}

fn utc_of_unix_ns(ns: i64) -> String {
    if ns == 0 {
        "-".into()
    } else {
        gps_ns_to_utc(unix_ns_to_gps_ns(ns))
    }
}

/// Right ascension in hours, minutes and seconds; declination in degrees, arcminutes and arcseconds.
fn sexagesimal(ra_deg: f64, dec_deg: f64) -> String {
    let h = ra_deg.rem_euclid(360.0) / 15.0;
    let (hh, mm) = (h.floor(), (h.fract() * 60.0).floor());
    let ss = ((h * 60.0).fract() * 60.0).min(59.99);
    let sign = if dec_deg < 0.0 { '-' } else { '+' };
    let d = dec_deg.abs();
    let (dd, dm) = (d.floor(), (d.fract() * 60.0).floor());
    let ds = ((d * 60.0).fract() * 60.0).min(59.9);
    format!("{hh:02.0}h{mm:02.0}m{ss:05.2}s {sign}{dd:02.0}d{dm:02.0}m{ds:04.1}s")
}

/// The document of one alert.
pub(crate) fn alert_doc(a: &pb::Alert) -> Doc {
    let mut doc = Doc {
        title: format!(
            "{} from {}: {} (seq {})",
            kind_label(a),
            a.instrument,
            a.id,
            a.seq
        ),
        sections: Vec::new(),
    };
    let mut what = Section::new("What happened");
    match pb::AlertKind::try_from(a.kind) {
        Ok(pb::AlertKind::Test) => {
            what.para("TEST ALERT. This is a test of the alert path, requested by an operator. It names no real event, carries no science and must never prompt follow-up.");
            if !a.reason.is_empty() {
                what.row("Note", a.reason.clone());
            }
        }
        Ok(pb::AlertKind::Flash) => {
            what.para("A point of the sky crossed glint's trigger threshold: more photons arrived in a short window than the background explains. This is the first, low-latency notice; an assessment follows once the persistence window has passed.");
        }
        Ok(pb::AlertKind::Assessment) => {
            what.para("The assessment of an earlier flash, made once the persistence window after it had passed: the verdict, its reasons and the evaporation fit.");
        }
        Ok(pb::AlertKind::Withdrawal) => {
            what.para(format!(
                "Withdraws the earlier alert {}. Treat it as if it had never been sent.",
                a.withdrawn_id
            ));
            what.row("Reason", a.reason.clone());
        }
        _ => {
            what.para("An alert of a kind this version of glint does not describe.");
        }
    }
    what.row("Alert id", a.id.clone());
    what.row("Issued", a.issued_utc.clone());
    doc.sections.push(what);

    if let Some(t) = a.trigger.as_ref().filter(|_| !is_test(a)) {
        let (l, b) = icrs_to_galactic_deg(t.ra_deg, t.dec_deg);
        let mut place = Section::new("Where");
        place
            .row(
                "ICRS",
                format!(
                    "RA {:.4} deg, Dec {:+.4} deg ({})",
                    t.ra_deg,
                    t.dec_deg,
                    sexagesimal(t.ra_deg, t.dec_deg)
                ),
            )
            .row("Galactic", format!("l {l:.4} deg, b {b:+.4} deg"))
            .row(
                "Error radius",
                format!("{:.3} deg (90% containment)", t.error_radius_deg),
            )
            .row("Search radius", format!("{:.3} deg", t.search_radius_deg))
            .row("Zenith angle", format!("{:.1} deg", t.zenith_deg));
        doc.sections.push(place);
        let mut when = Section::new("When and how much");
        when.row("Window start", t.start_utc.clone())
            .row("Window end", format!("{} (MJD {})", t.end_utc, t.end_mjd))
            .row("Timescale", format!("{} s", t.timescale_s))
            .row(
                "Counts",
                format!(
                    "{} photons against {:.3} expected from background",
                    t.counts, t.background
                ),
            )
            .row("p-value", format!("{:.3e}", t.p_value))
            .row("Significance", format!("{:.2} sigma", t.sigma))
            .row("False-alarm rate", format!("{:.3e} per year", t.far_per_year));
        doc.sections.push(when);
    }

    if let Some(x) = &a.assessment {
        let mut s = Section::new("Assessment");
        s.row("Verdict", verdict_name(x.verdict).to_uppercase());
        if !x.flash_id.is_empty() {
            s.row("Of flash", format!("{} (seq {})", x.flash_id, x.flash_seq));
        }
        let reasons = if x.flags.is_empty() {
            "none flagged".to_string()
        } else {
            x.flags.join(", ")
        };
        s.row("Reasons", reasons)
            .row(
                "After the flash",
                format!(
                    "{} photons on {:.3} expected (p = {:.2e}, {:+.2} sigma)",
                    x.post_counts, x.post_background, x.post_p_value, x.post_sigma
                ),
            )
            .row(
                "Before the flash",
                format!(
                    "{} photons on {:.3} expected (p = {:.2e}, {:+.2} sigma)",
                    x.pre_counts, x.pre_background, x.pre_p_value, x.pre_sigma
                ),
            )
            .row(
                "All sky in the window",
                format!(
                    "{} photons on {:.2} expected",
                    x.all_sky_counts, x.all_sky_expected
                ),
            )
            .row("Dead time", format!("{:.2} s", x.dead_seconds));
        match x.fit.as_ref() {
            Some(f) if f.converged => {
                s.row(
                    "Distance",
                    format!(
                        "{:.4} pc (90% interval {:.4} to {:.4} pc)",
                        f.distance_pc, f.distance_pc_lo, f.distance_pc_hi
                    ),
                )
                .row("Explosion time", f.explosion_utc.clone())
                .row(
                    "Fit",
                    format!(
                        "{:.1} signal and {:.1} background photons; {} p = {:.3}",
                        f.signal_counts, f.background_counts, f.gof_test, f.template_p
                    ),
                );
            }
            Some(f) => {
                s.row("Evaporation fit", format!("did not converge: {}", f.reason));
            }
            None => {
                s.row("Evaporation fit", "none");
            }
        }
        doc.sections.push(s);
    }

    if let Some(l) = a.latency.as_ref().filter(|l| l.received_unix_ns != 0) {
        let ms = |t: i64| {
            if t == 0 {
                "-".to_string()
            } else {
                format!("+{:.3} ms", (t - l.received_unix_ns) as f64 / 1e6)
            }
        };
        let mut s = Section::new("Latency (daemon host clock)");
        s.row("Frame received", utc_of_unix_ns(l.received_unix_ns))
            .row("Decided", ms(l.decided_unix_ns))
            .row("Journalled", ms(l.journaled_unix_ns));
        doc.sections.push(s);
    }

    let mut caution = Section::new("Caution");
    caution.para(CAUTION);
    if is_test(a) {
        caution.para("TEST: this message exists only to show that alerts reach you.");
    }
    doc.sections.push(caution);
    let mut att = Section::new("Attachment");
    att.para(if a.trigger.is_some() && !is_test(a) {
        "lightcurve.png: the photons in the search disc binned over the trigger window, the expected background level and, for an assessment with a converged fit, the fitted evaporation curve."
    } else {
        "lightcurve.png: an empty frame; this alert carries no photons."
    });
    doc.sections.push(att);
    doc
}

/// The document of a digest naming every alert it stands for.
pub(crate) fn digest_doc(held: &[Held], why: &str) -> Doc {
    let mut list = Section::new(&format!("The {} alerts", held.len()));
    for h in held {
        list.para(h.line.clone());
    }
    let mut about = Section::new("Why a digest");
    about.para(why.to_string());
    about.para("Each alert is in the daemon's journal under its id; subscribe with glint listen --resume-after SEQ to read them in full.");
    let mut caution = Section::new("Caution");
    caution.para(CAUTION);
    Doc {
        title: format!("Digest of {} glint alerts", held.len()),
        sections: vec![about, list, caution],
    }
}

/// The plain-text rendering.
pub(crate) fn render_text(doc: &Doc) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "{}\n", doc.title);
    for sec in &doc.sections {
        let _ = writeln!(s, "{}", sec.heading);
        for p in &sec.paras {
            let _ = writeln!(s, "  {}", wrap(p, 76).join("\n  "));
        }
        let width = sec.rows.iter().map(|(l, _)| l.len()).max().unwrap_or(0);
        for (label, value) in &sec.rows {
            let _ = writeln!(s, "  {label:<width$}  {value}");
        }
        s.push('\n');
    }
    s
}

fn wrap(text: &str, width: usize) -> Vec<String> {
    let mut lines = vec![String::new()];
    for word in text.split_whitespace() {
        let last = lines.last_mut().map_or(0, |l| l.len());
        if last > 0 && last + 1 + word.len() > width {
            lines.push(String::new());
        }
        if let Some(l) = lines.last_mut() {
            if !l.is_empty() {
                l.push(' ');
            }
            l.push_str(word);
        }
    }
    lines
}

fn escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// The HTML rendering: the same sections as tables and paragraphs, no scripts, no remote content.
pub(crate) fn render_html(doc: &Doc) -> String {
    let mut s = String::from(
        "<!DOCTYPE html>\n<html><head><meta charset=\"utf-8\"></head>\n<body style=\"font-family: sans-serif\">\n",
    );
    let _ = writeln!(s, "<h2>{}</h2>", escape(&doc.title));
    for sec in &doc.sections {
        let _ = writeln!(s, "<h3>{}</h3>", escape(&sec.heading));
        for p in &sec.paras {
            let _ = writeln!(s, "<p>{}</p>", escape(p));
        }
        if !sec.rows.is_empty() {
            s.push_str("<table>\n");
            for (label, value) in &sec.rows {
                let _ = writeln!(
                    s,
                    "<tr><th align=\"left\">{}</th><td>{}</td></tr>",
                    escape(label),
                    escape(value)
                );
            }
            s.push_str("</table>\n");
        }
    }
    s.push_str("</body></html>\n");
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    fn flash() -> pb::Alert {
        pb::Alert {
            seq: 42,
            id: "GL-ventisca-array-20261201T233112.123-42".into(),
            kind: pb::AlertKind::Flash as i32,
            instrument: "ventisca-array".into(),
            issued_utc: "2026-12-01T23:31:12.200000000Z".into(),
            trigger: Some(pb::Trigger {
                end_utc: "2026-12-01T23:31:12.123000000Z".into(),
                ra_deg: 123.456,
                dec_deg: -12.345,
                sigma: 7.04,
                counts: 14,
                background: 0.5,
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    #[test]
    fn subject_has_kind_instrument_time_position_significance_in_order() {
        let s = subject(&flash());
        assert_eq!(
            s,
            "FLASH ventisca-array 2026-12-01 23:31:12Z RA 123.46 Dec -12.35 7.0 sigma"
        );
        let mut t = flash();
        t.kind = pb::AlertKind::Test as i32;
        t.trigger = None;
        t.instrument = "test".into();
        assert!(subject(&t).starts_with("TEST test 2026-12-01 23:31:12Z"));
    }

    #[test]
    fn text_and_html_carry_the_same_content() {
        let doc = alert_doc(&flash());
        let (text, html) = (render_text(&doc), render_html(&doc));
        for sec in &doc.sections {
            assert!(text.contains(&sec.heading) && html.contains(&escape(&sec.heading)));
            for (l, v) in &sec.rows {
                assert!(text.contains(v.as_str()), "{v}");
                assert!(html.contains(&escape(l)) && html.contains(&escape(v)), "{v}");
            }
        }
        assert!(text.contains("Galactic") && text.contains("interlocks"));
        assert!(text.contains("08h13m49.44s -12d20m42.0s"), "{text}");
    }
}
