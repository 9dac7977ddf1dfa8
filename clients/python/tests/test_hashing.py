"""Properties of the weighted rendezvous assignment (apportion_client.hashing).

Methods under test, by their published names: rendezvous (highest-random-weight) hashing,
Thaler & Ravishankar (1998), "Using name-based mappings to increase hit rates", IEEE/ACM
Transactions on Networking 6(1); its weighted form with -ln(U)/w scores, Schindelhauer &
Schomaker (2005), "Weighted distributed hash tables", SPAA; the stickiness bound 2·TV/(1+TV) of
this shared-randomness coupling, Daliri, Musco & Suresh (2025), "Coupling without communication
and drafter-invariant speculative decoding", IEEE ISIT (bound from memory); Pearson's chi-square
goodness-of-fit test (Pearson, 1900, "On the criterion that a given system of deviations ...",
Philosophical Magazine 50(302)).

Check values without a note of their own follow from the definition of the assignment (the
contract in the docstring of apportion_client/hashing.py). Every loop here is bounded by a fixed
count; the whole file runs in a few seconds.
"""

from __future__ import annotations

import math
import os
import random
import subprocess
import sys
from typing import List, Sequence, Tuple

import pytest

from apportion_client.hashing import (
    FNV_OFFSET_BASIS,
    MASK64,
    arm_seed,
    assign_arm,
    choose,
    fnv1a64,
    mix,
    prepare_arms,
    uniform,
    unit_key,
    unit_key_from_prefix,
    unit_key_prefix,
)

# ----------------------------------------------------------------------------- building blocks


def test_fnv1a64_matches_the_published_test_vectors() -> None:
    # FNV-1a 64-bit test vectors of the algorithm's authors (Noll's FNV test suite), from
    # memory; the sidecar's own FNV-1a (src/stream/snapshot.rs) is checked against the same.
    assert fnv1a64(b"") == 0xCBF29CE484222325
    assert fnv1a64(b"a") == 0xAF63DC4C8601EC8C
    assert fnv1a64(b"foobar") == 0x85944171F73967E8


def test_fnv1a64_streams() -> None:
    # Follows from the definition (the state after a prefix is all FNV-1a carries): derived by hand.
    assert fnv1a64(b"bar", fnv1a64(b"foo")) == fnv1a64(b"foobar")
    assert fnv1a64(b"", FNV_OFFSET_BASIS) == FNV_OFFSET_BASIS


def test_mix_is_the_splitmix64_finalizer() -> None:
    # The first three outputs of SplitMix64 seeded with 0 (state advanced by 0x9e3779b97f4a7c15
    # before each finalizer call), as printed by S. Vigna's reference splitmix64.c: from memory.
    golden = 0x9E3779B97F4A7C15
    assert mix(golden) == 0xE220A8397B1DCDAF
    assert mix(2 * golden) == 0x6E789E6AA1B965F4
    assert mix(3 * golden) == 0x06C45D188009454F


def test_uniform_range_ends() -> None:
    # Derived by hand from IEEE-754 double arithmetic (round half to even):
    # (0 + 0.5)·2^-53 = 2^-54; (2^53 - 1) + 0.5 is a tie that rounds to 2^53, so the top is 1.0.
    assert uniform(0) == 2.0**-54
    assert uniform(MASK64) == 1.0
    assert 0.0 < uniform(0x1234_5678_9ABC_DEF0) < 1.0


def test_unit_key_is_fnv_of_experiment_zero_unit() -> None:
    # The definition of unit_key (README of this package): no external value.
    assert unit_key("thumb-style", "u-1") == fnv1a64(b"thumb-style\x00u-1")
    assert arm_seed("warm") == fnv1a64(b"warm")
    assert unit_key_from_prefix(unit_key_prefix("thumb-style"), "u-1") == unit_key("thumb-style", "u-1")
    # Non-ASCII names hash their UTF-8 bytes.
    assert unit_key("é", "ü") == fnv1a64("é".encode("utf-8") + b"\x00" + "ü".encode("utf-8"))
    # The separator keeps ("ab", "c") and ("a", "bc") apart.
    assert unit_key("ab", "c") != unit_key("a", "bc")


# --------------------------------------------------------------------------------- assignment

SHARES = {"a": 0.5, "b": 0.3, "c": 0.15, "d": 0.05}


def _chi2_critical_999_df3() -> Tuple[float, str]:
    try:
        import scipy
        from scipy.stats import chi2
    except ImportError:
        # From scipy.stats.chi2.ppf(0.999, 3), scipy 1.17.1.
        return 16.266, "hard-coded, from scipy.stats.chi2.ppf(0.999, 3), scipy 1.17.1"
    return float(chi2.ppf(0.999, 3)), f"scipy {scipy.__version__}"


def test_shares_match_the_weights_chi_square() -> None:
    n = 100_000
    arms = prepare_arms(SHARES)
    prefix = unit_key_prefix("shares")
    counts = [0] * len(arms)
    for i in range(n):
        counts[choose(unit_key_from_prefix(prefix, f"unit-{i}"), arms)] += 1
    total = sum(w for _, _, w in arms)
    expected = [n * w / total for _, _, w in arms]
    stat = sum((o - e) ** 2 / e for o, e in zip(counts, expected))
    critical, source = _chi2_critical_999_df3()
    # Pearson's chi-square at level 0.001 with 3 degrees of freedom; critical value 16.266,
    # from scipy.stats.chi2.ppf(0.999, 3), scipy 1.17.1 (here: `source`).
    print(f"\nchi-square over {n} units: {stat:.3f} (critical {critical:.3f}, {source}); counts {counts}")
    assert stat < critical, (stat, critical, counts)


def test_propensity_is_the_weight_of_the_assigned_arm() -> None:
    for i in range(2_000):
        arm, p = assign_arm("prop", f"unit-{i}", SHARES)
        # The propensity is w / sum(w), here sum(w) = 1 up to rounding: common practice, no source.
        assert p == pytest.approx(SHARES[arm], rel=1e-12)
    # Unnormalised weights: w / sum of the positive weights, derived by hand (2/8, 6/8).
    seen = {}
    for i in range(500):
        arm, p = assign_arm("prop", f"unit-{i}", {"x": 2.0, "y": 6.0, "z": 0.0})
        seen[arm] = p
    assert seen == {"x": 0.25, "y": 0.75}


def test_assignment_is_deterministic_and_order_free() -> None:
    units = [f"unit-{i}" for i in range(1_000)]
    first = [assign_arm("det", u, SHARES) for u in units]
    again = [assign_arm("det", u, dict(reversed(list(SHARES.items())))) for u in units]
    assert first == again
    # Different experiments spread the same unit independently (not all on the same arm).
    other = [assign_arm("det-2", u, SHARES)[0] for u in units]
    assert other != [a for a, _ in first]


def test_assignment_does_not_depend_on_the_interpreter_hash_seed() -> None:
    code = (
        "from apportion_client.hashing import assign_arm\n"
        "print(','.join(assign_arm('det', f'unit-{i}', {'a': .5, 'b': .3, 'c': .2})[0] for i in range(300)))\n"
    )
    src = os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "src")
    outs = []
    for seed in ("1", "2"):
        env = dict(os.environ, PYTHONHASHSEED=seed, PYTHONPATH=src)
        r = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=60, check=True)
        outs.append(r.stdout.strip())
    here = ",".join(assign_arm("det", f"unit-{i}", {"a": 0.5, "b": 0.3, "c": 0.2})[0] for i in range(300))
    assert outs[0] == outs[1] == here


def test_zero_and_negative_weight_arms_are_never_chosen() -> None:
    weights = {"a": 0.5, "b": 0.0, "c": 0.5, "d": -1.0, "e": float("nan")}
    got = {assign_arm("zero", f"unit-{i}", weights)[0] for i in range(20_000)}
    assert got == {"a", "c"}
    with pytest.raises(ValueError):
        assign_arm("zero", "u", {"a": 0.0, "b": -2.0})
    with pytest.raises(ValueError):
        choose(1, [])


def test_ties_keep_the_earlier_arm() -> None:
    # Two arms of the same name cannot exist in a message; two entries with the same seed and
    # weight give equal scores, and the earlier one must win (strictly-less comparison).
    seed = arm_seed("a")
    for i in range(200):
        assert choose(unit_key("tie", f"unit-{i}"), [("a", seed, 1.0), ("a2", seed, 1.0)]) == 0


# -------------------------------------------------------------------------------- stickiness

N_UNITS = 20_000
NAMES = "abcdef"


def _exponentials() -> List[Tuple[float, ...]]:
    """-ln(U_j) per unit and arm a..f: the numerators of the rendezvous scores."""
    prefix = unit_key_prefix("sticky")
    seeds = [arm_seed(n) for n in NAMES]
    rows = []
    for i in range(N_UNITS):
        k = unit_key_from_prefix(prefix, f"unit-{i}")
        rows.append(tuple(-math.log(uniform(mix(k ^ s))) for s in seeds))
    return rows


def _uniforms() -> List[float]:
    """The interval map's uniform per unit: uniform(mix(unit_key))."""
    prefix = unit_key_prefix("sticky")
    return [uniform(mix(unit_key_from_prefix(prefix, f"unit-{i}"))) for i in range(N_UNITS)]


def _rendezvous(rows: Sequence[Tuple[float, ...]], w: Sequence[float]) -> List[int]:
    """The rendezvous choice per unit, the same arithmetic as ``choose`` (checked below)."""
    active = [j for j, x in enumerate(w) if x > 0.0]
    out = []
    for row in rows:
        best, best_score = -1, 0.0
        for j in active:
            s = row[j] / w[j]
            if best < 0 or s < best_score:
                best, best_score = j, s
        out.append(best)
    return out


def _interval_map(us: Sequence[float], w: Sequence[float]) -> List[int]:
    """The alternative: cumulative intervals in arm-name order, the unit's uniform picks one."""
    total = sum(x for x in w if x > 0.0)
    cum, edges = 0.0, []
    for x in w:
        cum += max(x, 0.0) / total
        edges.append(cum)
    last = max(j for j, x in enumerate(w) if x > 0.0)
    out = []
    for u in us:
        pick = last
        for j, e in enumerate(edges):
            if u < e:
                pick = j
                break
        out.append(pick)
    return out


def _tv(p: Sequence[float], q: Sequence[float]) -> float:
    sp = sum(x for x in p if x > 0)
    sq = sum(x for x in q if x > 0)
    return 0.5 * sum(abs(max(a, 0.0) / sp - max(b, 0.0) / sq) for a, b in zip(p, q))


def _moved(a: Sequence[int], b: Sequence[int]) -> float:
    return sum(1 for x, y in zip(a, b) if x != y) / len(a)


def _bound(tv: float) -> float:
    # Daliri, Musco & Suresh (2025), ISIT: Pr[arm changes] <= 2·TV/(1+TV) (from memory).
    return 2.0 * tv / (1.0 + tv)


def _margin(b: float) -> float:
    # Monte-Carlo margin: the moved share is a mean of N_UNITS indicators of probability at most
    # b, so its standard deviation is at most sqrt(b/N_UNITS); three of them (common practice,
    # no source). The unit ids are fixed, so the test is deterministic.
    return 3.0 * math.sqrt(b / N_UNITS)


def _random_pairs(rng: random.Random, count: int) -> List[Tuple[List[float], List[float]]]:
    pairs = []
    for _ in range(count):
        k = rng.randint(2, 6)
        p = [rng.random() for _ in range(k)]
        if k > 2 and rng.random() < 0.2:
            p[rng.randrange(k)] = 0.0
        if rng.random() < 0.5:
            # An unrelated new split.
            q = [rng.random() for _ in range(k)]
        else:
            # A nudge, as between two publishes.
            q = [max(0.0, x + rng.uniform(-0.1, 0.1)) for x in p]
        if sum(q) <= 0.0:
            q[0] = 1.0
        sp, sq = sum(p), sum(q)
        pairs.append(([x / sp for x in p], [x / sq for x in q]))
    return pairs


def test_few_units_move_when_weights_move() -> None:
    rows = _exponentials()
    us = _uniforms()
    prefix = unit_key_prefix("sticky")
    keys = [unit_key_from_prefix(prefix, f"unit-{i}") for i in range(500)]
    pairs = _random_pairs(random.Random(20261204), 200)
    worst_ratio, worst_interval_ratio, worst_slack = 0.0, 0.0, -1.0
    for t, (p, q) in enumerate(pairs):
        old, new = _rendezvous(rows, p), _rendezvous(rows, q)
        if t < 20:
            # The fast path is the same arithmetic as the client's choose(): checked on 500 units.
            for w, got in ((p, old), (q, new)):
                arms = [(NAMES[j], arm_seed(NAMES[j]), w[j]) for j in range(len(w))]
                assert [choose(k, arms) for k in keys] == got[:500]
        moved = _moved(old, new)
        tv = _tv(p, q)
        b = _bound(tv)
        assert moved <= b + _margin(b), (t, p, q, moved, tv, b)
        if tv > 0.0:
            worst_ratio = max(worst_ratio, moved / tv)
            worst_interval_ratio = max(worst_interval_ratio, _moved(_interval_map(us, p), _interval_map(us, q)) / tv)
        else:
            assert moved == 0.0
        worst_slack = max(worst_slack, moved - b)
    print(
        f"\nrendezvous: largest moved/TV over {len(pairs)} pairs = {worst_ratio:.4f} "
        f"(bound 2/(1+TV) < 2), largest moved - bound = {worst_slack:+.4f}; "
        f"interval map on the same pairs: largest moved/TV = {worst_interval_ratio:.4f}"
    )
    # The bound 2·TV/(1+TV) caps the ratio at 2 (from memory, see _bound).
    assert worst_ratio <= 2.0


def test_interval_map_moves_up_to_k_minus_one_times_tv() -> None:
    """A documented comparison, not the client's method.

    Cumulative intervals in arm-name order, (0.4, 0.2, 0.4) -> (0.3, 0.2, 0.5): TV = 0.1, but
    every interval edge shifts, [0.3, 0.4) goes a -> b and [0.5, 0.6) goes b -> c, so 0.2 of the
    units move, (K-1)·TV with K = 3 (derived by hand). Rendezvous moves at most 2·0.1/1.1 ≈ 0.18.
    """
    p, q = [0.4, 0.2, 0.4], [0.3, 0.2, 0.5]
    tv = _tv(p, q)
    assert tv == pytest.approx(0.1, abs=1e-12)  # derived by hand
    us = _uniforms()
    interval = _moved(_interval_map(us, p), _interval_map(us, q))
    # 0.2 = (K-1)·TV, derived by hand; Monte-Carlo margin as in _margin.
    assert abs(interval - 0.2) <= _margin(0.2), interval
    rows = _exponentials()
    rendezvous = _moved(_rendezvous(rows, p), _rendezvous(rows, q))
    b = _bound(tv)
    assert rendezvous <= b + _margin(b), rendezvous
    assert rendezvous < interval - _margin(0.2)
    print(f"\n(0.4,0.2,0.4)->(0.3,0.2,0.5): interval map moved {interval:.4f}, rendezvous moved {rendezvous:.4f}, bound {b:.4f}")


def test_prepare_arms_sorts_and_seeds() -> None:
    arms = prepare_arms({"warm": 0.6, "cool": 0.3, "mono": 0.1})
    assert [a[0] for a in arms] == ["cool", "mono", "warm"]
    assert all(seed == arm_seed(name) for name, seed, _ in arms)
