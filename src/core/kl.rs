//! Bernoulli Kullback–Leibler divergence and the KL-UCB upper bound (Garivier & Cappé 2011,
//! "The KL-UCB algorithm for bounded stochastic bandits and beyond", COLT).

/// kl(p, q) = p ln(p/q) + (1−p) ln((1−p)/(1−q)), with 0·ln 0 = 0. Infinite when q is 0 or 1 and
/// p differs from it.
pub fn bernoulli_kl(p: f64, q: f64) -> f64 {
    let term = |a: f64, b: f64| {
        if a <= 0.0 {
            0.0
        } else if b <= 0.0 {
            f64::INFINITY
        } else {
            a * (a / b).ln()
        }
    };
    (term(p, q) + term(1.0 - p, 1.0 - q)).max(0.0)
}

/// The exploration budget of KL-UCB at `t` plays, ln t + c·ln ln t. The ln ln t term is left
/// out while ln t ≤ 1, where it would be negative or undefined.
pub fn kl_ucb_budget(t: f64, c: f64) -> f64 {
    let lt = t.max(1.0).ln();
    if lt > 1.0 {
        lt + c * lt.ln()
    } else {
        lt
    }
}

/// Largest q in [mean, 1] with pulls·kl(mean, q) ≤ budget.
///
/// Newton's method from the right: kl(mean, ·) is convex and increasing on [mean, 1], so
/// iterates started right of the root decrease monotonically onto it. The start is Pinsker's
/// bound mean + √(budget / 2·pulls), which is never left of the root. A step that would leave
/// the bracket known so far is replaced by bisection (near q = 1 Newton can overshoot).
pub fn kl_ucb_index(mean: f64, pulls: f64, budget: f64) -> f64 {
    if pulls <= 0.0 {
        return 1.0;
    }
    let p = mean.clamp(0.0, 1.0);
    let target = budget / pulls;
    if target <= 0.0 || p >= 1.0 {
        return p;
    }
    let upper = p + (target / 2.0).sqrt();
    if upper >= 1.0 && bernoulli_kl(p, 1.0) <= target {
        return 1.0;
    }
    let mut lo = p;
    let mut hi = upper.min(1.0);
    let mut q = if upper < 1.0 { upper } else { 0.5 * (p + 1.0) };
    for _ in 0..200 {
        let f = bernoulli_kl(p, q) - target;
        if f > 0.0 {
            hi = q;
        } else {
            lo = q;
        }
        let slope = (q - p) / (q * (1.0 - q));
        let newton = q - f / slope;
        let next = if slope > 0.0 && newton > lo && newton < hi { newton } else { 0.5 * (lo + hi) };
        if (next - q).abs() <= 1e-15 * q || hi - lo <= 1e-15 * hi {
            return next.clamp(lo, hi);
        }
        q = next;
    }
    lo
}

/// The pulls at which the KL-UCB index falls to `level`: budget / kl(mean, level). Infinite
/// when the index never falls to `level` (below the mean), zero when it is never above it
/// (`level` ≥ 1, or no budget).
pub fn kl_ucb_pulls_at(mean: f64, level: f64, budget: f64) -> f64 {
    if level >= 1.0 {
        return 0.0;
    }
    if level < mean || (level == mean && budget > 0.0) {
        return f64::INFINITY;
    }
    if budget <= 0.0 {
        return 0.0;
    }
    budget / bernoulli_kl(mean, level)
}
