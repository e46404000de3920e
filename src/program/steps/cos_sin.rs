//! `cos_sin`: the paired Fourier output `y = c·[cos x, sin x]` (width doubles).

use crate::program::op::{check_finite, rows_map, Cost, Op, Reader, Writer};
use crate::transform::trig::scaled_sin_cos;
use crate::Result;
use ndarray::{Array2, ArrayView2};

/// Paired cosine and sine.
#[derive(Debug, Clone)]
pub struct CosSin {
    c: f64,
}

impl CosSin {
    /// Output scale `c` (finite).
    pub fn new(c: f64) -> Result<CosSin> {
        check_finite(&[c], "cos_sin step", false)?;
        Ok(CosSin { c })
    }
    /// The output scale.
    pub fn scale(&self) -> f64 {
        self.c
    }
}

impl Op for CosSin {
    const NAME: &'static str = "cos_sin";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        match ins {
            [n] => Ok(2 * n),
            _ => Err(format!("expects one input, got {}", ins.len())),
        }
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        let m = x.ncols();
        rows_map(&x, 2 * m, |a, b| {
            let (co, so) = b.split_at_mut(m);
            scaled_sin_cos(a, self.c, co, so);
        })
    }
    const F32: bool = true;
    #[inline(always)]
    fn apply_row32(&self, level: crate::simd::Level, x: &[f32], y: &mut [f32]) {
        let (co, so) = y.split_at_mut(x.len());
        crate::transform::trig::scaled_sin_cos_f32_at(level, x, self.c as f32, co, so);
    }
    fn backward(
        &self,
        xs: &[ArrayView2<f64>],
        y: ArrayView2<f64>,
        gy: ArrayView2<f64>,
        _gp: Option<&mut [f64]>,
        need_gx: bool,
    ) -> Vec<Array2<f64>> {
        let _ = xs;
        if !need_gx {
            return vec![];
        }
        // y = c[cos x, sin x]: ∂cos/∂x = −sin = −y_sin/c·c, ∂sin/∂x = cos.
        let m = y.ncols() / 2;
        let mut g = Array2::<f64>::zeros((y.nrows(), m));
        for ((mut gr, yr), gyr) in g.rows_mut().into_iter().zip(y.rows()).zip(gy.rows()) {
            for j in 0..m {
                gr[j] = gyr[m + j] * yr[j] - gyr[j] * yr[m + j];
            }
        }
        vec![g]
    }
    fn cost(&self, ins: &[usize], out: usize) -> Cost {
        Cost {
            flops: out as u64,
            transcendental: ins[0] as u64,
            activation_bytes: 8 * (ins[0] + out) as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        format!("[cos, sin] × {:.6e}", self.c)
    }
    fn write(&self, w: &mut Writer) {
        w.scalar("c", self.c);
    }
    fn read(r: &Reader) -> Result<Self> {
        CosSin::new(r.num("c")?)
    }
}
