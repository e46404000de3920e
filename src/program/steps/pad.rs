//! `pad`: zero-padding to a longer width (`[x, 0, …, 0]`), e.g. to a power of two before a
//! Walsh–Hadamard transform.

use crate::program::op::{rows_map, Cost, Op, Reader, Writer};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};

/// Zero-pad.
#[derive(Debug, Clone)]
pub struct Pad {
    to: usize,
}

impl Pad {
    /// Pads to width `to` (≥ 1).
    pub fn new(to: usize) -> Result<Pad> {
        if to == 0 {
            return Err(Error::input("pad step: width must be at least 1"));
        }
        Ok(Pad { to })
    }
    /// The padded width.
    pub fn width(&self) -> usize {
        self.to
    }
}

impl Op for Pad {
    const NAME: &'static str = "pad";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        match ins {
            [n] if *n <= self.to => Ok(self.to),
            [n] => Err(format!("cannot pad width {n} to the shorter {}", self.to)),
            _ => Err(format!("expects one input, got {}", ins.len())),
        }
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        let n = x.ncols();
        if n == self.to {
            return x;
        }
        rows_map(&x, self.to, |a, b| b[..n].copy_from_slice(a))
    }
    const F32: bool = true;
    #[inline(always)]
    fn apply_row32(&self, _level: crate::simd::Level, x: &[f32], y: &mut [f32]) {
        let n = x.len();
        y[..n].copy_from_slice(x);
        y[n..].iter_mut().for_each(|o| *o = 0.0);
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
        vec![gy.slice(ndarray::s![.., ..xs[0].ncols()]).to_owned()]
    }
    fn cost(&self, ins: &[usize], out: usize) -> Cost {
        Cost {
            activation_bytes: 8 * (ins[0] + out) as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        format!("to {}", self.to)
    }
    fn write(&self, w: &mut Writer) {
        w.scalar("to", self.to);
    }
    fn read(r: &Reader) -> Result<Self> {
        Pad::new(r.uint("to")?).map_err(|e| r.bad(e))
    }
}
