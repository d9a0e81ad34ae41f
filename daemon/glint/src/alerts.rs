//! Alerts as users see them: the engine's findings become `glint.v1.Alert` messages (with sequence number,
//! id and UTC/MJD times), and alerts become the JSON lines of replay and `listen --json`, or a short readable
//! summary for a terminal. One place for this shape, so live, replay and the listener always agree.

use glint_engine::{Assessment, Finding, Flash, Verdict};
use glint_wire::pb;
use serde_json::{Value, json};

use crate::timefmt;

fn trigger_of(f: &Flash) -> pb::Trigger {
    pb::Trigger {
        start_gps_ns: f.start_ns,
        end_gps_ns: f.end_ns,
        start_utc: timefmt::gps_ns_to_utc(f.start_ns),
        end_utc: timefmt::gps_ns_to_utc(f.end_ns),
        end_mjd: timefmt::gps_ns_to_mjd(f.end_ns),
        ra_deg: f.ra_deg,
        dec_deg: f.dec_deg,
        error_radius_deg: f.error_radius_deg,
        timescale_s: f.timescale_s,
        counts: f.counts,
        background: f.background,
        p_value: f.p_value,
        sigma: f.sigma,
        far_per_year: f.far_per_year,
        search_radius_deg: f.search_radius_deg,
        photon_time_gps_ns: f.photons.iter().map(|p| p.time_ns).collect(),
        photon_ra_deg: f.photons.iter().map(|p| p.ra_deg).collect(),
        photon_dec_deg: f.photons.iter().map(|p| p.dec_deg).collect(),
        photon_energy_gev: f.photons.iter().map(|p| p.energy_gev as f32).collect(),
        zenith_deg: f.zenith_deg,
        sigma_post_trials: f.sigma_post_trials,
        sigma_per_seed: f.sigma,
        flags: f.flags.clone(),
        all_sky_sigma: f.all_sky_sigma,
        identical_time_fraction: f.identical_time_fraction,
        spread_sigma: f.spread_sigma,
    }
}

fn verdict_of(v: Verdict) -> pb::Verdict {
    match v {
        Verdict::Isolated => pb::Verdict::Isolated,
        Verdict::Persistent => pb::Verdict::Persistent,
        Verdict::Instrumental => pb::Verdict::Instrumental,
        Verdict::Undecided => pb::Verdict::Undecided,
    }
}

fn assessment_of(a: &Assessment, flash: Option<(u64, &str)>) -> pb::Assessment {
    let fit = &a.fit;
    pb::Assessment {
        verdict: verdict_of(a.verdict) as i32,
        post_counts: a.post_counts,
        post_background: a.post_background,
        post_p_value: a.post_p_value,
        post_sigma: a.post_sigma,
        pre_counts: a.pre_counts,
        pre_background: a.pre_background,
        pre_p_value: a.pre_p_value,
        pre_sigma: a.pre_sigma,
        flags: a.flags.clone(),
        all_sky_counts: a.all_sky_counts,
        all_sky_expected: a.all_sky_expected,
        identical_time_fraction: a.identical_time_fraction,
        spread_ratio: a.spread_ratio,
        dead_seconds: a.dead_seconds,
        fit: Some(pb::EvaporationFit {
            converged: fit.converged,
            reason: fit.reason.clone(),
            explosion_gps_ns: fit.explosion_ns,
            explosion_utc: if fit.converged {
                timefmt::gps_ns_to_utc(fit.explosion_ns)
            } else {
                String::new()
            },
            distance_pc: fit.distance_pc,
            distance_pc_lo: fit.distance_pc_lo,
            distance_pc_hi: fit.distance_pc_hi,
            template_p: fit.template_p,
            gof_test: fit.gof_test.clone(),
            signal_counts: fit.signal_counts,
            background_counts: fit.background_counts,
            ln_likelihood_ratio: fit.ln_likelihood_ratio,
            lr_sigma: fit.lr_sigma,
            burst_preferred: fit.burst_preferred,
        }),
        flash_seq: flash.map_or(0, |f| f.0),
        flash_id: flash.map_or(String::new(), |f| f.1.to_string()),
        pre_rise: a.pre_rise,
        shape_log_ratio: a.shape_log_ratio,
        shape_template_p: a.shape_template_p,
        shape_decay_index: a.shape_decay_index,
        shape_decay_time_s: a.shape_decay_time_s,
        all_sky_sigma: a.all_sky_sigma,
        spread_sigma: a.spread_sigma,
    }
}

/// Turns an engine finding into an alert. `flash` is the sequence number and id of the flash an assessment or
/// withdrawal refers to. Sequence number, id and issue time are set later by [`stamp`].
pub(crate) fn finding_to_alert(instrument: &str, f: &Finding, flash: Option<(u64, &str)>) -> pb::Alert {
    let mut alert = pb::Alert {
        instrument: instrument.to_string(),
        ..Default::default()
    };
    match f {
        Finding::Flash(fl) => {
            alert.kind = pb::AlertKind::Flash as i32;
            alert.trigger = Some(trigger_of(fl));
        }
        Finding::Assessment(a) => {
            alert.kind = pb::AlertKind::Assessment as i32;
            alert.trigger = Some(trigger_of(&a.trigger));
            alert.assessment = Some(assessment_of(a, flash));
        }
        Finding::Withdrawal(w) => {
            alert.kind = pb::AlertKind::Withdrawal as i32;
            alert.withdrawn_id = flash.map_or(String::new(), |f| f.1.to_string());
            alert.reason = w.reason.clone();
        }
    }
    alert
}

/// Gives an alert its sequence number, id and issue time (GPS ns: wall-clock for live alerts, event time
/// for replays, so replays are byte-identical run after run).
///
/// The id rule, one for every alert: `GL-<instrument>-<time>-<seq>`, where `<time>` is the UTC end of the
/// trigger the alert is about, in event time: a flash's and an assessment's own trigger, a withdrawal's (the
/// engine's or an operator's) the trigger of the alert it withdraws. Only alerts about no trigger (a test
/// alert, an operator's withdrawal of one) use their issue time. So an alert's id is the same live and in a
/// replay of the same photons, whoever withdraws it.
pub(crate) fn stamp(alert: &mut pb::Alert, seq: u64, issued_gps_ns: i64) {
    alert.seq = seq;
    alert.issued_gps_ns = issued_gps_ns;
    alert.issued_utc = timefmt::gps_ns_to_utc(issued_gps_ns);
    let when = alert.trigger.as_ref().map_or(issued_gps_ns, |t| t.end_gps_ns);
    alert.id = format!(
        "GL-{}-{}-{}",
        alert.instrument,
        timefmt::gps_ns_to_id_stamp(when),
        seq
    );
}

/// Version of the JSON lines' shape (`schema_version` on every line; docs/alert.schema.json). It moves only
/// when a field is removed, renamed or changes meaning; new fields keep it (docs/alerts.md, "Versions").
pub(crate) const JSON_SCHEMA_VERSION: u32 = 1;

/// The kinds by their JSON and command-line names, in proto order.
pub(crate) const KIND_NAMES: [(&str, pb::AlertKind); 6] = [
    ("flash", pb::AlertKind::Flash),
    ("assessment", pb::AlertKind::Assessment),
    ("withdrawal", pb::AlertKind::Withdrawal),
    ("heartbeat", pb::AlertKind::Heartbeat),
    ("test", pb::AlertKind::Test),
    ("joint", pb::AlertKind::Joint),
];

/// Lower-case name of an alert kind: the one case used in JSON, on the command line, on the screen and in
/// bus subjects.
pub(crate) fn kind_name(kind: i32) -> &'static str {
    KIND_NAMES
        .iter()
        .find(|(_, k)| *k as i32 == kind)
        .map_or("unknown", |(n, _)| n)
}

/// Parses a kind name given on the command line or in a configuration, in any case ("flash", "FLASH").
pub(crate) fn parse_kind(name: &str) -> Option<pb::AlertKind> {
    let name = name.trim();
    KIND_NAMES
        .iter()
        .find(|(n, _)| n.eq_ignore_ascii_case(name))
        .map(|(_, k)| *k)
}

/// Lower-case name of a verdict ("none" for an assessment without one, which the engine never issues).
pub(crate) fn verdict_name(v: i32) -> &'static str {
    match pb::Verdict::try_from(v) {
        Ok(pb::Verdict::Isolated) => "isolated",
        Ok(pb::Verdict::Persistent) => "persistent",
        Ok(pb::Verdict::Instrumental) => "instrumental",
        Ok(pb::Verdict::Undecided) => "undecided",
        _ => "none",
    }
}

/// What the JSON of an alert includes beyond its fixed fields.
#[derive(Debug, Clone, Copy, Default)]
pub(crate) struct JsonOptions {
    /// The trigger's photon columns (`photon_time_gps_ns`, `photon_ra_deg`, `photon_dec_deg`,
    /// `photon_energy_gev`); without them only their number (`photons`) is written.
    pub(crate) photons: bool,
}

fn trigger_json(t: &pb::Trigger, opts: JsonOptions) -> Value {
    let mut v = json!({
        "start_gps_ns": t.start_gps_ns,
        "end_gps_ns": t.end_gps_ns,
        "start_utc": t.start_utc,
        "end_utc": t.end_utc,
        "end_mjd": t.end_mjd,
        "ra_deg": t.ra_deg,
        "dec_deg": t.dec_deg,
        "error_radius_deg": t.error_radius_deg,
        "search_radius_deg": t.search_radius_deg,
        "zenith_deg": t.zenith_deg,
        "timescale_s": t.timescale_s,
        "counts": t.counts,
        "background": t.background,
        "p_value": t.p_value,
        "sigma": t.sigma,
        "sigma_per_seed": t.sigma_per_seed,
        "sigma_post_trials": t.sigma_post_trials,
        "far_per_year": t.far_per_year,
        "photons": t.photon_time_gps_ns.len(),
        "flags": t.flags,
        "all_sky_sigma": t.all_sky_sigma,
        "identical_time_fraction": t.identical_time_fraction,
        "spread_sigma": t.spread_sigma,
    });
    if opts.photons {
        v["photon_time_gps_ns"] = json!(t.photon_time_gps_ns);
        v["photon_ra_deg"] = json!(t.photon_ra_deg);
        v["photon_dec_deg"] = json!(t.photon_dec_deg);
        // Widened from the proto's float so the JSON shows the value the proto holds, not a long decimal.
        v["photon_energy_gev"] = json!(
            t.photon_energy_gev
                .iter()
                .map(|&e| f64::from(e))
                .collect::<Vec<f64>>()
        );
    }
    v
}

fn fit_json(f: &pb::EvaporationFit) -> Value {
    json!({
        "converged": f.converged,
        "reason": f.reason,
        "explosion_gps_ns": f.explosion_gps_ns,
        "explosion_utc": f.explosion_utc,
        "distance_pc": f.distance_pc,
        "distance_pc_lo": f.distance_pc_lo,
        "distance_pc_hi": f.distance_pc_hi,
        "template_p": f.template_p,
        "gof_test": f.gof_test,
        "signal_counts": f.signal_counts,
        "background_counts": f.background_counts,
        "ln_likelihood_ratio": f.ln_likelihood_ratio,
        "lr_sigma": f.lr_sigma,
        "burst_preferred": f.burst_preferred,
    })
}

fn assessment_json(s: &pb::Assessment) -> Value {
    json!({
        "verdict": verdict_name(s.verdict),
        "flash_seq": s.flash_seq,
        "flash_id": s.flash_id,
        "post_counts": s.post_counts,
        "post_background": s.post_background,
        "post_p_value": s.post_p_value,
        "post_sigma": s.post_sigma,
        "pre_counts": s.pre_counts,
        "pre_background": s.pre_background,
        "pre_rise": s.pre_rise,
        "pre_p_value": s.pre_p_value,
        "pre_sigma": s.pre_sigma,
        "shape_log_ratio": s.shape_log_ratio,
        "shape_template_p": s.shape_template_p,
        "shape_decay_index": s.shape_decay_index,
        "shape_decay_time_s": s.shape_decay_time_s,
        "flags": s.flags,
        "all_sky_counts": s.all_sky_counts,
        "all_sky_expected": s.all_sky_expected,
        "all_sky_sigma": s.all_sky_sigma,
        "identical_time_fraction": s.identical_time_fraction,
        "spread_ratio": s.spread_ratio,
        "spread_sigma": s.spread_sigma,
        "dead_seconds": s.dead_seconds,
        "fit": s.fit.as_ref().map_or(Value::Null, fit_json),
    })
}

/// Latency stamps as the proto has them (0 when absent), plus two derived spans in milliseconds from the
/// receipt of the releasing frame: to the journal fsync (`journal_ms`) and to the socket write (`sent_ms`),
/// each 0 when either stamp is absent.
fn latency_json(l: &pb::Latency) -> Value {
    let ms = |t: i64| {
        if t == 0 || l.received_unix_ns == 0 {
            0.0
        } else {
            (t - l.received_unix_ns) as f64 / 1e6
        }
    };
    json!({
        "received_unix_ns": l.received_unix_ns,
        "decided_unix_ns": l.decided_unix_ns,
        "journaled_unix_ns": l.journaled_unix_ns,
        "sent_unix_ns": l.sent_unix_ns,
        "reorder_hold_ns": l.reorder_hold_ns,
        "fsync_wait_ns": l.fsync_wait_ns,
        "journal_ms": ms(l.journaled_unix_ns),
        "sent_ms": ms(l.sent_unix_ns),
    })
}

/// The joint part of a JOINT alert (`glint coincide`).
fn joint_json(j: &pb::Joint) -> Value {
    json!({
        "alert_ids": j.alert_ids,
        "instruments": j.instruments,
        "time_difference_s": j.time_difference_s,
        "window_s": j.window_s,
        "light_travel_s": j.light_travel_s,
        "separation_deg": j.separation_deg,
        "combined_radius_deg": j.combined_radius_deg,
        "overlap_sr": j.overlap_sr,
        "position_chance": j.position_chance,
        "single_far_per_year": j.single_far_per_year,
        "far_per_year": j.far_per_year,
        "has_distance": j.has_distance,
        "distance_pc": j.distance_pc,
        "distance_pc_lo": j.distance_pc_lo,
        "distance_pc_hi": j.distance_pc_hi,
    })
}

/// The alert as one JSON object, without photon columns: see [`alert_json_with`].
pub(crate) fn alert_json(a: &pb::Alert) -> Value {
    alert_json_with(a, JsonOptions::default())
}

/// The alert as one JSON object: the JSON-lines shape of replay, `listen --json`, `journal --json`, demo and
/// coincide (docs/alerts.md; docs/alert.schema.json). Every field of the proto is present, false and zero
/// included; a message the alert does not carry (`trigger`, `assessment`, `joint`, the fit) is `null`.
/// Replays carry no wall-clock stamp (their latency is all zeros), so they stay byte-identical.
pub(crate) fn alert_json_with(a: &pb::Alert, opts: JsonOptions) -> Value {
    json!({
        "schema_version": JSON_SCHEMA_VERSION,
        "seq": a.seq,
        "id": a.id,
        "kind": kind_name(a.kind),
        "instrument": a.instrument,
        "issued_utc": a.issued_utc,
        "issued_gps_ns": a.issued_gps_ns,
        "trigger": a.trigger.as_ref().map_or(Value::Null, |t| trigger_json(t, opts)),
        "assessment": a.assessment.as_ref().map_or(Value::Null, assessment_json),
        "withdrawn_id": a.withdrawn_id,
        "reason": a.reason,
        "latency": latency_json(&a.latency.unwrap_or_default()),
        "replayed": a.replayed,
        "joint": a.joint.as_ref().map_or(Value::Null, joint_json),
    })
}

/// A heartbeat as one JSON line (`listen --json --heartbeats`): the proto's fields, plus each watermark in
/// UTC and its age against the daemon's clock, so a wrapper can see a stale instrument at a glance.
pub(crate) fn heartbeat_json(h: &pb::Heartbeat) -> Value {
    let now_gps = timefmt::unix_ns_to_gps_ns(h.unix_ns);
    json!({
        "schema_version": JSON_SCHEMA_VERSION,
        "kind": "heartbeat",
        "unix_ns": h.unix_ns,
        "last_seq": h.last_seq,
        "instruments": h.instruments,
        "watermark_gps_ns": h.watermark_gps_ns,
        "watermark_utc": h.watermark_gps_ns.iter().map(|&w| watermark_utc(w)).collect::<Vec<_>>(),
        "watermark_age_s": h.watermark_gps_ns.iter().map(|&w| watermark_age_s(w, now_gps)).collect::<Vec<_>>(),
        "closing": h.closing,
    })
}

/// A watermark in UTC, or "" when the instrument has no event time yet (watermark 0).
fn watermark_utc(w: i64) -> String {
    if w == 0 {
        String::new()
    } else {
        timefmt::gps_ns_to_utc(w)
    }
}

/// Seconds from a watermark to the daemon's clock (both GPS ns); 0 when there is no watermark yet.
fn watermark_age_s(w: i64, now_gps: i64) -> f64 {
    if w == 0 || now_gps == 0 {
        0.0
    } else {
        (now_gps - w) as f64 / 1e9
    }
}

/// A heartbeat for a terminal: the journal's newest number and each instrument's watermark and its age.
pub(crate) fn heartbeat_summary(h: &pb::Heartbeat) -> String {
    let now_gps = timefmt::unix_ns_to_gps_ns(h.unix_ns);
    let mut s = format!(
        "heartbeat  last seq {}{}",
        h.last_seq,
        if h.closing { "  (daemon closing)" } else { "" }
    );
    for (name, &w) in h.instruments.iter().zip(&h.watermark_gps_ns) {
        if w == 0 {
            s += &format!("\n    {name}: no event time yet");
        } else {
            s += &format!(
                "\n    {name}: event time {} ({:.1} s behind the daemon's clock)",
                watermark_utc(w),
                watermark_age_s(w, now_gps)
            );
        }
    }
    s
}

/// A signed significance in words: "+5.2 sigma", "-7.6 sigma (deficit)", or "no excess" at 0.
fn sigma_words(z: f64) -> String {
    if z > 0.0 {
        format!("{z:+.1} sigma")
    } else if z < 0.0 {
        format!("{z:+.1} sigma, deficit")
    } else {
        "no excess".to_owned()
    }
}

/// A short readable summary of one alert for a terminal.
pub(crate) fn alert_summary(a: &pb::Alert) -> String {
    let mut s = format!(
        "#{} {} {} [{}]{}",
        a.seq,
        kind_name(a.kind),
        a.id,
        a.instrument,
        if a.replayed {
            "  REPLAYED from the journal"
        } else {
            ""
        }
    );
    if let Some(t) = &a.trigger {
        s += &format!(
            "\n    at RA {:.3} Dec {:+.3} (±{:.2}°, 90%)  {}  timescale {} s\n    {} photons on {:.3} expected: p = {:.2e} ({:.1} sigma per seed), FAR {:.2e}/yr ({:.1} sigma post-trials)",
            t.ra_deg,
            t.dec_deg,
            t.error_radius_deg,
            t.end_utc,
            t.timescale_s,
            t.counts,
            t.background,
            t.p_value,
            t.sigma,
            t.far_per_year,
            t.sigma_post_trials
        );
        if !t.flags.is_empty() {
            s += &format!("\n    INSTRUMENTAL SIGNS: {}", t.flags.join(" "));
        }
    }
    if let Some(x) = &a.assessment {
        s += &format!(
            "\n    verdict {} (of {}): after {} on {:.2} background ({}), before {} on {:.2} background + {:.2} burst rise ({}), light curve {:+.1} toward decay (template p = {:.2e}){}",
            verdict_name(x.verdict),
            x.flash_id,
            x.post_counts,
            x.post_background,
            sigma_words(x.post_sigma),
            x.pre_counts,
            x.pre_background,
            x.pre_rise,
            sigma_words(x.pre_sigma),
            x.shape_log_ratio,
            x.shape_template_p,
            if x.flags.is_empty() {
                String::new()
            } else {
                format!(", flags: {}", x.flags.join(" "))
            }
        );
        if let Some(f) = x.fit.as_ref() {
            if f.converged {
                s += &format!(
                    "\n    evaporation fit: explosion {}, distance {:.3} pc (90%: {:.3}-{:.3}), template p = {:.2}, \
                     {:.1} sigma over background{}",
                    f.explosion_utc,
                    f.distance_pc,
                    f.distance_pc_lo,
                    f.distance_pc_hi,
                    f.template_p,
                    f.lr_sigma,
                    if f.burst_preferred {
                        ""
                    } else {
                        "; burst model NOT preferred"
                    }
                );
            } else {
                s += &format!("\n    evaporation fit not converged: {}", f.reason);
            }
        }
    }
    if let Some(j) = &a.joint {
        s += &format!(
            "\n    joint of {}: dt {:+.4} s within {:.4} s, {:.2} deg apart within {:.2} deg, joint FAR {:.2e}/yr",
            j.alert_ids.join(" + "),
            j.time_difference_s,
            j.window_s,
            j.separation_deg,
            j.combined_radius_deg,
            j.far_per_year
        );
    }
    if !a.withdrawn_id.is_empty() {
        s += &format!("\n    withdraws {}: {}", a.withdrawn_id, a.reason);
    }
    s += &latency_words(a);
    s
}

/// The latency line of a summary. Wall latency (the daemon host's clock, receipt of the completing photon's
/// frame to the socket write) means something only for a live alert: a replayed one was sent long after its
/// receipt, so for it only the original receipt-to-journal span is shown. Event-time latency (issue time minus
/// the trigger window's end, both GPS) is shown apart from it: for a live alert it includes the photons'
/// transit to the daemon; for a `glint replay` it is the engine's own hold in event time.
fn latency_words(a: &pb::Alert) -> String {
    let mut parts = Vec::new();
    if let Some(l) = a.latency.as_ref().filter(|l| l.received_unix_ns != 0) {
        if a.replayed {
            if l.journaled_unix_ns != 0 {
                parts.push(format!(
                    "wall latency when issued {:.2} ms (receipt to journal)",
                    (l.journaled_unix_ns - l.received_unix_ns) as f64 / 1e6
                ));
            }
        } else if l.sent_unix_ns != 0 {
            parts.push(format!(
                "wall latency {:.2} ms (receipt to send)",
                (l.sent_unix_ns - l.received_unix_ns) as f64 / 1e6
            ));
        }
    }
    if let Some(t) = a
        .trigger
        .as_ref()
        .filter(|t| t.end_gps_ns != 0 && a.issued_gps_ns != 0)
    {
        if a.kind == pb::AlertKind::Flash as i32 || a.kind == pb::AlertKind::Assessment as i32 {
            parts.push(format!(
                "event-time latency {:.3} s (window end to issue)",
                (a.issued_gps_ns - t.end_gps_ns) as f64 / 1e9
            ));
        }
    }
    if parts.is_empty() {
        String::new()
    } else {
        format!("\n    {}", parts.join("; "))
    }
}

/// Numbers findings into alerts: a gap-free global sequence, and for each engine candidate the flash it
/// began with, so an assessment or withdrawal names its flash. Both the daemon's desk and replay use it.
#[derive(Debug, Default)]
pub(crate) struct Sequencer {
    next_seq: u64,
    /// (instrument, engine candidate) -> (flash seq, flash id, flash trigger). Entries leave when the
    /// candidate is assessed, so the map holds only open candidates.
    flashes: std::collections::BTreeMap<(String, u64), (u64, String, Option<pb::Trigger>)>,
}

impl Sequencer {
    /// A sequencer whose first alert gets `next_seq` (1 for a fresh journal).
    pub(crate) fn starting_at(next_seq: u64) -> Self {
        Self {
            next_seq: next_seq.max(1),
            flashes: Default::default(),
        }
    }

    /// The sequence number the next alert will get.
    pub(crate) fn next_seq(&self) -> u64 {
        self.next_seq.max(1)
    }

    /// Turns a finding into a numbered alert issued at `issued_gps_ns`.
    pub(crate) fn assign(&mut self, instrument: &str, f: &Finding, issued_gps_ns: i64) -> pb::Alert {
        let seq = self.next_seq();
        self.next_seq = seq + 1;
        let candidate = match f {
            Finding::Flash(x) => x.candidate,
            Finding::Assessment(x) => x.candidate,
            Finding::Withdrawal(x) => x.candidate,
        };
        let key = (instrument.to_string(), candidate);
        let flash = match f {
            Finding::Flash(_) => None,
            Finding::Assessment(a) if a.verdict != Verdict::Instrumental => self.flashes.remove(&key),
            _ => self.flashes.get(&key).cloned(),
        };
        if matches!(f, Finding::Withdrawal(_)) {
            self.flashes.remove(&key);
        }
        let mut alert = finding_to_alert(instrument, f, flash.as_ref().map(|(s, id, _)| (*s, id.as_str())));
        if let (Finding::Withdrawal(_), Some((_, _, trigger))) = (f, flash) {
            // Like an operator's, the engine's withdrawal carries the trigger of what it withdraws, which also
            // gives its id the same event time live and in replay.
            alert.trigger = trigger;
        }
        stamp(&mut alert, seq, issued_gps_ns);
        if matches!(f, Finding::Flash(_)) {
            self.flashes
                .insert(key, (seq, alert.id.clone(), alert.trigger.clone()));
        }
        alert
    }

    /// An operator's TEST alert: kind TEST, instrument "test", no trigger; `reason` says who asked and why.
    pub(crate) fn test_alert(&mut self, operator: &str, note: &str, issued_gps_ns: i64) -> pb::Alert {
        let seq = self.next_seq();
        self.next_seq = seq + 1;
        let who = if operator.trim().is_empty() {
            "an operator"
        } else {
            operator.trim()
        };
        let note = note.trim();
        let reason = if note.is_empty() {
            format!("TEST alert requested by {who}; not a detection")
        } else {
            format!("TEST alert requested by {who}: {note}; not a detection")
        };
        let mut alert = pb::Alert {
            kind: pb::AlertKind::Test as i32,
            instrument: "test".into(),
            reason,
            ..Default::default()
        };
        stamp(&mut alert, seq, issued_gps_ns);
        alert
    }

    /// The id of the flash an engine withdrawal would withdraw (the open candidate's flash), if known.
    pub(crate) fn peek_withdrawn(&self, instrument: &str, f: &Finding) -> Option<&String> {
        let Finding::Withdrawal(w) = f else { return None };
        self.flashes
            .get(&(instrument.to_string(), w.candidate))
            .map(|(_, id, _)| id)
    }

    /// Drops what is kept of a candidate whose finding is not issued.
    pub(crate) fn forget(&mut self, instrument: &str, f: &Finding) {
        if let Finding::Withdrawal(w) = f {
            self.flashes.remove(&(instrument.to_string(), w.candidate));
        }
    }

    /// A withdrawal of `target` (any alert) saying `reason`: it names the target's instrument and carries its
    /// trigger, so a subscriber filtering by place matches it and its id follows the one id rule.
    pub(crate) fn withdrawal_of(
        &mut self,
        target: &pb::Alert,
        reason: &str,
        issued_gps_ns: i64,
    ) -> pb::Alert {
        let mut a = self.operator_withdrawal(&target.id, reason, issued_gps_ns);
        a.instrument = target.instrument.clone();
        a.trigger = target.trigger.clone();
        let seq = a.seq;
        stamp(&mut a, seq, issued_gps_ns);
        a
    }

    /// An operator's withdrawal of any alert by id.
    pub(crate) fn operator_withdrawal(
        &mut self,
        withdrawn_id: &str,
        reason: &str,
        issued_gps_ns: i64,
    ) -> pb::Alert {
        let seq = self.next_seq();
        self.next_seq = seq + 1;
        let mut alert = pb::Alert {
            kind: pb::AlertKind::Withdrawal as i32,
            instrument: "operator".into(),
            withdrawn_id: withdrawn_id.to_string(),
            reason: reason.to_string(),
            ..Default::default()
        };
        stamp(&mut alert, seq, issued_gps_ns);
        alert
    }
}
