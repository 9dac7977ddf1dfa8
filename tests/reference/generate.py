#!/usr/bin/env python3
"""Generate reference check values for the apportion Rust tests.

Why this exists: the Rust code re-implements a few numerical building blocks
(Wilson score intervals, the probability that each arm is best under
independent Beta posteriors, the Bernoulli KL divergence and the KL-UCB index).
To test them we need values computed independently, by established Python
libraries, and a record of exactly how they were obtained.  This script is that
record; run it from the repository root:

    python3 tests/reference/generate.py

It writes tests/data/wilson.json, tests/data/prob_best.json and
tests/data/kl_ucb.json.  Every file is a JSON object with "source",
"versions", "generated_by" and "cases".  For kl_ucb.json "cases" is an object
{"kl": [...], "index": [...]} rather than a list.

Methods:
  * Wilson (1927) score interval, via statsmodels' proportion_confint, cross
    checked against the closed form evaluated with mpmath at 50 digits.
  * Probability that each arm is best (the quantity behind Thompson 1933
    sampling): P_k = integral_0^1 f_k(x) prod_{j != k} F_j(x) dx, by adaptive
    scipy quadrature over many sub-intervals, checked by: sum of P_k == 1,
    mpmath tanh-sinh quadrature for the small cases, and a seeded Monte Carlo.
  * Bernoulli KL divergence and the KL-UCB index of Garivier & Cappe (2011),
    with mpmath at 50 significant digits.

The output is deterministic (the Monte Carlo uses a fixed seed and only serves
as a check; its numbers are not written).  The script exits non-zero if any
check fails.
"""

import json
import math
import os
import platform
import sys
import time

import mpmath
import numpy as np
import scipy
import statsmodels
from scipy import integrate, special, stats
from statsmodels.stats.proportion import proportion_confint

HERE = os.path.dirname(os.path.abspath(__file__))
OUT_DIR = os.path.normpath(os.path.join(HERE, "..", "data"))

VERSIONS = {
    "python": platform.python_version(),
    "numpy": np.__version__,
    "scipy": scipy.__version__,
    "statsmodels": statsmodels.__version__,
    "mpmath": mpmath.__version__,
}

FAILURES = []


def fail(msg):
    print("WARNING: " + msg, file=sys.stderr)
    FAILURES.append(msg)


def write_json(name, source, cases):
    doc = {
        "source": source,
        "versions": VERSIONS,
        "generated_by": "tests/reference/generate.py",
        "cases": cases,
    }
    path = os.path.join(OUT_DIR, name)
    with open(path, "w") as fh:
        # json writes floats with repr(), i.e. the shortest string that
        # round-trips to the same double.
        json.dump(doc, fh, indent=1)
        fh.write("\n")
    print("wrote", os.path.relpath(path))


# ---------------------------------------------------------------------------
# Wilson score interval (Wilson 1927)
# ---------------------------------------------------------------------------

WILSON_CASES = [
    # edge cases
    (0, 1), (1, 1), (0, 10), (10, 10), (0, 1000), (1000, 1000),
    (1, 2), (5, 10), (3, 7), (17, 1000), (412, 12034),
    (1, 100000), (99999, 100000), (50, 100), (2, 3),
    # a spread of small and large n, rates 0.001 .. 0.999
    (1, 3), (2, 5), (1, 20), (7, 20), (19, 20), (3, 50), (49, 50),
    (12, 25), (1, 1000), (999, 1000), (9, 1000), (5, 5000), (250, 5000),
    (4990, 5000), (37, 240), (123, 456), (10, 10000), (321, 9876),
    (100, 100000), (50000, 100000), (12345, 1000000), (1234567, 10000000),
    (0, 5), (4, 4),
]


def wilson_exact(s, n, alpha=0.05):
    """Closed-form Wilson interval at 50 digits, used only as a cross-check."""
    with mpmath.workdps(50):
        z = mpmath.sqrt(2) * mpmath.erfinv(1 - mpmath.mpf(alpha))
        p = mpmath.mpf(s) / n
        z2 = z * z
        denom = 1 + z2 / n
        centre = (p + z2 / (2 * n)) / denom
        half = z * mpmath.sqrt(p * (1 - p) / n + z2 / (4 * n * n)) / denom
        return float(max(centre - half, 0)), float(min(centre + half, 1))


def gen_wilson():
    cases = []
    for s, n in WILSON_CASES:
        low, high = proportion_confint(s, n, alpha=0.05, method="wilson")
        low, high = float(low), float(high)
        ex_low, ex_high = wilson_exact(s, n)
        if abs(low - ex_low) > 1e-12 or abs(high - ex_high) > 1e-12:
            fail(f"wilson {s}/{n}: statsmodels ({low}, {high}) vs "
                 f"mpmath ({ex_low}, {ex_high})")
        cases.append({"successes": s, "trials": n, "low": low, "high": high})
    write_json(
        "wilson.json",
        "Two-sided 95% Wilson (1927) score intervals from "
        "statsmodels.stats.proportion.proportion_confint(count, nobs, "
        "alpha=0.05, method='wilson'); cross-checked against the closed form "
        "evaluated with mpmath at 50 digits (agreement within 1e-12).",
        cases,
    )


# ---------------------------------------------------------------------------
# Probability that each arm is best under independent Beta posteriors
# ---------------------------------------------------------------------------

def from_counts(successes, pulls):
    """Beta posterior from a uniform Beta(1, 1) prior."""
    return 1.0 + successes, 1.0 + pulls - successes


def ctr_arms(rates, pulls):
    return [from_counts(round(r * n), n) for r, n in zip(rates, pulls)]


def prob_best_cases():
    """List of (name, [(alpha, beta), ...])."""
    cases = []
    cases.append(("two uniform arms", [(1.0, 1.0), (1.0, 1.0)]))
    cases.append(("two identical informative arms",
                  [(101.0, 901.0), (101.0, 901.0)]))
    cases.append(("two clearly separated arms",
                  [from_counts(50, 1000), from_counts(150, 1000)]))
    cases.append(("Beta(11,91) vs Beta(13,89)", [(11.0, 91.0), (13.0, 89.0)]))
    cases.append(("three overlapping arms",
                  [(21.0, 181.0), (25.0, 177.0), (18.0, 184.0)]))
    cases.append(("four identical arms", [(5.0, 5.0)] * 4))
    rates10 = [0.021, 0.024, 0.026, 0.028, 0.030, 0.031, 0.032, 0.033,
               0.0335, 0.034]
    pulls10 = [2000, 12000, 4500, 9000, 3000, 11000, 6000, 8000, 2500, 7000]
    cases.append(("ten arms, click-through-like rates",
                  ctr_arms(rates10, pulls10)))
    cases.append(("one never-pulled arm next to long arms",
                  [(1.0, 1.0), from_counts(120, 5000), from_counts(150, 6000)]))
    cases.append(("10 pulls vs 100000 pulls, similar means",
                  [from_counts(1, 10), from_counts(10000, 100000)]))
    cases.append(("zero successes on a long arm",
                  [(1.0, 1001.0), from_counts(2, 1000), from_counts(0, 10)]))
    cases.append(("fractional parameters",
                  [(3.7, 12.25), (4.1, 11.9)]))
    cases.append(("Jeffreys-like parameters below one",
                  [(0.5, 0.5), (1.5, 2.5), (0.5, 4.5)]))
    cases.append(("rates near one",
                  [from_counts(980, 1000), from_counts(990, 1000),
                   from_counts(49, 50)]))
    cases.append(("one dominant arm and three tied arms",
                  [from_counts(300, 1000)] + [from_counts(250, 1000)] * 3))
    rates50 = [0.05 + 0.0002 * i for i in range(50)]
    pulls50 = [4000 + (i * 7919) % 16001 for i in range(50)]
    cases.append(("fifty arms with close rates", ctr_arms(rates50, pulls50)))
    return cases


TAIL_LEVELS = [1e-15, 1e-12, 1e-9, 1e-6, 1e-4, 1e-3, 1e-2, 0.05, 0.1, 0.25,
               0.5]


def breakpoints(alpha, beta):
    """Quantiles of every arm at many levels, so that quad sees the mass."""
    pts = set()
    for a, b in zip(alpha, beta):
        for lvl in TAIL_LEVELS:
            pts.add(float(stats.beta.ppf(lvl, a, b)))
            pts.add(float(stats.beta.isf(lvl, a, b)))
    pts = sorted(p for p in pts if 0.0 < p < 1.0)
    return [0.0] + pts + [1.0]


def check_cdf_helpers(alpha, beta, xs):
    """special.betainc / betaincc (called directly for speed) must be exactly
    what scipy.stats.beta.cdf / sf evaluate."""
    for a, b in zip(alpha, beta):
        for x in xs[1:-1:max(1, len(xs) // 25)]:
            if special.betainc(a, b, x) != stats.beta.cdf(x, a, b):
                fail(f"betainc differs from beta.cdf at x={x}, Beta({a},{b})")
            if special.betaincc(a, b, x) != stats.beta.sf(x, a, b):
                fail(f"betaincc differs from beta.sf at x={x}, Beta({a},{b})")


def half_integral(a_k, b_k, a_o, b_o, other_cdf, pts):
    """int_0^{1/2} beta.pdf(y; a_k, b_k) * prod_j other_cdf(a_o, b_o, y) dy,
    summed over the sub-intervals given by pts (0 = pts[0] < ... = 1/2).

    If a_k < 1 the density is unbounded at 0; on the first segment the factor
    y^(a_k - 1) is then handed to quad as an algebraic weight (QUADPACK QAWS)
    and only the bounded remainder is evaluated.
    """
    pdf_k = stats.beta(a_k, b_k).pdf
    # The density comes from scipy.stats.beta.pdf (Boost).  Building it from
    # exp(-special.betaln(a, b)) loses ~1e-11 relative accuracy once the
    # parameters are in the thousands; only the a_k < 1 end segment, where
    # the parameters are small, uses an explicit formula.
    log_norm = float(mpmath.log(mpmath.beta(a_k, b_k)))

    def integrand(y):
        prod = np.prod(other_cdf(a_o, b_o, y))
        return 0.0 if prod == 0.0 else float(pdf_k(y)) * prod

    def weighted_rest(y):  # pdf without the y^(a_k - 1) factor
        prod = np.prod(other_cdf(a_o, b_o, y))
        if prod == 0.0:
            return 0.0
        return math.exp(special.xlog1py(b_k - 1, -y) - log_norm) * prod

    total = 0.0
    for lo, hi in zip(pts[:-1], pts[1:]):
        if lo == 0.0 and a_k < 1:
            val, err = integrate.quad(weighted_rest, lo, hi, weight="alg",
                                      wvar=(a_k - 1, 0.0), epsabs=1e-17,
                                      epsrel=1e-13, limit=500)
        else:
            val, err = integrate.quad(integrand, lo, hi, epsabs=1e-17,
                                      epsrel=1e-13, limit=500)
        if err > 1e-12:
            fail(f"quad error estimate {err} on [{lo}, {hi}]")
        total += val
    return total


def prob_best_quad(alpha, beta):
    """P_k for every arm by scipy.integrate.quad.

    [0, 1] is split at 1/2.  The upper half is integrated in y = 1 - x, where
    arm j has the reflected Beta(b_j, a_j) density and F_j(1 - y) is
    betaincc(b_j, a_j, y); this keeps full relative precision in 1 - x for
    mass close to 1 (doubles near 1 are spaced 1.1e-16 apart, which costs
    ~1e-11 for densities that blow up at 1).  Each half is split at the
    quantiles of every arm.
    """
    a = np.asarray(alpha, dtype=float)
    b = np.asarray(beta, dtype=float)
    k_arms = len(a)
    lower = [x for x in breakpoints(alpha, beta) if x < 0.5] + [0.5]
    upper = [y for y in breakpoints(beta, alpha) if y < 0.5] + [0.5]
    check_cdf_helpers(alpha, beta, lower)
    check_cdf_helpers(beta, alpha, upper)
    out = []
    for k in range(k_arms):
        others = np.arange(k_arms) != k
        lo_half = half_integral(a[k], b[k], a[others], b[others],
                                special.betainc, lower)
        hi_half = half_integral(b[k], a[k], b[others], a[others],
                                special.betaincc, upper)
        out.append(lo_half + hi_half)
    return out


def mp_beta_cdf(a, b, x):
    """Regularised incomplete beta I_x(a, b) in mpmath.

    Above the mean it uses the reflection I_x(a,b) = 1 - I_{1-x}(b,a).
    mpmath.betainc is tried first; its series alternates and can fail to
    converge when b is in the thousands, in which case the slower
    all-positive series
        I_x(a,b) = x^a (1-x)^b / (a B(a,b)) * 2F1(a+b, 1; a+1; x)
    is used instead.
    """
    if x > a / (a + b):
        return 1 - mp_beta_cdf(b, a, 1 - x)
    try:
        return mpmath.betainc(a, b, 0, x, regularized=True)
    except ValueError:
        pass
    log_pre = (a * mpmath.log(x) + b * mpmath.log1p(-x) - mpmath.log(a)
               - mpmath.log(mpmath.beta(a, b)))
    return mpmath.exp(log_pre) * mpmath.hyp2f1(a + b, 1, a + 1, x)


def prob_best_mpmath(alpha, beta, dps=30):
    """Independent check with mpmath tanh-sinh quadrature (small cases only)."""
    xs = breakpoints(alpha, beta)
    out = []
    with mpmath.workdps(dps):
        a = [mpmath.mpf(v) for v in alpha]
        b = [mpmath.mpf(v) for v in beta]
        for k in range(len(a)):
            def integrand(x, k=k):
                # Tanh-sinh nodes can round onto an endpoint, where a density
                # with a parameter below one is infinite; such nodes carry
                # negligible weight.
                if x <= 0 or x >= 1:
                    return mpmath.mpf(0)
                dens = (x ** (a[k] - 1) * (1 - x) ** (b[k] - 1)
                        / mpmath.beta(a[k], b[k]))
                prod = mpmath.mpf(1)
                for j in range(len(a)):
                    if j != k:
                        prod *= mp_beta_cdf(a[j], b[j], x)
                return dens * prod
            out.append(float(mpmath.quad(integrand, xs)))
    return out


def prob_best_monte_carlo(alpha, beta, draws=2_000_000, seed=20240611,
                          chunk=100_000):
    rng = np.random.default_rng(seed)
    a = np.asarray(alpha, dtype=float)
    b = np.asarray(beta, dtype=float)
    counts = np.zeros(len(a), dtype=np.int64)
    done = 0
    while done < draws:
        m = min(chunk, draws - done)
        sample = rng.beta(a, b, size=(m, len(a)))
        counts += np.bincount(np.argmax(sample, axis=1), minlength=len(a))
        done += m
    return counts / draws


def gen_prob_best():
    cases = []
    for name, arms in prob_best_cases():
        alpha = [float(x[0]) for x in arms]
        beta = [float(x[1]) for x in arms]
        started = time.time()
        p = prob_best_quad(alpha, beta)
        s = math.fsum(p)
        if abs(s - 1.0) > 1e-9:
            fail(f"prob_best '{name}': sum = {s!r}")
        mc = prob_best_monte_carlo(alpha, beta)
        mc_diff = float(np.max(np.abs(mc - np.asarray(p))))
        if mc_diff > 0.002:
            fail(f"prob_best '{name}': Monte Carlo differs by {mc_diff}")
        msg = (f"  {name}: {len(alpha)} arms, |sum-1| = {abs(s - 1.0):.2e}, "
               f"max |MC-quad| = {mc_diff:.5f}")
        # The mpmath check is slow for large parameters; those cases rely on
        # the sum and Monte Carlo checks.
        if len(alpha) <= 4 and max(x + y for x, y in zip(alpha, beta)) <= 2000:
            mp = prob_best_mpmath(alpha, beta)
            mp_diff = max(abs(x - y) for x, y in zip(p, mp))
            if mp_diff > 1e-12:
                fail(f"prob_best '{name}': mpmath differs by {mp_diff}")
            msg += f", max |mpmath-quad| = {mp_diff:.2e}"
        print(msg + f" ({time.time() - started:.0f} s)")
        cases.append({"name": name, "alpha": alpha, "beta": beta,
                      "prob_best": [float(x) for x in p]})
    write_json(
        "prob_best.json",
        "Probability that each arm has the largest mean under independent "
        "Beta posteriors (as used by Thompson 1933 sampling), "
        "P_k = int_0^1 f_k(x) prod_{j!=k} F_j(x) dx with f, F the "
        "scipy.stats.beta pdf and cdf (cdf called as scipy.special.betainc / "
        "betaincc), integrated with scipy.integrate.quad over sub-intervals "
        "split at each arm's quantiles (the half above 1/2 in the variable "
        "1 - x); checked so that sum_k P_k = 1 within 1e-9, against "
        "mpmath.quad (30 digits) for cases with at most four arms and "
        "alpha + beta <= 2000 (within 1e-12), and against a 2,000,000-draw "
        "numpy Monte Carlo with a fixed seed (within 0.002).",
        cases,
    )


# ---------------------------------------------------------------------------
# Bernoulli KL divergence and KL-UCB index (Garivier & Cappe 2011)
# ---------------------------------------------------------------------------

DPS = 50


def kl_mp(p, q):
    """Bernoulli KL divergence with the convention 0 * ln 0 = 0 (mpmath)."""
    p = mpmath.mpf(p)
    q = mpmath.mpf(q)
    total = mpmath.mpf(0)
    if p > 0:
        total += p * mpmath.log(p / q)
    if p < 1:
        total += (1 - p) * mpmath.log((1 - p) / (1 - q))
    return total


KL_CASES = [
    # p = 0 and p = 1
    (0.0, 0.5), (0.0, 0.1), (0.0, 0.999), (0.0, 1e-9), (0.0, 1 - 1e-9),
    (1.0, 0.5), (1.0, 0.9), (1.0, 0.001), (1.0, 1e-9), (1.0, 1 - 1e-9),
    # p = q
    (0.5, 0.5), (0.3, 0.3), (0.001, 0.001), (0.999, 0.999), (1e-9, 1e-9),
    # q near 0 and near 1
    (0.5, 1e-9), (0.5, 1 - 1e-9), (0.01, 1e-9), (0.99, 1 - 1e-9),
    (0.1, 1e-6), (0.9, 1 - 1e-6), (1e-6, 1e-9), (1 - 1e-6, 1 - 1e-9),
    # ordinary values, both sides of p
    (0.5, 0.6), (0.5, 0.4), (0.1, 0.2), (0.2, 0.1), (0.03, 0.035),
    (0.03, 0.025), (0.001, 0.01), (0.9, 0.95), (0.25, 0.75), (0.75, 0.25),
    (0.0305, 0.0306), (0.4, 0.400001),
]


def kl_ucb_index_mp(mean, pulls, t, c):
    """Largest q in [mean, 1] with pulls * kl(mean, q) <= ln t + c ln ln t.

    kl(mean, .) is increasing on [mean, 1] and tends to infinity at 1, so the
    answer is found by bisection; at 50 digits we bisect until the bracket is
    narrower than 1e-40 and return the feasible (lower) end.
    """
    with mpmath.workdps(DPS):
        m = mpmath.mpf(mean)
        t = mpmath.mpf(t)
        bound = mpmath.log(t)
        if c:
            bound += c * mpmath.log(mpmath.log(t))
        bound /= pulls
        if m >= 1:
            return mpmath.mpf(1)
        if bound <= 0:
            return m
        lo, hi = m, mpmath.mpf(1)
        while hi - lo > mpmath.mpf("1e-40"):
            mid = (lo + hi) / 2
            if kl_mp(m, mid) <= bound:
                lo = mid
            else:
                hi = mid
        return lo


INDEX_MEANS = [0.0, 0.001, 0.01, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.99, 1.0]
INDEX_PULLS = [1, 2, 10, 100, 1000, 1_000_000]
INDEX_T = [2, 10, 100, 1000, 100_000, 1_000_000, 10_000_000]


def gen_kl_ucb():
    kl_cases = []
    with mpmath.workdps(DPS):
        for p, q in KL_CASES:
            kl_cases.append({"p": p, "q": q, "kl": float(kl_mp(p, q))})

    index_cases = []
    for t in INDEX_T:
        for c in (0, 3):
            if c and math.log(math.log(t)) <= 0:
                continue  # c * ln ln t only used where it is positive
            for n in INDEX_PULLS:
                if n > t:
                    continue  # an arm cannot be pulled more often than t
                for m in INDEX_MEANS:
                    q = kl_ucb_index_mp(m, n, t, c)
                    index_cases.append({"mean": m, "pulls": n, "t": t,
                                        "c": c, "index": float(q)})
    # Sanity checks: mean 0 has the closed form 1 - exp(-bound / n); mean 1
    # gives index 1; the index never falls below the mean.
    for case in index_cases:
        m, n, t, c, q = (case[k] for k in ("mean", "pulls", "t", "c", "index"))
        if q < m or q > 1:
            fail(f"kl-ucb index out of range: {case}")
        if m == 0.0:
            bound = math.log(t) + (c * math.log(math.log(t)) if c else 0.0)
            closed = -math.expm1(-bound / n)
            if not math.isclose(q, closed, rel_tol=1e-13):
                fail(f"kl-ucb mean 0 closed form {closed} vs {q}")
        if m == 1.0 and q != 1.0:
            fail(f"kl-ucb mean 1 gives {q}")

    write_json(
        "kl_ucb.json",
        "Bernoulli KL divergence kl(p,q) = p ln(p/q) + (1-p) ln((1-p)/(1-q)) "
        "with 0 ln 0 = 0, and the KL-UCB index of Garivier & Cappe (2011), "
        "max{q in [mean,1] : pulls*kl(mean,q) <= ln t + c ln ln t}, both "
        "computed with mpmath at 50 significant digits (index by bisection to "
        "a bracket below 1e-40) and rounded to double. 'cases' is an object "
        "{'kl': [...], 'index': [...]}.",
        {"kl": kl_cases, "index": index_cases},
    )


def main():
    os.makedirs(OUT_DIR, exist_ok=True)
    print("versions:", VERSIONS)
    gen_wilson()
    gen_kl_ucb()
    gen_prob_best()
    if FAILURES:
        print(f"{len(FAILURES)} check(s) failed", file=sys.stderr)
        sys.exit(1)
    print("all checks passed")


if __name__ == "__main__":
    main()
