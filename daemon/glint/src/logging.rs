//! Logging set up once per process through tracing: human-readable lines on a terminal, JSON lines when the
//! config asks, the level from the config unless RUST_LOG says otherwise. Logs go to stderr so stdout stays
//! free for alerts and reports.

use tracing_subscriber::EnvFilter;

use crate::config::LogFormat;

/// Installs the global subscriber. Calling it twice is harmless (the second call is ignored).
pub(crate) fn init(level: &str, format: LogFormat) {
    let filter = EnvFilter::try_from_default_env()
        .or_else(|_| EnvFilter::try_new(level))
        .unwrap_or_else(|_| EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Text => builder.try_init(),
        LogFormat::Json => builder.json().flatten_event(true).try_init(),
    };
}
