//! Random feature maps: describe ([`FeatureSpec`]), sample ([`FeatureSpec::sample`]),
//! apply ([`FeatureMap::transform`]).
//!
//! A feature map `z: R^d → R^D` is built so that `⟨z(x), z(y)⟩ ≈ k(x, y)`. Methods (SPEC §4;
//! costs in [`map`]):
//!
//! | method | kernels | idea |
//! |---|---|---|
//! | `fourier` | gaussian, laplacian, matern, rational_quadratic | i.i.d. frequencies from the spectral measure (Rahimi & Recht 2007); paired `[cos, sin]` by default, cos + random phase as an option |
//! | `orthogonal` | gaussian, matern, rational_quadratic | orthogonal blocks with radial norms (Yu et al. 2016) |
//! | `hadamard` | gaussian | `d'^{-1}·H D₁ H D₂ H D₃` blocks, O(D log d) time, O(D) floats (Yu et al. 2016) |
//! | `fastfood` | gaussian | `d'^{-1/2}·S H G Π H B` blocks (Le, Sarlós & Smola 2013) |
//! | `quasi` | gaussian, laplacian, matern, rational_quadratic | scrambled Halton / Sobol' points through inverse CDFs (Yang et al. 2014) |
//! | `nystrom` | any (also sums, products, sigmoid) | landmarks, `φ(x) = K(x, L)·U Λ^{−½}` (Williams & Seeger 2001) |
//! | `maclaurin` | polynomial | random Maclaurin (Kar & Karnick 2012) |
//! | `tensorsketch` | polynomial | count sketches multiplied by FFT (Pham & Pagh 2013) |
//! | `relu` | arccos | step (order 0) / ReLU (order 1) random features (Cho & Saul 2009) |
//! | `identity` | linear | exact |
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

pub mod map;
mod qmc;
mod sampler;
#[rustfmt::skip]
mod sobol_table;
pub mod spec;
pub mod special;
mod spectral;
pub mod trig;

pub use map::{Freq, Node, Trig};
pub use qmc::{halton, primes, sobol, SOBOL_MAX_DIM};
pub use sampler::{nystrom_from_landmarks, pick_landmarks, SampleInfo};
pub use spec::{
    methods_for, parse_landmarks, parse_sequence, FeatureSpec, FourierVariant, Landmarks,
    MapOptions, Method, Sequence, RNG_NAME,
};

use crate::model::TensorFile;
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2, ArrayViewMut2};

/// A sampled feature map: its spec and the sampled tree.
#[derive(Debug, Clone)]
pub struct FeatureMap {
    /// What was sampled.
    pub spec: FeatureSpec,
    /// The sampled map.
    pub root: Node,
}

impl FeatureSpec {
    /// Samples the map. `data` (rows in the kernel's input space) is needed by `nystrom`.
    pub fn sample(&self, data: Option<ArrayView2<f64>>) -> Result<(FeatureMap, SampleInfo)> {
        let (root, info) = sampler::sample(self, data)?;
        Ok((
            FeatureMap {
                spec: self.clone(),
                root,
            },
            info,
        ))
    }
}

impl FeatureMap {
    /// Output dimension `D` (Nyström: the kept rank).
    pub fn output_dim(&self) -> usize {
        self.root.output_dim()
    }

    /// Input dimension `d`.
    pub fn input_dim(&self) -> usize {
        self.spec.input_dim
    }

    /// Floats stored by the map.
    pub fn stored_floats(&self) -> usize {
        self.root.stored_floats()
    }

    /// Flops per input row (analytic).
    pub fn flops_per_row(&self) -> usize {
        self.root.flops_per_row(self.spec.input_dim)
    }

    /// Features of a batch (`n × D`), in parallel over fixed row chunks.
    ///
    /// # Panics
    /// If `x` does not have [`Self::input_dim`] columns.
    #[track_caller]
    pub fn transform(&self, x: ArrayView2<f64>) -> Array2<f64> {
        let mut out = Array2::zeros((x.nrows(), self.output_dim()));
        self.transform_into(x, out.view_mut());
        out
    }

    /// Features of a batch written into `out` (`n × D`).
    ///
    /// # Panics
    /// If the shapes do not match.
    #[track_caller]
    pub fn transform_into(&self, x: ArrayView2<f64>, out: ArrayViewMut2<f64>) {
        assert_eq!(
            x.ncols(),
            self.input_dim(),
            "feature map: wrong number of input features"
        );
        assert_eq!(
            out.dim(),
            (x.nrows(), self.output_dim()),
            "feature map: output buffer has the wrong shape"
        );
        map::apply_into(&self.root, x, out);
    }

    /// Features of one row, without parallel machinery.
    pub fn transform_one(&self, x: &[f64]) -> Vec<f64> {
        let row = ArrayView2::from_shape((1, x.len()), x).expect("one row");
        self.root.apply_chunk(row).into_raw_vec_and_offset().0
    }

    /// Stores the map in `f` (tensors `map.*`, manifest key `feature_map`).
    pub fn write_to(&self, f: &mut TensorFile) {
        let tree = self.root.to_json("map", f, self.spec.options.rank_tol);
        f.manifest
            .insert("feature_spec".into(), self.spec.to_json());
        f.manifest.insert("feature_map".into(), tree);
    }

    /// Reads a map stored by [`Self::write_to`].
    pub fn read_from(f: &TensorFile, src: &str) -> Result<FeatureMap> {
        let spec = FeatureSpec::from_json(
            f.manifest
                .get("feature_spec")
                .ok_or_else(|| Error::input(format!("{src}: manifest has no feature_spec")))?,
        )
        .map_err(|e| e.context(src))?;
        let tree = f
            .manifest
            .get("feature_map")
            .ok_or_else(|| Error::input(format!("{src}: manifest has no feature_map")))?;
        let root = Node::from_json(tree, f, src, spec.input_dim)?;
        Ok(FeatureMap { spec, root })
    }
}

#[cfg(test)]
mod tests;
