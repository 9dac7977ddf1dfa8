//! Two-sided 95 % confidence intervals on an arm's mean.

/// Standard normal quantile for a two-sided 95 % interval, Φ⁻¹(0.975).
/// Source: scipy.stats.norm.ppf(0.975) = 1.959963984540054 (the value statsmodels uses).
pub const Z95: f64 = 1.959_963_984_540_054;

/// Confidence level of the reported intervals (two-sided).
pub const LEVEL: f64 = 0.95;

/// A closed interval `[low, high]` on a mean, in the arm's reward units.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Interval {
    pub low: f64,
    pub high: f64,
}

/// Wilson score interval for `successes` out of `trials` (Wilson 1927, "Probable inference, the
/// law of succession, and statistical inference", JASA 22). It stays inside [0, 1], behaves at
/// 0/n and n/n (where the normal interval collapses to a point), and takes fractional counts,
/// which discounted statistics produce. With no trials the interval is all of [0, 1].
pub fn wilson(successes: f64, trials: f64) -> Interval {
    if trials <= 0.0 {
        return Interval { low: 0.0, high: 1.0 };
    }
    let s = successes.clamp(0.0, trials);
    let p = s / trials;
    let z2 = Z95 * Z95;
    let denom = 1.0 + z2 / trials;
    let centre = (p + z2 / (2.0 * trials)) / denom;
    let half = Z95 / denom * (p * (1.0 - p) / trials + z2 / (4.0 * trials * trials)).sqrt();
    // At 0/n and n/n one end is exactly the boundary; rounding must not move it.
    let low = if s == 0.0 { 0.0 } else { (centre - half).max(0.0) };
    let high = if s == trials { 1.0 } else { (centre + half).min(1.0) };
    Interval { low, high }
}

/// Interval for bounded rewards in `[0, max]`: the empirical Bernstein bound of Maurer & Pontil
/// (2009, "Empirical Bernstein bounds and sample variance penalization", COLT, Theorem 4), made
/// two-sided by a union bound at δ/2 on each side (the theorem applied to Z and to 1 − Z):
/// on the [0, 1] scale, mean ± (√(2·V·ln(4/δ)/n) + 7·ln(4/δ)/(3(n − 1))), δ = 0.05, V the sample
/// variance. Unlike the normal interval it holds at every n ≥ 2, also when most rewards are 0 and
/// a few are large, and equal rewards do not shrink it to a point; the price is width at small n
/// (the whole range below about n = 12). Fractional (discounted) counts are used as they are.
/// With fewer than two pulls the interval is the whole range. `sum` is expected in
/// `[0, pulls·max]` ([`clamp_sum`]), so that the mean lies inside its interval.
pub fn empirical_bernstein(pulls: f64, sum: f64, sum_sq: f64, max: f64) -> Interval {
    if pulls < 2.0 {
        return Interval { low: 0.0, high: max };
    }
    let mean = (sum / (pulls * max)).clamp(0.0, 1.0);
    // Sample variance on [0, 1], within what values in [0, 1] with this mean can have.
    let var = ((sum_sq / (max * max) - pulls * mean * mean) / (pulls - 1.0))
        .clamp(0.0, mean * (1.0 - mean) * pulls / (pulls - 1.0));
    let log_term = (4.0 / (1.0 - LEVEL)).ln();
    let half = (2.0 * var * log_term / pulls).sqrt() + 7.0 * log_term / (3.0 * (pulls - 1.0));
    Interval { low: (mean - half).max(0.0) * max, high: (mean + half).min(1.0) * max }
}

/// The reward sum an estimate may use: at most `max` per pull. Rewards that arrive before their
/// impressions (or for impressions never seen) would otherwise put the mean above the range.
pub fn clamp_sum(pulls: f64, sum: f64, max: f64) -> f64 {
    sum.clamp(0.0, pulls.max(0.0) * max)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wilson_is_the_whole_unit_interval_without_trials() {
        assert_eq!(wilson(0.0, 0.0), Interval { low: 0.0, high: 1.0 });
    }

    #[test]
    fn bounded_interval_is_the_whole_range_below_two_pulls() {
        assert_eq!(empirical_bernstein(1.0, 3.0, 9.0, 10.0), Interval { low: 0.0, high: 10.0 });
    }

    #[test]
    fn bounded_interval_matches_the_empirical_bernstein_formula() {
        // 400 rewards 2, 4, 6, 8 (100 each) of at most 10: mean 0.5 on [0, 1], sample variance
        // (0.05·400)/399 (arithmetic); half width from Maurer & Pontil (2009), Theorem 4, at δ/2.
        let i = empirical_bernstein(400.0, 2000.0, 12_000.0, 10.0);
        let var = 0.05 * 400.0 / 399.0;
        let l = 80.0f64.ln();
        let half = (2.0 * var * l / 400.0).sqrt() + 7.0 * l / (3.0 * 399.0);
        assert!((i.low - 10.0 * (0.5 - half)).abs() < 1e-12, "{i:?}");
        assert!((i.high - 10.0 * (0.5 + half)).abs() < 1e-12, "{i:?}");
    }
}
