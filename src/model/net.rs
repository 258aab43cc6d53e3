//! The variational inverse-dynamics network and its training loss.
//!
//! Shapes (`B` batch, `H x W` frame size, `S` = `cfg.stem`, `L` =
//! `cfg.levels`, `c_j` = `cfg.widths[j-1]`, `s_j = 2^(S+j-1)` the scale of
//! level `j`, `k` = `cfg.latent`, `A` = `cfg.action_dims`, `M` = `cfg.heads`,
//! `r` = `cfg.recon_level`); frames are channels-last, scaled to [-1, 1]:
//!
//! ```text
//! x_t, x_t1            [B, H, W, 3]
//! encoder  (frame t)   f_1 = relu(Dense(s2d^S(x_t)))              [B, H/s_1, W/s_1, c_1]
//!                      f_j = relu(Dense(s2d(f_{j-1})))  j = 2..L  [B, H/s_j, W/s_j, c_j]
//!                      h   = relu(Dense([flatten(f_L), gmax(f_1..f_L)]))  [B, hidden]
//! posterior q(z|t,t+1) same pyramid on [x_t, x_t1, g (x_t1 - x_t)]  [B, H, W, 9], g = DIFF_GAIN
//!                      mu, lv = Dense(g), Dense(g)                [B, k] each
//! prior p(z)           N(0, I)
//! z = mu + exp(lv/2) * eps,  eps ~ N(0, I) given by the caller    [B, k]
//! decoder p(x_t1|x_t,z) u_L = relu(Dense([h, z])) reshaped         [B, H/s_L, W/s_L, c_L]
//!                      j = L..1: u_j = relu(Dense([u_j, f_j]) + Dense_z(z))
//!                                u_{j-1} = d2s(Dense(u_j))   (j > 1)
//!                      x̂_t1 = pool^r(x_t) + d2s^(S-r)(Dense_0(u_1))  (zero-initialised)
//!                                                                 [B, H/2^r, W/2^r, 3]
//! heads m = 0..M-1     (mean_m, lv_m) = Dense(relu(Dense(mu)))    [B, A] each
//! ```
//!
//! `gmax(f_j)` is the maximum of each channel of `f_j` over all positions
//! (global max pooling, `[B, c_j]` per level; only with `cfg.global_max`).
//! The flat `f_L` says where things are; the global maxima say whether a
//! pattern appears anywhere, with weights shared across positions, so a small
//! pattern need not be learnt once per position of the `fc` layer. On the
//! demo they raised holdout dx / dy R^2 from 0.85 / 0.82 to 0.92 / 0.95 (600
//! steps). The gripper state (a few pixels of finger gap) was learnt only
//! with the faithful head loss and more steps (see [`HeadLoss`]).
//! Global pooling is Lin et al. 2014 ("Network in Network"); max rather than
//! mean keeps a small pattern from being averaged away (common practice, no
//! source).
//!
//! `s2d` is space-to-depth (2x2 blocks to channels), `d2s` its inverse and
//! `pool^r` `r` rounds of 2x2 average pooling; the reconstruction target is
//! `pool^r(x_t1)`. With the defaults (`S = 2`, `r = 1`) the widest feature
//! maps are at a quarter of the frame size and the decoder predicts the next
//! frame at half resolution (four sub-pixels per quarter-size cell), which is
//! what makes the network cheap on CPU.
//!
//! Loss per batch (minimised; the first `n_l` rows are labelled transitions,
//! the rest unlabelled):
//!
//! ```text
//! recon_i  = 0.5 D (ln 2pi + ln s2) + 0.5 |x̂_t1,i - pool^r(x_t1,i)|^2 / s2       (D values)
//! kl_i     = KL(q(z|t,t+1) || N(0, I))                       (Kingma & Welling 2014, app. B)
//! action   = (1/M) sum_m (1/n_l) sum_{i<n_l} w_mi sum_a l(a_ia; mean_m(mu_i)_a, lv_m(mu_i)_a)
//!            l = nll (HeadLoss::Nll), or (HeadLoss::Faithful, the default)
//!            l = 0.5 (a - mean)^2 + nll(a; sg(mean), lv_m(sg(mu_i)))   sg = stop-gradient
//! align    = MMD2_u(mu[..n_l], mu[n_l..])                    (Gretton et al. 2012, eq. 3)
//! total    = mean_i(recon_i + kl_i) + action_weight * action + align_weight * align
//! ```
//!
//! `mean_i(recon_i + kl_i)` is the negative ELBO per transition; with the
//! shared variance at its optimum (the MSE) the reconstruction/KL balance
//! needs no hand-set weight. `w_mi` are the integer bootstrap counts of
//! labelled transition `i` in head `m`'s resample (chosen by the caller), so
//! each head sees its own bootstrap resample. The action heads read the
//! posterior mean `mu`, in training as at inference. (Reading the sampled
//! `z` was tried as an information bottleneck, but the KL term is tiny next
//! to the reconstruction NLL, so it bounded nothing and the noise only slowed
//! the heads: on the demo, 300 steps, holdout dx R^2 0.68 -> 0.82 with `mu`.)
//! Clip memorisation is countered by random-shift augmentation of the
//! training pairs instead (`crate::fit` data sampling). The heads' gradient
//! also shapes the posterior (that is what ties `z` to the robot's actions).

use candle_core::{D, Module, Result, Tensor};
use candle_nn::VarBuilder;

use super::layers::{Dense, avg_pool2, depth_to_space, space_to_depth};
use super::losses::{
    Bandwidth, HeadLoss, SharedVariance, head_loss, kl_std_normal, mmd2_unbiased,
    shared_variance_nll,
};
use super::{Config, ModelError};

/// Bounds for the action heads' log-variance (keeps `exp(-lv)` finite).
pub const HEAD_LOGVAR_RANGE: (f64, f64) = (-12.0, 8.0);
/// Gain on the frame difference fed to the posterior. Frame differences are
/// zero almost everywhere and small where the scene moves, so without a gain
/// the motion channels are a small part of the first layer's input next to
/// the two frames; scaling them up is input standardisation (common
/// practice, no source; the value is a round number, not fitted).
pub const DIFF_GAIN: f64 = 4.0;
/// Bounds for the posterior's log-variance.
pub const POSTERIOR_LOGVAR_RANGE: (f64, f64) = (-16.0, 8.0);

/// A pyramid of space-to-depth + dense layers ending in a flat feature vector.
#[derive(Debug, Clone)]
struct Pyramid {
    levels: Vec<Dense>,
    fc: Dense,
    stem: usize,
    global_max: bool,
    flat: bool,
}

impl Pyramid {
    /// `flat`: the flat features include the deepest map (else only the
    /// global maxima, which `cfg.global_max` must then turn on).
    fn new(cfg: &Config, in_channels: usize, flat: bool, vb: VarBuilder) -> Result<Self> {
        let mut levels = Vec::with_capacity(cfg.levels);
        let mut c = in_channels << (2 * cfg.stem);
        for i in 0..cfg.levels {
            let out = cfg.widths[i];
            levels.push(Dense::new(c, out, vb.pp(format!("level{}", i + 1)))?);
            c = 4 * out;
        }
        let (hl, wl) = cfg.deepest_size();
        let pooled: usize = if cfg.global_max {
            cfg.widths[..cfg.levels].iter().sum()
        } else {
            0
        };
        let deepest = if flat {
            hl * wl * cfg.widths[cfg.levels - 1]
        } else {
            0
        };
        let fc = Dense::new(deepest + pooled, cfg.hidden, vb.pp("fc"))?;
        Ok(Self {
            levels,
            fc,
            stem: cfg.stem,
            global_max: cfg.global_max,
            flat,
        })
    }

    /// Returns the feature maps `f_1..f_L` and the flat features `[B, hidden]`.
    fn forward(&self, x: &Tensor) -> Result<(Vec<Tensor>, Tensor)> {
        let mut feats = Vec::with_capacity(self.levels.len());
        let mut f = x.clone();
        for _ in 0..self.stem {
            f = space_to_depth(&f)?;
        }
        for (j, layer) in self.levels.iter().enumerate() {
            if j > 0 {
                f = space_to_depth(&f)?;
            }
            f = layer.forward(&f)?.relu()?;
            feats.push(f.clone());
        }
        let b = x.dim(0)?;
        let flat = if self.global_max {
            let mut parts = Vec::with_capacity(feats.len() + 1);
            if self.flat {
                parts.push(f.reshape((b, ()))?);
            }
            for fj in &feats {
                let c = fj.dim(3)?;
                parts.push(fj.reshape((b, (), c))?.max(1)?);
            }
            Tensor::cat(&parts, 1)?
        } else {
            f.reshape((b, ()))?
        };
        let h = self.fc.forward(&flat)?.relu()?;
        Ok((feats, h))
    }
}

/// The frame encoder: features of frame t for the decoder.
#[derive(Debug, Clone)]
pub struct FrameEncoder {
    pyramid: Pyramid,
}

/// The posterior network q(z | frame t, frame t+1).
#[derive(Debug, Clone)]
pub struct Posterior {
    pyramid: Pyramid,
    mu: Dense,
    logvar: Dense,
}

impl Posterior {
    /// `(mu, logvar)`, each `[B, latent]`, from frames `[B, H, W, 3]` in [-1, 1].
    pub fn forward(&self, x_t: &Tensor, x_t1: &Tensor) -> Result<(Tensor, Tensor)> {
        let diff = ((x_t1 - x_t)? * DIFF_GAIN)?;
        let input = Tensor::cat(&[x_t, x_t1, &diff], 3)?;
        let (_, g) = self.pyramid.forward(&input)?;
        let mu = self.mu.forward(&g)?;
        let (lo, hi) = POSTERIOR_LOGVAR_RANGE;
        let lv = self.logvar.forward(&g)?.clamp(lo, hi)?;
        Ok((mu, lv))
    }
}

/// The forward decoder p(frame t+1 | frame t, z).
#[derive(Debug, Clone)]
pub struct Decoder {
    top: Dense,
    /// Per level, from deepest (`L`) to `r`: merge, latent projection, and
    /// (except at `r`) the upsampling layer.
    merge: Vec<Dense>,
    from_z: Vec<Dense>,
    up: Vec<Dense>,
    out: Dense,
    log_var: Option<Tensor>,
}

/// One action head: `z -> (mean, logvar)` in standardised action units.
#[derive(Debug, Clone)]
pub struct ActionHead {
    fc1: Dense,
    fc2: Dense,
    dims: usize,
}

impl ActionHead {
    /// `(mean, logvar)`, each `[B, A]`, from posterior means `[B, latent]`.
    pub fn forward(&self, z: &Tensor) -> Result<(Tensor, Tensor)> {
        let out = self.fc2.forward(&self.fc1.forward(z)?.relu()?)?;
        let mean = out.narrow(D::Minus1, 0, self.dims)?;
        let (lo, hi) = HEAD_LOGVAR_RANGE;
        let lv = out.narrow(D::Minus1, self.dims, self.dims)?.clamp(lo, hi)?;
        Ok((mean, lv))
    }
}

/// The whole model. Parameter names (safetensors keys) start with
/// `encoder.`, `posterior.`, `decoder.` and `heads.<m>.`.
#[derive(Debug, Clone)]
pub struct Net {
    cfg: Config,
    encoder: FrameEncoder,
    posterior: Posterior,
    decoder: Decoder,
    heads: Vec<ActionHead>,
}

/// One training batch. Rows `0..n_labelled` are labelled transitions, the
/// rest unlabelled.
#[derive(Debug, Clone)]
pub struct Batch {
    /// Frame t, `[B, H, W, 3]` in [-1, 1].
    pub x_t: Tensor,
    /// Frame t+1, `[B, H, W, 3]` in [-1, 1].
    pub x_t1: Tensor,
    /// How many leading rows are labelled.
    pub n_labelled: usize,
    /// Standardised actions of the labelled rows, `[n_labelled, A]`.
    pub actions: Option<Tensor>,
    /// Bootstrap counts `[M, n_labelled]` (all ones when `None`).
    pub boot: Option<Tensor>,
    /// Reparameterisation noise `[B, latent]`, standard normal.
    pub eps: Tensor,
}

/// Weights and options of the loss terms (training settings, not network shape).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LossOptions {
    /// Weight of the action NLL.
    pub action_weight: f64,
    /// Weight of the MMD^2 alignment penalty (0 turns it off).
    pub align_weight: f64,
    /// MMD kernel bandwidth.
    pub bandwidth: Bandwidth,
    /// How the action heads are trained.
    pub head_loss: HeadLoss,
}

impl Default for LossOptions {
    fn default() -> Self {
        Self {
            action_weight: super::DEFAULT_ACTION_WEIGHT,
            align_weight: super::DEFAULT_ALIGN_WEIGHT,
            bandwidth: Bandwidth::Median,
            head_loss: HeadLoss::Faithful,
        }
    }
}

/// The loss and its parts, each a scalar tensor (all part of the graph).
#[derive(Debug, Clone)]
pub struct LossParts {
    /// What is minimised.
    pub total: Tensor,
    /// Mean reconstruction NLL per transition (nats).
    pub recon: Tensor,
    /// Mean KL per transition (nats).
    pub kl: Tensor,
    /// Mean bootstrap-weighted action NLL over heads (0 without labelled rows).
    pub action: Tensor,
    /// MMD^2 between labelled and unlabelled posterior means (0 when off).
    pub align: Tensor,
    /// The decoder's shared variance `s2`.
    pub variance: Tensor,
    /// Kernel bandwidth used for the alignment term (NaN when off).
    pub sigma: f64,
}

impl Net {
    /// Builds the network, creating or fetching its parameters through `vb`.
    pub fn new(cfg: &Config, vb: VarBuilder) -> std::result::Result<Self, ModelError> {
        cfg.validate()?;
        let encoder = FrameEncoder {
            pyramid: Pyramid::new(cfg, 3, true, vb.pp("encoder"))?,
        };
        let pvb = vb.pp("posterior");
        let posterior = Posterior {
            pyramid: Pyramid::new(cfg, 9, cfg.posterior_flat, pvb.pp("pyramid"))?,
            mu: Dense::new(cfg.hidden, cfg.latent, pvb.pp("mu"))?,
            logvar: Dense::new(cfg.hidden, cfg.latent, pvb.pp("logvar"))?,
        };
        let decoder = Self::build_decoder(cfg, vb.pp("decoder"))?;
        let heads = (0..cfg.heads)
            .map(|m| {
                let hvb = vb.pp("heads").pp(m);
                Ok(ActionHead {
                    fc1: Dense::new(cfg.latent, cfg.head_hidden, hvb.pp("fc1"))?,
                    fc2: Dense::new(cfg.head_hidden, 2 * cfg.action_dims, hvb.pp("fc2"))?,
                    dims: cfg.action_dims,
                })
            })
            .collect::<Result<Vec<_>>>()?;
        Ok(Self {
            cfg: cfg.clone(),
            encoder,
            posterior,
            decoder,
            heads,
        })
    }

    fn build_decoder(cfg: &Config, vb: VarBuilder) -> Result<Decoder> {
        let l = cfg.levels;
        let (hl, wl) = cfg.deepest_size();
        let top = Dense::new(
            cfg.hidden + cfg.latent,
            hl * wl * cfg.widths[l - 1],
            vb.pp("top"),
        )?;
        let c = |j: usize| cfg.widths[j - 1];
        let (mut merge, mut from_z, mut up) = (Vec::new(), Vec::new(), Vec::new());
        for j in (1..=l).rev() {
            merge.push(Dense::new(2 * c(j), c(j), vb.pp(format!("merge{j}")))?);
            from_z.push(Dense::new(cfg.latent, c(j), vb.pp(format!("z{j}")))?);
            if j > 1 {
                up.push(Dense::new(c(j), 4 * c(j - 1), vb.pp(format!("up{j}")))?);
            }
        }
        let sub = 1usize << (2 * (cfg.stem - cfg.recon_level));
        let out = Dense::zeros(c(1), 3 * sub, vb.pp("out"))?;
        let log_var = match cfg.variance {
            SharedVariance::Learned => Some(vb.get_with_hints(
                1,
                "log_var",
                candle_nn::Init::Const(super::INITIAL_LOG_VARIANCE),
            )?),
            SharedVariance::ClosedForm => None,
        };
        Ok(Decoder {
            top,
            merge,
            from_z,
            up,
            out,
            log_var,
        })
    }

    /// The configuration the network was built with.
    pub fn config(&self) -> &Config {
        &self.cfg
    }

    /// The posterior network.
    pub fn posterior(&self) -> &Posterior {
        &self.posterior
    }

    /// The action heads.
    pub fn heads(&self) -> &[ActionHead] {
        &self.heads
    }

    fn check_frames(&self, x: &Tensor) -> Result<()> {
        let (_, h, w, c) = x.dims4()?;
        if (h, w, c) != (self.cfg.height, self.cfg.width, 3) {
            candle_core::bail!(
                "frames are {w}x{h}x{c}, the network takes {}x{}x3",
                self.cfg.width,
                self.cfg.height
            );
        }
        Ok(())
    }

    /// Predicted next frame `[B, H/2^r, W/2^r, 3]` from frame t and latents `z` `[B, k]`.
    pub fn decode(&self, x_t: &Tensor, z: &Tensor) -> Result<Tensor> {
        self.check_frames(x_t)?;
        let (feats, h) = self.encoder.pyramid.forward(x_t)?;
        let dec = &self.decoder;
        let l = self.cfg.levels;
        let (hl, wl) = self.cfg.deepest_size();
        let b = x_t.dim(0)?;
        let top = dec.top.forward(&Tensor::cat(&[&h, z], 1)?)?.relu()?;
        let mut u = top.reshape((b, hl, wl, self.cfg.widths[l - 1]))?;
        for (step, j) in (1..=l).rev().enumerate() {
            let zb = dec.from_z[step].forward(z)?.unsqueeze(1)?.unsqueeze(1)?;
            u = dec.merge[step]
                .forward(&Tensor::cat(&[&u, &feats[j - 1]], 3)?)?
                .broadcast_add(&zb)?
                .relu()?;
            if j > 1 {
                u = depth_to_space(&dec.up[step].forward(&u)?)?;
            }
        }
        let mut delta = dec.out.forward(&u)?;
        for _ in self.cfg.recon_level..self.cfg.stem {
            delta = depth_to_space(&delta)?;
        }
        self.target(x_t)? + delta
    }

    /// The reconstruction target for frame t+1: `pool^r(x_t1)`.
    pub fn target(&self, x_t1: &Tensor) -> Result<Tensor> {
        let mut t = x_t1.clone();
        for _ in 0..self.cfg.recon_level {
            t = avg_pool2(&t)?;
        }
        Ok(t)
    }

    /// The training loss of one batch (see the module docs for the maths).
    pub fn loss(&self, batch: &Batch, opts: &LossOptions) -> Result<LossParts> {
        self.check_frames(&batch.x_t)?;
        self.check_frames(&batch.x_t1)?;
        let b = batch.x_t.dim(0)?;
        let n_l = batch.n_labelled;
        if n_l > b {
            candle_core::bail!("batch has {b} rows but {n_l} labelled");
        }
        let (mu, lv) = self.posterior.forward(&batch.x_t, &batch.x_t1)?;
        let z = (&mu + (&lv * 0.5)?.exp()?.mul(&batch.eps)?)?;
        let pred = self.decode(&batch.x_t, &z)?;
        let target = self.target(&batch.x_t1)?;
        let (recon_i, variance) =
            shared_variance_nll(&pred, &target, self.decoder.log_var.as_ref())?;
        let recon = recon_i.mean_all()?;
        let kl = kl_std_normal(&mu, &lv)?.mean_all()?;
        let zero = || Tensor::zeros((), mu.dtype(), mu.device());
        let action = match (&batch.actions, n_l) {
            (Some(a), n) if n > 0 => {
                // Heads read the posterior mean, as at inference (see the
                // module docs for why not the sampled latent).
                let mu_l = mu.narrow(0, 0, n)?;
                let mu_d = mu_l.detach();
                let mut sum = zero()?;
                for (m, head) in self.heads.iter().enumerate() {
                    let (mean, hlv) = head.forward(&mu_l)?;
                    let hlv_d = match opts.head_loss {
                        HeadLoss::Faithful => head.forward(&mu_d)?.1,
                        HeadLoss::Nll => hlv.clone(),
                    };
                    let nll = head_loss(opts.head_loss, a, &mean, &hlv, &hlv_d)?.sum(1)?; // [n]
                    let nll = match &batch.boot {
                        Some(w) => (nll * w.get(m)?)?,
                        None => nll,
                    };
                    sum = (sum + (nll.sum_all()? / n as f64)?)?;
                }
                (sum / self.heads.len() as f64)?
            }
            _ => zero()?,
        };
        let n_u = b - n_l;
        let (align, sigma) = if opts.align_weight != 0.0 && n_l >= 2 && n_u >= 2 {
            mmd2_unbiased(
                &mu.narrow(0, 0, n_l)?,
                &mu.narrow(0, n_l, n_u)?,
                opts.bandwidth,
            )?
        } else {
            (zero()?, f64::NAN)
        };
        let total =
            (((&recon + &kl)? + (&action * opts.action_weight)?)? + (&align * opts.align_weight)?)?;
        Ok(LossParts {
            total,
            recon,
            kl,
            action,
            align,
            variance,
            sigma,
        })
    }

    /// Inference: posterior `(mu, logvar)` and every head's `(mean, logvar)`
    /// (standardised units, heads reading `mu`) for frame pairs in [-1, 1].
    pub fn infer(&self, x_t: &Tensor, x_t1: &Tensor) -> Result<Inference> {
        self.check_frames(x_t)?;
        self.check_frames(x_t1)?;
        let (mu, logvar) = self.posterior.forward(x_t, x_t1)?;
        let heads = self
            .heads
            .iter()
            .map(|h| h.forward(&mu))
            .collect::<Result<Vec<_>>>()?;
        Ok(Inference { mu, logvar, heads })
    }
}

/// What [`Net::infer`] returns.
#[derive(Debug, Clone)]
pub struct Inference {
    /// Posterior means `[B, latent]`.
    pub mu: Tensor,
    /// Posterior log-variances `[B, latent]`.
    pub logvar: Tensor,
    /// Per head `(mean, logvar)`, each `[B, A]`, standardised action units.
    pub heads: Vec<(Tensor, Tensor)>,
}

/// Converts RGB bytes (`n` frames of `H x W x 3`, concatenated) into a
/// `[n, H, W, 3]` tensor scaled to [-1, 1] (`v / 127.5 - 1`).
pub fn frames_to_tensor(
    bytes: Vec<u8>,
    n: usize,
    height: usize,
    width: usize,
    dtype: candle_core::DType,
    device: &candle_core::Device,
) -> Result<Tensor> {
    let t = Tensor::from_vec(bytes, (n, height, width, 3), device)?;
    t.to_dtype(dtype)?.affine(1.0 / 127.5, -1.0)
}
