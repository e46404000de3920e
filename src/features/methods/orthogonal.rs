//! `orthogonal`: orthogonal random features (Yu, Suresh, Choromanski, Holtmann-Rice &
//! Kumar, NIPS 2016): Haar-orthogonal blocks with radial norms drawn from the kernel.

use super::{dense, spectral_leaf, Ctx, Sampler};
use crate::features::spectral;
use crate::kernel::Kernel;
use crate::program::ValueId;
use crate::Result;

pub(crate) struct Orthogonal;

impl Sampler for Orthogonal {
    fn name(&self) -> &'static str {
        "orthogonal"
    }
    fn spectral(&self) -> bool {
        true
    }
    fn serves(&self, k: &Kernel) -> bool {
        matches!(
            k,
            Kernel::Gaussian { .. } | Kernel::Matern { .. } | Kernel::RationalQuadratic { .. }
        )
    }
    fn leaf(&self, cx: &mut Ctx, k: &Kernel, dd: usize, x: ValueId) -> Result<ValueId> {
        spectral_leaf(cx, k, dd, x, |cx, xs, m| {
            let w = spectral::orthogonal(k, cx.spec.input_dim, m, &mut cx.rng);
            dense(cx, w, xs)
        })
    }
}
