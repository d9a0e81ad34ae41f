//! Talking to the service manager (systemd's notify protocol, `Type=notify`): READY once the listeners are
//! bound and the journal and state are loaded, STOPPING when the staged shutdown begins, a short STATUS line,
//! and watchdog pings while the daemon is healthy. Without `NOTIFY_SOCKET` in the environment every call is a
//! no-op, so `glint run` behaves the same under any supervisor.

use std::time::Duration;

use sd_notify::NotifyState;
use tokio_util::sync::CancellationToken;

/// Tells the service manager the daemon is ready, with a one-line status naming its addresses.
pub(crate) fn ready(status: &str) {
    send(&[NotifyState::Ready, NotifyState::Status(status)]);
}

/// Tells the service manager a configuration reload has begun (READY follows when it is done).
pub(crate) fn reloading() {
    send(&[
        NotifyState::Reloading,
        NotifyState::Status("reloading the configuration"),
    ]);
}

/// Tells the service manager the staged shutdown has begun.
pub(crate) fn stopping() {
    send(&[NotifyState::Stopping, NotifyState::Status("stopping")]);
}

/// Pings the watchdog at half its interval until `stop` is cancelled or `healthy` says no. The pings come
/// from the runtime that serves the sockets and stop when the daemon has hit a fatal error, so a wedged
/// runtime or a dead journal lets the watchdog fire and the service manager restart glint.
pub(crate) async fn watchdog(stop: CancellationToken, healthy: impl Fn() -> bool) {
    let Some(interval) = sd_notify::watchdog_enabled() else {
        return;
    };
    let period = (interval / 2).max(Duration::from_millis(10));
    loop {
        if !healthy() {
            tracing::error!("not healthy: watchdog pings stop");
            return;
        }
        send(&[NotifyState::Watchdog]);
        tokio::select! {
            () = tokio::time::sleep(period) => {}
            () = stop.cancelled() => return,
        }
    }
}

fn send(state: &[NotifyState<'_>]) {
    if std::env::var_os("NOTIFY_SOCKET").is_none() {
        return;
    }
    if let Err(e) = sd_notify::notify(state) {
        tracing::warn!("cannot notify the service manager: {e}");
    }
}
