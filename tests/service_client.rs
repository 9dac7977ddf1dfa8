//! The service clients (`clients/rust`, `clients/python`) against the sidecar: the same arm for
//! a unit from either language, and a service loop on the real broker whose every impression
//! the sidecar counts, with propensities and versions intact, falling back when it must.

mod common;

use std::collections::{BTreeMap, HashMap};
use std::process::Command;
use std::time::Duration;

use apportion_client::hash::{arm_seed, choose, unit_key, Racer};
use apportion_client::{Client, ClientConfig, Fallback, Source};
use common::*;
use rdkafka::message::Message;

#[test]
fn the_rust_and_python_clients_give_a_hundred_thousand_units_the_same_arms() {
    let weights = [("a", 0.5), ("b", 0.3), ("c", 0.15), ("d", 0.05)];
    let racers: Vec<Racer> = weights.iter().map(|(a, w)| Racer { seed: arm_seed(a), weight: *w }).collect();
    let n = 100_000;
    let rust: Vec<&str> = (0..n).map(|u| weights[choose(unit_key("thumb-style", &format!("unit-{u}")), &racers).expect("arm")].0).collect();
    let src = concat!(env!("CARGO_MANIFEST_DIR"), "/clients/python/src");
    let script = format!(
        "import sys\nfrom apportion_client.hashing import assign_arm\nw = {{'a': 0.5, 'b': 0.3, 'c': 0.15, 'd': 0.05}}\n\
         sys.stdout.write('\\n'.join(assign_arm('thumb-style', f'unit-{{u}}', w)[0] for u in range({n})))\n"
    );
    let out = Command::new("python3").arg("-c").arg(&script).env("PYTHONPATH", src).output().expect("python3 runs");
    assert!(out.status.success(), "python3 failed: {}", String::from_utf8_lossy(&out.stderr));
    let text = String::from_utf8(out.stdout).expect("UTF-8");
    let python: Vec<&str> = text.lines().collect();
    assert_eq!(python.len(), n);
    let differ: Vec<usize> = (0..n).filter(|&u| rust[u] != python[u]).collect();
    assert!(differ.is_empty(), "{} units differ, first unit-{}: rust {} python {}", differ.len(), differ[0], rust[differ[0]], python[differ[0]]);
}

fn client_config(cfg: &ProcConfig) -> ClientConfig {
    let mut c = ClientConfig::new(&brokers());
    c.weights_topic = cfg.topic("weights");
    c.input_topic = cfg.topic("events");
    c.default_fallback = Some(Fallback::Even(vec!["a".into(), "b".into(), "c".into()]));
    c
}

#[test]
fn a_service_loop_with_the_client_is_counted_exactly_and_falls_back_when_it_must() {
    if no_broker() {
        return;
    }
    let cfg = ProcConfig::new("client", &brokers(), 1);
    let mut sidecar = cfg.start(cfg.port);
    sidecar.assert_ready(Duration::from_secs(60));
    let client = Client::start(client_config(&cfg)).expect("client");
    assert!(client.wait_until_loaded(Duration::from_secs(30)), "the weights topic read to its end");
    // 3 000 impressions of 700 users, a reward for a third of them: the first 300 before any
    // weights (the even fallback), the rest once the sidecar has published.
    let mut per_arm: BTreeMap<String, u64> = BTreeMap::new();
    let mut sent: HashMap<String, (f64, Option<u64>)> = HashMap::new();
    for i in 0..3_000u64 {
        if i == 300 {
            client.flush(Duration::from_secs(10));
            assert!(wait_until(Duration::from_secs(30), || client.held("svc").is_some()), "weights published and read");
        }
        let a = client.assign("svc", &format!("user-{}", i % 700)).expect("an arm");
        let shown = client.impression(&a, None).expect("written");
        *per_arm.entry(a.arm.to_string()).or_default() += 1;
        sent.insert(shown.event_id.clone(), (a.propensity, a.weights_version));
        if i % 3 == 0 {
            client.reward(&shown, 1.0, None).expect("written");
        }
    }
    client.flush(Duration::from_secs(10));
    let counts = client.counts();
    assert_eq!((counts.assignments_fallback, counts.assignments_weights, counts.impressions_written, counts.rewards_written), (300, 2_700, 3_000, 1_000));
    let pulls = || -> BTreeMap<String, u64> {
        let v: serde_json::Value = serde_json::from_str(&sidecar.get("/experiments").1).unwrap_or_default();
        v["svc"]["arms"].as_object().map(|arms| arms.iter().map(|(k, a)| (k.clone(), a["pulls"].as_u64().unwrap_or(0))).collect()).unwrap_or_default()
    };
    assert!(wait_until(Duration::from_secs(30), || pulls().values().sum::<u64>() == 3_000), "the sidecar counted {:?}", pulls());
    assert_eq!(pulls(), per_arm, "the sidecar's pulls per arm are the client's own counts");
    let mut checked = 0;
    scan_topic(&cfg.topic("events"), Duration::from_secs(30), |m| {
        let Some(v) = m.payload().and_then(|p| serde_json::from_slice::<serde_json::Value>(p).ok()) else { return };
        if v["kind"] != "impression" {
            return;
        }
        let (propensity, version) = sent[v["event_id"].as_str().expect("id")];
        assert_eq!(v["propensity"].as_f64(), Some(propensity), "{v}");
        assert_eq!(v["weights_version"].as_u64(), version, "{v}");
        checked += 1;
    });
    assert_eq!(checked, 3_000, "every impression read back");
    // A message with a lower version is ignored.
    let held = client.held("svc").expect("held");
    let before = client.assign("svc", "user-1").expect("arm");
    let regressed = format!(r#"{{"experiment":"svc","version":{},"state":"learning","published_at_ms":{},"weights":{{"zz":1.0}}}}"#, held.version - 1, apportion::clock::now_ms());
    produce(&cfg.topic("weights"), &[("svc".to_string(), regressed.into_bytes())]);
    assert!(wait_until(Duration::from_secs(30), || client.counts().ignored_versions >= 1), "the regressed version seen and ignored");
    assert_eq!(client.assign("svc", "user-1").expect("arm").arm, before.arm);
    // Weights older than max_age are not used: a clock ten minutes ahead.
    let ahead = Client::start_with_clock(client_config(&cfg), Box::new(|| apportion::clock::now_ms() + 600_000)).expect("client");
    assert!(ahead.wait_until_loaded(Duration::from_secs(30)));
    assert!(wait_until(Duration::from_secs(10), || ahead.held("svc").is_some()));
    let stale = ahead.assign("svc", "user-1").expect("fallback");
    assert_eq!((stale.source, stale.weights_version, stale.propensity), (Source::FallbackStale, None, 1.0 / 3.0));
    // Retired: the fallback answers.
    let out = binary().args(["experiment", "retire", "svc", "--config"]).arg(sidecar.config_path()).output().expect("runs");
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert!(wait_until(Duration::from_secs(30), || client.assign("svc", "user-1").is_ok_and(|a| a.source == Source::FallbackRetired)), "retired → fallback");
    assert!(sidecar.stop());
}
