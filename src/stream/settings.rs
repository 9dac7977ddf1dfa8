//! What the stream needs of the configuration, resolved once at start.

use std::collections::HashMap;
use std::sync::Arc;
use std::time::Duration;

use crate::config::{Config, ExperimentConfig, ResolvedExperiment};
use crate::control::Registry;
use crate::core::{ExperimentSpec, Lifecycle};

/// The definition an experiment runs under.
pub struct Defined {
    pub spec: ExperimentSpec,
    pub arms: Vec<String>,
    pub lifecycle: Lifecycle,
    /// The control record's change time (0 for the configuration's definitions).
    pub changed_at_ms: i64,
}

/// Settings the pipeline needs, resolved from configuration once.
pub struct Settings {
    pub input_topic: String,
    pub weights_topic: String,
    pub control_topic: String,
    pub state_topic: String,
    pub dead_letter_topic: String,
    /// How experiments seen for the first time are run; `None` when they must be declared.
    pub default_spec: Option<ExperimentSpec>,
    pub declared: HashMap<String, ResolvedExperiment>,
    /// The same experiments as the file declares them (what a record concluding one starts
    /// from, `control::conclusion`).
    pub declared_as_written: HashMap<String, ExperimentConfig>,
    /// Definitions from the control topic; they override `declared`.
    pub control: Arc<Registry>,
    /// Experiments created on first sight retire after this long without an impression, ms.
    pub idle_retire_ms: Option<i64>,
    /// How long a retired experiment stays in snapshots, ms.
    pub retire_grace_ms: i64,
    pub max_experiments: usize,
    pub duplicate_window: usize,
    pub remembered_impressions: usize,
    pub max_event_bytes: usize,
    pub max_skew_ms: i64,
    pub publish_interval: Duration,
    pub heartbeat: Duration,
    pub min_change: f64,
    pub snapshot_interval: Duration,
    pub snapshot_part_bytes: usize,
}

impl Settings {
    pub fn from_config(cfg: &Config, control: Arc<Registry>) -> Result<Settings, String> {
        let default_spec = if cfg.defaults.auto_create { Some(cfg.resolve_default_spec()?) } else { None };
        Ok(Settings {
            input_topic: cfg.kafka.input_topic.clone(),
            weights_topic: cfg.kafka.weights_topic.clone(),
            control_topic: cfg.kafka.control_topic.clone(),
            state_topic: cfg.kafka.state_topic.clone(),
            dead_letter_topic: cfg.kafka.dead_letter_topic.clone(),
            default_spec,
            declared: cfg.resolved().into_iter().map(|r| (r.id.clone(), r)).collect(),
            declared_as_written: cfg.experiments.iter().map(|e| (e.id.clone(), e.clone())).collect(),
            control,
            idle_retire_ms: cfg.defaults.idle_retire_seconds.map(|s| (s * 1000.0) as i64),
            retire_grace_ms: (cfg.defaults.retire_grace_seconds * 1000.0) as i64,
            max_experiments: cfg.limits.experiments,
            duplicate_window: cfg.limits.duplicate_window,
            remembered_impressions: cfg.limits.remembered_impressions,
            max_event_bytes: cfg.limits.max_event_bytes,
            max_skew_ms: (cfg.limits.max_clock_skew_seconds * 1000.0) as i64,
            publish_interval: Duration::from_secs_f64(cfg.publish.interval_seconds),
            heartbeat: Duration::from_secs_f64(cfg.publish.heartbeat_seconds),
            min_change: cfg.publish.min_change,
            snapshot_interval: Duration::from_secs_f64(cfg.snapshot.interval_seconds),
            snapshot_part_bytes: cfg.snapshot.part_bytes,
        })
    }

    /// The definition an experiment runs under: the control topic's, else its declaration in
    /// the file, else the default for experiments seen for the first time; `None` when it is
    /// none of these and may not be created.
    pub fn definition_of(&self, experiment: &str) -> Option<Defined> {
        if let Some(c) = self.control.get(experiment) {
            return Some(Defined {
                spec: c.resolved.spec.clone(),
                arms: c.resolved.arms.clone(),
                lifecycle: c.lifecycle.clone(),
                changed_at_ms: c.changed_at_ms(),
            });
        }
        let (spec, arms) = match self.declared.get(experiment) {
            Some(r) => (r.spec.clone(), r.arms.clone()),
            None => (self.default_spec.clone()?, Vec::new()),
        };
        Some(Defined { spec, arms, lifecycle: Lifecycle::default(), changed_at_ms: 0 })
    }

    /// Whether the experiment has a definition (file or control topic), as opposed to one
    /// created on first sight under the defaults.
    pub fn is_defined(&self, experiment: &str) -> bool {
        self.declared.contains_key(experiment) || self.control.get(experiment).is_some()
    }
}
