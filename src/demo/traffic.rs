//! The demo's traffic: a stand-in for the services beside the sidecar. It reads the latest
//! weights back from the weights topic, picks arms by sampling them, writes impressions, and
//! writes rewards one to four seconds later, so the loop closes through Kafka as in production.
//! Each reward names its impression by id, and every other one by time too, so that both ways
//! of attributing a reward are exercised.
//! A small share of events is sent twice or malformed, to show duplicates and dead letters.

use std::cmp::Reverse;
use std::collections::{BinaryHeap, HashMap};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Beta, Distribution};
use rdkafka::config::ClientConfig;
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::message::Message;
use rdkafka::producer::{BaseRecord, DefaultProducerContext, Producer, ThreadedProducer};
use rdkafka::{Offset, TopicPartitionList};

use super::scenario::{Truth, WORLD};
use crate::clock::now_ms;
use crate::core::draw::weighted;

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

struct Pending {
    due: Instant,
    payload: String,
    experiment: &'static str,
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
        let producer: ThreadedProducer<DefaultProducerContext> = ClientConfig::new()
            .set("bootstrap.servers", &self.brokers)
            .set("linger.ms", "20")
            .create()?;
        let reader: BaseConsumer = ClientConfig::new()
            .set("bootstrap.servers", &self.brokers)
            .set("group.id", "apportion-demo-traffic")
            .set("enable.auto.commit", "false")
            .create()?;
        let mut assigned = false;
        let mut rng = StdRng::seed_from_u64(self.seed);
        let mut weights: HashMap<String, (u64, HashMap<String, f64>)> = HashMap::new();
        let mut pending: BinaryHeap<Reverse<Pending>> = BinaryHeap::new();
        let mut seq = 0u64;
        let start = Instant::now();
        let tick = Duration::from_millis(20);
        let mut sent_impressions = 0f64;
        while !self.stop.load(Ordering::SeqCst) {
            if !assigned {
                assigned = assign_all(&reader, &self.weights_topic);
            }
            while let Some(Ok(m)) = reader.poll(Duration::ZERO) {
                if let Some(Ok((exp, version, w))) = m.payload().map(parse_weights) {
                    if weights.get(&exp).is_none_or(|(v, _)| version > *v) {
                        weights.insert(exp, (version, w));
                    }
                }
            }
            let target = start.elapsed().as_secs_f64() * self.rate;
            while sent_impressions < target {
                sent_impressions += 1.0;
                seq += 1;
                let truth = pick_experiment(&mut rng);
                let arm = pick_arm(truth, weights.get(truth.experiment).map(|(_, w)| w), &mut rng);
                let mean = truth.arms.iter().find(|a| a.0 == arm).map_or(0.0, |a| a.1);
                let now = now_ms();
                let version = weights.get(truth.experiment).map_or(0, |(v, _)| *v);
                let imp = format!(
                    r#"{{"event_id":"imp-{seq}","kind":"impression","experiment":"{}","arm":"{arm}","ts_ms":{now},"weights_version":{version}}}"#,
                    truth.experiment
                );
                self.send(&producer, truth.experiment, &imp);
                let roll: f64 = rng.gen();
                if roll < 0.002 {
                    self.send(&producer, truth.experiment, &imp);
                } else if roll < 0.003 {
                    self.send(&producer, truth.experiment, r#"{"event_id":"broken","kind":"impression""#);
                }
                let reward = match truth.reward_max {
                    None => f64::from(u8::from(rng.gen::<f64>() < mean)),
                    Some(max) => {
                        let p = mean / max;
                        Beta::new(2.0 * p, 2.0 * (1.0 - p)).map_or(mean, |d| max * d.sample(&mut rng)).round()
                    }
                };
                if reward > 0.0 {
                    let delay = Duration::from_millis(rng.gen_range(1000..4000));
                    let by_time = if seq.is_multiple_of(2) { format!(r#","impression_ts_ms":{now}"#) } else { String::new() };
                    pending.push(Reverse(Pending {
                        due: Instant::now() + delay,
                        payload: format!(
                            r#"{{"event_id":"rew-{seq}","kind":"reward","experiment":"{}","arm":"{arm}","ts_ms":{},"reward":{reward},"impression_id":"imp-{seq}"{by_time}}}"#,
                            truth.experiment,
                            now + delay.as_millis() as i64
                        ),
                        experiment: truth.experiment,
                    }));
                }
            }
            while pending.peek().is_some_and(|p| p.0.due <= Instant::now()) {
                if let Some(Reverse(p)) = pending.pop() {
                    self.send(&producer, p.experiment, &p.payload);
                }
            }
            std::thread::sleep(tick);
        }
        let _ = producer.flush(Duration::from_secs(5));
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

fn assign_all(reader: &BaseConsumer, topic: &str) -> bool {
    let Ok(md) = reader.fetch_metadata(Some(topic), Duration::from_secs(2)) else {
        return false;
    };
    let Some(t) = md.topics().iter().find(|t| t.name() == topic) else {
        return false;
    };
    if t.partitions().is_empty() {
        return false;
    }
    let mut tpl = TopicPartitionList::new();
    for p in t.partitions() {
        let _ = tpl.add_partition_offset(topic, p.id(), Offset::Beginning);
    }
    reader.assign(&tpl).is_ok()
}

fn parse_weights(bytes: &[u8]) -> Result<(String, u64, HashMap<String, f64>), serde_json::Error> {
    #[derive(serde::Deserialize)]
    struct W {
        experiment: String,
        version: u64,
        weights: HashMap<String, f64>,
    }
    let w: W = serde_json::from_slice(bytes)?;
    Ok((w.experiment, w.version, w.weights))
}

fn pick_experiment(rng: &mut StdRng) -> &'static Truth {
    &WORLD[weighted(WORLD.iter().map(|t| t.traffic), rng.gen()).unwrap_or(WORLD.len() - 1)]
}

/// Samples an arm from the published weights; uniformly before any weights arrive.
fn pick_arm(t: &Truth, weights: Option<&HashMap<String, f64>>, rng: &mut StdRng) -> &'static str {
    let drawn = weights.and_then(|w| weighted(t.arms.iter().map(|(arm, _)| w.get(*arm).copied().unwrap_or(0.0)), rng.gen()));
    t.arms[drawn.unwrap_or_else(|| rng.gen_range(0..t.arms.len()))].0
}
