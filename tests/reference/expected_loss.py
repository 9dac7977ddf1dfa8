#!/usr/bin/env python3
"""Reference values of the expected loss of choosing the leader under Beta posteriors.

The Rust core computes, for independent Beta(a_j, b_j) posteriors, E[max_j theta_j] and the
expected loss E[max_j theta_j - theta_L] = E[max] - a_L / (a_L + b_L) of sending everything to
arm L (the "value remaining" of Scott 2015).  This script computes the same quantities
independently:

    E[max] = integral_0^1 (1 - prod_j F_j(x)) dx

with F_j the Beta CDF from scipy.stats.beta, integrated by scipy.integrate.quad on many
sub-intervals placed around each posterior, and checks them with mpmath (tanh-sinh
quadrature at 30 digits) for the two-arm cases of up to 2 000 pulls and with a seeded Monte Carlo for all.
Run from the repository root:

    python3 tests/reference/expected_loss.py

It writes tests/data/expected_loss.json and exits non-zero if a check fails.
"""

import json
import math
import platform
import sys

import mpmath
import numpy as np
import scipy
from scipy import integrate, stats


def cases():
    out = [
        ("two uniforms", [(1, 1), (1, 1)]),
        ("uniform and Beta(2,1)", [(2, 1), (1, 1)]),
        ("clear winner", [(900, 100), (100, 900)]),
        ("click rates far apart", [(51, 951), (31, 971)]),
        ("near tie at 1 000 pulls", [(41, 961), (40, 962)]),
        ("near tie at 10 000 pulls", [(401, 9601), (400, 9602)]),
        ("near tie at 100 000 pulls", [(4001, 96001), (4000, 96002)]),
        ("exact tie", [(120, 880), (120, 880)]),
        ("rare events", [(3, 100000), (4, 100000)]),
        ("mixed scales", [(3, 50), (300, 5000), (30, 500)]),
        ("fractional counts", [(12.7, 88.3), (10.25, 90.75), (1.5, 3.5)]),
        ("one strong, one unknown", [(500, 500), (1, 1)]),
        ("three near ties", [(101, 901), (100, 902), (99, 903)]),
        ("high rates", [(9501, 501), (9480, 522)]),
        ("four arms at 200 pulls", [(21, 181), (17, 185), (14, 188), (9, 193)]),
        ("bounded-like fractional", [(40.5, 61.5), (44.25, 57.75), (30.0, 72.0)]),
        ("prior only vs data", [(1, 1), (6, 96)]),
    ]
    rng = np.random.default_rng(20261204)
    for k, n in [(10, 1000), (10, 20000), (20, 5000), (50, 2000)]:
        means = np.sort(rng.uniform(0.02, 0.08, size=k))[::-1]
        arms = []
        for m in means:
            s = float(np.round(m * n))
            arms.append((1 + s, 1 + n - s))
        out.append((f"{k} arms at {n} pulls", arms))
    # A crowd of exact ties under a clear leader.
    out.append(("leader over a tied crowd", [(81, 921)] + [(61, 941)] * 8))
    return out


def expected_max(arms):
    lo, hi, points = 1.0, 0.0, []
    for a, b in arms:
        m = a / (a + b)
        sd = math.sqrt(a * b / ((a + b) ** 2 * (a + b + 1)))
        lo = min(lo, max(0.0, m - 14 * sd))
        hi = max(hi, min(1.0, m + 18 * sd))
        points += [m + sd * z for z in np.linspace(-14, 18, 65)]
    points = sorted(p for p in set(points + [lo, hi]) if lo <= p <= hi)
    dists = [stats.beta(a, b) for a, b in arms]

    def integrand(x):
        return 1.0 - math.prod(d.cdf(x) for d in dists)

    total = lo
    for x0, x1 in zip(points, points[1:]):
        v, _ = integrate.quad(integrand, x0, x1, epsabs=1e-15, epsrel=1e-13, limit=200)
        total += v
    return total


def expected_max_mpmath(arms):
    mpmath.mp.dps = 30
    (a1, b1), (a2, b2) = arms

    def cdf(x, a, b):
        return mpmath.betainc(a, b, 0, x, regularized=True)

    m = [a / (a + b) for a, b in arms]
    sd = [math.sqrt(a * b / ((a + b) ** 2 * (a + b + 1))) for a, b in arms]
    lo = max(0.0, min(mi - 14 * s for mi, s in zip(m, sd)))
    hi = min(1.0, max(mi + 18 * s for mi, s in zip(m, sd)))
    pts = sorted({lo, hi, *[p for mi, s in zip(m, sd) for p in (mi - 3 * s, mi, mi + 3 * s) if lo < p < hi]})
    return float(lo + mpmath.quad(lambda x: 1 - cdf(x, a1, b1) * cdf(x, a2, b2), pts))


def monte_carlo(arms, rng, n=400_000):
    draws = np.stack([rng.beta(a, b, size=n) for a, b in arms])
    mx = draws.max(axis=0)
    return mx.mean(), mx.std() / math.sqrt(n)


def main():
    rng = np.random.default_rng(7)
    out = []
    failed = False
    for name, arms in cases():
        e = expected_max(arms)
        means = [a / (a + b) for a, b in arms]
        leader = max(range(len(arms)), key=lambda j: means[j])
        loss = e - means[leader]
        mc, se = monte_carlo(arms, rng)
        if abs(mc - e) > 5 * se + 1e-12:
            print(f"Monte Carlo disagrees for {name}: {mc} ± {se} vs {e}", file=sys.stderr)
            failed = True
        if len(arms) == 2 and all(a + b <= 2_000 for a, b in arms):
            mp = expected_max_mpmath(arms)
            if abs(mp - e) > 1e-11:
                print(f"mpmath disagrees for {name}: {mp} vs {e}", file=sys.stderr)
                failed = True
        if loss < -1e-14 or e > 1.0:
            print(f"impossible values for {name}: {e}, {loss}", file=sys.stderr)
            failed = True
        out.append({"name": name, "alpha": [a for a, _ in arms], "beta": [b for _, b in arms],
                    "leader": leader, "expected_max": e, "expected_loss": max(loss, 0.0)})
    doc = {
        "source": "E[max] = integral of 1 - prod_j F_j(x) over [0, 1], scipy.integrate.quad of "
                  "scipy.stats.beta CDFs on sub-intervals around every posterior; checked against "
                  "mpmath tanh-sinh quadrature at 30 digits (two arms, up to 2 000 pulls) and a seeded Monte Carlo "
                  "of 400 000 draws (within 5 standard errors). expected_loss = E[max] minus the "
                  "posterior mean of the arm with the highest posterior mean (leader).",
        "versions": {"python": platform.python_version(), "numpy": np.__version__,
                     "scipy": scipy.__version__, "mpmath": mpmath.__version__},
        "generated_by": "tests/reference/expected_loss.py",
        "cases": out,
    }
    with open("tests/data/expected_loss.json", "w") as f:
        json.dump(doc, f, indent=1)
        f.write("\n")
    print(f"{len(out)} cases written to tests/data/expected_loss.json")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
