//! The client's own counts: how it assigned, why it fell back, what it ignored, what it wrote.
//! The Python client keeps the same counts under the same names.

use std::sync::atomic::{AtomicU64, Ordering};

use serde::Serialize;

use crate::table::Offered;

#[derive(Default)]
pub(crate) struct Counters {
    pub assignments_weights: AtomicU64,
    pub assignments_fallback: AtomicU64,
    pub fallback_missing: AtomicU64,
    pub fallback_stale: AtomicU64,
    pub fallback_retired: AtomicU64,
    pub unassignable: AtomicU64,
    pub ignored_versions: AtomicU64,
    pub unreadable_messages: AtomicU64,
    pub impressions_written: AtomicU64,
    pub rewards_written: AtomicU64,
}

/// The counts at one moment.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize)]
pub struct Counts {
    /// Assignments from published weights, and from a fallback.
    pub assignments_weights: u64,
    pub assignments_fallback: u64,
    /// Fallbacks by reason: no weights, weights older than `max_age`, a retired experiment.
    pub fallback_missing: u64,
    pub fallback_stale: u64,
    pub fallback_retired: u64,
    /// Requests with neither usable weights nor a fallback.
    pub unassignable: u64,
    /// Weights messages whose version did not increase, and messages that were not weights.
    pub ignored_versions: u64,
    pub unreadable_messages: u64,
    pub impressions_written: u64,
    pub rewards_written: u64,
}

pub(crate) fn bump(c: &AtomicU64) {
    c.fetch_add(1, Ordering::Relaxed);
}

impl Counters {
    /// Counts what became of a weights message that was not taken.
    pub fn count_offered(&self, o: Offered) {
        match o {
            Offered::IgnoredVersion => bump(&self.ignored_versions),
            Offered::Unreadable => bump(&self.unreadable_messages),
            Offered::Applied | Offered::Retired => {}
        }
    }

    pub fn snapshot(&self) -> Counts {
        let g = |c: &AtomicU64| c.load(Ordering::Relaxed);
        Counts {
            assignments_weights: g(&self.assignments_weights),
            assignments_fallback: g(&self.assignments_fallback),
            fallback_missing: g(&self.fallback_missing),
            fallback_stale: g(&self.fallback_stale),
            fallback_retired: g(&self.fallback_retired),
            unassignable: g(&self.unassignable),
            ignored_versions: g(&self.ignored_versions),
            unreadable_messages: g(&self.unreadable_messages),
            impressions_written: g(&self.impressions_written),
            rewards_written: g(&self.rewards_written),
        }
    }
}
