//! C-SVM training by sequential minimal optimisation (Platt 1998) with the second-order
//! working-set selection of Fan, Chen & Lin (JMLR 6, 2005), a kernel-row cache of bounded
//! size, and one-vs-one for more than two classes.
//!
//! Dual: minimise `½ αᵀQα − eᵀα`, `Q_ij = y_i y_j K_ij`, `0 ≤ α ≤ C`, `yᵀα = 0`.
//! Decision: `f(x) = Σ α_i y_i k(x_i, x) + b`.

use super::{class_labels, encode};
use crate::data::Standardizer;
use crate::kernel::{Kernel, Prepared};
use crate::model::{ExactModel, Task};
use crate::{Error, Result};
use ndarray::{s, Array2, ArrayView2, Axis};
use rayon::prelude::*;
use serde_json::json;
use std::collections::VecDeque;
use std::sync::Arc;

/// Options for SMO.
#[derive(Debug, Clone)]
pub struct SmoOptions {
    /// Box constraint C > 0.
    pub c: f64,
    /// Stopping tolerance on the maximal KKT violation, `m(α) − M(α) < tol`.
    pub tol: f64,
    /// Kernel cache bound per binary solver, in bytes. When the whole Gram matrix of a
    /// sub-problem fits, it is computed at once; otherwise rows are cached, least recently
    /// used first out.
    pub cache_bytes: usize,
    /// Iteration cap per binary solver (0: `max(10⁷, 100·n)`).
    pub max_iter: usize,
}

impl Default for SmoOptions {
    fn default() -> Self {
        SmoOptions {
            c: 1.0,
            tol: 1e-3,
            cache_bytes: 256 << 20,
            max_iter: 0,
        }
    }
}

/// The solution of one binary problem.
#[derive(Debug, Clone)]
pub struct SmoSolution {
    /// Dual variables `α` (0 ≤ α ≤ C).
    pub alpha: Vec<f64>,
    /// Intercept `b` (the decision adds it).
    pub b: f64,
    /// Iterations used.
    pub iterations: usize,
    /// Final maximal violation `m − M`.
    pub gap: f64,
    /// True when the iteration cap stopped the solver before the tolerance was met.
    pub hit_cap: bool,
}

struct RowCache<'a> {
    kernel: &'a Kernel,
    x: ArrayView2<'a, f64>,
    prep: Prepared,
    full: Option<Array2<f64>>,
    rows: Vec<Option<Arc<Vec<f64>>>>,
    order: VecDeque<usize>,
    capacity: usize,
    held: usize,
}

impl<'a> RowCache<'a> {
    fn new(kernel: &'a Kernel, x: ArrayView2<'a, f64>, bytes: usize) -> Self {
        let n = x.nrows();
        let prep = Prepared::new(kernel, x);
        let full = if n.saturating_mul(n).saturating_mul(8) <= bytes {
            Some(kernel.gram_prepared(x, &prep))
        } else {
            None
        };
        RowCache {
            kernel,
            x,
            prep,
            full,
            rows: vec![None; n],
            order: VecDeque::new(),
            capacity: (bytes / (8 * n.max(1))).max(2),
            held: 0,
        }
    }

    fn row(&mut self, i: usize) -> Arc<Vec<f64>> {
        if let Some(f) = &self.full {
            return Arc::new(f.row(i).to_vec());
        }
        if let Some(r) = &self.rows[i] {
            return r.clone();
        }
        if self.held >= self.capacity {
            while let Some(old) = self.order.pop_front() {
                if self.rows[old].take().is_some() {
                    self.held -= 1;
                    break;
                }
            }
        }
        let g = self
            .kernel
            .gram_block(self.x.slice(s![i..i + 1, ..]), &self.prep);
        let r = Arc::new(g.row(0).to_vec());
        self.rows[i] = Some(r.clone());
        self.order.push_back(i);
        self.held += 1;
        r
    }

    fn row_ref<F: FnOnce(&[f64]) -> T, T>(&mut self, i: usize, f: F) -> T {
        if let Some(full) = &self.full {
            return f(full.row(i).as_slice().unwrap());
        }
        let r = self.row(i);
        f(&r)
    }
}

/// Solves one binary C-SVM on the rows of `x` with labels `y ∈ {−1, +1}`.
pub fn solve_binary(
    kernel: &Kernel,
    x: ArrayView2<f64>,
    y: &[f64],
    opts: &SmoOptions,
) -> SmoSolution {
    let n = x.nrows();
    let c = opts.c;
    let mut cache = RowCache::new(kernel, x, opts.cache_bytes);
    let qd: Vec<f64> = kernel.diag(x);
    let mut alpha = vec![0.0; n];
    let mut g = vec![-1.0; n];
    let max_iter = if opts.max_iter > 0 {
        opts.max_iter
    } else {
        (100 * n).max(10_000_000)
    };
    let tau = 1e-12;
    let mut iter = 0;
    let mut gap;
    let mut ki: Vec<f64> = vec![0.0; n];
    loop {
        // Select i: argmax over I_up of −y_t G_t.
        let mut gmax = f64::NEG_INFINITY;
        let mut i_sel = usize::MAX;
        let mut gmin = f64::INFINITY;
        for t in 0..n {
            let v = -y[t] * g[t];
            let up = (y[t] > 0.0 && alpha[t] < c) || (y[t] < 0.0 && alpha[t] > 0.0);
            let low = (y[t] < 0.0 && alpha[t] < c) || (y[t] > 0.0 && alpha[t] > 0.0);
            if up && v > gmax {
                gmax = v;
                i_sel = t;
            }
            if low && v < gmin {
                gmin = v;
            }
        }
        gap = gmax - gmin;
        if i_sel == usize::MAX || gap < opts.tol || iter >= max_iter {
            break;
        }
        let i = i_sel;
        cache.row_ref(i, |r| ki.copy_from_slice(r));
        // Select j: second-order rule among I_low with −y_t G_t < gmax.
        let mut j_sel = usize::MAX;
        let mut best = f64::INFINITY;
        for t in 0..n {
            let low = (y[t] < 0.0 && alpha[t] < c) || (y[t] > 0.0 && alpha[t] > 0.0);
            if !low {
                continue;
            }
            let v = -y[t] * g[t];
            if v < gmax {
                let b = gmax - v;
                let mut a = qd[i] + qd[t] - 2.0 * ki[t];
                if a <= 0.0 {
                    a = tau;
                }
                let obj = -(b * b) / a;
                if obj < best {
                    best = obj;
                    j_sel = t;
                }
            }
        }
        if j_sel == usize::MAX {
            break;
        }
        let j = j_sel;
        iter += 1;
        let kij = ki[j];
        let (ai_old, aj_old) = (alpha[i], alpha[j]);
        let mut quad = qd[i] + qd[j] - 2.0 * kij;
        if quad <= 0.0 {
            quad = tau;
        }
        let (mut ai, mut aj) = (ai_old, aj_old);
        if y[i] != y[j] {
            let delta = (-g[i] - g[j]) / quad;
            let diff = ai - aj;
            ai += delta;
            aj += delta;
            if diff > 0.0 {
                if aj < 0.0 {
                    aj = 0.0;
                    ai = diff;
                }
            } else if ai < 0.0 {
                ai = 0.0;
                aj = -diff;
            }
            if diff > 0.0 {
                if ai > c {
                    ai = c;
                    aj = c - diff;
                }
            } else if aj > c {
                aj = c;
                ai = c + diff;
            }
        } else {
            let delta = (g[i] - g[j]) / quad;
            let sum = ai + aj;
            ai -= delta;
            aj += delta;
            if sum > c {
                if ai > c {
                    ai = c;
                    aj = sum - c;
                }
            } else if aj < 0.0 {
                aj = 0.0;
                ai = sum;
            }
            if sum > c {
                if aj > c {
                    aj = c;
                    ai = sum - c;
                }
            } else if ai < 0.0 {
                ai = 0.0;
                aj = sum;
            }
        }
        alpha[i] = ai;
        alpha[j] = aj;
        let di = (ai - ai_old) * y[i];
        let dj = (aj - aj_old) * y[j];
        cache.row_ref(j, |kj| {
            for t in 0..n {
                // ΔG_t = Q_ti Δα_i + Q_tj Δα_j with Q_ts = y_t y_s K_ts.
                g[t] += y[t] * (ki[t] * di + kj[t] * dj);
            }
        });
    }
    // Intercept from the free variables (or the midpoint of the feasible interval).
    let (mut ub, mut lb) = (f64::INFINITY, f64::NEG_INFINITY);
    let (mut nfree, mut sfree) = (0usize, 0.0);
    for t in 0..n {
        let yg = y[t] * g[t];
        if alpha[t] >= c {
            if y[t] < 0.0 {
                ub = ub.min(yg)
            } else {
                lb = lb.max(yg)
            }
        } else if alpha[t] <= 0.0 {
            if y[t] > 0.0 {
                ub = ub.min(yg)
            } else {
                lb = lb.max(yg)
            }
        } else {
            nfree += 1;
            sfree += yg;
        }
    }
    let rho = if nfree > 0 {
        sfree / nfree as f64
    } else {
        (ub + lb) / 2.0
    };
    SmoSolution {
        alpha,
        b: -rho,
        iterations: iter,
        gap,
        hit_cap: iter >= max_iter,
    }
}

/// Trains a C-SVM on `x` (already scaled) with class labels `y`: binary for two classes,
/// one-vs-one otherwise (pairs solved in parallel; each pair is deterministic). Progress
/// and notes (a pair stopped at the iteration cap) go to `obs`.
pub fn fit_svm(
    kernel: &Kernel,
    x: ArrayView2<f64>,
    y: &[String],
    opts: &SmoOptions,
    scaling: Option<Standardizer>,
    obs: &dyn crate::observe::Observer,
) -> Result<ExactModel> {
    if !(opts.c > 0.0) || !opts.c.is_finite() {
        return Err(Error::input(format!(
            "--c {} is invalid; expected a positive finite number",
            opts.c
        )));
    }
    if !(opts.tol > 0.0) || !opts.tol.is_finite() {
        return Err(Error::input(format!(
            "--tol {} is invalid; expected a positive finite number",
            opts.tol
        )));
    }
    kernel.check_dim(x.ncols())?;
    if !kernel.is_positive_definite() {
        obs.note(&format!(
            "kernel {kernel} is not positive definite; SMO may not reach the optimum"
        ));
    }
    let labels = class_labels(y);
    let k = labels.len();
    if k < 2 {
        return Err(Error::input(format!(
            "SVM training needs at least 2 classes; the target has {k}"
        )));
    }
    let idx = encode(y, &labels)?;
    // Pairs (i, j), i < j; +1 is class i except for binary, where +1 is the second label.
    let pairs: Vec<(usize, usize)> = if k == 2 {
        vec![(0, 1)]
    } else {
        (0..k)
            .flat_map(|i| (i + 1..k).map(move |j| (i, j)))
            .collect()
    };
    obs.stage("SMO pairs", pairs.len() as u64);
    let sols: Vec<(Vec<usize>, Vec<f64>, SmoSolution)> = pairs
        .par_iter()
        .map(|&(ci, cj)| {
            let rows: Vec<usize> = (0..x.nrows())
                .filter(|&r| idx[r] == ci || idx[r] == cj)
                .collect();
            let sub = x.select(Axis(0), &rows);
            let yy: Vec<f64> = rows
                .iter()
                .map(|&r| {
                    let pos = if k == 2 { idx[r] == 1 } else { idx[r] == ci };
                    if pos {
                        1.0
                    } else {
                        -1.0
                    }
                })
                .collect();
            let sol = solve_binary(kernel, sub.view(), &yy, opts);
            obs.advance(1);
            (rows, yy, sol)
        })
        .collect();
    obs.finish();
    // Union of support vectors, in training-row order.
    let mut is_sv = vec![false; x.nrows()];
    for (rows, _, sol) in &sols {
        for (r, a) in rows.iter().zip(&sol.alpha) {
            if *a > 0.0 {
                is_sv[*r] = true;
            }
        }
    }
    let sv_rows: Vec<usize> = (0..x.nrows()).filter(|&r| is_sv[r]).collect();
    let mut pos = vec![usize::MAX; x.nrows()];
    for (p, &r) in sv_rows.iter().enumerate() {
        pos[r] = p;
    }
    let np = pairs.len();
    let mut coef = Array2::<f64>::zeros((sv_rows.len(), np));
    let mut b = vec![0.0; np];
    let mut notes = Vec::new();
    for (p, (rows, yy, sol)) in sols.iter().enumerate() {
        for ((r, a), yv) in rows.iter().zip(&sol.alpha).zip(yy) {
            if *a > 0.0 {
                coef[[pos[*r], p]] = a * yv;
            }
        }
        b[p] = sol.b;
        if sol.hit_cap {
            obs.note(&format!(
                "SMO for classes {} vs {} stopped at the iteration cap with gap {:.3e} > tol {}",
                labels[pairs[p].0], labels[pairs[p].1], sol.gap, opts.tol
            ));
        }
        notes.push(
            json!({ "pair": [pairs[p].0, pairs[p].1], "iterations": sol.iterations, "gap": sol.gap,
            "n_sv": sol.alpha.iter().filter(|a| **a > 0.0).count() }),
        );
    }
    let task = if k == 2 { Task::Binary } else { Task::Ovo };
    let mut m = ExactModel::new(
        kernel.clone(),
        x.select(Axis(0), &sv_rows),
        coef,
        b,
        task,
        labels,
        scaling,
    )?;
    m.training = json!({ "model": "svm", "c": opts.c, "tol": opts.tol, "n_train": x.nrows(),
        "cache_bytes": opts.cache_bytes, "pairs": notes });
    Ok(m)
}
