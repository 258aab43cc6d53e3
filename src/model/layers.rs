//! CPU-cheap building blocks on channels-last (`[B, H, W, C]`) tensors.
//!
//! Every learned layer here is one GEMM: resolution changes are pure data
//! movement (space-to-depth, depth-to-space, 2x2 average pooling), so their
//! backward passes are copies too. This avoids candle's CPU convolution
//! backward, whose input gradient runs through a direct-loop
//! `conv_transpose2d`.
//!
//! - `space_to_depth`: `[B, H, W, C] -> [B, H/2, W/2, 4C]`, each output pixel
//!   stacks its 2x2 input block (row-major within the block).
//! - `depth_to_space`: the inverse, `[B, H, W, 4C] -> [B, 2H, 2W, C]`
//!   (sub-pixel upsampling).
//! - A space-to-depth followed by a per-pixel linear map is exactly a 2x2
//!   stride-2 convolution; a per-pixel linear map followed by depth-to-space
//!   is exactly a 2x2 stride-2 transposed convolution.

use candle_core::{Module, Result, Tensor};
use candle_nn::{Linear, VarBuilder};

/// `[B, H, W, C] -> [B, H/2, W/2, 4C]` (H and W even).
pub fn space_to_depth(x: &Tensor) -> Result<Tensor> {
    let (b, h, w, c) = x.dims4()?;
    x.reshape((b, h / 2, 2, w / 2, 2 * c))?
        .transpose(2, 3)?
        .contiguous()?
        .reshape((b, h / 2, w / 2, 4 * c))
}

/// `[B, H, W, 4C] -> [B, 2H, 2W, C]` (channels divisible by 4).
pub fn depth_to_space(x: &Tensor) -> Result<Tensor> {
    let (b, h, w, c4) = x.dims4()?;
    let c = c4 / 4;
    x.reshape((b, h, w, 2, 2 * c))?
        .transpose(2, 3)?
        .contiguous()?
        .reshape((b, 2 * h, 2 * w, c))
}

/// 2x2 average pooling, `[B, H, W, C] -> [B, H/2, W/2, C]`.
pub fn avg_pool2(x: &Tensor) -> Result<Tensor> {
    let (b, h, w, c) = x.dims4()?;
    x.reshape((b, h / 2, 2, w / 2, 2, c))?.mean(4)?.mean(2)
}

/// A per-pixel (or per-row) affine map on the last dimension, as one GEMM
/// over all leading dimensions flattened.
#[derive(Debug, Clone)]
pub struct Dense {
    inner: Linear,
    out: usize,
}

impl Dense {
    /// `in_dim -> out_dim`, parameters `weight` `[out, in]` and `bias` `[out]`
    /// under `vb` (Kaiming-normal weights).
    pub fn new(in_dim: usize, out_dim: usize, vb: VarBuilder) -> Result<Self> {
        Ok(Self {
            inner: candle_nn::linear(in_dim, out_dim, vb)?,
            out: out_dim,
        })
    }

    /// Like [`Dense::new`] with all parameters initialised to zero (an output
    /// layer that starts as the identity of a residual).
    pub fn zeros(in_dim: usize, out_dim: usize, vb: VarBuilder) -> Result<Self> {
        let w = vb.get_with_hints((out_dim, in_dim), "weight", candle_nn::init::ZERO)?;
        let b = vb.get_with_hints(out_dim, "bias", candle_nn::init::ZERO)?;
        Ok(Self {
            inner: Linear::new(w, Some(b)),
            out: out_dim,
        })
    }
}

impl Module for Dense {
    fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let dims = x.dims().to_vec();
        let last = *dims.last().expect("Dense on a 0-d tensor");
        let rows = x.elem_count() / last.max(1);
        let y = self.inner.forward(&x.reshape((rows, last))?)?;
        let mut out_dims = dims;
        *out_dims.last_mut().expect("non-empty") = self.out;
        y.reshape(out_dims)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use candle_core::Device;

    #[test]
    fn space_to_depth_round_trips_and_orders_blocks() {
        let dev = Device::Cpu;
        let x = Tensor::arange(0f32, 2. * 4. * 6. * 3., &dev)
            .unwrap()
            .reshape((2, 4, 6, 3))
            .unwrap();
        let s = space_to_depth(&x).unwrap();
        assert_eq!(s.dims(), &[2, 2, 3, 12]);
        // Output pixel (0,0) holds input pixels (0,0), (0,1), (1,0), (1,1).
        let px: Vec<f32> = s
            .get(0)
            .unwrap()
            .get(0)
            .unwrap()
            .get(0)
            .unwrap()
            .to_vec1()
            .unwrap();
        let at = |r: usize, c: usize| -> Vec<f32> {
            let base = ((r * 6 + c) * 3) as f32;
            vec![base, base + 1., base + 2.]
        };
        let want: Vec<f32> = [at(0, 0), at(0, 1), at(1, 0), at(1, 1)].concat();
        assert_eq!(px, want);
        let back = depth_to_space(&s).unwrap();
        let diff = (back - &x).unwrap().abs().unwrap().sum_all().unwrap();
        assert_eq!(diff.to_scalar::<f32>().unwrap(), 0.0);
    }

    #[test]
    fn avg_pool_matches_hand_computation() {
        let x = Tensor::new(&[[[[1f32], [2.]], [[3.], [6.]]]], &Device::Cpu).unwrap();
        let p = avg_pool2(&x).unwrap();
        assert_eq!(
            p.flatten_all().unwrap().to_vec1::<f32>().unwrap(),
            vec![3.0]
        );
    }
}
