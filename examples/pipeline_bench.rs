//! End-to-end benchmark of the sidecar against a real broker (see BENCHMARKS.md, "Pipeline").
//!
//! `scripts/bench-pipeline` starts a broker on loopback, builds this example and the sidecar in
//! release mode and runs `pipeline_bench all`. Phases:
//!
//! 1. **Fill**: one input topic with `--events` events over several partitions, experiments and
//!    arms, produced in large batches so that the broker can serve reads quickly.
//! 2. **Throughput**, alternating: (a) a bare consumer (`pipeline_bench bare`, a child process
//!    in its own group) that only reads and counts; (c, unless `--skip-reading-floor`) the same
//!    consumer also reading every payload byte, the least any consumer of the events does;
//!    (d, unless `--skip-batch-floor`) a bare consumer taking messages with librdkafka's batch
//!    call, the way the sidecar takes them; (b) `apportion run` with metrics and publishing on,
//!    watched through `/metrics`. The bare consumers read no clock per message. Each
//!    round has a fresh group (and, for the sidecar, fresh output topics) and reads the same
//!    topic from the start.
//! 3. **Latency**: the sidecar on a fresh topic at a steady offered rate, while this process reads
//!    the weights topic: how long after an impression was sent did a published weights message
//!    first count it.
//! 4. **Memory**: many experiments × arms, peak resident memory of the sidecar.
//!
//! Definitions, shared by both consumers of phase 2:
//! - *events per second*: events read divided by the wall time from the first event seen to the
//!   last. The bare consumer reports both instants itself; for the sidecar they are the first
//!   scrape of `/metrics` where `apportion_events_total` (all kinds and outcomes) is above zero
//!   and the first where it reaches the events produced. Scrapes come every 50 ms near either
//!   end and sparser in between, so that they cost the sidecar little; each end is late by at
//!   most the pause before it, 50 ms at a steady rate.
//! - *CPU seconds*: user + system time of the child process from /proc/PID/stat, read just
//!   before it is stopped: start-up included. *CPU in window* is the part spent between the two
//!   instants above.
//! - *peak RSS*: VmHWM from /proc/PID/status, read just before the child is stopped.

use std::collections::HashMap;
use std::fmt::Write as _;
use std::io::{BufRead, BufReader, Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitCode, Stdio};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use anyhow::{anyhow, bail, Context as _};

#[path = "../tests/common/http.rs"]
mod http;
use clap::{Parser, Subcommand};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rdkafka::admin::{AdminClient, AdminOptions, NewTopic, TopicReplication};
use rdkafka::client::DefaultClientContext;
use rdkafka::config::ClientConfig;
use apportion::stream::fetch::{Batch, FetchQueue};
use rdkafka::consumer::{BaseConsumer, Consumer, ConsumerContext, Rebalance};
use rdkafka::message::Message;
use rdkafka::producer::{BaseProducer, BaseRecord, DeliveryResult, Producer, ProducerContext};
use rdkafka::types::RDKafkaErrorCode;
use rdkafka::{ClientContext, Offset, TopicPartitionList};

#[derive(Parser)]
#[command(name = "pipeline_bench", about = "End-to-end benchmark: broker floor against the sidecar")]
struct Cli {
    #[command(subcommand)]
    command: Cmd,
}

#[derive(Subcommand)]
enum Cmd {
    /// Every phase, then a summary table.
    All(AllArgs),
    /// The floor: read a topic in a fresh group and count, until `--expect` events were seen.
    /// Prints `first <unix ns>` and `done <unix ns> <count>`, then waits for stdin to close.
    Bare(BareArgs),
}

#[derive(clap::Args)]
struct AllArgs {
    /// Broker address (loopback).
    #[arg(long)]
    brokers: String,
    /// The sidecar binary to run.
    #[arg(long, value_name = "FILE")]
    apportion: PathBuf,
    /// Process id of the broker, to report its CPU time per round as well.
    #[arg(long)]
    broker_pid: Option<u32>,
    /// Events in the throughput topic.
    #[arg(long, default_value_t = 1_000_000)]
    events: u64,
    /// Partitions of every input topic.
    #[arg(long, default_value_t = 6)]
    partitions: i32,
    /// Experiments in the throughput and latency topics (arms: 2, 3, 5 and 10 in turn).
    #[arg(long, default_value_t = 12)]
    experiments: usize,
    /// Rounds of each consumer, alternating a, b, a, b, …
    #[arg(long, default_value_t = 2)]
    rounds: u32,
    /// Sidecar publish interval, seconds.
    #[arg(long, default_value_t = 1.0)]
    publish_interval: f64,
    /// Offered rate of the latency phase, events per second.
    #[arg(long, default_value_t = 3000)]
    latency_rate: u64,
    /// Length of the latency phase, seconds.
    #[arg(long, default_value_t = 30)]
    latency_seconds: u64,
    /// Experiments of the memory phase (0 skips it).
    #[arg(long, default_value_t = 10_000)]
    memory_experiments: usize,
    /// Arms per experiment of the memory phase.
    #[arg(long, default_value_t = 10)]
    memory_arms: usize,
    /// Impressions per arm in the memory phase.
    #[arg(long, default_value_t = 2)]
    memory_impressions: u64,
    /// Longest wait for one consumer round, for the memory phase, or for the fill, seconds.
    #[arg(long, default_value_t = 600)]
    timeout: u64,
    /// Seed of the generated traffic.
    #[arg(long, default_value_t = 1)]
    seed: u64,
    /// Also write the summary as markdown to this file.
    #[arg(long, value_name = "FILE")]
    markdown: Option<PathBuf>,
    /// A label for the summary (e.g. the git commit measured).
    #[arg(long, default_value = "")]
    label: String,
    /// Skip the latency phase.
    #[arg(long)]
    skip_latency: bool,
    /// Skip the third consumer of each throughput round (c: a bare consumer that also reads
    /// every payload byte).
    #[arg(long)]
    skip_reading_floor: bool,
    /// Skip the fourth consumer of each throughput round (d: a bare consumer taking messages
    /// with librdkafka's batch call, as the sidecar does).
    #[arg(long)]
    skip_batch_floor: bool,
    /// A librdkafka property for every sidecar started, `KEY=VALUE` (repeatable), e.g.
    /// `fetch.wait.max.ms=10`. Without it the sidecar runs with its defaults.
    #[arg(long = "sidecar-client", value_name = "KEY=VALUE")]
    sidecar_client: Vec<String>,
    /// Another build of the sidecar, `NAME=FILE` (repeatable): run in every throughput round
    /// right after `--apportion`, on the same topic, and compared with it in the summary (e.g.
    /// builds with another JSON reader).
    #[arg(long = "also", value_name = "NAME=FILE")]
    also: Vec<String>,
}

#[derive(clap::Args)]
struct BareArgs {
    #[arg(long)]
    brokers: String,
    #[arg(long)]
    topic: String,
    #[arg(long)]
    group: String,
    #[arg(long)]
    expect: u64,
    /// Give up after this many seconds.
    #[arg(long, default_value_t = 600)]
    timeout: u64,
    /// Also read every byte of every payload (a floor for any consumer that looks at events).
    #[arg(long)]
    read_payloads: bool,
    /// Take messages as the sidecar does: partitions routed to a queue of their own, read with
    /// librdkafka's batch call (`apportion::stream::fetch`).
    #[arg(long)]
    batch: bool,
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    let result = match cli.command {
        Cmd::All(args) => all(args),
        Cmd::Bare(args) => bare(args),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("pipeline_bench: {e:#}");
            ExitCode::FAILURE
        }
    }
}

fn unix_ns() -> u128 {
    SystemTime::now().duration_since(UNIX_EPOCH).map_or(0, |d| d.as_nanos())
}

fn unix_ms() -> i64 {
    (unix_ns() / 1_000_000) as i64
}

fn suffix() -> String {
    format!("{:012x}", rand::random::<u64>() & 0xffff_ffff_ffff)
}

fn progress(phase: &str, msg: impl std::fmt::Display) {
    eprintln!("[{phase}] {msg}");
}

// ---------------------------------------------------------------------------------------------
// The bare consumer (child process).

/// What a bare consumer has read so far.
struct Tally {
    count: u64,
    bytes: u64,
    folded: u8,
    read_payloads: bool,
}

impl Tally {
    #[inline(always)]
    fn see(&mut self, payload: Option<&[u8]>, out: &mut impl Write) -> anyhow::Result<()> {
        if self.count == 0 {
            writeln!(out, "first {}", unix_ns())?;
            out.flush()?;
        }
        self.count += 1;
        if let Some(p) = payload {
            self.bytes += p.len() as u64;
            if self.read_payloads {
                self.folded = p.iter().fold(self.folded, |x, &b| x ^ b);
            }
        }
        Ok(())
    }
}

/// Routes every partition it is assigned to the fetch queue, before the client assigns it
/// (the crate's own rebalance handling does the assigning).
struct Router {
    fetch: Mutex<Option<Arc<FetchQueue>>>,
}

impl ClientContext for Router {}

impl ConsumerContext for Router {
    fn pre_rebalance(&self, consumer: &BaseConsumer<Self>, rebalance: &Rebalance<'_>) {
        if let (Rebalance::Assign(tpl), Ok(fetch)) = (rebalance, self.fetch.lock()) {
            for e in tpl.elements() {
                if !fetch.as_ref().is_some_and(|q| q.route(consumer, e.topic(), e.partition())) {
                    eprintln!("bare consumer: cannot route {} [{}]", e.topic(), e.partition());
                }
            }
        }
    }
}

/// Clock reads are checked once every this many messages (and whenever nothing came), so
/// that the floor pays for no clock reads of its own per message.
const CHECK_EVERY: u64 = 1024;

fn bare(a: BareArgs) -> anyhow::Result<()> {
    let deadline = Instant::now() + Duration::from_secs(a.timeout);
    let mut out = std::io::stdout().lock();
    let mut t = Tally { count: 0, bytes: 0, folded: 0, read_payloads: a.read_payloads };
    let mut errors = 0u32;
    let mut last_report = Instant::now();
    let mut checked_at = 0u64;
    let mut check = |t: &Tally, idle: bool| -> anyhow::Result<()> {
        if !idle && t.count < checked_at + CHECK_EVERY {
            return Ok(());
        }
        checked_at = t.count;
        if Instant::now() > deadline {
            bail!("bare consumer: {} of {} events read from {} within {}s", t.count, a.expect, a.topic, a.timeout);
        }
        if last_report.elapsed() >= Duration::from_secs(3) {
            progress("bare", format!("{}/{} events read", t.count, a.expect));
            last_report = Instant::now();
        }
        Ok(())
    };
    let mut error = |e: &dyn std::fmt::Display| {
        errors += 1;
        if errors <= 10 {
            eprintln!("bare consumer: {e}");
        }
    };
    if a.batch {
        let c: BaseConsumer<Router> = consumer_config(&a.brokers, &a.group)
            .create_with_context(Router { fetch: Mutex::new(None) })
            .context("cannot create the consumer")?;
        let fetch = Arc::new(FetchQueue::new(&c));
        *c.context().fetch.lock().map_err(|_| anyhow!("poisoned"))? = Some(fetch.clone());
        c.subscribe(&[&a.topic]).with_context(|| format!("cannot subscribe to {}", a.topic))?;
        let mut batch = Batch::with_capacity(256);
        while t.count < a.expect {
            // Rebalances and errors; messages only of a partition that could not be routed.
            let mut idle = true;
            while let Some(r) = c.poll(Duration::ZERO) {
                match r {
                    Ok(m) => t.see(m.payload(), &mut out)?,
                    Err(e) => error(&e),
                }
                idle = false;
            }
            if fetch.take(&mut batch, Duration::from_millis(100)) > 0 {
                idle = false;
            }
            for m in batch.iter() {
                match m.error() {
                    None => t.see(m.payload(), &mut out)?,
                    Some(e) => error(&e),
                }
            }
            batch.clear();
            check(&t, idle)?;
        }
        drop(batch);
        c.context().fetch.lock().map_err(|_| anyhow!("poisoned"))?.take();
        drop(fetch);
        finish(&t, &mut out)
    } else {
        let c: BaseConsumer = consumer_config(&a.brokers, &a.group).create().context("cannot create the consumer")?;
        c.subscribe(&[&a.topic]).with_context(|| format!("cannot subscribe to {}", a.topic))?;
        while t.count < a.expect {
            let idle = match c.poll(Duration::from_millis(100)) {
                Some(Ok(m)) => {
                    t.see(m.payload(), &mut out)?;
                    false
                }
                Some(Err(e)) => {
                    error(&e);
                    true
                }
                None => true,
            };
            check(&t, idle)?;
        }
        finish(&t, &mut out)
    }
}

/// Reports the end, then stays alive so that the parent can read this process's CPU time and
/// peak memory.
fn finish(t: &Tally, out: &mut impl Write) -> anyhow::Result<()> {
    writeln!(out, "done {} {} {} {}", unix_ns(), t.count, t.bytes, t.folded)?;
    out.flush()?;
    let mut sink = Vec::new();
    let _ = std::io::stdin().read_to_end(&mut sink);
    Ok(())
}

fn consumer_config(brokers: &str, group: &str) -> ClientConfig {
    let mut c = ClientConfig::new();
    c.set("bootstrap.servers", brokers)
        .set("group.id", group)
        .set("enable.auto.commit", "false")
        .set("enable.partition.eof", "false")
        .set("auto.offset.reset", "earliest");
    c
}

// ---------------------------------------------------------------------------------------------
// Process accounting.

fn clock_ticks() -> f64 {
    Command::new("getconf")
        .arg("CLK_TCK")
        .output()
        .ok()
        .and_then(|o| String::from_utf8(o.stdout).ok())
        .and_then(|s| s.trim().parse::<f64>().ok())
        .filter(|t| *t > 0.0)
        .unwrap_or(100.0)
}

/// User + system CPU seconds of a live process.
fn cpu_seconds(pid: u32, ticks: f64) -> Option<f64> {
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).ok()?;
    // Fields after the command name, which is in parentheses and may hold spaces; the first of
    // them is field 3 (state), so utime (14) and stime (15) are at 11 and 12.
    let rest = &stat[stat.rfind(')')? + 2..];
    let f: Vec<&str> = rest.split_whitespace().collect();
    let utime: f64 = f.get(11)?.parse().ok()?;
    let stime: f64 = f.get(12)?.parse().ok()?;
    Some((utime + stime) / ticks)
}

/// A `kB` line of /proc/PID/status (VmHWM, VmRSS), in MiB.
fn status_mib(pid: u32, key: &str) -> Option<f64> {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let line = status.lines().find(|l| l.starts_with(key))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1024.0)
}

/// A child that is killed if it is still running when dropped.
struct Guarded {
    child: Child,
    what: String,
}

impl Guarded {
    fn pid(&self) -> u32 {
        self.child.id()
    }

    fn exited(&mut self) -> Option<std::process::ExitStatus> {
        self.child.try_wait().ok().flatten()
    }

    /// SIGTERM, then a bounded wait, then SIGKILL.
    fn stop(mut self, within: Duration) -> bool {
        let _ = Command::new("kill").arg("-TERM").arg(self.pid().to_string()).status();
        let deadline = Instant::now() + within;
        while Instant::now() < deadline {
            if let Some(status) = self.exited() {
                return status.success();
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        eprintln!("{} did not stop within {within:?}; killing it", self.what);
        false
    }
}

impl Drop for Guarded {
    fn drop(&mut self) {
        if self.exited().is_none() {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

// ---------------------------------------------------------------------------------------------
// HTTP on loopback.

fn http_get(addr: &str, path: &str) -> std::io::Result<(u16, String)> {
    http::get(addr, path, Duration::from_secs(30))
}

/// (all events counted, rejected ones) from a `/metrics` scrape.
fn events_total(scrape: &str) -> (u64, u64) {
    let (mut all, mut rejected) = (0.0, 0.0);
    for line in scrape.lines() {
        let Some(rest) = line.strip_prefix("apportion_events_total") else { continue };
        if !(rest.starts_with('{') || rest.starts_with(' ')) {
            continue;
        }
        let Some(v) = line.rsplit_once(' ').and_then(|(_, v)| v.parse::<f64>().ok()) else { continue };
        all += v;
        if rest.contains("outcome=\"rejected\"") {
            rejected += v;
        }
    }
    (all as u64, rejected as u64)
}

fn free_port() -> anyhow::Result<u16> {
    Ok(std::net::TcpListener::bind("127.0.0.1:0")?.local_addr()?.port())
}

// ---------------------------------------------------------------------------------------------
// Topics and traffic.

fn create_topic(brokers: &str, topic: &str, partitions: i32) -> anyhow::Result<()> {
    let admin: AdminClient<DefaultClientContext> =
        ClientConfig::new().set("bootstrap.servers", brokers).create().context("cannot create the admin client")?;
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build()?;
    let opts = AdminOptions::new().operation_timeout(Some(Duration::from_secs(30)));
    let results = rt
        .block_on(admin.create_topics(&[NewTopic::new(topic, partitions, TopicReplication::Fixed(1))], &opts))
        .with_context(|| format!("cannot create topic {topic}"))?;
    for r in results {
        match r {
            Ok(_) | Err((_, RDKafkaErrorCode::TopicAlreadyExists)) => {}
            Err((name, code)) => bail!("cannot create topic {name}: {code}"),
        }
    }
    Ok(())
}

#[derive(Default)]
struct DeliveryCount {
    failed: AtomicU64,
    first_error: Mutex<Option<String>>,
}

impl ClientContext for DeliveryCount {}

impl ProducerContext for DeliveryCount {
    type DeliveryOpaque = ();
    fn delivery(&self, result: &DeliveryResult<'_>, _: ()) {
        if let Err((e, _)) = result {
            self.failed.fetch_add(1, Ordering::Relaxed);
            if let Ok(mut g) = self.first_error.lock() {
                g.get_or_insert_with(|| e.to_string());
            }
        }
    }
}

type Feeder = BaseProducer<DeliveryCount>;

fn producer(brokers: &str, linger_ms: u32, batch_bytes: u32) -> anyhow::Result<Feeder> {
    ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("linger.ms", linger_ms.to_string())
        .set("batch.size", batch_bytes.to_string())
        .set("batch.num.messages", "1000000")
        .set("queue.buffering.max.messages", "2000000")
        .set("acks", "1")
        .create_with_context(DeliveryCount::default())
        .context("cannot create the producer")
}

/// Sends one record, waiting (bounded) while the local queue is full.
fn send(p: &Feeder, topic: &str, partition: i32, key: &str, value: &[u8]) -> anyhow::Result<()> {
    let mut rec = BaseRecord::to(topic).key(key).payload(value).partition(partition);
    for _ in 0..6000 {
        match p.send(rec) {
            Ok(()) => return Ok(()),
            Err((e, r)) if e.rdkafka_error_code() == Some(RDKafkaErrorCode::QueueFull) => {
                rec = r;
                p.poll(Duration::from_millis(10));
            }
            Err((e, _)) => bail!("cannot send to {topic}: {e}"),
        }
    }
    bail!("the producer queue stayed full for a minute")
}

fn flush(p: &Feeder, within: Duration) -> anyhow::Result<()> {
    p.flush(within).context("the broker did not confirm every event")?;
    let failed = p.context().failed.load(Ordering::Relaxed);
    if failed > 0 {
        let first = p.context().first_error.lock().ok().and_then(|g| g.clone()).unwrap_or_default();
        bail!("{failed} events were not delivered (first error: {first})");
    }
    Ok(())
}

/// The experiments of a phase: names, arms and the true click rate of each arm.
struct Scenario {
    experiments: Vec<(String, Vec<String>, Vec<f64>)>,
}

impl Scenario {
    fn new(prefix: &str, experiments: usize, arms: impl Fn(usize) -> usize) -> Scenario {
        let experiments = (0..experiments)
            .map(|e| {
                let k = arms(e);
                let names = (0..k).map(|j| format!("arm-{j}")).collect();
                let rates = (0..k).map(|j| 0.02 + 0.01 * ((e + j) % 5) as f64).collect();
                (format!("{prefix}-{e:05}"), names, rates)
            })
            .collect();
        Scenario { experiments }
    }

    fn arm_count(&self) -> usize {
        self.experiments.iter().map(|e| e.1.len()).sum()
    }
}

/// Event JSON in the contract's format, written into `buf`.
fn impression(buf: &mut String, id: u64, exp: &str, arm: &str, k: usize, ts_ms: i64) {
    buf.clear();
    let _ = write!(
        buf,
        r#"{{"event_id":"i-{id}","kind":"impression","experiment":"{exp}","arm":"{arm}","ts_ms":{ts_ms},"count":1,"propensity":{:.4}}}"#,
        1.0 / k as f64
    );
}

fn reward(buf: &mut String, id: u64, exp: &str, arm: &str, ts_ms: i64) {
    buf.clear();
    let _ = write!(buf, r#"{{"event_id":"r-{id}","kind":"reward","experiment":"{exp}","arm":"{arm}","ts_ms":{ts_ms},"reward":1.0}}"#);
}

/// Fills `topic` with exactly `n` events (impressions, and a reward after some of them). Every
/// event is confirmed by the broker's delivery report; the partitions' high watermarks are no
/// check on tansu 0.6, which reports less than it serves after batched writes.
fn fill(brokers: &str, topic: &str, partitions: i32, sc: &Scenario, n: u64, seed: u64, timeout: Duration) -> anyhow::Result<f64> {
    let p = producer(brokers, 50, 1_000_000)?;
    let mut rng = StdRng::seed_from_u64(seed);
    let mut buf = String::with_capacity(256);
    let started = Instant::now();
    let mut last_report = Instant::now();
    let mut sent = 0u64;
    while sent < n {
        if started.elapsed() > timeout {
            bail!("filling {topic}: {sent} of {n} events sent within {timeout:?}");
        }
        let e = rng.gen_range(0..sc.experiments.len());
        let (exp, arms, rates) = &sc.experiments[e];
        let j = rng.gen_range(0..arms.len());
        let part = e as i32 % partitions;
        let ts = unix_ms();
        impression(&mut buf, sent, exp, &arms[j], arms.len(), ts);
        send(&p, topic, part, exp, buf.as_bytes())?;
        sent += 1;
        if sent < n && rng.gen_bool(rates[j]) {
            reward(&mut buf, sent, exp, &arms[j], ts);
            send(&p, topic, part, exp, buf.as_bytes())?;
            sent += 1;
        }
        p.poll(Duration::ZERO);
        if last_report.elapsed() >= Duration::from_secs(5) {
            progress("fill", format!("{sent}/{n} events sent ({:.0}/s)", sent as f64 / started.elapsed().as_secs_f64()));
            last_report = Instant::now();
        }
    }
    flush(&p, timeout.saturating_sub(started.elapsed()).max(Duration::from_secs(60)))?;
    Ok(started.elapsed().as_secs_f64())
}

// ---------------------------------------------------------------------------------------------
// The sidecar.

struct SidecarSetup<'a> {
    brokers: &'a str,
    client: &'a [String],
    input_topic: &'a str,
    partitions: i32,
    publish_interval: f64,
    min_change: f64,
    max_experiments: usize,
}

/// `KEY=VALUE` pairs as TOML lines of `[kafka.client]`.
fn client_table(pairs: &[String]) -> anyhow::Result<String> {
    let mut out = String::new();
    for pair in pairs {
        let (k, v) = pair.split_once('=').ok_or_else(|| anyhow!("--sidecar-client {pair:?}: expected KEY=VALUE"))?;
        let _ = writeln!(out, "{} = {}", toml_string(k.trim()), toml_string(v.trim()));
    }
    Ok(out)
}

fn toml_string(s: &str) -> String {
    serde_json::Value::String(s.to_string()).to_string()
}

struct Sidecar {
    proc: Guarded,
    addr: String,
    id: String,
    log: PathBuf,
    config: PathBuf,
}

impl Sidecar {
    fn start(bin: &Path, s: &SidecarSetup<'_>) -> anyhow::Result<Sidecar> {
        let id = format!("bench-{}", suffix());
        let port = free_port()?;
        let dir = std::env::temp_dir();
        let config = dir.join(format!("{id}.toml"));
        let log = dir.join(format!("{id}.log"));
        let text = format!(
            r#"[kafka]
brokers = "{brokers}"
group_id = "{id}.group"
input_topic = "{input}"
weights_topic = "{id}.weights"
state_topic = "{id}.state"
dead_letter_topic = "{id}.dead-letter"
topic_partitions = {partitions}

[kafka.client]
{client}
[publish]
interval_seconds = {interval}
min_change = {min_change}

[metrics]
listen = "127.0.0.1:{port}"

[limits]
experiments = {max_experiments}

[log]
level = "warn"
"#,
            brokers = s.brokers,
            client = client_table(s.client)?,
            input = s.input_topic,
            partitions = s.partitions,
            interval = s.publish_interval,
            min_change = s.min_change,
            max_experiments = s.max_experiments,
        );
        std::fs::write(&config, text).with_context(|| format!("cannot write {}", config.display()))?;
        let out = std::fs::File::create(&log).with_context(|| format!("cannot create {}", log.display()))?;
        let child = Command::new(bin)
            .args(["run", "--config"])
            .arg(&config)
            .stdin(Stdio::null())
            .stdout(out.try_clone()?)
            .stderr(out)
            .spawn()
            .with_context(|| format!("cannot start {}", bin.display()))?;
        Ok(Sidecar {
            proc: Guarded { child, what: "the sidecar".into() },
            addr: format!("127.0.0.1:{port}"),
            id,
            log,
            config,
        })
    }

    fn weights_topic(&self) -> String {
        format!("{}.weights", self.id)
    }

    fn wait_ready(&mut self, within: Duration) -> anyhow::Result<()> {
        let deadline = Instant::now() + within;
        while Instant::now() < deadline {
            if let Some(status) = self.proc.exited() {
                bail!("the sidecar exited ({status}) before it was ready:\n{}", self.log_tail());
            }
            if http_get(&self.addr, "/readyz").map(|(s, _)| s == 200).unwrap_or(false) {
                return Ok(());
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        bail!("the sidecar was not ready within {within:?}:\n{}", self.log_tail())
    }

    fn log_tail(&self) -> String {
        let text = std::fs::read_to_string(&self.log).unwrap_or_default();
        let lines: Vec<&str> = text.lines().collect();
        lines[lines.len().saturating_sub(20)..].join("\n")
    }

    fn stop(self) {
        let log = self.log.clone();
        let config = self.config.clone();
        self.proc.stop(Duration::from_secs(60));
        let _ = std::fs::remove_file(log);
        let _ = std::fs::remove_file(config);
    }
}

// ---------------------------------------------------------------------------------------------
// Phase 2: throughput.

struct Round {
    who: String,
    round: u32,
    events: u64,
    window_s: f64,
    cpu_s: f64,
    cpu_window_s: f64,
    peak_mib: f64,
    broker_cpu_window_s: Option<f64>,
}

impl Round {
    fn rate(&self) -> f64 {
        self.events as f64 / self.window_s
    }
    fn cpu_per_million(&self) -> f64 {
        self.cpu_s / self.events as f64 * 1e6
    }
    fn cpu_window_per_million(&self) -> f64 {
        self.cpu_window_s / self.events as f64 * 1e6
    }
}

struct Env<'a> {
    a: &'a AllArgs,
    ticks: f64,
}

impl Env<'_> {
    fn broker_cpu(&self) -> Option<f64> {
        self.a.broker_pid.and_then(|p| cpu_seconds(p, self.ticks))
    }
}

/// The bare consumers of a throughput round.
#[derive(Clone, Copy, PartialEq)]
enum Floor {
    /// (a) `poll`, reading and counting.
    Plain,
    /// (c) `poll`, also reading every payload byte.
    Reading,
    /// (d) the batch call on a queue of its own, as the sidecar takes messages.
    Batched,
}

impl Floor {
    fn who(self) -> &'static str {
        match self {
            Floor::Plain => "a: bare consumer",
            Floor::Reading => "c: bare consumer reading payloads",
            Floor::Batched => "d: bare consumer, batch call",
        }
    }
}

/// A bare consumer round.
fn round_bare(env: &Env<'_>, topic: &str, n: u64, round: u32, floor: Floor) -> anyhow::Result<Round> {
    let exe = std::env::current_exe().context("cannot find this program's path")?;
    let child = Command::new(exe)
        .args(["bare", "--brokers", &env.a.brokers, "--topic", topic])
        .args(match floor {
            Floor::Plain => &[][..],
            Floor::Reading => &["--read-payloads"][..],
            Floor::Batched => &["--batch"][..],
        })
        .args(["--group", &format!("bench-bare-{}", suffix()), "--expect", &n.to_string()])
        .args(["--timeout", &env.a.timeout.to_string()])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::inherit())
        .spawn()
        .context("cannot start the bare consumer")?;
    let mut g = Guarded { child, what: "the bare consumer".into() };
    let pid = g.pid();
    let stdout = g.child.stdout.take().ok_or_else(|| anyhow!("no stdout of the bare consumer"))?;
    let (tx, rx) = std::sync::mpsc::channel::<String>();
    std::thread::spawn(move || {
        for line in BufReader::new(stdout).lines().map_while(Result::ok) {
            if tx.send(line).is_err() {
                break;
            }
        }
    });
    let deadline = Instant::now() + Duration::from_secs(env.a.timeout + 30);
    let (mut first_ns, mut cpu_first, mut broker_first) = (None, 0.0, None);
    loop {
        if Instant::now() > deadline {
            bail!("the bare consumer did not finish within {}s", env.a.timeout + 30);
        }
        match rx.recv_timeout(Duration::from_millis(20)) {
            Ok(line) => {
                let f: Vec<&str> = line.split_whitespace().collect();
                match f.as_slice() {
                    ["first", t] => {
                        cpu_first = cpu_seconds(pid, env.ticks).unwrap_or(0.0);
                        broker_first = env.broker_cpu();
                        first_ns = t.parse::<u128>().ok();
                    }
                    ["done", t, count, ..] => {
                        let cpu = cpu_seconds(pid, env.ticks).ok_or_else(|| anyhow!("cannot read the bare consumer's CPU time"))?;
                        let peak = status_mib(pid, "VmHWM").unwrap_or(f64::NAN);
                        let broker_last = env.broker_cpu();
                        let done_ns: u128 = t.parse()?;
                        let events: u64 = count.parse()?;
                        let first = first_ns.ok_or_else(|| anyhow!("the bare consumer reported no first event"))?;
                        drop(g.child.stdin.take());
                        g.stop(Duration::from_secs(10));
                        return Ok(Round {
                            who: floor.who().to_string(),
                            round,
                            events,
                            window_s: (done_ns.saturating_sub(first)) as f64 / 1e9,
                            cpu_s: cpu,
                            cpu_window_s: cpu - cpu_first,
                            peak_mib: peak,
                            broker_cpu_window_s: broker_first.zip(broker_last).map(|(a, b)| b - a),
                        });
                    }
                    _ => {}
                }
            }
            Err(std::sync::mpsc::RecvTimeoutError::Timeout) => {}
            Err(std::sync::mpsc::RecvTimeoutError::Disconnected) => {
                let status = g.child.wait().ok();
                bail!("the bare consumer ended without finishing ({status:?})");
            }
        }
    }
}

fn round_sidecar(env: &Env<'_>, topic: &str, n: u64, round: u32, binary: &Path, who: String) -> anyhow::Result<Round> {
    let a = env.a;
    let setup = SidecarSetup {
        brokers: &a.brokers,
        client: &a.sidecar_client,
        input_topic: topic,
        partitions: a.partitions,
        publish_interval: a.publish_interval,
        min_change: 0.001,
        max_experiments: 10_000,
    };
    let mut sc = Sidecar::start(binary, &setup)?;
    let pid = sc.proc.pid();
    let deadline = Instant::now() + Duration::from_secs(a.timeout);
    let (mut first, mut cpu_first, mut broker_first) = (None, 0.0, None);
    let mut last_report = Instant::now();
    let mut seen = 0;
    loop {
        if let Some(status) = sc.proc.exited() {
            bail!("the sidecar exited ({status}) after {seen} of {n} events:\n{}", sc.log_tail());
        }
        if Instant::now() > deadline {
            bail!("the sidecar counted {seen} of {n} events within {}s:\n{}", a.timeout, sc.log_tail());
        }
        if let Ok((200, body)) = http_get(&sc.addr, "/metrics") {
            let (all, rejected) = events_total(&body);
            seen = all;
            let now = Instant::now();
            if all > 0 && first.is_none() {
                first = Some(now);
                cpu_first = cpu_seconds(pid, env.ticks).unwrap_or(0.0);
                broker_first = env.broker_cpu();
            }
            if all >= n {
                let cpu = cpu_seconds(pid, env.ticks).ok_or_else(|| anyhow!("cannot read the sidecar's CPU time"))?;
                let peak = status_mib(pid, "VmHWM").unwrap_or(f64::NAN);
                let broker_last = env.broker_cpu();
                if rejected > 0 {
                    eprintln!("warning: the sidecar rejected {rejected} events (see its dead-letter topic)");
                }
                let start = first.unwrap_or(now);
                sc.stop();
                return Ok(Round {
                    who,
                    round,
                    events: all,
                    window_s: now.duration_since(start).as_secs_f64(),
                    cpu_s: cpu,
                    cpu_window_s: cpu - cpu_first,
                    peak_mib: peak,
                    broker_cpu_window_s: broker_first.zip(broker_last).map(|(a, b)| b - a),
                });
            }
        }
        if last_report.elapsed() >= Duration::from_secs(3) {
            progress("apportion", format!("{seen}/{n} events counted"));
            last_report = Instant::now();
        }
        // Every 50 ms while waiting for the first event and near the last; in between, half
        // the time the rest should take at the rate so far (at most 500 ms), so that the
        // scrapes themselves (a connection and a rendering each) cost the sidecar little.
        let pause = match first {
            Some(start) if seen > 0 && seen < n => {
                let rate = seen as f64 / start.elapsed().as_secs_f64().max(1e-3);
                Duration::from_secs_f64(((n - seen) as f64 / rate / 2.0).clamp(0.05, 0.5))
            }
            _ => Duration::from_millis(50),
        };
        std::thread::sleep(pause);
    }
}

// ---------------------------------------------------------------------------------------------
// Weights topic reader, shared by the latency and memory phases.

/// One weights message as seen for one arm: pulls, when this reader got the message, the
/// message's `published_at_ms`.
type Sighting = (u64, Instant, i64);

/// What this process saw on a weights topic: per experiment and arm, the cumulative pulls of
/// each message and when it arrived (`history`), or only the latest (`!history`).
#[derive(Default)]
struct Seen {
    /// Experiment → arm → sightings, in order of arrival.
    arms: HashMap<String, HashMap<String, Vec<Sighting>>>,
    messages: u64,
    bad: u64,
}

struct WeightsReader {
    seen: Arc<Mutex<Seen>>,
    stop: Arc<AtomicBool>,
    thread: Option<std::thread::JoinHandle<anyhow::Result<()>>>,
}

impl WeightsReader {
    fn start(brokers: &str, topic: &str, history: bool, within: Duration) -> anyhow::Result<WeightsReader> {
        // Asks the broker to answer fetches at once: this reader is the measuring instrument
        // and should add as little delay as it can.
        let c: BaseConsumer = consumer_config(brokers, &format!("bench-weights-{}", suffix()))
            .set("fetch.wait.max.ms", "10")
            .create()?;
        let md = c.fetch_metadata(Some(topic), Duration::from_secs(10)).with_context(|| format!("no metadata of {topic}"))?;
        let mut tpl = TopicPartitionList::new();
        for t in md.topics().iter().filter(|t| t.name() == topic) {
            for p in t.partitions() {
                tpl.add_partition_offset(topic, p.id(), Offset::Beginning)?;
            }
        }
        if tpl.count() == 0 {
            bail!("topic {topic} has no partitions");
        }
        c.assign(&tpl)?;
        let seen = Arc::new(Mutex::new(Seen::default()));
        let stop = Arc::new(AtomicBool::new(false));
        let (seen2, stop2) = (seen.clone(), stop.clone());
        let thread = std::thread::spawn(move || -> anyhow::Result<()> {
            let deadline = Instant::now() + within;
            while !stop2.load(Ordering::Relaxed) && Instant::now() < deadline {
                let Some(Ok(m)) = c.poll(Duration::from_millis(50)) else { continue };
                let at = Instant::now();
                let v: Option<serde_json::Value> = m.payload().and_then(|p| serde_json::from_slice(p).ok());
                let mut g = seen2.lock().map_err(|_| anyhow!("weights reader lock poisoned"))?;
                g.messages += 1;
                let Some(v) = v else {
                    g.bad += 1;
                    continue;
                };
                let published_ms = v["published_at_ms"].as_i64().unwrap_or(0);
                let (Some(exp), Some(arms)) = (v["experiment"].as_str(), v["arms"].as_object()) else {
                    g.bad += 1;
                    continue;
                };
                let entry = g.arms.entry(exp.to_string()).or_default();
                for (arm, a) in arms {
                    let pulls = a["pulls"].as_u64().unwrap_or(0);
                    let list = entry.entry(arm.clone()).or_default();
                    if !history {
                        list.clear();
                    }
                    list.push((pulls, at, published_ms));
                }
            }
            Ok(())
        });
        Ok(WeightsReader { seen, stop, thread: Some(thread) })
    }

    fn with<T>(&self, f: impl FnOnce(&Seen) -> T) -> T {
        let g = self.seen.lock().unwrap_or_else(|p| p.into_inner());
        f(&g)
    }

    fn finish(mut self) -> Arc<Mutex<Seen>> {
        self.stop.store(true, Ordering::Relaxed);
        if let Some(t) = self.thread.take() {
            match t.join() {
                Ok(Err(e)) => eprintln!("weights reader: {e:#}"),
                Err(_) => eprintln!("weights reader panicked"),
                Ok(Ok(())) => {}
            }
        }
        self.seen.clone()
    }
}

/// Does the latest message of every (experiment, arm) carry at least the pulls `want` says?
fn caught_up(seen: &Seen, want: &HashMap<(usize, usize), u64>, sc: &Scenario) -> (usize, usize) {
    let mut done = 0;
    for (&(e, j), &n) in want {
        let (exp, arms, _) = &sc.experiments[e];
        let latest = seen.arms.get(exp).and_then(|m| m.get(&arms[j])).and_then(|l| l.last()).map_or(0, |x| x.0);
        if latest >= n {
            done += 1;
        }
    }
    (done, want.len())
}

// ---------------------------------------------------------------------------------------------
// Phase 3: latency.

/// A plain consumer of the input topic, beside the sidecar, that notes when each event id
/// arrived: the broker's own delivery delay, the floor under the sidecar's latency.
struct ArrivalClock {
    stop: Arc<AtomicBool>,
    thread: std::thread::JoinHandle<Vec<(u64, Instant)>>,
}

impl ArrivalClock {
    fn start(brokers: &str, topic: &str, within: Duration) -> anyhow::Result<ArrivalClock> {
        let c: BaseConsumer = consumer_config(brokers, &format!("bench-arrival-{}", suffix()))
            .set("fetch.wait.max.ms", "10")
            .create()?;
        c.subscribe(&[topic])?;
        let stop = Arc::new(AtomicBool::new(false));
        let stop2 = stop.clone();
        let thread = std::thread::spawn(move || {
            let deadline = Instant::now() + within;
            let mut seen = Vec::new();
            while !stop2.load(Ordering::Relaxed) && Instant::now() < deadline {
                let Some(Ok(m)) = c.poll(Duration::from_millis(50)) else { continue };
                if let Some(id) = m.payload().and_then(event_number) {
                    seen.push((id, Instant::now()));
                }
            }
            seen
        });
        Ok(ArrivalClock { stop, thread })
    }

    fn finish(self) -> Vec<(u64, Instant)> {
        self.stop.store(true, Ordering::Relaxed);
        self.thread.join().unwrap_or_default()
    }
}

/// The number in an event id written by [`impression`] or [`reward`].
fn event_number(payload: &[u8]) -> Option<u64> {
    let rest = payload.strip_prefix(br#"{"event_id":""#)?;
    let digits = rest.get(2..)?;
    let end = digits.iter().position(|b| !b.is_ascii_digit())?;
    std::str::from_utf8(&digits[..end]).ok()?.parse().ok()
}

/// Mean of a histogram from a scrape (`NAME_sum` / `NAME_count`).
fn histogram_mean(scrape: &str, name: &str) -> Option<f64> {
    let value = |suffix: &str| {
        let series = format!("{name}_{suffix} ");
        scrape.lines().find_map(|l| l.strip_prefix(&series)).and_then(|v| v.trim().parse::<f64>().ok())
    };
    let (sum, count) = (value("sum")?, value("count")?);
    (count > 0.0).then(|| sum / count)
}

struct Latency {
    rate: f64,
    impressions: u64,
    events: u64,
    p50_ms: f64,
    p99_ms: f64,
    max_ms: f64,
    unpublished: u64,
    cpu_s: f64,
    peak_mib: f64,
    /// Send → a plain consumer of the input topic: p50, p99, max (ms).
    transport_ms: (f64, f64, f64),
    /// Mean of the sidecar's own `apportion_publish_latency_seconds`, ms.
    sidecar_publish_ms: Option<f64>,
    /// p50, p99, max (ms) of the three legs of each impression's latency: sent → a plain
    /// consumer of the input topic has it; → the sidecar's `published_at_ms` of the first
    /// weights message counting it; → the harness has that message.
    legs: [(f64, f64, f64); 3],
    /// Impressions the three legs are measured on (those the plain consumer saw).
    legs_counted: u64,
}

fn percentile(sorted: &[f64], q: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    let rank = ((q * sorted.len() as f64).ceil() as usize).clamp(1, sorted.len());
    sorted[rank - 1]
}

fn latency_phase(env: &Env<'_>) -> anyhow::Result<Latency> {
    let a = env.a;
    let topic = format!("bench-latency-{}.events", suffix());
    create_topic(&a.brokers, &topic, a.partitions)?;
    let setup = SidecarSetup {
        brokers: &a.brokers,
        client: &a.sidecar_client,
        input_topic: &topic,
        partitions: a.partitions,
        publish_interval: a.publish_interval,
        min_change: 0.0,
        max_experiments: 10_000,
    };
    let mut sc = Sidecar::start(&a.apportion, &setup)?;
    sc.wait_ready(Duration::from_secs(120))?;
    let drain = Duration::from_secs_f64(a.publish_interval * 5.0 + 30.0);
    let reader = WeightsReader::start(&a.brokers, &sc.weights_topic(), true, Duration::from_secs(a.latency_seconds) + drain * 2)?;
    let clock = ArrivalClock::start(&a.brokers, &topic, Duration::from_secs(a.latency_seconds) + drain * 2)?;
    let scen = Scenario::new("lat", a.experiments, |e| [2, 3, 5, 10][e % 4]);
    let p = producer(&a.brokers, 1, 65_536)?;
    // Send instant of every event, indexed by the number in its id.
    let mut sent_at: Vec<Instant> = Vec::new();
    let mut rng = StdRng::seed_from_u64(a.seed ^ 0x5eed);
    let mut buf = String::with_capacity(256);
    // (experiment, arm) → send instant and event number of each impression, in order: index i
    // is pull i + 1.
    let mut sends: HashMap<(usize, usize), Vec<(Instant, u64)>> = HashMap::new();
    // Instants are turned into wall-clock milliseconds (to compare with the sidecar's
    // `published_at_ms`, same machine and clock) from this one pair.
    let (base_instant, base_unix_ms) = (Instant::now(), unix_ns() as f64 / 1e6);
    let unix_ms_of = |t: Instant| base_unix_ms + t.saturating_duration_since(base_instant).as_secs_f64() * 1000.0;
    let started = Instant::now();
    let length = Duration::from_secs(a.latency_seconds);
    let (mut sent, mut impressions) = (0u64, 0u64);
    let mut last_report = Instant::now();
    progress("latency", format!("offering {} events/s for {}s", a.latency_rate, a.latency_seconds));
    while started.elapsed() < length {
        let due = (a.latency_rate as f64 * started.elapsed().as_secs_f64()) as u64;
        while sent < due {
            let e = rng.gen_range(0..scen.experiments.len());
            let (exp, arms, rates) = &scen.experiments[e];
            let j = rng.gen_range(0..arms.len());
            let part = e as i32 % a.partitions;
            let ts = unix_ms();
            let now = Instant::now();
            if rng.gen_bool(rates[j]) {
                reward(&mut buf, sent, exp, &arms[j], ts);
            } else {
                impression(&mut buf, sent, exp, &arms[j], arms.len(), ts);
                sends.entry((e, j)).or_default().push((now, sent));
                impressions += 1;
            }
            sent_at.push(now);
            send(&p, &topic, part, exp, buf.as_bytes())?;
            sent += 1;
        }
        p.poll(Duration::ZERO);
        if last_report.elapsed() >= Duration::from_secs(5) {
            let msgs = reader.with(|s| s.messages);
            progress("latency", format!("{sent} events sent, {msgs} weights messages read"));
            last_report = Instant::now();
        }
        std::thread::sleep(Duration::from_millis(2));
    }
    flush(&p, Duration::from_secs(30))?;
    let offered = sent as f64 / started.elapsed().as_secs_f64();
    let want: HashMap<(usize, usize), u64> = sends.iter().map(|(k, v)| (*k, v.len() as u64)).collect();
    let until = Instant::now() + drain;
    while Instant::now() < until {
        let (done, of) = reader.with(|s| caught_up(s, &want, &scen));
        if done == of {
            break;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    let cpu_s = cpu_seconds(sc.proc.pid(), env.ticks).unwrap_or(f64::NAN);
    let peak_mib = status_mib(sc.proc.pid(), "VmHWM").unwrap_or(f64::NAN);
    let sidecar_publish_ms = http_get(&sc.addr, "/metrics")
        .ok()
        .and_then(|(_, body)| histogram_mean(&body, "apportion_publish_latency_seconds"))
        .map(|s| s * 1000.0);
    let arrivals = clock.finish();
    let mut arrived_at: Vec<Option<Instant>> = vec![None; sent as usize];
    for &(id, at) in &arrivals {
        if let Some(slot) = arrived_at.get_mut(id as usize) {
            *slot = Some(at);
        }
    }
    let mut transport: Vec<f64> = arrivals
        .iter()
        .filter_map(|&(id, at)| sent_at.get(id as usize).map(|s| at.saturating_duration_since(*s).as_secs_f64() * 1000.0))
        .collect();
    transport.sort_by(f64::total_cmp);
    if transport.len() as u64 != sent {
        eprintln!("warning: the plain consumer beside the sidecar saw {} of {sent} events", transport.len());
    }
    let seen = reader.finish();
    sc.stop();
    let seen = seen.lock().unwrap_or_else(|p| p.into_inner());
    if seen.bad > 0 {
        eprintln!("warning: {} weights messages could not be read", seen.bad);
    }
    let mut lat = Vec::with_capacity(impressions as usize);
    // The same latency in three legs, for impressions the plain consumer saw too: input topic
    // (sent → a plain consumer has it), sidecar (→ `published_at_ms` of the first message
    // counting it), weights topic (→ this harness has that message).
    let (mut leg_in, mut leg_sidecar, mut leg_out) = (Vec::new(), Vec::new(), Vec::new());
    let mut unpublished = 0u64;
    for ((e, j), times) in &sends {
        let (exp, arms, _) = &scen.experiments[*e];
        let empty = Vec::new();
        let published = seen.arms.get(exp).and_then(|m| m.get(&arms[*j])).unwrap_or(&empty);
        // Both lists are in order, and pulls only grow: one sweep pairs each pull with the first
        // message that counts it.
        let mut m = 0;
        for (i, (sent_at, id)) in times.iter().enumerate() {
            let k = i as u64 + 1;
            while m < published.len() && published[m].0 < k {
                m += 1;
            }
            match published.get(m) {
                Some(&(_, at, published_ms)) => {
                    lat.push(at.saturating_duration_since(*sent_at).as_secs_f64() * 1000.0);
                    if let Some(Some(arrived)) = arrived_at.get(*id as usize) {
                        leg_in.push(arrived.saturating_duration_since(*sent_at).as_secs_f64() * 1000.0);
                        leg_sidecar.push(published_ms as f64 - unix_ms_of(*arrived));
                        leg_out.push(unix_ms_of(at) - published_ms as f64);
                    }
                }
                None => unpublished += 1,
            }
        }
    }
    lat.sort_by(f64::total_cmp);
    let legs = [&mut leg_in, &mut leg_sidecar, &mut leg_out].map(|v| {
        v.sort_by(f64::total_cmp);
        (percentile(v, 0.50), percentile(v, 0.99), v.last().copied().unwrap_or(f64::NAN))
    });
    Ok(Latency {
        legs,
        legs_counted: leg_in.len() as u64,
        rate: offered,
        impressions,
        events: sent,
        p50_ms: percentile(&lat, 0.50),
        p99_ms: percentile(&lat, 0.99),
        max_ms: lat.last().copied().unwrap_or(f64::NAN),
        unpublished,
        cpu_s,
        peak_mib,
        transport_ms: (percentile(&transport, 0.50), percentile(&transport, 0.99), transport.last().copied().unwrap_or(f64::NAN)),
        sidecar_publish_ms,
    })
}

// ---------------------------------------------------------------------------------------------
// Phase 4: memory.

struct Memory {
    experiments: usize,
    arms: usize,
    events: u64,
    arms_published: usize,
    peak_before_scrape_mib: f64,
    peak_after_scrape_mib: f64,
    rss_end_mib: f64,
    scrape_bytes: usize,
    scrape_s: f64,
}

fn memory_phase(env: &Env<'_>) -> anyhow::Result<Memory> {
    let a = env.a;
    let topic = format!("bench-memory-{}.events", suffix());
    create_topic(&a.brokers, &topic, a.partitions)?;
    let scen = Scenario::new("mem", a.memory_experiments, |_| a.memory_arms);
    let setup = SidecarSetup {
        brokers: &a.brokers,
        client: &a.sidecar_client,
        input_topic: &topic,
        partitions: a.partitions,
        publish_interval: a.publish_interval,
        min_change: 0.0,
        max_experiments: a.memory_experiments * 2,
    };
    let mut sc = Sidecar::start(&a.apportion, &setup)?;
    sc.wait_ready(Duration::from_secs(120))?;
    let timeout = Duration::from_secs(a.timeout);
    let reader = WeightsReader::start(&a.brokers, &sc.weights_topic(), false, timeout * 2)?;
    let p = producer(&a.brokers, 50, 1_000_000)?;
    let mut buf = String::with_capacity(256);
    let mut sent = 0u64;
    let started = Instant::now();
    for _ in 0..a.memory_impressions {
        for (e, (exp, arms, _)) in scen.experiments.iter().enumerate() {
            for arm in arms {
                impression(&mut buf, sent, exp, arm, arms.len(), unix_ms());
                send(&p, &topic, e as i32 % a.partitions, exp, buf.as_bytes())?;
                sent += 1;
            }
            p.poll(Duration::ZERO);
        }
    }
    flush(&p, timeout)?;
    progress("memory", format!("{sent} events sent for {} experiments × {} arms", a.memory_experiments, a.memory_arms));
    let want: HashMap<(usize, usize), u64> = scen
        .experiments
        .iter()
        .enumerate()
        .flat_map(|(e, (_, arms, _))| (0..arms.len()).map(move |j| ((e, j), a.memory_impressions)))
        .collect();
    let mut last_report = Instant::now();
    let arms_published = loop {
        if let Some(status) = sc.proc.exited() {
            bail!("the sidecar exited ({status}) during the memory phase:\n{}", sc.log_tail());
        }
        let (done, of) = reader.with(|s| caught_up(s, &want, &scen));
        if done == of {
            break done;
        }
        if started.elapsed() > timeout {
            bail!("memory phase: weights of only {done} of {of} arms published within {timeout:?}:\n{}", sc.log_tail());
        }
        if last_report.elapsed() >= Duration::from_secs(5) {
            progress("memory", format!("weights published for {done}/{of} arms"));
            last_report = Instant::now();
        }
        std::thread::sleep(Duration::from_millis(200));
    };
    // One more publish round and a snapshot interval, so the steady state is what is measured.
    std::thread::sleep(Duration::from_secs_f64(a.publish_interval * 2.0).max(Duration::from_secs(11)));
    let pid = sc.proc.pid();
    let before = status_mib(pid, "VmHWM").unwrap_or(f64::NAN);
    let t = Instant::now();
    let (status, body) = http_get(&sc.addr, "/metrics").context("cannot scrape the sidecar")?;
    let scrape_s = t.elapsed().as_secs_f64();
    if status != 200 {
        bail!("GET /metrics answered {status}");
    }
    let after = status_mib(pid, "VmHWM").unwrap_or(f64::NAN);
    let rss = status_mib(pid, "VmRSS").unwrap_or(f64::NAN);
    drop(reader.finish());
    sc.stop();
    Ok(Memory {
        experiments: a.memory_experiments,
        arms: a.memory_arms,
        events: sent,
        arms_published,
        peak_before_scrape_mib: before,
        peak_after_scrape_mib: after,
        rss_end_mib: rss,
        scrape_bytes: body.len(),
        scrape_s,
    })
}

// ---------------------------------------------------------------------------------------------
// The whole run.

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    match v.len() {
        0 => f64::NAN,
        n if n % 2 == 1 => v[n / 2],
        n => (v[n / 2 - 1] + v[n / 2]) / 2.0,
    }
}

fn all(a: AllArgs) -> anyhow::Result<()> {
    if a.events == 0 || a.rounds == 0 || a.experiments == 0 || a.partitions < 1 {
        bail!("--events, --rounds, --experiments and --partitions must be at least 1");
    }
    if !a.apportion.is_file() {
        bail!("--apportion {}: no such file; build it with cargo build --release", a.apportion.display());
    }
    let mut also: Vec<(String, PathBuf)> = Vec::new();
    for spec in &a.also {
        let (name, file) = spec.split_once('=').ok_or_else(|| anyhow!("--also {spec}: expected NAME=FILE"))?;
        let file = PathBuf::from(file);
        if !file.is_file() {
            bail!("--also {spec}: no such file");
        }
        also.push((name.to_string(), file));
    }
    let env = Env { a: &a, ticks: clock_ticks() };
    let topic = format!("bench-throughput-{}.events", suffix());
    create_topic(&a.brokers, &topic, a.partitions)?;
    let scen = Scenario::new("exp", a.experiments, |e| [2, 3, 5, 10][e % 4]);
    progress("fill", format!("{} events, {} experiments, {} arms, {} partitions → {topic}", a.events, a.experiments, scen.arm_count(), a.partitions));
    let fill_s = fill(&a.brokers, &topic, a.partitions, &scen, a.events, a.seed, Duration::from_secs(a.timeout))?;
    progress("fill", format!("done in {fill_s:.1}s ({:.0} events/s)", a.events as f64 / fill_s));

    let mut rounds = Vec::new();
    for r in 1..=a.rounds {
        progress("throughput", format!("round {r}/{}: a, bare consumer", a.rounds));
        let x = round_bare(&env, &topic, a.events, r, Floor::Plain)?;
        progress("throughput", format!("a{r}: {:.0} events/s, {:.2} CPU s", x.rate(), x.cpu_s));
        rounds.push(x);
        for (skip, floor) in [(a.skip_reading_floor, Floor::Reading), (a.skip_batch_floor, Floor::Batched)] {
            if skip {
                continue;
            }
            progress("throughput", format!("round {r}/{}: {}", a.rounds, floor.who()));
            let x = round_bare(&env, &topic, a.events, r, floor)?;
            progress("throughput", format!("{}{r}: {:.0} events/s, {:.2} CPU s", &floor.who()[..1], x.rate(), x.cpu_s));
            rounds.push(x);
        }
        progress("throughput", format!("round {r}/{}: b, apportion run", a.rounds));
        let x = round_sidecar(&env, &topic, a.events, r, &a.apportion, "b: apportion run".into())?;
        progress("throughput", format!("b{r}: {:.0} events/s, {:.2} CPU s", x.rate(), x.cpu_s));
        rounds.push(x);
        for (name, file) in &also {
            progress("throughput", format!("round {r}/{}: b {name}", a.rounds));
            let x = round_sidecar(&env, &topic, a.events, r, file, format!("b {name}: apportion run"))?;
            progress("throughput", format!("b {name} {r}: {:.0} events/s, {:.2} CPU s", x.rate(), x.cpu_s));
            rounds.push(x);
        }
    }

    let latency = if a.skip_latency { None } else { Some(latency_phase(&env)?) };
    let memory = if a.memory_experiments == 0 {
        None
    } else {
        progress("memory", format!("{} experiments × {} arms", a.memory_experiments, a.memory_arms));
        Some(memory_phase(&env)?)
    };

    let md = summary(&a, &scen, fill_s, &rounds, latency.as_ref(), memory.as_ref());
    println!("\n{md}");
    if let Some(path) = &a.markdown {
        std::fs::write(path, &md).with_context(|| format!("cannot write {}", path.display()))?;
        progress("summary", format!("written to {}", path.display()));
    }
    Ok(())
}

fn summary(a: &AllArgs, sc: &Scenario, fill_s: f64, rounds: &[Round], lat: Option<&Latency>, mem: Option<&Memory>) -> String {
    let mut s = String::new();
    let label = if a.label.is_empty() { String::new() } else { format!(" ({})", a.label) };
    let _ = writeln!(s, "### Pipeline benchmark{label}\n");
    let _ = writeln!(
        s,
        "Throughput topic: {} events, {} experiments, {} arms, {} partitions, filled in {:.1} s ({:.0} events/s).\n",
        a.events,
        a.experiments,
        sc.arm_count(),
        a.partitions,
        fill_s,
        a.events as f64 / fill_s
    );
    let _ = writeln!(s, "| process | round | events/s | window s | CPU s | CPU s in window | CPU s / M events | peak RSS MiB | broker CPU s in window |");
    let _ = writeln!(s, "|---|---|---|---|---|---|---|---|---|");
    for r in rounds {
        let broker = r.broker_cpu_window_s.map_or("—".to_string(), |b| format!("{b:.2}"));
        let _ = writeln!(
            s,
            "| {} | {} | {:.0} | {:.2} | {:.2} | {:.2} | {:.2} | {:.1} | {broker} |",
            r.who,
            r.round,
            r.rate(),
            r.window_s,
            r.cpu_s,
            r.cpu_window_s,
            r.cpu_per_million(),
            r.peak_mib
        );
    }
    let med = |who: &str, f: &dyn Fn(&Round) -> f64| median(rounds.iter().filter(|r| r.who.starts_with(who)).map(f).collect());
    let (ra, rb) = (med("a", &Round::rate), med("b:", &Round::rate));
    let (ca, cb) = (med("a", &Round::cpu_per_million), med("b:", &Round::cpu_per_million));
    let (wa, wb) = (med("a", &Round::cpu_window_per_million), med("b:", &Round::cpu_window_per_million));
    let _ = writeln!(s, "\nMedians over rounds:\n");
    let _ = writeln!(s, "| figure | a: bare | b: apportion | b/a | target |");
    let _ = writeln!(s, "|---|---|---|---|---|");
    let _ = writeln!(s, "| events/s | {ra:.0} | {rb:.0} | {:.2} | ≥ 0.9 |", rb / ra);
    let _ = writeln!(s, "| CPU s / M events (whole process) | {ca:.2} | {cb:.2} | {:.2} | ≤ 1.5 |", cb / ca);
    let _ = writeln!(s, "| CPU s / M events (in window) | {wa:.2} | {wb:.2} | {:.2} | — |", wb / wa);
    let _ = writeln!(
        s,
        "| peak RSS MiB | {:.1} | {:.1} | {:.2} | — |",
        med("a", &|r| r.peak_mib),
        med("b:", &|r| r.peak_mib),
        med("b:", &|r| r.peak_mib) / med("a", &|r| r.peak_mib)
    );
    for (name, _) in a.also.iter().filter_map(|s| s.split_once('=')) {
        let who = format!("b {name}:");
        let (cx, wx) = (med(&who, &Round::cpu_per_million), med(&who, &Round::cpu_window_per_million));
        let _ = writeln!(
            s,
            "\nb {name}: {:.0} events/s, {cx:.2} CPU s / M events ({wx:.2} in window); against b: CPU {:.3} ({:.3} in window), \
             events/s {:.3}.",
            med(&who, &Round::rate),
            cx / cb,
            wx / wb,
            med(&who, &Round::rate) / rb
        );
    }
    if rounds.iter().any(|r| r.who.starts_with('c')) {
        let (cc, wc) = (med("c", &Round::cpu_per_million), med("c", &Round::cpu_window_per_million));
        let _ = writeln!(
            s,
            "\nc: a bare consumer that also reads every payload byte (the least any consumer of the events does): \
             {:.0} events/s, {cc:.2} CPU s / M events ({wc:.2} in window); b/c = {:.2} ({:.2} in window).",
            med("c", &Round::rate),
            cb / cc,
            wb / wc
        );
    }
    if rounds.iter().any(|r| r.who.starts_with('d')) {
        let (cd, wd) = (med("d", &Round::cpu_per_million), med("d", &Round::cpu_window_per_million));
        let _ = writeln!(
            s,
            "\nd: a bare consumer taking messages with librdkafka's batch call, as the sidecar does (the client's \
             floor for the sidecar's way of reading): {:.0} events/s, {cd:.2} CPU s / M events ({wd:.2} in window); \
             b/d = {:.2} ({:.2} in window).",
            med("d", &Round::rate),
            cb / cd,
            wb / wd
        );
    }
    if let Some(l) = lat {
        let target = a.publish_interval * 1000.0 + 50.0;
        let _ = writeln!(
            s,
            "\nLatency (event sent → first weights message counting it, publish interval {} s, min_change 0): \
             {:.0} events/s offered for {} s, {} impressions of {} events.\n",
            a.publish_interval, l.rate, a.latency_seconds, l.impressions, l.events
        );
        let _ = writeln!(s, "| path | p50 ms | p99 ms | max ms | target p99 ms |");
        let _ = writeln!(s, "|---|---|---|---|---|");
        let _ = writeln!(s, "| event sent → weights message received | {:.0} | {:.0} | {:.0} | ≤ {target:.0} |", l.p50_ms, l.p99_ms, l.max_ms);
        let (t50, t99, tmax) = l.transport_ms;
        let _ = writeln!(s, "| event sent → received by a plain consumer (broker floor) | {t50:.0} | {t99:.0} | {tmax:.0} | — |");
        let _ = writeln!(
            s,
            "\nThe same latency in legs ({} impressions; wall-clock milliseconds, one machine and clock):\n",
            l.legs_counted
        );
        let _ = writeln!(s, "| leg | p50 ms | p99 ms | max ms | held by |");
        let _ = writeln!(s, "|---|---|---|---|---|");
        for (name, by, (p50, p99, max)) in [
            ("sent → a plain consumer of the input topic has it", "broker (input topic)", l.legs[0]),
            ("→ the sidecar publishes the first weights message counting it (`published_at_ms`)", "sidecar (and its fetches)", l.legs[1]),
            ("→ the harness has that weights message", "broker (weights topic)", l.legs[2]),
        ] {
            let _ = writeln!(s, "| {name} | {p50:.0} | {p99:.0} | {max:.0} | {by} |");
        }
        let own = l.sidecar_publish_ms.map_or("—".to_string(), |m| format!("{m:.0}"));
        let _ = writeln!(
            s,
            "\nImpressions never counted by a published message: {}. Sidecar: {:.2} CPU s, peak RSS {:.1} MiB, \
             mean of its own apportion_publish_latency_seconds (first event applied → publish) {own} ms.",
            l.unpublished, l.cpu_s, l.peak_mib
        );
    }
    if let Some(m) = mem {
        let _ = writeln!(
            s,
            "\nMemory: {} experiments × {} arms, {} events; weights seen for {} arms.\n",
            m.experiments, m.arms, m.events, m.arms_published
        );
        let _ = writeln!(s, "| peak RSS MiB before a scrape | peak RSS MiB after one /metrics scrape | RSS MiB at end | /metrics size MB | scrape s | target |");
        let _ = writeln!(s, "|---|---|---|---|---|---|");
        let _ = writeln!(
            s,
            "| {:.1} | {:.1} | {:.1} | {:.1} | {:.2} | ≤ 100 MB |",
            m.peak_before_scrape_mib,
            m.peak_after_scrape_mib,
            m.rss_end_mib,
            m.scrape_bytes as f64 / 1e6,
            m.scrape_s
        );
    }
    s
}
