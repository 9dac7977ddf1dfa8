//! Decaying ε-greedy, the εₙ-greedy of Auer, Cesa-Bianchi & Fischer (2002): at play n,
//! εₙ = min(1, c·K / (d²·n)); with probability εₙ a uniformly random arm, otherwise the arm with
//! the highest mean. Theorem 3 there gives logarithmic regret for c > 5 and 0 < d ≤ min Δⱼ.

use rand::{Rng, RngCore};

use super::{leaders, ArmInput, Policy, PolicyName};

#[derive(Clone, Copy, Debug)]
pub struct EpsilonGreedy {
    pub c: f64,
    pub d: f64,
}

impl EpsilonGreedy {
    /// εₙ at play `n` (1-based) with `k` arms.
    pub fn epsilon(&self, n: f64, k: usize) -> f64 {
        (self.c * k as f64 / (self.d * self.d * n.max(1.0))).min(1.0)
    }

    /// The mean of εₙ over plays n = N+1 … N+B: the exact exploration share of a batch.
    fn mean_epsilon(&self, done: f64, batch: f64, k: usize) -> f64 {
        let a = self.c * k as f64 / (self.d * self.d);
        let first = done.floor() + 1.0;
        let last = first + batch - 1.0;
        if last <= a {
            return 1.0;
        }
        // Plays up to ⌊a⌋ explore fully; after that εₙ = a/n, summed with harmonic numbers.
        let full_until = a.floor().max(first - 1.0);
        let full = (full_until - first + 1.0).max(0.0);
        (full + a * (harmonic(last) - harmonic(full_until))) / batch
    }
}

/// H(n) = 1 + 1/2 + … + 1/n for whole n ≥ 0; summed directly for small n, otherwise the
/// asymptotic expansion ln n + γ + 1/(2n) − 1/(12n²) + 1/(120n⁴) (error below 1e-11 for n ≥ 32;
/// standard expansion, from memory).
fn harmonic(n: f64) -> f64 {
    const EULER_GAMMA: f64 = 0.577_215_664_901_532_9;
    if n < 32.0 {
        return (1..=n as u64).map(|i| 1.0 / i as f64).sum();
    }
    let n2 = n * n;
    n.ln() + EULER_GAMMA + 1.0 / (2.0 * n) - 1.0 / (12.0 * n2) + 1.0 / (120.0 * n2 * n2)
}

impl Policy for EpsilonGreedy {
    fn name(&self) -> PolicyName {
        PolicyName::EpsilonGreedy
    }

    fn weights(&self, arms: &[ArmInput], batch: u64, out: &mut [f64]) {
        let k = arms.len();
        if k == 0 {
            return;
        }
        let done: f64 = arms.iter().map(|a| a.pulls).sum();
        let eps = self.mean_epsilon(done, batch.max(1) as f64, k);
        let lead = leaders(arms);
        out.iter_mut().for_each(|w| *w = eps / k as f64);
        for &j in &lead {
            out[j] += (1.0 - eps) / lead.len() as f64;
        }
    }

    fn choose(&self, arms: &[ArmInput], rng: &mut dyn RngCore) -> usize {
        let done: f64 = arms.iter().map(|a| a.pulls).sum();
        if rng.gen::<f64>() < self.epsilon(done.floor() + 1.0, arms.len()) {
            rng.gen_range(0..arms.len())
        } else {
            let lead = leaders(arms);
            lead[rng.gen_range(0..lead.len())]
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_never_pulled_arm_gets_only_its_exploration_share_beside_a_pulled_arm() {
        let p = EpsilonGreedy { c: 6.0, d: 0.05 };
        let arms = [
            ArmInput { name: "old", pulls: 1e6, successes: 0.0 },
            ArmInput { name: "new", pulls: 0.0, successes: 0.0 },
        ];
        let mut w = [0.0; 2];
        p.weights(&arms, 1, &mut w);
        // εₜ = min(1, cK/(d²t)) at play t = 10⁶ + 1 (Auer, Cesa-Bianchi & Fischer 2002, εₙ-greedy);
        // the new arm gets εₜ/K, the pulled arm the rest. The tolerance covers the difference of two
        // harmonic-number expansions in mean_epsilon (≈ 1e-12 here).
        let eps = 6.0 * 2.0 / (0.05f64 * 0.05 * 1_000_001.0);
        assert!((w[1] - eps / 2.0).abs() < 1e-10, "{w:?}");
        assert!((w[0] - (1.0 - eps / 2.0)).abs() < 1e-10, "{w:?}");
        let mut rng = rand::rngs::mock::StepRng::new(u64::MAX / 2, 0);
        assert_eq!(p.choose(&arms, &mut rng), 0, "exploitation goes to the pulled arm");
    }

    #[test]
    fn before_any_pull_every_arm_leads() {
        let p = EpsilonGreedy { c: 6.0, d: 0.05 };
        let arms = [ArmInput { name: "a", pulls: 0.0, successes: 0.0 }, ArmInput { name: "b", pulls: 0.0, successes: 0.0 }];
        let mut w = [0.0; 2];
        p.weights(&arms, 1, &mut w);
        assert_eq!(w, [0.5, 0.5]);
    }

    #[test]
    fn harmonic_expansion_meets_the_direct_sum() {
        let direct: f64 = (1..=40u64).map(|i| 1.0 / i as f64).sum();
        assert!((harmonic(40.0) - direct).abs() < 1e-12);
    }

    #[test]
    fn mean_epsilon_is_the_average_of_the_per_play_values() {
        let p = EpsilonGreedy { c: 6.0, d: 0.5 };
        for (done, batch) in [(0.0, 1.0), (10.0, 500.0), (100.0, 7.0), (1000.0, 3000.0), (50.0, 100.0)] {
            let direct: f64 = (1..=batch as u64).map(|i| p.epsilon(done + i as f64, 3)).sum::<f64>() / batch;
            let fast = p.mean_epsilon(done, batch, 3);
            assert!((direct - fast).abs() < 1e-10, "done {done} batch {batch}: {direct} vs {fast}");
        }
    }
}
