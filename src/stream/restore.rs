//! Reading snapshots back: the preferred snapshot of an input partition from the state topic's
//! tail (whole, or joined from its parts), and the partition state it holds.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::{Duration, Instant};

use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::error::KafkaError;
use rdkafka::message::Message;
use rdkafka::{Offset, TopicPartitionList};
use rustc_hash::FxHashMap;

use super::counts::Cells;
use super::recent::{DedupWindow, ImpressionTimes};
use super::partition::{Entry, PartitionState, Tally};
use super::settings::Settings;
use super::snapshot::{self, Pointer, Snapshot, Stored};
use crate::clock::now_ms;
use crate::core::Experiment;

/// How many of a partition's newest snapshots a restore weighs against each other.
const CANDIDATES: usize = 8;

/// Called with each state-topic message read: offset, key, value.
type StateVisitor<'a> = dyn FnMut(i64, Option<&[u8]>, &[u8]) + 'a;

/// Why a partition's snapshot could not be read; the partition is then not taken.
#[derive(Debug, thiserror::Error)]
pub enum RestoreError {
    #[error("cannot read the watermarks of {topic}/{partition}: {source}")]
    Watermarks { topic: String, partition: i32, source: KafkaError },
    #[error("cannot read {topic}/{partition}: {source}")]
    Read { topic: String, partition: i32, source: KafkaError },
    #[error("timed out reading {topic}/{partition} from offset {start} to {end}")]
    TimedOut { topic: String, partition: i32, start: i64, end: i64 },
    #[error("{0}")]
    Parts(String),
}

/// Reads the state topic with a consumer of its own (no group).
pub struct Restorer {
    s: Arc<Settings>,
    reader: BaseConsumer,
    state_partitions: i32,
}

impl Restorer {
    pub fn new(s: Arc<Settings>, reader: BaseConsumer, state_partitions: i32) -> Restorer {
        Restorer { s, reader, state_partitions: state_partitions.max(1) }
    }

    /// The state of input partition `p` from its snapshot. Experiments no longer declared (and
    /// not creatable on first sight) are dropped; weights versions are raised past whatever
    /// may have been published after the snapshot was written.
    pub fn partition(&self, p: i32, snap: Snapshot) -> PartitionState {
        // Publishes after the snapshot may have been lost with a crash; versions go up by at
        // least as many as could have been published since it was written: those of the
        // experiments it holds from their own, those of experiments created after it (replayed
        // from the events) from the floor it records.
        let since = (now_ms() - snap.written_at_ms).max(0) as f64;
        let lost = (since / self.s.publish_interval.as_millis().max(1) as f64).ceil() as u64 + 1;
        let mut experiments = FxHashMap::default();
        for (id, state) in snap.experiments {
            let Some(defined) = self.s.definition_of(&id) else {
                tracing::warn!(experiment = %id, partition = p, "experiment in the snapshot is no longer declared; dropped");
                continue;
            };
            let version = state.version;
            // The snapshot says which revision it was made under; a newer one in force now
            // applies from here on, an older or equal one was applied already.
            let restored = Experiment::restore(defined.spec.clone(), &defined.arms, state).and_then(|mut exp| {
                if defined.lifecycle.revision > exp.lifecycle().revision {
                    exp.redefine(defined.spec, &defined.arms, defined.lifecycle, defined.changed_at_ms)?;
                }
                Ok(exp)
            });
            match restored {
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
        PartitionState {
            next_offset: snap.next_offset,
            experiments,
            dedup: DedupWindow::restore(self.s.duplicate_window, snap.duplicates.iter().map(|&h| (h, ()))),
            impressions: ImpressionTimes::restore(self.s.remembered_impressions, snap.impressions.iter().copied()),
            tally: Tally { counters: snap.counters, events },
            generation: snap.generation,
            group_generation: snap.group_generation,
            complete_slot: 1,
            resume_check: None,
            version_floor: snap.version_floor + lost,
            snapshotted: true,
        }
    }

    /// The newest readable snapshot of input partition `p` and, if it was written in parts,
    /// their slot. Reads the state topic's tail in growing steps (64, 256, 1024, … messages
    /// back from the end), so that restoring does not read the whole history. Each step reads
    /// through to the end: a broker may answer a read from inside a record batch with a later
    /// batch (see `resume.rs`), and reading on to the end keeps such a skip from hiding
    /// anything; the steps grow fourfold, so this reads at most 4/3 of the last step.
    pub fn load(&self, p: i32) -> Result<Option<(Snapshot, u64)>, RestoreError> {
        let topic = &self.s.state_topic;
        let sp = p % self.state_partitions;
        let key = snapshot::key(&self.s.input_topic, p);
        let (low, high) = self
            .reader
            .fetch_watermarks(topic, sp, Duration::from_secs(10))
            .map_err(|source| RestoreError::Watermarks { topic: topic.clone(), partition: sp, source })?;
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
                    Ok(Stored::Whole(s)) if s.partition == p && s.topic == self.s.input_topic => {
                        candidates.push((*offset, Stored::Whole(s)));
                    }
                    Ok(Stored::Parts(ptr)) if ptr.partition == p && ptr.topic == self.s.input_topic => {
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
        let _ = self.reader.unassign();
        result
    }

    /// Collects the parts `ptr` names, reading backwards from the pointer's offset `before`.
    fn gather_parts(&self, sp: i32, low: i64, before: i64, ptr: &Pointer) -> Result<Snapshot, RestoreError> {
        let prefix = snapshot::part_prefix(&self.s.input_topic, ptr.partition, ptr.slot);
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
        snapshot::join_parts(ptr, &parts).map_err(RestoreError::Parts)
    }

    /// Reads state partition `sp` from `start` until `end`, handing every message's offset, key
    /// and value to `f`. With `past_end`, reads on past `end` until the partition has been
    /// quiet for 300 ms (for brokers that report the end short).
    fn read_range(&self, sp: i32, start: i64, end: i64, past_end: bool, f: &mut StateVisitor<'_>) -> Result<(), RestoreError> {
        let topic = &self.s.state_topic;
        let mut tpl = TopicPartitionList::new();
        let read = |source| RestoreError::Read { topic: topic.clone(), partition: sp, source };
        tpl.add_partition_offset(topic, sp, Offset::Offset(start)).map_err(read)?;
        self.reader.assign(&tpl).map_err(read)?;
        let deadline = Instant::now() + Duration::from_secs(60);
        let mut next = start;
        let mut quiet_since = Instant::now();
        loop {
            if Instant::now() >= deadline {
                return Err(RestoreError::TimedOut { topic: topic.clone(), partition: sp, start, end });
            }
            if next >= end && (!past_end || quiet_since.elapsed() >= Duration::from_millis(300)) {
                return Ok(());
            }
            match self.reader.poll(Duration::from_millis(100)) {
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::Config;
    use crate::stream::snapshot::{Counters, FORMAT};

    /// A restorer on the default configuration (publishing every second); its state reader
    /// is never used, and points at a closed loopback port.
    fn restorer() -> Restorer {
        let cfg = Config::default();
        let reader: BaseConsumer = rdkafka::config::ClientConfig::new()
            .set("bootstrap.servers", "127.0.0.1:9")
            .set("group.id", "unused")
            .create()
            .expect("a consumer (it connects only when used)");
        Restorer::new(Arc::new(Settings::from_config(&cfg, Arc::new(crate::control::Registry::new(cfg.clone(), None))).expect("default settings")), reader, 1)
    }

    fn snapshot(written_ms_ago: i64, version_floor: u64) -> Snapshot {
        Snapshot {
            format: FORMAT,
            topic: "apportion.events".into(),
            partition: 0,
            next_offset: 10,
            generation: 1,
            written_at_ms: now_ms() - written_ms_ago,
            group_generation: 1,
            handed_over: false,
            version_floor,
            experiments: BTreeMap::new(),
            duplicates: Vec::new(),
            impressions: Vec::new(),
            counters: Counters::default(),
        }
    }

    /// An owner restored with floor F published experiments created after its snapshot from F
    /// on; the next owner, restoring that snapshot, must start above F plus every round since.
    #[test]
    fn the_version_floor_carries_over_with_the_rounds_since_the_snapshot() {
        let r = restorer();
        let interval_ms = r.s.publish_interval.as_millis() as u64;
        let part = r.partition(0, snapshot(5 * interval_ms as i64, 40));
        assert!(part.version_floor > 40 + 5, "floor {} for a snapshot with floor 40 written 5 rounds ago", part.version_floor);
        let fresh = r.partition(0, snapshot(0, 0));
        assert!(fresh.version_floor >= 1, "at least one round may follow any snapshot");
    }
}
