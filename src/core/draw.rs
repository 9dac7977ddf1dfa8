//! Drawing an index from weights: the one place a weighted choice is made (the fixed policy's
//! single pulls, the simulator's batches, the demo's traffic).

/// The index of the weight that `u` (uniform in [0, 1)) falls in when the weights are laid end
/// to end; `None` when `u` lies beyond their sum (weights summing to less than 1, or rounding
/// at the end), so the caller decides what then.
pub fn weighted(weights: impl IntoIterator<Item = f64>, mut u: f64) -> Option<usize> {
    for (i, w) in weights.into_iter().enumerate() {
        if u < w {
            return Some(i);
        }
        u -= w;
    }
    None
}

#[cfg(test)]
mod tests {
    use super::weighted;

    #[test]
    fn each_index_takes_the_stretch_its_weight_covers() {
        let w = [0.2, 0.0, 0.5, 0.3];
        assert_eq!(weighted(w, 0.0), Some(0));
        assert_eq!(weighted(w, 0.199), Some(0));
        assert_eq!(weighted(w, 0.2), Some(2), "a zero weight is never drawn");
        assert_eq!(weighted(w, 0.75), Some(3));
        assert_eq!(weighted([0.5, 0.4], 0.95), None, "beyond the sum");
    }
}
