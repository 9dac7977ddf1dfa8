//! The per-partition state and everything done to it: apply events, publish weights, write and
//! load snapshots. One thread drives it (see `source.rs`); rebalance callbacks run on that same
//! thread, between messages, so a snapshot always matches its offset exactly.

use std::collections::{BTreeMap, HashMap};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::message::{Header, Message, OwnedHeaders};
use rdkafka::producer::{BaseProducer, BaseRecord, DeliveryResult, Producer, ProducerContext};
use rdkafka::{ClientContext, Offset, TopicPartitionList};
use rustc_hash::FxHashMap;

use super::counts::{self, Cells, Outcome};
use super::dedup::DedupWindow;
use super::publish::WeightsMessage;
use super::snapshot::{self, Counters, Pointer, Snapshot, SnapshotOut, Stored};
use crate::clock::now_ms;
use crate::config::{Config, ResolvedExperiment};
use crate::core::{Experiment, ExperimentSpec, Observation, Refusal};
use crate::event::{self, Kind, Reason};
use crate::telemetry::http::Served;
use crate::telemetry::table::{ArmRow, ExperimentRow};
use crate::telemetry::Metrics;
use prometheus::IntCounter;

/// Counts deliveries that failed, so that a snapshot is only trusted once it has landed; wakes
/// the thread that serves delivery reports when something is sent.
#[derive(Default)]
pub struct DeliveryWatch {
    pub failed: AtomicU64,
    /// The thread serving delivery reports ([`serve_deliveries`]), which sleeps while nothing
    /// is in flight.
    pub server: std::sync::OnceLock<std::thread::Thread>,
}

impl DeliveryWatch {
    /// Wakes the delivery report thread if it sleeps (an atomic swap when it does not).
    pub fn wake(&self) {
        if let Some(t) = self.server.get() {
            t.unpark();
        }
    }
}

impl ClientContext for DeliveryWatch {}

impl ProducerContext for DeliveryWatch {
    type DeliveryOpaque = ();
    fn delivery(&self, result: &DeliveryResult<'_>, _: ()) {
        if let Err((e, m)) = result {
            self.failed.fetch_add(1, Ordering::SeqCst);
            tracing::error!(topic = m.topic(), partition = m.partition(), "delivery failed: {e}");
        }
    }
}

/// The producer of weights, snapshots and dead letters. Its delivery reports are served every
/// 10 ms by a small thread ([`serve_deliveries`], started in `stream::run`) while any message is
/// in flight, while a full queue drains, and by `flush`. (The rdkafka crate's `ThreadedProducer`
/// polls with a 100 ms timeout that spins through the last millisecond of each wait: about 1 % of
/// a core.)
pub type Sink = BaseProducer<DeliveryWatch>;

/// How many of a partition's newest snapshots a restore weighs against each other.
const CANDIDATES: usize = 8;

/// Called with each state-topic message read: offset, key, value.
type StateVisitor<'a> = dyn FnMut(i64, Option<&[u8]>, &[u8]) + 'a;

/// Settings the pipeline needs, resolved from configuration once.
pub struct Settings {
    pub input_topic: String,
    pub weights_topic: String,
    pub state_topic: String,
    pub dead_letter_topic: String,
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
}

struct Entry {
    exp: Experiment,
    /// Impressions applied since the last publish: the batch the next weights are for.
    impressions_since: u64,
    changed: bool,
    first_applied: Option<Instant>,
    last_published: Option<Instant>,
}

impl Entry {
    fn new(exp: Experiment) -> Entry {
        Entry { exp, impressions_since: 0, changed: true, first_applied: None, last_published: None }
    }
}

struct PartitionState {
    next_offset: i64,
    experiments: FxHashMap<String, Entry>,
    dedup: DedupWindow,
    tally: Tally,
    /// Generation of the last snapshot written (or loaded) of this partition.
    generation: u64,
    /// The consumer group generation this instance was given the partition in.
    group_generation: i32,
    /// The part slot (0 or 1) of the newest complete snapshot written in parts; the next one
    /// goes to the other slot.
    complete_slot: u64,
    /// Set after taking the partition over at a snapshot's offset, until the first message
    /// shows that reading really started there (see [`Pipeline::on_message`]).
    resume_check: Option<ResumeCheck>,
}

/// What a partition counted, apart from its experiments so that both can be borrowed at once.
#[derive(Default)]
struct Tally {
    /// Dead letters, split events and unmatched rewards; the event counts live in `events`
    /// and are written into `counters.events` only when a snapshot is taken.
    counters: Counters,
    /// Events by kind and outcome, restored values included.
    events: Cells,
}

impl PartitionState {
    fn counters_for_snapshot(&self) -> Counters {
        let mut c = self.tally.counters.clone();
        c.events = self.tally.events.to_map();
        c
    }
}

/// Every experiment's state, serialised one experiment at a time.
struct States<'a>(&'a FxHashMap<String, Entry>);

impl serde::Serialize for States<'_> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        let mut m = s.serialize_map(Some(self.0.len()))?;
        for (id, e) in self.0 {
            m.serialize_entry(id, &e.exp.state())?;
        }
        m.end()
    }
}

/// Reading resumed at `target`; the consumer was last asked to read from `asked` (≤ target).
#[derive(Clone, Copy, Debug)]
struct ResumeCheck {
    target: i64,
    asked: i64,
}

/// What applying an event needs besides the partition's own state.
struct Ctx {
    s: Arc<Settings>,
    served: Arc<Served>,
    sink: Arc<Sink>,
    /// `apportion_events_total` handles, one per cell of [`Cells`].
    events: Vec<IntCounter>,
    /// Events counted since the handles above were last brought up to date: they are, once
    /// per batch of messages ([`Pipeline::export_counts`]), not per event, since every
    /// increment of a shared counter is an atomic write the consumer thread waits for.
    unexported: Cells,
    /// Remembers the shapes of recent events, which most events repeat.
    decoder: event::Decoder,
}

/// One input message.
struct Msg<'a> {
    partition: i32,
    offset: i64,
    key: Option<&'a [u8]>,
    bytes: &'a [u8],
}

/// Which experiments this instance holds, and which partition's copy publishes each.
#[derive(Default)]
struct Holdings {
    /// Experiment → the partition whose copy publishes it (the first to see it).
    owners: FxHashMap<String, i32>,
    /// Experiments held over all partitions (for `limits.experiments`).
    held: usize,
}

pub struct Pipeline {
    ctx: Ctx,
    state_reader: BaseConsumer,
    state_partitions: i32,
    partitions: BTreeMap<i32, PartitionState>,
    holdings: Holdings,
    /// Per input partition this instance let go of, its counts at that moment: what this
    /// process's counters hold of it, should it come back (see `counts.rs`).
    released: FxHashMap<i32, Counters>,
    /// Set once shutdown began: snapshots written from then on are the writer's last.
    closing: bool,
    last_publish: Instant,
    last_snapshot: Instant,
}

impl Ctx {
    fn metrics(&self) -> &Metrics {
        &self.served.metrics
    }

    fn count(&mut self, tally: &mut Tally, kind: counts::Kind, outcome: Outcome) {
        self.unexported.add(kind, outcome);
        tally.events.add(kind, outcome);
    }

    fn reject(&mut self, tally: &mut Tally, msg: &Msg<'_>, reason: Reason, kind: counts::Kind) {
        self.count(tally, kind, Outcome::Rejected);
        self.metrics().dead_letters.with_label_values(&[reason.code()]).inc();
        *tally.counters.dead_letters.entry(reason.code().to_string()).or_default() += 1;
        let source = format!("{}/{}/{}", self.s.input_topic, msg.partition, msg.offset);
        let headers = OwnedHeaders::new()
            .insert(Header { key: "apportion-reason", value: Some(reason.code()) })
            .insert(Header { key: "apportion-source", value: Some(&source) });
        let mut record: BaseRecord<'_, [u8], [u8]> = BaseRecord::to(&self.s.dead_letter_topic).payload(msg.bytes).headers(headers);
        if let Some(k) = msg.key {
            record = record.key(k);
        }
        send_with_retry(&self.sink, record);
    }

    /// A reward for an arm with no impressions: dead-lettered `unknown-arm`, and counted per
    /// experiment when the experiment is one this instance knows (declared, or held here), so
    /// that made-up experiment ids cannot create series.
    fn unmatched(&mut self, tally: &mut Tally, msg: &Msg<'_>, experiment: &str, known: bool) {
        if known {
            self.metrics().unmatched_rewards.with_label_values(&[experiment]).inc();
            *tally.counters.unmatched_rewards.entry(experiment.to_string()).or_default() += 1;
        }
        self.reject(tally, msg, Reason::UnknownArm, counts::Kind::Reward);
    }

    fn note_split(&self, tally: &mut Tally, experiment: &str) {
        self.metrics().split.with_label_values(&[experiment]).inc();
        *tally.counters.split.entry(experiment.to_string()).or_default() += 1;
    }

    /// Records which partition publishes `experiment`: the first to hold it.
    fn note_owner(&self, holdings: &mut Holdings, tally: &mut Tally, partition: i32, experiment: &str) {
        match holdings.owners.get(experiment) {
            None => {
                holdings.owners.insert(experiment.to_string(), partition);
            }
            Some(&owner) if owner != partition => {
                tracing::warn!(
                    experiment,
                    partitions = ?[owner, partition],
                    "experiment seen on more than one input partition; key its events by experiment id. Partition {owner} publishes it"
                );
                self.note_split(tally, experiment);
            }
            _ => {}
        }
    }

    /// Decodes, checks and applies one event, or dead-letters it with its reason.
    fn apply(&mut self, holdings: &mut Holdings, part: &mut PartitionState, msg: &Msg<'_>, now_ms: i64) {
        let PartitionState { experiments, dedup, tally, .. } = part;
        let ev = match self.decoder.decode(msg.bytes, self.s.max_event_bytes, now_ms, self.s.max_skew_ms) {
            Ok(ev) => ev,
            Err(reason) => return self.reject(tally, msg, reason, counts::Kind::Unknown),
        };
        let kind = counts::Kind::from(ev.kind);
        let id_hash = DedupWindow::hash(&ev.event_id);
        if dedup.contains_hash(id_hash) {
            return self.count(tally, kind, Outcome::Duplicate);
        }
        // The common case looks the experiment up once.
        if let Some(entry) = experiments.get_mut(ev.experiment.as_ref()) {
            if holdings.owners.get(ev.experiment.as_ref()).is_some_and(|&owner| owner != msg.partition) {
                self.note_split(tally, &ev.experiment);
            }
            return self.observe(entry, dedup, tally, msg, &ev, kind, id_hash);
        }
        // The experiment is not held on this partition. Only a valid impression creates it;
        // everything is checked on a new experiment of its own before it joins the state, so a
        // refused event leaves nothing behind.
        let declared = self.s.declared.get(ev.experiment.as_ref());
        let spec = match declared {
            Some(r) => Some((r.spec.clone(), r.arms.clone())),
            None => self.s.default_spec.clone().map(|s| (s, Vec::new())),
        };
        let Some((spec, arms)) = spec else {
            return self.reject(tally, msg, Reason::UnknownExperiment, kind);
        };
        if ev.kind == Kind::Reward {
            if !spec.reward.accepts(ev.reward) {
                return self.reject(tally, msg, Reason::RewardOutOfRange, kind);
            }
            let known = declared.is_some() || holdings.owners.contains_key(ev.experiment.as_ref());
            return self.unmatched(tally, msg, &ev.experiment, known);
        }
        if holdings.held >= self.s.max_experiments {
            return self.reject(tally, msg, Reason::TooManyExperiments, kind);
        }
        let mut exp = match Experiment::new(spec, &arms) {
            Ok(e) => e,
            Err(e) => {
                tracing::error!(experiment = %ev.experiment, "cannot create experiment: {e}");
                return self.reject(tally, msg, Reason::UnknownExperiment, kind);
            }
        };
        if exp.apply(&ev.arm, ev.ts_ms, Observation::Impression { count: ev.count }).is_err() {
            return self.reject(tally, msg, Reason::TooManyArms, kind);
        }
        let mut entry = Entry::new(exp);
        entry.impressions_since = ev.count;
        entry.first_applied = Some(Instant::now());
        experiments.insert(ev.experiment.to_string(), entry);
        holdings.held += 1;
        self.note_owner(holdings, tally, msg.partition, &ev.experiment);
        dedup.insert_new(id_hash);
        self.count(tally, kind, Outcome::Applied);
    }

    /// Applies a decoded, new event to its experiment's entry.
    #[allow(clippy::too_many_arguments)]
    fn observe(&mut self, entry: &mut Entry, dedup: &mut DedupWindow, tally: &mut Tally, msg: &Msg<'_>, ev: &event::Event<'_>, kind: counts::Kind, id_hash: u64) {
        let obs = match ev.kind {
            Kind::Impression => Observation::Impression { count: ev.count },
            Kind::Reward => Observation::Reward { value: ev.reward },
        };
        match entry.exp.apply(&ev.arm, ev.ts_ms, obs) {
            Ok(_) => {}
            Err(Refusal::RewardOutOfRange) => return self.reject(tally, msg, Reason::RewardOutOfRange, kind),
            Err(Refusal::TooManyArms) => return self.reject(tally, msg, Reason::TooManyArms, kind),
            Err(Refusal::UnknownArm) => return self.unmatched(tally, msg, &ev.experiment, true),
        }
        if let Observation::Impression { count } = obs {
            entry.impressions_since = entry.impressions_since.saturating_add(count);
        }
        entry.changed = true;
        if entry.first_applied.is_none() {
            entry.first_applied = Some(Instant::now());
        }
        dedup.insert_new(id_hash);
        self.count(tally, kind, Outcome::Applied);
    }
}

impl Pipeline {
    pub fn new(s: Arc<Settings>, served: Arc<Served>, sink: Arc<Sink>, state_reader: BaseConsumer, state_partitions: i32) -> Self {
        // An event of unknown kind is never applied nor a duplicate: those two cells count
        // nothing, so they get no series.
        let events = (0..counts::CELLS)
            .map(|i| {
                let (kind, outcome) = Cells::labels(i);
                if Cells::counts_anything(i) {
                    served.metrics.events.with_label_values(&[kind, outcome])
                } else {
                    IntCounter::new("apportion_unused", "never exported").expect("a valid name")
                }
            })
            .collect();
        Pipeline {
            ctx: Ctx { s, served, sink, events, unexported: Cells::default(), decoder: event::Decoder::default() },
            state_reader,
            state_partitions: state_partitions.max(1),
            partitions: BTreeMap::new(),
            holdings: Holdings::default(),
            released: FxHashMap::default(),
            closing: false,
            last_publish: Instant::now(),
            last_snapshot: Instant::now(),
        }
    }

    /// Marks the start of shutdown: the snapshots written from now on hand the partitions to
    /// whoever comes next, counts included.
    pub fn begin_closing(&mut self) {
        self.closing = true;
    }

    /// Applies one message of input partition `partition` at `offset`. Returns an offset to
    /// read the partition from again when the broker skipped past the resume offset.
    ///
    /// Some brokers (tansu 0.6, seen here) answer a fetch from an offset inside a record batch
    /// with the *next* batch, silently skipping the rest of the one asked for. A snapshot's
    /// offset usually falls inside a batch, so after taking a partition over the first message
    /// is checked: if it lies beyond the resume offset, the partition is read again from
    /// further back (messages before the resume offset are passed over) until a message at or
    /// before it arrives, or reading from offset 0 shows the gap is real (compaction, markers).
    pub fn on_message(&mut self, partition: i32, offset: i64, key: Option<&[u8]>, payload: Option<&[u8]>, now_ms: i64) -> Option<i64> {
        let part = self.partitions.get_mut(&partition)?;
        if let Some(check) = part.resume_check {
            if offset <= check.target || check.asked == 0 {
                part.resume_check = None;
            } else {
                let back = (4 * (check.target - check.asked)).max(1024);
                let asked = (check.target - back).max(0);
                tracing::info!(
                    partition,
                    resume = check.target,
                    first = offset,
                    "the broker skipped past the resume offset; reading again from offset {asked}"
                );
                part.resume_check = Some(ResumeCheck { target: check.target, asked });
                return Some(asked);
            }
        }
        if offset >= part.next_offset {
            let msg = Msg { partition, offset, key, bytes: payload.unwrap_or_default() };
            self.ctx.apply(&mut self.holdings, part, &msg, now_ms);
            part.next_offset = offset + 1;
        }
        None
    }

    /// Publishes the weights of every experiment that is due, and refreshes the figures the
    /// HTTP side serves for every experiment that changed. Called between messages.
    pub fn publish_due(&mut self, force: bool) {
        let s = &self.ctx.s;
        if !force && self.last_publish.elapsed() < s.publish_interval {
            return;
        }
        self.last_publish = Instant::now();
        let now = now_ms();
        let metrics = self.ctx.metrics();
        let mut updates: Vec<(String, ExperimentRow)> = Vec::new();
        for (&partition, part) in self.partitions.iter_mut() {
            for (id, e) in part.experiments.iter_mut() {
                if self.holdings.owners.get(id) != Some(&partition) {
                    continue;
                }
                let heartbeat = e.last_published.is_none_or(|t| t.elapsed() >= s.heartbeat);
                if !(e.changed || heartbeat) {
                    continue;
                }
                let weights = e.exp.weights(now, e.impressions_since.max(1));
                let moved = e
                    .exp
                    .last_weights()
                    .iter()
                    .zip(&weights)
                    .map(|(a, b)| if a.is_finite() { (a - b).abs() } else { f64::INFINITY })
                    .fold(0.0, f64::max);
                let new_arm = weights.len() != e.exp.last_weights().len();
                let publish = e.exp.version() == 0 || heartbeat || new_arm || moved >= s.min_change;
                let report = if publish {
                    let version = e.exp.commit(&weights);
                    let alloc = crate::core::Allocation { version, weights, report: e.exp.report(now) };
                    let msg = WeightsMessage::new(id, &e.exp, &alloc, now);
                    match serde_json::to_vec(&msg) {
                        Ok(bytes) => {
                            let record = BaseRecord::to(&s.weights_topic).key(id.as_bytes()).payload(&bytes[..]);
                            send_with_retry(&self.ctx.sink, record);
                        }
                        Err(err) => tracing::error!(experiment = %id, "cannot encode weights: {err}"),
                    }
                    if let Some(t) = e.first_applied.take() {
                        metrics.publish_latency.observe(t.elapsed().as_secs_f64());
                    }
                    e.last_published = Some(Instant::now());
                    e.impressions_since = 0;
                    alloc.report
                } else {
                    e.exp.report(now)
                };
                e.changed = false;
                updates.push((id.clone(), row(partition, &e.exp, &report, publish.then_some(now))));
            }
        }
        if updates.is_empty() {
            return;
        }
        let mut table = self.ctx.served.table.write().unwrap_or_else(|p| p.into_inner());
        for (id, mut r) in updates {
            if r.published_ms.is_none() {
                // Not published this round: the time of the last publish stands.
                r.published_ms = table.rows.get(&id).and_then(|old| old.published_ms);
            }
            table.rows.insert(id, r);
        }
    }

    /// Writes the snapshots of `partitions` and waits until they have landed. Returns the
    /// offsets that may be committed to the group (for lag reporting only).
    ///
    /// A snapshot larger than `snapshot_part_bytes` is written in parts; its pointer follows
    /// only once every part has landed, so a reader never finds a pointer to missing parts.
    ///
    /// `handing_over` marks snapshots written as the partitions go to another member while
    /// this one stays (see `counts.rs`).
    pub fn snapshot(&mut self, partitions: &[i32], handing_over: bool) -> Vec<(i32, i64)> {
        let written_at_ms = now_ms();
        let failed_before = self.ctx.sink.context().failed.load(Ordering::SeqCst);
        let mut done = Vec::new();
        let mut pointers: Vec<Pointer> = Vec::new();
        for &p in partitions {
            let Some(part) = self.partitions.get_mut(&p) else { continue };
            part.generation += 1;
            let duplicates = part.dedup.ids();
            let counters = part.counters_for_snapshot();
            let snap = SnapshotOut {
                format: snapshot::FORMAT,
                topic: &self.ctx.s.input_topic,
                partition: p,
                next_offset: part.next_offset,
                generation: part.generation,
                written_at_ms,
                group_generation: part.group_generation,
                handed_over: handing_over && !self.closing,
                experiments: States(&part.experiments),
                duplicates: &duplicates,
                counters: &counters,
            };
            let bytes = match snap.encode() {
                Ok(b) => b,
                Err(e) => {
                    tracing::error!(partition = p, "cannot encode snapshot: {e}");
                    continue;
                }
            };
            let sp = p % self.state_partitions;
            if bytes.len() <= self.ctx.s.snapshot_part_bytes {
                let key = snapshot::key(&self.ctx.s.input_topic, p);
                send_with_retry(&self.ctx.sink, BaseRecord::to(&self.ctx.s.state_topic).key(key.as_bytes()).payload(&bytes[..]).partition(sp));
            } else {
                let slot = 1 - part.complete_slot;
                let chunks: Vec<&[u8]> = bytes.chunks(self.ctx.s.snapshot_part_bytes).collect();
                for (i, chunk) in chunks.iter().enumerate() {
                    let key = snapshot::part_key(&self.ctx.s.input_topic, p, slot, i as u32);
                    let value = snapshot::encode_part(part.generation, i as u32, chunk);
                    send_with_retry(&self.ctx.sink, BaseRecord::to(&self.ctx.s.state_topic).key(key.as_bytes()).payload(&value[..]).partition(sp));
                }
                pointers.push(Pointer {
                    format: snapshot::FORMAT,
                    topic: self.ctx.s.input_topic.clone(),
                    partition: p,
                    generation: part.generation,
                    slot,
                    group_generation: part.group_generation,
                    parts: chunks.len() as u32,
                    bytes: bytes.len() as u64,
                    checksum: snapshot::fnv1a(&bytes),
                });
            }
            done.push((p, part.next_offset));
        }
        if !pointers.is_empty() {
            if !self.landed(failed_before) {
                return Vec::new();
            }
            for ptr in &pointers {
                let key = snapshot::key(&self.ctx.s.input_topic, ptr.partition);
                match serde_json::to_vec(ptr) {
                    Ok(value) => send_with_retry(
                        &self.ctx.sink,
                        BaseRecord::to(&self.ctx.s.state_topic)
                            .key(key.as_bytes())
                            .payload(&value[..])
                            .partition(ptr.partition % self.state_partitions),
                    ),
                    Err(e) => tracing::error!(partition = ptr.partition, "cannot encode a snapshot pointer: {e}"),
                }
            }
        }
        if !self.landed(failed_before) {
            return Vec::new();
        }
        for ptr in &pointers {
            if let Some(part) = self.partitions.get_mut(&ptr.partition) {
                part.complete_slot = ptr.slot;
            }
        }
        let secs = written_at_ms as f64 / 1000.0;
        for &(p, _) in &done {
            self.ctx.metrics().snapshot_time.with_label_values(&[&p.to_string()]).set(secs);
        }
        self.last_snapshot = Instant::now();
        done
    }

    /// Waits until everything sent has been acknowledged; false if something was not.
    fn landed(&self, failed_before: u64) -> bool {
        if let Err(e) = self.ctx.sink.flush(Duration::from_secs(30)) {
            tracing::error!("snapshots not confirmed by the broker: {e}");
            return false;
        }
        if self.ctx.sink.context().failed.load(Ordering::SeqCst) != failed_before {
            tracing::error!("a snapshot was not delivered; offsets are not committed");
            return false;
        }
        true
    }

    /// How long until the next publish round is due (zero if it is): the consumer waits for
    /// messages no longer than this, so that rounds start on time even when input is sparse.
    pub fn until_publish(&self) -> Duration {
        self.ctx.s.publish_interval.saturating_sub(self.last_publish.elapsed())
    }

    /// Brings `apportion_events_total` up to date with the events counted since the last call.
    /// Called after every batch of messages.
    pub fn export_counts(&mut self) {
        for (counter, n) in self.ctx.events.iter().zip(self.ctx.unexported.0.iter_mut()) {
            if *n > 0 {
                counter.inc_by(std::mem::take(n));
            }
        }
    }

    pub fn snapshot_due(&mut self) -> Vec<(i32, i64)> {
        if self.last_snapshot.elapsed() < self.ctx.s.snapshot_interval {
            return Vec::new();
        }
        let all: Vec<i32> = self.partitions.keys().copied().collect();
        self.snapshot(&all, false)
    }

    pub fn owned_partitions(&self) -> Vec<i32> {
        self.partitions.keys().copied().collect()
    }

    /// Takes partitions over, given to this instance in consumer group generation
    /// `group_generation`: loads each one's preferred snapshot and returns where to resume.
    pub fn assign(&mut self, partitions: &[i32], group_generation: i32) -> Vec<(i32, Offset)> {
        let mut out = Vec::new();
        for &p in partitions {
            let started = Instant::now();
            let (snap, slot) = match self.load_snapshot(p) {
                Ok(Some((s, slot))) => (Some(s), slot),
                Ok(None) => (None, 1),
                Err(e) => {
                    tracing::error!(partition = p, "cannot read the state topic: {e}; the partition is not taken");
                    continue;
                }
            };
            let mut part = self.restore(p, snap);
            part.complete_slot = slot;
            part.group_generation = group_generation;
            if part.next_offset > 0 {
                part.resume_check = Some(ResumeCheck { target: part.next_offset, asked: part.next_offset });
            }
            out.push((p, if part.next_offset > 0 { Offset::Offset(part.next_offset) } else { Offset::Beginning }));
            tracing::info!(
                partition = p,
                next_offset = part.next_offset,
                experiments = part.experiments.len(),
                restore_ms = started.elapsed().as_millis() as u64,
                "partition assigned"
            );
            let ids: Vec<String> = part.experiments.keys().cloned().collect();
            self.holdings.held += ids.len();
            for id in ids {
                self.ctx.note_owner(&mut self.holdings, &mut part.tally, p, &id);
            }
            self.partitions.insert(p, part);
        }
        out
    }

    fn restore(&mut self, p: i32, snap: Option<Snapshot>) -> PartitionState {
        let Some(snap) = snap else {
            return PartitionState {
                next_offset: 0,
                experiments: FxHashMap::default(),
                dedup: DedupWindow::new(self.ctx.s.duplicate_window),
                tally: Tally::default(),
                generation: 0,
                group_generation: -1,
                complete_slot: 1,
                resume_check: None,
            };
        };
        // Publishes after the snapshot may have been lost with a crash; versions go up by at
        // least as many as could have been published since it was written.
        let since = (now_ms() - snap.written_at_ms).max(0) as f64;
        let lost = (since / self.ctx.s.publish_interval.as_millis().max(1) as f64).ceil() as u64 + 1;
        let mut experiments = FxHashMap::default();
        for (id, state) in snap.experiments {
            let (spec, arms) = match self.ctx.s.declared.get(&id) {
                Some(r) => (r.spec.clone(), r.arms.clone()),
                None => match &self.ctx.s.default_spec {
                    Some(s) => (s.clone(), Vec::new()),
                    None => {
                        tracing::warn!(experiment = %id, partition = p, "experiment in the snapshot is no longer declared; dropped");
                        continue;
                    }
                },
            };
            let version = state.version;
            match Experiment::restore(spec, &arms, state) {
                Ok(mut exp) => {
                    exp.raise_version(version + lost);
                    experiments.insert(id, Entry::new(exp));
                }
                Err(e) => tracing::error!(experiment = %id, partition = p, "cannot restore experiment under the current configuration: {e}"),
            }
        }
        let events = Cells::from_map(&snap.counters.events, |k| {
            tracing::warn!(partition = p, counter = %k, "unknown event counter in the snapshot; dropped")
        });
        let base = self.released.remove(&p).unwrap_or_default();
        if !snap.handed_over {
            self.count_restored(&counts::beyond(&snap.counters, &base));
        }
        PartitionState {
            next_offset: snap.next_offset,
            experiments,
            dedup: DedupWindow::restore(self.ctx.s.duplicate_window, &snap.duplicates),
            tally: Tally { counters: snap.counters, events },
            generation: snap.generation,
            group_generation: snap.group_generation,
            complete_slot: 1,
            resume_check: None,
        }
    }

    /// Adds counts restored from a snapshot to this process's counters.
    fn count_restored(&self, c: &Counters) {
        let cells = Cells::from_map(&c.events, |_| {});
        for (handle, &n) in self.ctx.events.iter().zip(cells.0.iter()) {
            handle.inc_by(n);
        }
        let m = self.ctx.metrics();
        for (reason, v) in &c.dead_letters {
            m.dead_letters.with_label_values(&[reason]).inc_by(*v);
        }
        for (exp, v) in &c.split {
            m.split.with_label_values(&[exp]).inc_by(*v);
        }
        for (exp, v) in &c.unmatched_rewards {
            m.unmatched_rewards.with_label_values(&[exp]).inc_by(*v);
        }
    }

    /// Hands partitions back: publishes what is due, snapshots them, drops their state and
    /// what the HTTP side shows of them. Returns the offsets to commit.
    ///
    /// With `lost`, the group already gave the partitions to another member (this one was
    /// fenced out: a pause past its session, a network split): nothing is written for them,
    /// since their new owner may have moved on, and their state is dropped as it is.
    pub fn revoke(&mut self, partitions: &[i32], lost: bool) -> Vec<(i32, i64)> {
        let offsets = if lost {
            tracing::warn!(partitions = ?partitions, "the assignment was lost; the partitions' state is dropped without writing");
            Vec::new()
        } else {
            self.publish_due(true);
            self.snapshot(partitions, true)
        };
        for p in partitions {
            if let Some(part) = self.partitions.remove(p) {
                self.released.insert(*p, part.counters_for_snapshot());
                self.holdings.held = self.holdings.held.saturating_sub(part.experiments.len());
                let mut table = self.ctx.served.table.write().unwrap_or_else(|e| e.into_inner());
                for id in part.experiments.keys() {
                    if self.holdings.owners.get(id) == Some(p) {
                        self.holdings.owners.remove(id);
                        table.rows.remove(id);
                    }
                    self.ctx.metrics().remove_experiment(id);
                }
                drop(table);
                let _ = self.ctx.metrics().snapshot_time.remove_label_values(&[&p.to_string()]);
                let _ = self.ctx.metrics().consumer_lag.remove_label_values(&[&self.ctx.s.input_topic, &p.to_string()]);
            }
            tracing::info!(partition = p, "partition handed over");
        }
        offsets
    }

    /// The newest readable snapshot of input partition `p` and, if it was written in parts,
    /// their slot. Reads the state topic's tail in growing steps (64, 256, 1024, … messages
    /// back from the end), so that restoring does not read the whole history. Each step reads
    /// through to the end: a broker may answer a read from inside a record batch with a later
    /// batch (see `on_message`), and reading on to the end keeps such a skip from hiding
    /// anything; the steps grow fourfold, so this reads at most 4/3 of the last step.
    fn load_snapshot(&self, p: i32) -> Result<Option<(Snapshot, u64)>, String> {
        let topic = &self.ctx.s.state_topic;
        let sp = p % self.state_partitions;
        let key = snapshot::key(&self.ctx.s.input_topic, p);
        let (low, high) = self
            .state_reader
            .fetch_watermarks(topic, sp, Duration::from_secs(10))
            .map_err(|e| format!("watermarks of {topic}/{sp}: {e}"))?;
        let mut start = high;
        let mut step = 64i64;
        // Offsets of the candidates already tried in an earlier step.
        let mut tried = std::collections::BTreeSet::new();
        let result = loop {
            if start <= low {
                break Ok(None);
            }
            start = (start - step).max(low);
            let mut found: Vec<(i64, Vec<u8>)> = Vec::new();
            // Some brokers (tansu 0.6) report a high watermark short of the last batch's
            // messages, so reading goes on past it until the partition is quiet.
            self.read_range(sp, start, high, true, &mut |offset, k, v| {
                if k == Some(key.as_bytes()) && !tried.contains(&offset) {
                    found.push((offset, v.to_vec()));
                }
            })?;
            found.sort_by_key(|(offset, _)| std::cmp::Reverse(*offset));
            tried.extend(found.iter().map(|(offset, _)| *offset));
            // The newest few are weighed against each other by group generation: a member that
            // lost the partition unawares writes at most a round or two after its new owner.
            let mut candidates: Vec<(i64, Stored)> = Vec::new();
            for (offset, bytes) in found.iter().take(CANDIDATES) {
                match Stored::decode(bytes) {
                    Ok(Stored::Whole(s)) if s.partition == p && s.topic == self.ctx.s.input_topic => {
                        candidates.push((*offset, Stored::Whole(s)));
                    }
                    Ok(Stored::Parts(ptr)) if ptr.partition == p && ptr.topic == self.ctx.s.input_topic => {
                        candidates.push((*offset, Stored::Parts(ptr)));
                    }
                    Ok(_) => {}
                    Err(e) => tracing::error!(partition = p, "skipping an unreadable snapshot: {e}"),
                }
            }
            let mut chosen = None;
            while let Some(i) = snapshot::preferred(&candidates) {
                match candidates.swap_remove(i) {
                    (_, Stored::Whole(s)) => {
                        chosen = Some((*s, 1));
                        break;
                    }
                    (offset, Stored::Parts(ptr)) => match self.gather_parts(sp, low, offset, &ptr) {
                        Ok(s) => {
                            chosen = Some((s, ptr.slot));
                            break;
                        }
                        Err(e) => tracing::error!(partition = p, generation = ptr.generation, "skipping a snapshot whose parts cannot be read: {e}"),
                    },
                }
            }
            if chosen.is_some() {
                break Ok(chosen);
            }
            step = step.saturating_mul(4);
        };
        let _ = self.state_reader.unassign();
        result
    }

    /// Collects the parts `ptr` names, reading backwards from the pointer's offset `before`.
    fn gather_parts(&self, sp: i32, low: i64, before: i64, ptr: &Pointer) -> Result<Snapshot, String> {
        let prefix = format!("{}/{}/part/{}/", self.ctx.s.input_topic, ptr.partition, ptr.slot);
        // index → (offset, bytes) of the newest copy before the pointer.
        let mut parts: BTreeMap<u32, (i64, Vec<u8>)> = BTreeMap::new();
        let mut start = before;
        let mut step = 2 * i64::from(ptr.parts) + 64;
        while start > low && parts.len() < ptr.parts as usize {
            start = (start - step).max(low);
            self.read_range(sp, start, before, false, &mut |offset, k, v| {
                if offset >= before || !k.is_some_and(|k| k.starts_with(prefix.as_bytes())) {
                    return;
                }
                if let Some((generation, index, chunk)) = snapshot::decode_part(v) {
                    if generation == ptr.generation && index < ptr.parts && parts.get(&index).is_none_or(|(o, _)| *o < offset) {
                        parts.insert(index, (offset, chunk.to_vec()));
                    }
                }
            })?;
            step = step.saturating_mul(4);
        }
        let parts: BTreeMap<u32, Vec<u8>> = parts.into_iter().map(|(i, (_, bytes))| (i, bytes)).collect();
        snapshot::join_parts(ptr, &parts)
    }

    /// Reads state partition `sp` from `start` until `end`, handing every message's offset, key
    /// and value to `f`. With `past_end`, reads on past `end` until the partition has been
    /// quiet for 300 ms (for brokers that report the end short).
    fn read_range(&self, sp: i32, start: i64, end: i64, past_end: bool, f: &mut StateVisitor<'_>) -> Result<(), String> {
        let topic = &self.ctx.s.state_topic;
        let mut tpl = TopicPartitionList::new();
        tpl.add_partition_offset(topic, sp, Offset::Offset(start)).map_err(|e| e.to_string())?;
        self.state_reader.assign(&tpl).map_err(|e| e.to_string())?;
        let deadline = Instant::now() + Duration::from_secs(60);
        let mut next = start;
        let mut quiet_since = Instant::now();
        loop {
            if Instant::now() >= deadline {
                return Err(format!("timed out reading {topic}/{sp} from offset {start} to {end}"));
            }
            if next >= end && (!past_end || quiet_since.elapsed() >= Duration::from_millis(300)) {
                return Ok(());
            }
            match self.state_reader.poll(Duration::from_millis(100)) {
                Some(Ok(m)) => {
                    next = m.offset() + 1;
                    quiet_since = Instant::now();
                    f(m.offset(), m.key(), m.payload().unwrap_or_default());
                }
                Some(Err(e)) => tracing::warn!("reading {topic}/{sp}: {e}"),
                None => {}
            }
        }
    }
}

/// Serves the producer's pending delivery reports without waiting. A delivered message stays
/// in memory until its report is served, so all of them are: one `poll` serves at most one
/// report (of one or more messages), and the producer's count of messages not yet done with
/// stops falling once none is left. Bounded, so a flood of reports cannot hold up the caller.
pub fn serve_deliveries(sink: &Sink) {
    for _ in 0..256 {
        let before = sink.in_flight_count();
        sink.poll(Duration::ZERO);
        if sink.in_flight_count() >= before {
            break;
        }
    }
}

fn send_with_retry(sink: &Sink, mut record: BaseRecord<'_, [u8], [u8]>) {
    for _ in 0..600 {
        match sink.send(record) {
            Ok(()) => {
                sink.context().wake();
                return;
            }
            Err((e, r)) => {
                if !matches!(e.rdkafka_error_code(), Some(rdkafka::types::RDKafkaErrorCode::QueueFull)) {
                    tracing::error!(topic = r.topic, "cannot send: {e}");
                    return;
                }
                record = r;
                // Delivery reports free the queue; nothing else serves them meanwhile.
                sink.poll(Duration::from_millis(100));
            }
        }
    }
    tracing::error!(topic = record.topic, "producer queue stayed full for a minute; message dropped");
}

/// What the HTTP side shows of one experiment, from its state and latest report.
fn row(partition: i32, exp: &Experiment, report: &crate::core::report::Report, published_ms: Option<i64>) -> ExperimentRow {
    let weights = exp.last_weights();
    let published = exp.version() > 0;
    ExperimentRow {
        partition,
        policy: exp.policy_name(),
        version: exp.version(),
        leader: report.leader,
        regret_estimate: report.regret_estimate,
        exploration: published.then(|| crate::core::report::exploration_ratio(weights, report.leader)),
        published_ms,
        arms: exp
            .arm_names()
            .iter()
            .zip(&report.arms)
            .enumerate()
            .map(|(j, (name, a))| ArmRow { name: name.clone(), figures: a.clone(), weight: weights.get(j).copied().filter(|w| w.is_finite()) })
            .collect(),
    }
}
