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
