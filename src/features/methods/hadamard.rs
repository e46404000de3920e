//! `hadamard`: structured orthogonal random features (SORF, Yu et al., NIPS 2016):
//! `W x = d'^{-1} · H D₁ H D₂ H D₃ x` per block of `d'` frequencies (`d'` the next power of
//! two of `d`, `H` the unnormalised Walsh–Hadamard matrix, `D_i` random sign diagonals),
//! `O(D log d)` time and `3·D` stored signs.
//!
//! Program: pad to `d'`, tile to the blocks, then `signs D₃ → wht → signs D₂ → wht → signs
//! D₁ → wht`, keep the first `m`, multiply by `1/d'`.

use super::{signs, spectral_leaf, Ctx, Sampler};
use crate::kernel::Kernel;
use crate::program::{steps, ValueId};
use crate::Result;

pub(crate) struct Hadamard;

impl Sampler for Hadamard {
    fn name(&self) -> &'static str {
        "hadamard"
    }
    fn spectral(&self) -> bool {
        true
    }
    fn serves(&self, k: &Kernel) -> bool {
        matches!(k, Kernel::Gaussian { .. })
    }
    fn leaf(&self, cx: &mut Ctx, k: &Kernel, dd: usize, x: ValueId) -> Result<ValueId> {
        spectral_leaf(cx, k, dd, x, |cx, xs, m| {
            let d_pad = cx.spec.input_dim.next_power_of_two();
            let blocks = m.div_ceil(d_pad);
            // Signs drawn block by block in the order D₁, D₂, D₃.
            let mut diag = [Vec::new(), Vec::new(), Vec::new()];
            for _ in 0..blocks {
                for dg in diag.iter_mut() {
                    dg.extend(signs(&mut cx.rng, d_pad));
                }
            }
            let mut v = cx.b.push(steps::Pad::new(d_pad)?, &[xs])?;
            v = cx.b.push(steps::Tile::new(blocks)?, &[v])?;
            for dg in diag.into_iter().rev() {
                v = cx.b.push(steps::Signs::new(dg)?, &[v])?;
                v = cx.b.push(steps::Wht::new(d_pad)?, &[v])?;
            }
            if m < blocks * d_pad {
                v = cx.b.push(steps::Gather::first(m)?, &[v])?;
            }
            cx.b.push(steps::ConstScale::new(1.0 / d_pad as f64)?, &[v])
        })
    }
}
