//! Reads a whole topic from its beginning with a consumer of its own (no group), and says when
//! it has reached the end the topic had when reading began. The control follower keeps
//! reading after that; `apportion experiment` stops there.

use std::collections::BTreeSet;
use std::time::{Duration, Instant};

use anyhow::{anyhow, Context as _};
use rdkafka::consumer::{BaseConsumer, Consumer, ConsumerContext};
use rdkafka::error::KafkaError;
use rdkafka::message::Message;
use rdkafka::{ClientContext, Offset, TopicPartitionList};

use crate::config::Config;

/// Called with each message: offset, key, value (`None`: a tombstone).
pub type Visit<'a> = dyn FnMut(i64, Option<&[u8]>, Option<&[u8]>) + 'a;

/// Reaching a partition's end is how a whole-topic read knows it is done, not an error:
/// librdkafka's default context would log each one as an error.
pub struct EndIsNews;

impl ClientContext for EndIsNews {
    fn error(&self, error: KafkaError, reason: &str) {
        if !matches!(error, KafkaError::PartitionEOF(_)) {
            tracing::error!("librdkafka: {error}: {reason}");
        }
    }
}

impl ConsumerContext for EndIsNews {}

pub struct TopicReader {
    consumer: BaseConsumer<EndIsNews>,
    topic: String,
    /// Partitions not yet read to their end. The end is the fetch's (librdkafka's partition
    /// end-of-file), not the high watermark: tansu 0.6 reports as high watermark the base
    /// offset of the last batch plus one, short of its last message.
    open: BTreeSet<i32>,
}

impl TopicReader {
    /// Assigns every partition of `topic` from its beginning. `purpose` names the client in
    /// the broker's logs (`<group_id>.<purpose>`); it never joins or commits to that group.
    pub fn open(cfg: &Config, topic: &str, purpose: &str) -> anyhow::Result<TopicReader> {
        let consumer: BaseConsumer<EndIsNews> = cfg
            .client_config()
            .set("group.id", format!("{}.{purpose}", cfg.kafka.group_id))
            .set("enable.auto.commit", "false")
            .set("enable.partition.eof", "true")
            .create_with_context(EndIsNews)
            .with_context(|| format!("cannot create a reader of {topic}"))?;
        let md = consumer
            .fetch_metadata(Some(topic), Duration::from_secs(10))
            .with_context(|| format!("cannot read the metadata of {topic} from {}", cfg.kafka.brokers))?;
        let partitions: Vec<i32> =
            md.topics().iter().filter(|t| t.name() == topic).flat_map(|t| t.partitions().iter().map(|p| p.id())).collect();
        if partitions.is_empty() {
            return Err(anyhow!("topic {topic} does not exist on {}; start a sidecar once (it creates it) or create it compacted", cfg.kafka.brokers));
        }
        let mut tpl = TopicPartitionList::new();
        for &p in &partitions {
            tpl.add_partition_offset(topic, p, Offset::Beginning).with_context(|| format!("cannot read {topic}/{p}"))?;
        }
        consumer.assign(&tpl).with_context(|| format!("cannot read {topic}"))?;
        Ok(TopicReader { consumer, topic: topic.to_string(), open: partitions.into_iter().collect() })
    }

    pub fn topic(&self) -> &str {
        &self.topic
    }

    /// Hands every message that arrives within `wait` (and what follows it at once) to
    /// `visit`. Returns whether every partition has been read to its end once.
    pub fn read(&mut self, wait: Duration, visit: &mut Visit<'_>) -> anyhow::Result<bool> {
        let mut timeout = wait;
        for _ in 0..10_000 {
            match self.consumer.poll(timeout) {
                None => break,
                Some(Err(KafkaError::PartitionEOF(p))) => {
                    self.open.remove(&p);
                }
                Some(Err(e)) => return Err(anyhow!("cannot read {}: {e}", self.topic)),
                Some(Ok(m)) => {
                    visit(m.offset(), m.key(), m.payload());
                    timeout = Duration::ZERO;
                }
            }
        }
        Ok(self.open.is_empty())
    }

    /// Reads until the end as it was at start, for at most `limit`.
    pub fn read_to_end(&mut self, limit: Duration, visit: &mut Visit<'_>) -> anyhow::Result<()> {
        let deadline = Instant::now() + limit;
        while !self.read(Duration::from_millis(100), visit)? {
            if Instant::now() >= deadline {
                return Err(anyhow!("timed out after {limit:?} reading {} to its end", self.topic));
            }
        }
        Ok(())
    }
}
