//! The owner of every input partition's state this instance holds. It delegates: applying
//! events to `partition.rs`, publishing to `publisher.rs`, writing snapshots to
//! `checkpoint.rs`, reading them back to `restore.rs`. One thread drives it (see `source.rs`);
//! rebalance callbacks run on that same thread, between messages, so a snapshot always matches
//! its offset exactly.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::{Duration, Instant};

use rdkafka::consumer::BaseConsumer;
use rustc_hash::FxHashMap;

use super::checkpoint::Checkpoint;
use super::counts;
use super::offset::NextOffset;
use super::partition::{Applier, Holdings, Msg, PartitionState};
use super::producer::Sink;
use super::publisher::Publisher;
use super::restore::Restorer;
use super::resume::{ResumeCheck, Verdict};
use super::settings::Settings;
use super::snapshot::Counters;
use crate::telemetry::http::Served;

pub struct Pipeline {
    applier: Applier,
    publisher: Publisher,
    checkpoint: Checkpoint,
    restorer: Restorer,
    partitions: BTreeMap<i32, PartitionState>,
    holdings: Holdings,
    /// Per input partition this instance let go of, its counts at that moment: what this
    /// process's counters hold of it, should it come back (see `counts.rs`).
    released: FxHashMap<i32, Counters>,
    /// Set once shutdown began: snapshots written from then on are the writer's last.
    closing: bool,
}

impl Pipeline {
    pub fn new(s: Arc<Settings>, served: Arc<Served>, sink: Arc<Sink>, state_reader: BaseConsumer, state_partitions: i32) -> Self {
        Pipeline {
            applier: Applier::new(s.clone(), served.clone(), sink.clone()),
            publisher: Publisher::new(s.clone(), served.clone(), sink.clone()),
            checkpoint: Checkpoint::new(s.clone(), served, sink, state_partitions),
            restorer: Restorer::new(s, state_reader, state_partitions),
            partitions: BTreeMap::new(),
            holdings: Holdings::default(),
            released: FxHashMap::default(),
            closing: false,
        }
    }

    /// Marks the start of shutdown: the snapshots written from now on hand the partitions to
    /// whoever comes next, counts included.
    pub fn begin_closing(&mut self) {
        self.closing = true;
    }

    /// Applies one message of input partition `partition` at `offset`. Returns where to read
    /// the partition from again when the broker skipped past the resume offset (`resume.rs`).
    pub fn on_message(&mut self, partition: i32, offset: i64, key: Option<&[u8]>, payload: Option<&[u8]>, now_ms: i64) -> Option<NextOffset> {
        let part = self.partitions.get_mut(&partition)?;
        if let Some(check) = part.resume_check {
            match check.judge(offset) {
                Verdict::Holds => part.resume_check = None,
                Verdict::ReadAgain(again) => {
                    part.resume_check = Some(again);
                    return Some(NextOffset { partition, offset: again.asked() });
                }
            }
        }
        if offset >= part.next_offset {
            let msg = Msg { partition, offset, key, bytes: payload.unwrap_or_default() };
            self.applier.apply(&mut self.holdings, part, &msg, now_ms);
            part.next_offset = offset + 1;
        }
        None
    }

    /// Publishes what is due (everything with `force`); see `publisher.rs`. A partition with
    /// experiments but no landed snapshot yet gets one first (`PartitionState::snapshotted`).
    /// Definitions read from the control topic since the last round apply first, in the
    /// order they were read; retired experiments past their grace are dropped after.
    pub fn publish_due(&mut self, force: bool) {
        if force || self.publisher.until_due().is_zero() {
            self.redefine();
            let first: Vec<i32> =
                self.partitions.iter().filter(|(_, part)| !part.snapshotted && !part.experiments.is_empty()).map(|(&p, _)| p).collect();
            if !first.is_empty() {
                self.checkpoint.write(&mut self.partitions, &first, false);
            }
        }
        self.publisher.publish_due(&mut self.partitions, &self.holdings, force);
        self.drop_retired();
    }

    /// Applies the definitions that came in since the last round to the experiments held
    /// here (on every partition that holds a copy).
    fn redefine(&mut self) {
        for c in self.applier.s.control.take_pending() {
            for (&p, part) in self.partitions.iter_mut() {
                let Some(e) = part.experiments.get_mut(c.id()) else { continue };
                if c.revision() <= e.exp.lifecycle().revision {
                    continue;
                }
                let r = &c.resolved;
                match e.exp.redefine(r.spec.clone(), &r.arms, c.lifecycle.clone(), c.changed_at_ms()) {
                    Ok(()) => {
                        e.redefined = true;
                        e.changed = true;
                        // A retired experiment defined again comes back: it publishes anew.
                        e.farewell_sent &= c.lifecycle.state == crate::core::State::Retired;
                        tracing::info!(experiment = %c.id(), partition = p, revision = c.revision(), state = %c.lifecycle.state, "definition applied");
                    }
                    Err(err) => tracing::error!(experiment = %c.id(), partition = p, revision = c.revision(), "cannot apply the definition: {err}"),
                }
            }
        }
    }

    /// Drops retired experiments whose last message went out more than
    /// `defaults.retire_grace_seconds` ago. The partition's version floor rises past their
    /// versions, so that the same id created again later never publishes an old version.
    fn drop_retired(&mut self) {
        let now = crate::clock::now_ms();
        let grace = self.applier.s.retire_grace_ms;
        for (&p, part) in self.partitions.iter_mut() {
            let over: Vec<String> = part
                .experiments
                .iter()
                .filter(|(_, e)| e.farewell_sent && now - e.exp.lifecycle().state_since_ms.unwrap_or(now) >= grace)
                .map(|(id, _)| id.clone())
                .collect();
            for id in over {
                if let Some(e) = part.experiments.remove(&id) {
                    part.version_floor = part.version_floor.max(e.exp.version() + 1);
                    self.holdings.held = self.holdings.held.saturating_sub(1);
                    if self.holdings.owners.get(&id) == Some(&p) {
                        self.holdings.owners.remove(&id);
                    }
                    tracing::info!(experiment = %id, partition = p, "retired experiment dropped after defaults.retire_grace_seconds");
                }
            }
        }
    }

    /// Writes the snapshots of `partitions` and waits until they have landed. Returns the
    /// offsets that may be committed to the group (for lag reporting only). `handing_over`
    /// marks the partitions as going to another member while this one stays.
    pub fn snapshot(&mut self, partitions: &[i32], handing_over: bool) -> Vec<NextOffset> {
        self.checkpoint.write(&mut self.partitions, partitions, handing_over && !self.closing)
    }

    /// How long until the next publish round is due (zero if it is).
    pub fn until_publish(&self) -> Duration {
        self.publisher.until_due()
    }

    /// Brings `apportion_events_total` up to date; called after every batch of messages.
    pub fn export_counts(&mut self) {
        self.applier.export_counts();
    }

    /// Snapshots every partition held when the snapshot interval has passed.
    pub fn snapshot_due(&mut self) -> Vec<NextOffset> {
        if !self.checkpoint.due() {
            return Vec::new();
        }
        let all = self.owned_partitions();
        self.snapshot(&all, false)
    }

    pub fn owned_partitions(&self) -> Vec<i32> {
        self.partitions.keys().copied().collect()
    }

    /// Takes partitions over, given to this instance in consumer group generation
    /// `group_generation`: loads each one's preferred snapshot and returns where to resume.
    /// A partition whose snapshots cannot be read is not taken (and not returned).
    pub fn assign(&mut self, partitions: &[i32], group_generation: i32) -> Vec<NextOffset> {
        let mut out = Vec::new();
        for &p in partitions {
            let started = Instant::now();
            let mut part = match self.restorer.load(p) {
                Ok(Some((snap, slot))) => {
                    let base = self.released.remove(&p).unwrap_or_default();
                    if !snap.handed_over {
                        self.applier.count_restored(&counts::beyond(&snap.counters, &base));
                    }
                    self.applier.carry_experiment_counts(&snap.counters);
                    let mut part = self.restorer.partition(p, snap);
                    part.complete_slot = slot;
                    part
                }
                Ok(None) => PartitionState::empty(self.applier.s.duplicate_window, self.applier.s.remembered_impressions),
                Err(e) => {
                    tracing::error!(partition = p, "cannot read the state topic: {e}; the partition is not taken");
                    continue;
                }
            };
            part.group_generation = group_generation;
            if part.next_offset > 0 {
                part.resume_check = Some(ResumeCheck::new(part.next_offset));
            }
            out.push(NextOffset { partition: p, offset: part.next_offset });
            tracing::info!(
                partition = p,
                next_offset = part.next_offset,
                experiments = part.experiments.len(),
                version_floor = part.version_floor,
                restore_ms = started.elapsed().as_millis() as u64,
                "partition assigned"
            );
            let ids: Vec<String> = part.experiments.keys().cloned().collect();
            self.holdings.held += ids.len();
            for id in ids {
                self.applier.note_owner(&mut self.holdings, &mut part.tally, p, &id);
            }
            self.partitions.insert(p, part);
        }
        out
    }

    /// Hands partitions back: publishes what is due, snapshots them, drops their state and
    /// what the HTTP side shows of them. Returns the offsets to commit.
    ///
    /// With `lost`, the group already gave the partitions to another member (this one was
    /// fenced out: a pause past its session, a network split): nothing is written for them,
    /// since their new owner may have moved on, and their state is dropped as it is.
    pub fn revoke(&mut self, partitions: &[i32], lost: bool) -> Vec<NextOffset> {
        let offsets = if lost {
            tracing::warn!(partitions = ?partitions, "the assignment was lost; the partitions' state is dropped without writing");
            Vec::new()
        } else {
            self.publish_due(true);
            self.snapshot(partitions, true)
        };
        let metrics = self.applier.metrics();
        for p in partitions {
            if let Some(part) = self.partitions.remove(p) {
                self.released.insert(*p, part.counters_for_snapshot());
                self.holdings.held = self.holdings.held.saturating_sub(part.experiments.len());
                let mut table = self.applier.served.table.write().unwrap_or_else(|e| e.into_inner());
                for id in part.experiments.keys() {
                    if self.holdings.owners.get(id) == Some(p) {
                        self.holdings.owners.remove(id);
                        table.rows.remove(id);
                    }
                    metrics.remove_experiment(id);
                }
                drop(table);
                let _ = metrics.snapshot_time.remove_label_values(&[&p.to_string()]);
                let _ = metrics.consumer_lag.remove_label_values(&[&self.applier.s.input_topic, &p.to_string()]);
            }
            tracing::info!(partition = p, "partition handed over");
        }
        offsets
    }
}
