//! Calibration of `confidence` and its reliability figures.
//!
//! The raw confidence of a transition is the probability, under the
//! conformally calibrated per-dimension Gaussians, that every dimension's
//! error is within tolerance (product over dimensions). It is then
//! recalibrated by isotonic regression (pool-adjacent-violators; Zadrozny &
//! Elkan 2002, "Transforming classifier scores into accurate multiclass
//! probability estimates") of the 0/1 outcome "every dimension within
//! tolerance" on the calibration clips, evaluated with linear interpolation
//! between the fitted blocks' mean scores (as scikit-learn's
//! `IsotonicRegression` predicts), clipped at both ends.
//!
//! Reliability: expected calibration error over equal-width bins of [0, 1]
//! (Naeini, Cooper & Hauskrecht 2015; Guo et al. 2017),
//! `ECE = sum_b (n_b / N) |accuracy_b - mean confidence_b|`.

use serde::{Deserialize, Serialize};

/// The name recorded for the confidence calibration method.
pub const METHOD: &str = "isotonic regression (pool-adjacent-violators) of the all-dimensions-within-tolerance outcome on calib clips";

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
        // Blocks: (sum x, sum y, count); equal scores share a block first.
        let mut blocks: Vec<(f64, f64, f64)> = Vec::new();
        for (x, y) in pairs {
            match blocks.last_mut() {
                Some(last) if last.0 / last.2 == x => {
                    last.0 += x;
                    last.1 += y;
                    last.2 += 1.0;
                }
                _ => blocks.push((x, y, 1.0)),
            }
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
    fn pav_pools_violators() {
        let iso = Isotonic::fit(&[0.1, 0.2, 0.3, 0.4], &[false, true, false, true]);
        // Blocks: {0.1}->0, {0.2,0.3}->0.5, {0.4}->1.
        assert_eq!(iso.x.len(), 3);
        assert_eq!(iso.y, vec![0.0, 0.5, 1.0]);
        assert!((iso.apply(0.25) - 0.5).abs() < 1e-12);
        assert_eq!(iso.apply(0.0), 0.0);
        assert_eq!(iso.apply(0.9), 1.0);
        assert!((iso.apply(0.325) - 0.75).abs() < 1e-12);
    }

    #[test]
    fn ece_of_a_worked_example() {
        // Two bins used: [0.2, 0.3) holds 0.25 x2 with 1 hit -> |0.5 - 0.25| = 0.25;
        // [0.9, 1] holds 0.95 x2 with 2 hits -> |1 - 0.95| = 0.05. ECE = 0.5*0.25 + 0.5*0.05.
        let r = reliability(&[0.25, 0.25, 0.95, 1.0 - 0.05], &[true, false, true, true], 10);
        assert!((r.ece - 0.15).abs() < 1e-12, "{}", r.ece);
        assert_eq!(r.bins.len(), 10);
        assert_eq!(r.bins[2].count, 2);
    }
}
