//! The sidecar put together: the HTTP endpoints and the stream, running until a signal.
//!
//! `run` is the one way in, for `apportion run`, the demo and the tests alike: the caller says
//! what stops it (SIGTERM or Ctrl-C from the binary, a test's own trigger), as the signal future
//! it passes in.

use std::future::Future;
use std::net::SocketAddr;
use std::sync::Arc;

use anyhow::Context as _;

use crate::config::Config;
use crate::shutdown::Shutdown;
use crate::telemetry::http::{self, Served};

/// Serves `/metrics`, `/readyz` and `/experiments` from `served` and runs the stream until
/// `signal` completes (or the stream fails); then stops consuming, publishes, snapshots and
/// closes the HTTP side.
pub async fn run(cfg: Config, served: Arc<Served>, signal: impl Future<Output = ()> + Send + 'static) -> anyhow::Result<()> {
    let shutdown = Shutdown::new();
    let watcher = {
        let shutdown = shutdown.clone();
        tokio::spawn(async move {
            signal.await;
            tracing::info!("shutdown requested");
            shutdown.trigger();
        })
    };
    let addr: SocketAddr = cfg
        .metrics
        .listen
        .parse()
        .with_context(|| format!("metrics.listen = {:?} is not an address (host:port)", cfg.metrics.listen))?;
    let (local, endpoints) = http::serve(addr, served.clone(), shutdown.clone()).await?;
    tracing::info!("metrics on http://{local}/metrics");
    let result = crate::stream::run(cfg, served, shutdown.clone()).await;
    shutdown.trigger();
    watcher.abort();
    let _ = endpoints.await;
    result
}
