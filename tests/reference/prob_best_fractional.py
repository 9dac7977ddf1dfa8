#!/usr/bin/env python3
"""Reference values for the probability of best on non-integer Beta parameters.

Why this exists: posteriors from bounded rewards (fractional success counts),
from decay (fractional pulls) and from priors such as 1.5 have parameters that
are not whole numbers, often between 1 and 3.  A Beta density with a parameter
in (1, 2) has an infinite slope at 0 or 1 and one in (2, 3) an infinite second
derivative, which a quadrature built for smooth integrands gets wrong.  These
cases are computed with the same scipy quadrature and the same cross-checks as
tests/reference/generate.py (whose functions this script imports), and written
to tests/data/prob_best_fractional.json.  Run it from the repository root:

    python3 tests/reference/prob_best_fractional.py

The first case also has a closed form: for X ~ Beta(a, 1) and Y ~ U(0, 1),
P(Y > X) = integral_0^1 y^a dy = 1 / (a + 1); the script checks it.
"""

import math
import os
import sys

import json

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import generate  # noqa: E402


def bounded(successes, pulls, prior=1.0):
    """Fractional Beta counts of bounded rewards: S = sum of scaled rewards."""
    return prior + successes, prior + pulls - successes


CASES = [
    ("Beta(1.0001,1) vs uniform", [(1.0001, 1.0), (1.0, 1.0)]),
    ("prior 1.5 without data", [(1.5, 1.5), (1.5, 1.5), (1.0, 1.0)]),
    ("prior 1.5 with a few pulls", [bounded(1, 3, 1.5), bounded(0, 3, 1.5)]),
    ("bounded rewards, few pulls",
     [bounded(0.37, 3), bounded(1.9, 2), bounded(0.05, 1)]),
    ("bounded rewards near the maximum",
     [bounded(3.8, 4), bounded(2.5, 3), bounded(1.95, 2)]),
    ("decayed counts", [bounded(0.1, 0.3), bounded(0.6, 1.5), bounded(1.05, 2.5)]),
    ("exponents across (1, 3)",
     [(1.1, 2.9), (2.1, 1.3), (1.7, 1.7), (2.9, 2.5)]),
    ("a decayed arm beside a long arm", [(1.02, 1.3), bounded(30.4, 300)]),
    ("exponents just above one at both ends",
     [(1.0001, 1.0001), (1.01, 1.0), (1.0, 1.01)]),
    ("bounded rewards, many small rewards",
     [bounded(0.6, 40), bounded(0.3, 10), bounded(1.4, 60)]),
    ("five decayed near-uniform arms",
     [(1.05, 1.1), (1.3, 1.02), (1.2, 1.6), (1.9, 1.15), (1.45, 1.45)]),
    ("exponents just above two", [(2.05, 1.5), (2.1, 2.08), (1.5, 2.02)]),
    ("rates near one, fractional", [(40.5, 1.3), (20.2, 1.05)]),
    ("prior 1.5 and decayed long arms",
     [bounded(120.4, 2000.7, 1.5), bounded(131.9, 2100.2, 1.5), (1.5, 1.5)]),
]


def write(source, cases):
    doc = {
        "source": source,
        "versions": generate.VERSIONS,
        "generated_by": "tests/reference/prob_best_fractional.py",
        "cases": cases,
    }
    path = os.path.join(generate.OUT_DIR, "prob_best_fractional.json")
    with open(path, "w") as fh:
        json.dump(doc, fh, indent=1)
        fh.write("\n")
    print("wrote", os.path.relpath(path))


def main():
    cases = []
    for name, arms in CASES:
        alpha = [float(a) for a, _ in arms]
        beta = [float(b) for _, b in arms]
        p = generate.prob_best_quad(alpha, beta)
        s = math.fsum(p)
        if abs(s - 1.0) > 1e-9:
            generate.fail(f"'{name}': sum = {s!r}")
        mc = generate.prob_best_monte_carlo(alpha, beta)
        mc_diff = float(np.max(np.abs(mc - np.asarray(p))))
        if mc_diff > 0.002:
            generate.fail(f"'{name}': Monte Carlo differs by {mc_diff}")
        msg = f"  {name}: |sum-1| = {abs(s - 1.0):.2e}, max |MC-quad| = {mc_diff:.5f}"
        if len(alpha) <= 5 and max(x + y for x, y in zip(alpha, beta)) <= 2000:
            mp = generate.prob_best_mpmath(alpha, beta)
            mp_diff = max(abs(x - y) for x, y in zip(p, mp))
            if mp_diff > 1e-12:
                generate.fail(f"'{name}': mpmath differs by {mp_diff}")
            msg += f", max |mpmath-quad| = {mp_diff:.2e}"
        print(msg)
        cases.append({"name": name, "alpha": alpha, "beta": beta,
                      "prob_best": [float(x) for x in p]})
    closed = 1.0 / (1.0001 + 1.0)
    if abs(cases[0]["prob_best"][1] - closed) > 1e-12:
        generate.fail(f"closed form 1/(a+1) = {closed} vs {cases[0]['prob_best'][1]}")
    write(
        "Probability that each arm is best under independent Beta posteriors "
        "with non-integer parameters in [1, 3) or fractional counts, by the "
        "scipy.integrate.quad method of tests/reference/generate.py "
        "(prob_best_quad); checked so that sum_k P_k = 1 within 1e-9, against "
        "mpmath.quad (30 digits) for cases with at most five arms and "
        "alpha + beta <= 2000 (within 1e-12), against a 2,000,000-draw numpy "
        "Monte Carlo with a fixed seed (within 0.002), and the first case "
        "against the closed form 1/(a+1).",
        cases,
    )
    if generate.FAILURES:
        sys.exit(1)


if __name__ == "__main__":
    main()
