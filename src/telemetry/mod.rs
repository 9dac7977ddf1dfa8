//! Metrics (Prometheus text format), logs, and the HTTP endpoints that serve them.

pub mod http;
pub mod table;

use prometheus::{GaugeVec, Histogram, HistogramOpts, IntCounterVec, IntGauge, IntGaugeVec, Opts, Registry};

/// The instance-wide metrics of the contract, registered once and shared by the pipeline and
/// the HTTP side. Per-experiment and per-arm series are not here: they are rendered from
/// [`table::Table`] when scraped, since at 100 000 arms metric objects would cost hundreds of MB.
pub struct Metrics {
    pub registry: Registry,
    pub events: IntCounterVec,
    pub dead_letters: IntCounterVec,
    pub split: IntCounterVec,
    pub unmatched_rewards: IntCounterVec,
    pub publish_latency: Histogram,
    pub consumer_lag: IntGaugeVec,
    pub snapshot_time: GaugeVec,
    pub build_info: IntGaugeVec,
    /// 1 when /readyz answers 200; lets alerts tell "quiet" from "not serving".
    pub ready: IntGauge,
}

impl Metrics {
    pub fn new() -> Result<Metrics, prometheus::Error> {
        let registry = Registry::new();
        let exp = &["experiment"];
        macro_rules! reg {
            ($m:expr) => {{
                let m = $m;
                registry.register(Box::new(m.clone()))?;
                m
            }};
        }
        let m = Metrics {
            events: reg!(IntCounterVec::new(Opts::new("apportion_events_total", "Events read, by kind and outcome (applied, duplicate, rejected)"), &["kind", "outcome"])?),
            dead_letters: reg!(IntCounterVec::new(Opts::new("apportion_dead_letters_total", "Events sent to the dead-letter topic, by reason"), &["reason"])?),
            split: reg!(IntCounterVec::new(Opts::new("apportion_experiment_split_total", "Events of an experiment seen on more than one input partition"), exp)?),
            unmatched_rewards: reg!(IntCounterVec::new(Opts::new("apportion_unmatched_rewards_total", "Rewards refused for an arm with no impressions (dead-lettered unknown-arm)"), exp)?),
            publish_latency: reg!(Histogram::with_opts(
                HistogramOpts::new("apportion_publish_latency_seconds", "From the first event applied after a publish to the next publish of its experiment")
                    .buckets(vec![0.01, 0.05, 0.1, 0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 30.0, 60.0])
            )?),
            consumer_lag: reg!(IntGaugeVec::new(Opts::new("apportion_consumer_lag_messages", "Messages between the consumer's position and the partition's end"), &["topic", "partition"])?),
            snapshot_time: reg!(GaugeVec::new(Opts::new("apportion_state_snapshot_timestamp_seconds", "When the partition's last snapshot was written"), &["partition"])?),
            build_info: reg!(IntGaugeVec::new(Opts::new("apportion_build_info", "Always 1; the version label names the build"), &["version"])?),
            ready: reg!(IntGauge::new("apportion_ready", "1 when partitions are assigned and their state restored")?),
            registry,
        };
        m.build_info.with_label_values(&[env!("CARGO_PKG_VERSION")]).set(1);
        Ok(m)
    }

    /// Removes the series of an experiment handed to another instance.
    pub fn remove_experiment(&self, experiment: &str) {
        let _ = self.split.remove_label_values(&[experiment]);
        let _ = self.unmatched_rewards.remove_label_values(&[experiment]);
    }

    pub fn encode(&self) -> String {
        let mut out = String::new();
        let encoder = prometheus::TextEncoder::new();
        if let Err(e) = encoder.encode_utf8(&self.registry.gather(), &mut out) {
            tracing::warn!("cannot encode metrics: {e}");
        }
        out
    }
}

/// Starts logging: text by default, JSON on request; `level` is a tracing filter.
pub fn init_logging(format: &str, level: &str) {
    let filter = tracing_subscriber::EnvFilter::try_new(level).unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr);
    let _ = if format == "json" { builder.json().try_init() } else { builder.try_init() };
}
