//! `fastfood`: Fastfood (Le, Sarlós & Smola, ICML 2013): per block of `d'` frequencies
//! `V x = d'^{-1/2} · S H G Π H B x` (`B` random signs, `H` the Walsh–Hadamard matrix, `Π`
//! a random permutation, `G` a Gaussian diagonal, `S_ii = s_i/‖G‖_F` with `s_i ~ χ_{d'}`, so
//! every row of `V` has norm `s_i`).
//!
//! Program: pad, tile, `signs B → wht → gather Π → scale G → wht → scale S/√d'`, keep `m`.

use super::{signs, spectral_leaf, Ctx, Sampler};
use crate::kernel::Kernel;
use crate::program::{steps, ValueId};
use crate::Result;
use rand::seq::SliceRandom;
use rand::RngExt;
use rand_distr::{Distribution, StandardNormal};

pub(crate) struct Fastfood;

impl Sampler for Fastfood {
    fn name(&self) -> &'static str {
        "fastfood"
    }
    fn spectral(&self) -> bool {
        true
    }
    fn serves(&self, k: &Kernel) -> bool {
        matches!(k, Kernel::Gaussian { .. })
    }
    fn leaf(&self, cx: &mut Ctx, k: &Kernel, dd: usize, x: ValueId) -> Result<ValueId> {
        spectral_leaf(cx, k, dd, x, |cx, xs, m| {
            let d_pad = cx.spec.input_dim.next_power_of_two();
            let blocks = m.div_ceil(d_pad);
            let chi = rand_distr::ChiSquared::new(d_pad as f64).expect("d' ≥ 1");
            let norm = 1.0 / (d_pad as f64).sqrt();
            let (mut b, mut perm, mut g, mut s) = (vec![], vec![], vec![], vec![]);
            for bl in 0..blocks {
                b.extend(signs(&mut cx.rng, d_pad));
                let mut p: Vec<u32> = (0..d_pad as u32).collect();
                p.shuffle(&mut cx.rng);
                perm.extend(p.iter().map(|i| i + (bl * d_pad) as u32));
                let gv: Vec<f64> = (0..d_pad).map(|_| cx.rng.sample(StandardNormal)).collect();
                let gn = gv.iter().map(|v| v * v).sum::<f64>().sqrt();
                for gi in gv {
                    g.push(gi);
                    let si: f64 = chi.sample(&mut cx.rng);
                    s.push(si.sqrt() / gn * norm);
                }
            }
            let mut v = cx.b.push(steps::Pad::new(d_pad)?, &[xs])?;
            v = cx.b.push(steps::Tile::new(blocks)?, &[v])?;
            v = cx.b.push(steps::Signs::new(b)?, &[v])?;
            v = cx.b.push(steps::Wht::new(d_pad)?, &[v])?;
            v = cx.b.push(steps::Gather::new(perm)?, &[v])?;
            v = cx.b.push(steps::Scale::new(g)?, &[v])?;
            v = cx.b.push(steps::Wht::new(d_pad)?, &[v])?;
            v = cx.b.push(steps::Scale::new(s)?, &[v])?;
            if m < blocks * d_pad {
                v = cx.b.push(steps::Gather::first(m)?, &[v])?;
            }
            Ok(v)
        })
    }
}
