//! Dense linear algebra on ndarray values, through faer.
//!
//! Every routine here is deterministic: products are split into fixed-size row chunks
//! (whatever the number of threads) and each chunk runs faer sequentially, so the same
//! inputs give bit-identical outputs on 1 or 64 threads.

use faer::dyn_stack::{MemBuffer, MemStack};
use faer::linalg::matmul::matmul;
use faer::{Accum, Mat, MatRef, Par};
use ndarray::{s, Array2, ArrayView2, Axis};
use rayon::prelude::*;

use crate::{Error, Result};

mod aligned;
mod head;
mod narrow;
mod narrow_bf16;
mod narrow_i8;
pub use aligned::AlignedF32;
pub use head::{HeadPrecision, LowHead};
pub use narrow::NarrowF32;
pub use narrow_bf16::{bf16_bits, bf16_value, Bf16Path, NarrowBf16};
pub use narrow_i8::{quantize_i8, I8Path, NarrowI8};

/// Rows per parallel chunk of a product. Fixed so results never depend on the thread count.
pub const CHUNK_ROWS: usize = 256;

fn as_faer<'a>(a: &'a ArrayView2<'a, f64>) -> MatRef<'a, f64> {
    let (m, n) = a.dim();
    let st = a.strides();
    // SAFETY: the pointer, shape and strides come from a live ndarray view of f64.
    unsafe { MatRef::from_raw_parts(a.as_ptr(), m, n, st[0], st[1]) }
}

/// `out += Σᵢ zᵢ · w[i, ·]` for a row-major `z.len() × out.len()` matrix `w`: one row
/// through a linear head, in row order (the same sums as a scalar double loop).
///
/// # Panics
/// If `w.len() != z.len() · out.len()`.
#[track_caller]
pub fn add_weighted_rows(z: &[f64], w: &[f64], out: &mut [f64]) {
    let k = out.len();
    assert_eq!(w.len(), z.len() * k, "add_weighted_rows: shapes differ");
    if k == 0 {
        return;
    }
    for (zi, row) in z.iter().zip(w.chunks_exact(k)) {
        for (o, wv) in out.iter_mut().zip(row) {
            *o += zi * wv;
        }
    }
}

/// `a · bᵀ`, sequential, for one chunk. Panics if the inner dimensions differ.
#[track_caller]
pub fn abt_seq(a: ArrayView2<f64>, b: ArrayView2<f64>) -> Array2<f64> {
    assert_eq!(a.ncols(), b.ncols(), "abt: inner dimensions differ");
    let mut out = Array2::<f64>::zeros((a.nrows(), b.nrows()));
    if a.ncols() == 0 || a.nrows() == 0 || b.nrows() == 0 {
        return out;
    }
    let (m, n) = out.dim();
    let fa = as_faer(&a);
    let fb = as_faer(&b);
    let dst = faer::MatMut::from_row_major_slice_mut(out.as_slice_mut().unwrap(), m, n);
    matmul(dst, Accum::Replace, fa, fb.transpose(), 1.0, Par::Seq);
    out
}

/// `a · b`, sequential, for one chunk. Panics if the inner dimensions differ.
#[track_caller]
pub fn ab_seq(a: ArrayView2<f64>, b: ArrayView2<f64>) -> Array2<f64> {
    assert_eq!(a.ncols(), b.nrows(), "ab: inner dimensions differ");
    let mut out = Array2::<f64>::zeros((a.nrows(), b.ncols()));
    if a.ncols() == 0 || a.nrows() == 0 || b.ncols() == 0 {
        return out;
    }
    let (m, n) = out.dim();
    let fa = as_faer(&a);
    let fb = as_faer(&b);
    let dst = faer::MatMut::from_row_major_slice_mut(out.as_slice_mut().unwrap(), m, n);
    matmul(dst, Accum::Replace, fa, fb, 1.0, Par::Seq);
    out
}

/// `out = a · bᵀ` in f32, sequential, for row-major slices: `a` is `m × k`, `b` is
/// `n × k`, `out` is `m × n` (the f32 batch paths: one product per chunk).
///
/// # Panics
/// If the lengths do not fit the shapes.
#[track_caller]
pub fn abt_f32(a: &[f32], b: &[f32], k: usize, out: &mut [f32]) {
    let (m, n) = (a.len() / k.max(1), b.len() / k.max(1));
    assert!(
        a.len() == m * k && b.len() == n * k && out.len() == m * n,
        "abt_f32: shapes differ"
    );
    if k == 0 || m == 0 || n == 0 {
        out.iter_mut().for_each(|o| *o = 0.0);
        return;
    }
    let fa = MatRef::from_row_major_slice(a, m, k);
    let fb = MatRef::from_row_major_slice(b, n, k);
    let dst = faer::MatMut::from_row_major_slice_mut(out, m, n);
    matmul(dst, Accum::Replace, fa, fb.transpose(), 1.0f32, Par::Seq);
}

/// `out = a · b` in f32, sequential, for row-major slices: `a` is `m × k`, `b` is `k × n`,
/// `out` is `m × n`.
///
/// # Panics
/// If the lengths do not fit the shapes.
#[track_caller]
pub fn ab_f32(a: &[f32], b: &[f32], k: usize, out: &mut [f32]) {
    let m = a.len() / k.max(1);
    let n = b.len() / k.max(1);
    assert!(
        a.len() == m * k && b.len() == k * n && out.len() == m * n,
        "ab_f32: shapes differ"
    );
    if k == 0 || m == 0 || n == 0 {
        out.iter_mut().for_each(|o| *o = 0.0);
        return;
    }
    let fa = MatRef::from_row_major_slice(a, m, k);
    let fb = MatRef::from_row_major_slice(b, k, n);
    let dst = faer::MatMut::from_row_major_slice_mut(out, m, n);
    matmul(dst, Accum::Replace, fa, fb, 1.0f32, Par::Seq);
}

/// Applies `f` to fixed-size row chunks of `a` in parallel and stacks the results
/// (each `chunk_rows × k`) in row order.
pub fn map_row_chunks<F>(a: ArrayView2<f64>, k: usize, f: F) -> Array2<f64>
where
    F: Fn(ArrayView2<f64>) -> Array2<f64> + Sync,
{
    let n = a.nrows();
    let mut out = Array2::<f64>::zeros((n, k));
    out.axis_chunks_iter_mut(Axis(0), CHUNK_ROWS)
        .into_par_iter()
        .enumerate()
        .for_each(|(ci, mut dst)| {
            let start = ci * CHUNK_ROWS;
            let rows = dst.nrows();
            let block = f(a.slice(s![start..start + rows, ..]));
            dst.assign(&block);
        });
    out
}

/// `a · b` in parallel over fixed row chunks.
pub fn ab(a: ArrayView2<f64>, b: ArrayView2<f64>) -> Array2<f64> {
    map_row_chunks(a, b.ncols(), |c| ab_seq(c, b))
}

/// `aᵀ · a` accumulated over fixed row chunks in a fixed order (deterministic).
pub fn ata(a: ArrayView2<f64>) -> Array2<f64> {
    let k = a.ncols();
    let mut acc = Array2::<f64>::zeros((k, k));
    for c in a.axis_chunks_iter(Axis(0), 4096) {
        acc += &ab_seq(c.t(), c);
    }
    acc
}

fn to_faer(a: ArrayView2<f64>) -> Mat<f64> {
    Mat::from_fn(a.nrows(), a.ncols(), |i, j| a[[i, j]])
}

fn from_faer(m: MatRef<f64>) -> Array2<f64> {
    Array2::from_shape_fn((m.nrows(), m.ncols()), |(i, j)| m[(i, j)])
}

fn stack_for<R>(req: faer::dyn_stack::StackReq, f: impl FnOnce(&mut MemStack) -> R) -> R {
    let mut buf = MemBuffer::new(req);
    f(MemStack::new(&mut buf))
}

/// Solves the symmetric positive definite system `a · x = b` by Cholesky (sequential, so
/// the result never depends on the thread count; no process-wide setting is touched).
///
/// Returns a numerical error naming `what` when `a` is not numerically positive definite.
pub fn cholesky_solve(a: ArrayView2<f64>, b: ArrayView2<f64>, what: &str) -> Result<Array2<f64>> {
    use faer::linalg::cholesky::llt;
    let n = a.nrows();
    let mut l = to_faer(a);
    let req = llt::factor::cholesky_in_place_scratch::<f64>(n, Par::Seq, Default::default());
    stack_for(req, |st| {
        llt::factor::cholesky_in_place(
            l.as_mut(),
            Default::default(),
            Par::Seq,
            st,
            Default::default(),
        )
    })
    .map_err(|e| {
        Error::numerical(format!(
            "{what}: matrix is not positive definite ({e:?}); increase the ridge strength"
        ))
    })?;
    let mut x = to_faer(b);
    let req = llt::solve::solve_in_place_scratch::<f64>(n, x.ncols(), Par::Seq);
    stack_for(req, |st| {
        llt::solve::solve_in_place(l.as_ref(), x.as_mut(), Par::Seq, st)
    });
    Ok(from_faer(x.as_ref()))
}

fn evd(a: ArrayView2<f64>, vectors: bool) -> Result<(Vec<f64>, Option<Array2<f64>>)> {
    use faer::linalg::evd;
    let n = a.nrows();
    let fa = to_faer(a);
    let mut s = faer::diag::Diag::<f64>::zeros(n);
    let mut u = Mat::<f64>::zeros(if vectors { n } else { 0 }, if vectors { n } else { 0 });
    let compute = if vectors {
        evd::ComputeEigenvectors::Yes
    } else {
        evd::ComputeEigenvectors::No
    };
    let req = evd::self_adjoint_evd_scratch::<f64>(n, compute, Par::Seq, Default::default());
    stack_for(req, |st| {
        evd::self_adjoint_evd(
            fa.as_ref(),
            s.as_mut(),
            if vectors { Some(u.as_mut()) } else { None },
            Par::Seq,
            st,
            Default::default(),
        )
    })
    .map_err(|e| {
        Error::numerical(format!(
            "eigen-decomposition did not converge ({e:?}); the matrix may hold overflowed or extreme values"
        ))
    })?;
    let vals: Vec<f64> = (0..n).map(|i| s[i]).collect();
    Ok((vals, vectors.then(|| from_faer(u.as_ref()))))
}

/// Eigenvalues of a symmetric matrix, ascending.
pub fn eigvalsh(a: ArrayView2<f64>) -> Result<Vec<f64>> {
    Ok(evd(a, false)?.0)
}

/// Eigen-decomposition of a symmetric matrix: (ascending eigenvalues, eigenvectors as columns).
pub fn eigh(a: ArrayView2<f64>) -> Result<(Vec<f64>, Array2<f64>)> {
    let (v, u) = evd(a, true)?;
    Ok((v, u.expect("vectors requested")))
}

/// Thin QR of a square or tall matrix: returns Q (m × n) with the signs fixed so that
/// diag(R) ≥ 0 (so Q is Haar-distributed when `a` is Gaussian). Sequential.
pub fn qr_q_signfixed(a: ArrayView2<f64>) -> Array2<f64> {
    use faer::linalg::{householder, qr::no_pivoting::factor};
    let (m, n) = a.dim();
    let size = m.min(n);
    let mut qr = to_faer(a);
    let bs = factor::recommended_block_size::<f64>(m, n);
    let mut coeff = Mat::<f64>::zeros(bs, size);
    let req = factor::qr_in_place_scratch::<f64>(m, n, bs, Par::Seq, Default::default());
    stack_for(req, |st| {
        factor::qr_in_place(
            qr.as_mut(),
            coeff.as_mut(),
            Par::Seq,
            st,
            Default::default(),
        );
    });
    let mut q = Mat::<f64>::identity(m, size);
    let req = householder::apply_block_householder_sequence_on_the_left_in_place_scratch::<f64>(
        m, bs, size,
    );
    // The Householder basis: unit lower-trapezoidal part of the factored matrix.
    let basis_m = Mat::<f64>::from_fn(m, size, |i, j| match i.cmp(&j) {
        std::cmp::Ordering::Greater => qr[(i, j)],
        std::cmp::Ordering::Equal => 1.0,
        std::cmp::Ordering::Less => 0.0,
    });
    let basis = basis_m.as_ref();
    stack_for(req, |st| {
        householder::apply_block_householder_sequence_on_the_left_in_place_with_conj(
            basis,
            coeff.as_ref(),
            faer::Conj::No,
            q.as_mut(),
            Par::Seq,
            st,
        )
    });
    let mut out = from_faer(q.as_ref());
    for j in 0..out.ncols() {
        if qr[(j, j)] < 0.0 {
            out.column_mut(j).mapv_inplace(|v| -v);
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::array;

    #[test]
    fn f32_row_dots_at_every_level_match_the_definition() {
        // Widths around the 16-lane blocks, rows of mixed signs and magnitudes.
        for d in [1usize, 15, 16, 17, 100, 784] {
            let n = 37;
            let rows: Vec<f32> = (0..n * d)
                .map(|i| (i as f32 * 0.37).sin() * (1.0 + (i % 13) as f32))
                .collect();
            let x: Vec<f32> = (0..d).map(|j| (j as f32 * 0.11).cos() - 0.2).collect();
            // The definition, in f64 over the same f32 values.
            let want: Vec<f64> = rows
                .chunks_exact(d)
                .map(|r| r.iter().zip(&x).map(|(a, b)| *a as f64 * *b as f64).sum())
                .collect();
            let mass: Vec<f64> = rows
                .chunks_exact(d)
                .map(|r| {
                    r.iter()
                        .zip(&x)
                        .map(|(a, b)| (*a as f64 * *b as f64).abs())
                        .sum()
                })
                .collect();
            for level in crate::simd::available() {
                let mut got = vec![f64::NAN; n];
                dot_rows_at(level, &rows, &x, &mut got);
                for j in 0..n {
                    assert!(
                        (got[j] - want[j]).abs() <= 1e-6 * mass[j] + 1e-30,
                        "{} d={d} row {j}: {} vs {}",
                        level.name(),
                        got[j],
                        want[j]
                    );
                }
            }
        }
    }

    #[test]
    fn products_match_ndarray_dot() {
        let a = Array2::from_shape_fn((300, 7), |(i, j)| ((i * 7 + j) as f64).sin());
        let b = Array2::from_shape_fn((5, 7), |(i, j)| ((i + 3 * j) as f64).cos());
        let want = a.dot(&b.t());
        let got = map_row_chunks(a.view(), 5, |c| abt_seq(c, b.view()));
        assert!((&want - &got).iter().all(|v| v.abs() < 1e-12));
        let got2 = ab(a.view(), b.t());
        assert!((&want - &got2).iter().all(|v| v.abs() < 1e-12));
        let g = ata(a.view());
        assert!((&g - &a.t().dot(&a)).iter().all(|v| v.abs() < 1e-9));
    }

    /// The f32 products against a plain triple loop in f64 (ndarray's definition of the
    /// product), to f32 rounding of the sums' mass.
    #[test]
    fn f32_products_match_the_definition() {
        let (m, k, n) = (37, 129, 11);
        let a: Vec<f32> = (0..m * k).map(|i| (i as f32 * 0.37).sin()).collect();
        let b: Vec<f32> = (0..n * k).map(|i| (i as f32 * 0.11).cos()).collect();
        let mut got = vec![0f32; m * n];
        abt_f32(&a, &b, k, &mut got);
        let bt: Vec<f32> = (0..k * n).map(|t| b[(t % n) * k + t / n]).collect();
        let mut got2 = vec![0f32; m * n];
        ab_f32(&a, &bt, k, &mut got2);
        for i in 0..m {
            for j in 0..n {
                let want: f64 = (0..k)
                    .map(|t| a[i * k + t] as f64 * b[j * k + t] as f64)
                    .sum();
                let tol = 1e-6 * k as f64;
                assert!((got[i * n + j] as f64 - want).abs() < tol, "abt ({i}, {j})");
                assert!((got2[i * n + j] as f64 - want).abs() < tol, "ab ({i}, {j})");
            }
        }
    }

    #[test]
    fn cholesky_solves() {
        let a = array![[4.0, 1.0], [1.0, 3.0]];
        let b = array![[1.0], [2.0]];
        let x = cholesky_solve(a.view(), b.view(), "test").unwrap();
        let r = a.dot(&x) - &b;
        assert!(r.iter().all(|v| v.abs() < 1e-12));
        let bad = array![[1.0, 2.0], [2.0, 1.0]];
        assert!(cholesky_solve(bad.view(), b.view(), "test").is_err());
    }

    #[test]
    fn qr_is_orthogonal_with_positive_r() {
        let a = Array2::from_shape_fn((6, 6), |(i, j)| {
            ((i * 13 + j * 7 + i * j * i) as f64 * 0.37).sin() + if i == j { 2.0 } else { 0.0 }
        });
        let q = qr_q_signfixed(a.view());
        let qtq = q.t().dot(&q);
        for i in 0..6 {
            for j in 0..6 {
                let e = if i == j { 1.0 } else { 0.0 };
                assert!((qtq[[i, j]] - e).abs() < 1e-12);
            }
        }
        let r = q.t().dot(&a);
        for j in 0..6 {
            assert!(r[[j, j]] >= 0.0);
        }
    }
}

/// An element type of the row products: f32 (the f32 scoring paths) or f64.
pub trait RowFloat:
    Copy + Default + std::ops::Mul<Output = Self> + std::ops::AddAssign + std::iter::Sum + Into<f64>
{
    /// Partial sums per row: four 512-bit registers' worth, so that several vector
    /// accumulators hide the latency of the fused multiply-adds.
    const LANES: usize;
}

impl RowFloat for f32 {
    const LANES: usize = 64;
}

impl RowFloat for f64 {
    const LANES: usize = 32;
}

#[inline(always)]
fn dot_rows_body<T: RowFloat, const L: usize>(rows: &[T], x: &[T], out: &mut [f64]) {
    let d = x.len();
    let head = d - d % L;
    for (o, r) in out.iter_mut().zip(rows.chunks_exact(d)) {
        let mut acc = [T::default(); L];
        for (a, b) in r[..head].chunks_exact(L).zip(x[..head].chunks_exact(L)) {
            for l in 0..L {
                acc[l] += a[l] * b[l];
            }
        }
        let mut t = T::default();
        for (a, b) in r[head..].iter().zip(&x[head..]) {
            t += *a * *b;
        }
        *o = reduce(&mut acc).into() + t.into();
    }
}

/// The partial sums added in halves (`L` a power of two): vector additions down to the
/// last register instead of `L` dependent scalar additions.
#[inline(always)]
fn reduce<T: RowFloat, const L: usize>(acc: &mut [T; L]) -> T {
    let mut w = L;
    while w > 1 {
        w /= 2;
        for l in 0..w {
            let v = acc[l + w];
            acc[l] += v;
        }
    }
    acc[0]
}

/// The body at `T`'s lane count (a `const` generic needs the number itself).
#[inline(always)]
fn dot_rows_lanes<T: RowFloat>(rows: &[T], x: &[T], out: &mut [f64]) {
    match T::LANES {
        64 => dot_rows_body::<T, 64>(rows, x, out),
        _ => dot_rows_body::<T, 32>(rows, x, out),
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn dot_rows_avx2<T: RowFloat>(rows: &[T], x: &[T], out: &mut [f64]) {
    dot_rows_lanes(rows, x, out)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn dot_rows_avx512<T: RowFloat>(rows: &[T], x: &[T], out: &mut [f64]) {
    dot_rows_lanes(rows, x, out)
}

/// `out[j] = rows[j] · x` for a row-major `out.len() × x.len()` matrix of f32 or f64
/// (sums in [`RowFloat::LANES`] partial sums of the element type, returned as f64),
/// vectorised for the CPU's level: the exact model's single-row paths stream their support
/// vectors through this (and [`NarrowF32`] its columns for a single row below AVX-512).
///
/// # Panics
/// If `rows.len() != out.len() · x.len()`.
#[track_caller]
pub fn dot_rows<T: RowFloat>(rows: &[T], x: &[T], out: &mut [f64]) {
    dot_rows_at(crate::simd::level(), rows, x, out)
}

/// [`dot_rows`] with the instruction-set level forced (tests run every level).
///
/// # Panics
/// If the shapes differ or this CPU cannot run `level`.
#[track_caller]
pub fn dot_rows_at<T: RowFloat>(level: crate::simd::Level, rows: &[T], x: &[T], out: &mut [f64]) {
    assert_eq!(rows.len(), x.len() * out.len(), "dot_rows: shapes differ");
    assert!(
        level <= crate::simd::detected(),
        "this CPU cannot run the {} path",
        level.name()
    );
    if x.is_empty() {
        out.iter_mut().for_each(|o| *o = 0.0);
        return;
    }
    match level {
        // SAFETY: the level is supported by this CPU (checked above; AVX2 implies FMA).
        #[cfg(target_arch = "x86_64")]
        crate::simd::Level::Avx512 => unsafe { dot_rows_avx512(rows, x, out) },
        #[cfg(target_arch = "x86_64")]
        crate::simd::Level::Avx2 => unsafe { dot_rows_avx2(rows, x, out) },
        _ => dot_rows_lanes(rows, x, out),
    }
}

/// `out[j] = Σ_i x[i]·cols[i·n + j]` for a column-major `d × n` matrix (`d = x.len()`,
/// `n = out.len()`): the products of one row with `n` rows stored by column, as `d`
/// multiply-adds along contiguous memory (plain loops the compiler vectorises), summed in
/// f32 in the order of `i`.
///
/// ```
/// use kernelpress::linalg::dot_cols_f32;
/// // Rows (1, 2) and (3, 4) stored by column: [1, 3, 2, 4].
/// let mut out = [0.0; 2];
/// dot_cols_f32(&[1.0, 3.0, 2.0, 4.0], &[10.0, 1.0], &mut out);
/// assert_eq!(out, [12.0, 34.0]);
/// ```
///
/// # Panics
/// If `cols` does not hold `x.len() × out.len()` values.
#[track_caller]
pub fn dot_cols_f32(cols: &[f32], x: &[f32], out: &mut [f64]) {
    let n = out.len();
    assert_eq!(cols.len(), x.len() * n, "dot_cols_f32: shapes differ");
    const BLOCK: usize = 512;
    let mut acc = [0f32; BLOCK];
    let mut at = 0;
    while at < n {
        let w = BLOCK.min(n - at);
        let a = &mut acc[..w];
        a.iter_mut().for_each(|v| *v = 0.0);
        for (i, &xi) in x.iter().enumerate() {
            let c = &cols[i * n + at..i * n + at + w];
            for (v, &cv) in a.iter_mut().zip(c) {
                *v += xi * cv;
            }
        }
        for (o, &v) in out[at..at + w].iter_mut().zip(a.iter()) {
            *o = v as f64;
        }
        at += w;
    }
}

#[cfg(test)]
mod dot_cols_tests {
    use super::*;

    /// Against the definition in f64 (a different summation order: agreement to f32
    /// rounding), over widths that cross the 512-value block and a ragged tail.
    #[test]
    fn matches_the_definition() {
        for (d, n) in [(1, 1), (3, 7), (20, 513), (64, 1500)] {
            let rows: Vec<f32> = (0..n * d)
                .map(|i| ((i * 37 % 101) as f32 - 50.0) / 17.0)
                .collect();
            let x: Vec<f32> = (0..d).map(|i| (i as f32 * 0.3).sin()).collect();
            let mut cols = vec![0f32; d * n];
            for j in 0..n {
                for i in 0..d {
                    cols[i * n + j] = rows[j * d + i];
                }
            }
            let mut out = vec![0.0; n];
            dot_cols_f32(&cols, &x, &mut out);
            for j in 0..n {
                let want: f64 = (0..d).map(|i| rows[j * d + i] as f64 * x[i] as f64).sum();
                let scale: f64 = (0..d).map(|i| (rows[j * d + i] * x[i]).abs() as f64).sum();
                assert!(
                    (out[j] - want).abs() <= 1e-6 * scale.max(1.0),
                    "{d}×{n} at {j}"
                );
            }
        }
    }
}

#[cfg(test)]
mod dot_rows_f64_tests {
    use super::*;

    /// Every level this CPU runs against the plain sum of products (computed in a
    /// different order, so agreement is to rounding, not bits); a length that is not a
    /// multiple of the lanes exercises the tail.
    #[test]
    fn every_level_matches_the_definition() {
        let (n, d) = (37, 1027);
        let rows: Vec<f64> = (0..n * d)
            .map(|i| ((i * 5) as f64 * 0.0173).sin())
            .collect();
        let x: Vec<f64> = (0..d).map(|i| ((i * 11) as f64 * 0.031).cos()).collect();
        for level in crate::simd::available() {
            let mut got = vec![0.0; n];
            dot_rows_at(level, &rows, &x, &mut got);
            for (j, g) in got.iter().enumerate() {
                let r = &rows[j * d..(j + 1) * d];
                let want: f64 = r.iter().zip(&x).map(|(a, b)| a * b).sum();
                let mass: f64 = r.iter().zip(&x).map(|(a, b)| (a * b).abs()).sum();
                assert!(
                    (g - want).abs() <= 1e-13 * mass,
                    "{} row {j}: {g} vs {want}",
                    level.name()
                );
            }
        }
    }
}
