//! Configuration: a TOML file plus environment overrides for every key
//! (`APPORTION_<SECTION>__<KEY>`, e.g. `APPORTION_KAFKA__BROKERS=10.0.0.5:9092`).
//!
//! Loading checks everything up front, so a bad key stops the process before anything starts;
//! the error names the key, the value and what would be valid.

use std::collections::BTreeMap;
use std::fmt;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::core::decision::Settle;
use crate::core::{Bounds, Experiment, ExperimentSpec, PolicyName, PolicySpec, RewardModel, Window};
use crate::event::valid_name;

/// Default location of the configuration file.
pub const DEFAULT_PATH: &str = "config/apportion.toml";

/// Where a configuration was read from; `check` prints it and `run` logs it at start, so that
/// nobody has to guess which file (if any) is in force.
#[derive(Clone, Debug, PartialEq)]
pub enum Source {
    File(PathBuf),
    /// No file was named and the default one does not exist.
    BuiltIn,
}

impl fmt::Display for Source {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Source::File(p) => write!(f, "configuration: {}", p.display())?,
            Source::BuiltIn => write!(f, "no configuration file ({DEFAULT_PATH} does not exist); using built-in defaults")?,
        }
        let mut overrides: Vec<String> = std::env::vars_os()
            .filter_map(|(k, _)| k.into_string().ok())
            .filter(|k| k.starts_with("APPORTION_"))
            .collect();
        overrides.sort();
        if !overrides.is_empty() {
            write!(f, "; overridden by {}", overrides.join(", "))?;
        }
        Ok(())
    }
}

/// A configuration problem, for people: where, what, and what would be valid.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct ConfigError(pub String);

#[derive(Clone, Debug, Default, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Config {
    pub kafka: KafkaConfig,
    pub publish: PublishConfig,
    pub snapshot: SnapshotConfig,
    pub metrics: MetricsConfig,
    pub limits: Limits,
    pub log: LogConfig,
    pub defaults: Defaults,
    pub experiments: Vec<ExperimentConfig>,
    /// Keys read under an old name, each with the warning that names the new one.
    #[serde(skip)]
    pub renamed: Vec<String>,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct KafkaConfig {
    /// Bootstrap servers, comma-separated host:port.
    pub brokers: String,
    pub group_id: String,
    pub input_topic: String,
    pub weights_topic: String,
    pub state_topic: String,
    pub dead_letter_topic: String,
    /// Experiment definitions changed at run time (`apportion experiment`); compacted.
    pub control_topic: String,
    /// Create missing topics at start (weights and state compacted).
    pub create_topics: bool,
    /// Partitions of topics created at start.
    pub topic_partitions: i32,
    pub replication_factor: i32,
    /// librdkafka properties passed through verbatim (security, SASL, TLS, tuning).
    pub client: BTreeMap<String, String>,
}

impl Default for KafkaConfig {
    fn default() -> Self {
        KafkaConfig {
            brokers: "127.0.0.1:9092".into(),
            group_id: "apportion".into(),
            input_topic: "apportion.events".into(),
            weights_topic: "apportion.weights".into(),
            state_topic: "apportion.state".into(),
            dead_letter_topic: "apportion.dead-letter".into(),
            control_topic: "apportion.control".into(),
            create_topics: true,
            topic_partitions: 6,
            replication_factor: 1,
            client: BTreeMap::new(),
        }
    }
}

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct PublishConfig {
    /// Seconds between weight computations.
    pub interval_seconds: f64,
    /// Publish only when some weight moved at least this much (or on the heartbeat).
    pub min_change: f64,
    /// Publish at least this often, in seconds, even without change.
    pub heartbeat_seconds: f64,
}

impl Default for PublishConfig {
    fn default() -> Self {
        PublishConfig { interval_seconds: 1.0, min_change: 0.001, heartbeat_seconds: 60.0 }
    }
}

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct SnapshotConfig {
    pub interval_seconds: f64,
    /// Largest state-topic message; larger snapshots are written in parts of this size.
    pub part_bytes: usize,
}

impl Default for SnapshotConfig {
    fn default() -> Self {
        SnapshotConfig { interval_seconds: 10.0, part_bytes: 512 * 1024 }
    }
}

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct MetricsConfig {
    /// Address of /metrics, /healthz, /readyz and /experiments.
    pub listen: String,
}

impl Default for MetricsConfig {
    fn default() -> Self {
        MetricsConfig { listen: "127.0.0.1:9464".into() }
    }
}

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Limits {
    /// Experiments one instance holds; events of further experiments are dead-lettered.
    pub experiments: usize,
    /// Arms per experiment.
    pub arms_per_experiment: usize,
    /// Event ids remembered per input partition for dropping duplicates (at least the newest
    /// this many, at most twice as many: see `stream::recent`).
    pub duplicate_window: usize,
    /// Impressions of experiments with an attribution window whose event time is remembered
    /// per input partition (at least the newest this many, at most twice as many), so that a
    /// reward naming only its `impression_id` is credited to its impression's time. 0 turns
    /// it off; rewards that carry `impression_ts_ms` need none of it.
    pub remembered_impressions: usize,
    /// How far in the future (seconds) an event time may lie.
    pub max_clock_skew_seconds: f64,
    /// Largest event accepted, in bytes.
    pub max_event_bytes: usize,
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            experiments: 10_000,
            arms_per_experiment: 64,
            duplicate_window: 10_000,
            remembered_impressions: 50_000,
            max_clock_skew_seconds: 300.0,
            max_event_bytes: 16 * 1024,
        }
    }
}

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct LogConfig {
    /// `text` or `json`.
    pub format: String,
    /// A tracing filter, e.g. `info` or `apportion=debug`.
    pub level: String,
}

impl Default for LogConfig {
    fn default() -> Self {
        LogConfig { format: "text".into(), level: "info".into() }
    }
}

/// How experiments seen for the first time are run.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Defaults {
    /// Create an experiment on its first event; when off, events of undeclared experiments are
    /// dead-lettered.
    pub auto_create: bool,
    pub policy: PolicySpec,
    pub reward: RewardModel,
    pub bounds: Bounds,
    /// The old name of `bounds`, read for one release (see [`Config::rename_old_keys`]).
    #[serde(skip_serializing)]
    pub guardrails: Option<Bounds>,
    pub half_life_seconds: Option<f64>,
    /// Attribution window: impressions count in the estimates once they are this many seconds
    /// old, with the rewards that came for them meanwhile; later rewards are counted as late
    /// and not applied. Off when unset (README, "Rewards that arrive late").
    pub attribution_window_seconds: Option<f64>,
    /// When an experiment counts as settled (README, "Is it done?").
    pub settle: Settle,
    /// Experiments created on first sight are retired after this many seconds without an
    /// impression (event time against the clock); off when unset.
    pub idle_retire_seconds: Option<f64>,
    /// How long a retired experiment's statistics stay in snapshots (and its events are
    /// refused) before they are dropped.
    pub retire_grace_seconds: f64,
}

impl Default for Defaults {
    fn default() -> Self {
        Defaults {
            auto_create: true,
            policy: PolicySpec::new(PolicyName::Thompson),
            reward: RewardModel::Bernoulli,
            bounds: Bounds { floor: 0.01, ..Bounds::default() },
            guardrails: None,
            half_life_seconds: None,
            attribution_window_seconds: None,
            settle: Settle::default(),
            idle_retire_seconds: None,
            retire_grace_seconds: 86_400.0,
        }
    }
}

/// A declared experiment.
#[derive(Clone, Debug, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ExperimentConfig {
    pub id: String,
    #[serde(default)]
    pub arms: Vec<String>,
    pub policy: Option<PolicySpec>,
    pub reward: Option<RewardModel>,
    pub bounds: Option<Bounds>,
    /// The old name of `bounds`, read for one release (see [`Config::rename_old_keys`]).
    #[serde(default, skip_serializing)]
    pub guardrails: Option<Bounds>,
    pub half_life_seconds: Option<f64>,
    /// Over `defaults.attribution_window_seconds`.
    pub attribution_window_seconds: Option<f64>,
    /// `false`: impressions of arms not in `arms` are dead-lettered `unknown-arm`.
    pub accept_new_arms: Option<bool>,
    /// The arm the others' lift is measured against; one of `arms`.
    pub control_arm: Option<String>,
    /// Over `defaults.settle`, as a whole.
    pub settle: Option<Settle>,
}

/// An experiment as it will run: declared settings over the defaults.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ResolvedExperiment {
    pub id: String,
    pub arms: Vec<String>,
    pub spec: ExperimentSpec,
}

impl Config {
    /// Reads `path` (when it exists, or always when `required`) and the environment.
    pub fn load(path: &Path, required: bool) -> Result<Config, ConfigError> {
        let mut builder = config::Config::builder();
        if path.is_dir() {
            return Err(ConfigError(format!(
                "configuration file {} is a directory; pass --config with a TOML file, e.g. {}",
                path.display(),
                path.join("apportion.toml").display()
            )));
        }
        if required && !path.exists() {
            return Err(ConfigError(format!(
                "configuration file {} does not exist; pass --config FILE (an example is config/apportion.toml)",
                path.display()
            )));
        }
        if !path.exists() {
            return Self::finish(builder, "built-in defaults with the environment");
        }
        builder = builder.add_source(config::File::from(path).format(config::FileFormat::Toml));
        Self::finish(builder, &path.display().to_string())
    }

    /// Parses TOML text (the demo's embedded configuration) and the environment.
    pub fn from_toml(text: &str, name: &str) -> Result<Config, ConfigError> {
        let builder = config::Config::builder().add_source(config::File::from_str(text, config::FileFormat::Toml));
        Self::finish(builder, name)
    }

    fn finish(builder: config::ConfigBuilder<config::builder::DefaultState>, name: &str) -> Result<Config, ConfigError> {
        let built = builder
            .add_source(
                config::Environment::with_prefix("APPORTION")
                    .prefix_separator("_")
                    .separator("__")
                    .try_parsing(true),
            )
            .build()
            .map_err(|e| ConfigError(format!("{name}: {}", dotted(e))))?;
        let mut cfg: Config = built.try_deserialize().map_err(|e| ConfigError(format!("{name}: {}", dotted(e))))?;
        // librdkafka property names use dots and never underscores; an environment variable
        // cannot hold dots, so APPORTION_KAFKA__CLIENT__SASL_PASSWORD means sasl.password.
        cfg.kafka.client = std::mem::take(&mut cfg.kafka.client)
            .into_iter()
            .map(|(k, v)| (k.replace('_', "."), v))
            .collect();
        cfg.rename_old_keys().map_err(|e| ConfigError(format!("{name}: {e}")))?;
        cfg.validate().map_err(|e| ConfigError(format!("{name}: {e}")))?;
        Ok(cfg)
    }

    /// Moves settings given under an old key name to the new one, noting a warning for each
    /// (`check` prints them, `run` logs them); both names at once is an error. `guardrails`
    /// became `bounds`, since the trade keeps "guardrail" for metrics that must not get worse;
    /// the old name is read for one release.
    pub fn rename_old_keys(&mut self) -> Result<(), String> {
        let warn = |at: &str| format!("{at}.guardrails is the old name of {at}.bounds; it is read for this release only: rename the key");
        if let Some(old) = self.defaults.guardrails.take() {
            if self.defaults.bounds != Defaults::default().bounds {
                return Err("defaults.bounds and defaults.guardrails (its old name) are both given; keep bounds only".into());
            }
            self.defaults.bounds = old;
            self.renamed.push(warn("defaults"));
        }
        for (i, e) in self.experiments.iter_mut().enumerate() {
            if let Some(old) = e.guardrails.take() {
                if e.bounds.is_some() {
                    return Err(format!("experiments[{i}].bounds and experiments[{i}].guardrails (its old name) are both given; keep bounds only"));
                }
                e.bounds = Some(old);
                self.renamed.push(warn(&format!("experiments[{i}]")));
            }
        }
        Ok(())
    }

    /// Checks every value; the message names the key.
    pub fn validate(&self) -> Result<(), String> {
        let k = &self.kafka;
        if k.brokers.trim().is_empty() {
            return Err("kafka.brokers is empty; give host:port[,host:port…]".into());
        }
        for (key, v) in [
            ("kafka.group_id", &k.group_id),
            ("kafka.input_topic", &k.input_topic),
            ("kafka.weights_topic", &k.weights_topic),
            ("kafka.state_topic", &k.state_topic),
            ("kafka.dead_letter_topic", &k.dead_letter_topic),
            ("kafka.control_topic", &k.control_topic),
        ] {
            if v.is_empty() || v.len() > 249 || !v.chars().all(|c| c.is_ascii_alphanumeric() || "._-".contains(c)) {
                return Err(format!("{key} = {v:?}; a Kafka name of 1–249 characters from [A-Za-z0-9._-]"));
            }
        }
        if k.topic_partitions < 1 || k.replication_factor < 1 {
            return Err("kafka.topic_partitions and kafka.replication_factor must be ≥ 1".into());
        }
        for key in ["group.id", "bootstrap.servers", "enable.auto.commit"] {
            if k.client.contains_key(key) {
                return Err(format!("kafka.client.\"{key}\" is set by apportion itself; use the kafka section's own keys"));
            }
        }
        let mut probe = rdkafka::ClientConfig::new();
        for (key, v) in &k.client {
            probe.set(key, v);
        }
        if let Err(e) = probe.create_native_config() {
            return Err(match e {
                rdkafka::error::KafkaError::ClientConfig(_, desc, key, value) => {
                    let (shown, desc) = if is_secret(&key) && !value.is_empty() {
                        ("<redacted>".to_string(), desc.replace(&value, "<redacted>"))
                    } else {
                        (format!("{value:?}"), desc)
                    };
                    format!("kafka.client.\"{key}\" = {shown}: {desc}")
                }
                other => format!("kafka.client: {other}"),
            });
        }
        let positive = |key: &str, v: f64| {
            if v.is_finite() && v > 0.0 {
                Ok(())
            } else {
                Err(format!("{key} = {v}; it must be a number of seconds > 0"))
            }
        };
        positive("publish.interval_seconds", self.publish.interval_seconds)?;
        positive("publish.heartbeat_seconds", self.publish.heartbeat_seconds)?;
        positive("snapshot.interval_seconds", self.snapshot.interval_seconds)?;
        if let Some(idle) = self.defaults.idle_retire_seconds {
            positive("defaults.idle_retire_seconds", idle)?;
        }
        if !(self.defaults.retire_grace_seconds.is_finite() && self.defaults.retire_grace_seconds >= 0.0) {
            return Err(format!("defaults.retire_grace_seconds = {}; it must be a number of seconds ≥ 0", self.defaults.retire_grace_seconds));
        }
        if !(4096..=64 * 1024 * 1024).contains(&self.snapshot.part_bytes) {
            return Err(format!(
                "snapshot.part_bytes = {}; it must be between 4096 and 67108864, and below the broker's message.max.bytes",
                self.snapshot.part_bytes
            ));
        }
        positive("limits.max_clock_skew_seconds", self.limits.max_clock_skew_seconds)?;
        if !(0.0..=1.0).contains(&self.publish.min_change) {
            return Err(format!("publish.min_change = {}; it must be in [0, 1]", self.publish.min_change));
        }
        if self.metrics.listen.parse::<std::net::SocketAddr>().is_err() {
            return Err(format!("metrics.listen = {:?}; an address such as 127.0.0.1:9464", self.metrics.listen));
        }
        for (key, v) in [
            ("limits.experiments", self.limits.experiments),
            ("limits.arms_per_experiment", self.limits.arms_per_experiment),
            ("limits.duplicate_window", self.limits.duplicate_window),
            ("limits.max_event_bytes", self.limits.max_event_bytes),
        ] {
            if v == 0 {
                return Err(format!("{key} = 0; it must be at least 1"));
            }
        }
        if !["text", "json"].contains(&self.log.format.as_str()) {
            return Err(format!("log.format = {:?}; valid: text, json", self.log.format));
        }
        crate::telemetry::log_filter(&self.log.level)?;
        let d = &self.defaults;
        if !d.bounds.pinned.is_empty() {
            return Err("defaults.bounds.pinned: experiments created on first sight have no declared arms to pin".into());
        }
        self.resolve_default_spec().map_err(|e| format!("defaults: {e}"))?;
        let mut seen = std::collections::HashSet::new();
        for (i, e) in self.experiments.iter().enumerate() {
            if !seen.insert(e.id.as_str()) {
                return Err(format!("experiments[{i}].id = {:?} is declared twice", e.id));
            }
            self.check_experiment(&format!("experiments[{i}]"), e)?;
        }
        Ok(())
    }

    /// Checks one experiment's definition over this configuration's defaults and limits, as
    /// declared at `at` (`experiments[2]`, or `definition` for a control record), and returns
    /// it as it will run. The file and the control topic share these checks and their
    /// messages.
    pub fn check_experiment(&self, at: &str, e: &ExperimentConfig) -> Result<ResolvedExperiment, String> {
        if !valid_name(&e.id) {
            return Err(format!("{at}.id = {:?}; 1–64 characters from [A-Za-z0-9._-]", e.id));
        }
        let r = self.resolve(e).map_err(|m| format!("{at} ({}): {m}", e.id))?;
        let mut declared = std::collections::HashSet::new();
        if let Some(a) = e.arms.iter().find(|a| !declared.insert(a.as_str())) {
            return Err(format!("{at}.arms ({}): arm {a:?} is declared twice; name each arm once", e.id));
        }
        if !r.arms.is_empty() {
            let key = if e.policy.is_some() { format!("{at}.policy") } else { "defaults.policy".into() };
            if let Some(a) = r.spec.policy.weights.keys().find(|a| !r.arms.contains(a)) {
                return Err(format!("{key}.weights.{a} ({}): no arm {a:?} is declared; declared arms: {}", e.id, r.arms.join(", ")));
            }
        }
        for a in &r.arms {
            if !valid_name(a) {
                return Err(format!("{at} ({}).arms: {a:?}; 1–64 characters from [A-Za-z0-9._-]", e.id));
            }
        }
        if let Some(c) = &r.spec.control_arm {
            if !valid_name(c) {
                return Err(format!("{at}.control_arm ({}) = {c:?}; 1–64 characters from [A-Za-z0-9._-]", e.id));
            }
            if !r.arms.is_empty() && !r.arms.contains(c) {
                return Err(format!("{at}.control_arm ({}) = {c:?} is not one of its arms: {}", e.id, r.arms.join(", ")));
            }
        }
        if !r.spec.accept_new_arms && r.arms.is_empty() {
            return Err(format!("{at}.accept_new_arms ({}) = false needs declared arms; name them in arms", e.id));
        }
        Experiment::new(r.spec.clone(), &r.arms).map_err(|m| format!("{at} ({}): {m}", e.id))?;
        Ok(r)
    }

    fn half_life_ms(key: &str, v: Option<f64>) -> Result<Option<f64>, String> {
        match v {
            None => Ok(None),
            Some(s) if s.is_finite() && s > 0.0 => Ok(Some(s * 1000.0)),
            Some(s) => Err(format!("{key} = {s}; it must be a number of seconds > 0")),
        }
    }

    /// The longest attribution window: 90 days (an arm's buckets are W/16 wide, so any window
    /// costs the same memory; the bound keeps event-time arithmetic far from overflow).
    const MAX_WINDOW_SECONDS: f64 = 90.0 * 86_400.0;

    fn window(key: &str, v: Option<f64>) -> Result<Option<Window>, String> {
        match v {
            None => Ok(None),
            Some(s) if (0.001..=Self::MAX_WINDOW_SECONDS).contains(&s) => Ok(Some(Window { ms: (s * 1000.0).round() as i64 })),
            Some(s) => Err(format!("{key} = {s}; it must be a number of seconds from 0.001 to {} (90 days)", Self::MAX_WINDOW_SECONDS)),
        }
    }

    /// The spec of experiments created on first sight.
    pub fn resolve_default_spec(&self) -> Result<ExperimentSpec, String> {
        let d = &self.defaults;
        let spec = ExperimentSpec {
            policy: d.policy.clone(),
            reward: d.reward,
            bounds: d.bounds.clone(),
            half_life_ms: Self::half_life_ms("half_life_seconds", d.half_life_seconds)?,
            max_arms: self.limits.arms_per_experiment,
            accept_new_arms: true,
            attribution: Self::window("attribution_window_seconds", d.attribution_window_seconds)?,
            control_arm: None,
            settle: d.settle.clone(),
        };
        Experiment::new(spec.clone(), &[])?;
        Ok(spec)
    }

    fn resolve(&self, e: &ExperimentConfig) -> Result<ResolvedExperiment, String> {
        let d = &self.defaults;
        let mut bounds = e.bounds.clone().unwrap_or_else(|| d.bounds.clone());
        if e.bounds.is_none() {
            bounds.pinned.clear();
        }
        if e.arms.len() > self.limits.arms_per_experiment {
            return Err(format!(
                "arms: {} declared, more than limits.arms_per_experiment = {}",
                e.arms.len(),
                self.limits.arms_per_experiment
            ));
        }
        Ok(ResolvedExperiment {
            id: e.id.clone(),
            arms: e.arms.clone(),
            spec: ExperimentSpec {
                policy: e.policy.clone().unwrap_or_else(|| d.policy.clone()),
                reward: e.reward.unwrap_or(d.reward),
                bounds,
                half_life_ms: Self::half_life_ms("half_life_seconds", e.half_life_seconds.or(d.half_life_seconds))?,
                max_arms: self.limits.arms_per_experiment,
                accept_new_arms: e.accept_new_arms.unwrap_or(true),
                attribution: Self::window("attribution_window_seconds", e.attribution_window_seconds.or(d.attribution_window_seconds))?,
                control_arm: e.control_arm.clone(),
                settle: e.settle.clone().unwrap_or_else(|| d.settle.clone()),
            },
        })
    }

    /// Every declared experiment as it will run.
    pub fn resolved(&self) -> Vec<ResolvedExperiment> {
        self.experiments.iter().filter_map(|e| self.resolve(e).ok()).collect()
    }

    /// Warnings that do not stop the process (e.g. ε-greedy with c ≤ 5).
    pub fn warnings(&self) -> Vec<String> {
        let mut w: Vec<String> = self.renamed.clone();
        w.extend(self.defaults.policy.warnings().into_iter().map(|m| format!("defaults: {m}")));
        for r in self.resolved() {
            w.extend(r.spec.policy.warnings().into_iter().map(|m| format!("experiment {}: {m}", r.id)));
            if r.spec.bounds.floor == 0.0 && r.spec.policy.name != PolicyName::Fixed {
                w.push(format!(
                    "experiment {}: floor = 0 lets the policy starve an arm; set a floor where every arm must keep a share",
                    r.id
                ));
            }
        }
        w
    }

    /// A Kafka client configuration with the operator's librdkafka properties passed through.
    pub fn client_config(&self) -> rdkafka::ClientConfig {
        let mut c = rdkafka::ClientConfig::new();
        c.set("bootstrap.servers", &self.kafka.brokers);
        for (k, v) in &self.kafka.client {
            c.set(k, v);
        }
        c
    }

    /// librdkafka properties with secrets masked, for printing and logging.
    pub fn client_redacted(&self) -> BTreeMap<String, String> {
        self.kafka
            .client
            .iter()
            .map(|(k, v)| (k.clone(), if is_secret(k) { "<redacted>".into() } else { v.clone() }))
            .collect()
    }
}

/// The error with its key written as people write it: the config crate joins an array index
/// and the next key without a dot (`experiments[0]bounds`).
fn dotted(e: config::ConfigError) -> config::ConfigError {
    let fix = |key: Option<String>| key.map(|k| dotted_key(&k));
    match e {
        config::ConfigError::Type { origin, unexpected, expected, key } => {
            config::ConfigError::Type { origin, unexpected, expected, key: fix(key) }
        }
        config::ConfigError::At { error, origin, key } => config::ConfigError::At { error, origin, key: fix(key) },
        other => other,
    }
}

/// `experiments[0]bounds` → `experiments[0].bounds`; `a[0][1]` and `a[0].b` stay.
fn dotted_key(key: &str) -> String {
    let mut out = String::with_capacity(key.len() + 4);
    let mut chars = key.chars().peekable();
    while let Some(c) = chars.next() {
        out.push(c);
        if c == ']' && chars.peek().is_some_and(|n| *n != '[' && *n != '.') {
            out.push('.');
        }
    }
    out
}

/// Whether a librdkafka property holds a secret (passwords, keys, tokens, credentials).
pub fn is_secret(key: &str) -> bool {
    let k = key.to_ascii_lowercase();
    ["password", "passphrase", "secret", "token", "credential", ".key.pem", "key.pem", "jaas", "sasl.oauthbearer.config"]
        .iter()
        .any(|s| k.contains(s))
}

impl fmt::Display for ResolvedExperiment {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let g = &self.spec.bounds;
        write!(f, "{}: policy {}", self.id, self.spec.policy)?;
        match self.spec.reward {
            RewardModel::Bernoulli => write!(f, ", rewards 0/1")?,
            RewardModel::Bounded { max } => write!(f, ", rewards in [0, {max}]")?,
        }
        write!(f, ", floor {}", g.floor)?;
        if let Some(c) = g.cap {
            write!(f, ", cap {c}")?;
        }
        if let Some(s) = g.max_step {
            write!(f, ", max step {s}")?;
        }
        for (a, w) in &g.pinned {
            write!(f, ", {a} pinned at {w}")?;
        }
        if let Some(h) = self.spec.half_life_ms {
            write!(f, ", half-life {}s", h / 1000.0)?;
        }
        if let Some(w) = self.spec.attribution {
            write!(f, ", attribution window {}s", w.ms as f64 / 1000.0)?;
        }
        if let Some(c) = &self.spec.control_arm {
            write!(f, ", lift over {c}")?;
        }
        let t = &self.spec.settle;
        write!(f, ", settled at P(best) {} and loss {}·mean after {} pulls per arm", t.best_probability, t.relative_loss, t.min_pulls)?;
        if t.auto_conclude {
            write!(f, " (then concludes itself)")?;
        }
        if !self.spec.accept_new_arms {
            write!(f, ", no new arms")?;
        }
        if self.arms.is_empty() {
            write!(f, ", arms join on first sight")
        } else {
            write!(f, ", arms {}", self.arms.join(", "))
        }
    }
}
