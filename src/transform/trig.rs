//! Branch-free `sin`/`cos` over slices, so the compiler can vectorise the hot loop of the
//! Fourier-type maps. Range reduction by `π/2` in three parts (Cody & Waite), then the
//! minimax polynomials of fdlibm's `__kernel_sin` / `__kernel_cos` on `[−π/4, π/4]`
//! (coefficients from memory; the tests check the result against the standard library to
//! a few ulp). Arguments with `|x| > 2^19·π/2` take the standard library's path.
//! The result is the same on every platform (no libm dependence).
#![allow(clippy::excessive_precision)] // the coefficients are kept as published

const PIO2_1: f64 = 1.570_796_326_734_125_6; // first 33 bits of π/2
const PIO2_2: f64 = 6.077_100_506_303_966e-11; // next 33 bits
const PIO2_3: f64 = 2.022_266_248_711_166_5e-21; // the rest
const TWO_OVER_PI: f64 = std::f64::consts::FRAC_2_PI;
const LIMIT: f64 = 823_549.6; // 2^19 · π/2

const S1: f64 = -1.666_666_666_666_663_2e-1;
const S2: f64 = 8.333_333_333_322_49e-3;
const S3: f64 = -1.984_126_982_985_795e-4;
const S4: f64 = 2.755_731_370_707_007e-6;
const S5: f64 = -2.505_076_025_340_686_3e-8;
const S6: f64 = 1.589_690_995_211_550_1e-10;
const C1: f64 = 4.166_666_666_666_660_2e-2;
const C2: f64 = -1.388_888_888_887_411e-3;
const C3: f64 = 2.480_158_728_947_673e-5;
const C4: f64 = -2.755_731_435_139_066_3e-7;
const C5: f64 = 2.087_572_321_298_175e-9;
const C6: f64 = -1.135_964_755_778_819_5e-11;

#[inline(always)]
fn kernel(x: f64) -> (f64, f64) {
    // Round to nearest with the 1.5·2^52 trick (no libm call, so the loop vectorises).
    const MAGIC: f64 = 6_755_399_441_055_744.0;
    let k = (x * TWO_OVER_PI + MAGIC) - MAGIC;
    let r = ((x - k * PIO2_1) - k * PIO2_2) - k * PIO2_3;
    let z = r * r;
    let s = r + r * z * (S1 + z * (S2 + z * (S3 + z * (S4 + z * (S5 + z * S6)))));
    let hz = 0.5 * z;
    let w = 1.0 - hz;
    let c =
        w + (((1.0 - w) - hz) + z * z * (C1 + z * (C2 + z * (C3 + z * (C4 + z * (C5 + z * C6))))));
    // Quadrant q = k mod 4 as a float in {0, 1, 2, 3}; selects instead of branches.
    let q = k - 4.0 * (k * 0.25).floor();
    let odd = q == 1.0 || q == 3.0;
    let sin = if odd { c } else { s };
    let cos = if odd { s } else { c };
    let sin = if q >= 2.0 { -sin } else { sin };
    let cos = if q == 1.0 || q == 2.0 { -cos } else { cos };
    (sin, cos)
}

/// `(sin x, cos x)`.
#[inline]
pub fn sin_cos(x: f64) -> (f64, f64) {
    if x.abs() <= LIMIT {
        kernel(x)
    } else {
        x.sin_cos()
    }
}

#[inline(always)]
fn scaled_body(p: &[f64], f: f64, cos_out: &mut [f64], sin_out: &mut [f64]) {
    for ((x, c), s) in p.iter().zip(cos_out.iter_mut()).zip(sin_out.iter_mut()) {
        let (sv, cv) = kernel(*x);
        *c = f * cv;
        *s = f * sv;
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn scaled_avx2(p: &[f64], f: f64, cos_out: &mut [f64], sin_out: &mut [f64]) {
    scaled_body(p, f, cos_out, sin_out)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn scaled_avx512(p: &[f64], f: f64, cos_out: &mut [f64], sin_out: &mut [f64]) {
    scaled_body(p, f, cos_out, sin_out)
}

/// `cos_out[i] = f·cos(p[i])`, `sin_out[i] = f·sin(p[i])`, vectorised (instruction set
/// chosen at run time, as for the Walsh–Hadamard transform).
///
/// # Panics
/// If the slices have different lengths.
pub fn scaled_sin_cos(p: &[f64], f: f64, cos_out: &mut [f64], sin_out: &mut [f64]) {
    scaled_sin_cos_at(crate::simd::level(), p, f, cos_out, sin_out)
}

/// [`scaled_sin_cos`] with the instruction-set level forced (tests run every level).
///
/// # Panics
/// If the slices have different lengths, or this CPU cannot run `level`.
pub fn scaled_sin_cos_at(
    level: crate::simd::Level,
    p: &[f64],
    f: f64,
    cos_out: &mut [f64],
    sin_out: &mut [f64],
) {
    assert!(
        p.len() == cos_out.len() && p.len() == sin_out.len(),
        "sin_cos: lengths differ"
    );
    assert!(
        level <= crate::simd::detected(),
        "this CPU cannot run the {} path",
        level.name()
    );
    if p.iter().any(|x| !(x.abs() <= LIMIT)) {
        for ((x, c), s) in p.iter().zip(cos_out.iter_mut()).zip(sin_out.iter_mut()) {
            let (sv, cv) = sin_cos(*x);
            *c = f * cv;
            *s = f * sv;
        }
        return;
    }
    match level {
        // SAFETY: the level is supported by this CPU (checked above; AVX2 implies FMA).
        #[cfg(target_arch = "x86_64")]
        crate::simd::Level::Avx512 => unsafe { scaled_avx512(p, f, cos_out, sin_out) },
        #[cfg(target_arch = "x86_64")]
        crate::simd::Level::Avx2 => unsafe { scaled_avx2(p, f, cos_out, sin_out) },
        _ => scaled_body(p, f, cos_out, sin_out),
    }
}

// f32: the same scheme with f32 constants: π/2 in three parts whose leading parts have
// few bits (so k·part is exact for |k| < 2^12), and the minimax polynomials of the Cephes
// library's `sinf`/`cosf` on [−π/4, π/4] (coefficients from memory; the tests check the
// result against the standard library's f64 sine and cosine).
const F_PIO2_1: f32 = 1.570_312_5;
const F_PIO2_2: f32 = 4.837_513e-4;
const F_PIO2_3: f32 = 7.549_79e-8;
const F_LIMIT: f32 = 6_433.0; // 2^12 · π/2
const FS1: f32 = -1.666_665_5e-1;
const FS2: f32 = 8.332_161e-3;
const FS3: f32 = -1.951_529_6e-4;
const FC1: f32 = 4.166_664_6e-2;
const FC2: f32 = -1.388_731_6e-3;
const FC3: f32 = 2.443_315_7e-5;

/// `a·b + c`, fused (one rounding) in the copies whose instruction set has fused
/// multiply-adds, plain in the portable copy (where `mul_add` would be a library call).
#[inline(always)]
fn madd<const FMA: bool>(a: f32, b: f32, c: f32) -> f32 {
    if FMA {
        a.mul_add(b, c)
    } else {
        a * b + c
    }
}

#[inline(always)]
fn kernel32<const FMA: bool>(x: f32) -> (f32, f32) {
    const MAGIC: f32 = 12_582_912.0; // 1.5 · 2^23
                                     // t = 1.5·2^23 + k exactly (|k| < 2^22), so the low bits of t's significand are k
                                     // modulo 4: the quadrant.
    let t = madd::<FMA>(x, std::f32::consts::FRAC_2_PI, MAGIC);
    let q = t.to_bits();
    let k = t - MAGIC;
    let r = madd::<FMA>(
        -k,
        F_PIO2_3,
        madd::<FMA>(-k, F_PIO2_2, madd::<FMA>(-k, F_PIO2_1, x)),
    );
    let z = r * r;
    let s = madd::<FMA>(r * z, madd::<FMA>(z, madd::<FMA>(z, FS3, FS2), FS1), r);
    let c = madd::<FMA>(
        z * z,
        madd::<FMA>(z, madd::<FMA>(z, FC3, FC2), FC1),
        madd::<FMA>(-0.5, z, 1.0),
    );
    // Quadrant q: sin = (s, c, −s, −c)[q], cos = (c, −s, −c, s)[q].
    let odd = q & 1 == 1;
    let (sv, cv) = if odd { (c, s) } else { (s, c) };
    let sin = f32::from_bits(sv.to_bits() ^ ((q & 2) << 30));
    let cos = f32::from_bits(cv.to_bits() ^ ((q.wrapping_add(1) & 2) << 30));
    (sin, cos)
}

/// The f32 slice loop; returns false (results to be discarded) when an argument is beyond
/// [`F_LIMIT`] or not a number, checked in the same pass without early exit so the loop
/// vectorises.
#[inline(always)]
fn scaled_body32<const FMA: bool>(
    p: &[f32],
    f: f32,
    cos_out: &mut [f32],
    sin_out: &mut [f32],
) -> bool {
    let mut ok = true;
    for ((x, c), s) in p.iter().zip(cos_out.iter_mut()).zip(sin_out.iter_mut()) {
        ok &= x.abs() <= F_LIMIT;
        let (sv, cv) = kernel32::<FMA>(*x);
        *c = f * cv;
        *s = f * sv;
    }
    ok
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn scaled32_avx2(p: &[f32], f: f32, cos_out: &mut [f32], sin_out: &mut [f32]) -> bool {
    scaled_body32::<true>(p, f, cos_out, sin_out)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn scaled32_avx512(p: &[f32], f: f32, cos_out: &mut [f32], sin_out: &mut [f32]) -> bool {
    scaled_body32::<true>(p, f, cos_out, sin_out)
}

/// [`scaled_sin_cos`] in f32 (within about 2e-7 of the exact values for |x| ≤ 6,433;
/// larger arguments go through the f64 path and are rounded), vectorised for the CPU's
/// level: the f32 feature programs' cosines.
///
/// # Panics
/// If the slices have different lengths.
pub fn scaled_sin_cos_f32(p: &[f32], f: f32, cos_out: &mut [f32], sin_out: &mut [f32]) {
    scaled_sin_cos_f32_at(crate::simd::level(), p, f, cos_out, sin_out)
}

/// [`scaled_sin_cos_f32`] with the instruction-set level forced (tests run every level).
///
/// # Panics
/// If the slices have different lengths, or this CPU cannot run `level`.
pub fn scaled_sin_cos_f32_at(
    level: crate::simd::Level,
    p: &[f32],
    f: f32,
    cos_out: &mut [f32],
    sin_out: &mut [f32],
) {
    assert!(
        p.len() == cos_out.len() && p.len() == sin_out.len(),
        "sin_cos: lengths differ"
    );
    assert!(
        level <= crate::simd::detected(),
        "this CPU cannot run the {} path",
        level.name()
    );
    let ok = match level {
        // SAFETY: the level is supported by this CPU (checked above; AVX2 implies FMA).
        #[cfg(target_arch = "x86_64")]
        crate::simd::Level::Avx512 => unsafe { scaled32_avx512(p, f, cos_out, sin_out) },
        #[cfg(target_arch = "x86_64")]
        crate::simd::Level::Avx2 => unsafe { scaled32_avx2(p, f, cos_out, sin_out) },
        _ => scaled_body32::<false>(p, f, cos_out, sin_out),
    };
    if !ok {
        for ((x, c), s) in p.iter().zip(cos_out.iter_mut()).zip(sin_out.iter_mut()) {
            let (sv, cv) = sin_cos(*x as f64);
            *c = (f as f64 * cv) as f32;
            *s = (f as f64 * sv) as f32;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every instruction-set copy this CPU can run, forced in turn, against the standard
    /// library (an independent reference, not another copy).
    #[test]
    fn every_level_matches_the_standard_library() {
        let p: Vec<f64> = (0..1001).map(|i| (i as f64 - 500.0) * 0.731).collect();
        for level in crate::simd::available() {
            let (mut c, mut s) = (vec![0.0; p.len()], vec![0.0; p.len()]);
            scaled_sin_cos_at(level, &p, 0.5, &mut c, &mut s);
            for i in 0..p.len() {
                let (s0, c0) = p[i].sin_cos();
                assert!(
                    (s[i] - 0.5 * s0).abs() < 1e-15 && (c[i] - 0.5 * c0).abs() < 1e-15,
                    "{} at {}: ({}, {}) vs ({}, {})",
                    level.name(),
                    p[i],
                    s[i],
                    c[i],
                    0.5 * s0,
                    0.5 * c0
                );
            }
        }
    }

    #[test]
    fn matches_the_standard_library() {
        let mut worst: f64 = 0.0;
        let mut state = 0x1234_5678_9abc_def0u64;
        for i in 0..400_000 {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let u = (state >> 11) as f64 / (1u64 << 53) as f64;
            let scale = [1.0, 10.0, 1e3, 1e5, 1e6][i % 5];
            let x = (2.0 * u - 1.0) * scale;
            let (s, c) = sin_cos(x);
            let (s0, c0) = x.sin_cos();
            worst = worst.max((s - s0).abs()).max((c - c0).abs());
        }
        // A few ulp of 1 (the standard library is itself within an ulp).
        assert!(worst < 1e-15, "worst abs error {worst:e}");
        // The vectorised slice path agrees with the scalar one bit for bit.
        let p: Vec<f64> = (0..1000).map(|i| (i as f64 - 500.0) * 0.731).collect();
        let (mut c, mut s) = (vec![0.0; 1000], vec![0.0; 1000]);
        scaled_sin_cos(&p, 0.5, &mut c, &mut s);
        for i in 0..1000 {
            let (s0, c0) = sin_cos(p[i]);
            assert_eq!((s[i], c[i]), (0.5 * s0, 0.5 * c0));
        }
        for x in [
            0.0,
            -0.0,
            1e-300,
            std::f64::consts::FRAC_PI_2,
            std::f64::consts::PI,
            1e300,
            -7.5,
        ] {
            let (s, c) = sin_cos(x);
            let (s0, c0) = x.sin_cos();
            assert!((s - s0).abs() < 1e-15 && (c - c0).abs() < 1e-15, "{x}");
        }
    }

    /// The f32 path, every level forced in turn, against the standard library's f64 sine
    /// and cosine of the same f32 arguments (an independent reference): within 2.5e-7 of
    /// 1 up to the limit (f32 rounding of the result is 6e-8), and arguments beyond the
    /// limit, infinities' neighbours aside, through the f64 path.
    #[test]
    fn f32_every_level_matches_the_standard_library() {
        let mut state = 0x0bad_5eed_1234_5678u64;
        let mut p: Vec<f32> = (0..20_000)
            .map(|i| {
                state = state
                    .wrapping_mul(6364136223846793005)
                    .wrapping_add(1442695040888963407);
                let u = (state >> 11) as f64 / (1u64 << 53) as f64;
                let scale = [1.0, 10.0, 100.0, 6_000.0][i % 4];
                ((2.0 * u - 1.0) * scale) as f32
            })
            .collect();
        p.extend([
            0.0,
            -0.0,
            1e-30,
            std::f32::consts::FRAC_PI_2,
            std::f32::consts::PI,
        ]);
        for level in crate::simd::available() {
            let (mut c, mut s) = (vec![0f32; p.len()], vec![0f32; p.len()]);
            scaled_sin_cos_f32_at(level, &p, 0.5, &mut c, &mut s);
            let mut worst: f64 = 0.0;
            for i in 0..p.len() {
                let (s0, c0) = (p[i] as f64).sin_cos();
                worst = worst
                    .max((s[i] as f64 - 0.5 * s0).abs())
                    .max((c[i] as f64 - 0.5 * c0).abs());
            }
            assert!(
                worst < 1.25e-7,
                "{}: worst abs error {worst:e}",
                level.name()
            );
        }
        // Beyond the limit: the f64 path, rounded.
        let big = [1e5f32, -3e7];
        let (mut c, mut s) = ([0f32; 2], [0f32; 2]);
        scaled_sin_cos_f32(&big, 1.0, &mut c, &mut s);
        for i in 0..2 {
            let (s0, c0) = (big[i] as f64).sin_cos();
            assert!((s[i] as f64 - s0).abs() < 1e-7 && (c[i] as f64 - c0).abs() < 1e-7);
        }
    }
}
