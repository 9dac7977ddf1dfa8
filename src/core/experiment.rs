//! One experiment: its arms' statistics, its policy and bounds, and its publish state.

use rustc_hash::FxHashMap;
use serde::{Deserialize, Serialize};

use super::bounds::Bounds;
use super::interval::clamp_sum;
use super::policy::{ArmInput, Policy, PolicySpec};
use super::report::{report, Report};
use super::reward::RewardModel;
use super::stats::{reference_ms, ArmStats};

/// How an experiment is run: everything that comes from configuration.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ExperimentSpec {
    pub policy: PolicySpec,
    pub reward: RewardModel,
    pub bounds: Bounds,
    /// Decay half-life in event time, milliseconds; `None` keeps all history at full weight.
    pub half_life_ms: Option<f64>,
    /// Most arms the experiment may have; arms beyond it are refused.
    pub max_arms: usize,
}

impl ExperimentSpec {
    pub fn new(policy: PolicySpec, reward: RewardModel) -> Self {
        ExperimentSpec { policy, reward, bounds: Bounds::default(), half_life_ms: None, max_arms: usize::MAX }
    }
}

/// One observation of an arm.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Observation {
    /// `count` impressions (pulls).
    Impression { count: u64 },
    /// One reward of `value` reward units.
    Reward { value: f64 },
}

/// Why the core refused an observation. The source turns these into dead letters.
#[derive(Clone, Copy, Debug, PartialEq, Eq, thiserror::Error)]
pub enum Refusal {
    #[error("reward outside the experiment's reward range")]
    RewardOutOfRange,
    #[error("the experiment has as many arms as it may have")]
    TooManyArms,
    /// A reward for an arm that has had no impression: arms join only on evidence, and a
    /// reward is not evidence that the arm is being shown.
    #[error("reward for an arm with no impressions")]
    UnknownArm,
}

/// Weights for one publish, with the figures reported beside them.
#[derive(Clone, Debug, PartialEq)]
pub struct Allocation {
    /// Strictly increasing per experiment.
    pub version: u64,
    /// One weight per arm, in arm order; non-negative, summing to 1.
    pub weights: Vec<f64>,
    pub report: Report,
}

/// What a snapshot keeps of an experiment; the spec comes from configuration.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ExperimentState {
    pub arms: Vec<(String, ArmStats)>,
    pub version: u64,
    /// Weights of the last publish, per arm (`None` for arms that joined since).
    pub last_weights: Vec<Option<f64>>,
}

#[derive(Debug)]
pub struct Experiment {
    spec: ExperimentSpec,
    policy: Box<dyn Policy>,
    names: Vec<String>,
    stats: Vec<ArmStats>,
    index: FxHashMap<String, usize>,
    version: u64,
    /// NaN for arms without a previous weight.
    last_weights: Vec<f64>,
}

impl Experiment {
    /// A new experiment with the declared `arms` (possibly none: arms then join on first sight).
    pub fn new(spec: ExperimentSpec, arms: &[String]) -> Result<Self, String> {
        spec.reward.validate()?;
        spec.bounds.validate(arms)?;
        let policy = spec.policy.build()?;
        let mut e = Experiment {
            spec,
            policy,
            names: Vec::new(),
            stats: Vec::new(),
            index: FxHashMap::default(),
            version: 0,
            last_weights: Vec::new(),
        };
        for a in arms {
            e.arm_or_add(a).map_err(|r| format!("arm {a:?}: {r}"))?;
        }
        Ok(e)
    }

    /// Restores an experiment from a snapshot under the current spec.
    pub fn restore(spec: ExperimentSpec, declared: &[String], state: ExperimentState) -> Result<Self, String> {
        let mut e = Experiment::new(spec, declared)?;
        for (name, stats) in state.arms {
            let j = match e.index.get(&name) {
                Some(&j) => j,
                None => e.push_arm(name),
            };
            e.stats[j] = stats;
        }
        e.version = state.version;
        e.last_weights = vec![f64::NAN; e.names.len()];
        for (j, w) in state.last_weights.into_iter().enumerate().take(e.names.len()) {
            e.last_weights[j] = w.unwrap_or(f64::NAN);
        }
        Ok(e)
    }

    pub fn state(&self) -> ExperimentState {
        ExperimentState {
            arms: self.names.iter().cloned().zip(self.stats.iter().cloned()).collect(),
            version: self.version,
            last_weights: self.last_weights.iter().map(|w| w.is_finite().then_some(*w)).collect(),
        }
    }

    pub fn spec(&self) -> &ExperimentSpec {
        &self.spec
    }

    pub fn policy_name(&self) -> &'static str {
        self.policy.name().as_str()
    }

    pub fn arm_names(&self) -> &[String] {
        &self.names
    }

    pub fn arm_stats(&self) -> &[ArmStats] {
        &self.stats
    }

    pub fn version(&self) -> u64 {
        self.version
    }

    /// Raises the version counter to at least `v` (a hand-over from an instance that published
    /// further than this state knows).
    pub fn raise_version(&mut self, v: u64) {
        self.version = self.version.max(v);
    }

    pub fn arm(&self, name: &str) -> Option<usize> {
        self.index.get(name).copied()
    }

    /// Most arms this experiment may hold: the configured limit, and what the floor can hold.
    pub fn max_arms(&self) -> usize {
        let g = &self.spec.bounds;
        self.spec.max_arms.min(g.max_free_arms().saturating_add(g.pinned.len()))
    }

    /// The arm's index, adding the arm when it is new. A new arm starts with no pulls, which
    /// every policy explores first or gives its prior's share: the cold-start rule (README).
    pub fn arm_or_add(&mut self, name: &str) -> Result<usize, Refusal> {
        if let Some(&j) = self.index.get(name) {
            return Ok(j);
        }
        let pinned = self.spec.bounds.pinned.contains_key(name);
        let free = self.names.iter().filter(|n| !self.spec.bounds.pinned.contains_key(*n)).count();
        if self.names.len() >= self.spec.max_arms || (!pinned && free >= self.spec.bounds.max_free_arms()) {
            return Err(Refusal::TooManyArms);
        }
        Ok(self.push_arm(name.to_string()))
    }

    fn push_arm(&mut self, name: String) -> usize {
        let j = self.names.len();
        self.index.insert(name.clone(), j);
        self.names.push(name);
        self.stats.push(ArmStats::default());
        self.last_weights.push(f64::NAN);
        j
    }

    /// Applies one observation of the arm called `name`, adding the arm only for an impression
    /// and only once nothing else can refuse it: a refused observation leaves the experiment
    /// exactly as it was. Returns the arm's index. O(1).
    pub fn apply(&mut self, name: &str, ts_ms: i64, obs: Observation) -> Result<usize, Refusal> {
        let arm = match (self.index.get(name), obs) {
            (Some(&j), _) => j,
            (None, Observation::Reward { value }) if !self.spec.reward.accepts(value) => return Err(Refusal::RewardOutOfRange),
            (None, Observation::Reward { .. }) => return Err(Refusal::UnknownArm),
            (None, Observation::Impression { .. }) => self.arm_or_add(name)?,
        };
        self.observe(arm, ts_ms, obs)?;
        Ok(arm)
    }

    /// Applies one observation of arm `arm` made at event time `ts_ms`, or refuses it and
    /// changes nothing: a reward outside the reward range, or for an arm with no impressions
    /// yet. O(1).
    pub fn observe(&mut self, arm: usize, ts_ms: i64, obs: Observation) -> Result<(), Refusal> {
        let half_life = self.spec.half_life_ms;
        match obs {
            Observation::Impression { count } => self.stats[arm].add_pulls(count, ts_ms, half_life),
            Observation::Reward { value } => {
                if !self.spec.reward.accepts(value) {
                    return Err(Refusal::RewardOutOfRange);
                }
                if self.stats[arm].pulls_total == 0 {
                    return Err(Refusal::UnknownArm);
                }
                self.stats[arm].add_reward(value, ts_ms, half_life)
            }
        }
        Ok(())
    }

    /// What the policy sees, as of `now_ms`.
    pub fn inputs(&self, now_ms: i64) -> Vec<ArmInput<'_>> {
        let max = self.spec.reward.max();
        let reference = reference_ms(&self.stats, now_ms);
        self.names
            .iter()
            .zip(&self.stats)
            .map(|(name, s)| {
                let (pulls, reward, _) = s.at(reference, self.spec.half_life_ms);
                ArmInput { name, pulls, successes: clamp_sum(pulls, reward, max) / max }
            })
            .collect()
    }

    /// Per-arm means, intervals, leader and regret estimate as of `now_ms`.
    pub fn report(&self, now_ms: i64) -> Report {
        report(&self.stats, self.spec.reward, now_ms, self.spec.half_life_ms)
    }

    /// The arm one impression would go to (the simulator's batches of one).
    pub fn choose(&self, now_ms: i64, rng: &mut dyn rand::RngCore) -> usize {
        self.policy.choose(&self.inputs(now_ms), rng)
    }

    /// Weights for the next `batch` impressions, after the bounds, without publishing them.
    pub fn weights(&self, now_ms: i64, batch: u64) -> Vec<f64> {
        let inputs = self.inputs(now_ms);
        let mut raw = vec![0.0; inputs.len()];
        self.policy.weights(&inputs, batch, &mut raw);
        let names: Vec<&str> = self.names.iter().map(String::as_str).collect();
        let mut out = vec![0.0; inputs.len()];
        let previous = (self.version > 0).then_some(self.last_weights.as_slice());
        self.spec.bounds.apply(&names, &raw, previous, &mut out);
        out
    }

    /// Records `weights` as published: the version goes up by one and the next publish's step
    /// limit starts from them. Returns the new version.
    pub fn commit(&mut self, weights: &[f64]) -> u64 {
        self.version += 1;
        self.last_weights.clear();
        self.last_weights.extend_from_slice(weights);
        self.version
    }

    /// Weights of the last publish, per arm (NaN for arms that joined since).
    pub fn last_weights(&self) -> &[f64] {
        &self.last_weights
    }

    /// Computes the weights for the next `batch` impressions and commits them.
    pub fn allocate(&mut self, now_ms: i64, batch: u64) -> Allocation {
        let weights = self.weights(now_ms, batch);
        let version = self.commit(&weights);
        Allocation { version, weights, report: self.report(now_ms) }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::core::{PolicyName, PolicySpec};

    fn thompson(arms: &[&str]) -> Experiment {
        let arms: Vec<String> = arms.iter().map(|a| a.to_string()).collect();
        Experiment::new(ExperimentSpec::new(PolicySpec::new(PolicyName::Thompson), RewardModel::Bernoulli), &arms).expect("valid experiment")
    }

    #[test]
    fn a_refused_reward_for_a_new_arm_leaves_no_arm_behind() {
        let mut e = thompson(&["a", "b"]);
        let before = e.state();
        assert_eq!(e.apply("ghost", 1, Observation::Reward { value: 5.0 }), Err(Refusal::RewardOutOfRange));
        assert_eq!(e.apply("ghost", 1, Observation::Reward { value: 1.0 }), Err(Refusal::UnknownArm));
        assert_eq!(e.state(), before);
        assert_eq!(e.arm("ghost"), None);
        // 300 valid events later the weights cover the declared arms alone.
        for i in 0..150 {
            let arm = if i % 2 == 0 { "a" } else { "b" };
            e.apply(arm, i, Observation::Impression { count: 1 }).expect("impression");
            e.apply(arm, i, Observation::Reward { value: (i % 3 == 0) as u8 as f64 }).expect("reward");
        }
        assert_eq!(e.arm_names(), ["a", "b"]);
        assert_eq!(e.weights(300, 1).len(), 2);
    }

    #[test]
    fn a_reward_for_an_arm_without_impressions_is_refused_and_changes_nothing() {
        let mut e = thompson(&["a"]);
        let before = e.state();
        assert_eq!(e.observe(0, 5, Observation::Reward { value: 1.0 }), Err(Refusal::UnknownArm));
        assert_eq!(e.state(), before);
        e.apply("a", 6, Observation::Impression { count: 1 }).expect("impression");
        assert_eq!(e.apply("a", 7, Observation::Reward { value: 1.0 }), Ok(0));
        assert_eq!(e.arm_stats()[0].reward_total, 1.0);
    }

    #[test]
    fn an_impression_of_a_new_arm_adds_it() {
        let mut e = thompson(&[]);
        assert_eq!(e.apply("fresh", 1, Observation::Impression { count: 3 }), Ok(0));
        assert_eq!(e.arm_stats()[0].pulls_total, 3);
    }
}
