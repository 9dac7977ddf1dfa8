//! Running statistics of one arm, optionally discounted by a half-life in event time.
//!
//! Discounting follows the discounted-statistics idea of Garivier & Moulines (2011), "On
//! upper-confidence bound policies for switching bandit problems": every observation's weight
//! halves each `half_life` of event time, so an arm's estimate follows drifting traffic. Applying
//! an observation is O(1): the sums are kept as of the newest event time seen, and an older
//! event is added with its own weight rather than rewinding the sums.

use serde::{Deserialize, Serialize};

use super::attribution::{Bucket, Pending, Window};

/// Statistics of one arm.
///
/// The `*_total` fields are the plain, undiscounted totals that the counters report; `pulls`,
/// `reward` and `reward_sq` are what the policies and intervals use (equal to the totals when
/// decay is off). Everything is serialisable so that a snapshot restores the arm bit for bit.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct ArmStats {
    /// Effective pulls (discounted when decay is on).
    pub pulls: f64,
    /// Effective reward sum, in reward units.
    pub reward: f64,
    /// Effective sum of squared rewards, for the sample variance of bounded rewards.
    pub reward_sq: f64,
    /// Event time (ms) that the effective sums are discounted to; the newest event time seen.
    pub as_of_ms: i64,
    /// Undiscounted pulls ever applied.
    pub pulls_total: u64,
    /// Undiscounted reward ever applied.
    pub reward_total: f64,
    /// Event time of the newest impression, for "last pull".
    pub last_pull_ms: Option<i64>,
    /// Under an attribution window: impressions not yet matured, with the rewards attributed
    /// to them (always empty without a window). `pulls_total` and `reward_total` count them;
    /// the effective sums do not, until they mature.
    #[serde(default, skip_serializing_if = "Pending::is_empty")]
    pub pending: Pending,
}

/// Decay by a half-life in event time. `None` means no decay.
pub type HalfLife = Option<f64>;

impl ArmStats {
    /// Weight of an observation made at `ts_ms` relative to the sums' reference time, and moves
    /// the reference time forward (discounting the sums) when `ts_ms` is newer.
    fn weight_for(&mut self, ts_ms: i64, half_life_ms: HalfLife) -> f64 {
        let Some(h) = half_life_ms else {
            self.as_of_ms = self.as_of_ms.max(ts_ms);
            return 1.0;
        };
        if self.pulls_total == 0 && self.reward_total == 0.0 {
            self.as_of_ms = ts_ms;
            return 1.0;
        }
        if ts_ms > self.as_of_ms {
            let f = decay_factor(ts_ms.saturating_sub(self.as_of_ms) as f64, h);
            self.pulls *= f;
            self.reward *= f;
            self.reward_sq *= f;
            self.as_of_ms = ts_ms;
            1.0
        } else {
            decay_factor(self.as_of_ms.saturating_sub(ts_ms) as f64, h)
        }
    }

    /// Applies `count` impressions made at `ts_ms`.
    pub fn add_pulls(&mut self, count: u64, ts_ms: i64, half_life_ms: HalfLife) {
        let w = self.weight_for(ts_ms, half_life_ms);
        self.pulls += w * count as f64;
        self.count_pulls(count, ts_ms);
    }

    /// Counts `count` impressions made at `ts_ms` in the totals and "last pull" only (the
    /// effective sums take them when they mature).
    pub fn count_pulls(&mut self, count: u64, ts_ms: i64) {
        self.pulls_total = self.pulls_total.saturating_add(count);
        self.last_pull_ms = Some(self.last_pull_ms.map_or(ts_ms, |t| t.max(ts_ms)));
    }

    /// Adds a matured bucket's sums to the effective ones, discounted from `at_ms` (the
    /// bucket's start): an impression and the rewards attributed to it weigh alike, as one
    /// observation made when the impression was.
    pub fn absorb(&mut self, bucket: &Bucket, at_ms: i64, half_life_ms: HalfLife) {
        let w = self.weight_for(at_ms, half_life_ms);
        self.pulls += w * bucket.pulls as f64;
        self.reward += w * bucket.reward;
        self.reward_sq += w * bucket.reward_sq;
    }

    /// Moves every pending bucket below `below` into the effective sums, oldest first.
    pub fn mature(&mut self, window: Window, below: i64, half_life_ms: HalfLife) {
        let mut pending = std::mem::take(&mut self.pending);
        pending.mature(below, |b| self.absorb(b, window.start_ms(b.index), half_life_ms));
        self.pending = pending;
    }

    /// Pulls whose impressions have matured (all of them without a window).
    pub fn matured_pulls(&self) -> u64 {
        self.pulls_total.saturating_sub(self.pending.pulls())
    }

    /// Undiscounted reward attributed to matured pulls (all of it without a window).
    pub fn matured_reward(&self) -> f64 {
        if self.pending.is_empty() {
            self.reward_total
        } else {
            self.reward_total - self.pending.reward()
        }
    }

    /// Applies one reward of `value` (reward units) observed at `ts_ms`.
    pub fn add_reward(&mut self, value: f64, ts_ms: i64, half_life_ms: HalfLife) {
        let w = self.weight_for(ts_ms, half_life_ms);
        self.reward += w * value;
        self.reward_sq += w * value * value;
        self.reward_total += value;
    }

    /// Successes beyond the pull count under a 0/1 model (late rewards, or rewards for
    /// impressions never seen). Policies use successes clamped to pulls; this figure keeps the
    /// clamping visible instead of hiding it.
    pub fn excess_rewards(&self) -> f64 {
        (self.reward_total - self.pulls_total as f64).max(0.0)
    }

    /// The effective sums discounted to `now_ms` (unchanged when decay is off or `now_ms` is not
    /// newer): what a policy sees at publish time.
    pub fn at(&self, now_ms: i64, half_life_ms: HalfLife) -> (f64, f64, f64) {
        match half_life_ms {
            Some(h) if now_ms > self.as_of_ms => {
                let f = decay_factor(now_ms.saturating_sub(self.as_of_ms) as f64, h);
                (self.pulls * f, self.reward * f, self.reward_sq * f)
            }
            _ => (self.pulls, self.reward, self.reward_sq),
        }
    }
}

/// The one time every arm of an experiment is discounted to when its figures are taken at
/// `now_ms`: `now_ms`, or the newest event time of any arm when that is later (an event may be
/// stamped up to the allowed skew ahead of the clock). A common reference keeps the arms'
/// effective counts comparable: discounting each arm to its own newest event would leave an
/// arm that saw a future-stamped event 2^(skew/half-life) heavier than the others.
pub fn reference_ms(stats: &[ArmStats], now_ms: i64) -> i64 {
    stats.iter().map(|s| s.as_of_ms).fold(now_ms, i64::max)
}

/// 2^(−age / half_life).
fn decay_factor(age_ms: f64, half_life_ms: f64) -> f64 {
    (-age_ms / half_life_ms).exp2()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn without_decay_the_sums_are_plain_totals() {
        let mut s = ArmStats::default();
        s.add_pulls(3, 10, None);
        s.add_reward(1.0, 5, None);
        s.add_pulls(2, 20, None);
        assert_eq!((s.pulls, s.reward), (5.0, 1.0));
        assert_eq!(s.pulls_total, 5);
        assert_eq!(s.last_pull_ms, Some(20));
    }

    #[test]
    fn one_half_life_halves_the_weight_whatever_the_order() {
        let h = Some(1000.0);
        let mut a = ArmStats::default();
        a.add_pulls(4, 0, h);
        a.add_pulls(4, 1000, h);
        let mut b = ArmStats::default();
        b.add_pulls(4, 1000, h);
        b.add_pulls(4, 0, h);
        assert!((a.pulls - 6.0).abs() < 1e-12, "{}", a.pulls);
        assert!((b.pulls - 6.0).abs() < 1e-12, "{}", b.pulls);
        assert_eq!(a.pulls_total, 8);
        let (n, _, _) = a.at(2000, h);
        assert!((n - 3.0).abs() < 1e-12);
    }

    #[test]
    fn rewards_beyond_pulls_are_counted_as_excess_until_their_impressions_arrive() {
        let mut s = ArmStats::default();
        s.add_reward(1.0, 0, None);
        s.add_reward(1.0, 0, None);
        assert_eq!(s.excess_rewards(), 2.0);
        s.add_pulls(1, 1, None);
        assert_eq!(s.excess_rewards(), 1.0);
        s.add_pulls(5, 2, None);
        assert_eq!(s.excess_rewards(), 0.0);
    }
}
