//! `quasi`: quasi-Monte Carlo frequencies (Yang, Sindhwani, Avron & Mahoney, ICML 2014):
//! scrambled Halton or Sobol' points through the inverse CDF of the spectral measure.

use super::{dense, spectral_leaf, Ctx, Sampler};
use crate::features::spectral;
use crate::kernel::Kernel;
use crate::program::ValueId;
use crate::Result;

pub(crate) struct Quasi;

impl Sampler for Quasi {
    fn name(&self) -> &'static str {
        "quasi"
    }
    fn spectral(&self) -> bool {
        true
    }
    fn serves(&self, k: &Kernel) -> bool {
        super::any_spectral(k)
    }
    fn leaf(&self, cx: &mut Ctx, k: &Kernel, dd: usize, x: ValueId) -> Result<ValueId> {
        spectral_leaf(cx, k, dd, x, |cx, xs, m| {
            let o = &cx.spec.options;
            let scramble = o.scramble.then_some(cx.seed);
            let w = spectral::quasi(k, cx.spec.input_dim, m, o.sequence, scramble)?;
            dense(cx, w, xs)
        })
    }
}
