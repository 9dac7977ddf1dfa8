//! Metrics (Prometheus text format), logs, and the HTTP endpoints that serve them.

pub mod http;
pub mod names;
pub mod table;

use std::io::IsTerminal;

use prometheus::{GaugeVec, Histogram, HistogramOpts, IntCounterVec, IntGauge, IntGaugeVec, Opts, Registry};
use tracing_subscriber::EnvFilter;

/// The instance-wide metrics of the contract, registered once and shared by the pipeline and
/// the HTTP side. Per-experiment and per-arm series are not here: they are rendered from
/// [`table::Table`] when scraped, since at 100 000 arms metric objects would cost hundreds of MB.
pub struct Metrics {
    pub registry: Registry,
    pub events: IntCounterVec,
    pub dead_letters: IntCounterVec,
    pub split: IntCounterVec,
    pub unmatched_rewards: IntCounterVec,
    /// Rewards after their impression's attribution window: counted, not applied.
    pub late_rewards: IntCounterVec,
    /// Rewards of experiments with an attribution window credited at their own event time.
    pub unattributed_rewards: IntCounterVec,
    /// Control records read by this instance since it started, by outcome.
    pub control_records: IntCounterVec,
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
            events: reg!(IntCounterVec::new(Opts::new(names::EVENTS, "Events read, by kind and outcome (applied, duplicate, rejected, late)"), &["kind", "outcome"])?),
            dead_letters: reg!(IntCounterVec::new(Opts::new(names::DEAD_LETTERS, "Events sent to the dead-letter topic, by reason"), &["reason"])?),
            split: reg!(IntCounterVec::new(Opts::new(names::EXPERIMENT_SPLIT, "Events of an experiment seen on more than one input partition"), exp)?),
            unmatched_rewards: reg!(IntCounterVec::new(Opts::new(names::UNMATCHED_REWARDS, "Rewards refused for an arm with no impressions (dead-lettered unknown-arm)"), exp)?),
            late_rewards: reg!(IntCounterVec::new(
                Opts::new(names::LATE_REWARDS, "Rewards that came after their impression's attribution window closed; counted, not applied"),
                exp
            )?),
            unattributed_rewards: reg!(IntCounterVec::new(
                Opts::new(
                    names::UNATTRIBUTED_REWARDS,
                    "Rewards of an experiment with an attribution window that named no impression the sidecar could find; credited at their own event time"
                ),
                exp
            )?),
            control_records: reg!(IntCounterVec::new(
                Opts::new(names::CONTROL_RECORDS, "Control records read since start, by outcome (applied, stale, invalid)"),
                &["outcome"]
            )?),
            publish_latency: reg!(Histogram::with_opts(
                HistogramOpts::new(names::PUBLISH_LATENCY, "From the first event applied after a publish to the next publish of its experiment")
                    .buckets(vec![0.01, 0.05, 0.1, 0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 30.0, 60.0])
            )?),
            consumer_lag: reg!(IntGaugeVec::new(Opts::new(names::CONSUMER_LAG, "Messages between the consumer's position and the partition's end"), &["topic", "partition"])?),
            snapshot_time: reg!(GaugeVec::new(Opts::new(names::SNAPSHOT_TIME, "When the partition's last snapshot was written"), &["partition"])?),
            build_info: reg!(IntGaugeVec::new(Opts::new(names::BUILD_INFO, "Always 1; the version label names the build"), &["version"])?),
            ready: reg!(IntGauge::new(names::READY, "1 when partitions are assigned and their state restored")?),
            registry,
        };
        m.build_info.with_label_values(&[env!("CARGO_PKG_VERSION")]).set(1);
        Ok(m)
    }

    /// Removes the series of an experiment handed to another instance.
    pub fn remove_experiment(&self, experiment: &str) {
        let _ = self.split.remove_label_values(&[experiment]);
        let _ = self.unmatched_rewards.remove_label_values(&[experiment]);
        let _ = self.late_rewards.remove_label_values(&[experiment]);
        let _ = self.unattributed_rewards.remove_label_values(&[experiment]);
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

/// Levels a `log.level` directive may end in.
const LEVELS: [&str; 6] = ["trace", "debug", "info", "warn", "error", "off"];

/// Parses `log.level`, a tracing filter such as `info` or `info,rdkafka=warn`.
///
/// tracing reads a bare word as a target to log at every level, so a typo (`loud`) would be
/// accepted and silence everything else; here a directive without `=` must be a level, and one
/// with `=` must end in a level. The message says what would be valid.
pub fn log_filter(level: &str) -> Result<EnvFilter, String> {
    let valid = format!(
        "valid: a level ({}), or target=level directives separated by commas, e.g. \"info,rdkafka=warn\"",
        LEVELS.join(", ")
    );
    if level.trim().is_empty() {
        return Err(format!("log.level is empty; {valid}"));
    }
    for directive in level.split(',').map(str::trim).filter(|d| !d.is_empty()) {
        let tail = directive.rsplit_once('=').map_or(directive, |(_, l)| l);
        if !LEVELS.iter().any(|l| l.eq_ignore_ascii_case(tail.trim())) {
            let place = if directive == level.trim() { String::new() } else { format!(" in {directive:?}") };
            return Err(format!("log.level = {level:?}: {tail:?}{place} is not a level; {valid}"));
        }
    }
    EnvFilter::builder().parse(level).map_err(|e| format!("log.level = {level:?}: {e}; {valid}"))
}

/// Starts logging on stderr: text by default, JSON on request; `level` has passed
/// [`log_filter`] when the configuration was loaded. Colours only on a terminal: a log file or
/// a collector would get the escape codes as text.
pub fn init_logging(format: &str, level: &str) {
    let filter = log_filter(level).unwrap_or_else(|_| EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .with_ansi(std::io::stderr().is_terminal());
    let _ = if format == "json" { builder.json().try_init() } else { builder.try_init() };
}

#[cfg(test)]
mod tests {
    use super::log_filter;

    #[test]
    fn a_level_or_target_level_directives_are_accepted() {
        for ok in ["info", "WARN", "apportion=debug", "info,rdkafka=warn", "off"] {
            assert!(log_filter(ok).is_ok(), "{ok}");
        }
    }

    #[test]
    fn a_word_that_is_no_level_is_refused_naming_the_valid_ones() {
        for bad in ["loud", "apportion", "info,rdkafka=noisy", "", "  "] {
            let e = log_filter(bad).unwrap_err();
            assert!(e.contains("log.level") && e.contains("trace, debug, info, warn, error, off"), "{bad}: {e}");
        }
    }
}
