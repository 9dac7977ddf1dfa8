#!/usr/bin/env python3
"""Reference values of the beta-binomial mixture confidence sequence for a rate.

The Rust core keeps, for every arm, an anytime-valid confidence set for its rate built from
the mixture martingale of Robbins (1970, "Statistical methods related to the law of the
iterated logarithm", Annals of Mathematical Statistics 41(5)) with a uniform mixing prior.
For n observations in [0, 1] with sum S (both may be fractional after discounting) and error
level alpha the set is

    {p in [0, 1] : g(p) < ln(1/alpha)},
    g(p) = ln B(1 + S, 1 + n - S) - S ln p - (n - S) ln(1 - p),

with B the Beta function and 0 ln 0 = 0.  g is convex with its minimum at S/n, where it is at
most 0, so the set is an interval [low, high]: low is the root of g = ln(1/alpha) in
[0, S/n] (0 when g(0) < ln(1/alpha), which happens exactly when S = 0), high the root in
[S/n, 1] (1 when S = n).  With n = 0 the interval is [0, 1].

This script computes every interval two independent ways and requires them to agree within
1e-12 at both ends:

 1. mpmath at 50 digits, ln B from mpmath.loggamma, each end by bisection until the bracket
    is narrower than 1e-32 relative to the end.  The upper end is found as 1 - (lower end of
    the mirrored problem with n - S successes), which keeps full relative precision when
    1 - high is tiny.
 2. double precision, scipy.special.betaln and scipy.optimize.brentq (xtol 1e-15, rtol
    4 machine epsilons) directly on g for both ends.

It also checks the mpmath values against the closed forms for S = 0 (high =
1 - (alpha / (n + 1))^(1/n)) and S = n (low = (alpha / (n + 1))^(1/n)), that each interval
holds S/n, and that the intervals of one (S, n) nest as alpha falls.  The mpmath values are
written.  Run from the repository root:

    python3 tests/reference/confidence_sequence.py

It writes tests/data/confidence_sequence.json and exits non-zero if a check fails.  For
information only it prints the ratio of the sequence's width to the 95% Wilson (1927)
score interval's width at 500/10 000 and 5 000/10 000.
"""

import json
import math
import platform
import sys
import time

import mpmath
import numpy as np
import scipy
from scipy import optimize, special, stats

ALPHAS = [0.05, 0.025, 0.0125, 0.01]
TOLERANCE = 1e-12


def cases():
    """(name, S, n, alpha), S and n as floats."""
    # Counts checked at all four error levels.
    grid = [
        (0, 1), (1, 1), (0, 2), (1, 2), (2, 2),
        (0, 10), (1, 10), (5, 10), (10, 10),
        (1, 40), (2, 40), (20, 40),
        (0, 100), (1, 100), (2, 100), (50, 100), (97, 100), (100, 100),
        (1, 1000), (20, 1000), (500, 1000), (970, 1000),
        (0, 10_000), (500, 10_000), (5000, 10_000), (10_000, 10_000),
        (1, 1_000_000), (1000, 1_000_000), (500_000, 1_000_000), (1_000_000, 1_000_000),
    ]
    # Counts checked at alpha = 0.05 only.
    single = [
        (10, 10_000), (200, 10_000), (9700, 10_000),
        (100, 100_000), (2000, 100_000), (5000, 100_000), (50_000, 100_000), (97_000, 100_000),
        (0, 1_000_000), (20_000, 1_000_000), (50_000, 1_000_000), (970_000, 1_000_000),
        (999_999, 1_000_000),
    ]
    # Discounted (fractional) counts, all four error levels.
    fractional = [
        (12.7, 101.3), (0.4, 3.25), (2.5, 7.75), (0.97, 1.0), (0.02, 1.0),
        (3.0, 3.25), (88.6, 101.3), (1234.56, 40000.5), (0.0, 0.5), (0.5, 0.5),
    ]
    out = [("no observations", 0.0, 0.0, 0.05)]
    for s, n in grid:
        for a in ALPHAS:
            out.append((f"{s} of {n} at alpha {a}", float(s), float(n), a))
    for s, n in single:
        out.append((f"{s} of {n} at alpha 0.05", float(s), float(n), 0.05))
    for s, n in fractional:
        for a in ALPHAS:
            out.append((f"discounted {s} of {n} at alpha {a}", float(s), float(n), a))
    return out


# --- 1. mpmath at 50 digits -------------------------------------------------------------

def lower_end_mp(s, n, c):
    """Smallest p with g(p) < c, for exact doubles s, n (0 <= s <= n, n > 0) and c = ln(1/alpha)."""
    s, n = mpmath.mpf(s), mpmath.mpf(n)
    log_b = mpmath.loggamma(1 + s) + mpmath.loggamma(1 + n - s) - mpmath.loggamma(2 + n)

    def g(p):
        v = log_b
        if s > 0:
            v -= s * mpmath.log(p)
        if n - s > 0:
            v -= (n - s) * mpmath.log1p(-p)
        return v

    if s == 0:
        # g(0) = ln B(1, 1 + n) = -ln(1 + n) < c: p = 0 is in the set.
        assert g(mpmath.mpf(0)) < c
        return mpmath.mpf(0)
    lo, hi = mpmath.mpf(0), s / n      # g(0+) = +inf > c, g(s/n) <= 0 < c
    assert g(hi) < c
    for _ in range(20_000):
        if hi - lo <= mpmath.mpf("1e-32") * hi:
            break
        mid = (lo + hi) / 2
        if g(mid) < c:
            hi = mid
        else:
            lo = mid
    else:
        raise RuntimeError("bisection did not converge")
    return (lo + hi) / 2


def interval_mp(s, n, alpha):
    mpmath.mp.dps = 50
    if n == 0:
        return mpmath.mpf(0), mpmath.mpf(1)
    c = -mpmath.log(mpmath.mpf(alpha))
    low = lower_end_mp(s, n, c)
    # g(1 - q; S, n) = g(q; n - S, n), since B is symmetric.
    high = 1 - lower_end_mp(n - s, n, c)
    return low, high


def closed_form_mp(n, alpha):
    """(alpha / (n + 1))^(1/n): low for S = n and 1 - high for S = 0."""
    mpmath.mp.dps = 50
    n = mpmath.mpf(n)
    return mpmath.exp(mpmath.log(mpmath.mpf(alpha) / (n + 1)) / n)


# --- 2. scipy in double precision -------------------------------------------------------

def interval_scipy(s, n, alpha):
    if n == 0:
        return 0.0, 1.0
    c = math.log(1.0 / alpha)
    log_b = special.betaln(1.0 + s, 1.0 + n - s)

    def f(p):
        v = log_b
        if s > 0:
            v -= s * math.log(p) if p > 0 else -math.inf
        if n - s > 0:
            v -= (n - s) * math.log1p(-p) if p < 1 else -math.inf
        return v - c

    rtol = 4 * np.finfo(float).eps
    mode = s / n
    # Lower end.
    if f(0.0) < 0:
        low = 0.0
    else:
        x, prev = mode / 2, mode
        while x > 0 and f(x) < 0:
            x, prev = x / 2, x
        low = 0.0 if x == 0 else optimize.brentq(f, x, prev, xtol=1e-15, rtol=rtol)
    # Upper end.
    if f(1.0) < 0:
        high = 1.0
    else:
        top = math.nextafter(1.0, 0.0)
        if f(top) < 0:
            high = 1.0     # the root lies above the largest double below 1
        else:
            x, prev = (1 + mode) / 2, mode
            while x < top and f(x) < 0:
                x, prev = min((1 + x) / 2, top), x
            high = optimize.brentq(f, prev, x, xtol=1e-15, rtol=rtol)
    return low, high


def wilson_width(s, n, z):
    """Width of the Wilson (1927) score interval."""
    p = s / n
    return 2 * z / (1 + z * z / n) * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))


def main():
    start = time.time()
    failed = False
    out = []
    max_diff = 0.0
    by_counts = {}
    for name, s, n, alpha in cases():
        low_mp, high_mp = interval_mp(s, n, alpha)
        low_sp, high_sp = interval_scipy(s, n, alpha)
        diff = max(abs(float(low_mp) - low_sp), abs(float(high_mp) - high_sp))
        max_diff = max(max_diff, diff)
        if diff > TOLERANCE:
            print(f"scipy disagrees with mpmath for {name}: [{low_sp}, {high_sp}] vs "
                  f"[{float(low_mp)}, {float(high_mp)}]", file=sys.stderr)
            failed = True
        if n > 0 and not (0 <= low_mp <= mpmath.mpf(s) / n <= high_mp <= 1):
            print(f"interval of {name} does not hold S/n", file=sys.stderr)
            failed = True
        if n > 0 and s == 0:
            ref = 1 - closed_form_mp(n, alpha)
            if low_mp != 0 or abs(high_mp - ref) > mpmath.mpf("1e-25") * ref:
                print(f"closed form for S = 0 disagrees for {name}: {high_mp} vs {ref}", file=sys.stderr)
                failed = True
        if n > 0 and s == n:
            ref = closed_form_mp(n, alpha)
            if high_mp != 1 or abs(low_mp - ref) > mpmath.mpf("1e-25") * ref:
                print(f"closed form for S = n disagrees for {name}: {low_mp} vs {ref}", file=sys.stderr)
                failed = True
        by_counts.setdefault((s, n), []).append((alpha, low_mp, high_mp))
        out.append({"name": name, "successes": s, "trials": n, "alpha": alpha,
                    "low": float(low_mp), "high": float(high_mp)})
    for (s, n), rows in by_counts.items():
        rows.sort(key=lambda r: -r[0])
        for (a0, l0, h0), (a1, l1, h1) in zip(rows, rows[1:]):
            if not (l1 <= l0 and h0 <= h1):
                print(f"intervals for {s} of {n} do not nest from alpha {a0} to {a1}", file=sys.stderr)
                failed = True

    doc = {
        "source": "tests/reference/confidence_sequence.py",
        "construction": "Robbins (1970, Statistical methods related to the law of the iterated "
                        "logarithm, Annals of Mathematical Statistics 41(5)) beta-binomial mixture "
                        "confidence sequence with a uniform prior: {p in [0, 1] : ln B(1 + S, 1 + n - S) "
                        "- S ln p - (n - S) ln(1 - p) < ln(1/alpha)}, 0 ln 0 = 0, [0, 1] for n = 0. Ends by "
                        "bisection with mpmath at 50 digits (ln B from mpmath.loggamma), checked against "
                        "scipy.special.betaln with scipy.optimize.brentq (within 1e-12 at both ends) and "
                        "against the closed forms for S = 0 and S = n. The mpmath values are written.",
        "versions": {"python": platform.python_version(), "numpy": np.__version__,
                     "scipy": scipy.__version__, "mpmath": mpmath.__version__},
        "generated_by": "tests/reference/confidence_sequence.py",
        "cases": out,
    }
    with open("tests/data/confidence_sequence.json", "w") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")
    print(f"{len(out)} cases written to tests/data/confidence_sequence.json")
    print(f"largest scipy/mpmath difference at either end: {max_diff:.3g}")

    # For information only: width relative to the 95% Wilson interval at a fixed n.
    z = stats.norm.ppf(0.975)     # 1.959963984540054
    for s, n in [(500.0, 10_000.0), (5000.0, 10_000.0)]:
        low, high = interval_mp(s, n, 0.05)
        ratio = float(high - low) / wilson_width(s, n, z)
        print(f"width / Wilson width at {s:g} of {n:g}, alpha 0.05: {ratio:.4f}")
    print(f"{time.time() - start:.1f} s")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
