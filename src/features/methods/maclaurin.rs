//! `maclaurin`: random Maclaurin features (Kar & Karnick, AISTATS 2012) of
//! `(γ x·y + c)^p = Σ_n a_n (x·y)^n`, `a_n = C(p,n) γ^n c^{p−n}`: feature `i` draws a degree
//! `N_i` with `P[N = n] = 2^{−(n+1)}` and `N_i` Rademacher vectors `w_ij`, and is
//! `√(a_N 2^{N+1} / D) · Π_j (w_ij · x)`.
//!
//! Program: `dense` onto all `Σ N_i` Rademacher rows, `segment_product` per feature,
//! `scale` by the coefficients.

use super::{dense, Ctx, Sampler};
use crate::kernel::Kernel;
use crate::program::{steps, ValueId};
use crate::Result;
use ndarray::Array2;
use rand::RngExt;

pub(crate) struct Maclaurin;

fn binom(n: usize, k: usize) -> f64 {
    (0..k).fold(1.0, |acc, i| acc * (n - i) as f64 / (i + 1) as f64)
}

impl Sampler for Maclaurin {
    fn name(&self) -> &'static str {
        "maclaurin"
    }
    fn serves(&self, k: &Kernel) -> bool {
        matches!(k, Kernel::Polynomial { .. })
    }
    fn leaf(&self, cx: &mut Ctx, k: &Kernel, dd: usize, x: ValueId) -> Result<ValueId> {
        let (p, gamma, coef0) = super::polynomial(k, self)?;
        let d = cx.spec.input_dim;
        let a = |n: usize| {
            if n > p {
                0.0
            } else {
                binom(p, n) * gamma.powi(n as i32) * coef0.powi((p - n) as i32)
            }
        };
        let mut lens = Vec::with_capacity(dd);
        let mut coef = Vec::with_capacity(dd);
        let mut rows: Vec<f64> = Vec::new();
        for _ in 0..dd {
            let mut n = 0usize;
            while cx.rng.random::<bool>() {
                n += 1;
            }
            lens.push(n as u32);
            coef.push((a(n) * 2f64.powi(n as i32 + 1) / dd as f64).sqrt());
            for _ in 0..n * d {
                rows.push(if cx.rng.random::<bool>() { 1.0 } else { -1.0 });
            }
        }
        let total = rows.len() / d;
        let v = if total > 0 {
            let w = Array2::from_shape_vec((total, d), rows)
                .map_err(|e| crate::Error::internal(e.to_string()))?;
            let p = dense(cx, w, x)?;
            cx.b.push(steps::SegmentProduct::new(lens)?, &[p])?
        } else {
            // Every feature drew degree 0 (possible for tiny D): constant features,
            // built as a gathered 1 appended to a zeroed coordinate.
            let one = cx.b.push(steps::Gather::new(vec![0])?, &[x])?;
            let zero = cx.b.push(steps::ConstScale::new(0.0)?, &[one])?;
            let with_one = cx.b.push(steps::Append::new(1.0)?, &[zero])?;
            cx.b.push(steps::Gather::new(vec![1; lens.len()])?, &[with_one])?
        };
        cx.b.push(steps::Scale::new(coef)?, &[v])
    }
}
