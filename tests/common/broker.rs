//! The broker scripts/test started, and plain clients to create, feed and read its topics.

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

use rdkafka::config::ClientConfig;
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::message::{BorrowedMessage, Headers, Message, OwnedMessage};
use rdkafka::producer::{BaseProducer, BaseRecord, DeliveryResult, Producer, ProducerContext};
use rdkafka::{ClientContext, Offset, TopicPartitionList};

use super::unique;

const VAR: &str = "TEST_KAFKA_BROKERS";

/// True when no broker was given, after saying on stderr that the calling test is skipped.
pub fn no_broker() -> bool {
    if std::env::var_os(VAR).is_some_and(|v| !v.is_empty()) {
        return false;
    }
    let test = std::thread::current().name().unwrap_or("this test").to_string();
    // Written to the stream itself, past the test harness's capture, so that it shows.
    use std::io::Write;
    let _ = writeln!(std::io::stderr(), "skipped {test}: it needs a Kafka broker and {VAR} is unset (scripts/test starts one and sets it)");
    true
}

/// The broker's address. Call [`no_broker`] first: this panics without one.
pub fn brokers() -> String {
    std::env::var(VAR).unwrap_or_else(|_| panic!("{VAR} is not set: the test should have begun with `if no_broker() {{ return; }}`"))
}

/// Creates `topics` with `partitions` partitions each (those that exist are left alone).
pub fn create_topics(topics: &[&str], partitions: i32) {
    use rdkafka::admin::{AdminClient, AdminOptions, NewTopic, TopicReplication};
    let admin: AdminClient<rdkafka::client::DefaultClientContext> =
        ClientConfig::new().set("bootstrap.servers", brokers()).create().expect("admin client");
    let new: Vec<NewTopic> = topics.iter().map(|t| NewTopic::new(t, partitions, TopicReplication::Fixed(1))).collect();
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().expect("runtime");
    let results = rt
        .block_on(admin.create_topics(&new, &AdminOptions::new().operation_timeout(Some(Duration::from_secs(10)))))
        .expect("create topics");
    for r in results {
        if let Err((name, code)) = r {
            assert_eq!(code, rdkafka::types::RDKafkaErrorCode::TopicAlreadyExists, "cannot create {name}");
        }
    }
}

/// Produces `(key, value)` messages and waits until the broker has them all.
pub fn produce(topic: &str, messages: &[(String, Vec<u8>)]) {
    let p: BaseProducer = ClientConfig::new().set("bootstrap.servers", brokers()).set("linger.ms", "5").create().expect("producer");
    for (k, v) in messages {
        send(&p, topic, k, v);
        p.poll(Duration::ZERO);
    }
    p.flush(Duration::from_secs(30)).expect("all messages delivered");
}

/// Queues one message, serving the producer while its queue is full.
pub fn send(p: &BaseProducer, topic: &str, key: &str, value: &[u8]) {
    let mut rec = BaseRecord::to(topic).key(key.as_bytes()).payload(value);
    loop {
        match p.send(rec) {
            Ok(()) => return,
            Err((_, r)) => {
                rec = r;
                p.poll(Duration::from_millis(20));
            }
        }
    }
}

#[derive(Default)]
struct Deliveries {
    failed: AtomicU64,
}

impl ClientContext for Deliveries {}

impl ProducerContext for Deliveries {
    type DeliveryOpaque = ();
    fn delivery(&self, result: &DeliveryResult<'_>, _: ()) {
        if result.is_err() {
            self.failed.fetch_add(1, Ordering::Relaxed);
        }
    }
}

/// Produces `n` messages made by `message(i)` in large batches, polling as it goes; returns once
/// the broker has confirmed every one of them (panics on a failed delivery).
pub fn produce_batched(topic: &str, n: usize, mut message: impl FnMut(usize) -> (String, String)) {
    let p: BaseProducer<Deliveries> = ClientConfig::new()
        .set("bootstrap.servers", brokers())
        .set("linger.ms", "50")
        .set("batch.num.messages", "10000")
        .set("queue.buffering.max.messages", "1000000")
        .set("compression.type", "lz4")
        .create_with_context(Deliveries::default())
        .expect("producer");
    for i in 0..n {
        let (key, value) = message(i);
        let mut record = BaseRecord::to(topic).key(&key).payload(&value);
        let mut full = 0;
        loop {
            match p.send(record) {
                Ok(()) => break,
                Err((e, r)) => {
                    full += 1;
                    assert!(full < 6_000, "producer queue full for five minutes: {e}");
                    record = r;
                    p.poll(Duration::from_millis(50));
                }
            }
        }
        if i % 1_000 == 0 {
            p.poll(Duration::ZERO);
        }
    }
    p.flush(Duration::from_secs(300)).expect("every message delivered within five minutes");
    assert_eq!(p.context().failed.load(Ordering::Relaxed), 0, "failed deliveries");
}

fn reader(eof: bool) -> BaseConsumer {
    ClientConfig::new()
        .set("bootstrap.servers", brokers())
        .set("group.id", unique("reader"))
        .set("enable.auto.commit", "false")
        .set("enable.partition.eof", if eof { "true" } else { "false" })
        .create()
        .expect("consumer")
}

/// Assigns every partition of `topic` from the beginning; returns the partitions.
fn assign_all(c: &BaseConsumer, topic: &str) -> Vec<i32> {
    let md = c.fetch_metadata(Some(topic), Duration::from_secs(10)).expect("metadata");
    let mut tpl = TopicPartitionList::new();
    let mut parts = Vec::new();
    for t in md.topics().iter().filter(|t| t.name() == topic) {
        for p in t.partitions() {
            tpl.add_partition_offset(topic, p.id(), Offset::Beginning).expect("offset");
            parts.push(p.id());
        }
    }
    c.assign(&tpl).expect("assign");
    parts
}

/// Reads `topic` from the beginning until `enough` says so of what was read, or `within` has
/// passed: for waiting on messages still to come.
pub fn read_topic(topic: &str, within: Duration, mut enough: impl FnMut(&[OwnedMessage]) -> bool) -> Vec<OwnedMessage> {
    let c = reader(false);
    assign_all(&c, topic);
    let mut out = Vec::new();
    let deadline = Instant::now() + within;
    while Instant::now() < deadline && !enough(&out) {
        if let Some(Ok(m)) = c.poll(Duration::from_millis(200)) {
            out.push(m.detach());
        }
    }
    out
}

/// Reads `topic` from the beginning until every partition reports its end, handing each
/// message to `f`; panics when that takes longer than `within`. The end comes from the fetch
/// (librdkafka's partition EOF), not from the partitions' watermarks: tansu 0.6.0 reports as
/// high watermark the base offset of the last batch plus one, short of the last offset when
/// that batch holds more than one message.
pub fn scan_topic(topic: &str, within: Duration, mut f: impl FnMut(&BorrowedMessage<'_>)) {
    let c = reader(true);
    let mut open = assign_all(&c, topic);
    assert!(!open.is_empty(), "{topic} has no partitions");
    let deadline = Instant::now() + within;
    while !open.is_empty() && Instant::now() < deadline {
        match c.poll(Duration::from_millis(200)) {
            Some(Ok(m)) => f(&m),
            Some(Err(rdkafka::error::KafkaError::PartitionEOF(p))) => open.retain(|&q| q != p),
            _ => {}
        }
    }
    assert!(open.is_empty(), "{topic}: partitions {open:?} not read to their end within {within:?}");
}

/// Every message `topic` holds now.
pub fn read_whole_topic(topic: &str, within: Duration) -> Vec<OwnedMessage> {
    let mut out = Vec::new();
    scan_topic(topic, within, |m| out.push(m.detach()));
    out
}

/// The value of header `key` of a message, as text.
pub fn header<M: Message>(m: &M, key: &str) -> Option<String> {
    m.headers()?.iter().find(|h| h.key == key).and_then(|h| h.value).map(|v| String::from_utf8_lossy(v).to_string())
}

/// Dead letters on `topic`, by the reason in their `apportion-reason` header.
pub fn dead_letters_by_reason(topic: &str) -> BTreeMap<String, u64> {
    let mut out = BTreeMap::new();
    scan_topic(topic, Duration::from_secs(300), |m| {
        *out.entry(header(m, "apportion-reason").unwrap_or_else(|| "(none)".to_string())).or_default() += 1;
    });
    out
}

/// Streams `messages` in chunks over about `seconds`, on its own thread.
pub fn stream_in_background(brokers: String, topic: String, messages: Vec<(String, Vec<u8>)>, seconds: f64) -> std::thread::JoinHandle<()> {
    std::thread::spawn(move || {
        let p: BaseProducer = ClientConfig::new()
            .set("bootstrap.servers", &brokers)
            .set("linger.ms", "20")
            .set("queue.buffering.max.messages", "1000000")
            .set("message.timeout.ms", "300000")
            .create()
            .expect("producer");
        let chunks = 100usize;
        let per = messages.len().div_ceil(chunks);
        for chunk in messages.chunks(per.max(1)) {
            for (k, v) in chunk {
                send(&p, &topic, k, v);
            }
            p.poll(Duration::ZERO);
            std::thread::sleep(Duration::from_secs_f64(seconds / chunks as f64));
        }
        p.flush(Duration::from_secs(300)).expect("every event delivered");
    })
}
