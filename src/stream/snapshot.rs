//! The state snapshot of one input partition, as written to the state topic.
//!
//! Key `<input topic>/<partition>`; value JSON. It holds the next offset to read, every
//! experiment's statistics and weights version, the duplicate window and the counter values
//! to restore, so that an instance taking the partition over resumes exactly where the
//! snapshot was taken.

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
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Snapshot {
    pub format: u32,
    pub topic: String,
    pub partition: i32,
    /// The first offset not yet applied.
    pub next_offset: i64,
    /// Wall-clock time of writing, ms; bounds how many weights versions a crash may have lost.
    pub written_at_ms: i64,
    pub experiments: BTreeMap<String, ExperimentState>,
    /// Duplicate window, oldest first (hashes of event ids).
    pub duplicates: Vec<u64>,
    pub counters: Counters,
}

pub fn key(topic: &str, partition: i32) -> String {
    format!("{topic}/{partition}")
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
