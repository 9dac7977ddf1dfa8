"""The weights a service holds: the last usable message per experiment of the weights topic.

The weights topic is compacted and keyed by experiment id; each value is the JSON object the
sidecar publishes (see the project README, "Weights out"), of which this table reads
``experiment``, ``version``, ``state``, ``published_at_ms`` and ``weights``. A null value (a
tombstone) follows an experiment's retirement.

Rules, the same as the Rust client's:

* A message whose ``version`` is not above the highest version ever seen for its experiment is
  ignored (``"ignored-version"``); that highest version is remembered after retirement too.
* A tombstone, or a message with ``"state":"retired"``, marks the experiment retired: its weights
  are no longer used (``"retired"``).
* A message that is not JSON, lacks a field, has a key other than its ``experiment``, an unknown
  state, a negative or non-finite weight, or no positive weight, is ``"unreadable"`` and changes
  nothing (the weights of a retired message are not read).
* Anything else is ``"applied"``.

Concurrency: the request path never takes a lock. The table is an ordinary ``dict`` that is
never changed once readers can see it; a writer builds a changed copy under the writer lock and
replaces the reference whole (copy-on-write). In CPython reading an attribute and looking a key
up in a dict are atomic, so a reader sees either the old table or the new one. ``offer_batch``
copies once per batch, so reading a topic of many experiments at start is not quadratic.
"""

from __future__ import annotations

import json
import math
import threading
from dataclasses import dataclass
from types import MappingProxyType
from typing import Dict, Iterable, List, Mapping, Optional, Tuple, Union

from .hashing import Arm, arm_seed, positive_total, unit_key_prefix

__all__ = [
    "APPLIED",
    "IGNORED_VERSION",
    "RETIRED",
    "UNREADABLE",
    "STATES",
    "Held",
    "WeightsTable",
]

APPLIED = "applied"
IGNORED_VERSION = "ignored-version"
RETIRED = "retired"
UNREADABLE = "unreadable"

#: The states a weights message may carry.
STATES = frozenset({"learning", "frozen", "concluded", "retired"})

Key = Union[str, bytes, None]
Value = Union[bytes, bytearray, memoryview, str, None]


@dataclass(frozen=True)
class Held:
    """What the table holds for one experiment.

    ``version`` is -1 when only a tombstone was seen for an experiment (no version known).
    ``arms`` are (name, arm_seed(name), weight) in ascending name order, every arm of the
    message including zero-weight ones; empty for a retired experiment. ``total_weight`` is the
    sum of the positive weights in that order, and ``key_prefix`` the experiment's
    ``unit_key_prefix``, both computed once here so that an assignment does not.
    """

    experiment: str
    version: int
    state: str
    published_at_ms: int
    arms: Tuple[Arm, ...]
    retired: bool
    total_weight: float
    key_prefix: int

    def weights(self) -> Dict[str, float]:
        """The weights as a name → weight dict (a new dict each call)."""
        return {name: w for name, _seed, w in self.arms}


@dataclass(frozen=True)
class _Message:
    experiment: str
    version: int
    state: str
    published_at_ms: int
    weights: Optional[Tuple[Tuple[str, float], ...]]


def _parse(key: Optional[str], value: Union[bytes, str]) -> Optional[_Message]:
    """The fields the table reads, or None when the message is unreadable."""
    try:
        doc = json.loads(value)
    except (ValueError, RecursionError):
        return None
    if not isinstance(doc, dict):
        return None
    experiment = doc.get("experiment")
    version = doc.get("version")
    state = doc.get("state")
    published = doc.get("published_at_ms")
    if not isinstance(experiment, str) or not experiment:
        return None
    if key is not None and key != experiment:
        return None
    if not isinstance(version, int) or isinstance(version, bool) or version < 0:
        return None
    if not isinstance(state, str) or state not in STATES:
        return None
    if not isinstance(published, int) or isinstance(published, bool):
        return None
    if state == "retired":
        return _Message(experiment, version, state, published, None)
    raw = doc.get("weights")
    if not isinstance(raw, dict) or not raw:
        return None
    weights: List[Tuple[str, float]] = []
    any_positive = False
    for name, w in raw.items():
        if isinstance(w, bool) or not isinstance(w, (int, float)):
            return None
        w = float(w)
        if not math.isfinite(w) or w < 0.0:
            return None
        any_positive = any_positive or w > 0.0
        weights.append((name, w))
    if not any_positive:
        return None
    weights.sort(key=lambda kv: kv[0])
    return _Message(experiment, version, state, published, tuple(weights))


def _decode_key(key: Key) -> Optional[str]:
    if key is None or isinstance(key, str):
        return key
    return bytes(key).decode("utf-8")


class WeightsTable:
    """The last usable weights per experiment, read without locks, written copy-on-write."""

    def __init__(self) -> None:
        self._write_lock = threading.Lock()
        # Never mutated once assigned here: writers replace it whole.
        self._held: Dict[str, Held] = {}

    def get(self, experiment: str) -> Optional[Held]:
        """What is held for ``experiment`` (retired ones included), or None. Takes no lock."""
        return self._held.get(experiment)

    def snapshot(self) -> Mapping[str, Held]:
        """A read-only view of the whole table as it is now (later offers do not change it)."""
        return MappingProxyType(self._held)

    def __len__(self) -> int:
        return len(self._held)

    def offer(self, key: Key, value: Value) -> str:
        """Offers one message of the weights topic; returns what happened.

        One of ``"applied"``, ``"ignored-version"``, ``"retired"``, ``"unreadable"`` (see the
        module notes). ``key`` is the message key (the experiment id; bytes are read as UTF-8),
        ``value`` its value, None for a tombstone.
        """
        return self.offer_batch(((key, value),))[0]

    def offer_batch(self, messages: Iterable[Tuple[Key, Value]]) -> List[str]:
        """Offers messages in order, publishing the result to readers once; one outcome each."""
        outcomes: List[str] = []
        with self._write_lock:
            current = self._held
            changed: Optional[Dict[str, Held]] = None
            for key, value in messages:
                view = current if changed is None else changed
                outcome, held = self._decide(view, key, value)
                outcomes.append(outcome)
                if held is not None:
                    if changed is None:
                        changed = dict(current)
                    changed[held.experiment] = held
            if changed is not None:
                self._held = changed
        return outcomes

    @staticmethod
    def _decide(view: Mapping[str, Held], key: Key, value: Value) -> Tuple[str, Optional[Held]]:
        try:
            name = _decode_key(key)
        except UnicodeDecodeError:
            return UNREADABLE, None
        if value is None:
            if not name:
                return UNREADABLE, None
            old = view.get(name)
            if old is None:
                return RETIRED, Held(name, -1, "retired", 0, (), True, 0.0, unit_key_prefix(name))
            if old.retired and not old.arms:
                return RETIRED, None
            return RETIRED, Held(name, old.version, "retired", old.published_at_ms, (), True, 0.0, old.key_prefix)
        if not isinstance(value, (bytes, str)):
            value = bytes(value)
        msg = _parse(name, value)
        if msg is None:
            return UNREADABLE, None
        old = view.get(msg.experiment)
        if old is not None and msg.version <= old.version:
            return IGNORED_VERSION, None
        prefix = old.key_prefix if old is not None else unit_key_prefix(msg.experiment)
        if msg.weights is None:
            return RETIRED, Held(msg.experiment, msg.version, msg.state, msg.published_at_ms, (), True, 0.0, prefix)
        arms = tuple((n, arm_seed(n), w) for n, w in msg.weights)
        held = Held(msg.experiment, msg.version, msg.state, msg.published_at_ms, arms, False, positive_total(arms), prefix)
        return APPLIED, held
