//! `check-config` against what would run but must not be deployed (placeholder tokens, token files others can
//! read, a missing state directory), environment overrides named as such and reaching instrument keys, the
//! log level checked, and the daemon's logs: plain text without colour codes in a file, a start-up line.

use std::os::unix::fs::PermissionsExt as _;
use std::path::Path;
use std::process::{Command, Output};

use crate::util::{self, Daemon, glint_bin, repo_root};

fn check(config: &Path, env: &[(&str, &str)]) -> Output {
    let mut c = Command::new(glint_bin());
    c.arg("check-config").arg(config);
    for (k, v) in env {
        c.env(k, v);
    }
    c.output().unwrap()
}

/// The reference configuration copied into `dir` with its own secrets (mode 600) and state directory.
fn deployable(dir: &Path) -> std::path::PathBuf {
    let text = std::fs::read_to_string(repo_root().join("deploy/glint.toml")).unwrap();
    let state = dir.join("state");
    std::fs::create_dir_all(&state).unwrap();
    std::fs::create_dir_all(dir.join("tokens")).unwrap();
    std::fs::create_dir_all(dir.join("instruments")).unwrap();
    std::fs::copy(
        repo_root().join("deploy/instruments/ventisca-array.toml"),
        dir.join("instruments/ventisca-array.toml"),
    )
    .unwrap();
    for (i, t) in ["subscriber-1", "operator", "ventisca-array"].iter().enumerate() {
        let p = dir.join(format!("tokens/{t}.token"));
        std::fs::write(&p, format!("own-secret-{i}-0123456789abcdef\n")).unwrap();
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o600)).unwrap();
    }
    let path = dir.join("glint.toml");
    std::fs::write(
        &path,
        text.replace(
            "state_dir = \"/var/lib/glint\"",
            &format!("state_dir = \"{}\"", state.display()),
        ),
    )
    .unwrap();
    path
}

#[test]
fn the_shipped_placeholders_and_open_token_files_are_refused_and_own_secrets_pass() {
    // As shipped: three placeholder tokens, in files anyone may read (git checks them out 0644).
    let dir = tempfile::tempdir().unwrap();
    let shipped = dir.path().join("shipped");
    std::fs::create_dir_all(&shipped).unwrap();
    let cfg = deployable(&shipped);
    for t in ["subscriber-1", "operator", "ventisca-array"] {
        let p = shipped.join(format!("tokens/{t}.token"));
        std::fs::copy(repo_root().join(format!("deploy/tokens/{t}.token")), &p).unwrap();
        std::fs::set_permissions(&p, std::fs::Permissions::from_mode(0o644)).unwrap();
    }
    let out = check(&cfg, &[]);
    assert_eq!(out.status.code(), Some(2), "{out:?}");
    let err = String::from_utf8_lossy(&out.stderr);
    for key in [
        "subscribers.token_files[0]: is the shipped placeholder token",
        "subscribers.operator_token_file: is the shipped placeholder token",
        "instrument[0].token_file: is the shipped placeholder token",
        "instrument[0].token_file: token file",
    ] {
        assert!(err.contains(key), "missing '{key}' in:\n{err}");
    }
    assert!(
        err.contains("readable by group or others (mode 644): chmod 600 it"),
        "{err}"
    );

    // Own secrets, mode 600, an existing state directory: clean.
    let own = dir.path().join("own");
    let cfg = deployable(&own);
    let out = check(&cfg, &[]);
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert!(String::from_utf8_lossy(&out.stdout).contains("ok (1 instrument(s): ventisca-array)"));

    // The state directory missing.
    std::fs::remove_dir(own.join("state")).unwrap();
    let out = check(&cfg, &[]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("daemon.state_dir: ") && err.contains("does not exist"),
        "{err}"
    );
}

#[test]
fn environment_overrides_are_named_and_reach_instrument_keys() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = deployable(dir.path());
    // A bad value from the environment is blamed on the variable, not the file.
    let out = check(&cfg, &[("GLINT_INGEST__QUEUE_BATCHES", "many")]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("ingest.queue_batches (GLINT_INGEST__QUEUE_BATCHES, environment): "),
        "{err}"
    );
    // An instrument key by id (dashes written as underscores) and by index.
    let out = check(
        &cfg,
        &[("GLINT_INSTRUMENT__VENTISCA_ARRAY__SEARCH__FAR_PER_YEAR", "-1")],
    );
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains(
            "instrument[0].search.far_per_year (GLINT_INSTRUMENT__VENTISCA_ARRAY__SEARCH__FAR_PER_YEAR, environment): "
        ),
        "{err}"
    );
    let placeholder = util::token_file(dir.path(), "placeholder.token", "change-me-from-the-environment");
    std::fs::set_permissions(&placeholder, std::fs::Permissions::from_mode(0o600)).unwrap();
    let out = check(
        &cfg,
        &[("GLINT_INSTRUMENT__0__TOKEN_FILE", placeholder.to_str().unwrap())],
    );
    assert_eq!(
        out.status.code(),
        Some(2),
        "the override did not reach the instrument"
    );
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("instrument[0].token_file") && err.contains("placeholder"),
        "{err}"
    );
    let out = check(&cfg, &[("GLINT_INSTRUMENT__NOWHERE__TOKEN", "x")]);
    assert_eq!(out.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&out.stderr)
            .contains("GLINT_INSTRUMENT__NOWHERE__TOKEN (environment): no instrument 'NOWHERE'"),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

#[test]
fn a_log_level_typo_is_a_configuration_error_for_check_config_and_run() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = deployable(dir.path());
    let text = std::fs::read_to_string(&cfg).unwrap();
    std::fs::write(
        &cfg,
        text.replace("log_level = \"info\"", "log_level = \"infoo\""),
    )
    .unwrap();
    let out = check(&cfg, &[]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("daemon.log_level: 'infoo' is not a level"), "{err}");
    let run = Command::new(glint_bin())
        .args(["run", "--config"])
        .arg(&cfg)
        .output()
        .unwrap();
    assert_eq!(run.status.code(), Some(2), "{run:?}");
    assert!(String::from_utf8_lossy(&run.stderr).contains("daemon.log_level"));
}

#[test]
fn a_text_log_in_a_file_has_no_colour_codes_and_opens_with_version_config_and_addresses() {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    let config = util::config_text(&state, "").replace("log_format = \"json\"", "log_format = \"text\"");
    let mut d = Daemon::start_with(dir.path(), &config);
    assert!(d.terminate().success());
    let log = d.log_text();
    assert!(!log.contains('\u{1b}'), "colour codes in a file:\n{log}");
    let cfg_path = dir.path().join("glint.toml");
    let start = format!(
        "glint {} started with {}: ingest on {}, subscribers on {}",
        env!("CARGO_PKG_VERSION"),
        cfg_path.display(),
        d.ingest,
        d.subs
    );
    assert!(log.contains(&start), "no start-up line '{start}' in:\n{log}");
}
