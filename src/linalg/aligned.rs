//! f32 values that start on a 64-byte boundary (a cache line, and one AVX-512 register).
//!
//! A kernel streaming a matrix whose rows are whole cache lines reads each line once per
//! 512-bit load only when the first row starts on a line: a large heap `Vec<f32>` starts
//! 16 bytes past a page boundary, and then every 64-byte load spans two lines. On the
//! 2-core Zen 5 development machine, alternating runs of the exact model's f32 single row
//! (Fashion-MNIST teacher, 4,824 support vectors of 784 values) took 213 µs against 238–255
//! µs from a 16-byte start; a one-row product over a 0.79 MB matrix read from L2 alone ran
//! about 20% faster (3.4–4.4 against 4.8–5.7 µs), though inside the compiled model's whole
//! row the difference was lost in the machine's noise.

/// A fixed-length run of f32 values whose first value is 64-byte aligned; it reads as a
/// slice.
///
/// ```
/// use kernelpress::linalg::AlignedF32;
/// let a = AlignedF32::from_iter_exact(5, (0..5).map(|i| i as f32));
/// assert_eq!(&a[..], &[0.0, 1.0, 2.0, 3.0, 4.0]);
/// assert_eq!(a.as_ptr() as usize % 64, 0);
/// ```
#[derive(Clone, Default)]
pub struct AlignedF32 {
    lines: Vec<Line>,
    len: usize,
}

#[derive(Clone, Copy, Default)]
#[repr(C, align(64))]
struct Line([f32; 16]);

impl AlignedF32 {
    /// The first `len` values of `it` (zeros after it if it is shorter).
    pub fn from_iter_exact(len: usize, it: impl IntoIterator<Item = f32>) -> AlignedF32 {
        let mut a = AlignedF32 {
            lines: vec![Line::default(); len.div_ceil(16)],
            len,
        };
        for (o, v) in a.iter_mut().zip(it) {
            *o = v;
        }
        a
    }

    /// A copy of `v`.
    pub fn from_slice(v: &[f32]) -> AlignedF32 {
        AlignedF32::from_iter_exact(v.len(), v.iter().copied())
    }
}

impl std::ops::Deref for AlignedF32 {
    type Target = [f32];
    fn deref(&self) -> &[f32] {
        // SAFETY: `lines` holds `16 · lines.len() ≥ len` initialised f32 values, contiguous
        // (`Line` is `repr(C)` over `[f32; 16]`, 64 bytes, so there is no padding).
        unsafe { std::slice::from_raw_parts(self.lines.as_ptr().cast::<f32>(), self.len) }
    }
}

impl std::ops::DerefMut for AlignedF32 {
    fn deref_mut(&mut self) -> &mut [f32] {
        // SAFETY: as in `deref`, borrowed mutably through `&mut self`.
        unsafe { std::slice::from_raw_parts_mut(self.lines.as_mut_ptr().cast::<f32>(), self.len) }
    }
}

impl std::fmt::Debug for AlignedF32 {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_list().entries(self.iter()).finish()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Aligned for every length, clones included; the values read back in order.
    #[test]
    fn aligned_and_in_order() {
        for len in [0, 1, 15, 16, 17, 784 * 3 + 5] {
            let a = AlignedF32::from_iter_exact(len, (0..len).map(|i| i as f32 * 0.5));
            let b = a.clone();
            for v in [&a, &b] {
                assert_eq!(v.len(), len);
                assert_eq!(v.as_ptr() as usize % 64, 0, "length {len}");
                assert!(v.iter().enumerate().all(|(i, x)| *x == i as f32 * 0.5));
            }
        }
        let short = AlignedF32::from_iter_exact(4, [1.0, 2.0]);
        assert_eq!(&short[..], &[1.0, 2.0, 0.0, 0.0]);
    }
}
