//! What the label stage writes under `RUN/label/`, and the typed readers the
//! shard stage and `inspect` use:
//!
//! - `clips/<set>/<clip-id>.labels.json`: a [`ClipLabels`] per decoded clip,
//!   one entry per transition (`frames - 1`), written atomically; a clip is
//!   done when its file exists with the stage key (that is how label resumes).
//! - `clips/<set>/<clip-id>.png-frames`: every decoded frame of the clip as
//!   PNG bytes (see [`crate::store::png_frames`]), for the shard stage; only
//!   with `[shard] image = "png"`, written before the labels file.
//! - `state.json`: the fitted calibration and codes ([`LabelState`]), so a
//!   resumed run does not refit them.
//! - `calibration.json`: the calibration figures ([`CalibrationFigures`]).
//! - `codes.json`: the codes table ([`CodesTable`]).

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::conformal::ConformalQuantile;
use super::kmeans::KMeans;
use super::model::{Split, Standardisation};
use super::reliability::{Isotonic, Reliability};
use crate::store::ClipRecord;
use crate::store::clips::with_suffix;

/// File name of the calibration figures.
pub const CALIBRATION_FILE: &str = "calibration.json";
/// File name of the codes table.
pub const CODES_FILE: &str = "codes.json";
/// File name of the fitted state.
pub const STATE_FILE: &str = "state.json";

/// Labels of one clip's transitions.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ClipLabels {
    /// Clip id.
    pub id: String,
    /// Clip-set name.
    pub set: String,
    /// Whether the set has recorded actions.
    pub labelled: bool,
    /// The clip's split.
    pub split: Split,
    /// The label stage key this file was made with.
    pub key: String,
    /// Decoded frames of the clip (transitions = frames - 1).
    pub frames: u32,
    /// Inferred action per transition, action units.
    pub action_est: Vec<Vec<f32>>,
    /// Calibrated Gaussian-equivalent std per transition and dimension.
    pub action_std: Vec<Vec<f32>>,
    /// Calibrated probability that every dimension is within tolerance.
    pub confidence: Vec<f32>,
    /// Ensemble disagreement above the calib maximum.
    pub ood: Vec<bool>,
    /// Nearest k-means code of the posterior mean.
    pub code: Vec<u16>,
    /// Ensemble disagreement (RMS over dimensions of the heads' std, standardised units).
    pub disagreement: Vec<f32>,
}

impl ClipLabels {
    /// Path of the labels file of clip `(set, id)` under `label_dir`.
    pub fn path(label_dir: &Path, set: &str, id: &str) -> PathBuf {
        with_suffix(&label_dir.join("clips").join(set).join(id), ".labels.json")
    }

    /// Reads the labels of clip `(set, id)`.
    pub fn read(label_dir: &Path, set: &str, id: &str) -> std::io::Result<Self> {
        crate::store::read_json(&Self::path(label_dir, set, id))
    }
}

/// Path of the PNG frame store of clip `(set, id)` under `label_dir`.
pub fn png_frames_path(label_dir: &Path, set: &str, id: &str) -> PathBuf {
    with_suffix(&label_dir.join("clips").join(set).join(id), ".png-frames")
}

/// One action dimension's calibration.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DimCalibration {
    /// Dimension name.
    pub dim: String,
    /// Conformal quantile of the normalised score on calib transitions.
    pub quantile: ConformalQuantile,
    /// Tolerance in action units.
    pub tolerance: f64,
    /// Fraction of holdout transitions inside `action_est +- z * action_std` (none without holdout clips).
    pub holdout_coverage: Option<f64>,
    /// Same on calib transitions (at least 1 - alpha by construction).
    pub calib_coverage: f64,
    /// Mean calibrated std on holdout transitions.
    pub holdout_mean_std: Option<f64>,
    /// Coverage on the holdout clips inside the calib clips' motion range
    /// (none without such clips; see [`super::motion_range`]).
    #[serde(default)]
    pub holdout_coverage_in_range: Option<f64>,
}

/// The calibration figures (`calibration.json`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CalibrationFigures {
    /// Miscoverage rate.
    pub alpha: f64,
    /// Standard normal quantile at 1 - alpha/2.
    pub z: f64,
    /// Tolerance as a fraction of each dimension's labelled std.
    pub tolerance_fraction: f64,
    /// The standardisation of actions saved by fit.
    pub standardisation: Standardisation,
    /// Per dimension.
    pub dims: Vec<DimCalibration>,
    /// Calib transitions.
    pub calib_transitions: u64,
    /// Holdout transitions.
    pub holdout_transitions: u64,
    /// How confidence was calibrated.
    pub confidence_method: String,
    /// Reliability of the calibrated confidence on holdout transitions.
    pub holdout_reliability: Reliability,
    /// Reliability of the uncalibrated (product-of-Gaussians) confidence on holdout.
    pub holdout_reliability_raw: Reliability,
    /// Largest ensemble disagreement on calib transitions (the ood threshold).
    pub ood_threshold: f64,
    /// Fraction of holdout transitions flagged ood.
    pub holdout_ood_rate: Option<f64>,
    /// Per dimension, the largest mean |action_est| of a calib clip: the
    /// motion range calibration saw ([`super::motion_range`]).
    #[serde(default)]
    pub calib_motion_range: Vec<f64>,
    /// Holdout clips that move more than the range in some dimension.
    #[serde(default)]
    pub holdout_beyond_range: Vec<String>,
}

/// The fitted state of a label run (`state.json`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LabelState {
    /// The stage key it was fitted under.
    pub key: String,
    /// Calibration figures (quantiles inside).
    pub calibration: CalibrationFigures,
    /// The confidence map.
    pub isotonic: Isotonic,
    /// The codes.
    pub kmeans: KMeans,
    /// Train transitions k-means was fitted on.
    pub kmeans_points: u64,
    /// Train transitions in all.
    pub train_transitions: u64,
}

/// One code of the codes table.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CodeRow {
    /// Code value (the shards' `code`).
    pub code: u16,
    /// Centroid in latent space.
    pub centroid: Vec<f64>,
    /// Transitions (all clips) with this code.
    pub count: u64,
    /// Of which on labelled clips.
    pub count_labelled: u64,
    /// Mean inferred action of those transitions, action units (empty when count is 0).
    pub mean_action: Vec<f64>,
}

/// The codes table (`codes.json`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CodesTable {
    /// Action dimension names (for `mean_action`).
    pub dims: Vec<String>,
    /// Latent size.
    pub latent_dims: usize,
    /// k-means inertia on the fitted points.
    pub inertia: f64,
    /// Points k-means was fitted on.
    pub fitted_points: u64,
    /// The codes.
    pub codes: Vec<CodeRow>,
}

/// Every decoded clip under `RUN/decode/clips/` (a clip is decoded when its
/// `.clip.json` record exists), sorted by set then id.
pub fn decoded_clips(run_dir: &Path) -> std::io::Result<Vec<ClipRecord>> {
    let root = run_dir.join("decode").join("clips");
    let mut files = Vec::new();
    walk(&root, &mut files)?;
    let mut out = Vec::with_capacity(files.len());
    for f in files {
        let rec: ClipRecord = crate::store::read_json(&f)
            .map_err(|e| std::io::Error::new(e.kind(), format!("{}: {e}", f.display())))?;
        out.push(rec);
    }
    out.sort_by(|a, b| (&a.set, &a.id).cmp(&(&b.set, &b.id)));
    Ok(out)
}

fn walk(dir: &Path, out: &mut Vec<PathBuf>) -> std::io::Result<()> {
    let rd = match std::fs::read_dir(dir) {
        Ok(rd) => rd,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(()),
        Err(e) => return Err(e),
    };
    for entry in rd {
        let path = entry?.path();
        if path.is_dir() {
            walk(&path, out)?;
        } else if path.to_string_lossy().ends_with(".clip.json") {
            out.push(path);
        }
    }
    Ok(())
}
