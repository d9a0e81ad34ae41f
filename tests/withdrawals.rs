//! Withdrawals through the real binary: one id rule for every alert (the time in an id is the end of the
//! trigger the alert is about, for the engine's withdrawals and an operator's alike), withdrawing a flash
//! withdraws its assessment too, and withdrawing an assessment leaves its flash standing; both said on the
//! screen (`glint withdraw`) and in the JSON (`glint journal export`).

use std::collections::BTreeMap;
use std::process::Command;
use std::time::{Duration, Instant};

use glint_wire::pb::{self, subscriber_frame};

use crate::live::stream_all;
use crate::util::{self, Daemon, OPERATOR_TOKEN, SUBSCRIBER_TOKEN};

/// The time part of an id: `GL-<instrument>-<time>-<seq>` without the seq.
fn id_time(id: &str) -> &str {
    id.rsplit_once('-').map_or(id, |(head, _)| head)
}

/// Alerts replayed from the journal until `enough` says so (or 60 s pass).
fn alerts_until(d: &Daemon, enough: impl Fn(&[pb::Alert]) -> bool) -> Vec<pb::Alert> {
    let (mut c, _) = util::subscriber(d.subs, SUBSCRIBER_TOKEN, 0, true);
    let mut got = Vec::new();
    let deadline = Instant::now() + Duration::from_secs(60);
    while !enough(&got) && Instant::now() < deadline {
        if let util::Got::Frame(pb::SubscriberFrame {
            body: Some(subscriber_frame::Body::Alert(a)),
        }) = c.recv::<pb::SubscriberFrame>(Duration::from_secs(5))
        {
            got.push(a);
        }
    }
    got
}

fn withdraw(d: &Daemon, token: &std::path::Path, id: &str, reason: &str) -> String {
    util::stdout_ok(
        Command::new(util::glint_bin())
            .args([
                "withdraw",
                id,
                "--reason",
                reason,
                "--from",
                &d.subs.to_string(),
                "--token-file",
            ])
            .arg(token),
    )
}

#[test]
fn withdrawing_a_flash_withdraws_its_assessment_and_ids_follow_one_rule() {
    let dir = tempfile::tempdir().unwrap();
    let mut d = Daemon::start(dir.path(), "");
    stream_all(d.ingest, &util::demo_frames());
    let token = util::token_file(dir.path(), "operator.token", OPERATOR_TOKEN);
    // Flashes whose assessment is out and standing (not instrumental).
    let standing = |alerts: &[pb::Alert]| -> Vec<(pb::Alert, pb::Alert)> {
        let flashes: BTreeMap<&str, &pb::Alert> = alerts
            .iter()
            .filter(|a| a.kind == pb::AlertKind::Flash as i32)
            .map(|a| (a.id.as_str(), a))
            .collect();
        alerts
            .iter()
            .filter(|a| a.kind == pb::AlertKind::Assessment as i32)
            .filter_map(|a| {
                let x = a.assessment.as_ref()?;
                (x.verdict != pb::Verdict::Instrumental as i32)
                    .then(|| {
                        flashes
                            .get(x.flash_id.as_str())
                            .map(|f| ((*f).clone(), a.clone()))
                    })
                    .flatten()
            })
            .collect()
    };
    let alerts = alerts_until(&d, |a| standing(a).len() >= 2);
    let pairs = standing(&alerts);
    assert!(pairs.len() >= 2, "too few assessed flashes: {alerts:?}");

    // A flash: its assessment goes with it, and both withdrawals say so.
    let (flash, assessment) = &pairs[0];
    let out = withdraw(&d, &token, &flash.id, "seen by the camera as a satellite glint");
    let lines: Vec<&str> = out.lines().collect();
    assert_eq!(lines.len(), 2, "{out}");
    assert!(
        lines[0].starts_with(&format!("withdrew {} with ", flash.id))
            && lines[0].contains(&format!("its assessment {} is withdrawn with it", assessment.id)),
        "{out}"
    );
    assert!(
        lines[1].starts_with(&format!("withdrew {} with ", assessment.id))
            && lines[1].contains(&format!("withdrawn with its flash {}", flash.id)),
        "{out}"
    );
    // An assessment alone: its flash stands, and the withdrawal says so.
    let (other_flash, other_assessment) = &pairs[1];
    let out = withdraw(&d, &token, &other_assessment.id, "fit rerun by hand");
    assert_eq!(out.lines().count(), 1, "{out}");
    assert!(
        out.contains(&format!("its flash {} still stands", other_flash.id)),
        "{out}"
    );

    assert!(d.terminate().success(), "{}", d.log_text());
    let export = Command::new(util::glint_bin())
        .args(["journal", "export", "--state-dir"])
        .arg(dir.path().join("state"))
        .output()
        .unwrap();
    assert!(export.status.success());
    let json: Vec<serde_json::Value> = String::from_utf8_lossy(&export.stdout)
        .lines()
        .map(util::checked_json)
        .collect();
    let by_id: BTreeMap<&str, &serde_json::Value> =
        json.iter().map(|a| (a["id"].as_str().unwrap(), a)).collect();
    let withdrawn_by: BTreeMap<&str, &serde_json::Value> = json
        .iter()
        .filter(|a| a["kind"] == "withdrawal")
        .map(|a| (a["withdrawn_id"].as_str().unwrap(), a))
        .collect();
    for id in [&flash.id, &assessment.id, &other_assessment.id] {
        assert!(
            withdrawn_by.contains_key(id.as_str()),
            "{id} not withdrawn: {json:?}"
        );
    }
    assert!(
        !withdrawn_by.contains_key(other_flash.id.as_str()),
        "the flash was withdrawn too"
    );
    assert!(
        withdrawn_by[assessment.id.as_str()]["reason"]
            .as_str()
            .unwrap()
            .contains(&format!("withdrawn with its flash {}", flash.id)),
        "{:?}",
        withdrawn_by[assessment.id.as_str()]
    );
    // One id rule: every withdrawal, the engine's included, carries the time of what it withdraws.
    let engine = json
        .iter()
        .filter(|a| a["kind"] == "withdrawal" && a["reason"].as_str().unwrap().starts_with("instrumental"))
        .count();
    assert!(
        engine >= 1,
        "the demo's glitch was not withdrawn by the engine: {json:?}"
    );
    for (target, w) in &withdrawn_by {
        assert_eq!(
            id_time(w["id"].as_str().unwrap()).replace("GL-", ""),
            id_time(target).replace("GL-", ""),
            "withdrawal {} of {target}",
            w["id"]
        );
        assert!(by_id.contains_key(target));
    }
}
