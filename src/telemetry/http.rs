//! `GET /metrics`, `/healthz`, `/readyz` and `/experiments`.

use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, RwLock};

use axum::extract::State;
use axum::http::{header, StatusCode};
use axum::response::IntoResponse;
use axum::routing::get;
use axum::Router;

use super::Metrics;
use crate::shutdown::Shutdown;

/// What the HTTP side reads; the pipeline writes it.
pub struct Served {
    pub metrics: Arc<Metrics>,
    pub ready: AtomicBool,
    /// JSON of the experiments this instance holds, refreshed on every publish round.
    pub experiments: RwLock<String>,
}

impl Served {
    pub fn new(metrics: Arc<Metrics>) -> Arc<Served> {
        Arc::new(Served { metrics, ready: AtomicBool::new(false), experiments: RwLock::new("{}".into()) })
    }

    pub fn set_ready(&self, ready: bool) {
        self.ready.store(ready, Ordering::SeqCst);
        self.metrics.ready.set(i64::from(ready));
    }

    pub fn is_ready(&self) -> bool {
        self.ready.load(Ordering::SeqCst)
    }
}

/// Binds `addr` now (so a taken port is an error at start) and serves until shutdown.
pub async fn serve(addr: SocketAddr, served: Arc<Served>, shutdown: Shutdown) -> anyhow::Result<(SocketAddr, tokio::task::JoinHandle<()>)> {
    let listener = tokio::net::TcpListener::bind(addr)
        .await
        .map_err(|e| anyhow::anyhow!("cannot listen on metrics.listen = {addr}: {e}"))?;
    let local = listener.local_addr()?;
    let app = Router::new()
        .route("/metrics", get(metrics))
        .route("/healthz", get(|| async { "ok\n" }))
        .route("/readyz", get(readyz))
        .route("/experiments", get(experiments))
        .with_state(served);
    let handle = tokio::spawn(async move {
        let stop = async move { shutdown.wait().await };
        if let Err(e) = axum::serve(listener, app).with_graceful_shutdown(stop).await {
            tracing::error!("metrics server stopped: {e}");
        }
    });
    Ok((local, handle))
}

async fn metrics(State(s): State<Arc<Served>>) -> impl IntoResponse {
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], s.metrics.encode())
}

async fn readyz(State(s): State<Arc<Served>>) -> impl IntoResponse {
    if s.is_ready() {
        (StatusCode::OK, "ready\n")
    } else {
        (StatusCode::SERVICE_UNAVAILABLE, "not ready: partitions not assigned or state not restored\n")
    }
}

async fn experiments(State(s): State<Arc<Served>>) -> impl IntoResponse {
    let body = s.experiments.read().map(|g| g.clone()).unwrap_or_else(|_| "{}".into());
    ([(header::CONTENT_TYPE, "application/json")], body)
}
