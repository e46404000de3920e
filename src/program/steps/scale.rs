//! `scale`: per-dimension scaling `y_j = s_j · x_j` (a kernel's inverse lengthscales, a
//! diagonal of Fastfood, a method's per-feature coefficients).

use crate::program::op::{
    add_column_dots, check_finite, one_input, rows_in_place, times_columns, Cost, Op, Reader,
    Writer,
};
use crate::Result;
use ndarray::{Array2, ArrayView2};

/// Per-dimension scale.
#[derive(Debug, Clone)]
pub struct Scale {
    s: Vec<f64>,
    /// The factors rounded to f32 (the f32 form reads these).
    s32: Vec<f32>,
}

impl Scale {
    /// A scale vector (every entry finite).
    pub fn new(s: Vec<f64>) -> Result<Scale> {
        check_finite(&s, "scale step", false)?;
        let s32 = s.iter().map(|&v| v as f32).collect();
        Ok(Scale { s, s32 })
    }
    /// The factors.
    pub fn factors(&self) -> &[f64] {
        &self.s
    }
}

impl Op for Scale {
    const NAME: &'static str = "scale";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        one_input(ins, self.s.len())?;
        Ok(self.s.len())
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        rows_in_place(x, |r| r.iter_mut().zip(&self.s).for_each(|(v, s)| *v *= s))
    }
    const F32: bool = true;
    #[inline(always)]
    fn apply_row32(&self, _level: crate::simd::Level, x: &[f32], y: &mut [f32]) {
        for ((o, a), s) in y.iter_mut().zip(x).zip(&self.s32) {
            *o = a * s;
        }
    }
    fn backward(
        &self,
        xs: &[ArrayView2<f64>],
        _y: ArrayView2<f64>,
        gy: ArrayView2<f64>,
        gp: Option<&mut [f64]>,
        need_gx: bool,
    ) -> Vec<Array2<f64>> {
        if let Some(gp) = gp {
            add_column_dots(gy, xs[0], gp);
        }
        if !need_gx {
            return vec![];
        }
        vec![times_columns(gy, &self.s)]
    }
    fn params(&self) -> Vec<f64> {
        self.s.clone()
    }
    fn with_params(&self, p: &[f64]) -> Result<Self> {
        Scale::new(p.to_vec())
    }
    fn cost(&self, _ins: &[usize], out: usize) -> Cost {
        Cost {
            flops: out as u64,
            param_bytes: 8 * out as u64,
            activation_bytes: 16 * out as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        format!("{} factors", self.s.len())
    }
    fn write(&self, w: &mut Writer) {
        w.f64s("factors", vec![self.s.len()], self.s.clone());
    }
    fn read(r: &Reader) -> Result<Self> {
        Scale::new(r.f64s("factors", &[Some(r.in_dim())])?)
    }
}
