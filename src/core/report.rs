//! Figures derived from an experiment's statistics: per-arm means and intervals, the leader,
//! undecided arms, the exploration ratio and the cumulative regret estimate.

use serde::Serialize;

use super::interval::{bounded_normal, wilson, Interval};
use super::reward::RewardModel;
use super::stats::{ArmStats, HalfLife};

/// What is reported of one arm.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ArmReport {
    /// Undiscounted pulls ever applied.
    pub pulls: u64,
    /// Undiscounted reward ever applied, in reward units.
    pub reward: f64,
    /// Estimated mean reward (discounted when decay is on), in reward units.
    pub mean: f64,
    pub ci_low: f64,
    pub ci_high: f64,
    /// The interval overlaps the leader's: the data cannot yet rule this arm out.
    pub undecided: bool,
    pub last_pull_ms: Option<i64>,
    /// Rewards beyond the pulls under a 0/1 model, left out of the policy's success count.
    pub excess_rewards: f64,
}

impl ArmReport {
    pub fn width(&self) -> f64 {
        self.ci_high - self.ci_low
    }
}

/// What is reported of one experiment.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Report {
    pub arms: Vec<ArmReport>,
    /// Index of the arm with the highest estimated mean among arms with pulls (the first such
    /// arm on ties); `None` before any pull.
    pub leader: Option<usize>,
    /// Σⱼ nⱼ·(μ̂_leader − μ̂ⱼ) in reward units: an estimate of the pseudo-regret so far, taken with
    /// the estimates of the moment (so it can move down as well as up).
    pub regret_estimate: f64,
}

/// Mean and interval of one arm in reward units, as of `now_ms`.
pub fn estimate(stats: &ArmStats, model: RewardModel, now_ms: i64, half_life: HalfLife) -> (f64, Interval) {
    let (n, sum, sum_sq) = stats.at(now_ms, half_life);
    match model {
        RewardModel::Bernoulli => {
            let s = sum.min(n);
            let mean = if n > 0.0 { s / n } else { 0.0 };
            (mean, wilson(s, n))
        }
        RewardModel::Bounded { max } => {
            let mean = if n > 0.0 { sum / n } else { 0.0 };
            (mean, bounded_normal(n, sum, sum_sq, max))
        }
    }
}

/// Builds the report of arms with `stats`.
pub fn report<'a>(
    stats: impl Iterator<Item = &'a ArmStats>,
    model: RewardModel,
    now_ms: i64,
    half_life: HalfLife,
) -> Report {
    let mut arms: Vec<ArmReport> = stats
        .map(|s| {
            let (mean, ci) = estimate(s, model, now_ms, half_life);
            ArmReport {
                pulls: s.pulls_total,
                reward: s.reward_total,
                mean,
                ci_low: ci.low,
                ci_high: ci.high,
                undecided: false,
                last_pull_ms: s.last_pull_ms,
                excess_rewards: if model.is_binary() { s.excess_rewards() } else { 0.0 },
            }
        })
        .collect();
    let mut leader: Option<usize> = None;
    for (j, a) in arms.iter().enumerate() {
        if a.pulls > 0 && leader.is_none_or(|l| a.mean > arms[l].mean) {
            leader = Some(j);
        }
    }
    let mut regret = 0.0;
    if let Some(l) = leader {
        let (best, floor) = (arms[l].mean, arms[l].ci_low);
        for (j, a) in arms.iter_mut().enumerate() {
            a.undecided = j != l && a.ci_high >= floor;
            regret += a.pulls as f64 * (best - a.mean);
        }
    }
    Report { arms, leader, regret_estimate: regret }
}

/// 1 − the leader's weight: the share of traffic still spent away from the current best.
pub fn exploration_ratio(weights: &[f64], leader: Option<usize>) -> f64 {
    match leader {
        Some(l) => (1.0 - weights.get(l).copied().unwrap_or(0.0)).max(0.0),
        None => 1.0,
    }
}
