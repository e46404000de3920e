//! Gram blocks `K(A, B)`.
//!
//! Euclidean-distance kernels go through one matrix product,
//! `‖a‖² + ‖b‖² − 2 a·b` (clamped at 0), dot-product kernels through `A·Bᵀ`; only the L1
//! Laplacian needs a direct loop. A [`Prepared`] set caches the scaled rows and norms of
//! one side (the support vectors) so that scoring does not redo them per batch.

use super::Kernel;
use crate::linalg::{self, AlignedF32};
use ndarray::{Array2, ArrayView2, Axis, Zip};

/// One side of a Gram block with what every kernel in the expression needs precomputed.
///
/// ```
/// use kernelpress::kernel::{Kernel, Prepared};
/// use ndarray::array;
/// let k: Kernel = "gaussian(gamma=1)".parse().unwrap();
/// let sv = array![[0.0, 0.0], [1.0, 0.0]];
/// let prep = Prepared::new(&k, sv.view());
/// let g = k.gram_prepared(array![[0.0, 0.0]].view(), &prep);
/// assert!((g[[0, 1]] - (-1.0f64).exp()).abs() < 1e-15);
/// ```
#[derive(Debug, Clone)]
pub struct Prepared {
    rows: usize,
    cols: usize,
    node: Node,
}

#[derive(Debug, Clone)]
enum Node {
    /// Scaled rows and their squared norms.
    Euclid { scaled: Array2<f64>, sq: Vec<f64> },
    /// Scaled rows for the L1 distance.
    L1 { scaled: Array2<f64> },
    /// Raw rows and their norms (dot-product kernels).
    Dot { data: Array2<f64>, norms: Vec<f64> },
    /// Children of a sum or product.
    Many(Vec<Node>),
    /// Child of a scaled kernel.
    One(Box<Node>),
}

fn scale_rows(a: ArrayView2<f64>, s: &[f64]) -> Array2<f64> {
    let mut out = a.to_owned();
    for mut row in out.rows_mut() {
        for (v, f) in row.iter_mut().zip(s) {
            *v *= f;
        }
    }
    out
}

fn build(k: &Kernel, a: ArrayView2<f64>) -> Node {
    match k {
        Kernel::Laplacian { .. } => Node::L1 {
            scaled: scale_rows(a, &k.inverse_scale(a.ncols()).unwrap()),
        },
        k if k.is_shift_invariant() => {
            let scaled = scale_rows(a, &k.inverse_scale(a.ncols()).unwrap());
            let sq = scaled.rows().into_iter().map(|r| r.dot(&r)).collect();
            Node::Euclid { scaled, sq }
        }
        Kernel::Sum(v) | Kernel::Product(v) => Node::Many(v.iter().map(|c| build(c, a)).collect()),
        Kernel::Scaled(_, c) => Node::One(Box::new(build(c, a))),
        _ => Node::Dot {
            data: a.as_standard_layout().into_owned(),
            norms: a.rows().into_iter().map(|r| r.dot(&r).sqrt()).collect(),
        },
    }
}

impl Prepared {
    /// Precomputes what `k` needs of the rows of `a`. Call [`Kernel::check_dim`] first.
    pub fn new(k: &Kernel, a: ArrayView2<f64>) -> Prepared {
        Prepared {
            rows: a.nrows(),
            cols: a.ncols(),
            node: build(k, a),
        }
    }

    /// Number of rows.
    pub fn rows(&self) -> usize {
        self.rows
    }
}

fn block(k: &Kernel, a: &Node, b: &Node) -> Array2<f64> {
    match (k, a, b) {
        (Kernel::Sum(ks), Node::Many(na), Node::Many(nb)) => {
            let mut acc = block(&ks[0], &na[0], &nb[0]);
            for i in 1..ks.len() {
                acc += &block(&ks[i], &na[i], &nb[i]);
            }
            acc
        }
        (Kernel::Product(ks), Node::Many(na), Node::Many(nb)) => {
            let mut acc = block(&ks[0], &na[0], &nb[0]);
            for i in 1..ks.len() {
                acc *= &block(&ks[i], &na[i], &nb[i]);
            }
            acc
        }
        (Kernel::Scaled(c, inner), Node::One(na), Node::One(nb)) => {
            let mut g = block(inner, na, nb);
            g.mapv_inplace(|v| v * c);
            g
        }
        (k, Node::Euclid { scaled: sa, sq: qa }, Node::Euclid { scaled: sb, sq: qb }) => {
            let mut g = linalg::abt_seq(sa.view(), sb.view());
            if matches!(k, Kernel::Gaussian { .. }) {
                // The hot case: a vectorised exponential over each row.
                for (i, mut row) in g.axis_iter_mut(Axis(0)).enumerate() {
                    let r = row.as_slice_mut().expect("a fresh product is row-major");
                    crate::transform::expo::gaussian_row(r, qa[i], qb, 0.5);
                }
                return g;
            }
            for (i, mut row) in g.axis_iter_mut(Axis(0)).enumerate() {
                for (j, v) in row.iter_mut().enumerate() {
                    let r2 = (qa[i] + qb[j] - 2.0 * *v).max(0.0);
                    *v = k.euclidean_profile(r2).unwrap();
                }
            }
            g
        }
        (_, Node::L1 { scaled: sa }, Node::L1 { scaled: sb }) => {
            let mut g = Array2::<f64>::zeros((sa.nrows(), sb.nrows()));
            Zip::from(g.rows_mut())
                .and(sa.rows())
                .for_each(|mut grow, arow| {
                    for (v, brow) in grow.iter_mut().zip(sb.rows()) {
                        let l1: f64 = arow.iter().zip(brow).map(|(x, y)| (x - y).abs()).sum();
                        *v = (-l1).exp();
                    }
                });
            g
        }
        (
            k,
            Node::Dot {
                data: da,
                norms: na,
            },
            Node::Dot {
                data: db,
                norms: nb,
            },
        ) => {
            let mut g = linalg::abt_seq(da.view(), db.view());
            for (i, mut row) in g.axis_iter_mut(Axis(0)).enumerate() {
                for (j, v) in row.iter_mut().enumerate() {
                    *v = k.dot_profile(*v, na[i], nb[j]).unwrap();
                }
            }
            g
        }
        _ => unreachable!("Prepared built for a different kernel"),
    }
}

impl Kernel {
    /// The Gram block `K(a, b)` (`a.nrows() × b.nrows()`), in parallel over fixed row
    /// chunks of `a` (deterministic).
    ///
    /// # Panics
    /// If `a` and `b` have different numbers of columns.
    #[track_caller]
    pub fn gram(&self, a: ArrayView2<f64>, b: ArrayView2<f64>) -> Array2<f64> {
        assert_eq!(a.ncols(), b.ncols(), "gram: inputs of different widths");
        let pb = Prepared::new(self, b);
        self.gram_prepared(a, &pb)
    }

    /// `K(a, b)` with `b` prepared once.
    pub fn gram_prepared(&self, a: ArrayView2<f64>, b: &Prepared) -> Array2<f64> {
        linalg::map_row_chunks(a, b.rows, |chunk| {
            let pa = Prepared::new(self, chunk);
            block(self, &pa.node, &b.node)
        })
    }

    /// `K(a, b)` for a small block, sequentially (for callers that are already parallel).
    pub fn gram_block(&self, a: ArrayView2<f64>, b: &Prepared) -> Array2<f64> {
        let pa = Prepared::new(self, a);
        block(self, &pa.node, &b.node)
    }

    /// The diagonal `k(x_i, x_i)` of the rows of `a`.
    pub fn diag(&self, a: ArrayView2<f64>) -> Vec<f64> {
        if let Some(c) = self.diagonal_constant() {
            return vec![c; a.nrows()];
        }
        a.rows()
            .into_iter()
            .map(|r| {
                let v = r.to_vec();
                self.eval(&v, &v)
            })
            .collect()
    }
}

/// One side of a Gram block stored in f32 (half the bytes of [`Prepared`]), for the exact
/// model's single-row f32 path: products in f32, norms, kernel profiles and everything
/// after them in f64. Built from a [`Prepared`] set.
///
/// ```
/// use kernelpress::kernel::{Kernel, Prepared, Prepared32};
/// use ndarray::array;
/// let k: Kernel = "gaussian(gamma=1)".parse().unwrap();
/// let sv = array![[0.0, 0.0], [1.0, 0.0]];
/// let p32 = Prepared32::new(&Prepared::new(&k, sv.view()));
/// let mut row = [0.0; 2];
/// k.row_f32(&[0.0, 0.0], &p32, &mut row);
/// assert!((row[1] - (-1.0f64).exp()).abs() < 1e-6);
/// ```
#[derive(Debug, Clone)]
pub struct Prepared32 {
    rows: usize,
    cols: usize,
    node: Node32,
}

#[derive(Debug, Clone)]
enum Node32 {
    /// Scaled rows (row-major) and the squared norms of their f32 values (in f64 for
    /// the single-row path, rounded to f32 for the batches).
    Euclid {
        scaled: AlignedF32,
        sq: Vec<f64>,
        sq32: Vec<f32>,
        /// For narrow rows (`d ≤ NARROW`), the same values column-major (`d × n`): one
        /// row's products then run along the support vectors, `d` multiply-adds over
        /// contiguous memory, instead of `n` dot products too short to fill a vector.
        cols: Option<Vec<f32>>,
    },
    L1 {
        scaled: AlignedF32,
    },
    Dot {
        data: AlignedF32,
        norms: Vec<f64>,
    },
    Many(Vec<Node32>),
    One(Box<Node32>),
}

/// The rows in f32 from a 64-byte boundary (rows of a multiple of 16 values, such as
/// 784-pixel images, then all start on a cache line).
fn to32(a: &Array2<f64>) -> AlignedF32 {
    AlignedF32::from_iter_exact(a.len(), a.iter().map(|&v| v as f32))
}

fn sq_norms32(v: &[f32], d: usize) -> Vec<f64> {
    v.chunks_exact(d.max(1))
        .map(|r| r.iter().map(|&x| x as f64 * x as f64).sum())
        .collect()
}

/// Input widths up to which one f32 row against a set uses the column-major copy.
/// Measured on the 20-column, 4,598-vector SVM of docs/measurements.md ("Exact f32 on
/// narrow inputs"): row-major dot products of 20 values made the f32 row slower than f64.
const NARROW: usize = 64;

fn build32(n: &Node) -> Node32 {
    match n {
        Node::Euclid { scaled, .. } => {
            let v = to32(scaled);
            let d = scaled.ncols();
            let sq = sq_norms32(&v, d);
            let sq32 = sq.iter().map(|&q| q as f32).collect();
            let rows = scaled.nrows();
            let cols = (d <= NARROW && d > 0).then(|| {
                let mut c = vec![0f32; d * rows];
                for (j, r) in v.chunks_exact(d).enumerate() {
                    for (i, x) in r.iter().enumerate() {
                        c[i * rows + j] = *x;
                    }
                }
                c
            });
            Node32::Euclid {
                scaled: v,
                sq,
                sq32,
                cols,
            }
        }
        Node::L1 { scaled } => Node32::L1 {
            scaled: to32(scaled),
        },
        Node::Dot { data, norms } => Node32::Dot {
            data: to32(data),
            norms: norms.clone(),
        },
        Node::Many(v) => Node32::Many(v.iter().map(build32).collect()),
        Node::One(c) => Node32::One(Box::new(build32(c))),
    }
}

impl Prepared32 {
    /// The f32 copy of a prepared set.
    pub fn new(p: &Prepared) -> Prepared32 {
        Prepared32 {
            rows: p.rows,
            cols: p.cols,
            node: build32(&p.node),
        }
    }

    /// Number of rows.
    pub fn rows(&self) -> usize {
        self.rows
    }

    /// Bytes of the f32 rows (what one row against the set streams).
    pub fn bytes(&self) -> usize {
        fn b(n: &Node32) -> usize {
            match n {
                Node32::Euclid {
                    scaled, sq, cols, ..
                } => 4 * scaled.len() + 8 * sq.len() + cols.as_ref().map_or(0, |c| 4 * c.len()),
                Node32::L1 { scaled } => 4 * scaled.len(),
                Node32::Dot { data, norms } => 4 * data.len() + 8 * norms.len(),
                Node32::Many(v) => v.iter().map(b).sum(),
                Node32::One(c) => b(c),
            }
        }
        b(&self.node)
    }
}

fn row32(k: &Kernel, x: &[f64], b: &Node32, out: &mut [f64]) {
    let d = x.len();
    match (k, b) {
        (Kernel::Sum(ks), Node32::Many(nb)) => {
            row32(&ks[0], x, &nb[0], out);
            let mut tmp = vec![0.0; out.len()];
            for i in 1..ks.len() {
                row32(&ks[i], x, &nb[i], &mut tmp);
                out.iter_mut().zip(&tmp).for_each(|(o, t)| *o += t);
            }
        }
        (Kernel::Product(ks), Node32::Many(nb)) => {
            row32(&ks[0], x, &nb[0], out);
            let mut tmp = vec![0.0; out.len()];
            for i in 1..ks.len() {
                row32(&ks[i], x, &nb[i], &mut tmp);
                out.iter_mut().zip(&tmp).for_each(|(o, t)| *o *= t);
            }
        }
        (Kernel::Scaled(c, inner), Node32::One(nb)) => {
            row32(inner, x, nb, out);
            out.iter_mut().for_each(|v| *v *= c);
        }
        (
            k,
            Node32::Euclid {
                scaled, sq, cols, ..
            },
        ) => {
            let s = k.inverse_scale(d).expect("shift-invariant");
            let xs: Vec<f32> = x.iter().zip(&s).map(|(v, f)| (v * f) as f32).collect();
            let qa: f64 = xs.iter().map(|&v| v as f64 * v as f64).sum();
            match cols {
                Some(c) => linalg::dot_cols_f32(c, &xs, out),
                None => linalg::dot_rows(scaled, &xs, out),
            }
            if matches!(k, Kernel::Gaussian { .. }) {
                crate::transform::expo::gaussian_row(out, qa, sq, 0.5);
                return;
            }
            for (v, qb) in out.iter_mut().zip(sq) {
                let r2 = (qa + qb - 2.0 * *v).max(0.0);
                *v = k.euclidean_profile(r2).unwrap();
            }
        }
        (k, Node32::L1 { scaled }) => {
            let s = k.inverse_scale(d).expect("laplacian");
            let xs: Vec<f32> = x.iter().zip(&s).map(|(v, f)| (v * f) as f32).collect();
            for (v, r) in out.iter_mut().zip(scaled.chunks_exact(d.max(1))) {
                let l1: f32 = r.iter().zip(&xs).map(|(a, b)| (a - b).abs()).sum();
                *v = (-(l1 as f64)).exp();
            }
        }
        (k, Node32::Dot { data, norms }) => {
            let xs: Vec<f32> = x.iter().map(|&v| v as f32).collect();
            let na = x.iter().map(|v| v * v).sum::<f64>().sqrt();
            linalg::dot_rows(data, &xs, out);
            for (v, nb) in out.iter_mut().zip(norms) {
                *v = k.dot_profile(*v, na, *nb).unwrap();
            }
        }
        _ => unreachable!("Prepared32 built for a different kernel"),
    }
}

/// [`row32`] for the rows `idx` of `b` only (ascending): runs of consecutive rows through
/// the vectorised row products in one call each.
fn row32_some(k: &Kernel, x: &[f64], b: &Node32, idx: &[usize], out: &mut [f64]) {
    let d = x.len();
    match (k, b) {
        (Kernel::Sum(ks), Node32::Many(nb)) => {
            row32_some(&ks[0], x, &nb[0], idx, out);
            let mut tmp = vec![0.0; out.len()];
            for i in 1..ks.len() {
                row32_some(&ks[i], x, &nb[i], idx, &mut tmp);
                out.iter_mut().zip(&tmp).for_each(|(o, t)| *o += t);
            }
        }
        (Kernel::Product(ks), Node32::Many(nb)) => {
            row32_some(&ks[0], x, &nb[0], idx, out);
            let mut tmp = vec![0.0; out.len()];
            for i in 1..ks.len() {
                row32_some(&ks[i], x, &nb[i], idx, &mut tmp);
                out.iter_mut().zip(&tmp).for_each(|(o, t)| *o *= t);
            }
        }
        (Kernel::Scaled(c, inner), Node32::One(nb)) => {
            row32_some(inner, x, nb, idx, out);
            out.iter_mut().for_each(|v| *v *= c);
        }
        (k, Node32::Euclid { scaled, sq, .. }) => {
            let s = k.inverse_scale(d).expect("shift-invariant");
            let xs: Vec<f32> = x.iter().zip(&s).map(|(v, f)| (v * f) as f32).collect();
            let qa: f64 = xs.iter().map(|&v| v as f64 * v as f64).sum();
            dots32(scaled, &xs, idx, out);
            let qb: Vec<f64> = idx.iter().map(|&i| sq[i]).collect();
            if matches!(k, Kernel::Gaussian { .. }) {
                crate::transform::expo::gaussian_row(out, qa, &qb, 0.5);
                return;
            }
            for (v, qb) in out.iter_mut().zip(&qb) {
                let r2 = (qa + qb - 2.0 * *v).max(0.0);
                *v = k.euclidean_profile(r2).unwrap();
            }
        }
        (k, Node32::L1 { scaled }) => {
            let s = k.inverse_scale(d).expect("laplacian");
            let xs: Vec<f32> = x.iter().zip(&s).map(|(v, f)| (v * f) as f32).collect();
            for (v, &i) in out.iter_mut().zip(idx) {
                let r = &scaled[i * d..(i + 1) * d];
                let l1: f32 = r.iter().zip(&xs).map(|(a, b)| (a - b).abs()).sum();
                *v = (-(l1 as f64)).exp();
            }
        }
        (k, Node32::Dot { data, norms }) => {
            let xs: Vec<f32> = x.iter().map(|&v| v as f32).collect();
            let na = x.iter().map(|v| v * v).sum::<f64>().sqrt();
            dots32(data, &xs, idx, out);
            for (v, &i) in out.iter_mut().zip(idx) {
                *v = k.dot_profile(*v, na, norms[i]).unwrap();
            }
        }
        _ => unreachable!("Prepared32 built for a different kernel"),
    }
}

/// Row products of the rows `idx` (ascending) of the row-major f32 matrix `all` (rows of
/// `x.len()` values) with `x`, consecutive rows in one call.
fn dots32(all: &[f32], x: &[f32], idx: &[usize], out: &mut [f64]) {
    let d = x.len();
    let mut t = 0;
    while t < idx.len() {
        let mut e = t + 1;
        while e < idx.len() && idx[e] == idx[e - 1] + 1 {
            e += 1;
        }
        let (lo, hi) = (idx[t], idx[e - 1] + 1);
        linalg::dot_rows(&all[lo * d..hi * d], x, &mut out[t..e]);
        t = e;
    }
}

impl Kernel {
    /// [`Kernel::row_f32`] for the rows `idx` of `b` only (ascending indices), into `out`
    /// (`idx.len()` values): reads only those rows. Agrees with [`Kernel::row_f32`] on
    /// them.
    ///
    /// # Panics
    /// If `out` and `idx` differ in length, or an index is out of range or out of order.
    #[track_caller]
    pub fn row_some_f32(&self, x: &[f64], b: &Prepared32, idx: &[usize], out: &mut [f64]) {
        assert_eq!(out.len(), idx.len(), "row_some_f32: output length");
        assert!(
            idx.windows(2).all(|w| w[0] < w[1]) && idx.last().is_none_or(|&i| i < b.rows),
            "row_some_f32: indices must ascend within the rows"
        );
        row32_some(self, x, &b.node, idx, out)
    }

    /// One kernel row `k(x, b_j)` for all rows of `b` (f32 products, f64 profiles), into
    /// `out` (`b.rows()` values).
    ///
    /// # Panics
    /// If `out` does not have `b.rows()` values.
    #[track_caller]
    pub fn row_f32(&self, x: &[f64], b: &Prepared32, out: &mut [f64]) {
        assert_eq!(out.len(), b.rows, "row_f32: output length");
        row32(self, x, &b.node, out)
    }
}

/// `K(a, b)` in f32 (row-major, `a.rows × b.rows`) for two f32 sides: one f32 matrix
/// product, then the Gaussian profile through the vectorised f32 exponential; other
/// profiles per entry in f64.
fn block32(k: &Kernel, a: &Node32, b: &Node32, m: usize, n: usize) -> Vec<f32> {
    match (k, a, b) {
        (Kernel::Sum(ks), Node32::Many(na), Node32::Many(nb)) => {
            let mut acc = block32(&ks[0], &na[0], &nb[0], m, n);
            for i in 1..ks.len() {
                let t = block32(&ks[i], &na[i], &nb[i], m, n);
                acc.iter_mut().zip(&t).for_each(|(o, v)| *o += v);
            }
            acc
        }
        (Kernel::Product(ks), Node32::Many(na), Node32::Many(nb)) => {
            let mut acc = block32(&ks[0], &na[0], &nb[0], m, n);
            for i in 1..ks.len() {
                let t = block32(&ks[i], &na[i], &nb[i], m, n);
                acc.iter_mut().zip(&t).for_each(|(o, v)| *o *= v);
            }
            acc
        }
        (Kernel::Scaled(c, inner), Node32::One(na), Node32::One(nb)) => {
            let mut g = block32(inner, na, nb, m, n);
            let c = *c as f32;
            g.iter_mut().for_each(|v| *v *= c);
            g
        }
        (
            k,
            Node32::Euclid {
                scaled: sa, sq: qa, ..
            },
            Node32::Euclid {
                scaled: sb,
                sq: qb,
                sq32,
                ..
            },
        ) => {
            let d = sa.len() / m.max(1);
            let mut g = vec![0f32; m * n];
            linalg::abt_f32(sa, sb, d, &mut g);
            if n == 0 {
                return g;
            }
            for (i, row) in g.chunks_exact_mut(n).enumerate() {
                if matches!(k, Kernel::Gaussian { .. }) {
                    crate::transform::expo::gaussian_row(row, qa[i] as f32, sq32, 0.5);
                    continue;
                }
                for (v, q) in row.iter_mut().zip(qb) {
                    let r2 = (qa[i] + q - 2.0 * *v as f64).max(0.0);
                    *v = k.euclidean_profile(r2).unwrap() as f32;
                }
            }
            g
        }
        (_, Node32::L1 { scaled: sa }, Node32::L1 { scaled: sb }) => {
            let d = sa.len() / m.max(1);
            let mut g = vec![0f32; m * n];
            for (i, grow) in g.chunks_exact_mut(n.max(1)).enumerate().take(m) {
                let arow = &sa[i * d..(i + 1) * d];
                for (v, brow) in grow.iter_mut().zip(sb.chunks_exact(d.max(1))) {
                    let l1: f32 = arow.iter().zip(brow).map(|(x, y)| (x - y).abs()).sum();
                    *v = (-(l1 as f64)).exp() as f32;
                }
            }
            g
        }
        (
            k,
            Node32::Dot {
                data: da,
                norms: na,
            },
            Node32::Dot {
                data: db,
                norms: nb,
            },
        ) => {
            let d = da.len() / m.max(1);
            let mut g = vec![0f32; m * n];
            linalg::abt_f32(da, db, d, &mut g);
            if n == 0 {
                return g;
            }
            for (i, row) in g.chunks_exact_mut(n).enumerate() {
                for (v, nbj) in row.iter_mut().zip(nb) {
                    *v = k.dot_profile(*v as f64, na[i], *nbj).unwrap() as f32;
                }
            }
            g
        }
        _ => unreachable!("Prepared32 built for a different kernel"),
    }
}

impl Kernel {
    /// `K(a, b)` in f32 for a block of (scaled) rows `a` against an f32 set `b`,
    /// sequentially (for callers that are already parallel): row-major, `a.nrows() ×
    /// b.rows()`. Products in f32; the Gaussian profile in f32 through a vectorised
    /// exponential, other profiles in f64 per entry. Agrees with [`Kernel::gram_block`] to
    /// f32 rounding (relative to the norms the products cancel).
    ///
    /// # Panics
    /// If `a` does not have the width of `b`'s rows.
    ///
    /// ```
    /// use kernelpress::kernel::{Kernel, Prepared, Prepared32};
    /// use ndarray::array;
    /// let k: Kernel = "gaussian(gamma=1)".parse().unwrap();
    /// let sv = array![[0.0, 0.0], [1.0, 0.0]];
    /// let p32 = Prepared32::new(&Prepared::new(&k, sv.view()));
    /// let g = k.gram_block_f32(array![[0.0, 0.0], [1.0, 0.0]].view(), &p32);
    /// assert!((g[1] - (-1.0f32).exp()).abs() < 1e-6 && (g[3] - 1.0).abs() < 1e-6);
    /// ```
    #[track_caller]
    pub fn gram_block_f32(&self, a: ArrayView2<f64>, b: &Prepared32) -> Vec<f32> {
        assert_eq!(
            a.ncols(),
            b.cols,
            "gram_block_f32: inputs of different widths"
        );
        let pa = Prepared32::new(&Prepared::new(self, a));
        block32(self, &pa.node, &b.node, a.nrows(), b.rows)
    }
}

/// Kernel values `k(x, b_i)` for the rows `idx` of `b` (ascending), into `out`
/// (`idx.len()` values).
fn row64(k: &Kernel, x: &[f64], b: &Node, idx: &[usize], out: &mut [f64]) {
    match (k, b) {
        (Kernel::Sum(ks), Node::Many(nb)) => {
            row64(&ks[0], x, &nb[0], idx, out);
            let mut tmp = vec![0.0; out.len()];
            for i in 1..ks.len() {
                row64(&ks[i], x, &nb[i], idx, &mut tmp);
                out.iter_mut().zip(&tmp).for_each(|(o, t)| *o += t);
            }
        }
        (Kernel::Product(ks), Node::Many(nb)) => {
            row64(&ks[0], x, &nb[0], idx, out);
            let mut tmp = vec![0.0; out.len()];
            for i in 1..ks.len() {
                row64(&ks[i], x, &nb[i], idx, &mut tmp);
                out.iter_mut().zip(&tmp).for_each(|(o, t)| *o *= t);
            }
        }
        (Kernel::Scaled(c, inner), Node::One(nb)) => {
            row64(inner, x, nb, idx, out);
            out.iter_mut().for_each(|v| *v *= c);
        }
        (k, Node::Euclid { scaled, sq }) => {
            let s = k.inverse_scale(x.len()).expect("shift-invariant");
            let xs: Vec<f64> = x.iter().zip(&s).map(|(v, f)| v * f).collect();
            let qa: f64 = xs.iter().map(|v| v * v).sum();
            dots(scaled, &xs, idx, out);
            let qb: Vec<f64> = idx.iter().map(|&i| sq[i]).collect();
            if matches!(k, Kernel::Gaussian { .. }) {
                crate::transform::expo::gaussian_row(out, qa, &qb, 0.5);
                return;
            }
            for (v, qb) in out.iter_mut().zip(&qb) {
                let r2 = (qa + qb - 2.0 * *v).max(0.0);
                *v = k.euclidean_profile(r2).unwrap();
            }
        }
        (k, Node::L1 { scaled }) => {
            let s = k.inverse_scale(x.len()).expect("laplacian");
            let xs: Vec<f64> = x.iter().zip(&s).map(|(v, f)| v * f).collect();
            for (v, &i) in out.iter_mut().zip(idx) {
                let l1: f64 = scaled
                    .row(i)
                    .iter()
                    .zip(&xs)
                    .map(|(a, b)| (a - b).abs())
                    .sum();
                *v = (-l1).exp();
            }
        }
        (k, Node::Dot { data, norms }) => {
            let na = x.iter().map(|v| v * v).sum::<f64>().sqrt();
            dots(data, x, idx, out);
            for (v, &i) in out.iter_mut().zip(idx) {
                *v = k.dot_profile(*v, na, norms[i]).unwrap();
            }
        }
        _ => unreachable!("Prepared built for a different kernel"),
    }
}

/// `out[t] = a[idx[t]] · x`: runs of consecutive rows go through the vectorised row kernel
/// in one call when `a` is row-major.
fn dots(a: &Array2<f64>, x: &[f64], idx: &[usize], out: &mut [f64]) {
    let d = x.len();
    let Some(all) = a.as_slice() else {
        for (o, &i) in out.iter_mut().zip(idx) {
            *o = a.row(i).iter().zip(x).map(|(p, q)| p * q).sum();
        }
        return;
    };
    let mut t = 0;
    while t < idx.len() {
        let mut e = t + 1;
        while e < idx.len() && idx[e] == idx[e - 1] + 1 {
            e += 1;
        }
        let (lo, hi) = (idx[t], idx[e - 1] + 1);
        linalg::dot_rows(&all[lo * d..hi * d], x, &mut out[t..e]);
        t = e;
    }
}

impl Kernel {
    /// Kernel values `k(x, b_i)` for the rows `idx` of `b` only (ascending indices), into
    /// `out` (`idx.len()` values): reads only those rows, consecutive ones through the
    /// vectorised row products in one call. Agrees with [`Kernel::gram_prepared`] to
    /// rounding.
    ///
    /// # Panics
    /// If `out` and `idx` differ in length, or an index is out of range or out of order.
    ///
    /// ```
    /// use kernelpress::kernel::{Kernel, Prepared};
    /// use ndarray::array;
    /// let k: Kernel = "gaussian(gamma=1)".parse().unwrap();
    /// let sv = array![[0.0, 0.0], [1.0, 0.0], [0.0, 2.0]];
    /// let p = Prepared::new(&k, sv.view());
    /// let g = k.gram_prepared(array![[0.0, 0.0]].view(), &p);
    /// // Only the first and the third.
    /// let mut some = [0.0; 2];
    /// k.row_some(&[0.0, 0.0], &p, &[0, 2], &mut some);
    /// assert!((some[0] - g[[0, 0]]).abs() < 1e-15 && (some[1] - g[[0, 2]]).abs() < 1e-15);
    /// ```
    #[track_caller]
    pub fn row_some(&self, x: &[f64], b: &Prepared, idx: &[usize], out: &mut [f64]) {
        assert_eq!(out.len(), idx.len(), "row_some: output length");
        assert!(
            idx.windows(2).all(|w| w[0] < w[1]) && idx.last().is_none_or(|&i| i < b.rows),
            "row_some: indices must ascend within the rows"
        );
        row64(self, x, &b.node, idx, out)
    }
}
