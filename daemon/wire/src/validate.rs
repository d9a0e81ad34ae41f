//! Checks on decoded producer frames before anything reaches an engine: a `Hello` the daemon can serve, a
//! `PhotonBatch` whose columns line up and whose values are finite and in range, a `StreamStatus` whose dead
//! intervals are ordered. A batch is accepted or refused as a whole (RefusalCode INVALID_BATCH); the error
//! names the first bad column, photon and value so the producer can find it.

use std::fmt;

use crate::SCHEMA_VERSION;
use crate::pb::{self, RefusalCode};

/// A column of [`pb::PhotonBatch`], named as in the proto.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Column {
    /// `time_gps_ns`
    TimeGpsNs,
    /// `ra_deg`
    RaDeg,
    /// `dec_deg`
    DecDeg,
    /// `zenith_deg`
    ZenithDeg,
    /// `azimuth_deg`
    AzimuthDeg,
    /// `energy_gev`
    EnergyGev,
    /// `psf68_deg`
    Psf68Deg,
    /// `gammaness`
    Gammaness,
}

impl Column {
    /// The field name in the proto.
    pub fn name(self) -> &'static str {
        match self {
            Self::TimeGpsNs => "time_gps_ns",
            Self::RaDeg => "ra_deg",
            Self::DecDeg => "dec_deg",
            Self::ZenithDeg => "zenith_deg",
            Self::AzimuthDeg => "azimuth_deg",
            Self::EnergyGev => "energy_gev",
            Self::Psf68Deg => "psf68_deg",
            Self::Gammaness => "gammaness",
        }
    }
}

impl fmt::Display for Column {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

/// A rejected value, kept in its column's own type so it prints as the producer sent it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Value {
    /// From a `double` column.
    F64(f64),
    /// From a `float` column.
    F32(f32),
}

impl fmt::Display for Value {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Self::F64(v) => write!(f, "{v}"),
            Self::F32(v) => write!(f, "{v}"),
        }
    }
}

/// Why a photon batch is refused. Photon indices count from 0 within the batch.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum BatchError {
    /// A column's length differs from `time_gps_ns` (optional columns may also be empty).
    #[error("column {column} has {len} entries, expected {expected} (time_gps_ns)")]
    ColumnLength {
        /// The short or long column.
        column: Column,
        /// Its entries.
        len: usize,
        /// Entries in `time_gps_ns`.
        expected: usize,
    },
    /// A value is NaN or infinite.
    #[error("photon {index}: {column} = {value} is not finite")]
    NotFinite {
        /// Photon index in the batch.
        index: usize,
        /// Column of the value.
        column: Column,
        /// The value sent.
        value: Value,
    },
    /// A finite value outside its column's allowed range.
    #[error("photon {index}: {column} = {value} is outside {allowed}")]
    OutOfRange {
        /// Photon index in the batch.
        index: usize,
        /// Column of the value.
        column: Column,
        /// The value sent.
        value: Value,
        /// The allowed range, in interval notation, e.g. "[-90, 90]".
        allowed: &'static str,
    },
    /// A photon's time lies further behind the latest time earlier in the batch than the reorder tolerance.
    #[error(
        "photon {index}: time_gps_ns = {time_ns} is {behind_ns} ns before the batch's latest time {latest_ns}, \
         more than the reorder tolerance of {tolerance_ns} ns"
    )]
    TimeBackwards {
        /// Photon index in the batch.
        index: usize,
        /// Its time, GPS ns.
        time_ns: i64,
        /// Latest time among the photons before it, GPS ns.
        latest_ns: i64,
        /// How far behind, ns.
        behind_ns: u64,
        /// The tolerance it exceeded, ns.
        tolerance_ns: i64,
    },
    /// `complete_before_gps_ns` (the promise that no older photon follows) is negative or ahead of what the
    /// batch covers: at most its latest photon time + 1.
    #[error(
        "complete_before_gps_ns = {promise_ns} is outside [0, {max_ns}] (0 = no promise; at most the batch's \
         latest photon time + 1)"
    )]
    PromiseOutOfRange {
        /// The promise sent, GPS ns.
        promise_ns: i64,
        /// The batch's latest photon time + 1, GPS ns.
        max_ns: i64,
    },
    /// A promise on a batch with no photons, which has nothing to bound it.
    #[error("complete_before_gps_ns = {promise_ns} on a batch with no photons: it must be 0")]
    PromiseWithoutPhotons {
        /// The promise sent, GPS ns.
        promise_ns: i64,
    },
}

impl BatchError {
    /// The refusal code the daemon sends (the connection stays open).
    pub fn refusal_code(&self) -> RefusalCode {
        RefusalCode::InvalidBatch
    }
}

/// Checks a batch: equal column lengths, finite values in range, and times that go backwards (relative to the
/// latest earlier time in the batch) by no more than `reorder_tolerance_ns` (a negative tolerance counts as
/// 0). Returns the first problem found, checking lengths first and then photon by photon in column order.
///
/// Ranges: RA [0, 360), Dec [-90, 90], zenith [0, 180], azimuth [0, 360), energy > 0, psf68 > 0 (when
/// present), gammaness [0, 1] (when present). The promise `complete_before_gps_ns` is 0 (none) or in
/// [1, latest photon time + 1], checked after the photons; an empty batch is valid with no promise.
pub fn validate_batch(batch: &pb::PhotonBatch, reorder_tolerance_ns: i64) -> Result<(), BatchError> {
    let n = batch.time_gps_ns.len();
    let required = [
        (Column::RaDeg, batch.ra_deg.len()),
        (Column::DecDeg, batch.dec_deg.len()),
        (Column::ZenithDeg, batch.zenith_deg.len()),
        (Column::AzimuthDeg, batch.azimuth_deg.len()),
        (Column::EnergyGev, batch.energy_gev.len()),
    ];
    let optional = [
        (Column::Psf68Deg, batch.psf68_deg.len()),
        (Column::Gammaness, batch.gammaness.len()),
    ];
    for (column, len) in required {
        if len != n {
            return Err(BatchError::ColumnLength {
                column,
                len,
                expected: n,
            });
        }
    }
    for (column, len) in optional {
        if len != 0 && len != n {
            return Err(BatchError::ColumnLength {
                column,
                len,
                expected: n,
            });
        }
    }

    let tolerance = reorder_tolerance_ns.max(0);
    let mut latest = i64::MIN;
    for i in 0..n {
        let t = batch.time_gps_ns[i];
        if t < latest {
            let behind = latest.abs_diff(t);
            if behind > tolerance.unsigned_abs() {
                return Err(BatchError::TimeBackwards {
                    index: i,
                    time_ns: t,
                    latest_ns: latest,
                    behind_ns: behind,
                    tolerance_ns: tolerance,
                });
            }
        }
        latest = latest.max(t);

        check_f64(
            i,
            Column::RaDeg,
            batch.ra_deg[i],
            |v| (0.0..360.0).contains(&v),
            "[0, 360)",
        )?;
        check_f64(
            i,
            Column::DecDeg,
            batch.dec_deg[i],
            |v| (-90.0..=90.0).contains(&v),
            "[-90, 90]",
        )?;
        check_f32(
            i,
            Column::ZenithDeg,
            batch.zenith_deg[i],
            |v| (0.0..=180.0).contains(&v),
            "[0, 180]",
        )?;
        check_f32(
            i,
            Column::AzimuthDeg,
            batch.azimuth_deg[i],
            |v| (0.0..360.0).contains(&v),
            "[0, 360)",
        )?;
        check_f32(i, Column::EnergyGev, batch.energy_gev[i], |v| v > 0.0, "(0, inf)")?;
        if let Some(&v) = batch.psf68_deg.get(i) {
            check_f32(i, Column::Psf68Deg, v, |v| v > 0.0, "(0, inf)")?;
        }
        if let Some(&v) = batch.gammaness.get(i) {
            check_f32(i, Column::Gammaness, v, |v| (0.0..=1.0).contains(&v), "[0, 1]")?;
        }
    }
    check_promise(batch.complete_before_gps_ns, (n > 0).then_some(latest))
}

/// The promise must not reach past the batch: a producer moves time on through quiet periods with a
/// `StreamStatus`, whose own promise is `now - tolerance`.
fn check_promise(promise_ns: i64, latest: Option<i64>) -> Result<(), BatchError> {
    if promise_ns == 0 {
        return Ok(());
    }
    let Some(latest) = latest else {
        return Err(BatchError::PromiseWithoutPhotons { promise_ns });
    };
    let max_ns = latest.saturating_add(1);
    if promise_ns < 0 || promise_ns > max_ns {
        return Err(BatchError::PromiseOutOfRange { promise_ns, max_ns });
    }
    Ok(())
}

fn check_f64(
    index: usize,
    column: Column,
    v: f64,
    ok: impl Fn(f64) -> bool,
    allowed: &'static str,
) -> Result<(), BatchError> {
    let value = Value::F64(v);
    if !v.is_finite() {
        Err(BatchError::NotFinite { index, column, value })
    } else if !ok(v) {
        Err(BatchError::OutOfRange {
            index,
            column,
            value,
            allowed,
        })
    } else {
        Ok(())
    }
}

fn check_f32(
    index: usize,
    column: Column,
    v: f32,
    ok: impl Fn(f32) -> bool,
    allowed: &'static str,
) -> Result<(), BatchError> {
    let value = Value::F32(v);
    if !v.is_finite() {
        Err(BatchError::NotFinite { index, column, value })
    } else if !ok(v) {
        Err(BatchError::OutOfRange {
            index,
            column,
            value,
            allowed,
        })
    } else {
        Ok(())
    }
}

/// Why a stream status frame is refused.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum StatusError {
    /// A dead interval ends before it starts. Index counts from 0 within the frame.
    #[error("dead interval {index}: end_gps_ns = {end_ns} is before start_gps_ns = {start_ns}")]
    DeadIntervalReversed {
        /// Interval index in the frame.
        index: usize,
        /// Its start, GPS ns.
        start_ns: i64,
        /// Its end, GPS ns.
        end_ns: i64,
    },
}

impl StatusError {
    /// The refusal code the daemon sends (the connection stays open).
    pub fn refusal_code(&self) -> RefusalCode {
        RefusalCode::InvalidBatch
    }
}

/// Checks a status frame: every dead interval ends at or after its start (an empty interval is allowed).
pub fn validate_status(status: &pb::StreamStatus) -> Result<(), StatusError> {
    for (index, d) in status.dead.iter().enumerate() {
        if d.end_gps_ns < d.start_gps_ns {
            return Err(StatusError::DeadIntervalReversed {
                index,
                start_ns: d.start_gps_ns,
                end_ns: d.end_gps_ns,
            });
        }
    }
    Ok(())
}

/// Why a `Hello` cannot open a producer connection (before the token and instrument are looked up).
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum HelloError {
    /// `instrument` is empty.
    #[error("hello names no instrument")]
    EmptyInstrument,
    /// `schema_version` is not the one this build reads.
    #[error("schema version {got} is not supported (this daemon reads version {supported})")]
    SchemaUnsupported {
        /// Version the producer sent.
        got: u32,
        /// [`SCHEMA_VERSION`].
        supported: u32,
    },
}

impl HelloError {
    /// The refusal code the daemon sends before closing the connection.
    pub fn refusal_code(&self) -> RefusalCode {
        match self {
            Self::EmptyInstrument => RefusalCode::UnknownInstrument,
            Self::SchemaUnsupported { .. } => RefusalCode::SchemaUnsupported,
        }
    }
}

/// Checks a `Hello`: a non-empty instrument id and `schema_version == SCHEMA_VERSION`. The token is the
/// daemon's to compare, against its configuration.
pub fn validate_hello(hello: &pb::Hello) -> Result<(), HelloError> {
    if hello.instrument.is_empty() {
        return Err(HelloError::EmptyInstrument);
    }
    if hello.schema_version != SCHEMA_VERSION {
        return Err(HelloError::SchemaUnsupported {
            got: hello.schema_version,
            supported: SCHEMA_VERSION,
        });
    }
    Ok(())
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap: a panic is the failure report
mod tests {
    use super::*;
    use crate::testdata;

    const TOL: i64 = 1_000_000; // 1 ms

    fn batch() -> pb::PhotonBatch {
        testdata::full_batch(3, 1_400_000_000_000_000_000, 10)
    }

    #[test]
    fn valid_batches_pass() {
        assert_eq!(validate_batch(&batch(), TOL), Ok(()));
        assert_eq!(validate_batch(&pb::PhotonBatch::default(), 0), Ok(()));
        let mut b = batch();
        b.psf68_deg.clear();
        b.gammaness.clear();
        assert_eq!(validate_batch(&b, TOL), Ok(()));
        // Boundaries that are inside the allowed ranges.
        b.ra_deg[0] = 0.0;
        b.dec_deg[0] = -90.0;
        b.dec_deg[1] = 90.0;
        b.zenith_deg[0] = 180.0;
        b.azimuth_deg[0] = 0.0;
        b.ra_deg[1] = 359.999_999;
        assert_eq!(validate_batch(&b, TOL), Ok(()));
    }

    #[test]
    fn unequal_columns_name_column_and_counts() {
        let mut b = batch();
        b.dec_deg.pop();
        let err = validate_batch(&b, TOL).unwrap_err();
        assert_eq!(
            err,
            BatchError::ColumnLength {
                column: Column::DecDeg,
                len: 9,
                expected: 10
            }
        );
        assert_eq!(
            err.to_string(),
            "column dec_deg has 9 entries, expected 10 (time_gps_ns)"
        );
        assert_eq!(err.refusal_code(), RefusalCode::InvalidBatch);

        let mut b = batch();
        b.gammaness.push(0.5);
        let err = validate_batch(&b, TOL).unwrap_err();
        assert_eq!(
            err,
            BatchError::ColumnLength {
                column: Column::Gammaness,
                len: 11,
                expected: 10
            }
        );
    }

    #[test]
    fn nan_ra_is_not_finite() {
        let mut b = batch();
        b.ra_deg[4] = f64::NAN;
        let err = validate_batch(&b, TOL).unwrap_err();
        assert!(
            matches!(err, BatchError::NotFinite { index: 4, column: Column::RaDeg, value: Value::F64(v) } if v.is_nan())
        );
        assert_eq!(err.to_string(), "photon 4: ra_deg = NaN is not finite");
        let mut b = batch();
        b.energy_gev[2] = f32::INFINITY;
        assert_eq!(
            validate_batch(&b, TOL).unwrap_err().to_string(),
            "photon 2: energy_gev = inf is not finite"
        );
    }

    #[test]
    fn dec_out_of_range_names_value_and_range() {
        let mut b = batch();
        b.dec_deg[7] = 91.5;
        let err = validate_batch(&b, TOL).unwrap_err();
        assert_eq!(err.to_string(), "photon 7: dec_deg = 91.5 is outside [-90, 90]");
    }

    #[test]
    fn other_ranges_are_enforced() {
        type Mutation = fn(&mut pb::PhotonBatch);
        let cases: [(Mutation, &str); 7] = [
            (
                |b| b.ra_deg[1] = 360.0,
                "photon 1: ra_deg = 360 is outside [0, 360)",
            ),
            (
                |b| b.ra_deg[1] = -0.5,
                "photon 1: ra_deg = -0.5 is outside [0, 360)",
            ),
            (
                |b| b.zenith_deg[2] = 180.5,
                "photon 2: zenith_deg = 180.5 is outside [0, 180]",
            ),
            (
                |b| b.azimuth_deg[3] = 360.0,
                "photon 3: azimuth_deg = 360 is outside [0, 360)",
            ),
            (
                |b| b.psf68_deg[5] = 0.0,
                "photon 5: psf68_deg = 0 is outside (0, inf)",
            ),
            (
                |b| b.gammaness[6] = 1.25,
                "photon 6: gammaness = 1.25 is outside [0, 1]",
            ),
            (
                |b| b.gammaness[6] = -0.0625,
                "photon 6: gammaness = -0.0625 is outside [0, 1]",
            ),
        ];
        for (mutate, expected) in cases {
            let mut b = batch();
            mutate(&mut b);
            assert_eq!(validate_batch(&b, TOL).unwrap_err().to_string(), expected);
        }
    }

    #[test]
    fn zero_energy_is_refused() {
        let mut b = batch();
        b.energy_gev[0] = 0.0;
        let err = validate_batch(&b, TOL).unwrap_err();
        assert_eq!(
            err,
            BatchError::OutOfRange {
                index: 0,
                column: Column::EnergyGev,
                value: Value::F32(0.0),
                allowed: "(0, inf)"
            }
        );
        assert_eq!(err.to_string(), "photon 0: energy_gev = 0 is outside (0, inf)");
    }

    #[test]
    fn time_backwards_beyond_tolerance_is_refused() {
        let mut b = batch();
        // Photon 5 steps back from photon 4 by exactly the tolerance: allowed.
        b.time_gps_ns[5] = b.time_gps_ns[4] - TOL;
        assert_eq!(validate_batch(&b, TOL), Ok(()));
        // Photon 6 lies 1 ns further behind the latest (photon 4) than the tolerance, though only a little
        // behind its direct predecessor.
        b.time_gps_ns[6] = b.time_gps_ns[4] - TOL - 1;
        let err = validate_batch(&b, TOL).unwrap_err();
        assert_eq!(
            err,
            BatchError::TimeBackwards {
                index: 6,
                time_ns: b.time_gps_ns[6],
                latest_ns: b.time_gps_ns[4],
                behind_ns: (TOL + 1) as u64,
                tolerance_ns: TOL,
            }
        );
        assert!(err.to_string().starts_with("photon 6: time_gps_ns = "), "{err}");
        // With no tolerance, equal times still pass but any step back fails.
        let mut b = batch();
        b.time_gps_ns[1] = b.time_gps_ns[0];
        assert_eq!(validate_batch(&b, 0), Ok(()));
        b.time_gps_ns[2] = b.time_gps_ns[1] - 1;
        assert!(matches!(
            validate_batch(&b, -5),
            Err(BatchError::TimeBackwards { index: 2, .. })
        ));
        // Extreme times do not overflow.
        let mut b = batch();
        b.time_gps_ns[0] = i64::MAX;
        b.time_gps_ns[1] = i64::MIN;
        assert!(matches!(
            validate_batch(&b, i64::MAX),
            Err(BatchError::TimeBackwards {
                index: 1,
                behind_ns: u64::MAX,
                ..
            })
        ));
    }

    #[test]
    fn promise_reaches_at_most_one_past_the_latest_photon() {
        let mut b = batch();
        let latest = *b.time_gps_ns.iter().max().unwrap();
        // Anywhere from the first photon's time up to one past the latest, or none.
        for ok in [0, 1, b.time_gps_ns[0], latest, latest + 1] {
            b.complete_before_gps_ns = ok;
            assert_eq!(validate_batch(&b, TOL), Ok(()), "promise {ok}");
        }
        b.complete_before_gps_ns = latest + 2;
        let err = validate_batch(&b, TOL).unwrap_err();
        assert_eq!(
            err,
            BatchError::PromiseOutOfRange {
                promise_ns: latest + 2,
                max_ns: latest + 1
            }
        );
        assert_eq!(
            err.to_string(),
            format!(
                "complete_before_gps_ns = {} is outside [0, {}] (0 = no promise; at most the batch's latest \
                 photon time + 1)",
                latest + 2,
                latest + 1
            )
        );
        assert_eq!(err.refusal_code(), RefusalCode::InvalidBatch);
        b.complete_before_gps_ns = -1;
        assert!(matches!(
            validate_batch(&b, TOL),
            Err(BatchError::PromiseOutOfRange { promise_ns: -1, .. })
        ));
        // The latest photon at the end of the time scale: the bound saturates instead of overflowing.
        b.time_gps_ns[9] = i64::MAX;
        b.complete_before_gps_ns = i64::MAX;
        assert_eq!(validate_batch(&b, i64::MAX), Ok(()));
        // A promise needs photons to bound it; a bad photon is reported before the promise.
        let empty = pb::PhotonBatch {
            complete_before_gps_ns: 5,
            ..Default::default()
        };
        assert_eq!(
            validate_batch(&empty, TOL),
            Err(BatchError::PromiseWithoutPhotons { promise_ns: 5 })
        );
        let mut b = batch();
        b.complete_before_gps_ns = -1;
        b.dec_deg[2] = 91.0;
        assert!(matches!(
            validate_batch(&b, TOL),
            Err(BatchError::OutOfRange { index: 2, .. })
        ));
    }

    #[test]
    fn status_dead_intervals_must_be_ordered() {
        assert_eq!(validate_status(&testdata::status()), Ok(()));
        let mut s = testdata::status();
        s.dead[1].end_gps_ns = s.dead[1].start_gps_ns - 1;
        let err = validate_status(&s).unwrap_err();
        assert_eq!(
            err,
            StatusError::DeadIntervalReversed {
                index: 1,
                start_ns: 30,
                end_ns: 29
            }
        );
        assert_eq!(
            err.to_string(),
            "dead interval 1: end_gps_ns = 29 is before start_gps_ns = 30"
        );
    }

    #[test]
    fn hello_checks_instrument_and_version() {
        assert_eq!(validate_hello(&testdata::hello()), Ok(()));
        let mut h = testdata::hello();
        h.instrument.clear();
        assert_eq!(validate_hello(&h), Err(HelloError::EmptyInstrument));
        assert_eq!(
            HelloError::EmptyInstrument.refusal_code(),
            RefusalCode::UnknownInstrument
        );
        let mut h = testdata::hello();
        h.schema_version = 2;
        let err = validate_hello(&h).unwrap_err();
        assert_eq!(err, HelloError::SchemaUnsupported { got: 2, supported: 1 });
        assert_eq!(err.refusal_code(), RefusalCode::SchemaUnsupported);
    }
}
