//! The domain-gap figure: the Fréchet distance between Gaussian fits of per-frame
//! colour/texture features of two frame sets,
//! `d² = |μ₁ − μ₂|² + tr(Σ₁ + Σ₂ − 2 (Σ₁^{1/2} Σ₂ Σ₁^{1/2})^{1/2})`
//! (Dowson & Landau 1982; the same form as the Fréchet Inception Distance, on hand-made
//! features instead of a network's). The figure reported is `d²`, in CIELAB units squared.
//!
//! Features of one frame ([`FEATURES`] = 17): CIELAB mean of each 2x2 quadrant (12), CIELAB
//! standard deviation over the frame (3), mean absolute L* gradient at full and half
//! resolution (2: texture / sharpness).

use super::color::rgb_to_lab;
use super::linalg::{Mat, sqrt_psd};

/// Number of features per frame.
pub const FEATURES: usize = 17;

/// The feature vector of one RGB8 frame of `width x height`.
pub fn frame_features(rgb: &[u8], width: usize, height: usize) -> [f64; FEATURES] {
    let mut f = [0.0; FEATURES];
    let n = width * height;
    let mut l = vec![0.0f64; n];
    let mut quad = [[0.0f64; 3]; 4];
    let mut quad_n = [0usize; 4];
    let mut sum = [0.0; 3];
    let mut sum_sq = [0.0; 3];
    for y in 0..height {
        for x in 0..width {
            let i = y * width + x;
            let lab = rgb_to_lab([rgb[3 * i], rgb[3 * i + 1], rgb[3 * i + 2]]);
            l[i] = lab[0];
            let q = usize::from(y * 2 >= height) * 2 + usize::from(x * 2 >= width);
            quad_n[q] += 1;
            for c in 0..3 {
                quad[q][c] += lab[c];
                sum[c] += lab[c];
                sum_sq[c] += lab[c] * lab[c];
            }
        }
    }
    for q in 0..4 {
        for c in 0..3 {
            f[q * 3 + c] = quad[q][c] / quad_n[q].max(1) as f64;
        }
    }
    for c in 0..3 {
        let m = sum[c] / n.max(1) as f64;
        f[12 + c] = (sum_sq[c] / n.max(1) as f64 - m * m).max(0.0).sqrt();
    }
    f[15] = mean_abs_gradient(&l, width, height);
    let (hw, hh) = (width / 2, height / 2);
    if hw >= 2 && hh >= 2 {
        let mut half = vec![0.0; hw * hh];
        for y in 0..hh {
            for x in 0..hw {
                half[y * hw + x] = 0.25
                    * (l[2 * y * width + 2 * x]
                        + l[2 * y * width + 2 * x + 1]
                        + l[(2 * y + 1) * width + 2 * x]
                        + l[(2 * y + 1) * width + 2 * x + 1]);
            }
        }
        f[16] = mean_abs_gradient(&half, hw, hh);
    }
    f
}

fn mean_abs_gradient(l: &[f64], w: usize, h: usize) -> f64 {
    let mut s = 0.0;
    let mut n = 0usize;
    for y in 0..h {
        for x in 0..w {
            if x + 1 < w {
                s += (l[y * w + x + 1] - l[y * w + x]).abs();
                n += 1;
            }
            if y + 1 < h {
                s += (l[(y + 1) * w + x] - l[y * w + x]).abs();
                n += 1;
            }
        }
    }
    if n == 0 { 0.0 } else { s / n as f64 }
}

/// A Gaussian fit: mean and (maximum-likelihood) covariance of feature vectors.
#[derive(Debug, Clone, PartialEq)]
pub struct Gaussian {
    /// Mean.
    pub mean: Vec<f64>,
    /// Covariance.
    pub cov: Mat,
}

/// Fits a Gaussian to feature vectors; `None` for an empty set.
pub fn fit_gaussian(rows: &[[f64; FEATURES]]) -> Option<Gaussian> {
    if rows.is_empty() {
        return None;
    }
    let n = rows.len() as f64;
    let mut mean = vec![0.0; FEATURES];
    for r in rows {
        for (m, v) in mean.iter_mut().zip(r) {
            *m += v / n;
        }
    }
    let mut cov = Mat::zeros(FEATURES);
    for r in rows {
        for i in 0..FEATURES {
            let di = r[i] - mean[i];
            for j in 0..FEATURES {
                cov.a[i * FEATURES + j] += di * (r[j] - mean[j]) / n;
            }
        }
    }
    Some(Gaussian { mean, cov })
}

/// The squared Fréchet distance between two Gaussians (see the module docs).
pub fn frechet(a: &Gaussian, b: &Gaussian) -> f64 {
    let d2: f64 = a
        .mean
        .iter()
        .zip(&b.mean)
        .map(|(x, y)| (x - y) * (x - y))
        .sum();
    let sa = sqrt_psd(&a.cov);
    let inner = sa.mul(&b.cov).mul(&sa);
    let cross = sqrt_psd(&inner).trace();
    (d2 + a.cov.trace() + b.cov.trace() - 2.0 * cross).max(0.0)
}

/// The gap figure between two sets of feature vectors (0 when either is empty).
pub fn gap(a: &[[f64; FEATURES]], b: &[[f64; FEATURES]]) -> f64 {
    match (fit_gaussian(a), fit_gaussian(b)) {
        (Some(x), Some(y)) => frechet(&x, &y),
        _ => 0.0,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn frechet_of_1d_gaussians_matches_closed_form() {
        // For 1-D Gaussians, d² = (μ₁−μ₂)² + (σ₁−σ₂)² (Dowson & Landau 1982).
        let mut a = Gaussian {
            mean: vec![0.0; FEATURES],
            cov: Mat::zeros(FEATURES),
        };
        let mut b = a.clone();
        a.mean[0] = 1.0;
        *a.cov.at_mut(0, 0) = 4.0;
        b.mean[0] = 3.0;
        *b.cov.at_mut(0, 0) = 9.0;
        assert!((frechet(&a, &b) - (4.0 + 1.0)).abs() < 1e-9);
    }
}
