//! `fourier`: i.i.d. random Fourier features (Rahimi & Recht, NIPS 2007): frequencies drawn
//! from the kernel's spectral measure.

use super::{dense, spectral_leaf, Ctx, Sampler};
use crate::features::spectral;
use crate::kernel::Kernel;
use crate::program::ValueId;
use crate::Result;

pub(crate) struct Fourier;

impl Sampler for Fourier {
    fn name(&self) -> &'static str {
        "fourier"
    }
    fn spectral(&self) -> bool {
        true
    }
    fn serves(&self, k: &Kernel) -> bool {
        super::any_spectral(k)
    }
    fn leaf(&self, cx: &mut Ctx, k: &Kernel, dd: usize, x: ValueId) -> Result<ValueId> {
        spectral_leaf(cx, k, dd, x, |cx, xs, m| {
            let w = spectral::iid(k, cx.spec.input_dim, m, &mut cx.rng);
            dense(cx, w, xs)
        })
    }
}
