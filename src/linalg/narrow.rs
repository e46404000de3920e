//! Products with a narrow right-hand side in f32: `out = a · w` where `w` is `k × n` with
//! few columns (a linear head's 45 one-vs-one outputs, a kernel model's coefficients).
//!
//! General matrix-product kernels pack both operands into tiles and suit wide products;
//! with `n` of a few dozen the packing of `a` is paid for a small amount of arithmetic. Here
//! `w` is packed once ([`NarrowF32`], panels of 48 zero-padded columns, `k`-major), and
//! `a` is read in place: each group of 8 rows of `a` keeps an 8 × 48 block of `out` in
//! AVX-512 registers while `k` runs (every `a` value broadcast into three fused
//! multiply-adds), the common practice of register-blocked product kernels; `k` runs in
//! slices of 512 rows of `w`, so that a slice stays in cache while every row block passes
//! over it. Sums run over `k` in order in each column, so results do not depend on how
//! rows are grouped. A single row (the one-row scoring paths) streams `w` once with four
//! interleaved sums per column. Other levels use faer's product, or one dot product per
//! column for a single row. (Unpadded panels, read with masked loads, saved 6% of the
//! bytes but were slower on single rows here: their loads straddle cache lines.)
//!
//! ```
//! use kernelpress::linalg::NarrowF32;
//! // w is 3 × 2 (k = 3 rows, n = 2 columns), row-major.
//! let w = NarrowF32::from_k_by_n(&[1.0, 0.0, 0.0, 1.0, 1.0, 1.0], 3, 2);
//! let a = [1.0f32, 2.0, 3.0]; // one row of k = 3
//! let mut out = [0.0f32; 2];
//! w.product(&a, &mut out);
//! assert_eq!(out, [4.0, 5.0]);
//! ```

use super::AlignedF32;
use crate::simd::Level;

/// Columns per panel: three 16-lane registers.
const PANEL: usize = 48;
/// Rows of `a` per register block.
const ROWS: usize = 8;
/// Rows of `w` per pass over the row blocks (a 48-column slice is 96 KiB).
const KC: usize = 512;

/// A `k × n` f32 matrix packed for [`NarrowF32::product`].
#[derive(Debug, Clone, Default)]
pub struct NarrowF32 {
    k: usize,
    n: usize,
    /// `wᵀ` (`n × k`, row-major), unpacked from `packed` on first use by the other
    /// levels' paths (faer's product, or one dot product per column for a single row), so
    /// that the AVX-512 path holds one copy of the matrix.
    plain_t: std::sync::OnceLock<Vec<f32>>,
    /// Panels of [`PANEL`] columns (the last one narrower, rounded up to 16), each `k ×`
    /// its width, row-major, zero-padded.
    packed: AlignedF32,
}

impl NarrowF32 {
    /// From a row-major `k × n` matrix.
    ///
    /// # Panics
    /// If `w.len() != k · n`.
    #[track_caller]
    pub fn from_k_by_n(w: &[f32], k: usize, n: usize) -> NarrowF32 {
        assert_eq!(w.len(), k * n, "NarrowF32: shapes differ");
        // Every panel row is a whole number of 64-byte lines (16 floats), so from an
        // aligned start every row is aligned.
        let mut packed = AlignedF32::zeros(Self::packed_len(k, n));
        let mut at = 0;
        for p0 in (0..n).step_by(PANEL) {
            let cols = (n - p0).min(PANEL);
            let width = cols.div_ceil(16) * 16;
            for r in 0..k {
                packed[at..at + cols].copy_from_slice(&w[r * n + p0..r * n + p0 + cols]);
                at += width;
            }
        }
        NarrowF32 {
            k,
            n,
            plain_t: std::sync::OnceLock::new(),
            packed,
        }
    }

    /// Values the packed form of a `k × n` matrix holds (every panel row padded to whole
    /// 16-lane registers): what a one-row product reads.
    pub(crate) fn packed_len(k: usize, n: usize) -> usize {
        k * n.div_ceil(16) * 16
    }

    /// The panels in order: first column, columns, 16-lane registers `v`, and the panel's
    /// `k × 16v` packed values.
    fn panels(&self) -> impl Iterator<Item = (usize, usize, usize, &[f32])> {
        let (k, n) = (self.k, self.n);
        (0..n).step_by(PANEL).scan(0, move |off, p0| {
            let cols = (n - p0).min(PANEL);
            let v = cols.div_ceil(16);
            let panel = &self.packed[*off..*off + k * 16 * v];
            *off += k * 16 * v;
            Some((p0, cols, v, panel))
        })
    }

    /// `wᵀ` (`n × k`, row-major), unpacked from the panels on first use.
    fn plain_t(&self) -> &[f32] {
        self.plain_t.get_or_init(|| {
            let k = self.k;
            let mut t = vec![0f32; k * self.n];
            for (p0, cols, v, panel) in self.panels() {
                for (r, row) in panel.chunks_exact(16 * v).enumerate() {
                    for (j, x) in row[..cols].iter().enumerate() {
                        t[(p0 + j) * k + r] = *x;
                    }
                }
            }
            t
        })
    }

    /// Rows (`k`).
    pub fn rows(&self) -> usize {
        self.k
    }

    /// Columns (`n`).
    pub fn cols(&self) -> usize {
        self.n
    }

    /// `out = a · w` for a row-major `m × k` matrix `a`; `out` is `m × n`, row-major.
    ///
    /// # Panics
    /// If the lengths do not fit the shapes.
    #[track_caller]
    pub fn product(&self, a: &[f32], out: &mut [f32]) {
        self.product_at(crate::simd::level(), a, out)
    }

    /// [`Self::product`] with the instruction-set level forced (tests run every level).
    ///
    /// # Panics
    /// If the shapes differ or this CPU cannot run `level`.
    #[track_caller]
    pub fn product_at(&self, level: Level, a: &[f32], out: &mut [f32]) {
        let (k, n) = (self.k, self.n);
        let m = a.len().checked_div(k).unwrap_or(out.len() / n.max(1));
        assert!(
            a.len() == m * k && out.len() == m * n,
            "narrow product: shapes differ"
        );
        assert!(
            level <= crate::simd::detected(),
            "this CPU cannot run the {} path",
            level.name()
        );
        if k == 0 {
            out.iter_mut().for_each(|o| *o = 0.0);
            return;
        }
        match level {
            // SAFETY: AVX-512F is supported (checked above); every length was checked.
            #[cfg(target_arch = "x86_64")]
            Level::Avx512 if m == 1 => unsafe { x86::row(self, a, out) },
            // SAFETY: as above.
            #[cfg(target_arch = "x86_64")]
            Level::Avx512 => unsafe { x86::product(self, a, m, out) },
            _ if m == 1 => {
                for (o, col) in out.iter_mut().zip(self.plain_t().chunks_exact(k)) {
                    let mut s = [0f64];
                    super::dot_rows_at(level, col, a, &mut s);
                    *o = s[0] as f32;
                }
            }
            _ => super::abt_f32(a, self.plain_t(), k, out),
        }
    }
}

#[cfg(target_arch = "x86_64")]
mod x86 {
    use super::{NarrowF32, KC, ROWS};
    use std::arch::x86_64::*;

    /// The lanes of register `v` that hold one of `cols` columns.
    #[inline(always)]
    fn lanes(cols: usize, v: usize) -> __mmask16 {
        let left = cols.saturating_sub(16 * v).min(16);
        if left == 16 {
            !0
        } else {
            (1u16 << left) - 1
        }
    }

    /// One `R × 16V` block of `out`: `R` rows of `a` (stride `lda`) times `k` rows of one
    /// panel of `w` (`16V` wide, contiguous), the sums kept in registers over all of `k`
    /// (starting from zero when `first`, else from the block's values in `out`), then the
    /// first `cols` columns stored (stride `ldo`).
    #[target_feature(enable = "avx512f")]
    #[inline]
    #[allow(clippy::too_many_arguments)]
    unsafe fn block<const R: usize, const V: usize>(
        a: *const f32,
        lda: usize,
        w: *const f32,
        k: usize,
        out: *mut f32,
        ldo: usize,
        cols: usize,
        first: bool,
    ) {
        let mask = |v: usize| lanes(cols, v);
        let mut acc = [[_mm512_setzero_ps(); V]; R];
        if !first {
            for (r, row) in acc.iter_mut().enumerate() {
                for (v, c) in row.iter_mut().enumerate() {
                    // SAFETY: as the stores below.
                    *c = unsafe { _mm512_maskz_loadu_ps(mask(v), out.add(r * ldo + 16 * v)) };
                }
            }
        }
        for p in 0..k {
            // SAFETY (whole body): the caller passes pointers with `R` rows of `k` values
            // of `a`, `k` rows of `16V` values of `w`, and `R` rows of `cols` of `out`.
            let wp = unsafe { w.add(p * 16 * V) };
            let mut wv = [_mm512_setzero_ps(); V];
            for (v, x) in wv.iter_mut().enumerate() {
                *x = unsafe { _mm512_loadu_ps(wp.add(16 * v)) };
            }
            for (r, row) in acc.iter_mut().enumerate() {
                let s = _mm512_set1_ps(unsafe { *a.add(r * lda + p) });
                for (c, x) in row.iter_mut().zip(&wv) {
                    *c = _mm512_fmadd_ps(s, *x, *c);
                }
            }
        }
        for (r, row) in acc.iter().enumerate() {
            let o = unsafe { out.add(r * ldo) };
            for (v, c) in row.iter().enumerate() {
                unsafe { _mm512_mask_storeu_ps(o.add(16 * v), mask(v), *c) };
            }
        }
    }

    /// A block with `r` rows (1 to [`ROWS`]) and `v` registers (1 to 3) of columns.
    #[target_feature(enable = "avx512f")]
    #[allow(clippy::too_many_arguments)]
    unsafe fn block_dyn(
        r: usize,
        v: usize,
        a: *const f32,
        lda: usize,
        w: *const f32,
        k: usize,
        out: *mut f32,
        ldo: usize,
        cols: usize,
        first: bool,
    ) {
        macro_rules! go {
            ($($r:literal),*) => {
                match (r, v) {
                    $(
                        ($r, 1) => unsafe { block::<$r, 1>(a, lda, w, k, out, ldo, cols, first) },
                        ($r, 2) => unsafe { block::<$r, 2>(a, lda, w, k, out, ldo, cols, first) },
                        ($r, _) => unsafe { block::<$r, 3>(a, lda, w, k, out, ldo, cols, first) },
                    )*
                    _ => unreachable!("row blocks have 1 to 8 rows"),
                }
            };
        }
        go!(1, 2, 3, 4, 5, 6, 7, 8)
    }

    /// One row (`a` of length `k > 0`, `out` of length `n`, checked by the caller): a
    /// single row has no rows to share the loads of `w` with, so each panel row is loaded
    /// once and the sums run in four interleaved chains over `k` (`k ≡ u mod 4` in chain
    /// `u`, added at the end), enough independent fused multiply-adds to keep up with the
    /// stream of `w` from the cache.
    #[target_feature(enable = "avx512f")]
    pub(super) unsafe fn row(w: &NarrowF32, a: &[f32], out: &mut [f32]) {
        let k = w.k;
        for (p0, cols, v, panel) in w.panels() {
            // SAFETY: the panel has k rows of 16v floats, `a` has k values and `out` has
            // columns p0..p0+cols.
            unsafe {
                match v {
                    1 => row_panel::<1>(a, panel.as_ptr(), k, out.as_mut_ptr().add(p0), cols),
                    2 => row_panel::<2>(a, panel.as_ptr(), k, out.as_mut_ptr().add(p0), cols),
                    _ => row_panel::<3>(a, panel.as_ptr(), k, out.as_mut_ptr().add(p0), cols),
                }
            }
        }
    }

    /// One panel of [`row`].
    #[target_feature(enable = "avx512f")]
    #[inline]
    unsafe fn row_panel<const V: usize>(
        a: &[f32],
        w: *const f32,
        k: usize,
        out: *mut f32,
        cols: usize,
    ) {
        let mut acc = [[_mm512_setzero_ps(); V]; 4];
        let body = k - k % 4;
        let step = |acc: &mut [__m512; V], p: usize| {
            let s = _mm512_set1_ps(a[p]);
            for (c, x) in acc.iter_mut().enumerate() {
                // SAFETY: row p < k of the panel, register c < V.
                let wv = unsafe { _mm512_loadu_ps(w.add(p * 16 * V + 16 * c)) };
                *x = _mm512_fmadd_ps(s, wv, *x);
            }
        };
        for p in (0..body).step_by(4) {
            for (u, chain) in acc.iter_mut().enumerate() {
                step(chain, p + u);
            }
        }
        for p in body..k {
            step(&mut acc[p - body], p);
        }
        let [a0, a1, a2, a3] = acc;
        for (c, (((x0, x1), x2), x3)) in a0.iter().zip(&a1).zip(&a2).zip(&a3).enumerate() {
            let s = _mm512_add_ps(_mm512_add_ps(*x0, *x1), _mm512_add_ps(*x2, *x3));
            // SAFETY: the first `cols` values from `out` are the caller's.
            unsafe { _mm512_mask_storeu_ps(out.add(16 * c), lanes(cols, c), s) };
        }
    }

    /// `out = a · w` (`a` is `m × k` with `k > 0`, shapes checked by the caller).
    #[target_feature(enable = "avx512f")]
    pub(super) unsafe fn product(w: &NarrowF32, a: &[f32], m: usize, out: &mut [f32]) {
        let (k, n) = (w.k, w.n);
        for (p0, cols, v, panel) in w.panels() {
            // `k` in slices, so that a slice of the panel stays in cache while every row
            // block passes over it; each column's sum still runs over `k` in order.
            for k0 in (0..k).step_by(KC) {
                let kc = (k - k0).min(KC);
                for r0 in (0..m).step_by(ROWS) {
                    let r = (m - r0).min(ROWS);
                    // SAFETY: rows r0..r0+r of `a` (m × k) from column k0 on, rows k0..k0+kc
                    // of the panel, rows r0..r0+r and columns p0..p0+cols of `out` (m × n)
                    // are in bounds.
                    unsafe {
                        block_dyn(
                            r,
                            v,
                            a.as_ptr().add(r0 * k + k0),
                            k,
                            panel.as_ptr().add(k0 * 16 * v),
                            kc,
                            out.as_mut_ptr().add(r0 * n + p0),
                            n,
                            cols,
                            k0 == 0,
                        )
                    }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every level this CPU runs against the sum of products in f64, for widths that fill
    /// one, two and three registers of a panel, more than one panel, and row counts that
    /// leave every remainder of the 8-row blocks.
    #[test]
    fn every_level_matches_the_definition() {
        for (m, k, n) in [
            (19, 37, 45),
            (8, 64, 5),
            (13, 1, 16),
            (3, 300, 100),
            (9, 7, 48),
            (17, 1100, 45),
            (1, 1100, 45),
            (1, 37, 100),
            (1, 2, 7),
        ] {
            let a: Vec<f32> = (0..m * k).map(|i| ((i * 7) as f32 * 0.173).sin()).collect();
            let w: Vec<f32> = (0..k * n).map(|i| ((i * 3) as f32 * 0.071).cos()).collect();
            let packed = NarrowF32::from_k_by_n(&w, k, n);
            for level in crate::simd::available() {
                let mut got = vec![f32::NAN; m * n];
                packed.product_at(level, &a, &mut got);
                for i in 0..m {
                    for j in 0..n {
                        let (mut want, mut mass) = (0f64, 0f64);
                        for p in 0..k {
                            let t = a[i * k + p] as f64 * w[p * n + j] as f64;
                            want += t;
                            mass += t.abs();
                        }
                        let g = got[i * n + j] as f64;
                        assert!(
                            (g - want).abs() <= 1e-6 * mass,
                            "{} m{m} k{k} n{n} [{i},{j}]: {g} vs {want}",
                            level.name()
                        );
                    }
                }
            }
        }
    }

    /// The transpose the other levels use, unpacked from the panels (two of them here),
    /// is the transpose of the matrix.
    #[test]
    fn unpacked_transpose_is_the_transpose() {
        let (k, n) = (11, 50);
        let w: Vec<f32> = (0..k * n).map(|i| i as f32 * 0.5 - 3.0).collect();
        let mut wt = vec![0f32; k * n];
        for r in 0..k {
            for j in 0..n {
                wt[j * k + r] = w[r * n + j];
            }
        }
        assert_eq!(NarrowF32::from_k_by_n(&w, k, n).plain_t(), &wt[..]);
    }

    /// `k = 0` gives zeros at every level.
    #[test]
    fn empty_inner_dimension_gives_zeros() {
        let p = NarrowF32::from_k_by_n(&[], 0, 3);
        for level in crate::simd::available() {
            let mut out = vec![1f32; 6];
            p.product_at(level, &[], &mut out);
            assert_eq!(out, vec![0.0; 6]);
        }
    }
}
