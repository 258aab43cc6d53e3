//! Split conformal prediction with a normalised score (Angelopoulos & Bates
//! 2021, "A Gentle Introduction to Conformal Prediction and Distribution-Free
//! Uncertainty Quantification", section 2.3): on `n` calibration points the
//! score is `s_i = |a_i - mean_i| / std_i`, and `q` is the
//! `ceil((n + 1)(1 - alpha))`-th smallest score, i.e. the empirical quantile
//! at level `ceil((n + 1)(1 - alpha)) / n`. Then for an exchangeable new point
//! `P(|a - mean| <= q * std) >= 1 - alpha` (and `<= 1 - alpha + 1/(n + 1)`
//! without ties; their theorem 1 and its upper bound).
//!
//! The label stage stores the interval as a Gaussian-equivalent standard
//! deviation `q * std / z`, `z = Phi^-1(1 - alpha/2)`, so `mean +- z * sd` is
//! the calibrated interval.

use serde::{Deserialize, Serialize};

/// A conformal quantile and how it was obtained.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ConformalQuantile {
    /// The quantile `q` of the normalised scores (infinite when `n` is too small).
    pub q: f64,
    /// Calibration points.
    pub n: usize,
    /// The 1-based rank `ceil((n + 1)(1 - alpha))` of `q` among the sorted scores.
    pub rank: usize,
}

/// The normalised score `|a - mean| / std` (infinite for a zero std and a miss).
pub fn score(actual: f64, mean: f64, std: f64) -> f64 {
    let e = (actual - mean).abs();
    if std > 0.0 {
        e / std
    } else if e == 0.0 {
        0.0
    } else {
        f64::INFINITY
    }
}

/// The 1-based rank `ceil((n + 1)(1 - alpha))`.
pub fn rank(n: usize, alpha: f64) -> usize {
    // The small slack keeps e.g. 10 * 0.9 = 9.000000000000002 at rank 9.
    ((n as f64 + 1.0) * (1.0 - alpha) - 1e-9).ceil().max(1.0) as usize
}

/// Fewest calibration points for which the quantile is finite at `alpha`.
pub fn min_points(alpha: f64) -> usize {
    (1..)
        .find(|&n| rank(n, alpha) <= n)
        .expect("alpha in (0, 1)")
}

/// The split conformal quantile of `scores` at miscoverage `alpha`.
pub fn quantile(scores: &[f64], alpha: f64) -> ConformalQuantile {
    let n = scores.len();
    let rank = rank(n, alpha);
    let q = if rank > n {
        f64::INFINITY
    } else {
        let mut s = scores.to_vec();
        s.sort_by(f64::total_cmp);
        s[rank - 1]
    };
    ConformalQuantile { q, n, rank }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rank_is_the_finite_sample_level() {
        // ceil(11 * 0.9) = 10; ceil(101 * 0.9) = ceil(90.9) = 91.
        assert_eq!(rank(10, 0.1), 10);
        assert_eq!(rank(9, 0.1), 9);
        assert_eq!(rank(100, 0.1), 91);
        assert_eq!(min_points(0.1), 9);
        let q = quantile(&[5.0, 1.0, 4.0, 2.0, 3.0, 6.0, 7.0, 8.0, 9.0, 10.0], 0.1);
        assert_eq!((q.q, q.rank), (10.0, 10));
        assert!(quantile(&[1.0; 5], 0.1).q.is_infinite());
    }
}
