//! Speed of the pure core: applying events, weights per policy, all weights of a large instance.
//! Run with `cargo bench --bench core`; figures go to BENCHMARKS.md.

use std::hint::black_box;

use apportion::core::{Experiment, ExperimentSpec, Observation, PolicyName, PolicySpec, RewardModel};
use criterion::{criterion_group, criterion_main, BatchSize, Criterion, Throughput};

fn experiment(policy: PolicyName, arms: usize, pulls: u64) -> Experiment {
    let names: Vec<String> = (0..arms).map(|j| format!("arm-{j}")).collect();
    let mut spec = PolicySpec::new(policy);
    if policy == PolicyName::Fixed {
        spec.weights = names.iter().map(|n| (n.clone(), 1.0)).collect();
    }
    let mut e = Experiment::new(ExperimentSpec::new(spec, RewardModel::Bernoulli), &names).unwrap();
    for (j, _) in names.iter().enumerate() {
        e.observe(j, 0, Observation::Impression { count: pulls }).unwrap();
        let rate = 0.03 + 0.002 * j as f64;
        for _ in 0..(rate * pulls as f64) as u64 {
            e.observe(j, 0, Observation::reward(1.0)).unwrap();
        }
    }
    e
}

fn apply(c: &mut Criterion) {
    let mut g = c.benchmark_group("apply");
    const N: u64 = 1_000_000;
    g.throughput(Throughput::Elements(N));
    g.bench_function("impressions_by_arm_name", |b| {
        b.iter_batched(
            || experiment(PolicyName::Thompson, 10, 0),
            |mut e| {
                for i in 0..N {
                    let name = if i % 2 == 0 { "arm-3" } else { "arm-7" };
                    let j = e.arm(name).unwrap();
                    e.observe(j, i as i64, Observation::Impression { count: 1 }).unwrap();
                }
                e
            },
            BatchSize::LargeInput,
        )
    });
    g.finish();
}

/// Decoding the contract's event JSON, as the benchmark topic of `scripts/bench-pipeline` has it.
fn decode(c: &mut Criterion) {
    let mut g = c.benchmark_group("decode");
    let impression = br#"{"event_id":"i-123456","kind":"impression","experiment":"tput-00007","arm":"arm-3","ts_ms":1764547200123,"count":1,"propensity":0.2000}"#;
    let reward = br#"{"event_id":"r-123457","kind":"reward","experiment":"tput-00007","arm":"arm-3","ts_ms":1764547200123,"reward":1.0}"#;
    g.throughput(Throughput::Elements(1));
    for (name, bytes) in [("impression", &impression[..]), ("reward", &reward[..])] {
        g.bench_function(name, |b| b.iter(|| black_box(apportion::event::decode(black_box(bytes), 16_384, 1_764_547_300_000, 300_000).is_ok())));
    }
    // A mix as a topic has it (experiments, arms, id lengths and kinds vary from one event to
    // the next), so that branch prediction cannot learn one event by heart.
    let mixed: Vec<String> = (0..256u64)
        .map(|i| {
            let (exp, arm) = (i * 7 % 12, i * 5 % 10);
            if i % 23 == 0 {
                format!(r#"{{"event_id":"r-{}","kind":"reward","experiment":"tput-{exp:05}","arm":"arm-{arm}","ts_ms":1764547200{i:03},"reward":1.0}}"#, i * 7919)
            } else {
                format!(r#"{{"event_id":"i-{}","kind":"impression","experiment":"tput-{exp:05}","arm":"arm-{arm}","ts_ms":1764547200{i:03},"count":1,"propensity":0.{:04}}}"#, i * 7919, 1000 + i)
            }
        })
        .collect();
    g.throughput(Throughput::Elements(mixed.len() as u64));
    g.bench_function("mixed", |b| {
        b.iter(|| mixed.iter().filter(|m| apportion::event::decode(black_box(m.as_bytes()), 16_384, 1_764_547_300_000, 300_000).is_ok()).count())
    });
    // The same stream through one stream decoder, as the pipeline reads it (shapes remembered).
    let mut decoder = apportion::event::Decoder::default();
    g.bench_function("mixed-stream", |b| {
        b.iter(|| mixed.iter().filter(|m| decoder.decode(black_box(m.as_bytes()), 16_384, 1_764_547_300_000, 300_000).is_ok()).count())
    });
    // The same events read by published libraries, with the same checks after reading
    // (`--features sonic-rs,simd-json`; BENCHMARKS.md, "Decoder").
    #[cfg(any(feature = "sonic-rs", feature = "simd-json"))]
    for &library in apportion::event::libraries::Library::ALL {
        let mut decoder = apportion::event::libraries::LibraryDecoder::default();
        for m in &mixed {
            let (ours, theirs) = (apportion::event::decode(m.as_bytes(), 16_384, 1_764_547_300_000, 300_000), decoder.decode(library, m.as_bytes(), 16_384, 1_764_547_300_000, 300_000));
            assert_eq!(ours, theirs, "{} reads {m} otherwise", library.name());
        }
        g.bench_function(format!("mixed-{}", library.name()), |b| {
            b.iter(|| {
                mixed.iter().filter(|m| decoder.decode(library, black_box(m.as_bytes()), 16_384, 1_764_547_300_000, 300_000).is_ok()).count()
            })
        });
    }
    g.finish();
}

fn weights(c: &mut Criterion) {
    let mut g = c.benchmark_group("weights");
    for policy in [PolicyName::Thompson, PolicyName::Ucb1, PolicyName::KlUcb, PolicyName::EpsilonGreedy, PolicyName::Fixed] {
        for arms in [2, 10, 50] {
            let e = experiment(policy, arms, 5_000);
            g.bench_function(format!("{policy}/{arms}-arms/batch-1000"), |b| b.iter(|| black_box(e.weights(0, 1000))));
        }
    }
    g.finish();
}

/// The figures reported beside each publish (means, intervals, probability of best, expected
/// loss), whatever the policy.
fn report(c: &mut Criterion) {
    let mut g = c.benchmark_group("report");
    for arms in [2, 10, 50] {
        let e = experiment(PolicyName::Ucb1, arms, 5_000);
        g.bench_function(format!("{arms}-arms"), |b| b.iter(|| black_box(e.report(0))));
    }
    g.finish();
}

fn fleet(c: &mut Criterion) {
    let fleet: Vec<Experiment> = (0..1000).map(|i| experiment(PolicyName::Thompson, 10, 1000 + i)).collect();
    c.bench_function("all_weights/1000-experiments-x-10-arms/thompson", |b| {
        b.iter(|| fleet.iter().map(|e| e.weights(0, 1000)[0]).sum::<f64>())
    });
}

criterion_group!(benches, apply, decode, weights, report, fleet);
criterion_main!(benches);
