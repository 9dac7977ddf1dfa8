//! The consumer thread: polls the input topic, hands each message to the pipeline, and takes
//! partitions over or hands them back in the rebalance callback.
//!
//! The callback runs inside `poll`, on this thread, between two messages: on assignment it
//! loads each partition's snapshot and starts reading at the snapshot's offset, whatever the
//! group's committed offset says; on revocation it snapshots the partition before letting go.

use std::sync::{Arc, Mutex, MutexGuard};
use std::time::Duration;

use rdkafka::consumer::{BaseConsumer, CommitMode, Consumer, ConsumerContext, RebalanceProtocol};
use rdkafka::message::Message;
use rdkafka::statistics::Statistics;
use rdkafka::types::RDKafkaRespErr;
use rdkafka::{ClientContext, Offset, TopicPartitionList};

use super::pipeline::{now_ms, Pipeline};
use crate::shutdown::Shutdown;
use crate::telemetry::http::Served;
use crate::telemetry::Metrics;

pub struct SourceContext {
    pub pipeline: Arc<Mutex<Pipeline>>,
    pub metrics: Arc<Metrics>,
    pub served: Arc<Served>,
    pub input_topic: String,
}

fn lock(p: &Mutex<Pipeline>) -> MutexGuard<'_, Pipeline> {
    p.lock().unwrap_or_else(|poisoned| poisoned.into_inner())
}

impl ClientContext for SourceContext {
    fn stats(&self, stats: Statistics) {
        if let Some(t) = stats.topics.get(&self.input_topic) {
            for (p, s) in &t.partitions {
                if *p >= 0 && s.consumer_lag >= 0 {
                    self.metrics.consumer_lag.with_label_values(&[&self.input_topic, &p.to_string()]).set(s.consumer_lag);
                }
            }
        }
    }
}

impl ConsumerContext for SourceContext {
    fn rebalance(&self, consumer: &BaseConsumer<Self>, err: RDKafkaRespErr, tpl: &mut TopicPartitionList) {
        let cooperative = matches!(consumer.rebalance_protocol(), RebalanceProtocol::Cooperative);
        let parts: Vec<i32> = tpl.elements().iter().filter(|e| e.topic() == self.input_topic).map(|e| e.partition()).collect();
        match err {
            RDKafkaRespErr::RD_KAFKA_RESP_ERR__ASSIGN_PARTITIONS => {
                let offsets = lock(&self.pipeline).assign(&parts);
                let mut take = TopicPartitionList::new();
                for (p, off) in offsets {
                    if let Err(e) = take.add_partition_offset(&self.input_topic, p, off) {
                        tracing::error!(partition = p, "cannot set the start offset: {e}");
                    }
                }
                let r = if cooperative { consumer.incremental_assign(&take) } else { consumer.assign(&take) };
                if let Err(e) = r {
                    tracing::error!("cannot take the assignment: {e}");
                }
                self.served.set_ready(true);
            }
            RDKafkaRespErr::RD_KAFKA_RESP_ERR__REVOKE_PARTITIONS => {
                if !cooperative {
                    // Everything is handed back until the group settles: not ready meanwhile.
                    self.served.set_ready(false);
                }
                let offsets = lock(&self.pipeline).revoke(&parts);
                commit(consumer, &self.input_topic, &offsets, CommitMode::Sync);
                let r = if cooperative { consumer.incremental_unassign(tpl) } else { consumer.unassign() };
                if let Err(e) = r {
                    tracing::error!("cannot hand the assignment back: {e}");
                }
            }
            other => {
                tracing::error!("rebalance error: {other:?}");
                let owned = lock(&self.pipeline).owned_partitions();
                let offsets = lock(&self.pipeline).revoke(&owned);
                commit(consumer, &self.input_topic, &offsets, CommitMode::Sync);
                let _ = consumer.unassign();
            }
        }
    }
}

/// Moves the group's committed offsets to the snapshots' (for lag reporting; recovery reads
/// the snapshot's offset, not this one).
pub fn commit<C: Consumer<SourceContext>>(consumer: &C, topic: &str, offsets: &[(i32, i64)], mode: CommitMode) {
    if offsets.is_empty() {
        return;
    }
    let mut tpl = TopicPartitionList::new();
    for &(p, o) in offsets {
        let _ = tpl.add_partition_offset(topic, p, Offset::Offset(o));
    }
    if let Err(e) = consumer.commit(&tpl, mode) {
        tracing::warn!("cannot commit offsets: {e}");
    }
}

/// Messages handed to the pipeline under one lock. The first of a batch is waited for (up to
/// 100 ms, and never past the next publish round); the rest are only those the client already
/// holds (`poll` with no wait).
const BATCH: usize = 256;

/// Runs until shutdown: read, apply, publish on the interval, snapshot on the interval. On
/// shutdown: publish, snapshot, commit, and leave the group.
///
/// Messages are applied in batches. A rebalance callback runs inside `poll` and makes it return
/// nothing, which ends the batch; the messages polled before it are applied after it. That is
/// safe: a partition just handed back is no longer in the pipeline, so its messages are passed
/// over (its snapshot, written in the callback, ends before them, so its next owner reads them),
/// and a partition just taken over cannot have messages polled before it was assigned.
pub fn run(consumer: BaseConsumer<SourceContext>, pipeline: Arc<Mutex<Pipeline>>, shutdown: Shutdown) {
    let topic = consumer.context().input_topic.clone();
    let mut errors_logged = 0u32;
    // Publishing and snapshots are due on a clock, and event times are checked against the wall
    // clock; both are read after every batch and whenever the consumer is idle, not per message.
    // The wall clock may thus lag by up to one batch's time, which only makes the future-time
    // check (`limits.max_clock_skew_seconds`, minutes) stricter by that much.
    let mut wall_ms = now_ms();
    let mut batch = Vec::with_capacity(BATCH);
    let mut seeks: Vec<(i32, i64)> = Vec::new();
    let mut wait_at_most = Duration::from_millis(100);
    while !shutdown.is_triggered() {
        let mut wait = wait_at_most;
        while batch.len() < BATCH {
            match consumer.poll(wait) {
                Some(Ok(m)) => batch.push(m),
                Some(Err(e)) => {
                    if errors_logged < 20 {
                        tracing::warn!("consumer: {e}");
                        errors_logged += 1;
                    }
                    break;
                }
                None => {
                    if batch.is_empty() {
                        errors_logged = 0;
                    }
                    break;
                }
            }
            wait = Duration::ZERO;
        }
        let offsets = {
            let mut p = lock(&pipeline);
            for m in batch.drain(..) {
                let part = m.partition();
                // Once a partition is to be read again from further back, the rest of what
                // was fetched for it is stale.
                if seeks.iter().any(|&(s, _)| s == part) {
                    continue;
                }
                if let Some(from) = p.on_message(part, m.offset(), m.key(), m.payload(), wall_ms) {
                    seeks.push((part, from));
                }
            }
            p.export_counts();
            wall_ms = now_ms();
            p.publish_due(false);
            wait_at_most = p.until_publish().clamp(Duration::from_millis(1), Duration::from_millis(100));
            p.snapshot_due()
        };
        for (p, from) in seeks.drain(..) {
            if let Err(e) = consumer.seek(&topic, p, Offset::Offset(from), Duration::from_secs(10)) {
                tracing::error!(partition = p, "cannot read the partition again from offset {from}: {e}");
            }
        }
        commit(&consumer, &topic, &offsets, CommitMode::Async);
    }
    tracing::info!("stopping: publishing and writing snapshots");
    let offsets = {
        let mut p = lock(&pipeline);
        p.export_counts();
        p.publish_due(true);
        let owned = p.owned_partitions();
        p.snapshot(&owned)
    };
    commit(&consumer, &topic, &offsets, CommitMode::Sync);
    consumer.unsubscribe();
}
