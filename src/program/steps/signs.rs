//! `signs`: a ±1 diagonal, `y_j = s_j · x_j` (stored as int8).

use crate::program::op::{one_input, rows_in_place, times_columns, Cost, Op, Reader, Writer};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};

/// Sign flips.
#[derive(Debug, Clone)]
pub struct Signs {
    s: Vec<i8>,
    f: Vec<f64>,
}

impl Signs {
    /// Every entry must be +1 or −1.
    pub fn new(s: Vec<i8>) -> Result<Signs> {
        if let Some(i) = s.iter().position(|v| *v != 1 && *v != -1) {
            return Err(Error::input(format!(
                "signs step: entry {i} is {}; expected +1 or -1",
                s[i]
            )));
        }
        let f = s.iter().map(|v| *v as f64).collect();
        Ok(Signs { s, f })
    }
    /// The signs.
    pub fn signs(&self) -> &[i8] {
        &self.s
    }
}

impl Op for Signs {
    const NAME: &'static str = "signs";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        one_input(ins, self.s.len())?;
        Ok(self.s.len())
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        rows_in_place(x, |r| r.iter_mut().zip(&self.f).for_each(|(v, s)| *v *= s))
    }
    const F32: bool = true;
    #[inline(always)]
    fn apply_row32(&self, _level: crate::simd::Level, x: &[f32], y: &mut [f32]) {
        for ((o, a), s) in y.iter_mut().zip(x).zip(&self.s) {
            *o = a * *s as f32;
        }
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
        vec![times_columns(gy, &self.f)]
    }
    fn cost(&self, _ins: &[usize], out: usize) -> Cost {
        Cost {
            flops: out as u64,
            param_bytes: out as u64,
            activation_bytes: 16 * out as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        format!("{} signs (int8)", self.s.len())
    }
    fn write(&self, w: &mut Writer) {
        w.i8s("signs", vec![self.s.len()], self.s.clone());
    }
    fn read(r: &Reader) -> Result<Self> {
        Signs::new(r.i8s("signs", &[Some(r.in_dim())])?).map_err(|e| r.bad(e))
    }
}
