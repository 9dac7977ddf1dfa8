//! Figures derived from an experiment's statistics: per-arm means, intervals and confidence
//! sequences, the leader, undecided arms, lift over the control arm, the exploration ratio,
//! the cumulative regret estimate and the decision figures.

use serde::Serialize;

use super::decision::decide;
use super::experiment::ExperimentSpec;
use super::interval::{clamp_sum, empirical_bernstein, wilson, Interval, LEVEL};
use super::reward::RewardModel;
use super::sequence::{confidence_sequence, per_arm_alpha};
use super::stats::{reference_ms, ArmStats, HalfLife};

/// An arm's mean minus the control arm's, with an anytime-valid interval: the difference of
/// the two arms' confidence sequences, so it holds whenever they both do.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Lift {
    pub estimate: f64,
    pub low: f64,
    pub high: f64,
}

/// What is reported of one arm.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ArmReport {
    /// Undiscounted pulls ever applied, matured and pending.
    pub pulls: u64,
    /// Of `pulls`, those whose impressions have not matured under the attribution window (0
    /// without a window): not yet in the mean, the interval or the policy's inputs.
    pub pending_pulls: u64,
    /// Undiscounted reward ever applied, in reward units.
    pub reward: f64,
    /// Estimated mean reward (discounted when decay is on), in reward units.
    pub mean: f64,
    /// The fixed-time 95 % interval (Wilson, or empirical Bernstein for bounded rewards): valid
    /// for one look planned in advance, not for a dashboard watched every minute.
    pub ci_low: f64,
    pub ci_high: f64,
    /// The anytime-valid confidence sequence (`core::sequence`), 95 % for all arms of the
    /// experiment together: valid at every look.
    pub cs_low: f64,
    pub cs_high: f64,
    /// The arm's sequence still reaches the leader's: the data cannot yet rule this arm out.
    pub undecided: bool,
    pub last_pull_ms: Option<i64>,
    /// Rewards beyond the pulls under a 0/1 model, left out of the policy's success count.
    pub excess_rewards: f64,
    /// Posterior probability that this arm is the best (`core::decision`), for every policy.
    pub best_probability: f64,
    /// Against the control arm, for the other arms of an experiment that names one.
    pub lift: Option<Lift>,
}

impl ArmReport {
    /// How many entries [`ArmReport::write_figures`] writes.
    pub fn figure_count(&self) -> usize {
        11 + 3 * usize::from(self.lift.is_some())
    }

    /// Writes the figures that the weights message and `/experiments` both carry of an arm:
    /// pulls (all, matured, pending), reward, mean, the fixed-time interval, the sequence,
    /// `undecided`, `best_probability`, and the lift when there is a control arm.
    pub fn write_figures<M: serde::ser::SerializeMap>(&self, m: &mut M) -> Result<(), M::Error> {
        m.serialize_entry("pulls", &self.pulls)?;
        m.serialize_entry("matured_pulls", &self.matured_pulls())?;
        m.serialize_entry("pending_pulls", &self.pending_pulls)?;
        m.serialize_entry("reward", &self.reward)?;
        m.serialize_entry("mean", &self.mean)?;
        m.serialize_entry("ci_low", &self.ci_low)?;
        m.serialize_entry("ci_high", &self.ci_high)?;
        m.serialize_entry("cs_low", &self.cs_low)?;
        m.serialize_entry("cs_high", &self.cs_high)?;
        m.serialize_entry("undecided", &self.undecided)?;
        m.serialize_entry("best_probability", &self.best_probability)?;
        if let Some(l) = &self.lift {
            m.serialize_entry("lift", &l.estimate)?;
            m.serialize_entry("lift_low", &l.low)?;
            m.serialize_entry("lift_high", &l.high)?;
        }
        Ok(())
    }

    pub fn matured_pulls(&self) -> u64 {
        self.pulls - self.pending_pulls
    }

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
    /// Σⱼ nⱼ·(μ̄* − μ̄ⱼ) in reward units: an estimate of the pseudo-regret so far, taken with
    /// the estimates of the moment (so it can move down as well as up). nⱼ counts every pull
    /// ever made and μ̄ⱼ is the arm's all-time mean (μ̄* the largest), so pulls and means are
    /// counted alike (under an attribution window, matured pulls and their rewards only): without decay μ̄ⱼ is the reported mean and μ̄* the leader's; under decay
    /// the discounted means, which follow drift, drive the policy and the leader, but pricing
    /// every pull ever made at a gap seen through recent traffic alone would mix two different
    /// counts.
    pub regret_estimate: f64,
    /// Expected shortfall per impression, in reward units, of sending everything to the
    /// leader, under the posterior (`core::decision`).
    pub expected_loss: f64,
    /// The settle rule (`core::decision::Settle`) is met.
    pub settled: bool,
}

/// What the figures are judged against beyond the statistics: the control arm's index and the
/// arms a definition took out (which need no more pulls to settle).
pub struct Judged<'a> {
    pub control: Option<usize>,
    pub removed: &'a [bool],
}

/// Mean and interval of one arm in reward units, its sums discounted to `reference_ms` (see
/// [`reference_ms`]). The reward sum is clamped to `max` per pull, so the mean stays in the
/// reward range and inside its own interval.
pub fn estimate(stats: &ArmStats, model: RewardModel, reference_ms: i64, half_life: HalfLife) -> (f64, Interval) {
    estimate_from(stats.at(reference_ms, half_life), model)
}

/// [`estimate`] from sums already discounted: (pulls, reward sum, sum of squares).
fn estimate_from((n, sum, sum_sq): (f64, f64, f64), model: RewardModel) -> (f64, Interval) {
    let s = clamp_sum(n, sum, model.max());
    let mean = if n > 0.0 { s / n } else { 0.0 };
    let ci = match model {
        RewardModel::Bernoulli => wilson(s, n),
        RewardModel::Bounded { max } => empirical_bernstein(n, s, sum_sq, max),
    };
    (mean, ci)
}

/// Builds the report of arms with `stats`, run as `spec`, at `now_ms`, every arm discounted to
/// one reference time.
pub fn report(stats: &[ArmStats], spec: &ExperimentSpec, judged: &Judged, now_ms: i64) -> Report {
    let (model, half_life) = (spec.reward, spec.half_life_ms);
    let max = model.max();
    let reference = reference_ms(stats, now_ms);
    let alpha = per_arm_alpha(1.0 - LEVEL, stats.len());
    let mut sums = Vec::with_capacity(stats.len());
    let mut arms: Vec<ArmReport> = stats
        .iter()
        .map(|s| {
            let sums_at = s.at(reference, half_life);
            let (mean, ci) = estimate_from(sums_at, model);
            let (n, sum) = (sums_at.0, clamp_sum(sums_at.0, sums_at.1, max));
            sums.push((n, sum));
            let cs = confidence_sequence(sum / max, n, alpha);
            ArmReport {
                pulls: s.pulls_total,
                pending_pulls: s.pending.pulls(),
                reward: s.reward_total,
                mean,
                ci_low: ci.low,
                ci_high: ci.high,
                cs_low: cs.low * max,
                cs_high: cs.high * max,
                undecided: false,
                last_pull_ms: s.last_pull_ms,
                excess_rewards: if model.is_binary() { s.excess_rewards() } else { 0.0 },
                best_probability: 0.0,
                lift: None,
            }
        })
        .collect();
    let mut leader: Option<usize> = None;
    for (j, a) in arms.iter().enumerate() {
        if a.matured_pulls() > 0 && leader.is_none_or(|l| a.mean > arms[l].mean) {
            leader = Some(j);
        }
    }
    let mut regret = 0.0;
    if let Some(l) = leader {
        let floor = arms[l].cs_low;
        for (j, a) in arms.iter_mut().enumerate() {
            a.undecided = j != l && a.cs_high >= floor;
        }
        let all_time: Vec<Option<f64>> = stats
            .iter()
            .map(|s| {
                let n = s.matured_pulls() as f64;
                (n > 0.0).then(|| clamp_sum(n, s.matured_reward(), max) / n)
            })
            .collect();
        let best = all_time.iter().flatten().copied().fold(f64::NEG_INFINITY, f64::max);
        for (s, m) in stats.iter().zip(&all_time) {
            if let Some(m) = m {
                regret += s.matured_pulls() as f64 * (best - m);
            }
        }
    }
    if let Some(c) = judged.control.filter(|&c| c < arms.len()) {
        let (mean, low, high) = (arms[c].mean, arms[c].cs_low, arms[c].cs_high);
        for (j, a) in arms.iter_mut().enumerate() {
            if j != c {
                a.lift = Some(Lift { estimate: a.mean - mean, low: a.cs_low - high, high: a.cs_high - low });
            }
        }
    }
    let decision = decide(&sums, max, leader);
    for (a, p) in arms.iter_mut().zip(decision.best_probability) {
        a.best_probability = p;
    }
    let removed = |j: usize| judged.removed.get(j).copied().unwrap_or(false);
    let settled = leader.is_some_and(|l| {
        let fewest = (0..arms.len()).filter(|&j| !removed(j)).map(|j| arms[j].matured_pulls()).min().unwrap_or(0);
        !removed(l) && spec.settle.is_met(arms[l].best_probability, arms[l].mean, decision.expected_loss, fewest)
    });
    Report { arms, leader, regret_estimate: regret, expected_loss: decision.expected_loss, settled }
}

/// 1 − the leader's weight: the share of traffic still spent away from the current best.
pub fn exploration_ratio(weights: &[f64], leader: Option<usize>) -> f64 {
    match leader {
        Some(l) => (1.0 - weights.get(l).copied().unwrap_or(0.0)).max(0.0),
        None => 1.0,
    }
}
