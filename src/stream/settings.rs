//! What the stream needs of the configuration, resolved once at start.

use std::collections::HashMap;
use std::time::Duration;

use crate::config::{Config, ResolvedExperiment};
use crate::core::ExperimentSpec;

/// Settings the pipeline needs, resolved from configuration once.
pub struct Settings {
    pub input_topic: String,
    pub weights_topic: String,
    pub state_topic: String,
    pub dead_letter_topic: String,
    /// How experiments seen for the first time are run; `None` when they must be declared.
    pub default_spec: Option<ExperimentSpec>,
    pub declared: HashMap<String, ResolvedExperiment>,
    pub max_experiments: usize,
    pub duplicate_window: usize,
    pub max_event_bytes: usize,
    pub max_skew_ms: i64,
    pub publish_interval: Duration,
    pub heartbeat: Duration,
    pub min_change: f64,
    pub snapshot_interval: Duration,
    pub snapshot_part_bytes: usize,
}

impl Settings {
    pub fn from_config(cfg: &Config) -> Result<Settings, String> {
        let default_spec = if cfg.defaults.auto_create { Some(cfg.resolve_default_spec()?) } else { None };
        Ok(Settings {
            input_topic: cfg.kafka.input_topic.clone(),
            weights_topic: cfg.kafka.weights_topic.clone(),
            state_topic: cfg.kafka.state_topic.clone(),
            dead_letter_topic: cfg.kafka.dead_letter_topic.clone(),
            default_spec,
            declared: cfg.resolved().into_iter().map(|r| (r.id.clone(), r)).collect(),
            max_experiments: cfg.limits.experiments,
            duplicate_window: cfg.limits.duplicate_window,
            max_event_bytes: cfg.limits.max_event_bytes,
            max_skew_ms: (cfg.limits.max_clock_skew_seconds * 1000.0) as i64,
            publish_interval: Duration::from_secs_f64(cfg.publish.interval_seconds),
            heartbeat: Duration::from_secs_f64(cfg.publish.heartbeat_seconds),
            min_change: cfg.publish.min_change,
            snapshot_interval: Duration::from_secs_f64(cfg.snapshot.interval_seconds),
            snapshot_part_bytes: cfg.snapshot.part_bytes,
        })
    }

    /// The definition an experiment runs under: its declaration, or the default for experiments
    /// seen for the first time; `None` when it is neither declared nor may be created.
    pub fn spec_of(&self, experiment: &str) -> Option<(ExperimentSpec, Vec<String>)> {
        match self.declared.get(experiment) {
            Some(r) => Some((r.spec.clone(), r.arms.clone())),
            None => self.default_spec.clone().map(|s| (s, Vec::new())),
        }
    }
}
