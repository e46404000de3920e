//! Kernels: the expression syntax, exact evaluation of pairs, and Gram blocks.
//!
//! A [`Kernel`] is a plain value: it parses from and prints to the expression syntax
//! documented in the README (`gaussian(gamma=0.5)`, `2.5 * matern(nu=1.5, lengthscale=2)
//! + linear()`), and `parse(print(k)) == k`. Evaluation never fails once a kernel has been
//! parsed and [`Kernel::check_dim`] has accepted the input dimension.
//!
//! Conventions (stated once here):
//! - Shift-invariant kernels first scale the difference per dimension, `u = (x − y) ⊙ s`,
//!   then apply a profile of `u`. For `gamma` on the Gaussian `s = √(2γ)` (so
//!   `k = exp(−γ‖x−y‖²)`); for `gamma` on the Laplacian `s = γ` (so `k = exp(−γ‖x−y‖₁)`);
//!   for `lengthscale = ℓ` (scalar or per dimension) `s = 1/ℓ`, with the Gaussian
//!   `exp(−‖u‖²/2)`.
//! - Dot-product kernels take `gamma`, `offset` and `degree`: `(γ x·y + offset)^degree`,
//!   `tanh(γ x·y + offset)` (ONNX-ML's `kernel_params` are `[γ, offset, degree]`). The
//!   older spelling `coef0` of the offset is still read, so earlier model files load.
//!
//! ```
//! use kernelpress::kernel::Kernel;
//! let k: Kernel = "gaussian(gamma=0.5)".parse().unwrap();
//! let v = k.eval(&[0.0, 0.0], &[1.0, 1.0]);
//! assert!((v - (-1.0f64).exp()).abs() < 1e-15);
//! assert_eq!(k.to_string().parse::<Kernel>().unwrap(), k);
//! ```

mod gram;
mod parse;

pub use gram::{Prepared, Prepared32};

use crate::{Error, Result};
use std::f64::consts::PI;

/// How a shift-invariant kernel's width is given.
#[derive(Debug, Clone, PartialEq)]
pub enum Width {
    /// `gamma = γ` (Gaussian and Laplacian only).
    Gamma(f64),
    /// One lengthscale for every dimension.
    Lengthscale(f64),
    /// One lengthscale per input dimension.
    PerDim(Vec<f64>),
}

/// Smoothness of a Matérn kernel; only the half-integer values with closed forms.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Nu {
    /// ν = 1/2 (the Euclidean exponential kernel).
    Half,
    /// ν = 3/2.
    ThreeHalves,
    /// ν = 5/2.
    FiveHalves,
}

impl Nu {
    /// ν as a number.
    pub fn value(self) -> f64 {
        match self {
            Nu::Half => 0.5,
            Nu::ThreeHalves => 1.5,
            Nu::FiveHalves => 2.5,
        }
    }
}

/// A kernel expression.
#[derive(Debug, Clone, PartialEq)]
pub enum Kernel {
    /// `exp(−γ‖x−y‖²)`, or `exp(−‖(x−y)/ℓ‖²/2)`.
    Gaussian {
        /// Width.
        width: Width,
    },
    /// `exp(−γ‖x−y‖₁)`, or `exp(−‖(x−y)/ℓ‖₁)`.
    Laplacian {
        /// Width.
        width: Width,
    },
    /// Matérn with ν ∈ {½, 3⁄2, 5⁄2} on `r = ‖(x−y)/ℓ‖₂`.
    Matern {
        /// Smoothness.
        nu: Nu,
        /// Lengthscale (never `Gamma`).
        width: Width,
    },
    /// `(1 + r²/(2α))^(−α)` with `r = ‖(x−y)/ℓ‖₂`.
    RationalQuadratic {
        /// Shape α > 0.
        alpha: f64,
        /// Lengthscale (never `Gamma`).
        width: Width,
    },
    /// `(γ x·y + coef0)^degree`.
    Polynomial {
        /// Degree ≥ 1.
        degree: u32,
        /// γ > 0.
        gamma: f64,
        /// coef0 ≥ 0 (finite).
        coef0: f64,
    },
    /// Cho–Saul arc-cosine kernel of order 0 or 1.
    ArcCos {
        /// 0 or 1.
        order: u32,
    },
    /// `x·y`.
    Linear,
    /// `tanh(γ x·y + coef0)`; not positive definite in general.
    Sigmoid {
        /// γ > 0.
        gamma: f64,
        /// coef0 (finite).
        coef0: f64,
    },
    /// Sum of two or more kernels (built by [`Kernel::sum`]).
    Sum(Terms),
    /// Product of two or more kernels (built by [`Kernel::product`]).
    Product(Terms),
    /// `c * k` with c > 0.
    Scaled(f64, Box<Kernel>),
}

/// Two or more kernels: the parts of a sum or a product. Only [`Kernel::sum`] and
/// [`Kernel::product`] build one, so an empty or one-part sum cannot exist.
#[derive(Debug, Clone, PartialEq)]
pub struct Terms(Vec<Kernel>);

impl std::ops::Deref for Terms {
    type Target = [Kernel];
    fn deref(&self) -> &[Kernel] {
        &self.0
    }
}

impl IntoIterator for Terms {
    type Item = Kernel;
    type IntoIter = std::vec::IntoIter<Kernel>;
    fn into_iter(self) -> Self::IntoIter {
        self.0.into_iter()
    }
}

impl std::str::FromStr for Kernel {
    type Err = Error;
    fn from_str(s: &str) -> Result<Kernel> {
        parse::parse(s)
    }
}

impl std::fmt::Display for Kernel {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        parse::print(self, f)
    }
}

impl Kernel {
    /// Builds the sum of `parts`, flattening nested sums (one part is that part itself).
    ///
    /// ```
    /// use kernelpress::kernel::Kernel;
    /// assert!(Kernel::sum(vec![]).is_err());
    /// let k = Kernel::sum(vec![Kernel::Linear, "gaussian(gamma=1)".parse().unwrap()]).unwrap();
    /// assert_eq!(k.to_string(), "linear() + gaussian(gamma=1.0)");
    /// ```
    pub fn sum(parts: Vec<Kernel>) -> Result<Kernel> {
        let mut flat = Vec::new();
        for p in parts {
            match p {
                Kernel::Sum(v) => flat.extend(v),
                other => flat.push(other),
            }
        }
        match flat.len() {
            0 => Err(Error::input("a sum of kernels needs at least one part")),
            1 => Ok(flat.pop().expect("one part")),
            _ => Ok(Kernel::Sum(Terms(flat))),
        }
    }

    /// Builds the product of `parts`, flattening nested products.
    pub fn product(parts: Vec<Kernel>) -> Result<Kernel> {
        let mut flat = Vec::new();
        for p in parts {
            match p {
                Kernel::Product(v) => flat.extend(v),
                other => flat.push(other),
            }
        }
        match flat.len() {
            0 => Err(Error::input("a product of kernels needs at least one part")),
            1 => Ok(flat.pop().expect("one part")),
            _ => Ok(Kernel::Product(Terms(flat))),
        }
    }

    /// The kernel's name in the syntax (`gaussian`, `sum`, …).
    pub fn name(&self) -> &'static str {
        match self {
            Kernel::Gaussian { .. } => "gaussian",
            Kernel::Laplacian { .. } => "laplacian",
            Kernel::Matern { .. } => "matern",
            Kernel::RationalQuadratic { .. } => "rational_quadratic",
            Kernel::Polynomial { .. } => "polynomial",
            Kernel::ArcCos { .. } => "arccos",
            Kernel::Linear => "linear",
            Kernel::Sigmoid { .. } => "sigmoid",
            Kernel::Sum(_) => "sum",
            Kernel::Product(_) => "product",
            Kernel::Scaled(..) => "scaled",
        }
    }

    /// True when the kernel is shift-invariant, `k(x, y) = k(x − y)`.
    pub fn is_shift_invariant(&self) -> bool {
        matches!(
            self,
            Kernel::Gaussian { .. }
                | Kernel::Laplacian { .. }
                | Kernel::Matern { .. }
                | Kernel::RationalQuadratic { .. }
        )
    }

    /// False for kernels that are not positive definite in general (sigmoid, anywhere in
    /// the expression).
    pub fn is_positive_definite(&self) -> bool {
        match self {
            Kernel::Sigmoid { .. } => false,
            Kernel::Sum(v) | Kernel::Product(v) => v.iter().all(|k| k.is_positive_definite()),
            Kernel::Scaled(_, k) => k.is_positive_definite(),
            _ => true,
        }
    }

    /// Checks that the kernel can be evaluated on `d`-dimensional inputs (per-dimension
    /// lengthscale vectors must have length `d`).
    pub fn check_dim(&self, d: usize) -> Result<()> {
        match self {
            Kernel::Gaussian { width }
            | Kernel::Laplacian { width }
            | Kernel::Matern { width, .. }
            | Kernel::RationalQuadratic { width, .. } => {
                if let Width::PerDim(v) = width {
                    if v.len() != d {
                        return Err(Error::input(format!(
                            "kernel {}: lengthscale has {} entries but the data have {} features",
                            self.name(),
                            v.len(),
                            d
                        )));
                    }
                }
                Ok(())
            }
            Kernel::Sum(v) | Kernel::Product(v) => v.iter().try_for_each(|k| k.check_dim(d)),
            Kernel::Scaled(_, k) => k.check_dim(d),
            _ => Ok(()),
        }
    }

    /// Per-dimension scale `s` of a shift-invariant kernel (`u = (x−y) ⊙ s`), for `d` inputs.
    /// Returns `None` for other kernels.
    pub fn inverse_scale(&self, d: usize) -> Option<Vec<f64>> {
        let (width, gaussian) = match self {
            Kernel::Gaussian { width } => (width, true),
            Kernel::Laplacian { width } => (width, false),
            Kernel::Matern { width, .. } | Kernel::RationalQuadratic { width, .. } => {
                (width, false)
            }
            _ => return None,
        };
        Some(match width {
            Width::Gamma(g) if gaussian => vec![(2.0 * g).sqrt(); d],
            Width::Gamma(g) => vec![*g; d],
            Width::Lengthscale(l) => vec![1.0 / l; d],
            Width::PerDim(v) => v.iter().map(|l| 1.0 / l).collect(),
        })
    }

    /// The profile of a shift-invariant kernel as a function of the scaled squared
    /// Euclidean distance `‖u‖²` (Gaussian, Matérn, rational quadratic). `None` for others.
    pub(crate) fn euclidean_profile(&self, r2: f64) -> Option<f64> {
        let r2 = r2.max(0.0);
        Some(match self {
            Kernel::Gaussian { .. } => (-0.5 * r2).exp(),
            Kernel::Matern { nu, .. } => {
                let r = r2.sqrt();
                match nu {
                    Nu::Half => (-r).exp(),
                    Nu::ThreeHalves => {
                        let a = 3f64.sqrt() * r;
                        (1.0 + a) * (-a).exp()
                    }
                    Nu::FiveHalves => {
                        let a = 5f64.sqrt() * r;
                        (1.0 + a + 5.0 * r2 / 3.0) * (-a).exp()
                    }
                }
            }
            Kernel::RationalQuadratic { alpha, .. } => (1.0 + r2 / (2.0 * alpha)).powf(-alpha),
            _ => return None,
        })
    }

    /// The profile of a dot-product kernel given `x·y` and, for arc-cosine, the norms.
    pub(crate) fn dot_profile(&self, dot: f64, nx: f64, ny: f64) -> Option<f64> {
        Some(match self {
            Kernel::Linear => dot,
            Kernel::Polynomial {
                degree,
                gamma,
                coef0,
            } => (gamma * dot + coef0).powi(*degree as i32),
            Kernel::Sigmoid { gamma, coef0 } => (gamma * dot + coef0).tanh(),
            Kernel::ArcCos { order } => {
                let theta = if nx == 0.0 || ny == 0.0 {
                    PI / 2.0
                } else {
                    (dot / (nx * ny)).clamp(-1.0, 1.0).acos()
                };
                match order {
                    0 => 1.0 - theta / PI,
                    _ => nx * ny / PI * (theta.sin() + (PI - theta) * theta.cos()),
                }
            }
            _ => return None,
        })
    }

    /// `df/d(r²)` of [`Kernel::euclidean_profile`] (Gaussian, Matérn, rational quadratic);
    /// `None` for other kernels. At `r = 0` Matérn ν = ½ has no derivative; 0 is returned
    /// (every gradient multiplies it by `x − y = 0` there).
    pub(crate) fn euclidean_profile_deriv(&self, r2: f64) -> Option<f64> {
        let r2 = r2.max(0.0);
        Some(match self {
            Kernel::Gaussian { .. } => -0.5 * (-0.5 * r2).exp(),
            Kernel::Matern { nu, .. } => {
                let r = r2.sqrt();
                match nu {
                    Nu::Half if r > 0.0 => -(-r).exp() / (2.0 * r),
                    Nu::Half => 0.0,
                    // f = (1 + a)e^{−a}, a = √3·r: df/dr² = −(3/2)e^{−a}.
                    Nu::ThreeHalves => -1.5 * (-(3f64.sqrt()) * r).exp(),
                    // f = (1 + a + a²/3)e^{−a}, a = √5·r: df/dr² = −(5/6)(1 + a)e^{−a}.
                    Nu::FiveHalves => {
                        let a = 5f64.sqrt() * r;
                        -(5.0 / 6.0) * (1.0 + a) * (-a).exp()
                    }
                }
            }
            Kernel::RationalQuadratic { alpha, .. } => {
                -0.5 * (1.0 + r2 / (2.0 * alpha)).powf(-alpha - 1.0)
            }
            _ => return None,
        })
    }

    /// `dg/d(x·y)` of [`Kernel::dot_profile`] for the kernels that depend on `x·y` only
    /// (linear, polynomial, sigmoid); `None` for others.
    pub(crate) fn dot_profile_deriv(&self, dot: f64) -> Option<f64> {
        Some(match self {
            Kernel::Linear => 1.0,
            Kernel::Polynomial {
                degree,
                gamma,
                coef0,
            } => *degree as f64 * gamma * (gamma * dot + coef0).powi(*degree as i32 - 1),
            Kernel::Sigmoid { gamma, coef0 } => {
                let t = (gamma * dot + coef0).tanh();
                gamma * (1.0 - t * t)
            }
            _ => return None,
        })
    }

    /// Whether [`Kernel::add_grad_second`] has this kernel's derivative (all but the
    /// arc-cosine kernels, whose angle has no derivative at parallel inputs).
    pub fn has_gradient(&self) -> bool {
        match self {
            Kernel::Sum(v) | Kernel::Product(v) => v.iter().all(|k| k.has_gradient()),
            Kernel::Scaled(_, k) => k.has_gradient(),
            Kernel::ArcCos { .. } => false,
            _ => true,
        }
    }

    /// Adds `w · ∂k(a, b)/∂b` into `out` (one pair; by symmetry `∂k(a, b)/∂a` is
    /// `add_grad_second(b, a, …)`). Does nothing for kernels without
    /// [`Kernel::has_gradient`].
    pub(crate) fn add_grad_second(&self, a: &[f64], b: &[f64], w: f64, out: &mut [f64]) {
        let d = a.len();
        match self {
            Kernel::Sum(v) => v.iter().for_each(|k| k.add_grad_second(a, b, w, out)),
            Kernel::Scaled(c, k) => k.add_grad_second(a, b, w * c, out),
            Kernel::Product(v) => {
                let vals: Vec<f64> = v.iter().map(|k| k.eval(a, b)).collect();
                for (i, k) in v.iter().enumerate() {
                    let others: f64 = (0..v.len()).filter(|j| *j != i).map(|j| vals[j]).product();
                    k.add_grad_second(a, b, w * others, out);
                }
            }
            Kernel::Laplacian { .. } => {
                let s = self.inverse_scale(d).unwrap();
                let kv = self.eval(a, b);
                for j in 0..d {
                    let u = a[j] - b[j];
                    if u != 0.0 {
                        out[j] += w * kv * u.signum() * s[j];
                    }
                }
            }
            k if k.is_shift_invariant() => {
                let s = k.inverse_scale(d).unwrap();
                let r2: f64 = (0..d).map(|j| ((a[j] - b[j]) * s[j]).powi(2)).sum();
                let f1 = k.euclidean_profile_deriv(r2).unwrap();
                for j in 0..d {
                    out[j] -= w * f1 * 2.0 * (a[j] - b[j]) * s[j] * s[j];
                }
            }
            k => {
                let dot: f64 = a.iter().zip(b).map(|(x, y)| x * y).sum();
                if let Some(g1) = k.dot_profile_deriv(dot) {
                    out.iter_mut().zip(a).for_each(|(o, x)| *o += w * g1 * x);
                }
            }
        }
    }

    /// `k(x, y)` for one pair. Panics if the lengths differ.
    #[track_caller]
    pub fn eval(&self, x: &[f64], y: &[f64]) -> f64 {
        assert_eq!(x.len(), y.len(), "kernel eval: inputs of different lengths");
        match self {
            Kernel::Sum(v) => v.iter().map(|k| k.eval(x, y)).sum(),
            Kernel::Product(v) => v.iter().map(|k| k.eval(x, y)).product(),
            Kernel::Scaled(c, k) => c * k.eval(x, y),
            Kernel::Laplacian { .. } => {
                let s = self.inverse_scale(x.len()).unwrap();
                let l1: f64 = (0..x.len()).map(|j| ((x[j] - y[j]) * s[j]).abs()).sum();
                (-l1).exp()
            }
            k if k.is_shift_invariant() => {
                let s = k.inverse_scale(x.len()).unwrap();
                let r2: f64 = (0..x.len()).map(|j| ((x[j] - y[j]) * s[j]).powi(2)).sum();
                k.euclidean_profile(r2).unwrap()
            }
            k => {
                let dot: f64 = x.iter().zip(y).map(|(a, b)| a * b).sum();
                let nx = x.iter().map(|a| a * a).sum::<f64>().sqrt();
                let ny = y.iter().map(|a| a * a).sum::<f64>().sqrt();
                k.dot_profile(dot, nx, ny).unwrap()
            }
        }
    }

    /// `k(x, x)` where it does not depend on x (shift-invariant kernels and their
    /// combinations): `Some(value)`, else `None`.
    pub fn diagonal_constant(&self) -> Option<f64> {
        match self {
            k if k.is_shift_invariant() => Some(1.0),
            Kernel::Sum(v) => v.iter().map(|k| k.diagonal_constant()).sum(),
            Kernel::Product(v) => v.iter().map(|k| k.diagonal_constant()).product(),
            Kernel::Scaled(c, k) => k.diagonal_constant().map(|v| c * v),
            _ => None,
        }
    }
}

#[cfg(test)]
mod tests;
