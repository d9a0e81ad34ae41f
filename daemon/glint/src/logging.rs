//! Logging set up once per process through tracing: text lines (coloured only when stderr is a terminal, so
//! a file or the service manager's journal gets plain text), or JSON lines when the config asks
//! (`log_format = "json"`). The level is the config's `log_level` (checked when the config is read, see
//! [`level_problem`]); RUST_LOG is not read, so the file (or `GLINT_DAEMON__LOG_LEVEL`) decides. Logs go to
//! stderr so stdout stays free for alerts and reports.

use std::io::IsTerminal as _;

use tracing_subscriber::EnvFilter;

use crate::config::LogFormat;

/// Installs the global subscriber. Calling it twice is harmless (the second call is ignored).
pub(crate) fn init(level: &str, format: LogFormat) {
    let filter = EnvFilter::builder()
        .parse(level)
        .unwrap_or_else(|_| EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(std::io::stderr().is_terminal())
        .with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Text => builder.try_init(),
        LogFormat::Json => builder.json().flatten_event(true).try_init(),
    };
    if std::env::var_os("RUST_LOG").is_some() {
        tracing::warn!("RUST_LOG is set but not read: the configuration's log_level ({level}) decides");
    }
}

const LEVELS: [&str; 6] = ["trace", "debug", "info", "warn", "error", "off"];

/// What is wrong with a `log_level` value, if anything. Accepted: a level (`trace`, `debug`, `info`, `warn`,
/// `error`, `off`), or comma-separated directives each a level or `target=level` (e.g. `info,glint=debug`).
/// A bare word that is no level is refused: tracing would read `infoo` as a target and log nothing else.
pub(crate) fn level_problem(value: &str) -> Option<String> {
    let is_level = |s: &str| LEVELS.contains(&s.trim().to_ascii_lowercase().as_str());
    if value.trim().is_empty() {
        return Some("is empty (use one of trace, debug, info, warn, error, off)".into());
    }
    for d in value.split(',') {
        let d = d.trim();
        let ok = match d.split_once('=') {
            Some((target, level)) => {
                !target.is_empty()
                    && target
                        .chars()
                        .all(|c| c.is_ascii_alphanumeric() || matches!(c, '_' | ':' | '-'))
                    && is_level(level)
            }
            None => is_level(d),
        };
        if !ok {
            return Some(format!(
                "'{}' is not a level or target=level (levels: trace, debug, info, warn, error, off; e.g. info,glint=debug)",
                untrusted(d)
            ));
        }
    }
    None
}

/// Longest peer-supplied text shown in a log line or an error, in characters.
pub(crate) const UNTRUSTED_MAX_CHARS: usize = 128;

/// Peer-supplied text (instrument ids, producer and client names, reasons) made safe for a log line or an
/// error message: control characters (newlines above all, which would forge a line in the text log) are
/// escaped as `\n`, `\u{1b}` and so on, and anything past [`UNTRUSTED_MAX_CHARS`] is cut with an ellipsis, so
/// a peer can neither forge log lines nor make the daemon echo megabytes.
pub(crate) fn untrusted(s: &str) -> String {
    let mut out = String::with_capacity(s.len().min(UNTRUSTED_MAX_CHARS + 8));
    for (i, c) in s.chars().enumerate() {
        if i == UNTRUSTED_MAX_CHARS {
            out.push('…');
            break;
        }
        if c.is_control()
            || matches!(
                c,
                '\u{2028}' | '\u{2029}' | '\u{200e}' | '\u{200f}' | '\u{202a}'..='\u{202e}'
            )
        {
            out.extend(c.escape_default());
        } else {
            out.push(c);
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_levels_are_checked_so_a_typo_cannot_silence_the_daemon() {
        for ok in [
            "info",
            "WARN",
            "info,glint=debug",
            "glint::serve=trace, warn",
            "off",
        ] {
            assert_eq!(level_problem(ok), None, "{ok}");
        }
        for bad in ["infoo", "", "glint=loud", "=info", "info,,debug", "glint[x]=info"] {
            assert!(level_problem(bad).is_some(), "{bad:?} passed");
        }
        assert!(level_problem("infoo").unwrap().contains("'infoo' is not a level"));
    }

    #[test]
    fn untrusted_text_is_escaped_and_bounded() {
        assert_eq!(untrusted("array-north"), "array-north");
        assert_eq!(
            untrusted("x\n2026-12-05T00:00:00Z  INFO forged"),
            "x\\n2026-12-05T00:00:00Z  INFO forged"
        );
        assert_eq!(untrusted("a\r\u{1b}[31mb\0"), "a\\r\\u{1b}[31mb\\u{0}");
        let long = "é".repeat(4 << 20);
        let shown = untrusted(&long);
        assert_eq!(shown.chars().count(), UNTRUSTED_MAX_CHARS + 1);
        assert!(shown.ends_with('…'));
        assert!(!untrusted("\u{2028}").contains('\u{2028}'));
    }
}
