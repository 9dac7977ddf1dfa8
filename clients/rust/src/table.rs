//! The latest weights per experiment, as read from the weights topic: written by one follower,
//! read on every request without a lock (an immutable map swapped whole, `arc-swap`).

use std::collections::HashMap;
use std::sync::{Arc, Mutex};

use arc_swap::ArcSwap;
use serde::Deserialize;

use crate::hash::{arm_seed, Racer};

/// What the client holds of one experiment.
#[derive(Clone, Debug, PartialEq)]
pub struct Held {
    pub version: u64,
    /// `learning`, `frozen`, `concluded` or `retired`, as published.
    pub state: String,
    pub published_at_ms: i64,
    /// Arm names in ascending order, and beside each its seed and weight.
    pub names: Vec<Arc<str>>,
    pub racers: Vec<Racer>,
    /// Sum of the positive weights.
    pub total: f64,
    /// Retired (a message saying so, or a tombstone): the weights are not used any more.
    pub retired: bool,
}

/// What became of one message of the weights topic.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Offered {
    Applied,
    /// Its version is not above the highest held for the experiment (also after a tombstone).
    IgnoredVersion,
    /// A tombstone, or a message with state `retired`.
    Retired,
    /// Not a weights message: no key, not JSON, a missing field, or weights that are negative,
    /// not finite, or all zero.
    Unreadable,
}

#[derive(Deserialize)]
struct Message {
    experiment: String,
    version: u64,
    state: String,
    published_at_ms: i64,
    #[serde(default)]
    weights: std::collections::BTreeMap<String, f64>,
}

/// The states a weights message may carry.
const STATES: [&str; 4] = ["learning", "frozen", "concluded", "retired"];

type Map = HashMap<Arc<str>, Arc<Held>, rustc_hash::FxBuildHasher>;

/// Experiment id → the weights held. Readers call [`Table::get`]; the writer offers messages and
/// then publishes what it changed with [`Table::publish`].
#[derive(Default)]
pub struct Table {
    current: ArcSwap<Map>,
    /// The writer's copy, and whether it differs from `current`.
    master: Mutex<(Map, bool)>,
}

impl Table {
    /// The weights held for `experiment`, without a lock.
    pub fn get(&self, experiment: &str) -> Option<Arc<Held>> {
        self.current.load().get(experiment).cloned()
    }

    /// Calls `f` with the experiment's id as held and the weights held for it, without a lock.
    pub fn with<R>(&self, experiment: &str, f: impl FnOnce(Option<(&Arc<str>, &Held)>) -> R) -> R {
        let map = self.current.load();
        f(map.get_key_value(experiment).map(|(k, h)| (k, &**h)))
    }

    /// Takes one message (its key, and its value: `None` for a tombstone). Readers see the change
    /// after the next [`Table::publish`]. The rules are the Python client's (`table.py`), so the
    /// two hold the same weights after the same messages: a message needs `experiment` (equal to
    /// the key when there is one), `version`, a known `state` and `published_at_ms`; one that is
    /// not retired needs weights, finite, not negative, and not all zero.
    pub fn offer(&self, key: Option<&[u8]>, value: Option<&[u8]>) -> Offered {
        let key = match key.map(std::str::from_utf8) {
            Some(Err(_)) => return Offered::Unreadable,
            Some(Ok(k)) => Some(k),
            None => None,
        };
        let mut master = self.master.lock().unwrap_or_else(|p| p.into_inner());
        let Some(value) = value else {
            let Some(id) = key.filter(|k| !k.is_empty()) else { return Offered::Unreadable };
            let retired = match master.0.get(id) {
                Some(h) if h.retired && h.names.is_empty() => return Offered::Retired,
                Some(h) => Held { retired: true, state: "retired".into(), names: Vec::new(), racers: Vec::new(), total: 0.0, ..(**h).clone() },
                None => Held { version: 0, state: "retired".into(), published_at_ms: 0, names: Vec::new(), racers: Vec::new(), total: 0.0, retired: true },
            };
            master.0.insert(Arc::from(id), Arc::new(retired));
            master.1 = true;
            return Offered::Retired;
        };
        let Ok(m) = serde_json::from_slice::<Message>(value) else { return Offered::Unreadable };
        if m.experiment.is_empty() || key.is_some_and(|k| k != m.experiment) || !STATES.contains(&m.state.as_str()) {
            return Offered::Unreadable;
        }
        let retired = m.state == "retired";
        if !retired && (m.weights.values().any(|w| !(w.is_finite() && *w >= 0.0)) || !m.weights.values().any(|w| *w > 0.0)) {
            return Offered::Unreadable;
        }
        if master.0.get(m.experiment.as_str()).is_some_and(|h| m.version <= h.version && !(h.version == 0 && h.names.is_empty())) {
            return Offered::IgnoredVersion;
        }
        let (names, racers): (Vec<Arc<str>>, Vec<Racer>) = if retired {
            (Vec::new(), Vec::new())
        } else {
            m.weights.iter().map(|(a, &w)| (Arc::from(a.as_str()), Racer { seed: arm_seed(a), weight: w })).unzip()
        };
        let total = racers.iter().map(|r| r.weight).filter(|w| *w > 0.0).sum();
        let held = Held { version: m.version, state: m.state, published_at_ms: m.published_at_ms, names, racers, total, retired };
        master.0.insert(Arc::from(m.experiment.as_str()), Arc::new(held));
        master.1 = true;
        if retired {
            Offered::Retired
        } else {
            Offered::Applied
        }
    }

    /// Makes what was offered since the last call visible to readers.
    pub fn publish(&self) {
        let mut master = self.master.lock().unwrap_or_else(|p| p.into_inner());
        if std::mem::take(&mut master.1) {
            self.current.store(Arc::new(master.0.clone()));
        }
    }

    /// How many experiments are held (retired ones included).
    pub fn len(&self) -> usize {
        self.current.load().len()
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn msg(version: u64, state: &str, weights: &str) -> Vec<u8> {
        format!(r#"{{"experiment":"e","version":{version},"state":"{state}","published_at_ms":5,"weights":{weights}}}"#).into_bytes()
    }

    #[test]
    fn versions_only_move_forward_through_tombstones_and_retirements() {
        let t = Table::default();
        assert_eq!(t.offer(Some(b"e"), Some(&msg(3, "learning", r#"{"b":0.4,"a":0.6}"#))), Offered::Applied);
        assert!(t.get("e").is_none(), "not visible before publish");
        t.publish();
        let h = t.get("e").expect("held");
        assert_eq!((h.version, &*h.names[0], h.racers[0].weight), (3, "a", 0.6), "arms in ascending order of name");
        assert_eq!(t.offer(Some(b"e"), Some(&msg(3, "learning", r#"{"a":1.0}"#))), Offered::IgnoredVersion);
        assert_eq!(t.offer(Some(b"e"), Some(&msg(2, "learning", r#"{"a":1.0}"#))), Offered::IgnoredVersion);
        assert_eq!(t.offer(Some(b"e"), Some(b"{")), Offered::Unreadable);
        assert_eq!(t.offer(Some(b"e"), Some(&msg(4, "learning", r#"{"a":-1.0,"b":2.0}"#))), Offered::Unreadable);
        assert_eq!(t.offer(Some(b"f"), Some(&msg(4, "learning", r#"{"a":1.0}"#))), Offered::Unreadable, "a key that is not its experiment");
        assert_eq!(t.offer(Some(b"e"), Some(&msg(4, "paused", r#"{"a":1.0}"#))), Offered::Unreadable, "an unknown state");
        assert_eq!(t.offer(Some(b"e"), Some(&msg(5, "retired", r#"{"a":1.0}"#))), Offered::Retired);
        assert_eq!(t.offer(Some(b"e"), None), Offered::Retired);
        t.publish();
        let h = t.get("e").expect("still held, as retired");
        assert!(h.retired && h.version == 5, "{h:?}");
        assert_eq!(t.offer(Some(b"never"), None), Offered::Retired);
        t.publish();
        assert!(t.get("never").is_some_and(|h| h.retired), "a tombstone of an experiment never seen marks it retired");
        let fresh = br#"{"experiment":"never","version":1,"state":"learning","published_at_ms":5,"weights":{"a":1.0}}"#;
        assert_eq!(t.offer(None, Some(fresh)), Offered::Applied, "then its first weights apply; no key: the experiment field");
        assert_eq!(t.offer(Some(b"e"), Some(&msg(5, "learning", r#"{"a":1.0}"#))), Offered::IgnoredVersion);
        assert_eq!(t.offer(Some(b"e"), Some(&msg(6, "learning", r#"{"a":1.0}"#))), Offered::Applied, "defined again, above every version");
        t.publish();
        assert!(!t.get("e").expect("held").retired);
    }
}
