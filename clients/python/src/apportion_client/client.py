"""The service client: follows the weights topic, assigns units, writes impressions and rewards.

``confluent_kafka`` is imported only where the Kafka objects are created (``start()`` and the
first write), so the client can be built, fed and tested without it.
"""

from __future__ import annotations

import itertools
import logging
import secrets
import threading
import time
from typing import Any, Callable, Dict, Iterable, List, Mapping, Optional, Sequence, Tuple

from .events import Assignment, Impression, encode, impression_event, reward_event
from .hashing import Arm, choose, prepare_arms, unit_key, unit_key_from_prefix
from .table import IGNORED_VERSION, UNREADABLE, Held, Key, Value, WeightsTable

__all__ = ["COUNTERS", "Client", "Fallback", "Unassignable", "wall_clock_ms"]

log = logging.getLogger("apportion_client")

#: The names ``Client.counters()`` returns, always all of them.
COUNTERS: Tuple[str, ...] = (
    "assignments_weights",
    "assignments_fallback",
    "fallback_missing",
    "fallback_stale",
    "fallback_retired",
    "unassignable",
    "ignored_versions",
    "unreadable_messages",
    "impressions_written",
    "rewards_written",
)


def wall_clock_ms() -> int:
    """Milliseconds since the Unix epoch, from the system clock."""
    return time.time_ns() // 1_000_000


class Unassignable(Exception):
    """No usable weights for ``experiment`` and no fallback configured for it.

    ``reason`` is why the weights could not be used: ``"missing"``, ``"stale"`` or ``"retired"``.
    """

    def __init__(self, experiment: str, reason: str) -> None:
        super().__init__(f"cannot assign a unit of experiment {experiment!r}: weights {reason} and no fallback configured")
        self.experiment = experiment
        self.reason = reason


class Fallback:
    """What to do for an experiment whose weights are missing, stale or retired.

    Build one with ``Fallback.arm(name)`` (every unit to that arm, propensity 1.0) or
    ``Fallback.even(arms)`` (the same rendezvous hash as for published weights, over equal
    weights of ``arms``, propensity 1/len(arms)). ``kind`` is ``"arm"`` or ``"even"``; ``arms``
    the arm names, sorted and without repeats.
    """

    __slots__ = ("kind", "arms", "_prepared")

    kind: str
    arms: Tuple[str, ...]
    _prepared: Tuple[Arm, ...]

    def __init__(self, kind: str, arms: Sequence[str]) -> None:
        if kind not in ("arm", "even"):
            raise ValueError(f"unknown fallback kind {kind!r}")
        names = tuple(sorted(set(arms)))
        if not names:
            raise ValueError("a fallback needs at least one arm")
        if any(not isinstance(n, str) or not n for n in names):
            raise ValueError("arm names must be non-empty strings")
        if kind == "arm" and len(names) != 1:
            raise ValueError("Fallback.arm takes exactly one arm")
        self.kind = kind
        self.arms = names
        self._prepared = prepare_arms((n, 1.0) for n in names)

    @classmethod
    def arm(cls, name: str) -> "Fallback":
        """Every unit to arm ``name``, with propensity 1.0."""
        return cls("arm", (name,))

    @classmethod
    def even(cls, arms: Sequence[str]) -> "Fallback":
        """Units spread evenly over ``arms`` by rendezvous hashing, propensity 1/len(arms)."""
        if isinstance(arms, str):
            raise TypeError("Fallback.even takes a sequence of arm names, not one string")
        return cls("even", arms)

    def pick(self, experiment: str, unit: str) -> Tuple[str, float]:
        """The arm and propensity this fallback gives ``unit`` of ``experiment``."""
        if self.kind == "arm":
            return self.arms[0], 1.0
        i = choose(unit_key(experiment, unit), self._prepared)
        return self._prepared[i][0], 1.0 / len(self._prepared)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Fallback) and (self.kind, self.arms) == (other.kind, other.arms)

    def __hash__(self) -> int:
        return hash((self.kind, self.arms))

    def __repr__(self) -> str:
        if self.kind == "arm":
            return f"Fallback.arm({self.arms[0]!r})"
        return f"Fallback.even({list(self.arms)!r})"


class Client:
    """Assigns units to arms with the weights the sidecar publishes, and reports what it did.

    ``brokers`` is the bootstrap list (``host:port,...``). ``max_age_seconds``: weights published
    longer ago than this (by ``clock``) are stale and not used. ``fallbacks`` per experiment, and
    ``default_fallback`` for the others, say what to do without usable weights; with neither,
    ``assign`` raises ``Unassignable``. ``kafka`` holds librdkafka properties given to both the
    consumer and the producer (security settings, for example), over the client's own defaults.
    ``clock`` returns milliseconds since the epoch; it judges staleness and stamps events whose
    time is not given. ``producer`` may be any object with the ``produce``, ``poll`` and ``flush``
    methods of ``confluent_kafka.Producer`` (tests use one); by default such a producer is
    created on the first write.

    Nothing touches Kafka until ``start()`` (the weights consumer) or the first write (the
    producer). ``assign`` takes no lock of the table: it reads the table's current dict.
    """

    def __init__(
        self,
        brokers: str,
        *,
        weights_topic: str = "apportion.weights",
        input_topic: str = "apportion.events",
        max_age_seconds: float = 300.0,
        fallbacks: Optional[Mapping[str, Fallback]] = None,
        default_fallback: Optional[Fallback] = None,
        kafka: Optional[Mapping[str, str]] = None,
        clock: Callable[[], int] = wall_clock_ms,
        producer: Any = None,
    ) -> None:
        if not max_age_seconds >= 0.0:
            raise ValueError("max_age_seconds must be >= 0")
        self.brokers = brokers
        self.weights_topic = weights_topic
        self.input_topic = input_topic
        self.max_age_seconds = float(max_age_seconds)
        self._max_age_ms = self.max_age_seconds * 1000.0
        self._fallbacks: Dict[str, Fallback] = dict(fallbacks or {})
        self._default_fallback = default_fallback
        self._kafka: Dict[str, Any] = dict(kafka or {})
        self._clock = clock
        self._table = WeightsTable()

        self._count_lock = threading.Lock()
        self._counts: Dict[str, int] = dict.fromkeys(COUNTERS, 0)

        self._event_prefix = secrets.token_hex(8)
        self._impression_seq = itertools.count(1)
        self._reward_seq = itertools.count(1)

        self._producer = producer
        self._producer_lock = threading.Lock()

        self._stop = threading.Event()
        self._loaded = threading.Event()
        self._thread: Optional[threading.Thread] = None
        self._closed = False
        #: The last error the consumer thread met, an exception or a ``confluent_kafka.KafkaError``
        #: (None until one happens; not cleared when the thread recovers).
        self.consumer_error: Optional[object] = None

    # ----------------------------------------------------------------- weights

    @property
    def table(self) -> WeightsTable:
        """The weights held (fed by the consumer thread, or by ``offer``)."""
        return self._table

    @property
    def event_prefix(self) -> str:
        """The 16 hex characters that start this client's event ids."""
        return self._event_prefix

    def offer(self, key: Key, value: Value) -> str:
        """Offers one weights message to the table, as the consumer thread does; returns the outcome."""
        return self.offer_batch(((key, value),))[0]

    def offer_batch(self, messages: Iterable[Tuple[Key, Value]]) -> List[str]:
        """Offers weights messages in order and counts the ignored and unreadable ones."""
        outcomes = self._table.offer_batch(messages)
        ignored = outcomes.count(IGNORED_VERSION)
        unreadable = outcomes.count(UNREADABLE)
        if ignored or unreadable:
            with self._count_lock:
                self._counts["ignored_versions"] += ignored
                self._counts["unreadable_messages"] += unreadable
        return outcomes

    def start(self) -> None:
        """Starts the daemon thread that reads the weights topic from its beginning and follows it."""
        if self._thread is not None:
            return
        if self._closed:
            raise RuntimeError("client closed")
        self._thread = threading.Thread(target=self._follow, name="apportion-weights", daemon=True)
        self._thread.start()

    def wait_until_loaded(self, timeout: Optional[float] = None) -> bool:
        """True once the weights topic was read up to where it ended at start; False on timeout.

        False at once when ``start()`` was not called.
        """
        if self._thread is None:
            return False
        return self._loaded.wait(timeout)

    @property
    def loaded(self) -> bool:
        """Whether the weights topic was read up to where it ended at start."""
        return self._loaded.is_set()

    # -------------------------------------------------------------- assignment

    def assign(self, experiment: str, unit: str) -> Assignment:
        """The arm of ``unit`` in ``experiment``.

        With weights held, not retired and published at most ``max_age_seconds`` ago, the arm is
        the weighted rendezvous choice and the propensity its weight; otherwise the
        experiment's fallback (else the default one) decides, and ``weights_version`` is None.
        Frozen and concluded weights are used as published. Raises ``Unassignable`` without a
        fallback.
        """
        held: Optional[Held] = self._table.get(experiment)
        if held is None:
            reason = "missing"
        elif held.retired:
            reason = "retired"
        elif self._clock() - held.published_at_ms > self._max_age_ms:
            reason = "stale"
        else:
            arms = held.arms
            name, _seed, w = arms[choose(unit_key_from_prefix(held.key_prefix, unit), arms)]
            with self._count_lock:
                self._counts["assignments_weights"] += 1
            return Assignment(experiment, unit, name, w / held.total_weight, held.version, "weights")
        fallback = self._fallbacks.get(experiment, self._default_fallback)
        if fallback is None:
            with self._count_lock:
                self._counts["unassignable"] += 1
            raise Unassignable(experiment, reason)
        arm, propensity = fallback.pick(experiment, unit)
        with self._count_lock:
            self._counts["assignments_fallback"] += 1
            self._counts["fallback_" + reason] += 1
        return Assignment(experiment, unit, arm, propensity, None, "fallback-" + reason)

    # ------------------------------------------------------------------ events

    def impression(self, a: Assignment, ts_ms: Optional[int] = None) -> Impression:
        """Writes the impression of ``a`` to the input topic (key = experiment) and returns it.

        ``ts_ms`` defaults to the client's clock. The event id is this client's prefix and a
        counter from 1.
        """
        ts = self._clock() if ts_ms is None else int(ts_ms)
        event_id = f"{self._event_prefix}-{next(self._impression_seq)}"
        payload = encode(impression_event(event_id, a.experiment, a.arm, ts, a.propensity, a.weights_version))
        self._produce(a.experiment, payload)
        with self._count_lock:
            self._counts["impressions_written"] += 1
        return Impression(event_id, a.experiment, a.arm, ts)

    def reward(self, imp: Impression, value: float = 1.0, ts_ms: Optional[int] = None) -> str:
        """Writes a reward of ``value`` for ``imp``; returns its event id.

        The id is the impression's id, ``-r`` and a per-client counter from 1, so several rewards
        for one impression are all counted. ``ts_ms`` defaults to the client's clock.
        """
        ts = self._clock() if ts_ms is None else int(ts_ms)
        event_id = f"{imp.event_id}-r{next(self._reward_seq)}"
        self._produce(imp.experiment, encode(reward_event(event_id, imp, value, ts)))
        with self._count_lock:
            self._counts["rewards_written"] += 1
        return event_id

    def counters(self) -> Dict[str, int]:
        """A copy of the counters (``COUNTERS``). Writes count when handed to the producer."""
        with self._count_lock:
            return dict(self._counts)

    def flush(self, timeout: float = 10.0) -> int:
        """Waits up to ``timeout`` s for written events to be delivered; returns how many are not."""
        if self._producer is None:
            return 0
        return int(self._producer.flush(timeout))

    def close(self, timeout: float = 10.0) -> None:
        """Stops the consumer thread and flushes the producer (each up to ``timeout`` s)."""
        self._closed = True
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)
        remaining = self.flush(timeout)
        if remaining:
            log.warning("%d events not delivered at close", remaining)

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ---------------------------------------------------------------- internals

    def _producer_or_new(self) -> Any:
        p = self._producer
        if p is not None:
            return p
        with self._producer_lock:
            if self._producer is None:
                from confluent_kafka import Producer

                conf: Dict[str, Any] = {
                    "bootstrap.servers": self.brokers,
                    # Keeps each experiment's events in order on its partition through retries.
                    "enable.idempotence": True,
                    "linger.ms": 5,
                }
                conf.update(self._kafka)
                self._producer = Producer(conf)
            return self._producer

    def _produce(self, key: str, value: bytes) -> None:
        producer = self._producer_or_new()
        deadline = time.monotonic() + 10.0
        while True:
            try:
                producer.produce(self.input_topic, value=value, key=key.encode("utf-8"), on_delivery=_on_delivery)
                break
            except BufferError:
                # The local queue is full: serve deliveries, then try again (bounded).
                if time.monotonic() >= deadline:
                    raise
                producer.poll(0.05)
        producer.poll(0)

    def _follow(self) -> None:
        """The consumer thread: assign every partition from the beginning, offer every message."""
        try:
            from confluent_kafka import OFFSET_BEGINNING, Consumer, KafkaError, TopicPartition
        except ImportError as e:  # pragma: no cover - depends on the installation
            self.consumer_error = e
            log.error("confluent_kafka is not installed: %s", e)
            return
        conf: Dict[str, Any] = {
            "bootstrap.servers": self.brokers,
            # confluent-kafka needs a group id even for assign(); nothing is ever committed.
            "group.id": f"apportion-client-{secrets.token_hex(8)}",
            "enable.auto.commit": False,
            "enable.auto.offset.store": False,
            "enable.partition.eof": True,
            "auto.offset.reset": "earliest",
        }
        conf.update(self._kafka)
        try:
            consumer = Consumer(conf)
        except Exception as e:
            self.consumer_error = e
            log.error("cannot create the weights consumer: %s", e)
            return
        topic = self.weights_topic
        try:
            partitions = self._partitions(consumer, topic)
            if partitions is None:
                return
            ends: Dict[int, int] = {}
            for p in partitions:
                while not self._stop.is_set():
                    try:
                        low, high = consumer.get_watermark_offsets(TopicPartition(topic, p), timeout=5.0)
                        break
                    except Exception as e:  # broker not answering yet: retry until stopped
                        self.consumer_error = e
                        log.warning("cannot read the end of %s[%d]: %s", topic, p, e)
                        self._stop.wait(1.0)
                else:
                    return
                if high > low:
                    ends[p] = high
            pending = set(ends)
            consumer.assign([TopicPartition(topic, p, OFFSET_BEGINNING) for p in partitions])
            if not pending:
                self._loaded.set()
            while not self._stop.is_set():
                batch: List[Tuple[Key, Value]] = []
                reached: List[int] = []
                for m in consumer.consume(num_messages=500, timeout=0.2):
                    err = m.error()
                    part = m.partition()
                    if err is not None:
                        if err.code() == KafkaError._PARTITION_EOF and part is not None:
                            reached.append(part)
                        else:
                            self.consumer_error = err
                            log.warning("weights consumer: %s", err)
                        continue
                    batch.append((m.key(), m.value()))
                    offset = m.offset()
                    if part is not None and offset is not None and offset + 1 >= ends.get(part, 0):
                        reached.append(part)
                if batch:
                    self.offer_batch(batch)
                if pending and reached:
                    pending.difference_update(reached)
                    if not pending:
                        self._loaded.set()
        except Exception as e:
            self.consumer_error = e
            log.exception("the weights consumer stopped")
        finally:
            try:
                consumer.close()
            except Exception:  # pragma: no cover - closing a broken consumer
                pass

    def _partitions(self, consumer: Any, topic: str) -> Optional[List[int]]:
        """The partitions of ``topic``, waiting (until stopped) for it to exist."""
        while not self._stop.is_set():
            try:
                # All topics, not this one: asking for one topic may create it on some brokers.
                md = consumer.list_topics(timeout=5.0)
                t = md.topics.get(topic)
                if t is not None and t.error is None and t.partitions:
                    return sorted(t.partitions)
                log.info("weights topic %s not there yet", topic)
            except Exception as e:
                self.consumer_error = e
                log.warning("cannot read the broker's metadata: %s", e)
            self._stop.wait(1.0)
        return None


def _on_delivery(err: Any, msg: Any) -> None:
    if err is not None:
        log.error("event not delivered to %s: %s", msg.topic() if msg is not None else "?", err)
