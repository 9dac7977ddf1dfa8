//! Metrics (Prometheus text format), logs, and the HTTP endpoints that serve them.

pub mod http;

use prometheus::{
    Counter, CounterVec, Gauge, GaugeVec, Histogram, HistogramOpts, IntCounterVec, IntGauge, IntGaugeVec, Opts,
    Registry,
};

/// Every metric of the contract, registered once and shared by the pipeline and the HTTP side.
pub struct Metrics {
    pub registry: Registry,
    pub events: IntCounterVec,
    pub dead_letters: IntCounterVec,
    pub arm_pulls: IntCounterVec,
    pub arm_reward: CounterVec,
    pub arm_mean: GaugeVec,
    pub arm_width: GaugeVec,
    pub arm_weight: GaugeVec,
    pub arm_undecided: IntGaugeVec,
    pub arm_last_pull: GaugeVec,
    pub regret: GaugeVec,
    pub exploration: GaugeVec,
    pub split: IntCounterVec,
    pub weights_version: IntGaugeVec,
    pub weights_published: GaugeVec,
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
        let arm = &["experiment", "arm"];
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
            arm_pulls: reg!(IntCounterVec::new(Opts::new("apportion_arm_pulls_total", "Impressions applied to the arm"), arm)?),
            arm_reward: reg!(CounterVec::new(Opts::new("apportion_arm_reward_total", "Reward applied to the arm, in reward units"), arm)?),
            arm_mean: reg!(GaugeVec::new(Opts::new("apportion_arm_mean", "Estimated mean reward of the arm"), arm)?),
            arm_width: reg!(GaugeVec::new(Opts::new("apportion_arm_confidence_width", "Width of the two-sided 95% interval on the arm's mean"), arm)?),
            arm_weight: reg!(GaugeVec::new(Opts::new("apportion_arm_weight_ratio", "Traffic weight last published for the arm"), arm)?),
            arm_undecided: reg!(IntGaugeVec::new(Opts::new("apportion_arm_undecided", "1 when the arm's interval still reaches the leader's lower bound"), arm)?),
            arm_last_pull: reg!(GaugeVec::new(Opts::new("apportion_arm_last_pull_timestamp_seconds", "Event time of the arm's newest impression"), arm)?),
            regret: reg!(GaugeVec::new(Opts::new("apportion_experiment_regret_estimate", "Estimated cumulative pseudo-regret, in reward units"), exp)?),
            exploration: reg!(GaugeVec::new(Opts::new("apportion_experiment_exploration_ratio", "1 minus the leader's weight"), exp)?),
            split: reg!(IntCounterVec::new(Opts::new("apportion_experiment_split_total", "Events of an experiment seen on more than one input partition"), exp)?),
            weights_version: reg!(IntGaugeVec::new(Opts::new("apportion_weights_version", "Version of the experiment's last published weights"), exp)?),
            weights_published: reg!(GaugeVec::new(Opts::new("apportion_weights_published_timestamp_seconds", "When the experiment's weights were last published"), exp)?),
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

    /// Per-arm handles, looked up once instead of by label on every event.
    pub fn arm_handles(&self, experiment: &str, arm: &str) -> ArmHandles {
        let l = &[experiment, arm];
        ArmHandles {
            pulls: self.arm_pulls.with_label_values(l),
            reward: self.arm_reward.with_label_values(l),
            last_pull: self.arm_last_pull.with_label_values(l),
        }
    }

    /// Removes every series of an experiment that is retired or handed to another instance.
    pub fn remove_experiment(&self, experiment: &str, arms: &[String]) {
        for a in arms {
            let l = &[experiment, a.as_str()];
            let _ = self.arm_pulls.remove_label_values(l);
            let _ = self.arm_reward.remove_label_values(l);
            let _ = self.arm_mean.remove_label_values(l);
            let _ = self.arm_width.remove_label_values(l);
            let _ = self.arm_weight.remove_label_values(l);
            let _ = self.arm_undecided.remove_label_values(l);
            let _ = self.arm_last_pull.remove_label_values(l);
        }
        let l = &[experiment];
        let _ = self.regret.remove_label_values(l);
        let _ = self.exploration.remove_label_values(l);
        let _ = self.split.remove_label_values(l);
        let _ = self.weights_version.remove_label_values(l);
        let _ = self.weights_published.remove_label_values(l);
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

/// Cached handles of one arm's per-event series.
#[derive(Clone)]
pub struct ArmHandles {
    pub pulls: prometheus::IntCounter,
    pub reward: Counter,
    pub last_pull: Gauge,
}

/// Starts logging: text by default, JSON on request; `level` is a tracing filter.
pub fn init_logging(format: &str, level: &str) {
    let filter = tracing_subscriber::EnvFilter::try_new(level).unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr);
    let _ = if format == "json" { builder.json().try_init() } else { builder.try_init() };
}
