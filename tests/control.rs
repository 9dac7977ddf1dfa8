//! Experiments changed while the sidecars run, against the real broker: definitions, freezing,
//! concluding, retiring, refused records, hand-overs, idle retirement, and `apportion
//! experiment` doing each of these as people would.

mod common;

use std::collections::BTreeMap;
use std::path::Path;
use std::time::{Duration, Instant};

use common::*;
use rdkafka::message::{Message, OwnedMessage};

/// The scenarios run one at a time: each drives sidecar processes on a 2-core machine.
static ONE_AT_A_TIME: std::sync::Mutex<()> = std::sync::Mutex::new(());

fn exclusive() -> std::sync::MutexGuard<'static, ()> {
    ONE_AT_A_TIME.lock().unwrap_or_else(|poisoned| poisoned.into_inner())
}

/// `apportion experiment ARGS --config FILE`: (exit code, stdout, stderr).
fn cli(config: &Path, args: &[&str]) -> (i32, String, String) {
    let out = binary().arg("experiment").args(args).arg("--config").arg(config).output().expect("the binary runs");
    (out.status.code().unwrap_or(-1), String::from_utf8_lossy(&out.stdout).into_owned(), String::from_utf8_lossy(&out.stderr).into_owned())
}

/// Runs `cli` and fails the test with its output unless it exits 0; returns stdout.
fn cli_ok(config: &Path, args: &[&str]) -> String {
    let (code, out, err) = cli(config, args);
    assert_eq!(code, 0, "apportion experiment {args:?}: stdout {out:?}, stderr {err:?}");
    out
}

/// A definition file in a folder of its own.
fn definition_file(name: &str, text: &str) -> std::path::PathBuf {
    let dir = std::env::temp_dir().join(unique("apportion-def"));
    std::fs::create_dir_all(&dir).expect("temp folder");
    let path = dir.join(name);
    std::fs::write(&path, text).expect("definition written");
    path
}

/// The weights messages of `experiment`, in topic order; `None` for a tombstone.
fn weights_of(msgs: &[OwnedMessage], experiment: &str) -> Vec<Option<serde_json::Value>> {
    msgs.iter()
        .filter(|m| m.key() == Some(experiment.as_bytes()))
        .map(|m| m.payload().map(|p| serde_json::from_slice(p).expect("weights JSON")))
        .collect()
}

/// The raw text of a weights message's `weights` object, for comparing byte for byte.
fn raw_weights(m: &OwnedMessage) -> String {
    let text = String::from_utf8_lossy(m.payload().unwrap_or_default()).into_owned();
    let start = text.find("\"weights\":").expect("weights field");
    let end = text[start..].find('}').expect("end of weights") + start;
    text[start..=end].to_string()
}

/// Waits until the weights topic holds a message of `experiment` that `want` accepts.
fn wait_for_weights(topic: &str, experiment: &str, within: Duration, want: impl Fn(&serde_json::Value) -> bool) -> serde_json::Value {
    let mut found = None;
    read_topic(topic, within, |msgs| {
        found = msgs
            .iter()
            .filter(|m| m.key() == Some(experiment.as_bytes()))
            .filter_map(|m| serde_json::from_slice::<serde_json::Value>(m.payload()?).ok())
            .filter(|v| want(v))
            .last();
        found.is_some()
    });
    found.unwrap_or_else(|| panic!("no weights message of {experiment} as wanted within {within:?}; messages: {:?}", weights_of(&read_whole_topic(topic, Duration::from_secs(30)), experiment)))
}

fn control_records(s: &SidecarProcess, outcome: &str) -> f64 {
    metric(&s.get("/metrics").1, "apportion_control_records_total", &[("outcome", outcome)]).unwrap_or(-1.0)
}

/// `n` impressions of each arm in `arms` and, for arm i, a reward on every `every[i]`-th.
fn traffic(prefix: &str, experiment: &str, arms: &[&str], n: usize, every: &[usize]) -> Vec<(String, Vec<u8>)> {
    let ts = apportion::clock::now_ms();
    let mut out = Vec::new();
    for i in 0..n {
        for (j, arm) in arms.iter().enumerate() {
            out.push((experiment.to_string(), impression(&format!("{prefix}-i-{arm}-{i}"), experiment, arm, ts).into_bytes()));
            if i % every[j] == 0 {
                out.push((experiment.to_string(), reward(&format!("{prefix}-r-{arm}-{i}"), experiment, arm, ts, 1.0).into_bytes()));
            }
        }
    }
    out
}

/// One sidecar process on a single-partition input topic of its own, with `extra` TOML, ready.
fn one_sidecar(name: &str, extra: &str) -> (ProcConfig, SidecarProcess) {
    let mut cfg = ProcConfig::new(name, &brokers(), 1);
    cfg.extra = extra.to_string();
    let mut sidecar = cfg.start(cfg.port);
    sidecar.assert_ready(Duration::from_secs(60));
    (cfg, sidecar)
}

#[test]
fn a_definition_written_while_the_sidecar_runs_publishes_its_declared_arms_only() {
    if no_broker() {
        return;
    }
    let _one = exclusive();
    let (cfg, mut sidecar) = one_sidecar("define", "");
    let file = definition_file(
        "launch.toml",
        "experiment = \"launch-x\"\narms = [\"warm\", \"cool\"]\naccept_new_arms = false\nnote = \"ignored: --note wins\"\n[bounds]\nfloor = 0.1\n",
    );
    let out = cli_ok(&sidecar.config_path(), &["define", file.to_str().expect("path"), "--by", "ana", "--note", "launch"]);
    assert!(out.starts_with("launch-x: learning, revision 1 (by ana)"), "{out}");
    assert!(wait_until(Duration::from_secs(30), || control_records(&sidecar, "applied") == 1.0), "the sidecar read the definition");
    let started = Instant::now();
    produce(&cfg.topic("events"), &traffic("d", "launch-x", &["warm", "cool", "mono"], 20, &[2, 4, 100]));
    let w = wait_for_weights(&cfg.topic("weights"), "launch-x", Duration::from_secs(30), |_| true);
    eprintln!("first weights of the defined experiment {:?} after its events were written", started.elapsed());
    let arms: Vec<&String> = w["weights"].as_object().expect("weights").keys().collect();
    assert_eq!(arms, ["cool", "warm"], "the declared arms only: {w}");
    assert_eq!((w["state"].as_str(), w["revision"].as_u64()), (Some("learning"), Some(1)));
    let dead = || dead_letters_by_reason(&cfg.topic("dead-letter")).get("unknown-arm").copied().unwrap_or(0);
    // Its 20 impressions, and its one reward (for an arm with no impressions).
    assert!(wait_until(Duration::from_secs(30), || dead() == 21), "every event of the undeclared arm dead-lettered: {}", dead());
    let experiments: serde_json::Value = serde_json::from_str(&sidecar.get("/experiments").1).expect("JSON");
    let e = &experiments["launch-x"];
    assert_eq!((e["revision"].as_u64(), e["changed_by"].as_str(), e["note"].as_str(), e["state"].as_str()), (Some(1), Some("ana"), Some("launch"), Some("learning")));
    assert!(e["arms"].get("mono").is_none(), "a refused arm leaves no trace: {e}");
    assert_eq!(e["arms"]["warm"]["pulls"], 20);
    assert!(sidecar.stop());
}

#[test]
fn freezing_holds_the_weights_byte_for_byte_while_statistics_count_and_resuming_lets_the_policy_move_them() {
    if no_broker() {
        return;
    }
    let _one = exclusive();
    let (cfg, mut sidecar) = one_sidecar("freeze", "\n[[experiments]]\nid = \"hold\"\narms = [\"a\", \"b\", \"c\"]\n");
    let (events, weights, config) = (cfg.topic("events"), cfg.topic("weights"), sidecar.config_path());
    produce(&events, &traffic("warm", "hold", &["a", "b", "c"], 300, &[2, 5, 9]));
    wait_for_weights(&weights, "hold", Duration::from_secs(30), |v| v["arms"]["a"]["pulls"] == 300);
    let out = cli_ok(&config, &["freeze", "hold", "--by", "sre-on-call", "--note", "incident 4711"]);
    assert!(out.starts_with("hold: frozen, revision 1 (by sre-on-call)"), "{out}");
    wait_for_weights(&weights, "hold", Duration::from_secs(30), |v| v["state"] == "frozen");
    // 10 000 events that favour c: the policy would move, the freeze must not.
    produce(&events, &traffic("flow", "hold", &["a", "b", "c"], 2_500, &[9, 9, 1]));
    let pulls = |s: &SidecarProcess| -> u64 {
        let v: serde_json::Value = serde_json::from_str(&s.get("/experiments").1).unwrap_or_default();
        ["a", "b", "c"].iter().map(|a| v["hold"]["arms"][a]["pulls"].as_u64().unwrap_or(0)).sum()
    };
    assert!(wait_until(Duration::from_secs(60), || pulls(&sidecar) == 3 * 2_800), "statistics keep counting: {}", pulls(&sidecar));
    // The heartbeat (5 s) publishes the frozen weights again after the events.
    let frozen_after = |msgs: &[OwnedMessage]| {
        msgs.iter().filter(|m| m.key() == Some(b"hold")).filter(|m| m.payload().is_some_and(|p| String::from_utf8_lossy(p).contains("\"pulls\":2800"))).count()
    };
    let msgs = read_topic(&weights, Duration::from_secs(30), |msgs| frozen_after(msgs) >= 1);
    let frozen: Vec<&OwnedMessage> =
        msgs.iter().filter(|m| m.key() == Some(b"hold") && String::from_utf8_lossy(m.payload().unwrap_or_default()).contains("\"state\":\"frozen\"")).collect();
    assert!(frozen.len() >= 2 && frozen_after(&msgs) >= 1, "frozen messages before and after the events: {}", frozen.len());
    let held = raw_weights(frozen[0]);
    for m in &frozen {
        assert_eq!(raw_weights(m), held, "weights byte-equal while frozen");
    }
    let listed = cli_ok(&config, &["list"]);
    let row = listed.lines().find(|l| l.starts_with("hold ")).unwrap_or_else(|| panic!("{listed}"));
    let cells: Vec<&str> = row.split_whitespace().collect();
    assert_eq!(&cells[..4], ["hold", "frozen", "1", "a,b,c"], "{listed}");
    assert!(listed.starts_with("EXPERIMENT"), "{listed}");
    let json: serde_json::Value = serde_json::from_str(&cli_ok(&config, &["list", "--json"])).expect("JSON");
    let hold = json.as_array().expect("array").iter().find(|e| e["experiment"] == "hold").expect("hold listed");
    assert_eq!((hold["definition"]["changed_by"].as_str(), hold["definition"]["note"].as_str()), (Some("sre-on-call"), Some("incident 4711")));
    let out = cli_ok(&config, &["resume", "hold"]);
    assert!(out.starts_with("hold: learning, revision 2"), "{out}");
    let resumed = wait_for_weights(&weights, "hold", Duration::from_secs(30), |v| v["state"] == "learning" && v["revision"] == 2);
    let c = resumed["weights"]["c"].as_f64().expect("c");
    let held_c: serde_json::Value = serde_json::from_str(&format!("{{{held}}}")).expect("weights JSON");
    assert!(c > held_c["weights"]["c"].as_f64().expect("held c") + 0.1, "the policy moves traffic to c again: {c} vs {held}");
    assert!(sidecar.stop());
}

/// The newest snapshot of input partition 0 on `state_topic`.
fn latest_snapshot(state_topic: &str, input_topic: &str) -> serde_json::Value {
    let key = format!("{input_topic}/0");
    let msgs = read_whole_topic(state_topic, Duration::from_secs(30));
    let last = msgs.iter().rev().find(|m| m.key() == Some(key.as_bytes())).expect("a snapshot");
    serde_json::from_slice(last.payload().expect("snapshot")).expect("snapshot JSON")
}

#[test]
fn concluding_sends_everything_to_the_winner_and_retiring_says_so_then_removes_the_key() {
    if no_broker() {
        return;
    }
    let _one = exclusive();
    let (cfg, mut sidecar) = one_sidecar("retire", "\n[defaults]\nretire_grace_seconds = 3\n\n[[experiments]]\nid = \"wrap\"\narms = [\"a\", \"b\", \"c\"]\nbounds = { floor = 0.05, pinned = { c = 0.2 } }\n");
    let (events, weights, config) = (cfg.topic("events"), cfg.topic("weights"), sidecar.config_path());
    produce(&events, &traffic("w", "wrap", &["a", "b", "c"], 100, &[3, 2, 4]));
    wait_for_weights(&weights, "wrap", Duration::from_secs(30), |v| v["arms"]["a"]["pulls"] == 100);
    let (code, _, err) = cli(&config, &["conclude", "wrap", "--winner", "gold"]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("experiment \"wrap\" has no arm \"gold\"; its arms: a, b, c"), "{err}");
    let (code, _, err) = cli(&config, &["freeze", "nowhere"]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("no experiment \"nowhere\""), "{err}");
    cli_ok(&config, &["conclude", "wrap", "--winner", "b"]);
    let w = wait_for_weights(&weights, "wrap", Duration::from_secs(30), |v| v["state"] == "concluded");
    assert_eq!(w["weights"], serde_json::json!({"a": 0.0, "b": 0.8, "c": 0.2}), "the pinned arm keeps its share, the floor no longer applies");
    assert_eq!(w["revision"], 1);
    let out = cli_ok(&config, &["retire", "wrap", "--note", "shipped b"]);
    assert!(out.starts_with("wrap: retired, revision 2"), "{out}");
    let msgs = read_topic(&weights, Duration::from_secs(30), |msgs| weights_of(msgs, "wrap").last().is_some_and(|m| m.is_none()));
    let history = weights_of(&msgs, "wrap");
    let n = history.len();
    assert!(n >= 2 && history[n - 1].is_none(), "a tombstone last: {history:?}");
    let last = history[n - 2].as_ref().expect("the retired message before the tombstone");
    assert_eq!((last["state"].as_str(), last["revision"].as_u64()), (Some("retired"), Some(2)));
    let gone = wait_until(Duration::from_secs(10), || !sidecar.get("/metrics").1.contains("experiment=\"wrap\""));
    assert!(gone, "every series of the retired experiment removed");
    produce(&events, &traffic("late", "wrap", &["a"], 3, &[100]));
    let refused = || dead_letters_by_reason(&cfg.topic("dead-letter")).get("retired-experiment").copied().unwrap_or(0);
    assert!(wait_until(Duration::from_secs(30), || refused() == 4), "events of a retired experiment dead-lettered: {}", refused());
    let dropped = wait_until(Duration::from_secs(30), || latest_snapshot(&cfg.topic("state"), &events)["experiments"].get("wrap").is_none());
    assert!(dropped, "gone from snapshots after retire_grace_seconds");
    let listed = cli_ok(&config, &["list"]);
    assert!(listed.lines().any(|l| l.split_whitespace().collect::<Vec<_>>()[..3] == ["wrap", "retired", "2"]), "{listed}");
    // Defined again, it starts afresh, above every version it ever published.
    let retired_version = last["version"].as_u64().expect("version");
    cli_ok(&config, &["resume", "wrap"]);
    assert!(wait_until(Duration::from_secs(30), || control_records(&sidecar, "applied") == 3.0));
    produce(&events, &traffic("again", "wrap", &["a", "b", "c"], 10, &[2, 2, 2]));
    let back = wait_for_weights(&weights, "wrap", Duration::from_secs(30), |v| v["revision"] == 3);
    assert_eq!(back["state"], "learning");
    assert!(back["version"].as_u64().expect("version") > retired_version, "{back} after version {retired_version}");
    assert_eq!(back["arms"]["a"]["pulls"], 10, "its old statistics were dropped with it");
    assert!(sidecar.stop());
}

#[test]
fn stale_and_invalid_control_records_are_refused_and_counted_and_the_stream_goes_on() {
    if no_broker() {
        return;
    }
    let _one = exclusive();
    let (cfg, mut sidecar) = one_sidecar("refuse", "");
    let (events, weights, control) = (cfg.topic("events"), cfg.topic("weights"), cfg.topic("control"));
    let def = |revision: u64, state: &str, more: &str| {
        format!(r#"{{"experiment":"guard","revision":{revision},"state":"{state}","arms":["a","b"]{more}}}"#).into_bytes()
    };
    let key = |k: &str| k.to_string();
    produce(
        &control,
        &[
            (key("guard"), def(2, "learning", r#","note":"in force""#)),
            // Stale: not above revision 2.
            (key("guard"), def(2, "frozen", "")),
            (key("guard"), def(1, "frozen", "")),
            // Invalid, five ways.
            (key("guard"), br#"{"experiment":"guard","revision":3"#.to_vec()),
            (key("other"), def(3, "frozen", "")),
            (key("guard"), def(3, "learning", r#","policy":{"name":"greedy"}"#)),
            (key("guard"), def(3, "learning", r#","bounds":{"floor":0.7}"#)),
            (key("guard"), def(3, "concluded", "")),
        ],
    );
    let counted = wait_until(Duration::from_secs(30), || {
        (control_records(&sidecar, "applied"), control_records(&sidecar, "stale"), control_records(&sidecar, "invalid")) == (1.0, 2.0, 5.0)
    });
    assert!(counted, "applied 1, stale 2, invalid 5: {:?}", ["applied", "stale", "invalid"].map(|o| control_records(&sidecar, o)));
    produce(&events, &traffic("g", "guard", &["a", "b"], 50, &[2, 3]));
    let w = wait_for_weights(&weights, "guard", Duration::from_secs(30), |v| v["arms"]["a"]["pulls"] == 50);
    assert_eq!((w["state"].as_str(), w["revision"].as_u64()), (Some("learning"), Some(2)), "the stale frozen records froze nothing");
    assert_eq!(sidecar.get("/readyz").0, 200);
    let e: serde_json::Value = serde_json::from_str(&sidecar.get("/experiments").1).expect("JSON");
    assert_eq!(e["guard"]["note"], "in force");
    assert!(e.get("other").is_none());
    let log = sidecar.output();
    assert!(log.contains("control record refused") && log.contains("floor = 0.7 cannot hold"), "refusals logged with their reason");
    assert!(sidecar.stop());
}

#[test]
fn two_instances_agree_on_every_definition_through_a_kill_and_a_hand_over() {
    if no_broker() {
        return;
    }
    let _one = exclusive();
    let cfg = ProcConfig::new("agree", &brokers(), 4);
    let (pa, pb) = (free_port(), free_port());
    let mut a = cfg.start(pa);
    a.assert_ready(Duration::from_secs(60));
    let mut b = cfg.start(pb);
    b.assert_ready(Duration::from_secs(60));
    // The command line's own copy of the settings: a's folder goes with a.
    let config = definition_file("apportion.toml", &cfg.toml(pa));
    let (events, weights) = (cfg.topic("events"), cfg.topic("weights"));
    let ids = ["e0", "e1", "e2", "e3", "e4", "e5"];
    let feed = |round: &str| {
        let mut all = Vec::new();
        for id in ids {
            all.extend(traffic(&format!("{round}-{id}"), id, &["a", "b", "c"], 30, &[2, 3, 5]));
        }
        produce(&events, &all);
    };
    feed("r1");
    for id in ids {
        wait_for_weights(&weights, id, Duration::from_secs(60), |_| true);
    }
    cli_ok(&config, &["freeze", "e0"]);
    cli_ok(&config, &["conclude", "e1", "--winner", "a"]);
    let file = definition_file("e2.json", r#"{"experiment":"e2","arms":["a","b"],"bounds":{"floor":0.1}}"#);
    cli_ok(&config, &["define", file.to_str().expect("path")]);
    let both = |n: f64, a: &SidecarProcess, b: &SidecarProcess| wait_until(Duration::from_secs(30), || control_records(a, "applied") == n && control_records(b, "applied") == n);
    assert!(both(3.0, &a, &b), "both instances read the three definitions");
    a.crash();
    cli_ok(&config, &["resume", "e0"]);
    cli_ok(&config, &["freeze", "e3"]);
    feed("r2");
    b.assert_ready(Duration::from_secs(90));
    let mut a = cfg.start(pa);
    a.assert_ready(Duration::from_secs(90));
    assert!(both(5.0, &a, &b), "a restarted reads all five; b followed them live");
    feed("r3");
    let want: BTreeMap<&str, (&str, u64)> =
        [("e0", ("learning", 2)), ("e1", ("concluded", 1)), ("e2", ("learning", 1)), ("e3", ("frozen", 1)), ("e4", ("learning", 0)), ("e5", ("learning", 0))].into();
    let mut seen = BTreeMap::new();
    let agreed = wait_until(Duration::from_secs(60), || {
        seen.clear();
        for s in [&a, &b] {
            let v: serde_json::Value = serde_json::from_str(&s.get("/experiments").1).unwrap_or_default();
            for (id, e) in v.as_object().into_iter().flatten() {
                let pulls: u64 = e["arms"].as_object().into_iter().flatten().map(|(_, x)| x["pulls"].as_u64().unwrap_or(0)).sum();
                seen.insert(id.clone(), (e["state"].as_str().unwrap_or("").to_string(), e["revision"].as_u64().unwrap_or(99), pulls));
            }
        }
        want.iter().all(|(id, (state, rev))| seen.get(*id).is_some_and(|(s, r, p)| s == state && r == rev && *p == 270))
    });
    assert!(agreed, "each experiment held once, in the state in force, with every event: {seen:?}");
    assert!(a.stop() && b.stop());
    let msgs = read_whole_topic(&weights, Duration::from_secs(30));
    for id in ids {
        let history = weights_of(&msgs, id);
        let versions: Vec<u64> = history.iter().flatten().map(|v| v["version"].as_u64().unwrap_or(0)).collect();
        assert!(versions.windows(2).all(|w| w[1] > w[0]), "{id}: versions strictly increase: {versions:?}");
        let last = history.last().and_then(|m| m.as_ref()).expect("a last message");
        assert_eq!((last["state"].as_str().unwrap_or(""), last["revision"].as_u64().unwrap_or(99)), want[id], "{id}: the last message in the state in force");
    }
    let e2 = weights_of(&msgs, "e2");
    let last = e2.last().and_then(|m| m.as_ref()).expect("e2");
    assert!(last["weights"].get("c").is_none(), "the arm the definition dropped is out of the weights: {last}");
}

#[test]
fn an_experiment_created_on_first_sight_retires_when_idle_and_a_declared_one_does_not() {
    if no_broker() {
        return;
    }
    let _one = exclusive();
    let (cfg, mut sidecar) = one_sidecar("idle", "\n[defaults]\nidle_retire_seconds = 2\nretire_grace_seconds = 600\n\n[[experiments]]\nid = \"kept\"\narms = [\"a\", \"b\"]\n");
    let (events, weights) = (cfg.topic("events"), cfg.topic("weights"));
    let mut all = traffic("b", "brief", &["a", "b"], 10, &[2, 3]);
    all.extend(traffic("k", "kept", &["a", "b"], 10, &[2, 3]));
    produce(&events, &all);
    let msgs = read_topic(&weights, Duration::from_secs(30), |msgs| weights_of(msgs, "brief").last().is_some_and(|m| m.is_none()));
    let history = weights_of(&msgs, "brief");
    assert!(history.len() >= 2 && history.last().is_some_and(|m| m.is_none()), "retired, then a tombstone: {history:?}");
    assert_eq!(history[history.len() - 2].as_ref().map(|v| v["state"].clone()), Some(serde_json::json!("retired")));
    let e: serde_json::Value = serde_json::from_str(&sidecar.get("/experiments").1).expect("JSON");
    assert!(e.get("brief").is_none(), "the retired experiment left /experiments");
    assert_eq!(e["kept"]["state"], "learning", "a declared experiment is not retired for being idle");
    assert!(sidecar.stop());
}

#[test]
fn a_settled_experiment_concludes_itself_through_exactly_one_control_record_when_asked_to() {
    if no_broker() {
        return;
    }
    let _one = exclusive();
    // Two experiments with the same clear winner (b: 1 reward in 2 impressions, a: 1 in 10);
    // only "clear" may conclude itself.
    let (cfg, mut sidecar) = one_sidecar(
        "settle",
        "\n[[experiments]]\nid = \"clear\"\narms = [\"a\", \"b\"]\ncontrol_arm = \"a\"\nsettle = { min_pulls = 300, auto_conclude = true }\n\
         \n[[experiments]]\nid = \"asked\"\narms = [\"a\", \"b\"]\nsettle = { min_pulls = 300 }\n",
    );
    let (events, weights) = (cfg.topic("events"), cfg.topic("weights"));
    let settled = |s: &SidecarProcess, e: &str| metric(&s.get("/metrics").1, "apportion_experiment_settled", &[("experiment", e)]);
    for e in ["clear", "asked"] {
        produce(&events, &traffic(&format!("{e}-0"), e, &["a", "b"], 50, &[10, 2]));
        wait_for_weights(&weights, e, Duration::from_secs(30), |v| v["arms"]["b"]["pulls"] == 50);
    }
    assert!(wait_until(Duration::from_secs(10), || settled(&sidecar, "clear") == Some(0.0)), "fewer than min_pulls: not settled");
    let early = wait_for_weights(&weights, "clear", Duration::from_secs(10), |v| v["arms"]["b"]["pulls"] == 50);
    assert_eq!(early["settled"], false, "{early}");
    assert!(early["arms"]["b"]["lift_low"].as_f64().is_some() && early["arms"]["a"].get("lift").is_none(), "lift over the control arm: {early}");
    for e in ["clear", "asked"] {
        produce(&events, &traffic(&format!("{e}-1"), e, &["a", "b"], 600, &[10, 2]));
    }
    let concluded = wait_for_weights(&weights, "clear", Duration::from_secs(60), |v| v["state"] == "concluded");
    assert_eq!(concluded["weights"], serde_json::json!({"a": 0.0, "b": 1.0}), "{concluded}");
    assert_eq!(concluded["revision"], 1);
    assert_eq!(settled(&sidecar, "clear"), Some(1.0));
    assert!(wait_until(Duration::from_secs(30), || settled(&sidecar, "asked") == Some(1.0)), "the other one settles too");
    let asked = wait_for_weights(&weights, "asked", Duration::from_secs(10), |v| v["settled"] == true);
    assert_eq!(asked["state"], "learning", "without auto_conclude a settled experiment keeps learning: {asked}");
    // A few more rounds, then the control topic: one record, by apportion, for "clear" only.
    std::thread::sleep(Duration::from_secs(2));
    let records = read_whole_topic(&cfg.topic("control"), Duration::from_secs(30));
    let defs: Vec<serde_json::Value> = records.iter().filter_map(|m| serde_json::from_slice(m.payload()?).ok()).collect();
    assert_eq!(defs.len(), 1, "exactly one control record: {defs:?}");
    let d = &defs[0];
    assert_eq!((d["experiment"].as_str(), d["state"].as_str(), d["winner"].as_str()), (Some("clear"), Some("concluded"), Some("b")), "{d}");
    assert_eq!((d["changed_by"].as_str(), d["revision"].as_u64()), (Some("apportion"), Some(1)), "{d}");
    assert!(d["note"].as_str().is_some_and(|n| n.starts_with("settled: P(best) ")), "{d}");
    assert_eq!(control_records(&sidecar, "applied"), 1.0);
    let listed: serde_json::Value = serde_json::from_str(&sidecar.get("/experiments").1).expect("JSON");
    assert_eq!(listed["clear"]["changed_by"], "apportion");
    assert_eq!(listed["clear"]["settled"], true);
    assert!(sidecar.stop());
}
