//! Sampled feature maps and how they apply themselves to a batch.
//!
//! Storage and cost per input row (`d` inputs, `d'` = next power of two, `m` frequencies,
//! `D` outputs):
//!
//! | node | stored floats | flops per row |
//! |---|---|---|
//! | dense frequencies (`fourier`, `orthogonal`, `quasi`) | `m·d` (+`m` phases) | `2·m·d` + `m` trig |
//! | `hadamard` (3 sign diagonals per block) | `3·d'` per block | `3·d'·log₂d'` per block + trig |
//! | `fastfood` (B, Π, G, S per block) | `4·d'` per block | `2·d'·log₂d' + 4·d'` per block + trig |
//! | `nystrom` (landmarks, projection) | `L·d + L·r` | kernel block `≈3·L·d` + `2·L·r` |
//! | `maclaurin` (Rademacher rows) | `Σ N_i · d` | `2·Σ N_i · d` |
//! | `tensorsketch` (hashes, signs) | `2·p·(d+1)` | `p` FFTs of length D: `≈5·p·D·log₂D` |
//! | `relu` (Gaussian rows) | `D·d` | `2·D·d` |
//! | `identity` | 0 | 0 |

use crate::kernel::{Kernel, Prepared};
use crate::linalg;
use crate::model::TensorFile;
use crate::transform::wht_in_place;
use crate::{Error, Result};
use ndarray::{s, Array2, ArrayView2, ArrayViewMut2, Axis};
use rayon::prelude::*;
use serde_json::{json, Value};
use std::sync::{Arc, OnceLock};

/// How frequencies are stored.
#[derive(Debug, Clone)]
pub enum Freq {
    /// An explicit `m × d` matrix.
    Dense(Array2<f64>),
    /// Structured orthogonal blocks: `W x = d'^{-1} · H D₁ H D₂ H D₃ x` per block
    /// (`signs` is `3·blocks × d'`, rows D₁, D₂, D₃ of each block).
    Hadamard {
        /// Input dimension before padding.
        d: usize,
        /// Padded dimension (power of two).
        d_pad: usize,
        /// Frequencies used (first `m` of the stacked blocks).
        m: usize,
        /// ±1 diagonals.
        signs: Array2<f64>,
    },
    /// Fastfood blocks: `V x = d'^{-1/2} · S H G Π H B x`.
    Fastfood {
        /// Input dimension before padding.
        d: usize,
        /// Padded dimension.
        d_pad: usize,
        /// Frequencies used.
        m: usize,
        /// `blocks × d'` ±1.
        b: Array2<f64>,
        /// `blocks × d'` permutation (as indices).
        perm: Vec<Vec<u32>>,
        /// `blocks × d'` Gaussian diagonal.
        g: Array2<f64>,
        /// `blocks × d'` row scales `s_i/‖G‖`.
        scale: Array2<f64>,
    },
}

impl Freq {
    /// Number of frequencies.
    pub fn m(&self) -> usize {
        match self {
            Freq::Dense(w) => w.nrows(),
            Freq::Hadamard { m, .. } | Freq::Fastfood { m, .. } => *m,
        }
    }

    /// The frequencies as an explicit `m × d` matrix (for tests and export).
    pub fn dense(&self, d: usize) -> Array2<f64> {
        match self {
            Freq::Dense(w) => w.clone(),
            _ => {
                let eye = Array2::<f64>::eye(d);
                let p = self.project(eye.view());
                p.t().to_owned()
            }
        }
    }

    /// `x · Wᵀ` for a chunk of (already scaled) rows: `n × m`.
    pub fn project(&self, x: ArrayView2<f64>) -> Array2<f64> {
        match self {
            Freq::Dense(w) => linalg::abt_seq(x, w.view()),
            Freq::Hadamard { d, d_pad, m, signs } => {
                let blocks = signs.nrows() / 3;
                let mut out = Array2::zeros((x.nrows(), *m));
                let mut buf = vec![0.0; *d_pad];
                let norm = 1.0 / *d_pad as f64;
                for (r, xr) in x.rows().into_iter().enumerate() {
                    for bl in 0..blocks {
                        let start = bl * d_pad;
                        if start >= *m {
                            break;
                        }
                        buf.iter_mut().for_each(|v| *v = 0.0);
                        for (j, v) in xr.iter().enumerate().take(*d) {
                            buf[j] = *v;
                        }
                        for step in [2usize, 1, 0] {
                            let sg = signs.row(3 * bl + step);
                            buf.iter_mut().zip(sg.iter()).for_each(|(v, s)| *v *= s);
                            wht_in_place(&mut buf);
                        }
                        let take = (*m - start).min(*d_pad);
                        for i in 0..take {
                            out[[r, start + i]] = buf[i] * norm;
                        }
                    }
                }
                out
            }
            Freq::Fastfood {
                d,
                d_pad,
                m,
                b,
                perm,
                g,
                scale,
            } => {
                let blocks = b.nrows();
                let mut out = Array2::zeros((x.nrows(), *m));
                let mut buf = vec![0.0; *d_pad];
                let mut tmp = vec![0.0; *d_pad];
                let norm = 1.0 / (*d_pad as f64).sqrt();
                for (r, xr) in x.rows().into_iter().enumerate() {
                    for bl in 0..blocks {
                        let start = bl * d_pad;
                        if start >= *m {
                            break;
                        }
                        buf.iter_mut().for_each(|v| *v = 0.0);
                        for (j, v) in xr.iter().enumerate().take(*d) {
                            buf[j] = *v * b[[bl, j]];
                        }
                        wht_in_place(&mut buf);
                        for (i, p) in perm[bl].iter().enumerate() {
                            tmp[i] = buf[*p as usize] * g[[bl, i]];
                        }
                        wht_in_place(&mut tmp);
                        let take = (*m - start).min(*d_pad);
                        for i in 0..take {
                            out[[r, start + i]] = tmp[i] * scale[[bl, i]] * norm;
                        }
                    }
                }
                out
            }
        }
    }
}

/// How projections become features.
#[derive(Debug, Clone)]
pub enum Trig {
    /// `√(1/m)·[cos P, sin P]` (2m outputs).
    Paired,
    /// `√(2/m)·cos(P + b)` (m outputs).
    Phase(Vec<f64>),
}

/// One node of a sampled map.
#[derive(Debug, Clone)]
pub enum Node {
    /// Shift-invariant random features: scale inputs, project, trig.
    Spectral {
        /// Per-dimension inverse scale of the kernel.
        scale: Vec<f64>,
        /// Frequencies.
        freq: Freq,
        /// Output form.
        trig: Trig,
    },
    /// Nyström: `φ(x) = K(x, L) · P`, `P = U_r Λ_r^{−½}`.
    Nystrom {
        /// The kernel.
        kernel: Kernel,
        /// Landmarks `L × d`.
        landmarks: Array2<f64>,
        /// Projection `L × r`.
        proj: Array2<f64>,
        /// Landmarks prepared for Gram blocks (built on first use).
        prepared: Arc<OnceLock<Prepared>>,
    },
    /// Random Maclaurin: feature i is `coef_i · Π_{j<N_i} (w_ij · x)`.
    Maclaurin {
        /// Degree `N_i` of each feature.
        degree: Vec<usize>,
        /// `√(a_N 2^{N+1} / D)` per feature.
        coef: Vec<f64>,
        /// Rademacher rows, `Σ N_i × d`, feature by feature.
        w: Array2<f64>,
    },
    /// Tensor Sketch of `(γ x·y + c)^p` on `x' = [√γ x, √c]`.
    TensorSketch {
        /// Degree p.
        degree: usize,
        /// γ.
        gamma: f64,
        /// c.
        coef0: f64,
        /// Output size D.
        out: usize,
        /// `p × (d+1)` hash buckets.
        hash: Vec<Vec<u32>>,
        /// `p × (d+1)` signs.
        sign: Vec<Vec<f64>>,
    },
    /// Arc-cosine random features: `√(2/D)·1[Wx > 0]` (order 0) or `√(2/D)·max(0, Wx)`.
    Relu {
        /// 0 or 1.
        order: u32,
        /// `D × d` Gaussian rows.
        w: Array2<f64>,
    },
    /// Random projection `D^{−½} R x`, `R` Rademacher (linear factor inside products).
    Projection {
        /// `D × d` ±1.
        w: Array2<f64>,
    },
    /// The identity (linear kernel).
    Identity {
        /// d.
        d: usize,
    },
    /// Concatenation (sum of kernels).
    Concat(Vec<Node>),
    /// Element-wise product times `D^{(p−1)/2}` (product of kernels).
    Product(Vec<Node>),
    /// Scaled map (`√c · z` for `c · k`).
    Scaled(f64, Box<Node>),
}

impl Node {
    /// Output dimension.
    pub fn output_dim(&self) -> usize {
        match self {
            Node::Spectral { freq, trig, .. } => match trig {
                Trig::Paired => 2 * freq.m(),
                Trig::Phase(_) => freq.m(),
            },
            Node::Nystrom { proj, .. } => proj.ncols(),
            Node::Maclaurin { coef, .. } => coef.len(),
            Node::TensorSketch { out, .. } => *out,
            Node::Relu { w, .. } | Node::Projection { w } => w.nrows(),
            Node::Identity { d } => *d,
            Node::Concat(v) => v.iter().map(|n| n.output_dim()).sum(),
            Node::Product(v) => v[0].output_dim(),
            Node::Scaled(_, n) => n.output_dim(),
        }
    }

    /// Stored parameters (floats).
    pub fn stored_floats(&self) -> usize {
        match self {
            Node::Spectral { scale, freq, trig } => {
                scale.len()
                    + match freq {
                        Freq::Dense(w) => w.len(),
                        Freq::Hadamard { signs, .. } => signs.len(),
                        Freq::Fastfood { b, .. } => 4 * b.len(),
                    }
                    + match trig {
                        Trig::Paired => 0,
                        Trig::Phase(p) => p.len(),
                    }
            }
            // The projection is recomputed from the landmarks on load, not stored.
            Node::Nystrom { landmarks, .. } => landmarks.len(),
            Node::Maclaurin { coef, w, .. } => coef.len() + w.len(),
            Node::TensorSketch { hash, .. } => 2 * hash.iter().map(|h| h.len()).sum::<usize>(),
            Node::Relu { w, .. } | Node::Projection { w } => w.len(),
            Node::Identity { .. } => 0,
            Node::Concat(v) | Node::Product(v) => v.iter().map(|n| n.stored_floats()).sum(),
            Node::Scaled(_, n) => n.stored_floats(),
        }
    }

    /// Floating-point operations per input row (analytic, counting a trig call as one).
    pub fn flops_per_row(&self, d: usize) -> usize {
        let lg = |n: usize| (usize::BITS - n.leading_zeros()) as usize;
        match self {
            Node::Spectral { freq, .. } => {
                d + match freq {
                    Freq::Dense(w) => 2 * w.len() + 2 * w.nrows(),
                    Freq::Hadamard { d_pad, m, .. } => {
                        let blocks = m.div_ceil(*d_pad);
                        blocks * (3 * d_pad * lg(*d_pad) + 3 * d_pad) + 2 * m
                    }
                    Freq::Fastfood { d_pad, m, .. } => {
                        let blocks = m.div_ceil(*d_pad);
                        blocks * (2 * d_pad * lg(*d_pad) + 4 * d_pad) + 2 * m
                    }
                }
            }
            Node::Nystrom {
                landmarks, proj, ..
            } => 3 * landmarks.len() + 2 * proj.len(),
            Node::Maclaurin { coef, w, .. } => 2 * w.len() + coef.len(),
            Node::TensorSketch { degree, out, .. } => 5 * (degree + 1) * out * lg(*out),
            Node::Relu { w, .. } | Node::Projection { w } => 2 * w.len(),
            Node::Identity { .. } => 0,
            Node::Concat(v) => v.iter().map(|n| n.flops_per_row(d)).sum(),
            Node::Product(v) => {
                v.iter().map(|n| n.flops_per_row(d)).sum::<usize>() + v.len() * self.output_dim()
            }
            Node::Scaled(_, n) => n.flops_per_row(d) + n.output_dim(),
        }
    }

    /// Features of a chunk of raw rows, sequentially.
    pub fn apply_chunk(&self, x: ArrayView2<f64>) -> Array2<f64> {
        match self {
            Node::Spectral { scale, freq, trig } => {
                let mut xs = x.to_owned();
                for mut row in xs.rows_mut() {
                    row.iter_mut().zip(scale).for_each(|(v, s)| *v *= s);
                }
                let p = freq.project(xs.view());
                let m = p.ncols();
                match trig {
                    Trig::Paired => {
                        let f = (1.0 / m as f64).sqrt();
                        let mut out = Array2::zeros((x.nrows(), 2 * m));
                        for (mut o, pr) in out.rows_mut().into_iter().zip(p.rows()) {
                            let (co, so) = o.as_slice_mut().expect("row-major").split_at_mut(m);
                            super::trig::scaled_sin_cos(
                                pr.as_slice().expect("row-major"),
                                f,
                                co,
                                so,
                            );
                        }
                        out
                    }
                    Trig::Phase(b) => {
                        let f = (2.0 / m as f64).sqrt();
                        let mut out = p;
                        for mut o in out.rows_mut() {
                            o.iter_mut()
                                .zip(b)
                                .for_each(|(v, b)| *v = f * super::trig::sin_cos(*v + b).1);
                        }
                        out
                    }
                }
            }
            Node::Nystrom {
                kernel,
                landmarks,
                proj,
                prepared,
            } => {
                let prep = prepared.get_or_init(|| Prepared::new(kernel, landmarks.view()));
                let g = kernel.gram_block(x, prep);
                linalg::ab_seq(g.view(), proj.view())
            }
            Node::Maclaurin { degree, coef, w } => {
                let proj = linalg::abt_seq(x, w.view());
                let mut out = Array2::zeros((x.nrows(), coef.len()));
                for (mut o, pr) in out.rows_mut().into_iter().zip(proj.rows()) {
                    let mut at = 0;
                    for (i, (&n, &c)) in degree.iter().zip(coef).enumerate() {
                        let mut v = c;
                        for j in 0..n {
                            v *= pr[at + j];
                        }
                        at += n;
                        o[i] = v;
                    }
                }
                out
            }
            Node::TensorSketch {
                degree,
                gamma,
                coef0,
                out,
                hash,
                sign,
            } => tensor_sketch(x, *degree, *gamma, *coef0, *out, hash, sign),
            Node::Relu { order, w } => {
                let mut p = linalg::abt_seq(x, w.view());
                let f = (2.0 / w.nrows() as f64).sqrt();
                p.mapv_inplace(|v| {
                    if v > 0.0 {
                        if *order == 0 {
                            f
                        } else {
                            f * v
                        }
                    } else {
                        0.0
                    }
                });
                p
            }
            Node::Projection { w } => {
                let mut p = linalg::abt_seq(x, w.view());
                let f = 1.0 / (w.nrows() as f64).sqrt();
                p.mapv_inplace(|v| v * f);
                p
            }
            Node::Identity { .. } => x.to_owned(),
            Node::Concat(v) => {
                let parts: Vec<Array2<f64>> = v.iter().map(|n| n.apply_chunk(x)).collect();
                let views: Vec<ArrayView2<f64>> = parts.iter().map(|p| p.view()).collect();
                ndarray::concatenate(Axis(1), &views).expect("same rows")
            }
            Node::Product(v) => {
                let mut acc = v[0].apply_chunk(x);
                for n in &v[1..] {
                    acc *= &n.apply_chunk(x);
                }
                let f = (acc.ncols() as f64).powf((v.len() as f64 - 1.0) / 2.0);
                acc.mapv_inplace(|a| a * f);
                acc
            }
            Node::Scaled(c, n) => {
                let mut z = n.apply_chunk(x);
                z.mapv_inplace(|a| a * c);
                z
            }
        }
    }

    pub(crate) fn to_json(&self, prefix: &str, f: &mut TensorFile, nystrom_tol: f64) -> Value {
        let arr = |f: &mut TensorFile, name: &str, a: &Array2<f64>| {
            let key = format!("{prefix}.{name}");
            f.put(
                &key,
                vec![a.nrows(), a.ncols()],
                a.iter().copied().collect(),
            );
            key
        };
        match self {
            Node::Spectral { scale, freq, trig } => {
                let sk = format!("{prefix}.scale");
                f.put(&sk, vec![scale.len()], scale.clone());
                let fj = match freq {
                    Freq::Dense(w) => json!({"kind": "dense", "w": arr(f, "w", w)}),
                    Freq::Hadamard { d, d_pad, m, signs } => {
                        json!({"kind": "hadamard", "d": d, "d_pad": d_pad, "m": m, "signs": arr(f, "signs", signs)})
                    }
                    Freq::Fastfood {
                        d,
                        d_pad,
                        m,
                        b,
                        perm,
                        g,
                        scale,
                    } => {
                        let p =
                            Array2::from_shape_fn((perm.len(), *d_pad), |(i, j)| perm[i][j] as f64);
                        json!({"kind": "fastfood", "d": d, "d_pad": d_pad, "m": m, "b": arr(f, "b", b),
                            "perm": arr(f, "perm", &p), "g": arr(f, "g", g), "s": arr(f, "s", scale)})
                    }
                };
                let tj = match trig {
                    Trig::Paired => json!("paired"),
                    Trig::Phase(b) => {
                        let k = format!("{prefix}.phase");
                        f.put(&k, vec![b.len()], b.clone());
                        json!({"phase": k})
                    }
                };
                json!({"node": "spectral", "scale": sk, "freq": fj, "trig": tj})
            }
            // The projection is a deterministic function of kernel, landmarks and tolerance:
            // recomputed on load instead of stored (files hold L·d floats, not L·d + L·r).
            Node::Nystrom {
                kernel,
                landmarks,
                proj,
                ..
            } => json!({"node": "nystrom", "kernel": kernel.to_string(),
                "landmarks": arr(f, "landmarks", landmarks), "rank": proj.ncols(), "rank_tol": nystrom_tol}),
            Node::Maclaurin { degree, coef, w } => {
                let dk = format!("{prefix}.degree");
                f.put(
                    &dk,
                    vec![degree.len()],
                    degree.iter().map(|v| *v as f64).collect(),
                );
                let ck = format!("{prefix}.coef");
                f.put(&ck, vec![coef.len()], coef.clone());
                json!({"node": "maclaurin", "degree": dk, "coef": ck, "w": arr(f, "w", w)})
            }
            Node::TensorSketch {
                degree,
                gamma,
                coef0,
                out,
                hash,
                sign,
            } => {
                let h =
                    Array2::from_shape_fn((hash.len(), hash[0].len()), |(i, j)| hash[i][j] as f64);
                let sg = Array2::from_shape_fn((sign.len(), sign[0].len()), |(i, j)| sign[i][j]);
                json!({"node": "tensorsketch", "degree": degree, "gamma": gamma, "coef0": coef0, "out": out,
                    "hash": arr(f, "hash", &h), "sign": arr(f, "sign", &sg)})
            }
            Node::Relu { order, w } => json!({"node": "relu", "order": order, "w": arr(f, "w", w)}),
            Node::Projection { w } => json!({"node": "projection", "w": arr(f, "w", w)}),
            Node::Identity { d } => json!({"node": "identity", "d": d}),
            Node::Concat(v) => {
                json!({"node": "concat", "parts": v.iter().enumerate().map(|(i, n)| n.to_json(&format!("{prefix}.{i}"), f, nystrom_tol)).collect::<Vec<_>>()})
            }
            Node::Product(v) => {
                json!({"node": "product", "parts": v.iter().enumerate().map(|(i, n)| n.to_json(&format!("{prefix}.{i}"), f, nystrom_tol)).collect::<Vec<_>>()})
            }
            Node::Scaled(c, n) => {
                json!({"node": "scaled", "c": c, "inner": n.to_json(&format!("{prefix}.0"), f, nystrom_tol)})
            }
        }
    }

    pub(crate) fn from_json(v: &Value, f: &TensorFile, src: &str, d: usize) -> Result<Node> {
        let bad = |what: &str| Error::input(format!("{src}: feature map: {what}"));
        let st = |k: &str| {
            v.get(k)
                .and_then(|x| x.as_str())
                .ok_or_else(|| bad(&format!("'{k}' missing")))
        };
        let num = |k: &str| {
            v.get(k)
                .and_then(|x| x.as_u64())
                .map(|x| x as usize)
                .ok_or_else(|| bad(&format!("'{k}' missing")))
        };
        let fl = |k: &str| {
            v.get(k)
                .and_then(|x| x.as_f64())
                .ok_or_else(|| bad(&format!("'{k}' missing")))
        };
        let mat = |key: &str, rows: Option<usize>, cols: Option<usize>| -> Result<Array2<f64>> {
            let (s, data) = f.tensor(key, &[rows, cols], src)?;
            Ok(Array2::from_shape_vec((s[0], s[1]), data).unwrap())
        };
        let node = st("node")?;
        Ok(match node {
            "spectral" => {
                let (_, scale) = f.tensor(st("scale")?, &[Some(d)], src)?;
                let fj = v.get("freq").ok_or_else(|| bad("'freq' missing"))?;
                let fs = |k: &str| {
                    fj.get(k)
                        .and_then(|x| x.as_str())
                        .ok_or_else(|| bad(&format!("freq '{k}' missing")))
                };
                let fu = |k: &str| {
                    fj.get(k)
                        .and_then(|x| x.as_u64())
                        .map(|x| x as usize)
                        .ok_or_else(|| bad(&format!("freq '{k}' missing")))
                };
                let freq = match fs("kind")? {
                    "dense" => Freq::Dense(mat(fs("w")?, None, Some(d))?),
                    "hadamard" => {
                        let d_pad = fu("d_pad")?;
                        let signs = mat(fs("signs")?, None, Some(d_pad))?;
                        let m = fu("m")?;
                        if !d_pad.is_power_of_two()
                            || d_pad < d
                            || signs.nrows() % 3 != 0
                            || m > signs.nrows() / 3 * d_pad
                        {
                            return Err(bad("inconsistent hadamard sizes"));
                        }
                        Freq::Hadamard { d, d_pad, m, signs }
                    }
                    "fastfood" => {
                        let d_pad = fu("d_pad")?;
                        let m = fu("m")?;
                        let b = mat(fs("b")?, None, Some(d_pad))?;
                        let blocks = b.nrows();
                        let p = mat(fs("perm")?, Some(blocks), Some(d_pad))?;
                        let g = mat(fs("g")?, Some(blocks), Some(d_pad))?;
                        let scale = mat(fs("s")?, Some(blocks), Some(d_pad))?;
                        if !d_pad.is_power_of_two() || d_pad < d || m > blocks * d_pad {
                            return Err(bad("inconsistent fastfood sizes"));
                        }
                        let mut perm = Vec::with_capacity(blocks);
                        for r in p.rows() {
                            let mut seen = vec![false; d_pad];
                            let mut row = Vec::with_capacity(d_pad);
                            for v in r {
                                let i = *v as usize;
                                if *v < 0.0 || v.fract() != 0.0 || i >= d_pad || seen[i] {
                                    return Err(bad("fastfood permutation is not a permutation"));
                                }
                                seen[i] = true;
                                row.push(i as u32);
                            }
                            perm.push(row);
                        }
                        Freq::Fastfood {
                            d,
                            d_pad,
                            m,
                            b,
                            perm,
                            g,
                            scale,
                        }
                    }
                    o => return Err(bad(&format!("frequency kind '{o}' unknown"))),
                };
                let trig = match v.get("trig") {
                    Some(Value::String(s)) if s == "paired" => Trig::Paired,
                    Some(t) => {
                        let k = t
                            .get("phase")
                            .and_then(|x| x.as_str())
                            .ok_or_else(|| bad("bad trig"))?;
                        let (_, b) = f.tensor(k, &[Some(freq.m())], src)?;
                        Trig::Phase(b)
                    }
                    None => return Err(bad("'trig' missing")),
                };
                Node::Spectral { scale, freq, trig }
            }
            "nystrom" => {
                let kernel: Kernel = st("kernel")?.parse()?;
                kernel.check_dim(d)?;
                let landmarks = mat(st("landmarks")?, None, Some(d))?;
                let rank = num("rank")?;
                let tol = fl("rank_tol")?;
                let mut info = super::SampleInfo::default();
                let node = super::nystrom_from_landmarks(&kernel, landmarks, tol, &mut info)?;
                if node.output_dim() != rank {
                    return Err(bad(&format!(
                        "Nyström rank {} recomputed from the landmarks differs from the stored {rank}",
                        node.output_dim()
                    )));
                }
                node
            }
            "maclaurin" => {
                let (_, deg) = f.tensor(st("degree")?, &[None], src)?;
                let (_, coef) = f.tensor(st("coef")?, &[Some(deg.len())], src)?;
                let degree: Vec<usize> = deg.iter().map(|v| *v as usize).collect();
                let total: usize = degree.iter().sum();
                let w = mat(st("w")?, Some(total), Some(d))?;
                Node::Maclaurin { degree, coef, w }
            }
            "tensorsketch" => {
                let degree = num("degree")?;
                let out = num("out")?;
                let h = mat(st("hash")?, Some(degree), Some(d + 1))?;
                let sg = mat(st("sign")?, Some(degree), Some(d + 1))?;
                if h.iter().any(|v| *v < 0.0 || *v as usize >= out) {
                    return Err(bad("tensor sketch hash out of range"));
                }
                Node::TensorSketch {
                    degree,
                    gamma: fl("gamma")?,
                    coef0: fl("coef0")?,
                    out,
                    hash: h
                        .rows()
                        .into_iter()
                        .map(|r| r.iter().map(|v| *v as u32).collect())
                        .collect(),
                    sign: sg.rows().into_iter().map(|r| r.to_vec()).collect(),
                }
            }
            "relu" => Node::Relu {
                order: num("order")? as u32,
                w: mat(st("w")?, None, Some(d))?,
            },
            "projection" => Node::Projection {
                w: mat(st("w")?, None, Some(d))?,
            },
            "identity" => Node::Identity { d },
            "concat" | "product" => {
                let parts = v
                    .get("parts")
                    .and_then(|p| p.as_array())
                    .ok_or_else(|| bad("'parts' missing"))?;
                let nodes: Vec<Node> = parts
                    .iter()
                    .map(|p| Node::from_json(p, f, src, d))
                    .collect::<Result<_>>()?;
                if nodes.is_empty() {
                    return Err(bad("no parts"));
                }
                if node == "concat" {
                    Node::Concat(nodes)
                } else {
                    if nodes
                        .iter()
                        .any(|n| n.output_dim() != nodes[0].output_dim())
                    {
                        return Err(bad("product parts of different sizes"));
                    }
                    Node::Product(nodes)
                }
            }
            "scaled" => Node::Scaled(
                fl("c")?,
                Box::new(Node::from_json(
                    v.get("inner").ok_or_else(|| bad("'inner' missing"))?,
                    f,
                    src,
                    d,
                )?),
            ),
            o => return Err(bad(&format!("node '{o}' unknown"))),
        })
    }
}

fn tensor_sketch(
    x: ArrayView2<f64>,
    degree: usize,
    gamma: f64,
    coef0: f64,
    out: usize,
    hash: &[Vec<u32>],
    sign: &[Vec<f64>],
) -> Array2<f64> {
    use rustfft::num_complex::Complex;
    let mut planner = rustfft::FftPlanner::<f64>::new();
    let fwd = planner.plan_fft_forward(out);
    let inv = planner.plan_fft_inverse(out);
    let mut scratch = vec![
        Complex::new(0.0, 0.0);
        fwd.get_inplace_scratch_len()
            .max(inv.get_inplace_scratch_len())
    ];
    let sg = gamma.sqrt();
    let sc = coef0.sqrt();
    let d = x.ncols();
    let mut res = Array2::zeros((x.nrows(), out));
    let mut acc = vec![Complex::new(0.0, 0.0); out];
    let mut buf = vec![Complex::new(0.0, 0.0); out];
    for (r, xr) in x.rows().into_iter().enumerate() {
        acc.iter_mut().for_each(|c| *c = Complex::new(1.0, 0.0));
        for p in 0..degree {
            buf.iter_mut().for_each(|c| *c = Complex::new(0.0, 0.0));
            for j in 0..=d {
                let v = if j < d { sg * xr[j] } else { sc };
                buf[hash[p][j] as usize].re += sign[p][j] * v;
            }
            fwd.process_with_scratch(&mut buf, &mut scratch);
            acc.iter_mut().zip(&buf).for_each(|(a, b)| *a *= b);
        }
        inv.process_with_scratch(&mut acc, &mut scratch);
        let n = out as f64;
        for j in 0..out {
            res[[r, j]] = acc[j].re / n;
        }
    }
    res
}

/// Applies `node` to `x` in parallel over fixed row chunks, writing into `out`.
pub(crate) fn apply_into(node: &Node, x: ArrayView2<f64>, mut out: ArrayViewMut2<f64>) {
    let n = x.nrows();
    out.axis_chunks_iter_mut(Axis(0), linalg::CHUNK_ROWS)
        .into_par_iter()
        .enumerate()
        .for_each(|(ci, mut dst)| {
            let start = ci * linalg::CHUNK_ROWS;
            let rows = dst.nrows().min(n - start);
            let z = node.apply_chunk(x.slice(s![start..start + rows, ..]));
            dst.assign(&z);
        });
}
