//! One CPU-feature detection for every SIMD kernel of the crate.
//!
//! [`level`] is detected once, at first use, and every kernel with instruction-set copies
//! (the Walsh–Hadamard transform, the vectorised sine/cosine) dispatches on it. A level is
//! only reported when *every* feature its copies are compiled with is present: the AVX2
//! copies enable `avx2` and `fma`, so [`Level::Avx2`] requires both. Setting the
//! environment variable `KERNELPRESS_NO_SIMD` (read once, never written) forces
//! [`Level::Scalar`].
//!
//! ```
//! let l = kernelpress::simd::level();
//! assert!(["scalar", "avx2", "avx512"].contains(&l.name()));
//! ```

use std::sync::OnceLock;

/// An instruction-set level.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Level {
    /// Portable code only.
    Scalar,
    /// AVX2 and FMA (x86-64).
    Avx2,
    /// AVX-512F (x86-64), with AVX2 and FMA.
    Avx512,
}

impl Level {
    /// `scalar`, `avx2` or `avx512`.
    pub fn name(self) -> &'static str {
        match self {
            Level::Scalar => "scalar",
            Level::Avx2 => "avx2",
            Level::Avx512 => "avx512",
        }
    }
}

/// What this CPU supports, ignoring `KERNELPRESS_NO_SIMD` (detected once: the kernels'
/// `_at(level)` forms check their level against it on every call).
pub fn detected() -> Level {
    static DETECTED: OnceLock<Level> = OnceLock::new();
    *DETECTED.get_or_init(detect)
}

fn detect() -> Level {
    #[cfg(target_arch = "x86_64")]
    {
        let avx2 = std::arch::is_x86_feature_detected!("avx2")
            && std::arch::is_x86_feature_detected!("fma");
        if avx2 && std::arch::is_x86_feature_detected!("avx512f") {
            return Level::Avx512;
        }
        if avx2 {
            return Level::Avx2;
        }
    }
    Level::Scalar
}

/// The level every SIMD kernel uses (detected once; `KERNELPRESS_NO_SIMD` forces scalar).
pub fn level() -> Level {
    static LEVEL: OnceLock<Level> = OnceLock::new();
    *LEVEL.get_or_init(|| {
        if std::env::var_os("KERNELPRESS_NO_SIMD").is_some() {
            Level::Scalar
        } else {
            detected()
        }
    })
}

/// The levels this CPU can run, lowest first (for tests that force each path).
pub fn available() -> Vec<Level> {
    let top = detected();
    [Level::Scalar, Level::Avx2, Level::Avx512]
        .into_iter()
        .filter(|l| *l <= top)
        .collect()
}
