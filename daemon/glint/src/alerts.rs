//! Alerts as users see them: the engine's findings become `glint.v1.Alert` messages (with sequence number,
//! id and UTC/MJD times), and alerts become the JSON lines of replay and `listen --json`, or a short readable
//! summary for a terminal. One place for this shape, so live, replay and the listener always agree.

use glint_engine::{Assessment, Finding, Flash, Verdict};
use glint_wire::pb;
use serde::Serialize;

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

/// Lower-case name of an alert kind, as used on the command line and in JSON.
pub(crate) fn kind_name(kind: i32) -> &'static str {
    match pb::AlertKind::try_from(kind) {
        Ok(pb::AlertKind::Flash) => "flash",
        Ok(pb::AlertKind::Assessment) => "assessment",
        Ok(pb::AlertKind::Withdrawal) => "withdrawal",
        Ok(pb::AlertKind::Heartbeat) => "heartbeat",
        Ok(pb::AlertKind::Test) => "test",
        Ok(pb::AlertKind::Joint) => "joint",
        _ => "unknown",
    }
}

/// Parses a kind name given on the command line.
pub(crate) fn parse_kind(name: &str) -> Option<pb::AlertKind> {
    match name.trim() {
        "flash" => Some(pb::AlertKind::Flash),
        "assessment" => Some(pb::AlertKind::Assessment),
        "withdrawal" => Some(pb::AlertKind::Withdrawal),
        "heartbeat" => Some(pb::AlertKind::Heartbeat),
        "test" => Some(pb::AlertKind::Test),
        "joint" => Some(pb::AlertKind::Joint),
        _ => None,
    }
}

/// Lower-case name of a verdict.
pub(crate) fn verdict_name(v: i32) -> &'static str {
    match pb::Verdict::try_from(v) {
        Ok(pb::Verdict::Isolated) => "isolated",
        Ok(pb::Verdict::Persistent) => "persistent",
        Ok(pb::Verdict::Instrumental) => "instrumental",
        Ok(pb::Verdict::Undecided) => "undecided",
        _ => "none",
    }
}

#[derive(Serialize)]
struct TriggerJson<'a> {
    start_gps_ns: i64,
    end_gps_ns: i64,
    start_utc: &'a str,
    end_utc: &'a str,
    end_mjd: &'a str,
    ra_deg: f64,
    dec_deg: f64,
    error_radius_deg: f64,
    search_radius_deg: f64,
    zenith_deg: f64,
    timescale_s: f64,
    counts: u64,
    background: f64,
    p_value: f64,
    sigma: f64,
    sigma_per_seed: f64,
    sigma_post_trials: f64,
    far_per_year: f64,
    photons: usize,
    flags: &'a [String],
    all_sky_sigma: f64,
    identical_time_fraction: f64,
    spread_sigma: f64,
}

#[derive(Serialize)]
struct FitJson<'a> {
    converged: bool,
    #[serde(skip_serializing_if = "str::is_empty")]
    reason: &'a str,
    explosion_gps_ns: i64,
    explosion_utc: &'a str,
    distance_pc: f64,
    distance_pc_lo: f64,
    distance_pc_hi: f64,
    template_p: f64,
    gof_test: &'a str,
    signal_counts: f64,
    background_counts: f64,
    ln_likelihood_ratio: f64,
    lr_sigma: f64,
    burst_preferred: bool,
}

#[derive(Serialize)]
struct AssessmentJson<'a> {
    verdict: &'static str,
    flash_seq: u64,
    flash_id: &'a str,
    post_counts: u64,
    post_background: f64,
    post_p_value: f64,
    post_sigma: f64,
    pre_counts: u64,
    pre_background: f64,
    pre_rise: f64,
    pre_p_value: f64,
    pre_sigma: f64,
    shape_log_ratio: f64,
    shape_template_p: f64,
    shape_decay_index: f64,
    shape_decay_time_s: f64,
    flags: &'a [String],
    all_sky_counts: u64,
    all_sky_expected: f64,
    all_sky_sigma: f64,
    identical_time_fraction: f64,
    spread_ratio: f64,
    spread_sigma: f64,
    dead_seconds: f64,
    #[serde(skip_serializing_if = "Option::is_none")]
    fit: Option<FitJson<'a>>,
}

#[derive(Serialize)]
struct LatencyJson {
    received_unix_ns: i64,
    decided_unix_ns: i64,
    journaled_unix_ns: i64,
    sent_unix_ns: i64,
    /// Milliseconds from receipt of the releasing frame to the journal fsync, and to the socket write.
    journal_ms: f64,
    sent_ms: f64,
}

#[derive(Serialize)]
struct AlertJson<'a> {
    seq: u64,
    id: &'a str,
    kind: &'static str,
    instrument: &'a str,
    issued_utc: &'a str,
    issued_gps_ns: i64,
    #[serde(skip_serializing_if = "Option::is_none")]
    trigger: Option<TriggerJson<'a>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    assessment: Option<AssessmentJson<'a>>,
    #[serde(skip_serializing_if = "str::is_empty")]
    withdrawn_id: &'a str,
    #[serde(skip_serializing_if = "str::is_empty")]
    reason: &'a str,
    #[serde(skip_serializing_if = "Option::is_none")]
    latency: Option<LatencyJson>,
    #[serde(skip_serializing_if = "std::ops::Not::not")]
    replayed: bool,
    #[serde(skip_serializing_if = "Option::is_none")]
    joint: Option<serde_json::Value>,
}

/// The alert as one JSON object (the JSON-lines shape of replay and `listen --json`). Latency appears only
/// when the alert carries wall-clock stamps, so replays stay byte-identical.
pub(crate) fn alert_json(a: &pb::Alert) -> serde_json::Value {
    let trigger = a.trigger.as_ref().map(|t| TriggerJson {
        start_gps_ns: t.start_gps_ns,
        end_gps_ns: t.end_gps_ns,
        start_utc: &t.start_utc,
        end_utc: &t.end_utc,
        end_mjd: &t.end_mjd,
        ra_deg: t.ra_deg,
        dec_deg: t.dec_deg,
        error_radius_deg: t.error_radius_deg,
        search_radius_deg: t.search_radius_deg,
        zenith_deg: t.zenith_deg,
        timescale_s: t.timescale_s,
        counts: t.counts,
        background: t.background,
        p_value: t.p_value,
        sigma: t.sigma,
        sigma_per_seed: t.sigma_per_seed,
        sigma_post_trials: t.sigma_post_trials,
        far_per_year: t.far_per_year,
        photons: t.photon_time_gps_ns.len(),
        flags: &t.flags,
        all_sky_sigma: t.all_sky_sigma,
        identical_time_fraction: t.identical_time_fraction,
        spread_sigma: t.spread_sigma,
    });
    let assessment = a.assessment.as_ref().map(|s| AssessmentJson {
        verdict: verdict_name(s.verdict),
        flash_seq: s.flash_seq,
        flash_id: &s.flash_id,
        post_counts: s.post_counts,
        post_background: s.post_background,
        post_p_value: s.post_p_value,
        post_sigma: s.post_sigma,
        pre_counts: s.pre_counts,
        pre_background: s.pre_background,
        pre_rise: s.pre_rise,
        pre_p_value: s.pre_p_value,
        pre_sigma: s.pre_sigma,
        shape_log_ratio: s.shape_log_ratio,
        shape_template_p: s.shape_template_p,
        shape_decay_index: s.shape_decay_index,
        shape_decay_time_s: s.shape_decay_time_s,
        flags: &s.flags,
        all_sky_counts: s.all_sky_counts,
        all_sky_expected: s.all_sky_expected,
        all_sky_sigma: s.all_sky_sigma,
        identical_time_fraction: s.identical_time_fraction,
        spread_ratio: s.spread_ratio,
        spread_sigma: s.spread_sigma,
        dead_seconds: s.dead_seconds,
        fit: s.fit.as_ref().map(|f| FitJson {
            converged: f.converged,
            reason: &f.reason,
            explosion_gps_ns: f.explosion_gps_ns,
            explosion_utc: &f.explosion_utc,
            distance_pc: f.distance_pc,
            distance_pc_lo: f.distance_pc_lo,
            distance_pc_hi: f.distance_pc_hi,
            template_p: f.template_p,
            gof_test: &f.gof_test,
            signal_counts: f.signal_counts,
            background_counts: f.background_counts,
            ln_likelihood_ratio: f.ln_likelihood_ratio,
            lr_sigma: f.lr_sigma,
            burst_preferred: f.burst_preferred,
        }),
    });
    let latency = a.latency.as_ref().filter(|l| l.received_unix_ns != 0).map(|l| {
        let ms = |t: i64| {
            if t == 0 {
                0.0
            } else {
                (t - l.received_unix_ns) as f64 / 1e6
            }
        };
        LatencyJson {
            received_unix_ns: l.received_unix_ns,
            decided_unix_ns: l.decided_unix_ns,
            journaled_unix_ns: l.journaled_unix_ns,
            sent_unix_ns: l.sent_unix_ns,
            journal_ms: ms(l.journaled_unix_ns),
            sent_ms: ms(l.sent_unix_ns),
        }
    });
    let j = AlertJson {
        seq: a.seq,
        id: &a.id,
        kind: kind_name(a.kind),
        instrument: &a.instrument,
        issued_utc: &a.issued_utc,
        issued_gps_ns: a.issued_gps_ns,
        trigger,
        assessment,
        withdrawn_id: &a.withdrawn_id,
        reason: &a.reason,
        latency,
        replayed: a.replayed,
        joint: a.joint.as_ref().map(joint_json),
    };
    serde_json::to_value(j).unwrap_or(serde_json::Value::Null)
}

/// The joint part of a JOINT alert (`glint coincide`).
fn joint_json(j: &pb::Joint) -> serde_json::Value {
    serde_json::json!({
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
        "#{} {} {} [{}]",
        a.seq,
        kind_name(a.kind).to_uppercase(),
        a.id,
        a.instrument
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
            verdict_name(x.verdict).to_uppercase(),
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
    if let Some(l) = a
        .latency
        .as_ref()
        .filter(|l| l.received_unix_ns != 0 && l.sent_unix_ns != 0)
    {
        s += &format!(
            "\n    latency {:.2} ms (receipt to send)",
            (l.sent_unix_ns - l.received_unix_ns) as f64 / 1e6
        );
    }
    s
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
