//! `product`: element-wise product of the inputs (the features of a product of kernels).
//! An input of width 1 multiplies every element (a per-row factor such as a Gaussian
//! envelope); the others must have one common width.

use crate::program::op::{Cost, Op, Reader, Writer};
use crate::Result;
use ndarray::{Array2, ArrayView2};

/// Element-wise product.
#[derive(Debug, Clone)]
pub struct Product;

impl Op for Product {
    const NAME: &'static str = "product";
    const ARITY: Option<usize> = None;
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        if ins.len() < 2 {
            return Err("expects at least two inputs".into());
        }
        let w = ins.iter().copied().max().unwrap_or(0);
        if ins.iter().any(|n| *n != w && *n != 1) {
            return Err(format!("inputs of different widths {ins:?}"));
        }
        Ok(w)
    }
    fn apply_many(&self, xs: &[ArrayView2<f64>]) -> Array2<f64> {
        let w = xs.iter().map(|x| x.ncols()).max().unwrap_or(0);
        let mut acc = Array2::<f64>::ones((xs[0].nrows(), w));
        for x in xs {
            if x.ncols() == w {
                acc *= x;
            } else {
                for (mut a, f) in acc.rows_mut().into_iter().zip(x.column(0)) {
                    a.mapv_inplace(|v| v * f);
                }
            }
        }
        acc
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
        // ∂y/∂x_k = Π_{j≠k} x_j; a width-1 input is broadcast, so its gradient sums the row.
        let w = gy.ncols();
        (0..xs.len())
            .map(|k| {
                let mut others = gy.to_owned();
                for (j, x) in xs.iter().enumerate() {
                    if j == k {
                        continue;
                    }
                    if x.ncols() == w {
                        others *= x;
                    } else {
                        for (mut a, f) in others.rows_mut().into_iter().zip(x.column(0)) {
                            a.mapv_inplace(|v| v * f);
                        }
                    }
                }
                if xs[k].ncols() == w {
                    others
                } else {
                    others
                        .sum_axis(ndarray::Axis(1))
                        .insert_axis(ndarray::Axis(1))
                }
            })
            .collect()
    }
    fn cost(&self, ins: &[usize], out: usize) -> Cost {
        let k = ins.len() as u64;
        Cost {
            flops: k * out as u64,
            activation_bytes: 8 * (ins.iter().sum::<usize>() + out) as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        String::new()
    }
    fn write(&self, _w: &mut Writer) {}
    fn read(_r: &Reader) -> Result<Self> {
        Ok(Product)
    }
}
