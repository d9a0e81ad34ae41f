//! Time scales at the edge of the pipeline: the wire and the engine speak GPS nanoseconds (continuous, no leap
//! seconds); alerts and reports add UTC and MJD strings, made with hifitime so leap seconds are right.

use hifitime::{Duration, Epoch};

/// GPS nanoseconds (since 1980-01-06T00:00:00 UTC) as a hifitime epoch. Times before the GPS epoch are
/// clamped to it: the wire never carries them (validation refuses negative times upstream).
fn epoch_from_gps_ns(gps_ns: i64) -> Epoch {
    Epoch::from_gpst_nanoseconds(u64::try_from(gps_ns).unwrap_or(0))
}

/// UTC ISO 8601 with nanoseconds and a trailing `Z`, e.g. `2026-12-01T23:31:12.123456789Z`.
pub(crate) fn gps_ns_to_utc(gps_ns: i64) -> String {
    let (y, mo, d, h, mi, s, ns) = epoch_from_gps_ns(gps_ns).to_gregorian_utc();
    format!("{y:04}-{mo:02}-{d:02}T{h:02}:{mi:02}:{s:02}.{ns:09}Z")
}

/// Compact UTC stamp for alert ids, to the millisecond: `20261201T233112.123`.
pub(crate) fn gps_ns_to_id_stamp(gps_ns: i64) -> String {
    let (y, mo, d, h, mi, s, ns) = epoch_from_gps_ns(gps_ns).to_gregorian_utc();
    format!("{y:04}{mo:02}{d:02}T{h:02}{mi:02}{s:02}.{:03}", ns / 1_000_000)
}

/// File name of a recording whose first photon came at `first_gps_ns`: the instrument, then that photon's UTC
/// time to the millisecond, so a directory of recordings lists in time order and a name says when it starts,
/// e.g. `ventisca-array-20261201T020000.004Z.glrec.zst`.
pub(crate) fn recording_name(instrument: &str, first_gps_ns: i64, suffix: &str) -> String {
    format!("{instrument}-{}Z{suffix}", gps_ns_to_id_stamp(first_gps_ns))
}

/// Modified Julian Date in UTC with nine decimals (about 86 microseconds).
pub(crate) fn gps_ns_to_mjd(gps_ns: i64) -> String {
    format!("{:.9}", epoch_from_gps_ns(gps_ns).to_mjd_utc_days())
}

/// Unix-epoch nanoseconds (what the host clock gives) to GPS nanoseconds, leap seconds included.
pub(crate) fn unix_ns_to_gps_ns(unix_ns: i64) -> i64 {
    let e = Epoch::from_unix_duration(Duration::from_total_nanoseconds(i128::from(unix_ns)));
    e.to_gpst_nanoseconds()
        .ok()
        .and_then(|n| i64::try_from(n).ok())
        .unwrap_or(0)
}

#[cfg(test)]
/// GPS nanoseconds of a UTC ISO 8601 string (`2026-12-01T02:00:00Z` and the forms hifitime accepts).
pub(crate) fn utc_to_gps_ns(text: &str) -> Option<i64> {
    let e = Epoch::from_gregorian_str(text.trim_end_matches('Z')).ok()?;
    e.to_gpst_nanoseconds().ok().and_then(|n| i64::try_from(n).ok())
}

/// Wall-clock now, Unix nanoseconds.
pub(crate) fn now_unix_ns() -> i64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| i64::try_from(d.as_nanos()).unwrap_or(i64::MAX))
        .unwrap_or(0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gps_minus_utc_is_18_seconds_since_2017() {
        // GPS - UTC = 18 s since 2017-01-01 (IERS Bulletin C). 2020-01-01T00:00:00 UTC is 1577836800 s after
        // the Unix epoch [calc], so its GPS time is that minus 315964800 (Unix time of the GPS epoch) plus 18.
        let unix_ns = 1_577_836_800_i64 * 1_000_000_000;
        let gps_ns = unix_ns_to_gps_ns(unix_ns);
        assert_eq!(gps_ns, (1_577_836_800 - 315_964_800 + 18) * 1_000_000_000);
        assert_eq!(gps_ns_to_utc(gps_ns), "2020-01-01T00:00:00.000000000Z");
        assert_eq!(utc_to_gps_ns("2020-01-01T00:00:00Z"), Some(gps_ns));
    }

    #[test]
    fn mjd_of_known_date() {
        // MJD 58849 is 2020-01-01 (MJD = JD - 2400000.5; JD 2458849.5 at 2020-01-01 0h UTC) [calc].
        let gps_ns = utc_to_gps_ns("2020-01-01T12:00:00Z").expect("parse");
        assert_eq!(gps_ns_to_mjd(gps_ns), "58849.500000000");
        assert_eq!(gps_ns_to_id_stamp(gps_ns + 123_456_789), "20200101T120000.123");
    }
}
