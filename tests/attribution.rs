//! Rewards that arrive late, in simulation: the bias of counting pulls at once, its removal by
//! an attribution window, the coverage of the matured intervals, and regret under delay.
//!
//! Delayed feedback in bandits: Joulani, György & Szepesvári (2013), "Online learning under
//! delayed feedback", ICML; Vernade, Cappé & Perchet (2017), "Stochastic bandit models for
//! delayed conversions", UAI. Every run is seeded; the margins quoted were measured with
//! these seeds.

use apportion::core::{PolicySpec, RewardModel};
use apportion::sim::{simulate, watch_run, Delay, SimReport, SimSpec, Timing};

const SEED: u64 = 20_261_204;

fn spec(arms: &[f64], reward: RewardModel, policy: &str, horizon: u64, runs: u32, batch: u64, timing: Timing) -> SimSpec {
    SimSpec {
        arms: arms.to_vec(),
        reward,
        policies: vec![policy.parse::<PolicySpec>().unwrap_or_else(|e| panic!("{policy}: {e}"))],
        horizon,
        runs,
        batch,
        seed: SEED,
        threads: 2,
        timing: Some(timing),
        settle: None,
    }
}

fn run(s: &SimSpec) -> SimReport {
    simulate(s, &|_| {}).unwrap_or_else(|e| panic!("simulation failed: {e}"))
}

/// The expected relative shortfall of a mean counted at once, at time T, when impressions come
/// at a steady rate over [0, T] and each reward follows its impression after an exponential
/// delay of rate λ. Derivation (no source needed beyond calculus): an impression made at t
/// has had its reward (probability μ) by T with probability 1 − e^{−λ(T−t)}; over impressions
/// uniform on [0, T] the rewards seen are μ·(1/T)∫₀ᵀ (1 − e^{−λ(T−t)}) dt = μ·(1 − (1 − e^{−λT})/(λT))
/// per pull, so the mean is low by μ·(1 − e^{−λT})/(λT). (The sidecar's ratio estimate adds an
/// O(1/n) term, far below the tolerance at these pull counts.)
fn pending_share(lambda: f64, t: f64) -> f64 {
    (1.0 - (-lambda * t).exp()) / (lambda * t)
}

#[test]
fn without_a_window_means_are_low_by_the_share_of_rewards_still_on_their_way_and_a_window_removes_it() {
    // A fixed 50/50 split, so that both arms' impressions are spread evenly over [0, T].
    let arms = [0.3, 0.1];
    let (mean_delay, rate, horizon) = (20.0, 50.0, 20_000u64);
    let t = (horizon - 1) as f64 / rate;
    let lambda = 1.0 / mean_delay;
    let without = Timing { delay: Delay::Exponential { mean_seconds: mean_delay }, rate_per_second: rate, attribution_window_seconds: None };
    let report = run(&spec(&arms, RewardModel::Bernoulli, "fixed:arm-1=0.5:arm-2=0.5", horizon, 200, 100, without));
    let e = report.results[0].estimates.as_ref().expect("estimates with a delay");
    for (j, &mu) in arms.iter().enumerate() {
        let expected = -mu * pending_share(lambda, t);
        let (got, se) = (e.mean_error[j], e.mean_error_stderr[j]);
        println!("no window, arm {j}: error {got:+.5} ± {se:.5}, derived {expected:+.5}");
        assert!((got - expected).abs() <= 3.0 * se, "arm {j}: error {got} ± {se}, derived {expected}");
        assert!(got < -5.0 * se, "arm {j}: the bias is there and clearly negative: {got} ± {se}");
    }
    // With W = 10 mean delays, a reward is late with probability e^{−10} < 5·10⁻⁵: the matured
    // estimate targets μ·(1 − e^{−λW}), within 1.4·10⁻⁵ of μ.
    let window = Timing { attribution_window_seconds: Some(10.0 * mean_delay), ..without };
    let report = run(&spec(&arms, RewardModel::Bernoulli, "fixed:arm-1=0.5:arm-2=0.5", horizon, 200, 100, window));
    let e = report.results[0].estimates.as_ref().expect("estimates with a delay");
    for j in 0..arms.len() {
        let (got, se) = (e.mean_error[j], e.mean_error_stderr[j]);
        println!("window {} s, arm {j}: error {got:+.5} ± {se:.5}", 10.0 * mean_delay);
        assert!(got.abs() <= 2.0 * se, "arm {j}: matured estimate off by {got} ± {se}");
    }
    assert!(e.late_share < 1e-3, "late share {}", e.late_share);
}

/// Coverage of the 95 % intervals on demo-like experiments (the demo's three experiments,
/// rewards 1–4 s late on average 2.5 s, a 15 s window, Thompson weights every 50 pulls),
/// checked every 10 s of a 120 s run. Wilson (1927) for 0/1 rewards and the empirical
/// Bernstein interval for bounded ones are both fixed-sample intervals; under adaptive
/// allocation they cover about as promised when checked at a few fixed times (common
/// practice, no source), which the ≥ 93 % bound leaves room for.
#[test]
fn matured_intervals_cover_the_true_means_and_counted_at_once_ones_do_not() {
    let worlds: [(&[f64], RewardModel); 3] = [
        (&[0.085, 0.060, 0.045, 0.030], RewardModel::Bernoulli),
        (&[14.0, 30.0, 20.0], RewardModel::Bounded { max: 60.0 }),
        (&[0.09, 0.16, 0.06], RewardModel::Bernoulli),
    ];
    let (rate, horizon, runs) = (200.0, 24_000u64, 30u64);
    let points: Vec<u64> = (1..=12).map(|k| k * 2_000).collect();
    let coverage = |window: Option<f64>| {
        let (mut covered, mut pairs) = (0u64, 0u64);
        for (arms, reward) in worlds {
            let timing = Timing { delay: Delay::Exponential { mean_seconds: 2.5 }, rate_per_second: rate, attribution_window_seconds: window };
            let s = spec(arms, reward, "thompson", horizon, 1, 50, timing);
            for r in 0..runs {
                watch_run(&s, &s.policies[0], r, &points, &mut |_, now, exp| {
                    let report = exp.report(now);
                    for (a, &mu) in report.arms.iter().zip(arms) {
                        if a.matured_pulls() > 0 {
                            pairs += 1;
                            covered += u64::from(a.ci_low <= mu && mu <= a.ci_high);
                        }
                    }
                })
                .unwrap_or_else(|e| panic!("{e}"));
            }
        }
        (covered as f64 / pairs as f64, pairs)
    };
    let (matured, pairs) = coverage(Some(15.0));
    let (at_once, _) = coverage(None);
    println!("coverage over {pairs} (arm, checkpoint) pairs: matured {matured:.4}, counted at once {at_once:.4}");
    assert!(matured >= 0.93, "matured intervals covered {matured:.4} of {pairs} pairs");
    assert!(at_once < matured, "counting at once should cover less: {at_once:.4} vs {matured:.4}");
}

/// Joulani, György & Szepesvári (2013): with delays of finite expected length τ, the regret of
/// UCB-type policies grows by an additive term of order K·τ on top of the undelayed
/// logarithmic regret, not by a factor that grows with n (the form of the bound from memory). Over 1 000 → 100 000 pulls a linear
/// regret would grow 100-fold.
#[test]
fn regret_under_delay_stays_logarithmic() {
    let arms = [0.3, 0.2];
    // A mean delay of 20 pulls and a window of 200, so that the first checkpoint is past it.
    let timing = Timing { delay: Delay::Exponential { mean_seconds: 1.0 }, rate_per_second: 20.0, attribution_window_seconds: Some(10.0) };
    for policy in ["thompson", "ucb1"] {
        let report = run(&spec(&arms, RewardModel::Bernoulli, policy, 100_000, 20, 20, timing));
        let cps = &report.results[0].checkpoints;
        let at = |t: u64| cps.iter().find(|c| c.t == t).map(|c| c.regret_mean).unwrap_or_else(|| panic!("no checkpoint {t}"));
        let ratio = at(100_000) / at(1_000);
        println!("{policy}: R(1e3) = {:.1}, R(1e4) = {:.1}, R(1e5) = {:.1}, ratio {ratio:.2}", at(1_000), at(10_000), at(100_000));
        assert!(ratio < 10.0, "{policy}: R(1e5)/R(1e3) = {ratio}");
    }
}
