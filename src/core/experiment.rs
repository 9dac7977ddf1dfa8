//! One experiment: its arms' statistics, its policy and bounds, and its publish state.

use rustc_hash::FxHashMap;
use serde::{Deserialize, Serialize};

use super::attribution::{Bucket, Pending, Window};
use super::bounds::Bounds;
use super::decision::Settle;
use super::interval::clamp_sum;
use super::lifecycle::{Lifecycle, State};
use super::policy::{ArmInput, Policy, PolicySpec};
use super::report::{report, Judged, Report};
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
    /// Whether an impression of an arm the definition does not name adds it (`true`) or is
    /// refused as `unknown-arm`. Only meaningful with declared arms.
    #[serde(default = "accept_by_default")]
    pub accept_new_arms: bool,
    /// Attribution window: estimates count an impression only once it has matured, with the
    /// rewards attributed to it (`core::attribution`). `None`: every pull counts at once.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub attribution: Option<Window>,
    /// The arm the others' lift is measured against.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub control_arm: Option<String>,
    /// When the experiment counts as settled, and whether it then concludes itself.
    #[serde(default)]
    pub settle: Settle,
}

fn accept_by_default() -> bool {
    true
}

impl ExperimentSpec {
    pub fn new(policy: PolicySpec, reward: RewardModel) -> Self {
        ExperimentSpec { policy, reward, bounds: Bounds::default(), half_life_ms: None, max_arms: usize::MAX, accept_new_arms: true, attribution: None, control_arm: None, settle: Settle::default() }
    }
}

/// One observation of an arm.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Observation {
    /// `count` impressions (pulls).
    Impression { count: u64 },
    /// One reward of `value` reward units, for an impression made at `impression_ms` when the
    /// event says (under an attribution window the reward is credited to that impression;
    /// otherwise to one made at the reward's own time).
    Reward { value: f64, impression_ms: Option<i64> },
}

impl Observation {
    /// A reward that names no impression.
    pub fn reward(value: f64) -> Observation {
        Observation::Reward { value, impression_ms: None }
    }
}

/// What became of an observation the experiment took.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Credit {
    /// In the estimates now.
    Counted,
    /// Waiting in the attribution window; in the estimates once its impression matures.
    Pending,
    /// A reward that came after its impression's window closed: counted, not applied.
    Late,
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
    /// An impression of an arm the definition does not name, with `accept_new_arms = false`.
    #[error("the definition does not name this arm and accepts no new ones")]
    UndeclaredArm,
    /// An event of a retired experiment.
    #[error("the experiment is retired")]
    Retired,
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
    /// The definition's state and revision when the snapshot was taken (older writers left
    /// it out: learning at revision 0).
    #[serde(default)]
    pub lifecycle: Lifecycle,
    /// Arms a definition took out: their statistics stay, they get no weight.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub removed: Vec<String>,
    /// The attribution clock: the newest event time applied (absent before any event, and in
    /// snapshots of older writers).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub clock_ms: Option<i64>,
    /// The attribution window the pending buckets were cut under, so that a restore under
    /// another window carries them over instead of misreading them.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub attribution: Option<Window>,
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
    lifecycle: Lifecycle,
    /// Per arm: taken out by a definition (no weight, statistics kept).
    removed: Vec<bool>,
    /// The arms the definition names (empty: arms join on first sight).
    declared: Vec<String>,
    /// The newest event time applied under an attribution window: what matures impressions
    /// (kept only while there is a window).
    clock_ms: Option<i64>,
}

impl Experiment {
    /// A new experiment with the declared `arms` (possibly none: arms then join on first sight).
    pub fn new(spec: ExperimentSpec, arms: &[String]) -> Result<Self, String> {
        spec.reward.validate()?;
        spec.settle.validate()?;
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
            lifecycle: Lifecycle::default(),
            removed: Vec::new(),
            declared: Vec::new(),
            clock_ms: None,
        };
        for a in arms {
            e.arm_or_add(a).map_err(|r| format!("arm {a:?}: {r}"))?;
        }
        e.declared = arms.to_vec();
        Ok(e)
    }

    /// Restores an experiment from a snapshot under the current spec; the lifecycle and the
    /// arms taken out come from the snapshot (a newer definition is applied afterwards with
    /// [`Experiment::redefine`]).
    pub fn restore(spec: ExperimentSpec, declared: &[String], state: ExperimentState) -> Result<Self, String> {
        let mut e = Experiment::new(spec, declared)?;
        e.lifecycle = state.lifecycle;
        for (name, stats) in state.arms {
            let j = match e.index.get(&name) {
                Some(&j) => j,
                None => e.push_arm(name),
            };
            e.stats[j] = stats;
        }
        e.version = state.version;
        e.clock_ms = state.clock_ms;
        if state.attribution != e.spec.attribution {
            let to = e.spec.attribution;
            e.spec.attribution = state.attribution;
            e.rebucket(to, e.spec.half_life_ms);
            e.spec.attribution = to;
            e.mature();
        }
        e.last_weights = vec![f64::NAN; e.names.len()];
        for (j, w) in state.last_weights.into_iter().enumerate().take(e.names.len()) {
            e.last_weights[j] = w.unwrap_or(f64::NAN);
        }
        for name in &state.removed {
            if let Some(&j) = e.index.get(name) {
                e.removed[j] = true;
            }
        }
        Ok(e)
    }

    /// Runs the experiment under a newer definition from now on: its spec, its arms and its
    /// lifecycle, changed at `changed_at_ms`. Statistics and the weights version stay. Arms it
    /// does not name (when it names any) are taken out of the weights at the next publish,
    /// with no step limit holding them back; arms it names that have no statistics yet join.
    /// The definition has passed the same checks as [`Experiment::new`]'s.
    pub fn redefine(&mut self, spec: ExperimentSpec, arms: &[String], lifecycle: Lifecycle, changed_at_ms: i64) -> Result<(), String> {
        spec.reward.validate()?;
        spec.settle.validate()?;
        spec.bounds.validate(arms)?;
        self.policy = spec.policy.build()?;
        if spec.attribution != self.spec.attribution {
            self.rebucket(spec.attribution, spec.half_life_ms);
        }
        self.spec = spec;
        self.mature();
        for a in arms {
            if !self.index.contains_key(a) {
                self.push_arm(a.clone());
            }
        }
        for (j, name) in self.names.iter().enumerate() {
            self.removed[j] = !arms.is_empty() && !arms.contains(name);
        }
        self.declared = arms.to_vec();
        self.lifecycle = self.lifecycle.followed_by(lifecycle, changed_at_ms);
        Ok(())
    }

    /// Carries pending impressions over to a new attribution window: each old bucket goes to
    /// the new bucket its start falls in, so nothing pending is lost or counted early; with no
    /// window any more, everything pending counts at once.
    fn rebucket(&mut self, to: Option<Window>, half_life: Option<f64>) {
        let Some(from) = self.spec.attribution else { return };
        for s in &mut self.stats {
            let mut old = std::mem::take(&mut s.pending);
            let mut moved = Pending::default();
            old.mature(i64::MAX, |b| match to {
                Some(to) => moved.add_sums(to.bucket(from.start_ms(b.index)), b),
                None => s.absorb(b, from.start_ms(b.index), half_life),
            });
            s.pending = moved;
        }
    }

    /// Retires the experiment of its own accord (idle for too long) at `now_ms`.
    pub fn retire(&mut self, now_ms: i64) {
        let next = Lifecycle { state: State::Retired, ..self.lifecycle.clone() };
        self.lifecycle = self.lifecycle.followed_by(next, now_ms);
    }

    /// Starts a new experiment in the lifecycle of its definition.
    pub fn start_in(&mut self, lifecycle: Lifecycle) {
        self.lifecycle = lifecycle;
    }

    pub fn lifecycle(&self) -> &Lifecycle {
        &self.lifecycle
    }

    /// Whether arm `j` gets weight: not taken out by a definition.
    pub fn is_active(&self, j: usize) -> bool {
        !self.removed[j]
    }

    /// Event time of the newest impression of any arm.
    pub fn last_pull_ms(&self) -> Option<i64> {
        self.stats.iter().filter_map(|s| s.last_pull_ms).max()
    }

    pub fn state(&self) -> ExperimentState {
        ExperimentState {
            arms: self.names.iter().cloned().zip(self.stats.iter().cloned()).collect(),
            version: self.version,
            last_weights: self.last_weights.iter().map(|w| w.is_finite().then_some(*w)).collect(),
            lifecycle: self.lifecycle.clone(),
            removed: self.names.iter().zip(&self.removed).filter(|(_, r)| **r).map(|(n, _)| n.clone()).collect(),
            clock_ms: self.clock_ms,
            attribution: self.spec.attribution,
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
        if !self.spec.accept_new_arms && !self.declared.is_empty() {
            return Err(Refusal::UndeclaredArm);
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
        self.removed.push(false);
        j
    }

    /// Applies one observation of the arm called `name`, adding the arm only for an impression
    /// and only once nothing else can refuse it: a refused observation leaves the experiment
    /// exactly as it was. Returns the arm's index and what became of the observation. O(1).
    pub fn apply(&mut self, name: &str, ts_ms: i64, obs: Observation) -> Result<(usize, Credit), Refusal> {
        if self.lifecycle.state == State::Retired {
            return Err(Refusal::Retired);
        }
        let arm = match (self.index.get(name), obs) {
            // An arm taken out by a definition that accepts no new arms is refused like one
            // it never named; its rewards still count, for impressions served before.
            (Some(&j), Observation::Impression { .. }) if self.removed[j] && !self.spec.accept_new_arms => {
                return Err(Refusal::UndeclaredArm)
            }
            (Some(&j), _) => j,
            (None, Observation::Reward { value, .. }) if !self.spec.reward.accepts(value) => return Err(Refusal::RewardOutOfRange),
            (None, Observation::Reward { .. }) => return Err(Refusal::UnknownArm),
            (None, Observation::Impression { .. }) => self.arm_or_add(name)?,
        };
        let credit = self.observe(arm, ts_ms, obs)?;
        Ok((arm, credit))
    }

    /// Applies one observation of arm `arm` made at event time `ts_ms`, or refuses it and
    /// changes nothing: a reward outside the reward range, or for an arm with no impressions
    /// yet. O(1).
    ///
    /// Under an attribution window W, a reward is credited to its impression's bucket (the
    /// impression's time when the event names it, clamped to the reward's own time; else the
    /// reward's own time), and a reward more than W after its impression is late: counted by
    /// the caller, not applied. Each call first matures the arm's buckets to the clock, so
    /// an arm holds at most `attribution::MAX_BUCKETS` of them.
    pub fn observe(&mut self, arm: usize, ts_ms: i64, obs: Observation) -> Result<Credit, Refusal> {
        let half_life = self.spec.half_life_ms;
        if let Observation::Reward { value, .. } = obs {
            if !self.spec.reward.accepts(value) {
                return Err(Refusal::RewardOutOfRange);
            }
            if self.stats[arm].pulls_total == 0 {
                return Err(Refusal::UnknownArm);
            }
        }
        let Some(window) = self.spec.attribution else {
            match obs {
                Observation::Impression { count } => self.stats[arm].add_pulls(count, ts_ms, half_life),
                Observation::Reward { value, .. } => self.stats[arm].add_reward(value, ts_ms, half_life),
            }
            return Ok(Credit::Counted);
        };
        let clock = self.clock_ms.map_or(ts_ms, |c| c.max(ts_ms));
        self.clock_ms = Some(clock);
        let below = window.matured_below(clock);
        let s = &mut self.stats[arm];
        s.mature(window, below, half_life);
        let (at_ms, pulls, value) = match obs {
            Observation::Impression { count } => {
                s.count_pulls(count, ts_ms);
                (ts_ms, count, 0.0)
            }
            Observation::Reward { value, impression_ms } => {
                let at_ms = impression_ms.map_or(ts_ms, |i| i.min(ts_ms));
                if window.is_late(ts_ms, at_ms) {
                    return Ok(Credit::Late);
                }
                s.reward_total += value;
                (at_ms, 0, value)
            }
        };
        let k = window.bucket(at_ms);
        if k < below {
            let bucket = Bucket { index: k, pulls, reward: value, reward_sq: value * value };
            s.absorb(&bucket, window.start_ms(k), half_life);
            Ok(Credit::Counted)
        } else {
            s.pending.add(k, pulls, value);
            Ok(Credit::Pending)
        }
    }

    /// Matures every arm's pending impressions to the attribution clock (nothing to do without
    /// a window): done before the figures of a publish are taken, so that an arm with no
    /// events of late counts what has matured meanwhile.
    pub fn mature(&mut self) {
        let (Some(window), Some(clock)) = (self.spec.attribution, self.clock_ms) else { return };
        let below = window.matured_below(clock);
        for s in &mut self.stats {
            s.mature(window, below, self.spec.half_life_ms);
        }
    }

    /// The attribution clock: the newest event time applied.
    pub fn clock_ms(&self) -> Option<i64> {
        self.clock_ms
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

    /// Per-arm means, intervals, leader, regret estimate and decision figures as of `now_ms`.
    pub fn report(&self, now_ms: i64) -> Report {
        let control = self.spec.control_arm.as_deref().and_then(|c| self.arm(c));
        report(&self.stats, &self.spec, &Judged { control, removed: &self.removed }, now_ms)
    }

    /// The arm one impression would go to (the simulator's batches of one).
    pub fn choose(&self, now_ms: i64, rng: &mut dyn rand::RngCore) -> usize {
        self.policy.choose(&self.inputs(now_ms), rng)
    }

    /// Weights for the next `batch` impressions, without publishing them, as the state in
    /// force says: the policy's after the bounds while learning; the last published ones while
    /// frozen or retired (the policy's if none were published yet); the winner's while
    /// concluded. Arms taken out get 0.
    pub fn weights(&self, now_ms: i64, batch: u64) -> Vec<f64> {
        match self.lifecycle.state {
            State::Learning => self.learned(now_ms, batch),
            State::Frozen | State::Retired => self.held().unwrap_or_else(|| self.learned(now_ms, batch)),
            State::Concluded => self.concluded().unwrap_or_else(|| self.learned(now_ms, batch)),
        }
    }

    fn learned(&self, now_ms: i64, batch: u64) -> Vec<f64> {
        let all = self.inputs(now_ms);
        let active: Vec<usize> = (0..all.len()).filter(|&j| !self.removed[j]).collect();
        let inputs: Vec<ArmInput<'_>> = active.iter().map(|&j| all[j]).collect();
        let mut raw = vec![0.0; inputs.len()];
        self.policy.weights(&inputs, batch, &mut raw);
        let names: Vec<&str> = active.iter().map(|&j| self.names[j].as_str()).collect();
        let mut out = vec![0.0; inputs.len()];
        let previous: Option<Vec<f64>> = (self.version > 0).then(|| active.iter().map(|&j| self.last_weights[j]).collect());
        self.spec.bounds.apply(&names, &raw, previous.as_deref(), &mut out);
        let mut weights = vec![0.0; all.len()];
        for (&j, w) in active.iter().zip(out) {
            weights[j] = w;
        }
        weights
    }

    /// The last published weights of the active arms, renormalised (an arm may have been taken
    /// out since); `None` before any publish.
    fn held(&self) -> Option<Vec<f64>> {
        let mut w: Vec<f64> = (0..self.names.len())
            .map(|j| if self.removed[j] || !self.last_weights[j].is_finite() { 0.0 } else { self.last_weights[j] })
            .collect();
        let sum: f64 = w.iter().sum();
        if self.version == 0 || sum <= 0.0 {
            return None;
        }
        if (sum - 1.0).abs() > 1e-12 {
            w.iter_mut().for_each(|x| *x /= sum);
        }
        Some(w)
    }

    /// Pinned arms keep their weight, the winner takes the rest, every other arm gets 0.
    fn concluded(&self) -> Option<Vec<f64>> {
        let winner = self.arm(self.lifecycle.winner.as_deref()?)?;
        let mut w = vec![0.0; self.names.len()];
        let mut pinned = 0.0;
        for (j, name) in self.names.iter().enumerate() {
            if let Some(&p) = self.spec.bounds.pinned.get(name).filter(|_| !self.removed[j] && j != winner) {
                w[j] = p;
                pinned += p;
            }
        }
        w[winner] = (1.0 - pinned).max(0.0);
        Some(w)
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
        self.mature();
        let weights = self.weights(now_ms, batch);
        let version = self.commit(&weights);
        Allocation { version, weights, report: self.report(now_ms) }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::core::{PolicyName, PolicySpec, Window};

    fn thompson(arms: &[&str]) -> Experiment {
        let arms: Vec<String> = arms.iter().map(|a| a.to_string()).collect();
        Experiment::new(ExperimentSpec::new(PolicySpec::new(PolicyName::Thompson), RewardModel::Bernoulli), &arms).expect("valid experiment")
    }

    #[test]
    fn a_refused_reward_for_a_new_arm_leaves_no_arm_behind() {
        let mut e = thompson(&["a", "b"]);
        let before = e.state();
        assert_eq!(e.apply("ghost", 1, Observation::reward(5.0)), Err(Refusal::RewardOutOfRange));
        assert_eq!(e.apply("ghost", 1, Observation::reward(1.0)), Err(Refusal::UnknownArm));
        assert_eq!(e.state(), before);
        assert_eq!(e.arm("ghost"), None);
        // 300 valid events later the weights cover the declared arms alone.
        for i in 0..150 {
            let arm = if i % 2 == 0 { "a" } else { "b" };
            e.apply(arm, i, Observation::Impression { count: 1 }).expect("impression");
            e.apply(arm, i, Observation::reward((i % 3 == 0) as u8 as f64)).expect("reward");
        }
        assert_eq!(e.arm_names(), ["a", "b"]);
        assert_eq!(e.weights(300, 1).len(), 2);
    }

    #[test]
    fn a_reward_for_an_arm_without_impressions_is_refused_and_changes_nothing() {
        let mut e = thompson(&["a"]);
        let before = e.state();
        assert_eq!(e.observe(0, 5, Observation::reward(1.0)), Err(Refusal::UnknownArm));
        assert_eq!(e.state(), before);
        e.apply("a", 6, Observation::Impression { count: 1 }).expect("impression");
        assert_eq!(e.apply("a", 7, Observation::reward(1.0)), Ok((0, Credit::Counted)));
        assert_eq!(e.arm_stats()[0].reward_total, 1.0);
    }

    fn fed(e: &mut Experiment, rounds: i64) {
        for i in 0..rounds {
            for (j, arm) in ["a", "b", "c"].iter().enumerate() {
                if e.arm(arm).is_some() {
                    e.apply(arm, i, Observation::Impression { count: 1 }).expect("impression");
                    if (i + j as i64) % 3 == 0 {
                        e.apply(arm, i, Observation::reward(1.0)).expect("reward");
                    }
                }
            }
        }
    }

    fn state(state: State, revision: u64) -> Lifecycle {
        Lifecycle { state, revision, ..Lifecycle::default() }
    }

    #[test]
    fn a_frozen_experiment_holds_its_last_weights_while_statistics_keep_counting() {
        let mut e = thompson(&["a", "b", "c"]);
        fed(&mut e, 50);
        let published = e.allocate(50, 10).weights;
        let spec = e.spec().clone();
        e.redefine(spec.clone(), &["a".into(), "b".into(), "c".into()], state(State::Frozen, 1), 1_000).expect("valid");
        fed(&mut e, 500);
        assert_eq!(e.weights(600, 10), published, "held to the bit");
        assert_eq!(e.arm_stats()[0].pulls_total, 550, "still counting");
        e.redefine(spec, &["a".into(), "b".into(), "c".into()], state(State::Learning, 2), 2_000).expect("valid");
        assert_ne!(e.weights(600, 10), published, "the policy takes over again");
    }

    #[test]
    fn a_concluded_experiment_sends_everything_to_the_winner_but_the_pinned_share() {
        let mut spec = ExperimentSpec::new(PolicySpec::new(PolicyName::Thompson), RewardModel::Bernoulli);
        spec.bounds.floor = 0.1;
        spec.bounds.pinned.insert("c".into(), 0.2);
        let arms: Vec<String> = ["a", "b", "c"].iter().map(|a| a.to_string()).collect();
        let mut e = Experiment::new(spec.clone(), &arms).expect("valid");
        fed(&mut e, 20);
        let winner = Lifecycle { winner: Some("b".into()), ..state(State::Concluded, 1) };
        e.redefine(spec, &arms, winner, 1_000).expect("valid");
        assert_eq!(e.weights(30, 5), vec![0.0, 0.8, 0.2], "floor no longer applies; the pin stays");
    }

    #[test]
    fn an_arm_taken_out_gets_no_weight_at_once_and_keeps_its_statistics() {
        let mut spec = ExperimentSpec::new(PolicySpec::new(PolicyName::Thompson), RewardModel::Bernoulli);
        spec.bounds.max_step = Some(0.01);
        let arms: Vec<String> = ["a", "b", "c"].iter().map(|a| a.to_string()).collect();
        let mut e = Experiment::new(spec.clone(), &arms).expect("valid");
        fed(&mut e, 30);
        e.allocate(30, 5);
        let kept: Vec<String> = vec!["a".into(), "b".into()];
        e.redefine(spec, &kept, state(State::Learning, 1), 1_000).expect("valid");
        let w = e.weights(31, 5);
        assert_eq!(w[2], 0.0, "no step limit holds it back");
        assert!((w.iter().sum::<f64>() - 1.0).abs() < 1e-9, "{w:?}");
        assert_eq!(e.arm_stats()[2].pulls_total, 30);
        assert_eq!(e.state().removed, vec!["c".to_string()]);
    }

    #[test]
    fn an_undeclared_arm_is_refused_when_the_definition_accepts_no_new_arms() {
        let mut spec = ExperimentSpec::new(PolicySpec::new(PolicyName::Thompson), RewardModel::Bernoulli);
        spec.accept_new_arms = false;
        let mut e = Experiment::new(spec, &["a".to_string()]).expect("valid");
        let before = e.state();
        assert_eq!(e.apply("z", 1, Observation::Impression { count: 1 }), Err(Refusal::UndeclaredArm));
        assert_eq!(e.state(), before);
    }

    #[test]
    fn a_retired_experiment_refuses_events_and_its_snapshot_says_so() {
        let mut e = thompson(&["a"]);
        e.apply("a", 1, Observation::Impression { count: 1 }).expect("impression");
        e.retire(5_000);
        let before = e.state();
        assert_eq!(e.apply("a", 2, Observation::Impression { count: 1 }), Err(Refusal::Retired));
        assert_eq!(e.state(), before);
        assert_eq!(before.lifecycle.state, State::Retired);
        assert_eq!(before.lifecycle.state_since_ms, Some(5_000));
        let back = Experiment::restore(e.spec().clone(), &["a".into()], before.clone()).expect("restores");
        assert_eq!(back.state(), before);
    }

    #[test]
    fn an_impression_of_a_new_arm_adds_it() {
        let mut e = thompson(&[]);
        assert_eq!(e.apply("fresh", 1, Observation::Impression { count: 3 }), Ok((0, Credit::Counted)));
        assert_eq!(e.arm_stats()[0].pulls_total, 3);
    }

    fn windowed(window_ms: i64, half_life_ms: Option<f64>) -> Experiment {
        let mut spec = ExperimentSpec::new(PolicySpec::new(PolicyName::Thompson), RewardModel::Bernoulli);
        spec.attribution = Some(Window { ms: window_ms });
        spec.half_life_ms = half_life_ms;
        Experiment::new(spec, &["a".into()]).expect("valid experiment")
    }

    fn reward_for(impression_ms: i64) -> Observation {
        Observation::Reward { value: 1.0, impression_ms: Some(impression_ms) }
    }

    #[test]
    fn under_a_window_a_pull_counts_once_it_has_matured_with_the_rewards_credited_to_it() {
        // W = 16 s: buckets of 1 s.
        let mut e = windowed(16_000, None);
        assert_eq!(e.apply("a", 0, Observation::Impression { count: 10 }), Ok((0, Credit::Pending)));
        assert_eq!(e.apply("a", 3_000, reward_for(0)), Ok((0, Credit::Pending)));
        assert_eq!(e.apply("a", 5_000, Observation::Impression { count: 10 }), Ok((0, Credit::Pending)));
        e.mature();
        let s = &e.arm_stats()[0];
        assert_eq!((s.pulls, s.reward, s.pulls_total, s.pending.pulls()), (0.0, 0.0, 20, 20));
        // At 17 s the first bucket has matured (its last instant, 999 ms, is 16 s old).
        assert_eq!(e.apply("a", 17_000, reward_for(4_000)), Ok((0, Credit::Pending)));
        let s = &e.arm_stats()[0];
        assert_eq!((s.pulls, s.reward, s.matured_pulls(), s.matured_reward()), (10.0, 1.0, 10, 1.0));
        // A reward within its window for a matured impression goes straight in.
        assert_eq!(e.apply("a", 16_000, reward_for(500)), Ok((0, Credit::Counted)));
        assert_eq!(e.arm_stats()[0].reward, 2.0);
        let r = e.report(17_000);
        assert_eq!((r.arms[0].pulls, r.arms[0].pending_pulls), (20, 10));
        assert!((r.arms[0].mean - 0.2).abs() < 1e-12, "2 rewards over 10 matured pulls: {}", r.arms[0].mean);
    }

    #[test]
    fn a_reward_after_its_window_closed_is_late_and_changes_no_figure() {
        let mut e = windowed(16_000, None);
        e.apply("a", 0, Observation::Impression { count: 4 }).expect("impression");
        e.apply("a", 20_000, Observation::Impression { count: 1 }).expect("impression");
        let before = e.state();
        assert_eq!(e.apply("a", 16_001, reward_for(0)), Ok((0, Credit::Late)));
        assert_eq!(e.state(), before, "a late reward older than the clock leaves everything as it was");
        // A reward naming no impression is credited at its own time: never late.
        assert_eq!(e.apply("a", 20_000, Observation::reward(1.0)), Ok((0, Credit::Pending)));
        // An impression time after the reward's own is clamped to it.
        assert_eq!(e.apply("a", 20_000, reward_for(25_000)), Ok((0, Credit::Pending)));
        assert_eq!(e.arm_stats()[0].pending.reward(), 2.0);
    }

    #[test]
    fn under_decay_an_impression_and_its_rewards_are_discounted_from_the_impression_time() {
        let h = Some(8_000.0);
        let mut e = windowed(16_000, h);
        e.apply("a", 0, Observation::Impression { count: 8 }).expect("impression");
        e.apply("a", 15_000, reward_for(0)).expect("reward");
        e.apply("a", 15_000, reward_for(0)).expect("reward");
        e.apply("a", 40_000, Observation::Impression { count: 1 }).expect("impression");
        let s = &e.arm_stats()[0];
        // One bucket matured, discounted alike: the mean is 2/8 whatever the weight.
        assert!((s.reward / s.pulls - 0.25).abs() < 1e-12, "{} / {}", s.reward, s.pulls);
        let (n, r, _) = s.at(40_000, h);
        assert!((n - 8.0 * 0.5f64.powi(5)).abs() < 1e-9 && (r / n - 0.25).abs() < 1e-12, "{n} {r}");
    }

    #[test]
    fn pending_impressions_survive_a_snapshot_and_a_change_of_window() {
        let mut e = windowed(16_000, None);
        for t in 0..40 {
            e.apply("a", t * 500, Observation::Impression { count: 1 }).expect("impression");
            e.apply("a", t * 500 + 200, reward_for(t * 500)).expect("reward");
        }
        let spec = e.spec().clone();
        let restored = Experiment::restore(spec.clone(), &["a".into()], e.state()).expect("restore");
        assert_eq!(restored.state(), e.state());
        // Restored under another window, the pending pulls move to its buckets.
        let mut wider = spec.clone();
        wider.attribution = Some(Window { ms: 32_000 });
        let moved = Experiment::restore(wider, &["a".into()], e.state()).expect("restore");
        assert_eq!(moved.arm_stats()[0].pending.pulls(), e.arm_stats()[0].pending.pulls());
        assert!(moved.arm_stats()[0].pending.len() < e.arm_stats()[0].pending.len(), "wider buckets, fewer of them");
        assert_eq!(restored.clock_ms(), Some(19_700));
        let (pulls, pending) = (e.arm_stats()[0].pulls_total, e.arm_stats()[0].pending.pulls());
        // A longer window keeps every pending pull pending, under the new buckets.
        let mut longer = spec.clone();
        longer.attribution = Some(Window { ms: 64_000 });
        e.redefine(longer, &["a".into()], state(State::Learning, 1), 1).expect("valid");
        assert_eq!((e.arm_stats()[0].pulls_total, e.arm_stats()[0].pending.pulls()), (pulls, pending));
        // No window any more: everything pending counts at once.
        let mut none = spec;
        none.attribution = None;
        e.redefine(none, &["a".into()], state(State::Learning, 2), 2).expect("valid");
        let s = &e.arm_stats()[0];
        assert_eq!((s.pulls, s.reward, s.pending.len()), (40.0, 40.0, 0));
    }
}
