//! The numbers of the report: agreement interval, decision-value errors, kernel errors.

use crate::features::nystrom_from_landmarks;
use crate::model::CompiledModel;
use crate::program::{Program, Step};
use crate::{Error, Result};
use ndarray::ArrayView2;

/// Wilson score interval for `k` successes in `n` trials at 95% (z = 1.959964).
/// (Wilson 1927; standard form, from memory.)
pub fn wilson95(k: usize, n: usize) -> (f64, f64) {
    if n == 0 {
        return (0.0, 1.0);
    }
    let z = 1.959963984540054;
    let n_f = n as f64;
    let p = k as f64 / n_f;
    let den = 1.0 + z * z / n_f;
    let centre = (p + z * z / (2.0 * n_f)) / den;
    let half = z * (p * (1.0 - p) / n_f + z * z / (4.0 * n_f * n_f)).sqrt() / den;
    ((centre - half).max(0.0), (centre + half).min(1.0))
}

/// Decision-value error: (rmse, r², max abs) pooled over all outputs.
pub fn decision_errors(exact: ArrayView2<f64>, approx: ArrayView2<f64>) -> (f64, f64, f64) {
    let n = exact.len() as f64;
    let mean = exact.sum() / n;
    let mut sse = 0.0;
    let mut sst = 0.0;
    let mut max: f64 = 0.0;
    for (a, b) in exact.iter().zip(approx.iter()) {
        sse += (a - b) * (a - b);
        sst += (a - mean) * (a - mean);
        max = max.max((a - b).abs());
    }
    let r2 = if sst > 0.0 { 1.0 - sse / sst } else { f64::NAN };
    ((sse / n).sqrt(), r2, max)
}

/// The feature program whose inner products approximate the kernel: the model's own
/// program, or for a Nyström model whose head was folded into the landmarks, the Nyström
/// map rebuilt from its landmarks (an analysis step of the report; loading never does it).
pub fn kernel_features(model: &CompiledModel) -> Result<Program> {
    if !model.is_folded() {
        return Ok(model.program().clone());
    }
    let ins = model.program().instrs();
    match ins.last().map(|i| &i.step) {
        Some(Step::KernelBlock(kb)) if ins.len() == 1 => {
            let mut info = crate::features::SampleInfo::default();
            nystrom_from_landmarks(
                kb.kernel(),
                kb.landmarks().clone(),
                model.spec().options.rank_tol,
                &mut info,
            )
        }
        _ => Err(Error::internal(
            "a folded head on a program that is not a landmark block",
        )),
    }
}

/// Kernel approximation error on `xs` (scaled inputs): (max abs, rmse, relative Frobenius)
/// of `Z Zᵀ` against the exact Gram matrix.
pub fn kernel_errors(model: &CompiledModel, xs: ArrayView2<f64>) -> Result<(f64, f64, f64)> {
    let z = kernel_features(model)?.apply(xs);
    Ok(gram_errors(&model.spec().kernel, xs, z.view()))
}

/// As [`kernel_errors`], from the features `z` of `xs` already computed.
pub fn gram_errors(
    k: &crate::kernel::Kernel,
    xs: ArrayView2<f64>,
    z: ArrayView2<f64>,
) -> (f64, f64, f64) {
    let g = k.gram(xs, xs);
    let approx = crate::linalg::abt_seq(z, z);
    let mut max: f64 = 0.0;
    let mut sse = 0.0f64;
    let mut ss = 0.0f64;
    for (a, b) in g.iter().zip(approx.iter()) {
        max = max.max((a - b).abs());
        sse += (a - b) * (a - b);
        ss += a * a;
    }
    (
        max,
        (sse / g.len() as f64).sqrt(),
        (sse / ss.max(1e-300)).sqrt(),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn wilson_interval_reference() {
        // Wilson interval for 8/10 at 95%: (0.4902, 0.9433) (standard worked example, from
        // memory).
        let (lo, hi) = wilson95(8, 10);
        assert!(
            (lo - 0.4902).abs() < 1e-4 && (hi - 0.9433).abs() < 1e-4,
            "{lo} {hi}"
        );
        let (lo, hi) = wilson95(100, 100);
        assert!(hi == 1.0 && lo > 0.96);
    }
}
