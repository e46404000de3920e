//! `nystrom`: Nyström features (Williams & Seeger, NIPS 2001): landmarks `L` drawn from
//! data (uniformly, by k-means++ seeding in feature space, or by approximate ridge leverage
//! scores), `φ(x) = P·k(x, L)` with `P = Λ_r^{−½} U_rᵀ` from the eigendecomposition of
//! `K(L, L)` (eigenvalues below `rank_tol · λ_max` dropped). The projection is stored in
//! the program, so loading never repeats the eigendecomposition.
//!
//! Program: `kernel_block` against the landmarks, `dense` by `P` (`r × L`).

use super::{Ctx, Rng, Sampler};
use crate::features::spec::{FeatureSpec, Landmarks};
use crate::features::SampleInfo;
use crate::kernel::{Kernel, Prepared};
use crate::program::{steps, Builder, Program, ValueId};
use crate::{linalg, Error, Result};
use ndarray::{Array2, ArrayView2, Axis};
use rand::seq::SliceRandom;
use rand::{RngExt, SeedableRng};

pub(crate) struct Nystrom;

impl Sampler for Nystrom {
    fn name(&self) -> &'static str {
        "nystrom"
    }
    fn whole_kernel(&self) -> bool {
        true
    }
    fn whole(&self, cx: &mut Ctx, data: Option<ArrayView2<f64>>) -> Result<ValueId> {
        let data = data.ok_or_else(|| {
            Error::input(
                "nystrom needs data to draw landmarks from (calibration data or --landmarks FILE)",
            )
        })?;
        let spec: &FeatureSpec = cx.spec;
        if data.ncols() != spec.input_dim {
            return Err(Error::input(format!(
                "landmark data have {} features; expected {}",
                data.ncols(),
                spec.input_dim
            )));
        }
        let m = spec.features;
        crate::limits::check_alloc(
            3 * (m.min(data.nrows()) as u64).pow(2),
            8,
            &format!("the Gram matrix of {m} landmarks"),
        )?;
        if data.nrows() < m {
            cx.info.notes.push(format!(
                "Nyström: only {} rows available for {m} landmarks; using them all",
                data.nrows()
            ));
        }
        let mut rng = Rng::seed_from_u64(spec.seed);
        let idx = pick_landmarks(&spec.kernel, data, m, spec.options.landmarks, &mut rng);
        let l = data.select(Axis(0), &idx);
        nystrom_steps(
            cx.b,
            &spec.kernel,
            l,
            spec.options.rank_tol,
            cx.info,
            Builder::INPUT,
        )
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
        Landmarks::Support => (0..m).collect(),
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

/// The Nyström projection `P = Λ_r^{−½} U_rᵀ` (`r × L`, largest eigenvalues first) of the
/// landmark Gram matrix, keeping eigenvalues `> tol·λ_max`.
pub(crate) fn projection(
    k: &Kernel,
    l: ArrayView2<f64>,
    tol: f64,
    info: &mut SampleInfo,
) -> Result<Array2<f64>> {
    let kmm = k.gram(l, l);
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
    let mut p = Array2::zeros((r, l.nrows()));
    for (c, &i) in keep.iter().rev().enumerate() {
        let f = 1.0 / vals[i].sqrt();
        for j in 0..l.nrows() {
            p[[c, j]] = vecs[[j, i]] * f;
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
    Ok(p)
}

fn nystrom_steps(
    b: &mut Builder,
    k: &Kernel,
    l: Array2<f64>,
    tol: f64,
    info: &mut SampleInfo,
    x: ValueId,
) -> Result<ValueId> {
    let p = projection(k, l.view(), tol, info)?;
    let kb = b.push(steps::KernelBlock::new(k.clone(), l)?, &[x])?;
    b.push(steps::Dense::new(p)?, &[kb])
}

/// The Nyström feature program for landmarks `l` (rows in the kernel's input space).
pub fn nystrom_from_landmarks(
    k: &Kernel,
    l: Array2<f64>,
    tol: f64,
    info: &mut SampleInfo,
) -> Result<Program> {
    let mut b = Builder::new(l.ncols());
    let out = nystrom_steps(&mut b, k, l, tol, info, Builder::INPUT)?;
    Ok(b.finish(out))
}
