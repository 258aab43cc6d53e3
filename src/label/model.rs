//! What the label stage needs from the fit stage, as a small trait.
//!
//! A [`TransitionModel`] maps a batch of frame pairs `(frame t, frame t+1)`
//! to, per transition, the posterior mean of the latent action and each
//! ensemble head's `(mean, log-variance)` in standardised action units
//! (`(a - mean) / std` with the [`Standardisation`] saved by fit).

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

/// The per-dimension standardisation the fit stage applied to actions.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Standardisation {
    /// Action dimension names.
    pub dims: Vec<String>,
    /// Mean per dimension, action units.
    pub mean: Vec<f64>,
    /// Standard deviation per dimension, action units (the labelled std).
    pub std: Vec<f64>,
}

/// Outputs for a batch of `B` transitions.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct TransitionBatch {
    /// Posterior means, `B` rows of `latent` values, flat.
    pub latent: Vec<f32>,
    /// Head means, `[B, heads, dims]` flat, standardised units.
    pub head_mean: Vec<f32>,
    /// Head log-variances, `[B, heads, dims]` flat, standardised units.
    pub head_logvar: Vec<f32>,
}

/// Any failure inside the model.
pub type ModelFailure = Box<dyn std::error::Error + Send + Sync>;

/// A fitted inverse-dynamics model as the label stage uses it.
pub trait TransitionModel: Send + Sync {
    /// Latent size.
    fn latent_dims(&self) -> usize;
    /// Ensemble size.
    fn heads(&self) -> usize;
    /// The action standardisation (also gives the action dimensions).
    fn standardisation(&self) -> &Standardisation;
    /// Infers a batch of `(frame t, frame t+1)` RGB pairs at the decode size
    /// (model-time frames of the align stage's view).
    fn infer(&self, pairs: &[(&[u8], &[u8])]) -> Result<TransitionBatch, ModelFailure>;
}

pub use crate::fit::Split;

/// Split of each labelled clip by `(set, id)`; clips not listed are `train`.
pub type Splits = BTreeMap<(String, String), Split>;

/// What the fit stage hands to label.
pub struct FitOutputs {
    /// The model.
    pub model: Box<dyn TransitionModel>,
    /// The clip splits.
    pub splits: Splits,
}
