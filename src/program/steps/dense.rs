//! `dense`: a dense projection `y = W x` (`W` is `m × n`, stored row-major as float64).

use crate::linalg;
use crate::program::op::{Cost, Op, Reader, Writer};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};

/// Dense projection.
#[derive(Debug, Clone)]
pub struct Dense {
    w: Array2<f64>,
    /// `Wᵀ` in f32, packed for single-row products, made on first use (a refinement
    /// replaces the matrix every minibatch and never scores in f32).
    w32: std::sync::OnceLock<linalg::NarrowF32>,
}

impl Dense {
    /// `W` (`m × n`, both ≥ 1, finite).
    pub fn new(w: Array2<f64>) -> Result<Dense> {
        if w.nrows() == 0 || w.ncols() == 0 {
            return Err(Error::input("dense step: the matrix is empty"));
        }
        if w.iter().any(|v| !v.is_finite()) {
            return Err(Error::input(
                "dense step: the matrix has a non-finite entry",
            ));
        }
        Ok(Dense {
            w,
            w32: std::sync::OnceLock::new(),
        })
    }
    /// `W`.
    pub fn matrix(&self) -> &Array2<f64> {
        &self.w
    }
}

impl Op for Dense {
    const NAME: &'static str = "dense";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        match ins {
            [n] if *n == self.w.ncols() => Ok(self.w.nrows()),
            [n] => Err(format!(
                "matrix has {} columns but the input width is {n}",
                self.w.ncols()
            )),
            _ => Err(format!("expects one input, got {}", ins.len())),
        }
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        linalg::abt_seq(x.view(), self.w.view())
    }
    const F32: bool = true;
    const F32_BATCH: bool = false;
    fn apply_row32(&self, level: crate::simd::Level, x: &[f32], y: &mut [f32]) {
        let w32 = self.w32.get_or_init(|| {
            let wt: Vec<f32> = self.w.t().iter().map(|v| *v as f32).collect();
            linalg::NarrowF32::from_k_by_n(&wt, self.w.ncols(), self.w.nrows())
        });
        w32.product_at(level, x, y);
    }
    fn backward(
        &self,
        xs: &[ArrayView2<f64>],
        _y: ArrayView2<f64>,
        gy: ArrayView2<f64>,
        gp: Option<&mut [f64]>,
        need_gx: bool,
    ) -> Vec<Array2<f64>> {
        // y = x Wᵀ: ∂L/∂W = gyᵀ x, ∂L/∂x = gy W.
        if let Some(gp) = gp {
            let gw = linalg::ab_seq(gy.t(), xs[0]);
            gp.iter_mut().zip(gw.iter()).for_each(|(o, v)| *o += v);
        }
        if !need_gx {
            return vec![];
        }
        vec![linalg::ab_seq(gy, self.w.view())]
    }
    fn params(&self) -> Vec<f64> {
        self.w.iter().copied().collect()
    }
    fn with_params(&self, p: &[f64]) -> Result<Self> {
        Dense::new(
            Array2::from_shape_vec(self.w.dim(), p.to_vec())
                .map_err(|e| Error::internal(e.to_string()))?,
        )
    }
    fn cost(&self, ins: &[usize], out: usize) -> Cost {
        Cost {
            flops: 2 * self.w.len() as u64,
            param_bytes: 8 * self.w.len() as u64,
            activation_bytes: 8 * (ins[0] + out) as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        format!("{} × {} matrix", self.w.nrows(), self.w.ncols())
    }
    fn write(&self, w: &mut Writer) {
        w.f64s(
            "weights",
            vec![self.w.nrows(), self.w.ncols()],
            self.w.iter().copied().collect(),
        );
    }
    fn read(r: &Reader) -> Result<Self> {
        Dense::new(r.matrix("weights", None, Some(r.in_dim()))?).map_err(|e| r.bad(e))
    }
}
