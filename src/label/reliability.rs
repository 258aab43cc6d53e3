//! Calibration of `confidence` and its reliability figures.
//!
//! The raw confidence of a transition is the probability, under the
//! conformally calibrated per-dimension Gaussians, that every dimension's
//! error is within tolerance (product over dimensions). It is then
//! recalibrated against the 0/1 outcome "every dimension within tolerance"
//! on the calibration clips by histogram binning (equal-mass bins of at least
//! [`MIN_BIN`] transitions, tied scores kept together; Zadrozny & Elkan 2001,
//! "Obtaining calibrated probability estimates from decision trees and naive
//! Bayesian classifiers") made monotone by pool-adjacent-violators isotonic
//! regression over the bins (Zadrozny & Elkan 2002). The minimum bin size
//! keeps isotonic regression's usual overfit at the extremes (a top block of
//! one success mapping to 1.0) away. The map is evaluated with linear
//! interpolation between the blocks' mean scores, clipped at both ends.
//!
//! Reliability: expected calibration error over equal-width bins of [0, 1]
//! (Naeini, Cooper & Hauskrecht 2015; Guo et al. 2017),
//! `ECE = sum_b (n_b / N) |accuracy_b - mean confidence_b|`.

use serde::{Deserialize, Serialize};

/// The name recorded for the confidence calibration method.
pub const METHOD: &str = "histogram binning (equal-mass bins of >= 50 calib transitions) made monotone by isotonic regression (pool-adjacent-violators), fitted to the all-dimensions-within-tolerance outcome on calib clips";

/// Fewest calibration transitions in one initial bin of the confidence map.
pub const MIN_BIN: usize = 50;
/// Most initial bins of the confidence map.
pub const MAX_BINS: usize = 50;

/// A monotone map from raw to calibrated confidence.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct Isotonic {
    /// Block mean scores, increasing.
    pub x: Vec<f64>,
    /// Block outcome rates, non-decreasing.
    pub y: Vec<f64>,
}

impl Isotonic {
    /// Fits the map on `(score, outcome)` pairs.
    pub fn fit(scores: &[f64], outcomes: &[bool]) -> Self {
        let mut pairs: Vec<(f64, f64)> = scores
            .iter()
            .zip(outcomes)
            .map(|(s, o)| (*s, if *o { 1.0 } else { 0.0 }))
            .collect();
        pairs.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.total_cmp(&b.1)));
        // Initial equal-mass bins: (sum x, sum y, count), ties never split.
        let per_bin = MIN_BIN.max(pairs.len().div_ceil(MAX_BINS));
        let mut bins: Vec<(f64, f64, f64)> = Vec::new();
        let mut i = 0;
        while i < pairs.len() {
            let mut j = (i + per_bin).min(pairs.len());
            while j < pairs.len() && pairs[j].0 == pairs[j - 1].0 {
                j += 1;
            }
            // A short tail joins the previous bin.
            if pairs.len() - j < per_bin / 2 {
                j = pairs.len();
            }
            let b = pairs[i..j]
                .iter()
                .fold((0.0, 0.0, 0.0), |a, p| (a.0 + p.0, a.1 + p.1, a.2 + 1.0));
            bins.push(b);
            i = j;
        }
        // Pool adjacent violators over the bins.
        let mut blocks: Vec<(f64, f64, f64)> = Vec::new();
        for b in bins {
            blocks.push(b);
            while blocks.len() >= 2 {
                let b = blocks[blocks.len() - 1];
                let a = blocks[blocks.len() - 2];
                if a.1 / a.2 <= b.1 / b.2 {
                    break;
                }
                blocks.pop();
                let last = blocks.last_mut().expect("two blocks");
                *last = (a.0 + b.0, a.1 + b.1, a.2 + b.2);
            }
        }
        Self {
            x: blocks.iter().map(|b| b.0 / b.2).collect(),
            y: blocks.iter().map(|b| b.1 / b.2).collect(),
        }
    }

    /// The calibrated value of raw score `s` (the raw score when unfitted).
    pub fn apply(&self, s: f64) -> f64 {
        let n = self.x.len();
        if n == 0 {
            return s.clamp(0.0, 1.0);
        }
        if s <= self.x[0] {
            return self.y[0];
        }
        if s >= self.x[n - 1] {
            return self.y[n - 1];
        }
        let i = self.x.partition_point(|&x| x <= s);
        let (x0, x1, y0, y1) = (self.x[i - 1], self.x[i], self.y[i - 1], self.y[i]);
        y0 + (y1 - y0) * (s - x0) / (x1 - x0)
    }
}

/// One reliability bin.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ReliabilityBin {
    /// Lower edge.
    pub lo: f64,
    /// Upper edge.
    pub hi: f64,
    /// Transitions in the bin.
    pub count: u64,
    /// Mean confidence in the bin (0 when empty).
    pub mean_confidence: f64,
    /// Fraction with every dimension within tolerance (0 when empty).
    pub accuracy: f64,
}

/// Reliability of confidences against outcomes.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
pub struct Reliability {
    /// Transitions evaluated.
    pub n: u64,
    /// Expected calibration error.
    pub ece: f64,
    /// Mean confidence.
    pub mean_confidence: f64,
    /// Fraction with every dimension within tolerance.
    pub accuracy: f64,
    /// Equal-width bins over [0, 1].
    pub bins: Vec<ReliabilityBin>,
}

/// Reliability over `bins` equal-width bins (a confidence of 1 falls in the last).
pub fn reliability(confidence: &[f64], outcomes: &[bool], bins: usize) -> Reliability {
    let mut count = vec![0u64; bins];
    let mut conf = vec![0.0; bins];
    let mut hits = vec![0.0; bins];
    for (c, o) in confidence.iter().zip(outcomes) {
        let b = ((c * bins as f64).floor() as usize).min(bins - 1);
        count[b] += 1;
        conf[b] += c;
        hits[b] += if *o { 1.0 } else { 0.0 };
    }
    let n: u64 = count.iter().sum();
    let mut ece = 0.0;
    let bins_out = (0..bins)
        .map(|b| {
            let (mc, acc) = if count[b] > 0 {
                (conf[b] / count[b] as f64, hits[b] / count[b] as f64)
            } else {
                (0.0, 0.0)
            };
            if n > 0 {
                ece += count[b] as f64 / n as f64 * (acc - mc).abs();
            }
            ReliabilityBin {
                lo: b as f64 / bins as f64,
                hi: (b + 1) as f64 / bins as f64,
                count: count[b],
                mean_confidence: mc,
                accuracy: acc,
            }
        })
        .collect();
    let nf = (n as f64).max(1.0);
    Reliability {
        n,
        ece,
        mean_confidence: conf.iter().sum::<f64>() / nf,
        accuracy: hits.iter().sum::<f64>() / nf,
        bins: bins_out,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bins_then_pools_violators() {
        // 200 scores in 4 bins of 50: hit rates 0.2, 0.6, 0.4, 0.8 -> the
        // middle two pool to 0.5.
        let scores: Vec<f64> = (0..200).map(|i| i as f64 / 200.0).collect();
        let rates = [10, 30, 20, 40];
        let hits: Vec<bool> = (0..200).map(|i| (i % 50) < rates[i / 50]).collect();
        let iso = Isotonic::fit(&scores, &hits);
        assert_eq!(iso.y.len(), 3, "{iso:?}");
        assert!(
            (iso.y[0] - 0.2).abs() < 1e-12
                && (iso.y[1] - 0.5).abs() < 1e-12
                && (iso.y[2] - 0.8).abs() < 1e-12
        );
        assert_eq!(iso.apply(0.0), 0.2);
        assert_eq!(iso.apply(1.0), 0.8);
        let mid = iso.apply(0.5);
        assert!((0.2..=0.8).contains(&mid));
        // A lone success at the top cannot map to 1.
        let mut s2 = vec![0.5; 99];
        s2.push(0.9);
        let mut h2 = vec![false; 99];
        h2.push(true);
        assert!(Isotonic::fit(&s2, &h2).apply(0.95) < 0.05);
    }

    #[test]
    fn ece_of_a_worked_example() {
        // Two bins used: [0.2, 0.3) holds 0.25 x2 with 1 hit -> |0.5 - 0.25| = 0.25;
        // [0.9, 1] holds 0.95 x2 with 2 hits -> |1 - 0.95| = 0.05. ECE = 0.5*0.25 + 0.5*0.05.
        let r = reliability(
            &[0.25, 0.25, 0.95, 1.0 - 0.05],
            &[true, false, true, true],
            10,
        );
        assert!((r.ece - 0.15).abs() < 1e-12, "{}", r.ece);
        assert_eq!(r.bins.len(), 10);
        assert_eq!(r.bins[2].count, 2);
    }
}
