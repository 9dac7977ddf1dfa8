//! Assignment as services meet it: shares that match the weights, propensities that are the
//! weights, and units that stay on their arm as far as the weights allow.

use apportion_client::hash::{arm_seed, choose, mix, uniform, unit_key, Racer};
use apportion_client::{Client, ClientConfig, Fallback, Source};

fn racers(weights: &[f64]) -> Vec<Racer> {
    weights.iter().enumerate().map(|(j, &w)| Racer { seed: arm_seed(&format!("arm-{j}")), weight: w }).collect()
}

#[test]
fn shares_over_a_million_units_match_the_weights() {
    // Pearson's chi-square statistic of the counts against n·w, 3 degrees of freedom; the
    // critical value at level 0.001 is scipy.stats.chi2.ppf(0.999, 3) = 16.266 (scipy 1.17.1).
    let weights = [0.5, 0.3, 0.15, 0.05];
    let arms = racers(&weights);
    let n = 1_000_000u32;
    let mut counts = [0u32; 4];
    for u in 0..n {
        counts[choose(unit_key("thumb-style", &format!("unit-{u}")), &arms).expect("an arm")] += 1;
    }
    let chi2: f64 = counts.iter().zip(&weights).map(|(&c, &w)| (c as f64 - n as f64 * w).powi(2) / (n as f64 * w)).sum();
    eprintln!("counts {counts:?}, chi-square {chi2:.3} (critical 16.266 at 0.001, 3 df)");
    assert!(chi2 < 16.266, "chi-square {chi2} over counts {counts:?}");
}

#[test]
fn the_propensity_is_the_weight_of_the_arm_assigned() {
    let client = Client::offline(ClientConfig::new("unused"), Box::new(|| 1_000));
    let msg = br#"{"experiment":"e","version":9,"state":"learning","published_at_ms":900,"weights":{"b":0.25,"a":0.7,"c":0.05}}"#;
    client.offer("e", Some(msg));
    for u in 0..2_000 {
        let a = client.assign("e", &format!("u{u}")).expect("weights");
        let w = match &*a.arm {
            "a" => 0.7,
            "b" => 0.25,
            _ => 0.05,
        };
        assert_eq!((a.propensity, a.weights_version, a.source), (w, Some(9), Source::Weights));
        assert_eq!(client.assign("e", &format!("u{u}")).expect("weights").arm, a.arm, "deterministic");
    }
}

/// The interval map the rendezvous hash is compared with: cumulative intervals of the weights in
/// a fixed arm order, and one uniform number per unit.
fn interval_arm(key: u64, weights: &[f64]) -> usize {
    let u = uniform(mix(key));
    let mut edge = 0.0;
    for (j, w) in weights.iter().enumerate() {
        edge += w;
        if u < edge {
            return j;
        }
    }
    weights.len() - 1
}

fn tv(a: &[f64], b: &[f64]) -> f64 {
    0.5 * a.iter().zip(b).map(|(x, y)| (x - y).abs()).sum::<f64>()
}

/// SplitMix64 as a tiny seeded generator for the weight changes.
struct Seq(u64);
impl Seq {
    fn next(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        uniform(mix(self.0))
    }
    fn weights(&mut self, k: usize) -> Vec<f64> {
        let raw: Vec<f64> = (0..k).map(|_| self.next() + 0.02).collect();
        let s: f64 = raw.iter().sum();
        raw.iter().map(|w| w / s).collect()
    }
}

#[test]
fn units_move_about_as_far_as_the_change_of_weights_forces() {
    // 300 random changes of 2 to 8 arms (and small nudges), 20 000 units each. The share of
    // units that change arm is at least TV (no assignment can do better) and, for this
    // coupling, at most 2·TV/(1 + TV) (Daliri, Musco & Suresh 2025, from memory), plus a
    // Monte-Carlo margin of 4 standard errors of a share over 20 000 units.
    let mut seq = Seq(20_261_204);
    let units: Vec<u64> = (0..20_000).map(|u| unit_key("e", &format!("user-{u}"))).collect();
    let (mut worst, mut worst_interval, mut total_ratio, mut cases) = (0.0f64, 0.0f64, 0.0, 0);
    for case in 0..300 {
        let k = 2 + case % 7;
        let old = seq.weights(k);
        let new = if case % 3 == 0 {
            let nudged: Vec<f64> = old.iter().map(|w| w * (0.9 + 0.2 * seq.next())).collect();
            let s: f64 = nudged.iter().sum();
            nudged.iter().map(|w| w / s).collect()
        } else {
            seq.weights(k)
        };
        let d = tv(&old, &new);
        if d < 0.01 {
            continue;
        }
        let (ro, rn) = (racers(&old), racers(&new));
        let moved = units.iter().filter(|&&u| choose(u, &ro) != choose(u, &rn)).count() as f64 / units.len() as f64;
        let moved_interval = units.iter().filter(|&&u| interval_arm(u, &old) != interval_arm(u, &new)).count() as f64 / units.len() as f64;
        let bound = 2.0 * d / (1.0 + d);
        let margin = 4.0 * (bound * (1.0 - bound) / units.len() as f64).sqrt();
        assert!(moved <= bound + margin, "case {case}: moved {moved} > 2TV/(1+TV) = {bound} (TV {d}, {old:?} → {new:?})");
        assert!(moved >= d - margin, "case {case}: moved {moved} below TV {d}");
        worst = worst.max(moved / d);
        worst_interval = worst_interval.max(moved_interval / d);
        total_ratio += moved / d;
        cases += 1;
    }
    eprintln!(
        "moved share / TV over {cases} changes: rendezvous largest {worst:.3}, mean {:.3}; interval map largest {worst_interval:.3}",
        total_ratio / cases as f64
    );
    assert!(worst <= 2.0, "{worst}");
}

#[test]
fn with_two_arms_both_methods_move_exactly_the_change() {
    // One arm's weight 0.3 → 0.4: TV 0.1, and either method moves a share of 0.1 (±4 standard
    // errors over 50 000 units).
    let units: Vec<u64> = (0..50_000).map(|u| unit_key("e", &format!("user-{u}"))).collect();
    let (ro, rn) = (racers(&[0.3, 0.7]), racers(&[0.4, 0.6]));
    let moved = units.iter().filter(|&&u| choose(u, &ro) != choose(u, &rn)).count() as f64 / 50_000.0;
    let margin = 4.0 * (0.1f64 * 0.9 / 50_000.0).sqrt();
    assert!((moved - 0.1).abs() <= margin, "{moved}");
}

#[test]
fn the_interval_map_moves_twice_the_change_where_rendezvous_does_not() {
    // Three arms (0.4, 0.2, 0.4) → (0.3, 0.2, 0.5): TV 0.1. The interval map shifts the middle
    // arm's interval and moves 0.2 (arithmetic); rendezvous moves about TV.
    let units: Vec<u64> = (0..50_000).map(|u| unit_key("e", &format!("user-{u}"))).collect();
    let (old, new) = ([0.4, 0.2, 0.4], [0.3, 0.2, 0.5]);
    let interval = units.iter().filter(|&&u| interval_arm(u, &old) != interval_arm(u, &new)).count() as f64 / 50_000.0;
    let (ro, rn) = (racers(&old), racers(&new));
    let rendezvous = units.iter().filter(|&&u| choose(u, &ro) != choose(u, &rn)).count() as f64 / 50_000.0;
    eprintln!("interval map moved {interval:.4}, rendezvous {rendezvous:.4}, TV 0.1");
    assert!((interval - 0.2).abs() < 0.01, "{interval}");
    assert!(rendezvous < 0.1 * 2.0 / 1.1 + 0.01, "{rendezvous}");
}

#[test]
fn without_usable_weights_the_fallback_answers_and_is_counted() {
    let now = std::sync::Arc::new(std::sync::atomic::AtomicI64::new(10_000));
    let clock = now.clone();
    let mut cfg = ClientConfig::new("unused");
    cfg.max_age = std::time::Duration::from_secs(5);
    cfg.fallbacks.insert("pinned".into(), Fallback::Arm("safe".into()));
    cfg.default_fallback = Some(Fallback::Even(vec!["x".into(), "y".into()]));
    let client = Client::offline(cfg, Box::new(move || clock.load(std::sync::atomic::Ordering::SeqCst)));
    let a = client.assign("pinned", "u1").expect("fallback");
    assert_eq!((&*a.arm, a.propensity, a.weights_version, a.source), ("safe", 1.0, None, Source::FallbackMissing));
    let a = client.assign("other", "u1").expect("fallback");
    assert!(a.propensity == 0.5 && (&*a.arm == "x" || &*a.arm == "y"), "{a:?}");
    client.offer("other", Some(br#"{"experiment":"other","version":2,"state":"learning","published_at_ms":9000,"weights":{"z":1.0}}"#));
    assert_eq!(client.assign("other", "u1").expect("weights").source, Source::Weights);
    now.store(14_001, std::sync::atomic::Ordering::SeqCst);
    assert_eq!(client.assign("other", "u1").expect("fallback").source, Source::FallbackStale, "older than max_age");
    client.offer("other", Some(br#"{"experiment":"other","version":1,"state":"learning","published_at_ms":14000,"weights":{"z":1.0}}"#));
    assert_eq!(client.assign("other", "u1").expect("fallback").source, Source::FallbackStale, "a regressed version is ignored");
    client.offer("other", Some(br#"{"experiment":"other","version":3,"state":"retired","published_at_ms":14000,"weights":{"z":1.0}}"#));
    assert_eq!(client.assign("other", "u1").expect("fallback").source, Source::FallbackRetired);
    let c = client.counts();
    assert_eq!((c.assignments_weights, c.assignments_fallback, c.fallback_missing, c.fallback_stale, c.fallback_retired), (1, 5, 2, 2, 1));
    assert_eq!(c.ignored_versions, 1);
    let bare = Client::offline(ClientConfig::new("unused"), Box::new(|| 0));
    let e = bare.assign("nowhere", "u").expect_err("no fallback");
    assert_eq!(e.reason, "fallback-missing");
    assert_eq!(bare.counts().unassignable, 1);
}

#[test]
fn events_are_written_in_the_sidecar_s_input_format() {
    use apportion_client::events::{impression_json, reward_json};
    let client = Client::offline(ClientConfig::new("unused"), Box::new(|| 0));
    client.offer("e", Some(br#"{"experiment":"e","version":4,"state":"learning","published_at_ms":0,"weights":{"a":1.0}}"#));
    let a = client.assign("e", "u").expect("weights");
    let imp: serde_json::Value = serde_json::from_str(&impression_json("p-1", &a, 77)).expect("JSON");
    assert_eq!(imp, serde_json::json!({"event_id":"p-1","kind":"impression","experiment":"e","arm":"a","ts_ms":77,"propensity":1.0,"weights_version":4}));
    let shown = apportion_client::Impression { event_id: "p-1".into(), experiment: "e".into(), arm: "a".into(), ts_ms: 77 };
    let rew: serde_json::Value = serde_json::from_str(&reward_json("p-1-r2", &shown, 0.5, 90)).expect("JSON");
    assert_eq!(rew, serde_json::json!({"event_id":"p-1-r2","kind":"reward","experiment":"e","arm":"a","ts_ms":90,"reward":0.5,"impression_id":"p-1","impression_ts_ms":77}));
    assert!(matches!(client.impression(&a, None), Err(apportion_client::ClientError::Offline)));
}

#[test]
fn the_hash_gives_the_python_client_s_vectors() {
    // Printed by clients/python/tests/print_vectors.py (the Python client, Python 3.11.7):
    // experiment "thumb-style", weights a 0.5, b 0.3, c 0.2.
    let expected = [
        ("u-0", 0x7de4_365b_e122_237d, "a"),
        ("u-1", 0x7de4_355b_e122_21ca, "a"),
        ("u-2", 0x7de4_345b_e122_2017, "c"),
        ("u-3", 0x7de4_335b_e122_1e64, "a"),
        ("u-4", 0x7de4_325b_e122_1cb1, "a"),
        ("u-5", 0x7de4_315b_e122_1afe, "a"),
        ("u-6", 0x7de4_305b_e122_194b, "a"),
        ("u-7", 0x7de4_2f5b_e122_1798, "c"),
        ("u-8", 0x7de4_2e5b_e122_15e5, "b"),
        ("u-9", 0x7de4_2d5b_e122_1432, "a"),
    ];
    let names = ["a", "b", "c"];
    let arms: Vec<Racer> = names.iter().zip([0.5, 0.3, 0.2]).map(|(a, w)| Racer { seed: arm_seed(a), weight: w }).collect();
    for (unit, key, arm) in expected {
        assert_eq!(unit_key("thumb-style", unit), key, "{unit}");
        assert_eq!(names[choose(key, &arms).expect("arm")], arm, "{unit}");
    }
}
