//! The adapters between the label stage and its neighbours: the fit stage's
//! [`crate::fit::FittedModel`] as a [`TransitionModel`], its recorded clip
//! splits, and the align stage's per-clip colour normalisation as a
//! [`FramePrep`] (decode-grid frames, normalised as the model saw them).

use std::borrow::Cow;
use std::collections::BTreeMap;
use std::path::Path;

use super::LabelError;
use super::model::{
    FitOutputs, FramePrep, ModelFailure, Splits, Standardisation, TransitionBatch, TransitionModel,
};
use crate::align::color::LabTransform;
use crate::fit::FittedModel;
use crate::store::ClipRecord;

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

/// The align stage's colour normalisation of each clip, applied to decode-grid frames.
pub struct AlignColour {
    maps: BTreeMap<(String, String), LabTransform>,
}

impl AlignColour {
    /// Reads `RUN/align/` (no alignment output: no normalisation).
    pub fn load(run_dir: &Path) -> Self {
        let maps = crate::store::read_json::<crate::align::Alignment>(
            &crate::align::view::alignment_path(run_dir),
        )
        .map(|a| {
            a.clips
                .into_iter()
                .filter_map(|c| c.photometric.map(|p| ((c.set, c.id), p)))
                .collect()
        })
        .unwrap_or_default();
        Self { maps }
    }
}

impl FramePrep for AlignColour {
    fn prepare<'a>(&self, clip: &ClipRecord, _k: usize, rgb: &'a [u8]) -> Cow<'a, [u8]> {
        match self.maps.get(&(clip.set.clone(), clip.id.clone())) {
            Some(map) => {
                let mut v = rgb.to_vec();
                map.apply(&mut v);
                Cow::Owned(v)
            }
            None => Cow::Borrowed(rgb),
        }
    }
}
