//! Shared pieces of the tests that run against a real broker: the broker's address (started by
//! scripts/test), unique topic names, an in-process sidecar, and plain clients to feed and read
//! topics. Every wait is bounded by a deadline.
#![allow(dead_code)]

use std::time::{Duration, Instant};

pub mod http;

use apportion::config::Config;
use apportion::shutdown::Shutdown;
use rdkafka::config::ClientConfig;
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::message::OwnedMessage;
use rdkafka::producer::{BaseProducer, BaseRecord, Producer};
use rdkafka::{Offset, TopicPartitionList};

/// The broker scripts/test started; tests that need one cannot run without it.
pub fn brokers() -> String {
    std::env::var("TEST_KAFKA_BROKERS")
        .expect("TEST_KAFKA_BROKERS is not set: run the tests with scripts/test, which starts a broker")
}

pub fn unique(prefix: &str) -> String {
    format!("{prefix}-{:016x}", rand::random::<u64>())
}

pub fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0").and_then(|l| l.local_addr()).map(|a| a.port()).expect("a free port")
}

/// A configuration with its own topics, group and metrics port.
pub fn config(name: &str, partitions: i32) -> Config {
    let mut cfg = Config::default();
    let id = unique(name);
    cfg.kafka.brokers = brokers();
    cfg.kafka.group_id = format!("{id}.group");
    cfg.kafka.input_topic = format!("{id}.events");
    cfg.kafka.weights_topic = format!("{id}.weights");
    cfg.kafka.state_topic = format!("{id}.state");
    cfg.kafka.dead_letter_topic = format!("{id}.dead-letter");
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

/// Polls `f` until it holds or `within` has passed.
pub fn wait_until(within: Duration, mut f: impl FnMut() -> bool) -> bool {
    let deadline = Instant::now() + within;
    while Instant::now() < deadline {
        if f() {
            return true;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    f()
}

/// A minimal HTTP/1.1 GET on loopback, with a 5 s read timeout.
pub fn http_get(addr: &str, path: &str) -> std::io::Result<(u16, String)> {
    http::get(addr, path, Duration::from_secs(5))
}

/// Creates `topics` with `partitions` partitions each (those that exist are left alone).
pub fn create_topics(topics: &[&str], partitions: i32) {
    use rdkafka::admin::{AdminClient, AdminOptions, NewTopic, TopicReplication};
    let admin: AdminClient<rdkafka::client::DefaultClientContext> =
        ClientConfig::new().set("bootstrap.servers", brokers()).create().expect("admin client");
    let new: Vec<NewTopic> = topics.iter().map(|t| NewTopic::new(t, partitions, TopicReplication::Fixed(1))).collect();
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().expect("runtime");
    let results = rt
        .block_on(admin.create_topics(&new, &AdminOptions::new().operation_timeout(Some(Duration::from_secs(10)))))
        .expect("create topics");
    for r in results {
        if let Err((name, code)) = r {
            assert_eq!(code, rdkafka::types::RDKafkaErrorCode::TopicAlreadyExists, "cannot create {name}");
        }
    }
}

/// Produces `(key, value)` messages and waits until the broker has them all.
pub fn produce(topic: &str, messages: &[(String, Vec<u8>)]) {
    let p: BaseProducer = ClientConfig::new().set("bootstrap.servers", brokers()).set("linger.ms", "5").create().expect("producer");
    for (k, v) in messages {
        let mut rec = BaseRecord::to(topic).key(k.as_bytes()).payload(&v[..]);
        loop {
            match p.send(rec) {
                Ok(()) => break,
                Err((_, r)) => {
                    rec = r;
                    p.poll(Duration::from_millis(50));
                }
            }
        }
        p.poll(Duration::ZERO);
    }
    p.flush(Duration::from_secs(30)).expect("all messages delivered");
}

/// Reads every message of `topic` from the beginning, with a plain consumer, until `enough`
/// says so or `within` has passed.
pub fn read_topic(topic: &str, within: Duration, mut enough: impl FnMut(&[OwnedMessage]) -> bool) -> Vec<OwnedMessage> {
    let c: BaseConsumer = ClientConfig::new()
        .set("bootstrap.servers", brokers())
        .set("group.id", unique("reader"))
        .set("enable.auto.commit", "false")
        .create()
        .expect("consumer");
    let md = c.fetch_metadata(Some(topic), Duration::from_secs(10)).expect("metadata");
    let mut tpl = TopicPartitionList::new();
    for t in md.topics().iter().filter(|t| t.name() == topic) {
        for p in t.partitions() {
            tpl.add_partition_offset(topic, p.id(), Offset::Beginning).expect("offset");
        }
    }
    c.assign(&tpl).expect("assign");
    let mut out = Vec::new();
    let deadline = Instant::now() + within;
    while Instant::now() < deadline && !enough(&out) {
        if let Some(Ok(m)) = c.poll(Duration::from_millis(200)) {
            out.push(m.detach());
        }
    }
    out
}

/// The value of series `name` carrying every label pair in `labels`, from a scrape.
pub fn metric(scrape: &str, name: &str, labels: &[(&str, &str)]) -> Option<f64> {
    scrape.lines().filter(|l| !l.starts_with('#')).find_map(|l| {
        let (series, value) = l.rsplit_once(' ')?;
        let (n, rest) = series.split_once('{').unwrap_or((series, ""));
        if n != name || !labels.iter().all(|(k, v)| rest.contains(&format!("{k}=\"{v}\""))) {
            return None;
        }
        value.parse().ok()
    })
}

/// `apportion_events_total{outcome="applied"}` over both kinds, from a scrape.
pub fn applied_events(scrape: &str) -> f64 {
    ["impression", "reward"]
        .iter()
        .map(|kind| metric(scrape, "apportion_events_total", &[("kind", kind), ("outcome", "applied")]).unwrap_or(0.0))
        .sum()
}

/// The TOML of a sidecar configuration with its own topics and group, for child processes.
pub struct ProcConfig {
    pub id: String,
    pub brokers: String,
    pub partitions: i32,
    pub port: u16,
    /// Consumer session timeout. Short by default so that a killed instance's partitions move
    /// on quickly; longer than any broker pause a test makes, so the pause does not expire it.
    pub session_timeout_ms: u32,
    /// `max.poll.interval.ms`, when set: also the member's rebalance timeout, for which a
    /// broker may hold a rebalance open while a member is gone (tansu 0.6 does).
    pub max_poll_interval_ms: Option<u32>,
    pub extra: String,
}

impl ProcConfig {
    pub fn new(name: &str, brokers: &str, partitions: i32) -> Self {
        ProcConfig {
            id: unique(name),
            brokers: brokers.to_string(),
            partitions,
            port: free_port(),
            session_timeout_ms: 6000,
            max_poll_interval_ms: None,
            extra: String::new(),
        }
    }

    pub fn topic(&self, which: &str) -> String {
        format!("{}.{which}", self.id)
    }

    /// Writes the file; `port` is this instance's metrics port.
    pub fn write(&self, port: u16) -> std::path::PathBuf {
        let text = format!(
            r#"[kafka]
brokers = "{brokers}"
group_id = "{id}.group"
input_topic = "{id}.events"
weights_topic = "{id}.weights"
state_topic = "{id}.state"
dead_letter_topic = "{id}.dead-letter"
topic_partitions = {partitions}

[kafka.client]
"session.timeout.ms" = "{session}"
"heartbeat.interval.ms" = "{heartbeat}"
{max_poll}

[publish]
interval_seconds = 0.2
heartbeat_seconds = 5

[snapshot]
interval_seconds = 0.5

[metrics]
listen = "127.0.0.1:{port}"

[log]
level = "warn"
{extra}
"#,
            brokers = self.brokers,
            id = self.id,
            partitions = self.partitions,
            session = self.session_timeout_ms,
            heartbeat = (self.session_timeout_ms / 6).max(500),
            max_poll = self.max_poll_interval_ms.map(|ms| format!(r#""max.poll.interval.ms" = "{ms}""#)).unwrap_or_default(),
            extra = self.extra,
        );
        let path = std::env::temp_dir().join(format!("{}-{port}.toml", self.id));
        std::fs::write(&path, text).expect("config written");
        path
    }
}

/// The sidecar as a child process of its own binary.
pub struct SidecarProcess {
    pub addr: String,
    pub child: std::process::Child,
    config: std::path::PathBuf,
}

impl SidecarProcess {
    pub fn start(cfg: &ProcConfig, port: u16) -> SidecarProcess {
        let config = cfg.write(port);
        let child = std::process::Command::new(env!("CARGO_BIN_EXE_apportion"))
            .args(["run", "--config"])
            .arg(&config)
            .stdin(std::process::Stdio::null())
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::inherit())
            .spawn()
            .expect("sidecar process started");
        SidecarProcess { addr: format!("127.0.0.1:{port}"), child, config }
    }

    pub fn wait_ready(&self, within: Duration) -> bool {
        wait_until(within, || http_get(&self.addr, "/readyz").map(|(s, _)| s == 200).unwrap_or(false))
    }

    /// SIGKILL: no snapshot, no goodbye.
    pub fn crash(mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }

    /// SIGTERM, then waits for a clean exit (bounded).
    pub fn stop(mut self) -> bool {
        signal(self.child.id(), "TERM");
        let deadline = Instant::now() + Duration::from_secs(60);
        while Instant::now() < deadline {
            if let Ok(Some(status)) = self.child.try_wait() {
                return status.success();
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        let _ = self.child.kill();
        let _ = self.child.wait();
        false
    }

    pub fn get(&self, path: &str) -> Option<(u16, String)> {
        http_get(&self.addr, path).ok()
    }
}

impl Drop for SidecarProcess {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
        let _ = std::fs::remove_file(&self.config);
    }
}

/// Sends a signal (TERM, KILL, STOP, CONT) to a process with the system's `kill`.
pub fn signal(pid: u32, name: &str) {
    let _ = std::process::Command::new("kill").arg(format!("-{name}")).arg(pid.to_string()).status();
}

/// Per experiment and arm, (pulls, reward) from an `/experiments` body.
pub fn totals(experiments_json: &str) -> std::collections::BTreeMap<(String, String), (u64, f64)> {
    let v: serde_json::Value = serde_json::from_str(experiments_json).unwrap_or_default();
    let mut out = std::collections::BTreeMap::new();
    if let Some(exps) = v.as_object() {
        for (exp, e) in exps {
            if let Some(arms) = e["arms"].as_object() {
                for (arm, a) in arms {
                    out.insert((exp.clone(), arm.clone()), (a["pulls"].as_u64().unwrap_or(0), a["reward"].as_f64().unwrap_or(0.0)));
                }
            }
        }
    }
    out
}
