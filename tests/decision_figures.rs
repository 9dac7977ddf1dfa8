//! Decision figures in simulation: the confidence sequences hold over whole runs under
//! adaptive allocation where a fixed-time interval looked at again and again does not, and
//! the settle rule picks a wrong arm no more often than its probability threshold allows.
//!
//! Robbins (1970), "Statistical methods related to the law of the iterated logarithm", Annals
//! of Mathematical Statistics 41(5): the mixture sequence holds at every n with probability
//! 1 − α (Ville's inequality). Peeking at a fixed-time interval inflates its error: Armitage,
//! McPherson & Rowe (1969), "Repeated significance tests on accumulating data", JRSS A 132.
//! Every run is seeded; the figures quoted were measured with these seeds.

use apportion::core::interval::{wilson, LEVEL};
use apportion::core::sequence::{confidence_sequence, per_arm_alpha};
use apportion::core::decision::Settle;
use apportion::core::{PolicySpec, RewardModel};
use apportion::sim::settle::Study;
use apportion::sim::{simulate, watch_run, SimSpec};

const SEED: u64 = 20_261_204;

fn spec(arms: &[f64], policies: &[&str], horizon: u64, runs: u32, settle: Option<Study>) -> SimSpec {
    SimSpec {
        arms: arms.to_vec(),
        reward: RewardModel::Bernoulli,
        policies: policies.iter().map(|p| p.parse::<PolicySpec>().unwrap_or_else(|e| panic!("{p}: {e}"))).collect(),
        horizon,
        runs,
        batch: 1,
        seed: SEED,
        threads: 2,
        timing: None,
        settle,
    }
}

/// Over `runs` runs of `policy`: the share in which some arm's sequence (looked at after every
/// pull of that arm) ever left its true mean out, and the share in which some arm's Wilson
/// interval did, looked at every 100 pulls.
fn whole_run_misses(arms: &[f64], policy: &str, horizon: u64, runs: u32) -> (f64, f64) {
    let s = spec(arms, &[policy], horizon, runs, None);
    let every_pull: Vec<u64> = (1..=horizon).collect();
    let alpha = per_arm_alpha(1.0 - LEVEL, arms.len());
    let (mut cs_missed, mut ci_missed) = (0u32, 0u32);
    for run in 0..runs as u64 {
        let (mut cs, mut ci) = (false, false);
        let mut seen = vec![0u64; arms.len()];
        watch_run(&s, &s.policies[0], run, &every_pull, &mut |t, _, exp| {
            for (j, st) in exp.arm_stats().iter().enumerate() {
                let (n, r) = (st.pulls_total as f64, st.reward_total);
                if st.pulls_total != seen[j] {
                    seen[j] = st.pulls_total;
                    let i = confidence_sequence(r, n, alpha);
                    cs |= !(i.low <= arms[j] && arms[j] <= i.high);
                }
                if t % 100 == 0 && n > 0.0 {
                    let i = wilson(r, n);
                    ci |= !(i.low <= arms[j] && arms[j] <= i.high);
                }
            }
        })
        .unwrap_or_else(|e| panic!("run {run}: {e}"));
        cs_missed += u32::from(cs);
        ci_missed += u32::from(ci);
    }
    (cs_missed as f64 / runs as f64, ci_missed as f64 / runs as f64)
}

#[test]
fn sequences_hold_over_whole_adaptive_runs_where_a_watched_fixed_time_interval_does_not() {
    // 500 runs of 10 000 pulls per policy on two click rates, 5 % and 4 %. The sequences are
    // 95 % for both arms together (each arm at 2.5 %): the share of runs in which either one
    // ever misses must stay at or below 5 %, plus two Monte-Carlo standard errors
    // (√(0.05·0.95/500) = 0.0097). The Wilson interval, 95 % at one planned look, checked
    // every 100 pulls (100 looks), misses far more often.
    let (arms, horizon, runs) = ([0.05, 0.04], 10_000u64, 500u32);
    let allowed = 1.0 - LEVEL + 2.0 * ((1.0 - LEVEL) * LEVEL / runs as f64).sqrt();
    for policy in ["thompson", "ucb1"] {
        let (cs, ci) = whole_run_misses(&arms, policy, horizon, runs);
        eprintln!("{policy}: runs in which some arm was ever missed: sequence {:.1}%, Wilson every 100 pulls {:.1}%", 100.0 * cs, 100.0 * ci);
        assert!(cs <= allowed, "{policy}: sequences missed in {cs} of runs, more than {allowed}");
        assert!(ci >= 3.0 * allowed.max(cs), "{policy}: the watched Wilson interval missed in only {ci} of runs");
    }
}

#[test]
fn the_report_s_sequence_is_the_one_checked_above() {
    // The same function at the same level as the sidecar's report: α = 0.05 shared by the arms.
    let s = spec(&[0.05, 0.04], &["ucb1"], 3_000, 1, None);
    watch_run(&s, &s.policies[0], 0, &[3_000], &mut |t, _, exp| {
        let report = exp.report(t as i64);
        for (a, st) in report.arms.iter().zip(exp.arm_stats()) {
            let i = confidence_sequence(st.reward_total, st.pulls_total as f64, per_arm_alpha(0.05, 2));
            assert_eq!((a.cs_low, a.cs_high), (i.low, i.high));
        }
    })
    .expect("run");
}

fn study(min_pulls: u64) -> Study {
    Study { rule: Settle { min_pulls, ..Settle::default() }, every: 100 }
}

#[test]
fn the_settle_rule_picks_a_wrong_arm_no_more_often_than_its_threshold_allows() {
    // Instances with a clear best arm: a click-rate pair 6 % / 4 % and a triple 0.3 / 0.2 /
    // 0.15. Among the runs that settled, the share that settled on a wrong arm must stay at or
    // below 1 − settle.best_probability = 5 %. Thompson sampling gives a clear loser so few
    // pulls (of the order of ln t) that 300 on every arm of the triple may never come: there
    // the rule asks for 100.
    for (arms, horizon, min_pulls) in [(&[0.06, 0.04][..], 30_000u64, 300), (&[0.3, 0.2, 0.15][..], 20_000, 100)] {
        let report = simulate(&spec(arms, &["thompson", "ucb1"], horizon, 400, Some(study(min_pulls))), &|_| {}).expect("simulation");
        for r in &report.results {
            let f = r.settle.as_ref().expect("studied");
            eprintln!(
                "{arms:?} {}: settled {:.1}%, median {:?}, p90 {:?} pulls, wrong {:.2}% of settled, regret at settling {:.1}",
                r.policy,
                100.0 * f.settled_share,
                f.pulls_median,
                f.pulls_p90,
                100.0 * f.wrong_share_of_settled,
                f.regret_at_settle_mean
            );
            // Enough settled runs for the share to mean something (Thompson on the triple
            // settled in 23 % of its 400 runs by the horizon, UCB1 in all).
            assert!(f.settled_share * 400.0 >= 50.0, "{arms:?} {}: only {} of runs settled", r.policy, f.settled_share);
            assert!(f.wrong_share_of_settled <= 1.0 - Settle::default().best_probability, "{arms:?} {}: {f:?}", r.policy);
        }
    }
}

#[test]
fn the_study_is_reproducible_by_seed_whatever_the_threads() {
    let mut s = spec(&[0.06, 0.04], &["thompson", "ucb1"], 8_000, 40, Some(study(200)));
    let first = simulate(&s, &|_| {}).expect("simulation");
    s.threads = 1;
    let again = simulate(&s, &|_| {}).expect("simulation");
    let settled = |r: &apportion::sim::SimReport| r.results.iter().map(|p| p.settle.clone()).collect::<Vec<_>>();
    assert_eq!(settled(&first), settled(&again));
    s.seed += 1;
    assert_ne!(settled(&first), settled(&simulate(&s, &|_| {}).expect("simulation")), "another seed, other runs");
}
