//! The streaming half: Kafka in, weights and snapshots out, around the pure core.
//!
//! ```text
//! input topic → source (consume · decode · validate · dedupe) → core (stats → policy → bounds)
//!                     │ rejected → dead-letter topic                    │ weights → weights topic
//!                     └ offsets + statistics → state topic (snapshots)  └ metrics → /metrics
//! ```

pub mod checkpoint;
pub mod counts;
pub mod dedup;
pub mod fence;
pub mod fetch;
pub mod offset;
pub mod partition;
pub mod pipeline;
pub mod producer;
pub mod publisher;
pub mod restore;
pub mod resume;
pub mod settings;
pub mod snapshot;
pub mod source;
pub mod topics;

use std::sync::Arc;

use anyhow::{anyhow, Context as _};
use rdkafka::config::ClientConfig;
use rdkafka::consumer::{BaseConsumer, Consumer};

use crate::config::Config;
use crate::shutdown::Shutdown;
use crate::telemetry::http::Served;
use pipeline::Pipeline;
use settings::Settings;
use source::SourceContext;

/// A client configuration with the operator's librdkafka properties passed through.
pub fn client_config(cfg: &Config) -> ClientConfig {
    let mut c = ClientConfig::new();
    c.set("bootstrap.servers", &cfg.kafka.brokers);
    for (k, v) in &cfg.kafka.client {
        c.set(k, v);
    }
    c
}

/// Runs the sidecar until `shutdown`: creates missing topics (retrying while the broker is
/// unreachable), then consumes, applies, publishes and snapshots.
pub async fn run(cfg: Config, served: Arc<Served>, shutdown: Shutdown) -> anyhow::Result<()> {
    let settings = Arc::new(Settings::from_config(&cfg).map_err(|e| anyhow!(e))?);
    topics::ensure_topics(&cfg, &shutdown).await?;
    if shutdown.is_triggered() {
        return Ok(());
    }
    let state_reader: BaseConsumer = client_config(&cfg)
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
    let mut c = client_config(&cfg);
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
    Ok(())
}
