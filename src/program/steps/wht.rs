//! `wht`: the unnormalised Walsh–Hadamard transform `H_b` applied to each consecutive block
//! of `b` values (`b` a power of two; Sylvester's `H_{2n} = [[H_n, H_n], [H_n, −H_n]]`).

use crate::program::op::{log2_ceil, rows_in_place, Cost, Op, Reader, Writer};
use crate::transform::wht_in_place;
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};

/// Blockwise Walsh–Hadamard transform.
#[derive(Debug, Clone)]
pub struct Wht {
    block: usize,
}

impl Wht {
    /// Block length: a power of two.
    pub fn new(block: usize) -> Result<Wht> {
        if block == 0 || !block.is_power_of_two() {
            return Err(Error::input(format!(
                "wht step: block length {block} is not a power of two"
            )));
        }
        Ok(Wht { block })
    }
    /// Block length.
    pub fn block(&self) -> usize {
        self.block
    }
}

impl Op for Wht {
    const NAME: &'static str = "wht";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        match ins {
            [n] if *n > 0 && n % self.block == 0 => Ok(*n),
            [n] => Err(format!(
                "input width {n} is not a multiple of the block {}",
                self.block
            )),
            _ => Err(format!("expects one input, got {}", ins.len())),
        }
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        let b = self.block;
        rows_in_place(x, |r| r.chunks_exact_mut(b).for_each(wht_in_place))
    }
    const F32: bool = true;
    #[inline(always)]
    fn apply_row32(&self, level: crate::simd::Level, x: &[f32], y: &mut [f32]) {
        y.copy_from_slice(x);
        self.apply_row32_in_place(level, y);
    }
    const IN_PLACE32: bool = true;
    #[inline(always)]
    fn apply_row32_in_place(&self, level: crate::simd::Level, x: &mut [f32]) {
        x.chunks_exact_mut(self.block)
            .for_each(|b| crate::transform::wht_in_place_at(level, b));
    }
    fn backward(
        &self,
        xs: &[ArrayView2<f64>],
        _y: ArrayView2<f64>,
        gy: ArrayView2<f64>,
        _gp: Option<&mut [f64]>,
        need_gx: bool,
    ) -> Vec<Array2<f64>> {
        let _ = xs;
        if !need_gx {
            return vec![];
        }
        // The Walsh–Hadamard matrix is symmetric: its transpose is itself.
        let b = self.block;
        let g = gy.as_standard_layout().into_owned();
        vec![rows_in_place(g, |r| {
            r.chunks_exact_mut(b).for_each(wht_in_place)
        })]
    }
    fn cost(&self, _ins: &[usize], out: usize) -> Cost {
        Cost {
            flops: out as u64 * log2_ceil(self.block),
            activation_bytes: 16 * out as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        format!("blocks of {}", self.block)
    }
    fn write(&self, w: &mut Writer) {
        w.scalar("block", self.block);
    }
    fn read(r: &Reader) -> Result<Self> {
        Wht::new(r.uint("block")?).map_err(|e| r.bad(e))
    }
}
