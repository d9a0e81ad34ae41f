//! The daemon's HTTP surface on `metrics_listen`: today the Prometheus text exposition of
//! [`crate::metrics::Metrics`]. Health and status endpoints join here.

use std::time::Duration;

use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpListener;

use crate::metrics::Metrics;

/// Serves `GET /metrics` (any path, in fact) over plain HTTP/1.1 until the task is dropped. One request per
/// connection; a request is read for at most two seconds.
pub(crate) async fn serve(listener: TcpListener, metrics: std::sync::Arc<Metrics>) {
    loop {
        let (mut sock, _) = match listener.accept().await {
            Ok(s) => s,
            Err(e) => {
                tracing::warn!(error = %e, "metrics: accept failed");
                tokio::time::sleep(Duration::from_millis(100)).await;
                continue;
            }
        };
        let m = metrics.clone();
        tokio::spawn(async move {
            let mut buf = [0u8; 1024];
            let _ = tokio::time::timeout(Duration::from_secs(2), sock.read(&mut buf)).await;
            let body = m.prometheus_text();
            let head = format!(
                "HTTP/1.1 200 OK\r\nContent-Type: text/plain; version=0.0.4\r\nContent-Length: {}\r\nConnection: close\r\n\r\n",
                body.len()
            );
            let _ = sock.write_all(head.as_bytes()).await;
            let _ = sock.write_all(body.as_bytes()).await;
            let _ = sock.shutdown().await;
        });
    }
}
