//! Probability that each arm is the best under independent Beta posteriors:
//! P_k = ∫ f_k(x) · Π_{j≠k} F_j(x) dx, the weight Thompson sampling gives arm k (Thompson 1933).
//!
//! The integral is taken numerically, deterministically, on a grid built from each posterior's
//! own scale, so a posterior with ten pulls and one with a hundred thousand are both resolved:
//!
//! 1. Each posterior is placed on [μ − 7σ, μ + 11σ] ∩ [0, 1] (the upper side is longer because
//!    posteriors of rare events are right-skewed); outside it its density is taken as 0. The
//!    maximum of all arms almost surely lies above L, the largest lower end, so arms whose upper
//!    end is below L cannot be best and get 0.
//! 2. The grid runs from the lowest lower end of the remaining arms to the largest upper end,
//!    with points every 0.3σ of each remaining arm, thinned where arms overlap so that the spacing
//!    stays near 0.3σ of the narrowest arm present there. Where a posterior reaches 0 with a
//!    non-integer α (or 1 with a non-integer β), its density behaves like x^(α−1) there: not a
//!    polynomial, and for α in (1, 2) with an infinite slope at 0, so a rule exact for cubics is
//!    far off on the first steps (0.03 with α = 1.0001). Towards that end the grid turns
//!    geometric (points 1.2σ·2^(−i/2), 30 halvings): on each interval [x/√2, x] the density is
//!    smooth at its own scale, so the rules' relative error is that of x^(α−1) on [1/√2, 1], and
//!    the last interval holds a mass below about 1e-9.
//! 3. Every CDF starts at 0 at the grid's first point and is carried along the grid by the
//!    cubic Hermite rule h/2·(f₀+f₁) + h²/12·(f₀′−f₁′), exact for cubics.
//! 4. The outer integral uses Simpson's rule on each grid segment, the CDFs at the segment's
//!    midpoint coming from the same Hermite cubic.
//!
//! The result is normalised to sum to 1. Tests compare it with scipy quadrature (tests/data).

use statrs::function::beta::ln_beta;

/// Lower and upper reach of a posterior, in standard deviations.
const REACH_BELOW: f64 = 7.0;
const REACH_ABOVE: f64 = 11.0;
/// Grid step in standard deviations of the arm that owns the point.
const STEP: f64 = 0.3;
/// Geometric points towards an end that a posterior with a non-integer parameter reaches: from
/// `GRADED_FROM` steps away from the end, `GRADED_PER_HALVING` points per halving of the
/// distance, 30 halvings, which leaves a mass of about 2^−30·α ≤ 1e-9 (α ≥ 1) in the last
/// interval.
const GRADED_FROM: f64 = 4.0;
const GRADED_PER_HALVING: f64 = 2.0;
const GRADED_POINTS: i32 = 60;

struct Posterior {
    a: f64,
    b: f64,
    ln_norm: f64,
    /// 1 / B(a, b), the density's constant.
    norm: f64,
    /// Reach of the posterior; the density is taken as 0 outside it.
    lower: f64,
    upper: f64,
}

impl Posterior {
    /// Density and its derivative at x, given ln x and ln(1 − x) (shared by all arms).
    fn pdf(&self, x: f64, ln_x: f64, ln_1mx: f64) -> (f64, f64) {
        if x < self.lower || x > self.upper {
            return (0.0, 0.0);
        }
        // At the ends only a = 1 (or b = 1) leaves a non-zero density; a = 2 (b = 2) a non-zero
        // slope. Exponents between 1 and 2 have an infinite slope there, taken as 0: the graded
        // grid leaves only about 1e-9 of mass in the interval that uses it.
        let c = self.norm;
        if x <= 0.0 {
            return match (self.a == 1.0, self.a == 2.0) {
                (true, _) => (c, -c * (self.b - 1.0)),
                (_, true) => (0.0, c),
                _ => (0.0, 0.0),
            };
        }
        if x >= 1.0 {
            return match (self.b == 1.0, self.b == 2.0) {
                (true, _) => (c, c * (self.a - 1.0)),
                (_, true) => (0.0, -c),
                _ => (0.0, 0.0),
            };
        }
        let f = ((self.a - 1.0) * ln_x + (self.b - 1.0) * ln_1mx - self.ln_norm).exp();
        let d = f * ((self.a - 1.0) / x - (self.b - 1.0) / (1.0 - x));
        (f, d)
    }
}

/// The Beta posterior of an arm with `pulls` (effective) pulls and `successes` (reward scaled to
/// [0, 1]) under a Beta(`prior`) prior: successes clamped to the pulls, failures the rest.
pub fn posterior(prior: (f64, f64), pulls: f64, successes: f64) -> (f64, f64) {
    let s = crate::core::interval::clamp_sum(pulls, successes, 1.0);
    (prior.0 + s, prior.1 + (pulls - s).max(0.0))
}

fn logs(x: f64) -> (f64, f64) {
    (x.ln(), (-x).ln_1p())
}

/// Probability that each arm is the best, for Beta(`alpha[k]`, `beta[k]`) posteriors with both
/// parameters ≥ 1 (the priors the policies allow). `out` receives one probability per arm.
pub fn prob_best(alpha: &[f64], beta: &[f64], out: &mut [f64]) {
    prob_best_and_max(alpha, beta, out);
}

/// [`prob_best`], and the posterior expectation of the largest arm mean, E[max θⱼ], from the
/// same grid: E[max θⱼ] = ∫₀¹ (1 − Πⱼ Fⱼ(x)) dx = U − ∫ₛᵁ Πⱼ Fⱼ(x) dx, where s is the grid's
/// start (below it some posterior has no mass, so the product is 0) and U its end (above it
/// every CDF is 1). The product is integrated by Simpson's rule on each grid segment with the
/// CDFs the probabilities use.
pub fn prob_best_and_max(alpha: &[f64], beta: &[f64], out: &mut [f64]) -> f64 {
    let k = alpha.len();
    debug_assert!(beta.len() == k && out.len() == k);
    out.iter_mut().for_each(|p| *p = 0.0);
    let mean = |j: usize| alpha[j] / (alpha[j] + beta[j]);
    if k == 0 {
        return 0.0;
    }
    if k == 1 {
        out[0] = 1.0;
        return mean(0);
    }

    let mut reach = Vec::with_capacity(k);
    for (&a, &b) in alpha.iter().zip(beta) {
        let n = a + b;
        let mean = a / n;
        let sd = (a * b / (n * n * (n + 1.0))).sqrt();
        reach.push((mean, sd, (mean - REACH_BELOW * sd).max(0.0), (mean + REACH_ABOVE * sd).min(1.0)));
    }
    let lower = reach.iter().map(|r| r.2).fold(0.0, f64::max);
    let upper = reach.iter().map(|r| r.3).fold(0.0, f64::max);
    let contenders: Vec<usize> = (0..k).filter(|&j| reach[j].3 > lower).collect();
    if contenders.len() == 1 {
        out[contenders[0]] = 1.0;
        return mean(contenders[0]);
    }

    let start = contenders.iter().map(|&j| reach[j].2).fold(1.0, f64::min);
    let mut points: Vec<(f64, f64)> = vec![(start, 0.0), (upper, 0.0)];
    let steps = ((REACH_BELOW + REACH_ABOVE) / STEP) as i32;
    for &j in &contenders {
        let (mean, sd, _, _) = reach[j];
        for i in 0..=steps {
            let x = mean + sd * (-REACH_BELOW + STEP * i as f64);
            if x > start && x < upper {
                points.push((x, STEP * sd));
            }
        }
    }
    for &j in &contenders {
        let (_, sd, low, high) = reach[j];
        for i in 1..=GRADED_POINTS {
            let d = GRADED_FROM * STEP * sd * (-(i as f64) / GRADED_PER_HALVING).exp2();
            let gap = d * (1.0 - (-1.0 / GRADED_PER_HALVING).exp2());
            if low <= 0.0 && alpha[j].fract() != 0.0 {
                points.push((d, gap));
            }
            if high >= 1.0 && beta[j].fract() != 0.0 {
                points.push((1.0 - d, gap));
            }
        }
    }
    points.sort_by(|a, b| a.0.total_cmp(&b.0));
    let mut grid: Vec<f64> = Vec::with_capacity(points.len());
    for (x, step) in points {
        match grid.last() {
            Some(&last) if x - last < 0.8 * step && x < upper => {}
            _ => grid.push(x),
        }
    }
    if grid.last() != Some(&upper) {
        grid.push(upper);
    }

    let posts: Vec<Posterior> = contenders
        .iter()
        .map(|&j| {
            let ln_norm = ln_beta(alpha[j], beta[j]);
            Posterior { a: alpha[j], b: beta[j], ln_norm, norm: (-ln_norm).exp(), lower: reach[j].2, upper: reach[j].3 }
        })
        .collect();
    let c = posts.len();
    let mut cdf = vec![0.0; c];
    let (l0, l1) = logs(start);
    let mut left: Vec<(f64, f64)> = posts.iter().map(|p| p.pdf(start, l0, l1)).collect();
    let mut right = vec![(0.0, 0.0); c];
    let mut mid_pdf = vec![0.0; c];
    let mut mid_cdf = vec![0.0; c];
    let mut next_cdf = vec![0.0; c];
    let mut acc = vec![0.0; c];
    let mut below_max = 0.0;
    // Values of Π_{j≠k} F_j at the segment's left end, midpoint and right end, for each k.
    let mut others = [vec![0.0; c], vec![0.0; c], vec![0.0; c]];

    for w in grid.windows(2) {
        let (x0, x1) = (w[0], w[1]);
        let h = x1 - x0;
        let xm = 0.5 * (x0 + x1);
        let (r0, r1) = logs(x1);
        let (m0, m1) = logs(xm);
        for j in 0..c {
            right[j] = posts[j].pdf(x1, r0, r1);
            mid_pdf[j] = posts[j].pdf(xm, m0, m1).0;
            let ((f0, d0), (f1, d1)) = (left[j], right[j]);
            let half = h * (13.0 / 32.0 * f0 + 3.0 / 32.0 * f1 + h * (11.0 / 192.0 * d0 - 5.0 / 192.0 * d1));
            let whole = h * (0.5 * (f0 + f1) + h / 12.0 * (d0 - d1));
            mid_cdf[j] = (cdf[j] + half.max(0.0)).min(1.0);
            next_cdf[j] = (cdf[j] + whole.max(0.0)).min(1.0);
        }
        products_of_others(&cdf, &mut others[0]);
        products_of_others(&mid_cdf, &mut others[1]);
        products_of_others(&next_cdf, &mut others[2]);
        for j in 0..c {
            let g0 = left[j].0 * others[0][j];
            let gm = mid_pdf[j] * others[1][j];
            let g1 = right[j].0 * others[2][j];
            acc[j] += h / 6.0 * (g0 + 4.0 * gm + g1);
        }
        let all = |v: &[f64]| v.iter().product::<f64>();
        below_max += h / 6.0 * (all(&cdf) + 4.0 * all(&mid_cdf) + all(&next_cdf));
        std::mem::swap(&mut left, &mut right);
        std::mem::swap(&mut cdf, &mut next_cdf);
    }

    let total: f64 = acc.iter().sum();
    for (j, &arm) in contenders.iter().enumerate() {
        out[arm] = if total > 0.0 { acc[j] / total } else { 1.0 / c as f64 };
    }
    // E[max] is at least every arm's own mean; the clamp only guards the quadrature's last
    // digits.
    let best_mean = (0..k).map(mean).fold(0.0, f64::max);
    (upper - below_max).clamp(best_mean, 1.0)
}

/// out[k] = Π_{j≠k} v[j], by prefix and suffix products (no division, so a zero is harmless).
fn products_of_others(v: &[f64], out: &mut [f64]) {
    let mut prefix = 1.0;
    for (o, &x) in out.iter_mut().zip(v) {
        *o = prefix;
        prefix *= x;
    }
    let mut suffix = 1.0;
    for (o, &x) in out.iter_mut().zip(v).rev() {
        *o *= suffix;
        suffix *= x;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn two_identical_posteriors_split_evenly() {
        let mut out = [0.0; 2];
        prob_best(&[1.0, 1.0], &[1.0, 1.0], &mut out);
        assert!((out[0] - 0.5).abs() < 1e-9, "{out:?}");
        prob_best(&[40.0, 40.0], &[900.0, 900.0], &mut out);
        assert!((out[0] - 0.5).abs() < 1e-9, "{out:?}");
    }

    #[test]
    fn the_expected_maximum_of_two_uniforms_is_two_thirds() {
        // X, Y ~ U(0,1): E[max] = ∫ 2x·x dx = 2/3 (closed form); Beta(2,1) and U(0,1):
        // P(max ≤ x) = x³, E[max] = 3/4.
        let mut out = [0.0; 2];
        let m = prob_best_and_max(&[1.0, 1.0], &[1.0, 1.0], &mut out);
        assert!((m - 2.0 / 3.0).abs() < 1e-6, "{m}");
        let m = prob_best_and_max(&[1.0, 2.0], &[1.0, 1.0], &mut out);
        assert!((m - 0.75).abs() < 1e-6, "{m}");
    }

    #[test]
    fn beta_one_one_against_beta_two_one_is_two_thirds() {
        // X ~ U(0,1), Y ~ Beta(2,1): P(Y > X) = ∫ 2y·y dy = 2/3 (closed form).
        let mut out = [0.0; 2];
        prob_best(&[1.0, 2.0], &[1.0, 1.0], &mut out);
        assert!((out[1] - 2.0 / 3.0).abs() < 1e-6, "{out:?}");
    }
}
