//! A fitted model as later stages use it: `RUN/fit/model.json` (network
//! shape, action standardisation, splits) plus `RUN/fit/<name>.safetensors`
//! (parameters), loaded by [`FittedModel::load`], with batched inference.
//!
//! ```ignore
//! let model = FittedModel::load(&run_dir.join("fit"))?;      // the semi-supervised model
//! let out = model.infer(&frames_t, &frames_t1, n)?;          // RGB8 bytes, n pairs
//! out.posterior_mean;                                        // [n * latent], row-major
//! out.heads[m].mean / .logvar;                               // [n * A], standardised units
//! model.info().standardisation.unapply_mean(d, v);           // back to action units
//! let (mean, std) = model.predict_clip(clip)?;               // ensemble, action units, model time
//! ```

use std::path::{Path, PathBuf};

use candle_core::{DType, Device};
use candle_nn::VarMap;
use serde::{Deserialize, Serialize};

use super::FitError;
use super::checkpoint::{self, Identity};
use super::data::{Split, Standardisation};
use crate::align::AlignedClip;
use crate::model::{self, Net};

/// File name of the model description in `RUN/fit/`.
pub const MODEL_FILE: &str = "model.json";
/// Name of the semi-supervised model.
pub const SEMI: &str = "semi";
/// Name of the labelled-only comparison model.
pub const LABELLED_ONLY: &str = "labelled-only";
/// Frame pairs per inference batch.
pub const INFER_BATCH: usize = 128;

/// One clip's split, as recorded in `model.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ClipSplit {
    /// Set name.
    pub set: String,
    /// Clip id.
    pub id: String,
    /// Its split.
    pub split: Split,
}

/// `RUN/fit/model.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelInfo {
    /// Network shape.
    pub network: model::Config,
    /// Hash of the network shape.
    pub network_hash: String,
    /// Hash of the settings and inputs the models were trained with.
    pub settings_hash: String,
    /// Action standardisation (labelled train statistics).
    pub standardisation: Standardisation,
    /// Models trained (`semi`, `labelled-only`).
    pub models: Vec<String>,
    /// Every clip's split.
    pub splits: Vec<ClipSplit>,
}

impl ModelInfo {
    /// The identity the named model's file was written with.
    pub fn identity(&self, name: &str) -> Identity {
        Identity {
            settings: model_settings_hash(&self.settings_hash, name),
            network: self.network_hash.clone(),
        }
    }

    /// The split of clip `id` of `set` (unknown clips: `None`).
    pub fn split_of(&self, set: &str, id: &str) -> Option<Split> {
        self.splits
            .iter()
            .find(|c| c.set == set && c.id == id)
            .map(|c| c.split)
    }
}

/// The settings hash recorded in a model's files (stage key + model name).
pub fn model_settings_hash(stage: &str, name: &str) -> String {
    crate::util::sha256_json(&(stage, name))
}

/// Hash of a network configuration.
pub fn network_hash(cfg: &model::Config) -> String {
    crate::util::sha256_json(cfg)
}

/// One head's output for a batch, row-major, standardised units.
#[derive(Debug, Clone, PartialEq)]
pub struct HeadOutput {
    /// Means `[n * A]`.
    pub mean: Vec<f32>,
    /// Log-variances `[n * A]`.
    pub logvar: Vec<f32>,
}

/// What [`FittedModel::infer`] returns.
#[derive(Debug, Clone, PartialEq)]
pub struct InferOutput {
    /// Pairs.
    pub n: usize,
    /// Posterior means `[n * latent]`, row-major.
    pub posterior_mean: Vec<f32>,
    /// One entry per ensemble head.
    pub heads: Vec<HeadOutput>,
}

/// A loaded (or just trained) model.
pub struct FittedModel {
    info: ModelInfo,
    net: Net,
    _map: VarMap,
}

impl FittedModel {
    /// Loads the semi-supervised model from a fit folder (`RUN/fit`).
    pub fn load(fit_dir: &Path) -> Result<Self, FitError> {
        Self::load_named(fit_dir, SEMI)
    }

    /// Loads the named model (`semi` or `labelled-only`) from a fit folder.
    pub fn load_named(fit_dir: &Path, name: &str) -> Result<Self, FitError> {
        let info_path = fit_dir.join(MODEL_FILE);
        let info: ModelInfo =
            crate::store::read_json(&info_path).map_err(FitError::io(&info_path))?;
        if network_hash(&info.network) != info.network_hash {
            return Err(FitError::Corrupt {
                path: info_path,
                reason: "network hash does not match the recorded network".into(),
            });
        }
        let map = VarMap::new();
        let vb = candle_nn::VarBuilder::from_varmap(&map, DType::F32, &Device::Cpu);
        let net = Net::new(&info.network, vb)?;
        let vars = checkpoint::sorted_vars(&map);
        let path: PathBuf = super::train::model_path(fit_dir, name);
        checkpoint::load_model(&path, &info.identity(name), &vars)?;
        Ok(Self {
            info,
            net,
            _map: map,
        })
    }

    /// Wraps a network trained in this process.
    pub(crate) fn from_parts(info: ModelInfo, net: Net, map: VarMap) -> Self {
        Self {
            info,
            net,
            _map: map,
        }
    }

    /// The model description.
    pub fn info(&self) -> &ModelInfo {
        &self.info
    }

    /// Inference on `n` frame pairs given as concatenated RGB8 frames of the
    /// network's size. Run it inside a rayon pool to bound its threads.
    pub fn infer(
        &self,
        frames_t: &[u8],
        frames_t1: &[u8],
        n: usize,
    ) -> Result<InferOutput, FitError> {
        let cfg = &self.info.network;
        let fb = cfg.width * cfg.height * 3;
        if frames_t.len() != n * fb || frames_t1.len() != n * fb {
            return Err(FitError::NoData {
                what: "frames of the network's size (infer got a wrong byte count)",
            });
        }
        let dev = Device::Cpu;
        let x_t = model::frames_to_tensor(
            frames_t.to_vec(),
            n,
            cfg.height,
            cfg.width,
            DType::F32,
            &dev,
        )?;
        let x_t1 = model::frames_to_tensor(
            frames_t1.to_vec(),
            n,
            cfg.height,
            cfg.width,
            DType::F32,
            &dev,
        )?;
        let out = self.net.infer(&x_t, &x_t1)?;
        let flat = |t: &candle_core::Tensor| -> Result<Vec<f32>, FitError> {
            Ok(t.flatten_all()?.to_vec1()?)
        };
        Ok(InferOutput {
            n,
            posterior_mean: flat(&out.mu)?,
            heads: out
                .heads
                .iter()
                .map(|(m, lv)| {
                    Ok(HeadOutput {
                        mean: flat(m)?,
                        logvar: flat(lv)?,
                    })
                })
                .collect::<Result<Vec<_>, FitError>>()?,
        })
    }

    /// Ensemble prediction for every model-time transition of `clip`, in
    /// action units: the mean of the heads' means, and the standard deviation
    /// of the mixture (mean of the heads' variances, aleatoric, plus the
    /// variance of their means, epistemic).
    pub fn predict_clip(
        &self,
        clip: &AlignedClip,
    ) -> Result<(Vec<Vec<f32>>, Vec<Vec<f32>>), FitError> {
        let t = clip.len().saturating_sub(1);
        let fb = clip.frame_bytes();
        let a = self.info.standardisation.dims.len();
        let s = &self.info.standardisation;
        let (mut means, mut stds) = (Vec::with_capacity(t), Vec::with_capacity(t));
        let mut frame = vec![0u8; fb];
        let mut start = 0;
        while start < t {
            let n = INFER_BATCH.min(t - start);
            // Frames start..=start+n, each read once.
            let mut frames = Vec::with_capacity((n + 1) * fb);
            for i in start..=start + n {
                clip.frame(i, &mut frame)?;
                frames.extend_from_slice(&frame);
            }
            let out = self.infer(&frames[..n * fb], &frames[fb..], n)?;
            let heads = out.heads.len() as f64;
            for r in 0..n {
                let (mut mrow, mut srow) = (Vec::with_capacity(a), Vec::with_capacity(a));
                for d in 0..a {
                    let i = r * a + d;
                    let mu: f64 =
                        out.heads.iter().map(|h| f64::from(h.mean[i])).sum::<f64>() / heads;
                    let alea: f64 = out
                        .heads
                        .iter()
                        .map(|h| f64::from(h.logvar[i]).exp())
                        .sum::<f64>()
                        / heads;
                    let epi: f64 = out
                        .heads
                        .iter()
                        .map(|h| (f64::from(h.mean[i]) - mu).powi(2))
                        .sum::<f64>()
                        / heads;
                    mrow.push(s.unapply_mean(d, mu) as f32);
                    srow.push(s.unapply_var(d, alea + epi).sqrt() as f32);
                }
                means.push(mrow);
                stds.push(srow);
            }
            start += n;
        }
        Ok((means, stds))
    }
}
