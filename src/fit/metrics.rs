//! Evaluation of fitted models on the decode grid, in action units:
//! per-dimension coefficient of determination `R^2 = 1 - SSE / SST` (SST
//! about the evaluated set's own mean; undefined, `null`, for a constant
//! truth), mean absolute error, and mean Gaussian negative log-likelihood of
//! the truth under each model's predictive distribution. The baseline
//! predicts the labelled-train mean with the train variance.
//!
//! Holdout clips are scored against their recorded actions; unlabelled clips
//! against an evaluation-only truth folder (`NAME.actions.csv`, header
//! `t,<dim>,...`, one row per decoded frame, row `k` the action from frame
//! `k` to `k + 1`), read here and nowhere else.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::FitError;
use super::data::Standardisation;
use super::fitted::FittedModel;
use crate::align::AlignedClip;
use crate::model::losses::LN_2PI;

/// Metrics of one dimension.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DimMetrics {
    /// Coefficient of determination (`None` when the truth is constant).
    pub r2: Option<f64>,
    /// Mean absolute error.
    pub mae: f64,
    /// Mean Gaussian negative log-likelihood (nats).
    pub nll: f64,
}

/// Metrics of one model on one evaluation set.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelMetrics {
    /// Per dimension, by name.
    pub dims: BTreeMap<String, DimMetrics>,
    /// Mean R^2 over the dimensions where it is defined.
    pub mean_r2: Option<f64>,
}

/// One evaluation set: a model name -> metrics table plus what was scored.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Metrics {
    /// What was evaluated (`holdout`, or `unlabelled:<set>`).
    pub name: String,
    /// Clips scored.
    pub clips: usize,
    /// Transitions scored.
    pub transitions: usize,
    /// Truth folder (unlabelled sets only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub truth: Option<PathBuf>,
    /// Clips without a truth file (unlabelled sets only).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub missing_truth: Vec<String>,
    /// Metrics by model (`semi`, `labelled-only`, `mean-baseline`).
    pub models: BTreeMap<String, ModelMetrics>,
    /// Per clip, the sums R^2 is made of, so that R^2 over any subset of the
    /// clips can be computed afterwards (e.g. to choose a setting on some
    /// evaluation clips and report on the others).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub per_clip: Vec<ClipSums>,
}

/// One clip's sums for one dimension: `n` is the clip's transitions.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct DimSums {
    /// Sum of squared errors.
    pub sse: f64,
    /// Sum of the truth.
    pub sum_y: f64,
    /// Sum of the squared truth.
    pub sum_y2: f64,
}

/// One clip's sums per model and dimension. Over a subset of clips,
/// `R^2 = 1 - sum(sse) / (sum(sum_y2) - sum(sum_y)^2 / sum(n))` per dimension.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ClipSums {
    /// Clip id.
    pub clip: String,
    /// Transitions scored.
    pub n: usize,
    /// Model -> dimension -> sums.
    pub models: BTreeMap<String, BTreeMap<String, DimSums>>,
}

/// Running sums for one model and dimension.
#[derive(Debug, Clone, Default)]
struct Acc {
    n: usize,
    sum_y: f64,
    sum_y2: f64,
    sse: f64,
    sae: f64,
    nll: f64,
}

impl Acc {
    fn add(&mut self, y: f64, mean: f64, std: f64) {
        let var = (std * std).max(1e-12);
        self.n += 1;
        self.sum_y += y;
        self.sum_y2 += y * y;
        self.sse += (y - mean).powi(2);
        self.sae += (y - mean).abs();
        self.nll += 0.5 * (LN_2PI + var.ln() + (y - mean).powi(2) / var);
    }
    /// Adds another set of running sums (they are all additive).
    fn merge(&mut self, other: &Acc) {
        self.n += other.n;
        self.sum_y += other.sum_y;
        self.sum_y2 += other.sum_y2;
        self.sse += other.sse;
        self.sae += other.sae;
        self.nll += other.nll;
    }
    fn finish(&self) -> DimMetrics {
        let n = self.n.max(1) as f64;
        let sst = self.sum_y2 - self.sum_y * self.sum_y / n;
        let r2 = (sst > 1e-12 * self.sum_y2.max(1e-300)).then(|| 1.0 - self.sse / sst);
        DimMetrics {
            r2,
            mae: self.sae / n,
            nll: self.nll / n,
        }
    }
}

/// Accumulates predictions against truth for several models.
pub struct Evaluator<'a> {
    dims: &'a [String],
    models: Vec<(String, Vec<Acc>)>,
    clips: usize,
    transitions: usize,
    per_clip: Vec<ClipSums>,
}

impl<'a> Evaluator<'a> {
    /// An evaluator for `models` (the mean baseline is added last).
    pub fn new(dims: &'a [String], models: &[&str]) -> Self {
        let mut m: Vec<(String, Vec<Acc>)> = models
            .iter()
            .map(|n| (n.to_string(), vec![Acc::default(); dims.len()]))
            .collect();
        m.push(("mean-baseline".into(), vec![Acc::default(); dims.len()]));
        Self {
            dims,
            models: m,
            clips: 0,
            transitions: 0,
            per_clip: Vec::new(),
        }
    }

    /// Adds clip `id`: truth rows and, per model in order, (means, stds), all
    /// on the same transitions.
    pub fn add_clip(
        &mut self,
        id: &str,
        truth: &[Vec<f32>],
        preds: &[(Vec<Vec<f32>>, Vec<Vec<f32>>)],
        base: &Standardisation,
    ) {
        self.clips += 1;
        self.transitions += truth.len();
        // This clip's sums, then folded into the set's.
        let mut clip: Vec<Vec<Acc>> =
            vec![vec![Acc::default(); self.dims.len()]; self.models.len()];
        let last = self.models.len() - 1;
        for (k, row) in truth.iter().enumerate() {
            for d in 0..self.dims.len() {
                let y = f64::from(row[d]);
                for (mi, (m, s)) in preds.iter().enumerate() {
                    clip[mi][d].add(y, f64::from(m[k][d]), f64::from(s[k][d]));
                }
                clip[last][d].add(y, base.mean[d], base.std[d]);
            }
        }
        let models = self
            .models
            .iter_mut()
            .zip(&clip)
            .map(|((name, set), accs)| {
                for (total, a) in set.iter_mut().zip(accs) {
                    total.merge(a);
                }
                let dims = self
                    .dims
                    .iter()
                    .zip(accs)
                    .map(|(d, a)| {
                        let sums = DimSums {
                            sse: a.sse,
                            sum_y: a.sum_y,
                            sum_y2: a.sum_y2,
                        };
                        (d.clone(), sums)
                    })
                    .collect();
                (name.clone(), dims)
            })
            .collect();
        self.per_clip.push(ClipSums {
            clip: id.to_string(),
            n: truth.len(),
            models,
        });
    }

    /// The metrics table.
    pub fn finish(self, name: &str) -> Metrics {
        let models = self
            .models
            .iter()
            .map(|(n, accs)| {
                let dims: BTreeMap<String, DimMetrics> = self
                    .dims
                    .iter()
                    .zip(accs)
                    .map(|(d, a)| (d.clone(), a.finish()))
                    .collect();
                let r2s: Vec<f64> = dims.values().filter_map(|m| m.r2).collect();
                let mean_r2 = (!r2s.is_empty()).then(|| r2s.iter().sum::<f64>() / r2s.len() as f64);
                (n.clone(), ModelMetrics { dims, mean_r2 })
            })
            .collect();
        Metrics {
            name: name.to_string(),
            clips: self.clips,
            transitions: self.transitions,
            truth: None,
            missing_truth: Vec::new(),
            models,
            per_clip: self.per_clip,
        }
    }
}

/// Ensemble predictions of each model for `clip`, mapped onto the decode grid.
pub fn decode_grid_predictions(
    models: &[&FittedModel],
    clip: &AlignedClip,
    rules: &[crate::actions::MapRule],
) -> Result<Vec<(Vec<Vec<f32>>, Vec<Vec<f32>>)>, FitError> {
    models
        .iter()
        .map(|m| {
            let (mean, std) = m.predict_clip(clip)?;
            Ok((
                clip.to_decode_grid(&mean, rules)?,
                clip.to_decode_grid_std(&std, rules)?,
            ))
        })
        .collect()
}

/// Reads an evaluation truth file: rows of the named dimensions, in `dims` order.
pub fn read_truth(path: &Path, dims: &[String]) -> Result<Vec<Vec<f32>>, FitError> {
    let text = std::fs::read_to_string(path).map_err(FitError::io(path))?;
    let bad = |line: usize, reason: String| FitError::Corrupt {
        path: path.to_path_buf(),
        reason: format!("line {line}: {reason}"),
    };
    let mut lines = text.lines();
    let header: Vec<&str> = lines
        .next()
        .unwrap_or("")
        .split(',')
        .map(str::trim)
        .collect();
    let cols: Vec<usize> = dims
        .iter()
        .map(|d| {
            header
                .iter()
                .position(|h| h == d)
                .ok_or_else(|| bad(1, format!("no column {d} (header {header:?})")))
        })
        .collect::<Result<_, _>>()?;
    let mut rows = Vec::new();
    for (i, line) in lines.enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        let fields: Vec<&str> = line.split(',').map(str::trim).collect();
        let row = cols
            .iter()
            .map(|&c| {
                fields
                    .get(c)
                    .and_then(|f| f.parse::<f32>().ok())
                    .ok_or_else(|| bad(i + 2, format!("column {} is not a number", header[c])))
            })
            .collect::<Result<Vec<f32>, _>>()?;
        rows.push(row);
    }
    Ok(rows)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn r2_mae_nll_on_a_hand_example() {
        // truth 1, 2, 3; prediction 1, 2, 4 with std 1:
        // SST = 2, SSE = 1 -> R^2 = 0.5; MAE = 1/3;
        // NLL = 0.5 ln(2 pi) + 0.5 * (0 + 0 + 1) / 3 (normal density, textbook).
        let dims = vec!["a".to_string()];
        let mut e = Evaluator::new(&dims, &["m"]);
        let truth = vec![vec![1.0], vec![2.0], vec![3.0]];
        let pred = (vec![vec![1.0], vec![2.0], vec![4.0]], vec![vec![1.0]; 3]);
        let base = Standardisation {
            dims: dims.clone(),
            mean: vec![2.0],
            std: vec![1.0],
            constant: vec![false],
        };
        e.add_clip("c0", &truth, &[pred], &base);
        let m = e.finish("holdout");
        let d = &m.models["m"].dims["a"];
        assert!((d.r2.unwrap() - 0.5).abs() < 1e-12);
        assert!((d.mae - 1.0 / 3.0).abs() < 1e-12);
        assert!((d.nll - (0.5 * LN_2PI + 0.5 / 3.0)).abs() < 1e-12);
        // The baseline predicts the mean: R^2 = 0 on this set.
        assert!(m.models["mean-baseline"].dims["a"].r2.unwrap().abs() < 1e-12);
    }

    /// R^2 over a subset of clips from their sums, as the per-clip doc says.
    fn r2_from_sums(per_clip: &[&ClipSums], model: &str, dim: &str) -> f64 {
        let (mut n, mut sse, mut sy, mut sy2) = (0.0, 0.0, 0.0, 0.0);
        for c in per_clip {
            let s = c.models[model][dim];
            n += c.n as f64;
            sse += s.sse;
            sy += s.sum_y;
            sy2 += s.sum_y2;
        }
        1.0 - sse / (sy2 - sy * sy / n)
    }

    #[test]
    fn per_clip_sums_rebuild_the_pooled_and_the_single_clip_r2() {
        // Two clips; pooled R^2 from the per-clip sums equals the table's,
        // and one clip's sums equal that clip scored alone.
        let dims = vec!["a".to_string()];
        let base = Standardisation {
            dims: dims.clone(),
            mean: vec![0.5],
            std: vec![1.0],
            constant: vec![false],
        };
        let clips: [(&str, Vec<f32>, Vec<f32>); 2] = [
            ("c0", vec![1.0, 2.0, 3.0, 0.0], vec![1.5, 1.0, 2.5, 0.5]),
            ("c1", vec![-1.0, 4.0, 2.0], vec![0.0, 3.0, 2.5]),
        ];
        let mut all = Evaluator::new(&dims, &["m"]);
        for (id, t, p) in &clips {
            let truth: Vec<Vec<f32>> = t.iter().map(|&v| vec![v]).collect();
            let pred: Vec<Vec<f32>> = p.iter().map(|&v| vec![v]).collect();
            all.add_clip(id, &truth, &[(pred, vec![vec![1.0]; p.len()])], &base);
        }
        let m = all.finish("holdout");
        assert_eq!(m.per_clip.len(), 2);
        let both: Vec<&ClipSums> = m.per_clip.iter().collect();
        for model in ["m", "mean-baseline"] {
            let pooled = m.models[model].dims["a"].r2.unwrap();
            assert!(
                (r2_from_sums(&both, model, "a") - pooled).abs() < 1e-9,
                "{model}"
            );
        }
        let (id, t, p) = &clips[1];
        let mut one = Evaluator::new(&dims, &["m"]);
        let truth: Vec<Vec<f32>> = t.iter().map(|&v| vec![v]).collect();
        let pred: Vec<Vec<f32>> = p.iter().map(|&v| vec![v]).collect();
        one.add_clip(id, &truth, &[(pred, vec![vec![1.0]; p.len()])], &base);
        let alone = one.finish("holdout").models["m"].dims["a"].r2.unwrap();
        assert!((r2_from_sums(&[&m.per_clip[1]], "m", "a") - alone).abs() < 1e-9);
    }
}
