//! The settle rule studied before a launch: in each simulated run, when the experiment first
//! counts as settled (`core::decision::Settle`), on which arm, and at what regret; over the
//! runs, the distribution of the time to settle and the share that settled on a wrong arm.
//!
//! The rule is checked every `every` pulls, as a sidecar checks it at each publish round; a
//! run that has not settled by the horizon counts as not settled (its time is beyond the
//! horizon, so a median or p90 beyond it is reported as absent).

use serde::Serialize;

use crate::core::decision::Settle;
use crate::core::Experiment;

/// What is studied: the rule, and how often it is looked at (pulls).
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Study {
    pub rule: Settle,
    pub every: u64,
}

/// When one run first settled.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Settling {
    /// Pulls made when the rule was first met.
    pub at: u64,
    /// The leader it settled on has a lower true mean than the best arm.
    pub wrong: bool,
    /// Pseudo-regret accumulated by then.
    pub regret: f64,
}

/// One policy's settling over the runs.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Settled {
    /// Share of the runs that settled by the horizon.
    pub settled_share: f64,
    /// Pulls until settled, median and 90th percentile over all runs (nearest rank; runs that
    /// never settled count as beyond the horizon); `None` when that rank lies beyond it.
    pub pulls_median: Option<u64>,
    pub pulls_p90: Option<u64>,
    /// Share of all runs that settled on an arm that is not the best.
    pub wrong_share: f64,
    /// Of the runs that settled, the share that settled on a wrong arm (0 when none settled).
    pub wrong_share_of_settled: f64,
    /// Pseudo-regret at the settling time, mean and standard error over the runs that settled.
    pub regret_at_settle_mean: f64,
    pub regret_at_settle_stderr: f64,
}

/// Checks the rule on `exp` after `pulls` pulls at `now_ms`, when it is due: the settling, if
/// the rule is met now. `arms` are the true means; `regret` the pseudo-regret so far.
pub fn check(study: &Study, exp: &mut Experiment, pulls: u64, now_ms: i64, arms: &[f64], regret: f64) -> Option<Settling> {
    if !pulls.is_multiple_of(study.every) {
        return None;
    }
    exp.mature();
    let report = exp.report(now_ms);
    if !report.settled {
        return None;
    }
    let best = arms.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let leader = report.leader?;
    Some(Settling { at: pulls, wrong: arms[leader] < best, regret })
}

/// The figures over the runs' settlings (`None`: the run never settled).
pub fn summarise(runs: &[Option<Settling>]) -> Settled {
    let n = runs.len().max(1) as f64;
    let settled: Vec<&Settling> = runs.iter().flatten().collect();
    let mut times: Vec<u64> = settled.iter().map(|s| s.at).collect();
    times.sort_unstable();
    let rank = |q: f64| -> Option<u64> {
        let k = ((q * runs.len() as f64).ceil() as usize).max(1);
        times.get(k - 1).copied()
    };
    let wrong = settled.iter().filter(|s| s.wrong).count() as f64;
    let regrets: Vec<f64> = settled.iter().map(|s| s.regret).collect();
    let (mean, stderr) = super::mean_stderr(regrets.iter().copied());
    Settled {
        settled_share: settled.len() as f64 / n,
        pulls_median: rank(0.5),
        pulls_p90: rank(0.9),
        wrong_share: wrong / n,
        wrong_share_of_settled: if settled.is_empty() { 0.0 } else { wrong / settled.len() as f64 },
        regret_at_settle_mean: mean,
        regret_at_settle_stderr: stderr,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ranks_count_the_runs_that_never_settled_as_beyond_the_horizon() {
        let s = |at, wrong| Some(Settling { at, wrong, regret: at as f64 });
        let runs = [s(300, false), s(100, true), None, s(200, false), None];
        let f = summarise(&runs);
        assert_eq!((f.pulls_median, f.pulls_p90), (Some(300), None), "ranks 3 and 5 of 5");
        assert_eq!((f.settled_share, f.wrong_share), (0.6, 0.2));
        assert!((f.wrong_share_of_settled - 1.0 / 3.0).abs() < 1e-15);
        assert_eq!(f.regret_at_settle_mean, 200.0);
    }
}
