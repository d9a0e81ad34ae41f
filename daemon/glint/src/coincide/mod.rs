//! Joint alerts from several sites: the coincidence test, the joint false-alarm rate and the joint distance
//! (docs/science.md section 4, "Joint alerts from two sites"), with no I/O. [`Coincider`] holds recent
//! candidates (assessments that were not found instrumental) per instrument and turns each new one that
//! agrees with another instrument's in time and position into a JOINT alert. `consumer.rs` feeds it from
//! the bus and publishes what it finds.

pub(crate) mod consumer;

use std::collections::BTreeSet;

use glint_wire::pb;
use serde::{Deserialize, Serialize};

use crate::config::{CoincideConfig, SiteConfig};
use crate::timefmt;

/// Speed of light in vacuum, m/s (exact by definition of the metre).
const C_M_PER_S: f64 = 299_792_458.0;
/// WGS84 semi-major axis, metres, and flattening (common practice, no source: the defining constants).
const WGS84_A: f64 = 6_378_137.0;
const WGS84_F: f64 = 1.0 / 298.257_223_563;
/// A Julian year, seconds (false-alarm rates are per year of this length throughout glint).
const SECONDS_PER_YEAR: f64 = 365.25 * 86_400.0;
/// The z value of a two-sided 90% interval of a normal distribution (common practice, no source).
const Z90: f64 = 1.644_853_626_951_472_2;

/// Earth-centred, Earth-fixed position of a geodetic point (WGS84), metres.
pub(crate) fn ecef(lat_deg: f64, lon_deg: f64, height_m: f64) -> [f64; 3] {
    let (lat, lon) = (lat_deg.to_radians(), lon_deg.to_radians());
    let e2 = WGS84_F * (2.0 - WGS84_F);
    let n = WGS84_A / (1.0 - e2 * lat.sin().powi(2)).sqrt();
    [
        (n + height_m) * lat.cos() * lon.cos(),
        (n + height_m) * lat.cos() * lon.sin(),
        (n * (1.0 - e2) + height_m) * lat.sin(),
    ]
}

/// Light travel time between two sites, seconds: the straight (ECEF) distance over c.
pub(crate) fn light_travel_s(a: &SiteConfig, b: &SiteConfig) -> f64 {
    let (p, q) = (
        ecef(a.latitude_deg, a.longitude_deg, a.height_m),
        ecef(b.latitude_deg, b.longitude_deg, b.height_m),
    );
    let d2: f64 = (0..3).map(|i| (p[i] - q[i]).powi(2)).sum();
    d2.sqrt() / C_M_PER_S
}

/// Angle between the two sites' zeniths (their geodetic normals), radians. It does not change with time, so
/// it is also the angle between the centres of their fields of view on the sky at any instant.
pub(crate) fn zenith_separation_rad(a: &SiteConfig, b: &SiteConfig) -> f64 {
    let up = |s: &SiteConfig| {
        let (lat, lon) = (s.latitude_deg.to_radians(), s.longitude_deg.to_radians());
        [lat.cos() * lon.cos(), lat.cos() * lon.sin(), lat.sin()]
    };
    let (u, v) = (up(a), up(b));
    (u[0] * v[0] + u[1] * v[1] + u[2] * v[2]).clamp(-1.0, 1.0).acos()
}

/// Solid angle of a spherical cap of angular radius `r` (radians), steradians.
pub(crate) fn cap_sr(r: f64) -> f64 {
    2.0 * std::f64::consts::PI * (1.0 - r.min(std::f64::consts::PI).cos())
}

/// Solid angle of the intersection of two caps of radii `a` and `b` whose centres are `gamma` apart (all
/// radians), steradians: integrated over rings about the first cap's centre, each contributing the fraction
/// of its circumference inside the second cap.
pub(crate) fn cap_overlap_sr(a: f64, b: f64, gamma: f64) -> f64 {
    if gamma >= a + b {
        return 0.0;
    }
    if gamma + a.min(b) <= a.max(b) {
        return cap_sr(a.min(b));
    }
    const STEPS: usize = 4000;
    let h = a / STEPS as f64;
    let ring = |theta: f64| {
        let (st, ct) = (theta.sin(), theta.cos());
        let inside = if st * gamma.sin() < 1e-15 {
            if ct * gamma.cos() >= b.cos() { 1.0 } else { 0.0 }
        } else {
            // A point at polar angle theta and azimuth phi about the first centre lies in the second cap
            // when cos(theta)cos(gamma) + sin(theta)sin(gamma)cos(phi) >= cos(b).
            let x = (b.cos() - ct * gamma.cos()) / (st * gamma.sin());
            x.clamp(-1.0, 1.0).acos() / std::f64::consts::PI
        };
        2.0 * std::f64::consts::PI * st * inside
    };
    // Simpson's rule on an even number of steps.
    let mut sum = ring(0.0) + ring(a);
    for i in 1..STEPS {
        let w = if i % 2 == 1 { 4.0 } else { 2.0 };
        sum += w * ring(i as f64 * h);
    }
    sum * h / 3.0
}

/// Angular separation of two ICRS positions, degrees (haversine form, accurate at small angles).
pub(crate) fn separation_deg(ra1: f64, dec1: f64, ra2: f64, dec2: f64) -> f64 {
    let (d1, d2) = (dec1.to_radians(), dec2.to_radians());
    let dra = (ra2 - ra1).to_radians();
    let h = ((d2 - d1) / 2.0).sin().powi(2) + d1.cos() * d2.cos() * (dra / 2.0).sin().powi(2);
    (2.0 * h.sqrt().min(1.0).asin()).to_degrees()
}

/// The joint false-alarm rate, per year: two independent streams of triggers at `f1` and `f2` per year
/// coincide within +-`window_s` at 2 W F1 F2 (per year, with W in years), and a chance coincidence also
/// agrees in position with probability `position_chance`.
pub(crate) fn joint_far_per_year(f1: f64, f2: f64, window_s: f64, position_chance: f64) -> f64 {
    2.0 * (window_s / SECONDS_PER_YEAR) * f1 * f2 * position_chance
}

/// Chance that two unrelated positions, each anywhere in a region of `overlap_sr`, lie within `radius_deg`
/// of each other: the cap of that radius over the region, at most 1.
pub(crate) fn position_chance(radius_deg: f64, overlap_sr: f64) -> f64 {
    if overlap_sr <= 0.0 {
        return 1.0;
    }
    (cap_sr(radius_deg.to_radians()) / overlap_sr).min(1.0)
}

/// Inverse-variance combination of distance estimates given as (best, 90% low, 90% high), parsecs: each
/// sigma is the 90% interval's width over 2 x 1.645; returns (best, low, high) of the combination.
pub(crate) fn combine_distances(fits: &[(f64, f64, f64)]) -> Option<(f64, f64, f64)> {
    let mut wsum = 0.0;
    let mut dsum = 0.0;
    for &(d, lo, hi) in fits {
        let sigma = (hi - lo) / (2.0 * Z90);
        if !(d.is_finite() && sigma.is_finite() && sigma > 0.0) {
            return None;
        }
        let w = 1.0 / (sigma * sigma);
        wsum += w;
        dsum += w * d;
    }
    if wsum <= 0.0 {
        return None;
    }
    let (d, sigma) = (dsum / wsum, wsum.sqrt().recip());
    Some((d, (d - Z90 * sigma).max(0.0), d + Z90 * sigma))
}

/// A single-site candidate as coincide keeps it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct Candidate {
    /// The assessment's id and the flash it assesses.
    pub(crate) id: String,
    pub(crate) flash_id: String,
    pub(crate) instrument: String,
    /// The best trigger's window, GPS ns.
    pub(crate) start_gps_ns: i64,
    pub(crate) end_gps_ns: i64,
    pub(crate) ra_deg: f64,
    pub(crate) dec_deg: f64,
    /// 90% error radius, degrees.
    pub(crate) error_radius_deg: f64,
    pub(crate) far_per_year: f64,
    /// The evaporation fit's distance and 90% interval, parsecs, when it converged.
    pub(crate) distance: Option<(f64, f64, f64)>,
}

impl Candidate {
    /// An assessment that was not found instrumental, with a trigger; `None` for anything else.
    pub(crate) fn of(a: &pb::Alert) -> Option<Self> {
        if a.kind != pb::AlertKind::Assessment as i32 {
            return None;
        }
        let s = a.assessment.as_ref()?;
        if s.verdict == pb::Verdict::Instrumental as i32 {
            return None;
        }
        let t = a.trigger.as_ref()?;
        let distance = s
            .fit
            .as_ref()
            .filter(|f| f.converged)
            .map(|f| (f.distance_pc, f.distance_pc_lo, f.distance_pc_hi));
        Some(Self {
            id: a.id.clone(),
            flash_id: s.flash_id.clone(),
            instrument: a.instrument.clone(),
            start_gps_ns: t.start_gps_ns,
            end_gps_ns: t.end_gps_ns,
            ra_deg: t.ra_deg,
            dec_deg: t.dec_deg,
            error_radius_deg: t.error_radius_deg,
            far_per_year: t.far_per_year,
            distance,
        })
    }

    fn centre_s(&self) -> f64 {
        (self.start_gps_ns as f64 + self.end_gps_ns as f64) / 2e9
    }

    fn half_window_s(&self) -> f64 {
        (self.end_gps_ns - self.start_gps_ns).max(0) as f64 / 2e9
    }
}

/// What joins two candidates; `None` from [`joint_of`] when they do not agree.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct JointNumbers {
    pub(crate) time_difference_s: f64,
    pub(crate) window_s: f64,
    pub(crate) light_travel_s: f64,
    pub(crate) separation_deg: f64,
    pub(crate) combined_radius_deg: f64,
    pub(crate) overlap_sr: f64,
    pub(crate) position_chance: f64,
    pub(crate) far_per_year: f64,
    pub(crate) distance: Option<(f64, f64, f64)>,
}

/// Tests two candidates from two sites: in time within W = light travel + both clock tolerances + half of
/// each trigger window (a trigger's time is known only to within its window), and in position within the
/// two error radii in quadrature.
pub(crate) fn joint_of(
    a: &Candidate,
    sa: &SiteConfig,
    b: &Candidate,
    sb: &SiteConfig,
) -> Option<JointNumbers> {
    let light = light_travel_s(sa, sb);
    let window_s =
        light + sa.clock_tolerance_s + sb.clock_tolerance_s + a.half_window_s() + b.half_window_s();
    let dt = b.centre_s() - a.centre_s();
    if dt.abs() > window_s {
        return None;
    }
    let sep = separation_deg(a.ra_deg, a.dec_deg, b.ra_deg, b.dec_deg);
    let radius = a.error_radius_deg.hypot(b.error_radius_deg);
    if sep > radius {
        return None;
    }
    let overlap = cap_overlap_sr(
        sa.fov_radius_deg.to_radians(),
        sb.fov_radius_deg.to_radians(),
        zenith_separation_rad(sa, sb),
    );
    if overlap <= 0.0 {
        return None;
    }
    let chance = position_chance(radius, overlap);
    let distance = match (a.distance, b.distance) {
        (Some(x), Some(y)) => combine_distances(&[x, y]),
        _ => None,
    };
    Some(JointNumbers {
        time_difference_s: dt,
        window_s,
        light_travel_s: light,
        separation_deg: sep,
        combined_radius_deg: radius,
        overlap_sr: overlap,
        position_chance: chance,
        far_per_year: joint_far_per_year(a.far_per_year, b.far_per_year, window_s, chance),
        distance,
    })
}

/// A stable short hash (FNV-1a, 64 bits) naming a joint alert by what it joins, so a joint alert issued
/// again after a restart has the same id and the bus drops the copy.
fn fnv1a(parts: &[&str]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for p in parts {
        for b in p.bytes().chain(std::iter::once(0)) {
            h ^= u64::from(b);
            h = h.wrapping_mul(0x0100_0000_01b3);
        }
    }
    h
}

/// The JOINT alert for two candidates that agree.
pub(crate) fn joint_alert(
    name: &str,
    a: &Candidate,
    b: &Candidate,
    j: &JointNumbers,
    issued_unix_ns: i64,
) -> pb::Alert {
    // Position: mean of the two unit vectors weighted by 1/r^2; radius: the inverse-variance one.
    let unit = |ra: f64, dec: f64| {
        let (r, d) = (ra.to_radians(), dec.to_radians());
        [d.cos() * r.cos(), d.cos() * r.sin(), d.sin()]
    };
    let (wa, wb) = (
        a.error_radius_deg.max(1e-9).powi(-2),
        b.error_radius_deg.max(1e-9).powi(-2),
    );
    let (ua, ub) = (unit(a.ra_deg, a.dec_deg), unit(b.ra_deg, b.dec_deg));
    let v: Vec<f64> = (0..3).map(|i| wa * ua[i] + wb * ub[i]).collect();
    let norm = v.iter().map(|x| x * x).sum::<f64>().sqrt().max(1e-300);
    let ra = v[1].atan2(v[0]).to_degrees().rem_euclid(360.0);
    let dec = (v[2] / norm).clamp(-1.0, 1.0).asin().to_degrees();
    let radius = (wa + wb).sqrt().recip();
    let (start, end) = (a.start_gps_ns.min(b.start_gps_ns), a.end_gps_ns.max(b.end_gps_ns));
    let mut ids = [a.id.as_str(), b.id.as_str()];
    ids.sort_unstable();
    let id = format!(
        "GL-{name}-{}-{:016x}",
        timefmt::gps_ns_to_id_stamp(end),
        fnv1a(&ids)
    );
    let issued_gps = timefmt::unix_ns_to_gps_ns(issued_unix_ns);
    let (has_distance, (d, lo, hi)) = match j.distance {
        Some(x) => (true, x),
        None => (false, (0.0, 0.0, 0.0)),
    };
    pb::Alert {
        seq: 0,
        id,
        kind: pb::AlertKind::Joint as i32,
        instrument: name.to_string(),
        issued_utc: timefmt::gps_ns_to_utc(issued_gps),
        issued_gps_ns: issued_gps,
        trigger: Some(pb::Trigger {
            start_gps_ns: start,
            end_gps_ns: end,
            start_utc: timefmt::gps_ns_to_utc(start),
            end_utc: timefmt::gps_ns_to_utc(end),
            end_mjd: timefmt::gps_ns_to_mjd(end),
            ra_deg: ra,
            dec_deg: dec,
            error_radius_deg: radius,
            timescale_s: (end - start) as f64 / 1e9,
            far_per_year: j.far_per_year,
            ..Default::default()
        }),
        joint: Some(pb::Joint {
            alert_ids: vec![a.id.clone(), b.id.clone()],
            instruments: vec![a.instrument.clone(), b.instrument.clone()],
            time_difference_s: j.time_difference_s,
            window_s: j.window_s,
            light_travel_s: j.light_travel_s,
            separation_deg: j.separation_deg,
            combined_radius_deg: j.combined_radius_deg,
            overlap_sr: j.overlap_sr,
            position_chance: j.position_chance,
            single_far_per_year: vec![a.far_per_year, b.far_per_year],
            far_per_year: j.far_per_year,
            has_distance,
            distance_pc: d,
            distance_pc_lo: lo,
            distance_pc_hi: hi,
        }),
        ..Default::default()
    }
}

/// What coincide remembers between alerts (and across restarts, in its state file).
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub(crate) struct CoincideState {
    /// Candidates within the horizon, in arrival order.
    pub(crate) held: Vec<Candidate>,
    /// Pairs of candidate ids already joined (sorted within each pair).
    pub(crate) joined: BTreeSet<(String, String)>,
    /// Newest trigger end seen, GPS ns: candidates more than the horizon behind it are forgotten.
    pub(crate) newest_gps_ns: i64,
}

/// The matcher: sites from the configuration, state from [`CoincideState`].
#[derive(Debug)]
pub(crate) struct Coincider {
    cfg: CoincideConfig,
    /// The state to keep.
    pub(crate) state: CoincideState,
}

impl Coincider {
    /// A matcher with the given state (empty at first start).
    pub(crate) fn new(cfg: CoincideConfig, state: CoincideState) -> Self {
        Self { cfg, state }
    }

    /// Takes one alert from the bus; returns the joint alerts it completes and whether the state changed.
    pub(crate) fn on_alert(&mut self, a: &pb::Alert, now_unix_ns: i64) -> (Vec<pb::Alert>, bool) {
        if a.kind == pb::AlertKind::Withdrawal as i32 {
            let before = self.state.held.len();
            self.state
                .held
                .retain(|c| c.id != a.withdrawn_id && c.flash_id != a.withdrawn_id);
            return (Vec::new(), self.state.held.len() != before);
        }
        let Some(c) = Candidate::of(a) else {
            return (Vec::new(), false);
        };
        let Some(site) = self.cfg.site(&c.instrument).cloned() else {
            tracing::debug!(instrument = %c.instrument, "not a configured site; ignored");
            return (Vec::new(), false);
        };
        if self.state.held.iter().any(|h| h.id == c.id) {
            // Delivered again (a restart before the acknowledgement): already taken.
            return (Vec::new(), false);
        }
        let mut out = Vec::new();
        for h in &self.state.held {
            if h.instrument == c.instrument {
                continue;
            }
            let Some(hs) = self.cfg.site(&h.instrument) else {
                continue;
            };
            let mut pair = (h.id.clone(), c.id.clone());
            if pair.1 < pair.0 {
                pair = (pair.1, pair.0);
            }
            if self.state.joined.contains(&pair) {
                continue;
            }
            if let Some(j) = joint_of(h, hs, &c, &site) {
                out.push(joint_alert(&self.cfg.name, h, &c, &j, now_unix_ns));
                self.state.joined.insert(pair);
            }
        }
        self.state.newest_gps_ns = self.state.newest_gps_ns.max(c.end_gps_ns);
        self.state.held.push(c);
        let horizon_ns = (self.cfg.horizon_s * 1e9) as i64;
        let oldest = self.state.newest_gps_ns.saturating_sub(horizon_ns);
        self.state.held.retain(|h| h.end_gps_ns >= oldest);
        let kept: BTreeSet<&str> = self.state.held.iter().map(|h| h.id.as_str()).collect();
        self.state
            .joined
            .retain(|(x, y)| kept.contains(x.as_str()) || kept.contains(y.as_str()));
        (out, true)
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests;
