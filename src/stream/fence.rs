//! Fencing: an instance that may have lost its partitions writes nothing for them until it
//! knows it still owns them.
//!
//! A process that was paused (SIGSTOP, a frozen VM, a long stall) past its session may have had
//! its partitions given to another member while it slept. On waking, its threads run again at
//! once, and its consumer thread would publish weights and write snapshots from state that is
//! now stale before librdkafka had a chance to notice. Two checks stand before every write
//! round:
//!
//! - librdkafka's own word: `rd_kafka_assignment_lost`, true once the client learnt (a failed
//!   heartbeat, its own session timer) that the group moved on without it;
//! - a pause watch: a small thread ticks every [`TICK`]; a gap between ticks longer than half
//!   the session timeout means the whole process stood still, and writes are held for two
//!   heartbeat intervals and a second more, time enough for librdkafka's session check (run at
//!   least every second) and one heartbeat's answer to declare the assignment lost. A gap seen
//!   by the writer before the watch thread ran again counts the same.
//!
//! A fresh assignment ends the hold: its state was just restored from the snapshots. Behind
//! both checks, snapshots carry the consumer group generation, and a restore prefers the newest
//! generation (`snapshot::preferred`), so that a write that slipped through cannot shadow the
//! new owner's.

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Weak};
use std::time::{Duration, Instant};

use rdkafka::bindings as rd;
use rdkafka::consumer::{BaseConsumer, Consumer, ConsumerContext};

/// How often the pause watch ticks.
pub const TICK: Duration = Duration::from_millis(100);

/// librdkafka's defaults, used when the configuration does not set them.
const DEFAULT_SESSION_MS: u64 = 45_000;
const DEFAULT_HEARTBEAT_MS: u64 = 3_000;

pub struct Fence {
    started: Instant,
    /// Milliseconds since `started` of the watch's last tick.
    last_tick_ms: AtomicU64,
    /// Milliseconds since `started` at which the last pause ended; 0 for none.
    pause_ended_ms: AtomicU64,
    /// A gap between ticks longer than this is a pause.
    pause_ms: u64,
    /// Writes are held this long after a pause.
    hold_ms: u64,
}

impl Fence {
    /// A fence for a consumer with these librdkafka properties (`session.timeout.ms` and
    /// `heartbeat.interval.ms` are read; librdkafka's defaults stand in for missing ones). The
    /// pause watch thread runs as long as the fence lives.
    pub fn start(client: &std::collections::BTreeMap<String, String>) -> std::io::Result<Arc<Fence>> {
        let read = |key: &str, default: u64| client.get(key).and_then(|v| v.trim().parse::<u64>().ok()).unwrap_or(default);
        let session = read("session.timeout.ms", DEFAULT_SESSION_MS);
        let heartbeat = read("heartbeat.interval.ms", DEFAULT_HEARTBEAT_MS);
        let fence = Arc::new(Fence::new(session, heartbeat));
        let watch: Weak<Fence> = Arc::downgrade(&fence);
        std::thread::Builder::new().name("apportion-pause-watch".into()).spawn(move || {
            while let Some(f) = watch.upgrade() {
                f.tick();
                drop(f);
                std::thread::sleep(TICK);
            }
        })?;
        Ok(fence)
    }

    fn new(session_ms: u64, heartbeat_ms: u64) -> Fence {
        Fence {
            started: Instant::now(),
            last_tick_ms: AtomicU64::new(0),
            pause_ended_ms: AtomicU64::new(0),
            pause_ms: (session_ms / 2).max(TICK.as_millis() as u64 * 10),
            hold_ms: 2 * heartbeat_ms + 1_000,
        }
    }

    fn now_ms(&self) -> u64 {
        self.started.elapsed().as_millis() as u64
    }

    /// Notes the time, and a pause if the last tick is too long ago.
    fn tick(&self) {
        let now = self.now_ms();
        let last = self.last_tick_ms.swap(now, Ordering::SeqCst);
        self.note_gap(now, last);
    }

    fn note_gap(&self, now: u64, last: u64) {
        if now.saturating_sub(last) > self.pause_ms {
            let previous = self.pause_ended_ms.swap(now.max(1), Ordering::SeqCst);
            if now.saturating_sub(previous) > self.hold_ms {
                tracing::warn!(
                    paused_ms = now - last,
                    hold_ms = self.hold_ms,
                    "the process stood still longer than half its session; no writes until the assignment is confirmed"
                );
            }
        }
    }

    /// Whether a write round may run now: the assignment is not known to be lost, and no
    /// pause is recent.
    pub fn may_write<C: ConsumerContext>(&self, consumer: &BaseConsumer<C>) -> bool {
        if consumer.assignment_lost() {
            return false;
        }
        self.clear_at(self.now_ms())
    }

    /// Whether no pause holds writes back at `now` (ms since the start).
    fn clear_at(&self, now: u64) -> bool {
        self.note_gap(now, self.last_tick_ms.load(Ordering::SeqCst));
        let ended = self.pause_ended_ms.load(Ordering::SeqCst);
        ended == 0 || now.saturating_sub(ended) >= self.hold_ms
    }

    /// A fresh assignment: its state comes from the snapshots, so a pause before it holds
    /// nothing back.
    pub fn assigned(&self) {
        self.pause_ended_ms.store(0, Ordering::SeqCst);
    }
}

/// The consumer group generation the consumer is in now (-1 when it has none).
pub fn group_generation<C: ConsumerContext>(consumer: &BaseConsumer<C>) -> i32 {
    // SAFETY: the client handle is valid for the consumer's lifetime; the metadata object is
    // created, read and destroyed here, and a null one (no group) is not touched.
    unsafe {
        let md = rd::rd_kafka_consumer_group_metadata(consumer.client().native_ptr());
        if md.is_null() {
            return -1;
        }
        let generation = rd::rd_kafka_consumer_group_metadata_generation_id(md);
        rd::rd_kafka_consumer_group_metadata_destroy(md);
        generation
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_gap_longer_than_half_the_session_holds_writes_for_the_hold_time() {
        let f = Fence::new(6_000, 1_000);
        assert!(f.clear_at(0));
        // Ticks 100 ms apart: no pause.
        f.note_gap(1_100, 1_000);
        assert_eq!(f.pause_ended_ms.load(Ordering::SeqCst), 0);
        // A 3.5 s gap with a 6 s session: a pause that ended at 10 000 ms.
        f.note_gap(10_000, 6_500);
        assert_eq!(f.pause_ended_ms.load(Ordering::SeqCst), 10_000);
        assert_eq!(f.hold_ms, 3_000);
        f.assigned();
        assert_eq!(f.pause_ended_ms.load(Ordering::SeqCst), 0);
    }

    #[test]
    fn a_writer_that_wakes_before_the_watch_sees_the_pause_itself() {
        let f = Fence::new(10_000, 1_000);
        // The watch last ticked at 0 and has not run since; the writer asks at 6 s.
        assert!(!f.clear_at(6_000), "the writer notices the gap");
        f.last_tick_ms.store(6_100, Ordering::SeqCst);
        assert!(!f.clear_at(8_000), "held for 3 s after the pause");
        f.last_tick_ms.store(8_950, Ordering::SeqCst);
        assert!(f.clear_at(9_000), "free once the hold is over");
    }
}
