//! A configured static split, for holdouts and plain A/B tests. Arms without a configured share
//! get 0 (then the floor, if any); shares are normalised over the arms present.

use std::collections::BTreeMap;

use rand::{Rng, RngCore};

use super::{ArmInput, Policy, PolicyName};

#[derive(Clone, Debug)]
pub struct Fixed {
    pub shares: BTreeMap<String, f64>,
}

impl Policy for Fixed {
    fn name(&self) -> PolicyName {
        PolicyName::Fixed
    }

    fn weights(&self, arms: &[ArmInput], _batch: u64, out: &mut [f64]) {
        for (w, a) in out.iter_mut().zip(arms) {
            *w = self.shares.get(a.name).copied().unwrap_or(0.0);
        }
        let total: f64 = out.iter().sum();
        let k = out.len() as f64;
        for w in out.iter_mut() {
            *w = if total > 0.0 { *w / total } else { 1.0 / k };
        }
    }

    fn choose(&self, arms: &[ArmInput], rng: &mut dyn RngCore) -> usize {
        let mut w = vec![0.0; arms.len()];
        self.weights(arms, 1, &mut w);
        crate::core::draw::weighted(w, rng.gen()).unwrap_or(arms.len().saturating_sub(1))
    }
}
