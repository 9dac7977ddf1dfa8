//! The thread that reads the weights topic from its beginning (it is compacted: the latest
//! message per experiment survives) and follows it, offering every message to the table.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::error::KafkaError;
use rdkafka::message::Message;
use rdkafka::types::RDKafkaErrorCode;
use rdkafka::{ClientConfig, Offset, TopicPartitionList};

use crate::counters::Counters;
use crate::table::Table;

pub(crate) struct Follower {
    pub consumer: BaseConsumer,
    pub topic: String,
    pub table: Arc<Table>,
    pub counters: Arc<Counters>,
    pub stop: Arc<AtomicBool>,
    /// Set once every partition was read to the end it had when the follower started.
    pub loaded: Arc<AtomicBool>,
}

/// A consumer that reads without a group: partitions are assigned, never committed.
pub(crate) fn consumer(brokers: &str, extra: &std::collections::BTreeMap<String, String>) -> Result<BaseConsumer, KafkaError> {
    let mut c = ClientConfig::new();
    c.set("bootstrap.servers", brokers)
        .set("group.id", format!("apportion-client-{:016x}", crate::random_u64()))
        .set("enable.auto.commit", "false")
        .set("enable.partition.eof", "true")
        .set("auto.offset.reset", "earliest");
    for (k, v) in extra {
        c.set(k, v);
    }
    c.create()
}

impl Follower {
    pub fn run(self) {
        let mut unread: Option<usize> = None;
        while !self.stop.load(Ordering::SeqCst) {
            if unread.is_none() {
                unread = self.assign_all();
                if unread.is_none() {
                    std::thread::sleep(Duration::from_millis(200));
                    continue;
                }
                if unread == Some(0) {
                    self.loaded.store(true, Ordering::SeqCst);
                }
            }
            let mut offered = false;
            let mut wait = Duration::from_millis(100);
            for _ in 0..10_000 {
                match self.consumer.poll(wait) {
                    None => break,
                    Some(Ok(m)) => {
                        self.counters.count_offered(self.table.offer(m.key(), m.payload()));
                        offered = true;
                    }
                    Some(Err(KafkaError::PartitionEOF(_))) => {
                        if let Some(n) = unread.as_mut() {
                            if *n > 0 {
                                *n -= 1;
                                if *n == 0 {
                                    self.table.publish();
                                    self.loaded.store(true, Ordering::SeqCst);
                                }
                            }
                        }
                    }
                    Some(Err(KafkaError::MessageConsumption(RDKafkaErrorCode::UnknownTopicOrPartition))) => {
                        unread = None;
                        break;
                    }
                    Some(Err(_)) => break,
                }
                wait = Duration::ZERO;
            }
            if offered {
                self.table.publish();
            }
        }
    }

    /// Assigns every partition of the topic from its beginning; the number of partitions, or
    /// `None` while the topic cannot be seen.
    fn assign_all(&self) -> Option<usize> {
        let md = self.consumer.fetch_metadata(Some(&self.topic), Duration::from_secs(2)).ok()?;
        let t = md.topics().iter().find(|t| t.name() == self.topic)?;
        if t.partitions().is_empty() || t.error().is_some() {
            return None;
        }
        let mut tpl = TopicPartitionList::new();
        for p in t.partitions() {
            tpl.add_partition_offset(&self.topic, p.id(), Offset::Beginning).ok()?;
        }
        self.consumer.assign(&tpl).ok()?;
        Some(t.partitions().len())
    }
}
