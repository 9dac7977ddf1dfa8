//! The state snapshot of one input partition, as written to the state topic.
//!
//! Key `<input topic>/<partition>`; value JSON. It holds the next offset to read, every
//! experiment's statistics and weights version, the duplicate window and the counter values
//! to restore, so that an instance taking the partition over resumes exactly where the
//! snapshot was taken.
//!
//! A snapshot larger than `snapshot.part_bytes` (thousands of experiments on one partition)
//! does not fit in one Kafka message. Its JSON is then cut into parts, written under the keys
//! `<input topic>/<partition>/part/<slot>/<index>`, and only after every part has landed a small
//! [`Pointer`] goes under the partition's own key. Consecutive large snapshots alternate between
//! two slots, so compaction never removes the parts of the newest complete snapshot while the
//! next one is being written: a crash half-way through leaves the previous snapshot whole.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::core::ExperimentState;

/// Version of the snapshot layout; a reader refuses layouts it does not know.
pub const FORMAT: u32 = 1;

#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Counters {
    /// `kind/outcome` → events.
    pub events: BTreeMap<String, u64>,
    /// reason → dead letters.
    pub dead_letters: BTreeMap<String, u64>,
    /// experiment → events seen on this partition while another partition holds it.
    pub split: BTreeMap<String, u64>,
    /// experiment → rewards refused for an arm with no impressions.
    #[serde(default)]
    pub unmatched_rewards: BTreeMap<String, u64>,
    /// experiment → rewards that came after their impression's attribution window closed.
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub late_rewards: BTreeMap<String, u64>,
    /// experiment → rewards of an experiment with an attribution window credited at their own
    /// event time: they named no impression, or one no longer remembered.
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub unattributed_rewards: BTreeMap<String, u64>,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Snapshot {
    pub format: u32,
    pub topic: String,
    pub partition: i32,
    /// The first offset not yet applied.
    pub next_offset: i64,
    /// Counts the snapshots written of this partition (older writers left it out: 0).
    #[serde(default)]
    pub generation: u64,
    /// Wall-clock time of writing, ms; bounds how many weights versions a crash may have lost.
    pub written_at_ms: i64,
    /// The consumer group generation the writer held the partition in (-1 when unknown, and
    /// in snapshots of older writers). A restore prefers the newest generation, so that a
    /// writer that lost the partition without knowing cannot shadow its new owner's state.
    #[serde(default = "unknown_generation")]
    pub group_generation: i32,
    /// Written as the partition was handed to another member while the writer stayed in the
    /// group: its counts stay in the writer's counters (see `counts.rs`).
    #[serde(default)]
    pub handed_over: bool,
    /// The partition's version floor when written: an experiment created after this snapshot
    /// started there (older writers left it out: 0). See `PartitionState::version_floor`.
    #[serde(default)]
    pub version_floor: u64,
    pub experiments: BTreeMap<String, ExperimentState>,
    /// Duplicate window, oldest first (hashes of event ids).
    pub duplicates: Vec<u64>,
    /// Event times of recent impressions of experiments with an attribution window, oldest
    /// first: (hash of event id, event time ms).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub impressions: Vec<(u64, i64)>,
    pub counters: Counters,
}

/// The same JSON as [`Snapshot`], written straight from live state: `experiments` is any map
/// that serialises each experiment's state as it goes, so that a snapshot of 10 000 experiments
/// is not first copied whole.
#[derive(Serialize)]
pub struct SnapshotOut<'a, E: Serialize> {
    pub format: u32,
    pub topic: &'a str,
    pub partition: i32,
    pub next_offset: i64,
    pub generation: u64,
    pub written_at_ms: i64,
    pub group_generation: i32,
    pub handed_over: bool,
    pub version_floor: u64,
    pub experiments: E,
    pub duplicates: &'a [u64],
    #[serde(skip_serializing_if = "<[_]>::is_empty")]
    pub impressions: &'a [(u64, i64)],
    pub counters: &'a Counters,
}

impl<E: Serialize> SnapshotOut<'_, E> {
    pub fn encode(&self) -> Result<Vec<u8>, serde_json::Error> {
        serde_json::to_vec(self)
    }
}

fn unknown_generation() -> i32 {
    -1
}

pub fn key(topic: &str, partition: i32) -> String {
    format!("{topic}/{partition}")
}

/// What the keys of every part of a large snapshot written in `slot` (0 or 1) begin with.
pub fn part_prefix(topic: &str, partition: i32, slot: u64) -> String {
    format!("{topic}/{partition}/part/{slot}/")
}

/// Key of part `index` of a large snapshot written in `slot`.
pub fn part_key(topic: &str, partition: i32, slot: u64, index: u32) -> String {
    format!("{}{index}", part_prefix(topic, partition, slot))
}

/// Stands under the partition's key in place of a snapshot too large for one message: says
/// which parts make it up and how to check them once joined.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Pointer {
    pub format: u32,
    pub topic: String,
    pub partition: i32,
    /// The snapshot's generation; the parts carry it too, so that parts left over from an
    /// older snapshot in the same slot are never mixed in.
    pub generation: u64,
    /// 0 or 1: consecutive large snapshots alternate between two sets of part keys.
    pub slot: u64,
    /// As [`Snapshot::group_generation`], so that candidates compare without their parts.
    #[serde(default = "unknown_generation")]
    pub group_generation: i32,
    pub parts: u32,
    pub bytes: u64,
    /// FNV-1a (64 bit) of the joined parts.
    pub checksum: u64,
}

/// What the partition's key holds: the snapshot itself, or a pointer to its parts.
#[derive(Debug)]
pub enum Stored {
    Whole(Box<Snapshot>),
    Parts(Pointer),
}

impl Stored {
    /// The consumer group generation the writer held the partition in.
    pub fn group_generation(&self) -> i32 {
        match self {
            Stored::Whole(s) => s.group_generation,
            Stored::Parts(p) => p.group_generation,
        }
    }

    /// Decodes arbitrary bytes without panicking.
    pub fn decode(bytes: &[u8]) -> Result<Stored, String> {
        if bytes.len() <= 4096 {
            if let Ok(p) = serde_json::from_slice::<Pointer>(bytes) {
                if p.format != FORMAT {
                    return Err(format!("snapshot format {} is not {FORMAT}; written by another version", p.format));
                }
                return Ok(Stored::Parts(p));
            }
        }
        Snapshot::decode(bytes).map(|s| Stored::Whole(Box::new(s)))
    }
}

/// Of the snapshots found under one partition's key, as (offset in the state topic, value), the
/// position of the one to restore: the newest consumer group generation, and of those the one
/// written last. A member that lost the partition without noticing (a long pause) may write
/// after the new owner; its generation is older, so it never shadows the owner's snapshot.
pub fn preferred(candidates: &[(i64, Stored)]) -> Option<usize> {
    (0..candidates.len()).max_by_key(|&i| (candidates[i].1.group_generation(), candidates[i].0))
}

/// A part's value: generation (8 bytes, little-endian), index (4 bytes, little-endian), then
/// its share of the snapshot's JSON.
pub fn encode_part(generation: u64, index: u32, chunk: &[u8]) -> Vec<u8> {
    let mut v = Vec::with_capacity(12 + chunk.len());
    v.extend_from_slice(&generation.to_le_bytes());
    v.extend_from_slice(&index.to_le_bytes());
    v.extend_from_slice(chunk);
    v
}

/// Splits a part's value into generation, index and bytes; `None` if it is too short.
pub fn decode_part(value: &[u8]) -> Option<(u64, u32, &[u8])> {
    let generation = u64::from_le_bytes(value.get(..8)?.try_into().ok()?);
    let index = u32::from_le_bytes(value.get(8..12)?.try_into().ok()?);
    Some((generation, index, &value[12..]))
}

/// FNV-1a, 64 bit (Fowler, Noll and Vo; offset basis and prime as published for 64 bits).
pub fn fnv1a(bytes: &[u8]) -> u64 {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for &b in bytes {
        h ^= u64::from(b);
        h = h.wrapping_mul(0x0000_0100_0000_01b3);
    }
    h
}

/// Joins parts (indexed 0..n) and checks them against the pointer.
pub fn join_parts(ptr: &Pointer, parts: &BTreeMap<u32, Vec<u8>>) -> Result<Snapshot, String> {
    if parts.len() != ptr.parts as usize || parts.keys().copied().ne(0..ptr.parts) {
        return Err(format!("{} of {} parts found", parts.len(), ptr.parts));
    }
    let mut all = Vec::with_capacity(ptr.bytes.min(1 << 30) as usize);
    for p in parts.values() {
        all.extend_from_slice(p);
    }
    if all.len() as u64 != ptr.bytes || fnv1a(&all) != ptr.checksum {
        return Err("the joined parts do not match the pointer's length and checksum".into());
    }
    let s = Snapshot::decode(&all)?;
    if s.topic != ptr.topic || s.partition != ptr.partition || s.generation != ptr.generation {
        return Err("the joined parts belong to another partition".into());
    }
    Ok(s)
}

impl Snapshot {
    pub fn encode(&self) -> Result<Vec<u8>, serde_json::Error> {
        serde_json::to_vec(self)
    }

    /// Decodes arbitrary bytes without panicking; the error says what is wrong.
    pub fn decode(bytes: &[u8]) -> Result<Snapshot, String> {
        let s: Snapshot = serde_json::from_slice(bytes).map_err(|e| format!("not a snapshot: {e}"))?;
        if s.format != FORMAT {
            return Err(format!("snapshot format {} is not {FORMAT}; written by another version", s.format));
        }
        if s.next_offset < 0 {
            return Err(format!("snapshot next_offset {} is negative", s.next_offset));
        }
        Ok(s)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn written_from_live_state_it_reads_back_as_the_same_snapshot() {
        let snap = Snapshot {
            format: FORMAT,
            topic: "events".into(),
            partition: 3,
            next_offset: 77,
            generation: 5,
            written_at_ms: 1_764_547_200_000,
            group_generation: 3,
            handed_over: true,
            version_floor: 0,
            experiments: BTreeMap::new(),
            duplicates: vec![1, 2, 3],
            impressions: Vec::new(),
            counters: Counters { events: [("impression/applied".to_string(), 9u64)].into_iter().collect(), ..Counters::default() },
        };
        let out = SnapshotOut {
            format: FORMAT,
            topic: "events",
            partition: 3,
            next_offset: 77,
            generation: 5,
            written_at_ms: 1_764_547_200_000,
            group_generation: 3,
            handed_over: true,
            version_floor: 0,
            experiments: BTreeMap::<String, ExperimentState>::new(),
            duplicates: &[1, 2, 3],
            impressions: &[],
            counters: &snap.counters,
        };
        assert_eq!(Snapshot::decode(&out.encode().expect("encodes")), Ok(snap));
    }

    #[test]
    fn a_stale_writers_later_snapshot_does_not_shadow_the_new_owners() {
        let snap = |group_generation: i32, next_offset: i64| {
            Stored::Whole(Box::new(Snapshot {
                format: FORMAT,
                topic: "events".into(),
                partition: 0,
                next_offset,
                generation: 1,
                written_at_ms: 0,
                group_generation,
                handed_over: false,
                version_floor: 0,
                experiments: BTreeMap::new(),
                duplicates: Vec::new(),
                impressions: Vec::new(),
                counters: Counters::default(),
            }))
        };
        // The new owner (generation 8) wrote at offsets 10 and 12; the paused member
        // (generation 7) woke and wrote at 13, with an offset far behind.
        let found = vec![(10, snap(8, 500)), (12, snap(8, 900)), (13, snap(7, 200))];
        assert_eq!(preferred(&found), Some(1));
        // Older writers, without generations, keep the last-written rule.
        let old = vec![(3, snap(-1, 5)), (4, snap(-1, 6))];
        assert_eq!(preferred(&old), Some(1));
        assert_eq!(preferred(&[]), None);
    }

    #[test]
    fn parts_join_only_when_complete_and_unaltered() {
        let snap = Snapshot {
            format: FORMAT,
            topic: "events".into(),
            partition: 1,
            next_offset: 10,
            generation: 4,
            written_at_ms: 0,
            group_generation: -1,
            handed_over: false,
            version_floor: 0,
            experiments: BTreeMap::new(),
            duplicates: (0..100).collect(),
            impressions: Vec::new(),
            counters: Counters::default(),
        };
        let bytes = snap.encode().expect("encodes");
        let ptr = Pointer {
            format: FORMAT,
            topic: "events".into(),
            partition: 1,
            generation: 4,
            slot: 0,
            group_generation: -1,
            parts: 3,
            bytes: bytes.len() as u64,
            checksum: fnv1a(&bytes),
        };
        let mut parts: BTreeMap<u32, Vec<u8>> = BTreeMap::new();
        for (i, c) in bytes.chunks(bytes.len().div_ceil(3)).enumerate() {
            let value = encode_part(4, i as u32, c);
            let (g, j, chunk) = decode_part(&value).expect("a part");
            assert_eq!((g, j), (4, i as u32));
            parts.insert(j, chunk.to_vec());
        }
        assert_eq!(join_parts(&ptr, &parts).as_ref(), Ok(&snap));
        let mut altered = parts.clone();
        altered.get_mut(&1).expect("part 1")[0] ^= 1;
        assert!(join_parts(&ptr, &altered).is_err(), "checksum catches a changed byte");
        parts.remove(&2);
        assert!(join_parts(&ptr, &parts).is_err(), "a missing part");
    }

    #[test]
    fn fnv1a_matches_the_published_test_vectors() {
        // FNV-1a 64-bit test vectors from the algorithm's authors (Noll's FNV test suite), from memory.
        assert_eq!(fnv1a(b""), 0xcbf2_9ce4_8422_2325);
        assert_eq!(fnv1a(b"a"), 0xaf63_dc4c_8601_ec8c);
        assert_eq!(fnv1a(b"foobar"), 0x8594_4171_f739_67e8);
    }
}
