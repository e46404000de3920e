//! Sampling: [`FeatureSpec`] (+ data for Nyström) → [`Node`] tree.

use super::map::{Freq, Node, Trig};
use super::spec::{FeatureSpec, FourierVariant, Landmarks, Method};
use super::spectral;
use crate::kernel::{Kernel, Prepared};
use crate::{linalg, Error, Result};
use ndarray::{Array2, ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::{RngExt, SeedableRng};
use rand_distr::{Distribution, StandardNormal};
use std::sync::{Arc, OnceLock};

type Rng = rand::rngs::ChaCha20Rng;

/// What sampling did, for the user (rank, warnings).
#[derive(Debug, Clone, Default)]
pub struct SampleInfo {
    /// Human-readable notes (printed on stderr by the CLI).
    pub notes: Vec<String>,
    /// Nyström: rank kept after thresholding.
    pub rank: Option<usize>,
    /// Nyström: landmarks used.
    pub landmarks: Option<usize>,
}

fn child_seed(seed: u64, i: u64) -> u64 {
    // SplitMix64 step: well-separated child seeds.
    let mut z = seed ^ (i.wrapping_add(1)).wrapping_mul(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// Samples the map described by `spec`. Nyström draws landmarks from `data` (rows in the
/// model's scaled input space); other methods ignore it.
pub fn sample(spec: &FeatureSpec, data: Option<ArrayView2<f64>>) -> Result<(Node, SampleInfo)> {
    spec.validate()?;
    let mut info = SampleInfo::default();
    if !spec.kernel.is_positive_definite() {
        info.notes.push(format!(
            "kernel {} is not positive definite: Nyström features of an indefinite kernel keep only its positive eigen-directions",
            spec.kernel
        ));
    }
    let node = if spec.method == Method::Nystrom {
        let data = data.ok_or_else(|| {
            Error::input(
                "nystrom needs data to draw landmarks from (calibration data or --landmarks FILE)",
            )
        })?;
        nystrom(spec, data, &mut info)?
    } else {
        plan(&spec.kernel, spec, spec.features, spec.seed, false)?
    };
    Ok((node, info))
}

fn plan(k: &Kernel, spec: &FeatureSpec, dd: usize, seed: u64, in_product: bool) -> Result<Node> {
    let d = spec.input_dim;
    match k {
        Kernel::Scaled(c, inner) => Ok(Node::Scaled(
            c.sqrt(),
            Box::new(plan(inner, spec, dd, seed, in_product)?),
        )),
        Kernel::Sum(parts) => {
            let lin = parts.iter().filter(|p| matches!(p, Kernel::Linear)).count();
            let rnd = parts.len() - lin;
            let rest = if in_product {
                dd
            } else {
                dd.saturating_sub(lin * d)
            };
            if rnd > 0 && rest < 2 * rnd {
                return Err(Error::input(format!(
                    "--features {dd} is too few for kernel {k}: linear parts take {d} each and every other part needs at least 2"
                )));
            }
            let even = |v: usize| v - v % 2;
            let base = rest.checked_div(rnd).map(even).unwrap_or(0);
            let mut nodes = Vec::new();
            let mut first = true;
            for (i, p) in parts.iter().enumerate() {
                let s = child_seed(seed, i as u64);
                if matches!(p, Kernel::Linear) && !in_product {
                    nodes.push(Node::Identity { d });
                } else {
                    let n = if first {
                        even(rest - base * (rnd - 1))
                    } else {
                        base
                    };
                    first = false;
                    nodes.push(plan(p, spec, n, s, in_product)?);
                }
            }
            Ok(Node::Concat(nodes))
        }
        Kernel::Product(parts) => {
            let nodes: Vec<Node> = parts
                .iter()
                .enumerate()
                .map(|(i, p)| plan(p, spec, dd, child_seed(seed, i as u64), true))
                .collect::<Result<_>>()?;
            if nodes.iter().any(|n| n.output_dim() != dd) {
                return Err(Error::input(format!(
                    "kernel {k}: the parts of a product need maps of equal size {dd}; a sum inside a product cannot be split evenly"
                )));
            }
            Ok(Node::Product(nodes))
        }
        leaf => leaf_map(leaf, spec, dd, seed, in_product),
    }
}

fn leaf_map(
    k: &Kernel,
    spec: &FeatureSpec,
    dd: usize,
    seed: u64,
    in_product: bool,
) -> Result<Node> {
    let d = spec.input_dim;
    let mut rng = Rng::seed_from_u64(seed);
    if let Kernel::Linear = k {
        if in_product {
            let w = Array2::from_shape_simple_fn((dd, d), || {
                if rng.random::<bool>() {
                    1.0
                } else {
                    -1.0
                }
            });
            return Ok(Node::Projection { w });
        }
        return Ok(Node::Identity { d });
    }
    if k.is_shift_invariant() {
        let phase = in_product || spec.options.fourier == FourierVariant::Phase;
        let m = if phase { dd } else { dd / 2 };
        if m == 0 {
            return Err(Error::input(format!(
                "--features {dd} is too few for kernel {k}"
            )));
        }
        let method = spec.method;
        if !super::spec::methods_for(k).contains(&method) {
            return Err(super::spec::cannot_serve(k, method));
        }
        let freq = match method {
            Method::Fourier => Freq::Dense(spectral::iid(k, d, m, &mut rng)),
            Method::Orthogonal => Freq::Dense(spectral::orthogonal(k, d, m, &mut rng)),
            Method::Quasi => {
                let s = if spec.options.scramble {
                    Some(seed)
                } else {
                    None
                };
                Freq::Dense(spectral::quasi(k, d, m, spec.options.sequence, s)?)
            }
            Method::Hadamard => hadamard(d, m, &mut rng),
            Method::Fastfood => fastfood(d, m, &mut rng),
            other => unreachable!("{other:?} is not spectral"),
        };
        let trig = if phase {
            Trig::Phase(spectral::phases(m, &mut rng))
        } else {
            Trig::Paired
        };
        return Ok(Node::Spectral {
            scale: k.inverse_scale(d).unwrap(),
            freq,
            trig,
        });
    }
    match (k, spec.method) {
        (
            Kernel::Polynomial {
                degree,
                gamma,
                coef0,
            },
            Method::Maclaurin,
        ) => Ok(maclaurin(*degree as usize, *gamma, *coef0, d, dd, &mut rng)),
        (
            Kernel::Polynomial {
                degree,
                gamma,
                coef0,
            },
            Method::TensorSketch,
        ) => {
            let p = *degree as usize;
            let hash = (0..p)
                .map(|_| (0..=d).map(|_| rng.random_range(0..dd as u32)).collect())
                .collect();
            let sign = (0..p)
                .map(|_| {
                    (0..=d)
                        .map(|_| if rng.random::<bool>() { 1.0 } else { -1.0 })
                        .collect()
                })
                .collect();
            Ok(Node::TensorSketch {
                degree: p,
                gamma: *gamma,
                coef0: *coef0,
                out: dd,
                hash,
                sign,
            })
        }
        (Kernel::ArcCos { order }, Method::Relu) => {
            let w = Array2::from_shape_simple_fn((dd, d), || rng.sample::<f64, _>(StandardNormal));
            Ok(Node::Relu { order: *order, w })
        }
        (k, m) => Err(super::spec::cannot_serve(k, m)),
    }
}

fn signs(rng: &mut Rng, n: usize) -> Vec<f64> {
    (0..n)
        .map(|_| if rng.random::<bool>() { 1.0 } else { -1.0 })
        .collect()
}

fn hadamard(d: usize, m: usize, rng: &mut Rng) -> Freq {
    let d_pad = d.next_power_of_two();
    let blocks = m.div_ceil(d_pad);
    let mut s = Array2::zeros((3 * blocks, d_pad));
    for mut row in s.rows_mut() {
        row.iter_mut()
            .zip(signs(rng, d_pad))
            .for_each(|(a, b)| *a = b);
    }
    Freq::Hadamard {
        d,
        d_pad,
        m,
        signs: s,
    }
}

fn fastfood(d: usize, m: usize, rng: &mut Rng) -> Freq {
    let d_pad = d.next_power_of_two();
    let blocks = m.div_ceil(d_pad);
    let mut b = Array2::zeros((blocks, d_pad));
    let mut g = Array2::zeros((blocks, d_pad));
    let mut sc = Array2::zeros((blocks, d_pad));
    let mut perm = Vec::with_capacity(blocks);
    let chi = rand_distr::ChiSquared::new(d_pad as f64).unwrap();
    for bl in 0..blocks {
        b.row_mut(bl)
            .iter_mut()
            .zip(signs(rng, d_pad))
            .for_each(|(a, v)| *a = v);
        let mut p: Vec<u32> = (0..d_pad as u32).collect();
        p.shuffle(rng);
        perm.push(p);
        let gv: Vec<f64> = (0..d_pad).map(|_| rng.sample(StandardNormal)).collect();
        let gn = gv.iter().map(|v| v * v).sum::<f64>().sqrt();
        for i in 0..d_pad {
            g[[bl, i]] = gv[i];
            // S_ii = s_i / ‖G‖_F with s_i ~ χ_{d'}: row norms equal s_i (REFERENCES §4).
            let s: f64 = chi.sample(rng);
            sc[[bl, i]] = s.sqrt() / gn;
        }
    }
    Freq::Fastfood {
        d,
        d_pad,
        m,
        b,
        perm,
        g,
        scale: sc,
    }
}

fn binom(n: usize, k: usize) -> f64 {
    (0..k).fold(1.0, |acc, i| acc * (n - i) as f64 / (i + 1) as f64)
}

fn maclaurin(p: usize, gamma: f64, coef0: f64, d: usize, dd: usize, rng: &mut Rng) -> Node {
    // (γ x·y + c)^p = Σ_n a_n (x·y)^n, a_n = C(p,n) γ^n c^{p−n}; P[N = n] = 2^{−(n+1)}.
    let a = |n: usize| {
        if n > p {
            0.0
        } else {
            binom(p, n) * gamma.powi(n as i32) * coef0.powi((p - n) as i32)
        }
    };
    let mut degree = Vec::with_capacity(dd);
    let mut coef = Vec::with_capacity(dd);
    let mut rows: Vec<f64> = Vec::new();
    for _ in 0..dd {
        let mut n = 0usize;
        while rng.random::<bool>() {
            n += 1;
        }
        let an = a(n);
        degree.push(n);
        coef.push((an * 2f64.powi(n as i32 + 1) / dd as f64).sqrt());
        for _ in 0..n * d {
            rows.push(if rng.random::<bool>() { 1.0 } else { -1.0 });
        }
    }
    let total: usize = degree.iter().sum();
    Node::Maclaurin {
        degree,
        coef,
        w: Array2::from_shape_vec((total, d), rows).unwrap(),
    }
}

/// Picks landmark row indices from `x` by `rule`.
pub fn pick_landmarks(
    k: &Kernel,
    x: ArrayView2<f64>,
    m: usize,
    rule: Landmarks,
    rng: &mut Rng,
) -> Vec<usize> {
    let n = x.nrows();
    if m >= n {
        return (0..n).collect();
    }
    match rule {
        Landmarks::Uniform => {
            let mut idx: Vec<usize> = (0..n).collect();
            let mut v = idx.partial_shuffle(rng, m).0.to_vec();
            v.sort();
            v
        }
        Landmarks::KmeansPP => {
            // D² sampling with d²(x, c) = k(x,x) + k(c,c) − 2k(x,c) in feature space.
            let diag = k.diag(x);
            let mut chosen = vec![rng.random_range(0..n)];
            let mut dist = vec![f64::INFINITY; n];
            while chosen.len() < m {
                let c = *chosen.last().unwrap();
                let prep = Prepared::new(k, x.select(Axis(0), &[c]).view());
                let kc = k.gram_prepared(x, &prep);
                for i in 0..n {
                    let d2 = (diag[i] + diag[c] - 2.0 * kc[[i, 0]]).max(0.0);
                    dist[i] = dist[i].min(d2);
                }
                let total: f64 = dist.iter().sum();
                let next = if total > 0.0 {
                    let mut t = rng.random::<f64>() * total;
                    let mut pick = n - 1;
                    for (i, dv) in dist.iter().enumerate() {
                        if t < *dv {
                            pick = i;
                            break;
                        }
                        t -= dv;
                    }
                    pick
                } else {
                    (0..n).find(|i| !chosen.contains(i)).unwrap()
                };
                if dist[next] == 0.0 && chosen.contains(&next) {
                    break;
                }
                chosen.push(next);
            }
            chosen.sort();
            chosen.dedup();
            chosen
        }
        Landmarks::Leverage => {
            // Approximate ridge leverage scores from a uniform sketch S of size 2m:
            // l_i ≈ (k_ii − k_iSᵀ (K_SS + λI)⁻¹ k_iS) / λ, λ = mean diag / m.
            let s = (2 * m).min(n);
            let mut idx: Vec<usize> = (0..n).collect();
            let sk: Vec<usize> = idx.partial_shuffle(rng, s).0.to_vec();
            let xs = x.select(Axis(0), &sk);
            let diag = k.diag(x);
            let lam = (diag.iter().sum::<f64>() / n as f64).max(1e-12) / m as f64;
            let mut kss = k.gram(xs.view(), xs.view());
            for i in 0..s {
                kss[[i, i]] += lam;
            }
            let kxs = k.gram(x, xs.view());
            let sol = match linalg::cholesky_solve(kss.view(), kxs.t(), "leverage scores") {
                Ok(v) => v,
                Err(_) => return pick_landmarks(k, x, m, Landmarks::Uniform, rng),
            };
            let mut score: Vec<f64> = (0..n)
                .map(|i| ((diag[i] - kxs.row(i).dot(&sol.column(i))) / lam).max(1e-12))
                .collect();
            // Sample m without replacement proportionally to the scores.
            let mut out = Vec::with_capacity(m);
            let mut total: f64 = score.iter().sum();
            for _ in 0..m {
                let mut t = rng.random::<f64>() * total;
                let mut pick = None;
                for (i, sv) in score.iter().enumerate() {
                    if *sv <= 0.0 {
                        continue;
                    }
                    if t < *sv {
                        pick = Some(i);
                        break;
                    }
                    t -= sv;
                }
                let i = pick.unwrap_or_else(|| score.iter().rposition(|v| *v > 0.0).unwrap());
                total -= score[i];
                score[i] = 0.0;
                out.push(i);
            }
            out.sort();
            out
        }
    }
}

/// Nyström map from landmarks `l`: `P = U_r Λ_r^{−½}` over eigenvalues `> tol·λ_max`.
pub fn nystrom_from_landmarks(
    k: &Kernel,
    l: Array2<f64>,
    tol: f64,
    info: &mut SampleInfo,
) -> Result<Node> {
    let kmm = k.gram(l.view(), l.view());
    let kmm = (&kmm + &kmm.t()) * 0.5;
    let (vals, vecs) = linalg::eigh(kmm.view())?;
    let lmax = vals.iter().fold(0.0f64, |a, v| a.max(*v));
    let keep: Vec<usize> = (0..vals.len())
        .filter(|&i| vals[i] > tol * lmax && vals[i] > 0.0)
        .collect();
    if keep.is_empty() {
        return Err(Error::input(format!(
            "Nyström: the landmark Gram matrix of {k} has no positive eigenvalue"
        )));
    }
    let r = keep.len();
    let mut proj = Array2::zeros((l.nrows(), r));
    // Largest eigenvalues first.
    for (c, &i) in keep.iter().rev().enumerate() {
        let f = 1.0 / vals[i].sqrt();
        for j in 0..l.nrows() {
            proj[[j, c]] = vecs[[j, i]] * f;
        }
    }
    if r < l.nrows() {
        info.notes.push(format!(
            "Nyström: rank {r} of {} landmarks kept (eigenvalues below {tol:.0e}·λ_max dropped)",
            l.nrows()
        ));
    }
    info.rank = Some(r);
    info.landmarks = Some(l.nrows());
    Ok(Node::Nystrom {
        kernel: k.clone(),
        landmarks: l,
        proj,
        prepared: Arc::new(OnceLock::new()),
    })
}

fn nystrom(spec: &FeatureSpec, data: ArrayView2<f64>, info: &mut SampleInfo) -> Result<Node> {
    if data.ncols() != spec.input_dim {
        return Err(Error::input(format!(
            "landmark data have {} features; expected {}",
            data.ncols(),
            spec.input_dim
        )));
    }
    let m = spec.features;
    if data.nrows() < m {
        info.notes.push(format!(
            "Nyström: only {} rows available for {m} landmarks; using them all",
            data.nrows()
        ));
    }
    let mut rng = Rng::seed_from_u64(spec.seed);
    let idx = pick_landmarks(&spec.kernel, data, m, spec.options.landmarks, &mut rng);
    let l = data.select(Axis(0), &idx);
    nystrom_from_landmarks(&spec.kernel, l, spec.options.rank_tol, info)
}
