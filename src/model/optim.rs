//! A fused AdamW optimiser whose whole state (step count, first and second
//! moments) is plain `Vec<f32>` per named parameter, so a checkpoint can save
//! and restore it exactly.
//!
//! Update (Loshchilov & Hutter 2019, "Decoupled Weight Decay
//! Regularization", algorithm 2, with Adam's bias correction from Kingma & Ba
//! 2015): for gradient `g` at step `t` (1-based),
//!
//! ```text
//! m = b1 m + (1 - b1) g          v = b2 v + (1 - b2) g^2
//! p = p - lr * ( (m / (1 - b1^t)) / (sqrt(v / (1 - b2^t)) + eps) + wd * p )
//! ```
//!
//! One pass over each parameter's values in Rust does the whole update
//! (candle-nn's AdamW spends many tensor ops per parameter, which dominates
//! a small network's step on CPU).

use std::collections::BTreeMap;

use candle_core::{DType, Result, Tensor, Var};

/// AdamW hyper-parameters.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AdamWParams {
    /// Learning rate.
    pub lr: f64,
    /// First-moment decay.
    pub beta1: f64,
    /// Second-moment decay.
    pub beta2: f64,
    /// Denominator guard.
    pub eps: f64,
    /// Decoupled weight decay.
    pub weight_decay: f64,
}

impl Default for AdamWParams {
    fn default() -> Self {
        Self {
            lr: 1e-3,
            beta1: 0.9,
            beta2: 0.999,
            eps: 1e-8,
            weight_decay: 0.0,
        }
    }
}

/// Moments of one parameter.
#[derive(Debug, Clone, PartialEq)]
pub struct Moments {
    /// First moment.
    pub m: Vec<f32>,
    /// Second moment.
    pub v: Vec<f32>,
}

/// The optimiser: named parameters (sorted by name) and their moments.
pub struct AdamW {
    params: AdamWParams,
    vars: Vec<(String, Var)>,
    moments: Vec<Moments>,
    step: u64,
}

impl AdamW {
    /// An optimiser over `vars` (e.g. a `VarMap`'s contents); the order is by
    /// name, so it does not depend on the map's iteration order.
    pub fn new(vars: impl IntoIterator<Item = (String, Var)>, params: AdamWParams) -> Self {
        let mut vars: Vec<(String, Var)> = vars.into_iter().collect();
        vars.sort_by(|a, b| a.0.cmp(&b.0));
        let moments = vars
            .iter()
            .map(|(_, v)| Moments {
                m: vec![0.0; v.elem_count()],
                v: vec![0.0; v.elem_count()],
            })
            .collect();
        Self {
            params,
            vars,
            moments,
            step: 0,
        }
    }

    /// Steps taken so far.
    pub fn step_count(&self) -> u64 {
        self.step
    }

    /// Sets the learning rate (for schedules).
    pub fn set_lr(&mut self, lr: f64) {
        self.params.lr = lr;
    }

    /// The hyper-parameters.
    pub fn params(&self) -> &AdamWParams {
        &self.params
    }

    /// One update from the gradients of `loss`.
    pub fn backward_step(&mut self, loss: &Tensor) -> Result<()> {
        let grads = loss.backward()?;
        self.step += 1;
        let p = self.params;
        let t = self.step as i32;
        let bc1 = 1.0 - p.beta1.powi(t);
        let bc2 = 1.0 - p.beta2.powi(t);
        let (b1, b2) = (p.beta1 as f32, p.beta2 as f32);
        let step_size = (p.lr / bc1) as f32;
        let inv_bc2 = (1.0 / bc2) as f32;
        let eps = p.eps as f32;
        let decay = (1.0 - p.lr * p.weight_decay) as f32;
        for ((_, var), mom) in self.vars.iter().zip(self.moments.iter_mut()) {
            let Some(g) = grads.get(var.as_tensor()) else {
                continue;
            };
            let dtype = var.dtype();
            let g: Vec<f32> = g.flatten_all()?.to_dtype(DType::F32)?.to_vec1()?;
            let mut w: Vec<f32> = var
                .as_tensor()
                .flatten_all()?
                .to_dtype(DType::F32)?
                .to_vec1()?;
            for i in 0..w.len() {
                let gi = g[i];
                let m = b1 * mom.m[i] + (1.0 - b1) * gi;
                let v = b2 * mom.v[i] + (1.0 - b2) * gi * gi;
                mom.m[i] = m;
                mom.v[i] = v;
                w[i] = w[i] * decay - step_size * m / ((v * inv_bc2).sqrt() + eps);
            }
            let t = Tensor::from_vec(w, var.shape(), var.device())?.to_dtype(dtype)?;
            var.set(&t)?;
        }
        Ok(())
    }

    /// The state for a checkpoint: step and, per parameter name, its moments.
    pub fn state(&self) -> (u64, BTreeMap<String, Moments>) {
        let map = self
            .vars
            .iter()
            .zip(&self.moments)
            .map(|((n, _), m)| (n.clone(), m.clone()))
            .collect();
        (self.step, map)
    }

    /// Restores a saved state; every parameter must be present with its size.
    pub fn restore(&mut self, step: u64, mut saved: BTreeMap<String, Moments>) -> Result<()> {
        let mut moments = Vec::with_capacity(self.vars.len());
        for (name, var) in &self.vars {
            let Some(m) = saved.remove(name) else {
                candle_core::bail!("optimiser state has no moments for {name}");
            };
            if m.m.len() != var.elem_count() || m.v.len() != var.elem_count() {
                candle_core::bail!(
                    "optimiser state for {name} has {} values, the parameter {}",
                    m.m.len(),
                    var.elem_count()
                );
            }
            moments.push(m);
        }
        if let Some(extra) = saved.keys().next() {
            candle_core::bail!("optimiser state has moments for unknown parameter {extra}");
        }
        self.moments = moments;
        self.step = step;
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::Device;

    #[test]
    fn matches_candle_nn_adamw() {
        // Reference: candle-nn's AdamW (same algorithm) on a quadratic.
        use candle_nn::Optimizer;
        let dev = Device::Cpu;
        let init = Tensor::new(&[1.0f32, -2.0, 0.5], &dev).unwrap();
        let target = Tensor::new(&[0.3f32, 0.1, -0.4], &dev).unwrap();
        let (a, b) = (
            Var::from_tensor(&init).unwrap(),
            Var::from_tensor(&init).unwrap(),
        );
        let params = AdamWParams {
            lr: 0.05,
            weight_decay: 0.01,
            ..AdamWParams::default()
        };
        let mut ours = AdamW::new([("a".to_string(), a.clone())], params);
        let mut theirs = candle_nn::AdamW::new(
            vec![b.clone()],
            candle_nn::ParamsAdamW {
                lr: params.lr,
                beta1: params.beta1,
                beta2: params.beta2,
                eps: params.eps,
                weight_decay: params.weight_decay,
            },
        )
        .unwrap();
        for _ in 0..50 {
            let la = (a.as_tensor() - &target)
                .unwrap()
                .sqr()
                .unwrap()
                .sum_all()
                .unwrap();
            ours.backward_step(&la).unwrap();
            let lb = (b.as_tensor() - &target)
                .unwrap()
                .sqr()
                .unwrap()
                .sum_all()
                .unwrap();
            theirs.backward_step(&lb).unwrap();
        }
        let va: Vec<f32> = a.as_tensor().to_vec1().unwrap();
        let vb: Vec<f32> = b.as_tensor().to_vec1().unwrap();
        for (x, y) in va.iter().zip(&vb) {
            assert!((x - y).abs() < 1e-5, "{va:?} vs {vb:?}");
        }
    }
}
