//! `gather`: `y_i = x_{idx_i}` — permutations, truncations and repetitions (int32 indices).

use crate::program::op::{rows_map, Cost, Op, Reader, Writer};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};

/// Index selection.
#[derive(Debug, Clone)]
pub struct Gather {
    idx: Vec<u32>,
    /// The largest index.
    top: usize,
}

impl Gather {
    /// Indices (each checked against the input width when the step is placed).
    pub fn new(idx: Vec<u32>) -> Result<Gather> {
        if idx.is_empty() {
            return Err(Error::input("gather step: no indices"));
        }
        let top = idx.iter().copied().max().unwrap_or(0) as usize;
        if top > i32::MAX as usize {
            return Err(Error::input(format!(
                "gather step: index {top} is beyond the int32 range"
            )));
        }
        Ok(Gather { idx, top })
    }
    /// The first `n` entries (a truncation).
    pub fn first(n: usize) -> Result<Gather> {
        Gather::new((0..n as u32).collect())
    }
    /// The indices.
    pub fn indices(&self) -> &[u32] {
        &self.idx
    }
}

impl Op for Gather {
    const NAME: &'static str = "gather";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        match ins {
            [n] => match self.idx.iter().position(|i| *i as usize >= *n) {
                Some(p) => Err(format!(
                    "index {} at position {p} is out of range for width {n}",
                    self.idx[p]
                )),
                None => Ok(self.idx.len()),
            },
            _ => Err(format!("expects one input, got {}", ins.len())),
        }
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        rows_map(&x, self.idx.len(), |a, b| {
            b.iter_mut()
                .zip(&self.idx)
                .for_each(|(o, i)| *o = a[*i as usize])
        })
    }
    const F32: bool = true;
    #[inline(always)]
    fn apply_row32(&self, level: crate::simd::Level, x: &[f32], y: &mut [f32]) {
        // One check for the whole row (the largest index is known), then the gather for
        // the level the program runs at.
        crate::transform::gather::check(level, x.len(), self.idx.len(), y.len(), self.top);
        // SAFETY: checked just above.
        unsafe { crate::transform::gather::gather_unchecked(level, x, &self.idx, y) }
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
        // Scatter-add: a repeated index collects every copy's gradient.
        let mut g = Array2::<f64>::zeros((gy.nrows(), xs[0].ncols()));
        for (mut gr, yr) in g.rows_mut().into_iter().zip(gy.rows()) {
            for (v, i) in yr.iter().zip(&self.idx) {
                gr[*i as usize] += v;
            }
        }
        vec![g]
    }
    fn cost(&self, ins: &[usize], out: usize) -> Cost {
        Cost {
            param_bytes: 4 * out as u64,
            activation_bytes: 8 * (ins[0] + out) as u64,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        format!("{} indices (int32)", self.idx.len())
    }
    fn write(&self, w: &mut Writer) {
        w.i32s(
            "indices",
            vec![self.idx.len()],
            self.idx.iter().map(|v| *v as i32).collect(),
        );
    }
    fn read(r: &Reader) -> Result<Self> {
        let v = r.i32s("indices", &[None])?;
        let idx: Vec<u32> = v
            .iter()
            .map(|i| u32::try_from(*i).map_err(|_| r.bad(format!("negative index {i}"))))
            .collect::<Result<_>>()?;
        Gather::new(idx).map_err(|e| r.bad(e))
    }
}
