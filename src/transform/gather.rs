//! Index selection `y_i = x[idx_i]` in f32, vectorised for the CPU's level: with AVX-512
//! sixteen values per gather instruction (32-bit offsets), elsewhere one load per index.
//!
//! ```
//! use kernelpress::transform::gather::gather_f32;
//! let mut y = [0f32; 3];
//! gather_f32(&[10.0, 20.0, 30.0], &[2, 0, 2], &mut y);
//! assert_eq!(y, [30.0, 10.0, 30.0]);
//! ```

use crate::simd::Level;

/// `y_i = x[idx_i]`.
///
/// # Panics
/// If `idx` and `y` have different lengths or an index is not below `x.len()` (or beyond
/// the int32 range).
#[track_caller]
pub fn gather_f32(x: &[f32], idx: &[u32], y: &mut [f32]) {
    gather_f32_at(crate::simd::level(), x, idx, y)
}

/// [`gather_f32`] with the instruction-set level forced (tests run every level).
///
/// # Panics
/// As [`gather_f32`], and if this CPU cannot run `level`.
#[track_caller]
pub fn gather_f32_at(level: Level, x: &[f32], idx: &[u32], y: &mut [f32]) {
    let top = idx.iter().copied().max().unwrap_or(0) as usize;
    check(level, x.len(), idx.len(), y.len(), top);
    // SAFETY: checked above: every index is below `x.len()` and within int32, the lengths
    // agree, and the CPU supports `level`.
    unsafe { gather_unchecked(level, x, idx, y) }
}

/// The checks of [`gather_f32_at`] with the largest index known in advance.
#[track_caller]
#[inline]
pub(crate) fn check(level: Level, nx: usize, ni: usize, ny: usize, top: usize) {
    assert_eq!(ni, ny, "gather: one output per index");
    assert!(
        ni == 0 || (top < nx && top <= i32::MAX as usize),
        "gather: index {top} beyond width {nx}"
    );
    assert!(
        level <= crate::simd::detected(),
        "this CPU cannot run the {} path",
        level.name()
    );
}

/// The gather without checks.
///
/// # Safety
/// [`check`] must have passed for these lengths, the largest index of `idx` and `level`.
#[inline]
pub(crate) unsafe fn gather_unchecked(level: Level, x: &[f32], idx: &[u32], y: &mut [f32]) {
    match level {
        // SAFETY: the caller's checks.
        #[cfg(target_arch = "x86_64")]
        Level::Avx512 => unsafe { x86::gather_avx512(x, idx, y) },
        _ => y.iter_mut().zip(idx).for_each(|(o, i)| {
            // SAFETY: every index is below `x.len()` (the caller's checks).
            *o = unsafe { *x.get_unchecked(*i as usize) }
        }),
    }
}

#[cfg(target_arch = "x86_64")]
mod x86 {
    use std::arch::x86_64::*;

    /// # Safety
    /// AVX-512F; every index below `x.len()` and within int32; `idx.len() == y.len()`.
    #[target_feature(enable = "avx512f")]
    pub(super) unsafe fn gather_avx512(x: &[f32], idx: &[u32], y: &mut [f32]) {
        let n = idx.len();
        let body = n - n % 16;
        let (xp, ip, yp) = (x.as_ptr(), idx.as_ptr(), y.as_mut_ptr());
        let mut i = 0;
        while i < body {
            // SAFETY: 16 indices and outputs from `i` (i + 16 ≤ n); every index is a valid
            // 32-bit offset into `x` (the caller's contract), scale 4 bytes per float.
            unsafe {
                let v = _mm512_loadu_si512(ip.add(i) as *const _);
                let g = _mm512_i32gather_ps::<4>(v, xp);
                _mm512_storeu_ps(yp.add(i), g);
            }
            i += 16;
        }
        for j in body..n {
            // SAFETY: as above, one index at a time.
            unsafe { *yp.add(j) = *xp.add(*ip.add(j) as usize) };
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every level this CPU runs against plain indexing, for lengths with and without a
    /// tail of the 16-wide loop, with repetitions and the last index of `x`.
    #[test]
    fn every_level_matches_indexing() {
        let x: Vec<f32> = (0..1000).map(|i| i as f32 * 0.5 - 7.0).collect();
        for n in [0, 1, 15, 16, 17, 48, 1000, 2049] {
            let idx: Vec<u32> = (0..n as u32).map(|i| (i * 7919 + 3) % 1000).collect();
            let want: Vec<f32> = idx.iter().map(|i| x[*i as usize]).collect();
            for level in crate::simd::available() {
                let mut y = vec![f32::NAN; n];
                gather_f32_at(level, &x, &idx, &mut y);
                assert_eq!(y, want, "{} n={n}", level.name());
            }
        }
        let mut y = [0f32; 2];
        gather_f32(&x, &[999, 0], &mut y);
        assert_eq!(y, [x[999], x[0]]);
    }

    #[test]
    #[should_panic(expected = "beyond width")]
    fn rejects_an_index_out_of_range() {
        gather_f32(&[1.0, 2.0], &[0, 2], &mut [0.0; 2]);
    }
}
