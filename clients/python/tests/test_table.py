"""The weights table's rules (apportion_client.table).

The expected outcomes are the rules of the table as specified for this client (the same as the
Rust client's); no external check values are used.
"""

from __future__ import annotations

import json
import threading
import time
from typing import Any, Dict, Optional

import pytest

from apportion_client.hashing import arm_seed, unit_key_prefix
from apportion_client.table import APPLIED, IGNORED_VERSION, RETIRED, UNREADABLE, WeightsTable


def message(
    experiment: str = "thumb-style",
    version: int = 1,
    state: str = "learning",
    weights: Optional[Dict[str, Any]] = None,
    published_at_ms: int = 1_764_547_201_000,
    **extra: Any,
) -> bytes:
    doc: Dict[str, Any] = {
        "experiment": experiment,
        "version": version,
        "state": state,
        "revision": 7,
        "policy": "thompson",
        "published_at_ms": published_at_ms,
        "leader": "warm",
        "weights": {"cool": 0.30, "mono": 0.08, "warm": 0.62} if weights is None else weights,
        "arms": {"warm": {"pulls": 12034, "mean": 0.0342}},
        "regret_estimate": 18.4,
        "expected_loss": 0.00011,
        "settled": False,
    }
    doc.update(extra)
    return json.dumps(doc).encode()


def test_a_message_is_applied_and_held_sorted_with_seeds() -> None:
    t = WeightsTable()
    assert t.get("thumb-style") is None
    assert t.offer("thumb-style", message(version=42)) == APPLIED
    h = t.get("thumb-style")
    assert h is not None
    assert (h.experiment, h.version, h.state, h.published_at_ms, h.retired) == ("thumb-style", 42, "learning", 1_764_547_201_000, False)
    assert h.arms == (("cool", arm_seed("cool"), 0.30), ("mono", arm_seed("mono"), 0.08), ("warm", arm_seed("warm"), 0.62))
    assert h.total_weight == pytest.approx(1.0, abs=1e-12)
    assert h.key_prefix == unit_key_prefix("thumb-style")
    assert h.weights() == {"cool": 0.30, "mono": 0.08, "warm": 0.62}
    assert len(t) == 1


def test_bytes_key_and_no_key() -> None:
    t = WeightsTable()
    assert t.offer(b"thumb-style", message(version=1)) == APPLIED
    assert t.offer(None, message(version=2)) == APPLIED
    assert t.get("thumb-style").version == 2  # type: ignore[union-attr]


def test_version_regression_is_ignored() -> None:
    t = WeightsTable()
    assert t.offer("thumb-style", message(version=5, weights={"a": 1.0})) == APPLIED
    assert t.offer("thumb-style", message(version=4, weights={"b": 1.0})) == IGNORED_VERSION
    assert t.offer("thumb-style", message(version=5, weights={"b": 1.0})) == IGNORED_VERSION
    h = t.get("thumb-style")
    assert h is not None and h.version == 5 and h.weights() == {"a": 1.0}
    assert t.offer("thumb-style", message(version=6, weights={"b": 1.0})) == APPLIED
    assert t.get("thumb-style").weights() == {"b": 1.0}  # type: ignore[union-attr]


def test_versions_are_per_experiment() -> None:
    t = WeightsTable()
    assert t.offer("x", message("x", version=9)) == APPLIED
    assert t.offer("y", message("y", version=1)) == APPLIED


def test_tombstone_retires() -> None:
    t = WeightsTable()
    t.offer("thumb-style", message(version=7))
    assert t.offer("thumb-style", None) == RETIRED
    h = t.get("thumb-style")
    assert h is not None and h.retired and h.state == "retired" and h.arms == () and h.version == 7
    # The highest version seen is kept after the tombstone.
    assert t.offer("thumb-style", message(version=7)) == IGNORED_VERSION
    assert t.offer("thumb-style", message(version=3)) == IGNORED_VERSION
    assert t.get("thumb-style").retired  # type: ignore[union-attr]
    # A second tombstone changes nothing.
    assert t.offer("thumb-style", None) == RETIRED


def test_state_retired_retires() -> None:
    t = WeightsTable()
    t.offer("thumb-style", message(version=7))
    assert t.offer("thumb-style", message(version=8, state="retired")) == RETIRED
    h = t.get("thumb-style")
    assert h is not None and h.retired and h.version == 8 and h.arms == ()
    # The last message of a retired experiment need not carry usable weights.
    t2 = WeightsTable()
    assert t2.offer("e", message("e", version=3, state="retired", weights={"a": 0.0})) == RETIRED
    assert t2.get("e").retired  # type: ignore[union-attr]
    # The tombstone that follows keeps version 8.
    assert t.offer("thumb-style", None) == RETIRED
    assert t.get("thumb-style").version == 8  # type: ignore[union-attr]


def test_a_newer_version_after_retirement_applies() -> None:
    t = WeightsTable()
    t.offer("thumb-style", message(version=10))
    t.offer("thumb-style", message(version=11, state="retired"))
    t.offer("thumb-style", None)
    assert t.offer("thumb-style", message(version=12, weights={"new": 1.0})) == APPLIED
    h = t.get("thumb-style")
    assert h is not None and not h.retired and h.version == 12 and h.weights() == {"new": 1.0}


def test_a_tombstone_for_an_unknown_experiment() -> None:
    t = WeightsTable()
    assert t.offer("gone", None) == RETIRED
    h = t.get("gone")
    assert h is not None and h.retired and h.version == -1
    assert t.offer("gone", message("gone", version=0)) == APPLIED


def test_frozen_and_concluded_are_applied() -> None:
    t = WeightsTable()
    assert t.offer("f", message("f", version=1, state="frozen")) == APPLIED
    assert t.offer("c", message("c", version=1, state="concluded", weights={"a": 0.0, "b": 1.0})) == APPLIED
    assert t.get("f").state == "frozen" and not t.get("f").retired  # type: ignore[union-attr]
    assert t.get("c").state == "concluded"  # type: ignore[union-attr]


UNREADABLE_VALUES = [
    b"not json",
    b"\xff\xfe",
    b"[1,2,3]",
    b'"a string"',
    b"{}",
    json.dumps({"version": 1, "state": "learning", "published_at_ms": 1, "weights": {"a": 1}}).encode(),
    json.dumps({"experiment": "e", "state": "learning", "published_at_ms": 1, "weights": {"a": 1}}).encode(),
    json.dumps({"experiment": "e", "version": 1, "published_at_ms": 1, "weights": {"a": 1}}).encode(),
    json.dumps({"experiment": "e", "version": 1, "state": "learning", "weights": {"a": 1}}).encode(),
    json.dumps({"experiment": "e", "version": 1, "state": "learning", "published_at_ms": 1}).encode(),
    message("e", weights={"a": -0.1, "b": 1.1}),
    message("e", weights={}),
    message("e", weights={"a": 0.0, "b": 0.0}),
    message("e", weights={"a": "0.5", "b": 0.5}),
    message("e", weights={"a": True}),
    message("e", weights={"a": None, "b": 1.0}),
    message("e", weights=[0.5, 0.5]),  # type: ignore[arg-type]
    b'{"experiment":"e","version":1,"state":"learning","published_at_ms":1,"weights":{"a":NaN,"b":1}}',
    b'{"experiment":"e","version":1,"state":"learning","published_at_ms":1,"weights":{"a":Infinity}}',
    b'{"experiment":"e","version":1,"state":"learning","published_at_ms":1,"weights":{"a":1e400}}',
    message("e", state="paused"),
    message("e", version=-1),
    message("e", version=1.5),  # type: ignore[arg-type]
    message("e", version=True),  # type: ignore[arg-type]
    message("e", published_at_ms="yesterday"),  # type: ignore[arg-type]
    message("", version=1),
]


@pytest.mark.parametrize("value", UNREADABLE_VALUES)
def test_unreadable_messages_change_nothing(value: bytes) -> None:
    t = WeightsTable()
    t.offer("e", message("e", version=1, weights={"held": 1.0}))
    before = t.get("e")
    assert t.offer("e", value) == UNREADABLE
    assert t.get("e") is before


def test_a_key_other_than_the_experiment_is_unreadable() -> None:
    t = WeightsTable()
    assert t.offer("other", message("e")) == UNREADABLE
    assert t.get("e") is None and t.get("other") is None
    assert t.offer(b"\xff", message("e")) == UNREADABLE
    assert t.offer(None, None) == UNREADABLE


def test_readers_keep_the_table_they_read() -> None:
    t = WeightsTable()
    t.offer("a", message("a", version=1))
    snap = t.snapshot()
    t.offer("a", message("a", version=2))
    t.offer("b", message("b", version=1))
    assert snap["a"].version == 1 and "b" not in snap
    assert t.snapshot()["a"].version == 2
    with pytest.raises(TypeError):
        snap["c"] = snap["a"]  # type: ignore[index]


def test_offer_batch_applies_in_order() -> None:
    t = WeightsTable()
    out = t.offer_batch(
        [
            ("a", message("a", version=1)),
            ("a", message("a", version=1)),
            ("a", message("a", version=3)),
            ("a", message("a", version=2)),
            ("b", b"junk"),
            ("a", None),
        ]
    )
    assert out == [APPLIED, IGNORED_VERSION, APPLIED, IGNORED_VERSION, UNREADABLE, RETIRED]
    assert t.get("a").version == 3 and t.get("a").retired  # type: ignore[union-attr]


def test_readers_never_see_a_torn_entry() -> None:
    """Readers without locks while a writer replaces entries: each Held is whole.

    Bounded: the writer offers 3 000 messages; readers stop when it does or after 20 s.
    """
    t = WeightsTable()
    t.offer("e", message("e", version=1, weights={"v1": 1.0}))
    done = threading.Event()
    errors = []

    def read() -> None:
        deadline = time.monotonic() + 20.0
        while not done.is_set() and time.monotonic() < deadline:
            h = t.get("e")
            if h is None or h.weights() != {f"v{h.version}": 1.0}:
                errors.append(h)
                return

    readers = [threading.Thread(target=read) for _ in range(2)]
    for r in readers:
        r.start()
    for v in range(2, 3_002):
        assert t.offer("e", message("e", version=v, weights={f"v{v}": 1.0})) == APPLIED
    done.set()
    for r in readers:
        r.join(30.0)
    assert not errors
