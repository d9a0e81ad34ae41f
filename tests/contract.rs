//! The alert contract (docs/alerts.md, docs/alert.schema.json) held to the code: every proto field of what
//! glint renders is in the schema and the docs, the flags the engine can emit are the ones the proto, the
//! schema and the docs name, and `glint listen` (heartbeats, photons, kinds in any case, the replayed marker,
//! its probe exit code) keeps to it against a real daemon on loopback.

use std::collections::BTreeSet;
use std::net::TcpListener;
use std::process::{Command, Output};
use std::time::{Duration, Instant};

use serde_json::Value;

use crate::live::stream_all;
use crate::util::{self, Daemon, INSTRUMENT, SUBSCRIBER_TOKEN};

/// Proto messages rendered as JSON, with the schema's `$defs` entry and the docs' section of each.
const RENDERED: [(&str, &str); 7] = [
    ("Alert", "alert"),
    ("Trigger", "trigger"),
    ("Assessment", "assessment"),
    ("EvaporationFit", "fit"),
    ("Latency", "latency"),
    ("Joint", "joint"),
    ("Heartbeat", "heartbeat"),
];

/// Proto messages that are requests or framing, not rendered as JSON lines.
const NOT_RENDERED: [&str; 6] = [
    "Subscribe",
    "WithdrawRequest",
    "TestAlertRequest",
    "SubscriberRequest",
    "Gap",
    "SubscriberFrame",
];

fn schema() -> Value {
    serde_json::from_str(&std::fs::read_to_string(util::repo_root().join("docs/alert.schema.json")).unwrap())
        .unwrap()
}

fn docs() -> String {
    std::fs::read_to_string(util::repo_root().join("docs/alerts.md")).unwrap()
}

/// The part of docs/alerts.md under the heading `heading` (any level), up to the next heading of its level
/// or above.
fn section<'a>(docs: &'a str, heading: &str) -> &'a str {
    let start = docs
        .lines()
        .find(|l| l.starts_with('#') && l.trim_start_matches('#').trim() == heading)
        .unwrap_or_else(|| panic!("docs/alerts.md has no heading '{heading}'"));
    let level = start.chars().take_while(|&c| c == '#').count();
    let at = docs.find(start).unwrap() + start.len();
    let rest = &docs[at..];
    let end = rest
        .lines()
        .find(|l| l.starts_with('#') && l.chars().take_while(|&c| c == '#').count() <= level)
        .map_or(rest.len(), |l| rest.find(l).unwrap());
    &rest[..end]
}

/// The field names of a table in a docs section: the first cell of each row, in backticks.
fn table_fields(text: &str) -> BTreeSet<String> {
    text.lines()
        .filter_map(|l| l.strip_prefix("| `"))
        .filter_map(|l| l.split('`').next())
        .map(str::to_string)
        .collect()
}

#[test]
fn every_rendered_proto_field_is_in_the_schema_and_the_docs() {
    let root = util::repo_root().join("proto");
    let fds = protox::compile([root.join("glint/v1/alert.proto")], [&root]).unwrap();
    let schema = schema();
    let docs = docs();
    let mut problems = Vec::new();
    let file = fds
        .file
        .iter()
        .find(|f| f.name().ends_with("alert.proto"))
        .unwrap();
    for m in &file.message_type {
        let name = m.name();
        let Some((_, def)) = RENDERED.iter().find(|(n, _)| *n == name) else {
            assert!(
                NOT_RENDERED.contains(&name),
                "message {name} is new in alert.proto: render it (alerts.rs), add it to the schema and \
                 docs/alerts.md and to RENDERED here, or list it in NOT_RENDERED"
            );
            continue;
        };
        let props = &schema["$defs"][def]["properties"];
        let documented = table_fields(section(&docs, name));
        for f in &m.field {
            let field = f.name();
            if props.get(field).is_none() {
                problems.push(format!(
                    "{name}.{field} is not in docs/alert.schema.json $defs.{def}"
                ));
            }
            if !documented.contains(field) {
                problems.push(format!(
                    "{name}.{field} is not in the table under '{name}' in docs/alerts.md"
                ));
            }
        }
        // And the other way: nothing documented that the schema does not have.
        let in_schema: BTreeSet<String> = props.as_object().unwrap().keys().cloned().collect();
        for extra in documented.difference(&in_schema) {
            problems.push(format!(
                "docs/alerts.md documents {name}.{extra}, which the schema lacks"
            ));
        }
    }
    assert!(problems.is_empty(), "{}", problems.join("\n"));
}

/// The quoted snake_case words in the comment right above each `repeated string flags` field of the proto.
fn proto_flag_words() -> BTreeSet<String> {
    let text = std::fs::read_to_string(util::repo_root().join("proto/glint/v1/alert.proto")).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    let mut words = BTreeSet::new();
    for (i, l) in lines.iter().enumerate() {
        if !l.trim().starts_with("repeated string flags") {
            continue;
        }
        let mut j = i;
        while j > 0 && lines[j - 1].trim().starts_with("//") {
            j -= 1;
            for (k, part) in lines[j].split('"').enumerate() {
                if k % 2 == 1 && part.chars().all(|c| c.is_ascii_lowercase() || c == '_') {
                    words.insert(part.to_string());
                }
            }
        }
    }
    words
}

#[test]
fn the_flags_the_engine_emits_are_the_ones_the_proto_schema_and_docs_name() {
    use glint_engine::flags;
    let emitted: BTreeSet<String> = flags::ASSESSMENT.iter().map(|s| s.to_string()).collect();
    let flash: BTreeSet<String> = flags::FLASH.iter().map(|s| s.to_string()).collect();
    assert!(flash.is_subset(&emitted));
    assert_eq!(
        proto_flag_words(),
        emitted,
        "the flags named in alert.proto's comments differ from glint_engine::flags"
    );
    let schema = schema();
    let enum_of = |def: &str| -> BTreeSet<String> {
        schema["$defs"][def]["properties"]["flags"]["items"]["enum"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_str().unwrap().to_string())
            .collect()
    };
    assert_eq!(enum_of("trigger"), flash, "schema: trigger flags");
    assert_eq!(enum_of("assessment"), emitted, "schema: assessment flags");
    let docs = docs();
    assert_eq!(
        table_fields(section(&docs, "Flags")),
        emitted,
        "the table under 'Flags' in docs/alerts.md"
    );
}

#[test]
fn the_examples_in_the_docs_validate_against_the_schema() {
    let docs = docs();
    let mut n = 0;
    for block in docs.split("```json\n").skip(1) {
        let body = block.split("```").next().unwrap();
        let v: Value = serde_json::from_str(body).unwrap_or_else(|e| panic!("{e}: {body}"));
        util::checked_json(&v.to_string());
        n += 1;
    }
    // flash, assessment, two withdrawals, test, joint, heartbeat
    assert!(n >= 7, "only {n} examples in docs/alerts.md");
}

fn listen(d: &Daemon, token: &std::path::Path, args: &[&str]) -> Output {
    Command::new(util::glint_bin())
        .args(["listen", "--from", &d.subs.to_string(), "--token-file"])
        .arg(token)
        .args(args)
        .output()
        .unwrap()
}

fn stdout(o: &Output) -> String {
    String::from_utf8_lossy(&o.stdout).into_owned()
}

#[test]
fn listen_keeps_to_the_contract_on_a_live_daemon() {
    let dir = tempfile::tempdir().unwrap();
    let d = Daemon::start(dir.path(), "");
    stream_all(d.ingest, &util::demo_frames());
    let token = util::token_file(dir.path(), "sub.token", SUBSCRIBER_TOKEN);
    let op_token = util::token_file(dir.path(), "op.token", util::OPERATOR_TOKEN);
    let test = crate::email::test_alert(&d, "contract check");

    // The demo's first flash is a glitch, withdrawn automatically; an operator withdraws the second flash.
    let deadline = Instant::now() + Duration::from_secs(30);
    let all = loop {
        let o = listen(&d, &token, &["--json", "--replay-all", "--timeout-s", "3"]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let lines = util::checked_json_lines(&stdout(&o));
        let flashes = lines.iter().filter(|v| v["kind"] == "flash").count();
        if (flashes >= 2 && lines.iter().any(|v| v["kind"] == "withdrawal")) || Instant::now() > deadline {
            break lines;
        }
    };
    let second_flash = all
        .iter()
        .filter(|v| v["kind"] == "flash")
        .nth(1)
        .unwrap_or_else(|| panic!("fewer than two flashes: {all:#?}"))["id"]
        .as_str()
        .unwrap()
        .to_string();
    let w = Command::new(util::glint_bin())
        .args([
            "withdraw",
            &second_flash,
            "--reason",
            "contract test",
            "--from",
            &d.subs.to_string(),
        ])
        .arg("--token-file")
        .arg(&op_token)
        .output()
        .unwrap();
    assert!(w.status.success(), "{}", String::from_utf8_lossy(&w.stderr));

    // Kinds in any case; photons when asked; heartbeats with their watermarks; every line to the schema.
    let o = listen(
        &d,
        &token,
        &[
            "--json",
            "--replay-all",
            "--photons",
            "--heartbeats",
            "--kinds",
            "FLASH,Assessment,withdrawal,TEST",
            "--timeout-s",
            "3",
        ],
    );
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let lines = util::checked_json_lines(&stdout(&o));
    let of = |kind: &str| lines.iter().filter(|v| v["kind"] == kind).collect::<Vec<_>>();
    let beats = of("heartbeat");
    assert!(!beats.is_empty(), "no heartbeat in 3 s at 0.5 s intervals");
    let hb = beats[0];
    let at = hb["instruments"]
        .as_array()
        .unwrap()
        .iter()
        .position(|i| i == INSTRUMENT)
        .unwrap_or_else(|| panic!("{INSTRUMENT} missing from {hb}"));
    let wm = hb["watermark_gps_ns"][at].as_i64().unwrap();
    assert!(
        wm > 1_400_000_000_000_000_000,
        "watermark {wm} after the demo stream"
    );
    assert!(hb["watermark_age_s"][at].as_f64().unwrap() != 0.0);
    for f in of("flash") {
        let t = &f["trigger"];
        let n = t["photons"].as_u64().unwrap() as usize;
        assert!(n > 0);
        for col in [
            "photon_time_gps_ns",
            "photon_ra_deg",
            "photon_dec_deg",
            "photon_energy_gev",
        ] {
            assert_eq!(t[col].as_array().unwrap().len(), n, "{col} of {}", f["id"]);
        }
        assert_eq!(f["replayed"], true);
    }
    let tests = of("test");
    assert_eq!(tests.len(), 1);
    assert_eq!(tests[0]["id"], test.id.as_str());
    // Automatic and operator withdrawals have the same fields, the withdrawn alert's trigger included.
    // The operator's withdrawal of a flash withdraws its assessment too: automatic, operator, cascade.
    let withdrawals = of("withdrawal");
    assert_eq!(withdrawals.len(), 3, "{withdrawals:#?}");
    let keys = |v: &Value| v.as_object().unwrap().keys().cloned().collect::<Vec<_>>();
    assert_eq!(keys(withdrawals[0]), keys(withdrawals[1]));
    assert_eq!(keys(withdrawals[0]), keys(withdrawals[2]));
    for wd in &withdrawals {
        assert!(
            wd["trigger"].is_object(),
            "withdrawal without the withdrawn trigger: {wd}"
        );
        let target = lines.iter().find(|v| v["id"] == wd["withdrawn_id"]).unwrap();
        assert_eq!(wd["trigger"]["end_gps_ns"], target["trigger"]["end_gps_ns"]);
    }
    assert_eq!(withdrawals[1]["withdrawn_id"], second_flash.as_str());
    let cascaded = lines
        .iter()
        .find(|v| v["id"] == withdrawals[2]["withdrawn_id"])
        .unwrap();
    assert_eq!(cascaded["kind"], "assessment");
    assert_eq!(cascaded["assessment"]["flash_id"], second_flash.as_str());
    let assessment = of("assessment")[0];
    let flash = lines.iter().find(|v| v["kind"] == "flash").unwrap();
    let mut flash_small = flash.clone();
    for col in [
        "photon_time_gps_ns",
        "photon_ra_deg",
        "photon_dec_deg",
        "photon_energy_gev",
    ] {
        flash_small["trigger"].as_object_mut().unwrap().remove(col);
    }
    util::keep_example("flash", &flash_small);
    util::keep_example("assessment", assessment);
    util::keep_example("withdrawal-automatic", withdrawals[0]);
    util::keep_example("withdrawal-operator", withdrawals[1]);
    util::keep_example("test", tests[0]);
    util::keep_example("heartbeat", hb);

    // On the screen: replayed alerts are marked, and their event-time latency is shown apart from wall time.
    let o = listen(
        &d,
        &token,
        &["--replay-all", "--kinds", "flash", "--timeout-s", "2"],
    );
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let screen = stdout(&o);
    assert!(screen.contains("#1 flash GL-"), "{screen}");
    assert!(screen.contains("REPLAYED from the journal"), "{screen}");
    assert!(screen.contains("event-time latency"), "{screen}");
    assert!(
        !screen.contains("(receipt to send)"),
        "a replayed alert shown with wall latency:\n{screen}"
    );
    assert!(
        !screen.contains("FLASH"),
        "kinds are lower case on the screen too:\n{screen}"
    );
}

#[test]
fn listen_timeout_exits_4_when_it_never_connected() {
    let dir = tempfile::tempdir().unwrap();
    let token = util::token_file(dir.path(), "sub.token", SUBSCRIBER_TOKEN);
    // A port that accepts the connection and never answers, and one where nothing listens.
    let silent = TcpListener::bind("127.0.0.1:0").unwrap();
    let closed = TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap();
    for addr in [silent.local_addr().unwrap(), closed] {
        let started = Instant::now();
        let o = Command::new(util::glint_bin())
            .args([
                "listen",
                "--from",
                &addr.to_string(),
                "--timeout-s",
                "1",
                "--token-file",
            ])
            .arg(&token)
            .output()
            .unwrap();
        assert_eq!(
            o.status.code(),
            Some(4),
            "{addr}: {}",
            String::from_utf8_lossy(&o.stderr)
        );
        assert!(String::from_utf8_lossy(&o.stderr).contains("did not accept the subscription"));
        assert!(started.elapsed() < Duration::from_secs(20));
    }
    // Against a daemon that accepts it, the same timeout exits 0.
    let d = Daemon::start(dir.path(), "");
    let o = listen(&d, &token, &["--timeout-s", "1"]);
    assert_eq!(o.status.code(), Some(0), "{}", String::from_utf8_lossy(&o.stderr));
}

#[test]
fn listen_help_lists_every_kind_and_the_probe_exit_code() {
    let o = Command::new(util::glint_bin())
        .args(["listen", "--help"])
        .output()
        .unwrap();
    let help = stdout(&o);
    for k in [
        "flash",
        "assessment",
        "withdrawal",
        "test",
        "joint",
        "heartbeat",
        "--heartbeats",
        "--photons",
    ] {
        assert!(help.contains(k), "listen --help does not mention {k}:\n{help}");
    }
    assert!(help.contains("4 if the"), "{help}");
}
