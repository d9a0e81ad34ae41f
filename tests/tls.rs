//! TLS as README's recipe sets it up, through the real binary and the real `openssl` command: a private CA and
//! a leaf for the host, the daemon's ingest on TLS, `glint feed --tls-ca` streaming through it; the CA itself
//! configured as the daemon's certificate is refused with words, not an internal error name; a plain client
//! on the TLS port is told so, and the daemon's log says what happened.

use std::path::Path;
use std::process::Command;

use crate::util::{self, Daemon, PRODUCER_TOKEN};

/// Runs one openssl command in `dir`; panics with its output on failure.
fn openssl(dir: &Path, args: &[&str]) {
    let out = Command::new("openssl")
        .current_dir(dir)
        .args(args)
        .output()
        .expect("openssl (README's recipe needs it; .ci/run installs it)");
    assert!(
        out.status.success(),
        "openssl {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
}

/// README's recipe, step by step (keep the two in step).
fn make_ca_and_leaf(dir: &Path, host: &str) {
    openssl(
        dir,
        &[
            "req",
            "-x509",
            "-newkey",
            "ec",
            "-pkeyopt",
            "ec_paramgen_curve:P-256",
            "-nodes",
            "-days",
            "3650",
            "-keyout",
            "ca.key",
            "-out",
            "ca.pem",
            "-subj",
            "/CN=glint private CA",
        ],
    );
    std::fs::write(
        dir.join("leaf.ext"),
        format!(
            "subjectAltName = DNS:{host}\nbasicConstraints = critical, CA:FALSE\n\
             keyUsage = critical, digitalSignature\nextendedKeyUsage = serverAuth\n"
        ),
    )
    .unwrap();
    openssl(
        dir,
        &[
            "req",
            "-newkey",
            "ec",
            "-pkeyopt",
            "ec_paramgen_curve:P-256",
            "-nodes",
            "-keyout",
            "glint.key",
            "-out",
            "glint.csr",
            "-subj",
            &format!("/CN={host}"),
        ],
    );
    openssl(
        dir,
        &[
            "x509",
            "-req",
            "-in",
            "glint.csr",
            "-CA",
            "ca.pem",
            "-CAkey",
            "ca.key",
            "-CAcreateserial",
            "-days",
            "825",
            "-extfile",
            "leaf.ext",
            "-out",
            "glint.pem",
        ],
    );
}

fn with_ingest_tls(state: &Path, cert: &Path, key: &Path) -> String {
    util::config_text_with(
        state,
        &format!(
            "tls_cert = \"{}\"\ntls_key = \"{}\"",
            cert.display(),
            key.display()
        ),
        "",
        "",
    )
}

fn feed(d: &Daemon, rec: &Path, token: &Path, tls_ca: Option<&Path>) -> std::process::Output {
    let mut c = Command::new(util::glint_bin());
    c.arg("feed")
        .arg(rec)
        .args([
            "--to",
            &format!("localhost:{}", d.ingest.port()),
            "--speed",
            "max",
            "--token-file",
        ])
        .arg(token);
    if let Some(ca) = tls_ca {
        c.arg("--tls-ca").arg(ca);
    }
    c.output().unwrap()
}

#[test]
fn readme_recipe_certificates_carry_a_feed_and_the_usual_mistakes_are_named() {
    let dir = tempfile::tempdir().unwrap();
    let pki = dir.path().join("pki");
    std::fs::create_dir_all(&pki).unwrap();
    make_ca_and_leaf(&pki, "localhost");
    let frames = util::background_frames(20, 3);
    let rec = dir.path().join("bg.glrec");
    util::write_recording(&rec, &frames);
    let token = util::token_file(dir.path(), "producer.token", PRODUCER_TOKEN);

    // The CA configured as the daemon's own certificate: refused at check-config, naming the mistake.
    let state = dir.path().join("state");
    std::fs::create_dir_all(&state).unwrap();
    let bad = dir.path().join("bad.toml");
    std::fs::write(
        &bad,
        with_ingest_tls(&state, &pki.join("ca.pem"), &pki.join("ca.key")),
    )
    .unwrap();
    let out = Command::new(util::glint_bin())
        .arg("check-config")
        .arg(&bad)
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("is a CA certificate (basicConstraints CA:TRUE)") && err.contains("sign a leaf"),
        "{err}"
    );

    // The leaf: a feed over TLS trusting the CA takes every photon.
    let d = Daemon::start_with(
        dir.path(),
        &with_ingest_tls(&state, &pki.join("glint.pem"), &pki.join("glint.key")),
    );
    let out = feed(&d, &rec, &token, Some(&pki.join("ca.pem")));
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{text}{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        text.contains(&format!("({} photons taken", util::photons_in(&frames))),
        "{text}"
    );

    // A plain client on the TLS port is told why, and the daemon's log says what happened.
    let out = feed(&d, &rec, &token, None);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("this port speaks TLS"), "{err}");
    assert!(!err.contains("bytes remaining"), "{err}");
    let logged = d.log_text();
    assert!(
        logged.contains("plain (non-TLS) client on the TLS port"),
        "{logged}"
    );
}
