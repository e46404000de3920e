//! f32 values that start on a 64-byte boundary (a cache line, and one AVX-512 register),
//! and on a 2 MiB boundary in transparent huge pages when they are large.
//!
//! A kernel streaming a matrix whose rows are whole cache lines reads each line once per
//! 512-bit load only when the first row starts on a line: a large heap `Vec<f32>` starts
//! 16 bytes past a page boundary, and then every 64-byte load spans two lines. On the
//! 2-core Zen 5 development machine, alternating runs of the exact model's f32 single row
//! (Fashion-MNIST teacher, 4,824 support vectors of 784 values) took 213 µs against 238–255
//! µs from a 16-byte start; a one-row product over a 0.79 MB matrix read from L2 alone ran
//! about 20% faster (3.4–4.4 against 4.8–5.7 µs).
//!
//! Large buffers (512 KiB and more) are also asked for in 2 MiB pages
//! (`madvise(MADV_HUGEPAGE)` on Linux, before the memory is first written; where the
//! system declines, they stay in 4 KiB pages). Physically contiguous pages spread a matrix
//! evenly over the sets of a physically indexed cache, so one that fits in the L2 cache
//! stays there, whatever pages the system happened to hand out; they also spare the TLB
//! when a larger matrix streams from L3. The cost is memory: a buffer's size is rounded up
//! to whole 2 MiB pages.

use std::alloc::Layout;
use std::ptr::NonNull;

/// Buffers of at least this many bytes are placed in 2 MiB pages where the system allows.
pub(crate) const HUGE_MIN_BYTES: usize = 512 << 10;

const HUGE: usize = 2 << 20;

/// A fixed-length run of f32 values whose first value is 64-byte aligned (2 MiB aligned,
/// in huge pages where the system allows, from 512 KiB on); it reads as a
/// slice.
///
/// ```
/// use kernelpress::linalg::AlignedF32;
/// let a = AlignedF32::from_iter_exact(5, (0..5).map(|i| i as f32));
/// assert_eq!(&a[..], &[0.0, 1.0, 2.0, 3.0, 4.0]);
/// assert_eq!(a.as_ptr() as usize % 64, 0);
/// ```
pub struct AlignedF32 {
    ptr: NonNull<f32>,
    len: usize,
    /// The allocation (`None` for an empty buffer, which allocates nothing).
    layout: Option<Layout>,
}

// SAFETY: an `AlignedF32` owns its values like a `Vec<f32>` and hands them out only
// through `&self` / `&mut self`.
unsafe impl Send for AlignedF32 {}
// SAFETY: as above; shared access is read-only.
unsafe impl Sync for AlignedF32 {}

#[repr(C, align(64))]
struct Line([f32; 16]);

impl AlignedF32 {
    /// `len` zeros.
    ///
    /// # Panics
    /// If `4 · len` bytes (rounded up to the alignment) overflow `isize`; aborts if the
    /// memory is not available, as `Vec` does.
    pub fn zeros(len: usize) -> AlignedF32 {
        let bytes = len.checked_mul(4).expect("AlignedF32: size overflows");
        if bytes == 0 {
            return AlignedF32 {
                ptr: NonNull::<Line>::dangling().cast(),
                len: 0,
                layout: None,
            };
        }
        let align = if bytes >= HUGE_MIN_BYTES { HUGE } else { 64 };
        let layout = Layout::from_size_align(bytes.next_multiple_of(align), align)
            .expect("AlignedF32: size overflows");
        // SAFETY: the layout's size is nonzero.
        let raw = unsafe { std::alloc::alloc(layout) };
        let Some(p) = NonNull::new(raw) else {
            std::alloc::handle_alloc_error(layout)
        };
        if align == HUGE {
            advise_huge(raw, layout.size());
        }
        // SAFETY: `raw` points to `layout.size() ≥ bytes` writable bytes; zero bytes are
        // the f32 value 0.0. Written after the advice, so the pages are made huge when
        // first touched.
        unsafe { std::ptr::write_bytes(raw, 0, layout.size()) };
        AlignedF32 {
            ptr: p.cast(),
            len,
            layout: Some(layout),
        }
    }

    /// The first `len` values of `it` (zeros after it if it is shorter).
    pub fn from_iter_exact(len: usize, it: impl IntoIterator<Item = f32>) -> AlignedF32 {
        let mut a = AlignedF32::zeros(len);
        for (o, v) in a.iter_mut().zip(it) {
            *o = v;
        }
        a
    }

    /// A copy of `v`.
    pub fn from_slice(v: &[f32]) -> AlignedF32 {
        let mut a = AlignedF32::zeros(v.len());
        a.copy_from_slice(v);
        a
    }
}

/// Asks Linux to back `[p, p + len)` (2 MiB aligned, whole huge pages) with huge pages; a
/// hint, so a refusal changes nothing but speed.
#[cfg(target_os = "linux")]
fn advise_huge(p: *mut u8, len: usize) {
    extern "C" {
        fn madvise(
            addr: *mut std::ffi::c_void,
            len: usize,
            advice: std::ffi::c_int,
        ) -> std::ffi::c_int;
    }
    const MADV_HUGEPAGE: std::ffi::c_int = 14;
    // SAFETY: the range is one live allocation of ours, page-aligned; the advice does not
    // change its contents or its validity.
    unsafe { madvise(p.cast(), len, MADV_HUGEPAGE) };
}

#[cfg(not(target_os = "linux"))]
fn advise_huge(_p: *mut u8, _len: usize) {}

impl Drop for AlignedF32 {
    fn drop(&mut self) {
        if let Some(layout) = self.layout {
            // SAFETY: allocated in `zeros` with this layout and not freed since.
            unsafe { std::alloc::dealloc(self.ptr.as_ptr().cast(), layout) }
        }
    }
}

impl Clone for AlignedF32 {
    fn clone(&self) -> AlignedF32 {
        AlignedF32::from_slice(self)
    }
}

impl Default for AlignedF32 {
    fn default() -> AlignedF32 {
        AlignedF32::zeros(0)
    }
}

impl std::ops::Deref for AlignedF32 {
    type Target = [f32];
    fn deref(&self) -> &[f32] {
        // SAFETY: `ptr` points to `len` initialised f32 values (zeroed in `zeros`), or is
        // dangling and aligned with `len == 0`.
        unsafe { std::slice::from_raw_parts(self.ptr.as_ptr(), self.len) }
    }
}

impl std::ops::DerefMut for AlignedF32 {
    fn deref_mut(&mut self) -> &mut [f32] {
        // SAFETY: as in `deref`, borrowed mutably through `&mut self`.
        unsafe { std::slice::from_raw_parts_mut(self.ptr.as_ptr(), self.len) }
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

    /// Aligned for every length, clones included (2 MiB from the huge size on); the values
    /// read back in order.
    #[test]
    fn aligned_and_in_order() {
        for len in [0, 1, 15, 16, 17, 784 * 3 + 5, HUGE_MIN_BYTES / 4 + 3] {
            let a = AlignedF32::from_iter_exact(len, (0..len).map(|i| i as f32 * 0.5));
            let b = a.clone();
            let align = if 4 * len >= HUGE_MIN_BYTES { HUGE } else { 64 };
            for v in [&a, &b] {
                assert_eq!(v.len(), len);
                assert_eq!(v.as_ptr() as usize % align, 0, "length {len}");
                assert!(v.iter().enumerate().all(|(i, x)| *x == i as f32 * 0.5));
            }
        }
        let short = AlignedF32::from_iter_exact(4, [1.0, 2.0]);
        assert_eq!(&short[..], &[1.0, 2.0, 0.0, 0.0]);
        assert!(AlignedF32::default().is_empty());
    }
}
