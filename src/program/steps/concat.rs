//! `concat`: inputs side by side (the features of a sum of kernels).

use crate::program::op::{Cost, Op, Reader, Writer};
use crate::Result;
use ndarray::{Array2, ArrayView2, Axis};

/// Concatenation.
#[derive(Debug, Clone)]
pub struct Concat;

impl Op for Concat {
    const NAME: &'static str = "concat";
    const ARITY: Option<usize> = None;
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        if ins.is_empty() {
            return Err("expects at least one input".into());
        }
        Ok(ins.iter().sum())
    }
    fn apply_many(&self, xs: &[ArrayView2<f64>]) -> Array2<f64> {
        ndarray::concatenate(Axis(1), xs).expect("inputs have the same rows")
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
        let mut at = 0;
        xs.iter()
            .map(|x| {
                let w = x.ncols();
                at += w;
                gy.slice(ndarray::s![.., at - w..at]).to_owned()
            })
            .collect()
    }
    fn cost(&self, _ins: &[usize], out: usize) -> Cost {
        Cost {
            activation_bytes: 16 * out as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        String::new()
    }
    fn write(&self, _w: &mut Writer) {}
    fn read(_r: &Reader) -> Result<Self> {
        Ok(Concat)
    }
}
