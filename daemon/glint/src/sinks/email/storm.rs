//! Storm control for one recipient: a rate limit over a sliding window and quiet hours (UTC) with a
//! significance override. Alerts that may not go out alone are gathered into one digest, sent as soon as
//! the limit allows and naming every alert it stands for, so nothing is dropped silently. Pure (the time
//! is passed in) and saved with the recipient's cursor, so a restart neither resets the limit nor loses
//! a digest.

use std::collections::VecDeque;

use serde::{Deserialize, Serialize};

use crate::config::EmailRecipient;

/// One alert held for a digest: what the digest says about it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub(crate) struct Held {
    /// Sequence number.
    pub(crate) seq: u64,
    /// Alert id.
    pub(crate) id: String,
    /// One line naming it (kind, instrument, time, place, significance).
    pub(crate) line: String,
    /// Significant enough to pass quiet hours: a digest holding one is not kept back by them.
    pub(crate) urgent: bool,
}

/// What a recipient's storm control remembers: when messages went out, and what waits for a digest.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub(crate) struct Storm {
    /// Unix seconds of the messages sent within the current window, oldest first.
    pub(crate) sent_unix_s: VecDeque<f64>,
    /// Alerts waiting for the next digest, in sequence order.
    pub(crate) held: Vec<Held>,
}

/// What to do with an alert now.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Route {
    /// Send it on its own.
    Send,
    /// Hold it for the digest.
    Hold,
}

/// Minute of the UTC day of a Unix time.
fn utc_minute(unix_s: f64) -> u32 {
    (unix_s.rem_euclid(86_400.0) / 60.0) as u32
}

impl Storm {
    fn expire(&mut self, r: &EmailRecipient, now: f64) {
        let window = r.window.as_secs_f64();
        while self.sent_unix_s.front().is_some_and(|t| now - t >= window) {
            self.sent_unix_s.pop_front();
        }
    }

    /// Whether a message may go out now under the rate limit.
    pub(crate) fn slot_free(&mut self, r: &EmailRecipient, now: f64) -> bool {
        self.expire(r, now);
        self.sent_unix_s.len() < r.max_per_window
    }

    /// Whether `now` is in the recipient's quiet hours.
    pub(crate) fn quiet(r: &EmailRecipient, now: f64) -> bool {
        r.quiet.is_some_and(|q| q.contains(utc_minute(now)))
    }

    /// Whether an alert of this significance passes quiet hours.
    pub(crate) fn urgent(r: &EmailRecipient, sigma: f64) -> bool {
        r.quiet.is_none_or(|q| sigma >= q.min_sigma)
    }

    /// Where an alert of significance `sigma` goes at `now`. Alerts queue behind a waiting digest so the
    /// recipient reads them in order; only an urgent alert in quiet hours may pass a digest kept back by
    /// them.
    pub(crate) fn route(&mut self, r: &EmailRecipient, sigma: f64, now: f64) -> Route {
        let quiet = Self::quiet(r, now);
        let urgent = Self::urgent(r, sigma);
        if quiet && !urgent {
            return Route::Hold;
        }
        // Behind a waiting digest unless quiet hours (not the rate) keep that digest back.
        if !self.held.is_empty() && (!quiet || self.digest_due_ignoring_rate(r, now)) {
            return Route::Hold;
        }
        if self.slot_free(r, now) {
            Route::Send
        } else {
            Route::Hold
        }
    }

    fn digest_due_ignoring_rate(&self, r: &EmailRecipient, now: f64) -> bool {
        !self.held.is_empty() && (!Self::quiet(r, now) || self.held.iter().any(|h| h.urgent))
    }

    /// Whether the digest should go out now.
    pub(crate) fn digest_due(&mut self, r: &EmailRecipient, now: f64) -> bool {
        self.digest_due_ignoring_rate(r, now) && self.slot_free(r, now)
    }

    /// Seconds until the digest could be due (the rate window or the quiet hours end), if one waits.
    pub(crate) fn digest_wait_s(&mut self, r: &EmailRecipient, now: f64) -> Option<f64> {
        if self.held.is_empty() {
            return None;
        }
        self.expire(r, now);
        let rate_wait = if self.sent_unix_s.len() < r.max_per_window {
            0.0
        } else {
            self.sent_unix_s
                .front()
                .map_or(0.0, |t| t + r.window.as_secs_f64() - now)
        };
        let quiet_wait = match r.quiet {
            Some(q) if Self::quiet(r, now) && !self.held.iter().any(|h| h.urgent) => {
                let minute = utc_minute(now);
                let to_end = (q.end_min + 1440 - minute) % 1440;
                f64::from(to_end) * 60.0 - now.rem_euclid(60.0)
            }
            _ => 0.0,
        };
        Some(rate_wait.max(quiet_wait).max(0.0))
    }

    /// A message went out at `now`.
    pub(crate) fn sent(&mut self, now: f64) {
        self.sent_unix_s.push_back(now);
    }
}

#[cfg(test)]
#[allow(clippy::unwrap_used)] // tests may unwrap
mod tests {
    use std::time::Duration;

    use super::*;
    use crate::config::QuietHours;

    fn recipient(max: usize, window_s: u64, quiet: Option<QuietHours>) -> EmailRecipient {
        EmailRecipient {
            address: "a@example.org".parse().unwrap(),
            kinds: vec![],
            min_sigma: 0.0,
            max_per_window: max,
            window: Duration::from_secs(window_s),
            quiet,
        }
    }

    fn hold(storm: &mut Storm, seq: u64, urgent: bool) {
        storm.held.push(Held {
            seq,
            id: format!("a-{seq}"),
            line: String::new(),
            urgent,
        });
    }

    #[test]
    fn rate_limit_holds_then_frees_a_slot_for_the_digest() {
        let r = recipient(2, 60, None);
        let mut s = Storm::default();
        let t0 = 1_000_000.0;
        for i in 0..2 {
            assert_eq!(s.route(&r, 5.0, t0 + f64::from(i)), Route::Send);
            s.sent(t0 + f64::from(i));
        }
        assert_eq!(s.route(&r, 5.0, t0 + 2.0), Route::Hold);
        hold(&mut s, 3, true);
        assert!(!s.digest_due(&r, t0 + 2.0));
        assert!((s.digest_wait_s(&r, t0 + 2.0).unwrap() - 58.0).abs() < 1e-9);
        // The first slot frees after the window; later alerts still queue behind the digest.
        assert!(s.digest_due(&r, t0 + 60.0));
        assert_eq!(s.route(&r, 5.0, t0 + 60.0), Route::Hold);
    }

    #[test]
    fn quiet_hours_wrap_midnight_and_let_urgent_alerts_through() {
        let q = QuietHours {
            start_min: 22 * 60,
            end_min: 6 * 60,
            min_sigma: 7.0,
        };
        let r = recipient(10, 3600, Some(q));
        let mut s = Storm::default();
        let day = 20_000.0 * 86_400.0;
        let at = |h: f64| day + h * 3600.0;
        assert_eq!(s.route(&r, 5.0, at(23.0)), Route::Hold);
        assert_eq!(s.route(&r, 5.0, at(3.0)), Route::Hold);
        assert_eq!(s.route(&r, 5.0, at(12.0)), Route::Send);
        assert_eq!(s.route(&r, 7.5, at(23.0)), Route::Send);
        hold(&mut s, 1, false);
        // A held ordinary alert waits for 06:00; an urgent one still passes it.
        assert!(!s.digest_due(&r, at(23.0)));
        assert!((s.digest_wait_s(&r, at(23.0)).unwrap() - 7.0 * 3600.0).abs() < 1e-6);
        assert_eq!(s.route(&r, 8.0, at(23.5)), Route::Send);
        assert!(s.digest_due(&r, at(6.0)));
    }
}
