//! Attribution on the real broker: rewards that name their impression, by id or by time, are
//! credited exactly once across a SIGKILL and a hand-over, late ones are counted and not
//! applied, and every figure matches a direct computation from the events.

mod common;

use std::collections::BTreeMap;
use std::time::Duration;

use common::*;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rdkafka::message::Message;

/// The attribution window of the test, ms, and its bucket width (W/16, `core::attribution`).
const WINDOW_MS: i64 = 5_000;
const BUCKET_MS: i64 = (WINDOW_MS + 15) / 16;

/// What the events must leave per (experiment, arm).
#[derive(Clone, Debug, Default, PartialEq)]
struct Want {
    pulls: u64,
    /// Rewards applied: within their window, or naming no impression.
    reward: f64,
    late: u64,
    unattributed: u64,
    /// Impression event times, and the attribution times of applied rewards.
    impressions: Vec<i64>,
    credited: Vec<i64>,
}

/// The messages to send (key, value), what they must leave per (experiment, arm), and each
/// experiment's newest event time.
type Workload = (Vec<(String, Vec<u8>)>, BTreeMap<(String, String), Want>, BTreeMap<String, i64>);

/// An arm's figures as `/experiments` shows them: (pulls, reward, matured pulls, pending
/// pulls, mean).
type Figures = (u64, f64, u64, u64, f64);

/// A seeded stream over `experiments` experiments of three arms. Each impression converts with
/// probability 0.3 after a delay uniform in [0, 8 s), so that about 3/8 of the rewards come
/// after the 5 s window. A reward names its impression by id (a third), by time (a third), by
/// both (a fourth), or not at all (the rest); 2 % of events are sent twice. Events are sent in
/// event-time order, as services write them.
fn workload(impressions: usize, experiments: usize, seed: u64) -> Workload {
    let mut rng = StdRng::seed_from_u64(seed);
    let t0 = apportion::clock::now_ms() - 300_000;
    let mut events: Vec<(i64, String, String)> = Vec::new();
    let mut want: BTreeMap<(String, String), Want> = BTreeMap::new();
    for i in 0..impressions {
        let exp = format!("exp-{}", rng.gen_range(0..experiments));
        let arm = format!("arm-{}", rng.gen_range(0..3));
        let ts = t0 + (i as i64) * 10;
        let id = format!("imp-{i}");
        events.push((ts, exp.clone(), format!(r#"{{"event_id":"{id}","kind":"impression","experiment":"{exp}","arm":"{arm}","ts_ms":{ts}}}"#)));
        let w = want.entry((exp.clone(), arm.clone())).or_default();
        w.pulls += 1;
        w.impressions.push(ts);
        if rng.gen::<f64>() >= 0.3 {
            continue;
        }
        let at = ts + rng.gen_range(0..8_000);
        let (by_id, by_time) = match rng.gen_range(0..12) {
            0..=3 => (true, false),
            4..=7 => (false, true),
            8..=10 => (true, true),
            _ => (false, false),
        };
        let mut fields = String::new();
        if by_id {
            fields += &format!(r#","impression_id":"{id}""#);
        }
        if by_time {
            fields += &format!(r#","impression_ts_ms":{ts}"#);
        }
        events.push((at, exp.clone(), format!(r#"{{"event_id":"rew-{i}","kind":"reward","experiment":"{exp}","arm":"{arm}","ts_ms":{at},"reward":1{fields}}}"#)));
        if !(by_id || by_time) {
            w.reward += 1.0;
            w.unattributed += 1;
            w.credited.push(at);
        } else if at - ts > WINDOW_MS {
            w.late += 1;
        } else {
            w.reward += 1.0;
            w.credited.push(ts);
        }
    }
    events.sort_by_key(|e| e.0);
    let mut clocks: BTreeMap<String, i64> = BTreeMap::new();
    let mut out = Vec::with_capacity(events.len() * 51 / 50);
    for (ts, exp, body) in events {
        let c = clocks.entry(exp.clone()).or_insert(ts);
        *c = (*c).max(ts);
        out.push((exp.clone(), body.clone().into_bytes()));
        if rng.gen::<f64>() < 0.02 {
            out.push((exp, body.into_bytes()));
        }
    }
    (out, want, clocks)
}

/// Per (experiment, arm), from both instances' `/experiments`.
fn figures(bodies: &[String]) -> BTreeMap<(String, String), Figures> {
    let mut out = BTreeMap::new();
    for body in bodies {
        let v: serde_json::Value = serde_json::from_str(body).unwrap_or_default();
        for (exp, e) in v.as_object().into_iter().flatten() {
            for (arm, a) in e["arms"].as_object().into_iter().flatten() {
                let n = |k: &str| a[k].as_u64().unwrap_or(0);
                let held = out.insert(
                    (exp.clone(), arm.clone()),
                    (n("pulls"), a["reward"].as_f64().unwrap_or(0.0), n("matured_pulls"), n("pending_pulls"), a["mean"].as_f64().unwrap_or(0.0)),
                );
                assert!(held.is_none(), "{exp}/{arm} held by two instances at once");
            }
        }
    }
    out
}

#[test]
fn rewards_naming_their_impressions_are_credited_once_across_a_kill_and_a_hand_over_and_late_ones_are_counted() {
    if no_broker() {
        return;
    }
    let brokers = brokers();
    let mut cfg = ProcConfig::new("late", &brokers, 4);
    cfg.extra = format!("\n[defaults]\nattribution_window_seconds = {}\n", WINDOW_MS as f64 / 1000.0);
    let (messages, want, clocks) = workload(30_000, 8, 61);
    let sent = messages.len();
    let (pa, pb) = (free_port(), free_port());
    let mut a = cfg.start(pa);
    assert!(a.wait_ready(Duration::from_secs(60)), "a starts");
    let mut b = cfg.start(pb);
    assert!(b.wait_ready(Duration::from_secs(60)), "b starts");
    // Over about 15 s: the kill falls while events still come (the hand-over back to a, once
    // it is ready again, usually after the last of them).
    let producer = stream_in_background(brokers.clone(), cfg.topic("events"), messages, 15.0);
    let applied_by = |s: &SidecarProcess| applied_events(&s.get("/metrics").1) + metric(&s.get("/metrics").1, "apportion_events_total", &[("kind", "reward"), ("outcome", "late")]).unwrap_or(0.0);
    wait_until(Duration::from_secs(60), || producer.is_finished() || applied_by(&a) + applied_by(&b) >= sent as f64 / 3.0);
    println!("killing a; the stream is {}", if producer.is_finished() { "over" } else { "still coming" });
    a.crash();
    wait_until(Duration::from_secs(120), || producer.is_finished() || applied_by(&b) >= sent as f64 / 2.0);
    // A comes back while b stays: b hands partitions over to it.
    let mut a = cfg.start(pa);
    assert!(a.wait_ready(Duration::from_secs(330)), "a restarts");
    println!("a is back; the stream is {}", if producer.is_finished() { "over" } else { "still coming" });
    producer.join().expect("producer");

    let total_pulls: u64 = want.values().map(|w| w.pulls).sum();
    let mut last = BTreeMap::new();
    let done = wait_until(Duration::from_secs(240), || {
        last = figures(&[a.get("/experiments").1, b.get("/experiments").1]);
        last.values().map(|f| f.0).sum::<u64>() == total_pulls && want.iter().all(|(k, w)| last.get(k).is_some_and(|f| f.1 == w.reward))
    });
    assert!(done, "not caught up: {} of {total_pulls} pulls", last.values().map(|f| f.0).sum::<u64>());
    for ((exp, arm), w) in &want {
        let (pulls, reward, matured, pending, mean) = last[&(exp.clone(), arm.clone())];
        assert_eq!((pulls, reward), (w.pulls, w.reward), "{exp}/{arm}: (pulls, reward applied)");
        // The clock is the experiment's newest event time; bucket k has matured once
        // (k + 1)·width + W ≤ clock (core::attribution).
        let below = (clocks[exp] - WINDOW_MS).div_euclid(BUCKET_MS);
        let matured_pulls = w.impressions.iter().filter(|&&t| t.div_euclid(BUCKET_MS) < below).count() as u64;
        let matured_reward = w.credited.iter().filter(|&&t| t.div_euclid(BUCKET_MS) < below).count() as f64;
        assert_eq!((matured, pending), (matured_pulls, w.pulls - matured_pulls), "{exp}/{arm}: (matured, pending) pulls");
        let direct = (matured_reward / matured_pulls as f64).min(1.0);
        assert!((mean - direct).abs() < 1e-9, "{exp}/{arm}: mean {mean}, direct {direct}");
    }
    let scrapes = [a.get("/metrics").1, b.get("/metrics").1];
    let sum = |name: &str| scrapes.iter().map(|s| metric_sum(s, name)).sum::<f64>() as u64;
    let late: u64 = want.values().map(|w| w.late).sum();
    let unattributed: u64 = want.values().map(|w| w.unattributed).sum();
    println!("late rewards {late}, unattributed {unattributed}, {sent} messages sent");
    assert_eq!(sum("apportion_late_rewards_total"), late, "late rewards counted once each");
    assert_eq!(sum("apportion_unattributed_rewards_total"), unattributed, "rewards naming no impression");
    assert!(late > 1_000 && unattributed > 100, "the workload exercises both: {late} late, {unattributed} unattributed");
    // The weights message says the same split.
    let msgs = read_whole_topic(&cfg.topic("weights"), Duration::from_secs(20));
    let newest = msgs.iter().rev().find_map(|m| serde_json::from_slice::<serde_json::Value>(m.payload()?).ok()).expect("a weights message");
    for arm in newest["arms"].as_object().expect("arms").values() {
        let n = |k: &str| arm[k].as_u64().unwrap_or(u64::MAX);
        assert_eq!(n("matured_pulls") + n("pending_pulls"), n("pulls"), "{newest}");
    }
    assert!(a.stop() && b.stop(), "clean shutdowns");
}
