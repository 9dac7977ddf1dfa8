"""Prints hash vectors to compare with other clients' implementations of the same assignment.

For experiment "thumb-style", units "u-0" .. "u-9" and weights {"a": 0.5, "b": 0.3, "c": 0.2}:
one line per unit with the unit, its unit_key in hex (16 digits), the chosen arm, and each arm's
score as an exact hexadecimal float (float.hex), to find where two implementations part.

    PYTHONPATH=clients/python/src python3 clients/python/tests/print_vectors.py
"""

from __future__ import annotations

import os
import sys
from typing import List, Tuple

sys.path.insert(0, os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "src"))

import math  # noqa: E402

from apportion_client.hashing import arm_seed, assign_arm, mix, uniform, unit_key  # noqa: E402

EXPERIMENT = "thumb-style"
WEIGHTS = {"a": 0.5, "b": 0.3, "c": 0.2}


def vectors() -> List[Tuple[str, str, str]]:
    """(unit, unit_key as 16 hex digits, chosen arm) for u-0 .. u-9."""
    rows = []
    for i in range(10):
        unit = f"u-{i}"
        arm, _propensity = assign_arm(EXPERIMENT, unit, WEIGHTS)
        rows.append((unit, f"{unit_key(EXPERIMENT, unit):016x}", arm))
    return rows


def scores(unit: str) -> List[Tuple[str, float]]:
    """(arm, score) in arm-name order for ``unit``."""
    key = unit_key(EXPERIMENT, unit)
    return [(a, -math.log(uniform(mix(key ^ arm_seed(a)))) / w) for a, w in sorted(WEIGHTS.items())]


if __name__ == "__main__":
    print(f"experiment={EXPERIMENT} weights={WEIGHTS}")
    for unit, key, arm in vectors():
        detail = " ".join(f"{a}={s.hex()}" for a, s in scores(unit))
        print(f"{unit} {key} {arm} {detail}")
