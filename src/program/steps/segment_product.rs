//! `segment_product`: products over consecutive segments, `y_i = Π_{j ∈ segment i} x_j`
//! (an empty segment gives 1). Random Maclaurin features and monomials are built from it.

use crate::program::op::{rows_map, Cost, Op, Reader, Writer};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};

/// Segment products.
#[derive(Debug, Clone)]
pub struct SegmentProduct {
    lens: Vec<u32>,
    total: usize,
}

impl SegmentProduct {
    /// Segment lengths (at least one segment).
    pub fn new(lens: Vec<u32>) -> Result<SegmentProduct> {
        if lens.is_empty() {
            return Err(Error::input("segment_product step: no segments"));
        }
        let total = lens.iter().map(|v| *v as usize).sum();
        Ok(SegmentProduct { lens, total })
    }
    /// The lengths.
    pub fn lengths(&self) -> &[u32] {
        &self.lens
    }
}

impl Op for SegmentProduct {
    const NAME: &'static str = "segment_product";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        match ins {
            [n] if *n == self.total => Ok(self.lens.len()),
            [n] => Err(format!(
                "segments cover {} values but the input width is {n}",
                self.total
            )),
            _ => Err(format!("expects one input, got {}", ins.len())),
        }
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        rows_map(&x, self.lens.len(), |a, b| {
            let mut at = 0;
            for (o, l) in b.iter_mut().zip(&self.lens) {
                let l = *l as usize;
                *o = a[at..at + l].iter().product();
                at += l;
            }
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
        // ∂y_s/∂x_t = Π_{u ∈ s, u ≠ t} x_u (products without division, so zeros are exact).
        let mut g = Array2::<f64>::zeros(xs[0].dim());
        for ((mut gr, xr), gyr) in g.rows_mut().into_iter().zip(xs[0].rows()).zip(gy.rows()) {
            let mut at = 0;
            for (s, l) in self.lens.iter().enumerate() {
                let l = *l as usize;
                for t in at..at + l {
                    let p: f64 = (at..at + l).filter(|u| *u != t).map(|u| xr[u]).product();
                    gr[t] = gyr[s] * p;
                }
                at += l;
            }
        }
        vec![g]
    }
    fn cost(&self, ins: &[usize], out: usize) -> Cost {
        Cost {
            flops: ins[0] as u64,
            param_bytes: 4 * out as u64,
            activation_bytes: 8 * (ins[0] + out) as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        format!("{} segments over {} values", self.lens.len(), self.total)
    }
    fn write(&self, w: &mut Writer) {
        w.i32s(
            "lengths",
            vec![self.lens.len()],
            self.lens.iter().map(|v| *v as i32).collect(),
        );
    }
    fn read(r: &Reader) -> Result<Self> {
        let v = r.i32s("lengths", &[None])?;
        let lens = v
            .iter()
            .map(|i| u32::try_from(*i).map_err(|_| r.bad(format!("negative length {i}"))))
            .collect::<Result<_>>()?;
        SegmentProduct::new(lens).map_err(|e| r.bad(e))
    }
}
