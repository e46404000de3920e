//! `relu`: arc-cosine random features (Cho & Saul, NIPS 2009): `√(2/D)·1[Wx > 0]` for
//! order 0 and `√(2/D)·max(0, Wx)` for order 1, `W` Gaussian.

use super::{dense, Ctx, Sampler};
use crate::kernel::Kernel;
use crate::program::{steps, ValueId};
use crate::Result;
use ndarray::Array2;
use rand::RngExt;
use rand_distr::StandardNormal;

pub(crate) struct Relu;

impl Sampler for Relu {
    fn name(&self) -> &'static str {
        "relu"
    }
    fn serves(&self, k: &Kernel) -> bool {
        matches!(k, Kernel::ArcCos { .. })
    }
    fn leaf(&self, cx: &mut Ctx, k: &Kernel, dd: usize, x: ValueId) -> Result<ValueId> {
        let order = match k {
            Kernel::ArcCos { order } => *order,
            _ => 1,
        };
        let d = cx.spec.input_dim;
        let w = Array2::from_shape_simple_fn((dd, d), || cx.rng.sample::<f64, _>(StandardNormal));
        let p = dense(cx, w, x)?;
        let r = if order == 0 {
            cx.b.push(steps::Heaviside, &[p])?
        } else {
            cx.b.push(steps::Relu, &[p])?
        };
        cx.b.push(steps::ConstScale::new((2.0 / dd as f64).sqrt())?, &[r])
    }
}
