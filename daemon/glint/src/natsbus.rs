//! The NATS JetStream bus as glint uses it: the subject scheme (`<prefix>.<instrument>.<kind>`), the payload
//! (an `Alert` as plain protobuf bytes, no length prefix), the message id (`Nats-Msg-Id` = the alert id, so
//! the server drops a republished alert within the stream's duplicate window), connecting with backoff, and
//! creating the stream from its definition file. Shared by the bus sink (`sinks/bus.rs`) and
//! `glint coincide`.

use std::time::Duration;

use anyhow::{Context, anyhow, bail};
use async_nats::jetstream;
use glint_wire::pb;
use prost::Message as _;

use crate::alerts::kind_name;
use crate::config::BusConfig;

/// The content type every alert message carries in a header, for consumers that look before decoding.
pub(crate) const CONTENT_TYPE: &str = "application/x-protobuf; proto=glint.v1.Alert";

/// Subject of an alert: `<prefix>.<instrument>.<kind>`, the kind as its lower-case name (flash, assessment,
/// withdrawal, heartbeat, test, joint). Instrument ids are ASCII letters, digits, '-' and '_', so they are
/// always one subject token.
pub(crate) fn subject(prefix: &str, alert: &pb::Alert) -> String {
    format!("{prefix}.{}.{}", alert.instrument, kind_name(alert.kind))
}

/// Connects to the bus; the client keeps reconnecting in the background (from the first attempt on), waiting
/// 100 ms doubling up to `max_backoff` between attempts, so a server that is down at start-up is not fatal.
pub(crate) async fn connect(cfg: &BusConfig, client_name: &str) -> anyhow::Result<async_nats::Client> {
    let mut opts = match &cfg.credentials_file {
        Some(p) => async_nats::ConnectOptions::with_credentials_file(p)
            .await
            .with_context(|| format!("cannot read the NATS credentials file {}", p.display()))?,
        None => async_nats::ConnectOptions::new(),
    };
    let max = cfg.max_backoff;
    opts = opts
        .name(client_name)
        .retry_on_initial_connect()
        .max_reconnects(None)
        .connection_timeout(Duration::from_secs(5))
        .reconnect_delay_callback(move |attempts| backoff(attempts, max));
    let urls: Vec<&str> = cfg.url.split(',').map(str::trim).collect();
    opts.connect(urls.as_slice())
        .await
        .with_context(|| format!("cannot connect to the bus at {}", cfg.url))
}

/// Wait before reconnection attempt `attempts` (from 1): 100 ms doubling, capped at `max`.
pub(crate) fn backoff(attempts: usize, max: Duration) -> Duration {
    let exp = u32::try_from(attempts.saturating_sub(1))
        .unwrap_or(u32::MAX)
        .min(16);
    Duration::from_millis(100u64 << exp).min(max)
}

/// A JetStream context whose requests (publish acknowledgements among them) time out after `ack_timeout`.
pub(crate) fn context(client: async_nats::Client, cfg: &BusConfig) -> jetstream::Context {
    let mut js = jetstream::new(client);
    js.set_timeout(cfg.ack_timeout);
    js
}

/// Creates the stream from `stream_file` when it is configured and the stream does not exist yet; an
/// existing stream is left as it is (its operators own it).
pub(crate) async fn ensure_stream(js: &jetstream::Context, cfg: &BusConfig) -> anyhow::Result<()> {
    let Some(path) = &cfg.stream_file else {
        return Ok(());
    };
    let text = std::fs::read_to_string(path).with_context(|| format!("cannot read {}", path.display()))?;
    let def: jetstream::stream::Config = serde_json::from_str(&text)
        .with_context(|| format!("{} is not a stream definition", path.display()))?;
    js.get_or_create_stream(def)
        .await
        .map_err(|e| anyhow!("cannot create stream {}: {e}", cfg.stream))?;
    Ok(())
}

/// Publishes one alert and waits for the server's acknowledgement; an acknowledgement from another stream
/// than the configured one is an error (the subjects are captured by the wrong stream). Returns whether the
/// server found it a duplicate (already stored under the same id).
pub(crate) async fn publish(
    js: &jetstream::Context,
    cfg: &BusConfig,
    alert: &pb::Alert,
) -> anyhow::Result<bool> {
    let mut headers = async_nats::HeaderMap::new();
    headers.insert("Nats-Msg-Id", alert.id.as_str());
    headers.insert("Content-Type", CONTENT_TYPE);
    headers.insert("Glint-Seq", alert.seq.to_string().as_str());
    let subject = subject(&cfg.subject_prefix, alert);
    let ack = js
        .publish_with_headers(subject.clone(), headers, alert.encode_to_vec().into())
        .await
        .map_err(|e| anyhow!("publishing {} to {subject}: {e}", alert.id))?
        .await
        .map_err(|e| anyhow!("no acknowledgement for {} on {subject}: {e}", alert.id))?;
    if ack.stream != cfg.stream {
        bail!(
            "{subject} is stored by stream '{}', not the configured '{}'",
            ack.stream,
            cfg.stream
        );
    }
    Ok(ack.duplicate)
}

/// Decodes an alert message's payload.
pub(crate) fn decode(payload: &[u8]) -> Result<pb::Alert, prost::DecodeError> {
    pb::Alert::decode(payload)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn subjects_name_instrument_and_kind() {
        let a = pb::Alert {
            instrument: "ventisca-array".into(),
            kind: pb::AlertKind::Assessment as i32,
            ..Default::default()
        };
        assert_eq!(
            subject("glint.alerts", &a),
            "glint.alerts.ventisca-array.assessment"
        );
        let j = pb::Alert {
            instrument: "coincide".into(),
            kind: pb::AlertKind::Joint as i32,
            ..Default::default()
        };
        assert_eq!(subject("site.x", &j), "site.x.coincide.joint");
    }

    #[test]
    fn backoff_doubles_up_to_its_cap() {
        let max = Duration::from_secs(5);
        let got: Vec<u64> = (1..=8).map(|n| backoff(n, max).as_millis() as u64).collect();
        assert_eq!(got, vec![100, 200, 400, 800, 1600, 3200, 5000, 5000]);
        assert_eq!(backoff(usize::MAX, max), max);
    }
}
