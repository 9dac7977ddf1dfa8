//! The control follower: every instance reads the whole control topic at start and follows it
//! while running, so that all instances hold the same definitions; the pipeline of the owning
//! instance acts on them at its next publish round.

use std::sync::Arc;
use std::time::{Duration, Instant};

use super::reader::TopicReader;
use super::registry::Registry;
use crate::config::Config;
use crate::shutdown::Shutdown;

/// Starts following `kafka.control_topic` into `registry` on a thread of its own, until
/// `shutdown`. The registry says when the topic has been read to its end.
pub fn start(cfg: &Config, registry: Arc<Registry>, shutdown: Shutdown) -> anyhow::Result<std::thread::JoinHandle<()>> {
    let mut reader = TopicReader::open(cfg, &cfg.kafka.control_topic, "control-reader")?;
    let handle = std::thread::Builder::new().name("control".into()).spawn(move || {
        let started = Instant::now();
        let mut errors = 0u32;
        while !shutdown.is_triggered() {
            let mut offer = |offset: i64, key: Option<&[u8]>, value: Option<&[u8]>| {
                registry.offer(offset, key, value);
            };
            match reader.read(Duration::from_millis(200), &mut offer) {
                Ok(true) if !registry.is_caught_up() => {
                    registry.set_caught_up();
                    tracing::info!(
                        topic = reader.topic(),
                        definitions = registry.all().len(),
                        read_ms = started.elapsed().as_millis() as u64,
                        "control topic read to its end"
                    );
                }
                Ok(_) => errors = 0,
                Err(e) => {
                    if errors < 20 {
                        tracing::warn!("{e}");
                    }
                    errors += 1;
                    std::thread::sleep(Duration::from_millis(200));
                }
            }
        }
    })?;
    Ok(handle)
}
