//! Properties of the pure core over random experiments: the weight invariants of SPEC.md
//! ("Weights message", "Policies"), batch shares against a direct replay of the index policy,
//! configuration errors, and the determinism that exact replay after a crash relies on.

use std::collections::BTreeMap;

use apportion::core::policy::{ArmInput, IndexRule, KlUcb, Ucb1};
use apportion::core::attribution::MAX_BUCKETS;
use apportion::core::{Bounds, Credit, Experiment, ExperimentSpec, Observation, PolicyName, PolicySpec, RewardModel, Window};
use proptest::prelude::*;
use rand::rngs::StdRng;
use rand::SeedableRng;

/// Tolerance of the weight invariants: SPEC.md, "the weights sum to 1 within 1e-9".
const EPS: f64 = 1e-9;

fn names(k: usize) -> Vec<String> {
    (0..k).map(|j| format!("arm-{j}")).collect()
}

/// One arm's history: impressions, rewards of 1 among them, and rewards beyond the impressions
/// (late or orphaned rewards, which the core clamps).
#[derive(Clone, Debug)]
struct ArmHistory {
    pulls: u64,
    successes: u64,
    excess: u64,
}

fn arm_history() -> impl Strategy<Value = ArmHistory> {
    (0u64..3000, 0.0f64..=1.0, prop_oneof![4 => Just(0u64), 1 => 1u64..5]).prop_map(|(pulls, rate, excess)| {
        // Rewards beyond the pulls only for an arm that has had one: a reward for an arm never
        // shown is refused (`a_reward_for_an_arm_without_impressions_is_refused_and_changes_nothing`).
        ArmHistory { pulls, successes: (pulls as f64 * rate * rate).round() as u64, excess: if pulls > 0 { excess } else { 0 } }
    })
}

fn apply(exp: &mut Experiment, arms: &[ArmHistory], ts: i64) {
    for (j, a) in arms.iter().enumerate() {
        if a.pulls > 0 {
            exp.observe(j, ts, Observation::Impression { count: a.pulls }).expect("impression");
        }
        for _ in 0..a.successes + a.excess {
            exp.observe(j, ts, Observation::reward(1.0)).expect("0/1 reward");
        }
    }
}

/// Every policy, with parameters valid for it.
fn policy(k: usize) -> impl Strategy<Value = PolicySpec> {
    prop_oneof![
        Just(PolicySpec::new(PolicyName::Ucb1)),
        prop_oneof![Just(0.0), Just(3.0)].prop_map(|c| PolicySpec { c: Some(c), ..PolicySpec::new(PolicyName::KlUcb) }),
        (1.0f64..4.0, 1.0f64..4.0).prop_map(|(a, b)| PolicySpec {
            prior_alpha: Some(a),
            prior_beta: Some(b),
            ..PolicySpec::new(PolicyName::Thompson)
        }),
        (5.5f64..20.0, 0.005f64..0.5).prop_map(|(c, d)| PolicySpec {
            c: Some(c),
            d: Some(d),
            ..PolicySpec::new(PolicyName::EpsilonGreedy)
        }),
        prop::collection::vec(prop_oneof![1 => Just(0.0), 3 => 0.01f64..5.0], k).prop_map(move |shares| {
            let mut spec = PolicySpec::new(PolicyName::Fixed);
            spec.weights = names(shares.len()).into_iter().zip(shares).collect();
            if spec.weights.values().all(|&w| w == 0.0) {
                spec.weights.insert("arm-0".into(), 1.0);
            }
            spec
        }),
    ]
}

/// Bounds that `Bounds::validate` accepts for `k` declared arms: some pinned arms, a floor
/// up to exactly what the free arms can hold, a cap, and a step limit. Two corners where the
/// bounds cannot hold by construction are not generated, because validate rejects them (see
/// `impossible_pins_and_caps_are_configuration_errors`): every arm pinned with pins adding up to
/// less than 1, and a cap with pinned + K·cap < 1.
fn bounds(k: usize) -> impl Strategy<Value = Bounds> {
    (
        0..k.min(3),
        prop::collection::vec(0.05f64..1.0, 3),
        prop_oneof![1 => Just(0.0), 1 => Just(1.0), 3 => 0.0f64..1.0],
        prop_oneof![1 => Just(0.0), 1 => Just(1.0), 3 => 0.0f64..1.0],
        prop::option::of(0.0f64..=1.0),
        prop::option::of(0.001f64..=1.0),
    )
        .prop_map(move |(pinned_arms, raw_pins, pinned_mass, floor_frac, cap_frac, max_step)| {
            let raw_total: f64 = raw_pins[..pinned_arms].iter().sum();
            let pinned: BTreeMap<String, f64> = names(k)
                .into_iter()
                .zip(&raw_pins[..pinned_arms])
                .map(|(n, &r)| (n, pinned_mass * r / raw_total))
                .collect();
            let rest = 1.0 - pinned.values().sum::<f64>();
            let free = (k - pinned_arms) as f64;
            let floor = floor_frac * rest.max(0.0) / free;
            let lowest_cap = floor.max(rest / free).max(1e-6);
            let cap = cap_frac.map(|f| (lowest_cap + f * (1.0 - lowest_cap)).min(1.0));
            Bounds { floor, cap, max_step, pinned }
        })
}

fn experiment_setup() -> impl Strategy<Value = (ExperimentSpec, Vec<ArmHistory>, Vec<ArmHistory>, u64)> {
    (2usize..=7).prop_flat_map(|k| {
        (
            policy(k),
            bounds(k),
            prop::collection::vec(arm_history(), k),
            prop::collection::vec(arm_history(), k),
            prop_oneof![Just(1u64), 1u64..50, 50u64..5000],
        )
            .prop_map(|(policy, bounds, first, second, batch)| {
                let mut spec = ExperimentSpec::new(policy, RewardModel::Bernoulli);
                spec.bounds = bounds;
                (spec, first, second, batch)
            })
    })
}

/// The invariants of SPEC.md, "Weights message": every arm present, each weight ≥ 0, sum 1
/// within 1e-9, floor, cap and pins hold.
fn check_invariants(g: &Bounds, names: &[String], w: &[f64]) -> Result<(), TestCaseError> {
    prop_assert_eq!(w.len(), names.len(), "one weight per arm");
    let sum: f64 = w.iter().sum();
    prop_assert!((sum - 1.0).abs() <= EPS, "weights {:?} sum to {}", w, sum);
    for (name, &x) in names.iter().zip(w) {
        prop_assert!(x.is_finite() && x >= 0.0, "weight of {} is {}", name, x);
        match g.pinned.get(name) {
            Some(&pin) => prop_assert!((x - pin).abs() <= EPS, "pinned {} at {} got {}", name, pin, x),
            None => {
                prop_assert!(x >= g.floor - EPS, "{} got {} below the floor {}", name, x, g.floor);
                if let Some(cap) = g.cap {
                    prop_assert!(x <= cap + EPS, "{} got {} above the cap {}", name, x, cap);
                }
            }
        }
    }
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    #[test]
    fn weights_keep_every_bound_for_every_policy((spec, first, second, batch) in experiment_setup()) {
        let arms = names(first.len());
        let guard = spec.bounds.clone();
        prop_assert!(guard.validate(&arms).is_ok(), "generated bounds are invalid: {:?}", guard.validate(&arms));
        let mut exp = Experiment::new(spec, &arms).map_err(TestCaseError::fail)?;
        apply(&mut exp, &first, 1_000);
        let before = exp.allocate(1_000, batch).weights;
        check_invariants(&guard, &arms, &before)?;

        apply(&mut exp, &second, 2_000);
        let after = exp.allocate(2_000, batch).weights;
        check_invariants(&guard, &arms, &after)?;
        if let Some(step) = guard.max_step {
            // The arm set is unchanged, so the step limit must hold (SPEC.md, max_step).
            for ((name, b), a) in arms.iter().zip(&before).zip(&after) {
                prop_assert!((a - b).abs() <= step + EPS, "{} moved from {} to {}, beyond max_step {}", name, b, a, step);
            }
        }
    }
}

/// Arms as the policies see them: at most one never pulled (two would tie at an infinite index).
fn policy_inputs() -> impl Strategy<Value = Vec<(f64, f64)>> {
    prop::collection::vec((1u32..5000, 0.0f64..=1.0), 2..=7).prop_flat_map(|arms| {
        let k = arms.len();
        (Just(arms), prop::option::weighted(0.2, 0..k)).prop_map(|(arms, unpulled)| {
            arms.iter()
                .enumerate()
                .map(|(j, &(n, rate))| {
                    let pulls = if unpulled == Some(j) { 0.0 } else { n as f64 };
                    (pulls, (pulls * rate * rate).round())
                })
                .collect()
        })
    })
}

fn inputs<'a>(arms: &[(f64, f64)], names: &'a [String]) -> Vec<ArmInput<'a>> {
    arms.iter().zip(names).map(|(&(pulls, successes), name)| ArmInput { name, pulls, successes }).collect()
}

/// The index of every arm at `t` plays, infinite for an arm never pulled (it is played first).
fn indices<R: IndexRule>(rule: &R, arms: &[ArmInput], t: f64, counts: &[f64]) -> Vec<f64> {
    let budget = rule.budget(t);
    arms.iter()
        .zip(counts)
        .map(|(a, &n)| if n > 0.0 { rule.index(a.mean(), n, budget) } else { f64::INFINITY })
        .collect()
}

/// SPEC.md, "Batch shares", done literally: B virtual pulls, each to the arm with the largest
/// index (the first on ties), every mean held at its estimate and t fixed at N + (B − 1)/2.
fn replay<R: IndexRule>(rule: &R, arms: &[ArmInput], batch: u64) -> Vec<f64> {
    let t = arms.iter().map(|a| a.pulls).sum::<f64>() + (batch as f64 - 1.0) / 2.0;
    let mut counts: Vec<f64> = arms.iter().map(|a| a.pulls).collect();
    let mut virtual_pulls = vec![0.0; arms.len()];
    for _ in 0..batch {
        let idx = indices(rule, arms, t, &counts);
        let best = (0..arms.len()).fold(0, |b, j| if idx[j] > idx[b] { j } else { b });
        counts[best] += 1.0;
        virtual_pulls[best] += 1.0;
    }
    virtual_pulls.iter().map(|v| v / batch as f64).collect()
}

/// The sequential rule played B times with ties broken uniformly at random, as its exact
/// expectation: every tie branch is followed with its probability 1/|ties|. Means are held at
/// their estimates and t is fixed at N + (B − 1)/2 for the whole batch (SPEC.md, "Batch shares").
/// Returns the expected virtual pulls per arm divided by B.
///
/// Ties are split in expectation, not by handing each tied arm a fraction of one pull: a
/// fractional pull moves the tied arms off their index, so the next step could go to an arm
/// below the tie, which no run of the sequential rule does.
fn expected_replay<R: IndexRule>(rule: &R, arms: &[ArmInput], batch: u64) -> Vec<f64> {
    fn expect<R: IndexRule>(
        rule: &R,
        arms: &[ArmInput],
        t: f64,
        counts: &mut Vec<u32>,
        left: u64,
        memo: &mut std::collections::HashMap<(Vec<u32>, u64), Vec<f64>>,
    ) -> Vec<f64> {
        let k = arms.len();
        if left == 0 {
            return vec![0.0; k];
        }
        if let Some(v) = memo.get(&(counts.clone(), left)) {
            return v.clone();
        }
        let n: Vec<f64> = arms.iter().zip(counts.iter()).map(|(a, &c)| a.pulls + c as f64).collect();
        let idx = indices(rule, arms, t, &n);
        let top = idx.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let tied: Vec<usize> = (0..k).filter(|&j| idx[j] == top).collect();
        let mut out = vec![0.0; k];
        for &j in &tied {
            counts[j] += 1;
            let rest = expect(rule, arms, t, counts, left - 1, memo);
            counts[j] -= 1;
            out[j] += 1.0 / tied.len() as f64;
            for (o, r) in out.iter_mut().zip(rest) {
                *o += r / tied.len() as f64;
            }
        }
        memo.insert((counts.clone(), left), out.clone());
        out
    }
    let t = arms.iter().map(|a| a.pulls).sum::<f64>() + (batch as f64 - 1.0) / 2.0;
    let mut counts = vec![0u32; arms.len()];
    let mut memo = std::collections::HashMap::new();
    expect(rule, arms, t, &mut counts, batch, &mut memo).iter().map(|v| v / batch as f64).collect()
}

/// Every multiset of `k` arms drawn from small (pulls, successes) states, where exact index ties
/// are common (equal states, and states whose index sequences meet at a whole count).
fn small_tie_states(k: usize) -> Vec<Vec<(f64, f64)>> {
    const STATES: [(f64, f64); 8] = [(0.0, 0.0), (1.0, 0.0), (1.0, 1.0), (2.0, 0.0), (2.0, 1.0), (3.0, 0.0), (3.0, 1.0), (1000.0, 500.0)];
    let mut out = Vec::new();
    let mut pick = vec![0usize; k];
    loop {
        out.push(pick.iter().map(|&i| STATES[i]).collect());
        let Some(j) = (0..k).rev().find(|&j| pick[j] + 1 < STATES.len()) else { break };
        pick[j] += 1;
        for i in j + 1..k {
            pick[i] = pick[j];
        }
    }
    out
}

#[test]
fn batch_shares_at_exact_ties_equal_the_expected_sequential_replay() {
    type Shares<'f> = &'f dyn Fn(&[ArmInput], u64, &mut [f64]);
    type Reference<'f> = &'f dyn Fn(&[ArmInput], u64) -> Vec<f64>;
    let rules: [(&str, Shares, Reference); 2] = [
        ("ucb1", &|a, b, w| apportion::core::policy::batch_shares(&Ucb1, a, b, w), &|a, b| expected_replay(&Ucb1, a, b)),
        ("kl-ucb", &|a, b, w| apportion::core::policy::batch_shares(&KlUcb { c: 0.0 }, a, b, w), &|a, b| {
            expected_replay(&KlUcb { c: 0.0 }, a, b)
        }),
    ];
    let mut checked = 0;
    for k in 2..=4 {
        for arms in small_tie_states(k) {
            let arm_names = names(k);
            let input = inputs(&arms, &arm_names);
            for batch in 1..=8u64 {
                for (name, shares, reference) in &rules {
                    let mut w = vec![f64::NAN; k];
                    shares(&input, batch, &mut w);
                    let expected = reference(&input, batch);
                    // The reference is exact arithmetic on the same index function; 1e-9 leaves
                    // room for rounding only.
                    let worst = w.iter().zip(&expected).map(|(x, e)| (x - e).abs()).fold(0.0, f64::max);
                    assert!(worst <= 1e-9, "{name} B = {batch} arms {arms:?}: shares {w:?}, expected replay {expected:?}");
                    checked += 1;
                }
            }
        }
    }
    assert!(checked > 5000, "only {checked} cases");
}

/// An index policy's own replay of a batch: shares from B literal steps.
type Replay = Box<dyn Fn(&[ArmInput], u64) -> Vec<f64>>;

fn index_policies() -> [(PolicySpec, Replay); 3] {
    [
        (PolicySpec::new(PolicyName::Ucb1), Box::new(|a: &[ArmInput], b| replay(&Ucb1, a, b))),
        (
            PolicySpec { c: Some(0.0), ..PolicySpec::new(PolicyName::KlUcb) },
            Box::new(|a: &[ArmInput], b| replay(&KlUcb { c: 0.0 }, a, b)),
        ),
        (
            PolicySpec { c: Some(3.0), ..PolicySpec::new(PolicyName::KlUcb) },
            Box::new(|a: &[ArmInput], b| replay(&KlUcb { c: 3.0 }, a, b)),
        ),
    ]
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    #[test]
    fn batch_of_one_is_the_sequential_choice_when_the_argmax_is_unique(arms in policy_inputs(), seed in any::<u64>()) {
        let arm_names = names(arms.len());
        let input = inputs(&arms, &arm_names);
        let t = input.iter().map(|a| a.pulls).sum::<f64>();
        let counts: Vec<f64> = input.iter().map(|a| a.pulls).collect();
        let rules: [(PolicySpec, Vec<f64>); 2] = [
            (PolicySpec::new(PolicyName::Ucb1), indices(&Ucb1, &input, t, &counts)),
            (PolicySpec::new(PolicyName::KlUcb), indices(&KlUcb { c: 0.0 }, &input, t, &counts)),
        ];
        for (spec, idx) in rules {
            let mut sorted = idx.clone();
            sorted.sort_by(|a, b| b.total_cmp(a));
            // Unique argmax, with a margin so that rounding cannot reorder the top two.
            if sorted[0] <= sorted[1] + 1e-9 * sorted[1].abs().max(1.0) {
                continue;
            }
            let policy = spec.build().map_err(TestCaseError::fail)?;
            let mut rng = StdRng::seed_from_u64(seed);
            let chosen = policy.choose(&input, &mut rng);
            let mut w = vec![f64::NAN; input.len()];
            policy.weights(&input, 1, &mut w);
            for (j, &x) in w.iter().enumerate() {
                let expected = if j == chosen { 1.0 } else { 0.0 };
                prop_assert!((x - expected).abs() <= 1e-12, "{}: weights {:?}, sequential choice {}", spec, w, chosen);
            }
        }
    }

    #[test]
    fn batch_shares_equal_a_step_by_step_replay_within_one_pull(
        arms in prop::collection::vec((0u32..5000, 0.0f64..=1.0), 2..=7),
        batch in prop_oneof![1u64..20, 20u64..2000],
    ) {
        let arms: Vec<(f64, f64)> = arms.iter().map(|&(n, r)| (n as f64, (n as f64 * r * r).round())).collect();
        let arm_names = names(arms.len());
        let input = inputs(&arms, &arm_names);
        for (spec, direct) in index_policies() {
            let policy = spec.build().map_err(TestCaseError::fail)?;
            let mut w = vec![f64::NAN; input.len()];
            policy.weights(&input, batch, &mut w);
            let expected = direct(&input, batch);
            let sum: f64 = w.iter().sum();
            prop_assert!((sum - 1.0).abs() <= EPS, "{}: shares {:?} sum to {}", spec, w, sum);
            for (j, (x, e)) in w.iter().zip(&expected).enumerate() {
                // Ties may split a pull differently: one pull of B per arm (SPEC.md, batch shares).
                prop_assert!(
                    (x - e).abs() <= 1.0 / batch as f64 + EPS,
                    "{} B = {}: arm {} share {} vs replay {} (shares {:?}, replay {:?})",
                    spec, batch, j, x, e, w, expected
                );
            }
        }
    }

    #[test]
    fn a_floor_that_cannot_hold_is_rejected_naming_the_floor(k in 2usize..=20, over in 1e-6f64..1.0) {
        let floor = ((1.0 + over) / k as f64).min(1.0 + over);
        let mut spec = ExperimentSpec::new(PolicySpec::new(PolicyName::Thompson), RewardModel::Bernoulli);
        spec.bounds.floor = floor;
        let err = Experiment::new(spec, &names(k)).err();
        prop_assert!(err.as_deref().is_some_and(|e| e.contains("floor")), "K = {} floor = {}: {:?}", k, floor, err);
    }

    #[test]
    fn pins_summing_over_one_are_rejected_naming_the_pins(
        pins in prop::collection::vec(0.05f64..=1.0, 2..=4),
        over in 1e-6f64..0.5,
    ) {
        let total: f64 = pins.iter().sum();
        let arms = names(pins.len() + 1);
        let mut spec = ExperimentSpec::new(PolicySpec::new(PolicyName::Ucb1), RewardModel::Bernoulli);
        spec.bounds.pinned = arms.iter().cloned().zip(pins.iter().map(|p| p * (1.0 + over) / total)).collect();
        let err = Experiment::new(spec, &arms).err();
        prop_assert!(err.as_deref().is_some_and(|e| e.contains("pinned")), "pins {:?}: {:?}", pins, err);
    }
}

/// One event as the source would hand it to the core.
#[derive(Clone, Debug)]
enum Event {
    Impression { arm: usize, ts: i64, count: u64 },
    Reward { arm: usize, ts: i64, fraction: f64 },
}

fn events() -> impl Strategy<Value = Vec<Event>> {
    prop::collection::vec(
        prop_oneof![
            (0usize..5, 0i64..100_000, 1u64..20).prop_map(|(arm, ts, count)| Event::Impression { arm, ts, count }),
            (0usize..5, 0i64..100_000, 0.0f64..=1.0).prop_map(|(arm, ts, fraction)| Event::Reward { arm, ts, fraction }),
        ],
        0..300,
    )
}

fn replay_events(spec: &ExperimentSpec, events: &[Event]) -> Experiment {
    let mut exp = Experiment::new(spec.clone(), &[]).expect("valid spec");
    for e in events {
        let (arm, ts, obs) = match *e {
            Event::Impression { arm, ts, count } => (arm, ts, Observation::Impression { count }),
            Event::Reward { arm, ts, fraction } => {
                let value = match spec.reward {
                    RewardModel::Bernoulli => f64::from(u8::from(fraction >= 0.5)),
                    RewardModel::Bounded { max } => fraction * max,
                };
                (arm, ts, Observation::reward(value))
            }
        };
        // A reward for an arm with no impressions yet is refused; refusals are part of what
        // must replay the same.
        let _ = exp.apply(&format!("arm-{arm}"), ts, obs);
    }
    exp
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    #[test]
    fn the_same_events_in_the_same_order_give_bit_identical_state(
        events in events(),
        policy in policy(5),
        bounded in prop::option::of(0.5f64..100.0),
        half_life in prop::option::of(1.0f64..50_000.0),
    ) {
        let reward = bounded.map_or(RewardModel::Bernoulli, |max| RewardModel::Bounded { max });
        let mut spec = ExperimentSpec::new(policy, reward);
        spec.half_life_ms = half_life;
        let a = replay_events(&spec, &events);
        let b = replay_events(&spec, &events);
        let (sa, sb) = (serde_json::to_string(&a.state()), serde_json::to_string(&b.state()));
        prop_assert!(sa.is_ok(), "state does not serialise: {:?}", sa);
        prop_assert_eq!(&sa.as_ref().ok(), &sb.as_ref().ok());
        // A snapshot restores the same state bit for bit (SPEC.md, recovery promise).
        let arm_names: Vec<String> = a.arm_names().to_vec();
        let restored = Experiment::restore(spec.clone(), &[], a.state()).map_err(TestCaseError::fail)?;
        prop_assert_eq!(&sa.ok(), &serde_json::to_string(&restored.state()).ok());
        prop_assert_eq!(restored.arm_names(), &arm_names[..]);
        // Weights are deterministic too: randomness belongs to `choose` only.
        let (wa, wb) = (a.weights(100_000, 100), b.weights(100_000, 100));
        prop_assert_eq!(wa.iter().map(|w| w.to_bits()).collect::<Vec<_>>(), wb.iter().map(|w| w.to_bits()).collect::<Vec<_>>());
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    /// Under an attribution window, whatever the order and spacing of events: no arm holds more
    /// than `MAX_BUCKETS` buckets, every pull is matured or pending, a reward is late exactly
    /// when it came more than W after its impression, and a matured estimate never counts a
    /// reward twice (the matured reward is the applied reward minus the pending one).
    #[test]
    fn attribution_keeps_its_bound_and_loses_or_doubles_nothing(
        window_ms in 1i64..100_000,
        steps in prop::collection::vec((0usize..3, 0i64..3_000, -5_000i64..5_000, prop::option::of(-150_000i64..10_000), any::<bool>()), 1..300),
        half_life in prop::option::of(1.0f64..50_000.0),
    ) {
        let mut spec = ExperimentSpec::new(PolicySpec::new(PolicyName::Thompson), RewardModel::Bounded { max: 1.0 });
        spec.attribution = Some(Window { ms: window_ms });
        spec.half_life_ms = half_life;
        let mut e = Experiment::new(spec, &names(3)).map_err(TestCaseError::fail)?;
        let (mut pulls, mut applied) = ([0u64; 3], [0.0f64; 3]);
        let mut now = 0i64;
        for (arm, advance, jitter, offset, is_impression) in steps {
            // Event times move forward with jitter, as several producers write them.
            now += advance;
            let ts = now + jitter;
            let credit = if is_impression || pulls[arm] == 0 {
                pulls[arm] += 1;
                e.observe(arm, ts, Observation::Impression { count: 1 })
            } else {
                let impression_ms = offset.map(|o| ts + o);
                let c = e.observe(arm, ts, Observation::Reward { value: 0.5, impression_ms });
                let expected_late = impression_ms.is_some_and(|i| ts - i.min(ts) > window_ms);
                prop_assert_eq!(c == Ok(Credit::Late), expected_late);
                if !expected_late {
                    applied[arm] += 0.5;
                }
                c
            };
            prop_assert!(credit.is_ok(), "{:?}", credit);
            for (j, s) in e.arm_stats().iter().enumerate() {
                prop_assert!(s.pending.len() <= MAX_BUCKETS, "arm {} holds {} buckets", j, s.pending.len());
                prop_assert_eq!(s.pulls_total, pulls[j]);
                prop_assert_eq!(s.matured_pulls() + s.pending.pulls(), pulls[j]);
                prop_assert!((s.reward_total - applied[j]).abs() < 1e-9);
            }
        }
        e.mature();
        for s in e.arm_stats() {
            prop_assert!(s.matured_reward() <= s.reward_total + 1e-9 && s.matured_reward() >= -1e-9);
            if half_life.is_none() {
                prop_assert_eq!(s.pulls, s.matured_pulls() as f64);
                prop_assert!((s.reward - s.matured_reward()).abs() < 1e-9);
            }
        }
    }
}

#[test]
fn impossible_pins_and_caps_are_configuration_errors() {
    let arms: Vec<String> = ["a", "b"].iter().map(|s| s.to_string()).collect();
    let all_pinned = Bounds { pinned: [("a".to_string(), 0.3), ("b".to_string(), 0.3)].into(), ..Bounds::default() };
    assert!(all_pinned.validate(&arms).unwrap_err().contains("pinned"));
    let low_cap = Bounds { cap: Some(0.2), ..Bounds::default() };
    assert!(low_cap.validate(&arms).unwrap_err().contains("cap"));
}

/// Share of `reps` seeded samples of `n` rewards whose reported interval holds `true_mean`.
fn coverage(n: u64, max: f64, true_mean: f64, reps: u32, seed: u64, draw: &dyn Fn(&mut StdRng) -> f64) -> f64 {
    use apportion::core::report::estimate;
    use apportion::core::stats::ArmStats;
    let mut rng = StdRng::seed_from_u64(seed);
    let mut held = 0;
    for _ in 0..reps {
        let mut s = ArmStats::default();
        s.add_pulls(n, 0, None);
        for _ in 0..n {
            s.add_reward(draw(&mut rng), 0, None);
        }
        let (_, ci) = estimate(&s, RewardModel::Bounded { max }, 0, None);
        if ci.low <= true_mean && true_mean <= ci.high {
            held += 1;
        }
    }
    held as f64 / reps as f64
}

#[test]
fn bounded_reward_intervals_cover_the_mean_at_small_samples() {
    use rand::Rng;
    use rand_distr::{Beta, Distribution};
    const REPS: u32 = 2000;
    // Nominal 95 % (SPEC.md) less three Monte-Carlo standard errors, √(0.95·0.05/2000) each.
    let required = 0.95 - 3.0 * (0.95f64 * 0.05 / REPS as f64).sqrt();
    let max = 300.0;
    // Rewards max·Beta(0.04, 1.96): mostly near 0, rarely large; mean max·0.04/2 (Beta mean a/(a+b)).
    let sparse = Beta::new(0.04, 1.96).expect("valid Beta parameters");
    type Draw = Box<dyn Fn(&mut StdRng) -> f64>;
    let cases: [(&str, f64, Draw); 3] = [
        ("max·Beta(0.04, 1.96)", max * 0.02, Box::new(move |r: &mut StdRng| max * sparse.sample(r))),
        ("max with probability 0.05, else 0", max * 0.05, Box::new(move |r: &mut StdRng| if r.gen::<f64>() < 0.05 { max } else { 0.0 })),
        ("uniform on [0, max]", max * 0.5, Box::new(move |r: &mut StdRng| max * r.gen::<f64>())),
    ];
    let mut table = Vec::new();
    for (name, mean, draw) in &cases {
        for (i, n) in [5u64, 10, 30, 100].into_iter().enumerate() {
            let c = coverage(n, max, *mean, REPS, 7 + i as u64, draw.as_ref());
            table.push(format!("{name} n={n}: {c:.3}"));
            assert!(c >= required, "{name}, n = {n}: coverage {c} below {required} ({})", table.join("; "));
        }
    }
    eprintln!("bounded interval coverage: {}", table.join("; "));
}

#[test]
fn equal_bounded_rewards_do_not_give_a_point_interval() {
    use apportion::core::report::estimate;
    use apportion::core::stats::ArmStats;
    let mut s = ArmStats::default();
    s.add_pulls(2, 0, None);
    s.add_reward(0.0, 0, None);
    s.add_reward(0.0, 0, None);
    let (mean, ci) = estimate(&s, RewardModel::Bounded { max: 300.0 }, 0, None);
    assert_eq!(mean, 0.0);
    assert!(ci.high > 0.0, "two zero rewards of at most 300 cannot pin the mean to 0: {ci:?}");
}

#[test]
fn the_mean_lies_in_its_own_interval_when_rewards_precede_impressions() {
    use apportion::core::report::estimate;
    use apportion::core::stats::ArmStats;
    for model in [RewardModel::Bounded { max: 10.0 }, RewardModel::Bernoulli] {
        let mut s = ArmStats::default();
        for _ in 0..5 {
            s.add_reward(model.max(), 0, None);
        }
        s.add_pulls(2, 1, None);
        let (mean, ci) = estimate(&s, model, 1, None);
        assert!(mean <= model.max(), "{model:?}: mean {mean}");
        assert!(ci.low <= mean && mean <= ci.high, "{model:?}: mean {mean} outside {ci:?}");
    }
}

#[test]
fn a_future_stamped_event_on_one_arm_does_not_shift_that_arm_against_the_others() {
    let spec = ExperimentSpec { half_life_ms: Some(1000.0), ..ExperimentSpec::new(PolicySpec::new(PolicyName::Ucb1), RewardModel::Bounded { max: 1.0 }) };
    let mut e = Experiment::new(spec, &names(2)).expect("experiment");
    for j in 0..2 {
        e.observe(j, 0, Observation::Impression { count: 40 }).expect("impression");
        for _ in 0..10 {
            e.observe(j, 0, Observation::reward(1.0)).expect("reward");
        }
    }
    // A reward of 0 stamped two half-lives ahead of the clock, on arm 0 only.
    e.observe(0, 3000, Observation::reward(0.0)).expect("reward");
    let inputs = e.inputs(1000);
    assert!((inputs[0].pulls - inputs[1].pulls).abs() < 1e-12, "pulls {} vs {}", inputs[0].pulls, inputs[1].pulls);
    // Both discounted to the newest event time, 3000 ms: 40·2^(−3) (arithmetic).
    assert!((inputs[1].pulls - 5.0).abs() < 1e-12, "{}", inputs[1].pulls);
    let w = e.weights(1000, 100);
    assert!((w[0] - w[1]).abs() < 1e-12, "{w:?}");
}

#[test]
fn the_regret_estimate_under_decay_counts_pulls_and_means_alike() {
    let spec = ExperimentSpec { half_life_ms: Some(1000.0), ..ExperimentSpec::new(PolicySpec::new(PolicyName::Ucb1), RewardModel::Bernoulli) };
    let mut e = Experiment::new(spec, &names(2)).expect("experiment");
    e.observe(1, 0, Observation::Impression { count: 100 }).expect("impression");
    e.observe(1, 10_000, Observation::Impression { count: 10 }).expect("impression");
    for _ in 0..10 {
        e.observe(1, 10_000, Observation::reward(1.0)).expect("reward");
    }
    e.observe(0, 10_000, Observation::Impression { count: 50 }).expect("impression");
    for _ in 0..25 {
        e.observe(0, 10_000, Observation::reward(1.0)).expect("reward");
    }
    let r = e.report(10_000);
    // Arm 1's discounted mean: 10 / (10 + 100·2^(−10)) (arithmetic), above arm 0's 25/50: arm 1
    // leads, and the policy sees recent traffic.
    let leader_mean = 10.0 / (10.0 + 100.0 * (-10.0f64).exp2());
    assert_eq!(r.leader, Some(1));
    assert!((r.arms[1].mean - leader_mean).abs() < 1e-12);
    // The regret estimate counts every pull ever made at the all-time means, 25/50 and 10/110:
    // 110·(0.5 − 10/110) = 45 (arithmetic). Pricing those 110 pulls at the discounted gap
    // would have mixed the two counts.
    assert!((r.regret_estimate - 45.0).abs() < 1e-9, "{}", r.regret_estimate);
}
