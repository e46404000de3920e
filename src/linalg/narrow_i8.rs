//! Products with a narrow right-hand side in 8-bit integers: `out ≈ a · w` where `w` is a
//! `k × n` head stored as int8 with one f32 scale per column (the quantization
//! `export --precision int8` gives a head: [`quantize_i8`]) and each row of `a` is
//! quantized on the fly to 8 bits with one scale per row (its largest magnitude maps to
//! 127, rounding to nearest, ties to even). The integer sums are exact, so every
//! instruction-set path gives bit-identical results: on CPUs with AVX-512 VNNI four
//! products of an unsigned byte (the row value offset by 128) and a signed byte add into
//! each 32-bit lane per instruction (`vpdpbusd`; the offset is taken back out with the
//! column sums of `w`), elsewhere a portable loop computes the same sums.
//!
//! Symmetric per-row / per-column scaling of both operands with integer accumulation is
//! common practice for int8 inference (e.g. Jacob et al. 2018, "Quantization and training
//! of neural networks for efficient integer-arithmetic-only inference").
//!
//! ```
//! use kernelpress::linalg::NarrowI8;
//! // w is 2 × 1: [2, -1].
//! let w = NarrowI8::from_k_by_n(&[2.0, -1.0], 2, 1);
//! let mut out = [0f32];
//! w.product(&[1.0, 1.0], &mut out); // 2·1 − 1·1
//! assert!((out[0] - 1.0).abs() < 0.02);
//! ```

/// Columns per panel: three 16-lane registers of 32-bit sums.
const PANEL: usize = 48;
/// Rows of `a` per register block.
const ROWS: usize = 8;
/// Groups of four `k` rows per slice whose 32-bit sums cannot overflow:
/// `255 · 127 · 4 · 8,192 < 2³¹`.
const SAFE_GROUPS: usize = 8_192;

/// The int8 quantization of a row-major `rows × cols` matrix with one scale per row
/// (`axis` 0) or per column (`axis` 1): the scale is the slice's largest magnitude / 127
/// (1 for an all-zero slice), each value rounded to the nearest multiple and kept in
/// −127..=127. Returns the values and the scales.
pub fn quantize_i8(v: &[f64], rows: usize, cols: usize, axis: usize) -> (Vec<i8>, Vec<f32>) {
    let slice_of = |i: usize| {
        if axis == 0 {
            i / cols.max(1)
        } else {
            i % cols.max(1)
        }
    };
    let mut amax = vec![0.0f64; if axis == 0 { rows } else { cols }];
    for (i, x) in v.iter().enumerate() {
        let s = slice_of(i);
        amax[s] = amax[s].max(x.abs());
    }
    let scale: Vec<f32> = amax
        .iter()
        .map(|m| if *m > 0.0 { (*m / 127.0) as f32 } else { 1.0 })
        .collect();
    let q = v
        .iter()
        .enumerate()
        .map(|(i, x)| (x / scale[slice_of(i)] as f64).round().clamp(-127.0, 127.0) as i8)
        .collect();
    (q, scale)
}

/// The instruction-set paths of [`NarrowI8`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum I8Path {
    /// Portable integer loops.
    Portable,
    /// AVX-512 VNNI (`vpdpbusd`).
    Vnni,
}

impl I8Path {
    /// The fastest path this CPU runs (portable under `KERNELPRESS_NO_SIMD`).
    pub fn best() -> I8Path {
        if crate::simd::level() == crate::simd::Level::Avx512 && Self::vnni_detected() {
            I8Path::Vnni
        } else {
            I8Path::Portable
        }
    }

    /// The paths this CPU can run (for tests that force each one).
    pub fn available() -> Vec<I8Path> {
        let mut v = vec![I8Path::Portable];
        if Self::vnni_detected() {
            v.push(I8Path::Vnni);
        }
        v
    }

    /// `portable` or `avx512-vnni`.
    pub fn name(self) -> &'static str {
        match self {
            I8Path::Portable => "portable",
            I8Path::Vnni => "avx512-vnni",
        }
    }

    fn vnni_detected() -> bool {
        #[cfg(target_arch = "x86_64")]
        {
            crate::simd::detected() == crate::simd::Level::Avx512
                && std::arch::is_x86_feature_detected!("avx512vnni")
                && std::arch::is_x86_feature_detected!("avx512bw")
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            false
        }
    }
}

/// A `k × n` matrix in int8 with per-column scales, packed for [`NarrowI8::product`].
#[derive(Debug, Clone, Default)]
pub struct NarrowI8 {
    k: usize,
    n: usize,
    /// One f32 scale per column.
    scale: Vec<f32>,
    /// The column sums of the int8 values (to take the rows' offset of 128 back out).
    colsum: Vec<i64>,
    /// Panels of [`PANEL`] columns (the last one rounded up to 16), each `⌈k/4⌉` groups of
    /// `16v` columns × 4 consecutive `k` rows, zero-padded.
    packed: Vec<i8>,
}

impl NarrowI8 {
    /// From a row-major `k × n` matrix, quantized as [`quantize_i8`] does per column.
    ///
    /// # Panics
    /// If `w.len() != k · n`.
    #[track_caller]
    pub fn from_k_by_n(w: &[f64], k: usize, n: usize) -> NarrowI8 {
        assert_eq!(w.len(), k * n, "NarrowI8: shapes differ");
        let (q, scale) = quantize_i8(w, k, n, 1);
        let mut colsum = vec![0i64; n];
        for (i, v) in q.iter().enumerate() {
            colsum[i % n] += *v as i64;
        }
        let groups = k.div_ceil(4);
        let mut packed = Vec::with_capacity(groups * 4 * n.div_ceil(16) * 16);
        for p0 in (0..n).step_by(PANEL) {
            let cols = (n - p0).min(PANEL);
            let width = cols.div_ceil(16) * 16;
            for g in 0..groups {
                for c in 0..width {
                    for t in 0..4 {
                        let r = 4 * g + t;
                        packed.push(if c < cols && r < k {
                            q[r * n + p0 + c]
                        } else {
                            0
                        });
                    }
                }
            }
        }
        NarrowI8 {
            k,
            n,
            scale,
            colsum,
            packed,
        }
    }

    /// Rows (`k`).
    pub fn rows(&self) -> usize {
        self.k
    }

    /// Columns (`n`).
    pub fn cols(&self) -> usize {
        self.n
    }

    /// The per-column scales.
    pub fn scales(&self) -> &[f32] {
        &self.scale
    }

    /// Bytes the products read (int8 values, scales, column sums).
    pub fn bytes(&self) -> usize {
        self.packed.len() + 4 * self.scale.len() + 8 * self.colsum.len()
    }

    /// The int8 value at row `r`, column `j` (from the packed panels).
    pub fn value(&self, r: usize, j: usize) -> i8 {
        let (p, c) = (j / PANEL, j % PANEL);
        let off: usize = (0..p)
            .map(|_| PANEL * 4 * self.k.div_ceil(4))
            .sum::<usize>();
        let width = (self.n - p * PANEL).min(PANEL).div_ceil(16) * 16;
        self.packed[off + (r / 4) * width * 4 + c * 4 + r % 4]
    }

    /// The panels in order: first column, columns, 16-lane registers `v`, packed bytes.
    fn panels(&self) -> impl Iterator<Item = (usize, usize, usize, &[i8])> {
        let (groups, n) = (self.k.div_ceil(4), self.n);
        (0..n).step_by(PANEL).scan(0, move |off, p0| {
            let cols = (n - p0).min(PANEL);
            let v = cols.div_ceil(16);
            let len = groups * 64 * v;
            let panel = &self.packed[*off..*off + len];
            *off += len;
            Some((p0, cols, v, panel))
        })
    }

    /// `out ≈ a · w` for a row-major `m × k` matrix `a`; `out` is `m × n`, row-major. A
    /// row with a value that is not finite gives NaN in every column.
    ///
    /// # Panics
    /// If the lengths do not fit the shapes.
    #[track_caller]
    pub fn product(&self, a: &[f32], out: &mut [f32]) {
        self.product_at(I8Path::best(), a, out)
    }

    /// [`Self::product`] on a forced path (tests run every path).
    ///
    /// # Panics
    /// If the shapes differ or this CPU cannot run `path`.
    #[track_caller]
    pub fn product_at(&self, path: I8Path, a: &[f32], out: &mut [f32]) {
        let (k, n) = (self.k, self.n);
        let m = a.len().checked_div(k).unwrap_or(out.len() / n.max(1));
        assert!(
            a.len() == m * k && out.len() == m * n,
            "narrow int8 product: shapes differ"
        );
        assert!(
            I8Path::available().contains(&path),
            "this CPU cannot run the {} path",
            path.name()
        );
        if k == 0 {
            out.iter_mut().for_each(|o| *o = 0.0);
            return;
        }
        let kq = k.div_ceil(4) * 4;
        // Every row quantized first (its bytes and its scale), then the integer sums.
        let mut u = vec![0u8; m * kq];
        let mut row_scale = vec![0f32; m];
        for ((ar, ur), s) in a
            .chunks_exact(k)
            .zip(u.chunks_exact_mut(kq))
            .zip(row_scale.iter_mut())
        {
            *s = match path {
                // SAFETY: AVX-512 VNNI and BW are present (checked above).
                #[cfg(target_arch = "x86_64")]
                I8Path::Vnni => unsafe { x86::quantize_row(ar, &mut ur[..k]) },
                _ => quantize_row(ar, &mut ur[..k]),
            };
        }
        let mut sums = vec![0i64; m * n];
        match path {
            // SAFETY: as above; every length was checked.
            #[cfg(target_arch = "x86_64")]
            I8Path::Vnni => unsafe { x86::sums(self, &u, m, &mut sums) },
            _ => self.sums_portable(&u, m, &mut sums),
        }
        for ((o, s), rs) in out
            .chunks_exact_mut(n)
            .zip(sums.chunks_exact(n))
            .zip(&row_scale)
        {
            for (j, (oj, sj)) in o.iter_mut().zip(s).enumerate() {
                let centred = (*sj - 128 * self.colsum[j]) as f64;
                *oj = (centred * (*rs as f64) * (self.scale[j] as f64)) as f32;
            }
        }
    }

    /// The sums `Σ u·w` over each row's bytes, portably.
    fn sums_portable(&self, u: &[u8], m: usize, sums: &mut [i64]) {
        let (n, kq) = (self.n, self.k.div_ceil(4) * 4);
        for (p0, cols, v, panel) in self.panels() {
            let width = 16 * v;
            for (ur, sr) in u.chunks_exact(kq).zip(sums.chunks_exact_mut(n)).take(m) {
                let mut acc = vec![0i64; cols];
                for (g, block) in panel.chunks_exact(4 * width).enumerate() {
                    let ug = &ur[4 * g..4 * g + 4];
                    for (c, a) in acc.iter_mut().enumerate() {
                        let w = &block[4 * c..4 * c + 4];
                        *a += (0..4).map(|t| ug[t] as i64 * w[t] as i64).sum::<i64>();
                    }
                }
                sr[p0..p0 + cols].copy_from_slice(&acc);
            }
        }
    }
}

/// The scale of one row (its largest magnitude / 127; 0 for a zero row, NaN if a value
/// is not finite) and its bytes `round(a / scale) + 128` (ties to even).
fn quantize_row(a: &[f32], u: &mut [u8]) -> f32 {
    let mut amax = 0f32;
    for v in a {
        if !v.is_finite() {
            return f32::NAN;
        }
        amax = amax.max(v.abs());
    }
    if amax == 0.0 {
        u.iter_mut().for_each(|b| *b = 128);
        return 0.0;
    }
    let inv = 127.0f32 / amax;
    for (b, v) in u.iter_mut().zip(a) {
        *b = ((v * inv).round_ties_even() as i32 + 128) as u8;
    }
    amax / 127.0
}

#[cfg(target_arch = "x86_64")]
mod x86 {
    use super::{NarrowI8, ROWS, SAFE_GROUPS};
    use std::arch::x86_64::*;

    /// [`super::quantize_row`] in AVX-512 (the same bytes and scale).
    #[target_feature(enable = "avx512f,avx512bw")]
    pub(super) unsafe fn quantize_row(a: &[f32], u: &mut [u8]) -> f32 {
        let k = a.len();
        assert_eq!(u.len(), k, "quantize_row: lengths differ");
        let full = k / 16 * 16;
        let tail: __mmask16 = ((1u32 << (k - full)) - 1) as __mmask16;
        let inf = _mm512_set1_ps(f32::INFINITY);
        // Four running maxima (independent chains), then the tail.
        let mut mx = [_mm512_setzero_ps(); 4];
        let mut bad: __mmask16 = 0;
        let p = a.as_ptr();
        let mut i = 0;
        while i + 64 <= full {
            for (t, m) in mx.iter_mut().enumerate() {
                // SAFETY: lanes i+16t..i+16t+16 lie within `full` ≤ k.
                let ax = _mm512_abs_ps(unsafe { _mm512_loadu_ps(p.add(i + 16 * t)) });
                bad |= _mm512_cmp_ps_mask::<_CMP_NLT_UQ>(ax, inf);
                *m = _mm512_max_ps(*m, ax);
            }
            i += 64;
        }
        while i < full {
            // SAFETY: as above.
            let ax = _mm512_abs_ps(unsafe { _mm512_loadu_ps(p.add(i)) });
            bad |= _mm512_cmp_ps_mask::<_CMP_NLT_UQ>(ax, inf);
            mx[0] = _mm512_max_ps(mx[0], ax);
            i += 16;
        }
        if tail != 0 {
            // SAFETY: the masked lanes full..k are in bounds.
            let ax = _mm512_abs_ps(unsafe { _mm512_maskz_loadu_ps(tail, p.add(full)) });
            bad |= _mm512_mask_cmp_ps_mask::<_CMP_NLT_UQ>(tail, ax, inf);
            mx[0] = _mm512_max_ps(mx[0], ax);
        }
        if bad != 0 {
            return f32::NAN;
        }
        let amax = _mm512_reduce_max_ps(_mm512_max_ps(
            _mm512_max_ps(mx[0], mx[1]),
            _mm512_max_ps(mx[2], mx[3]),
        ));
        if amax == 0.0 {
            u.iter_mut().for_each(|b| *b = 128);
            return 0.0;
        }
        let inv = _mm512_set1_ps(127.0f32 / amax);
        let off = _mm512_set1_epi32(128);
        let code = |x: __m512| -> __m512i {
            let q = _mm512_cvt_roundps_epi32::<{ _MM_FROUND_TO_NEAREST_INT | _MM_FROUND_NO_EXC }>(
                _mm512_mul_ps(x, inv),
            );
            _mm512_add_epi32(q, off)
        };
        let q = u.as_mut_ptr();
        for i in (0..full).step_by(16) {
            // SAFETY: values i..i+16 of `a` and bytes i..i+16 of `u` are in bounds.
            unsafe {
                let b = _mm512_cvtepi32_epi8(code(_mm512_loadu_ps(p.add(i))));
                _mm_storeu_si128(q.add(i) as *mut __m128i, b);
            }
        }
        if tail != 0 {
            // SAFETY: the masked lanes full..k of `a` and `u` are in bounds.
            unsafe {
                let x = _mm512_maskz_loadu_ps(tail, p.add(full));
                _mm512_mask_cvtepi32_storeu_epi8(q.add(full) as *mut i8, tail, code(x));
            }
        }
        amax / 127.0
    }

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

    /// `R` rows × `16V` columns of 32-bit sums over groups `g0..g1` of one panel.
    #[target_feature(enable = "avx512f,avx512bw,avx512vnni")]
    #[inline]
    unsafe fn block<const R: usize, const V: usize>(
        u: *const u8,
        ldu: usize,
        w: *const i8,
        g0: usize,
        g1: usize,
        out: &mut [[i32; 48]; 8],
    ) {
        let mut acc = [[_mm512_setzero_si512(); V]; R];
        for g in g0..g1 {
            // SAFETY: the caller passes `R` rows of bytes covering groups g0..g1 and a
            // panel of at least g1 groups of 64V bytes.
            let wp = unsafe { w.add(g * 64 * V) };
            let mut wv = [_mm512_setzero_si512(); V];
            for (v, x) in wv.iter_mut().enumerate() {
                *x = unsafe { _mm512_loadu_si512(wp.add(64 * v) as *const _) };
            }
            for (r, row) in acc.iter_mut().enumerate() {
                let four = unsafe { (u.add(r * ldu + 4 * g) as *const i32).read_unaligned() };
                let b = _mm512_set1_epi32(four);
                for (c, x) in row.iter_mut().zip(&wv) {
                    *c = _mm512_dpbusd_epi32(*c, b, *x);
                }
            }
        }
        for (r, row) in acc.iter().enumerate() {
            for (v, c) in row.iter().enumerate() {
                // SAFETY: 16 lanes at 16v < 48 of the row.
                unsafe { _mm512_storeu_si512(out[r][16 * v..].as_mut_ptr() as *mut _, *c) };
            }
        }
    }

    /// One row: four interleaved chains of sums over the groups (enough independent
    /// instructions to keep up with the stream of `w`), added at the end.
    #[target_feature(enable = "avx512f,avx512bw,avx512vnni")]
    #[inline]
    unsafe fn row<const V: usize>(
        u: *const u8,
        w: *const i8,
        g0: usize,
        g1: usize,
    ) -> [__m512i; V] {
        let mut acc = [[_mm512_setzero_si512(); V]; 4];
        // One group of four bytes into chain `t` (constant after unrolling, so the chains
        // stay in registers).
        #[target_feature(enable = "avx512f,avx512bw,avx512vnni")]
        #[inline]
        unsafe fn step<const V: usize>(
            acc: &mut [__m512i; V],
            u: *const u8,
            w: *const i8,
            g: usize,
        ) {
            // SAFETY: as in `block`.
            let b = _mm512_set1_epi32(unsafe { (u.add(4 * g) as *const i32).read_unaligned() });
            for (c, x) in acc.iter_mut().enumerate() {
                let wv = unsafe { _mm512_loadu_si512(w.add(g * 64 * V + 64 * c) as *const _) };
                *x = _mm512_dpbusd_epi32(*x, b, wv);
            }
        }
        let mut g = g0;
        while g + 4 <= g1 {
            let [a0, a1, a2, a3] = &mut acc;
            // SAFETY: groups g..g+4 lie within g0..g1.
            unsafe {
                step::<V>(a0, u, w, g);
                step::<V>(a1, u, w, g + 1);
                step::<V>(a2, u, w, g + 2);
                step::<V>(a3, u, w, g + 3);
            }
            g += 4;
        }
        while g < g1 {
            // SAFETY: group g lies within g0..g1.
            unsafe { step::<V>(&mut acc[0], u, w, g) };
            g += 1;
        }
        let mut s = [_mm512_setzero_si512(); V];
        for (c, x) in s.iter_mut().enumerate() {
            *x = _mm512_add_epi32(
                _mm512_add_epi32(acc[0][c], acc[1][c]),
                _mm512_add_epi32(acc[2][c], acc[3][c]),
            );
        }
        s
    }

    /// The sums for `m` quantized rows (`u`: `m × 4⌈k/4⌉` bytes), into `sums` (`m × n`).
    #[target_feature(enable = "avx512f,avx512bw,avx512vnni")]
    pub(super) unsafe fn sums(w: &NarrowI8, u: &[u8], m: usize, sums: &mut [i64]) {
        let (n, groups) = (w.n, w.k.div_ceil(4));
        let ldu = 4 * groups;
        let mut tile = [[0i32; 48]; 8];
        for (p0, cols, v, panel) in w.panels() {
            for g0 in (0..groups).step_by(SAFE_GROUPS) {
                let g1 = (g0 + SAFE_GROUPS).min(groups);
                if m == 1 {
                    // SAFETY: one row of ldu bytes; the panel has `groups` groups.
                    let s: Vec<__m512i> = unsafe {
                        match v {
                            1 => row::<1>(u.as_ptr(), panel.as_ptr(), g0, g1).to_vec(),
                            2 => row::<2>(u.as_ptr(), panel.as_ptr(), g0, g1).to_vec(),
                            _ => row::<3>(u.as_ptr(), panel.as_ptr(), g0, g1).to_vec(),
                        }
                    };
                    for (c, x) in s.iter().enumerate() {
                        let lanes_v: [i32; 16] = unsafe { std::mem::transmute(*x) };
                        let take = lanes(cols, c).count_ones() as usize;
                        for (t, l) in lanes_v[..take].iter().enumerate() {
                            sums[p0 + 16 * c + t] += *l as i64;
                        }
                    }
                    continue;
                }
                for r0 in (0..m).step_by(ROWS) {
                    let r = (m - r0).min(ROWS);
                    // SAFETY: rows r0..r0+r of `u` exist; the panel has `groups` groups.
                    unsafe {
                        let up = u.as_ptr().add(r0 * ldu);
                        let wp = panel.as_ptr();
                        macro_rules! go {
                            ($($rr:literal),*) => {
                                match (r, v) {
                                    $(
                                        ($rr, 1) => block::<$rr, 1>(up, ldu, wp, g0, g1, &mut tile),
                                        ($rr, 2) => block::<$rr, 2>(up, ldu, wp, g0, g1, &mut tile),
                                        ($rr, _) => block::<$rr, 3>(up, ldu, wp, g0, g1, &mut tile),
                                    )*
                                    _ => unreachable!("row blocks have 1 to 8 rows"),
                                }
                            };
                        }
                        go!(1, 2, 3, 4, 5, 6, 7, 8);
                    }
                    for (i, t) in tile.iter().take(r).enumerate() {
                        let srow = &mut sums[(r0 + i) * n + p0..(r0 + i) * n + p0 + cols];
                        for (s, x) in srow.iter_mut().zip(t) {
                            *s += *x as i64;
                        }
                    }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The definition, independently: each row's scale and bytes from the stated rule (in
    /// f64 where it can be), the int8 weights from `quantize_i8`, sums in i64, then the
    /// scales applied.
    fn reference(w: &[f64], a: &[f32], k: usize, n: usize) -> Vec<f32> {
        let (q, scale) = quantize_i8(w, k, n, 1);
        let mut out = Vec::new();
        for ar in a.chunks_exact(k) {
            let amax = ar.iter().fold(0f32, |m, v| m.max(v.abs()));
            let inv = 127.0f32 / amax;
            let c: Vec<i64> = ar
                .iter()
                .map(|v| {
                    if amax == 0.0 {
                        0
                    } else {
                        (v * inv).round_ties_even() as i64
                    }
                })
                .collect();
            for j in 0..n {
                let s: i64 = (0..k).map(|p| c[p] * q[p * n + j] as i64).sum();
                out.push((s as f64 * (amax / 127.0) as f64 * scale[j] as f64) as f32);
            }
        }
        out
    }

    /// Every path equals the reference exactly (integer sums), for widths of one, two and
    /// three registers, several panels, `k` not a multiple of four, every remainder of the
    /// 8-row blocks; and the reference is close to the f64 product (the quantization's
    /// error, bounded by the two scales). A fault (one weight off by one) is caught.
    #[test]
    fn every_path_matches_the_definition_exactly() {
        for (m, k, n) in [
            (19, 37, 45),
            (8, 64, 5),
            (13, 1, 16),
            (3, 301, 100),
            (9, 7, 48),
            (17, 1100, 45),
            (1, 1100, 45),
            (1, 37, 100),
            (1, 2, 7),
        ] {
            let a: Vec<f32> = (0..m * k).map(|i| ((i * 7) as f32 * 0.173).sin()).collect();
            let w: Vec<f64> = (0..k * n).map(|i| ((i * 3) as f64 * 0.071).cos()).collect();
            let packed = NarrowI8::from_k_by_n(&w, k, n);
            let want = reference(&w, &a, k, n);
            for path in I8Path::available() {
                let mut got = vec![f32::NAN; m * n];
                packed.product_at(path, &a, &mut got);
                assert_eq!(got, want, "{} m{m} k{k} n{n}", path.name());
            }
            // Close to the exact product: each term is off by at most half a step of
            // either operand.
            for i in 0..m {
                let amax = a[i * k..(i + 1) * k]
                    .iter()
                    .fold(0f32, |x, v| x.max(v.abs()));
                for j in 0..n {
                    let exact: f64 = (0..k).map(|p| a[i * k + p] as f64 * w[p * n + j]).sum();
                    let wmax = (0..k).map(|p| w[p * n + j].abs()).fold(0.0, f64::max);
                    let bound = k as f64 * (amax as f64 * wmax / 127.0) * 1.01;
                    assert!((want[i * n + j] as f64 - exact).abs() <= bound);
                }
            }
            // An injected fault: the reference with one weight changed differs.
            let mut bad = w.clone();
            bad[0] += 2.0 * quantize_i8(&w, k, n, 1).1[0] as f64;
            let faulty = reference(&bad, &a, k, n);
            assert_ne!(
                faulty, want,
                "a changed weight went unnoticed (m{m} k{k} n{n})"
            );
        }
    }

    /// The packed layout holds the quantized values where `value` says.
    #[test]
    fn packed_values_are_the_quantized_values() {
        let (k, n) = (13, 100);
        let w: Vec<f64> = (0..k * n).map(|i| (i as f64 * 0.37).sin() * 3.0).collect();
        let (q, _) = quantize_i8(&w, k, n, 1);
        let p = NarrowI8::from_k_by_n(&w, k, n);
        for r in 0..k {
            for j in 0..n {
                assert_eq!(p.value(r, j), q[r * n + j], "[{r},{j}]");
            }
        }
    }

    /// Zero rows give zeros, a non-finite value gives NaN for its row only, and `k = 0`
    /// gives zeros, on every path.
    #[test]
    fn zero_and_non_finite_rows() {
        // The bad value in a block of 64 values, in a block of 16 after them, and in the
        // tail (the vector path reads the three differently).
        for (k, bad) in [(5, 2), (90, 3), (90, 70), (90, 85), (200, 150)] {
            let n = 3;
            let w: Vec<f64> = (0..k * n).map(|i| (i % 13) as f64 - 6.0).collect();
            let p = NarrowI8::from_k_by_n(&w, k, n);
            let mut a = vec![0f32; 3 * k];
            a[k..2 * k].iter_mut().for_each(|v| *v = 1.0);
            a[2 * k + bad] = if bad % 2 == 0 {
                f32::INFINITY
            } else {
                f32::NAN
            };
            for path in I8Path::available() {
                let mut out = vec![1f32; 3 * n];
                p.product_at(path, &a, &mut out);
                assert_eq!(&out[..n], &[0.0; 3]);
                assert!(out[n..2 * n].iter().all(|v| v.is_finite()));
                assert!(
                    out[2 * n..].iter().all(|v| v.is_nan()),
                    "{} k{k}",
                    path.name()
                );
            }
        }
        for path in I8Path::available() {
            let e = NarrowI8::from_k_by_n(&[], 0, 2);
            let mut z = vec![1f32; 4];
            e.product_at(path, &[], &mut z);
            assert_eq!(z, vec![0.0; 4]);
        }
    }
}
