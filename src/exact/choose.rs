//! Choosing the SVM cost C (and the width of a shift-invariant kernel) by held-out accuracy
//! on a small grid: every fifth training row is held out (rows 4, 9, 14, …), each candidate
//! is trained on the others and scored on them, and the most accurate wins (ties: the
//! smaller C, then the width multiplier closest to 1). Common practice for kernel SVMs.

use super::{fit_svm, SmoOptions};
use crate::kernel::{Kernel, Width};
use crate::observe::Observer;
use crate::{Error, Result};
use ndarray::{ArrayView2, Axis};

/// The costs tried.
pub const C_GRID: [f64; 5] = [0.1, 1.0, 10.0, 100.0, 1000.0];

/// The multipliers of γ tried for a single shift-invariant kernel (γ·m, or lengthscale/√m).
pub const WIDTH_GRID: [f64; 3] = [0.5, 1.0, 2.0];

/// One candidate's held-out accuracy.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Candidate {
    /// Cost C.
    pub c: f64,
    /// The factor γ was multiplied by (1 when the kernel's width is not searched): above 1
    /// the kernel is narrower (γ larger, lengthscales shorter), below 1 wider.
    pub gamma_factor: f64,
    /// The kernel tried.
    pub kernel: String,
    /// Accuracy on the held-out rows.
    pub accuracy: f64,
}

/// The kernel with its width scaled by `m` (γ·m), or `None` when it has no single width.
pub fn scale_width(k: &Kernel, m: f64) -> Option<Kernel> {
    let w = |w: &Width| match w {
        Width::Gamma(g) => Width::Gamma(g * m),
        Width::Lengthscale(l) => Width::Lengthscale(l / m.sqrt()),
        Width::PerDim(v) => Width::PerDim(v.iter().map(|l| l / m.sqrt()).collect()),
    };
    Some(match k {
        Kernel::Gaussian { width } => Kernel::Gaussian { width: w(width) },
        Kernel::Laplacian { width } => Kernel::Laplacian { width: w(width) },
        Kernel::Matern { nu, width } => Kernel::Matern {
            nu: *nu,
            width: w(width),
        },
        Kernel::RationalQuadratic { alpha, width } => Kernel::RationalQuadratic {
            alpha: *alpha,
            width: w(width),
        },
        _ => return None,
    })
}

/// Tries the grid; returns every candidate, best first.
pub fn choose_svm(
    kernel: &Kernel,
    x: ArrayView2<f64>,
    y: &[String],
    opts: &SmoOptions,
    obs: &dyn Observer,
) -> Result<Vec<Candidate>> {
    let n = x.nrows();
    let hold: Vec<usize> = (0..n).filter(|i| i % 5 == 4).collect();
    let train: Vec<usize> = (0..n).filter(|i| i % 5 != 4).collect();
    if hold.len() < 10 {
        return Err(Error::input(format!(
            "choosing C needs at least 50 training rows (every fifth is held out); got {n}"
        )));
    }
    let (xt, xh) = (x.select(Axis(0), &train), x.select(Axis(0), &hold));
    let yt: Vec<String> = train.iter().map(|i| y[*i].clone()).collect();
    let yh: Vec<&String> = hold.iter().map(|i| &y[*i]).collect();
    let widths: Vec<f64> = if scale_width(kernel, 1.0).is_some() {
        WIDTH_GRID.to_vec()
    } else {
        vec![1.0]
    };
    obs.stage("choosing C", (C_GRID.len() * widths.len()) as u64);
    let mut out = Vec::new();
    for &m in &widths {
        let k = scale_width(kernel, m).unwrap_or_else(|| kernel.clone());
        for &c in &C_GRID {
            let o = SmoOptions { c, ..opts.clone() };
            let model = fit_svm(&k, xt.view(), &yt, &o, None, &crate::observe::Silent)?;
            let pred = model.labels_of(model.decision(xh.view()).view());
            let acc =
                pred.iter().zip(&yh).filter(|(p, t)| p == *t).count() as f64 / yh.len() as f64;
            out.push(Candidate {
                c,
                gamma_factor: m,
                kernel: k.to_string(),
                accuracy: acc,
            });
            obs.advance(1);
        }
    }
    obs.finish();
    out.sort_by(|a, b| {
        b.accuracy
            .total_cmp(&a.accuracy)
            .then(a.c.total_cmp(&b.c))
            .then((a.gamma_factor.ln().abs()).total_cmp(&b.gamma_factor.ln().abs()))
    });
    Ok(out)
}
