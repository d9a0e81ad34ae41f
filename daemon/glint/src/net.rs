//! Listener plumbing shared by the ingest and subscriber servers: accepting without letting an accept error
//! spin the loop, TCP keepalive, the gate that bounds connections which have not authenticated yet (a small
//! pool with a short deadline, a share per address, the oldest evicted first so a flood cannot lock out a
//! real peer), and the refusal log that summarises refused connections instead of writing a line for each.

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::net::{IpAddr, SocketAddr};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::{Duration, Instant};

use tokio::net::{TcpListener, TcpStream};
use tokio_util::sync::CancellationToken;

use crate::metrics::Metrics;

/// Waits for the next connection, or `None` once `stop` fires. Accept errors are logged and retried after a
/// backoff that doubles up to one second and resets on success.
pub(crate) async fn accept(
    listener: &TcpListener,
    stop: &CancellationToken,
    backoff: &mut Duration,
    what: &str,
) -> Option<(TcpStream, SocketAddr)> {
    loop {
        let accepted = tokio::select! {
            () = stop.cancelled() => return None,
            a = listener.accept() => a,
        };
        match accepted {
            Ok(x) => {
                *backoff = Duration::from_millis(10);
                return Some(x);
            }
            Err(e) => {
                tracing::warn!(error = %e, "{what}: accept failed, retrying in {} ms", backoff.as_millis());
                tokio::time::sleep(*backoff).await;
                *backoff = (*backoff * 2).min(Duration::from_secs(1));
            }
        }
    }
}

/// Turns on TCP keepalive: after `idle` without traffic the kernel probes the peer three times, `idle / 3`
/// apart, and resets the connection if nobody answers, so a peer whose host died is noticed within about
/// `2 x idle` even when it was not in the middle of a frame.
pub(crate) fn set_keepalive(tcp: &TcpStream, idle: Duration) -> std::io::Result<()> {
    let interval = (idle / 3).max(Duration::from_secs(1));
    let ka = socket2::TcpKeepalive::new()
        .with_time(idle.max(Duration::from_secs(1)))
        .with_interval(interval)
        .with_retries(3);
    socket2::SockRef::from(tcp).set_tcp_keepalive(&ka)
}

/// Limits on the connections of one listener that have not authenticated yet.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct GateLimits {
    /// Unauthenticated connections held at once; a new one evicts the oldest when the pool is full.
    pub(crate) max_pending: usize,
    /// Unauthenticated connections held at once from one address; a new one evicts that address's oldest.
    pub(crate) max_pending_per_address: usize,
    /// A connection must authenticate (TLS handshake and first frame) within this.
    pub(crate) auth_timeout: Duration,
}

#[derive(Debug, Default)]
struct Pending {
    next_id: u64,
    /// By admission order: the first entry is the oldest.
    order: BTreeMap<u64, (IpAddr, CancellationToken)>,
    per_addr: HashMap<IpAddr, usize>,
}

impl Pending {
    fn remove(&mut self, id: u64) -> Option<(IpAddr, CancellationToken)> {
        let (ip, token) = self.order.remove(&id)?;
        if let Some(n) = self.per_addr.get_mut(&ip) {
            *n -= 1;
            if *n == 0 {
                self.per_addr.remove(&ip);
            }
        }
        Some((ip, token))
    }
}

/// The pool of unauthenticated connections of one listener. Authenticated connections are counted
/// elsewhere (one producer per instrument, `subscribers.max_connections`), so a flood of connections that
/// never authenticate can only push each other out, never a peer that has shown its token.
#[derive(Debug)]
pub(crate) struct Gate {
    limits: GateLimits,
    pending: Mutex<Pending>,
    /// Where refusals and evictions are counted and summarised.
    pub(crate) refusals: RefusalLog,
}

impl Gate {
    /// An empty pool.
    pub(crate) fn new(limits: GateLimits, refusals: RefusalLog) -> Self {
        Self {
            limits: GateLimits {
                max_pending: limits.max_pending.max(1),
                max_pending_per_address: limits.max_pending_per_address.max(1),
                ..limits
            },
            pending: Mutex::new(Pending::default()),
            refusals,
        }
    }

    /// The limits in force.
    pub(crate) fn limits(&self) -> GateLimits {
        self.limits
    }

    fn lock(&self) -> MutexGuard<'_, Pending> {
        // A panic while holding this lock leaves plain counters behind; they stay usable.
        self.pending
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    /// Admits a new connection, evicting the oldest unauthenticated connection of the same address when that
    /// address holds its share, else the oldest of all when the pool is full. The evicted connection's
    /// ticket fires [`Ticket::evicted`] and it closes itself.
    pub(crate) fn admit(self: &Arc<Self>, peer: SocketAddr) -> Ticket {
        let ip = peer.ip();
        let mut evicted = None;
        let ticket = {
            let mut p = self.lock();
            let same_addr = p.per_addr.get(&ip).copied().unwrap_or(0);
            let victim = if same_addr >= self.limits.max_pending_per_address {
                p.order.iter().find(|(_, (a, _))| *a == ip).map(|(id, _)| *id)
            } else if p.order.len() >= self.limits.max_pending {
                p.order.keys().next().copied()
            } else {
                None
            };
            if let Some(id) = victim {
                if let Some((vip, token)) = p.remove(id) {
                    token.cancel();
                    evicted = Some(vip);
                }
            }
            let id = p.next_id;
            p.next_id += 1;
            let token = CancellationToken::new();
            p.order.insert(id, (ip, token.clone()));
            *p.per_addr.entry(ip).or_insert(0) += 1;
            Ticket {
                gate: self.clone(),
                id,
                evicted: token,
                admitted: Instant::now(),
            }
        };
        if let Some(vip) = evicted {
            let why = if vip == ip {
                "evicted: too many unauthenticated connections from one address"
            } else {
                "evicted: unauthenticated pool full"
            };
            self.refusals.note(
                SocketAddr::new(vip, 0),
                why,
                "an older unauthenticated connection was closed",
            );
        }
        ticket
    }

    /// Writes the refusal summary every [`REFUSAL_LOG_WINDOW`] until `stop` fires, then once more.
    pub(crate) async fn summaries(self: Arc<Self>, stop: CancellationToken) {
        loop {
            tokio::select! {
                () = stop.cancelled() => {
                    self.refusals.flush();
                    return;
                }
                () = tokio::time::sleep(REFUSAL_LOG_WINDOW) => {
                    self.refusals.flush();
                }
            }
        }
    }

    /// Unauthenticated connections held now.
    #[cfg(test)]
    pub(crate) fn pending(&self) -> usize {
        self.lock().order.len()
    }
}

/// A connection's place in the unauthenticated pool; leaves the pool when dropped or authenticated.
#[derive(Debug)]
pub(crate) struct Ticket {
    gate: Arc<Gate>,
    id: u64,
    evicted: CancellationToken,
    admitted: Instant,
}

impl Ticket {
    /// Resolves when the gate evicted this connection to make room for a newer one.
    pub(crate) async fn evicted(&self) {
        self.evicted.cancelled().await;
    }

    /// Time left of the authentication deadline.
    pub(crate) fn time_left(&self) -> Duration {
        self.gate
            .limits
            .auth_timeout
            .saturating_sub(self.admitted.elapsed())
    }

    /// The peer has authenticated: it leaves the pool and can no longer be evicted.
    pub(crate) fn authenticated(self) {
        drop(self);
    }
}

impl Drop for Ticket {
    fn drop(&mut self) {
        self.gate.lock().remove(self.id);
    }
}

/// How long refusals are gathered before a summary line is written.
pub(crate) const REFUSAL_LOG_WINDOW: Duration = Duration::from_secs(10);

/// Most distinct addresses remembered per window (the summary then says "at least").
const MAX_ADDRS_COUNTED: usize = 4096;

#[derive(Debug)]
struct Window {
    start: Instant,
    count: u64,
    addrs: BTreeSet<IpAddr>,
    reasons: BTreeMap<&'static str, u64>,
}

impl Window {
    fn new() -> Self {
        Self {
            start: Instant::now(),
            count: 0,
            addrs: BTreeSet::new(),
            reasons: BTreeMap::new(),
        }
    }
}

/// Refused connections of one listener: the first of each window is logged with its detail, the rest are
/// counted and summarised in one line per [`REFUSAL_LOG_WINDOW`] (by [`RefusalLog::flush`]), so a flood of
/// bad connections writes a few lines a minute, not one per connection.
#[derive(Debug)]
pub(crate) struct RefusalLog {
    what: &'static str,
    metrics: Arc<Metrics>,
    counter: fn(&Metrics) -> &AtomicU64,
    window: Mutex<Window>,
}

impl RefusalLog {
    /// A log for the listener named `what`, counting every refusal in the metric `counter` picks.
    pub(crate) fn new(
        what: &'static str,
        metrics: Arc<Metrics>,
        counter: fn(&Metrics) -> &AtomicU64,
    ) -> Self {
        Self {
            what,
            metrics,
            counter,
            window: Mutex::new(Window::new()),
        }
    }

    fn lock(&self) -> MutexGuard<'_, Window> {
        self.window
            .lock()
            .unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    /// Counts one refused connection; `reason` is a short fixed label, `detail` is logged for the first
    /// refusal of a window only (callers pass peer text through [`crate::logging::untrusted`]).
    pub(crate) fn note(&self, peer: SocketAddr, reason: &'static str, detail: &str) {
        (self.counter)(&self.metrics).fetch_add(1, Ordering::Relaxed);
        let first = {
            let mut w = self.lock();
            w.count += 1;
            if w.addrs.len() < MAX_ADDRS_COUNTED {
                w.addrs.insert(peer.ip());
            }
            *w.reasons.entry(reason).or_insert(0) += 1;
            w.count == 1
        };
        if first {
            tracing::warn!(
                %peer,
                "{}: refused a connection ({reason}): {detail}; further refusals are summarised every {} s",
                self.what,
                REFUSAL_LOG_WINDOW.as_secs()
            );
        }
    }

    /// Writes the summary of the window if more than its first refusal happened, and starts a new window.
    /// Returns the number of refusals the window held.
    pub(crate) fn flush(&self) -> u64 {
        let w = std::mem::replace(&mut *self.lock(), Window::new());
        if w.count > 1 {
            let reasons: Vec<String> = w.reasons.iter().map(|(r, n)| format!("{r}: {n}")).collect();
            let more = if w.addrs.len() >= MAX_ADDRS_COUNTED {
                "at least "
            } else {
                ""
            };
            tracing::warn!(
                refused = w.count,
                addresses = w.addrs.len(),
                "{}: refused {} connections in the last {:.0} s from {more}{} address(es) ({})",
                self.what,
                w.count,
                w.start.elapsed().as_secs_f64(),
                w.addrs.len(),
                reasons.join(", ")
            );
        }
        w.count
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn addr(last: u8, port: u16) -> SocketAddr {
        SocketAddr::from(([127, 0, 0, last], port))
    }

    #[test]
    fn the_oldest_unauthenticated_connection_makes_room() {
        let metrics = Arc::new(Metrics::new());
        let log = RefusalLog::new("test", metrics.clone(), |m| &m.refused_connections);
        let gate = Arc::new(Gate::new(
            GateLimits {
                max_pending: 4,
                max_pending_per_address: 2,
                auth_timeout: Duration::from_secs(5),
            },
            log,
        ));
        let a1 = gate.admit(addr(2, 1));
        let a2 = gate.admit(addr(2, 2));
        // A third from the same address evicts that address's oldest.
        let a3 = gate.admit(addr(2, 3));
        assert!(a1.evicted.is_cancelled());
        assert!(!a2.evicted.is_cancelled() && !a3.evicted.is_cancelled());
        let b1 = gate.admit(addr(3, 1));
        let b2 = gate.admit(addr(3, 2));
        assert_eq!(gate.pending(), 4);
        // The pool is full: the oldest of all (a2) goes.
        let c1 = gate.admit(addr(4, 1));
        assert!(a2.evicted.is_cancelled());
        assert!(!b1.evicted.is_cancelled() && !b2.evicted.is_cancelled() && !c1.evicted.is_cancelled());
        // Authenticated ones leave the pool and make room without evicting anyone.
        b1.authenticated();
        drop(a1);
        let c2 = gate.admit(addr(4, 2));
        assert!(!a3.evicted.is_cancelled() && !c2.evicted.is_cancelled());
        assert_eq!(gate.pending(), 4);
        assert_eq!(metrics.refused_connections.load(Ordering::Relaxed), 2);
        assert_eq!(gate.refusals.flush(), 2);
        assert_eq!(gate.refusals.flush(), 0);
    }
}
