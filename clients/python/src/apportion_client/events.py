"""What the client returns and what it writes to the input topic, as pure functions.

The events are the sidecar's input format (project README, "Events in"): one JSON object per
message, keyed by experiment id. Nothing here touches Kafka, so the shapes can be tested offline.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any, Dict, Optional

__all__ = [
    "SOURCES",
    "Assignment",
    "Impression",
    "impression_event",
    "reward_event",
    "encode",
]

#: Where an assignment came from: the held weights, or a fallback and why.
SOURCES = ("weights", "fallback-missing", "fallback-stale", "fallback-retired")


@dataclass(frozen=True)
class Assignment:
    """The arm a unit got.

    ``propensity`` is the probability with which the assignment procedure gives this arm to a
    unit drawn at random (the weight, a fallback's 1/len, or 1.0 for a fixed fallback arm);
    ``weights_version`` the version of the weights used, None for a fallback; ``source`` one of
    ``SOURCES``.
    """

    experiment: str
    unit: str
    arm: str
    propensity: float
    weights_version: Optional[int]
    source: str


@dataclass(frozen=True)
class Impression:
    """An impression that was written: what a reward for it refers to."""

    event_id: str
    experiment: str
    arm: str
    ts_ms: int


def impression_event(
    event_id: str,
    experiment: str,
    arm: str,
    ts_ms: int,
    propensity: float,
    weights_version: Optional[int],
) -> Dict[str, Any]:
    """The impression object; ``weights_version`` is left out when None."""
    event: Dict[str, Any] = {
        "event_id": event_id,
        "kind": "impression",
        "experiment": experiment,
        "arm": arm,
        "ts_ms": int(ts_ms),
        "propensity": float(propensity),
    }
    if weights_version is not None:
        event["weights_version"] = int(weights_version)
    return event


def reward_event(event_id: str, impression: Impression, value: float, ts_ms: int) -> Dict[str, Any]:
    """The reward object for ``impression``, naming it by id and event time."""
    return {
        "event_id": event_id,
        "kind": "reward",
        "experiment": impression.experiment,
        "arm": impression.arm,
        "ts_ms": int(ts_ms),
        "reward": float(value),
        "impression_id": impression.event_id,
        "impression_ts_ms": int(impression.ts_ms),
    }


def encode(event: Dict[str, Any]) -> bytes:
    """Compact UTF-8 JSON; non-finite numbers are refused (they are not JSON)."""
    return json.dumps(event, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode("utf-8")
