//! Writing snapshots: each input partition's state, with the offset it matches, to the
//! compacted state topic; large ones in parts behind a pointer.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::Instant;

use rdkafka::producer::BaseRecord;

use super::offset::NextOffset;
use super::partition::{PartitionState, States};
use super::producer::{self, send_with_retry, Sink};
use super::settings::Settings;
use super::snapshot::{self, Pointer, SnapshotOut};
use crate::clock::now_ms;
use crate::telemetry::http::Served;

/// Writes snapshots on the interval and on demand (hand-over, shutdown).
pub struct Checkpoint {
    s: Arc<Settings>,
    served: Arc<Served>,
    sink: Arc<Sink>,
    state_partitions: i32,
    last_snapshot: Instant,
}

impl Checkpoint {
    pub fn new(s: Arc<Settings>, served: Arc<Served>, sink: Arc<Sink>, state_partitions: i32) -> Checkpoint {
        Checkpoint { s, served, sink, state_partitions: state_partitions.max(1), last_snapshot: Instant::now() }
    }

    /// True once `snapshot.interval_seconds` passed since the last snapshot round.
    pub fn due(&self) -> bool {
        self.last_snapshot.elapsed() >= self.s.snapshot_interval
    }

    /// Writes the snapshots of `partitions` and waits until they have landed. Returns the
    /// offsets that may be committed to the group (for lag reporting only).
    ///
    /// A snapshot larger than `snapshot_part_bytes` is written in parts; its pointer follows
    /// only once every part has landed, so a reader never finds a pointer to missing parts.
    ///
    /// `handed_over` marks snapshots written as the partitions go to another member while
    /// this one stays (see `counts.rs`).
    pub fn write(&mut self, parts: &mut BTreeMap<i32, PartitionState>, partitions: &[i32], handed_over: bool) -> Vec<NextOffset> {
        let written_at_ms = now_ms();
        let failed_before = producer::failures(&self.sink);
        let mut done = Vec::new();
        let mut pointers: Vec<Pointer> = Vec::new();
        for &p in partitions {
            let Some(part) = parts.get_mut(&p) else { continue };
            part.generation += 1;
            let duplicates = part.dedup.ids();
            let impressions: Vec<(u64, i64)> = part.impressions.entries().collect();
            let counters = part.counters_for_snapshot();
            let snap = SnapshotOut {
                format: snapshot::FORMAT,
                topic: &self.s.input_topic,
                partition: p,
                next_offset: part.next_offset,
                generation: part.generation,
                written_at_ms,
                group_generation: part.group_generation,
                handed_over,
                version_floor: part.version_floor,
                experiments: States(&part.experiments),
                duplicates: &duplicates,
                impressions: &impressions,
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
            if bytes.len() <= self.s.snapshot_part_bytes {
                let key = snapshot::key(&self.s.input_topic, p);
                send_with_retry(&self.sink, BaseRecord::to(&self.s.state_topic).key(key.as_bytes()).payload(&bytes[..]).partition(sp));
            } else {
                let slot = 1 - part.complete_slot;
                let chunks: Vec<&[u8]> = bytes.chunks(self.s.snapshot_part_bytes).collect();
                for (i, chunk) in chunks.iter().enumerate() {
                    let key = snapshot::part_key(&self.s.input_topic, p, slot, i as u32);
                    let value = snapshot::encode_part(part.generation, i as u32, chunk);
                    send_with_retry(&self.sink, BaseRecord::to(&self.s.state_topic).key(key.as_bytes()).payload(&value[..]).partition(sp));
                }
                pointers.push(Pointer {
                    format: snapshot::FORMAT,
                    topic: self.s.input_topic.clone(),
                    partition: p,
                    generation: part.generation,
                    slot,
                    group_generation: part.group_generation,
                    parts: chunks.len() as u32,
                    bytes: bytes.len() as u64,
                    checksum: snapshot::fnv1a(&bytes),
                });
            }
            done.push(NextOffset { partition: p, offset: part.next_offset });
        }
        if !pointers.is_empty() {
            if !producer::landed(&self.sink, failed_before) {
                return Vec::new();
            }
            for ptr in &pointers {
                let key = snapshot::key(&self.s.input_topic, ptr.partition);
                match serde_json::to_vec(ptr) {
                    Ok(value) => send_with_retry(
                        &self.sink,
                        BaseRecord::to(&self.s.state_topic)
                            .key(key.as_bytes())
                            .payload(&value[..])
                            .partition(ptr.partition % self.state_partitions),
                    ),
                    Err(e) => tracing::error!(partition = ptr.partition, "cannot encode a snapshot pointer: {e}"),
                }
            }
        }
        if !producer::landed(&self.sink, failed_before) {
            return Vec::new();
        }
        for ptr in &pointers {
            if let Some(part) = parts.get_mut(&ptr.partition) {
                part.complete_slot = ptr.slot;
            }
        }
        for d in &done {
            if let Some(part) = parts.get_mut(&d.partition) {
                part.snapshotted = true;
            }
        }
        let secs = written_at_ms as f64 / 1000.0;
        for d in &done {
            self.served.metrics.snapshot_time.with_label_values(&[&d.partition.to_string()]).set(secs);
        }
        self.last_snapshot = Instant::now();
        done
    }
}
