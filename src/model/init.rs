//! Deterministic parameter initialisation.
//!
//! candle's `VarMap` initialises parameters from an unseedable thread RNG, so
//! two runs with the same seed would start from different weights. This
//! backend for `VarBuilder` creates the same trainable [`Var`]s as `VarMap`
//! (they land in the given `VarMap`, so saving and loading work as usual) but
//! draws each tensor's initial values from [`Rng::for_name`]`(seed, name)`:
//! the result depends only on the seed and the parameter's full name, not on
//! the order in which layers are built.

use candle_core::{DType, Device, Result, Shape, Tensor, Var};
use candle_nn::init::{FanInOut, NormalOrUniform};
use candle_nn::{Init, VarBuilder, VarMap};

use super::rng::Rng;

/// A `VarBuilder` backend that initialises from a seed (see module docs).
pub struct SeededInit {
    map: VarMap,
    seed: u64,
}

impl SeededInit {
    /// A `VarBuilder` whose new variables go into `map`, seeded by `seed`.
    /// Names already in `map` are returned as they are (after a shape check).
    pub fn var_builder(
        map: &VarMap,
        seed: u64,
        dtype: DType,
        device: &Device,
    ) -> VarBuilder<'static> {
        VarBuilder::from_backend(
            Box::new(SeededInit {
                map: map.clone(),
                seed,
            }),
            dtype,
            device.clone(),
        )
    }
}

fn init_values(init: Init, shape: &Shape, rng: &mut Rng) -> Vec<f64> {
    let n = shape.elem_count();
    match init {
        Init::Const(c) => vec![c; n],
        Init::Randn { mean, stdev } => (0..n).map(|_| mean + stdev * rng.normal()).collect(),
        Init::Uniform { lo, up } => (0..n).map(|_| lo + (up - lo) * rng.uniform()).collect(),
        Init::Kaiming {
            dist,
            fan,
            non_linearity,
        } => {
            let fan = match fan {
                FanInOut::FanIn => FanInOut::FanIn.for_shape(shape),
                FanInOut::FanOut => FanInOut::FanOut.for_shape(shape),
            };
            // He et al. 2015: std = gain / sqrt(fan).
            let std = non_linearity.gain() / (fan.max(1) as f64).sqrt();
            match dist {
                NormalOrUniform::Normal => (0..n).map(|_| std * rng.normal()).collect(),
                NormalOrUniform::Uniform => {
                    let b = 3f64.sqrt() * std;
                    (0..n).map(|_| -b + 2.0 * b * rng.uniform()).collect()
                }
            }
        }
    }
}

impl candle_nn::var_builder::SimpleBackend for SeededInit {
    fn get(&self, s: Shape, name: &str, h: Init, dtype: DType, dev: &Device) -> Result<Tensor> {
        let mut data = self.map.data().lock().expect("var map lock");
        if let Some(var) = data.get(name) {
            if var.shape() != &s {
                candle_core::bail!(
                    "parameter {name} has shape {:?}, the network expects {:?}",
                    var.shape(),
                    s
                );
            }
            return Ok(var.as_tensor().clone());
        }
        let mut rng = Rng::for_name(self.seed, name);
        let values = init_values(h, &s, &mut rng);
        let t = Tensor::from_vec(values, s, dev)?.to_dtype(dtype)?;
        let var = Var::from_tensor(&t)?;
        let out = var.as_tensor().clone();
        data.insert(name.to_string(), var);
        Ok(out)
    }

    fn get_unchecked(&self, name: &str, _dtype: DType, _dev: &Device) -> Result<Tensor> {
        let data = self.map.data().lock().expect("var map lock");
        match data.get(name) {
            Some(v) => Ok(v.as_tensor().clone()),
            None => candle_core::bail!("no parameter named {name}"),
        }
    }

    fn contains_tensor(&self, name: &str) -> bool {
        self.map
            .data()
            .lock()
            .expect("var map lock")
            .contains_key(name)
    }
}
