//! Hostile streams against the sidecar's limits: a flood of new experiments and arms past
//! every limit, and values legal but at the edges of their types. The sidecar runs as a child
//! process of its own binary, so that its memory and its output are its own.

mod common;

use std::collections::BTreeMap;
use std::time::{Duration, Instant};

use common::*;
use serde_json::Value;

/// One million events against limits of 1 000 experiments and 8 arms per experiment: 900 000
/// events of 900 000 distinct experiments and 100 000 events of distinct arms of four
/// experiments, in one stream. Every event beyond a limit is dead-lettered and counted, the
/// sidecar stays alive and its memory stays bounded by its limits, not by the flood.
#[test]
fn a_flood_of_new_experiments_and_arms_is_dead_lettered_within_bounded_memory() {
    if no_broker() {
        return;
    }
    const EVENTS: usize = 1_000_000;
    const ARM_FLOOD: usize = 100_000;
    const ARM_EXPERIMENTS: usize = 4;
    const MAX_EXPERIMENTS: usize = 1_000;
    const MAX_ARMS: usize = 8;
    // Peak resident memory allowed to the sidecar, from its structure (librdkafka 2.12
    // defaults from its CONFIGURATION.md, sizes of our own structures estimated from the code):
    //   consumer prefetch    queued.max.messages.kbytes = 64 MiB, plus per-message bookkeeping
    //                        of up to queued.min.messages = 100 000 messages (~40 MB)
    //   producer queue       queue.buffering.max.messages = 100 000 dead letters of ~150 B with
    //                        their headers and librdkafka's per-message overhead (~60 MB)
    //   experiments          1 000 × 8 arms: statistics, ~7 metric series per arm and the
    //                        /experiments JSON (~30 MB)
    //   duplicate windows    3 partitions × up to 20 000 hashes (< 1 MB); snapshots (< 2 MB)
    //   runtime, threads, binary (~40 MB)
    // ≈ 240 MB; the bound leaves 25 % on top. Memory that grew with the number of distinct
    // experiments or arms offered (900 000 and 100 000 here) would break it by far.
    const BOUND_KB: u64 = 300 * 1024;

    let names = ProcConfig::new("flood", &brokers(), 3);
    let toml = names.bare_toml(
        names.port,
        &format!(
            "[limits]\nexperiments = {MAX_EXPERIMENTS}\narms_per_experiment = {MAX_ARMS}\nduplicate_window = 10000\n\n\
             [publish]\ninterval_seconds = 1\n\n[snapshot]\ninterval_seconds = 5\n\n[log]\nlevel = \"warn\"\n"
        ),
    );
    let mut sidecar = SidecarProcess::start(&toml, names.port, &[]);
    sidecar.assert_ready(Duration::from_secs(120));
    let (start_hwm, _) = sidecar.memory_kb();
    let input = names.topic("events");
    let now = apportion::clock::now_ms();
    let started = Instant::now();

    // The four experiments that get the arm flood are created first, so that exactly which
    // experiments fit under the limit does not depend on how partitions interleave.
    let seeds: Vec<(String, Vec<u8>)> = (0..ARM_EXPERIMENTS)
        .map(|k| (format!("arms-{k}"), impression(&format!("arms-{k}-0"), &format!("arms-{k}"), "arm-0", now).into_bytes()))
        .collect();
    produce(&input, &seeds);
    let seeded = wait_until(Duration::from_secs(60), || {
        metric(&sidecar.get("/metrics").1, "apportion_events_total", &[("kind", "impression"), ("outcome", "applied")])
            == Some(ARM_EXPERIMENTS as f64)
    });
    assert!(seeded, "the four arm-flood experiments were not created");

    // The rest: every tenth event a new arm of one of the four, the others new experiments.
    let rest = EVENTS - ARM_EXPERIMENTS;
    let mut arm_next = [1usize; ARM_EXPERIMENTS];
    let mut arm_events = ARM_EXPERIMENTS;
    let mut exp_next = 0usize;
    produce_batched(&input, rest, |i| {
        if i % 10 == 0 && arm_events < ARM_FLOOD {
            let k = (i / 10) % ARM_EXPERIMENTS;
            let (exp, arm) = (format!("arms-{k}"), format!("arm-{}", arm_next[k]));
            arm_next[k] += 1;
            arm_events += 1;
            (exp.clone(), impression(&format!("{exp}-{arm}"), &exp, &arm, now))
        } else {
            let exp = format!("exp-{exp_next}");
            exp_next += 1;
            (exp.clone(), impression(&format!("{exp}-0"), &exp, "a", now))
        }
    });
    assert_eq!((arm_events, exp_next), (ARM_FLOOD, EVENTS - ARM_FLOOD), "the stream is as described");
    let produced_in = started.elapsed();

    // Expected outcomes, from the configured limits: each of the four keeps its first 8 arms;
    // of the 900 000 new experiments, the first 996 fill the limit of 1 000.
    let applied = ARM_EXPERIMENTS * MAX_ARMS + (MAX_EXPERIMENTS - ARM_EXPERIMENTS);
    let too_many_arms = ARM_FLOOD - ARM_EXPERIMENTS * MAX_ARMS;
    let too_many_experiments = (EVENTS - ARM_FLOOD) - (MAX_EXPERIMENTS - ARM_EXPERIMENTS);
    let deadline = started + Duration::from_secs(600);
    let mut peak_rss = 0;
    let mut seen = 0.0;
    while Instant::now() < deadline {
        let (_, rss) = sidecar.memory_kb();
        peak_rss = peak_rss.max(rss);
        seen = metric_sum(&sidecar.get("/metrics").1, "apportion_events_total");
        if seen >= EVENTS as f64 || !sidecar.alive() {
            break;
        }
        std::thread::sleep(Duration::from_secs(1));
    }
    let drained_in = started.elapsed();
    assert!(sidecar.alive(), "the sidecar died under the flood; output:\n{}", sidecar.output());
    assert_eq!(seen, EVENTS as f64, "events counted after {drained_in:?}");
    let (hwm, _) = sidecar.memory_kb();
    let scrape = sidecar.get("/metrics").1;
    let dead = |reason: &str| metric(&scrape, "apportion_dead_letters_total", &[("reason", reason)]).unwrap_or(0.0);
    eprintln!(
        "flood: {EVENTS} events produced in {produced_in:?}, all counted after {drained_in:?}; applied {:?}, \
         too-many-experiments {}, too-many-arms {}; sidecar VmHWM {start_hwm} kB when ready, {hwm} kB after, \
         largest VmRSS sampled {peak_rss} kB (bound {BOUND_KB} kB)",
        metric(&scrape, "apportion_events_total", &[("kind", "impression"), ("outcome", "applied")]),
        dead("too-many-experiments"),
        dead("too-many-arms"),
    );
    assert_eq!(metric(&scrape, "apportion_events_total", &[("kind", "impression"), ("outcome", "applied")]), Some(applied as f64));
    assert_eq!(dead("too-many-experiments"), too_many_experiments as f64);
    assert_eq!(dead("too-many-arms"), too_many_arms as f64);
    assert_eq!(metric_sum(&scrape, "apportion_dead_letters_total"), (too_many_arms + too_many_experiments) as f64);
    assert_eq!(sidecar.get("/healthz").0, 200, "alive after the flood");
    let experiments: Value = serde_json::from_str(&sidecar.get("/experiments").1).expect("/experiments is JSON");
    assert_eq!(experiments.as_object().map(|o| o.len()), Some(MAX_EXPERIMENTS), "experiments held");
    for k in 0..ARM_EXPERIMENTS {
        let arms = experiments[format!("arms-{k}")]["arms"].as_object().map(|a| a.len());
        assert_eq!(arms, Some(MAX_ARMS), "arms of arms-{k}");
    }
    assert!(hwm > 0, "no VmHWM read from /proc/{}/status", sidecar.child.id());
    assert!(hwm <= BOUND_KB, "peak resident memory {hwm} kB over the bound of {BOUND_KB} kB");
    assert!(sidecar.stop(), "clean exit on SIGTERM; output:\n{}", sidecar.output());
    let on_topic = dead_letters_by_reason(&names.topic("dead-letter"));
    let want: BTreeMap<String, u64> =
        [("too-many-arms".to_string(), too_many_arms as u64), ("too-many-experiments".to_string(), too_many_experiments as u64)].into();
    assert_eq!(on_topic, want, "dead letters on the topic; the sidecar's complaints:\n{}", sidecar.complaints());
    eprintln!("flood: stopped and dead-letter topic read back ({on_topic:?}); {:?} in all", started.elapsed());
}

/// Events whose values are legal but extreme must not stop the stream: the decoder accepts
/// them (see the corpus), so whatever the pipeline does with them, it must go on.
fn survives(name: &str, sections: &str, hostile: &[String]) {
    let names = ProcConfig::new(name, &brokers(), 1);
    let mut sidecar = SidecarProcess::start(&names.bare_toml(names.port, sections), names.port, &[]);
    sidecar.assert_ready(Duration::from_secs(120));
    let now = apportion::clock::now_ms();
    let mut messages: Vec<(String, Vec<u8>)> = hostile.iter().map(|m| ("edge".to_string(), m.clone().into_bytes())).collect();
    messages.push(("edge".to_string(), impression("after", "edge", "a", now).into_bytes()));
    produce(&names.topic("events"), &messages);
    let counted = wait_until(Duration::from_secs(60), || {
        !sidecar.alive() || metric_sum(&sidecar.get("/metrics").1, "apportion_events_total") >= messages.len() as f64
    });
    let counted = counted && metric_sum(&sidecar.get("/metrics").1, "apportion_events_total") >= messages.len() as f64;
    let alive = sidecar.alive();
    assert!(
        counted && alive && sidecar.get("/healthz").0 == 200,
        "the stream stopped on {hostile:?} (counted {counted}, alive {alive}); output:\n{}",
        sidecar.output()
    );
    let served = wait_until(Duration::from_secs(30), || {
        serde_json::from_str::<Value>(&sidecar.get("/experiments").1).is_ok_and(|v| v.get("edge").is_some())
    });
    assert!(served, "the experiment is served: {}", sidecar.get("/experiments").1);
    assert!(sidecar.stop(), "clean exit; output:\n{}", sidecar.output());
}

#[test]
fn impression_counts_that_overflow_the_totals_do_not_stop_the_stream() {
    if no_broker() {
        return;
    }
    let now = apportion::clock::now_ms();
    let big = |id: &str| format!(r#"{{"event_id":"{id}","kind":"impression","experiment":"edge","arm":"a","ts_ms":{now},"count":{}}}"#, u64::MAX);
    survives("overflow", "", &[big("max-1"), big("max-2")]);
}

#[test]
fn event_times_at_the_ends_of_the_range_do_not_stop_a_decaying_experiment() {
    if no_broker() {
        return;
    }
    let now = apportion::clock::now_ms();
    survives(
        "time-range",
        "[defaults]\nhalf_life_seconds = 60\n",
        &[impression("oldest", "edge", "a", i64::MIN), impression("now", "edge", "a", now)],
    );
}
