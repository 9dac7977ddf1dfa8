//! How rewards are read: 0/1 outcomes, or bounded amounts scaled to [0, 1] for the index policies.

use serde::{Deserialize, Serialize};

/// Largest maximum of a bounded reward: sums of squared rewards stay finite (1e100² = 1e200,
/// far below f64::MAX ≈ 1.8e308, for any number of events), and a snapshot, which is JSON
/// and has no infinity, always reads back.
pub const MAX_REWARD: f64 = 1e100;

/// The reward model of an experiment.
///
/// Index policies (UCB1, KL-UCB) and the Beta posterior of Thompson sampling need rewards in
/// [0, 1]; a bounded model divides every reward by its maximum before a policy sees it, so one
/// set of formulas serves both models.
#[derive(Clone, Copy, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case", deny_unknown_fields)]
pub enum RewardModel {
    /// Each reward is a success (1) or a failure (0), e.g. a click after an impression.
    #[default]
    Bernoulli,
    /// Rewards are amounts in `[0, max]`, e.g. watch seconds capped at a known maximum.
    Bounded { max: f64 },
}

impl RewardModel {
    /// The largest reward one event may carry, in reward units.
    pub fn max(&self) -> f64 {
        match self {
            RewardModel::Bernoulli => 1.0,
            RewardModel::Bounded { max } => *max,
        }
    }

    /// Whether `reward` may be applied under this model. A 0/1 model takes exactly 0 or 1, so that
    /// the success count stays an honest count; a bounded model takes any finite value in
    /// `[0, max]`.
    pub fn accepts(&self, reward: f64) -> bool {
        match self {
            RewardModel::Bernoulli => reward == 0.0 || reward == 1.0,
            RewardModel::Bounded { max } => reward.is_finite() && (0.0..=*max).contains(&reward),
        }
    }

    /// Whether the model is 0/1 (Wilson interval, success counts clamped to pulls).
    pub fn is_binary(&self) -> bool {
        matches!(self, RewardModel::Bernoulli)
    }

    /// Checks the model's own parameters; the message names what would be valid.
    pub fn validate(&self) -> Result<(), String> {
        match self {
            RewardModel::Bernoulli => Ok(()),
            RewardModel::Bounded { max } if *max > 0.0 && *max <= MAX_REWARD => Ok(()),
            RewardModel::Bounded { max } => {
                Err(format!("bounded reward max is {max}; it must be a number in (0, {MAX_REWARD:e}]"))
            }
        }
    }
}
