//! Sky index: the photons of the last (longest timescale + pre-window), bucketed by HEALPix nested pixel at a
//! depth whose pixels are at least as wide as the search radius, so a seed's disc lies inside its own pixel
//! and the 8 (or 7) neighbours. Only active pixels exist, each with its photons in time order, so a seed walks
//! back from the newest and stops at the longest timescale. Memory: 72 bytes per held photon plus about 280 per
//! active pixel (about 220 per held photon at 500 Hz): it grows with event rate x retention, never with uptime.

use std::collections::{HashMap, VecDeque};
use std::hash::{BuildHasherDefault, Hasher};

use cdshealpix::nested::{self, Layer};

use crate::reorder::Photon;

/// Position and time of a held photon: what the seeded test reads.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Hot {
    pub(crate) t: i64,
    pub(crate) v: [f64; 3],
}

/// The rest of a held photon, read only when a test crosses or a candidate collects photons.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Cold {
    pub(crate) ra: f64,
    pub(crate) dec: f64,
    pub(crate) energy: f32,
    pub(crate) zenith: f32,
    pub(crate) azimuth: f32,
}

impl Cold {
    pub(crate) fn photon(&self, t: i64) -> Photon {
        Photon {
            t,
            ra: self.ra,
            dec: self.dec,
            energy: self.energy,
            zenith: self.zenith,
            azimuth: self.azimuth,
        }
    }
}

/// Slack on the neighbour-reach test for the f32 rounding of centres and cosines (each below 1e-7).
const GEO_MARGIN: f64 = 1e-6;

/// Marks an inactive neighbour in a bucket's neighbour cache.
const NONE: u32 = u32::MAX;

/// What a seed reads of one active pixel, kept in one cache line: its photons' times and directions and the
/// buckets of its active neighbours.
#[derive(Debug)]
#[repr(align(64))]
pub(crate) struct Bucket {
    pub(crate) hot: VecDeque<Hot>,
    /// Bucket of each neighbouring pixel (same order as `Meta::neigh`), NONE when that pixel is inactive.
    nslots: [u32; 8],
    /// Per neighbour: its centre (unit vector) and the cosine of (search radius + its bounding radius) less
    /// a margin covering f32 rounding; a seed whose dot product with the centre is below that cannot reach
    /// into the neighbour. (For tiny radii the margin keeps every neighbour: safe, just slower.) Read only
    /// for the seed's own bucket, right after its first line.
    geo: [[f32; 4]; 8],
}

/// The rest of an active pixel.
#[derive(Debug, Default)]
struct Meta {
    pix: u64,
    /// Neighbouring pixels (8, or 7 at some base-cell corners), computed once when the bucket opens.
    neigh: [u64; 8],
    n_neigh: u8,
}

/// A held photon in release order: its bucket and the columns the seeded test does not read.
#[derive(Debug, Clone, Copy)]
struct Entry {
    t: i64,
    slot: u32,
    cold: Cold,
}

/// Pixel number -> bucket. A flat table when the depth has at most 2^20 pixels (4 MiB; search radii above
/// about 0.2 degrees), a hash map otherwise; lookups only, never iterated into an output.
#[derive(Debug)]
enum PixMap {
    Dense { slots: Vec<u32>, len: usize },
    Hashed(HashMap<u64, u32, BuildHasherDefault<PixHasher>>),
}

impl PixMap {
    fn new(depth: u8) -> Self {
        let n = cdshealpix::n_hash(depth);
        if n <= 1 << 20 {
            Self::Dense {
                slots: vec![NONE; n as usize],
                len: 0,
            }
        } else {
            Self::Hashed(HashMap::default())
        }
    }
    #[inline]
    fn get(&self, pix: u64) -> Option<u32> {
        match self {
            Self::Dense { slots, .. } => slots.get(pix as usize).copied().filter(|&s| s != NONE),
            Self::Hashed(m) => m.get(&pix).copied(),
        }
    }
    fn insert(&mut self, pix: u64, slot: u32) {
        match self {
            Self::Dense { slots, len } => {
                if let Some(x) = slots.get_mut(pix as usize) {
                    if *x == NONE {
                        *len += 1;
                    }
                    *x = slot;
                }
            }
            Self::Hashed(m) => {
                m.insert(pix, slot);
            }
        }
    }
    fn remove(&mut self, pix: u64) {
        match self {
            Self::Dense { slots, len } => {
                if let Some(x) = slots.get_mut(pix as usize) {
                    if *x != NONE {
                        *len -= 1;
                    }
                    *x = NONE;
                }
            }
            Self::Hashed(m) => {
                m.remove(&pix);
            }
        }
    }
    fn len(&self) -> usize {
        match self {
            Self::Dense { len, .. } => *len,
            Self::Hashed(m) => m.len(),
        }
    }
}

/// Multiplicative hasher for pixel numbers: lookups only, never iterated, so its order reaches no output.
#[derive(Default, Clone, Copy)]
pub(crate) struct PixHasher(u64);

impl Hasher for PixHasher {
    fn finish(&self) -> u64 {
        self.0
    }
    fn write(&mut self, bytes: &[u8]) {
        for &b in bytes {
            self.0 = (self.0.rotate_left(8) ^ u64::from(b)).wrapping_mul(0x9E37_79B9_7F4A_7C15);
        }
    }
    fn write_u64(&mut self, n: u64) {
        self.0 = (n ^ (n >> 29)).wrapping_mul(0x9E37_79B9_7F4A_7C15);
        self.0 ^= self.0 >> 32;
    }
}

/// Unit vector of an ICRS direction given in degrees.
pub(crate) fn unit_vector(ra_deg: f64, dec_deg: f64) -> [f64; 3] {
    let (sd, cd) = dec_deg.to_radians().sin_cos();
    let (sr, cr) = ra_deg.to_radians().sin_cos();
    [cd * cr, cd * sr, sd]
}

/// Right ascension and declination (degrees) of a non-zero vector.
pub(crate) fn radec_of(v: [f64; 3]) -> (f64, f64) {
    let n = (v[0] * v[0] + v[1] * v[1] + v[2] * v[2]).sqrt();
    if n <= 0.0 || !n.is_finite() {
        return (0.0, 0.0);
    }
    let dec = (v[2] / n).clamp(-1.0, 1.0).asin().to_degrees();
    let mut ra = v[1].atan2(v[0]).to_degrees();
    if ra < 0.0 {
        ra += 360.0;
    }
    if ra >= 360.0 {
        ra -= 360.0;
    }
    (ra, dec)
}

/// Angle between two unit vectors, degrees (stable at small angles).
pub(crate) fn angle_deg(a: [f64; 3], b: [f64; 3]) -> f64 {
    let c = [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ];
    let s = (c[0] * c[0] + c[1] * c[1] + c[2] * c[2]).sqrt();
    let d = a[0] * b[0] + a[1] * b[1] + a[2] * b[2];
    s.atan2(d).to_degrees()
}

/// The HEALPix index of held photons.
pub(crate) struct SkyIndex {
    layer: &'static Layer,
    depth: u8,
    buckets: Vec<Bucket>,
    meta: Vec<Meta>,
    radius_rad: f64,
    free: Vec<u32>,
    map: PixMap,
    /// Every held photon in release order: the front is the oldest photon of the whole index.
    fifo: VecDeque<Entry>,
    scratch: Vec<u64>,
}

impl std::fmt::Debug for SkyIndex {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SkyIndex")
            .field("depth", &self.depth)
            .field("active_pixels", &self.map.len())
            .field("photons", &self.fifo.len())
            .finish()
    }
}

/// Pixel depth for a search radius: the shallowest at which a disc of that radius touches at most a pixel
/// and its neighbours (cdshealpix `best_starting_depth`). Radii are limited to 10 degrees by the config.
pub(crate) fn depth_for_radius(radius_deg: f64) -> u8 {
    let r = radius_deg.to_radians();
    if cdshealpix::has_best_starting_depth(r) {
        cdshealpix::best_starting_depth(r)
    } else {
        0
    }
}

impl SkyIndex {
    pub(crate) fn new(radius_deg: f64) -> Self {
        let depth = depth_for_radius(radius_deg);
        Self {
            layer: nested::get(depth),
            depth,
            buckets: Vec::new(),
            meta: Vec::new(),
            radius_rad: radius_deg.to_radians(),
            free: Vec::new(),
            map: PixMap::new(depth),
            fifo: VecDeque::new(),
            scratch: Vec::with_capacity(8),
        }
    }

    /// Heap bytes of the index, from capacities.
    pub(crate) fn heap_bytes(&self) -> usize {
        let hot: usize = self
            .buckets
            .iter()
            .map(|b| b.hot.capacity() * size_of::<Hot>())
            .sum();
        let map = match &self.map {
            PixMap::Dense { slots, .. } => slots.capacity() * size_of::<u32>(),
            PixMap::Hashed(m) => m.capacity() * (size_of::<u64>() + size_of::<u32>() + 1),
        };
        hot + self.buckets.capacity() * size_of::<Bucket>()
            + self.meta.capacity() * size_of::<Meta>()
            + self.fifo.capacity() * size_of::<Entry>()
            + map
    }

    pub(crate) fn depth(&self) -> u8 {
        self.depth
    }

    pub(crate) fn len(&self) -> usize {
        self.fifo.len()
    }

    pub(crate) fn active_pixels(&self) -> usize {
        self.map.len()
    }

    /// Pixel of a direction in degrees.
    pub(crate) fn pixel(&self, ra_deg: f64, dec_deg: f64) -> u64 {
        let lat = dec_deg
            .to_radians()
            .clamp(-std::f64::consts::FRAC_PI_2, std::f64::consts::FRAC_PI_2);
        self.layer.hash(ra_deg.to_radians(), lat)
    }

    /// Adds a photon (in release order); returns its bucket.
    pub(crate) fn insert(&mut self, p: &Photon, v: [f64; 3]) -> u32 {
        let pix = self.pixel(p.ra, p.dec);
        let slot = match self.map.get(pix) {
            Some(s) => s,
            None => self.open(pix),
        };
        self.buckets[slot as usize].hot.push_back(Hot { t: p.t, v });
        let cold = Cold {
            ra: p.ra,
            dec: p.dec,
            energy: p.energy,
            zenith: p.zenith,
            azimuth: p.azimuth,
        };
        self.fifo.push_back(Entry { t: p.t, slot, cold });
        slot
    }

    fn open(&mut self, pix: u64) -> u32 {
        self.scratch.clear();
        self.layer.append_bulk_neighbours(pix, &mut self.scratch);
        let mut neigh = [0u64; 8];
        let n = self.scratch.len().min(8);
        neigh[..n].copy_from_slice(&self.scratch[..n]);
        let slot = match self.free.pop() {
            Some(s) => s,
            None => {
                self.buckets.push(Bucket {
                    hot: VecDeque::new(),
                    nslots: [NONE; 8],
                    geo: [[0.0; 4]; 8],
                });
                self.meta.push(Meta::default());
                (self.buckets.len() - 1) as u32
            }
        };
        let mut geo = [[0.0f32, 0.0, 0.0, 2.0]; 8];
        for (g, &q) in geo.iter_mut().zip(&neigh[..n]) {
            let (lon, lat) = self.layer.center(q);
            let (sl, cl) = lat.sin_cos();
            let (so, co) = lon.sin_cos();
            // An upper bound on the cell's centre-to-vertex distance (cdshealpix), with 1% to spare.
            let bound = cdshealpix::largest_center_to_vertex_distance(self.depth, lon, lat) * 1.01;
            let reach = self.radius_rad + bound;
            let cos_reach = if reach >= std::f64::consts::PI {
                -2.0
            } else {
                reach.cos() - GEO_MARGIN
            };
            *g = [(cl * co) as f32, (cl * so) as f32, sl as f32, cos_reach as f32];
        }
        self.buckets[slot as usize].geo = geo;
        let m = &mut self.meta[slot as usize];
        m.pix = pix;
        m.neigh = neigh;
        m.n_neigh = n as u8;
        // Link both ways with the active neighbours (HEALPix 8-neighbourhoods are symmetric; checked in the
        // tests over every pixel of several depths).
        let mut nslots = [NONE; 8];
        for (i, q) in neigh[..n].iter().enumerate() {
            if let Some(qs) = self.map.get(*q) {
                nslots[i] = qs;
                self.set_link(qs, pix, slot);
            }
        }
        self.buckets[slot as usize].nslots = nslots;
        self.map.insert(pix, slot);
        slot
    }

    /// In bucket `of`, points the neighbour entry of pixel `pix` at `to`.
    fn set_link(&mut self, of: u32, pix: u64, to: u32) {
        let m = &self.meta[of as usize];
        if let Some(i) = m.neigh[..usize::from(m.n_neigh)].iter().position(|&q| q == pix) {
            self.buckets[of as usize].nslots[i] = to;
        }
    }

    fn close(&mut self, slot: u32) {
        let pix = self.meta[slot as usize].pix;
        if self.buckets[slot as usize].hot.capacity() > 8 {
            self.buckets[slot as usize].hot.shrink_to(8);
        }
        let nslots = self.buckets[slot as usize].nslots;
        for qs in nslots {
            if qs != NONE {
                self.set_link(qs, pix, NONE);
            }
        }
        self.buckets[slot as usize].nslots = [NONE; 8];
        self.map.remove(pix);
        self.free.push(slot);
    }

    /// Drops every photon older than `t_min`; empty pixels are closed and their buckets reused.
    pub(crate) fn evict_before(&mut self, t_min: i64) {
        while let Some(e) = self.fifo.front() {
            if e.t >= t_min {
                break;
            }
            let slot = e.slot;
            self.fifo.pop_front();
            let b = &mut self.buckets[slot as usize];
            b.hot.pop_front();
            if b.hot.is_empty() {
                self.close(slot);
            } else if b.hot.capacity() > 8 && b.hot.len() * 4 < b.hot.capacity() {
                // A reused bucket keeps the capacity of its busiest past; give most of it back so memory
                // follows the current occupancy, not the peak of the whole uptime.
                let keep = b.hot.len() * 2;
                b.hot.shrink_to(keep);
            }
        }
    }

    /// Buckets that may hold photons within the search radius of direction `v` in bucket `slot`: that
    /// bucket first, then the active neighbours the disc can reach. Returns how many entries of `out` were
    /// filled.
    pub(crate) fn neighbourhood(&self, slot: u32, v: [f64; 3], out: &mut [u32; 9]) -> usize {
        out[0] = slot;
        let mut n = 1;
        let b = &self.buckets[slot as usize];
        let geo = &b.geo;
        for (i, &s) in b.nslots.iter().enumerate() {
            let g = &geo[i];
            let d = f64::from(g[0]) * v[0] + f64::from(g[1]) * v[1] + f64::from(g[2]) * v[2];
            if s != NONE && d >= f64::from(g[3]) {
                out[n] = s;
                n += 1;
            }
        }
        n
    }

    pub(crate) fn bucket(&self, slot: u32) -> &Bucket {
        &self.buckets[slot as usize]
    }

    /// The columns of a held photon the test does not read, found by its time in the release-order ring
    /// (rare path: crossings and new candidates only). Photons of equal time are told apart by bucket and
    /// direction.
    pub(crate) fn cold_of(&self, slot: u32, h: &Hot) -> Option<Cold> {
        let start = self.fifo.partition_point(|e| e.t < h.t);
        self.fifo
            .range(start..)
            .take_while(|e| e.t == h.t)
            .find(|e| e.slot == slot && unit_vector(e.cold.ra, e.cold.dec) == h.v)
            .map(|e| e.cold)
    }

    /// Calls `f` for the time and direction of every held photon with time >= `t_from` in the pixels covering
    /// a cone (approximate cover, exact angle check by the caller), pixels in index order.
    pub(crate) fn for_each_hot_in_cone(
        &self,
        ra_deg: f64,
        dec_deg: f64,
        radius_deg: f64,
        t_from: i64,
        mut f: impl FnMut(&Hot),
    ) {
        let lat = dec_deg
            .to_radians()
            .clamp(-std::f64::consts::FRAC_PI_2, std::f64::consts::FRAC_PI_2);
        let radius = radius_deg.to_radians().min(std::f64::consts::PI);
        let cover = self.layer.cone_coverage_approx(ra_deg.to_radians(), lat, radius);
        for pix in cover.flat_iter() {
            if let Some(s) = self.map.get(pix) {
                let hot = &self.buckets[s as usize].hot;
                let start = hot.partition_point(|h| h.t < t_from);
                hot.range(start..).for_each(&mut f);
            }
        }
    }

    /// Calls `f` for every held photon with time >= `t_from` within `radius_deg` of `ra`, `dec`; pixels
    /// visited in index order, photons in time order. The angle is checked on the hot record before the cold
    /// one is looked up (a search of the whole store): the pixels cover several times the cone's area, and
    /// this runs when a flash is emitted, on its latency path.
    pub(crate) fn for_each_in_cone(
        &self,
        ra_deg: f64,
        dec_deg: f64,
        radius_deg: f64,
        t_from: i64,
        mut f: impl FnMut(&Hot, &Cold),
    ) {
        let lat = dec_deg
            .to_radians()
            .clamp(-std::f64::consts::FRAC_PI_2, std::f64::consts::FRAC_PI_2);
        let radius = radius_deg.to_radians().min(std::f64::consts::PI);
        let cover = self.layer.cone_coverage_approx(ra_deg.to_radians(), lat, radius);
        let (centre, cos_r) = (unit_vector(ra_deg, dec_deg), radius.cos());
        for pix in cover.flat_iter() {
            if let Some(s) = self.map.get(pix) {
                let hot = &self.buckets[s as usize].hot;
                let start = hot.partition_point(|h| h.t < t_from);
                for h in hot.range(start..) {
                    let d = h.v[0] * centre[0] + h.v[1] * centre[1] + h.v[2] * centre[2];
                    if d < cos_r {
                        continue;
                    }
                    if let Some(c) = self.cold_of(s, h) {
                        f(h, &c);
                    }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ph(t: i64, ra: f64, dec: f64) -> Photon {
        Photon {
            t,
            ra,
            dec,
            energy: 1.0,
            zenith: 10.0,
            azimuth: 0.0,
        }
    }

    #[test]
    fn pixels_at_least_as_wide_as_the_radius() {
        // HEALPix mean spacing sqrt(4 pi / (12 Nside^2)) (Gorski et al. 2005); [calc] from the formula.
        for r in [0.05, 0.2, 0.5, 1.0, 3.0, 10.0] {
            let d = depth_for_radius(r);
            let nside = f64::from(1u32 << d);
            let spacing = (4.0 * std::f64::consts::PI / (12.0 * nside * nside))
                .sqrt()
                .to_degrees();
            assert!(spacing >= r, "radius {r}: depth {d} spacing {spacing}");
            assert!(
                spacing < 4.0 * r,
                "radius {r}: depth {d} needlessly coarse ({spacing})"
            );
        }
    }

    #[test]
    fn neighbourhood_covers_every_photon_within_the_radius() {
        // Exhaustive check against brute force on a dense grid of points: nothing within r is missed.
        let r = 0.7;
        let mut idx = SkyIndex::new(r);
        let mut pts = Vec::new();
        let mut t = 0;
        for i in 0..120 {
            for j in 0..60 {
                let ra = f64::from(i) * 3.0 + 0.37 * f64::from(j % 7);
                let dec = -89.5 + f64::from(j) * 3.0 + 0.11 * f64::from(i % 5);
                let p = ph(t, ra % 360.0, dec.min(89.9));
                t += 1;
                let v = unit_vector(p.ra, p.dec);
                idx.insert(&p, v);
                pts.push(v);
            }
        }
        check_links(&idx);
        idx.evict_before(4000);
        check_links(&idx);
        // Seeds near many pixels, including near the poles and base-cell corners.
        let cos_r = r.to_radians().cos();
        let mut slots = [0u32; 9];
        for (k, seed) in pts.iter().enumerate().skip(4000).step_by(37) {
            let (ra, dec) = radec_of(*seed);
            let slot = idx.map.get(idx.pixel(ra, dec)).unwrap();
            let n = idx.neighbourhood(slot, *seed, &mut slots);
            let mut found = 0;
            for &s in &slots[..n] {
                for h in &idx.bucket(s).hot {
                    if dot(h.v, *seed) >= cos_r {
                        found += 1;
                    }
                }
            }
            let brute = pts[4000..].iter().filter(|v| dot(**v, *seed) >= cos_r).count();
            assert_eq!(found, brute, "seed {k} at ({ra}, {dec})");
        }
    }

    fn dot(a: [f64; 3], b: [f64; 3]) -> f64 {
        a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
    }

    #[test]
    fn healpix_neighbourhoods_are_symmetric() {
        // The neighbour cache links both ways, which is right only if q in N(p) <=> p in N(q).
        for depth in [0u8, 1, 2, 3, 6] {
            let layer = nested::get(depth);
            let mut a = Vec::new();
            let mut b = Vec::new();
            for p in 0..layer.n_hash() {
                a.clear();
                layer.append_bulk_neighbours(p, &mut a);
                for &q in &a {
                    b.clear();
                    layer.append_bulk_neighbours(q, &mut b);
                    assert!(b.contains(&p), "depth {depth}: {q} in N({p}) but not the reverse");
                }
            }
        }
    }

    /// Every bucket's neighbour cache agrees with a fresh lookup.
    fn check_links(idx: &SkyIndex) {
        let active: Vec<u32> = (0..idx.buckets.len() as u32)
            .filter(|s| !idx.free.contains(s))
            .collect();
        assert_eq!(active.len(), idx.map.len());
        for slot in active {
            let m = &idx.meta[slot as usize];
            let pix = m.pix;
            assert_eq!(idx.map.get(pix), Some(slot));
            for i in 0..8 {
                let want = if i < usize::from(m.n_neigh) {
                    idx.map.get(m.neigh[i]).unwrap_or(NONE)
                } else {
                    NONE
                };
                assert_eq!(
                    idx.buckets[slot as usize].nslots[i], want,
                    "pixel {pix} neighbour {i}"
                );
            }
        }
    }

    #[test]
    fn eviction_closes_pixels_and_reuses_buckets() {
        let mut idx = SkyIndex::new(0.5);
        for t in 0..100 {
            let p = ph(t, f64::from(t as i32) * 3.0, 10.0);
            idx.insert(&p, unit_vector(p.ra, p.dec));
        }
        assert_eq!(idx.len(), 100);
        let pixels = idx.active_pixels();
        idx.evict_before(60);
        assert_eq!(idx.len(), 40);
        assert!(idx.active_pixels() < pixels);
        let buckets = idx.buckets.len();
        for t in 100..150 {
            let p = ph(t, f64::from(t as i32 - 100) * 3.0, 10.0);
            idx.insert(&p, unit_vector(p.ra, p.dec));
        }
        assert_eq!(idx.buckets.len(), buckets, "closed buckets are reused");
        check_links(&idx);
        let mut n = 0;
        idx.for_each_in_cone(0.0, 10.0, 1.0, 0, |h, c| {
            assert!(h.t >= 60);
            assert!(c.ra < 1.0 || c.ra > 359.0);
            n += 1;
        });
        assert_eq!(n, 1, "only the photon at ra 0 (t 100) is within 1 degree");
    }

    #[test]
    fn angles_and_round_trip() {
        let a = unit_vector(10.0, 20.0);
        let b = unit_vector(10.0, 20.001);
        assert!((angle_deg(a, b) - 0.001).abs() < 1e-9);
        let (ra, dec) = radec_of(a);
        assert!((ra - 10.0).abs() < 1e-12 && (dec - 20.0).abs() < 1e-12);
    }
}
