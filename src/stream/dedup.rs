//! The duplicate window: the most recent event ids of one input partition.
//!
//! Ids are kept as 64-bit hashes (FxHash), so the window and its snapshot stay small: 10 000 ids
//! take about 80 kB in a snapshot. Two different ids share a hash with probability about
//! window / 2⁶⁴ per event, negligible against the duplicates the window exists to catch.
//!
//! The window is two generations of `capacity` ids each: new ids go into the current one;
//! when it is full, the older generation is dropped whole and the current one takes its place.
//! It therefore remembers at least the newest `capacity` ids and at most twice that, and
//! forgetting costs nothing per event (an exact window of `capacity` ids had to find and
//! remove its oldest id on every insert).

use std::hash::{BuildHasher, BuildHasherDefault};

use rustc_hash::{FxHashSet, FxHasher};

pub struct DedupWindow {
    capacity: usize,
    older: FxHashSet<u64>,
    current: FxHashSet<u64>,
}

impl DedupWindow {
    pub fn new(capacity: usize) -> Self {
        DedupWindow { capacity: capacity.max(1), older: FxHashSet::default(), current: FxHashSet::default() }
    }

    /// Rebuilds a window from its snapshot (older generation first), keeping the last
    /// `capacity` ids listed in the current generation and up to `capacity` before them in the
    /// older one.
    pub fn restore(capacity: usize, ids: &[u64]) -> Self {
        let mut w = DedupWindow::new(capacity);
        let keep = ids.len().min(2 * w.capacity);
        let ids = &ids[ids.len() - keep..];
        let split = keep.saturating_sub(w.capacity);
        w.older.extend(&ids[..split]);
        for &id in &ids[split..] {
            w.insert_hash(id);
        }
        w
    }

    pub fn hash(event_id: &str) -> u64 {
        BuildHasherDefault::<FxHasher>::default().hash_one(event_id)
    }

    pub fn contains(&self, event_id: &str) -> bool {
        self.contains_hash(Self::hash(event_id))
    }

    pub fn insert(&mut self, event_id: &str) {
        self.insert_hash(Self::hash(event_id));
    }

    /// For a hash from [`DedupWindow::hash`]: the hot path hashes each id once.
    pub fn contains_hash(&self, h: u64) -> bool {
        self.current.contains(&h) || self.older.contains(&h)
    }

    pub fn insert_hash(&mut self, h: u64) {
        if !self.contains_hash(h) {
            self.insert_new(h);
        }
    }

    /// For a hash that [`DedupWindow::contains_hash`] has just found absent: the hot path
    /// checks before applying an event and inserts after, and need not look twice.
    pub fn insert_new(&mut self, h: u64) {
        debug_assert!(!self.contains_hash(h), "insert_new of a hash the window holds");
        if self.current.len() >= self.capacity {
            // The older generation goes; its set's memory is reused for the next one.
            std::mem::swap(&mut self.older, &mut self.current);
            self.current.clear();
        }
        self.current.insert(h);
    }

    /// The older generation, then the current one, for snapshots. (Within a generation the
    /// order does not matter: a generation is forgotten whole.)
    pub fn ids(&self) -> Vec<u64> {
        self.older.iter().chain(&self.current).copied().collect()
    }

    #[cfg(test)]
    fn len(&self) -> usize {
        self.older.len() + self.current.len()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn remembers_at_least_the_newest_ids_and_at_most_twice_as_many() {
        let mut w = DedupWindow::new(2);
        for id in ["a", "b", "c", "d"] {
            w.insert(id);
        }
        assert!(w.contains("a") && w.contains("d") && w.len() == 4, "two full generations");
        w.insert("e");
        assert!(!w.contains("a") && !w.contains("b"), "the older generation goes whole");
        assert!(w.contains("c") && w.contains("d") && w.contains("e") && w.len() == 3);
        w.insert("c");
        assert_eq!(w.len(), 3, "an id already held is not added again");
    }

    #[test]
    fn a_restored_window_remembers_what_the_snapshot_listed() {
        let mut w = DedupWindow::new(3);
        for id in ["a", "b", "c", "d", "e"] {
            w.insert(id);
        }
        let r = DedupWindow::restore(3, &w.ids());
        assert_eq!(r.len(), 5);
        assert!(["a", "b", "c", "d", "e"].iter().all(|id| r.contains(id)));
        // A snapshot longer than two generations (written with a larger window) keeps the last.
        let long: Vec<u64> = (0..10).collect();
        let r = DedupWindow::restore(3, &long);
        assert_eq!(r.len(), 6);
        assert!(!r.contains_hash(3) && r.contains_hash(4) && r.contains_hash(9));
        // One written by an exact window of the same size restores whole.
        let exact: Vec<u64> = (0..3).collect();
        assert_eq!(DedupWindow::restore(3, &exact).len(), 3);
    }
}
