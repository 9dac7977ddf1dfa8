//! KL-UCB (Garivier & Cappé 2011): the largest q with nⱼ·kl(x̄ⱼ, q) ≤ ln t + c·ln ln t.
//! The paper's analysis uses c = 3; c = 0 is what it recommends in practice (the default).

use rand::RngCore;

use super::{index, ArmInput, IndexRule, Policy, PolicyName};
use crate::core::kl::{kl_ucb_budget, kl_ucb_index, kl_ucb_pulls_at};

#[derive(Clone, Copy, Debug)]
pub struct KlUcb {
    pub c: f64,
}

impl IndexRule for KlUcb {
    fn budget(&self, t: f64) -> f64 {
        kl_ucb_budget(t, self.c)
    }

    fn index(&self, mean: f64, pulls: f64, budget: f64) -> f64 {
        kl_ucb_index(mean, pulls, budget)
    }

    fn pulls_at(&self, mean: f64, level: f64, budget: f64) -> f64 {
        kl_ucb_pulls_at(mean, level, budget)
    }
}

impl Policy for KlUcb {
    fn name(&self) -> PolicyName {
        PolicyName::KlUcb
    }

    fn weights(&self, arms: &[ArmInput], batch: u64, out: &mut [f64]) {
        index::batch_shares(self, arms, batch, out);
    }

    fn choose(&self, arms: &[ArmInput], rng: &mut dyn RngCore) -> usize {
        index::choose(self, arms, rng)
    }
}
