//! The input partitions' messages on a queue of the sidecar's own, taken in batches.
//!
//! `BaseConsumer::poll` returns one message a call, and each call costs three clock reads
//! (librdkafka's bookkeeping for `max.poll.interval.ms` at the start and the end of every poll,
//! and the rdkafka crate's own deadline), an event wrapper and a queue lock: together about a
//! sixth of the sidecar's CPU at 140 000 events/s (a perf profile; BENCHMARKS.md). librdkafka's
//! batch call does the bookkeeping once per batch. It cannot be used on the consumer's own queue,
//! which also carries the rebalances: the batch call would serve a rebalance as if no handler
//! were set, and unassign (librdkafka 2.12, `rd_kafka_poll_cb`). So the fetch queue of every
//! partition is forwarded to a [`FetchQueue`] before the partition is assigned, and the
//! consumer's own queue keeps only rebalances, errors and statistics, which `poll` serves.
//!
//! librdkafka drops a partition's forwarding when it stops fetching it (a revocation), and a
//! partition forwarded once is never forwarded to the consumer's queue again, so
//! [`FetchQueue::route`] must be called on every assignment, before `assign`.

use std::ffi::{c_int, CString};
use std::time::Duration;

use rdkafka::bindings as rd;
use rdkafka::consumer::{BaseConsumer, Consumer, ConsumerContext};

/// A queue of the consumer's client that input partitions are routed to.
pub struct FetchQueue {
    queue: *mut rd::rd_kafka_queue_t,
}

// SAFETY: librdkafka's queue handles may be used from any thread; the handle is only destroyed
// on drop, when no other reference to `self` is left.
unsafe impl Send for FetchQueue {}
unsafe impl Sync for FetchQueue {}

impl FetchQueue {
    /// A new, empty queue of `consumer`'s client. It must be dropped before the consumer.
    pub fn new<C: ConsumerContext>(consumer: &BaseConsumer<C>) -> FetchQueue {
        // SAFETY: the client pointer is valid for as long as `consumer`; the queue holds its
        // own reference to the client's internals.
        let queue = unsafe { rd::rd_kafka_queue_new(consumer.client().native_ptr()) };
        assert!(!queue.is_null(), "librdkafka could not create a queue");
        FetchQueue { queue }
    }

    /// Routes `topic`'s `partition` here: its messages, from now on and those it holds, come
    /// from [`FetchQueue::take`] instead of `poll`. Call it for every partition of an assignment,
    /// before `assign`. `false` (nothing routed) only for a topic name librdkafka refuses.
    pub fn route<C: ConsumerContext>(&self, consumer: &BaseConsumer<C>, topic: &str, partition: i32) -> bool {
        let Ok(name) = CString::new(topic) else { return false };
        // SAFETY: valid client and NUL-terminated name; the partition's queue handle is a new
        // reference, released right after forwarding (the forwarding holds its own).
        unsafe {
            let part = rd::rd_kafka_queue_get_partition(consumer.client().native_ptr(), name.as_ptr(), partition);
            if part.is_null() {
                return false;
            }
            rd::rd_kafka_queue_forward(part, self.queue);
            rd::rd_kafka_queue_destroy(part);
        }
        true
    }

    /// Appends to `batch` the messages this queue already holds, up to its capacity; when it
    /// holds none, waits up to `wait` for one. The number appended.
    pub fn take(&self, batch: &mut Batch, wait: Duration) -> usize {
        let room = batch.capacity - batch.messages.len();
        let mut got = self.take_within(batch, room, 0);
        if got == 0 && !wait.is_zero() {
            // The batch call waits until it has filled its room or the time is up: ask for one
            // message, so that it returns as soon as one arrives.
            got = self.take_within(batch, room.min(1), wait.as_millis().clamp(1, c_int::MAX as u128) as c_int);
        }
        got
    }

    fn take_within(&self, batch: &mut Batch, room: usize, timeout_ms: c_int) -> usize {
        if room == 0 {
            return 0;
        }
        let len = batch.messages.len();
        // SAFETY: the vector has room for `room` more pointers (its capacity is the batch's);
        // librdkafka writes at most `room` of them and says how many, and the length is set to
        // exactly that. Each message is owned by the batch until it is destroyed.
        unsafe {
            let n = rd::rd_kafka_consume_batch_queue(self.queue, timeout_ms, batch.messages.as_mut_ptr().add(len), room);
            if n <= 0 {
                return 0;
            }
            let n = (n as usize).min(room);
            batch.messages.set_len(len + n);
            n
        }
    }
}

impl Drop for FetchQueue {
    fn drop(&mut self) {
        // SAFETY: the handle was created by `rd_kafka_queue_new` and is destroyed once. As the
        // owner's handle it disables the queue and frees what it still holds.
        unsafe { rd::rd_kafka_queue_destroy(self.queue) }
    }
}

/// Messages taken from a [`FetchQueue`], owned until [`Batch::clear`] (or drop) gives them back.
pub struct Batch {
    messages: Vec<*mut rd::rd_kafka_message_t>,
    capacity: usize,
}

// SAFETY: librdkafka messages may be read and destroyed on any thread.
unsafe impl Send for Batch {}

impl Batch {
    pub fn with_capacity(capacity: usize) -> Batch {
        Batch { messages: Vec::with_capacity(capacity.max(1)), capacity: capacity.max(1) }
    }

    pub fn get(&self, i: usize) -> Option<Fetched<'_>> {
        // SAFETY: every pointer is a live message owned by this batch.
        self.messages.get(i).map(|&m| Fetched(unsafe { &*m }))
    }

    pub fn iter(&self) -> impl Iterator<Item = Fetched<'_>> {
        // SAFETY: every pointer is a live message owned by this batch.
        self.messages.iter().map(|&m| Fetched(unsafe { &*m }))
    }

    /// Destroys the messages, letting librdkafka reuse their memory.
    pub fn clear(&mut self) {
        for m in self.messages.drain(..) {
            // SAFETY: each message came from the batch call and is destroyed once.
            unsafe { rd::rd_kafka_message_destroy(m) }
        }
    }
}

impl Drop for Batch {
    fn drop(&mut self) {
        self.clear();
    }
}

/// One message of a [`Batch`]: a Kafka record, or an error the client reports in its place.
#[derive(Clone, Copy)]
pub struct Fetched<'a>(&'a rd::rd_kafka_message_t);

impl<'a> Fetched<'a> {
    pub fn partition(&self) -> i32 {
        self.0.partition
    }

    pub fn offset(&self) -> i64 {
        self.0.offset
    }

    /// The client's error in place of a record (`None` for a record).
    pub fn error(&self) -> Option<rdkafka::error::KafkaError> {
        use rdkafka::types::{RDKafkaErrorCode, RDKafkaRespErr};
        (self.0.err != RDKafkaRespErr::RD_KAFKA_RESP_ERR_NO_ERROR)
            .then(|| rdkafka::error::KafkaError::MessageConsumption(RDKafkaErrorCode::from(self.0.err)))
    }

    pub fn key(&self) -> Option<&'a [u8]> {
        bytes(self.0.key, self.0.key_len)
    }

    pub fn payload(&self) -> Option<&'a [u8]> {
        bytes(self.0.payload, self.0.len)
    }

    /// Asks the processor to start loading the first 256 bytes of the payload, without waiting.
    /// (The client's network thread wrote them on another core.)
    #[inline(always)]
    pub fn prefetch(&self) {
        #[cfg(target_arch = "x86_64")]
        if let Some(p) = self.payload() {
            use std::arch::x86_64::{_mm_prefetch, _MM_HINT_T0};
            for off in (0..p.len().min(256)).step_by(64) {
                // SAFETY: a prefetch is a hint; the address lies inside the payload.
                unsafe { _mm_prefetch::<_MM_HINT_T0>(p.as_ptr().add(off).cast()) }
            }
        }
    }
}

fn bytes<'a>(ptr: *mut std::ffi::c_void, len: usize) -> Option<&'a [u8]> {
    // SAFETY: librdkafka gives a pointer to `len` bytes that live as long as the message.
    (!ptr.is_null()).then(|| unsafe { std::slice::from_raw_parts(ptr as *const u8, len) })
}
