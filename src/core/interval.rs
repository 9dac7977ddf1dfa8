//! Two-sided 95 % confidence intervals on an arm's mean.

/// Standard normal quantile for a two-sided 95 % interval, Φ⁻¹(0.975).
/// Source: scipy.stats.norm.ppf(0.975) = 1.959963984540054 (the value statsmodels uses).
pub const Z95: f64 = 1.959_963_984_540_054;

/// A closed interval `[low, high]` on a mean, in the arm's reward units.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Interval {
    pub low: f64,
    pub high: f64,
}

impl Interval {
    pub fn width(&self) -> f64 {
        self.high - self.low
    }
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

/// Interval for bounded rewards in `[0, max]`: the normal interval with the sample variance,
/// mean ± z·√(s²/n), clipped to `[0, max]`. It is approximate for small samples; with fewer than
/// two pulls nothing is known about the spread and the interval is the whole range.
pub fn bounded_normal(pulls: f64, sum: f64, sum_sq: f64, max: f64) -> Interval {
    if pulls < 2.0 {
        return Interval { low: 0.0, high: max };
    }
    let mean = sum / pulls;
    let var = ((sum_sq - pulls * mean * mean) / (pulls - 1.0)).max(0.0);
    let half = Z95 * (var / pulls).sqrt();
    Interval {
        low: (mean - half).clamp(0.0, max),
        high: (mean + half).clamp(0.0, max),
    }
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
        assert_eq!(bounded_normal(1.0, 3.0, 9.0, 10.0), Interval { low: 0.0, high: 10.0 });
    }

    #[test]
    fn bounded_interval_matches_the_normal_formula() {
        // Rewards 2, 4, 6, 8: mean 5, sample variance 20/3 (arithmetic).
        let i = bounded_normal(4.0, 20.0, 120.0, 10.0);
        let half = Z95 * (20.0f64 / 3.0 / 4.0).sqrt();
        assert!((i.low - (5.0 - half)).abs() < 1e-12);
        assert!((i.high - (5.0 + half)).abs() < 1e-12);
    }
}
