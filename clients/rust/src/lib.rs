//! The service side of apportion: follow the weights the sidecar publishes, assign each unit
//! (a user, a session, a request) to an arm, and write the impression and reward events the
//! sidecar learns from.
//!
//! ```no_run
//! use apportion_client::{Client, ClientConfig, Fallback};
//!
//! let mut cfg = ClientConfig::new("127.0.0.1:9092");
//! cfg.default_fallback = Some(Fallback::Even(vec!["warm".into(), "cool".into()]));
//! let client = Client::start(cfg)?;
//! client.wait_until_loaded(std::time::Duration::from_secs(10));
//! let a = client.assign("thumb-style", "user-8812")?;      // a local read, no network
//! let shown = client.impression(&a, None)?;                 // the arm was shown
//! client.reward(&shown, 1.0, None)?;                        // and it was played
//! # Ok::<(), Box<dyn std::error::Error>>(())
//! ```
//!
//! An assignment is deterministic for (experiment, unit, weights version) and sticky as the
//! weights move (`hash`): a unit changes arm only about as far as the change of weights forces.
//! The Python client in `clients/python` gives every unit the same arm.

pub mod counters;
pub mod events;
mod follower;
pub mod hash;
pub mod table;

use std::collections::{BTreeMap, HashMap};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use rdkafka::producer::{BaseRecord, DefaultProducerContext, Producer, ThreadedProducer};
use rdkafka::ClientConfig as KafkaConfig;

pub use counters::Counts;
use counters::{bump, Counters};
pub use events::Impression;
use hash::{arm_seed, choose, unit_key, Racer};
pub use table::{Held, Offered, Table};

/// What a service does when it has no usable weights for an experiment.
#[derive(Clone, Debug, PartialEq)]
pub enum Fallback {
    /// Every unit to this arm (propensity 1).
    Arm(String),
    /// An even split over these arms, with the same sticky hash (propensity 1/n).
    Even(Vec<String>),
}

/// How the client runs.
#[derive(Clone, Debug)]
pub struct ClientConfig {
    pub brokers: String,
    pub weights_topic: String,
    pub input_topic: String,
    /// Weights published longer ago than this are not used (the sidecar republishes every
    /// `publish.heartbeat_seconds`, 60 s by default, so keep this several heartbeats long).
    pub max_age: Duration,
    /// Per experiment.
    pub fallbacks: HashMap<String, Fallback>,
    /// For experiments without their own.
    pub default_fallback: Option<Fallback>,
    /// librdkafka properties for both the follower and the producer (security, for instance).
    pub kafka: BTreeMap<String, String>,
}

impl ClientConfig {
    pub fn new(brokers: &str) -> ClientConfig {
        ClientConfig {
            brokers: brokers.to_string(),
            weights_topic: "apportion.weights".into(),
            input_topic: "apportion.events".into(),
            max_age: Duration::from_secs(300),
            fallbacks: HashMap::new(),
            default_fallback: None,
            kafka: BTreeMap::new(),
        }
    }
}

/// Where an assignment came from.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Source {
    Weights,
    /// No weights were ever read for the experiment.
    FallbackMissing,
    /// The weights held are older than `max_age`.
    FallbackStale,
    /// The experiment is retired.
    FallbackRetired,
}

impl Source {
    pub fn as_str(self) -> &'static str {
        match self {
            Source::Weights => "weights",
            Source::FallbackMissing => "fallback-missing",
            Source::FallbackStale => "fallback-stale",
            Source::FallbackRetired => "fallback-retired",
        }
    }
}

/// One unit's arm.
#[derive(Clone, Debug, PartialEq)]
pub struct Assignment {
    pub experiment: Arc<str>,
    pub arm: Arc<str>,
    /// The probability the rule in force gave this arm: its weight (1/n for an even fallback,
    /// 1 for a fallback arm).
    pub propensity: f64,
    /// The weights version used; `None` for a fallback.
    pub weights_version: Option<u64>,
    pub source: Source,
}

/// Neither usable weights nor a fallback.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("no arm for experiment {experiment:?}: {reason}, and no fallback is configured")]
pub struct Unassignable {
    pub experiment: String,
    pub reason: &'static str,
}

#[derive(Debug, thiserror::Error)]
pub enum ClientError {
    #[error("cannot create a Kafka client: {0}")]
    Kafka(#[from] rdkafka::error::KafkaError),
    #[error("this client has no producer (made with Client::offline)")]
    Offline,
    #[error("the producer's queue stayed full; event not written")]
    QueueFull,
    #[error("cannot start the thread that follows the weights: {0}")]
    Thread(#[from] std::io::Error),
}

/// A fallback with its arms raced by the same hash.
struct Prepared {
    names: Vec<Arc<str>>,
    racers: Vec<Racer>,
}

impl Prepared {
    fn new(f: &Fallback) -> Prepared {
        let mut arms: Vec<&String> = match f {
            Fallback::Arm(a) => vec![a],
            Fallback::Even(arms) => arms.iter().collect(),
        };
        arms.sort();
        arms.dedup();
        Prepared {
            names: arms.iter().map(|a| Arc::from(a.as_str())).collect(),
            racers: arms.iter().map(|a| Racer { seed: arm_seed(a), weight: 1.0 }).collect(),
        }
    }
}

/// Follows the weights topic and assigns units; cheap to share between threads (`&Client`).
pub struct Client {
    cfg: ClientConfig,
    table: Arc<Table>,
    counters: Arc<Counters>,
    fallbacks: HashMap<String, Prepared>,
    default_fallback: Option<Prepared>,
    producer: Option<ThreadedProducer<DefaultProducerContext>>,
    follower: Option<JoinHandle<()>>,
    stop: Arc<AtomicBool>,
    loaded: Arc<AtomicBool>,
    prefix: String,
    seq: AtomicU64,
    clock: Box<dyn Fn() -> i64 + Send + Sync>,
}

fn wall_clock_ms() -> i64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_millis() as i64)
}

/// 64 random bits from the standard library's randomly keyed hasher (no generator needed).
pub(crate) fn random_u64() -> u64 {
    use std::hash::BuildHasher;
    std::collections::hash_map::RandomState::new().hash_one(std::process::id())
}

impl Client {
    /// A client that follows the weights topic (from a thread of its own) and writes events.
    pub fn start(cfg: ClientConfig) -> Result<Client, ClientError> {
        Client::start_with_clock(cfg, Box::new(wall_clock_ms))
    }

    /// [`Client::start`] on the clock `clock` (ms since the epoch), which decides the age of
    /// the weights and the time of events written without one.
    pub fn start_with_clock(cfg: ClientConfig, clock: Box<dyn Fn() -> i64 + Send + Sync>) -> Result<Client, ClientError> {
        let mut producer_cfg = KafkaConfig::new();
        producer_cfg.set("bootstrap.servers", &cfg.brokers).set("linger.ms", "5");
        for (k, v) in &cfg.kafka {
            producer_cfg.set(k, v);
        }
        let producer: ThreadedProducer<DefaultProducerContext> = producer_cfg.create()?;
        let consumer = follower::consumer(&cfg.brokers, &cfg.kafka)?;
        let mut client = Client::offline(cfg, clock);
        let f = follower::Follower {
            consumer,
            topic: client.cfg.weights_topic.clone(),
            table: client.table.clone(),
            counters: client.counters.clone(),
            stop: client.stop.clone(),
            loaded: client.loaded.clone(),
        };
        client.follower = Some(std::thread::Builder::new().name("apportion-weights".into()).spawn(move || f.run())?);
        client.producer = Some(producer);
        Ok(client)
    }

    /// A client without Kafka, fed through [`Client::offer`], on the clock `clock` (ms since the
    /// epoch): for tests and for services that read the weights their own way.
    pub fn offline(cfg: ClientConfig, clock: Box<dyn Fn() -> i64 + Send + Sync>) -> Client {
        Client {
            fallbacks: cfg.fallbacks.iter().map(|(e, f)| (e.clone(), Prepared::new(f))).collect(),
            default_fallback: cfg.default_fallback.as_ref().map(Prepared::new),
            cfg,
            table: Arc::new(Table::default()),
            counters: Arc::new(Counters::default()),
            producer: None,
            follower: None,
            stop: Arc::new(AtomicBool::new(false)),
            loaded: Arc::new(AtomicBool::new(false)),
            prefix: format!("{:016x}", random_u64()),
            seq: AtomicU64::new(0),
            clock,
        }
    }

    /// Takes one weights message (key and value; `None` for a tombstone) and makes it visible.
    pub fn offer(&self, key: &str, value: Option<&[u8]>) -> Offered {
        let o = self.table.offer(Some(key.as_bytes()), value);
        self.counters.count_offered(o);
        self.table.publish();
        o
    }

    /// Waits until the weights topic was read to the end it had at start; `false` on timeout.
    pub fn wait_until_loaded(&self, within: Duration) -> bool {
        let until = Instant::now() + within;
        while !self.loaded.load(Ordering::SeqCst) {
            if Instant::now() >= until {
                return false;
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        true
    }

    /// The arm of `unit` in `experiment`: from the weights held when they are there, not retired
    /// and not older than `max_age`; otherwise from the experiment's fallback (or the default
    /// one). A local read: no lock, no network.
    pub fn assign(&self, experiment: &str, unit: &str) -> Result<Assignment, Unassignable> {
        let key = unit_key(experiment, unit);
        let now = (self.clock)();
        let max_age = self.cfg.max_age.as_millis() as i64;
        let from_weights = self.table.with(experiment, |held| match held {
            None => Err(Source::FallbackMissing),
            Some((_, h)) if h.retired => Err(Source::FallbackRetired),
            Some((_, h)) if now - h.published_at_ms > max_age => Err(Source::FallbackStale),
            Some((id, h)) => choose(key, &h.racers)
                .map(|j| (id.clone(), h.names[j].clone(), h.racers[j].weight / h.total, h.version))
                .ok_or(Source::FallbackMissing),
        });
        let counters = &self.counters;
        match from_weights {
            Ok((experiment, arm, propensity, version)) => {
                bump(&counters.assignments_weights);
                Ok(Assignment { experiment, arm, propensity, weights_version: Some(version), source: Source::Weights })
            }
            Err(source) => {
                let fallback = self.fallbacks.get(experiment).or(self.default_fallback.as_ref());
                let chosen = fallback.and_then(|f| choose(key, &f.racers).map(|j| (f.names[j].clone(), 1.0 / f.names.len() as f64)));
                let Some((arm, propensity)) = chosen else {
                    bump(&counters.unassignable);
                    return Err(Unassignable { experiment: experiment.to_string(), reason: source.as_str() });
                };
                bump(&counters.assignments_fallback);
                bump(match source {
                    Source::FallbackStale => &counters.fallback_stale,
                    Source::FallbackRetired => &counters.fallback_retired,
                    _ => &counters.fallback_missing,
                });
                Ok(Assignment { experiment: Arc::from(experiment), arm, propensity, weights_version: None, source })
            }
        }
    }

    /// Writes the impression of `a` (at `ts_ms`, default now) to the input topic.
    pub fn impression(&self, a: &Assignment, ts_ms: Option<i64>) -> Result<Impression, ClientError> {
        let event_id = format!("{}-{}", self.prefix, self.seq.fetch_add(1, Ordering::Relaxed));
        let ts_ms = ts_ms.unwrap_or_else(|| (self.clock)());
        self.send(&a.experiment, &events::impression_json(&event_id, a, ts_ms))?;
        bump(&self.counters.impressions_written);
        Ok(Impression { event_id, experiment: a.experiment.to_string(), arm: a.arm.to_string(), ts_ms })
    }

    /// Writes a reward of `value` for `imp` (at `ts_ms`, default now); returns its event id.
    pub fn reward(&self, imp: &Impression, value: f64, ts_ms: Option<i64>) -> Result<String, ClientError> {
        let event_id = format!("{}-r{}", imp.event_id, self.seq.fetch_add(1, Ordering::Relaxed));
        let ts_ms = ts_ms.unwrap_or_else(|| (self.clock)());
        self.send(&imp.experiment, &events::reward_json(&event_id, imp, value, ts_ms))?;
        bump(&self.counters.rewards_written);
        Ok(event_id)
    }

    fn send(&self, key: &str, payload: &str) -> Result<(), ClientError> {
        let producer = self.producer.as_ref().ok_or(ClientError::Offline)?;
        let mut record = BaseRecord::to(&self.cfg.input_topic).key(key).payload(payload);
        for _ in 0..200 {
            match producer.send(record) {
                Ok(()) => return Ok(()),
                Err((_, r)) => {
                    record = r;
                    std::thread::sleep(Duration::from_millis(5));
                }
            }
        }
        Err(ClientError::QueueFull)
    }

    /// Waits until every event written has been delivered (or `within` passed).
    pub fn flush(&self, within: Duration) {
        if let Some(p) = &self.producer {
            let _ = p.flush(within);
        }
    }

    pub fn counts(&self) -> Counts {
        self.counters.snapshot()
    }

    /// The weights held for `experiment`.
    pub fn held(&self, experiment: &str) -> Option<Arc<Held>> {
        self.table.get(experiment)
    }
}

impl Drop for Client {
    fn drop(&mut self) {
        self.stop.store(true, Ordering::SeqCst);
        if let Some(h) = self.follower.take() {
            let _ = h.join();
        }
        self.flush(Duration::from_secs(5));
    }
}
