//! The command line as an operator meets it: `--help` lists the subcommands, `check-config` accepts the
//! documented reference configuration and lists every problem of a broken one, `reach` prints the table.

use std::process::Command;

use crate::util::{glint_bin, repo_root};

#[test]
fn help_lists_every_subcommand_with_a_description() {
    let out = Command::new(glint_bin()).arg("--help").output().unwrap();
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    for cmd in [
        "run",
        "demo",
        "simulate",
        "replay",
        "feed",
        "listen",
        "reach",
        "check-config",
        "withdraw",
    ] {
        let line = text
            .lines()
            .find(|l| l.trim_start().starts_with(&format!("{cmd} ")))
            .unwrap_or_else(|| panic!("--help does not list {cmd}:\n{text}"));
        assert!(
            line.trim_start()[cmd.len()..].trim().len() > 10,
            "no description for {cmd}: {line}"
        );
    }
}

#[test]
fn reference_config_compiles_and_is_refused_only_for_what_must_not_be_deployed() {
    // It compiles; check-config refuses it only for its placeholder tokens (and, on a machine without
    // /var/lib/glint, the state directory): `checks.rs` shows a copy with own secrets passing.
    let out = Command::new(glint_bin())
        .args(["check-config"])
        .arg(repo_root().join("deploy/glint.toml"))
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    let problems: Vec<&str> = err.lines().filter(|l| l.starts_with("  ")).collect();
    assert!(problems.len() >= 3, "{err}");
    for p in problems {
        assert!(
            p.contains("placeholder token")
                || p.contains("readable by group or others")
                || p.contains("daemon.state_dir"),
            "unexpected problem in the reference configuration: {p}"
        );
    }
}

#[test]
fn broken_config_lists_every_error_and_exits_2() {
    let dir = tempfile::tempdir().unwrap();
    let good = std::fs::read_to_string(repo_root().join("deploy/glint.toml")).unwrap();
    // Three independent faults in three sections: a wrong type, an unknown key, a missing token file, and an
    // instrument block whose table does not parse into numbers.
    let broken = good
        .replace("heartbeat_s = 5.0", "heartbeat_s = \"five\"")
        .replace("[journal]", "[journal]\nsegmnet_bytes = 1")
        .replace(
            "token_file = \"tokens/ventisca-array.token\"",
            "token_file = \"tokens/missing.token\"",
        )
        .replace(
            "spec_file = \"instruments/ventisca-array.toml\"",
            "spec_file = \"instruments/nowhere.toml\"",
        );
    let path = dir.path().join("broken.toml");
    std::fs::write(&path, broken).unwrap();
    // Token files are relative to the config file: copy the real ones beside it.
    std::fs::create_dir_all(dir.path().join("tokens")).unwrap();
    for t in ["subscriber-1", "operator"] {
        std::fs::copy(
            repo_root().join(format!("deploy/tokens/{t}.token")),
            dir.path().join(format!("tokens/{t}.token")),
        )
        .unwrap();
    }
    let out = Command::new(glint_bin())
        .arg("check-config")
        .arg(&path)
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    for key in [
        "subscribers.heartbeat_s: wrong type",
        "journal.segmnet_bytes: unknown key",
        "instrument[0].token_file: cannot read token file",
        "instrument[0].spec_file: cannot read",
    ] {
        assert!(err.contains(key), "missing '{key}' in:\n{err}");
    }
    assert!(err.contains("broken.toml"), "errors must name the file:\n{err}");
}

#[test]
fn environment_overrides_the_file() {
    let out = Command::new(glint_bin())
        .args(["check-config"])
        .arg(repo_root().join("deploy/glint.toml"))
        .env("GLINT_INGEST__LISTEN", "0.0.0.0:7601")
        .output()
        .unwrap();
    // A non-loopback plain listener is refused, which proves the override reached the compiled config.
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("ingest.listen"));
}

#[test]
fn reach_json_has_the_documented_fields() {
    let out = Command::new(glint_bin())
        .args(["reach", "--json"])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    for k in [
        "instrument",
        "far_per_year",
        "all_sky_rate_hz",
        "search_radius_deg",
        "timescales",
        "best_r50_pc",
        "effective_volume_pc3",
        "rate_density_ul_99_per_pc3_yr",
    ] {
        assert!(v.get(k).is_some(), "reach --json lacks {k}");
    }
    let ts = v["timescales"].as_array().unwrap();
    assert_eq!(ts.len(), 8);
    for t in ts {
        // r90 needs more signal than r50, so it is nearer (common practice, no source: P_det grows as d shrinks).
        assert!(t["r90_pc"].as_f64().unwrap() < t["r50_pc"].as_f64().unwrap());
        assert!(t["critical_count"].as_u64().unwrap() >= 2);
    }
}

#[test]
fn a_broken_scenario_is_a_configuration_problem() {
    // README: configuration problems exit 2; a scenario file is configuration the operator writes.
    let dir = tempfile::tempdir().unwrap();
    let bad = dir.path().join("bad.toml");
    std::fs::write(&bad, "[scenario]\nname = \"x\"\nduration_s = \"long\"\n").unwrap();
    let out = Command::new(glint_bin())
        .args(["simulate", "--scenario"])
        .arg(&bad)
        .arg("--out")
        .arg(dir.path().join("x.glrec"))
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(2),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // The message says what is wrong, not only which file: here the missing instrument block.
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("bad.toml") && err.contains("not a valid scenario file") && err.contains("`instrument`"),
        "{err}"
    );
    let missing = Command::new(glint_bin())
        .args(["simulate", "--scenario", "/nonexistent/scenario.toml", "--out"])
        .arg(dir.path().join("y.glrec"))
        .output()
        .unwrap();
    assert_eq!(missing.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&missing.stderr).contains("scenario.toml"));
}

#[test]
fn calibrate_writes_a_calibration_that_the_configuration_reads_and_checks() {
    // Half an hour of simulated background at a loose nominal rate: about 80 candidates reach 1e7 per
    // year nominal with the trials fraction of about 0.15 (README), so at least one level has 20.
    let dir = tempfile::tempdir().unwrap();
    let cfg_path = dir.path().join("glint.toml");
    std::fs::write(&cfg_path, crate::util::config_text(dir.path(), "")).unwrap();
    let out = Command::new(glint_bin())
        .args(["calibrate", "--config"])
        .arg(&cfg_path)
        .arg("--scenario")
        .arg(repo_root().join("deploy/scenarios/quiet-hour.toml"))
        .args(["--hours", "0.5", "--instrument", crate::util::INSTRUMENT])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "stderr: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let path = dir
        .path()
        .join("calibration")
        .join(format!("{}.toml", crate::util::INSTRUMENT));
    let text = std::fs::read_to_string(&path).unwrap();
    let cal: toml::Table = toml::from_str(&text).unwrap();
    assert_eq!(cal["format"].as_integer(), Some(1));
    let points = cal["points"].as_array().unwrap();
    assert!(!points.is_empty());
    for p in points {
        let f = p["fraction"].as_float().unwrap();
        assert!(
            f > 0.0 && f < 0.5,
            "trials fraction {f}: fewer real trials than nominal"
        );
    }
    let check = |expect_ok: bool| {
        let out = Command::new(glint_bin())
            .arg("check-config")
            .arg(&cfg_path)
            .output()
            .unwrap();
        assert_eq!(
            out.status.success(),
            expect_ok,
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8_lossy(&out.stdout).to_string() + &String::from_utf8_lossy(&out.stderr)
    };
    check(true);
    // A calibration made for another search radius is refused, naming the file.
    std::fs::write(
        &path,
        text.replace("search_radius_deg = 0.5", "search_radius_deg = 0.7"),
    )
    .unwrap();
    let msg = check(false);
    assert!(msg.contains("calibration") && msg.contains("radius"), "{msg}");
}
