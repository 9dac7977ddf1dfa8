"""Deterministic arm assignment by weighted rendezvous hashing.

Every unit (a user, a session, a device: whatever the service randomises over) gets a score per
arm and goes to the arm with the smallest score. The scores are

    score_j = -ln(U_j) / w_j,    U_j = uniform(mix(unit_key XOR arm_seed_j)),

so they are independent exponential variables with rates w_j, and the smallest of them falls on
arm j with probability w_j / sum(w) (an exponential race). The propensity of the chosen arm is
therefore its weight over the sum of the positive weights.

Methods used here, by their published names:

* Rendezvous (highest-random-weight) hashing: D. G. Thaler and C. V. Ravishankar (1998),
  "Using name-based mappings to increase hit rates", IEEE/ACM Transactions on Networking 6(1).
* Its weighted variant with -ln(U)/w scores: C. Schindelhauer and G. Schomaker (2005),
  "Weighted distributed hash tables", ACM Symposium on Parallelism in Algorithms and
  Architectures (SPAA).
* FNV-1a, 64 bit (G. Fowler, L. C. Noll and K.-P. Vo), offset basis and prime as published for
  64 bits.
* The SplitMix64 finalizer: the generator of G. L. Steele, D. Lea and C. H. Flood (2014), "Fast
  splittable pseudorandom number generators", OOPSLA, with the shifts (30, 27, 31) and
  multipliers of S. Vigna's public-domain reference code splitmix64.c (from memory: those
  constants are D. Stafford's "Mix13" variant of the MurmurHash3 finalizer).

Stickiness. Because every unit keeps its uniforms U_j whatever the weights are, a change of
weights moves only some units. For this shared-randomness coupling, the share of units that
change arm when the weights move from p to q is at most 2·TV/(1+TV), TV the total-variation
distance between p and q (bound from memory of: M. Daliri, C. Musco and A. T. Suresh (2025),
"Coupling without communication and drafter-invariant speculative decoding", IEEE ISIT). The
tests check it by simulation.

Bit-for-bit contract (shared with the Rust client; all integer arithmetic modulo 2**64):

* ``fnv1a64``: h = 0xcbf29ce484222325; per byte b: h ^= b; h *= 0x100000001b3.
* ``unit_key(experiment, unit)``: FNV-1a 64 of UTF-8(experiment) + b"\\x00" + UTF-8(unit).
* ``arm_seed(arm)``: FNV-1a 64 of UTF-8(arm).
* ``mix``: the SplitMix64 finalizer (shifts 30, 27, 31; multipliers 0xbf58476d1ce4e5b9 and
  0x94d049bb133111eb).
* ``uniform(z)``: float((z >> 11)) + 0.5, then times 2**-53, in IEEE double arithmetic. Note that
  for (z >> 11) >= 2**52 the addition of 0.5 is a tie that rounds to even, and for
  (z >> 11) == 2**53 - 1 the result is exactly 1.0 (score -0.0): the range is (0, 1], not (0, 1).
* Arms are scanned in ascending name order (Python ``str`` order, which is the order of the UTF-8
  bytes, as in Rust). Arms with a weight that is not > 0 are skipped. The first positive arm is
  the initial best; a later arm replaces it only with a strictly smaller score.
* The propensity is w_chosen / total, total the sum of the positive weights added in ascending
  name order.

This module imports nothing beyond the standard library, so a cross-language check can use it
with only the source directory on ``PYTHONPATH``.
"""

from __future__ import annotations

import math
from typing import Iterable, Mapping, Sequence, Tuple

__all__ = [
    "MASK64",
    "FNV_OFFSET_BASIS",
    "FNV_PRIME",
    "Arm",
    "fnv1a64",
    "unit_key",
    "unit_key_prefix",
    "unit_key_from_prefix",
    "arm_seed",
    "mix",
    "uniform",
    "prepare_arms",
    "choose",
    "positive_total",
    "assign_arm",
]

MASK64: int = 0xFFFF_FFFF_FFFF_FFFF
FNV_OFFSET_BASIS: int = 0xCBF2_9CE4_8422_2325
FNV_PRIME: int = 0x0000_0100_0000_01B3
_MIX_M1: int = 0xBF58_476D_1CE4_E5B9
_MIX_M2: int = 0x94D0_49BB_1331_11EB
_TWO_POW_MINUS_53: float = 2.0**-53

#: One arm as ``choose`` reads it: (name, arm_seed(name), weight).
Arm = Tuple[str, int, float]


def fnv1a64(data: bytes, state: int = FNV_OFFSET_BASIS) -> int:
    """FNV-1a, 64 bit, of ``data``, continuing from ``state`` (default: the offset basis).

    FNV-1a is a streaming hash, so ``fnv1a64(b, fnv1a64(a)) == fnv1a64(a + b)``.
    """
    h = state
    for b in data:
        h = ((h ^ b) * FNV_PRIME) & MASK64
    return h


def unit_key_prefix(experiment: str) -> int:
    """The FNV-1a state after UTF-8(experiment) and the 0 separator byte.

    ``unit_key_from_prefix(unit_key_prefix(e), u) == unit_key(e, u)``; callers that assign many
    units of one experiment compute the prefix once.
    """
    return fnv1a64(experiment.encode("utf-8") + b"\x00")


def unit_key_from_prefix(prefix: int, unit: str) -> int:
    """The unit key of ``unit`` given its experiment's ``unit_key_prefix``."""
    h, prime, mask = prefix, FNV_PRIME, MASK64
    for b in unit.encode("utf-8"):
        h = ((h ^ b) * prime) & mask
    return h


def unit_key(experiment: str, unit: str) -> int:
    """FNV-1a 64 of UTF-8(experiment) + b"\\x00" + UTF-8(unit)."""
    return fnv1a64(experiment.encode("utf-8") + b"\x00" + unit.encode("utf-8"))


def arm_seed(arm: str) -> int:
    """FNV-1a 64 of UTF-8(arm)."""
    return fnv1a64(arm.encode("utf-8"))


def mix(z: int) -> int:
    """The SplitMix64 finalizer of ``z`` (taken modulo 2**64)."""
    z &= MASK64
    z ^= z >> 30
    z = (z * _MIX_M1) & MASK64
    z ^= z >> 27
    z = (z * _MIX_M2) & MASK64
    z ^= z >> 31
    return z


def uniform(z: int) -> float:
    """((z >> 11) + 0.5) * 2**-53 in double arithmetic: in (0, 1] (see the module notes)."""
    return ((z >> 11) + 0.5) * _TWO_POW_MINUS_53


def prepare_arms(weights: Mapping[str, float] | Iterable[Tuple[str, float]]) -> Tuple[Arm, ...]:
    """(name, seed, weight) for every arm, in ascending name order, as ``choose`` reads them."""
    items = weights.items() if isinstance(weights, Mapping) else weights
    return tuple((name, arm_seed(name), float(w)) for name, w in sorted(items, key=lambda kv: kv[0]))


def choose(unit_key: int, arms: Sequence[Arm]) -> int:
    """The index in ``arms`` of the arm ``unit_key`` goes to.

    ``arms`` must be in ascending name order (``prepare_arms`` builds it) for the result to match
    other clients; arms whose weight is not > 0 are never chosen. Raises ``ValueError`` when no
    arm has a positive weight.
    """
    # mix() and uniform() written out, constants in locals: this loop is the request path.
    log, mask, m1, m2, scale = math.log, MASK64, _MIX_M1, _MIX_M2, _TWO_POW_MINUS_53
    best = -1
    best_score = 0.0
    for i, (_name, seed, w) in enumerate(arms):
        if not w > 0.0:
            continue
        z = (unit_key ^ seed) & mask
        z ^= z >> 30
        z = (z * m1) & mask
        z ^= z >> 27
        z = (z * m2) & mask
        z ^= z >> 31
        score = -log(((z >> 11) + 0.5) * scale) / w
        if best < 0 or score < best_score:
            best = i
            best_score = score
    if best < 0:
        raise ValueError("no arm has a positive weight")
    return best


def positive_total(arms: Sequence[Arm]) -> float:
    """The sum of the positive weights of ``arms``, added in the order given."""
    total = 0.0
    for _name, _seed, w in arms:
        if w > 0.0:
            total += w
    return total


def assign_arm(experiment: str, unit: str, weights: Mapping[str, float]) -> Tuple[str, float]:
    """The arm ``unit`` of ``experiment`` goes to under ``weights``, and its propensity.

    Convenience form of ``choose``; a service assigning many units should prepare the arms once
    (the client does). Raises ``ValueError`` when no weight is positive.
    """
    arms = prepare_arms(weights)
    i = choose(unit_key(experiment, unit), arms)
    return arms[i][0], arms[i][2] / positive_total(arms)
