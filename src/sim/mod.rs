//! Simulation of policies on arms with known means, before a launch: which policy, which
//! settings, and what each costs in regret.
//!
//! Every run drives the core exactly as the sidecar does: with a batch of B, the weights are
//! recomputed every B pulls and the pulls in between are drawn from them; with B = 1 each pull
//! is the policy's own decision. Run r of every policy starts from the same seed, derived from
//! `--seed` and r alone, so results do not depend on the number of threads.

pub mod output;

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Beta, Distribution};
use serde::Serialize;

use crate::core::kl::bernoulli_kl;
use crate::core::{Experiment, ExperimentSpec, Observation, PolicyName, PolicySpec, RewardModel};

/// Concentration κ of the Beta law that bounded arms draw rewards from:
/// reward = max · X, X ~ Beta(κ·p, κ·(1 − p)), p = mean / max.
pub const BOUNDED_CONCENTRATION: f64 = 2.0;

/// Log-spaced points per plotted curve; a curve through the checkpoints alone (one per power of
/// ten) would be four or five straight segments.
pub const CURVE_POINTS: usize = 100;

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
}

#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SimReport {
    pub arms: Vec<f64>,
    pub horizon: u64,
    pub runs: u32,
    pub batch: u64,
    pub lai_robbins_constant: f64,
    pub results: Vec<PolicyResult>,
}

/// One run's outcome: pseudo-regret at each checkpoint, the estimate at the horizon, pulls.
struct RunOutcome {
    regret: Vec<f64>,
    estimate: f64,
    pulls: Vec<u64>,
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
                match one_run(spec, &spec.policies[p], &points, run_seed(spec.seed, r as u64)) {
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
        });
    }
    Ok(SimReport {
        arms: spec.arms.clone(),
        horizon: spec.horizon,
        runs: spec.runs,
        batch: spec.batch,
        lai_robbins_constant: spec.lai_robbins_constant(),
        results,
    })
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

fn one_run(spec: &SimSpec, policy: &PolicySpec, cps: &[u64], seed: u64) -> Result<RunOutcome, String> {
    let names: Vec<String> = (1..=spec.arms.len()).map(|j| format!("arm-{j}")).collect();
    let mut exp = Experiment::new(ExperimentSpec::new(policy.clone(), spec.reward), &names)?;
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
    for t in 0..spec.horizon {
        let now = t as i64;
        let arm = if spec.batch == 1 {
            exp.choose(now, &mut rng)
        } else {
            if t % spec.batch == 0 {
                weights = exp.allocate(now, spec.batch).weights;
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
            exp.observe(arm, now, Observation::reward(reward)).map_err(|e| e.to_string())?;
        }
        total += best - mean;
        if t + 1 == cps[next_cp] {
            regret.push(total);
            next_cp = (next_cp + 1).min(cps.len() - 1);
        }
    }
    let now = spec.horizon as i64;
    Ok(RunOutcome {
        regret,
        estimate: exp.report(now).regret_estimate,
        pulls: exp.arm_stats().iter().map(|s| s.pulls_total).collect(),
    })
}


