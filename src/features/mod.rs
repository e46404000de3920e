//! Random feature maps: describe ([`FeatureSpec`]), sample ([`FeatureSpec::sample`]),
//! apply ([`FeatureMap::transform`]).
//!
//! A feature map `z: R^d → R^D` is built so that `⟨z(x), z(y)⟩ ≈ k(x, y)`. Each method is
//! one file under `methods/` whose sampler emits a [`Program`] of primitive steps (see
//! [`crate::program`] for the steps and their costs). Methods:
//!
//! | method | kernels | idea |
//! |---|---|---|
//! | `fourier` | gaussian, laplacian, matern, rational_quadratic | i.i.d. frequencies from the spectral measure (Rahimi & Recht 2007); paired `[cos, sin]` by default, cos + random phase as an option |
//! | `orthogonal` | gaussian, matern, rational_quadratic | orthogonal blocks with radial norms (Yu et al. 2016) |
//! | `hadamard` | gaussian | `d'^{-1}·H D₁ H D₂ H D₃` blocks, O(D log d) time, O(D) floats (Yu et al. 2016) |
//! | `fastfood` | gaussian | `d'^{-1/2}·S H G Π H B` blocks (Le, Sarlós & Smola 2013) |
//! | `quasi` | gaussian, laplacian, matern, rational_quadratic | scrambled Halton / Sobol' points through inverse CDFs (Yang et al. 2014) |
//! | `nystrom` | any (also sums, products, sigmoid) | landmarks, `φ(x) = Λ^{−½} Uᵀ k(x, L)` (Williams & Seeger 2001) |
//! | `maclaurin` | polynomial | random Maclaurin (Kar & Karnick 2012) |
//! | `tensorsketch` | polynomial | count sketches multiplied by FFT (Pham & Pagh 2013) |
//! | `relu` | arccos | step (order 0) / ReLU (order 1) random features (Cho & Saul 2009) |
//! | `identity` | linear | exact |
//! | `taylor` | gaussian | deterministic Taylor features, degree chosen to fit D (Cotter, Keshet & Srebro 2011) |
//!
//! Sums concatenate their parts' maps (linear parts use the identity, the others share the
//! remaining features); products multiply element-wise independently drawn maps of equal
//! size, rescaled by `D^{(p−1)/2}` (an unbiased estimate of `k₁·k₂`; their shift-invariant
//! factors use the cos + phase form, whose single coordinates are unbiased); `c·k` scales
//! the map by `√c`. Inputs are raw rows of the kernel's input space; a map never sees labels.
//!
//! ```
//! use kernelpress::features::{FeatureSpec, Method};
//! use ndarray::array;
//! let spec = FeatureSpec::new("gaussian(gamma=0.5)".parse().unwrap(), Method::Fourier, 2, 4096, 7);
//! let (map, _) = spec.sample(None).unwrap();
//! let z = map.transform(array![[0.0, 0.0], [1.0, 0.0]].view());
//! let approx = z.row(0).dot(&z.row(1));
//! assert!((approx - (-0.5f64).exp()).abs() < 0.05);
//! ```

mod methods;
mod qmc;
#[rustfmt::skip]
mod sobol_table;
pub mod spec;
pub mod special;
mod spectral;

pub use methods::nystrom::{nystrom_from_landmarks, pick_landmarks};
pub use qmc::{halton, primes, sobol, SOBOL_MAX_DIM};
pub use spec::{
    methods_for, parse_landmarks, parse_sequence, FeatureSpec, FourierVariant, Landmarks,
    MapOptions, Method, Sequence, RNG_NAME,
};

use crate::program::Program;
use crate::Result;
use ndarray::{Array2, ArrayView2, ArrayViewMut2};

/// What sampling did, for the user (rank, notes). The library never prints these: callers
/// show them.
#[derive(Debug, Clone, Default)]
pub struct SampleInfo {
    /// Human-readable notes.
    pub notes: Vec<String>,
    /// Nyström: rank kept after thresholding.
    pub rank: Option<usize>,
    /// Nyström: landmarks used.
    pub landmarks: Option<usize>,
}

/// A sampled feature map: its spec and the feature program it was sampled into.
#[derive(Debug, Clone)]
pub struct FeatureMap {
    /// What was sampled.
    pub spec: FeatureSpec,
    /// The program of primitive steps.
    pub program: Program,
}

impl FeatureSpec {
    /// Samples the map. `data` (rows in the kernel's input space) is needed by `nystrom`.
    pub fn sample(&self, data: Option<ArrayView2<f64>>) -> Result<(FeatureMap, SampleInfo)> {
        self.validate()?;
        let mut info = SampleInfo::default();
        if !self.kernel.is_positive_definite() {
            info.notes.push(format!(
                "kernel {} is not positive definite: Nyström features of an indefinite kernel keep only its positive eigen-directions",
                self.kernel
            ));
        }
        let program = methods::sample(self, data, &mut info)?;
        Ok((
            FeatureMap {
                spec: self.clone(),
                program,
            },
            info,
        ))
    }
}

impl FeatureSpec {
    /// The program a compiled model of this spec would run, for costing it without data or
    /// distillation: data-drawn methods (Nyström) get a kernel block against `pool_rows`
    /// placeholder landmarks (at most the feature count), which is the folded form compiled
    /// models store; the other methods are sampled (cheap: no data involved).
    ///
    /// ```
    /// use kernelpress::features::{FeatureSpec, Method};
    /// let k: kernelpress::kernel::Kernel = "gaussian(gamma=0.5)".parse().unwrap();
    /// let p = FeatureSpec::new(k, Method::Nystrom, 5, 300, 1).cost_program(1000).unwrap();
    /// assert_eq!(p.output_dim(), 300);
    /// ```
    pub fn cost_program(&self, pool_rows: usize) -> Result<Program> {
        self.validate()?;
        if self.method.sampler().whole_kernel() {
            let l = self.features.min(pool_rows).max(1);
            crate::limits::check_alloc((l * self.input_dim) as u64, 8, "placeholder landmarks")?;
            let step = crate::program::steps::KernelBlock::new(
                self.kernel.clone(),
                Array2::zeros((l, self.input_dim)),
            )?;
            let mut b = crate::program::Builder::new(self.input_dim);
            let v = b.push(step, &[crate::program::Builder::INPUT])?;
            return Ok(b.finish(v));
        }
        Ok(self.sample(None)?.0.program)
    }

    /// True when the method draws its map from data (Nyström).
    pub fn from_data(&self) -> bool {
        self.method.sampler().whole_kernel()
    }
}

impl FeatureMap {
    /// Output dimension `D` (Nyström: the kept rank; Taylor: the monomial count).
    pub fn output_dim(&self) -> usize {
        self.program.output_dim()
    }

    /// Input dimension `d`.
    pub fn input_dim(&self) -> usize {
        self.spec.input_dim
    }

    /// Features of a batch (`n × D`), in parallel over fixed row chunks.
    ///
    /// # Panics
    /// If `x` does not have [`Self::input_dim`] columns.
    #[track_caller]
    pub fn transform(&self, x: ArrayView2<f64>) -> Array2<f64> {
        self.program.apply(x)
    }

    /// Features of a batch written into `out` (`n × D`).
    ///
    /// # Panics
    /// If the shapes do not match.
    #[track_caller]
    pub fn transform_into(&self, x: ArrayView2<f64>, out: ArrayViewMut2<f64>) {
        self.program.apply_into(x, out)
    }

    /// Features of one row, without parallel machinery.
    pub fn transform_one(&self, x: &[f64]) -> Vec<f64> {
        self.program.apply_one(x)
    }
}

#[cfg(test)]
mod tests;
