//! `tile`: `copies` copies of the input side by side (`[x, x, …]`), so that independent
//! structured blocks can be applied to one input in a single pass.

use crate::program::op::{rows_map, Cost, Op, Reader, Writer};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};

/// Repeat the input.
#[derive(Debug, Clone)]
pub struct Tile {
    copies: usize,
}

impl Tile {
    /// `copies ≥ 1`.
    pub fn new(copies: usize) -> Result<Tile> {
        if copies == 0 {
            return Err(Error::input("tile step: copies must be at least 1"));
        }
        Ok(Tile { copies })
    }
    /// Number of copies.
    pub fn copies(&self) -> usize {
        self.copies
    }
}

impl Op for Tile {
    const NAME: &'static str = "tile";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        match ins {
            [n] => n
                .checked_mul(self.copies)
                .ok_or_else(|| "width overflows".to_string()),
            _ => Err(format!("expects one input, got {}", ins.len())),
        }
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        if self.copies == 1 {
            return x;
        }
        let n = x.ncols();
        rows_map(&x, n * self.copies, |a, b| {
            b.chunks_exact_mut(n).for_each(|c| c.copy_from_slice(a))
        })
    }
    const F32: bool = true;
    #[inline(always)]
    fn apply_row32(&self, _level: crate::simd::Level, x: &[f32], y: &mut [f32]) {
        y.chunks_exact_mut(x.len().max(1))
            .for_each(|c| c.copy_from_slice(x));
    }
    fn backward(
        &self,
        xs: &[ArrayView2<f64>],
        _y: ArrayView2<f64>,
        gy: ArrayView2<f64>,
        _gp: Option<&mut [f64]>,
        need_gx: bool,
    ) -> Vec<Array2<f64>> {
        if !need_gx {
            return vec![];
        }
        // Every copy of an input column receives its gradient: the sum over copies.
        let n = xs[0].ncols();
        let mut g = Array2::<f64>::zeros((gy.nrows(), n));
        for c in 0..self.copies {
            g += &gy.slice(ndarray::s![.., c * n..(c + 1) * n]);
        }
        vec![g]
    }
    fn cost(&self, ins: &[usize], out: usize) -> Cost {
        Cost {
            activation_bytes: 8 * (ins[0] + out) as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        format!("{} copies", self.copies)
    }
    fn write(&self, w: &mut Writer) {
        w.scalar("copies", self.copies);
    }
    fn read(r: &Reader) -> Result<Self> {
        Tile::new(r.uint("copies")?).map_err(|e| r.bad(e))
    }
}
