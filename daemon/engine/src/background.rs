//! Background model (docs/science.md section 4): b = R x dt x a(zenith, azimuth) x Omega_r. R is the trailing
//! all-sky rate (released photons over live time); a is the acceptance density in the instrument frame, a
//! time-decayed histogram of 32 equal-solid-angle zenith bins (uniform in cos zenith up to the field's edge)
//! by 8 azimuth bins of 45 degrees, normalised to 1 over the field and saved as a versioned, CRC-checked blob.
//! Memory: the fixed bins, plus one time per photon in the rate's retention window.

use std::collections::VecDeque;

use crate::dead::DeadTime;
use crate::error::EngineError;

/// Zenith bins (equal solid angle).
pub(crate) const N_ZENITH: usize = 32;
/// Azimuth bins.
pub(crate) const N_AZIMUTH: usize = 8;
/// Number of acceptance bins.
pub(crate) const N_BINS: usize = N_ZENITH * N_AZIMUTH;

const MAGIC: &[u8; 8] = b"GLINTACC";
const VERSION: u32 = 1;
/// Rescale the stored weights before exp((t - t_ref) / tau) can overflow.
const RESCALE_EXPONENT: f64 = 200.0;

/// Time-decayed acceptance histogram over (zenith, azimuth).
#[derive(Debug, Clone)]
pub(crate) struct AcceptanceMap {
    cos_max: f64,
    /// Zenith angles (degrees) of the inner bin edges, so binning needs no trigonometry per photon.
    zenith_edges: [f64; N_ZENITH - 1],
    max_zenith_deg: f64,
    tau_ns: f64,
    /// Bin weights scaled by exp((t_ref - t_now)/tau); the true weight at time t is w * exp(-(t - t_ref)/tau).
    w: Vec<f64>,
    total: f64,
    /// Reference time of the scaled weights; None until the first photon anchors it (a loaded map is not aged
    /// by the downtime before the stream resumes).
    t_ref: Option<i64>,
    /// Time of the newest photon added.
    t_last: Option<i64>,
    /// Time of the newest photon of a loaded map, written back until new photons arrive.
    t_saved: i64,
    loaded: bool,
}

impl AcceptanceMap {
    pub(crate) fn new(max_zenith_deg: f64, tau_s: f64) -> Self {
        let cos_max = max_zenith_deg.to_radians().cos();
        let mut zenith_edges = [0.0; N_ZENITH - 1];
        for (i, e) in zenith_edges.iter_mut().enumerate() {
            let c = 1.0 - (1.0 - cos_max) * (i + 1) as f64 / N_ZENITH as f64;
            *e = c.clamp(-1.0, 1.0).acos().to_degrees();
        }
        Self {
            cos_max,
            zenith_edges,
            max_zenith_deg,
            tau_ns: tau_s * 1e9,
            w: vec![0.0; N_BINS],
            total: 0.0,
            t_ref: None,
            t_last: None,
            t_saved: 0,
            loaded: false,
        }
    }

    /// Solid angle of one bin, steradians.
    pub(crate) fn bin_solid_angle(&self) -> f64 {
        2.0 * std::f64::consts::PI * (1.0 - self.cos_max) / N_BINS as f64
    }

    /// Bin of an instrument-frame direction, or None outside the field of view.
    pub(crate) fn bin(&self, zenith_deg: f32, azimuth_deg: f32) -> Option<u16> {
        let z = f64::from(zenith_deg);
        if !(0.0..=self.max_zenith_deg).contains(&z) {
            return None;
        }
        let iz = self.zenith_edges.partition_point(|&e| e <= z);
        let az = f64::from(azimuth_deg).rem_euclid(360.0);
        let ia = ((az / 360.0) * N_AZIMUTH as f64) as usize;
        let ia = ia.min(N_AZIMUTH - 1);
        Some((iz * N_AZIMUTH + ia) as u16)
    }

    /// Seeds the map with a cos^power density carrying `weight` photons (used as a prior).
    pub(crate) fn seed_prior(&mut self, power: f64, weight: f64) {
        // Integral of cos^p over a zenith band is 2 pi (c_hi^(p+1) - c_lo^(p+1)) / (p+1) per full circle;
        // directions below the horizon of the cosine (c < 0) get no weight.
        let span = 1.0 - self.cos_max;
        let mut band = [0.0f64; N_ZENITH];
        for (iz, b) in band.iter_mut().enumerate() {
            let c_hi = 1.0 - span * iz as f64 / N_ZENITH as f64;
            let c_lo = 1.0 - span * (iz + 1) as f64 / N_ZENITH as f64;
            let f = |c: f64| c.max(0.0).powf(power + 1.0) / (power + 1.0);
            *b = (f(c_hi) - f(c_lo)).max(0.0);
        }
        let sum: f64 = band.iter().sum::<f64>() * N_AZIMUTH as f64;
        if sum <= 0.0 || !sum.is_finite() {
            return;
        }
        let scale = self
            .t_ref
            .zip(self.t_last)
            .map_or(1.0, |(r, l)| self.growth(l, r));
        for (row, &b) in self.w.chunks_exact_mut(N_AZIMUTH).zip(&band) {
            for w in row {
                *w += weight * b / sum * scale;
            }
        }
        self.total += weight * scale;
    }

    fn growth(&self, t: i64, t_ref: i64) -> f64 {
        ((t.saturating_sub(t_ref)) as f64 / self.tau_ns).exp()
    }

    /// Adds one photon at time `t` (non-decreasing) in `bin`.
    pub(crate) fn add(&mut self, t: i64, bin: u16) {
        let t_ref = *self.t_ref.get_or_insert(t);
        let mut x = (t.saturating_sub(t_ref)) as f64 / self.tau_ns;
        if x > RESCALE_EXPONENT {
            let k = (-x).exp();
            for w in &mut self.w {
                *w *= k;
            }
            self.total *= k;
            self.t_ref = Some(t);
            x = 0.0;
        }
        let g = x.exp();
        if let Some(w) = self.w.get_mut(usize::from(bin)) {
            *w += g;
            self.total += g;
        }
        self.t_last = Some(t);
    }

    /// Decayed weight (effective photon count) as of the newest photon.
    pub(crate) fn weight(&self) -> f64 {
        match (self.t_ref, self.t_last) {
            (Some(r), Some(l)) => self.total / self.growth(l, r),
            _ => self.total,
        }
    }

    /// True when a saved map was loaded.
    pub(crate) fn loaded(&self) -> bool {
        self.loaded
    }

    /// Density per steradian of every bin, normalised so that sum(a * Omega_bin) = 1.
    pub(crate) fn densities(&self, out: &mut Vec<f64>) {
        out.clear();
        let norm = self.total * self.bin_solid_angle();
        if norm > 0.0 && norm.is_finite() {
            out.extend(self.w.iter().map(|w| w / norm));
        } else {
            out.resize(N_BINS, 0.0);
        }
    }

    /// Serialises the map: magic, version, geometry, weights as of the newest photon, CRC-32 of all before it.
    pub(crate) fn save(&self, instrument: &str) -> Vec<u8> {
        let mut b = Vec::with_capacity(64 + instrument.len() + 8 * N_BINS);
        b.extend_from_slice(MAGIC);
        b.extend_from_slice(&VERSION.to_le_bytes());
        b.extend_from_slice(&(instrument.len() as u32).to_le_bytes());
        b.extend_from_slice(instrument.as_bytes());
        b.extend_from_slice(&(N_ZENITH as u32).to_le_bytes());
        b.extend_from_slice(&(N_AZIMUTH as u32).to_le_bytes());
        b.extend_from_slice(&self.max_zenith_deg.to_le_bytes());
        let scale = match (self.t_ref, self.t_last) {
            (Some(r), Some(l)) => 1.0 / self.growth(l, r),
            _ => 1.0,
        };
        b.extend_from_slice(&self.t_last.unwrap_or(self.t_saved).to_le_bytes());
        b.extend_from_slice(&(self.total * scale).to_le_bytes());
        for w in &self.w {
            b.extend_from_slice(&(w * scale).to_le_bytes());
        }
        let crc = crc32fast::hash(&b);
        b.extend_from_slice(&crc.to_le_bytes());
        b
    }

    /// Replaces the map with a saved one after checking every field; on error the map is unchanged.
    pub(crate) fn load(&mut self, blob: &[u8], instrument: &str) -> Result<(), EngineError> {
        let err = |m: String| EngineError::State(m);
        if blob.len() < MAGIC.len() + 8 {
            return Err(err(format!("blob of {} bytes is too short", blob.len())));
        }
        if &blob[..8] != MAGIC {
            return Err(err("not an acceptance map (bad magic)".into()));
        }
        let (body, crc) = blob.split_at(blob.len() - 4);
        let stored = u32::from_le_bytes([crc[0], crc[1], crc[2], crc[3]]);
        if crc32fast::hash(body) != stored {
            return Err(err("CRC mismatch: the blob is corrupt or truncated".into()));
        }
        let mut r = Reader { b: body, at: 8 };
        let version = r.u32()?;
        if version != VERSION {
            return Err(err(format!(
                "format version {version}, this build reads {VERSION}"
            )));
        }
        let name_len = r.u32()? as usize;
        let name = r.take(name_len)?;
        if name != instrument.as_bytes() {
            return Err(err(format!(
                "map is for instrument {:?}, this engine is {instrument:?}",
                String::from_utf8_lossy(name)
            )));
        }
        let nz = r.u32()? as usize;
        let na = r.u32()? as usize;
        if nz != N_ZENITH || na != N_AZIMUTH {
            return Err(err(format!(
                "map has {nz}x{na} bins, expected {N_ZENITH}x{N_AZIMUTH}"
            )));
        }
        let maxz = r.f64()?;
        if maxz.to_bits() != self.max_zenith_deg.to_bits() {
            return Err(err(format!(
                "map field of view ends at {maxz} deg, the instrument's at {} deg",
                self.max_zenith_deg
            )));
        }
        let t_saved = r.i64()?;
        let total = r.f64()?;
        let mut w = Vec::with_capacity(N_BINS);
        for i in 0..N_BINS {
            let x = r.f64()?;
            if !x.is_finite() || x < 0.0 {
                return Err(err(format!("bin {i} holds {x}, expected a finite weight >= 0")));
            }
            w.push(x);
        }
        if r.at != body.len() {
            return Err(err(format!("{} trailing bytes", body.len() - r.at)));
        }
        let sum: f64 = w.iter().sum();
        if !total.is_finite() || total <= 0.0 || (sum - total).abs() > 1e-6 * total.max(1.0) {
            return Err(err(format!(
                "total weight {total} does not match the bins' sum {sum}"
            )));
        }
        self.w = w;
        self.total = total;
        self.t_ref = None;
        self.t_last = None;
        self.t_saved = t_saved;
        self.loaded = true;
        Ok(())
    }
}

struct Reader<'a> {
    b: &'a [u8],
    at: usize,
}

impl Reader<'_> {
    fn take(&mut self, n: usize) -> Result<&[u8], EngineError> {
        let end = self
            .at
            .checked_add(n)
            .filter(|&e| e <= self.b.len())
            .ok_or_else(|| {
                EngineError::State(format!("truncated: wanted {n} bytes at offset {}", self.at))
            })?;
        let s = &self.b[self.at..end];
        self.at = end;
        Ok(s)
    }
    fn arr<const N: usize>(&mut self) -> Result<[u8; N], EngineError> {
        let s = self.take(N)?;
        let mut a = [0u8; N];
        a.copy_from_slice(s);
        Ok(a)
    }
    fn u32(&mut self) -> Result<u32, EngineError> {
        Ok(u32::from_le_bytes(self.arr()?))
    }
    fn i64(&mut self) -> Result<i64, EngineError> {
        Ok(i64::from_le_bytes(self.arr()?))
    }
    fn f64(&mut self) -> Result<f64, EngineError> {
        Ok(f64::from_le_bytes(self.arr()?))
    }
}

/// Released photon times over a trailing horizon: the all-sky rate R and all-sky counts in past windows.
#[derive(Debug, Default)]
pub(crate) struct AllSky {
    times: VecDeque<i64>,
    /// Photons ever released (the absolute index of the element after the newest).
    released: u64,
    /// Photons evicted from the front (the absolute index of the front element).
    evicted: u64,
    /// Absolute index of the first photon inside the trailing rate window (it only moves forward).
    cursor: u64,
}

impl AllSky {
    pub(crate) fn push(&mut self, t: i64) {
        self.times.push_back(t);
        self.released += 1;
    }

    /// Heap bytes, from capacity.
    pub(crate) fn heap_bytes(&self) -> usize {
        self.times.capacity() * size_of::<i64>()
    }

    /// Photons released so far (all of them with time <= the newest release).
    pub(crate) fn released(&self) -> u64 {
        self.released
    }

    pub(crate) fn evict_before(&mut self, t_min: i64) {
        while self.times.front().is_some_and(|&t| t < t_min) {
            self.times.pop_front();
            self.evicted += 1;
        }
    }

    /// Photons held with a < t <= b.
    pub(crate) fn count(&self, a: i64, b: i64) -> u64 {
        let lo = self.times.partition_point(|&t| t <= a);
        let hi = self.times.partition_point(|&t| t <= b);
        hi.saturating_sub(lo) as u64
    }

    /// Trailing rate over (t - window, t], counting live time only; None until at least half the window
    /// was live (a rate from a few seconds of data would make thresholds swing).
    /// `t` must not decrease from call to call and every photon held must be at or before `t`.
    pub(crate) fn rate_hz(
        &mut self,
        t: i64,
        window_ns: i64,
        dead: &DeadTime,
        stream_start: i64,
    ) -> Option<f64> {
        let a = t.saturating_sub(window_ns).max(stream_start);
        self.cursor = self.cursor.max(self.evicted);
        while self.cursor < self.released && self.times[(self.cursor - self.evicted) as usize] <= a {
            self.cursor += 1;
        }
        let live = t.saturating_sub(a) - dead.overlap(a.saturating_add(1), t.saturating_add(1));
        if live < window_ns / 2 || live <= 0 {
            return None;
        }
        let n = self.released - self.cursor;
        Some(n as f64 / (live as f64 * 1e-9))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bins_have_equal_solid_angle_and_cover_the_field() {
        let m = AcceptanceMap::new(60.0, 3600.0);
        // 2 pi (1 - cos 60 deg) = pi sr [calc].
        assert!((m.bin_solid_angle() * N_BINS as f64 - std::f64::consts::PI).abs() < 1e-12);
        assert_eq!(m.bin(0.0, 0.0), Some(0));
        assert_eq!(m.bin(60.0, 359.9), Some((N_BINS - 1) as u16));
        assert_eq!(m.bin(60.1, 0.0), None);
        assert_eq!(m.bin(-1.0, 0.0), None);
        assert_eq!(m.bin(10.0, 360.0), m.bin(10.0, 0.0));
        // Equal solid angle: the first edge is at acos(1 - (1 - cos 60)/32) = 10.14 deg [calc].
        let edge = (1.0 - 0.5 / 32.0f64).acos().to_degrees() as f32;
        assert_eq!(m.bin(edge - 0.01, 0.0), Some(0));
        assert_eq!(m.bin(edge + 0.01, 0.0), Some(N_AZIMUTH as u16));
    }

    #[test]
    fn prior_density_follows_cos_power_and_integrates_to_one() {
        let mut m = AcceptanceMap::new(45.0, 3600.0);
        m.seed_prior(2.0, 1000.0);
        let mut d = Vec::new();
        m.densities(&mut d);
        let integral: f64 = d.iter().sum::<f64>() * m.bin_solid_angle();
        assert!((integral - 1.0).abs() < 1e-12);
        // cos^2 normalised over a 45-degree cap: a(0) = 3 / (2 pi (1 - cos^3 45deg)) [calc].
        let c3 = 45f64.to_radians().cos().powi(3);
        let a0 = 3.0 / (2.0 * std::f64::consts::PI * (1.0 - c3));
        assert!((d[0] - a0).abs() / a0 < 0.01, "{} vs {a0}", d[0]);
        assert!((m.weight() - 1000.0).abs() < 1e-9);
    }

    #[test]
    fn weights_decay_with_the_time_constant() {
        let mut m = AcceptanceMap::new(45.0, 10.0);
        m.add(0, 3);
        m.add(10_000_000_000, 5);
        // One photon aged by one time constant plus a fresh one: exp(-1) + 1 [calc].
        assert!((m.weight() - (1.0 + (-1.0f64).exp())).abs() < 1e-12);
        // A jump far past the rescale point keeps the weights finite.
        m.add(10_000_000_000_000, 5);
        assert!((m.weight() - 1.0).abs() < 1e-9);
    }

    #[test]
    fn save_load_round_trip_and_corruption() {
        let mut m = AcceptanceMap::new(45.0, 100.0);
        for i in 0..1000 {
            m.add(i * 1_000_000, (i % N_BINS as i64) as u16);
        }
        let blob = m.save("inst");
        let mut n = AcceptanceMap::new(45.0, 100.0);
        n.load(&blob, "inst").unwrap();
        let (mut a, mut b) = (Vec::new(), Vec::new());
        m.densities(&mut a);
        n.densities(&mut b);
        for (x, y) in a.iter().zip(&b) {
            assert!((x - y).abs() <= 1e-12 * x.abs().max(1e-300));
        }
        assert!((n.weight() - m.weight()).abs() < 1e-9 * m.weight());
        assert!(n.loaded());
        assert_eq!(n.save("inst"), blob, "save(load(blob)) gives the blob back");
        let mut bad = blob.clone();
        bad[40] ^= 1;
        assert!(matches!(n.load(&bad, "inst"), Err(EngineError::State(_))));
        assert!(n.load(&blob[..blob.len() - 3], "inst").is_err());
        assert!(n.load(&blob, "other").is_err());
        assert!(n.load(b"", "inst").is_err());
        let mut other = AcceptanceMap::new(50.0, 100.0);
        assert!(
            other.load(&blob, "inst").is_err(),
            "a different field of view is refused"
        );
    }

    #[test]
    fn rate_counts_live_time_only() {
        let mut s = AllSky::default();
        let mut dead = DeadTime::default();
        for i in 0..100i64 {
            s.push(i * 100_000_000); // 10 Hz for 10 s
        }
        let r = s.rate_hz(9_900_000_000, 10_000_000_000, &dead, 0).unwrap();
        assert!((r - 10.0).abs() < 0.2, "{r}");
        // Half the window dead and empty: the rate over live time stays 10 Hz... with half the photons.
        dead.add(0, 4_000_000_000);
        let mut s2 = AllSky::default();
        for i in 40..100i64 {
            s2.push(i * 100_000_000);
        }
        let r2 = s2.rate_hz(9_900_000_000, 10_000_000_000, &dead, 0).unwrap();
        assert!((r2 - 10.0).abs() < 0.3, "{r2}");
        assert_eq!(s2.count(0, 9_900_000_000), 60);
        assert_eq!(s2.count(4_000_000_000, 5_000_000_000), 10);
        dead.add(4_000_000_000, 9_000_000_000);
        assert!(s2.rate_hz(9_900_000_000, 10_000_000_000, &dead, 0).is_none());
    }
}
