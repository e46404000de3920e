//! The methods: one file each, registered in [`registry`] (one line per method). A method's
//! sampler turns (kernel, input dimension, feature count, seed) into steps of a feature
//! program; composite kernels (sums, products, scaled kernels) are walked by [`plan`], which
//! asks the method for the map of each leaf kernel.

mod fastfood;
mod fourier;
mod hadamard;
mod identity;
mod maclaurin;
pub(crate) mod nystrom;
mod orthogonal;
mod quasi;
mod relu;
mod taylor;
mod tensorsketch;

use super::spec::{cannot_serve, FeatureSpec, FourierVariant};
use super::SampleInfo;
use crate::kernel::Kernel;
use crate::program::{steps, Builder, ValueId};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};
use rand::{RngExt, SeedableRng};

/// The random generator every sampler uses.
pub(crate) type Rng = rand::rngs::ChaCha20Rng;

/// Every method, in documentation order. Adding a method: one file, one line here.
pub(crate) fn registry() -> &'static [&'static dyn Sampler] {
    &[
        &fourier::Fourier,
        &orthogonal::Orthogonal,
        &hadamard::Hadamard,
        &fastfood::Fastfood,
        &quasi::Quasi,
        &nystrom::Nystrom,
        &maclaurin::Maclaurin,
        &tensorsketch::TensorSketch,
        &relu::Relu,
        &identity::Identity,
        &taylor::Taylor,
    ]
}

/// The registered method called `name`.
pub(crate) fn lookup(name: &str) -> Option<&'static dyn Sampler> {
    registry().iter().copied().find(|m| m.name() == name)
}

/// What a method's sampler is given for one leaf kernel.
pub(crate) struct Ctx<'a> {
    /// The program being built.
    pub b: &'a mut Builder,
    /// The whole spec (input dimension, options).
    pub spec: &'a FeatureSpec,
    /// This leaf's generator (seeded from `seed`).
    pub rng: Rng,
    /// This leaf's seed.
    pub seed: u64,
    /// Inside a product of kernels: single coordinates must be unbiased (phase form).
    pub in_product: bool,
    /// Notes for the user.
    pub info: &'a mut SampleInfo,
}

/// A feature-map method.
pub(crate) trait Sampler: Sync {
    /// Name on the command line and in files.
    fn name(&self) -> &'static str;
    /// True when the method can map this single (non-composite) kernel.
    fn serves(&self, _k: &Kernel) -> bool {
        false
    }
    /// Paired cos/sin output by default (so an even feature count).
    fn spectral(&self) -> bool {
        false
    }
    /// Samples the whole kernel at once from data (landmark methods).
    fn whole_kernel(&self) -> bool {
        false
    }
    /// Steps for leaf kernel `k` with `dd` features, reading value `x`.
    fn leaf(&self, _cx: &mut Ctx, k: &Kernel, _dd: usize, _x: ValueId) -> Result<ValueId> {
        Err(cannot_serve(k, super::Method::parse(self.name())?))
    }
    /// Steps for the whole kernel from `data` (rows in the model's scaled input space).
    fn whole(&self, _cx: &mut Ctx, _data: Option<ArrayView2<f64>>) -> Result<ValueId> {
        Err(Error::internal(format!(
            "{} samples leaf kernels",
            self.name()
        )))
    }
}

/// SplitMix64 step: well-separated child seeds.
pub(crate) fn child_seed(seed: u64, i: u64) -> u64 {
    let mut z = seed ^ (i.wrapping_add(1)).wrapping_mul(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// `n` random signs.
pub(crate) fn signs(rng: &mut Rng, n: usize) -> Vec<i8> {
    (0..n)
        .map(|_| if rng.random::<bool>() { 1 } else { -1 })
        .collect()
}

/// The frame every shift-invariant method shares: scale the inputs by the kernel's inverse
/// lengthscales, project onto `m` frequencies (`project`), then paired `√(1/m)[cos, sin]`
/// (`m = D/2`) or `√(2/m) cos(· + b)` with random phases (`m = D`; always inside products).
pub(crate) fn spectral_leaf(
    cx: &mut Ctx,
    k: &Kernel,
    dd: usize,
    x: ValueId,
    project: impl FnOnce(&mut Ctx, ValueId, usize) -> Result<ValueId>,
) -> Result<ValueId> {
    let d = cx.spec.input_dim;
    let phase = cx.in_product || cx.spec.options.fourier == FourierVariant::Phase;
    let m = if phase { dd } else { dd / 2 };
    if m == 0 {
        return Err(Error::input(format!(
            "--features {dd} is too few for kernel {k}"
        )));
    }
    let scale = k
        .inverse_scale(d)
        .ok_or_else(|| Error::internal(format!("kernel {k} is not shift-invariant")))?;
    let xs = cx.b.push(steps::Scale::new(scale)?, &[x])?;
    let p = project(cx, xs, m)?;
    if phase {
        let b = super::spectral::phases(m, &mut cx.rng);
        cx.b.push(steps::CosPhase::new(b, (2.0 / m as f64).sqrt())?, &[p])
    } else {
        cx.b.push(steps::CosSin::new((1.0 / m as f64).sqrt())?, &[p])
    }
}

/// `(degree, γ, coef0)` of a polynomial kernel, or the error naming the methods that can
/// serve `k` (for the dot-product samplers).
pub(crate) fn polynomial(k: &Kernel, method: &dyn Sampler) -> Result<(usize, f64, f64)> {
    match *k {
        Kernel::Polynomial {
            degree,
            gamma,
            coef0,
        } => Ok((degree as usize, gamma, coef0)),
        _ => Err(cannot_serve(k, super::Method::parse(method.name())?)),
    }
}

/// True for the kernels with a spectral measure every dense frequency sampler can draw
/// from (Gaussian, Laplacian, Matérn, rational quadratic).
pub(crate) fn any_spectral(k: &Kernel) -> bool {
    matches!(
        k,
        Kernel::Gaussian { .. }
            | Kernel::Laplacian { .. }
            | Kernel::Matern { .. }
            | Kernel::RationalQuadratic { .. }
    )
}

/// A dense projection onto the rows of `w` (`m × d`).
pub(crate) fn dense(cx: &mut Ctx, w: Array2<f64>, x: ValueId) -> Result<ValueId> {
    cx.b.push(steps::Dense::new(w)?, &[x])
}

/// Samples the program described by `spec` (Nyström draws its landmarks from `data`).
pub(crate) fn sample(
    spec: &FeatureSpec,
    data: Option<ArrayView2<f64>>,
    info: &mut SampleInfo,
) -> Result<crate::program::Program> {
    let mut b = Builder::new(spec.input_dim);
    let m = spec.method.sampler();
    // A tuned bandwidth: the map reads the inputs scaled by √m.
    let x = if spec.options.map_bandwidth != 1.0 {
        b.push(
            steps::ConstScale::new(spec.options.map_bandwidth.sqrt())?,
            &[Builder::INPUT],
        )?
    } else {
        Builder::INPUT
    };
    let out = {
        let mut cx = Ctx {
            b: &mut b,
            spec,
            rng: Rng::seed_from_u64(spec.seed),
            seed: spec.seed,
            in_product: false,
            info,
        };
        if m.whole_kernel() {
            m.whole(&mut cx, data)?
        } else {
            plan(&mut cx, m, &spec.kernel, spec.features, spec.seed, x)?
        }
    };
    Ok(b.finish(out))
}

/// Walks a kernel expression: sums concatenate their parts' maps (linear parts use the
/// identity, the others share the remaining features), products multiply independently
/// drawn maps of equal size and rescale by `D^{(p−1)/2}`, `c·k` scales by `√c`.
fn plan(
    cx: &mut Ctx,
    m: &dyn Sampler,
    k: &Kernel,
    dd: usize,
    seed: u64,
    x: ValueId,
) -> Result<ValueId> {
    let d = cx.spec.input_dim;
    match k {
        Kernel::Scaled(c, inner) => {
            let v = plan(cx, m, inner, dd, seed, x)?;
            cx.b.push(steps::ConstScale::new(c.sqrt())?, &[v])
        }
        Kernel::Sum(parts) => {
            let lin = parts.iter().filter(|p| matches!(p, Kernel::Linear)).count();
            let rnd = parts.len() - lin;
            let rest = if cx.in_product {
                dd
            } else {
                dd.saturating_sub(lin * d)
            };
            if rnd > 0 && rest < 2 * rnd {
                return Err(Error::input(format!(
                    "--features {dd} is too few for kernel {k}: linear parts take {d} each and every other part needs at least 2"
                )));
            }
            let even = |v: usize| v - v % 2;
            let base = rest.checked_div(rnd).map(even).unwrap_or(0);
            let mut vals = Vec::new();
            let mut first = true;
            for (i, p) in parts.iter().enumerate() {
                let s = child_seed(seed, i as u64);
                if matches!(p, Kernel::Linear) && !cx.in_product {
                    vals.push(x);
                } else {
                    let n = if first {
                        even(rest - base * (rnd - 1))
                    } else {
                        base
                    };
                    first = false;
                    vals.push(plan(cx, m, p, n, s, x)?);
                }
            }
            cx.b.push(steps::Concat, &vals)
        }
        Kernel::Product(parts) => {
            let outer = cx.in_product;
            cx.in_product = true;
            let mut vals = Vec::new();
            for (i, p) in parts.iter().enumerate() {
                let v = plan(cx, m, p, dd, child_seed(seed, i as u64), x);
                let v = match v {
                    Ok(v) => v,
                    Err(e) => {
                        cx.in_product = outer;
                        return Err(e);
                    }
                };
                vals.push(v);
            }
            cx.in_product = outer;
            if vals.iter().any(|v| cx.b.dim(*v) != dd) {
                return Err(Error::input(format!(
                    "kernel {k}: the parts of a product need maps of equal size {dd}; a sum inside a product cannot be split evenly"
                )));
            }
            let p = cx.b.push(steps::Product, &vals)?;
            let f = (dd as f64).powf((parts.len() as f64 - 1.0) / 2.0);
            cx.b.push(steps::ConstScale::new(f)?, &[p])
        }
        Kernel::Linear => {
            if cx.in_product {
                // Random projection D^{−½} R x, R Rademacher: unbiased for x·y.
                let mut rng = Rng::seed_from_u64(seed);
                let w = Array2::from_shape_simple_fn((dd, d), || {
                    if rng.random::<bool>() {
                        1.0
                    } else {
                        -1.0
                    }
                });
                let p = dense(cx, w, x)?;
                cx.b.push(steps::ConstScale::new(1.0 / (dd as f64).sqrt())?, &[p])
            } else {
                Ok(x)
            }
        }
        leaf => {
            if !m.serves(leaf) {
                return Err(cannot_serve(leaf, super::Method::parse(m.name())?));
            }
            let saved = std::mem::replace(&mut cx.rng, Rng::seed_from_u64(seed));
            let saved_seed = std::mem::replace(&mut cx.seed, seed);
            let r = m.leaf(cx, leaf, dd, x);
            cx.rng = saved;
            cx.seed = saved_seed;
            r
        }
    }
}
