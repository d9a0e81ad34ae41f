//! What offline runs read and write, through the real binary: FITS event lists (replayed directly and
//! imported, from the astropy-written files in `tests/reference/fits/`), recordings named by the UTC time of
//! their first photon, overlapping inputs warned about and counted, and the plain progress line when stderr
//! is not a terminal.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use serde_json::Value;

use crate::util::{checked_json_lines, glint_bin, repo_root};

fn fits(name: &str) -> PathBuf {
    repo_root().join("tests/reference/fits").join(name)
}

fn glint(args: &[&str], files: &[&Path]) -> Output {
    Command::new(glint_bin()).args(args).args(files).output().unwrap()
}

fn summary(o: &Output) -> Value {
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let out = String::from_utf8_lossy(&o.stdout);
    // Every line, alerts and summary, keeps to the alert contract's schema.
    checked_json_lines(&out).pop().unwrap()
}

#[test]
fn replay_reads_fits_event_lists_and_refuses_broken_ones_by_name() {
    for f in [
        "events_tt.fits",
        "events_tai.fits",
        "events_utc.fits",
        "events_gps.fits",
    ] {
        let s = summary(&glint(&["replay", "--quiet"], &[&fits(f)]));
        assert_eq!(s["photons"], 40, "{f}: {s}");
        assert_eq!(s["refused_photons"], 0, "{f}: {s}");
    }
    for (f, says) in [
        ("bad_timesys.fits", "TIMESYS = 'TDB' is not supported"),
        ("bad_nan.fits", "row 3: ENERGY is not a finite number"),
        ("bad_no_energy.fits", "has no ENERGY column"),
        ("bad_unit.fits", "ENERGY has unit 'm'"),
    ] {
        let o = glint(&["replay", "--quiet"], &[&fits(f)]);
        let err = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(1), "{f}: {err}");
        assert!(err.contains(says), "{f}: expected {says:?} in {err}");
    }
}

#[test]
fn import_names_the_recording_by_its_first_photon_and_replays_like_the_fits_file() {
    let tmp = tempfile::tempdir().unwrap();
    let o = glint(
        &["import", "-o", tmp.path().to_str().unwrap()],
        &[&fits("events_tt.fits")],
    );
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    // The first photon of events_tt.fits is at GPS 1480118560.087418914 s, 2026-12-01T00:02:22.087 UTC
    // (tests/reference/fits_photons.csv; GPS - UTC = 18 s).
    let rec = tmp.path().join("ventisca-array-20261201T000222.087Z.glrec.zst");
    assert!(
        rec.is_file(),
        "{:?}",
        std::fs::read_dir(tmp.path()).unwrap().collect::<Vec<_>>()
    );
    let a = summary(&glint(&["replay", "--quiet"], &[&rec]));
    let b = summary(&glint(&["replay", "--quiet"], &[&fits("events_tt.fits")]));
    for k in ["photons", "live_seconds", "dead_seconds", "alerts"] {
        assert_eq!(a[k], b[k], "{k}");
    }
}

#[test]
fn simulate_into_a_directory_names_the_file_by_its_first_photon() {
    let tmp = tempfile::tempdir().unwrap();
    let scenario = tmp.path().join("s.toml");
    let spec = repo_root().join("deploy/instruments/ventisca-array.toml");
    std::fs::write(
        &scenario,
        format!(
            "[scenario]\nstart_utc = \"2026-12-01T02:00:00Z\"\nduration_s = 5\n[instrument]\nid = \"ventisca-array\"\n\
             token = \"t\"\nspec_file = \"{}\"\n",
            spec.display()
        ),
    )
    .unwrap();
    let out = tmp.path().join("recs");
    std::fs::create_dir(&out).unwrap();
    let o = glint(
        &[
            "simulate",
            "--quiet",
            "--scenario",
            scenario.to_str().unwrap(),
            "--out",
            out.to_str().unwrap(),
        ],
        &[],
    );
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let names: Vec<String> = std::fs::read_dir(&out)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    assert_eq!(names.len(), 1, "{names:?}");
    // The background starts at the stream start: the first photon falls within its first second.
    assert!(
        names[0].starts_with("ventisca-array-20261201T020000.") && names[0].ends_with("Z.glrec.zst"),
        "{names:?}"
    );
}

#[test]
fn overlapping_inputs_are_warned_about_and_counted() {
    let (tt, tai, gps) = (
        fits("events_tt.fits"),
        fits("events_tai.fits"),
        fits("events_gps.fits"),
    );
    // events_tai.fits ends before events_gps.fits starts: no overlap.
    let s = summary(&glint(&["replay", "--quiet"], &[&tai, &gps]));
    assert_eq!(s["overlapping_files"], 0, "{s}");
    // The same hour twice overlaps itself by all of it.
    let o = glint(&["replay", "--quiet"], &[&tt, &tt]);
    let s = summary(&o);
    assert_eq!(s["overlapping_files"], 1, "{s}");
    let ov = &s["overlaps"][0];
    assert_eq!(ov["instrument"], "ventisca-array");
    assert!(ov["file"].as_str().unwrap().ends_with("events_tt.fits"));
    let secs = ov["seconds"].as_f64().unwrap();
    assert!(secs > 3000.0 && secs <= 3600.0, "{secs}");
    assert!(s["late_photons"].as_u64().unwrap() > 0, "{s}");
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("recordings overlap in time"), "{err}");
}

#[test]
fn progress_is_a_plain_line_when_stderr_is_not_a_terminal() {
    let rec = repo_root().join("replay-fixtures/quiet/quiet.glrec.zst");
    // Interval 0: a line for every batch, then the closing line.
    let o = glint(
        &["replay", "--progress-every", "0", "--alerts-out", "/dev/null"],
        &[&rec],
    );
    assert!(o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    let lines: Vec<&str> = err
        .lines()
        .filter(|l| l.starts_with("progress: replay: "))
        .collect();
    assert!(lines.len() > 100, "{err}");
    // The estimate comes from the bytes read off disk (the zstd reader takes them in large blocks).
    assert!(
        lines
            .iter()
            .any(|l| l.contains("% done, about") && l.ends_with(" left")),
        "{err}"
    );
    let last = lines.last().unwrap();
    assert!(
        last.starts_with("progress: replay: 5689 photons, 7m59s of event time up to 2026-12-01T02:07:59"),
        "{last}"
    );
    assert!(last.ends_with(", done"), "{last}");
    assert!(!err.contains('\r'), "no bar drawing off a terminal");
    // The default interval (10 s) on a sub-second run: only the closing line.
    let o = glint(&["replay", "--alerts-out", "/dev/null"], &[&rec]);
    let n = String::from_utf8_lossy(&o.stderr)
        .lines()
        .filter(|l| l.starts_with("progress:"))
        .count();
    assert_eq!(n, 1);
    // --quiet: none.
    let o = glint(&["replay", "--quiet"], &[&rec]);
    assert!(!String::from_utf8_lossy(&o.stderr).contains("progress:"));
}
