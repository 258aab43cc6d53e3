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
        }
    }

    /// Adds one clip: truth rows and, per model in order, (means, stds), all
    /// on the same transitions.
    pub fn add_clip(
        &mut self,
        truth: &[Vec<f32>],
        preds: &[(Vec<Vec<f32>>, Vec<Vec<f32>>)],
        base: &Standardisation,
    ) {
        self.clips += 1;
        self.transitions += truth.len();
        for (k, row) in truth.iter().enumerate() {
            for d in 0..self.dims.len() {
                let y = f64::from(row[d]);
                for (mi, (m, s)) in preds.iter().enumerate() {
                    self.models[mi].1[d].add(y, f64::from(m[k][d]), f64::from(s[k][d]));
                }
                let last = self.models.len() - 1;
                self.models[last].1[d].add(y, base.mean[d], base.std[d]);
            }
        }
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
        e.add_clip(&truth, &[pred], &base);
        let m = e.finish("holdout");
        let d = &m.models["m"].dims["a"];
        assert!((d.r2.unwrap() - 0.5).abs() < 1e-12);
        assert!((d.mae - 1.0 / 3.0).abs() < 1e-12);
        assert!((d.nll - (0.5 * LN_2PI + 0.5 / 3.0)).abs() < 1e-12);
        // The baseline predicts the mean: R^2 = 0 on this set.
        assert!(m.models["mean-baseline"].dims["a"].r2.unwrap().abs() < 1e-12);
    }
}
