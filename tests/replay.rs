//! Replay against committed golden output: each folder of `replay-fixtures/` holds a small recording made by
//! the simulator and the alert lines it must give. A difference is shown field by field, so a reviewer sees
//! what changed in the science, not just that a line differs.

use std::path::{Path, PathBuf};
use std::process::Command;

use serde_json::Value;

use crate::util::{self, glint_bin, repo_root};

fn fixtures() -> Vec<PathBuf> {
    let mut dirs: Vec<PathBuf> = std::fs::read_dir(repo_root().join("replay-fixtures"))
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.join("expected.jsonl").is_file())
        .collect();
    dirs.sort();
    assert!(!dirs.is_empty(), "no fixtures found under replay-fixtures/");
    dirs
}

fn recording_of(dir: &Path) -> PathBuf {
    let mut recs: Vec<PathBuf> = std::fs::read_dir(dir)
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.to_string_lossy().ends_with(".glrec.zst") || p.to_string_lossy().ends_with(".glrec"))
        .collect();
    recs.sort();
    assert_eq!(recs.len(), 1, "{} must hold exactly one recording", dir.display());
    recs.remove(0)
}

/// The summary figures a fixture pins, where it has `expected_summary.json`.
fn summary_differences(dir: &Path, stdout: &str) -> Vec<String> {
    let Ok(text) = std::fs::read_to_string(dir.join("expected_summary.json")) else {
        return Vec::new();
    };
    let want: Value = serde_json::from_str(&text).unwrap();
    let got: Value = serde_json::from_str(stdout.lines().last().unwrap()).unwrap();
    let mut d = Vec::new();
    for (k, v) in want.as_object().unwrap() {
        json_diff(&format!("summary.{k}"), v, &got[k], &mut d);
    }
    d
}

fn replay(rec: &Path, out: &Path) -> String {
    let o = Command::new(glint_bin())
        .arg("replay")
        .arg(rec)
        .arg("--alerts-out")
        .arg(out)
        .output()
        .unwrap();
    assert!(
        o.status.success(),
        "replay failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    String::from_utf8(o.stdout).unwrap()
}

/// Field-by-field differences between two JSON values, as `path: expected X, got Y` lines.
fn json_diff(path: &str, want: &Value, got: &Value, out: &mut Vec<String>) {
    match (want, got) {
        (Value::Object(a), Value::Object(b)) => {
            let mut keys: Vec<&String> = a.keys().chain(b.keys()).collect();
            keys.sort();
            keys.dedup();
            for k in keys {
                let p = format!("{path}.{k}");
                match (a.get(k), b.get(k)) {
                    (Some(x), Some(y)) => json_diff(&p, x, y, out),
                    (Some(x), None) => out.push(format!("{p}: expected {x}, missing")),
                    (None, Some(y)) => out.push(format!("{p}: unexpected {y}")),
                    (None, None) => {}
                }
            }
        }
        (Value::Array(a), Value::Array(b)) if a.len() == b.len() => {
            for (i, (x, y)) in a.iter().zip(b).enumerate() {
                json_diff(&format!("{path}[{i}]"), x, y, out);
            }
        }
        _ if want != got => out.push(format!("{path}: expected {want}, got {got}")),
        _ => {}
    }
}

#[test]
fn there_is_a_fixture_for_every_situation() {
    let names: Vec<String> = fixtures()
        .iter()
        .map(|d| d.file_name().unwrap().to_string_lossy().into_owned())
        .collect();
    for want in [
        "quiet",
        "evaporation-near",
        "evaporation-far",
        "afterglow",
        "precursor",
        "glitch",
        "dead-time",
        "reconnection",
    ] {
        assert!(names.iter().any(|n| n == want), "no fixture {want} in {names:?}");
        let rec = recording_of(&repo_root().join("replay-fixtures").join(want));
        let size = std::fs::metadata(&rec).unwrap().len();
        assert!(
            size < 1_000_000,
            "{} is {size} bytes; fixtures stay small",
            rec.display()
        );
    }
}

#[test]
fn fixtures_give_their_committed_alerts_line_for_line() {
    for dir in fixtures() {
        let tmp = tempfile::tempdir().unwrap();
        let out = tmp.path().join("alerts.jsonl");
        let stdout = replay(&recording_of(&dir), &out);
        let want = std::fs::read_to_string(dir.join("expected.jsonl")).unwrap();
        let got = std::fs::read_to_string(&out).unwrap();
        // Both the committed lines and today's keep to the published schema.
        util::checked_json_lines(&want);
        util::checked_json_lines(&got);
        let (w, g): (Vec<&str>, Vec<&str>) = (want.lines().collect(), got.lines().collect());
        let mut report = summary_differences(&dir, &stdout);
        for i in 0..w.len().max(g.len()) {
            match (w.get(i), g.get(i)) {
                (Some(a), Some(b)) if a == b => {}
                (Some(a), Some(b)) => {
                    let mut d = Vec::new();
                    json_diff(
                        "",
                        &serde_json::from_str(a).unwrap(),
                        &serde_json::from_str(b).unwrap(),
                        &mut d,
                    );
                    report.push(format!("line {}:\n    {}", i + 1, d.join("\n    ")));
                }
                (Some(a), None) => report.push(format!("line {}: expected, missing: {a}", i + 1)),
                (None, Some(b)) => report.push(format!("line {}: unexpected: {b}", i + 1)),
                (None, None) => {}
            }
        }
        assert!(
            report.is_empty(),
            "{}: replay differs from expected.jsonl (regenerate only if the change is intended; see the fixture's README):\n{}",
            dir.display(),
            report.join("\n")
        );
    }
}

#[test]
fn replay_is_byte_identical_run_after_run() {
    let dir = &repo_root().join("replay-fixtures/four-verdicts");
    let tmp = tempfile::tempdir().unwrap();
    let (a, b) = (tmp.path().join("a.jsonl"), tmp.path().join("b.jsonl"));
    let stdout = replay(&recording_of(dir), &a);
    replay(&recording_of(dir), &b);
    assert_eq!(std::fs::read(&a).unwrap(), std::fs::read(&b).unwrap());
    // The last stdout line is the summary, with the photon count and throughput.
    let lines = util::checked_json_lines(&stdout);
    let summary = lines.last().unwrap();
    assert_eq!(summary["kind"], "summary");
    assert!(summary["photons"].as_u64().unwrap() > 10_000);
    assert!(summary["photons_per_second"].as_f64().unwrap() > 0.0);
}

#[test]
fn simulate_reproduces_the_committed_recording_byte_for_byte() {
    let dir = repo_root().join("replay-fixtures/four-verdicts");
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("four-verdicts.glrec.zst");
    let o = Command::new(glint_bin())
        .arg("simulate")
        .arg("--scenario")
        .arg(dir.join("scenario.toml"))
        .args(["--seed", "7", "--out"])
        .arg(&out)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(
        std::fs::read(&out).unwrap() == std::fs::read(recording_of(&dir)).unwrap(),
        "simulate is not deterministic"
    );
}

#[test]
fn no_search_replay_takes_every_photon_and_finds_nothing() {
    let dir = &repo_root().join("replay-fixtures/four-verdicts");
    let o = Command::new(glint_bin())
        .arg("replay")
        .arg(recording_of(dir))
        .arg("--no-search")
        .output()
        .unwrap();
    assert!(o.status.success());
    let text = String::from_utf8(o.stdout).unwrap();
    assert_eq!(
        text.lines().count(),
        1,
        "--no-search must give only the summary:\n{text}"
    );
    let s = util::checked_json(text.trim());
    assert!(s["photons"].as_u64().unwrap() > 10_000);
    assert_eq!(s["refused_photons"], 0);
}

#[test]
fn truncated_recording_is_a_clear_error() {
    let dir = &fixtures()[0];
    let bytes = std::fs::read(recording_of(dir)).unwrap();
    let tmp = tempfile::tempdir().unwrap();
    let cut = tmp.path().join("cut.glrec.zst");
    std::fs::write(&cut, &bytes[..bytes.len() / 2]).unwrap();
    let o = Command::new(glint_bin())
        .arg("replay")
        .arg(&cut)
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(1));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("cut.glrec.zst") && err.to_lowercase().contains("truncated"),
        "{err}"
    );
    let foreign = tmp.path().join("foreign.glrec");
    std::fs::write(&foreign, b"PK\x03\x04 this is a zip file, not a recording").unwrap();
    let o = Command::new(glint_bin())
        .arg("replay")
        .arg(&foreign)
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(1));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("foreign.glrec") && err.contains("not a glint recording"),
        "{err}"
    );
}
