//! What the stream counts, and how counts restored from a snapshot reach the process-wide
//! Prometheus counters without counting an event twice.
//!
//! Every input partition keeps its own running counts, which its snapshots carry, so that the
//! counts survive a crash or a restart with the partition's statistics. The process-wide
//! counters (`apportion_events_total`, `apportion_dead_letters_total`, …) are Prometheus
//! counters: they never go down in one process, and the sum over instances should count each
//! event once. A partition's restored counts are therefore added to this process's counters only
//! when nobody alive still carries them:
//!
//! - a snapshot written when its writer handed the partition over while staying in the group
//!   (`handed_over`) adds nothing: the writer's own counters keep those events;
//! - a periodic snapshot (the writer may have crashed) or one written on shutdown adds what the
//!   snapshot holds beyond what this process already counted of that partition when it last let
//!   it go (nothing, for a partition it never held).
//!
//! Per-experiment series (`apportion_unmatched_rewards_total`, `apportion_late_rewards_total`,
//! …) are different: they live only where their experiment is held, and go when it goes, so
//! a new owner takes them over at the snapshot's values whatever wrote it.
//!
//! So after a hand-over between live instances neither instance's event counters move; after a crash
//! or a shutdown the next owner carries the partition's counts on. What this gives up: a member
//! that handed a partition over and later dies takes its share of that partition's earlier
//! counts with its series, so the sum over instances can fall short (never over) until then.

use std::collections::BTreeMap;

use super::snapshot::Counters;

/// Kinds as counted (`kind` label); `unknown` for events not read far enough to know.
pub const KINDS: [&str; 3] = ["impression", "reward", "unknown"];
/// Outcomes as counted (`outcome` label).
/// `late`: a reward taken after its impression's attribution window closed, counted and not
/// applied to the estimates.
pub const OUTCOMES: [&str; 4] = ["applied", "duplicate", "rejected", "late"];
/// Number of (kind, outcome) cells.
pub const CELLS: usize = KINDS.len() * OUTCOMES.len();

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Kind {
    Impression = 0,
    Reward = 1,
    Unknown = 2,
}

impl From<crate::event::Kind> for Kind {
    fn from(k: crate::event::Kind) -> Kind {
        match k {
            crate::event::Kind::Impression => Kind::Impression,
            crate::event::Kind::Reward => Kind::Reward,
        }
    }
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Outcome {
    Applied = 0,
    Duplicate = 1,
    Rejected = 2,
    Late = 3,
}

/// Event counts by (kind, outcome): plain numbers, cheap to bump on the hot path.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Cells(pub [u64; CELLS]);

impl Cells {
    pub fn index(kind: Kind, outcome: Outcome) -> usize {
        kind as usize * OUTCOMES.len() + outcome as usize
    }

    pub fn add(&mut self, kind: Kind, outcome: Outcome) {
        self.0[Cells::index(kind, outcome)] += 1;
    }

    /// The `kind` and `outcome` labels of cell `i`.
    pub fn labels(i: usize) -> (&'static str, &'static str) {
        (KINDS[i / OUTCOMES.len()], OUTCOMES[i % OUTCOMES.len()])
    }

    /// Whether cell `i` can count anything: an event of unknown kind is only ever rejected,
    /// and only a reward can be late, so the other cells get no series.
    pub fn counts_anything(i: usize) -> bool {
        let (kind, outcome) = (i / OUTCOMES.len(), i % OUTCOMES.len());
        if kind == Kind::Unknown as usize {
            return outcome == Outcome::Rejected as usize;
        }
        outcome != Outcome::Late as usize || kind == Kind::Reward as usize
    }

    /// As written in snapshots: `kind/outcome` → count, zero cells left out.
    pub fn to_map(self) -> BTreeMap<String, u64> {
        (0..CELLS)
            .filter(|&i| self.0[i] > 0)
            .map(|i| {
                let (k, o) = Cells::labels(i);
                (format!("{k}/{o}"), self.0[i])
            })
            .collect()
    }

    /// Reads the snapshot form back; keys it does not know go to `unknown`.
    pub fn from_map(map: &BTreeMap<String, u64>, mut unknown: impl FnMut(&str)) -> Cells {
        let mut c = Cells::default();
        for (key, &v) in map {
            let cell = key.split_once('/').and_then(|(kind, outcome)| {
                Some(KINDS.iter().position(|x| *x == kind)? * OUTCOMES.len() + OUTCOMES.iter().position(|x| *x == outcome)?)
            });
            match cell {
                Some(i) => c.0[i] = v,
                None => unknown(key),
            }
        }
        c
    }
}

/// What `snapshot` holds beyond `base`, key by key (never below zero): the part of a
/// partition's restored instance-wide counts (events, dead letters) that this process's
/// counters do not yet hold. Per-experiment counts follow their experiment instead
/// (`Applier::carry_experiment_counts`).
pub fn beyond(snapshot: &Counters, base: &Counters) -> Counters {
    fn diff(a: &BTreeMap<String, u64>, b: &BTreeMap<String, u64>) -> BTreeMap<String, u64> {
        a.iter()
            .filter_map(|(k, &v)| {
                let d = v.saturating_sub(b.get(k).copied().unwrap_or(0));
                (d > 0).then(|| (k.clone(), d))
            })
            .collect()
    }
    Counters { events: diff(&snapshot.events, &base.events), dead_letters: diff(&snapshot.dead_letters, &base.dead_letters), ..Counters::default() }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cells_read_back_what_they_write() {
        let mut c = Cells::default();
        c.add(Kind::Impression, Outcome::Applied);
        c.add(Kind::Reward, Outcome::Duplicate);
        c.add(Kind::Unknown, Outcome::Rejected);
        let mut unknown = Vec::new();
        let mut map = c.to_map();
        map.insert("other/applied".into(), 4);
        assert_eq!(Cells::from_map(&map, |k| unknown.push(k.to_string())), c);
        assert_eq!(unknown, ["other/applied"]);
        assert!(!Cells::counts_anything(Cells::index(Kind::Unknown, Outcome::Applied)));
        assert!(Cells::counts_anything(Cells::index(Kind::Unknown, Outcome::Rejected)));
        assert!(Cells::counts_anything(Cells::index(Kind::Reward, Outcome::Late)));
        assert!(!Cells::counts_anything(Cells::index(Kind::Impression, Outcome::Late)));
    }

    #[test]
    fn beyond_takes_out_what_is_already_counted_and_never_goes_negative() {
        let mut snap = Counters::default();
        snap.events.insert("impression/applied".into(), 10);
        snap.dead_letters.insert("not-json".into(), 2);
        let mut base = Counters::default();
        base.events.insert("impression/applied".into(), 7);
        base.dead_letters.insert("not-json".into(), 5);
        let d = beyond(&snap, &base);
        assert_eq!(d.events.get("impression/applied"), Some(&3));
        assert!(d.dead_letters.is_empty());
    }
}
