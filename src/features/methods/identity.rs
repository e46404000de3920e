//! `identity`: the exact map of the linear kernel, `z(x) = x` (a program with no steps).

use super::{Ctx, Sampler};
use crate::kernel::Kernel;
use crate::program::ValueId;
use crate::Result;

pub(crate) struct Identity;

impl Sampler for Identity {
    fn name(&self) -> &'static str {
        "identity"
    }
    fn serves(&self, k: &Kernel) -> bool {
        matches!(k, Kernel::Linear)
    }
    fn leaf(&self, _cx: &mut Ctx, _k: &Kernel, _dd: usize, x: ValueId) -> Result<ValueId> {
        Ok(x)
    }
}
