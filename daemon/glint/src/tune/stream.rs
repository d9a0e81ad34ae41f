//! The photons of one tuning pass: recordings read once into columns, then replayed as frames in time order,
//! as they are, time-scrambled (photon times permuted among the photons, positions kept), or with simulated
//! bursts merged in. Dead time (declared intervals and sequence gaps) is carried over as explicit intervals.

use std::path::PathBuf;

use glint_sim::sky::SkyFrame;
use glint_wire::pb::{self, ProducerFrame, producer_frame::Body};
use rand::seq::SliceRandom;

/// Dead intervals longer than this become stream breaks (ten minutes; the engine's clock-jump guard is
/// an hour by default).
const LONG_GAP_NS: i64 = 600_000_000_000;

/// Why recordings could not be read.
#[derive(Debug, thiserror::Error)]
pub(crate) enum StreamError {
    /// A recording did not open or decode.
    #[error("{path}: {detail}")]
    Read { path: PathBuf, detail: String },
    /// Nothing to tune on.
    #[error("the recordings hold no photons")]
    Empty,
}

/// One photon, the columns the engine reads.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Photon {
    pub(crate) t: i64,
    pub(crate) ra: f64,
    pub(crate) dec: f64,
    pub(crate) zenith: f32,
    pub(crate) azimuth: f32,
    pub(crate) energy: f32,
}

/// Every photon of the recordings in time order, their dead intervals and their instrument.
#[derive(Debug, Clone, Default)]
pub(crate) struct Photons {
    pub(crate) instrument: Option<String>,
    pub(crate) photons: Vec<Photon>,
    /// Dead intervals `[start, end)`, GPS ns, sorted.
    pub(crate) dead: Vec<(i64, i64)>,
}

impl Photons {
    /// Reads the recordings or FITS event lists (what `replay` reads; in the order given, their photons then
    /// sorted by time). The gap between one file's end and the next one's start is dead time. `instrument`
    /// picks the instrument a FITS file is read for, as `replay --instrument` does.
    pub(crate) fn read(
        files: &[PathBuf],
        cfg: &crate::config::Config,
        instrument: Option<&str>,
    ) -> Result<Self, StreamError> {
        let mut out = Self::default();
        for path in files {
            let err = |detail: String| StreamError::Read {
                path: path.clone(),
                detail,
            };
            let reader = crate::fits::InputFrames::open(path, cfg, instrument, cfg.daemon.max_frame_bytes)
                .map_err(|e| err(e.to_string()))?;
            let mut last_seq: Option<u64> = None;
            let mut latest: Option<i64> = None;
            let first_of_file = out.photons.len();
            for frame in reader {
                let frame = frame.map_err(|e| err(e.to_string()))?;
                match frame.body {
                    Some(Body::Hello(h)) => {
                        out.instrument.get_or_insert(h.instrument);
                        last_seq = None;
                    }
                    Some(Body::Batch(b)) => {
                        let n = b.time_gps_ns.len();
                        let ok = [
                            b.ra_deg.len(),
                            b.dec_deg.len(),
                            b.zenith_deg.len(),
                            b.azimuth_deg.len(),
                        ]
                        .iter()
                        .chain(std::iter::once(&b.energy_gev.len()))
                        .all(|&l| l == n);
                        if !ok {
                            return Err(err(format!("batch {} has columns of unequal length", b.seq)));
                        }
                        let first = b.time_gps_ns.iter().min().copied();
                        if let (Some(ls), Some(lt), Some(f)) = (last_seq, latest, first) {
                            // A silent sequence gap is dead time, as the engine counts it.
                            if b.seq > ls.saturating_add(1) && f > lt {
                                out.dead.push((lt.saturating_add(1), f));
                            }
                        }
                        last_seq = Some(b.seq);
                        for i in 0..n {
                            out.photons.push(Photon {
                                t: b.time_gps_ns[i],
                                ra: b.ra_deg[i],
                                dec: b.dec_deg[i],
                                zenith: b.zenith_deg[i],
                                azimuth: b.azimuth_deg[i],
                                energy: b.energy_gev[i],
                            });
                        }
                        if let Some(m) = b.time_gps_ns.iter().max() {
                            latest = Some(latest.map_or(*m, |l| l.max(*m)));
                        }
                    }
                    Some(Body::Status(s)) => {
                        last_seq = Some(s.seq);
                        for d in &s.dead {
                            if d.end_gps_ns > d.start_gps_ns {
                                out.dead.push((d.start_gps_ns, d.end_gps_ns));
                            }
                        }
                    }
                    None => {}
                }
            }
            // Between recordings: dead from the previous one's last photon to this one's first.
            if first_of_file > 0 {
                let prev_end = out.photons[..first_of_file].iter().map(|p| p.t).max();
                let this_start = out.photons[first_of_file..].iter().map(|p| p.t).min();
                if let (Some(a), Some(b)) = (prev_end, this_start) {
                    if b > a.saturating_add(1) {
                        out.dead.push((a.saturating_add(1), b));
                    }
                }
            }
        }
        if out.photons.is_empty() {
            return Err(StreamError::Empty);
        }
        out.sort();
        Ok(out)
    }

    pub(crate) fn sort(&mut self) {
        // Equal times keep a fixed order (by position bits) so the frames are a pure function of the set.
        self.photons.sort_by(|a, b| {
            (a.t, a.ra.to_bits(), a.dec.to_bits()).cmp(&(b.t, b.ra.to_bits(), b.dec.to_bits()))
        });
        self.dead.sort_unstable();
    }

    /// First and last photon times.
    pub(crate) fn span(&self) -> (i64, i64) {
        let first = self.photons.first().map_or(0, |p| p.t);
        let last = self.photons.last().map_or(0, |p| p.t);
        (first, last)
    }

    /// A time-scrambled copy: the times permuted among the photons, each photon keeping its position in
    /// the instrument (zenith, azimuth) and energy, its sky position recomputed for its new time through
    /// `frame`. Keeping RA and Dec instead would smear the sky's rotation over the whole span and leave
    /// the background model's acceptance, which follows the instrument, wrong in every disc: on 40 minutes
    /// at 250 Hz that gave 112 candidates at 1e6 per year where 76 were expected.
    pub(crate) fn scrambled(&self, rng: &mut rand_pcg::Pcg64, frame: &SkyFrame) -> Self {
        let mut times: Vec<i64> = self.photons.iter().map(|p| p.t).collect();
        times.shuffle(rng);
        let mut out = self.clone();
        for (p, t) in out.photons.iter_mut().zip(times) {
            p.t = t;
            let (ra, dec) = frame.to_icrs(f64::from(p.zenith), f64::from(p.azimuth), t);
            p.ra = ra;
            p.dec = dec;
        }
        out.sort();
        out
    }

    /// A copy with `extra` photons merged in (photons inside dead intervals are dropped).
    pub(crate) fn with(&self, extra: &[Photon]) -> Self {
        let mut out = self.clone();
        out.photons.extend(
            extra
                .iter()
                .filter(|p| !self.dead.iter().any(|&(a, b)| p.t >= a && p.t < b)),
        );
        out.sort();
        out
    }

    /// The photons as producer frames for a fresh driver: batches of at most `batch` photons, each dead
    /// interval declared in a status frame just before the first photon after it (one longer than
    /// `LONG_GAP_NS` as a stream break instead, which the engine also counts as dead, so the clock-jump
    /// guard does not refuse the frame after it).
    pub(crate) fn frames(&self, batch: usize) -> Vec<ProducerFrame> {
        let mut frames = Vec::new();
        let mut seq = 1u64;
        let mut dead = self.dead.iter().peekable();
        let mut i = 0;
        let n = self.photons.len();
        while i < n {
            let t = self.photons[i].t;
            let mut due = Vec::new();
            while let Some(&&(a, b)) = dead.peek() {
                if b <= t {
                    due.push(pb::DeadInterval {
                        start_gps_ns: a,
                        end_gps_ns: b,
                        reason: "from the recording".to_owned(),
                    });
                    dead.next();
                } else {
                    break;
                }
            }
            if due.iter().any(|d| d.end_gps_ns - d.start_gps_ns > LONG_GAP_NS) {
                frames.push(ProducerFrame {
                    body: Some(Body::Hello(pb::Hello {
                        instrument: String::new(),
                        token: String::new(),
                        schema_version: glint_wire::SCHEMA_VERSION,
                        producer: "glint tune".to_owned(),
                    })),
                });
                seq = 1;
            } else if !due.is_empty() {
                let now = due.iter().map(|d| d.end_gps_ns).max().unwrap_or(t);
                frames.push(ProducerFrame {
                    body: Some(Body::Status(pb::StreamStatus {
                        seq,
                        now_gps_ns: now,
                        dead: due,
                    })),
                });
                seq += 1;
            }
            // A batch stops before the next dead interval's end so that interval is declared in time.
            let stop = dead.peek().map_or(i64::MAX, |d| d.1);
            let mut j = i;
            while j < n && j - i < batch && self.photons[j].t < stop {
                j += 1;
            }
            if j == i {
                j = i + 1;
            }
            let ps = &self.photons[i..j];
            frames.push(ProducerFrame {
                body: Some(Body::Batch(pb::PhotonBatch {
                    seq,
                    time_gps_ns: ps.iter().map(|p| p.t).collect(),
                    ra_deg: ps.iter().map(|p| p.ra).collect(),
                    dec_deg: ps.iter().map(|p| p.dec).collect(),
                    zenith_deg: ps.iter().map(|p| p.zenith).collect(),
                    azimuth_deg: ps.iter().map(|p| p.azimuth).collect(),
                    energy_gev: ps.iter().map(|p| p.energy).collect(),
                    ..Default::default()
                })),
            });
            seq += 1;
            i = j;
        }
        frames
    }

    /// The photons of simulator frames (the injections), Hello and status frames ignored.
    pub(crate) fn from_frames(frames: impl Iterator<Item = ProducerFrame>) -> Vec<Photon> {
        let mut out = Vec::new();
        for f in frames {
            if let Some(Body::Batch(b)) = f.body {
                for i in 0..b.time_gps_ns.len() {
                    out.push(Photon {
                        t: b.time_gps_ns[i],
                        ra: b.ra_deg[i],
                        dec: b.dec_deg[i],
                        zenith: b.zenith_deg.get(i).copied().unwrap_or(0.0),
                        azimuth: b.azimuth_deg.get(i).copied().unwrap_or(0.0),
                        energy: b.energy_gev.get(i).copied().unwrap_or(1.0),
                    });
                }
            }
        }
        out
    }
}
