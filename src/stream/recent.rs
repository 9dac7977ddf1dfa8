//! What one input partition remembers of its recent events, by the hash of their event id:
//! the duplicate window (ids alone), and the event times of recent impressions of experiments
//! with an attribution window, which rewards naming an `impression_id` are credited by.
//!
//! Ids are kept as 64-bit hashes (FxHash), so the maps and their snapshots stay small: 10 000
//! ids take about 80 kB in a snapshot. Two different ids share a hash with probability about
//! window / 2⁶⁴ per event, negligible against the duplicates the window exists to catch.
//!
//! Each map is two generations of `capacity` ids each: new ids go into the current one; when
//! it is full, the older generation is dropped whole and the current one takes its place. It
//! therefore remembers at least the newest `capacity` ids and at most twice that, and
//! forgetting costs nothing per event (an exact window of `capacity` ids had to find and
//! remove its oldest id on every insert).

use std::hash::{BuildHasher, BuildHasherDefault};

use rustc_hash::{FxHashMap, FxHasher};

/// The newest ids seen, each with a value.
pub struct Recent<V> {
    capacity: usize,
    older: FxHashMap<u64, V>,
    current: FxHashMap<u64, V>,
}

/// The duplicate window: the most recent event ids.
pub type DedupWindow = Recent<()>;

/// Event times of recent impressions, by event id.
pub type ImpressionTimes = Recent<i64>;

impl<V: Copy> Recent<V> {
    pub fn new(capacity: usize) -> Self {
        Recent { capacity: capacity.max(1), older: FxHashMap::default(), current: FxHashMap::default() }
    }

    /// Rebuilds a map from its snapshot (older generation first), keeping the last
    /// `capacity` entries listed in the current generation and up to `capacity` before them in
    /// the older one.
    pub fn restore(capacity: usize, entries: impl ExactSizeIterator<Item = (u64, V)>) -> Self {
        let mut w = Recent::new(capacity);
        let len = entries.len();
        let keep = len.min(2 * w.capacity);
        let split = keep.saturating_sub(w.capacity);
        for (i, (h, v)) in entries.skip(len - keep).enumerate() {
            if i < split {
                w.older.insert(h, v);
            } else if !w.contains_hash(h) {
                w.insert_new(h, v);
            }
        }
        w
    }

    pub fn hash(event_id: &str) -> u64 {
        BuildHasherDefault::<FxHasher>::default().hash_one(event_id)
    }

    /// For a hash from [`Recent::hash`]: the hot path hashes each id once.
    pub fn contains_hash(&self, h: u64) -> bool {
        self.current.contains_key(&h) || self.older.contains_key(&h)
    }

    pub fn get(&self, h: u64) -> Option<V> {
        self.current.get(&h).or_else(|| self.older.get(&h)).copied()
    }

    /// For a hash that [`Recent::contains_hash`] has just found absent: the hot path checks
    /// before applying an event and inserts after, and need not look twice.
    pub fn insert_new(&mut self, h: u64, v: V) {
        debug_assert!(!self.contains_hash(h), "insert_new of a hash the map holds");
        if self.current.len() >= self.capacity {
            // The older generation goes; its map's memory is reused for the next one.
            std::mem::swap(&mut self.older, &mut self.current);
            self.current.clear();
        }
        self.current.insert(h, v);
    }

    /// The older generation, then the current one, for snapshots. (Within a generation the
    /// order does not matter: a generation is forgotten whole.)
    pub fn entries(&self) -> impl Iterator<Item = (u64, V)> + '_ {
        self.older.iter().chain(&self.current).map(|(h, v)| (*h, *v))
    }

    pub fn len(&self) -> usize {
        self.older.len() + self.current.len()
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

impl Recent<()> {
    pub fn contains(&self, event_id: &str) -> bool {
        self.contains_hash(Self::hash(event_id))
    }

    pub fn insert(&mut self, event_id: &str) {
        let h = Self::hash(event_id);
        if !self.contains_hash(h) {
            self.insert_new(h, ());
        }
    }

    /// The ids alone, as the snapshot lists them.
    pub fn ids(&self) -> Vec<u64> {
        self.entries().map(|(h, ())| h).collect()
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
        let r = DedupWindow::restore(3, w.ids().into_iter().map(|h| (h, ())));
        assert_eq!(r.len(), 5);
        assert!(["a", "b", "c", "d", "e"].iter().all(|id| r.contains(id)));
        // A snapshot longer than two generations (written with a larger window) keeps the last.
        let long: Vec<u64> = (0..10).collect();
        let r = DedupWindow::restore(3, long.iter().map(|&h| (h, ())));
        assert_eq!(r.len(), 6);
        assert!(!r.contains_hash(3) && r.contains_hash(4) && r.contains_hash(9));
        // One written by an exact window of the same size restores whole.
        let exact: Vec<u64> = (0..3).collect();
        assert_eq!(DedupWindow::restore(3, exact.iter().map(|&h| (h, ()))).len(), 3);
    }
}
