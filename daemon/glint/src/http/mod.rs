//! The daemon's HTTP surface on `metrics.listen`, served with axum: `/metrics` (the exposition of
//! `exposition.rs`), `/healthz` (200 or 503, one line per instrument), `/status` (the JSON of `status.rs`)
//! and `/` (the status page, `page.html`, embedded in the binary; its script reads `/status`). Read-only and
//! unauthenticated, like any metrics endpoint: keep it on loopback or a management network.

pub(crate) mod exposition;
pub(crate) mod status;

use std::sync::Arc;
use std::time::{Duration, Instant};

use axum::Router;
use axum::extract::State;
use axum::http::{StatusCode, header};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use prometheus_client::registry::Registry;
use tokio::net::TcpListener;
use tokio_util::sync::CancellationToken;

use crate::desk::Desk;
use crate::metrics::Metrics;

/// The status page.
const PAGE: &str = include_str!("page.html");

/// What the handlers read.
#[derive(Clone)]
pub(crate) struct Surface {
    metrics: Arc<Metrics>,
    desk: Arc<Desk>,
    registry: Arc<Registry>,
    started: Instant,
    silent_after: Duration,
}

impl Surface {
    /// The surface of a running daemon.
    pub(crate) fn new(metrics: Arc<Metrics>, desk: Arc<Desk>, silent_after: Duration) -> Self {
        let registry = Arc::new(exposition::registry(metrics.clone(), desk.clone()));
        Self {
            metrics,
            desk,
            registry,
            started: Instant::now(),
            silent_after,
        }
    }
}

/// The routes.
pub(crate) fn router(surface: Surface) -> Router {
    Router::new()
        .route("/", get(page))
        .route("/metrics", get(metrics))
        .route("/healthz", get(healthz))
        .route("/status", get(status_json))
        .with_state(surface)
}

/// Serves until `stop` is cancelled.
pub(crate) async fn serve(listener: TcpListener, surface: Surface, stop: CancellationToken) {
    let served = axum::serve(listener, router(surface))
        .with_graceful_shutdown(async move { stop.cancelled().await })
        .await;
    if let Err(e) = served {
        tracing::warn!(error = %e, "the HTTP surface stopped");
    }
}

async fn page() -> Response {
    (
        [
            (header::CONTENT_TYPE, "text/html; charset=utf-8"),
            (header::CACHE_CONTROL, "no-store"),
        ],
        PAGE,
    )
        .into_response()
}

async fn metrics(State(s): State<Surface>) -> Response {
    match exposition::text(&s.registry) {
        Ok(body) => (
            [(
                header::CONTENT_TYPE,
                "application/openmetrics-text; version=1.0.0; charset=utf-8",
            )],
            body,
        )
            .into_response(),
        Err(_) => (
            StatusCode::INTERNAL_SERVER_ERROR,
            "metrics could not be encoded\n",
        )
            .into_response(),
    }
}

async fn healthz(State(s): State<Surface>) -> Response {
    let (ok, text) = status::health_text(&s.metrics, s.silent_after.as_secs_f64());
    let code = if ok {
        StatusCode::OK
    } else {
        StatusCode::SERVICE_UNAVAILABLE
    };
    (code, [(header::CONTENT_TYPE, "text/plain; charset=utf-8")], text).into_response()
}

async fn status_json(State(s): State<Surface>) -> Response {
    let st = status::build(
        &s.metrics,
        &s.desk,
        s.started.elapsed().as_secs_f64(),
        s.silent_after.as_secs_f64(),
    );
    ([(header::CACHE_CONTROL, "no-store")], axum::Json(st)).into_response()
}
