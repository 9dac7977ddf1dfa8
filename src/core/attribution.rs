//! Attribution of rewards to the impressions they belong to, under a window of W.
//!
//! An impression *matures* W after its event time: by then every reward it will be credited
//! with has been seen, so its pull and its rewards join the arm's estimates together. Counting
//! a pull the moment it arrives, as happens without a window, pulls a mean down by the share
//! of rewards still on their way (README, "Rewards that arrive late"). Delayed feedback in
//! bandits: Joulani, György & Szepesvári (2013), "Online learning under delayed feedback",
//! ICML; Vernade, Cappé & Perchet (2017), "Stochastic bandit models for delayed conversions",
//! UAI.
//!
//! Memory per arm is bounded: pending impressions are summed in buckets of W / [`BUCKETS`] of
//! event time (count, reward sum, sum of squares), and only buckets not yet matured are kept,
//! so an arm holds at most [`MAX_BUCKETS`] of them whatever its traffic: 18 × 32 bytes, about
//! 600 bytes with the queue's own, and nothing for an arm without a window or without recent
//! impressions. The price is
//! resolution: an impression matures between W and W·(1 + 1/BUCKETS) after its event time.
//!
//! The clock that matures buckets is the experiment's event time (the newest event time
//! applied), not the wall clock, so that replaying the same events gives the same state bit
//! for bit, and a backlog read after an outage matures as it was lived rather than all at once.

use std::collections::VecDeque;

use serde::{Deserialize, Serialize};

/// Buckets one window is cut into.
pub const BUCKETS: i64 = 16;

/// The most buckets an arm holds: those from the first not matured to the clock's own.
pub const MAX_BUCKETS: usize = BUCKETS as usize + 2;

/// An attribution window of `ms` milliseconds of event time.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Window {
    pub ms: i64,
}

impl Window {
    /// Width of one bucket, ms (at least 1).
    pub fn bucket_ms(self) -> i64 {
        ((self.ms + BUCKETS - 1) / BUCKETS).max(1)
    }

    /// The bucket an impression made at `ts_ms` falls in.
    pub fn bucket(self, ts_ms: i64) -> i64 {
        ts_ms.div_euclid(self.bucket_ms())
    }

    /// Event time the bucket starts at: the time its pulls and rewards are discounted from
    /// when decay is on.
    pub fn start_ms(self, bucket: i64) -> i64 {
        bucket.saturating_mul(self.bucket_ms())
    }

    /// The first bucket not matured when the clock reads `clock_ms`: bucket k has matured once
    /// its last instant is W old, (k + 1)·width + W ≤ clock.
    pub fn matured_below(self, clock_ms: i64) -> i64 {
        clock_ms.saturating_sub(self.ms).div_euclid(self.bucket_ms())
    }

    /// A reward observed at `reward_ms` for an impression made at `impression_ms` came after
    /// the impression's window closed.
    pub fn is_late(self, reward_ms: i64, impression_ms: i64) -> bool {
        reward_ms.saturating_sub(impression_ms) > self.ms
    }
}

/// Sums of the impressions of one bucket and the rewards attributed to them.
#[derive(Clone, Copy, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Bucket {
    #[serde(rename = "k")]
    pub index: i64,
    #[serde(rename = "n")]
    pub pulls: u64,
    #[serde(rename = "r")]
    pub reward: f64,
    #[serde(rename = "q")]
    pub reward_sq: f64,
}

/// The buckets of one arm that have not matured, oldest first; only buckets that hold
/// something are kept.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(transparent)]
pub struct Pending {
    buckets: VecDeque<Bucket>,
}

impl Pending {
    pub fn is_empty(&self) -> bool {
        self.buckets.is_empty()
    }

    /// Buckets held: at most [`MAX_BUCKETS`] when every addition is preceded by
    /// [`Pending::mature`] to the same clock.
    pub fn len(&self) -> usize {
        self.buckets.len()
    }

    /// Pulls waiting to mature.
    pub fn pulls(&self) -> u64 {
        self.buckets.iter().map(|b| b.pulls).sum()
    }

    /// Reward attributed to pulls waiting to mature.
    pub fn reward(&self) -> f64 {
        self.buckets.iter().map(|b| b.reward).sum()
    }

    /// Adds to bucket `index`, which must not have matured. O(1) for the usual case of the
    /// newest bucket; an older one is found by binary search among at most [`MAX_BUCKETS`].
    pub fn add(&mut self, index: i64, pulls: u64, reward: f64) {
        self.add_sums(index, &Bucket { index, pulls, reward, reward_sq: reward * reward });
    }

    /// Adds a whole bucket's sums to bucket `index` (also a bucket carried over to another
    /// window).
    pub fn add_sums(&mut self, index: i64, sums: &Bucket) {
        let at = match self.buckets.back() {
            Some(b) if b.index == index => self.buckets.len() - 1,
            Some(b) if b.index < index => self.insert(self.buckets.len(), index),
            None => self.insert(0, index),
            Some(_) => match self.buckets.binary_search_by_key(&index, |b| b.index) {
                Ok(at) => at,
                Err(at) => self.insert(at, index),
            },
        };
        let b = &mut self.buckets[at];
        b.pulls = b.pulls.saturating_add(sums.pulls);
        b.reward += sums.reward;
        b.reward_sq += sums.reward_sq;
    }

    fn insert(&mut self, at: usize, index: i64) -> usize {
        if self.buckets.capacity() == 0 {
            // Room for the most an arm ever holds, once, rather than doubling past it.
            self.buckets.reserve_exact(MAX_BUCKETS);
        }
        self.buckets.insert(at, Bucket { index, ..Bucket::default() });
        at
    }

    /// Takes every bucket below `below` out, oldest first, handing each to `matured`. An arm
    /// left with none gives its memory back.
    pub fn mature(&mut self, below: i64, mut matured: impl FnMut(&Bucket)) {
        let mut took = false;
        while self.buckets.front().is_some_and(|b| b.index < below) {
            if let Some(b) = self.buckets.pop_front() {
                matured(&b);
                took = true;
            }
        }
        if took && self.buckets.is_empty() {
            self.buckets = VecDeque::new();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_bucket_matures_once_its_last_instant_is_a_window_old() {
        let w = Window { ms: 16_000 };
        assert_eq!(w.bucket_ms(), 1000);
        assert_eq!(w.bucket(999), 0);
        assert_eq!(w.bucket(-1), -1);
        // Bucket 0 covers [0, 1000): its last instant is 999, a window old at 16 999 < 17 000.
        assert_eq!(w.matured_below(16_999), 0);
        assert_eq!(w.matured_below(17_000), 1);
        assert!(!w.is_late(16_000, 0));
        assert!(w.is_late(16_001, 0));
    }

    #[test]
    fn buckets_stay_in_order_and_mature_oldest_first() {
        let mut p = Pending::default();
        p.add(5, 2, 0.0);
        p.add(3, 1, 1.0);
        p.add(5, 1, 1.0);
        p.add(4, 0, 0.5);
        p.add(7, 4, 0.0);
        assert_eq!(p.buckets.iter().map(|b| b.index).collect::<Vec<_>>(), [3, 4, 5, 7]);
        assert_eq!((p.pulls(), p.reward()), (8, 2.5));
        let mut seen = Vec::new();
        p.mature(6, |b| seen.push((b.index, b.pulls, b.reward, b.reward_sq)));
        assert_eq!(seen, [(3, 1, 1.0, 1.0), (4, 0, 0.5, 0.25), (5, 3, 1.0, 1.0)]);
        assert_eq!(p.len(), 1);
    }
}
