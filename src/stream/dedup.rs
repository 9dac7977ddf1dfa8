//! The duplicate window: the most recent event ids of one input partition.
//!
//! Ids are kept as 64-bit hashes (FxHash), oldest first, so the window and its snapshot stay
//! small: 10 000 ids take about 80 kB. Two different ids share a hash with probability about
//! window / 2⁶⁴ per event, negligible against the duplicates the window exists to catch.

use std::collections::VecDeque;
use std::hash::{BuildHasher, BuildHasherDefault};

use rustc_hash::{FxHashSet, FxHasher};

pub struct DedupWindow {
    capacity: usize,
    order: VecDeque<u64>,
    seen: FxHashSet<u64>,
}

impl DedupWindow {
    pub fn new(capacity: usize) -> Self {
        DedupWindow { capacity: capacity.max(1), order: VecDeque::new(), seen: FxHashSet::default() }
    }

    /// Rebuilds a window from its snapshot (oldest first), keeping the newest `capacity` ids.
    pub fn restore(capacity: usize, ids: &[u64]) -> Self {
        let mut w = DedupWindow::new(capacity);
        let skip = ids.len().saturating_sub(w.capacity);
        for &id in &ids[skip..] {
            w.insert_hash(id);
        }
        w
    }

    pub fn hash(event_id: &str) -> u64 {
        BuildHasherDefault::<FxHasher>::default().hash_one(event_id)
    }

    pub fn contains(&self, event_id: &str) -> bool {
        self.seen.contains(&Self::hash(event_id))
    }

    pub fn insert(&mut self, event_id: &str) {
        self.insert_hash(Self::hash(event_id));
    }

    /// For a hash from [`DedupWindow::hash`]: the hot path hashes each id once.
    pub fn contains_hash(&self, h: u64) -> bool {
        self.seen.contains(&h)
    }

    pub fn insert_hash(&mut self, h: u64) {
        if !self.seen.insert(h) {
            return;
        }
        self.order.push_back(h);
        if self.order.len() > self.capacity {
            if let Some(old) = self.order.pop_front() {
                self.seen.remove(&old);
            }
        }
    }

    /// Oldest first, for snapshots.
    pub fn ids(&self) -> Vec<u64> {
        self.order.iter().copied().collect()
    }

    pub fn len(&self) -> usize {
        self.order.len()
    }

    pub fn is_empty(&self) -> bool {
        self.order.is_empty()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn forgets_the_oldest_id_beyond_capacity() {
        let mut w = DedupWindow::new(2);
        w.insert("a");
        w.insert("b");
        w.insert("c");
        assert!(!w.contains("a") && w.contains("b") && w.contains("c"));
        let r = DedupWindow::restore(2, &w.ids());
        assert!(r.contains("b") && r.contains("c") && r.len() == 2);
    }
}
