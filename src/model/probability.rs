//! Class probabilities from decision values: Platt's sigmoid per decision output (Platt
//! 1999, "Probabilistic outputs for support vector machines and comparisons to regularized
//! likelihood methods"), fitted by the numerically stable Newton method of Lin, Lin & Weng
//! (2007, "A note on Platt's probabilistic outputs for support vector machines"); for
//! one-vs-one models the pairwise probabilities are coupled into class probabilities by
//! method 2 of Wu, Lin & Weng (2004, "Probability estimates for multi-class classification
//! by pairwise coupling", JMLR 5), solved exactly as its linear system; one-vs-rest
//! sigmoids are normalised to sum to one (common practice).
//!
//! Conventions (the same as the decision values'): a binary model's sigmoid gives the
//! probability of the second label; a one-vs-one pair (i, j)'s sigmoid gives the
//! probability of class i against j; a one-vs-rest output's, of its class against the rest.
//! `P = 1 / (1 + exp(A·f + B))`, so a negative `A` makes a larger decision more likely.
//!
//! ```
//! use kernelpress::model::{OutputRule, Probabilities, Task};
//! use ndarray::array;
//! let rule = OutputRule::new(Task::Binary, vec!["ok".into(), "worn".into()], 1).unwrap();
//! // Decisions on held-out rows and their true labels (index into the labels).
//! let s = array![[-2.0], [-1.0], [-0.2], [0.3], [0.8], [1.5], [2.5], [-0.5]];
//! let y = [0, 0, 1, 0, 1, 1, 1, 0];
//! let p = Probabilities::fit(&rule, s.view(), &y).unwrap();
//! let probs = p.class_probabilities(&rule, array![[3.0], [-3.0]].view());
//! assert!(probs[[0, 1]] > 0.9 && probs[[1, 0]] > 0.9);
//! assert!((probs.row(0).sum() - 1.0).abs() < 1e-12);
//! ```

use super::output::{OutputRule, Task};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};

/// One sigmoid `1 / (1 + exp(A·f + B))` per decision output.
#[derive(Debug, Clone, PartialEq)]
pub struct Probabilities {
    a: Vec<f64>,
    b: Vec<f64>,
}

/// `1 / (1 + exp(A·f + B))`, computed without overflow (Lin, Lin & Weng 2007).
pub fn sigmoid(f: f64, a: f64, b: f64) -> f64 {
    let t = a * f + b;
    if t >= 0.0 {
        (-t).exp() / (1.0 + (-t).exp())
    } else {
        1.0 / (1.0 + t.exp())
    }
}

/// Platt's `(A, B)` for decisions `f` with outcomes `y` (true: the positive side), by the
/// Newton method with backtracking of Lin, Lin & Weng (2007), with Platt's targets
/// `(N₊ + 1)/(N₊ + 2)` and `1/(N₋ + 2)`. Needs at least one row.
pub fn platt_fit(f: &[f64], y: &[bool]) -> (f64, f64) {
    debug_assert_eq!(f.len(), y.len());
    let pos = y.iter().filter(|v| **v).count() as f64;
    let neg = y.len() as f64 - pos;
    let hi = (pos + 1.0) / (pos + 2.0);
    let lo = 1.0 / (neg + 2.0);
    let t: Vec<f64> = y.iter().map(|&v| if v { hi } else { lo }).collect();
    let (max_iter, min_step, sigma, eps) = (100, 1e-10, 1e-12, 1e-5);
    let mut a = 0.0;
    let mut b = ((neg + 1.0) / (pos + 1.0)).ln();
    let objective = |a: f64, b: f64| -> f64 {
        f.iter()
            .zip(&t)
            .map(|(&fi, &ti)| {
                let z = fi * a + b;
                if z >= 0.0 {
                    ti * z + (1.0 + (-z).exp()).ln()
                } else {
                    (ti - 1.0) * z + (1.0 + z.exp()).ln()
                }
            })
            .sum()
    };
    let mut fval = objective(a, b);
    for _ in 0..max_iter {
        // Gradient and Hessian (with a small ridge on the diagonal).
        let (mut h11, mut h22, mut h21, mut g1, mut g2) = (sigma, sigma, 0.0, 0.0, 0.0);
        for (&fi, &ti) in f.iter().zip(&t) {
            let z = fi * a + b;
            let (p, q) = if z >= 0.0 {
                let e = (-z).exp();
                (e / (1.0 + e), 1.0 / (1.0 + e))
            } else {
                let e = z.exp();
                (1.0 / (1.0 + e), e / (1.0 + e))
            };
            let d2 = p * q;
            h11 += fi * fi * d2;
            h22 += d2;
            h21 += fi * d2;
            let d1 = ti - p;
            g1 += fi * d1;
            g2 += d1;
        }
        if g1.abs() < eps && g2.abs() < eps {
            break;
        }
        let det = h11 * h22 - h21 * h21;
        let da = -(h22 * g1 - h21 * g2) / det;
        let db = -(-h21 * g1 + h11 * g2) / det;
        let gd = g1 * da + g2 * db;
        let mut step = 1.0;
        let mut moved = false;
        while step >= min_step {
            let (na, nb) = (a + step * da, b + step * db);
            let nf = objective(na, nb);
            if nf < fval + 1e-4 * step * gd {
                a = na;
                b = nb;
                fval = nf;
                moved = true;
                break;
            }
            step /= 2.0;
        }
        if !moved {
            break;
        }
    }
    (a, b)
}

/// Class probabilities from pairwise ones by method 2 of Wu, Lin & Weng (2004): the `p`
/// minimising `Σ_i Σ_{j≠i} (r_ji p_i − r_ij p_j)²` subject to `Σ p = 1`, from its linear
/// system `[Q e; eᵀ 0]`. `r[i][j]` is the probability of class i against j
/// (`r[j][i] = 1 − r[i][j]`); entries are clamped to [1e-7, 1 − 1e-7]. Negative
/// solutions (possible only through rounding) are clipped and the result renormalised.
pub fn couple(r: &Array2<f64>) -> Vec<f64> {
    let k = r.nrows();
    let c = |v: f64| v.clamp(1e-7, 1.0 - 1e-7);
    // Q_ii = Σ_{j≠i} r_ji², Q_ij = −r_ji r_ij.
    let n = k + 1;
    let mut m = vec![0.0; n * n];
    for i in 0..k {
        for j in 0..k {
            if i == j {
                continue;
            }
            let (rij, rji) = (c(r[[i, j]]), c(r[[j, i]]));
            m[i * n + i] += rji * rji;
            m[i * n + j] -= rji * rij;
        }
        m[i * n + k] = 1.0;
        m[k * n + i] = 1.0;
    }
    let mut rhs = vec![0.0; n];
    rhs[k] = 1.0;
    // Gaussian elimination with partial pivoting (a (k+1)² system; k is small).
    for col in 0..n {
        let piv = (col..n)
            .max_by(|&x, &y| m[x * n + col].abs().total_cmp(&m[y * n + col].abs()))
            .unwrap_or(col);
        if piv != col {
            for j in 0..n {
                m.swap(col * n + j, piv * n + j);
            }
            rhs.swap(col, piv);
        }
        let d = m[col * n + col];
        if d == 0.0 {
            continue;
        }
        for row in col + 1..n {
            let f = m[row * n + col] / d;
            if f != 0.0 {
                for j in col..n {
                    m[row * n + j] -= f * m[col * n + j];
                }
                rhs[row] -= f * rhs[col];
            }
        }
    }
    let mut x = vec![0.0; n];
    for row in (0..n).rev() {
        let mut v = rhs[row];
        for j in row + 1..n {
            v -= m[row * n + j] * x[j];
        }
        let d = m[row * n + row];
        x[row] = if d == 0.0 { 0.0 } else { v / d };
    }
    let mut p: Vec<f64> = x[..k].iter().map(|v| v.max(0.0)).collect();
    let sum: f64 = p.iter().sum();
    if sum > 0.0 && sum.is_finite() {
        p.iter_mut().for_each(|v| *v /= sum);
    } else {
        p = vec![1.0 / k as f64; k];
    }
    p
}

impl Probabilities {
    /// Sigmoids given directly (`a[j]`, `b[j]` for decision output `j`), checked: one
    /// finite pair per output of `rule`, a classifier's.
    pub fn new(rule: &OutputRule, a: Vec<f64>, b: Vec<f64>) -> Result<Probabilities> {
        if !rule.task().is_classifier() {
            return Err(Error::input(
                "probabilities are for classifiers; this model is a regression",
            ));
        }
        if a.len() != rule.outputs() || b.len() != rule.outputs() {
            return Err(Error::input(format!(
                "probability calibration: {} and {} sigmoid coefficients; expected {} each (one per decision output)",
                a.len(),
                b.len(),
                rule.outputs()
            )));
        }
        if a.iter().chain(&b).any(|v| !v.is_finite()) {
            return Err(Error::input(
                "probability calibration: a sigmoid coefficient is not finite",
            ));
        }
        Ok(Probabilities { a, b })
    }

    /// Fits one sigmoid per decision output on decisions `s` of rows with true label
    /// indices `y` (into the rule's labels): binary on every row, one-vs-one pair (i, j)
    /// on the rows of class i or j, one-vs-rest class c on every row (c against the rest).
    /// Every output needs rows on both of its sides.
    pub fn fit(rule: &OutputRule, s: ArrayView2<f64>, y: &[usize]) -> Result<Probabilities> {
        let k = rule.labels().len();
        if s.nrows() != y.len() || s.ncols() != rule.outputs() {
            return Err(Error::input(format!(
                "probability fit: {} rows of {} decisions and {} labels; expected {} decisions a row and one label per row",
                s.nrows(),
                s.ncols(),
                y.len(),
                rule.outputs()
            )));
        }
        if let Some(bad) = y.iter().find(|&&v| v >= k) {
            return Err(Error::input(format!(
                "probability fit: label index {bad} out of range for {k} classes"
            )));
        }
        let mut a = Vec::with_capacity(rule.outputs());
        let mut b = Vec::with_capacity(rule.outputs());
        let mut one = |col: usize, rows: Vec<(f64, bool)>, what: String| -> Result<()> {
            let pos = rows.iter().filter(|r| r.1).count();
            if pos == 0 || pos == rows.len() {
                return Err(Error::input(format!(
                    "probability fit: {what} needs labelled rows on both sides; found {pos} of {}",
                    rows.len()
                )));
            }
            let (f, t): (Vec<f64>, Vec<bool>) = rows.into_iter().unzip();
            let (ai, bi) = platt_fit(&f, &t);
            debug_assert_eq!(a.len(), col);
            a.push(ai);
            b.push(bi);
            Ok(())
        };
        let labels = rule.labels();
        match rule.task() {
            Task::Regression => {
                return Err(Error::input(
                    "probabilities are for classifiers; this model is a regression",
                ))
            }
            Task::Binary => one(
                0,
                (0..y.len()).map(|r| (s[[r, 0]], y[r] == 1)).collect(),
                format!("'{}' against '{}'", labels[1], labels[0]),
            )?,
            Task::Ovr => {
                for c in 0..k {
                    one(
                        c,
                        (0..y.len()).map(|r| (s[[r, c]], y[r] == c)).collect(),
                        format!("'{}' against the rest", labels[c]),
                    )?;
                }
            }
            Task::Ovo => {
                let mut p = 0;
                for i in 0..k {
                    for j in i + 1..k {
                        one(
                            p,
                            (0..y.len())
                                .filter(|&r| y[r] == i || y[r] == j)
                                .map(|r| (s[[r, p]], y[r] == i))
                                .collect(),
                            format!("the pair '{}' against '{}'", labels[i], labels[j]),
                        )?;
                        p += 1;
                    }
                }
            }
        }
        Ok(Probabilities { a, b })
    }

    /// The sigmoids' `A` coefficients, one per decision output.
    pub fn a(&self) -> &[f64] {
        &self.a
    }
    /// The sigmoids' `B` coefficients, one per decision output.
    pub fn b(&self) -> &[f64] {
        &self.b
    }

    /// Class probabilities (rows × classes, in label order, each row summing to 1) of
    /// decision values `s`.
    ///
    /// # Panics
    /// If `s` does not have one column per decision output of `rule`.
    #[track_caller]
    pub fn class_probabilities(&self, rule: &OutputRule, s: ArrayView2<f64>) -> Array2<f64> {
        assert_eq!(s.ncols(), self.a.len(), "one decision per output");
        let k = rule.labels().len();
        let mut out = Array2::zeros((s.nrows(), k));
        for (r, row) in s.rows().into_iter().enumerate() {
            match rule.task() {
                Task::Binary => {
                    let p = sigmoid(row[0], self.a[0], self.b[0]);
                    out[[r, 0]] = 1.0 - p;
                    out[[r, 1]] = p;
                }
                Task::Ovr => {
                    let p: Vec<f64> = (0..k)
                        .map(|c| sigmoid(row[c], self.a[c], self.b[c]))
                        .collect();
                    let sum: f64 = p.iter().sum();
                    for c in 0..k {
                        out[[r, c]] = if sum > 0.0 {
                            p[c] / sum
                        } else {
                            1.0 / k as f64
                        };
                    }
                }
                Task::Ovo => {
                    let mut m = Array2::zeros((k, k));
                    let mut p = 0;
                    for i in 0..k {
                        for j in i + 1..k {
                            let v = sigmoid(row[p], self.a[p], self.b[p]);
                            m[[i, j]] = v;
                            m[[j, i]] = 1.0 - v;
                            p += 1;
                        }
                    }
                    for (c, v) in couple(&m).into_iter().enumerate() {
                        out[[r, c]] = v;
                    }
                }
                Task::Regression => {}
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn coupling_of_consistent_pairs_recovers_the_classes() {
        // r_ij = p_i / (p_i + p_j) exactly: the minimum of Wu, Lin & Weng's objective is 0
        // at p itself.
        let p = [0.5, 0.3, 0.2];
        let r = Array2::from_shape_fn(
            (3, 3),
            |(i, j)| {
                if i == j {
                    0.0
                } else {
                    p[i] / (p[i] + p[j])
                }
            },
        );
        let q = couple(&r);
        for i in 0..3 {
            assert!((q[i] - p[i]).abs() < 1e-12, "{q:?}");
        }
    }

    #[test]
    fn sigmoid_is_stable_at_the_extremes() {
        assert_eq!(sigmoid(1e6, -1.0, 0.0), 1.0);
        assert_eq!(sigmoid(-1e6, -1.0, 0.0), 0.0);
        assert!((sigmoid(0.0, -1.0, 0.0) - 0.5).abs() < 1e-15);
    }
}
