//! The demo's traffic: a stand-in for the services beside the sidecar, written as a service
//! would be, with the service client (`apportion-client`): it follows the weights topic, assigns
//! each viewer to an arm by the client's sticky hash, writes the impression with the client's
//! propensity and weights version, and the reward one to four seconds later, naming its
//! impression, so the loop closes through Kafka as in production. Before the first weights, the
//! client's fallback (an even split over the experiment's arms) answers.
//! A small share of events is sent twice or malformed, to show duplicates and dead letters.

use std::cmp::Reverse;
use std::collections::BinaryHeap;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use apportion_client::events::impression_json;
use apportion_client::{Client, ClientConfig, Fallback, Impression};
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Beta, Distribution};
use rdkafka::config::ClientConfig as KafkaConfig;
use rdkafka::producer::{BaseRecord, DefaultProducerContext, Producer, ThreadedProducer};

use super::scenario::{Truth, WORLD};
use crate::clock::now_ms;
use crate::core::draw::weighted;

/// Simmer's viewers: each is one unit, and keeps its arm while the weights allow.
const VIEWERS: u64 = 20_000;

pub struct Traffic {
    pub brokers: String,
    pub input_topic: String,
    pub weights_topic: String,
    /// Impressions per second.
    pub rate: f64,
    pub seed: u64,
    pub stop: Arc<AtomicBool>,
    pub produced: Arc<AtomicU64>,
}

/// A reward on its way: when it is due, for which impression, how much.
struct Pending {
    due: Instant,
    impression: Impression,
    reward: f64,
    ts_ms: i64,
}

impl PartialEq for Pending {
    fn eq(&self, o: &Self) -> bool {
        self.due == o.due
    }
}
impl Eq for Pending {}
impl PartialOrd for Pending {
    fn partial_cmp(&self, o: &Self) -> Option<std::cmp::Ordering> {
        Some(self.cmp(o))
    }
}
impl Ord for Pending {
    fn cmp(&self, o: &Self) -> std::cmp::Ordering {
        self.due.cmp(&o.due)
    }
}

impl Traffic {
    /// Runs until `stop`; returns an error only when the clients cannot be created.
    pub fn run(self) -> anyhow::Result<()> {
        let mut cfg = ClientConfig::new(&self.brokers);
        cfg.weights_topic = self.weights_topic.clone();
        cfg.input_topic = self.input_topic.clone();
        for t in WORLD {
            cfg.fallbacks.insert(t.experiment.to_string(), Fallback::Even(t.arms.iter().map(|a| a.0.to_string()).collect()));
        }
        let client = Client::start(cfg)?;
        // Only for the few events sent twice or broken on purpose.
        let raw: ThreadedProducer<DefaultProducerContext> = KafkaConfig::new().set("bootstrap.servers", &self.brokers).create()?;
        let mut rng = StdRng::seed_from_u64(self.seed);
        let mut pending: BinaryHeap<Reverse<Pending>> = BinaryHeap::new();
        let start = Instant::now();
        let tick = Duration::from_millis(20);
        let mut sent_impressions = 0f64;
        while !self.stop.load(Ordering::SeqCst) {
            let target = start.elapsed().as_secs_f64() * self.rate;
            while sent_impressions < target {
                sent_impressions += 1.0;
                let truth = pick_experiment(&mut rng);
                let viewer = format!("viewer-{}", rng.gen_range(0..VIEWERS));
                let Ok(a) = client.assign(truth.experiment, &viewer) else { continue };
                let now = now_ms();
                let Ok(shown) = client.impression(&a, Some(now)) else { continue };
                self.produced.fetch_add(1, Ordering::Relaxed);
                let roll: f64 = rng.gen();
                if roll < 0.002 {
                    self.send(&raw, truth.experiment, &impression_json(&shown.event_id, &a, now));
                } else if roll < 0.003 {
                    self.send(&raw, truth.experiment, r#"{"event_id":"broken","kind":"impression""#);
                }
                let mean = truth.arms.iter().find(|x| x.0 == &*a.arm).map_or(0.0, |x| x.1);
                let reward = match truth.reward_max {
                    None => f64::from(u8::from(rng.gen::<f64>() < mean)),
                    Some(max) => {
                        let p = mean / max;
                        Beta::new(2.0 * p, 2.0 * (1.0 - p)).map_or(mean, |d| max * d.sample(&mut rng)).round()
                    }
                };
                if reward > 0.0 {
                    let delay = Duration::from_millis(rng.gen_range(1000..4000));
                    pending.push(Reverse(Pending { due: Instant::now() + delay, ts_ms: now + delay.as_millis() as i64, impression: shown, reward }));
                }
            }
            while pending.peek().is_some_and(|p| p.0.due <= Instant::now()) {
                if let Some(Reverse(p)) = pending.pop() {
                    if client.reward(&p.impression, p.reward, Some(p.ts_ms)).is_ok() {
                        self.produced.fetch_add(1, Ordering::Relaxed);
                    }
                }
            }
            std::thread::sleep(tick);
        }
        client.flush(Duration::from_secs(5));
        let _ = raw.flush(Duration::from_secs(5));
        Ok(())
    }

    fn send(&self, producer: &ThreadedProducer<DefaultProducerContext>, key: &str, payload: &str) {
        let mut record = BaseRecord::to(&self.input_topic).key(key).payload(payload);
        for _ in 0..50 {
            match producer.send(record) {
                Ok(()) => {
                    self.produced.fetch_add(1, Ordering::Relaxed);
                    return;
                }
                Err((_, r)) => {
                    record = r;
                    std::thread::sleep(Duration::from_millis(20));
                }
            }
        }
    }
}

fn pick_experiment(rng: &mut StdRng) -> &'static Truth {
    &WORLD[weighted(WORLD.iter().map(|t| t.traffic), rng.gen()).unwrap_or(WORLD.len() - 1)]
}
