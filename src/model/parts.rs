//! Which support vectors feed which outputs, so that some of an exact model's decision
//! values can be computed without reading every support vector. In a one-vs-one
//! classifier the pair (a, b) is a sum over support vectors of classes a and b only. The
//! support vectors are copied once, ordered by the outputs they feed, so that the ones a
//! set of outputs needs lie in long runs that stream well.

use crate::kernel::{Kernel, Prepared, Prepared32};
use ndarray::{Array2, ArrayView2};

/// Support vectors ordered by their outputs of nonzero coefficient.
#[derive(Debug, Clone)]
pub(crate) struct Parts {
    words: usize,
    /// The distinct bit sets in the order of the support vectors (each set's vectors
    /// consecutive) and how many support vectors have each.
    patterns: Vec<(Vec<u64>, usize)>,
    /// The support vectors in the new order, prepared for the kernel.
    prep: Prepared,
    /// Their f32 copy, made on first use by the f32 single-row path.
    prep32: std::sync::OnceLock<Prepared32>,
    /// Their coefficients (`n × k`, row-major), in the new order.
    coef: Vec<f64>,
    k: usize,
}

fn to_bits(needed: &[bool], words: usize) -> Vec<u64> {
    let mut b = vec![0u64; words];
    for (j, &n) in needed.iter().enumerate() {
        if n {
            b[j / 64] |= 1 << (j % 64);
        }
    }
    b
}

fn meets(a: &[u64], b: &[u64]) -> bool {
    a.iter().zip(b).any(|(x, y)| x & y != 0)
}

impl Parts {
    /// Orders the rows of `sv` by the nonzero pattern of their row of `coef` (ties in
    /// their original order: deterministic) and prepares them for `kernel`.
    pub(crate) fn new(kernel: &Kernel, sv: ArrayView2<f64>, coef: ArrayView2<f64>) -> Parts {
        let (n, k) = coef.dim();
        let words = k.div_ceil(64).max(1);
        let pattern = |i: usize| -> Vec<u64> {
            let mut b = vec![0u64; words];
            for (j, &c) in coef.row(i).iter().enumerate() {
                if c != 0.0 {
                    b[j / 64] |= 1 << (j % 64);
                }
            }
            b
        };
        let pats: Vec<Vec<u64>> = (0..n).map(pattern).collect();
        let mut order: Vec<usize> = (0..n).collect();
        // Sorted by pattern read as a number from its lowest output: the support vectors
        // of one class of a one-vs-one model (whose patterns share that class's outputs)
        // end up near each other.
        order.sort_by(|&a, &b| pats[a].cmp(&pats[b]));
        let mut x = Array2::<f64>::zeros((n, sv.ncols()));
        let mut c = Vec::with_capacity(n * k);
        let mut patterns: Vec<(Vec<u64>, usize)> = Vec::new();
        for (r, &i) in order.iter().enumerate() {
            x.row_mut(r).assign(&sv.row(i));
            c.extend(coef.row(i).iter());
            match patterns.last_mut() {
                Some((p, cnt)) if *p == pats[i] => *cnt += 1,
                _ => patterns.push((pats[i].clone(), 1)),
            }
        }
        Parts {
            words,
            patterns,
            prep: Prepared::new(kernel, x.view()),
            prep32: std::sync::OnceLock::new(),
            coef: c,
            k,
        }
    }

    /// Share of all support vectors that feed one of the outputs marked in `needed`.
    pub(crate) fn share(&self, needed: &[bool]) -> f64 {
        let n = to_bits(needed, self.words);
        let read: usize = self
            .patterns
            .iter()
            .filter(|(p, _)| meets(p, &n))
            .map(|(_, c)| c)
            .sum();
        read as f64 / self.prep.rows().max(1) as f64
    }

    /// Adds to `out[j]`, for every output `j` marked in `needed`, the kernel sum over the
    /// support vectors that feed one of the marked outputs; `xs` is one scaled input row.
    pub(crate) fn add_into(&self, kernel: &Kernel, xs: &[f64], needed: &[bool], out: &mut [f64]) {
        self.add(kernel, xs, needed, out, false)
    }

    /// [`Self::add_into`] with the kernel row from the f32 copy of the support vectors
    /// ([`Kernel::row_some_f32`]), as a single-precision server runs it.
    pub(crate) fn add_into_f32(
        &self,
        kernel: &Kernel,
        xs: &[f64],
        needed: &[bool],
        out: &mut [f64],
    ) {
        self.add(kernel, xs, needed, out, true)
    }

    fn add(&self, kernel: &Kernel, xs: &[f64], needed: &[bool], out: &mut [f64], f32: bool) {
        let n = to_bits(needed, self.words);
        // The support vectors are grouped by pattern: whole groups are read or skipped.
        let mut idx: Vec<usize> = Vec::new();
        let mut at = 0;
        for (p, count) in &self.patterns {
            if meets(p, &n) {
                idx.extend(at..at + count);
            }
            at += count;
        }
        let mut kr = vec![0.0; idx.len()];
        if f32 {
            let p32 = self.prep32.get_or_init(|| Prepared32::new(&self.prep));
            kernel.row_some_f32(xs, p32, &idx, &mut kr);
        } else {
            kernel.row_some(xs, &self.prep, &idx, &mut kr);
        }
        let k = self.k;
        // Only the marked outputs' coefficients are read (a pair set is a few of many).
        let js: Vec<usize> = (0..k).filter(|&j| needed[j]).collect();
        for (&i, &kv) in idx.iter().zip(&kr) {
            let row = &self.coef[i * k..(i + 1) * k];
            for &j in &js {
                out[j] += kv * row[j];
            }
        }
    }
}
