//! Candle networks and losses of the fit stage (no I/O).
//!
//! A semi-supervised variational inverse-dynamics model: a frame encoder, a
//! diagonal-Gaussian posterior q(z | frame t, frame t+1) over a latent action,
//! a standard-normal prior, a forward decoder p(frame t+1 | frame t, z) with a
//! Gaussian likelihood of one shared variance, an ensemble of action heads
//! z -> (mean, log-variance) trained on bootstrap resamples of the labelled
//! transitions, and an MMD^2 penalty aligning the labelled and unlabelled
//! domains' posterior means. [`net`] holds the maths and tensor shapes,
//! [`losses`] the loss terms, [`layers`] the GEMM-only building blocks.
//!
//! Threads: candle's CPU kernels run on the *current* rayon pool (its matrix
//! products go through `gemm` with `Parallelism::Rayon`, which splits work
//! into `candle_core::utils::get_num_threads()` tasks, i.e. `RAYON_NUM_THREADS`
//! or the physical core count, and runs them with `par_iter`; its convolution
//! and reduction kernels use `par_iter` too). So calling the model inside
//! `pool.install(..)` of a pool built with `crate::util::thread_pool(n)`
//! bounds it to `n` threads; elementwise ops are single-threaded.

pub mod init;
pub mod layers;
pub mod losses;
pub mod net;
pub mod optim;
pub mod rng;

pub use init::SeededInit;
pub use losses::{Bandwidth, HeadLoss, SharedVariance};
pub use net::{Batch, Inference, LossOptions, LossParts, Net, frames_to_tensor};
pub use optim::{AdamW, AdamWParams};
pub use rng::Rng;

use serde::{Deserialize, Serialize};

/// Default latent size.
pub const DEFAULT_LATENT: usize = 8;
/// Default stem: 2x2 space-to-depth steps before the first dense level (2 = 4x4 patches).
pub const DEFAULT_STEM: usize = 2;
/// Default widths of the pyramid levels (channels of each level's feature map).
pub const DEFAULT_WIDTHS: [usize; 3] = [64, 64, 64];
/// Default width of the flat feature vector.
pub const DEFAULT_HIDDEN: usize = 128;
/// Default hidden width of each action head.
pub const DEFAULT_HEAD_HIDDEN: usize = 64;
/// Default ensemble size.
pub const DEFAULT_HEADS: usize = 5;
/// Default reconstruction level: 1 = predict the next frame at half resolution.
pub const DEFAULT_RECON_LEVEL: usize = 1;
/// Default weight of the action NLL in the loss.
pub const DEFAULT_ACTION_WEIGHT: f64 = 100.0;
/// Default weight of the MMD^2 alignment penalty.
pub const DEFAULT_ALIGN_WEIGHT: f64 = 100.0;
/// Initial `ln s2` of a learned shared variance (s2 = 0.01 for pixels in [-1, 1]).
pub const INITIAL_LOG_VARIANCE: f64 = -4.605_170_185_988_091;

/// The network's shape. Two networks with equal configs have the same
/// parameter names and shapes.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Config {
    /// Frame width in pixels (divisible by `2^(stem + levels - 1)`).
    pub width: usize,
    /// Frame height in pixels (divisible by `2^(stem + levels - 1)`).
    pub height: usize,
    /// Latent action size `k`.
    pub latent: usize,
    /// Action dimensions `A`.
    pub action_dims: usize,
    /// Space-to-depth steps before the first level (`S`; level 1 sees `2^S x 2^S` patches).
    pub stem: usize,
    /// Number of dense pyramid levels `L` (each after the first halves the size).
    pub levels: usize,
    /// Channels after each level (`levels` entries).
    pub widths: Vec<usize>,
    /// Width of the flat feature vector.
    pub hidden: usize,
    /// Hidden width of each action head.
    pub head_hidden: usize,
    /// Ensemble size `M`.
    pub heads: usize,
    /// Resolution of the reconstruction: 2x2 poolings of the frame (0 = full, 1 = half; at most `stem`).
    pub recon_level: usize,
    /// How the decoder's shared variance is obtained.
    pub variance: SharedVariance,
    /// Append each level's global spatial maximum to the flat features (see
    /// [`net`]); `false` in files written before the option existed.
    #[serde(default)]
    pub global_max: bool,
    /// Feed the posterior's flat features the deepest map as well as the
    /// global maxima (see [`net`]); `true` in files written before the option
    /// existed. `false` makes the posterior blind to where things are (it
    /// needs `global_max`).
    #[serde(default = "yes")]
    pub posterior_flat: bool,
}

fn yes() -> bool {
    true
}

impl Default for Config {
    fn default() -> Self {
        Self {
            width: 64,
            height: 64,
            latent: DEFAULT_LATENT,
            action_dims: 3,
            stem: DEFAULT_STEM,
            levels: DEFAULT_WIDTHS.len(),
            widths: DEFAULT_WIDTHS.to_vec(),
            hidden: DEFAULT_HIDDEN,
            head_hidden: DEFAULT_HEAD_HIDDEN,
            heads: DEFAULT_HEADS,
            recon_level: DEFAULT_RECON_LEVEL,
            variance: SharedVariance::ClosedForm,
            global_max: true,
            posterior_flat: true,
        }
    }
}

/// A network configuration that cannot be built.
#[derive(Debug, thiserror::Error)]
pub enum ModelError {
    /// The frame size is not divisible by the pyramid's total downsampling.
    #[error(
        "frame size {width}x{height} is not divisible by {factor}, the network's downsampling factor"
    )]
    FrameSize {
        /// Width.
        width: usize,
        /// Height.
        height: usize,
        /// `2^(stem + levels - 1)`.
        factor: usize,
    },
    /// `widths` does not have one entry per level.
    #[error("{widths} pyramid widths given for {levels} levels")]
    Widths {
        /// Entries given.
        widths: usize,
        /// Levels.
        levels: usize,
    },
    /// A size that must be positive is zero.
    #[error("network setting `{name}` must be at least 1")]
    Zero {
        /// The setting.
        name: &'static str,
    },
    /// The reconstruction is coarser than the first feature map.
    #[error("reconstruction level {recon_level} is coarser than the stem ({stem} steps)")]
    ReconLevel {
        /// Given level.
        recon_level: usize,
        /// Stem steps.
        stem: usize,
    },
    /// The posterior would have no features.
    #[error("a posterior without the deepest map (posterior_flat = false) needs global_max")]
    NoPosteriorFeatures,
    /// A candle error while building or running the network.
    #[error(transparent)]
    Candle(#[from] candle_core::Error),
}

impl Config {
    /// Checks that the network can be built.
    pub fn validate(&self) -> Result<(), ModelError> {
        for (name, v) in [
            ("latent", self.latent),
            ("action_dims", self.action_dims),
            ("levels", self.levels),
            ("hidden", self.hidden),
            ("head_hidden", self.head_hidden),
            ("heads", self.heads),
        ] {
            if v == 0 {
                return Err(ModelError::Zero { name });
            }
        }
        if self.widths.len() != self.levels {
            return Err(ModelError::Widths {
                widths: self.widths.len(),
                levels: self.levels,
            });
        }
        if self.widths.contains(&0) {
            return Err(ModelError::Zero { name: "widths" });
        }
        let factor = 1usize << (self.stem + self.levels - 1).min(24);
        if self.width == 0
            || self.height == 0
            || self.width % factor != 0
            || self.height % factor != 0
        {
            return Err(ModelError::FrameSize {
                width: self.width,
                height: self.height,
                factor,
            });
        }
        if !self.posterior_flat && !self.global_max {
            return Err(ModelError::NoPosteriorFeatures);
        }
        if self.recon_level > self.stem {
            return Err(ModelError::ReconLevel {
                recon_level: self.recon_level,
                stem: self.stem,
            });
        }
        Ok(())
    }

    /// Size `(H / 2^(S+L-1), W / 2^(S+L-1))` of the deepest feature map.
    pub fn deepest_size(&self) -> (usize, usize) {
        let s = self.stem + self.levels - 1;
        (self.height >> s, self.width >> s)
    }

    /// Size `(H / 2^r, W / 2^r)` of the reconstructed frame.
    pub fn recon_size(&self) -> (usize, usize) {
        (
            self.height >> self.recon_level,
            self.width >> self.recon_level,
        )
    }
}

#[cfg(test)]
mod tests;
