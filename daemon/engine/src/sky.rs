//! Sky index: the photons of the last (longest timescale + pre-window), bucketed by HEALPix nested pixel at a
//! depth whose pixels are at least as wide as the search radius, so a seed's disc lies inside its own pixel
//! and the 8 (or 7) neighbours. Each active pixel is a ring of 8-photon blocks in time order that a seed
//! walks back from the newest, f32 screen first, exact f64 test near the edge. Beside its photons each pixel
//! keeps, per timescale, how many of them are younger than it, in all and per sub-pixel (64, three levels
//! finer), kept current by one cursor per timescale over the release order: their sums over the
//! neighbourhood, then over the sub-pixels a disc can reach, bound the disc's counts at a cost that does not
//! grow with the background, so the walk runs only where a bound reaches a critical count. Memory: 88 bytes
//! per held photon (48 in its pixel's ring, 40 in the release-order ring) plus about 1.3 KB per active pixel
//! (2.3 KB once a bound has read its sub-pixels): it grows with event rate x retention, never with uptime.
use std::collections::{HashMap, VecDeque};
use std::hash::{BuildHasherDefault, Hasher};

use cdshealpix::nested::{self, Layer};

use crate::reorder::Photon;

/// Time and exact direction of a held photon, as the rare paths (flash photons, cones) read it.
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

// The disc test reads a photon's stored f32 direction x' (each component within u |x_i| of the exact one,
// u = 2^-24, round to nearest) and defers to the exact f64 test only in a band around cos r. Against the f64
// product d of the exact vectors (whose own rounding is below 1e-15):
// - in f32 (seed rounded too, products summed in f32): |d32 - d| <= 5u (1 + O(u)) < 2.99e-7 for unit vectors,
//   and rounding cos r +- the band to f32 moves it by at most 6e-8;
// - in f64 on x' and the exact seed: |d64' - d| <= u sum |x_i s_i| + 1e-15 <= 6e-8.
// A product at or above cos r + band is then in the disc by the exact test too, one at or below cos r - band
// is out. [calc] from the standard bound on floating-point dot products (Higham 2002, section 3.1).

/// Half-width of the band of the f32 screen.
const BAND32: f64 = 4e-7;
/// Half-width of the band of the f64 product on the stored direction.
const BAND64: f64 = 1e-7;

/// Photons per block.
const LANES: usize = 8;

/// Coarse times are the times shifted right by this (units of 65.5 us), kept in 32 bits: ages up to
/// 2^48 ns (78 hours; the index holds at most the longest timescale plus the pre-window, 25 hours) stay
/// unambiguous modulo 2^32.
const COARSE_SHIFT: u32 = 16;

/// Marks an inactive neighbour in a bucket's neighbour cache.
const NONE: u32 = u32::MAX;

/// Sub-pixels are this many HEALPix levels below the index's pixels: 4^FINE_LEVELS of them per pixel, each an
/// eighth of its width, so the sub-pixels a disc can reach cover about 1.7 times its area at the default
/// radius (pixel spacing 0.92 deg, radius 0.5 deg).
const FINE_LEVELS: u8 = 3;
/// Sub-pixels per pixel (nested numbering: a sub-pixel's number is the pixel's shifted left by
/// 2 FINE_LEVELS, plus its place in the pixel).
const SUBS: usize = 1 << (2 * FINE_LEVELS);
/// Timescales the windowed sub-pixel counts follow; a longer ladder counts every seed exactly.
const WINDOWS: usize = 8;
/// Sub-pixel counts are kept for the ladder's longest FINE_ROWS timescales only: the shorter ones hold so few
/// photons that the pixels' totals already stay below their critical counts (and each row costs 128 bytes a
/// pixel).
const FINE_ROWS: usize = 4;
/// The sub-pixel bound is taken only where the neighbourhood holds at least this many photons; a sparser
/// one is walked.
const REFINE_MIN_HELD: usize = 128;

/// Coarse time of a time.
#[inline]
fn coarse(t: i64) -> u32 {
    (t >> COARSE_SHIFT) as u32
}

/// One timescale as the walk compares ages with it. With coarse times c = t >> s, the age A of a photon
/// whose coarse age is D lies in ((D - 1) 2^s, (D + 1) 2^s): D >= `old_min` proves A >= dt, D <= `young_max`
/// proves A < dt, and only the one or two coarse ages between need the exact time.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Step {
    dt: i64,
    young_max: i64,
    old_min: i64,
}

impl Step {
    /// The step for a timescale of `dt` ns (>= 1).
    pub(crate) fn new(dt: i64) -> Self {
        let unit = 1i64 << COARSE_SHIFT;
        Self {
            dt,
            young_max: dt.div_euclid(unit) - 1,
            old_min: 1 + (dt - 1 + unit - 1).div_euclid(unit),
        }
    }

    /// True when a photon of coarse age `d` is certainly younger than `dt`.
    #[inline]
    fn young(&self, d: u32) -> bool {
        i64::from(d) <= self.young_max
    }

    /// True when the photon of coarse age `d` (exact time from `exact` if needed) is `dt` or more old at `t`.
    #[inline]
    fn older(&self, d: u32, t: i64, exact: impl FnOnce() -> i64) -> bool {
        let d = i64::from(d);
        d >= self.old_min || (d > self.young_max && t - exact() >= self.dt)
    }
}

/// A seed as the disc test reads it.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Disc {
    v: [f64; 3],
    cos_r: f64,
    s: [f32; 3],
    /// f32 product >= `sure32`: in the disc; <= `out32`: out; in between, the f64 product on the stored
    /// direction decides against `sure64` and `out64` the same way, and between those the exact test.
    sure32: f32,
    out32: f32,
    sure64: f64,
    out64: f64,
}

impl Disc {
    /// The disc of cosine `cos_r` about unit vector `v`.
    pub(crate) fn new(v: [f64; 3], cos_r: f64) -> Self {
        Self {
            v,
            cos_r,
            s: [v[0] as f32, v[1] as f32, v[2] as f32],
            sure32: (cos_r + BAND32) as f32,
            out32: (cos_r - BAND32) as f32,
            sure64: cos_r + BAND64,
            out64: cos_r - BAND64,
        }
    }

    /// The lanes of a block clearly inside the disc and those not clearly outside, as bit masks (equal unless
    /// a photon lies in the band between), in one f32 pass with no branch per lane.
    #[inline]
    fn screen(&self, b: &Block) -> (u32, u32) {
        let (mut sure, mut maybe) = (0u32, 0u32);
        for j in 0..LANES {
            let d = b.x[j] * self.s[0] + b.y[j] * self.s[1] + b.z[j] * self.s[2];
            sure |= u32::from(d >= self.sure32) << j;
            maybe |= u32::from(d > self.out32) << j;
        }
        (sure, maybe)
    }

    /// The test itself, `v . seed >= cos r` in f64, decided on the stored direction when that is clear of
    /// the band.
    #[inline]
    fn contains(&self, x: f32, y: f32, z: f32, v: &[f64; 3]) -> bool {
        let d = f64::from(x) * self.v[0] + f64::from(y) * self.v[1] + f64::from(z) * self.v[2];
        if (d > self.out64) & (d < self.sure64) {
            v[0] * self.v[0] + v[1] * self.v[1] + v[2] * self.v[2] >= self.cos_r
        } else {
            d >= self.sure64
        }
    }
}

/// LANES consecutive photons of a pixel: their coarse times and single-precision directions, all the seeded
/// test reads of them, in the first two cache lines; then their exact records.
#[derive(Debug, Clone, Copy, Default)]
#[repr(C, align(128))]
struct Block {
    tc: [u32; LANES],
    x: [f32; LANES],
    y: [f32; LANES],
    z: [f32; LANES],
    ex: [Exact; LANES],
}

/// Exact time and direction of a held photon: read by the seeded test only near the disc's edge or a
/// timescale's cut-off, and by the rare paths.
#[derive(Debug, Clone, Copy, Default)]
struct Exact {
    t: i64,
    v: [f64; 3],
}

/// A pixel's photons, oldest first, in a ring of blocks whose capacity (in photons) is 0 or a power of two at
/// least LANES, so a block never wraps.
#[derive(Debug, Default)]
#[repr(C)]
pub(crate) struct Held {
    head: usize,
    len: usize,
    blocks: Box<[Block]>,
}

impl Held {
    /// Bytes of one held photon.
    const BYTES: usize = size_of::<Block>() / LANES;

    pub(crate) fn len(&self) -> usize {
        self.len
    }

    fn capacity(&self) -> usize {
        self.blocks.len() * LANES
    }

    /// Physical position of logical position `i` (< capacity).
    #[inline]
    fn at(&self, i: usize) -> usize {
        (self.head + i) & (self.capacity() - 1)
    }

    /// The photon at logical position `i` (0 = oldest; `i` < len).
    pub(crate) fn get(&self, i: usize) -> Hot {
        let p = self.at(i);
        let e = self.blocks[p / LANES].ex[p % LANES];
        Hot { t: e.t, v: e.v }
    }

    /// The photons, oldest first.
    pub(crate) fn iter(&self) -> impl DoubleEndedIterator<Item = Hot> + '_ {
        (0..self.len).map(|i| self.get(i))
    }

    /// Logical position of the first photon with time >= `t_from`.
    pub(crate) fn first_from(&self, t_from: i64) -> usize {
        let (mut lo, mut hi) = (0, self.len);
        while lo < hi {
            let mid = lo + (hi - lo) / 2;
            if self.get(mid).t < t_from {
                lo = mid + 1;
            } else {
                hi = mid;
            }
        }
        lo
    }

    fn push_back(&mut self, t: i64, v: [f64; 3]) {
        if self.len == self.capacity() {
            self.reallocate((2 * self.capacity()).max(LANES));
        }
        let p = self.at(self.len);
        let b = &mut self.blocks[p / LANES];
        let j = p % LANES;
        b.tc[j] = coarse(t);
        b.x[j] = v[0] as f32;
        b.y[j] = v[1] as f32;
        b.z[j] = v[2] as f32;
        b.ex[j] = Exact { t, v };
        self.len += 1;
    }

    fn pop_front(&mut self) {
        if self.len > 0 {
            self.head = self.at(1);
            self.len -= 1;
        }
    }

    /// Moves the photons, oldest first, into a ring of capacity `cap` (a power of two >= max(len, LANES)).
    fn reallocate(&mut self, cap: usize) {
        let mut next = Self {
            head: 0,
            len: self.len,
            blocks: vec![Block::default(); cap / LANES].into_boxed_slice(),
        };
        for i in 0..self.len {
            let p = self.at(i);
            let (src, j) = (&self.blocks[p / LANES], p % LANES);
            let (dst, k) = (&mut next.blocks[i / LANES], i % LANES);
            dst.tc[k] = src.tc[j];
            dst.x[k] = src.x[j];
            dst.y[k] = src.y[j];
            dst.z[k] = src.z[j];
            dst.ex[k] = src.ex[j];
        }
        *self = next;
    }

    /// Shrinks the capacity to the power of two at or above max(`keep`, len, LANES), when that is smaller.
    fn shrink_to(&mut self, keep: usize) {
        let cap = keep.max(self.len).max(LANES).next_power_of_two();
        if cap < self.capacity() {
            self.reallocate(cap);
        }
    }

    /// Reads both lines of every block that a walk back from the newest photon to coarse age `old_min` reads,
    /// in a loop with little else in it, so that their cache misses overlap; returns a value made from them
    /// (the caller hides it from the optimiser, so the reads stay).
    fn touch(&self, tc: u32, old_min: i64) -> u32 {
        let Some(i) = self.len.checked_sub(1) else {
            return 0;
        };
        let nb = self.blocks.len();
        let mut b = self.at(i) / LANES;
        let mut acc = 0u32;
        for _ in 0..=i / LANES + 1 {
            let blk = &self.blocks[b];
            acc ^= blk.tc[0] ^ blk.y[0].to_bits();
            if i64::from(tc.wrapping_sub(blk.tc[0])) >= old_min {
                break;
            }
            b = b.checked_sub(1).unwrap_or(nb - 1);
        }
        acc
    }

    /// Adds to `hist[k]` the photons inside the disc `q` whose age at `t` (coarse time `tc`) lies in
    /// [steps[k-1].dt, steps[k].dt) (below steps[0].dt for k = 0), walking back from the newest until the
    /// last step: the counts of the plain walk over the exact records, which is what a ring of two blocks or
    /// less gets. A longer one is walked block by block: a full block whose photons all fall in the current
    /// step and none in the band is added at once from its screen, any other photon by photon.
    fn count_disc(&self, q: &Disc, t: i64, tc: u32, steps: &[Step], hist: &mut [u32]) {
        let Some(last) = steps.last() else { return };
        if self.len <= 2 * LANES {
            // A pixel of a few photons: the screen saves nothing, the exact records are as near.
            let mut k = 0;
            for i in (0..self.len).rev() {
                let p = self.at(i);
                let e = &self.blocks[p / LANES].ex[p % LANES];
                let age = t - e.t;
                if age >= last.dt {
                    return;
                }
                if e.v[0] * q.v[0] + e.v[1] * q.v[1] + e.v[2] * q.v[2] >= q.cos_r {
                    while age >= steps[k].dt {
                        k += 1;
                    }
                    hist[k] += 1;
                }
            }
            return;
        }
        let mut i = self.len;
        // The step of the last photon walked: older photons fall in it or a later one.
        let mut k = 0;
        while i > 0 {
            let p = self.at(i - 1);
            let b = &self.blocks[p / LANES];
            // Lanes [lo, hi) of this block hold logical positions [i - (hi - lo), i).
            let hi = p % LANES + 1;
            let lo = hi.saturating_sub(i);
            i -= hi - lo;
            // A partial block (an end of the ring) is tested photon by photon, all lanes as if in the band.
            let (sure, maybe) = if hi - lo == LANES {
                q.screen(b)
            } else {
                (0, u32::MAX)
            };
            if sure == maybe && steps[k].young(tc.wrapping_sub(b.tc[0])) {
                // A full block with no photon in the band, the oldest younger than this step's cut-off.
                hist[k] += sure.count_ones();
                continue;
            }
            // Photon by photon: the ends of the walk, a block straddling a cut-off, a photon in the band.
            let ex = &b.ex;
            let band = maybe & !sure;
            for j in (lo..hi).rev() {
                let d = tc.wrapping_sub(b.tc[j]);
                if !steps[k].young(d) {
                    if last.older(d, t, || ex[j].t) {
                        return;
                    }
                    while steps[k].older(d, t, || ex[j].t) {
                        k += 1;
                    }
                }
                let inside = if band >> j & 1 == 1 {
                    q.contains(b.x[j], b.y[j], b.z[j], &ex[j].v)
                } else {
                    sure >> j & 1 == 1
                };
                hist[k] += u32::from(inside);
            }
        }
    }
}

/// What a seed reads of one active pixel: its photons and the buckets of its active neighbours (the ring's
/// header and the neighbours' buckets in the first cache line).
#[derive(Debug)]
#[repr(C, align(64))]
pub(crate) struct Bucket {
    pub(crate) held: Held,
    /// Bucket of each neighbouring pixel (same order as `Meta::neigh`), NONE when that pixel is inactive.
    nslots: [u32; 8],
    /// Per neighbour: its centre (unit vector) and the cosine of (search radius + its bounding radius) less
    /// a margin covering f32 rounding; a seed whose dot product with the centre is below that cannot reach
    /// into the neighbour. (For tiny radii the margin keeps every neighbour: safe, just slower.) Read only
    /// for the seed's own bucket.
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
    /// Place of the photon's sub-pixel in its pixel.
    sub: u8,
    cold: Cold,
}

/// The windowed counts of one bucket's sub-pixels, and their geometry once a bound has needed it.
#[derive(Debug)]
struct Fine {
    /// Per timescale k (row k - fine_from) and sub-pixel, the photons younger than the k-th window at the time the cursors were
    /// last moved to (a timescale's counts side by side, so a bound sums them as vectors). Arithmetic wraps:
    /// every count is exact while the pixel holds fewer than 2^16 photons (increments and decrements balance
    /// modulo 2^16), and a bound is not taken from a larger pixel.
    cnt: [[u16; SUBS]; FINE_ROWS],
    /// Per timescale, the sum of its row: the pixel's photons in that window (same wrapping arithmetic).
    tot: [u16; WINDOWS],
    geo: Option<Box<SubGeo>>,
}

impl Default for Fine {
    fn default() -> Self {
        Self {
            cnt: [[0; SUBS]; FINE_ROWS],
            tot: [0; WINDOWS],
            geo: None,
        }
    }
}

/// Centres of a pixel's sub-pixels (unit vectors, f32) and, per sub-pixel, the cosine of (search radius + its
/// bounding radius) less a margin for the f32 rounding: a seed whose product with the centre is below it
/// cannot reach into that sub-pixel.
#[derive(Debug)]
struct SubGeo {
    x: [f32; SUBS],
    y: [f32; SUBS],
    z: [f32; SUBS],
    c: [f32; SUBS],
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
    /// The layer of the sub-pixels (None when it would be deeper than HEALPix allows).
    fine_layer: Option<&'static Layer>,
    /// Windowed sub-pixel counts, one per bucket.
    fines: Vec<Fine>,
    /// The timescales the counts follow (empty: no bound), and per timescale the release-order position
    /// (counted from the first photon ever held) of the oldest photon still inside its window.
    win_dt: Vec<i64>,
    win_at: [u64; WINDOWS],
    /// Release-order position of the fifo's front.
    popped: u64,
    /// What an inserted photon adds to its pixel's totals: 1 for each followed timescale.
    win_inc: [u16; WINDOWS],
    /// The first timescale with sub-pixel counts.
    fine_from: usize,
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
            fine_layer: (depth + FINE_LEVELS <= 29).then(|| nested::get(depth + FINE_LEVELS)),
            fines: Vec::new(),
            win_dt: Vec::new(),
            win_at: [0; WINDOWS],
            popped: 0,
            win_inc: [0; WINDOWS],
            fine_from: 0,
        }
    }

    /// Follows the windows of these timescales (ns, increasing) in the sub-pixel counts; a ladder longer
    /// than WINDOWS follows none (every seed is then counted exactly). Call before the first insert.
    pub(crate) fn follow_windows(&mut self, ladder_ns: &[i64]) {
        if ladder_ns.len() > WINDOWS || self.fine_layer.is_none() || !self.fifo.is_empty() {
            return;
        }
        self.win_dt = ladder_ns.to_vec();
        self.win_inc = [0; WINDOWS];
        self.win_inc[..ladder_ns.len()].fill(1);
        self.fine_from = ladder_ns.len().saturating_sub(FINE_ROWS);
    }

    /// Stops following the windows: every seed is then counted exactly (for the test that compares the two).
    pub(crate) fn stop_following(&mut self) {
        self.win_dt.clear();
        self.win_inc = [0; WINDOWS];
        self.fine_from = 0;
    }

    /// Moves every window to end at `t` (no earlier than the last call): photons at or before t - dt leave
    /// window dt.
    pub(crate) fn advance_windows(&mut self, t: i64) {
        for (k, (&dt, at)) in self.win_dt.iter().zip(self.win_at.iter_mut()).enumerate() {
            let cut = t.saturating_sub(dt);
            while let Some(e) = self.fifo.get((*at - self.popped) as usize) {
                if e.t > cut {
                    break;
                }
                let f = &mut self.fines[e.slot as usize];
                if let Some(row) = k.checked_sub(self.fine_from) {
                    f.cnt[row][usize::from(e.sub)] = f.cnt[row][usize::from(e.sub)].wrapping_sub(1);
                }
                f.tot[k] = f.tot[k].wrapping_sub(1);
                *at += 1;
            }
        }
    }

    /// False when no timescale of a seed at direction `v` in bucket `slot` can reach its critical count
    /// `crit[k]` (for the first crit.len() timescales) at the time the windows were last moved to; true when
    /// one may, and whenever no bound is kept: then `count_disc` must count. Two bounds, each a superset of the
    /// disc: the whole pixels of the neighbourhood, then, for the timescales where those reach their critical
    /// count, the sub-pixels the disc can reach.
    pub(crate) fn may_cross(&mut self, slot: u32, v: [f64; 3], crit: &[u32]) -> bool {
        if self.win_dt.is_empty() || crit.len() > self.win_dt.len() {
            return true;
        }
        let mut slots = [0u32; 9];
        let ns = self.neighbourhood(slot, v, &mut slots);
        let mut tot = [0u32; WINDOWS];
        let mut held = 0;
        for &s in &slots[..ns] {
            let n = self.buckets[s as usize].held.len();
            if n > usize::from(u16::MAX) {
                return true;
            }
            held += n;
            for (a, &c) in tot.iter_mut().zip(&self.fines[s as usize].tot) {
                *a += u32::from(c);
            }
        }
        let mut need = 0u32;
        for (k, (&n, &c)) in tot.iter().zip(crit).enumerate() {
            need |= u32::from(n >= c) << k;
        }
        if need == 0 {
            return false;
        }
        if held < REFINE_MIN_HELD || need & ((1 << self.fine_from) - 1) != 0 {
            // A sparse neighbourhood (its walk costs less than the sub-pixels' geometry), or a short timescale
            // without sub-pixel counts.
            return true;
        }
        let q = [v[0] as f32, v[1] as f32, v[2] as f32];
        let mut acc = [0u32; WINDOWS];
        for &s in &slots[..ns] {
            if self.fines[s as usize].geo.is_none() {
                let geo = self.sub_geo(self.meta[s as usize].pix);
                self.fines[s as usize].geo = Some(geo);
            }
            let f = &self.fines[s as usize];
            let Some(g) = f.geo.as_deref() else { continue };
            // Branch-free, so that both loops run as vectors: a mask per sub-pixel the disc can reach, then
            // per timescale the masked counts summed (one pixel's sum fits 16 bits: it holds fewer than 2^16
            // photons).
            let mut d = [0f32; SUBS];
            for (((d, &x), &y), &z) in d.iter_mut().zip(&g.x).zip(&g.y).zip(&g.z) {
                *d = x * q[0] + y * q[1] + z * q[2];
            }
            let mut mask = [0u16; SUBS];
            for ((m, &d), &c) in mask.iter_mut().zip(&d).zip(&g.c) {
                *m = 0u16.wrapping_sub(u16::from(d >= c));
            }
            let mut rows = need;
            while rows != 0 {
                let k = rows.trailing_zeros() as usize;
                rows &= rows - 1;
                let sum = f.cnt[k - self.fine_from]
                    .iter()
                    .zip(&mask)
                    .fold(0u16, |s, (&c, &m)| s.wrapping_add(c & m));
                acc[k] += u32::from(sum);
            }
        }
        acc.iter()
            .zip(crit)
            .enumerate()
            .any(|(k, (&n, &c))| need >> k & 1 == 1 && n >= c)
    }

    /// The sub-pixel geometry of pixel `pix`.
    fn sub_geo(&self, pix: u64) -> Box<SubGeo> {
        let mut g = Box::new(SubGeo {
            x: [0.0; SUBS],
            y: [0.0; SUBS],
            z: [0.0; SUBS],
            c: [-2.0; SUBS],
        });
        let Some(layer) = self.fine_layer else {
            return g;
        };
        for j in 0..SUBS {
            let (lon, lat) = layer.center((pix << (2 * FINE_LEVELS)) | j as u64);
            let (sl, cl) = lat.sin_cos();
            let (so, co) = lon.sin_cos();
            // As for the neighbours in `open`: the cell's centre-to-vertex bound with 1% to spare.
            let bound =
                cdshealpix::largest_center_to_vertex_distance(self.depth + FINE_LEVELS, lon, lat) * 1.01;
            let reach = self.radius_rad + bound;
            let cos_reach = if reach >= std::f64::consts::PI {
                -2.0
            } else {
                reach.cos() - GEO_MARGIN
            };
            g.x[j] = (cl * co) as f32;
            g.y[j] = (cl * so) as f32;
            g.z[j] = sl as f32;
            g.c[j] = cos_reach as f32;
        }
        g
    }

    /// Heap bytes of the index, from capacities.
    pub(crate) fn heap_bytes(&self) -> usize {
        let held: usize = self.buckets.iter().map(|b| b.held.capacity() * Held::BYTES).sum();
        let map = match &self.map {
            PixMap::Dense { slots, .. } => slots.capacity() * size_of::<u32>(),
            PixMap::Hashed(m) => m.capacity() * (size_of::<u64>() + size_of::<u32>() + 1),
        };
        held + self.buckets.capacity() * size_of::<Bucket>()
            + self.meta.capacity() * size_of::<Meta>()
            + self.fifo.capacity() * size_of::<Entry>()
            + self.fines.capacity() * size_of::<Fine>()
            + self.fines.iter().filter(|f| f.geo.is_some()).count() * size_of::<SubGeo>()
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
        // The sub-pixel's number holds its pixel's (nested numbering), so one hash gives both.
        let (pix, sub) = match self.fine_layer {
            Some(fine) => {
                let lat = p
                    .dec
                    .to_radians()
                    .clamp(-std::f64::consts::FRAC_PI_2, std::f64::consts::FRAC_PI_2);
                let h = fine.hash(p.ra.to_radians(), lat);
                (h >> (2 * FINE_LEVELS), (h & (SUBS as u64 - 1)) as u8)
            }
            None => (self.pixel(p.ra, p.dec), 0),
        };
        let slot = match self.map.get(pix) {
            Some(s) => s,
            None => self.open(pix),
        };
        self.buckets[slot as usize].held.push_back(p.t, v);
        let f = &mut self.fines[slot as usize];
        for (tot, &i) in f.tot.iter_mut().zip(&self.win_inc) {
            *tot = tot.wrapping_add(i);
        }
        let rows = self.win_dt.len().saturating_sub(self.fine_from);
        for row in &mut f.cnt[..rows] {
            row[usize::from(sub)] = row[usize::from(sub)].wrapping_add(1);
        }
        let cold = Cold {
            ra: p.ra,
            dec: p.dec,
            energy: p.energy,
            zenith: p.zenith,
            azimuth: p.azimuth,
        };
        self.fifo.push_back(Entry {
            t: p.t,
            slot,
            sub,
            cold,
        });
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
                    held: Held::default(),
                    nslots: [NONE; 8],
                    geo: [[0.0; 4]; 8],
                });
                self.meta.push(Meta::default());
                self.fines.push(Fine::default());
                (self.buckets.len() - 1) as u32
            }
        };
        // A reused bucket's counts are all zero (its photons left every window before their eviction); its
        // sub-pixel geometry was another pixel's.
        self.fines[slot as usize].geo = None;
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
        if self.buckets[slot as usize].held.capacity() > 8 {
            self.buckets[slot as usize].held.shrink_to(8);
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
            let (slot, sub) = (e.slot, e.sub);
            // Retention exceeds every window, so the cursors have passed this photon already unless the
            // windows were not moved to its time: take it out of those it is still counted in.
            for (k, at) in self.win_at[..self.win_dt.len()].iter_mut().enumerate() {
                if *at == self.popped {
                    let f = &mut self.fines[slot as usize];
                    if let Some(row) = k.checked_sub(self.fine_from) {
                        f.cnt[row][usize::from(sub)] = f.cnt[row][usize::from(sub)].wrapping_sub(1);
                    }
                    f.tot[k] = f.tot[k].wrapping_sub(1);
                    *at += 1;
                }
            }
            self.popped += 1;
            self.fifo.pop_front();
            let b = &mut self.buckets[slot as usize];
            b.held.pop_front();
            if b.held.len() == 0 {
                self.close(slot);
            } else if b.held.capacity() > 2 * LANES && b.held.len() * 8 < b.held.capacity() {
                // A reused bucket keeps the capacity of its busiest past; give most of it back so memory
                // follows the current occupancy, not the peak of the whole uptime (at 8x, not sooner: a
                // pixel's count swings by a few around its mean, and each resize copies its photons).
                let keep = b.held.len() * 2;
                b.held.shrink_to(keep);
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

    /// Counts the held photons within the disc `q` of a seed in bucket `slot` at time `t` for each timescale:
    /// `hist[k]` gets those whose age t - t_i falls in [ladder[k-1], ladder[k]) (any age below ladder[0] for
    /// k = 0), from the seed's pixel and the neighbours its disc can reach.
    pub(crate) fn count_disc(&self, slot: u32, q: &Disc, t: i64, steps: &[Step], hist: &mut [u32]) {
        let Some(last) = steps.last() else { return };
        let tc = coarse(t);
        let mut slots = [0u32; 9];
        let ns = self.neighbourhood(slot, q.v, &mut slots);
        // The pixels lie far apart in memory: read the blocks of the longer walks first, in a loop with
        // little else in it, so that their cache misses overlap (a pixel of two blocks or less is walked
        // plainly).
        let mut acc = 0u32;
        for &s in &slots[..ns] {
            let held = &self.buckets[s as usize].held;
            if held.len() > 2 * LANES {
                acc ^= held.touch(tc, last.old_min);
            }
        }
        std::hint::black_box(acc);
        for &s in &slots[..ns] {
            self.buckets[s as usize].held.count_disc(q, t, tc, steps, hist);
        }
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
                let held = &self.buckets[s as usize].held;
                for i in held.first_from(t_from)..held.len() {
                    let h = &held.get(i);
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
                for h in idx.bucket(s).held.iter() {
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

    /// A unit vector at angle `theta` (radians) from unit vector `s`, in direction `phi` about it.
    fn at_angle(s: [f64; 3], theta: f64, phi: f64) -> [f64; 3] {
        let a = if s[2].abs() < 0.9 {
            [0.0, 0.0, 1.0]
        } else {
            [1.0, 0.0, 0.0]
        };
        let e1 = {
            let c = [
                s[1] * a[2] - s[2] * a[1],
                s[2] * a[0] - s[0] * a[2],
                s[0] * a[1] - s[1] * a[0],
            ];
            let n = dot(c, c).sqrt();
            [c[0] / n, c[1] / n, c[2] / n]
        };
        let e2 = [
            s[1] * e1[2] - s[2] * e1[1],
            s[2] * e1[0] - s[0] * e1[2],
            s[0] * e1[1] - s[1] * e1[0],
        ];
        let (st, ct) = theta.sin_cos();
        let (sp, cp) = phi.sin_cos();
        let p = [
            ct * s[0] + st * (cp * e1[0] + sp * e2[0]),
            ct * s[1] + st * (cp * e1[1] + sp * e2[1]),
            ct * s[2] + st * (cp * e1[2] + sp * e2[2]),
        ];
        // Stored directions come from right ascension and declination, as the engine's do.
        let (ra, dec) = radec_of(p);
        unit_vector(ra, dec)
    }

    #[test]
    fn disc_test_equals_the_f64_test_at_the_edge() {
        // Photons within 1e-9..1e-2 relative of the radius, either side: the f32 and f64-on-f32 screens
        // must agree with the exact f64 product every time, including inside their bands.
        use rand::{RngExt, SeedableRng};
        let mut rng = rand_pcg::Pcg64::seed_from_u64(7);
        for r_deg in [0.01, 0.05, 0.5, 3.0, 10.0] {
            let cos_r = f64::to_radians(r_deg).cos();
            let (mut inside, mut outside, mut band32, mut band64, mut screened) = (0, 0, 0, 0, 0);
            for n in 0..300 {
                let s = unit_vector(
                    360.0 * rng.random::<f64>(),
                    (2.0 * rng.random::<f64>() - 1.0).asin().to_degrees(),
                );
                let q = Disc::new(s, cos_r);
                let mut block = Block::default();
                let mut want = 0;
                for j in 0..LANES {
                    // Every other block well clear of the edge (2% to 100% of the radius), for the screen.
                    let rel = if n % 2 == 0 {
                        10f64.powf(-9.0 + 7.0 * rng.random::<f64>())
                    } else {
                        0.02 + 0.98 * rng.random::<f64>()
                    };
                    let sign = if rng.random::<bool>() { 1.0 } else { -1.0 };
                    let v = at_angle(
                        s,
                        r_deg.to_radians() * (1.0 + sign * rel),
                        6.3 * rng.random::<f64>(),
                    );
                    let d = dot(v, s);
                    let exact = d >= cos_r;
                    let (x, y, z) = (v[0] as f32, v[1] as f32, v[2] as f32);
                    assert_eq!(
                        q.contains(x, y, z, &v),
                        exact,
                        "r {r_deg}: d - cos r = {:e}",
                        d - cos_r
                    );
                    (block.x[j], block.y[j], block.z[j]) = (x, y, z);
                    want += u32::from(exact);
                    if exact {
                        inside += 1;
                    } else {
                        outside += 1;
                    }
                    band32 += usize::from((d - cos_r).abs() < BAND32);
                    band64 += usize::from((d - cos_r).abs() < BAND64);
                }
                // The block screen brackets the count, and gives it when nothing lies in the f32 band.
                let (sure, maybe) = q.screen(&block);
                let (sure, maybe) = (sure.count_ones(), maybe.count_ones());
                assert!(
                    sure <= want && want <= maybe,
                    "r {r_deg}: {sure} <= {want} <= {maybe}"
                );
                if sure == maybe {
                    screened += 1;
                }
            }
            // Both outcomes, and both bands, were exercised (at 0.01 deg the f32 band holds every photon).
            assert!(
                inside > 500 && outside > 500,
                "r {r_deg}: {inside} in, {outside} out"
            );
            assert!(
                band64 > 100 && band32 >= band64,
                "r {r_deg}: {band32} in the f32 band, {band64} in the f64"
            );
            assert!(
                r_deg < 0.5 || screened > 100,
                "r {r_deg}: {screened} blocks cleared the screen"
            );
        }
    }

    /// The walk the seeded test replaced: every photon of the neighbourhood newest first, exact times and
    /// directions, each in the disc binned by age.
    fn plain_walk(idx: &SkyIndex, slot: u32, v: [f64; 3], t: i64, cos_r: f64, ladder: &[i64]) -> Vec<u32> {
        let mut hist = vec![0; ladder.len()];
        let limit = ladder[ladder.len() - 1];
        let mut slots = [0u32; 9];
        let ns = idx.neighbourhood(slot, v, &mut slots);
        for &s in &slots[..ns] {
            let mut k = 0;
            for h in idx.bucket(s).held.iter().rev() {
                let age = t - h.t;
                if age >= limit {
                    break;
                }
                if dot(h.v, v) >= cos_r {
                    while age >= ladder[k] {
                        k += 1;
                    }
                    hist[k] += 1;
                }
            }
        }
        hist
    }

    #[test]
    fn sub_pixel_bounds_never_spare_a_count_that_reaches_its_critical_count() {
        // A stream whose density changes (a 3 x 3 degree patch, then 12 x 12), with ties and times on a 1 us
        // grid; the windows follow a ladder and the fifo is evicted as the engine does. At every seed, with
        // the plain walk's cumulative counts n_k: critical counts equal to them on any one timescale (the
        // others out of reach) must be reported as reachable; the windowed counts summed over all sub-pixels,
        // and the pixel totals, equal the photons inside each window; and critical counts of 2 n_k + 3 are
        // mostly found out of reach (the bounds are tight enough to spare the walk).
        use rand::{RngExt, SeedableRng};
        let mut rng = rand_pcg::Pcg64::seed_from_u64(23);
        let r = 0.5;
        let cos_r = f64::to_radians(r).cos();
        let ladder = vec![1_000_000, 3_000_000, 10_000_000, 65_536_000, 300_000_000];
        let mut idx = SkyIndex::new(r);
        idx.follow_windows(&ladder);
        let mut t = 1_420_000_000_000_000_000i64;
        let mut times = std::collections::VecDeque::new();
        let (mut seeds, mut spared, mut refined) = (0u64, 0u64, 0u64);
        for i in 0..30_000 {
            let w = if i < 15_000 { 3.0 } else { 12.0 };
            if rng.random::<f64>() > 0.1 {
                t += 1000 * (1 + (rng.random::<f64>() * 60.0) as i64);
            }
            let p = ph(t, 40.0 + w * rng.random::<f64>(), 10.0 + w * rng.random::<f64>());
            let v = unit_vector(p.ra, p.dec);
            let slot = idx.insert(&p, v);
            times.push_back(t);
            idx.advance_windows(t);
            idx.evict_before(t - 400_000_000);
            while times.front().is_some_and(|&x| x < t - 400_000_000) {
                times.pop_front();
            }
            if i % 997 == 0 {
                for (k, &dt) in ladder.iter().enumerate() {
                    let want = times.iter().filter(|&&x| t - x < dt).count() as u64;
                    let cells: u64 = match k.checked_sub(idx.fine_from) {
                        Some(row) => idx
                            .fines
                            .iter()
                            .map(|f| f.cnt[row].iter().map(|&c| u64::from(c)).sum::<u64>())
                            .sum(),
                        None => want,
                    };
                    let tot: u64 = idx.fines.iter().map(|f| u64::from(f.tot[k])).sum();
                    assert_eq!((cells, tot), (want, want), "photon {i}, window {dt}");
                }
            }
            let hist = plain_walk(&idx, slot, v, t, cos_r, &ladder);
            let cum: Vec<u32> = hist
                .iter()
                .scan(0, |n, &h| {
                    *n += h;
                    Some(*n)
                })
                .collect();
            let k = i % ladder.len();
            let mut crit = vec![u32::MAX; ladder.len()];
            crit[k] = cum[k];
            assert!(
                idx.may_cross(slot, v, &crit),
                "photon {i}: timescale {k} at {} spared",
                cum[k]
            );
            // The timescales with sub-pixel counts at twice their counts, the others out of reach.
            let loose: Vec<u32> = cum
                .iter()
                .enumerate()
                .map(|(k, &n)| if k < idx.fine_from { u32::MAX } else { 2 * n + 3 })
                .collect();
            seeds += 1;
            spared += u64::from(!idx.may_cross(slot, v, &loose));
            refined += u64::from(idx.fines.iter().any(|f| f.geo.is_some()));
        }
        assert!(
            spared * 10 > seeds * 7 && refined > 0,
            "{spared} of {seeds} seeds spared at twice their counts"
        );
    }

    #[test]
    fn disc_counts_equal_a_plain_walk() {
        // A stream into a 4 x 4 degree patch, dense enough for pixels of hundreds of photons (many blocks,
        // rings wrapping as photons are evicted), then into a 16 x 16 degree one (pixels of tens of photons,
        // rings of a few blocks, the newest and oldest photons sometimes in one block), then into a 60 x 40
        // degree one (pixels of a few photons, walked plainly); times on a 1 us grid with ties, so that ages
        // meet the timescales' cut-offs exactly and the coarse times' 65.536 us steps every which way. Every
        // photon seeds a test on three ladders; the counts must equal the plain walk's.
        use rand::{RngExt, SeedableRng};
        let mut rng = rand_pcg::Pcg64::seed_from_u64(11);
        let r = 0.5;
        let cos_r = f64::to_radians(r).cos();
        let ladders: [Vec<i64>; 3] = [
            vec![10_000_000, 30_000_000, 100_000_000, 300_000_000, 1_000_000_000],
            vec![
                1, 65_000, 65_536, 131_072, 200_000, 1_000_000, 5_000_000, 20_000_000,
            ],
            vec![3_000_000, 7_000_000],
        ];
        let steps: Vec<Vec<Step>> = ladders
            .iter()
            .map(|l| l.iter().map(|&d| Step::new(d)).collect())
            .collect();
        let mut idx = SkyIndex::new(r);
        let mut t = 1_420_000_000_000_000_000i64;
        let (mut seeds, mut counted, mut band) = (0u64, 0u64, 0u64);
        let (mut small, mut shared, mut blocks) = (0, 0, 0);
        for i in 0..75_000 {
            let (w, h, gap) = match i {
                0..30_000 => (4.0, 4.0, 80.0),
                30_000..55_000 => (16.0, 16.0, 400.0),
                _ => (60.0, 40.0, 400.0),
            };
            if rng.random::<f64>() > 0.1 {
                t += 1000 * (1 + (rng.random::<f64>() * gap) as i64);
            }
            let p = ph(t, 40.0 + w * rng.random::<f64>(), 10.0 + h * rng.random::<f64>());
            let v = unit_vector(p.ra, p.dec);
            let slot = idx.insert(&p, v);
            idx.evict_before(t - 1_500_000_000);
            if i == 29_999 {
                blocks = idx
                    .buckets
                    .iter()
                    .map(|b| b.held.len().div_ceil(LANES))
                    .max()
                    .unwrap_or(0);
            }
            if i < 2000 {
                continue;
            }
            let q = Disc::new(v, cos_r);
            for (ladder, steps) in ladders.iter().zip(&steps) {
                let mut hist = vec![0u32; ladder.len() + 2];
                idx.count_disc(slot, &q, t, steps, &mut hist);
                let want = plain_walk(&idx, slot, v, t, cos_r, ladder);
                assert_eq!(
                    &hist[..ladder.len()],
                    &want[..],
                    "photon {i} at {t}, ladder {ladder:?}"
                );
                assert_eq!(&hist[ladder.len()..], &[0, 0]);
                counted += u64::from(want.iter().sum::<u32>());
            }
            seeds += 1;
            let held = &idx.bucket(slot).held;
            small += usize::from(held.len() > 1 && held.len() <= 2 * LANES);
            // A ring past two blocks whose oldest photon shares the newest's block.
            shared += usize::from(held.len() > 2 * LANES && held.len() + held.head % LANES > held.capacity());
            let mut slots = [0u32; 9];
            let ns = idx.neighbourhood(slot, v, &mut slots);
            for &s in &slots[..ns] {
                band += idx
                    .bucket(s)
                    .held
                    .iter()
                    .filter(|h| (dot(h.v, v) - cos_r).abs() < BAND64)
                    .count() as u64;
            }
        }
        assert!(blocks >= 8, "largest pixel held only {blocks} blocks");
        assert!(
            small > 1000 && shared > 100,
            "{small} seeds in pixels walked plainly, {shared} in rings whose ends share a block"
        );
        assert!(
            counted > 1_000_000 && band > 100,
            "{seeds} seeds counted {counted} photons, {band} in the band"
        );
    }
}
