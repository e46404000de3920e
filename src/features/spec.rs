//! [`FeatureSpec`]: the cheap, comparable, serialisable description of a feature map
//! (kernel, method, input dimension, feature count, seed, options). Sampling it gives a
//! [`super::FeatureMap`]; the same spec and seed always give the same map.

use crate::kernel::Kernel;
use crate::{Error, Result};
use serde_json::{json, Value};

/// A feature-map method, named as published (`fourier`, `orthogonal`, `hadamard`, …).
///
/// The set of methods is the registry in `features::methods` (one file per method, one
/// line of registration); the constants below name the built-in ones.
#[derive(Clone, Copy, PartialEq, Eq, Hash)]
pub struct Method(&'static str);

#[allow(non_upper_case_globals)]
impl Method {
    /// i.i.d. random Fourier features (Rahimi & Recht 2007).
    pub const Fourier: Method = Method("fourier");
    /// Orthogonal random features (Yu et al. 2016).
    pub const Orthogonal: Method = Method("orthogonal");
    /// Structured orthogonal features `H D₁ H D₂ H D₃` (Yu et al. 2016).
    pub const Hadamard: Method = Method("hadamard");
    /// Fastfood `S H G Π H B` (Le, Sarlós & Smola 2013).
    pub const Fastfood: Method = Method("fastfood");
    /// Quasi-Monte Carlo frequencies (Yang et al. 2014).
    pub const Quasi: Method = Method("quasi");
    /// Nyström landmarks (Williams & Seeger 2001).
    pub const Nystrom: Method = Method("nystrom");
    /// Random Maclaurin features (Kar & Karnick 2012).
    pub const Maclaurin: Method = Method("maclaurin");
    /// Tensor Sketch (Pham & Pagh 2013).
    pub const TensorSketch: Method = Method("tensorsketch");
    /// Step / ReLU random features for arc-cosine kernels (Cho & Saul 2009).
    pub const Relu: Method = Method("relu");
    /// The exact identity map of the linear kernel.
    pub const Identity: Method = Method("identity");

    /// Every registered method, in documentation order.
    pub fn all() -> Vec<Method> {
        super::methods::registry()
            .iter()
            .map(|m| Method(m.name()))
            .collect()
    }

    /// The method's name on the command line and in files.
    pub fn name(self) -> &'static str {
        self.0
    }

    /// Parses a method name.
    pub fn parse(s: &str) -> Result<Method> {
        super::methods::lookup(s)
            .map(|m| Method(m.name()))
            .ok_or_else(|| {
                let names: Vec<&str> = Method::all().iter().map(|m| m.name()).collect();
                Error::input(format!(
                    "method '{s}' is unknown{}; expected one of {}",
                    crate::error::did_you_mean(s, &names),
                    names.join(", ")
                ))
            })
    }

    /// True for the methods whose output is paired cos/sin features by default.
    pub fn is_spectral(self) -> bool {
        super::methods::lookup(self.0).is_some_and(|m| m.spectral())
    }

    pub(crate) fn sampler(self) -> &'static dyn super::methods::Sampler {
        super::methods::lookup(self.0).expect("methods are built from the registry")
    }
}

impl std::fmt::Debug for Method {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.0)
    }
}

impl std::fmt::Display for Method {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.0)
    }
}

/// The methods that can serve a kernel: the dedicated ones first (registry order), then
/// those that sample any kernel from data (Nyström).
pub fn methods_for(k: &Kernel) -> Vec<Method> {
    let reg = super::methods::registry();
    let dedicated = reg.iter().filter(|m| {
        !m.whole_kernel()
            && match k {
                Kernel::Sum(_) | Kernel::Product(_) | Kernel::Scaled(..) => composite_ok(k, **m),
                leaf => m.serves(leaf),
            }
    });
    let whole = reg.iter().filter(|m| m.whole_kernel());
    dedicated.chain(whole).map(|m| Method(m.name())).collect()
}

/// The error for a method that cannot serve a kernel, naming the methods that can.
pub(crate) fn cannot_serve(k: &Kernel, m: Method) -> Error {
    Error::input(format!(
        "method '{}' cannot serve kernel {k}; methods that can: {}",
        m.name(),
        methods_for(k)
            .iter()
            .map(|m| m.name())
            .collect::<Vec<_>>()
            .join(", ")
    ))
}

fn composite_ok(k: &Kernel, m: &dyn super::methods::Sampler) -> bool {
    match k {
        Kernel::Sum(v) | Kernel::Product(v) => v.iter().all(|c| composite_ok(c, m)),
        Kernel::Scaled(_, c) => composite_ok(c, m),
        Kernel::Linear => true,
        leaf => m.serves(leaf),
    }
}

/// Paired `[cos, sin]` (default; lower variance) or cos with a random phase.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FourierVariant {
    /// `√(1/m) [cos(Wx), sin(Wx)]`, `m = D/2` frequencies.
    Paired,
    /// `√(2/D) cos(Wx + b)`, `b ~ U[0, 2π)`.
    Phase,
}

/// The low-discrepancy sequence of `quasi`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Sequence {
    /// Halton, scrambled by random digit permutations.
    Halton,
    /// Sobol', scrambled by a random digital shift (≤ 1024 dimensions).
    Sobol,
}

/// How Nyström picks landmarks from the data it is given.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Landmarks {
    /// Uniformly without replacement.
    Uniform,
    /// k-means++ seeding (D² sampling) in the kernel's feature space.
    KmeansPP,
    /// Approximate ridge leverage scores.
    Leverage,
    /// The teacher's support vectors, largest total |coefficient| over all outputs first,
    /// topped up with uniformly drawn calibration rows when there are fewer support vectors
    /// than landmarks. The caller orders the pool ([`crate::fit::Teacher`] does); the
    /// sampler takes its first rows.
    Support,
}

/// Method options (each has a default).
#[derive(Debug, Clone, PartialEq)]
pub struct MapOptions {
    /// Fourier-type output.
    pub fourier: FourierVariant,
    /// QMC sequence.
    pub sequence: Sequence,
    /// Scramble QMC points with the seed (default true).
    pub scramble: bool,
    /// Nyström landmark rule.
    pub landmarks: Landmarks,
    /// Nyström: eigenvalues below `rank_tol · λ_max` are dropped.
    pub rank_tol: f64,
    /// Random maps of shift-invariant kernels: the map reads the inputs scaled by `√m`, so
    /// it approximates the kernel with its bandwidth multiplied (a Gaussian's `γ` becomes
    /// `m·γ`). 1 (the default) approximates the kernel itself; distillation may pick
    /// another multiple when it fits the teacher better.
    pub map_bandwidth: f64,
}

impl Default for MapOptions {
    fn default() -> Self {
        MapOptions {
            fourier: FourierVariant::Paired,
            sequence: Sequence::Halton,
            scramble: true,
            landmarks: Landmarks::Uniform,
            rank_tol: 1e-10,
            map_bandwidth: 1.0,
        }
    }
}

/// A feature map's description: cheap to build, compare and store.
///
/// ```
/// use kernelpress::features::{FeatureSpec, Method};
/// let spec = FeatureSpec::new("gaussian(gamma=0.5)".parse().unwrap(), Method::Orthogonal, 8, 256, 42);
/// let back = FeatureSpec::from_json(&spec.to_json()).unwrap();
/// assert_eq!(spec, back);
/// let map = spec.sample(None).unwrap().0;
/// assert_eq!(map.output_dim(), 256);
/// ```
#[derive(Debug, Clone, PartialEq)]
pub struct FeatureSpec {
    /// The kernel to approximate.
    pub kernel: Kernel,
    /// The method.
    pub method: Method,
    /// Input dimension `d`.
    pub input_dim: usize,
    /// Requested feature count `D`.
    pub features: usize,
    /// Seed of the ChaCha20 generator that draws the map.
    pub seed: u64,
    /// Method options.
    pub options: MapOptions,
}

/// The random generator every sampler uses, recorded in files.
pub const RNG_NAME: &str = "ChaCha20 (rand 0.10, seed_from_u64)";

impl FeatureSpec {
    /// A spec with default options.
    pub fn new(
        kernel: Kernel,
        method: Method,
        input_dim: usize,
        features: usize,
        seed: u64,
    ) -> Self {
        FeatureSpec {
            kernel,
            method,
            input_dim,
            features,
            seed,
            options: MapOptions::default(),
        }
    }

    /// Checks the spec: the kernel fits the dimension and the method can serve the kernel.
    pub fn validate(&self) -> Result<()> {
        if self.input_dim == 0 {
            return Err(Error::input("input dimension must be at least 1"));
        }
        if self.features == 0 || self.features > 1 << 20 {
            return Err(Error::input(format!(
                "--features {} is invalid; expected 1 to {}",
                self.features,
                1 << 20
            )));
        }
        self.kernel.check_dim(self.input_dim)?;
        if !methods_for(&self.kernel).contains(&self.method) {
            return Err(cannot_serve(&self.kernel, self.method));
        }
        if self.method.is_spectral()
            && self.options.fourier == FourierVariant::Paired
            && self.features % 2 == 1
            // Sums split D themselves; products use the phase form for their factors.
            && !matches!(self.kernel, Kernel::Sum(_) | Kernel::Product(_))
        {
            return Err(Error::input(format!(
                "--features {} is odd: paired cos/sin features come in pairs; use an even count or the phase variant",
                self.features
            )));
        }
        if !(self.options.rank_tol > 0.0 && self.options.rank_tol < 1.0) {
            return Err(Error::input("rank tolerance must be in (0, 1)"));
        }
        let m = self.options.map_bandwidth;
        if !(m > 0.0 && m <= 1e6) {
            return Err(Error::input(format!(
                "map bandwidth multiple {m} must be in (0, 1e6]"
            )));
        }
        if m != 1.0 && (!self.kernel.is_shift_invariant() || self.method.sampler().whole_kernel()) {
            return Err(Error::input(format!(
                "a map bandwidth other than the kernel's needs a random map ({}) of a shift-invariant kernel; {} with {} has none",
                "fourier, orthogonal, hadamard, fastfood or quasi",
                self.method.name(),
                self.kernel
            )));
        }
        Ok(())
    }

    /// The spec as JSON (stored in model manifests).
    pub fn to_json(&self) -> Value {
        let mut v = json!({
            "kernel": self.kernel.to_string(),
            "method": self.method.name(),
            "input_dim": self.input_dim,
            "features": self.features,
            "seed": self.seed,
            "rng": RNG_NAME,
            "fourier_variant": match self.options.fourier { FourierVariant::Paired => "paired", FourierVariant::Phase => "phase" },
            "sequence": match self.options.sequence { Sequence::Halton => "halton", Sequence::Sobol => "sobol" },
            "scramble": self.options.scramble,
            "landmarks": match self.options.landmarks { Landmarks::Uniform => "uniform", Landmarks::KmeansPP => "kmeans++", Landmarks::Leverage => "leverage", Landmarks::Support => "support" },
            "rank_tol": self.options.rank_tol,
        });
        if self.options.map_bandwidth != 1.0 {
            v["map_bandwidth"] = json!(self.options.map_bandwidth);
        }
        v
    }

    /// Reads a spec from JSON.
    pub fn from_json(v: &Value) -> Result<FeatureSpec> {
        let s = |k: &str| {
            v.get(k)
                .and_then(|x| x.as_str())
                .ok_or_else(|| Error::input(format!("feature spec: '{k}' missing or not a string")))
        };
        let u = |k: &str| {
            v.get(k).and_then(|x| x.as_u64()).ok_or_else(|| {
                Error::input(format!("feature spec: '{k}' missing or not a whole number"))
            })
        };
        let options = MapOptions {
            fourier: match s("fourier_variant")? {
                "paired" => FourierVariant::Paired,
                "phase" => FourierVariant::Phase,
                o => {
                    return Err(Error::input(format!(
                        "feature spec: fourier_variant '{o}' unknown"
                    )))
                }
            },
            sequence: parse_sequence(s("sequence")?)?,
            scramble: v.get("scramble").and_then(|x| x.as_bool()).unwrap_or(true),
            landmarks: parse_landmarks(s("landmarks")?)?,
            rank_tol: v.get("rank_tol").and_then(|x| x.as_f64()).unwrap_or(1e-10),
            map_bandwidth: v
                .get("map_bandwidth")
                .and_then(|x| x.as_f64())
                .unwrap_or(1.0),
        };
        let spec = FeatureSpec {
            kernel: s("kernel")?.parse()?,
            method: Method::parse(s("method")?)?,
            input_dim: u("input_dim")? as usize,
            features: u("features")? as usize,
            seed: u("seed")?,
            options,
        };
        spec.validate()?;
        Ok(spec)
    }
}

/// Parses `halton` / `sobol`.
pub fn parse_sequence(s: &str) -> Result<Sequence> {
    match s {
        "halton" => Ok(Sequence::Halton),
        "sobol" => Ok(Sequence::Sobol),
        o => Err(Error::input(format!(
            "sequence '{o}' unknown{}; expected halton or sobol",
            crate::error::did_you_mean(o, &["halton", "sobol"])
        ))),
    }
}

/// Parses `uniform` / `kmeans++` / `leverage`.
pub fn parse_landmarks(s: &str) -> Result<Landmarks> {
    match s {
        "uniform" => Ok(Landmarks::Uniform),
        "kmeans++" | "kmeanspp" => Ok(Landmarks::KmeansPP),
        "leverage" => Ok(Landmarks::Leverage),
        "support" => Ok(Landmarks::Support),
        o => Err(Error::input(format!(
            "landmark rule '{o}' unknown{}; expected uniform, kmeans++, leverage or support",
            crate::error::did_you_mean(o, &["uniform", "kmeans++", "leverage", "support"])
        ))),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn method_kernel_compatibility() {
        let k: Kernel = "laplacian(gamma=1)".parse().unwrap();
        let e = FeatureSpec::new(k, Method::Hadamard, 3, 64, 0)
            .validate()
            .unwrap_err();
        assert!(
            e.to_string()
                .contains("methods that can: fourier, quasi, nystrom"),
            "{e}"
        );
        let k: Kernel = "sigmoid(gamma=1, coef0=0)".parse().unwrap();
        assert!(FeatureSpec::new(k, Method::Fourier, 3, 64, 0)
            .validate()
            .is_err());
        let k: Kernel = "gaussian(gamma=1) + linear()".parse().unwrap();
        assert!(FeatureSpec::new(k.clone(), Method::Fastfood, 3, 64, 0)
            .validate()
            .is_ok());
        assert!(FeatureSpec::new(k, Method::Maclaurin, 3, 64, 0)
            .validate()
            .is_err());
        let k: Kernel = "gaussian(gamma=1)".parse().unwrap();
        assert!(FeatureSpec::new(k, Method::Fourier, 3, 63, 0)
            .validate()
            .unwrap_err()
            .to_string()
            .contains("odd"));
    }
}
