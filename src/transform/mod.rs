//! Transforms used by the structured feature maps.
//!
//! - [`wht`]: the fast Walsh–Hadamard transform, in place, unnormalised
//!   (`H_{2n} = [[H_n, H_n], [H_n, −H_n]]`, so `H·H = n·I`; divide by `√n` for the
//!   orthogonal version).
//! - [`gather`]: index selection in f32 (AVX-512 gathers where the CPU has them).
//! - [`trig`]: vectorised sine and cosine of slices (Cody–Waite reduction, fdlibm kernels).

pub mod expo;
pub mod gather;
pub mod trig;
pub mod wht;

pub use wht::{
    wht_in_place, wht_in_place_at, wht_in_place_scalar, wht_isa, wht_reference, WhtFloat,
};
