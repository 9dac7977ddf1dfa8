//! Simulation of policies on arms with known means, before a launch: which policy, which
//! settings, and what each costs in regret.
//!
//! Every run drives the core exactly as the sidecar does: with a batch of B, the weights are
//! recomputed every B pulls and the pulls in between are drawn from them; with B = 1 each pull
//! is the policy's own decision. Run r of every policy starts from the same seed, derived from
//! `--seed` and r alone, so results do not depend on the number of threads.

pub mod output;
pub mod settle;

use std::cmp::Reverse;
use std::collections::BinaryHeap;
use std::str::FromStr;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Beta, Distribution, Exp};
use serde::Serialize;

use crate::core::kl::bernoulli_kl;
use crate::core::{Credit, Experiment, ExperimentSpec, Observation, PolicyName, PolicySpec, RewardModel, Window};

/// Concentration κ of the Beta law that bounded arms draw rewards from:
/// reward = max · X, X ~ Beta(κ·p, κ·(1 − p)), p = mean / max.
pub const BOUNDED_CONCENTRATION: f64 = 2.0;

/// Log-spaced points per plotted curve; a curve through the checkpoints alone (one per power of
/// ten) would be four or five straight segments.
pub const CURVE_POINTS: usize = 100;

/// How long a reward takes to arrive after its impression.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum Delay {
    /// Exponential with this mean: a constant hazard, as for conversions that come at a steady
    /// rate after a view.
    Exponential { mean_seconds: f64 },
    /// Always this long.
    Fixed { seconds: f64 },
}

impl Delay {
    fn sample(self, rng: &mut StdRng) -> f64 {
        match self {
            Delay::Exponential { mean_seconds } => Exp::new(1.0 / mean_seconds).map_or(mean_seconds, |d| d.sample(rng)),
            Delay::Fixed { seconds } => seconds,
        }
    }
}

impl FromStr for Delay {
    type Err = String;

    /// `exp:MEAN_SECONDS` or `fixed:SECONDS`.
    fn from_str(s: &str) -> Result<Delay, String> {
        let bad = || format!("--reward-delay {s:?}; give exp:MEAN_SECONDS (e.g. exp:30) or fixed:SECONDS (e.g. fixed:5)");
        let (kind, v) = s.split_once(':').ok_or_else(bad)?;
        let v: f64 = v.trim().parse().map_err(|_| bad())?;
        match kind.trim() {
            "exp" if v.is_finite() && v > 0.0 => Ok(Delay::Exponential { mean_seconds: v }),
            "fixed" if v.is_finite() && v >= 0.0 => Ok(Delay::Fixed { seconds: v }),
            _ => Err(bad()),
        }
    }
}

/// Time in a simulation with delayed rewards: pulls arrive at a steady rate, rewards after
/// their delay, and the experiment may attribute them under a window.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct Timing {
    pub delay: Delay,
    /// Impressions per second: what turns pull counts into time.
    pub rate_per_second: f64,
    pub attribution_window_seconds: Option<f64>,
}

/// What to simulate.
#[derive(Clone, Debug)]
pub struct SimSpec {
    /// True mean reward of each arm, in reward units.
    pub arms: Vec<f64>,
    pub reward: RewardModel,
    pub policies: Vec<PolicySpec>,
    pub horizon: u64,
    pub runs: u32,
    pub batch: u64,
    pub seed: u64,
    /// Worker threads; results are the same for any count.
    pub threads: usize,
    /// Rewards delayed in time; `None`: every reward comes with its impression.
    pub timing: Option<Timing>,
    /// The settle rule to study; `None`: not studied.
    pub settle: Option<settle::Study>,
}

impl SimSpec {
    /// Checks the arms against the reward model; the message says what would be valid.
    pub fn validate(&self) -> Result<(), String> {
        self.reward.validate()?;
        if self.arms.len() < 2 {
            return Err(format!("--arms has {} arm(s); give at least two means, e.g. --arms 0.05,0.04", self.arms.len()));
        }
        let max = self.reward.max();
        if let Some(m) = self.arms.iter().find(|m| !(m.is_finite() && (0.0..=max).contains(*m))) {
            return Err(format!("--arms value {m} is outside the reward range [0, {max}]"));
        }
        if self.policies.is_empty() {
            return Err(format!("--policies is empty; name at least one of {}", PolicyName::valid_names()));
        }
        for (flag, v) in [("--horizon", self.horizon), ("--runs", self.runs as u64), ("--batch", self.batch)] {
            if v == 0 {
                return Err(format!("{flag} is 0; it must be at least 1"));
            }
        }
        if let Some(t) = &self.timing {
            if !(t.rate_per_second.is_finite() && t.rate_per_second > 0.0) {
                return Err(format!("--rate {}; it must be impressions per second > 0", t.rate_per_second));
            }
            if let Some(w) = t.attribution_window_seconds {
                if !(w.is_finite() && w >= 0.001) {
                    return Err(format!("--attribution-window {w}; it must be a number of seconds ≥ 0.001"));
                }
            }
        }
        if let Some(study) = &self.settle {
            study.rule.validate().map_err(|e| e.replacen("settle.", "--settle-", 1).replacen("best_probability", "best-probability", 1).replacen("relative_loss", "relative-loss", 1))?;
            if study.every == 0 {
                return Err("--settle-every is 0; it must be at least 1 pull".into());
            }
        }
        Ok(())
    }

    fn best(&self) -> f64 {
        self.arms.iter().cloned().fold(f64::NEG_INFINITY, f64::max)
    }

    /// Σⱼ Δⱼ / kl(μⱼ, μ*) over the suboptimal arms (Lai & Robbins 1985, "Asymptotically efficient
    /// adaptive allocation rules", Adv. Appl. Math. 6): regret grows at least like this times ln n
    /// for any consistent policy on Bernoulli arms. Bounded arms use their means scaled to [0, 1].
    /// Folded from +0, since an empty `sum` of floats is −0 (printed `-0.000` for equal arms).
    pub fn lai_robbins_constant(&self) -> f64 {
        let max = self.reward.max();
        let best = self.best();
        self.arms
            .iter()
            .filter(|&&m| m < best)
            .map(|&m| (best - m) / bernoulli_kl(m / max, best / max))
            .fold(0.0, |sum, c| sum + c)
    }

    /// Points of the plotted curves: about [`CURVE_POINTS`] log-spaced from 1 to the horizon,
    /// and every checkpoint, so that a curve is smooth and passes through the table's figures.
    pub fn curve_points(&self) -> Vec<u64> {
        let last = CURVE_POINTS.saturating_sub(1).max(1) as f64;
        let h = self.horizon as f64;
        let mut ts: Vec<u64> = (0..CURVE_POINTS)
            .map(|i| h.powf(i as f64 / last).round().clamp(1.0, h) as u64)
            .chain(self.checkpoints())
            .collect();
        ts.sort_unstable();
        ts.dedup();
        ts
    }

    /// Every power of ten up to the horizon, and the horizon.
    pub fn checkpoints(&self) -> Vec<u64> {
        let mut cps: Vec<u64> = std::iter::successors(Some(10u64), |t| t.checked_mul(10))
            .take_while(|&t| t <= self.horizon)
            .collect();
        if cps.last() != Some(&self.horizon) {
            cps.push(self.horizon);
        }
        cps
    }
}

#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Checkpoint {
    pub t: u64,
    pub regret_mean: f64,
    pub regret_stderr: f64,
}

#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct PolicyResult {
    pub policy: String,
    pub checkpoints: Vec<Checkpoint>,
    /// Mean regret at [`SimSpec::curve_points`], for the plot. Not part of the JSON shape.
    #[serde(skip)]
    pub curve: Vec<Checkpoint>,
    pub final_regret_mean: f64,
    pub final_regret_stderr: f64,
    /// Mean over runs of the sidecar's regret estimate at the horizon, to compare with the true
    /// pseudo-regret (`final_regret_mean`). Not part of the JSON shape.
    #[serde(skip)]
    pub final_estimate_mean: f64,
    /// Mean pulls of each arm at the horizon. Not part of the JSON shape.
    #[serde(skip)]
    pub mean_pulls: Vec<f64>,
    /// With delayed rewards: what the delay did to the estimates at the horizon.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub estimates: Option<Estimates>,
    /// With a settle rule to study: when the runs settled, and on which arm.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub settle: Option<settle::Settled>,
}

/// The estimates at the horizon of a simulation with delayed rewards, over the runs.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Estimates {
    /// Per arm: mean over runs of (reported mean − true mean), over the runs in which the arm
    /// had matured pulls; negative when pending rewards pull the estimate down.
    pub mean_error: Vec<f64>,
    pub mean_error_stderr: Vec<f64>,
    /// Share of the pulls still waiting to mature at the horizon (0 without a window).
    pub pending_share: f64,
    /// Share of the rewards delivered by the horizon that came after their window closed.
    pub late_share: f64,
}

#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SimReport {
    pub arms: Vec<f64>,
    pub horizon: u64,
    pub runs: u32,
    pub batch: u64,
    pub lai_robbins_constant: f64,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub timing: Option<Timing>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub settle: Option<settle::Study>,
    pub results: Vec<PolicyResult>,
}

/// One run's outcome: pseudo-regret at each checkpoint, the estimate at the horizon, pulls.
struct RunOutcome {
    regret: Vec<f64>,
    estimate: f64,
    pulls: Vec<u64>,
    /// Per arm: reported mean − true mean at the horizon, for arms with matured pulls.
    mean_error: Vec<Option<f64>>,
    pending: u64,
    /// Rewards delivered by the horizon, and how many of them were late.
    delivered: u64,
    late: u64,
    settling: Option<settle::Settling>,
}

/// Runs the simulation; `progress` is called with the number of finished runs.
pub fn simulate(spec: &SimSpec, progress: &(dyn Fn(u64) + Sync)) -> Result<SimReport, String> {
    spec.validate()?;
    for p in &spec.policies {
        p.build()?;
    }
    let cps = spec.checkpoints();
    let points = spec.curve_points();
    let runs = spec.runs as usize;
    let jobs = spec.policies.len() * runs;
    let next = AtomicUsize::new(0);
    let done = AtomicUsize::new(0);
    let slots: Mutex<Vec<Option<RunOutcome>>> = Mutex::new((0..jobs).map(|_| None).collect());
    let threads = spec.threads.clamp(1, jobs.max(1));
    let failure: Mutex<Option<String>> = Mutex::new(None);
    std::thread::scope(|s| {
        for _ in 0..threads {
            s.spawn(|| loop {
                let job = next.fetch_add(1, Ordering::Relaxed);
                if job >= jobs {
                    break;
                }
                let (p, r) = (job / runs, job % runs);
                match one_run(spec, &spec.policies[p], &points, run_seed(spec.seed, r as u64), &mut |_, _, _| {}) {
                    Ok(out) => {
                        if let Ok(mut slots) = slots.lock() {
                            slots[job] = Some(out);
                        }
                    }
                    Err(e) => {
                        if let Ok(mut f) = failure.lock() {
                            f.get_or_insert(e);
                        }
                    }
                }
                progress(done.fetch_add(1, Ordering::Relaxed) as u64 + 1);
            });
        }
    });
    if let Some(e) = failure.into_inner().ok().flatten() {
        return Err(e);
    }
    let slots = slots.into_inner().map_err(|_| "a simulation thread panicked".to_string())?;
    let mut results = Vec::with_capacity(spec.policies.len());
    for (p, policy) in spec.policies.iter().enumerate() {
        let outs: Vec<&RunOutcome> = slots[p * runs..(p + 1) * runs].iter().flatten().collect();
        let curve: Vec<Checkpoint> = points
            .iter()
            .enumerate()
            .map(|(i, &t)| {
                let (mean, stderr) = mean_stderr(outs.iter().map(|o| o.regret[i]));
                Checkpoint { t, regret_mean: mean, regret_stderr: stderr }
            })
            .collect();
        let checkpoints: Vec<Checkpoint> = curve.iter().filter(|c| cps.contains(&c.t)).cloned().collect();
        let last = checkpoints.last().cloned().unwrap_or(Checkpoint { t: 0, regret_mean: 0.0, regret_stderr: 0.0 });
        let mean_pulls = (0..spec.arms.len())
            .map(|j| outs.iter().map(|o| o.pulls[j] as f64).sum::<f64>() / outs.len().max(1) as f64)
            .collect();
        results.push(PolicyResult {
            policy: policy.to_string(),
            checkpoints,
            curve,
            final_regret_mean: last.regret_mean,
            final_regret_stderr: last.regret_stderr,
            final_estimate_mean: mean_stderr(outs.iter().map(|o| o.estimate)).0,
            mean_pulls,
            estimates: spec.timing.map(|_| estimates(spec.arms.len(), &outs)),
            settle: spec.settle.as_ref().map(|_| settle::summarise(&outs.iter().map(|o| o.settling).collect::<Vec<_>>())),
        });
    }
    Ok(SimReport {
        arms: spec.arms.clone(),
        horizon: spec.horizon,
        runs: spec.runs,
        batch: spec.batch,
        lai_robbins_constant: spec.lai_robbins_constant(),
        timing: spec.timing,
        settle: spec.settle.clone(),
        results,
    })
}

fn estimates(arms: usize, outs: &[&RunOutcome]) -> Estimates {
    let (mean_error, mean_error_stderr) = (0..arms)
        .map(|j| {
            let errors: Vec<f64> = outs.iter().filter_map(|o| o.mean_error[j]).collect();
            mean_stderr(errors.iter().copied())
        })
        .unzip();
    let pulls: u64 = outs.iter().map(|o| o.pulls.iter().sum::<u64>()).sum();
    let pending: u64 = outs.iter().map(|o| o.pending).sum();
    let delivered: u64 = outs.iter().map(|o| o.delivered).sum();
    let late: u64 = outs.iter().map(|o| o.late).sum();
    Estimates {
        mean_error,
        mean_error_stderr,
        pending_share: pending as f64 / pulls.max(1) as f64,
        late_share: late as f64 / delivered.max(1) as f64,
    }
}

/// Simulates run `run` of `policy` alone (the same run `simulate` makes), calling `watch`
/// with the pull count, the event time (ms) and the experiment, its pending impressions
/// matured, at each of `points` (pull counts, ascending): for studies of the estimates along
/// the way.
pub fn watch_run(spec: &SimSpec, policy: &PolicySpec, run: u64, points: &[u64], watch: &mut dyn FnMut(u64, i64, &Experiment)) -> Result<(), String> {
    spec.validate()?;
    one_run(spec, policy, points, run_seed(spec.seed, run), watch).map(|_| ())
}

/// Seed of run `r`: SplitMix64 of the base seed and the run number.
fn run_seed(seed: u64, r: u64) -> u64 {
    let mut z = seed ^ r.wrapping_add(1).wrapping_mul(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

fn mean_stderr(values: impl Iterator<Item = f64> + Clone) -> (f64, f64) {
    let n = values.clone().count() as f64;
    if n == 0.0 {
        return (0.0, 0.0);
    }
    let mean = values.clone().sum::<f64>() / n;
    if n < 2.0 {
        return (mean, 0.0);
    }
    let var = values.map(|v| (v - mean) * (v - mean)).sum::<f64>() / (n - 1.0);
    (mean, (var / n).sqrt())
}

/// A reward on its way: (arrival ms, the pull that earned it, arm, impression ms, value bits),
/// ordered by arrival, then by pull.
type OnTheWay = (i64, u64, usize, i64, u64);

fn one_run(spec: &SimSpec, policy: &PolicySpec, cps: &[u64], seed: u64, watch: &mut dyn FnMut(u64, i64, &Experiment)) -> Result<RunOutcome, String> {
    let names: Vec<String> = (1..=spec.arms.len()).map(|j| format!("arm-{j}")).collect();
    let mut exp_spec = ExperimentSpec::new(policy.clone(), spec.reward);
    exp_spec.attribution = spec
        .timing
        .and_then(|t| t.attribution_window_seconds)
        .map(|w| Window { ms: (w * 1000.0).round() as i64 });
    if let Some(study) = &spec.settle {
        exp_spec.settle = study.rule.clone();
    }
    let mut exp = Experiment::new(exp_spec, &names)?;
    let mut settling = None;
    let mut rng = StdRng::seed_from_u64(seed);
    let best = spec.best();
    let max = spec.reward.max();
    let draws: Vec<Option<Beta<f64>>> = spec
        .arms
        .iter()
        .map(|&m| {
            let p = m / max;
            Beta::new(BOUNDED_CONCENTRATION * p, BOUNDED_CONCENTRATION * (1.0 - p)).ok()
        })
        .collect();
    let mut regret = Vec::with_capacity(cps.len());
    let mut total = 0.0;
    let mut next_cp = 0;
    let mut weights: Vec<f64> = Vec::new();
    let mut on_the_way: BinaryHeap<Reverse<OnTheWay>> = BinaryHeap::new();
    let (mut delivered, mut late) = (0u64, 0u64);
    let time_of = |t: u64| -> i64 {
        match spec.timing {
            Some(timing) => (t as f64 * 1000.0 / timing.rate_per_second).floor() as i64,
            None => t as i64,
        }
    };
    for t in 0..spec.horizon {
        let now = time_of(t);
        while let Some(&Reverse((at, _, arm, impression_ms, bits))) = on_the_way.peek() {
            if at > now {
                break;
            }
            on_the_way.pop();
            let obs = Observation::Reward { value: f64::from_bits(bits), impression_ms: Some(impression_ms) };
            delivered += 1;
            if exp.observe(arm, at, obs).map_err(|e| e.to_string())? == Credit::Late {
                late += 1;
            }
        }
        let arm = if spec.batch == 1 {
            exp.choose(now, &mut rng)
        } else {
            if t % spec.batch == 0 {
                // Weights alone: the figures a publish reports beside them are not needed here.
                exp.mature();
                weights = exp.weights(now, spec.batch);
                exp.commit(&weights);
            }
            crate::core::draw::weighted(weights.iter().copied(), rng.gen()).unwrap_or(weights.len().saturating_sub(1))
        };
        let mean = spec.arms[arm];
        let reward = match spec.reward {
            RewardModel::Bernoulli => f64::from(u8::from(rng.gen::<f64>() < mean)),
            RewardModel::Bounded { .. } => match &draws[arm] {
                Some(d) => max * d.sample(&mut rng),
                None => mean,
            },
        };
        exp.observe(arm, now, Observation::Impression { count: 1 }).map_err(|e| e.to_string())?;
        if reward > 0.0 {
            match spec.timing {
                None => {
                    exp.observe(arm, now, Observation::reward(reward)).map_err(|e| e.to_string())?;
                }
                Some(timing) => {
                    let at = now.saturating_add((timing.delay.sample(&mut rng) * 1000.0).round() as i64);
                    on_the_way.push(Reverse((at, t, arm, now, reward.to_bits())));
                }
            }
        }
        total += best - mean;
        if let (Some(study), None) = (&spec.settle, settling) {
            settling = settle::check(study, &mut exp, t + 1, now, &spec.arms, total);
        }
        if t + 1 == cps[next_cp] {
            regret.push(total);
            exp.mature();
            watch(t + 1, now, &exp);
            next_cp = (next_cp + 1).min(cps.len() - 1);
        }
    }
    let now = match spec.timing {
        Some(_) => time_of(spec.horizon - 1),
        None => spec.horizon as i64,
    };
    exp.mature();
    let report = exp.report(now);
    Ok(RunOutcome {
        regret,
        estimate: report.regret_estimate,
        pulls: exp.arm_stats().iter().map(|s| s.pulls_total).collect(),
        mean_error: report
            .arms
            .iter()
            .zip(&spec.arms)
            .map(|(a, m)| (a.matured_pulls() > 0).then(|| a.mean - m))
            .collect(),
        pending: report.arms.iter().map(|a| a.pending_pulls).sum(),
        delivered,
        late,
        settling,
    })
}
