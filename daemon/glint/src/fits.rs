//! FITS event lists (the open data format for gamma-ray astronomy: an `EVENTS` binary table with TIME, RA,
//! DEC and ENERGY, and a header giving the time reference) read into photons on glint's own time scale
//! (GPS nanoseconds) and turned into the frames a producer would have sent. `replay` reads such files
//! directly and `import` writes them as recordings; both go through [`read_event_list`] and
//! [`event_list_frames`], so any later reader (tuning) gets the same photons.

use std::io::BufReader;
use std::path::{Path, PathBuf};

use fitsrs::card::Value;
use fitsrs::{DataValue, Fits, HDU};
use glint_science::instrument::SiteSpec;
use glint_sim::sky::SkyFrame;
use glint_wire::pb::{Hello, PhotonBatch, ProducerFrame, producer_frame::Body};
use glint_wire::recording::{RecordingError, RecordingReader};
use hifitime::{Duration, Epoch, TimeScale};

/// Photons per batch in the frames made from an event list (the simulator's default size).
const BATCH_PHOTONS: usize = 256;

/// MJD of the GPS epoch, 1980-01-06 (the GPS time scale counts SI seconds from its midnight).
const GPS_EPOCH_MJD: i64 = 44_244;

const NS_PER_DAY: i64 = 86_400_000_000_000;

/// Why an event list could not be read. Rows count from 1, as FITS tools show them.
#[derive(Debug, thiserror::Error)]
pub(crate) enum FitsError {
    /// The file could not be opened.
    #[error("{}: cannot open: {source}", path.display())]
    Open {
        /// The file.
        path: PathBuf,
        /// Why.
        source: std::io::Error,
    },
    /// The FITS parser gave up.
    #[error("{}: not a readable FITS file: {detail}", path.display())]
    Parse {
        /// The file.
        path: PathBuf,
        /// The parser's message.
        detail: String,
    },
    /// No binary table named EVENTS.
    #[error("{}: no binary table with EXTNAME = 'EVENTS' (not an event list)", path.display())]
    NoEvents {
        /// The file.
        path: PathBuf,
    },
    /// A required column is absent.
    #[error("{}: the EVENTS table has no {column} column (columns: {present})", path.display())]
    MissingColumn {
        /// The file.
        path: PathBuf,
        /// The column wanted.
        column: &'static str,
        /// The columns the table has.
        present: String,
    },
    /// A column has a type that cannot hold the quantity (text, complex, arrays).
    #[error("{}: column {column} has format {tform}, expected one number per row (D, E, J, K, I or B)", path.display())]
    BadColumnType {
        /// The file.
        path: PathBuf,
        /// The column.
        column: &'static str,
        /// Its TFORM.
        tform: String,
    },
    /// A required header keyword is absent or not a number/string as it should be.
    #[error("{}: header keyword {key} is missing or malformed (the time reference needs it)", path.display())]
    MissingKey {
        /// The file.
        path: PathBuf,
        /// The keyword.
        key: &'static str,
    },
    /// TIMESYS names a scale glint does not convert.
    #[error("{}: TIMESYS = '{found}' is not supported (use TT, TAI, UTC or GPS)", path.display())]
    UnknownTimesys {
        /// The file.
        path: PathBuf,
        /// The value found.
        found: String,
    },
    /// A unit that is not the kind of quantity the column holds.
    #[error("{}: {what} has unit '{unit}', expected {expected}", path.display())]
    WrongUnit {
        /// The file.
        path: PathBuf,
        /// The column or keyword.
        what: &'static str,
        /// The unit found.
        unit: String,
        /// What would be accepted.
        expected: &'static str,
    },
    /// A row holds NaN or infinity.
    #[error("{}: row {row}: {column} is not a finite number ({value})", path.display())]
    NotFinite {
        /// The file.
        path: PathBuf,
        /// The row, from 1.
        row: usize,
        /// The column.
        column: &'static str,
        /// The value.
        value: f64,
    },
    /// A row holds a value outside what the quantity allows.
    #[error("{}: row {row}: {column} = {value} is out of range ({range})", path.display())]
    OutOfRange {
        /// The file.
        path: PathBuf,
        /// The row, from 1.
        row: usize,
        /// The column.
        column: &'static str,
        /// The value.
        value: f64,
        /// The allowed range.
        range: &'static str,
    },
    /// Columns with TSCAL/TZERO scaling, which this reader does not apply.
    #[error("{}: column {column} is scaled (TSCAL/TZERO); unscaled columns only", path.display())]
    Scaled {
        /// The file.
        path: PathBuf,
        /// The column.
        column: &'static str,
    },
    /// No instrument to read the file as.
    #[error("{}: which instrument took these photons? give --instrument (the file's INSTRUME is {found:?}, the configuration has {configured})", path.display())]
    NoInstrument {
        /// The file.
        path: PathBuf,
        /// The file's INSTRUME, if any.
        found: Option<String>,
        /// The configured instrument ids.
        configured: String,
    },
    /// A recording that could not be read.
    #[error(transparent)]
    Recording(#[from] RecordingError),
    /// A time before the GPS epoch or past what 64-bit nanoseconds hold.
    #[error("{}: row {row}: the event time falls outside 1980-2262, check MJDREF and TIMEUNIT", path.display())]
    TimeOutOfRange {
        /// The file.
        path: PathBuf,
        /// The row, from 1.
        row: usize,
    },
}

/// The time scale a file's TIME column is given in (FITS keyword TIMESYS).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum TimeSys {
    /// Terrestrial Time.
    Tt,
    /// International Atomic Time.
    Tai,
    /// Coordinated Universal Time: the reference date is a UTC date, and elapsed TIME is SI seconds.
    Utc,
    /// GPS time.
    Gps,
}

impl TimeSys {
    fn parse(text: &str) -> Option<Self> {
        match text.trim().to_ascii_uppercase().as_str() {
            "TT" | "TDT" | "ET" => Some(Self::Tt),
            "TAI" | "IAT" => Some(Self::Tai),
            "UTC" => Some(Self::Utc),
            "GPS" => Some(Self::Gps),
            _ => None,
        }
    }

    /// The scale minus GPS time, nanoseconds, for the scales at a fixed offset from it. TT = TAI + 32.184 s
    /// and TAI = GPS + 19 s by their definitions, so TT - GPS = 51.184 s exactly (common practice, no
    /// source; docs/science.md, time scales).
    fn minus_gps_ns(self) -> Option<i64> {
        match self {
            Self::Tt => Some(51_184_000_000),
            Self::Tai => Some(19_000_000_000),
            Self::Gps => Some(0),
            Self::Utc => None,
        }
    }
}

/// An event list on glint's time scale, sorted by time (stable: equal times keep the file's order).
#[derive(Debug, Clone, Default)]
pub(crate) struct EventList {
    /// Event times, GPS nanoseconds.
    pub(crate) time_gps_ns: Vec<i64>,
    /// ICRS right ascension, degrees in [0, 360).
    pub(crate) ra_deg: Vec<f64>,
    /// ICRS declination, degrees.
    pub(crate) dec_deg: Vec<f64>,
    /// Energy, GeV.
    pub(crate) energy_gev: Vec<f64>,
    /// Zenith and azimuth from the file's ALT and AZ columns, when it has both.
    pub(crate) alt_az_deg: Option<Vec<(f64, f64)>>,
    /// The file's TIMESYS.
    pub(crate) timesys: Option<TimeSys>,
    /// The file's INSTRUME keyword, if any.
    pub(crate) instrument: Option<String>,
}

impl EventList {
    /// Number of events.
    pub(crate) fn len(&self) -> usize {
        self.time_gps_ns.len()
    }
}

/// Whether a path names a FITS file by its suffix (`.fits`, `.fit`, `.fts`, `.evt`, any of them `.gz`
/// is not read: compressed FITS is left to the tools that write it).
pub(crate) fn is_fits_path(path: &Path) -> bool {
    let name = path.to_string_lossy().to_ascii_lowercase();
    [".fits", ".fit", ".fts", ".evt"]
        .iter()
        .any(|s| name.ends_with(s))
}

/// A header value as a float (integers widen).
fn num(v: Option<&Value>) -> Option<f64> {
    match v? {
        Value::Integer { value, .. } => Some(*value as f64),
        Value::Float { value, .. } => Some(*value),
        _ => None,
    }
}

/// A header value as trimmed text.
fn text(v: Option<&Value>) -> Option<String> {
    match v? {
        Value::String { value, .. } => Some(value.trim().to_string()),
        _ => None,
    }
}

/// Seconds per unit of a time unit name (FITS standard, time units table).
fn seconds_per(unit: &str) -> Option<f64> {
    match unit.trim() {
        "s" | "S" | "sec" | "" => Some(1.0),
        "ms" => Some(1e-3),
        "us" => Some(1e-6),
        "ns" => Some(1e-9),
        "min" => Some(60.0),
        "h" => Some(3600.0),
        "d" => Some(86_400.0),
        _ => None,
    }
}

/// GeV per unit of an energy unit name.
fn gev_per(unit: &str) -> Option<f64> {
    match unit.trim() {
        "eV" => Some(1e-9),
        "keV" => Some(1e-6),
        "MeV" => Some(1e-3),
        "GeV" => Some(1.0),
        "TeV" => Some(1e3),
        "PeV" => Some(1e6),
        _ => None,
    }
}

/// Degrees per unit of an angle unit name; no unit reads as degrees, the format's convention.
fn deg_per(unit: &str) -> Option<f64> {
    match unit.trim() {
        "deg" | "degree" | "degrees" | "" => Some(1.0),
        "rad" => Some(180.0 / std::f64::consts::PI),
        "arcmin" => Some(1.0 / 60.0),
        "arcsec" => Some(1.0 / 3600.0),
        _ => None,
    }
}

/// One numeric cell, or `None` for a type that is not a plain number.
fn cell(v: &DataValue) -> Option<f64> {
    match v {
        DataValue::Double { value, .. } => Some(*value),
        DataValue::Float { value, .. } => Some(f64::from(*value)),
        DataValue::Integer { value, .. } => Some(f64::from(*value)),
        DataValue::Long { value, .. } => Some(*value as f64),
        DataValue::Short { value, .. } => Some(f64::from(*value)),
        DataValue::UnsignedByte { value, .. } => Some(f64::from(*value)),
        _ => None,
    }
}

/// A count of `unit_s`-second units as nanoseconds, exact to well under a nanosecond for the magnitudes
/// event lists use (the whole part and the fraction are scaled apart, so 1e9 s of TIME keep their ns).
fn units_to_ns(value: f64, unit_s: f64) -> Option<i128> {
    let whole = value.trunc();
    let frac = value - whole;
    let unit_ns = unit_s * 1e9;
    if whole.is_nan() || whole.abs() >= 1e15 {
        return None;
    }
    // unit_ns is an integer for every unit of `seconds_per` except sub-nanosecond ones, which it has none of.
    let whole_ns = (whole as i128).checked_mul(unit_ns.round() as i128)?;
    Some(whole_ns + (frac * unit_ns).round() as i128)
}

/// One event as read: GPS ns, RA, Dec, energy in GeV, and zenith and azimuth when the file gives them.
type Row = (i64, f64, f64, f64, Option<(f64, f64)>);

/// Reads the EVENTS table of a FITS event list. Times are converted from the file's TIMESYS, MJDREF and
/// TIMEUNIT (TIMEZERO added) to GPS nanoseconds; energies to GeV from TUNIT; rows with NaN, an infinite
/// value or an impossible coordinate are errors naming the row.
pub(crate) fn read_event_list(path: &Path) -> Result<EventList, FitsError> {
    let p = || path.to_path_buf();
    let file = std::fs::File::open(path).map_err(|source| FitsError::Open { path: p(), source })?;
    let mut fits = Fits::from_reader(BufReader::new(file));
    let mut primary_keys: Vec<(String, Value)> = Vec::new();
    loop {
        let hdu = match fits.next() {
            None => return Err(FitsError::NoEvents { path: p() }),
            Some(Err(e)) => {
                return Err(FitsError::Parse {
                    path: p(),
                    detail: e.to_string(),
                });
            }
            Some(Ok(h)) => h,
        };
        match hdu {
            HDU::Primary(h) => {
                // The time reference may sit in the primary header; the table's own keys win.
                let hdr = h.get_header();
                for key in [
                    "MJDREFI", "MJDREFF", "MJDREF", "TIMESYS", "TIMEUNIT", "TIMEZERO", "INSTRUME",
                ] {
                    if let Some(v) = hdr.get(key) {
                        primary_keys.push((key.to_string(), v.clone()));
                    }
                }
            }
            HDU::XBinaryTable(h) => {
                let hdr = h.get_header();
                if text(hdr.get("EXTNAME")).is_none_or(|n| !n.eq_ignore_ascii_case("EVENTS")) {
                    continue;
                }
                let key = |k: &str| -> Option<Value> {
                    hdr.get(k)
                        .cloned()
                        .or_else(|| primary_keys.iter().find(|(n, _)| n == k).map(|(_, v)| v.clone()))
                };
                let ncols = hdr.get_xtension().get_num_cols();
                let names: Vec<String> = (1..=ncols)
                    .map(|i| text(hdr.get(&format!("TTYPE{i}"))).unwrap_or_default())
                    .collect();
                let find = |column: &'static str| -> Result<usize, FitsError> {
                    let i = names
                        .iter()
                        .position(|n| n.eq_ignore_ascii_case(column))
                        .ok_or_else(|| FitsError::MissingColumn {
                            path: p(),
                            column,
                            present: names.join(", "),
                        })?;
                    let tform = text(hdr.get(&format!("TFORM{}", i + 1))).unwrap_or_default();
                    let code = tform.trim_start_matches('1');
                    if !matches!(code, "D" | "E" | "J" | "K" | "I" | "B") {
                        return Err(FitsError::BadColumnType {
                            path: p(),
                            column,
                            tform,
                        });
                    }
                    let scaled = num(hdr.get(&format!("TSCAL{}", i + 1))).is_some_and(|s| s != 1.0)
                        || num(hdr.get(&format!("TZERO{}", i + 1))).is_some_and(|z| z != 0.0);
                    if scaled {
                        return Err(FitsError::Scaled { path: p(), column });
                    }
                    Ok(i)
                };
                let unit_of = |i: usize| text(hdr.get(&format!("TUNIT{}", i + 1))).unwrap_or_default();
                let cols = [find("TIME")?, find("RA")?, find("DEC")?, find("ENERGY")?];
                let alt_az = match (find("ALT"), find("AZ")) {
                    (Ok(a), Ok(z)) => Some((a, z)),
                    _ => None,
                };

                // The time reference: MJDREFI + MJDREFF (or MJDREF) in TIMESYS, TIMEZERO, TIMEUNIT.
                let timesys_text = text(key("TIMESYS").as_ref()).unwrap_or_else(|| "TT".into());
                let timesys = TimeSys::parse(&timesys_text).ok_or_else(|| FitsError::UnknownTimesys {
                    path: p(),
                    found: crate::logging::untrusted(&timesys_text),
                })?;
                let (mjd_i, mjd_f) = match (num(key("MJDREFI").as_ref()), num(key("MJDREFF").as_ref())) {
                    (Some(i), Some(f)) => (i, f),
                    (Some(i), None) => (i, 0.0),
                    _ => {
                        let m = num(key("MJDREF").as_ref()).ok_or(FitsError::MissingKey {
                            path: p(),
                            key: "MJDREFI",
                        })?;
                        (m.floor(), m - m.floor())
                    }
                };
                if mjd_i.fract() != 0.0 || !mjd_f.is_finite() || !(0.0..100_000.0).contains(&mjd_i) {
                    return Err(FitsError::MissingKey {
                        path: p(),
                        key: "MJDREFI",
                    });
                }
                let timeunit = text(key("TIMEUNIT").as_ref()).unwrap_or_default();
                let col_unit = unit_of(cols[0]);
                let unit_name = if col_unit.is_empty() { timeunit } else { col_unit };
                let unit_s = seconds_per(&unit_name).ok_or_else(|| FitsError::WrongUnit {
                    path: p(),
                    what: "TIME",
                    unit: crate::logging::untrusted(&unit_name),
                    expected: "a time unit (s, d, ...)",
                })?;
                let timezero = num(key("TIMEZERO").as_ref()).unwrap_or(0.0);
                let energy_unit = unit_of(cols[3]);
                let gev = gev_per(&energy_unit).ok_or_else(|| FitsError::WrongUnit {
                    path: p(),
                    what: "ENERGY",
                    unit: crate::logging::untrusted(&energy_unit),
                    expected: "an energy unit (eV, keV, MeV, GeV, TeV, PeV)",
                })?;
                let angle = |i: usize, what: &'static str| -> Result<f64, FitsError> {
                    let u = unit_of(i);
                    deg_per(&u).ok_or_else(|| FitsError::WrongUnit {
                        path: p(),
                        what,
                        unit: crate::logging::untrusted(&u),
                        expected: "an angle unit (deg, rad)",
                    })
                };
                let (ra_u, dec_u) = (angle(cols[1], "RA")?, angle(cols[2], "DEC")?);
                let altaz_u = match alt_az {
                    Some((a, z)) => Some((angle(a, "ALT")?, angle(z, "AZ")?)),
                    None => None,
                };

                // The reference instant in GPS ns: whole days exactly, the fraction of a day through f64
                // (MJDREFF carries about 1e-16 days, far below a nanosecond).
                let ref_gps_ns: i128 = match timesys.minus_gps_ns() {
                    Some(off) => {
                        i128::from(mjd_i as i64 - GPS_EPOCH_MJD) * i128::from(NS_PER_DAY)
                            + (mjd_f * NS_PER_DAY as f64).round() as i128
                            - i128::from(off)
                    }
                    None => {
                        // A UTC date: its GPS instant needs the leap seconds in force then (hifitime).
                        let day = Epoch::from_mjd_in_time_scale(mjd_i, TimeScale::UTC);
                        let at = day
                            + Duration::from_total_nanoseconds((mjd_f * NS_PER_DAY as f64).round() as i128);
                        at.to_gpst_nanoseconds()
                            .map(i128::from)
                            .map_err(|_| FitsError::MissingKey {
                                path: p(),
                                key: "MJDREFI",
                            })?
                    }
                };
                let zero_ns = units_to_ns(timezero, unit_s).ok_or(FitsError::MissingKey {
                    path: p(),
                    key: "TIMEZERO",
                })?;

                let nrows = hdr.get_xtension().get_num_rows();
                let mut out = EventList {
                    timesys: Some(timesys),
                    instrument: text(key("INSTRUME").as_ref()),
                    alt_az_deg: alt_az.map(|_| Vec::with_capacity(nrows)),
                    ..EventList::default()
                };
                let mut rows: Vec<Row> = Vec::with_capacity(nrows);
                let data = fits.get_data(&h);
                for (r, row) in data.row_iter().enumerate() {
                    let row_no = r + 1;
                    let get = |i: usize, column: &'static str| -> Result<f64, FitsError> {
                        let v = row
                            .get(i)
                            .and_then(cell)
                            .ok_or_else(|| FitsError::BadColumnType {
                                path: p(),
                                column,
                                tform: "?".into(),
                            })?;
                        if v.is_finite() {
                            Ok(v)
                        } else {
                            Err(FitsError::NotFinite {
                                path: p(),
                                row: row_no,
                                column,
                                value: v,
                            })
                        }
                    };
                    let t = get(cols[0], "TIME")?;
                    let ra = get(cols[1], "RA")? * ra_u;
                    let dec = get(cols[2], "DEC")? * dec_u;
                    let e = get(cols[3], "ENERGY")? * gev;
                    let range = |column, value: f64, ok: bool, range| {
                        if ok {
                            Ok(())
                        } else {
                            Err(FitsError::OutOfRange {
                                path: p(),
                                row: row_no,
                                column,
                                value,
                                range,
                            })
                        }
                    };
                    range("DEC", dec, (-90.0..=90.0).contains(&dec), "-90 to 90 deg")?;
                    range("ENERGY", e, e > 0.0, "> 0")?;
                    range("RA", ra, (-360.0..=720.0).contains(&ra), "0 to 360 deg")?;
                    let ra = ra.rem_euclid(360.0);
                    let altaz = match (alt_az, altaz_u) {
                        (Some((a, z)), Some((au, zu))) => {
                            let alt = get(a, "ALT")? * au;
                            range("ALT", alt, (-90.0..=90.0).contains(&alt), "-90 to 90 deg")?;
                            Some((90.0 - alt, (get(z, "AZ")? * zu).rem_euclid(360.0)))
                        }
                        _ => None,
                    };
                    let ns = units_to_ns(t, unit_s)
                        .map(|n| ref_gps_ns + zero_ns + n)
                        .and_then(|n| i64::try_from(n).ok())
                        .filter(|n| *n > 0)
                        .ok_or(FitsError::TimeOutOfRange {
                            path: p(),
                            row: row_no,
                        })?;
                    rows.push((ns, ra, dec, e, altaz));
                }
                rows.sort_by_key(|r| r.0);
                for (t, ra, dec, e, altaz) in rows {
                    out.time_gps_ns.push(t);
                    out.ra_deg.push(ra);
                    out.dec_deg.push(dec);
                    out.energy_gev.push(e);
                    if let (Some(v), Some(za)) = (&mut out.alt_az_deg, altaz) {
                        v.push(za);
                    }
                }
                return Ok(out);
            }
            _ => {}
        }
    }
}

/// The frames a producer would have sent for `events`: a `Hello` naming `instrument`, then batches of
/// [`BATCH_PHOTONS`] in time order, each promising that nothing earlier than the next batch's first photon
/// follows. Zenith and azimuth come from the file's ALT/AZ when it has them, else from `site`.
pub(crate) fn event_list_frames(
    events: &EventList,
    instrument: &str,
    site: &SiteSpec,
    source: &Path,
) -> Vec<ProducerFrame> {
    let n = events.len();
    let mut frames = Vec::with_capacity(1 + n.div_ceil(BATCH_PHOTONS));
    frames.push(ProducerFrame {
        body: Some(Body::Hello(Hello {
            instrument: instrument.to_string(),
            token: String::new(),
            schema_version: glint_wire::SCHEMA_VERSION,
            producer: format!(
                "glint {} fits import ({}, TIMESYS {:?})",
                env!("CARGO_PKG_VERSION"),
                source
                    .file_name()
                    .map(|f| f.to_string_lossy().into_owned())
                    .unwrap_or_default(),
                events.timesys
            ),
        })),
    });
    let mut sky = SkyFrame::new(site, events.time_gps_ns.first().copied().unwrap_or(0));
    let mut start = 0;
    let mut seq = 1;
    while start < n {
        let end = (start + BATCH_PHOTONS).min(n);
        let mut b = PhotonBatch {
            seq,
            ..PhotonBatch::default()
        };
        sky.refresh_leap_seconds(events.time_gps_ns[start]);
        for i in start..end {
            let t = events.time_gps_ns[i];
            let (z, az) = match &events.alt_az_deg {
                Some(v) => v[i],
                None => sky.to_instrument(events.ra_deg[i], events.dec_deg[i], t),
            };
            b.time_gps_ns.push(t);
            b.ra_deg.push(events.ra_deg[i]);
            b.dec_deg.push(events.dec_deg[i]);
            b.zenith_deg.push(z as f32);
            // f32 rounding can lift 359.99999 to 360.0, which the wire refuses.
            b.azimuth_deg
                .push(if (az as f32) >= 360.0 { 0.0 } else { az as f32 });
            b.energy_gev.push(events.energy_gev[i] as f32);
        }
        let last = events.time_gps_ns[end - 1];
        b.complete_before_gps_ns = match events.time_gps_ns.get(end) {
            Some(next) => (*next).min(last + 1),
            None => last + 1,
        };
        frames.push(ProducerFrame {
            body: Some(Body::Batch(b)),
        });
        start = end;
        seq += 1;
    }
    frames
}

/// A file read through a counter of the bytes taken from disk, for the progress estimate of a compressed
/// recording (whose uncompressed offset says nothing about how much of the file is left).
#[derive(Debug)]
pub(crate) struct CountingFile {
    file: std::fs::File,
    read: std::rc::Rc<std::cell::Cell<u64>>,
}

impl std::io::Read for CountingFile {
    fn read(&mut self, buf: &mut [u8]) -> std::io::Result<usize> {
        let n = self.file.read(buf)?;
        self.read.set(self.read.get() + n as u64);
        Ok(n)
    }
}

/// The frames of one input of `replay` (and of any command that reads what replay reads): a recording,
/// streamed, or a FITS event list, read whole and turned into frames for `instrument`, else for the file's
/// INSTRUME when configured, else for the configuration's only instrument.
pub(crate) struct InputFrames {
    frames: Frames,
    size: u64,
}

enum Frames {
    // Boxed: the reader holds its buffers inline and the enum would be that size for FITS input too.
    Recording(
        Box<RecordingReader<CountingFile>>,
        std::rc::Rc<std::cell::Cell<u64>>,
    ),
    Fits(std::vec::IntoIter<ProducerFrame>, usize),
}

impl InputFrames {
    /// Opens `path` by its suffix (FITS for `.fits`, `.fit`, `.fts`, `.evt`; a recording otherwise).
    pub(crate) fn open(
        path: &Path,
        cfg: &crate::config::Config,
        instrument: Option<&str>,
        max_frame: usize,
    ) -> Result<Self, FitsError> {
        let size = std::fs::metadata(path).map(|m| m.len()).unwrap_or(0);
        if !is_fits_path(path) {
            let file = std::fs::File::open(path).map_err(|source| FitsError::Open {
                path: path.to_path_buf(),
                source,
            })?;
            let read = std::rc::Rc::new(std::cell::Cell::new(0));
            let counting = CountingFile {
                file,
                read: read.clone(),
            };
            let reader = RecordingReader::new(counting, path, max_frame)?;
            return Ok(Self {
                frames: Frames::Recording(Box::new(reader), read),
                size,
            });
        }
        let events = read_event_list(path)?;
        let chosen = instrument
            .and_then(|i| cfg.instrument(i))
            .or_else(|| events.instrument.as_deref().and_then(|i| cfg.instrument(i)))
            .or(match (instrument, cfg.instruments.as_slice()) {
                (None, [only]) => Some(only),
                _ => None,
            })
            .ok_or_else(|| FitsError::NoInstrument {
                path: path.to_path_buf(),
                found: events.instrument.clone(),
                configured: cfg
                    .instruments
                    .iter()
                    .map(|i| i.id.as_str())
                    .collect::<Vec<_>>()
                    .join(", "),
            })?;
        let frames = event_list_frames(&events, &chosen.id, &chosen.spec.site, path);
        let n = frames.len();
        Ok(Self {
            frames: Frames::Fits(frames.into_iter(), n),
            size,
        })
    }

    /// The file's size on disk, bytes.
    pub(crate) fn size(&self) -> u64 {
        self.size
    }

    /// About how many of the file's bytes are behind us (for progress).
    pub(crate) fn bytes_done(&self) -> u64 {
        match &self.frames {
            Frames::Recording(_, read) => read.get().min(self.size),
            Frames::Fits(it, n) => {
                let done = n.saturating_sub(it.len()) as f64 / (*n).max(1) as f64;
                (done * self.size as f64) as u64
            }
        }
    }
}

impl Iterator for InputFrames {
    type Item = Result<ProducerFrame, FitsError>;

    fn next(&mut self) -> Option<Self::Item> {
        match &mut self.frames {
            Frames::Recording(r, _) => r.next().map(|f| f.map_err(FitsError::from)),
            Frames::Fits(f, _) => f.next().map(Ok),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fixed_offsets_follow_the_definitions() {
        // TT = TAI + 32.184 s, TAI = GPS + 19 s (common practice, no source).
        assert_eq!(TimeSys::Tt.minus_gps_ns(), Some(51_184_000_000));
        assert_eq!(TimeSys::Tai.minus_gps_ns(), Some(19_000_000_000));
        assert_eq!(TimeSys::parse("tt"), Some(TimeSys::Tt));
        assert_eq!(TimeSys::parse("TDB"), None);
    }

    #[test]
    fn large_times_keep_their_nanoseconds() {
        // 8e8 s plus a fraction: the f64 holds the fraction to about 1e-7 s; it must survive to the ns.
        let v = 8.0e8 + 0.123_456_789;
        let exact = (v - 8.0e8) * 1e9;
        let got = units_to_ns(v, 1.0).unwrap() - 800_000_000_000_000_000;
        assert!((got as f64 - exact).abs() <= 0.5, "{got} vs {exact}");
        assert_eq!(units_to_ns(1.5, 86_400.0), Some(129_600_000_000_000));
        assert_eq!(units_to_ns(f64::NAN, 1.0), None);
    }

    fn reference() -> PathBuf {
        Path::new(env!("CARGO_MANIFEST_DIR")).join("../../tests/reference")
    }

    /// Every photon of the astropy-written files against astropy's own conversion
    /// (tests/reference/make_fits.py, tests/reference/fits_photons.csv).
    #[test]
    fn event_lists_match_astropy_photon_by_photon() {
        let csv = std::fs::read_to_string(reference().join("fits_photons.csv")).unwrap();
        let mut lists: std::collections::BTreeMap<String, EventList> = Default::default();
        let mut checked = 0;
        for line in csv.lines().skip(2) {
            let f: Vec<&str> = line.split(',').collect();
            let ev = lists
                .entry(f[0].to_string())
                .or_insert_with(|| read_event_list(&reference().join("fits").join(f[0])).unwrap());
            let i: usize = f[1].parse::<usize>().unwrap() - 1;
            let want_ns: i64 = f[2].parse().unwrap();
            // Two roundings of half a nanosecond each at most (the day fraction and the TIME fraction).
            assert!(
                (ev.time_gps_ns[i] - want_ns).abs() <= 1,
                "{} row {}: {} ns, astropy {} ns",
                f[0],
                i + 1,
                ev.time_gps_ns[i],
                want_ns
            );
            let close = |a: f64, b: &str| {
                let b: f64 = b.parse().unwrap();
                (a - b).abs() <= 1e-12 * b.abs().max(1.0)
            };
            assert!(close(ev.ra_deg[i], f[3]), "{} row {} RA", f[0], i + 1);
            assert!(close(ev.dec_deg[i], f[4]), "{} row {} DEC", f[0], i + 1);
            assert!(close(ev.energy_gev[i], f[5]), "{} row {} ENERGY", f[0], i + 1);
            if !f[6].is_empty() {
                let z = ev.alt_az_deg.as_ref().unwrap()[i].0;
                assert!(close(z, f[6]), "{} row {} zenith {z} vs {}", f[0], i + 1, f[6]);
            }
            checked += 1;
        }
        assert_eq!(lists.len(), 4, "one file per time system");
        assert!(checked >= 160, "only {checked} photons checked");
        assert_eq!(lists["events_utc.fits"].timesys, Some(TimeSys::Utc));
        assert_eq!(
            lists["events_tai.fits"].instrument.as_deref(),
            Some("ventisca-array")
        );
    }

    #[test]
    fn broken_files_get_their_own_error() {
        let read = |name: &str| read_event_list(&reference().join("fits").join(name)).unwrap_err();
        let e = read("bad_timesys.fits");
        assert!(
            matches!(&e, FitsError::UnknownTimesys { found, .. } if found == "TDB"),
            "{e}"
        );
        let e = read("bad_nan.fits");
        assert!(
            matches!(
                &e,
                FitsError::NotFinite {
                    row: 3,
                    column: "ENERGY",
                    ..
                }
            ),
            "{e}"
        );
        let e = read("bad_no_energy.fits");
        assert!(
            matches!(&e, FitsError::MissingColumn { column: "ENERGY", .. }),
            "{e}"
        );
        assert!(e.to_string().contains("TIME, RA, DEC"), "{e}");
        let e = read("bad_unit.fits");
        assert!(
            matches!(&e, FitsError::WrongUnit { what: "ENERGY", unit, .. } if unit == "m"),
            "{e}"
        );
        let e = read_event_list(&reference().join("fits_photons.csv")).unwrap_err();
        assert!(
            matches!(e, FitsError::Parse { .. } | FitsError::NoEvents { .. }),
            "{e}"
        );
    }

    #[test]
    fn frames_promise_in_order_and_carry_every_photon() {
        let ev = read_event_list(&reference().join("fits/events_tt.fits")).unwrap();
        let site = SiteSpec::Ground {
            latitude_deg: -26.3,
            longitude_deg: -68.4,
            altitude_m: 4100.0,
        };
        let frames = event_list_frames(&ev, "ventisca-array", &site, Path::new("x.fits"));
        assert!(matches!(&frames[0].body, Some(Body::Hello(h)) if h.instrument == "ventisca-array"));
        let mut n = 0;
        for f in &frames[1..] {
            let Some(Body::Batch(b)) = &f.body else {
                panic!("not a batch")
            };
            glint_wire::validate::validate_batch(b, 0).unwrap();
            n += b.time_gps_ns.len();
        }
        assert_eq!(n, ev.len());
    }
}
