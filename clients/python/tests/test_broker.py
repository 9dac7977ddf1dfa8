"""The client against a running sidecar and a Kafka-API broker on loopback.

Skipped unless ``TEST_KAFKA_BROKERS`` (host:port of a broker on 127.0.0.1) and ``TEST_APPORTION_BIN``
(the sidecar binary) are set. The test writes a sidecar configuration with topic names unique to
the run, starts ``TEST_APPORTION_BIN run --config FILE``, and checks the client's assignments against
what the sidecar counted and what went over the input topic.

Expected values are the client's and the sidecar's documented behaviour (the project README:
"Events in", "Weights out", "Running experiments day to day"); counts are exact by construction.
Every wait is bounded (at most 60 s each); traffic goes to loopback only.
"""

from __future__ import annotations

import collections
import json
import os
import secrets
import signal
import socket
import subprocess
import time
import urllib.error
import urllib.request
from typing import Any, Callable, Dict, Iterator, List, Optional, TypeVar

import pytest

from apportion_client import Assignment, Client, Fallback, assign_arm
from apportion_client.client import wall_clock_ms

BROKERS = os.environ.get("TEST_KAFKA_BROKERS", "")
BIN = os.environ.get("TEST_APPORTION_BIN", "")

pytestmark = pytest.mark.skipif(not (BROKERS and BIN), reason="needs TEST_KAFKA_BROKERS and TEST_APPORTION_BIN")

T = TypeVar("T")

CONFIG = """\
[kafka]
brokers = "{brokers}"
group_id = "{id}.group"
input_topic = "{id}.events"
weights_topic = "{id}.weights"
state_topic = "{id}.state"
dead_letter_topic = "{id}.dead-letter"
control_topic = "{id}.control"
topic_partitions = 1

[metrics]
listen = "127.0.0.1:{port}"

[publish]
interval_seconds = 0.2
heartbeat_seconds = 5

[snapshot]
interval_seconds = 1

[log]
level = "warn"
"""


class Sidecar:
    def __init__(self, workdir: str) -> None:
        self.id = "t" + secrets.token_hex(6)
        self.port = _free_port()
        self.config = os.path.join(workdir, "apportion.toml")
        with open(self.config, "w") as f:
            f.write(CONFIG.format(brokers=BROKERS, id=self.id, port=self.port))
        self.stderr_path = os.path.join(workdir, "sidecar.stderr")
        self.proc: Optional[subprocess.Popen] = None

    @property
    def weights_topic(self) -> str:
        return f"{self.id}.weights"

    @property
    def input_topic(self) -> str:
        return f"{self.id}.events"

    def log_tail(self, n: int = 4000) -> str:
        try:
            with open(self.stderr_path, "rb") as f:
                return f.read()[-n:].decode("utf-8", "replace")
        except OSError:
            return ""

    def get(self, path: str) -> Optional[bytes]:
        """The body of GET http://127.0.0.1:PORT/path when it answers 200, else None."""
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{self.port}{path}", timeout=2.0) as r:
                return r.read() if r.status == 200 else None
        except (urllib.error.URLError, OSError):
            return None

    def start(self) -> None:
        with open(self.stderr_path, "wb") as err:
            self.proc = subprocess.Popen([BIN, "run", "--config", self.config], stdout=subprocess.DEVNULL, stderr=err, env=sidecar_env())

        def ready() -> bool:
            assert self.proc is not None
            if self.proc.poll() is not None:
                raise AssertionError(f"sidecar exited with {self.proc.returncode}:\n{self.log_tail()}")
            return self.get("/readyz") is not None

        wait_for("the sidecar's /readyz", ready, 60.0, self)

    def stop(self) -> None:
        if self.proc is None or self.proc.poll() is not None:
            return
        self.proc.send_signal(signal.SIGTERM)
        try:
            self.proc.wait(15.0)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(15.0)

    def experiment(self, name: str) -> Optional[Dict[str, Any]]:
        body = self.get("/experiments")
        if body is None:
            return None
        return json.loads(body).get(name)


def sidecar_env() -> Dict[str, str]:
    """This environment without APPORTION_* variables.

    The sidecar reads APPORTION_<SECTION>__<KEY> variables as configuration overrides and refuses
    unknown ones, so no override of the caller's may reach it.
    """
    return {k: v for k, v in os.environ.items() if not k.startswith("APPORTION_")}


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_for(what: str, probe: Callable[[], Optional[T]], timeout: float, sidecar: Optional[Sidecar] = None, interval: float = 0.1) -> T:
    """Polls ``probe`` until it returns something true, for at most ``timeout`` seconds."""
    deadline = time.monotonic() + timeout
    while True:
        got = probe()
        if got:
            return got
        if time.monotonic() >= deadline:
            tail = f"\nsidecar log:\n{sidecar.log_tail()}" if sidecar is not None else ""
            raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what}{tail}")
        time.sleep(interval)


@pytest.fixture(scope="module")
def sidecar(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Sidecar]:
    pytest.importorskip("confluent_kafka")
    s = Sidecar(str(tmp_path_factory.mktemp("sidecar")))
    try:
        s.start()
        yield s
    finally:
        s.stop()


def client_for(s: Sidecar, **kw: Any) -> Client:
    return Client(BROKERS, weights_topic=s.weights_topic, input_topic=s.input_topic, default_fallback=Fallback.even(["a", "b", "c"]), **kw)


def read_topic(topic: str, want: int, timeout: float) -> List[Dict[str, Any]]:
    """Every event on partition 0 of ``topic``, reading until ``want`` were seen (bounded)."""
    from confluent_kafka import OFFSET_BEGINNING, Consumer, TopicPartition

    c = Consumer(
        {
            "bootstrap.servers": BROKERS,
            "group.id": f"apportion-client-test-{secrets.token_hex(6)}",
            "enable.auto.commit": False,
            "auto.offset.reset": "earliest",
        }
    )
    out: List[Dict[str, Any]] = []
    try:
        c.assign([TopicPartition(topic, 0, OFFSET_BEGINNING)])
        deadline = time.monotonic() + timeout
        while len(out) < want and time.monotonic() < deadline:
            for m in c.consume(num_messages=1000, timeout=0.5):
                v = m.value()
                if m.error() is None and v is not None:
                    out.append(json.loads(v))
    finally:
        c.close()
    return out


def test_service_loop_against_the_sidecar(sidecar: Sidecar) -> None:
    from confluent_kafka import Producer

    client = client_for(sidecar)
    client.start()
    try:
        assert client.wait_until_loaded(30.0), client.consumer_error
        by_event: Dict[str, Assignment] = {}
        order: List[Assignment] = []
        per_arm: collections.Counter = collections.Counter()
        rewards = 0

        def serve(i: int) -> None:
            nonlocal rewards
            a = client.assign("svc", f"user-{i % 700}")
            imp = client.impression(a)
            by_event[imp.event_id] = a
            order.append(a)
            per_arm[a.arm] += 1
            if i % 3 == 0:
                client.reward(imp, 1.0)
                rewards += 1

        # 1. Before any weights: the fallback; the sidecar creates "svc" on first sight.
        for i in range(100):
            serve(i)
        assert client.flush(30.0) == 0
        wait_for("weights for svc at the client", lambda: client.table.get("svc"), 30.0, sidecar)
        # 2. With weights, refreshed while the loop runs (a pause every 250 units).
        for i in range(100, 3000):
            serve(i)
            if i % 250 == 0:
                client.flush(10.0)
                time.sleep(0.25)
        assert client.flush(30.0) == 0
        assert client.counters()["impressions_written"] == 3000 and client.counters()["rewards_written"] == rewards

        # The sidecar counted what the client wrote, arm by arm.
        def counted() -> Optional[Dict[str, Any]]:
            e = sidecar.experiment("svc")
            if e is None or sum(a["pulls"] for a in e["arms"].values()) != 3000:
                return None
            return e

        e = wait_for("3000 pulls of svc on /experiments", counted, 60.0, sidecar)
        pulls = {name: a["pulls"] for name, a in e["arms"].items() if a["pulls"]}
        assert pulls == dict(per_arm)

        # Every impression on the input topic carries what assign returned for it.
        events = read_topic(sidecar.input_topic, 3000 + rewards, 60.0)
        impressions = [ev for ev in events if ev["kind"] == "impression"]
        assert len(impressions) == 3000 and len(events) == 3000 + rewards
        for ev in impressions:
            a = by_event[ev["event_id"]]
            assert ev["arm"] == a.arm and ev["propensity"] == a.propensity
            assert ev.get("weights_version") == a.weights_version
        reward_events = [ev for ev in events if ev["kind"] == "reward"]
        assert all(ev["impression_id"] in by_event for ev in reward_events)

        # Once weights were there, the client used them.
        first = next(i for i, a in enumerate(order) if a.source == "weights")
        assert first <= 100
        assert all(a.source == "fallback-missing" for a in order[:first])
        later = order[first:]
        assert all(a.source == "weights" and a.weights_version is not None and a.weights_version > 0 for a in later)
        versions = [a.weights_version for a in later]
        assert versions == sorted(versions)  # type: ignore[type-var]
        print(
            f"\nsvc: {first} fallback assignments, then {len(later)} with weights versions "
            f"{versions[0]}..{versions[-1]} ({len(set(versions))} distinct); pulls {pulls}; rewards {rewards}"
        )

        # A lower version written to the weights topic by hand is ignored.
        held = client.table.get("svc")
        assert held is not None and held.version >= 1
        units = [f"user-{i}" for i in range(300)]
        before = [client.assign("svc", u) for u in units]
        ignored = client.counters()["ignored_versions"]
        stale_doc = {
            "experiment": "svc",
            "version": held.version - 1,
            "state": "learning",
            "revision": 0,
            "policy": "thompson",
            "published_at_ms": wall_clock_ms(),
            "weights": {"a": 1.0, "b": 0.0, "c": 0.0},
        }
        p = Producer({"bootstrap.servers": BROKERS})
        p.produce(sidecar.weights_topic, key=b"svc", value=json.dumps(stale_doc).encode())
        assert p.flush(30.0) == 0
        wait_for("the lower version to be ignored", lambda: client.counters()["ignored_versions"] > ignored, 30.0, sidecar)
        now_held = client.table.get("svc")
        assert now_held is not None and now_held.version >= held.version
        after = [client.assign("svc", u) for u in units]
        print(f"lower version {held.version - 1} ignored; held version before {held.version}, after {now_held.version}")
        if now_held.version == held.version:
            assert after == before
        else:
            # A heartbeat came in between: the assignments follow the newer weights, not the lower version.
            w = now_held.weights()
            assert [(a.arm, a.propensity) for a in after] == [assign_arm("svc", u, w) for u in units]
        assert all(a.weights_version != held.version - 1 for a in after)
        assert {a.arm for a in after} != {"a"}

        # Retiring the experiment: the client falls back.
        r = subprocess.run(
            [BIN, "experiment", "retire", "svc", "--config", sidecar.config, "--by", "client-test", "--note", "client test"],
            capture_output=True,
            text=True,
            timeout=60,
            env=sidecar_env(),
        )
        assert r.returncode == 0, r.stdout + r.stderr
        wait_for("svc to be retired at the client", lambda: client.assign("svc", "user-1").source == "fallback-retired", 30.0, sidecar)
        assert client.counters()["fallback_retired"] >= 1
    finally:
        client.close()


def test_stale_weights_fall_back(sidecar: Sidecar) -> None:
    writer = client_for(sidecar)
    writer.start()
    late = client_for(sidecar, max_age_seconds=0.5, clock=lambda: wall_clock_ms() + 600_000)
    late.start()
    try:
        assert writer.wait_until_loaded(30.0) and late.wait_until_loaded(30.0)
        for i in range(20):
            writer.impression(writer.assign("svc2", f"user-{i}"))
        assert writer.flush(30.0) == 0
        wait_for("weights for svc2 at the late client", lambda: late.table.get("svc2"), 30.0, sidecar)
        a = late.assign("svc2", "user-1")
        assert a.source == "fallback-stale" and a.weights_version is None
        assert late.counters()["fallback_stale"] == 1
        # The same weights are fresh by the wall clock.
        wait_for("weights for svc2 at the writer", lambda: writer.assign("svc2", "user-1").source == "weights", 30.0, sidecar)
    finally:
        late.close()
        writer.close()
