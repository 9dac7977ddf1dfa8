//! The sidecar against a real broker process (scripts/test starts one): events in, weights,
//! dead letters and metrics out. Each test has its own topics and group.

mod common;

use std::collections::{BTreeMap, HashMap};
use std::time::Duration;

use apportion::config::ExperimentConfig;
use apportion::core::{Experiment, ExperimentSpec, Bounds, Observation, PolicyName, PolicySpec, RewardModel};
use common::*;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rdkafka::message::{Headers, Message};
use serde_json::Value;

const T0: i64 = 1_764_547_200_000;

fn declare(id: &str, arms: &[&str], policy: PolicyName, reward: RewardModel, floor: f64) -> ExperimentConfig {
    ExperimentConfig {
        id: id.into(),
        arms: arms.iter().map(|a| a.to_string()).collect(),
        policy: Some(PolicySpec::new(policy)),
        reward: Some(reward),
        bounds: Some(Bounds { floor, ..Bounds::default() }),
        ..ExperimentConfig::default()
    }
}

/// A seeded stream for one experiment: impressions and, for some, a reward.
fn stream(exp: &str, arms: &[(&str, f64)], max: f64, n: usize, seed: u64) -> Vec<(String, Vec<u8>)> {
    let mut rng = StdRng::seed_from_u64(seed);
    let mut out = Vec::new();
    for i in 0..n {
        let (arm, p) = arms[rng.gen_range(0..arms.len())];
        let ts = T0 + i as i64;
        out.push((exp.to_string(), impression(&format!("{exp}-i{i}"), exp, arm, ts).into_bytes()));
        if rng.gen::<f64>() < p {
            let v = if max == 1.0 { 1.0 } else { (rng.gen::<f64>() * max).round() };
            out.push((exp.to_string(), reward(&format!("{exp}-r{i}"), exp, arm, ts + 1, v).into_bytes()));
        }
    }
    out
}

/// Applies the messages of one experiment to a core experiment, as the sidecar should.
fn direct(spec: ExperimentSpec, arms: &[&str], messages: &[(String, Vec<u8>)], exp_id: &str) -> Experiment {
    let names: Vec<String> = arms.iter().map(|a| a.to_string()).collect();
    let mut e = Experiment::new(spec, &names).unwrap();
    for (_, m) in messages.iter().filter(|(k, _)| k == exp_id) {
        let v: Value = serde_json::from_slice(m).unwrap();
        let arm = e.arm(v["arm"].as_str().unwrap()).unwrap();
        let ts = v["ts_ms"].as_i64().unwrap();
        let obs = if v["kind"] == "impression" {
            Observation::Impression { count: 1 }
        } else {
            Observation::reward(v["reward"].as_f64().unwrap())
        };
        e.observe(arm, ts, obs).unwrap();
    }
    e
}

fn latest_weights(topic: &str, experiment: &str, min_version: u64, pulls: u64) -> Value {
    let msgs = read_topic(topic, Duration::from_secs(60), |ms| {
        ms.iter().any(|m| {
            let v: Value = serde_json::from_slice(m.payload().unwrap_or_default()).unwrap_or_default();
            v["experiment"] == experiment
                && v["version"].as_u64().unwrap_or(0) >= min_version
                && v["arms"].as_object().map_or(0, |a| a.values().map(|x| x["pulls"].as_u64().unwrap_or(0)).sum::<u64>()) == pulls
        })
    });
    msgs.iter()
        .filter_map(|m| serde_json::from_slice::<Value>(m.payload()?).ok())
        .filter(|v| v["experiment"] == experiment)
        .max_by_key(|v| v["version"].as_u64().unwrap_or(0))
        .expect("a weights message")
}

#[test]
fn published_weights_and_metrics_match_a_direct_core_computation() {
    if no_broker() {
        return;
    }
    let mut cfg = config("known", 3);
    cfg.defaults.auto_create = false;
    cfg.publish.heartbeat_seconds = 1.0;
    let clicks_arms = ["warm", "cool", "mono"];
    let watch_arms = ["short", "long"];
    cfg.experiments = vec![
        declare("clicks", &clicks_arms, PolicyName::Thompson, RewardModel::Bernoulli, 0.02),
        declare("watch", &watch_arms, PolicyName::Ucb1, RewardModel::Bounded { max: 60.0 }, 0.05),
    ];
    let mut messages = stream("clicks", &[("warm", 0.08), ("cool", 0.05), ("mono", 0.03)], 1.0, 3000, 1);
    messages.extend(stream("watch", &[("short", 0.5), ("long", 0.7)], 60.0, 2000, 2));
    let sidecar = Sidecar::start(cfg.clone());
    sidecar.wait_ready(Duration::from_secs(60));
    produce(&cfg.kafka.input_topic, &messages);

    let resolved = cfg.resolved();
    for (id, arms) in [("clicks", &clicks_arms[..]), ("watch", &watch_arms[..])] {
        let spec = resolved.iter().find(|r| r.id == id).unwrap().spec.clone();
        let core = direct(spec, arms, &messages, id);
        let total: u64 = core.arm_stats().iter().map(|s| s.pulls_total).sum();
        let first = latest_weights(&cfg.kafka.weights_topic, id, 1, total);
        // A heartbeat after the stream went quiet is computed for a batch of one impression.
        let msg = latest_weights(&cfg.kafka.weights_topic, id, first["version"].as_u64().unwrap() + 2, total);
        let want = core.weights(0, 1);
        for (j, arm) in core.arm_names().iter().enumerate() {
            let a = &msg["arms"][arm];
            assert_eq!(a["pulls"].as_u64().unwrap(), core.arm_stats()[j].pulls_total, "{id}/{arm} pulls");
            assert_eq!(a["reward"].as_f64().unwrap(), core.arm_stats()[j].reward_total, "{id}/{arm} reward");
            let w = msg["weights"][arm].as_f64().unwrap();
            // Thompson's probability of best is computed to well within its ±0.002 contract and
            // both sides run the same deterministic code, so they agree to rounding.
            assert!((w - want[j]).abs() < 1e-9, "{id}/{arm}: published {w}, core {}", want[j]);
        }
        let scrape = sidecar.get("/metrics").1;
        for (j, arm) in core.arm_names().iter().enumerate() {
            let labels = [("experiment", id), ("arm", arm.as_str())];
            assert_eq!(metric(&scrape, "apportion_arm_pulls_total", &labels), Some(core.arm_stats()[j].pulls_total as f64));
            assert_eq!(metric(&scrape, "apportion_arm_reward_total", &labels), Some(core.arm_stats()[j].reward_total));
        }
    }
    sidecar.stop();
}

#[test]
fn malformed_messages_are_dead_lettered_with_their_reason_and_the_stream_goes_on() {
    if no_broker() {
        return;
    }
    let mut cfg = config("malformed", 3);
    cfg.defaults.auto_create = false;
    cfg.limits.arms_per_experiment = 3;
    cfg.experiments = vec![declare("ctr", &[], PolicyName::Thompson, RewardModel::Bernoulli, 0.0)];
    let now = apportion::clock::now_ms();
    let bad: Vec<(&str, String)> = vec![
        ("not-json", "this is not json".into()),
        ("not-object", "[1,2,3]".into()),
        ("missing-field", r#"{"event_id":"m1","kind":"impression","experiment":"ctr"}"#.into()),
        ("wrong-type", format!(r#"{{"event_id":"m2","kind":"impression","experiment":"ctr","arm":"a","ts_ms":"{now}"}}"#)),
        ("unknown-kind", format!(r#"{{"event_id":"m3","kind":"click","experiment":"ctr","arm":"a","ts_ms":{now}}}"#)),
        ("bad-name", format!(r#"{{"event_id":"m4","kind":"impression","experiment":"ctr","arm":"a b","ts_ms":{now}}}"#)),
        ("reward-out-of-range", format!(r#"{{"event_id":"m5","kind":"reward","experiment":"ctr","arm":"a","ts_ms":{now},"reward":2.5}}"#)),
        ("zero-count", format!(r#"{{"event_id":"m6","kind":"impression","experiment":"ctr","arm":"a","ts_ms":{now},"count":0}}"#)),
        ("future-time", format!(r#"{{"event_id":"m7","kind":"impression","experiment":"ctr","arm":"a","ts_ms":{}}}"#, now + 86_400_000)),
        ("unknown-experiment", format!(r#"{{"event_id":"m8","kind":"impression","experiment":"nobody","arm":"a","ts_ms":{now}}}"#)),
        ("too-many-arms", format!(r#"{{"event_id":"m9","kind":"impression","experiment":"ctr","arm":"d","ts_ms":{now}}}"#)),
    ];
    let mut messages = Vec::new();
    let mut good = 0u64;
    for (i, (_, b)) in bad.iter().enumerate() {
        for arm in ["a", "b", "c"] {
            messages.push(("ctr".to_string(), impression(&format!("g{i}{arm}"), "ctr", arm, now).into_bytes()));
            good += 1;
        }
        messages.push(("ctr".to_string(), b.clone().into_bytes()));
    }
    let sidecar = Sidecar::start(cfg.clone());
    sidecar.wait_ready(Duration::from_secs(60));
    produce(&cfg.kafka.input_topic, &messages);
    let dead = read_topic(&cfg.kafka.dead_letter_topic, Duration::from_secs(60), |m| m.len() >= bad.len());
    let mut by_payload: HashMap<Vec<u8>, String> = HashMap::new();
    for m in &dead {
        let headers = m.headers().expect("dead letters carry headers");
        let get = |name: &str| {
            headers
                .iter()
                .find(|h| h.key == name)
                .and_then(|h| h.value)
                .map(|v| String::from_utf8_lossy(v).to_string())
                .unwrap_or_default()
        };
        assert!(get("apportion-source").starts_with(&format!("{}/", cfg.kafka.input_topic)));
        by_payload.insert(m.payload().unwrap_or_default().to_vec(), get("apportion-reason"));
    }
    for (reason, payload) in &bad {
        assert_eq!(by_payload.get(payload.as_bytes()).map(String::as_str), Some(*reason), "{payload}");
    }
    assert_eq!(dead.len(), bad.len());
    let ok = wait_until(Duration::from_secs(30), || {
        let s = sidecar.get("/metrics").1;
        metric(&s, "apportion_events_total", &[("kind", "impression"), ("outcome", "applied")]) == Some(good as f64)
    });
    assert!(ok, "every good event applied");
    let scrape = sidecar.get("/metrics").1;
    for (reason, _) in &bad {
        assert_eq!(metric(&scrape, "apportion_dead_letters_total", &[("reason", reason)]), Some(1.0), "{reason}");
    }
    sidecar.stop();
}

#[test]
fn duplicates_are_applied_once_and_counted() {
    if no_broker() {
        return;
    }
    let cfg = config("dupes", 2);
    let mut messages = Vec::new();
    for i in 0..50 {
        let m = impression(&format!("e{i}"), "dup-exp", "a", T0 + i).into_bytes();
        messages.push(("dup-exp".to_string(), m.clone()));
        if i % 5 == 0 {
            messages.push(("dup-exp".to_string(), m));
        }
    }
    let sidecar = Sidecar::start(cfg.clone());
    sidecar.wait_ready(Duration::from_secs(60));
    produce(&cfg.kafka.input_topic, &messages);
    let ok = wait_until(Duration::from_secs(30), || {
        let s = sidecar.get("/metrics").1;
        metric(&s, "apportion_events_total", &[("kind", "impression"), ("outcome", "duplicate")]) == Some(10.0)
            && metric(&s, "apportion_arm_pulls_total", &[("experiment", "dup-exp"), ("arm", "a")]) == Some(50.0)
    });
    assert!(ok, "{}", sidecar.get("/metrics").1);
    sidecar.stop();
}

#[test]
fn every_weights_message_holds_the_contract_invariants() {
    if no_broker() {
        return;
    }
    let mut cfg = config("invariants", 3);
    cfg.defaults.bounds.floor = 0.05;
    let mut messages = Vec::new();
    for (k, exp) in ["inv-a", "inv-b", "inv-c"].iter().enumerate() {
        messages.extend(stream(exp, &[("x", 0.1), ("y", 0.2), ("z", 0.05), ("w", 0.15)], 1.0, 1500, k as u64));
    }
    let sidecar = Sidecar::start(cfg.clone());
    sidecar.wait_ready(Duration::from_secs(60));
    produce(&cfg.kafka.input_topic, &messages);
    let weights = read_topic(&cfg.kafka.weights_topic, Duration::from_secs(60), |ms| {
        let mut done = 0;
        for m in ms {
            let v: Value = serde_json::from_slice(m.payload().unwrap_or_default()).unwrap_or_default();
            if v["arms"].as_object().map_or(0, |a| a.values().map(|x| x["pulls"].as_u64().unwrap_or(0)).sum::<u64>()) == 1500 {
                done += 1;
            }
        }
        done >= 3
    });
    sidecar.stop();
    assert!(!weights.is_empty());
    let mut last_version: BTreeMap<String, u64> = BTreeMap::new();
    for m in &weights {
        let v: Value = serde_json::from_slice(m.payload().unwrap()).expect("weights are JSON");
        let exp = v["experiment"].as_str().unwrap().to_string();
        assert_eq!(m.key(), Some(exp.as_bytes()), "keyed by experiment id");
        let w = v["weights"].as_object().unwrap();
        let arms = v["arms"].as_object().unwrap();
        assert_eq!(w.len(), arms.len(), "every active arm present");
        let sum: f64 = w.values().map(|x| x.as_f64().unwrap()).sum();
        assert!((sum - 1.0).abs() < 1e-9, "{exp}: sum {sum}");
        for x in w.values() {
            let x = x.as_f64().unwrap();
            assert!(x >= 0.05 - 1e-9, "{exp}: floor broken by {x}");
        }
        let version = v["version"].as_u64().unwrap();
        let prev = last_version.insert(exp.clone(), version).unwrap_or(0);
        assert!(version > prev, "{exp}: version {version} after {prev}");
        for key in ["policy", "published_at_ms", "leader", "regret_estimate"] {
            assert!(v.get(key).is_some(), "{key} missing");
        }
    }
}

#[test]
fn metrics_pass_promtool_and_readiness_follows_the_assignment() {
    if no_broker() {
        return;
    }
    let mut dead = config("unready", 1);
    dead.kafka.brokers = format!("127.0.0.1:{}", free_port());
    let unready = Sidecar::start(dead);
    std::thread::sleep(Duration::from_secs(0));
    let seen_503 = wait_until(Duration::from_secs(10), || http_get(&unready.addr, "/readyz").map(|(s, _)| s == 503).unwrap_or(false));
    assert!(seen_503, "503 while no broker answers");
    let still = (0..20).all(|_| {
        std::thread::sleep(Duration::from_millis(100));
        http_get(&unready.addr, "/readyz").map(|(s, _)| s == 503).unwrap_or(false)
    });
    assert!(still, "stays 503 without partitions");
    assert_eq!(unready.get("/healthz").0, 200, "alive all the same");
    unready.stop();

    let cfg = config("scrape", 2);
    let sidecar = Sidecar::start(cfg.clone());
    sidecar.wait_ready(Duration::from_secs(60));
    produce(&cfg.kafka.input_topic, &stream("scrape-exp", &[("a", 0.1), ("b", 0.2)], 1.0, 200, 9));
    wait_until(Duration::from_secs(30), || {
        metric(&sidecar.get("/metrics").1, "apportion_weights_version", &[("experiment", "scrape-exp")]).is_some()
    });
    let scrape = sidecar.get("/metrics").1;
    let experiments: Value = serde_json::from_str(&sidecar.get("/experiments").1).expect("/experiments is JSON");
    assert!(experiments.get("scrape-exp").is_some());
    sidecar.stop();
    for name in [
        "apportion_events_total",
        "apportion_arm_pulls_total",
        "apportion_arm_mean",
        "apportion_arm_confidence_width",
        "apportion_arm_weight_ratio",
        "apportion_arm_undecided",
        "apportion_arm_last_pull_timestamp_seconds",
        "apportion_experiment_regret_estimate",
        "apportion_experiment_exploration_ratio",
        "apportion_weights_version",
        "apportion_weights_published_timestamp_seconds",
        "apportion_publish_latency_seconds_bucket",
        "apportion_build_info",
    ] {
        assert!(scrape.lines().any(|l| l.starts_with(name)), "{name} missing from the scrape");
    }
    let Ok(mut child) = std::process::Command::new("promtool")
        .args(["check", "metrics"])
        .stdin(std::process::Stdio::piped())
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
    else {
        panic!("promtool not found: scripts/test installs Debian's prometheus package");
    };
    use std::io::Write;
    child.stdin.take().unwrap().write_all(scrape.as_bytes()).unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success(), "promtool: {}{}", String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));
}

/// Produces `(partition, key, value)` messages in order and waits until the broker has them.
fn produce_to(topic: &str, messages: &[(i32, &str, Vec<u8>)]) {
    use rdkafka::config::ClientConfig;
    use rdkafka::producer::{BaseProducer, BaseRecord, Producer};
    let p: BaseProducer = ClientConfig::new().set("bootstrap.servers", brokers()).create().expect("producer");
    for (part, key, value) in messages {
        p.send(BaseRecord::to(topic).partition(*part).key(key.as_bytes()).payload(&value[..])).expect("queued");
        p.poll(Duration::ZERO);
    }
    p.flush(Duration::from_secs(30)).expect("all messages delivered");
}

/// Arms join only on evidence, experiments only by a valid impression: refused rewards for a
/// new arm, for an arm never shown, and for an experiment on a partition that does not hold it
/// leave nothing in the state, the snapshots or the weights but their counters and dead letters.
#[test]
fn refused_events_leave_no_arm_and_no_experiment_behind() {
    if no_broker() {
        return;
    }
    let cfg = config("evidence", 2);
    let now = apportion::clock::now_ms();
    let mut messages: Vec<(i32, &str, Vec<u8>)> = Vec::new();
    let mut rng = StdRng::seed_from_u64(12);
    let mut valid = 0u64;
    let mut good = |messages: &mut Vec<(i32, &str, Vec<u8>)>, round: usize| {
        for i in 0..300 {
            let arm = ["a", "b", "c"][i % 3];
            messages.push((1, "m", impression(&format!("i{round}-{i}"), "m", arm, now).into_bytes()));
            if rng.gen::<f64>() < 0.2 {
                messages.push((1, "m", reward(&format!("r{round}-{i}"), "m", arm, now, 1.0).into_bytes()));
                valid += 1;
            }
            valid += 1;
        }
    };
    good(&mut messages, 0);
    messages.push((1, "m", reward("bad-1", "m", "ghost", now, 5.0).into_bytes()));
    messages.push((1, "m", reward("bad-2", "m", "ghost2", now, 1.0).into_bytes()));
    messages.push((0, "m", reward("bad-3", "m", "a", now, 5.0).into_bytes()));
    messages.push((0, "m", reward("bad-4", "m", "a", now, 1.0).into_bytes()));
    messages.push((0, "never-seen", reward("bad-5", "never-seen", "x", now, 1.0).into_bytes()));
    good(&mut messages, 1);
    let sidecar = Sidecar::start(cfg.clone());
    sidecar.wait_ready(Duration::from_secs(60));
    produce_to(&cfg.kafka.input_topic, &messages);
    let caught_up = wait_until(Duration::from_secs(60), || {
        let s = sidecar.get("/metrics").1;
        applied_events(&s) == valid as f64 && metric(&s, "apportion_dead_letters_total", &[("reason", "unknown-arm")]) == Some(3.0)
    });
    assert!(caught_up, "every valid event applied and the refused ones dead-lettered");
    let scrape = sidecar.get("/metrics").1;
    assert_eq!(metric(&scrape, "apportion_dead_letters_total", &[("reason", "reward-out-of-range")]), Some(2.0));
    assert_eq!(metric(&scrape, "apportion_unmatched_rewards_total", &[("experiment", "m")]), Some(2.0));
    assert_eq!(metric(&scrape, "apportion_unmatched_rewards_total", &[("experiment", "never-seen")]), None, "no series for a made-up experiment");
    let shown: Value = serde_json::from_str(&sidecar.get("/experiments").1).expect("/experiments JSON");
    let exps: Vec<&String> = shown.as_object().expect("an object").keys().collect();
    assert_eq!(exps, ["m"], "no experiment created by a refused event");
    let arms: Vec<&String> = shown["m"]["arms"].as_object().expect("arms").keys().collect();
    assert_eq!(arms, ["a", "b", "c"], "no arm created by a refused event");
    sidecar.stop();

    // The snapshot of partition 0, which saw only refused events, holds no experiment.
    let state = read_topic(&cfg.kafka.state_topic, Duration::from_secs(10), |_| false);
    let mut experiments_of: BTreeMap<i32, Vec<String>> = BTreeMap::new();
    for m in &state {
        if let Ok(apportion::stream::snapshot::Stored::Whole(s)) = apportion::stream::snapshot::Stored::decode(m.payload().unwrap_or_default()) {
            experiments_of.insert(s.partition, s.experiments.keys().cloned().collect());
        }
    }
    assert_eq!(experiments_of.get(&0), Some(&Vec::new()), "partition 0 keeps no copy of m");
    assert_eq!(experiments_of.get(&1), Some(&vec!["m".to_string()]));

    // After a restart, m is published by one copy, with its three arms only.
    let sidecar = Sidecar::start(cfg.clone());
    sidecar.wait_ready(Duration::from_secs(60));
    produce_to(&cfg.kafka.input_topic, &[(1, "m", impression("after-restart", "m", "a", now).into_bytes())]);
    let weights = read_topic(&cfg.kafka.weights_topic, Duration::from_secs(30), |ms| {
        ms.iter().any(|m| serde_json::from_slice::<Value>(m.payload().unwrap_or_default()).is_ok_and(|v| v["arms"]["a"]["pulls"].as_u64() > Some(200)))
            && ms.len() >= 2
    });
    sidecar.stop();
    let mut last = 0;
    for m in &weights {
        let v: Value = serde_json::from_slice(m.payload().unwrap_or_default()).expect("weights JSON");
        let arms: Vec<&String> = v["weights"].as_object().expect("weights").keys().collect();
        assert_eq!(arms, ["a", "b", "c"], "{v}");
        let version = v["version"].as_u64().unwrap_or(0);
        assert!(version > last, "version {version} after {last}");
        last = version;
    }
    assert!(last > 0, "weights were published");
}
