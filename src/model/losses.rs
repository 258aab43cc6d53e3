//! The loss terms of the variational inverse-dynamics model, as tensor
//! functions (differentiable through candle's autograd, any float dtype).
//!
//! Maths (all logs natural, `lv` a log-variance):
//!
//! - Gaussian negative log-likelihood, elementwise:
//!   `nll(x; mu, lv) = 0.5 * (ln 2pi + lv + (x - mu)^2 / exp(lv))`.
//! - KL between diagonal Gaussians, summed over the last dimension:
//!   `KL(N(m1, e^l1) || N(m2, e^l2)) = 0.5 * sum(l2 - l1 + (e^l1 + (m1 - m2)^2) / e^l2 - 1)`;
//!   against the standard normal prior this is
//!   `0.5 * sum(mu^2 + e^lv - 1 - lv)` (Kingma & Welling 2014, "Auto-Encoding
//!   Variational Bayes", appendix B).
//! - Shared-variance Gaussian reconstruction NLL of one example with `D`
//!   values and squared error `sse`:
//!   `0.5 * D * (ln 2pi + ln s2) + 0.5 * sse / s2`. Its maximiser over `s2` is
//!   the mean squared error, `s2* = sum(sse) / (B * D)` over a batch of `B`
//!   (the textbook Gaussian maximum-likelihood variance); [`SharedVariance`]
//!   chooses between that closed form and a learned `ln s2`.
//! - Unbiased squared maximum mean discrepancy (Gretton et al. 2012, "A Kernel
//!   Two-Sample Test", JMLR 13, eq. 3), samples `x` (m rows) and `y` (n rows):
//!   `MMD2_u = 1/(m(m-1)) sum_{i!=j} k(x_i,x_j) + 1/(n(n-1)) sum_{i!=j} k(y_i,y_j)
//!   - 2/(mn) sum_{i,j} k(x_i,y_j)`, Gaussian kernel
//!   `k(a,b) = exp(-|a-b|^2 / (2 sigma^2))`. Median heuristic (Gretton et al.
//!   2012, section 8): `sigma` = the median distance between distinct points of
//!   the pooled sample, computed from the values and treated as a constant
//!   (no gradient through the bandwidth, common practice, no source).

use candle_core::{D, DType, Result, Tensor};

/// `ln(2 pi)`.
pub const LN_2PI: f64 = 1.837_877_066_409_345_5;

/// Smallest shared variance the closed form returns (keeps `ln s2` finite
/// when a batch is reconstructed exactly).
pub const MIN_SHARED_VARIANCE: f64 = 1e-6;

/// Elementwise Gaussian NLL `0.5 (ln 2pi + lv + (x-mu)^2 e^-lv)`; same shape as `x`.
pub fn gaussian_nll(x: &Tensor, mean: &Tensor, logvar: &Tensor) -> Result<Tensor> {
    let sq = (x - mean)?.sqr()?;
    let scaled = (sq * logvar.neg()?.exp()?)?;
    ((scaled + logvar)? + LN_2PI)? * 0.5
}

/// KL divergence between diagonal Gaussians, summed over the last dim:
/// `[.., k]` inputs give `[..]`.
pub fn kl_diag_gaussians(m1: &Tensor, l1: &Tensor, m2: &Tensor, l2: &Tensor) -> Result<Tensor> {
    let ratio = (l1 - l2)?.exp()?;
    let msq = ((m1 - m2)?.sqr()? * l2.neg()?.exp()?)?;
    let per = (((ratio + msq)? - (l1 - l2)?)? - 1.0)?;
    per.sum(D::Minus1)? * 0.5
}

/// KL divergence of `N(mu, e^lv)` from the standard normal, summed over the
/// last dim (Kingma & Welling 2014, appendix B).
pub fn kl_std_normal(mu: &Tensor, logvar: &Tensor) -> Result<Tensor> {
    let per = (((mu.sqr()? + logvar.exp()?)? - 1.0)? - logvar)?;
    per.sum(D::Minus1)? * 0.5
}

/// How the action heads' Gaussian likelihood is trained.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum HeadLoss {
    /// Plain Gaussian NLL: mean and variance gradients both reach the
    /// posterior. A dimension the heads find hard gets a large variance, which
    /// shrinks its mean gradient (the pitfall Seitzer et al. 2022 describe);
    /// on the demo the gripper state was never learnt this way.
    Nll,
    /// The mean is fitted by squared error; the log-variance by the Gaussian
    /// NLL with the mean detached, computed from detached posterior means, so
    /// the variance never shapes the posterior (after Stirn et al. 2023,
    /// "Faithful heteroscedastic regression with neural networks"; from
    /// memory). The head's own hidden layer serves both outputs.
    Faithful,
}

/// Per-element action-head loss `[n, A]` under `kind` (see [`HeadLoss`]).
///
/// `mean`, `logvar`: the head's outputs on the posterior means; `logvar_detached`:
/// its log-variance on the detached posterior means (used by `Faithful` only).
pub fn head_loss(
    kind: HeadLoss,
    a: &Tensor,
    mean: &Tensor,
    logvar: &Tensor,
    logvar_detached: &Tensor,
) -> Result<Tensor> {
    match kind {
        HeadLoss::Nll => gaussian_nll(a, mean, logvar),
        HeadLoss::Faithful => {
            let sq = ((a - mean)?.sqr()? * 0.5)?;
            sq + gaussian_nll(a, &mean.detach(), logvar_detached)?
        }
    }
}

/// How the decoder's single shared variance is obtained.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub enum SharedVariance {
    /// Use the batch's maximum-likelihood value, the mean squared error, in
    /// closed form (converges at once; the default).
    ClosedForm,
    /// A learned parameter `decoder.log_var`, optimised with the rest.
    Learned,
}

/// Per-example shared-variance Gaussian reconstruction NLL.
///
/// `pred`, `target`: `[B, ..]`. `log_var`: the learned `ln s2` (shape `[1]`)
/// or `None` for the closed form. Returns (`[B]` NLL per example, scalar `s2`).
pub fn shared_variance_nll(
    pred: &Tensor,
    target: &Tensor,
    log_var: Option<&Tensor>,
) -> Result<(Tensor, Tensor)> {
    let b = pred.dim(0)?;
    let d = pred.elem_count() / b.max(1);
    let sse = (pred - target)?.sqr()?.flatten_from(1)?.sum(1)?; // [B]
    let (ln_s2, s2) = match log_var {
        Some(lv) => {
            let lv = lv.reshape(())?;
            (lv.clone(), lv.exp()?)
        }
        None => {
            let mse = (sse.sum_all()? / (b * d) as f64)?;
            let s2 = mse.maximum(MIN_SHARED_VARIANCE)?;
            (s2.log()?, s2)
        }
    };
    let log_term = ((ln_s2 + LN_2PI)? * (0.5 * d as f64))?;
    let nll = (sse.broadcast_div(&s2)? * 0.5)?.broadcast_add(&log_term)?;
    Ok((nll, s2))
}

/// How the MMD kernel bandwidth is chosen.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Bandwidth {
    /// `sigma` = median distance between distinct points of the pooled sample.
    Median,
    /// A fixed `sigma`.
    Fixed(f64),
}

/// Pairwise squared distances `[m, n]` between the rows of `x` `[m, k]` and
/// `y` `[n, k]` (computed from differences, so the diagonal of `x` vs `x` is
/// exactly zero).
pub fn pairwise_sq_dists(x: &Tensor, y: &Tensor) -> Result<Tensor> {
    let diff = x.unsqueeze(1)?.broadcast_sub(&y.unsqueeze(0)?)?;
    diff.sqr()?.sum(D::Minus1)
}

/// Median-heuristic bandwidth `sigma` of the pooled rows of `x` and `y`:
/// the (lower) median distance over distinct pairs; 1 when all points coincide.
pub fn median_bandwidth(x: &Tensor, y: &Tensor) -> Result<f64> {
    let z = Tensor::cat(&[x, y], 0)?.detach().to_dtype(DType::F64)?;
    let d2: Vec<Vec<f64>> = pairwise_sq_dists(&z, &z)?.to_vec2()?;
    let mut upper: Vec<f64> = Vec::with_capacity(d2.len() * d2.len() / 2);
    for (i, row) in d2.iter().enumerate() {
        upper.extend_from_slice(&row[i + 1..]);
    }
    if upper.is_empty() {
        return Ok(1.0);
    }
    let mid = (upper.len() - 1) / 2;
    let (_, med, _) = upper.select_nth_unstable_by(mid, |a, b| a.total_cmp(b));
    let sigma = med.sqrt();
    Ok(if sigma > 0.0 && sigma.is_finite() {
        sigma
    } else {
        1.0
    })
}

/// Unbiased MMD^2 with a Gaussian kernel (Gretton et al. 2012, JMLR, eq. 3).
/// `x`: `[m, k]`, `y`: `[n, k]`, `m, n >= 2`. Returns (scalar tensor, sigma used).
pub fn mmd2_unbiased(x: &Tensor, y: &Tensor, bandwidth: Bandwidth) -> Result<(Tensor, f64)> {
    let (m, n) = (x.dim(0)?, y.dim(0)?);
    if m < 2 || n < 2 {
        candle_core::bail!("unbiased MMD^2 needs at least 2 samples per side, got {m} and {n}");
    }
    let sigma = match bandwidth {
        Bandwidth::Median => median_bandwidth(x, y)?,
        Bandwidth::Fixed(s) => s,
    };
    let gamma = -1.0 / (2.0 * sigma * sigma);
    let k = |a: &Tensor, b: &Tensor| -> Result<Tensor> {
        (pairwise_sq_dists(a, b)? * gamma)?.exp()?.sum_all()
    };
    // The diagonal terms k(x_i, x_i) = 1 exactly; remove them from the sums.
    let kxx = ((k(x, x)? - m as f64)? / (m * (m - 1)) as f64)?;
    let kyy = ((k(y, y)? - n as f64)? / (n * (n - 1)) as f64)?;
    let kxy = (k(x, y)? * (2.0 / (m * n) as f64))?;
    Ok((((kxx + kyy)? - kxy)?, sigma))
}
