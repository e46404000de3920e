//! `tensorsketch`: Tensor Sketch (Pham & Pagh, KDD 2013) of `(γ x·y + c)^p` on
//! `x' = [√γ x, √c]`: `p` count sketches with random buckets and signs, multiplied by FFT.
//!
//! Program: `times √γ`, `append √c`, `count_sketch_fft`.

use super::{Ctx, Sampler};
use crate::kernel::Kernel;
use crate::program::{steps, ValueId};
use crate::Result;
use rand::RngExt;

pub(crate) struct TensorSketch;

impl Sampler for TensorSketch {
    fn name(&self) -> &'static str {
        "tensorsketch"
    }
    fn serves(&self, k: &Kernel) -> bool {
        matches!(k, Kernel::Polynomial { .. })
    }
    fn leaf(&self, cx: &mut Ctx, k: &Kernel, dd: usize, x: ValueId) -> Result<ValueId> {
        let (p, gamma, coef0) = super::polynomial(k, self)?;
        let d = cx.spec.input_dim;
        let hash: Vec<Vec<u32>> = (0..p)
            .map(|_| (0..=d).map(|_| cx.rng.random_range(0..dd as u32)).collect())
            .collect();
        let sign: Vec<Vec<i8>> = (0..p).map(|_| super::signs(&mut cx.rng, d + 1)).collect();
        let v = cx.b.push(steps::ConstScale::new(gamma.sqrt())?, &[x])?;
        let v = cx.b.push(steps::Append::new(coef0.sqrt())?, &[v])?;
        cx.b.push(steps::CountSketchFft::new(dd, hash, sign)?, &[v])
    }
}
