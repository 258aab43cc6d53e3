//! Seeded k-means: k-means++ seeding (Arthur & Vassilvitskii 2007) in its
//! greedy form (each new centre is the best of `2 + ln k` candidates drawn
//! with probability proportional to the squared distance, as scikit-learn
//! does), then Lloyd iterations until no assignment changes; `restarts`
//! independent seedings, the lowest inertia (sum of squared distances to the
//! nearest centre) wins. Single-threaded and seeded, so it is deterministic.

use serde::{Deserialize, Serialize};

use crate::model::Rng;

/// Errors fitting k-means.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum KMeansError {
    /// Fewer points than clusters.
    #[error("k-means needs at least {k} points for {k} codes, got {points}")]
    TooFewPoints {
        /// Clusters asked for.
        k: usize,
        /// Points given.
        points: usize,
    },
    /// The flat point buffer is not a multiple of the dimension.
    #[error("k-means points: {len} values is not a multiple of dimension {dim}")]
    Shape {
        /// Values given.
        len: usize,
        /// Dimension.
        dim: usize,
    },
}

/// A fitted k-means model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct KMeans {
    /// Point dimension.
    pub dim: usize,
    /// Centres, `k` rows of `dim` values.
    pub centroids: Vec<Vec<f64>>,
    /// Sum of squared distances of the points to their nearest centre.
    pub inertia: f64,
    /// Lloyd iterations the winning restart used.
    pub iterations: usize,
}

/// Settings of one fit.
#[derive(Debug, Clone, Copy)]
pub struct KMeansSettings {
    /// Clusters.
    pub k: usize,
    /// Independent seedings.
    pub restarts: usize,
    /// Most Lloyd iterations per restart.
    pub max_iterations: usize,
    /// Seed.
    pub seed: u64,
}

fn dist2(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| (x - y) * (x - y)).sum()
}

impl KMeans {
    /// Fits k-means on `points` (`n` rows of `dim` values, flat).
    pub fn fit(points: &[f64], dim: usize, s: KMeansSettings) -> Result<Self, KMeansError> {
        if dim == 0 || points.len() % dim != 0 {
            return Err(KMeansError::Shape {
                len: points.len(),
                dim,
            });
        }
        let n = points.len() / dim;
        if n < s.k || s.k == 0 {
            return Err(KMeansError::TooFewPoints { k: s.k, points: n });
        }
        let rows: Vec<&[f64]> = points.chunks_exact(dim).collect();
        let mut best: Option<KMeans> = None;
        for r in 0..s.restarts.max(1) {
            let mut rng = Rng::for_name(s.seed, &format!("label.kmeans.restart{r}"));
            let init = seed_plus_plus(&rows, s.k, &mut rng);
            let fitted = lloyd(&rows, init, s.max_iterations.max(1));
            if best.as_ref().is_none_or(|b| fitted.inertia < b.inertia) {
                best = Some(fitted);
            }
        }
        Ok(best.expect("at least one restart"))
    }

    /// Index of the nearest centre to `x` and the squared distance to it
    /// (ties go to the lower index).
    pub fn nearest(&self, x: &[f64]) -> (usize, f64) {
        let mut best = (0, f64::INFINITY);
        for (i, c) in self.centroids.iter().enumerate() {
            let d = dist2(x, c);
            if d < best.1 {
                best = (i, d);
            }
        }
        best
    }

    /// Number of clusters.
    pub fn k(&self) -> usize {
        self.centroids.len()
    }
}

/// Greedy k-means++ seeding.
fn seed_plus_plus(rows: &[&[f64]], k: usize, rng: &mut Rng) -> Vec<Vec<f64>> {
    let n = rows.len();
    let trials = 2 + (k as f64).ln().floor() as usize;
    let first = rng.below(n as u64) as usize;
    let mut centres = vec![rows[first].to_vec()];
    let mut closest: Vec<f64> = rows.iter().map(|p| dist2(p, rows[first])).collect();
    while centres.len() < k {
        let total: f64 = closest.iter().sum();
        let mut best: Option<(usize, f64, Vec<f64>)> = None;
        for _ in 0..trials {
            let cand = if total > 0.0 {
                sample_weighted(&closest, total, rng)
            } else {
                rng.below(n as u64) as usize
            };
            let updated: Vec<f64> = rows
                .iter()
                .zip(&closest)
                .map(|(p, &c)| c.min(dist2(p, rows[cand])))
                .collect();
            let pot: f64 = updated.iter().sum();
            if best.as_ref().is_none_or(|b| pot < b.1) {
                best = Some((cand, pot, updated));
            }
        }
        let (cand, _, updated) = best.expect("at least two trials");
        centres.push(rows[cand].to_vec());
        closest = updated;
    }
    centres
}

fn sample_weighted(weights: &[f64], total: f64, rng: &mut Rng) -> usize {
    let target = rng.uniform() * total;
    let mut acc = 0.0;
    for (i, w) in weights.iter().enumerate() {
        acc += w;
        if acc > target {
            return i;
        }
    }
    // Rounding: the last point with weight.
    weights.iter().rposition(|w| *w > 0.0).unwrap_or(0)
}

/// Lloyd iterations from `centres` until no assignment changes.
fn lloyd(rows: &[&[f64]], mut centres: Vec<Vec<f64>>, max_iterations: usize) -> KMeans {
    let dim = centres[0].len();
    let k = centres.len();
    let mut assign = vec![usize::MAX; rows.len()];
    let mut dists = vec![0.0; rows.len()];
    let mut iterations = 0;
    let nearest = |centres: &[Vec<f64>], p: &[f64]| {
        let mut best = (0, f64::INFINITY);
        for (i, c) in centres.iter().enumerate() {
            let d = dist2(p, c);
            if d < best.1 {
                best = (i, d);
            }
        }
        best
    };
    loop {
        let mut changed = false;
        for (i, p) in rows.iter().enumerate() {
            let (c, d) = nearest(&centres, p);
            if assign[i] != c {
                assign[i] = c;
                changed = true;
            }
            dists[i] = d;
        }
        if !changed || iterations >= max_iterations {
            break;
        }
        iterations += 1;
        let mut sums = vec![vec![0.0; dim]; k];
        let mut counts = vec![0usize; k];
        for (p, &c) in rows.iter().zip(&assign) {
            counts[c] += 1;
            for (s, v) in sums[c].iter_mut().zip(p.iter()) {
                *s += v;
            }
        }
        for c in 0..k {
            if counts[c] == 0 {
                // An empty cluster takes the point farthest from its centre.
                let far = (0..rows.len())
                    .max_by(|&a, &b| dists[a].total_cmp(&dists[b]).then(b.cmp(&a)))
                    .expect("rows");
                centres[c] = rows[far].to_vec();
                dists[far] = 0.0;
            } else {
                centres[c] = sums[c].iter().map(|s| s / counts[c] as f64).collect();
            }
        }
    }
    KMeans {
        dim,
        centroids: centres,
        inertia: dists.iter().sum(),
        iterations,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn separated_blobs_are_found() {
        let mut rng = Rng::new(1);
        let mut pts = Vec::new();
        for c in [[0.0, 0.0], [10.0, 0.0], [0.0, 10.0]] {
            for _ in 0..50 {
                pts.push(c[0] + 0.1 * rng.normal());
                pts.push(c[1] + 0.1 * rng.normal());
            }
        }
        let s = KMeansSettings {
            k: 3,
            restarts: 3,
            max_iterations: 100,
            seed: 7,
        };
        let km = KMeans::fit(&pts, 2, s).unwrap();
        assert!(
            km.inertia < 150.0 * 2.0 * 0.01 * 2.0,
            "inertia {}",
            km.inertia
        );
        assert_eq!(
            km,
            KMeans::fit(&pts, 2, s).unwrap(),
            "seeded fit is deterministic"
        );
        let (c0, _) = km.nearest(&[0.0, 0.1]);
        let (c1, _) = km.nearest(&[10.0, -0.1]);
        assert_ne!(c0, c1);
    }

    #[test]
    fn too_few_points() {
        let s = KMeansSettings {
            k: 4,
            restarts: 1,
            max_iterations: 10,
            seed: 0,
        };
        assert_eq!(
            KMeans::fit(&[0.0, 1.0, 2.0], 1, s),
            Err(KMeansError::TooFewPoints { k: 4, points: 3 })
        );
    }
}
