//! The adapter between the label stage and the fit stage: the fit stage's
//! [`crate::fit::FittedModel`] as a [`TransitionModel`] and its recorded clip
//! splits. (Frames reach the model through the align stage's view, see
//! [`super::stage`].)

use std::path::Path;

use super::LabelError;
use super::model::{
    FitOutputs, ModelFailure, Splits, Standardisation, TransitionBatch, TransitionModel,
};
use crate::fit::FittedModel;

/// The fit stage's semi-supervised model.
pub struct FitModel {
    model: FittedModel,
    st: Standardisation,
}

impl TransitionModel for FitModel {
    fn latent_dims(&self) -> usize {
        self.model.info().network.latent
    }
    fn heads(&self) -> usize {
        self.model.info().network.heads
    }
    fn standardisation(&self) -> &Standardisation {
        &self.st
    }
    fn infer(&self, pairs: &[(&[u8], &[u8])]) -> Result<TransitionBatch, ModelFailure> {
        let n = pairs.len();
        let a = self.st.dims.len();
        let m = self.heads();
        let fb = pairs.first().map_or(0, |p| p.0.len());
        let mut xt = Vec::with_capacity(n * fb);
        let mut xt1 = Vec::with_capacity(n * fb);
        for (x, y) in pairs {
            xt.extend_from_slice(x);
            xt1.extend_from_slice(y);
        }
        let out = self.model.infer(&xt, &xt1, n)?;
        let mut b = TransitionBatch {
            latent: out.posterior_mean,
            head_mean: Vec::with_capacity(n * m * a),
            head_logvar: Vec::with_capacity(n * m * a),
        };
        for i in 0..n {
            for h in &out.heads {
                b.head_mean.extend_from_slice(&h.mean[i * a..(i + 1) * a]);
                b.head_logvar
                    .extend_from_slice(&h.logvar[i * a..(i + 1) * a]);
            }
        }
        Ok(b)
    }
}

/// Loads `RUN/fit/` (model and splits).
pub fn load_fit_outputs(run_dir: &Path) -> Result<FitOutputs, LabelError> {
    let dir = run_dir.join("fit");
    let model = FittedModel::load(&dir).map_err(|e| LabelError::FitUnavailable {
        dir: dir.clone(),
        reason: e.to_string(),
    })?;
    let info = model.info();
    let st = Standardisation {
        dims: info.standardisation.dims.clone(),
        mean: info.standardisation.mean.clone(),
        std: info.standardisation.std.clone(),
    };
    let splits: Splits = info
        .splits
        .iter()
        .map(|c| ((c.set.clone(), c.id.clone()), c.split))
        .collect();
    Ok(FitOutputs {
        model: Box::new(FitModel { model, st }),
        splits,
    })
}
