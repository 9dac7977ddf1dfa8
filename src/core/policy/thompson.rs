//! Thompson sampling (Thompson 1933; Agrawal & Goyal 2012, "Analysis of Thompson sampling for
//! the multi-armed bandit problem", COLT) with a Beta(α₀ + S, β₀ + F) posterior per arm.
//!
//! For bounded rewards the posterior uses fractional counts: S is the sum of rewards scaled to
//! [0, 1] and F = n − S. This keeps event application deterministic (Agrawal & Goyal instead
//! draw a 0/1 outcome per reward), and equals the 0/1 posterior when rewards are 0 or 1.
//!
//! The weight of an arm is the probability that it is the best under the posterior, the share
//! of impressions Thompson sampling would give it; `choose` draws from the posteriors.

use rand::RngCore;
use rand_distr::{Beta, Distribution};

use super::{ArmInput, Policy, PolicyName};
use crate::core::beta::{posterior, prob_best};

#[derive(Clone, Copy, Debug)]
pub struct Thompson {
    pub prior_alpha: f64,
    pub prior_beta: f64,
}

impl Thompson {
    fn posterior(&self, arm: &ArmInput) -> (f64, f64) {
        posterior((self.prior_alpha, self.prior_beta), arm.pulls, arm.successes)
    }
}

impl Policy for Thompson {
    fn name(&self) -> PolicyName {
        PolicyName::Thompson
    }

    fn weights(&self, arms: &[ArmInput], _batch: u64, out: &mut [f64]) {
        let (alpha, beta): (Vec<f64>, Vec<f64>) = arms.iter().map(|a| self.posterior(a)).unzip();
        prob_best(&alpha, &beta, out);
    }

    fn choose(&self, arms: &[ArmInput], rng: &mut dyn RngCore) -> usize {
        let mut best = (f64::NEG_INFINITY, 0);
        for (i, arm) in arms.iter().enumerate() {
            let (a, b) = self.posterior(arm);
            // Parameters are ≥ 1 (prior ≥ 1, counts ≥ 0), which Beta::new accepts.
            let draw = Beta::new(a, b).map(|d| d.sample(rng)).unwrap_or(a / (a + b));
            if draw > best.0 {
                best = (draw, i);
            }
        }
        best.1
    }
}
