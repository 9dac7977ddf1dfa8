//! What UCB1 and KL-UCB share: an index per arm, and batch shares from playing it forward.
//!
//! The sidecar publishes weights for a batch of B impressions, not single decisions. Batch
//! shares play the index policy forward B times with every arm's mean held at its estimate and
//! its count raised by each virtual pull; the weights are the shares of the B virtual pulls.
//!
//! Computed without the B steps: with the mean held, an arm's index falls with every virtual
//! pull, so the B steps take the B largest values among all arms' decreasing index sequences.
//! A bisection finds the level λ* of the B-th largest value from the closed-form count of each
//! arm's values above a level, and the last few pulls at the level go out one by one. Exact
//! ties at the level are split evenly: r pulls left for m tied values give each r/m, the
//! expectation of the sequential rule's uniformly random tie-break. The exploration term uses t at the middle of the batch, N + (B − 1)/2, which for a
//! batch of one is exactly the sequential rule.

use rand::RngCore;

use super::{argmax_random_tie, ArmInput};

/// An index policy: index(mean, pulls) and its inverse in the pulls.
pub trait IndexRule {
    /// The exploration budget at `t` plays (2 ln t for UCB1, ln t + c ln ln t for KL-UCB).
    fn budget(&self, t: f64) -> f64;
    /// The index of an arm with `mean` (on [0, 1]) after `pulls` > 0 pulls.
    fn index(&self, mean: f64, pulls: f64, budget: f64) -> f64;
    /// The pull count at which the index equals `level`; the index is above `level` for every
    /// count below it. Infinite when the index never falls to `level`.
    fn pulls_at(&self, mean: f64, level: f64, budget: f64) -> f64;
}

/// The sequential decision: an arm never pulled first, else the largest index, ties at random.
pub fn choose<R: IndexRule>(rule: &R, arms: &[ArmInput], rng: &mut dyn RngCore) -> usize {
    let t: f64 = arms.iter().map(|a| a.pulls).sum();
    let budget = rule.budget(t);
    argmax_random_tie(
        arms.iter().map(|a| if a.pulls > 0.0 { rule.index(a.mean(), a.pulls, budget) } else { f64::INFINITY }),
        rng,
    )
}

/// Batch shares of an index policy for `batch` impressions, written into `out`.
pub fn batch_shares<R: IndexRule>(rule: &R, arms: &[ArmInput], batch: u64, out: &mut [f64]) {
    let k = arms.len();
    out.iter_mut().for_each(|w| *w = 0.0);
    if k == 0 {
        return;
    }
    let b = batch.max(1) as f64;
    let t = arms.iter().map(|a| a.pulls).sum::<f64>() + (b - 1.0) / 2.0;
    let budget = rule.budget(t);

    // Arms never pulled have an infinite first index: they take the first virtual pulls.
    let unpulled = arms.iter().filter(|a| a.pulls <= 0.0).count() as f64;
    let mut remaining = b;
    if unpulled > 0.0 {
        let each = if remaining <= unpulled { remaining / unpulled } else { 1.0 };
        for (w, a) in out.iter_mut().zip(arms) {
            if a.pulls <= 0.0 {
                *w = each;
            }
        }
        remaining -= each * unpulled;
    }
    if remaining > 0.0 {
        let means: Vec<f64> = arms.iter().map(ArmInput::mean).collect();
        let base: Vec<f64> = arms.iter().zip(out.iter()).map(|(a, w)| a.pulls + w).collect();
        let extra = play_forward(rule, &means, &base, remaining, budget);
        for (w, e) in out.iter_mut().zip(extra) {
            *w += e;
        }
    }
    for w in out.iter_mut() {
        *w /= b;
    }
}

/// Virtual pulls per arm for `remaining` steps, every arm already having pulls > 0.
fn play_forward<R: IndexRule>(rule: &R, means: &[f64], base: &[f64], remaining: f64, budget: f64) -> Vec<f64> {
    let k = means.len();
    let cap = remaining.ceil();
    let count_above = |level: f64, out: &mut [f64]| -> f64 {
        let mut total = 0.0;
        for j in 0..k {
            let c = values_above(rule, means[j], base[j], level, budget, cap);
            out[j] = c.min(remaining);
            total += out[j];
        }
        total
    };
    let mut counts = vec![0.0; k];
    // Every value lies at or below the largest current index; the B-th largest value is at
    // least the largest mean (that arm's index never falls below it).
    let mut hi = (0..k).map(|j| rule.index(means[j], base[j], budget)).fold(f64::NEG_INFINITY, f64::max);
    let mut lo = means.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    if hi > lo {
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            if mid <= lo || mid >= hi {
                break;
            }
            if count_above(mid, &mut counts) >= remaining {
                lo = mid;
            } else {
                hi = mid;
            }
        }
    }
    let above = count_above(hi, &mut counts);
    if above > remaining {
        // Unreachable while the index falls with the pulls (count_above(hi) < remaining is the
        // bisection's invariant); keep the shares honest regardless.
        counts.iter_mut().for_each(|c| *c *= remaining / above);
        return counts;
    }
    let mut left = remaining - above;
    // The values at the level itself, largest first, ties split evenly. Each round hands out
    // at least one whole pull, so this ends within `left` rounds.
    let mut next: Vec<f64> = (0..k).map(|j| rule.index(means[j], base[j] + counts[j], budget)).collect();
    while left > 0.0 {
        let top = next.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let tied: Vec<usize> = (0..k).filter(|&j| next[j] == top).collect();
        let n = tied.len() as f64;
        let each = if n <= left { 1.0 } else { left / n };
        for &j in &tied {
            counts[j] += each;
            next[j] = rule.index(means[j], base[j] + counts[j], budget);
        }
        left -= each * n;
    }
    counts
}

/// How many of an arm's next values, index(mean, base + m) for m = 0, 1, …, lie strictly above
/// `level`, at most `cap`. The inverse `pulls_at` places the count; where it lands on a whole
/// count, its rounding decides whether the value at the level counts, so the index itself is
/// asked. An exact tie at the level must be left to the tie split, not counted above it (or
/// dropped) for one arm and not for an equal one.
fn values_above<R: IndexRule>(rule: &R, mean: f64, base: f64, level: f64, budget: f64, cap: f64) -> f64 {
    let estimate = rule.pulls_at(mean, level, budget) - base;
    let mut c = estimate.ceil().clamp(0.0, cap);
    if (estimate - estimate.round()).abs() <= 1e-6 * estimate.abs().max(1.0) {
        while c > 0.0 && rule.index(mean, base + c - 1.0, budget) <= level {
            c -= 1.0;
        }
        while c < cap && rule.index(mean, base + c, budget) > level {
            c += 1.0;
        }
    }
    c
}
