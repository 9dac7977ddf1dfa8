//! `GET /metrics`, `/healthz`, `/readyz` and `/experiments`.

use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, RwLock};

use axum::extract::State;
use axum::http::{header, StatusCode};
use axum::response::IntoResponse;
use axum::routing::get;
use axum::Router;

use super::table::Table;
use super::Metrics;
use crate::shutdown::Shutdown;

/// What the HTTP side reads; the pipeline writes it.
pub struct Served {
    pub metrics: Arc<Metrics>,
    pub ready: AtomicBool,
    /// The experiments this instance holds, refreshed on every publish round.
    pub table: RwLock<Table>,
}

impl Served {
    pub fn new(metrics: Arc<Metrics>) -> Arc<Served> {
        Arc::new(Served { metrics, ready: AtomicBool::new(false), table: RwLock::new(Table::default()) })
    }

    pub fn set_ready(&self, ready: bool) {
        self.ready.store(ready, Ordering::SeqCst);
        self.metrics.ready.set(i64::from(ready));
    }

    pub fn is_ready(&self) -> bool {
        self.ready.load(Ordering::SeqCst)
    }

    /// The whole `/metrics` text: instance-wide metrics, then every experiment's and arm's.
    pub fn render_metrics(&self) -> String {
        let mut out = self.metrics.encode();
        match self.table.read() {
            Ok(t) => t.write_prometheus(&mut out),
            Err(p) => p.into_inner().write_prometheus(&mut out),
        }
        out
    }

    /// The `/experiments` JSON.
    pub fn experiments_json(&self) -> String {
        match self.table.read() {
            Ok(t) => t.to_json(),
            Err(p) => p.into_inner().to_json(),
        }
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
    // With 100 000 arms the text runs to tens of MB: rendered off the async workers.
    let body = tokio::task::spawn_blocking(move || s.render_metrics()).await.unwrap_or_default();
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], body)
}

async fn readyz(State(s): State<Arc<Served>>) -> impl IntoResponse {
    if s.is_ready() {
        (StatusCode::OK, "ready\n")
    } else {
        (StatusCode::SERVICE_UNAVAILABLE, "not ready: partitions not assigned or state not restored\n")
    }
}

async fn experiments(State(s): State<Arc<Served>>) -> impl IntoResponse {
    let body = tokio::task::spawn_blocking(move || s.experiments_json()).await.unwrap_or_default();
    ([(header::CONTENT_TYPE, "application/json")], body)
}
