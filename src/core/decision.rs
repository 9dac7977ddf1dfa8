//! Decision figures, for every policy: the posterior probability that each arm is the best,
//! and the expected loss of sending every impression to the leader.
//!
//! The posterior of an arm is Beta(1 + S, 1 + n − S), with n its matured (and, under decay,
//! discounted) pulls and S its reward sum scaled to [0, 1] and clamped to n: the 0/1 posterior
//! of Thompson sampling with a uniform prior, and for bounded rewards the same fractional
//! counts that `policy::thompson` documents. Whatever policy allocates, these are the figures
//! an analyst reads; they are Thompson's own weights (before bounds) for a Thompson experiment
//! with the default prior.
//!
//! Expected loss is the "value remaining" of Scott (2015), "Multi-armed bandit experiments in
//! the online service economy", Applied Stochastic Models in Business and Industry 31: the
//! posterior expectation of max θⱼ − θ_leader, per impression, in reward units. Both come from
//! one deterministic quadrature (`beta::prob_best_and_max`), checked against scipy in
//! `tests/core_reference.rs`.
//!
//! [`Settle`] is the rule that reads these figures as "done": the leader is very probably the
//! best and choosing it now costs little, with enough data on every arm.

use serde::{Deserialize, Serialize};

use super::beta::{posterior, prob_best_and_max};

/// When an experiment counts as settled (README, "Is it done?"): the leader's
/// `best_probability` is at least `best_probability`, the expected loss of choosing it is at
/// most `relative_loss` times its mean, and every arm still in the experiment has at least
/// `min_pulls` matured pulls. With `auto_conclude` a settled, learning experiment concludes
/// itself on the leader through a control record.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct Settle {
    pub best_probability: f64,
    pub relative_loss: f64,
    pub min_pulls: u64,
    pub auto_conclude: bool,
}

impl Default for Settle {
    fn default() -> Self {
        Settle { best_probability: 0.95, relative_loss: 0.01, min_pulls: 1000, auto_conclude: false }
    }
}

impl Settle {
    pub fn validate(&self) -> Result<(), String> {
        if !(self.best_probability > 0.5 && self.best_probability < 1.0) {
            return Err(format!("settle.best_probability = {}; it must be above 0.5 and below 1", self.best_probability));
        }
        if !(self.relative_loss.is_finite() && self.relative_loss > 0.0 && self.relative_loss < 1.0) {
            return Err(format!("settle.relative_loss = {}; it must be above 0 and below 1", self.relative_loss));
        }
        Ok(())
    }

    /// Whether figures with the leader's `best_probability` and `mean`, an `expected_loss`, and
    /// `fewest_pulls` matured pulls on the least-pulled active arm, meet the rule.
    pub fn is_met(&self, best_probability: f64, mean: f64, expected_loss: f64, fewest_pulls: u64) -> bool {
        fewest_pulls >= self.min_pulls && best_probability >= self.best_probability && expected_loss <= self.relative_loss * mean
    }
}

/// The decision figures of one experiment.
#[derive(Clone, Debug, PartialEq)]
pub struct Decision {
    /// Per arm, summing to 1.
    pub best_probability: Vec<f64>,
    /// E[max θⱼ − θ_leader] under the posterior, in reward units per impression (≥ 0).
    pub expected_loss: f64,
}

/// The figures for arms with (pulls, reward sum) `sums`, rewards in [0, `max`], with `leader`
/// the arm whose loss is priced (the highest estimated mean); with no leader, the loss of the
/// arm with the highest posterior mean.
pub fn decide(sums: &[(f64, f64)], max: f64, leader: Option<usize>) -> Decision {
    let (alpha, beta): (Vec<f64>, Vec<f64>) = sums.iter().map(|&(n, s)| posterior((1.0, 1.0), n, s / max)).unzip();
    let mut best_probability = vec![0.0; sums.len()];
    let best_mean = prob_best_and_max(&alpha, &beta, &mut best_probability);
    let mean = |j: usize| alpha[j] / (alpha[j] + beta[j]);
    let priced = leader.or_else(|| (0..sums.len()).max_by(|&a, &b| mean(a).total_cmp(&mean(b))));
    let expected_loss = priced.map_or(0.0, |l| (max * (best_mean - mean(l))).max(0.0));
    Decision { best_probability, expected_loss }
}
