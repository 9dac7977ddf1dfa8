//! The sidecar in this process, on its own runtime, through the same `app::run` as the binary.

use std::time::Duration;

use apportion::config::Config;
use apportion::shutdown::Shutdown;

use super::{brokers, free_port, http_get, unique, wait_until};

/// A configuration with its own topics, group and metrics port, publishing every 0.2 s and
/// writing snapshots every second.
pub fn config(name: &str, partitions: i32) -> Config {
    let mut cfg = Config::default();
    let id = unique(name);
    cfg.kafka.brokers = brokers();
    cfg.kafka.group_id = format!("{id}.group");
    cfg.kafka.input_topic = format!("{id}.events");
    cfg.kafka.weights_topic = format!("{id}.weights");
    cfg.kafka.state_topic = format!("{id}.state");
    cfg.kafka.dead_letter_topic = format!("{id}.dead-letter");
    cfg.kafka.control_topic = format!("{id}.control");
    cfg.kafka.topic_partitions = partitions;
    cfg.metrics.listen = format!("127.0.0.1:{}", free_port());
    cfg.publish.interval_seconds = 0.2;
    cfg.snapshot.interval_seconds = 1.0;
    cfg
}

/// A sidecar running in this process on its own runtime.
pub struct Sidecar {
    pub addr: String,
    shutdown: Shutdown,
    thread: Option<std::thread::JoinHandle<anyhow::Result<()>>>,
}

impl Sidecar {
    pub fn start(cfg: Config) -> Sidecar {
        let shutdown = Shutdown::new();
        let stop = shutdown.clone();
        let addr = cfg.metrics.listen.clone();
        let thread = std::thread::spawn(move || {
            let rt = tokio::runtime::Runtime::new()?;
            let served = apportion::telemetry::http::Served::new(std::sync::Arc::new(apportion::telemetry::Metrics::new()?));
            rt.block_on(apportion::app::run(cfg, served, stop.triggered()))
        });
        Sidecar { addr, shutdown, thread: Some(thread) }
    }

    pub fn wait_ready(&self, within: Duration) {
        let ok = wait_until(within, || http_get(&self.addr, "/readyz").map(|(s, _)| s == 200).unwrap_or(false));
        assert!(ok, "sidecar on {} not ready within {within:?}", self.addr);
    }

    pub fn get(&self, path: &str) -> (u16, String) {
        http_get(&self.addr, path).unwrap_or_else(|e| panic!("GET {path}: {e}"))
    }

    pub fn stop(mut self) {
        self.shutdown.trigger();
        if let Some(t) = self.thread.take() {
            t.join().expect("sidecar thread").expect("sidecar ran without error");
        }
    }
}

impl Drop for Sidecar {
    fn drop(&mut self) {
        self.shutdown.trigger();
    }
}
