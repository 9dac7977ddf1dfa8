//! UCB1 (Auer, Cesa-Bianchi & Fischer 2002, "Finite-time analysis of the multiarmed bandit
//! problem", Machine Learning 47): index x̄ⱼ + √(2 ln t / nⱼ) on rewards scaled to [0, 1].

use rand::RngCore;

use super::{index, ArmInput, IndexRule, Policy, PolicyName};

#[derive(Clone, Copy, Debug)]
pub struct Ucb1;

impl IndexRule for Ucb1 {
    fn budget(&self, t: f64) -> f64 {
        2.0 * t.max(1.0).ln()
    }

    fn index(&self, mean: f64, pulls: f64, budget: f64) -> f64 {
        mean + (budget / pulls).sqrt()
    }

    fn pulls_at(&self, mean: f64, level: f64, budget: f64) -> f64 {
        if level < mean || (level == mean && budget > 0.0) {
            f64::INFINITY
        } else if budget <= 0.0 {
            0.0
        } else {
            budget / ((level - mean) * (level - mean))
        }
    }
}

impl Policy for Ucb1 {
    fn name(&self) -> PolicyName {
        PolicyName::Ucb1
    }

    fn weights(&self, arms: &[ArmInput], batch: u64, out: &mut [f64]) {
        index::batch_shares(self, arms, batch, out);
    }

    fn choose(&self, arms: &[ArmInput], rng: &mut dyn RngCore) -> usize {
        index::choose(self, arms, rng)
    }
}
