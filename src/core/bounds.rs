//! Bounds applied after the policy: pins, floor, cap and the largest step per publish.
//!
//! Pinned arms get their configured weight. The rest of the mass goes to the other arms in
//! proportion to the policy's weights, each kept within [floor, cap] and within `max_step` of its
//! previous weight: the scale s of Σ clamp(s·wⱼ, loⱼ, hiⱼ) = remaining mass is found by bisection.
//! Where the bounds cannot all hold at once at run time (an arm came or went, so the previous
//! weights no longer fit), the step limit gives way first, then the cap; the floor never does,
//! because configurations where it cannot hold are rejected up front and extra arms are
//! refused (see [`Bounds::max_free_arms`]).

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Bounds {
    /// Minimum weight of every arm that is not pinned.
    #[serde(default)]
    pub floor: f64,
    /// Maximum weight of an arm that is not pinned.
    #[serde(default)]
    pub cap: Option<f64>,
    /// Largest change of one arm's weight from one publish to the next.
    #[serde(default)]
    pub max_step: Option<f64>,
    /// Arms with a fixed weight, whatever the policy says.
    #[serde(default)]
    pub pinned: BTreeMap<String, f64>,
}

/// Largest number of arms this many arms of floor can hold: K·floor ≤ 1 (with a tolerance for
/// decimal floors such as 0.1 × 10).
const FLOOR_SLACK: f64 = 1e-9;

impl Bounds {
    /// Checks the bounds against the declared arms (none for experiments created on first
    /// sight). The message names the key, the value and what would be valid.
    pub fn validate(&self, arms: &[String]) -> Result<(), String> {
        let unit = |key: &str, v: f64| {
            if v.is_finite() && (0.0..=1.0).contains(&v) {
                Ok(())
            } else {
                Err(format!("{key} = {v}; it must be a number in [0, 1]"))
            }
        };
        unit("floor", self.floor)?;
        if let Some(cap) = self.cap {
            unit("cap", cap)?;
            if cap < self.floor {
                return Err(format!("cap = {cap} is below floor = {}; the cap must be ≥ the floor", self.floor));
            }
            if cap == 0.0 {
                return Err("cap = 0 would give every arm no traffic; it must be > 0".into());
            }
        }
        if let Some(step) = self.max_step {
            if !(step.is_finite() && step > 0.0 && step <= 1.0) {
                return Err(format!("max_step = {step}; it must be a number in (0, 1]"));
            }
        }
        for (arm, &w) in &self.pinned {
            unit(&format!("pinned.{arm}"), w)?;
            if !arms.is_empty() && !arms.contains(arm) {
                return Err(format!("pinned.{arm}: no arm {arm:?} is declared; declared arms: {}", arms.join(", ")));
            }
        }
        let pinned: f64 = self.pinned.values().sum::<f64>() + 0.0;
        if pinned > 1.0 + FLOOR_SLACK {
            return Err(format!("pinned weights add up to {pinned}; they must add up to at most 1"));
        }
        let free = arms.iter().filter(|a| !self.pinned.contains_key(*a)).count() as f64;
        if pinned + free * self.floor > 1.0 + FLOOR_SLACK {
            return Err(format!(
                "floor = {} cannot hold for {free} unpinned arms with {pinned} pinned (K·floor + pinned > 1); lower the floor to at most {}",
                self.floor,
                ((1.0 - pinned) / free.max(1.0) * 1e6).floor() / 1e6
            ));
        }
        if !arms.is_empty() && free == 0.0 && (pinned - 1.0).abs() > FLOOR_SLACK {
            return Err(format!("every arm is pinned, so the pinned weights must add up to 1; they add up to {pinned}"));
        }
        if let Some(cap) = self.cap {
            if free > 0.0 && pinned + free * cap < 1.0 - FLOOR_SLACK {
                return Err(format!(
                    "cap = {cap} cannot hold for {free} unpinned arms with {pinned} pinned (K·cap + pinned < 1); raise the cap to at least {}",
                    ((1.0 - pinned) / free * 1e6).ceil() / 1e6
                ));
            }
        }
        if arms.is_empty() && !self.pinned.is_empty() {
            return Err("pinned arms need declared arms; experiments created on first sight cannot pin".into());
        }
        Ok(())
    }

    /// The most unpinned arms the floor can hold; an arm beyond it is refused.
    pub fn max_free_arms(&self) -> usize {
        if self.floor <= 0.0 {
            return usize::MAX;
        }
        let pinned: f64 = self.pinned.values().sum::<f64>() + 0.0;
        (((1.0 - pinned) / self.floor) + FLOOR_SLACK).floor().max(0.0) as usize
    }

    /// Final weights from the policy's `weights` (one per arm in `names`), given the weights of
    /// the previous publish (`previous[j]` is NaN for an arm that had none). Writes `out`.
    pub fn apply(&self, names: &[&str], weights: &[f64], previous: Option<&[f64]>, out: &mut [f64]) {
        let k = names.len();
        if k == 0 {
            return;
        }
        let mut free = Vec::with_capacity(k);
        let mut remaining = 1.0;
        for (j, name) in names.iter().enumerate() {
            match self.pinned.get(*name) {
                Some(&w) => {
                    out[j] = w;
                    remaining -= w;
                }
                None => free.push(j),
            }
        }
        remaining = remaining.max(0.0);
        if free.is_empty() {
            // Only pinned arms: their weights must carry the whole mass.
            let total: f64 = out.iter().sum();
            out.iter_mut().for_each(|w| *w = if total > 0.0 { *w / total } else { 1.0 / k as f64 });
            return;
        }
        let n = free.len() as f64;
        let floor = self.floor.min(remaining / n);
        let cap = self.cap.unwrap_or(1.0).max(remaining / n).min(remaining);
        let mut lo: Vec<f64> = vec![floor; free.len()];
        let mut hi: Vec<f64> = vec![cap; free.len()];
        if let (Some(step), Some(prev)) = (self.max_step, previous) {
            let mut stepped_lo = lo.clone();
            let mut stepped_hi = hi.clone();
            for (i, &j) in free.iter().enumerate() {
                let p = prev.get(j).copied().unwrap_or(f64::NAN);
                if p.is_finite() {
                    stepped_lo[i] = lo[i].max(p - step);
                    stepped_hi[i] = hi[i].min(p + step);
                }
            }
            let feasible = stepped_lo.iter().zip(&stepped_hi).all(|(l, h)| l <= h)
                && stepped_lo.iter().sum::<f64>() <= remaining + 1e-12
                && stepped_hi.iter().sum::<f64>() >= remaining - 1e-12;
            if feasible {
                lo = stepped_lo;
                hi = stepped_hi;
            }
        }
        // A tiny uniform part keeps every arm reachable by the scale (a weight of 0 would stay
        // at its lower bound whatever the scale).
        let w: Vec<f64> = free.iter().map(|&j| weights[j].max(0.0) + 1e-12).collect();
        let fill = |s: f64| -> f64 { (0..w.len()).map(|i| (s * w[i]).clamp(lo[i], hi[i])).sum() };
        let mut s_lo = 0.0;
        let mut s_hi = (0..w.len()).map(|i| hi[i] / w[i]).fold(0.0, f64::max);
        for _ in 0..200 {
            let mid = 0.5 * (s_lo + s_hi);
            if mid <= s_lo || mid >= s_hi {
                break;
            }
            if fill(mid) < remaining {
                s_lo = mid;
            } else {
                s_hi = mid;
            }
        }
        let mut total = 0.0;
        for (i, &j) in free.iter().enumerate() {
            out[j] = (s_hi * w[i]).clamp(lo[i], hi[i]);
            total += out[j];
        }
        // Bisection leaves a residue of rounding size; the arms strictly inside their bounds
        // absorb it so that the weights sum to 1.
        let residue = remaining - total;
        let inside: Vec<usize> =
            (0..free.len()).filter(|&i| out[free[i]] > lo[i] && out[free[i]] < hi[i]).collect();
        if !inside.is_empty() {
            let mass: f64 = inside.iter().map(|&i| out[free[i]]).sum();
            for &i in &inside {
                let j = free[i];
                out[j] += residue * if mass > 0.0 { out[j] / mass } else { 1.0 / inside.len() as f64 };
            }
        }
    }
}
