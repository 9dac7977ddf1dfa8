//! The streaming half: Kafka in, weights and snapshots out, around the pure core.
//!
//! ```text
//! input topic → source (consume · decode · validate · dedupe) → core (stats → policy → bounds)
//!                     │ rejected → dead-letter topic                    │ weights → weights topic
//!                     └ offsets + statistics → state topic (snapshots)  └ metrics → /metrics
//! ```

pub mod checkpoint;
pub mod counts;
pub mod fence;
pub mod fetch;
pub mod offset;
pub mod partition;
pub mod pipeline;
pub mod producer;
pub mod publisher;
pub mod recent;
pub mod restore;
pub mod resume;
pub mod settings;
pub mod snapshot;
pub mod source;
pub mod topics;

use std::sync::Arc;

use anyhow::{anyhow, Context as _};
use rdkafka::consumer::{BaseConsumer, Consumer};

use crate::config::Config;
use crate::control::{follower, Registry};
use crate::shutdown::Shutdown;
use crate::telemetry::http::Served;
use pipeline::Pipeline;
use settings::Settings;
use source::SourceContext;

/// Runs the sidecar until `shutdown`: creates missing topics (retrying while the broker is
/// unreachable), then consumes, applies, publishes and snapshots.
pub async fn run(cfg: Config, served: Arc<Served>, shutdown: Shutdown) -> anyhow::Result<()> {
    let control = Arc::new(Registry::new(cfg.clone(), Some(served.metrics.control_records.clone())));
    let settings = Arc::new(Settings::from_config(&cfg, control.clone()).map_err(|e| anyhow!(e))?);
    topics::ensure_topics(&cfg, &shutdown).await?;
    if shutdown.is_triggered() {
        return Ok(());
    }
    // Every definition in force is known before any partition is taken, so that restored and
    // new experiments start under it; /readyz stays 503 until then.
    let follower = follower::start(&cfg, control.clone(), shutdown.clone())?;
    let waiting = std::time::Instant::now();
    let mut warn_at = 10;
    while !control.is_caught_up() && !shutdown.is_triggered() {
        if waiting.elapsed().as_secs() >= warn_at {
            tracing::warn!(topic = %cfg.kafka.control_topic, "still reading the control topic to its end ({warn_at} s)");
            warn_at += 10;
        }
        tokio::time::sleep(std::time::Duration::from_millis(20)).await;
    }
    if shutdown.is_triggered() {
        let _ = tokio::task::spawn_blocking(move || follower.join()).await;
        return Ok(());
    }
    let state_reader: BaseConsumer = cfg.client_config()
        .set("group.id", format!("{}.state-reader", cfg.kafka.group_id))
        .set("enable.auto.commit", "false")
        .set("enable.partition.eof", "false")
        .create()
        .context("cannot create the state reader")?;
    let state_partitions = topics::partition_count(&state_reader, &cfg.kafka.state_topic)?;
    let sink = producer::create(&cfg)?;
    let pipeline = Pipeline::new(settings.clone(), served.clone(), sink, state_reader, state_partitions);
    let fence = fence::Fence::start(&cfg.kafka.client).context("cannot start the pause watch")?;
    let (ctx, rebalances) = SourceContext::new(served.metrics.clone(), settings.input_topic.clone());
    let mut c = cfg.client_config();
    c.set("group.id", &cfg.kafka.group_id)
        .set("enable.auto.commit", "false")
        .set("enable.partition.eof", "false");
    // Offsets are committed explicitly, from snapshots; librdkafka's per-message offset store
    // would only take a lock for every message.
    for (k, v) in [("auto.offset.reset", "earliest"), ("statistics.interval.ms", "5000"), ("enable.auto.offset.store", "false")] {
        if !cfg.kafka.client.contains_key(k) {
            c.set(k, v);
        }
    }
    let consumer: BaseConsumer<SourceContext> = c.create_with_context(ctx).context("cannot create the consumer")?;
    let fetch = Arc::new(fetch::FetchQueue::new(&consumer));
    if let Err(e) = consumer.subscribe(&[&settings.input_topic]) {
        // The fetch queue goes before the consumer does, as at the end of `source::run`.
        drop(fetch);
        return Err(e).with_context(|| format!("cannot subscribe to {}", settings.input_topic));
    }
    tracing::info!(topic = %settings.input_topic, group = %cfg.kafka.group_id, "consuming");
    let stop = shutdown.clone();
    tokio::task::spawn_blocking(move || source::run(consumer, rebalances, fetch, fence, served, pipeline, stop))
        .await
        .context("the consumer thread failed")?;
    let _ = tokio::task::spawn_blocking(move || follower.join()).await;
    Ok(())
}
