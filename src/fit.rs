//! The fit stage: trains the semi-supervised variational inverse-dynamics
//! model of [`crate::model`] on the aligned clips, and the same network on
//! labelled clips alone for comparison, then measures both against a
//! predict-the-train-mean baseline.
//!
//! Data flow:
//!
//! ```text
//! RUN/align (AlignedRun view over RUN/decode frame stores, mmapped)
//!   -> data::Dataset   splits by clip (train / calib / holdout), action standardisation,
//!                      seeded batch sampling of frame pairs (never all frames in memory)
//!   -> train::train    AdamW steps inside a rayon pool of `threads` workers;
//!                      per-step log RUN/fit/<model>.log.csv, progress bar,
//!                      checkpoints RUN/fit/checkpoints/<model>.safetensors (resumable)
//!   -> RUN/fit/<model>.safetensors + RUN/fit/model.json   (what the label stage loads,
//!                      see fitted::FittedModel)
//!   -> metrics::evaluate  per-dimension R^2, MAE, NLL on holdout clips and on
//!                      unlabelled clips with an evaluation-only truth folder
//!                      -> RUN/fit/metrics.json
//! ```
//!
//! Models: `semi` (both domains, MMD alignment) and, unless `compare = false`,
//! `labelled-only` (labelled clips only, no alignment term).

mod checkpoint;
mod data;
pub use data::shift_frame;
mod error;
mod fitted;
mod metrics;
mod splits;
mod stage;
mod train;

use serde::{Deserialize, Serialize};

pub use checkpoint::CHECKPOINT_FORMAT;
pub use data::{Split, SplitCounts, Standardisation, split_counts};
pub use error::FitError;
pub use fitted::{
    ClipSplit, FittedModel, HeadOutput, InferOutput, LABELLED_ONLY, MODEL_FILE, ModelInfo, SEMI,
};
pub use metrics::{DimMetrics, Metrics, ModelMetrics};
pub use splits::SplitBy;
pub use stage::{
    ComparisonRow, FitInputs, FitSummary, METRICS_FILE, ModelRun, fit_run, inspect_text, run_stage,
};

use crate::model::{self, HeadLoss, SharedVariance};

/// Default training steps per model.
pub const DEFAULT_STEPS: u32 = 2000;
/// Default frame pairs per batch.
pub const DEFAULT_BATCH: usize = 64;
/// Default AdamW learning rate.
pub const DEFAULT_LEARNING_RATE: f64 = 2e-3;
/// Default share of labelled transitions in each batch of the semi-supervised model.
pub const DEFAULT_LABELLED_SHARE: f64 = 0.5;
/// Default steps between checkpoints.
pub const DEFAULT_CHECKPOINT_EVERY: u32 = 100;
/// Default fraction of labelled clips held out for calibration.
pub const DEFAULT_CALIB_FRACTION: f64 = 0.2;
/// Default fraction of labelled clips held out for evaluation.
pub const DEFAULT_HOLDOUT_FRACTION: f64 = 0.2;

/// Resolved `[fit]` settings (serde-free defaults via [`Default`]).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct FitOptions {
    /// Latent action size.
    pub latent: usize,
    /// Channels of each pyramid level.
    pub widths: Vec<usize>,
    /// Width of the flat feature vector.
    pub hidden: usize,
    /// Hidden width of each action head.
    pub head_hidden: usize,
    /// Ensemble size (action heads, each on its own bootstrap resample).
    pub heads: usize,
    /// Training steps per model.
    pub steps: u32,
    /// Frame pairs per batch.
    pub batch: usize,
    /// AdamW learning rate (cosine decay to a tenth over the steps).
    pub learning_rate: f64,
    /// Share of labelled transitions in each semi-supervised batch, in (0, 1).
    pub labelled_share: f64,
    /// Weight of the action NLL in the loss.
    pub action_weight: f64,
    /// Weight of the MMD^2 alignment penalty.
    pub align_weight: f64,
    /// How the decoder's shared variance is obtained.
    pub shared_variance: SharedVariance,
    /// Steps between checkpoints.
    pub checkpoint_every: u32,
    /// Fraction of labelled clips for calibration.
    pub calib_fraction: f64,
    /// Fraction of labelled clips for holdout evaluation.
    pub holdout_fraction: f64,
    /// How labelled clips are dealt into train, calib and holdout.
    #[serde(default)]
    pub split_by: SplitBy,
    /// Also train the labelled-only comparison model.
    pub compare: bool,
    /// How the action heads are trained.
    #[serde(default = "default_head_loss")]
    pub head_loss: HeadLoss,
    /// The posterior also sees where features are (the deepest map, flattened),
    /// not only each level's global maxima.
    #[serde(default)]
    pub posterior_positions: bool,
    /// Labelled sets dealt into calib and holdout only, never trained on;
    /// from `[sets.NAME] held-out = true`.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub held_out_sets: Vec<String>,
}

fn default_head_loss() -> HeadLoss {
    HeadLoss::Faithful
}

impl Default for FitOptions {
    fn default() -> Self {
        Self {
            latent: model::DEFAULT_LATENT,
            widths: model::DEFAULT_WIDTHS.to_vec(),
            hidden: model::DEFAULT_HIDDEN,
            head_hidden: model::DEFAULT_HEAD_HIDDEN,
            heads: model::DEFAULT_HEADS,
            steps: DEFAULT_STEPS,
            batch: DEFAULT_BATCH,
            learning_rate: DEFAULT_LEARNING_RATE,
            labelled_share: DEFAULT_LABELLED_SHARE,
            action_weight: model::DEFAULT_ACTION_WEIGHT,
            align_weight: model::DEFAULT_ALIGN_WEIGHT,
            shared_variance: SharedVariance::ClosedForm,
            checkpoint_every: DEFAULT_CHECKPOINT_EVERY,
            calib_fraction: DEFAULT_CALIB_FRACTION,
            holdout_fraction: DEFAULT_HOLDOUT_FRACTION,
            split_by: SplitBy::Motion,
            compare: true,
            head_loss: HeadLoss::Faithful,
            posterior_positions: false,
            held_out_sets: Vec::new(),
        }
    }
}

/// Keeps freed tensor buffers inside the process (glibc only; elsewhere a
/// no-op). Training allocates and frees many multi-megabyte buffers per step;
/// glibc serves those with `mmap` by default, and the page faults of zeroing
/// fresh pages cost about as much as the arithmetic (measured on the
/// benchmark in `bench/`: 260 -> 430 pairs/s on 2 threads). Raising the mmap
/// and trim thresholds makes the heap reuse them. Memory stays bounded by the
/// largest working set of one step; it does not grow with the data.
pub fn tune_allocator() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    // SAFETY: mallopt only changes allocator parameters; glibc documents it as
    // thread-safe (MT-Safe) and the values are within the documented ranges.
    unsafe {
        libc::mallopt(libc::M_MMAP_THRESHOLD, 32 << 20);
        libc::mallopt(libc::M_TRIM_THRESHOLD, 1 << 30);
        libc::mallopt(libc::M_TOP_PAD, 64 << 20);
    }
}

impl FitOptions {
    /// The network shape for frames of `width x height` and `action_dims` dimensions.
    pub fn network(&self, width: usize, height: usize, action_dims: usize) -> model::Config {
        model::Config {
            width,
            height,
            latent: self.latent,
            action_dims,
            levels: self.widths.len(),
            widths: self.widths.clone(),
            hidden: self.hidden,
            head_hidden: self.head_hidden,
            heads: self.heads,
            variance: self.shared_variance,
            posterior_flat: self.posterior_positions,
            ..model::Config::default()
        }
    }
}
