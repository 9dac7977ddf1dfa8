//! `GET /metrics`, `/healthz`, `/readyz` and `/experiments`.

use std::net::SocketAddr;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, RwLock};

use axum::extract::State;
use axum::http::{header, StatusCode};
use axum::response::IntoResponse;
use axum::routing::get;
use axum::Router;

use super::table::{self, Table};
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

    /// The `/metrics` text in chunks of about `chunk` bytes, each handed to `send` (false: stop).
    /// The table's read lock is taken for one chunk at a time, so neither a copy of the table
    /// nor the whole text is ever held, and a slow scraper never holds up the pipeline. A
    /// scrape is therefore not one instant: an experiment that changes during it may show
    /// figures of two publish rounds in different families.
    pub fn stream_metrics(&self, chunk: usize, send: &mut dyn FnMut(String) -> bool) {
        if !send(self.metrics.encode()) {
            return;
        }
        let mut buf = String::with_capacity(chunk + 4096);
        for f in 0..table::FAMILIES {
            let mut after: Option<String> = None;
            loop {
                let next = {
                    let t = self.table.read().unwrap_or_else(|p| p.into_inner());
                    t.write_family(f, after.as_deref(), &mut buf, chunk)
                };
                if buf.len() >= chunk && !send(std::mem::replace(&mut buf, String::with_capacity(chunk + 4096))) {
                    return;
                }
                match next {
                    Some(k) => after = Some(k),
                    None => break,
                }
            }
        }
        if !buf.is_empty() {
            send(buf);
        }
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
    // With 100 000 arms the text runs to about 50 MB: it is written off the async workers and
    // sent in chunks of 256 KiB as it is written, never whole in memory.
    let (tx, rx) = tokio::sync::mpsc::channel::<String>(4);
    tokio::task::spawn_blocking(move || s.stream_metrics(256 * 1024, &mut |c| tx.blocking_send(c).is_ok()));
    let chunks = futures_util::stream::unfold(rx, |mut rx| async move {
        rx.recv().await.map(|c| (Ok::<_, std::convert::Infallible>(axum::body::Bytes::from(c)), rx))
    });
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], axum::body::Body::from_stream(chunks))
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

#[cfg(test)]
mod tests {
    use std::collections::BTreeSet;

    use super::*;
    use crate::core::report::ArmReport;
    use crate::telemetry::names;
    use crate::telemetry::table::{ArmRow, ExperimentRow};

    #[test]
    fn a_scrape_holds_exactly_the_named_families() {
        let served = Served::new(Arc::new(Metrics::new().expect("metrics")));
        let m = &served.metrics;
        m.events.with_label_values(&["impression", "applied"]).inc();
        m.dead_letters.with_label_values(&["malformed"]).inc();
        m.split.with_label_values(&["e"]).inc();
        m.unmatched_rewards.with_label_values(&["e"]).inc();
        m.late_rewards.with_label_values(&["e"]).inc();
        m.unattributed_rewards.with_label_values(&["e"]).inc();
        m.control_records.with_label_values(&["applied"]).inc();
        m.publish_latency.observe(0.1);
        m.consumer_lag.with_label_values(&["t", "0"]).set(1);
        m.snapshot_time.with_label_values(&["0"]).set(1.0);
        let figures = ArmReport {
            pulls: 1,
            pending_pulls: 0,
            best_probability: 1.0,
            reward: 0.0,
            mean: 0.0,
            ci_low: 0.0,
            ci_high: 1.0,
            cs_low: 0.0,
            cs_high: 1.0,
            lift: None,
            undecided: false,
            last_pull_ms: Some(1),
            excess_rewards: 0.0,
        };
        served.table.write().expect("table").rows.insert(
            "e".into(),
            ExperimentRow {
                version: 1,
                exploration: Some(0.5),
                published_ms: Some(1),
                arms: vec![ArmRow { name: "a".into(), figures, weight: Some(1.0), removed: false }],
                ..ExperimentRow::default()
            },
        );
        let mut text = String::new();
        served.stream_metrics(1 << 20, &mut |chunk| {
            text.push_str(&chunk);
            true
        });
        let scraped: BTreeSet<&str> = text.lines().filter_map(|l| l.strip_prefix("# TYPE ")).filter_map(|l| l.split(' ').next()).collect();
        let named: BTreeSet<&str> = names::ALL.into_iter().collect();
        assert_eq!(scraped, named, "every family scraped is named in names.rs, and every name is scraped");
    }
}
