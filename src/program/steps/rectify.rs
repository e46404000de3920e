//! `relu` (`max(0, x)`) and `step` (`1[x > 0]`): the arc-cosine features of Cho & Saul
//! (NIPS 2009) of order 1 and 0.

use crate::program::op::{Cost, Op, Reader, Writer};
use crate::Result;
use ndarray::{Array2, ArrayView2};

/// `max(0, x)`.
#[derive(Debug, Clone)]
pub struct Relu;

/// `1` where `x > 0`, else `0`.
#[derive(Debug, Clone)]
pub struct Heaviside;

fn unary(ins: &[usize]) -> std::result::Result<usize, String> {
    match ins {
        [n] => Ok(*n),
        _ => Err(format!("expects one input, got {}", ins.len())),
    }
}

fn cost(out: usize) -> Cost {
    Cost {
        flops: out as u64,
        activation_bytes: 16 * out as u64,
        ..Cost::default()
    }
}

impl Op for Relu {
    const NAME: &'static str = "relu";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        unary(ins)
    }
    fn apply(&self, mut x: Array2<f64>) -> Array2<f64> {
        x.mapv_inplace(|v| if v > 0.0 { v } else { 0.0 });
        x
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
        // The derivative 1[x > 0] (taken as 0 at the kink).
        let mut g = gy.to_owned();
        g.zip_mut_with(&xs[0], |v, x| {
            if *x <= 0.0 {
                *v = 0.0
            }
        });
        vec![g]
    }
    fn cost(&self, _ins: &[usize], out: usize) -> Cost {
        cost(out)
    }
    fn describe(&self) -> String {
        "max(0, x)".into()
    }
    fn write(&self, _w: &mut Writer) {}
    fn read(_r: &Reader) -> Result<Self> {
        Ok(Relu)
    }
}

impl Op for Heaviside {
    const NAME: &'static str = "step";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        unary(ins)
    }
    fn apply(&self, mut x: Array2<f64>) -> Array2<f64> {
        x.mapv_inplace(|v| if v > 0.0 { 1.0 } else { 0.0 });
        x
    }
    fn backward(
        &self,
        xs: &[ArrayView2<f64>],
        _y: ArrayView2<f64>,
        _gy: ArrayView2<f64>,
        _gp: Option<&mut [f64]>,
        need_gx: bool,
    ) -> Vec<Array2<f64>> {
        if !need_gx {
            return vec![];
        }
        // Piecewise constant: the derivative is zero wherever it exists.
        vec![Array2::zeros(xs[0].dim())]
    }
    fn cost(&self, _ins: &[usize], out: usize) -> Cost {
        cost(out)
    }
    fn describe(&self) -> String {
        "1[x > 0]".into()
    }
    fn write(&self, _w: &mut Writer) {}
    fn read(_r: &Reader) -> Result<Self> {
        Ok(Heaviside)
    }
}
