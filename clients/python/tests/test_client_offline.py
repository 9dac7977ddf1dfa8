"""The client without a broker: a fake clock, the table fed directly, a recording producer.

Expected values are the client's rules as specified (fallback order, counters, event shapes);
where a number is derived it says so. No Kafka object is created in this file.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
import threading
from typing import Any, Dict, List, Optional, Tuple

import pytest

from apportion_client import COUNTERS, Assignment, Client, Fallback, Impression, Unassignable, assign_arm
from apportion_client.events import encode, impression_event, reward_event

NOW = 1_764_547_201_000


class FakeClock:
    def __init__(self, now_ms: int = NOW) -> None:
        self.now_ms = now_ms

    def __call__(self) -> int:
        return self.now_ms


class RecordingProducer:
    """Stands in for confluent_kafka.Producer: keeps what was produced."""

    def __init__(self) -> None:
        self.sent: List[Tuple[str, bytes, bytes]] = []
        self.flushed = 0

    def produce(self, topic: str, value: bytes, key: bytes, on_delivery: Any = None) -> None:
        self.sent.append((topic, key, value))

    def poll(self, timeout: float = 0.0) -> int:
        return 0

    def flush(self, timeout: float = 0.0) -> int:
        self.flushed += 1
        return 0


def weights_message(experiment: str, version: int, weights: Dict[str, float], published_at_ms: int = NOW, state: str = "learning") -> bytes:
    doc = {"experiment": experiment, "version": version, "state": state, "revision": 0, "policy": "thompson"}
    doc.update(published_at_ms=published_at_ms, weights=weights)
    return json.dumps(doc).encode()


def make(clock: Optional[FakeClock] = None, **kw: Any) -> Client:
    return Client("127.0.0.1:1", clock=clock or FakeClock(), **kw)


EVEN = Fallback.even(["a", "b", "c"])


def test_missing_weights_use_the_fallback() -> None:
    c = make(default_fallback=EVEN)
    seen = set()
    for i in range(300):
        a = c.assign("svc", f"user-{i}")
        assert a.source == "fallback-missing" and a.weights_version is None
        assert a.propensity == pytest.approx(1 / 3, rel=1e-15)  # 1/len(arms), derived by hand
        # The even fallback is the same hash over equal weights.
        assert a.arm == assign_arm("svc", f"user-{i}", {"a": 1.0, "b": 1.0, "c": 1.0})[0]
        seen.add(a.arm)
    assert seen == {"a", "b", "c"}
    assert c.counters()["fallback_missing"] == 300 and c.counters()["assignments_fallback"] == 300


def test_held_weights_are_used() -> None:
    c = make(default_fallback=EVEN)
    w = {"a": 0.2, "b": 0.5, "c": 0.3}
    assert c.offer("svc", weights_message("svc", 4, w)) == "applied"
    for i in range(300):
        a = c.assign("svc", f"user-{i}")
        arm, p = assign_arm("svc", f"user-{i}", w)
        assert a == Assignment("svc", f"user-{i}", arm, p, 4, "weights")
        assert a.propensity == pytest.approx(w[a.arm], rel=1e-12)
    assert c.counters()["assignments_weights"] == 300


def test_stale_weights_use_the_fallback() -> None:
    clock = FakeClock()
    c = make(clock, max_age_seconds=300.0, default_fallback=EVEN)
    c.offer("svc", weights_message("svc", 1, {"a": 1.0}, published_at_ms=NOW))
    clock.now_ms = NOW + 300_000  # exactly max_age: still used (<= max_age)
    assert c.assign("svc", "u").source == "weights"
    clock.now_ms = NOW + 300_001
    a = c.assign("svc", "u")
    assert a.source == "fallback-stale" and a.weights_version is None and a.propensity == pytest.approx(1 / 3)
    # A newer publish makes it fresh again.
    c.offer("svc", weights_message("svc", 2, {"a": 1.0}, published_at_ms=NOW + 300_000))
    assert c.assign("svc", "u") == Assignment("svc", "u", "a", 1.0, 2, "weights")
    assert c.counters()["fallback_stale"] == 1


def test_retired_weights_use_the_fallback() -> None:
    c = make(default_fallback=EVEN)
    c.offer("svc", weights_message("svc", 1, {"a": 1.0}))
    c.offer("svc", weights_message("svc", 2, {"a": 1.0}, state="retired"))
    assert c.assign("svc", "u").source == "fallback-retired"
    c.offer("svc", None)
    assert c.assign("svc", "u").source == "fallback-retired"
    c.offer("other", None)
    assert c.assign("other", "u").source == "fallback-retired"
    assert c.counters()["fallback_retired"] == 3


def test_frozen_and_concluded_weights_are_used_as_published() -> None:
    c = make()
    c.offer("f", weights_message("f", 1, {"a": 0.25, "b": 0.75}, state="frozen"))
    c.offer("k", weights_message("k", 1, {"a": 0.0, "b": 1.0}, state="concluded"))
    assert c.assign("f", "u").source == "weights"
    for i in range(100):
        assert c.assign("k", f"u{i}") == Assignment("k", f"u{i}", "b", 1.0, 1, "weights")


def test_per_experiment_fallback_wins_over_the_default() -> None:
    c = make(fallbacks={"svc": Fallback.arm("control")}, default_fallback=EVEN)
    assert c.assign("svc", "u") == Assignment("svc", "u", "control", 1.0, None, "fallback-missing")
    assert c.assign("other", "u").arm in ("a", "b", "c")


def test_no_fallback_is_unassignable() -> None:
    clock = FakeClock()
    c = make(clock, max_age_seconds=1.0, fallbacks={"has": Fallback.arm("x")})
    with pytest.raises(Unassignable) as e:
        c.assign("svc", "u")
    assert (e.value.experiment, e.value.reason) == ("svc", "missing")
    c.offer("svc", weights_message("svc", 1, {"a": 1.0}))
    clock.now_ms += 1_001
    with pytest.raises(Unassignable) as e:
        c.assign("svc", "u")
    assert e.value.reason == "stale"
    c.offer("svc", None)
    with pytest.raises(Unassignable) as e:
        c.assign("svc", "u")
    assert e.value.reason == "retired"
    assert c.assign("has", "u").arm == "x"
    counts = c.counters()
    assert counts["unassignable"] == 3 and counts["fallback_missing"] == 1 and counts["assignments_fallback"] == 1


def test_counters_have_exactly_the_named_keys_and_add_up() -> None:
    clock = FakeClock()
    c = make(clock, default_fallback=EVEN, producer=RecordingProducer())
    assert set(c.counters()) == set(COUNTERS) == {
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
    }
    assert all(v == 0 for v in c.counters().values())
    c.assign("m", "u")  # missing
    c.offer("w", weights_message("w", 3, {"a": 1.0}))
    assert c.offer("w", weights_message("w", 2, {"b": 1.0})) == "ignored-version"
    assert c.offer("w", b"{") == "unreadable"
    assert c.offer_batch([("w", b"[]"), ("w", weights_message("w", 3, {"b": 1.0}))]) == ["unreadable", "ignored-version"]
    imp = c.impression(c.assign("w", "u"))  # weights
    c.reward(imp)
    c.reward(imp, 0.0)
    c.offer("r", None)
    c.assign("r", "u")  # retired
    c.offer("s", weights_message("s", 1, {"a": 1.0}, published_at_ms=NOW - 10_000_000))
    c.assign("s", "u")  # stale
    assert c.counters() == {
        "assignments_weights": 1,
        "assignments_fallback": 3,
        "fallback_missing": 1,
        "fallback_stale": 1,
        "fallback_retired": 1,
        "unassignable": 0,
        "ignored_versions": 2,
        "unreadable_messages": 2,
        "impressions_written": 1,
        "rewards_written": 2,
    }


def test_counters_under_threads() -> None:
    """Bounded: 4 threads × 5 000 assignments."""
    c = make(default_fallback=EVEN)
    c.offer("w", weights_message("w", 1, {"a": 0.5, "b": 0.5}))

    def work(t: int) -> None:
        for i in range(5_000):
            c.assign("w" if i % 2 else "m", f"{t}-{i}")

    threads = [threading.Thread(target=work, args=(t,)) for t in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60.0)
    counts = c.counters()
    assert counts["assignments_weights"] == 10_000 and counts["assignments_fallback"] == 10_000 == counts["fallback_missing"]


def test_impression_and_reward_events() -> None:
    producer = RecordingProducer()
    clock = FakeClock()
    c = make(clock, default_fallback=EVEN, producer=producer, input_topic="in.events")
    c.offer("svc", weights_message("svc", 9, {"a": 0.25, "b": 0.75}))
    a = c.assign("svc", "user-1")
    imp = c.impression(a)
    fb = c.assign("other", "user-1")
    imp2 = c.impression(fb, ts_ms=NOW - 5)
    clock.now_ms = NOW + 1_500
    rid = c.reward(imp, 0.5)
    rid2 = c.reward(imp2, ts_ms=NOW + 7)

    assert re.fullmatch(r"[0-9a-f]{16}-1", imp.event_id) and imp.event_id.startswith(c.event_prefix)
    assert imp2.event_id == f"{c.event_prefix}-2"
    assert imp == Impression(imp.event_id, "svc", a.arm, NOW)
    assert rid == f"{imp.event_id}-r1" and rid2 == f"{imp2.event_id}-r2"

    topics = {s[0] for s in producer.sent}
    assert topics == {"in.events"}
    keys = [s[1] for s in producer.sent]
    assert keys == [b"svc", b"other", b"svc", b"other"]
    docs = [json.loads(s[2]) for s in producer.sent]
    assert docs[0] == {
        "event_id": imp.event_id,
        "kind": "impression",
        "experiment": "svc",
        "arm": a.arm,
        "ts_ms": NOW,
        "propensity": a.propensity,
        "weights_version": 9,
    }
    # weights_version is left out for a fallback.
    assert docs[1] == {
        "event_id": imp2.event_id,
        "kind": "impression",
        "experiment": "other",
        "arm": fb.arm,
        "ts_ms": NOW - 5,
        "propensity": fb.propensity,
    }
    assert docs[2] == {
        "event_id": rid,
        "kind": "reward",
        "experiment": "svc",
        "arm": a.arm,
        "ts_ms": NOW + 1_500,
        "reward": 0.5,
        "impression_id": imp.event_id,
        "impression_ts_ms": NOW,
    }
    assert docs[3]["reward"] == 1.0 and docs[3]["ts_ms"] == NOW + 7 and docs[3]["impression_ts_ms"] == NOW - 5
    # Compact JSON: no spaces after separators.
    assert all(b", " not in s[2] and b": " not in s[2] for s in producer.sent)
    c.close()
    assert producer.flushed == 1


def test_event_builders_are_pure() -> None:
    e = impression_event("id-1", "x", "a", 5, 0.5, None)
    assert encode(e) == b'{"event_id":"id-1","kind":"impression","experiment":"x","arm":"a","ts_ms":5,"propensity":0.5}'
    r = reward_event("id-1-r1", Impression("id-1", "x", "a", 5), 1, 6)
    assert encode(r) == (
        b'{"event_id":"id-1-r1","kind":"reward","experiment":"x","arm":"a","ts_ms":6,"reward":1.0,"impression_id":"id-1","impression_ts_ms":5}'
    )
    with pytest.raises(ValueError):
        encode(impression_event("i", "x", "a", 1, float("nan"), 1))


def test_fallback_constructors() -> None:
    assert Fallback.even(["c", "a", "b", "a"]).arms == ("a", "b", "c")
    assert Fallback.arm("x").pick("e", "u") == ("x", 1.0)
    assert repr(Fallback.arm("x")) == "Fallback.arm('x')"
    assert Fallback.even(["b", "a"]) == Fallback.even(["a", "b"])
    with pytest.raises(ValueError):
        Fallback.even([])
    with pytest.raises(TypeError):
        Fallback.even("abc")
    with pytest.raises(ValueError):
        Fallback.arm("")


def test_no_kafka_object_without_start_or_write() -> None:
    c = make(default_fallback=EVEN)
    c.assign("svc", "u")
    assert c.wait_until_loaded(0.01) is False and not c.loaded
    assert c.flush(0.01) == 0
    c.close()
    # In a fresh interpreter: building, feeding and assigning never imports confluent_kafka.
    code = (
        "import sys\n"
        "from apportion_client import Client, Fallback\n"
        "c = Client('127.0.0.1:1', default_fallback=Fallback.even(['a', 'b']))\n"
        "c.offer('e', b'{\"experiment\":\"e\",\"version\":1,\"state\":\"learning\",\"published_at_ms\":0,\"weights\":{\"a\":1}}')\n"
        "c.assign('e', 'u'); c.assign('f', 'u'); c.close()\n"
        "assert 'confluent_kafka' not in sys.modules\n"
        "print('ok')\n"
    )
    src = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "src")
    r = subprocess.run([sys.executable, "-c", code], env=dict(os.environ, PYTHONPATH=src), capture_output=True, text=True, timeout=60)
    assert r.returncode == 0 and r.stdout.strip() == "ok", r.stderr
