//! The consumer thread: takes the input topic's messages in batches, hands them to the
//! pipeline, and takes partitions over or hands them back when the group rebalances.
//!
//! The messages come from a [`FetchQueue`] that every assigned partition is routed to; the
//! consumer's own queue, served by `poll` between batches, keeps the rebalances, errors and
//! statistics. The rebalance callback runs inside that `poll`, on this thread, and only sends
//! what happened ([`Rebalance`]) over a channel; the loop, which alone owns the pipeline, acts
//! on it as soon as that `poll` returns, while librdkafka holds the rebalance open until the
//! loop's assign or unassign call. On assignment it loads each partition's snapshot, routes the
//! partition to the fetch queue and starts reading at the snapshot's offset, whatever the
//! group's committed offset says; on revocation it snapshots the partition before letting go.

use std::sync::mpsc::{self, Receiver, Sender};
use std::sync::Arc;
use std::time::{Duration, Instant};

use rdkafka::consumer::{BaseConsumer, CommitMode, Consumer, ConsumerContext, RebalanceProtocol};
use rdkafka::message::Message;
use rdkafka::statistics::Statistics;
use rdkafka::types::RDKafkaRespErr;
use rdkafka::{ClientContext, Offset, TopicPartitionList};

use super::fence::{group_generation, Fence};
use super::fetch::{Batch, FetchQueue};
use super::offset::NextOffset;
use super::pipeline::Pipeline;
use crate::clock::now_ms;
use crate::shutdown::Shutdown;
use crate::telemetry::http::Served;
use crate::telemetry::Metrics;

/// A rebalance, as the callback reports it to the loop.
#[derive(Debug)]
pub enum Rebalance {
    /// Input partitions given to this member.
    Assign(Vec<i32>),
    /// Input partitions taken back; `lost` when the group gave them to another member already
    /// (the session expired), so that nothing may be written for them.
    Revoke { partitions: Vec<i32>, lost: bool },
    /// A rebalance error: everything held is handed back.
    Failed { error: RDKafkaRespErr, lost: bool },
}

pub struct SourceContext {
    metrics: Arc<Metrics>,
    input_topic: String,
    rebalances: Sender<Rebalance>,
}

impl SourceContext {
    /// The context and the end of its channel that the loop reads.
    pub fn new(metrics: Arc<Metrics>, input_topic: String) -> (SourceContext, Receiver<Rebalance>) {
        let (rebalances, rx) = mpsc::channel();
        (SourceContext { metrics, input_topic, rebalances }, rx)
    }
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
        let partitions: Vec<i32> = tpl.elements().iter().filter(|e| e.topic() == self.input_topic).map(|e| e.partition()).collect();
        let lost = consumer.assignment_lost();
        let event = match err {
            RDKafkaRespErr::RD_KAFKA_RESP_ERR__ASSIGN_PARTITIONS => Rebalance::Assign(partitions),
            RDKafkaRespErr::RD_KAFKA_RESP_ERR__REVOKE_PARTITIONS => Rebalance::Revoke { partitions, lost },
            error => Rebalance::Failed { error, lost },
        };
        if let Err(mpsc::SendError(event)) = self.rebalances.send(event) {
            // The loop has ended and the consumer is closing: the pipeline wrote its last
            // snapshots already, so whatever is still held is simply let go.
            tracing::debug!(?event, "rebalance while closing");
            if !matches!(event, Rebalance::Assign(_)) {
                let cooperative = matches!(consumer.rebalance_protocol(), RebalanceProtocol::Cooperative);
                let _ = if cooperative { consumer.incremental_unassign(tpl) } else { consumer.unassign() };
            }
        }
    }
}

/// The loop's side of the consumer: what a rebalance needs to act on.
struct Group<'a> {
    consumer: &'a BaseConsumer<SourceContext>,
    fetch: &'a FetchQueue,
    fence: &'a Fence,
    served: &'a Served,
    topic: &'a str,
}

impl Group<'_> {
    /// Acts on every rebalance the callback has reported.
    fn serve(&self, rebalances: &Receiver<Rebalance>, pipeline: &mut Pipeline) {
        while let Ok(r) = rebalances.try_recv() {
            self.apply(r, pipeline);
        }
    }

    fn apply(&self, r: Rebalance, pipeline: &mut Pipeline) {
        let consumer = self.consumer;
        let cooperative = matches!(consumer.rebalance_protocol(), RebalanceProtocol::Cooperative);
        match r {
            Rebalance::Assign(parts) => {
                let offsets = pipeline.assign(&parts, group_generation(consumer));
                self.fence.assigned();
                let mut take = TopicPartitionList::new();
                for next in offsets {
                    let p = next.partition;
                    if !self.fetch.route(consumer, self.topic, p) {
                        tracing::error!(partition = p, "cannot route the partition to the fetch queue");
                    }
                    if let Err(e) = take.add_partition_offset(self.topic, p, next.start()) {
                        tracing::error!(partition = p, "cannot set the start offset: {e}");
                    }
                }
                let r = if cooperative { consumer.incremental_assign(&take) } else { consumer.assign(&take) };
                if let Err(e) = r {
                    tracing::error!("cannot take the assignment: {e}");
                }
                self.served.set_ready(true);
            }
            Rebalance::Revoke { partitions, lost } => {
                if !cooperative {
                    // Everything is handed back until the group settles: not ready meanwhile.
                    self.served.set_ready(false);
                }
                let offsets = pipeline.revoke(&partitions, lost);
                commit(consumer, self.topic, &offsets, CommitMode::Sync);
                let r = if cooperative {
                    let mut give = TopicPartitionList::new();
                    for p in &partitions {
                        give.add_partition(self.topic, *p);
                    }
                    consumer.incremental_unassign(&give)
                } else {
                    consumer.unassign()
                };
                if let Err(e) = r {
                    tracing::error!("cannot hand the assignment back: {e}");
                }
            }
            Rebalance::Failed { error, lost } => {
                tracing::error!("rebalance error: {error:?}");
                let owned = pipeline.owned_partitions();
                let offsets = pipeline.revoke(&owned, lost);
                commit(consumer, self.topic, &offsets, CommitMode::Sync);
                let _ = consumer.unassign();
            }
        }
    }
}

/// Moves the group's committed offsets to the snapshots' (for lag reporting; recovery reads
/// the snapshot's offset, not this one).
pub fn commit<C: Consumer<SourceContext>>(consumer: &C, topic: &str, offsets: &[NextOffset], mode: CommitMode) {
    if offsets.is_empty() {
        return;
    }
    let mut tpl = TopicPartitionList::new();
    for o in offsets {
        let _ = tpl.add_partition_offset(topic, o.partition, Offset::Offset(o.offset));
    }
    if let Err(e) = consumer.commit(&tpl, mode) {
        tracing::warn!("cannot commit offsets: {e}");
    }
}

/// The consumer's errors are logged, at most 20 in a row (the count starts again when idle).
fn log_error(logged: &mut u32, e: &dyn std::fmt::Display) {
    if *logged < 20 {
        tracing::warn!("consumer: {e}");
        *logged += 1;
    }
}

/// Messages handed to the pipeline under one lock: those the fetch queue already holds, up to
/// this many; when it holds none, the first to arrive within 100 ms (and never past the next
/// publish round).
const BATCH: usize = 256;

/// While a message is applied, the payload of the one this many places ahead is prefetched.
const PREFETCH_AHEAD: usize = 2;

/// Runs until shutdown: read, apply, publish on the interval, snapshot on the interval. On
/// shutdown: publish, snapshot, commit, and leave the group.
///
/// Each turn serves the consumer's own queue first (rebalances, errors, statistics), acting on
/// each rebalance at once, then takes a batch from the fetch queue and applies it. A message of
/// a partition handed back may still be in the fetch queue or the batch; that is safe: the
/// partition is no longer in the pipeline, so its messages are passed over (its snapshot,
/// written on revocation, ends before them, so its next owner reads them), and librdkafka
/// drops most of them itself (they belong to an outdated fetch). A partition just taken over
/// has no messages before its assignment.
pub fn run(
    consumer: BaseConsumer<SourceContext>,
    rebalances: Receiver<Rebalance>,
    fetch: Arc<FetchQueue>,
    fence: Arc<Fence>,
    served: Arc<Served>,
    mut pipeline: Pipeline,
    shutdown: Shutdown,
) {
    let topic = consumer.context().input_topic.clone();
    let group = Group { consumer: &consumer, fetch: &fetch, fence: &fence, served: &served, topic: &topic };
    let mut errors_logged = 0u32;
    // Publishing and snapshots are due on a clock, and event times are checked against the wall
    // clock; both are read after every batch and whenever the consumer is idle, not per message.
    // The wall clock may thus lag by up to one batch's time, which only makes the future-time
    // check (`limits.max_clock_skew_seconds`, minutes) stricter by that much.
    let mut wall_ms = now_ms();
    let mut batch = Batch::with_capacity(BATCH);
    // Messages `poll` returns: only those of a partition that could not be routed.
    let mut strays = Vec::new();
    let mut seeks: Vec<NextOffset> = Vec::new();
    let mut wait_at_most = Duration::from_millis(100);
    while !shutdown.is_triggered() {
        while strays.len() < BATCH {
            let polled = consumer.poll(Duration::ZERO);
            group.serve(&rebalances, &mut pipeline);
            match polled {
                Some(Ok(m)) => strays.push(m),
                Some(Err(e)) => log_error(&mut errors_logged, &e),
                None => break,
            }
        }
        let wait = if strays.is_empty() { wait_at_most } else { Duration::ZERO };
        if fetch.take(&mut batch, wait) == 0 && strays.is_empty() {
            errors_logged = 0;
        }
        let offsets = {
            let p = &mut pipeline;
            let mut apply = |part: i32, offset: i64, key: Option<&[u8]>, payload: Option<&[u8]>| {
                // Once a partition is to be read again from further back, the rest of what
                // was fetched for it is stale.
                if seeks.iter().any(|s| s.partition == part) {
                    return;
                }
                if let Some(from) = p.on_message(part, offset, key, payload, wall_ms) {
                    seeks.push(from);
                }
            };
            for m in &strays {
                apply(m.partition(), m.offset(), m.key(), m.payload());
            }
            for (i, m) in batch.iter().enumerate() {
                if let Some(ahead) = batch.get(i + PREFETCH_AHEAD) {
                    ahead.prefetch();
                }
                match m.error() {
                    None => apply(m.partition(), m.offset(), m.key(), m.payload()),
                    Some(e) => log_error(&mut errors_logged, &e),
                }
            }
            p.export_counts();
            wall_ms = now_ms();
            wait_at_most = Duration::from_millis(100);
            if fence.may_write(&consumer) {
                p.publish_due(false);
                wait_at_most = p.until_publish().clamp(Duration::from_millis(1), wait_at_most);
                p.snapshot_due()
            } else {
                Vec::new()
            }
        };
        strays.clear();
        batch.clear();
        for from in seeks.drain(..) {
            if let Err(e) = consumer.seek(&topic, from.partition, Offset::Offset(from.offset), Duration::from_secs(10)) {
                tracing::error!(partition = from.partition, "cannot read the partition again from offset {}: {e}", from.offset);
            }
        }
        commit(&consumer, &topic, &offsets, CommitMode::Async);
    }
    tracing::info!("stopping: publishing and writing snapshots");
    pipeline.export_counts();
    pipeline.begin_closing();
    let offsets = if fence.may_write(&consumer) {
        pipeline.publish_due(true);
        let owned = pipeline.owned_partitions();
        pipeline.snapshot(&owned, false)
    } else {
        Vec::new()
    };
    commit(&consumer, &topic, &offsets, CommitMode::Sync);
    consumer.unsubscribe();
    // Leaving the group revokes the assignment through the callback like any rebalance; it is
    // served here, for at most ten seconds, so that the revocation is written as any other is.
    let deadline = Instant::now() + Duration::from_secs(10);
    while !pipeline.owned_partitions().is_empty() && Instant::now() < deadline {
        let _ = consumer.poll(Duration::from_millis(100));
        group.serve(&rebalances, &mut pipeline);
    }
    // Whatever comes after this (while the consumer closes) the callback lets go itself.
    drop(rebalances);
    drop(pipeline);
    // The fetch queue goes before the consumer does (librdkafka's handles before its client).
    drop(batch);
    drop(strays);
    drop(fetch);
    drop(consumer);
}
