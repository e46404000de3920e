//! Products with a narrow right-hand side in bfloat16: `out ≈ a · w` where `w` (`k × n`)
//! is stored in bfloat16 (the f32 value rounded to 8 significant bits, nearest, ties to
//! even) and each row of `a` is rounded the same way as it is read; the products of two
//! bfloat16 values are exact in f32 and the sums run in f32. On CPUs with AVX-512 BF16 two
//! products per 32-bit lane add into the sums per instruction (`vdpbf16ps`), elsewhere a
//! portable loop computes the same products (sums in another order, so results differ from
//! the native path by f32 rounding of the sums only).
//!
//! bfloat16 is the upper half of an IEEE binary32 value (Wang & Kanwar 2019, "BFloat16:
//! the secret to high performance on Cloud TPUs"; Intel's BF16 instruction set
//! reference, 2018).
//!
//! ```
//! use kernelpress::linalg::NarrowBf16;
//! let w = NarrowBf16::from_k_by_n(&[2.0, -1.0], 2, 1);
//! let mut out = [0f32];
//! w.product(&[1.0, 1.0], &mut out);
//! assert_eq!(out[0], 1.0);
//! ```

/// Columns per panel: three 16-lane registers.
const PANEL: usize = 48;
/// Rows of `a` per register block.
const ROWS: usize = 8;

/// The bfloat16 bits of `x`: rounded to nearest, ties to even; subnormal values flushed to
/// (signed) zero, as the AVX-512 BF16 conversion does; NaN stays NaN.
pub fn bf16_bits(x: f32) -> u16 {
    let b = x.to_bits();
    if x.is_nan() {
        return ((b >> 16) as u16) | 0x0040;
    }
    if x != 0.0 && x.abs() < f32::MIN_POSITIVE {
        return ((b >> 16) as u16) & 0x8000;
    }
    let round = 0x7fff + ((b >> 16) & 1);
    ((b + round) >> 16) as u16
}

/// The f32 value of bfloat16 bits.
pub fn bf16_value(h: u16) -> f32 {
    f32::from_bits((h as u32) << 16)
}

/// The instruction-set paths of [`NarrowBf16`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Bf16Path {
    /// Portable f32 loops.
    Portable,
    /// AVX-512 BF16 (`vdpbf16ps`).
    Avx512Bf16,
}

impl Bf16Path {
    /// The fastest path this CPU runs (portable under `KERNELPRESS_NO_SIMD`).
    pub fn best() -> Bf16Path {
        if crate::simd::level() == crate::simd::Level::Avx512 && Self::native_detected() {
            Bf16Path::Avx512Bf16
        } else {
            Bf16Path::Portable
        }
    }

    /// The paths this CPU can run (for tests that force each one).
    pub fn available() -> Vec<Bf16Path> {
        let mut v = vec![Bf16Path::Portable];
        if Self::native_detected() {
            v.push(Bf16Path::Avx512Bf16);
        }
        v
    }

    /// `portable` or `avx512-bf16`.
    pub fn name(self) -> &'static str {
        match self {
            Bf16Path::Portable => "portable",
            Bf16Path::Avx512Bf16 => "avx512-bf16",
        }
    }

    fn native_detected() -> bool {
        #[cfg(target_arch = "x86_64")]
        {
            crate::simd::detected() == crate::simd::Level::Avx512
                && std::arch::is_x86_feature_detected!("avx512bf16")
                && std::arch::is_x86_feature_detected!("avx512bw")
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            false
        }
    }
}

/// A `k × n` matrix in bfloat16, packed for [`NarrowBf16::product`].
#[derive(Debug, Clone, Default)]
pub struct NarrowBf16 {
    k: usize,
    n: usize,
    /// Panels of [`PANEL`] columns (the last one rounded up to 16), each `⌈k/2⌉` pairs of
    /// `16v` columns × 2 consecutive `k` rows, zero-padded.
    packed: Vec<u16>,
}

impl NarrowBf16 {
    /// From a row-major `k × n` matrix (each value rounded to f32, then to bfloat16).
    ///
    /// # Panics
    /// If `w.len() != k · n`.
    #[track_caller]
    pub fn from_k_by_n(w: &[f64], k: usize, n: usize) -> NarrowBf16 {
        assert_eq!(w.len(), k * n, "NarrowBf16: shapes differ");
        let pairs = k.div_ceil(2);
        let mut packed = Vec::with_capacity(pairs * 2 * n.div_ceil(16) * 16);
        for p0 in (0..n).step_by(PANEL) {
            let cols = (n - p0).min(PANEL);
            let width = cols.div_ceil(16) * 16;
            for g in 0..pairs {
                for c in 0..width {
                    for t in 0..2 {
                        let r = 2 * g + t;
                        packed.push(if c < cols && r < k {
                            bf16_bits(w[r * n + p0 + c] as f32)
                        } else {
                            0
                        });
                    }
                }
            }
        }
        NarrowBf16 { k, n, packed }
    }

    /// Rows (`k`).
    pub fn rows(&self) -> usize {
        self.k
    }

    /// Columns (`n`).
    pub fn cols(&self) -> usize {
        self.n
    }

    /// Bytes the products read.
    pub fn bytes(&self) -> usize {
        2 * self.packed.len()
    }

    /// The panels in order: first column, columns, 16-lane registers `v`, packed values.
    fn panels(&self) -> impl Iterator<Item = (usize, usize, usize, &[u16])> {
        let (pairs, n) = (self.k.div_ceil(2), self.n);
        (0..n).step_by(PANEL).scan(0, move |off, p0| {
            let cols = (n - p0).min(PANEL);
            let v = cols.div_ceil(16);
            let len = pairs * 32 * v;
            let panel = &self.packed[*off..*off + len];
            *off += len;
            Some((p0, cols, v, panel))
        })
    }

    /// `out ≈ a · w` for a row-major `m × k` matrix `a`; `out` is `m × n`, row-major.
    ///
    /// # Panics
    /// If the lengths do not fit the shapes.
    #[track_caller]
    pub fn product(&self, a: &[f32], out: &mut [f32]) {
        self.product_at(Bf16Path::best(), a, out)
    }

    /// [`Self::product`] on a forced path (tests run every path).
    ///
    /// # Panics
    /// If the shapes differ or this CPU cannot run `path`.
    #[track_caller]
    pub fn product_at(&self, path: Bf16Path, a: &[f32], out: &mut [f32]) {
        let (k, n) = (self.k, self.n);
        let m = a.len().checked_div(k).unwrap_or(out.len() / n.max(1));
        assert!(
            a.len() == m * k && out.len() == m * n,
            "narrow bf16 product: shapes differ"
        );
        assert!(
            Bf16Path::available().contains(&path),
            "this CPU cannot run the {} path",
            path.name()
        );
        if k == 0 {
            out.iter_mut().for_each(|o| *o = 0.0);
            return;
        }
        let kp = k.div_ceil(2) * 2;
        let mut h = vec![0u16; m * kp];
        for (ar, hr) in a.chunks_exact(k).zip(h.chunks_exact_mut(kp)) {
            match path {
                // SAFETY: AVX-512 BF16 and BW are present (checked above).
                #[cfg(target_arch = "x86_64")]
                Bf16Path::Avx512Bf16 => unsafe { x86::round_row(ar, &mut hr[..k]) },
                _ => hr.iter_mut().zip(ar).for_each(|(o, v)| *o = bf16_bits(*v)),
            }
        }
        match path {
            // SAFETY: as above; every length was checked.
            #[cfg(target_arch = "x86_64")]
            Bf16Path::Avx512Bf16 => unsafe { x86::product(self, &h, m, out) },
            _ => self.product_portable(&h, m, out),
        }
    }

    fn product_portable(&self, h: &[u16], m: usize, out: &mut [f32]) {
        let (n, kp) = (self.n, self.k.div_ceil(2) * 2);
        for (p0, cols, v, panel) in self.panels() {
            let width = 16 * v;
            for (hr, orow) in h.chunks_exact(kp).zip(out.chunks_exact_mut(n)).take(m) {
                let mut acc = vec![0f32; cols];
                for (g, block) in panel.chunks_exact(2 * width).enumerate() {
                    let (a0, a1) = (bf16_value(hr[2 * g]), bf16_value(hr[2 * g + 1]));
                    for (c, s) in acc.iter_mut().enumerate() {
                        *s += a1 * bf16_value(block[2 * c + 1]);
                        *s += a0 * bf16_value(block[2 * c]);
                    }
                }
                orow[p0..p0 + cols].copy_from_slice(&acc);
            }
        }
    }
}

#[cfg(target_arch = "x86_64")]
mod x86 {
    use super::{NarrowBf16, ROWS};
    use std::arch::x86_64::*;

    /// Rounds one row to bfloat16 (`vcvtneps2bf16`: nearest, ties to even).
    #[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
    pub(super) unsafe fn round_row(a: &[f32], h: &mut [u16]) {
        let k = a.len();
        for i in (0..k).step_by(16) {
            let left = (k - i).min(16);
            let mask: __mmask16 = if left == 16 { !0 } else { (1u16 << left) - 1 };
            // SAFETY: lanes i..i+left of `a` and `h` are in bounds.
            unsafe {
                let x = _mm512_maskz_loadu_ps(mask, a.as_ptr().add(i));
                let b: __m256i = std::mem::transmute(_mm512_cvtneps_pbh(x));
                _mm256_mask_storeu_epi16(h.as_mut_ptr().add(i) as *mut i16, mask, b);
            }
        }
    }

    #[inline(always)]
    fn lanes(cols: usize, v: usize) -> __mmask16 {
        let left = cols.saturating_sub(16 * v).min(16);
        if left == 16 {
            !0
        } else {
            (1u16 << left) - 1
        }
    }

    #[inline(always)]
    fn bh(x: __m512i) -> __m512bh {
        // SAFETY: both are 512 bits of plain data.
        unsafe { std::mem::transmute(x) }
    }

    /// `R` rows × `16V` columns over all pairs of one panel, stored to `out`.
    #[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
    #[inline]
    unsafe fn block<const R: usize, const V: usize>(
        h: *const u16,
        ldh: usize,
        w: *const u16,
        pairs: usize,
        out: *mut f32,
        ldo: usize,
        cols: usize,
    ) {
        let mut acc = [[_mm512_setzero_ps(); V]; R];
        for g in 0..pairs {
            // SAFETY: the caller passes `R` rows of `2·pairs` values and a panel of
            // `pairs` pairs of 32V values.
            let wp = unsafe { w.add(g * 32 * V) };
            let mut wv = [_mm512_setzero_si512(); V];
            for (v, x) in wv.iter_mut().enumerate() {
                *x = unsafe { _mm512_loadu_si512(wp.add(32 * v) as *const _) };
            }
            for (r, row) in acc.iter_mut().enumerate() {
                let two = unsafe { (h.add(r * ldh + 2 * g) as *const i32).read_unaligned() };
                let b = bh(_mm512_set1_epi32(two));
                for (c, x) in row.iter_mut().zip(&wv) {
                    *c = _mm512_dpbf16_ps(*c, b, bh(*x));
                }
            }
        }
        for (r, row) in acc.iter().enumerate() {
            for (v, c) in row.iter().enumerate() {
                // SAFETY: the first `cols` columns of row r of `out` are the caller's.
                unsafe { _mm512_mask_storeu_ps(out.add(r * ldo + 16 * v), lanes(cols, v), *c) };
            }
        }
    }

    /// One row, four interleaved chains of sums over the pairs, added at the end.
    #[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
    #[inline]
    unsafe fn row<const V: usize>(
        h: *const u16,
        w: *const u16,
        pairs: usize,
        out: *mut f32,
        cols: usize,
    ) {
        let mut acc = [[_mm512_setzero_ps(); V]; 4];
        // Pair `g` into chain `g mod 4` (a constant after unrolling, so the chains stay in
        // registers).
        #[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
        #[inline]
        unsafe fn step<const V: usize>(
            acc: &mut [__m512; V],
            h: *const u16,
            w: *const u16,
            g: usize,
        ) {
            // SAFETY: as in `block`.
            let b = bh(_mm512_set1_epi32(unsafe {
                (h.add(2 * g) as *const i32).read_unaligned()
            }));
            for (c, x) in acc.iter_mut().enumerate() {
                let wv = unsafe { _mm512_loadu_si512(w.add(g * 32 * V + 32 * c) as *const _) };
                *x = _mm512_dpbf16_ps(*x, b, bh(wv));
            }
        }
        let mut g = 0;
        while g + 4 <= pairs {
            let [a0, a1, a2, a3] = &mut acc;
            // SAFETY: pairs g..g+4 lie within the row.
            unsafe {
                step::<V>(a0, h, w, g);
                step::<V>(a1, h, w, g + 1);
                step::<V>(a2, h, w, g + 2);
                step::<V>(a3, h, w, g + 3);
            }
            g += 4;
        }
        while g < pairs {
            // SAFETY: pair g lies within the row.
            unsafe { step::<V>(&mut acc[g % 4], h, w, g) };
            g += 1;
        }
        let [a0, a1, a2, a3] = acc;
        for c in 0..V {
            let s = _mm512_add_ps(_mm512_add_ps(a0[c], a1[c]), _mm512_add_ps(a2[c], a3[c]));
            // SAFETY: as in `block`.
            unsafe { _mm512_mask_storeu_ps(out.add(16 * c), lanes(cols, c), s) };
        }
    }

    /// `out ≈ h · w` for `m` rounded rows (`h`: `m × 2⌈k/2⌉`).
    #[target_feature(enable = "avx512f,avx512bw,avx512bf16")]
    pub(super) unsafe fn product(w: &NarrowBf16, h: &[u16], m: usize, out: &mut [f32]) {
        let (n, pairs) = (w.n, w.k.div_ceil(2));
        let ldh = 2 * pairs;
        for (p0, cols, v, panel) in w.panels() {
            if m == 1 {
                // SAFETY: one row of ldh values; `out` has columns p0..p0+cols.
                unsafe {
                    let o = out.as_mut_ptr().add(p0);
                    match v {
                        1 => row::<1>(h.as_ptr(), panel.as_ptr(), pairs, o, cols),
                        2 => row::<2>(h.as_ptr(), panel.as_ptr(), pairs, o, cols),
                        _ => row::<3>(h.as_ptr(), panel.as_ptr(), pairs, o, cols),
                    }
                }
                continue;
            }
            for r0 in (0..m).step_by(ROWS) {
                let r = (m - r0).min(ROWS);
                // SAFETY: rows r0..r0+r of `h` and of `out` (m × n) are in bounds.
                unsafe {
                    let hp = h.as_ptr().add(r0 * ldh);
                    let wp = panel.as_ptr();
                    let op = out.as_mut_ptr().add(r0 * n + p0);
                    macro_rules! go {
                        ($($rr:literal),*) => {
                            match (r, v) {
                                $(
                                    ($rr, 1) => block::<$rr, 1>(hp, ldh, wp, pairs, op, n, cols),
                                    ($rr, 2) => block::<$rr, 2>(hp, ldh, wp, pairs, op, n, cols),
                                    ($rr, _) => block::<$rr, 3>(hp, ldh, wp, pairs, op, n, cols),
                                )*
                                _ => unreachable!("row blocks have 1 to 8 rows"),
                            }
                        };
                    }
                    go!(1, 2, 3, 4, 5, 6, 7, 8);
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Rounding to bfloat16 against values worked by hand (the 16 upper bits of the f32
    /// pattern, rounded to nearest, ties to even).
    #[test]
    fn rounding_to_bfloat16_by_hand() {
        assert_eq!(bf16_bits(1.0), 0x3f80);
        assert_eq!(bf16_bits(-2.0), 0xc000);
        // 1 + 2⁻⁸ is half-way between 1 and 1 + 2⁻⁷: ties to the even 1.
        assert_eq!(bf16_bits(1.0 + 1.0 / 256.0), 0x3f80);
        // 1 + 3·2⁻⁸ is half-way between 1 + 2⁻⁷ and 1 + 2⁻⁶: ties to the even 1 + 2⁻⁶.
        assert_eq!(bf16_bits(1.0 + 3.0 / 256.0), 0x3f82);
        // Just above half-way rounds up.
        assert_eq!(bf16_bits(1.0 + 1.0 / 256.0 + 1.0 / 65536.0), 0x3f81);
        assert_eq!(bf16_value(0x3f81), 1.0 + 1.0 / 128.0);
        assert_eq!(bf16_bits(f32::INFINITY), 0x7f80);
        assert!(bf16_value(bf16_bits(f32::NAN)).is_nan());
        assert_eq!(bf16_bits(1e-40), 0);
    }

    /// Every path against the products of the rounded values summed in f64 (to f32
    /// rounding of the sums), for widths of one, two and three registers, several panels,
    /// odd `k`, every remainder of the 8-row blocks; the rounded product is close to the
    /// f64 product (each operand within 2⁻⁹ of its value). A fault (a row rounded by
    /// truncation instead of to nearest) is caught by the same check.
    #[test]
    fn every_path_matches_the_definition() {
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
            let packed = NarrowBf16::from_k_by_n(&w, k, n);
            let r = |x: f32| bf16_value(bf16_bits(x)) as f64;
            let check = |got: &[f32], round: &dyn Fn(f32) -> f64| -> Result<(), String> {
                for i in 0..m {
                    for j in 0..n {
                        let (mut want, mut mass) = (0f64, 0f64);
                        for p in 0..k {
                            let t = round(a[i * k + p]) * r(w[p * n + j] as f32);
                            want += t;
                            mass += t.abs();
                        }
                        let g = got[i * n + j] as f64;
                        if (g - want).abs() > 1e-6 * mass {
                            return Err(format!("[{i},{j}]: {g} vs {want}"));
                        }
                        let exact: f64 = (0..k).map(|p| a[i * k + p] as f64 * w[p * n + j]).sum();
                        if (g - exact).abs() > mass * 2.0f64.powi(-7) {
                            return Err(format!("[{i},{j}] far from the product"));
                        }
                    }
                }
                Ok(())
            };
            for path in Bf16Path::available() {
                let mut got = vec![f32::NAN; m * n];
                packed.product_at(path, &a, &mut got);
                check(&got, &r).unwrap_or_else(|e| panic!("{} m{m} k{k} n{n} {e}", path.name()));
            }
            // The fault: rows truncated to bfloat16 rather than rounded.
            let trunc: Vec<f32> = a
                .iter()
                .map(|v| f32::from_bits(v.to_bits() & 0xffff_0000))
                .collect();
            let mut faulty = vec![0f32; m * n];
            for i in 0..m {
                for j in 0..n {
                    faulty[i * n + j] = (0..k)
                        .map(|p| trunc[i * k + p] as f64 * r(w[p * n + j] as f32))
                        .sum::<f64>() as f32;
                }
            }
            if k > 30 {
                assert!(
                    check(&faulty, &r).is_err(),
                    "truncation went unnoticed (m{m} k{k} n{n})"
                );
            }
        }
    }
}
