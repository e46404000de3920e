//! `times`: multiplication by one constant `y = c · x` (normalisations such as `√(2/D)`).

use crate::program::op::{check_finite, Cost, Op, Reader, Writer};
use crate::Result;
use ndarray::{Array2, ArrayView2};

/// Constant scale.
#[derive(Debug, Clone)]
pub struct ConstScale {
    c: f64,
}

impl ConstScale {
    /// A finite constant.
    pub fn new(c: f64) -> Result<ConstScale> {
        check_finite(&[c], "times step", false)?;
        Ok(ConstScale { c })
    }
    /// The constant.
    pub fn value(&self) -> f64 {
        self.c
    }
}

impl Op for ConstScale {
    const NAME: &'static str = "times";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        match ins {
            [n] => Ok(*n),
            _ => Err(format!("expects one input, got {}", ins.len())),
        }
    }
    fn apply(&self, mut x: Array2<f64>) -> Array2<f64> {
        let c = self.c;
        x.mapv_inplace(|v| v * c);
        x
    }
    const F32: bool = true;
    #[inline(always)]
    fn apply_row32(&self, _level: crate::simd::Level, x: &[f32], y: &mut [f32]) {
        let c = self.c as f32;
        y.iter_mut().zip(x).for_each(|(o, a)| *o = a * c);
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
        vec![gy.mapv(|v| v * self.c)]
    }
    fn cost(&self, _ins: &[usize], out: usize) -> Cost {
        Cost {
            flops: out as u64,
            activation_bytes: 16 * out as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        format!("c = {:.6e}", self.c)
    }
    fn write(&self, w: &mut Writer) {
        w.scalar("c", self.c);
    }
    fn read(r: &Reader) -> Result<Self> {
        ConstScale::new(r.num("c")?)
    }
}
