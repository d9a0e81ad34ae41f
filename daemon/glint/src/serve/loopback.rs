//! A daemon on free loopback ports with a fresh state directory, and the built-in demo stream to feed it:
//! what `glint demo`, `glint bench-live` and the service's own end-to-end tests run on.

use std::net::SocketAddr;

use anyhow::{Context, anyhow};

use crate::config::{BadConfig, Config};

/// The built-in demo scenario (an invented observatory), embedded so the demo needs no files.
const DEMO_SCENARIO: &str = include_str!("../../../../deploy/scenarios/demo.toml");

/// The built-in demo scenario and its simulator, with the instrument block it names laid out under `tmp`.
pub(crate) fn demo_simulator(
    tmp: &std::path::Path,
) -> anyhow::Result<(glint_sim::Scenario, glint_sim::Simulator)> {
    // The scenario names its instrument block relative to itself; lay the built-in block out beside it.
    let scen_dir = tmp.join("scenarios");
    let inst_dir = tmp.join("instruments");
    std::fs::create_dir_all(&scen_dir)
        .and_then(|()| std::fs::create_dir_all(&inst_dir))
        .context("cannot lay out the demo files")?;
    let block = crate::config::builtin_instrument("ventisca-array")
        .ok_or_else(|| anyhow!("built-in instrument missing"))?;
    std::fs::write(inst_dir.join("ventisca-array.toml"), block)
        .context("cannot write the demo instrument")?;
    let scenario = glint_sim::parse_scenario(DEMO_SCENARIO, &scen_dir, "demo")?;
    let sim = glint_sim::Simulator::new(&scenario, scenario.seed)?;
    Ok((scenario, sim))
}

/// The embedded default configuration moved onto free loopback ports and a state directory under `tmp`, with
/// the producer token of `instrument` and the first subscriber token: what the demo and the benchmark run on.
pub(crate) fn loopback_config(
    tmp: &std::path::Path,
    instrument: &str,
) -> anyhow::Result<(Config, String, String)> {
    let mut cfg = Config::embedded_default().map_err(BadConfig)?;
    crate::logging::init("warn", cfg.daemon.log_format);
    let loopback = SocketAddr::from(([127, 0, 0, 1], 0));
    cfg.daemon.state_dir = tmp.join("state");
    cfg.ingest.listen = loopback;
    cfg.subscribers.listen = loopback;
    cfg.metrics_listen = None;
    let producer_token = cfg
        .instrument(instrument)
        .ok_or_else(|| anyhow!("the default configuration has no instrument '{instrument}'"))?
        .token
        .expose()
        .to_string();
    let sub_token = cfg
        .subscribers
        .tokens
        .first()
        .ok_or_else(|| anyhow!("the default configuration has no subscriber token"))?
        .expose()
        .to_string();
    Ok((cfg, producer_token, sub_token))
}
