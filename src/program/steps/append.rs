//! `append`: one constant appended, `y = [x, c]` (the `√coef0` coordinate of a polynomial
//! kernel's sketch, the `1` that lets monomials of every degree share one product).

use crate::program::op::{check_finite, rows_map, Cost, Op, Reader, Writer};
use crate::Result;
use ndarray::{Array2, ArrayView2};

/// Append a constant.
#[derive(Debug, Clone)]
pub struct Append {
    c: f64,
}

impl Append {
    /// A finite constant.
    pub fn new(c: f64) -> Result<Append> {
        check_finite(&[c], "append step", false)?;
        Ok(Append { c })
    }
    /// The constant.
    pub fn value(&self) -> f64 {
        self.c
    }
}

impl Op for Append {
    const NAME: &'static str = "append";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        match ins {
            [n] => Ok(n + 1),
            _ => Err(format!("expects one input, got {}", ins.len())),
        }
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        let n = x.ncols();
        rows_map(&x, n + 1, |a, b| {
            b[..n].copy_from_slice(a);
            b[n] = self.c;
        })
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
        format!("c = {:.6e}", self.c)
    }
    fn write(&self, w: &mut Writer) {
        w.scalar("c", self.c);
    }
    fn read(r: &Reader) -> Result<Self> {
        Append::new(r.num("c")?)
    }
}
