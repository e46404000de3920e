//! The precision of a linear head's products on the f32 paths, and the head packed for it.
//!
//! ```
//! use kernelpress::linalg::{HeadPrecision, LowHead};
//! let p: HeadPrecision = "int8".parse().unwrap();
//! let h = LowHead::new(p, &[1.0, 0.5], 2, 1).unwrap();
//! let mut out = [0f32];
//! h.product(&[1.0, 1.0], &mut out);
//! assert!((out[0] - 1.5).abs() < 0.02);
//! assert!(LowHead::new(HeadPrecision::F32, &[1.0], 1, 1).is_none());
//! ```

use super::{NarrowBf16, NarrowI8};
use crate::{Error, Result};

/// How the head's products are computed on the f32 paths (`score --f32`, the f32 single
/// row): f32 weights and features, bfloat16 weights and features with f32 sums, or int8
/// weights (per-column scales) and int8 features (per-row scales) with integer sums.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum HeadPrecision {
    /// f32 weights, f32 arithmetic.
    #[default]
    F32,
    /// bfloat16 weights and features, f32 sums ([`NarrowBf16`]).
    Bf16,
    /// int8 weights and features, integer sums ([`NarrowI8`]).
    Int8,
}

impl HeadPrecision {
    /// Every precision, widest first.
    pub const ALL: [HeadPrecision; 3] =
        [HeadPrecision::F32, HeadPrecision::Bf16, HeadPrecision::Int8];

    /// `f32`, `bf16` or `int8`.
    pub fn name(self) -> &'static str {
        match self {
            HeadPrecision::F32 => "f32",
            HeadPrecision::Bf16 => "bf16",
            HeadPrecision::Int8 => "int8",
        }
    }

    /// Whether this CPU has the instructions that make this precision faster than f32
    /// (AVX-512 BF16 for `bf16`, AVX-512 VNNI for `int8`; always for `f32`). Without them
    /// the portable loops give the same decisions, more slowly than the f32 head.
    pub fn fast_here(self) -> bool {
        match self {
            HeadPrecision::F32 => true,
            HeadPrecision::Bf16 => {
                super::narrow_bf16::Bf16Path::best() != super::narrow_bf16::Bf16Path::Portable
            }
            HeadPrecision::Int8 => {
                super::narrow_i8::I8Path::best() != super::narrow_i8::I8Path::Portable
            }
        }
    }

    /// The instruction-set path its products take on this CPU (`f32` for f32 heads).
    pub fn path_name(self) -> &'static str {
        match self {
            HeadPrecision::F32 => crate::simd::level().name(),
            HeadPrecision::Bf16 => super::narrow_bf16::Bf16Path::best().name(),
            HeadPrecision::Int8 => super::narrow_i8::I8Path::best().name(),
        }
    }
}

impl std::str::FromStr for HeadPrecision {
    type Err = Error;
    fn from_str(s: &str) -> Result<HeadPrecision> {
        HeadPrecision::ALL
            .into_iter()
            .find(|p| p.name() == s)
            .ok_or_else(|| {
                Error::input(format!(
                    "head precision '{s}' is unknown{}; expected f32, bf16 or int8",
                    crate::error::did_you_mean(s, &["f32", "bf16", "int8"])
                ))
            })
    }
}

/// A head packed for a low-precision product.
#[derive(Debug, Clone)]
pub enum LowHead {
    /// bfloat16.
    Bf16(NarrowBf16),
    /// int8.
    Int8(NarrowI8),
}

impl LowHead {
    /// The row-major `k × n` head `w` packed at `precision` (`None` for f32).
    ///
    /// # Panics
    /// If `w.len() != k · n`.
    #[track_caller]
    pub fn new(precision: HeadPrecision, w: &[f64], k: usize, n: usize) -> Option<LowHead> {
        match precision {
            HeadPrecision::F32 => None,
            HeadPrecision::Bf16 => Some(LowHead::Bf16(NarrowBf16::from_k_by_n(w, k, n))),
            HeadPrecision::Int8 => Some(LowHead::Int8(NarrowI8::from_k_by_n(w, k, n))),
        }
    }

    /// Its precision.
    pub fn precision(&self) -> HeadPrecision {
        match self {
            LowHead::Bf16(_) => HeadPrecision::Bf16,
            LowHead::Int8(_) => HeadPrecision::Int8,
        }
    }

    /// `out ≈ a · w` (`a`: `m × k` row-major, `out`: `m × n`).
    ///
    /// # Panics
    /// If the lengths do not fit the shapes.
    #[track_caller]
    pub fn product(&self, a: &[f32], out: &mut [f32]) {
        match self {
            LowHead::Bf16(h) => h.product(a, out),
            LowHead::Int8(h) => h.product(a, out),
        }
    }

    /// Bytes the products read.
    pub fn bytes(&self) -> usize {
        match self {
            LowHead::Bf16(h) => h.bytes(),
            LowHead::Int8(h) => h.bytes(),
        }
    }
}
