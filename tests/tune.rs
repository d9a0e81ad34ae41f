//! `glint tune` and the replay options that serve it, through the real binary: a sharded run merged by
//! `glint tune merge` writes the same report.json as one run, with every figure as SVG and PNG; replay
//! matches a truth file's sources and lists each alert's photons.

use std::path::Path;
use std::process::Command;

use serde_json::Value;

use crate::util::{checked_json_lines, config_text, glint_bin, repo_root, stdout_ok};

fn run_ok(args: &[&str]) -> String {
    stdout_ok(Command::new(glint_bin()).args(args))
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

#[test]
fn tune_shards_merge_to_the_same_report_with_figures() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let config = d.join("glint.toml");
    std::fs::write(&config, config_text(&d.join("state"), "")).unwrap();
    let spec = repo_root().join("deploy/instruments/ventisca-array.toml");
    let scenario = std::fs::read_to_string(repo_root().join("deploy/scenarios/quiet-hour.toml"))
        .unwrap()
        .replace("duration_s = 3600", "duration_s = 700")
        .replace(
            "spec_file = \"../instruments/ventisca-array.toml\"",
            &format!("spec_file = \"{}\"", spec.display()),
        );
    let sc = d.join("short.toml");
    std::fs::write(&sc, scenario).unwrap();
    let rec = d.join("short.glrec.zst");
    run_ok(&["simulate", "--scenario", s(&sc), "--out", s(&rec)]);
    let common = [
        "--config",
        s(&config),
        "--injections",
        "8",
        "--distances-pc",
        "0.05,0.1",
    ];
    let whole = d.join("whole");
    let mut args = vec!["tune", s(&rec), "--jobs", "2", "--report", s(&whole)];
    args.extend(common);
    let out = run_ok(&args);
    assert!(out.contains("upper limit 99% CL"), "{out}");
    let shards = d.join("shards");
    for shard in ["0/2", "1/2"] {
        let mut args = vec![
            "tune",
            s(&rec),
            "--jobs",
            "1",
            "--shard",
            shard,
            "--report",
            s(&shards),
        ];
        args.extend(common);
        run_ok(&args);
    }
    let merged = d.join("merged");
    run_ok(&[
        "tune",
        "merge",
        s(&shards),
        "--config",
        s(&config),
        "--report",
        s(&merged),
    ]);
    let a = std::fs::read_to_string(whole.join("report.json")).unwrap();
    let b = std::fs::read_to_string(merged.join("report.json")).unwrap();
    assert!(a == b, "the merged report differs from the single run's");
    let r: Value = serde_json::from_str(&a).unwrap();
    assert_eq!(r["injections"]["count"], 8);
    assert_eq!(r["limits"].as_array().unwrap().len(), 3);
    for name in ["trigger_rate", "pvalues", "efficiency", "skymap", "verdicts"] {
        let png = std::fs::read(merged.join(format!("{name}.png"))).unwrap();
        assert!(
            png.starts_with(b"\x89PNG\r\n\x1a\n") && png.len() > 10_000,
            "{name}.png"
        );
        let svg = std::fs::read_to_string(merged.join(format!("{name}.svg"))).unwrap();
        assert!(svg.contains("<svg") && svg.contains("</svg>"), "{name}.svg");
    }
    let md = std::fs::read_to_string(merged.join("report.md")).unwrap();
    assert!(
        md.contains("## Upper limit on the local burst rate density"),
        "{md}"
    );
    // One shard missing: merge refuses rather than writing a smaller report.
    std::fs::remove_file(shards.join("shard-1-of-2.json")).unwrap();
    let o = Command::new(glint_bin())
        .args([
            "tune",
            "merge",
            s(&shards),
            "--config",
            s(&config),
            "--report",
            s(&d.join("bad")),
        ])
        .output()
        .unwrap();
    assert!(!o.status.success());
    assert!(String::from_utf8_lossy(&o.stderr).contains("missing"));
}

#[test]
fn replay_matches_the_truth_and_lists_photons() {
    let fixture = std::fs::read_dir(repo_root().join("replay-fixtures"))
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .find(|p| p.join("truth.jsonl").is_file())
        .expect("a replay fixture with a truth file");
    let rec = std::fs::read_dir(&fixture)
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .find(|p| p.to_string_lossy().ends_with(".glrec.zst"))
        .unwrap();
    let truth = fixture.join("truth.jsonl");
    let out = run_ok(&[
        "replay",
        s(&rec),
        "--truth",
        s(&truth),
        "--photons",
        "--far-per-year",
        "2",
    ]);
    let lines: Vec<Value> = checked_json_lines(&out);
    let summary = lines.last().unwrap();
    assert_eq!(summary["far_per_year"], 2.0);
    let t = &summary["truth"];
    assert!(t["sources"].as_u64().unwrap() >= 1, "{t}");
    assert!(t["found"].as_u64().unwrap() >= 1, "{t}");
    let mut listed = 0;
    for a in &lines[..lines.len() - 1] {
        let trig = &a["trigger"];
        if trig.is_object() {
            let times = trig["photon_time_gps_ns"].as_array().unwrap();
            assert_eq!(times.len() as u64, trig["photons"].as_u64().unwrap());
            assert!(times.iter().all(|t| t.as_i64().unwrap() > 0));
            for col in ["photon_ra_deg", "photon_dec_deg", "photon_energy_gev"] {
                assert_eq!(trig[col].as_array().unwrap().len(), times.len(), "{col}");
            }
            listed += 1;
        }
    }
    assert!(listed >= 1);
    for m in t["matches"].as_array().unwrap() {
        assert!(m["separation_deg"].as_f64().unwrap() < 1.5, "{m}");
    }
}
