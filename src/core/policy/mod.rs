//! Bandit policies: each turns the arms' statistics into traffic shares for the next batch of
//! impressions, and into a single decision (what one impression would get).

mod epsilon_greedy;
mod fixed;
mod index;
mod kl_ucb;
mod thompson;
mod ucb1;

use std::collections::BTreeMap;
use std::fmt;
use std::str::FromStr;

use rand::RngCore;
use serde::{Deserialize, Serialize};

pub use epsilon_greedy::EpsilonGreedy;
pub use fixed::Fixed;
pub use index::{batch_shares, IndexRule};
pub use kl_ucb::KlUcb;
pub use thompson::Thompson;
pub use ucb1::Ucb1;

/// What a policy sees of one arm: effective pulls and successes on the [0, 1] scale (rewards
/// divided by the model's maximum; under a 0/1 model clamped to the pulls).
#[derive(Clone, Copy, Debug)]
pub struct ArmInput<'a> {
    pub name: &'a str,
    pub pulls: f64,
    pub successes: f64,
}

impl ArmInput<'_> {
    /// Estimated mean on the [0, 1] scale; 0 for an arm never pulled.
    pub fn mean(&self) -> f64 {
        if self.pulls > 0.0 {
            self.successes / self.pulls
        } else {
            0.0
        }
    }
}

/// A bandit policy.
///
/// `weights` must be deterministic: the same inputs give the same shares, so that a replayed
/// stream republishes the same weights. Randomness is confined to `choose`, which the simulator
/// uses for one-impression batches.
pub trait Policy: Send + Sync + fmt::Debug {
    /// Which policy this is (its name in configuration and in the weights message is
    /// [`PolicyName::as_str`]).
    fn name(&self) -> PolicyName;

    /// Shares of the next `batch` impressions (≥ 1) per arm, written into `out` (same length as
    /// `arms`), non-negative and summing to 1.
    fn weights(&self, arms: &[ArmInput], batch: u64, out: &mut [f64]);

    /// The arm one impression goes to. Distributed as `weights` with a batch of 1.
    fn choose(&self, arms: &[ArmInput], rng: &mut dyn RngCore) -> usize;
}

/// The policies that can be configured. Read through [`FromStr`], so that an unknown name in a
/// file gets the same message, listing the valid names, as one on the command line.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case", try_from = "String")]
pub enum PolicyName {
    Ucb1,
    EpsilonGreedy,
    Thompson,
    KlUcb,
    Fixed,
}

impl PolicyName {
    pub const ALL: [PolicyName; 5] =
        [PolicyName::Ucb1, PolicyName::EpsilonGreedy, PolicyName::Thompson, PolicyName::KlUcb, PolicyName::Fixed];

    pub fn as_str(self) -> &'static str {
        match self {
            PolicyName::Ucb1 => "ucb1",
            PolicyName::EpsilonGreedy => "epsilon-greedy",
            PolicyName::Thompson => "thompson",
            PolicyName::KlUcb => "kl-ucb",
            PolicyName::Fixed => "fixed",
        }
    }
}

impl fmt::Display for PolicyName {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

impl PolicyName {
    /// Every name, comma-separated, for messages.
    pub fn valid_names() -> String {
        PolicyName::ALL.map(PolicyName::as_str).join(", ")
    }
}

impl FromStr for PolicyName {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        PolicyName::ALL
            .into_iter()
            .find(|p| p.as_str() == s)
            .ok_or_else(|| format!("unknown policy {s:?}; valid: {}", PolicyName::valid_names()))
    }
}

impl TryFrom<String> for PolicyName {
    type Error = String;
    fn try_from(s: String) -> Result<Self, String> {
        s.parse()
    }
}

/// A policy with its parameters, as written in configuration (a flat table, so that every key
/// can also come from an environment variable) or on the `simulate` command line
/// (`name:key=value:key=value`, e.g. `epsilon-greedy:c=6:d=0.01`).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PolicySpec {
    pub name: PolicyName,
    /// ε-greedy: exploration constant c (> 5 for the logarithmic-regret theorem). KL-UCB: the
    /// c of ln t + c·ln ln t (default 0).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub c: Option<f64>,
    /// ε-greedy: d, a lower bound on the gap between the best and any other arm's mean.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub d: Option<f64>,
    /// Thompson sampling: Beta prior α₀ and β₀ (≥ 1; default 1 and 1, the uniform prior).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub prior_alpha: Option<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub prior_beta: Option<f64>,
    /// Fixed split: arm → share (normalised over the arms present).
    #[serde(default, skip_serializing_if = "BTreeMap::is_empty")]
    pub weights: BTreeMap<String, f64>,
}

/// Defaults of the ε-greedy parameters. c = 6 satisfies the theorem's c > 5; d = 0.05 suits
/// gaps of a few percentage points and must be lowered for smaller gaps (see README).
pub const EPSILON_C: f64 = 6.0;
pub const EPSILON_D: f64 = 0.05;

impl PolicySpec {
    pub fn new(name: PolicyName) -> Self {
        PolicySpec { name, c: None, d: None, prior_alpha: None, prior_beta: None, weights: BTreeMap::new() }
    }

    /// Builds the policy, checking every parameter; the message names the parameter, the value
    /// and what would be valid.
    pub fn build(&self) -> Result<Box<dyn Policy>, String> {
        let allowed: &[&str] = match self.name {
            PolicyName::Ucb1 => &[],
            PolicyName::EpsilonGreedy => &["c", "d"],
            PolicyName::Thompson => &["prior_alpha", "prior_beta"],
            PolicyName::KlUcb => &["c"],
            PolicyName::Fixed => &["weights"],
        };
        for (key, set) in [
            ("c", self.c.is_some()),
            ("d", self.d.is_some()),
            ("prior_alpha", self.prior_alpha.is_some()),
            ("prior_beta", self.prior_beta.is_some()),
            ("weights", !self.weights.is_empty()),
        ] {
            if set && !allowed.contains(&key) {
                let valid = if allowed.is_empty() { "none".to_string() } else { allowed.join(", ") };
                return Err(format!("policy {} takes no parameter {key}; its parameters: {valid}", self.name));
            }
        }
        let positive = |key: &str, v: f64| {
            if v.is_finite() && v > 0.0 {
                Ok(v)
            } else {
                Err(format!("policy {} parameter {key} = {v}; it must be a finite number > 0", self.name))
            }
        };
        Ok(match self.name {
            PolicyName::Ucb1 => Box::new(Ucb1),
            PolicyName::EpsilonGreedy => Box::new(EpsilonGreedy {
                c: positive("c", self.c.unwrap_or(EPSILON_C))?,
                d: positive("d", self.d.unwrap_or(EPSILON_D))?,
            }),
            PolicyName::Thompson => {
                let alpha = self.prior_alpha.unwrap_or(1.0);
                let beta = self.prior_beta.unwrap_or(1.0);
                for (key, v) in [("prior_alpha", alpha), ("prior_beta", beta)] {
                    if !(v.is_finite() && v >= 1.0) {
                        return Err(format!("policy thompson parameter {key} = {v}; it must be a finite number ≥ 1"));
                    }
                }
                Box::new(Thompson { prior_alpha: alpha, prior_beta: beta })
            }
            PolicyName::KlUcb => {
                let c = self.c.unwrap_or(0.0);
                if !(c.is_finite() && c >= 0.0) {
                    return Err(format!("policy kl-ucb parameter c = {c}; it must be a finite number ≥ 0"));
                }
                Box::new(KlUcb { c })
            }
            PolicyName::Fixed => {
                if self.weights.is_empty() {
                    return Err("policy fixed needs weights (arm = share, e.g. { control = 0.9, new = 0.1 })".into());
                }
                for (arm, &w) in &self.weights {
                    if !(w.is_finite() && w >= 0.0) {
                        return Err(format!("policy fixed weight of arm {arm:?} = {w}; it must be a finite number ≥ 0"));
                    }
                }
                if self.weights.values().sum::<f64>() <= 0.0 {
                    return Err("policy fixed weights add up to 0; at least one must be > 0".into());
                }
                Box::new(Fixed { shares: self.weights.clone() })
            }
        })
    }

    /// Warnings that do not stop the policy from running.
    pub fn warnings(&self) -> Vec<String> {
        let mut w = Vec::new();
        if self.name == PolicyName::EpsilonGreedy && self.c.unwrap_or(EPSILON_C) <= 5.0 {
            w.push(format!(
                "epsilon-greedy c = {} is ≤ 5: the logarithmic regret bound of Auer, Cesa-Bianchi & Fischer (2002, Theorem 3) needs c > 5",
                self.c.unwrap_or(EPSILON_C)
            ));
        }
        w
    }
}

impl fmt::Display for PolicySpec {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.name)?;
        for (k, v) in [("c", self.c), ("d", self.d), ("prior_alpha", self.prior_alpha), ("prior_beta", self.prior_beta)] {
            if let Some(v) = v {
                write!(f, ":{k}={v}")?;
            }
        }
        for (arm, w) in &self.weights {
            write!(f, ":{arm}={w}")?;
        }
        Ok(())
    }
}

impl FromStr for PolicySpec {
    type Err = String;

    /// `name[:key=value]…`; for `fixed` the keys are arm names.
    fn from_str(s: &str) -> Result<Self, String> {
        let mut parts = s.split(':');
        let mut spec = PolicySpec::new(parts.next().unwrap_or_default().trim().parse()?);
        for part in parts {
            let (key, value) = part
                .split_once('=')
                .ok_or_else(|| format!("policy parameter {part:?} in {s:?} is not key=value"))?;
            let v: f64 = value
                .trim()
                .parse()
                .map_err(|_| format!("policy parameter {key} = {value:?} in {s:?} is not a number"))?;
            let key = key.trim();
            match (spec.name, key) {
                (PolicyName::Fixed, arm) => {
                    spec.weights.insert(arm.to_string(), v);
                }
                (_, "c") => spec.c = Some(v),
                (_, "d") => spec.d = Some(v),
                (_, "prior_alpha") => spec.prior_alpha = Some(v),
                (_, "prior_beta") => spec.prior_beta = Some(v),
                (name, other) => return Err(format!("policy {name} takes no parameter {other:?}")),
            }
        }
        spec.build()?;
        Ok(spec)
    }
}

/// Index of the largest value, ties broken uniformly at random with `rng`.
pub(crate) fn argmax_random_tie(values: impl Iterator<Item = f64>, rng: &mut dyn RngCore) -> usize {
    let mut best = f64::NEG_INFINITY;
    let mut choice = 0;
    let mut ties = 0u32;
    for (i, v) in values.enumerate() {
        if v > best {
            best = v;
            choice = i;
            ties = 1;
        } else if v == best {
            ties += 1;
            if rng.next_u32().is_multiple_of(ties) {
                choice = i;
            }
        }
    }
    choice
}

/// Indices of the arms with the highest estimated mean among the arms with pulls (all arms when
/// nothing was pulled). A never-pulled arm has no estimate: its mean of 0 is a placeholder, and
/// counting it as a leader would hand it the exploitation share of every arm whose estimate is 0.
pub(crate) fn leaders(arms: &[ArmInput]) -> Vec<usize> {
    let any_pulled = arms.iter().any(|a| a.pulls > 0.0);
    let eligible = |a: &ArmInput| !any_pulled || a.pulls > 0.0;
    let best = arms.iter().filter(|a| eligible(a)).map(ArmInput::mean).fold(f64::NEG_INFINITY, f64::max);
    (0..arms.len()).filter(|&i| eligible(&arms[i]) && arms[i].mean() == best).collect()
}
