//! `taylor`: Taylor features of the Gaussian kernel (Cotter, Keshet & Srebro, "Explicit
//! approximations of the Gaussian kernel", arXiv:1109.4603, 2011). Deterministic.
//!
//! With `u = s ⊙ x` scaled so that `k(x, y) = exp(−‖u − v‖²/2)`,
//! `k = e^{−‖u‖²/2} e^{−‖v‖²/2} Σ_k (u·v)^k / k!` and `(u·v)^k / k! = Σ_{|α|=k} u^α v^α / α!`,
//! so truncating at degree `p` gives the map `φ_α(u) = e^{−‖u‖²/2} u^α / √(α!)` over all
//! multi-indices with `|α| ≤ p`: `C(d+p, p)` features. The degree is the largest whose
//! feature count fits the requested `D`. Accurate where `‖u‖` is small, so for
//! low-dimensional inputs; it is the method for them, where random features lose to the
//! exact model.
//!
//! Program: `scale` by the kernel's inverse lengthscales, `append 1`, `gather` the `p`
//! factors of every monomial (the appended 1 fills lower degrees), `segment_product`,
//! `scale` by `1/√(α!)`, and a `product` with the envelope `e^{−‖u‖²/2}`, itself the
//! `kernel_block` of `exp(−‖u − 0‖²/2)` against the origin.

use super::{Ctx, Sampler};
use crate::kernel::{Kernel, Width};
use crate::program::{steps, ValueId};
use crate::{Error, Result};
use ndarray::Array2;

pub(crate) struct Taylor;

/// Largest degree supported (factorials stay exact in f64 well beyond).
const MAX_DEGREE: usize = 40;

/// `C(d + p, p)`, saturating.
fn count(d: usize, p: usize) -> usize {
    let mut c: u128 = 1;
    for i in 1..=p as u128 {
        c = c * (d as u128 + i) / i;
        if c > usize::MAX as u128 {
            return usize::MAX;
        }
    }
    c as usize
}

/// Every nondecreasing sequence of `p` indices in `0..=d` (index `d` is the appended 1).
fn monomials(d: usize, p: usize) -> Vec<Vec<u32>> {
    fn rec(d: usize, left: usize, from: usize, cur: &mut Vec<u32>, out: &mut Vec<Vec<u32>>) {
        if left == 0 {
            out.push(cur.clone());
            return;
        }
        for i in from..=d {
            cur.push(i as u32);
            rec(d, left - 1, i, cur, out);
            cur.pop();
        }
    }
    let mut out = Vec::with_capacity(count(d, p));
    rec(d, p, 0, &mut Vec::with_capacity(p), &mut out);
    out
}

impl Sampler for Taylor {
    fn name(&self) -> &'static str {
        "taylor"
    }
    fn serves(&self, k: &Kernel) -> bool {
        matches!(k, Kernel::Gaussian { .. })
    }
    fn leaf(&self, cx: &mut Ctx, k: &Kernel, dd: usize, x: ValueId) -> Result<ValueId> {
        let d = cx.spec.input_dim;
        let p = (1..=MAX_DEGREE)
            .take_while(|p| count(d, *p) <= dd)
            .last()
            .ok_or_else(|| {
                Error::input(format!(
                    "--features {dd} is too few for taylor features of {d} inputs: degree 1 needs {}",
                    d + 1
                ))
            })?;
        let mono = monomials(d, p);
        let weights: Vec<f64> = mono
            .iter()
            .map(|m| {
                // 1/√(α!) over the real coordinates (index d is the constant 1).
                let mut f = 1.0f64;
                let mut run = 1.0;
                for (j, i) in m.iter().enumerate() {
                    if *i as usize == d {
                        break;
                    }
                    run = if j > 0 && m[j - 1] == *i {
                        run + 1.0
                    } else {
                        1.0
                    };
                    f *= run;
                }
                1.0 / f.sqrt()
            })
            .collect();
        let n = mono.len();
        cx.info.notes.push(format!(
            "taylor: degree {p} gives {n} features of the {dd} requested (C({}, {p}))",
            d + p
        ));
        let scale = k
            .inverse_scale(d)
            .ok_or_else(|| Error::internal("taylor needs a shift-invariant kernel"))?;
        let u = cx.b.push(steps::Scale::new(scale)?, &[x])?;
        let u1 = cx.b.push(steps::Append::new(1.0)?, &[u])?;
        let g = cx.b.push(
            steps::Gather::new(mono.into_iter().flatten().collect())?,
            &[u1],
        )?;
        let prods =
            cx.b.push(steps::SegmentProduct::new(vec![p as u32; n])?, &[g])?;
        let feats = cx.b.push(steps::Scale::new(weights)?, &[prods])?;
        let unit = Kernel::Gaussian {
            width: Width::Gamma(0.5),
        };
        let env =
            cx.b.push(steps::KernelBlock::new(unit, Array2::zeros((1, d)))?, &[u])?;
        cx.b.push(steps::Product, &[feats, env])
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn monomial_counts_are_binomials() {
        for (d, p) in [(1, 3), (2, 2), (3, 4), (6, 3)] {
            assert_eq!(monomials(d, p).len(), count(d, p), "d={d} p={p}");
        }
        assert_eq!(count(6, 4), 210);
    }
}
