//! Time scrambling: the photons of a stretch of data with their arrival times permuted among them, every
//! other column kept. It keeps the rate, the sky's acceptance and the energy spectrum and destroys every
//! clustering in time, so any source or glitch in the data becomes background for calibrating the false-alarm
//! rate (docs/science.md section 4). The frame's coordinates are kept with the sky's: for an instrument whose
//! sky turns, keep the instrument frame and recompute the sky position at the new time instead.

use glint_wire::pb::PhotonBatch;
use rand::{RngExt, SeedableRng};
use rand_pcg::Pcg64;

/// The photons of `batches` with their times permuted among them (Fisher-Yates, seeded), sorted by the new
/// time and cut back into batches of the same sizes, numbered from the first batch's `seq`. Optional columns
/// (`psf68_deg`, `gammaness`) go with their photon when every batch has them, and are dropped otherwise.
pub fn scramble_times(batches: &[PhotonBatch], seed: u64) -> Vec<PhotonBatch> {
    let n: usize = batches.iter().map(|b| b.time_gps_ns.len()).sum();
    let keep_psf = batches.iter().all(|b| b.psf68_deg.len() == b.time_gps_ns.len());
    let keep_gam = batches.iter().all(|b| b.gammaness.len() == b.time_gps_ns.len());
    let mut times: Vec<i64> = Vec::with_capacity(n);
    // (ra, dec, zenith, azimuth, energy, psf68, gammaness) of each photon, in input order.
    let mut rest: Vec<(f64, f64, f32, f32, f32, f32, f32)> = Vec::with_capacity(n);
    for b in batches {
        let m = b.time_gps_ns.len();
        let col = |v: &[f32], j: usize| v.get(j).copied().unwrap_or(0.0);
        for j in 0..m {
            times.push(b.time_gps_ns[j]);
            rest.push((
                b.ra_deg.get(j).copied().unwrap_or(0.0),
                b.dec_deg.get(j).copied().unwrap_or(0.0),
                col(&b.zenith_deg, j),
                col(&b.azimuth_deg, j),
                col(&b.energy_gev, j),
                col(&b.psf68_deg, j),
                col(&b.gammaness, j),
            ));
        }
    }
    let mut rng = Pcg64::seed_from_u64(seed);
    for i in (1..times.len()).rev() {
        let j = rng.random_range(0..=i);
        times.swap(i, j);
    }
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by_key(|&i| (times[i], i));
    let mut out = Vec::with_capacity(batches.len());
    let mut it = order.into_iter();
    let seq0 = batches.first().map_or(1, |b| b.seq);
    for (k, b) in batches.iter().enumerate() {
        let mut nb = PhotonBatch {
            seq: seq0 + k as u64,
            ..Default::default()
        };
        for i in it.by_ref().take(b.time_gps_ns.len()) {
            let r = rest[i];
            nb.time_gps_ns.push(times[i]);
            nb.ra_deg.push(r.0);
            nb.dec_deg.push(r.1);
            nb.zenith_deg.push(r.2);
            nb.azimuth_deg.push(r.3);
            nb.energy_gev.push(r.4);
            if keep_psf {
                nb.psf68_deg.push(r.5);
            }
            if keep_gam {
                nb.gammaness.push(r.6);
            }
        }
        out.push(nb);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn batch(seq: u64, times: &[i64]) -> PhotonBatch {
        PhotonBatch {
            seq,
            time_gps_ns: times.to_vec(),
            ra_deg: times.iter().map(|&t| t as f64).collect(),
            dec_deg: times.iter().map(|&t| -(t as f64)).collect(),
            zenith_deg: times.iter().map(|&t| t as f32).collect(),
            azimuth_deg: times.iter().map(|&t| t as f32 + 0.5).collect(),
            energy_gev: times.iter().map(|&t| 100.0 + t as f32).collect(),
            ..Default::default()
        }
    }

    #[test]
    fn times_are_permuted_and_every_photon_keeps_its_other_columns() {
        // A burst of 50 photons at one instant in 1000 spread ones: scrambled, the instant keeps one photon's
        // worth of time (the times are a permutation) and no more than a handful of the burst's photons.
        let mut times: Vec<i64> = (0..1000).map(|i| i * 1000).collect();
        times.extend(std::iter::repeat_n(500_000, 50));
        times.sort_unstable();
        let input = vec![batch(7, &times[..600]), batch(8, &times[600..])];
        let out = scramble_times(&input, 3);
        assert_eq!(out.len(), 2);
        assert_eq!((out[0].seq, out[1].seq), (7, 8));
        assert_eq!(out[0].time_gps_ns.len(), 600);
        let mut got: Vec<i64> = out.iter().flat_map(|b| b.time_gps_ns.clone()).collect();
        assert!(got.windows(2).all(|w| w[0] <= w[1]), "sorted by the new time");
        got.sort_unstable();
        assert_eq!(got, times, "the times are a permutation of the input's");
        // Positions, frame and energy still belong together (each photon's columns were made from one
        // original time), and the photons with the burst's time are mostly others now.
        let mut moved = 0;
        let mut at_burst = 0;
        for b in &out {
            for j in 0..b.time_gps_ns.len() {
                let t0 = b.ra_deg[j];
                assert_eq!(b.dec_deg[j], -t0);
                assert_eq!(b.zenith_deg[j], t0 as f32);
                assert_eq!(b.energy_gev[j], 100.0 + t0 as f32);
                moved += usize::from(t0 as i64 != b.time_gps_ns[j]);
                at_burst += usize::from(b.time_gps_ns[j] == 500_000 && t0 as i64 == 500_000);
            }
        }
        assert!(moved > 950, "{moved} photons moved");
        assert!(at_burst < 10, "{at_burst} burst photons kept the burst's time");
        // Deterministic per seed, different across seeds.
        assert_eq!(scramble_times(&input, 3), out);
        assert_ne!(scramble_times(&input, 4), out);
    }
}
