//! Fast Walsh–Hadamard transform (Sylvester order, unnormalised).
//!
//! `wht_in_place(x)` replaces `x` (length a power of two) by `H x` with `n·log₂n` additions
//! and subtractions. It runs the first three levels as one radix-8 pass over registers, then
//! the remaining levels as butterflies over contiguous halves, which the compiler
//! vectorises. [`wht_reference`] is the slow `O(n²)` definition, used only by tests.
//!
//! ```
//! use kernelpress::transform::wht_in_place;
//! let mut x = [1.0f64, 2.0, 3.0, 4.0];
//! wht_in_place(&mut x);
//! assert_eq!(x, [10.0, -2.0, -4.0, 0.0]); // H₄·(1,2,3,4) by Sylvester's construction
//! ```

use std::ops::{Add, Sub};

/// Floats the transform runs on (`f32`, `f64`).
pub trait WhtFloat:
    Copy + Add<Output = Self> + Sub<Output = Self> + Default + Send + Sync + 'static
{
}
impl WhtFloat for f32 {}
impl WhtFloat for f64 {}

#[cold]
#[inline(never)]
#[track_caller]
fn bad_len(n: usize) -> ! {
    panic!("Walsh–Hadamard transform needs a power-of-two length, got {n}")
}

#[inline(always)]
fn radix8<T: WhtFloat>(c: &mut [T]) {
    let (a0, a1, a2, a3, a4, a5, a6, a7) = (c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]);
    let (b0, b1, b2, b3) = (a0 + a1, a0 - a1, a2 + a3, a2 - a3);
    let (b4, b5, b6, b7) = (a4 + a5, a4 - a5, a6 + a7, a6 - a7);
    let (d0, d1, d2, d3) = (b0 + b2, b1 + b3, b0 - b2, b1 - b3);
    let (d4, d5, d6, d7) = (b4 + b6, b5 + b7, b4 - b6, b5 - b7);
    c[0] = d0 + d4;
    c[1] = d1 + d5;
    c[2] = d2 + d6;
    c[3] = d3 + d7;
    c[4] = d0 - d4;
    c[5] = d1 - d5;
    c[6] = d2 - d6;
    c[7] = d3 - d7;
}

#[inline(always)]
fn butterflies<T: WhtFloat>(lo: &mut [T], hi: &mut [T]) {
    for (a, b) in lo.iter_mut().zip(hi.iter_mut()) {
        let (u, v) = (*a, *b);
        *a = u + v;
        *b = u - v;
    }
}

#[inline(always)]
fn radix4<T: WhtFloat>(q0: &mut [T], q1: &mut [T], q2: &mut [T], q3: &mut [T]) {
    for (((a, b), c), d) in q0
        .iter_mut()
        .zip(q1.iter_mut())
        .zip(q2.iter_mut())
        .zip(q3.iter_mut())
    {
        let (x0, x1, x2, x3) = (*a, *b, *c, *d);
        let (s0, s1, s2, s3) = (x0 + x1, x0 - x1, x2 + x3, x2 - x3);
        *a = s0 + s2;
        *c = s0 - s2;
        *b = s1 + s3;
        *d = s1 - s3;
    }
}

/// The whole transform; `inline(always)` so that each instruction-set entry point below
/// compiles its own copy.
#[inline(always)]
fn wht_body<T: WhtFloat>(x: &mut [T]) {
    if x.len() >= 8 {
        for c in x.chunks_exact_mut(8) {
            radix8(c);
        }
        levels_from(x, 8)
    } else {
        levels_from(x, 1)
    }
}

/// The levels from butterfly span `h` on (the levels below `h` already done).
#[inline(always)]
fn levels_from<T: WhtFloat>(x: &mut [T], h: usize) {
    let n = x.len();
    let mut h = h;
    // Two levels per pass over memory (radix 4), then one radix-2 pass if a level is left.
    while 4 * h <= n {
        for block in x.chunks_exact_mut(4 * h) {
            let (a, rest) = block.split_at_mut(h);
            let (b, rest) = rest.split_at_mut(h);
            let (c, d) = rest.split_at_mut(h);
            radix4(a, b, c, d);
        }
        h *= 4;
    }
    while h < n {
        for block in x.chunks_exact_mut(2 * h) {
            let (lo, hi) = block.split_at_mut(h);
            butterflies(lo, hi);
        }
        h *= 2;
    }
}

#[cfg(target_arch = "x86_64")]
mod x86 {
    use super::{levels_from, wht_body, WhtFloat};
    use std::any::TypeId;
    use std::arch::x86_64::*;

    /// The first three levels (span 1, 2, 4) of an f32 transform, one 8-float chunk per
    /// register: each level is a lane permutation and one `±v + permuted` (a fused
    /// multiply-add by ±1, which rounds once, as the scalar addition does: the results are
    /// bit-identical to [`super::radix8`]).
    ///
    /// # Safety
    /// The CPU must support AVX2 and FMA.
    #[target_feature(enable = "avx2,fma")]
    unsafe fn radix8_f32(x: &mut [f32]) {
        let s1 = _mm256_setr_ps(1., -1., 1., -1., 1., -1., 1., -1.);
        let s2 = _mm256_setr_ps(1., 1., -1., -1., 1., 1., -1., -1.);
        let s4 = _mm256_setr_ps(1., 1., 1., 1., -1., -1., -1., -1.);
        for c in x.chunks_exact_mut(8) {
            let p = c.as_mut_ptr();
            // SAFETY: `c` holds 8 floats; unaligned loads and stores.
            let mut v = unsafe { _mm256_loadu_ps(p) };
            v = _mm256_fmadd_ps(v, s1, _mm256_permute_ps(v, 0b10_11_00_01));
            v = _mm256_fmadd_ps(v, s2, _mm256_permute_ps(v, 0b01_00_11_10));
            v = _mm256_fmadd_ps(v, s4, _mm256_permute2f128_ps(v, v, 0x01));
            unsafe { _mm256_storeu_ps(p, v) };
        }
    }

    /// The first five levels (span 1 … 16) of an f32 transform of length ≥ 32: four
    /// registers of 8 floats each get the radix-8 levels in registers, then the radix-4
    /// levels of span 8 and 16 across the four (the same operations as the scalar
    /// [`super::radix4`], so the results are bit-identical), with one load and one store
    /// per float.
    ///
    /// # Safety
    /// The CPU must support AVX2 and FMA.
    #[target_feature(enable = "avx2,fma")]
    unsafe fn first5_f32(x: &mut [f32]) {
        let s1 = _mm256_setr_ps(1., -1., 1., -1., 1., -1., 1., -1.);
        let s2 = _mm256_setr_ps(1., 1., -1., -1., 1., 1., -1., -1.);
        let s4 = _mm256_setr_ps(1., 1., 1., 1., -1., -1., -1., -1.);
        let r8 = |mut v: __m256| {
            v = _mm256_fmadd_ps(v, s1, _mm256_permute_ps(v, 0b10_11_00_01));
            v = _mm256_fmadd_ps(v, s2, _mm256_permute_ps(v, 0b01_00_11_10));
            _mm256_fmadd_ps(v, s4, _mm256_permute2f128_ps(v, v, 0x01))
        };
        for c in x.chunks_exact_mut(32) {
            let p = c.as_mut_ptr();
            // SAFETY: `c` holds 32 floats; unaligned loads and stores.
            let (a, b, cc, d) = unsafe {
                (
                    r8(_mm256_loadu_ps(p)),
                    r8(_mm256_loadu_ps(p.add(8))),
                    r8(_mm256_loadu_ps(p.add(16))),
                    r8(_mm256_loadu_ps(p.add(24))),
                )
            };
            let (t0, t1) = (_mm256_add_ps(a, b), _mm256_sub_ps(a, b));
            let (t2, t3) = (_mm256_add_ps(cc, d), _mm256_sub_ps(cc, d));
            unsafe {
                _mm256_storeu_ps(p, _mm256_add_ps(t0, t2));
                _mm256_storeu_ps(p.add(8), _mm256_add_ps(t1, t3));
                _mm256_storeu_ps(p.add(16), _mm256_sub_ps(t0, t2));
                _mm256_storeu_ps(p.add(24), _mm256_sub_ps(t1, t3));
            }
        }
    }

    /// The first six levels (span 1 … 32) of an f32 transform of length ≥ 64 with 16-float
    /// registers: the levels of span 1, 2, 4 and 8 inside each register (a lane
    /// permutation and one `±v + permuted`, as in [`radix8_f32`]), then the radix-4
    /// levels of span 16 and 32 across four registers (the operations of the scalar
    /// [`super::radix4`], so the results are bit-identical), one load and one store per
    /// float.
    ///
    /// # Safety
    /// The CPU must support AVX-512F.
    #[target_feature(enable = "avx512f")]
    unsafe fn first6_f32(x: &mut [f32]) {
        let alt = |a: f32, b: f32, w: usize| {
            let mut s = [a; 16];
            s.iter_mut()
                .enumerate()
                .for_each(|(i, v)| *v = if (i / w).is_multiple_of(2) { a } else { b });
            // SAFETY: 16 floats, unaligned load.
            unsafe { _mm512_loadu_ps(s.as_ptr()) }
        };
        let (s1, s2, s4, s8) = (
            alt(1., -1., 1),
            alt(1., -1., 2),
            alt(1., -1., 4),
            alt(1., -1., 8),
        );
        let r16 = |mut v: __m512| {
            v = _mm512_fmadd_ps(v, s1, _mm512_permute_ps(v, 0b10_11_00_01));
            v = _mm512_fmadd_ps(v, s2, _mm512_permute_ps(v, 0b01_00_11_10));
            v = _mm512_fmadd_ps(v, s4, _mm512_shuffle_f32x4(v, v, 0b10_11_00_01));
            _mm512_fmadd_ps(v, s8, _mm512_shuffle_f32x4(v, v, 0b01_00_11_10))
        };
        for c in x.chunks_exact_mut(64) {
            let p = c.as_mut_ptr();
            // SAFETY: `c` holds 64 floats; unaligned loads and stores.
            let (a, b, cc, d) = unsafe {
                (
                    r16(_mm512_loadu_ps(p)),
                    r16(_mm512_loadu_ps(p.add(16))),
                    r16(_mm512_loadu_ps(p.add(32))),
                    r16(_mm512_loadu_ps(p.add(48))),
                )
            };
            let (t0, t1) = (_mm512_add_ps(a, b), _mm512_sub_ps(a, b));
            let (t2, t3) = (_mm512_add_ps(cc, d), _mm512_sub_ps(cc, d));
            unsafe {
                _mm512_storeu_ps(p, _mm512_add_ps(t0, t2));
                _mm512_storeu_ps(p.add(16), _mm512_add_ps(t1, t3));
                _mm512_storeu_ps(p.add(32), _mm512_sub_ps(t0, t2));
                _mm512_storeu_ps(p.add(48), _mm512_sub_ps(t1, t3));
            }
        }
    }

    /// Four levels (span `h`, `2h`, `4h`, `8h`; `h` a multiple of 16) of an f32 transform
    /// in one pass over memory: sixteen registers, one from each of the sixteen strided
    /// segments of a block of `16h`, take the four levels of butterflies among
    /// themselves (the operations, in the same order, of the scalar passes, so the
    /// results are bit-identical).
    ///
    /// # Safety
    /// The CPU must support AVX-512F; `x.len()` is a multiple of `16h`.
    #[target_feature(enable = "avx512f")]
    unsafe fn radix16_f32(x: &mut [f32], h: usize) {
        for block in x.chunks_exact_mut(16 * h) {
            let p = block.as_mut_ptr();
            for c in (0..h).step_by(16) {
                // SAFETY: segment i starts at i·h < 16h and c + 16 ≤ h, so every load and
                // store is inside `block`; unaligned.
                let mut v = [_mm512_setzero_ps(); 16];
                for (i, r) in v.iter_mut().enumerate() {
                    *r = unsafe { _mm512_loadu_ps(p.add(i * h + c)) };
                }
                let mut span = 1;
                while span < 16 {
                    for i in 0..16 {
                        if i & span == 0 {
                            let (a, b) = (v[i], v[i + span]);
                            v[i] = _mm512_add_ps(a, b);
                            v[i + span] = _mm512_sub_ps(a, b);
                        }
                    }
                    span *= 2;
                }
                for (i, r) in v.iter().enumerate() {
                    unsafe { _mm512_storeu_ps(p.add(i * h + c), *r) };
                }
            }
        }
    }

    /// The transform with the register passes for f32 (other types: the generic body);
    /// inlined into each instruction-set entry point below.
    ///
    /// # Safety
    /// The CPU must support AVX2 and FMA, and AVX-512F when `wide`.
    #[inline(always)]
    unsafe fn wht_f32_or<T: WhtFloat>(x: &mut [T], wide: bool) {
        if TypeId::of::<T>() == TypeId::of::<f32>() && x.len() >= 8 {
            // SAFETY: T is f32 (the same type, so the same layout).
            let xf = unsafe { std::slice::from_raw_parts_mut(x.as_mut_ptr() as *mut f32, x.len()) };
            // SAFETY: the caller's CPU supports AVX2 and FMA (and AVX-512F when `wide`).
            if wide && xf.len() >= 64 {
                unsafe { first6_f32(xf) };
                let mut h = 64;
                while 16 * h <= xf.len() {
                    unsafe { radix16_f32(xf, h) };
                    h *= 16;
                }
                levels_from(x, h)
            } else if xf.len() >= 32 {
                unsafe { first5_f32(xf) };
                levels_from(x, 32)
            } else {
                unsafe { radix8_f32(xf) };
                levels_from(x, 8)
            }
        } else {
            wht_body(x)
        }
    }

    /// # Safety
    /// The CPU must support AVX2 and FMA (checked by the caller).
    #[target_feature(enable = "avx2,fma")]
    pub(super) unsafe fn wht_avx2<T: WhtFloat>(x: &mut [T]) {
        unsafe { wht_f32_or(x, false) }
    }

    /// # Safety
    /// The CPU must support AVX-512F, AVX2 and FMA (checked by the caller).
    #[target_feature(enable = "avx512f,avx2,fma")]
    pub(super) unsafe fn wht_avx512<T: WhtFloat>(x: &mut [T]) {
        unsafe { wht_f32_or(x, true) }
    }
}

/// The instruction set the transform uses on this CPU (`avx512`, `avx2` or `scalar`):
/// [`crate::simd::level`].
pub fn wht_isa() -> &'static str {
    crate::simd::level().name()
}

/// In-place unnormalised Walsh–Hadamard transform.
///
/// # Panics
/// If `x.len()` is not a power of two (length 0 is rejected too).
#[track_caller]
pub fn wht_in_place<T: WhtFloat>(x: &mut [T]) {
    let n = x.len();
    if n == 0 || !n.is_power_of_two() {
        bad_len(n);
    }
    wht_dispatch(crate::simd::level(), x)
}

/// Runs the copy for `level`.
///
/// # Panics
/// If this CPU does not support `level` (see [`crate::simd::available`]).
#[track_caller]
pub fn wht_in_place_at<T: WhtFloat>(level: crate::simd::Level, x: &mut [T]) {
    assert!(
        level <= crate::simd::detected(),
        "this CPU does not support {}",
        level.name()
    );
    let n = x.len();
    if n == 0 || !n.is_power_of_two() {
        bad_len(n);
    }
    wht_dispatch(level, x)
}

fn wht_dispatch<T: WhtFloat>(level: crate::simd::Level, x: &mut [T]) {
    use crate::simd::Level;
    match level {
        // SAFETY: callers pass a level this CPU supports (detected at run time).
        #[cfg(target_arch = "x86_64")]
        Level::Avx512 => unsafe { x86::wht_avx512(x) },
        #[cfg(target_arch = "x86_64")]
        Level::Avx2 => unsafe { x86::wht_avx2(x) },
        _ => wht_body(x),
    }
}

/// The scalar path regardless of the CPU (for tests that compare paths).
pub fn wht_in_place_scalar<T: WhtFloat>(x: &mut [T]) {
    let n = x.len();
    if n == 0 || !n.is_power_of_two() {
        bad_len(n);
    }
    wht_body(x)
}

/// The definition: `y_i = Σ_j (−1)^{popcount(i & j)} x_j`. `O(n²)`; for tests only.
pub fn wht_reference(x: &[f64]) -> Vec<f64> {
    let n = x.len();
    (0..n)
        .map(|i| {
            (0..n)
                .map(|j| {
                    if (i & j).count_ones() % 2 == 0 {
                        x[j]
                    } else {
                        -x[j]
                    }
                })
                .sum()
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn matches_reference_all_sizes_f64_f32() {
        for k in 0..12 {
            let n = 1usize << k;
            let x: Vec<f64> = (0..n)
                .map(|i| ((i * 7 + 3) as f64 * 0.61).sin() * 1e3)
                .collect();
            let want = wht_reference(&x);
            let mut got = x.clone();
            wht_in_place(&mut got);
            let scale = x.iter().map(|v| v.abs()).sum::<f64>();
            for (a, b) in got.iter().zip(&want) {
                assert!((a - b).abs() <= 1e-13 * scale, "n={n}");
            }
            let mut g32: Vec<f32> = x.iter().map(|v| *v as f32).collect();
            wht_in_place(&mut g32);
            for (a, b) in g32.iter().zip(&want) {
                assert!((*a as f64 - b).abs() <= 1e-5 * scale, "f32 n={n}");
            }
        }
    }

    #[test]
    fn reference_check_values_and_involution() {
        // Sylvester's construction (1867): H₈e₀ = all ones; H·H = nI.
        let mut e0 = [0.0f64; 8];
        e0[0] = 1.0;
        wht_in_place(&mut e0);
        assert_eq!(e0, [1.0; 8]);
        let x: Vec<f64> = (0..64).map(|i| i as f64 - 20.5).collect();
        let mut y = x.clone();
        wht_in_place(&mut y);
        wht_in_place(&mut y);
        for (a, b) in y.iter().zip(&x) {
            assert!((a - 64.0 * b).abs() < 1e-9);
        }
        // Extreme magnitudes stay exact in f64 where no cancellation happens.
        let mut big = [1e250f64, 1e250, 1e250, 1e250];
        wht_in_place(&mut big);
        assert_eq!(big, [4e250, 0.0, 0.0, 0.0]);
    }

    #[test]
    fn simd_path_equals_scalar_path() {
        // Which path ran is reported; both must give the same numbers.
        assert!(["scalar", "avx2", "avx512"].contains(&wht_isa()));
        for k in [3, 4, 5, 6, 9, 12, 15] {
            let n = 1usize << k;
            let x: Vec<f32> = (0..n).map(|i| ((i * 5 + 1) as f32 * 0.3).sin()).collect();
            let mut a = x.clone();
            let mut b = x.clone();
            wht_in_place(&mut a);
            wht_in_place_scalar(&mut b);
            assert_eq!(a, b, "n={n}");
        }
    }

    /// Every instruction-set copy this CPU can run, forced in turn, against the definition
    /// (not against another copy).
    #[test]
    fn every_level_matches_the_definition() {
        for level in crate::simd::available() {
            for k in [0, 1, 3, 5, 6, 8, 10] {
                let n = 1usize << k;
                let x: Vec<f64> = (0..n).map(|i| ((i * 11 + 2) as f64 * 0.43).cos()).collect();
                let want = wht_reference(&x);
                let mut got = x.clone();
                wht_in_place_at(level, &mut got);
                for (a, b) in got.iter().zip(&want) {
                    assert!((a - b).abs() <= 1e-12 * n as f64, "{} n={n}", level.name());
                }
                let mut g32: Vec<f32> = x.iter().map(|v| *v as f32).collect();
                wht_in_place_at(level, &mut g32);
                for (a, b) in g32.iter().zip(&want) {
                    assert!(
                        (*a as f64 - b).abs() <= 1e-5 * n as f64,
                        "{} f32 n={n}",
                        level.name()
                    );
                }
            }
        }
    }

    #[test]
    #[should_panic(expected = "power-of-two")]
    fn rejects_other_lengths() {
        let mut x = [0.0f64; 6];
        wht_in_place(&mut x);
    }
}
