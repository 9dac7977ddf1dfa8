//! The sidecar's topics: created when missing (if allowed), and their partition counts.

use std::time::Duration;

use anyhow::{anyhow, Context as _};
use rdkafka::admin::{AdminClient, AdminOptions, NewTopic, TopicReplication};
use rdkafka::client::DefaultClientContext;
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::error::KafkaError;
use rdkafka::types::RDKafkaErrorCode;

use crate::config::Config;
use crate::shutdown::Shutdown;

/// How many partitions `topic` has; an error when it has none.
pub fn partition_count(client: &BaseConsumer, topic: &str) -> anyhow::Result<i32> {
    let md = client
        .fetch_metadata(Some(topic), Duration::from_secs(10))
        .with_context(|| format!("cannot read metadata of {topic}"))?;
    let n = md.topics().iter().find(|t| t.name() == topic).map_or(0, |t| t.partitions().len() as i32);
    if n == 0 {
        return Err(anyhow!("topic {topic} has no partitions; create it (compacted) or set kafka.create_topics = true"));
    }
    Ok(n)
}

/// Creates the topics that are missing; waits with back-off while the broker is unreachable.
pub async fn ensure_topics(cfg: &Config, shutdown: &Shutdown) -> anyhow::Result<()> {
    let k = &cfg.kafka;
    let admin: AdminClient<DefaultClientContext> = cfg.client_config().create().context("cannot create the admin client")?;
    // The control topic has one partition: it is small, and one partition keeps every
    // instance reading its records in the same order.
    let wanted = [
        (&k.input_topic, None, k.topic_partitions),
        (&k.weights_topic, Some("compact"), k.topic_partitions),
        (&k.state_topic, Some("compact"), k.topic_partitions),
        (&k.dead_letter_topic, Some("delete"), k.topic_partitions),
        (&k.control_topic, Some("compact"), 1),
    ];
    let mut delay = Duration::from_millis(500);
    loop {
        if shutdown.is_triggered() {
            return Ok(());
        }
        match admin.inner().fetch_metadata(None, Duration::from_secs(5)) {
            Ok(md) => {
                let existing: Vec<&str> = md.topics().iter().map(|t| t.name()).collect();
                let missing: Vec<_> = wanted.iter().filter(|(n, _, _)| !existing.contains(&n.as_str())).collect();
                if missing.is_empty() {
                    return Ok(());
                }
                if !k.create_topics {
                    let names: Vec<&str> = missing.iter().map(|(n, _, _)| n.as_str()).collect();
                    return Err(anyhow!(
                        "topics {} do not exist and kafka.create_topics is off; create them (weights, state and control with cleanup.policy=compact)",
                        names.join(", ")
                    ));
                }
                let topics: Vec<NewTopic> = missing
                    .iter()
                    .map(|(n, policy, partitions)| {
                        let t = NewTopic::new(n, *partitions, TopicReplication::Fixed(k.replication_factor));
                        match policy {
                            Some(p) => t.set("cleanup.policy", p),
                            None => t,
                        }
                    })
                    .collect();
                let results = admin
                    .create_topics(&topics, &AdminOptions::new().operation_timeout(Some(Duration::from_secs(10))))
                    .await;
                match results {
                    Ok(rs) => {
                        for r in rs {
                            match r {
                                Ok(name) => tracing::info!(topic = %name, "created topic"),
                                Err((_, RDKafkaErrorCode::TopicAlreadyExists)) => {}
                                Err((name, code @ (RDKafkaErrorCode::TopicAuthorizationFailed | RDKafkaErrorCode::ClusterAuthorizationFailed | RDKafkaErrorCode::PolicyViolation))) => {
                                    return Err(anyhow!(
                                        "the broker refused to create topic {name} ({code}); create it yourself (weights, state and control topics with cleanup.policy=compact) or grant this client CreateTopics, then start again"
                                    ));
                                }
                                Err((name, code)) => tracing::warn!(topic = %name, "cannot create topic yet: {code}"),
                            }
                        }
                    }
                    Err(e) => tracing::warn!("cannot create topics yet: {e}"),
                }
            }
            Err(KafkaError::MetadataFetch(code)) => tracing::warn!("broker not reachable yet ({code}); retrying in {delay:?}"),
            Err(e) => tracing::warn!("broker not reachable yet ({e}); retrying in {delay:?}"),
        }
        tokio::select! {
            _ = tokio::time::sleep(delay) => {},
            _ = shutdown.wait() => {},
        }
        delay = (delay * 2).min(Duration::from_secs(30));
    }
}
