//! Frequencies of shift-invariant kernels, for unit scale (inputs are multiplied by the
//! kernel's per-dimension inverse scale first, see [`crate::kernel`]):
//!
//! | kernel (unit scale) | spectral distribution (Bochner's theorem; Rahimi & Recht 2007) |
//! |---|---|
//! | Gaussian `exp(−‖u‖²/2)` | `ω ~ N(0, I)` |
//! | Laplacian `exp(−‖u‖₁)` | `ω_j` iid standard Cauchy |
//! | Matérn ν `k(‖u‖)` | multivariate Student-t, 2ν dof: `ω = g·√(2ν/v)`, `g ~ N(0,I)`, `v ~ χ²_{2ν}` |
//! | rational quadratic α | `τ ~ Gamma(α, rate α)`, `ω ~ N(0, τI)` |
//!
//! Samplers here: i.i.d. (`fourier`), orthogonal blocks (`orthogonal`; the radial
//! distribution is kept by scaling each orthonormal row by the norm of an independent draw)
//! and quasi-Monte Carlo (`quasi`; coordinates through inverse CDFs).

use super::qmc;
use super::spec::Sequence;
use super::special::{cauchy_ppf, chi2_ppf, gamma_ppf, norm_ppf};
use crate::kernel::{Kernel, Nu};
use crate::linalg;
use crate::Result;
use ndarray::Array2;
use rand::RngExt;
use rand_distr::{Cauchy, ChiSquared, Distribution, Gamma, StandardNormal};

type Rng = rand::rngs::ChaCha20Rng;

/// One frequency vector of a (leaf, shift-invariant) kernel at unit scale.
pub fn draw(k: &Kernel, d: usize, rng: &mut Rng) -> Vec<f64> {
    match k {
        Kernel::Gaussian { .. } => (0..d).map(|_| rng.sample(StandardNormal)).collect(),
        Kernel::Laplacian { .. } => {
            let c = Cauchy::new(0.0, 1.0).unwrap();
            (0..d).map(|_| c.sample(rng)).collect()
        }
        Kernel::Matern { nu, .. } => {
            let two_nu = 2.0 * nu.value();
            let v: f64 = ChiSquared::new(two_nu).unwrap().sample(rng);
            let f = (two_nu / v).sqrt();
            (0..d)
                .map(|_| f * rng.sample::<f64, _>(StandardNormal))
                .collect()
        }
        Kernel::RationalQuadratic { alpha, .. } => {
            let tau: f64 = Gamma::new(*alpha, 1.0 / alpha).unwrap().sample(rng);
            let f = tau.sqrt();
            (0..d)
                .map(|_| f * rng.sample::<f64, _>(StandardNormal))
                .collect()
        }
        _ => unreachable!("not a shift-invariant leaf"),
    }
}

/// `m × d` i.i.d. frequencies.
pub fn iid(k: &Kernel, d: usize, m: usize, rng: &mut Rng) -> Array2<f64> {
    let mut w = Array2::zeros((m, d));
    for mut row in w.rows_mut() {
        let f = draw(k, d, rng);
        row.iter_mut().zip(f).for_each(|(a, b)| *a = b);
    }
    w
}

/// `m × d` orthogonal random features: stacked blocks `diag(s)·Q`, `Q` Haar-orthogonal (QR of
/// a Gaussian matrix with diag(R) ≥ 0), `s_i` the norm of an independent frequency draw
/// (χ_d for the Gaussian). Rows within a block are orthogonal.
pub fn orthogonal(k: &Kernel, d: usize, m: usize, rng: &mut Rng) -> Array2<f64> {
    let mut w = Array2::zeros((m, d));
    let mut r = 0;
    while r < m {
        let g = Array2::from_shape_simple_fn((d, d), || rng.sample::<f64, _>(StandardNormal));
        let q = linalg::qr_q_signfixed(g.view());
        for i in 0..d {
            if r >= m {
                break;
            }
            let norm = draw(k, d, rng).iter().map(|v| v * v).sum::<f64>().sqrt();
            for j in 0..d {
                // Rows of Qᵀ are the orthonormal columns of Q.
                w[[r, j]] = q[[j, i]] * norm;
            }
            r += 1;
        }
    }
    w
}

/// Extra QMC coordinates a kernel needs beyond `d` (Matérn and RQ draw a scale).
fn extra_dims(k: &Kernel) -> usize {
    match k {
        Kernel::Matern { .. } | Kernel::RationalQuadratic { .. } => 1,
        _ => 0,
    }
}

/// `m × d` quasi-Monte Carlo frequencies: points `1..=m` of the sequence (origin skipped),
/// scrambled with `seed` when given, mapped through the inverse CDFs.
pub fn quasi(
    k: &Kernel,
    d: usize,
    m: usize,
    seq: Sequence,
    seed: Option<u64>,
) -> Result<Array2<f64>> {
    let q = d + extra_dims(k);
    let pts = match seq {
        Sequence::Halton => qmc::halton(m, q, 1, seed),
        Sequence::Sobol => qmc::sobol(m, q, 1, seed)?,
    };
    let eps = 1e-12;
    let u = |i: usize, j: usize| pts[i * q + j].clamp(eps, 1.0 - eps);
    let mut w = Array2::zeros((m, d));
    for i in 0..m {
        let f = match k {
            Kernel::Matern { nu, .. } => {
                let two_nu = match nu {
                    Nu::Half => 1.0,
                    Nu::ThreeHalves => 3.0,
                    Nu::FiveHalves => 5.0,
                };
                (two_nu / chi2_ppf(two_nu, u(i, d))).sqrt()
            }
            Kernel::RationalQuadratic { alpha, .. } => (gamma_ppf(*alpha, u(i, d)) / alpha).sqrt(),
            _ => 1.0,
        };
        for j in 0..d {
            w[[i, j]] = match k {
                Kernel::Laplacian { .. } => cauchy_ppf(u(i, j)),
                _ => f * norm_ppf(u(i, j)),
            };
        }
    }
    Ok(w)
}

/// Uniform phases in `[0, 2π)`.
pub fn phases(m: usize, rng: &mut Rng) -> Vec<f64> {
    (0..m)
        .map(|_| rng.random::<f64>() * std::f64::consts::TAU)
        .collect()
}
