//! One input partition's state, and applying events to it: decode, check, deduplicate, apply,
//! or dead-letter with a reason. A refused event leaves nothing behind but its counts and its
//! dead letter.

use std::sync::Arc;
use std::time::Instant;

use prometheus::IntCounter;
use rdkafka::message::{Header, OwnedHeaders};
use rdkafka::producer::BaseRecord;
use rustc_hash::FxHashMap;

use super::counts::{self, Cells, Outcome};
use super::recent::{DedupWindow, ImpressionTimes};
use super::producer::{send_with_retry, Sink};
use super::resume::ResumeCheck;
use super::settings::Settings;
use super::snapshot::Counters;
use crate::core::{Credit, Experiment, Observation, Refusal, State};
use crate::event::{self, Kind, Reason};
use crate::telemetry::http::Served;
use crate::telemetry::Metrics;

pub struct Entry {
    pub(super) exp: Experiment,
    /// Impressions applied since the last publish: the batch the next weights are for.
    pub(super) impressions_since: u64,
    pub(super) changed: bool,
    pub(super) first_applied: Option<Instant>,
    pub(super) last_published: Option<Instant>,
    /// A newer definition applies since the last publish: the next round publishes, whether
    /// or not a weight moved, so that services see the state and revision in force.
    pub(super) redefined: bool,
    /// A retired experiment's last message and tombstone went out (by this instance: a new
    /// owner sends them again, which readers take as the same news).
    pub(super) farewell_sent: bool,
    /// The revision of the record this instance wrote to conclude the settled experiment
    /// (`settle.auto_conclude`), so that it is written once.
    pub(super) conclusion_sent: Option<u64>,
}

impl Entry {
    pub fn new(exp: Experiment) -> Entry {
        Entry { exp, impressions_since: 0, changed: true, first_applied: None, last_published: None, redefined: false, farewell_sent: false, conclusion_sent: None }
    }
}

pub struct PartitionState {
    pub(super) next_offset: i64,
    pub(super) experiments: FxHashMap<String, Entry>,
    pub(super) dedup: DedupWindow,
    /// Event times of recent impressions of experiments with an attribution window.
    pub(super) impressions: ImpressionTimes,
    pub(super) tally: Tally,
    /// Generation of the last snapshot written (or loaded) of this partition.
    pub(super) generation: u64,
    /// The consumer group generation this instance was given the partition in.
    pub(super) group_generation: i32,
    /// The part slot (0 or 1) of the newest complete snapshot written in parts; the next one
    /// goes to the other slot.
    pub(super) complete_slot: u64,
    /// Set after taking the partition over at a snapshot's offset, until the first message
    /// shows that reading really started there (see `resume.rs`).
    pub(super) resume_check: Option<ResumeCheck>,
    /// The lowest version an experiment of this partition may publish next: how many publish
    /// rounds could have run since the snapshot it was restored from (see `restore.rs`). An
    /// experiment the snapshot does not hold, created again from the events after it, starts
    /// there too, since an earlier owner may have published it before crashing.
    pub(super) version_floor: u64,
    /// A snapshot of this partition has landed (restored from one, or written since): only
    /// then may its experiments publish, so that a restart always finds one to raise versions
    /// from. With none, an owner killed after its first publishes would leave the next owner
    /// starting again at version 1.
    pub(super) snapshotted: bool,
}

/// What a partition counted, apart from its experiments so that both can be borrowed at once.
#[derive(Default)]
pub struct Tally {
    /// Dead letters, split events and unmatched rewards; the event counts live in `events`
    /// and are written into `counters.events` only when a snapshot is taken.
    pub(super) counters: Counters,
    /// Events by kind and outcome, restored values included.
    pub(super) events: Cells,
}

impl PartitionState {
    /// A partition with nothing read yet.
    pub fn empty(duplicate_window: usize, remembered_impressions: usize) -> PartitionState {
        PartitionState {
            next_offset: 0,
            experiments: FxHashMap::default(),
            dedup: DedupWindow::new(duplicate_window),
            impressions: ImpressionTimes::new(remembered_impressions),
            tally: Tally::default(),
            generation: 0,
            group_generation: -1,
            complete_slot: 1,
            resume_check: None,
            version_floor: 0,
            snapshotted: false,
        }
    }

    pub fn counters_for_snapshot(&self) -> Counters {
        let mut c = self.tally.counters.clone();
        c.events = self.tally.events.to_map();
        c
    }
}

/// Every experiment's state, serialised one experiment at a time.
pub struct States<'a>(pub &'a FxHashMap<String, Entry>);

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

/// What applying an event needs besides the partition's own state.
pub struct Applier {
    pub(super) s: Arc<Settings>,
    pub(super) served: Arc<Served>,
    pub(super) sink: Arc<Sink>,
    /// `apportion_events_total` handles, one per cell of [`Cells`].
    pub(super) events: Vec<IntCounter>,
    /// Events counted since the handles above were last brought up to date: they are, once
    /// per batch of messages ([`Applier::export_counts`]), not per event, since every
    /// increment of a shared counter is an atomic write the consumer thread waits for.
    pub(super) unexported: Cells,
    /// Remembers the shapes of recent events, which most events repeat.
    pub(super) decoder: event::Decoder,
}

/// One input message.
pub struct Msg<'a> {
    pub(super) partition: i32,
    pub(super) offset: i64,
    pub(super) key: Option<&'a [u8]>,
    pub(super) bytes: &'a [u8],
}

/// Which experiments this instance holds, and which partition's copy publishes each.
#[derive(Default)]
pub struct Holdings {
    /// Experiment → the partition whose copy publishes it (the first to see it).
    pub(super) owners: FxHashMap<String, i32>,
    /// Experiments held over all partitions (for `limits.experiments`).
    pub(super) held: usize,
}

impl Applier {
    pub fn new(s: Arc<Settings>, served: Arc<Served>, sink: Arc<Sink>) -> Applier {
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
        Applier { s, served, sink, events, unexported: Cells::default(), decoder: event::Decoder::default() }
    }

    /// Brings `apportion_events_total` up to date with the events counted since the last call.
    /// Called after every batch of messages.
    pub fn export_counts(&mut self) {
        for (counter, n) in self.events.iter().zip(self.unexported.0.iter_mut()) {
            if *n > 0 {
                counter.inc_by(std::mem::take(n));
            }
        }
    }

    /// Adds the instance-wide counts restored from a snapshot (events, dead letters) to this
    /// process's counters; what to add is decided in `counts.rs`.
    pub fn count_restored(&self, c: &Counters) {
        let cells = Cells::from_map(&c.events, |_| {});
        for (handle, &n) in self.events.iter().zip(cells.0.iter()) {
            handle.inc_by(n);
        }
        let m = self.metrics();
        for (reason, v) in &c.dead_letters {
            m.dead_letters.with_label_values(&[reason]).inc_by(*v);
        }
    }

    /// Gives this process the per-experiment series of a partition it takes over, at their
    /// values in the snapshot: those series live with the experiment's owner alone (the
    /// previous owner removed them as it let the partition go, or died with them), so they
    /// are carried over in full, whoever wrote the snapshot.
    pub fn carry_experiment_counts(&self, c: &Counters) {
        let m = self.metrics();
        for (family, counts) in [
            (&m.split, &c.split),
            (&m.unmatched_rewards, &c.unmatched_rewards),
            (&m.late_rewards, &c.late_rewards),
            (&m.unattributed_rewards, &c.unattributed_rewards),
        ] {
            for (exp, v) in counts {
                family.with_label_values(&[exp]).inc_by(*v);
            }
        }
    }

    pub fn metrics(&self) -> &Metrics {
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
    pub fn note_owner(&self, holdings: &mut Holdings, tally: &mut Tally, partition: i32, experiment: &str) {
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
    pub fn apply(&mut self, holdings: &mut Holdings, part: &mut PartitionState, msg: &Msg<'_>, now_ms: i64) {
        let PartitionState { experiments, dedup, impressions, tally, version_floor, .. } = part;
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
            return self.observe(entry, Memory { dedup, impressions }, tally, msg, &ev, kind, id_hash);
        }
        // The experiment is not held on this partition. Only a valid impression creates it;
        // everything is checked on a new experiment of its own before it joins the state, so a
        // refused event leaves nothing behind.
        let Some(defined) = self.s.definition_of(&ev.experiment) else {
            return self.reject(tally, msg, Reason::UnknownExperiment, kind);
        };
        if defined.lifecycle.state == State::Retired {
            return self.reject(tally, msg, Reason::RetiredExperiment, kind);
        }
        let spec = defined.spec;
        if ev.kind == Kind::Reward {
            if !spec.reward.accepts(ev.reward) {
                return self.reject(tally, msg, Reason::RewardOutOfRange, kind);
            }
            let known = self.s.is_defined(&ev.experiment) || holdings.owners.contains_key(ev.experiment.as_ref());
            return self.unmatched(tally, msg, &ev.experiment, known);
        }
        if holdings.held >= self.s.max_experiments {
            return self.reject(tally, msg, Reason::TooManyExperiments, kind);
        }
        let mut exp = match Experiment::new(spec, &defined.arms) {
            Ok(e) => e,
            Err(e) => {
                tracing::error!(experiment = %ev.experiment, "cannot create experiment: {e}");
                return self.reject(tally, msg, Reason::UnknownExperiment, kind);
            }
        };
        // An experiment that never changed state has been learning since now.
        let mut lifecycle = defined.lifecycle;
        lifecycle.state_since_ms = lifecycle.state_since_ms.or(Some(now_ms));
        exp.start_in(lifecycle);
        match exp.apply(&ev.arm, ev.ts_ms, Observation::Impression { count: ev.count }) {
            Ok(_) => {
                if exp.spec().attribution.is_some() {
                    remember(impressions, self.s.remembered_impressions, id_hash, ev.ts_ms);
                }
            }
            Err(Refusal::UndeclaredArm) => return self.reject(tally, msg, Reason::UnknownArm, kind),
            Err(_) => return self.reject(tally, msg, Reason::TooManyArms, kind),
        }
        exp.raise_version(*version_floor);
        let mut entry = Entry::new(exp);
        entry.impressions_since = ev.count;
        entry.first_applied = Some(Instant::now());
        experiments.insert(ev.experiment.to_string(), entry);
        holdings.held += 1;
        self.note_owner(holdings, tally, msg.partition, &ev.experiment);
        dedup.insert_new(id_hash, ());
        self.count(tally, kind, Outcome::Applied);
    }

    /// Applies a decoded, new event to its experiment's entry.
    #[allow(clippy::too_many_arguments)]
    fn observe(&mut self, entry: &mut Entry, memory: Memory<'_>, tally: &mut Tally, msg: &Msg<'_>, ev: &event::Event<'_>, kind: counts::Kind, id_hash: u64) {
        let windowed = entry.exp.spec().attribution.is_some();
        let obs = match ev.kind {
            Kind::Impression => Observation::Impression { count: ev.count },
            Kind::Reward => {
                // The impression's time: as the reward says, else as remembered by its id.
                let impression_ms = ev.impression_ts_ms.or_else(|| {
                    let id = ev.impression_id.as_deref().filter(|_| windowed)?;
                    memory.impressions.get(ImpressionTimes::hash(id))
                });
                Observation::Reward { value: ev.reward, impression_ms }
            }
        };
        let credit = match entry.exp.apply(&ev.arm, ev.ts_ms, obs) {
            Ok((_, credit)) => credit,
            Err(Refusal::RewardOutOfRange) => return self.reject(tally, msg, Reason::RewardOutOfRange, kind),
            Err(Refusal::TooManyArms) => return self.reject(tally, msg, Reason::TooManyArms, kind),
            Err(Refusal::UnknownArm) => return self.unmatched(tally, msg, &ev.experiment, true),
            Err(Refusal::UndeclaredArm) => return self.reject(tally, msg, Reason::UnknownArm, kind),
            Err(Refusal::Retired) => return self.reject(tally, msg, Reason::RetiredExperiment, kind),
        };
        match obs {
            Observation::Impression { count } => {
                entry.impressions_since = entry.impressions_since.saturating_add(count);
                if windowed {
                    remember(memory.impressions, self.s.remembered_impressions, id_hash, ev.ts_ms);
                }
            }
            Observation::Reward { impression_ms: None, .. } if windowed => {
                self.metrics().unattributed_rewards.with_label_values(&[&ev.experiment]).inc();
                *tally.counters.unattributed_rewards.entry(ev.experiment.to_string()).or_default() += 1;
            }
            Observation::Reward { .. } => {}
        }
        if entry.first_applied.is_none() {
            entry.first_applied = Some(Instant::now());
        }
        memory.dedup.insert_new(id_hash, ());
        if credit == Credit::Late {
            self.metrics().late_rewards.with_label_values(&[&ev.experiment]).inc();
            *tally.counters.late_rewards.entry(ev.experiment.to_string()).or_default() += 1;
            return self.count(tally, kind, Outcome::Late);
        }
        entry.changed = true;
        self.count(tally, kind, Outcome::Applied);
    }
}

/// What a partition remembers of recent events, borrowed for one event.
struct Memory<'a> {
    dedup: &'a mut DedupWindow,
    impressions: &'a mut ImpressionTimes,
}

/// Remembers an impression's event time by the hash of its id (off with a capacity of 0).
fn remember(impressions: &mut ImpressionTimes, capacity: usize, id_hash: u64, ts_ms: i64) {
    if capacity > 0 && !impressions.contains_hash(id_hash) {
        impressions.insert_new(id_hash, ts_ms);
    }
}
