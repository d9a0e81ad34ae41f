//! Listener plumbing shared by the ingest and subscriber servers: accepting connections without letting an
//! accept error (out of file descriptors and the like) turn the loop into a spin.

use std::net::SocketAddr;
use std::time::Duration;

use tokio::net::{TcpListener, TcpStream};
use tokio_util::sync::CancellationToken;

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
