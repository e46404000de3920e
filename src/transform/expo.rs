//! Branch-free `exp` over slices, so the kernel-profile loop after a Gram block's matrix
//! product vectorises instead of calling the C library once per entry. Range reduction
//! `x = k·ln 2 + r`, `|r| ≤ ln 2 / 2`, with `ln 2` split in two parts (Cody & Waite), then
//! the Taylor polynomial of degree 13 in Horner form (truncation error below 2⁻⁵³ of the
//! result on that interval), and `2^k` built in the exponent bits. Arguments below −708
//! give 0 (the true value is below the smallest normal double), above 709 give +∞.
//! The tests check the result against the standard library to a few ulp.
//!
//! The f32 twin ([`exp_f32`], and [`gaussian_row`] on f32 for the exact model's f32 batches)
//! reduces the same way with `ln 2` split as 0.693359375 + (−2.12194440e-4) (the split the
//! Cephes library uses, from memory: the first part has 9 bits, so `k·ln2_hi` is exact for
//! every `k` in range) and sums the Taylor polynomial of degree 7 (truncation below
//! 0.3466⁸/8! ≈ 5.3e-9, under f32's 2⁻²⁴ ≈ 6e-8).
#![allow(clippy::excessive_precision)]

const LN2_HI: f64 = 6.931_471_803_691_238_2e-1; // ln 2 to 32 bits
const LN2_LO: f64 = 1.908_214_929_270_587_7e-10; // the rest
const LOG2E: f64 = std::f64::consts::LOG2_E;
/// 1.5·2^52: adding it rounds to an integer kept in the low mantissa bits.
const MAGIC: f64 = 6_755_399_441_055_744.0;

/// ln of the smallest normal double: below it the result is 0 here.
const LOWEST: f64 = -708.396_418_532_264_1;

/// 1/n! for n = 2 … 13.
const INV_FACT: [f64; 12] = [
    0.5,
    1.666_666_666_666_666_6e-1,
    4.166_666_666_666_666_4e-2,
    8.333_333_333_333_333e-3,
    1.388_888_888_888_889e-3,
    1.984_126_984_126_984_2e-4,
    2.480_158_730_158_730_2e-5,
    2.755_731_922_398_589e-6,
    2.755_731_922_398_589e-7,
    2.505_210_838_544_172e-8,
    2.087_675_698_786_81e-9,
    1.605_904_383_682_161_3e-10,
];

/// `exp(x)`, without branches on the normal range (the loops over it vectorise).
#[inline(always)]
pub fn exp(x: f64) -> f64 {
    let xc = x.clamp(LOWEST, 709.0);
    // k = round(x / ln 2), at least −1022 so that 2^k stays a normal number.
    let k = ((xc * LOG2E + MAGIC) - MAGIC).max(-1022.0);
    let kf = k + MAGIC;
    let r = (xc - k * LN2_HI) - k * LN2_LO;
    let mut p = INV_FACT[11];
    for c in INV_FACT[..11].iter().rev() {
        p = p * r + c;
    }
    let e = 1.0 + r + r * r * p;
    // 2^k from the integer in kf's low bits (two's complement within 2^51).
    let kbits = kf.to_bits().wrapping_sub(MAGIC.to_bits());
    let scale = f64::from_bits((kbits.wrapping_add(1023)) << 52);
    let y = e * scale;
    if x < LOWEST {
        0.0
    } else if x > 709.0 || x.is_nan() {
        if x.is_nan() {
            f64::NAN
        } else {
            f64::INFINITY
        }
    } else {
        y
    }
}

/// ln of the smallest normal f32: below it the f32 result is 0.
const LOWEST_F32: f32 = -87.336_55;
/// ln of the largest f32 (rounded down): above it the f32 result is +∞.
const HIGHEST_F32: f32 = 88.722_83;
/// 1.5·2^23: adding it rounds an f32 to an integer kept in the low mantissa bits.
const MAGIC_F32: f32 = 12_582_912.0;
const LN2_HI_F32: f32 = 0.693_359_375;
const LN2_LO_F32: f32 = -2.121_944_4e-4;
/// 1/n! for n = 2 … 7.
const INV_FACT_F32: [f32; 6] = [
    0.5,
    1.666_666_7e-1,
    4.166_666_8e-2,
    8.333_333e-3,
    1.388_888_9e-3,
    1.984_127e-4,
];

/// `exp(x)` in f32, without branches on the normal range (the loops over it vectorise):
/// within a few f32 ulp of the true value; 0 below ln of the smallest normal f32, +∞ above
/// ln of the largest.
#[inline(always)]
pub fn exp_f32(x: f32) -> f32 {
    let xc = x.clamp(LOWEST_F32, HIGHEST_F32);
    let k = ((xc * std::f32::consts::LOG2_E + MAGIC_F32) - MAGIC_F32).max(-126.0);
    let kf = k + MAGIC_F32;
    let r = (xc - k * LN2_HI_F32) - k * LN2_LO_F32;
    let mut p = INV_FACT_F32[5];
    for c in INV_FACT_F32[..5].iter().rev() {
        p = p * r + c;
    }
    let e = 1.0 + r + r * r * p;
    let ki = kf.to_bits().wrapping_sub(MAGIC_F32.to_bits()) as i32;
    // 2^k as two normal factors 2^(k − k/2)·2^(k/2), so that k = 128 (just below the
    // overflow limit) and k = −126 both stay exact.
    let k1 = ki >> 1;
    let s1 = f32::from_bits(((k1 + 127) as u32) << 23);
    let s2 = f32::from_bits(((ki - k1 + 127) as u32) << 23);
    let y = e * s1 * s2;
    if x < LOWEST_F32 {
        0.0
    } else if x > HIGHEST_F32 || x.is_nan() {
        if x.is_nan() {
            f32::NAN
        } else {
            f32::INFINITY
        }
    } else {
        y
    }
}

/// An element type of Gaussian Gram rows: f64 (the reference paths) or f32 (the f32
/// batches), each with its own exponential.
pub trait GaussFloat: Copy + std::ops::Add<Output = Self> + std::ops::Sub<Output = Self> {
    /// `exp(−half·max(qa + qb − 2·dot, 0))`.
    fn gauss(dot: Self, qa: Self, qb: Self, half: Self) -> Self;
}

impl GaussFloat for f64 {
    #[inline(always)]
    fn gauss(dot: f64, qa: f64, qb: f64, half: f64) -> f64 {
        exp(-half * (qa + qb - 2.0 * dot).max(0.0))
    }
}

impl GaussFloat for f32 {
    #[inline(always)]
    fn gauss(dot: f32, qa: f32, qb: f32, half: f32) -> f32 {
        exp_f32(-half * (qa + qb - 2.0 * dot).max(0.0))
    }
}

#[inline(always)]
fn gauss_body<T: GaussFloat>(v: &mut [T], qa: T, qb: &[T], half: T) {
    for (g, q) in v.iter_mut().zip(qb) {
        *g = T::gauss(*g, qa, *q, half);
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn gauss_avx2<T: GaussFloat>(v: &mut [T], qa: T, qb: &[T], half: T) {
    gauss_body(v, qa, qb, half)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn gauss_avx512<T: GaussFloat>(v: &mut [T], qa: T, qb: &[T], half: T) {
    gauss_body(v, qa, qb, half)
}

/// One row of a Gaussian Gram block from its inner products: `v[j] ← exp(−half·max(qa +
/// qb[j] − 2·v[j], 0))`, in f64 or in f32 (the exact model's f32 batches), vectorised for
/// the CPU's level (as the sine/cosine is).
///
/// # Panics
/// If the slices have different lengths.
///
/// ```
/// let mut v = [1.0f32, 0.0];
/// kernelpress::transform::expo::gaussian_row(&mut v, 1.0, &[1.0, 4.0], 0.5);
/// assert!((v[0] - 1.0).abs() < 1e-7 && (v[1] - (-2.5f32).exp()).abs() < 1e-7);
/// ```
pub fn gaussian_row<T: GaussFloat>(v: &mut [T], qa: T, qb: &[T], half: T) {
    gaussian_row_at(crate::simd::level(), v, qa, qb, half)
}

/// [`gaussian_row`] with the instruction-set level forced (tests compare the levels).
pub fn gaussian_row_at<T: GaussFloat>(
    level: crate::simd::Level,
    v: &mut [T],
    qa: T,
    qb: &[T],
    half: T,
) {
    assert_eq!(v.len(), qb.len(), "gaussian_row: lengths differ");
    assert!(
        level <= crate::simd::detected(),
        "this CPU cannot run the {} path",
        level.name()
    );
    match level {
        // SAFETY: the level is supported by this CPU (checked above; AVX2 implies FMA).
        #[cfg(target_arch = "x86_64")]
        crate::simd::Level::Avx512 => unsafe { gauss_avx512(v, qa, qb, half) },
        #[cfg(target_arch = "x86_64")]
        crate::simd::Level::Avx2 => unsafe { gauss_avx2(v, qa, qb, half) },
        _ => gauss_body(v, qa, qb, half),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn matches_the_standard_library() {
        let mut worst: f64 = 0.0;
        let mut state = 0x0dd_ba11_cafe_f00du64;
        for _ in 0..400_000 {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let u = (state >> 11) as f64 / (1u64 << 53) as f64;
            let x = -745.0 * u + 5.0 * (1.0 - u);
            let (a, b) = (exp(x), x.exp());
            if b >= f64::MIN_POSITIVE {
                worst = worst.max(((a - b) / b).abs());
            } else {
                assert!(a == 0.0 && b < 1e-307, "{x}: {a} vs {b}");
            }
        }
        // A few ulp (2⁻⁵² ≈ 2.2e-16 each); the standard library is itself within an ulp.
        assert!(worst < 1e-15, "worst relative error {worst:e}");
        for (x, want) in [
            (0.0, 1.0),
            (-0.0, 1.0),
            (1.0, std::f64::consts::E),
            (-800.0, 0.0),
            (800.0, f64::INFINITY),
        ] {
            assert!(
                (exp(x) - want).abs() <= 1e-15 * want.abs().max(1.0) || exp(x) == want,
                "{x}"
            );
        }
        assert!(exp(f64::NAN).is_nan());
    }

    /// Every level this CPU runs gives the same row as an independent scalar reference
    /// written with the standard library's `exp`, to a few ulp.
    #[test]
    fn every_level_matches_the_reference() {
        let qb: Vec<f64> = (0..203)
            .map(|j| (j as f64 * 0.37).sin().abs() * 9.0)
            .collect();
        let dots: Vec<f64> = (0..203).map(|j| (j as f64 * 0.11).cos() * 2.0).collect();
        let qa = 3.7;
        let reference: Vec<f64> = dots
            .iter()
            .zip(&qb)
            .map(|(d, q)| (-0.5 * (qa + q - 2.0 * d).max(0.0)).exp())
            .collect();
        for level in crate::simd::available() {
            let mut v = dots.clone();
            gaussian_row_at(level, &mut v, qa, &qb, 0.5);
            for (j, (a, b)) in v.iter().zip(&reference).enumerate() {
                assert!(
                    (a - b).abs() <= 4e-16 * b.abs().max(1e-300),
                    "{}: entry {j}: {a} vs {b}",
                    level.name()
                );
            }
        }
    }

    /// The f32 exponential against the standard library's f64 one over the whole f32
    /// range: a few f32 ulp (2⁻²³ ≈ 1.2e-7 each).
    #[test]
    fn f32_matches_the_standard_library() {
        let mut worst: f64 = 0.0;
        let mut state = 0x05ee_df32_u64;
        for _ in 0..400_000 {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let u = (state >> 11) as f64 / (1u64 << 53) as f64;
            let x = (-87.3 * u + 88.7 * (1.0 - u)) as f32;
            let (a, b) = (exp_f32(x) as f64, (x as f64).exp());
            worst = worst.max(((a - b) / b).abs());
        }
        assert!(worst < 3e-7, "worst relative error {worst:e}");
        for (x, want) in [
            (0.0f32, 1.0f32),
            (-0.0, 1.0),
            (-100.0, 0.0),
            (100.0, f32::INFINITY),
        ] {
            assert_eq!(exp_f32(x), want, "{x}");
        }
        assert!(exp_f32(88.7).is_finite() && exp_f32(f32::NAN).is_nan());
    }

    /// Every level of the f32 Gaussian row against an f64 reference written with the
    /// standard library's `exp`, from the same f32 inputs.
    #[test]
    fn f32_rows_at_every_level_match_the_reference() {
        let n = 301;
        let qb: Vec<f32> = (0..n)
            .map(|j| (j as f32 * 0.37).sin().abs() * 40.0)
            .collect();
        let dots: Vec<f32> = (0..n).map(|j| (j as f32 * 0.11).cos() * 9.0).collect();
        let qa = 23.5f32;
        for level in crate::simd::available() {
            let mut v = dots.clone();
            gaussian_row_at(level, &mut v, qa, &qb, 0.5);
            for j in 0..n {
                let r2 = (qa + qb[j] - 2.0 * dots[j]).max(0.0) as f64;
                let want = (-0.5 * r2).exp();
                assert!(
                    (v[j] as f64 - want).abs() <= 3e-7 * want.max(1e-30),
                    "{}: entry {j}: {} vs {want}",
                    level.name(),
                    v[j]
                );
            }
        }
    }
}
