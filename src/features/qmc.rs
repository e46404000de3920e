//! Low-discrepancy sequences for quasi-Monte Carlo features (Yang, Sindhwani, Avron &
//! Mahoney, ICML 2014): Halton (radical inverses in the first primes, optionally scrambled
//! by a random digit permutation per dimension that keeps 0 fixed) and Sobol' (Joe & Kuo
//! direction numbers, up to 1024 dimensions, optionally scrambled by a random digital
//! shift). Points lie strictly inside (0, 1) after skipping the origin.

use super::sobol_table::SOBOL;
use crate::{Error, Result};
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};

/// Dimensions the Sobol' table covers.
pub const SOBOL_MAX_DIM: usize = 1024;

/// The first `n` primes.
pub fn primes(n: usize) -> Vec<u64> {
    let mut out = Vec::with_capacity(n);
    let mut c = 2u64;
    while out.len() < n {
        if out
            .iter()
            .take_while(|p| **p * **p <= c)
            .all(|p| !c.is_multiple_of(*p))
        {
            out.push(c);
        }
        c += 1;
    }
    out
}

/// `n` Halton points in `dim` dimensions, starting at index `start` (use 1 to skip the
/// origin). With `seed`, each dimension's digits go through a random permutation with 0
/// fixed. Row-major `n × dim`.
pub fn halton(n: usize, dim: usize, start: u64, seed: Option<u64>) -> Vec<f64> {
    let ps = primes(dim);
    let perms: Vec<Vec<u64>> = ps
        .iter()
        .enumerate()
        .map(|(j, &b)| {
            let mut p: Vec<u64> = (0..b).collect();
            if let Some(s) = seed {
                let mut rng = rand::rngs::ChaCha20Rng::seed_from_u64(
                    s ^ (j as u64).wrapping_mul(0x9E37_79B9_7F4A_7C15),
                );
                p[1..].shuffle(&mut rng);
            }
            p
        })
        .collect();
    let mut out = vec![0.0; n * dim];
    for i in 0..n {
        let idx = start + i as u64;
        for j in 0..dim {
            let b = ps[j];
            let mut k = idx;
            let mut f = 1.0 / b as f64;
            let mut v = 0.0;
            while k > 0 {
                v += perms[j][(k % b) as usize] as f64 * f;
                k /= b;
                f /= b as f64;
            }
            out[i * dim + j] = v;
        }
    }
    out
}

/// `n` Sobol' points in `dim ≤ 1024` dimensions from index `start` (0 is the origin), as
/// 32-bit fractions; with `seed`, a random digital shift per dimension. Row-major.
pub fn sobol(n: usize, dim: usize, start: u64, seed: Option<u64>) -> Result<Vec<f64>> {
    if dim > SOBOL_MAX_DIM {
        return Err(Error::input(format!(
            "Sobol' points are available up to {SOBOL_MAX_DIM} dimensions, {dim} asked; use the Halton sequence"
        )));
    }
    const BITS: usize = 32;
    // Direction numbers v[j][k] (k-th bit), scaled to 32-bit integers.
    let mut v = vec![[0u32; BITS]; dim];
    for (j, vj) in v.iter_mut().enumerate() {
        let (poly, m0) = SOBOL[j];
        if j == 0 {
            for (k, vk) in vj.iter_mut().enumerate() {
                *vk = 1u32 << (BITS - 1 - k);
            }
            continue;
        }
        let deg = (32 - poly.leading_zeros() - 1) as usize;
        let mut m = [0u64; BITS];
        m[..deg].copy_from_slice(&m0.iter().map(|&x| x as u64).collect::<Vec<_>>()[..deg]);
        for k in deg..BITS {
            let mut new = m[k - deg];
            let mut pow2 = 1u64;
            for l in 0..deg {
                pow2 <<= 1;
                if (poly >> (deg - 1 - l)) & 1 == 1 {
                    new ^= pow2 * m[k - l - 1];
                }
            }
            m[k] = new;
        }
        for k in 0..BITS {
            vj[k] = (m[k] << (BITS - 1 - k)) as u32;
        }
    }
    let shift: Vec<u32> = match seed {
        Some(s) => {
            let mut rng = rand::rngs::ChaCha20Rng::seed_from_u64(s);
            (0..dim).map(|_| rng.next_u32()).collect()
        }
        None => vec![0; dim],
    };
    // Gray-code order: x_{i+1} = x_i ^ v[c], c = index of the lowest zero bit of i.
    let mut x = vec![0u32; dim];
    let mut out = Vec::with_capacity(n * dim);
    let total = start + n as u64;
    for i in 0..total {
        if i >= start {
            for j in 0..dim {
                out.push((x[j] ^ shift[j]) as f64 / 4_294_967_296.0);
            }
        }
        let c = (!i).trailing_zeros() as usize;
        if c < BITS {
            for j in 0..dim {
                x[j] ^= v[j][c];
            }
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn halton_reference_points() {
        // Halton (1964): radical inverses in bases (2,3), skipping index 0.
        let p = halton(4, 2, 1, None);
        let want = [
            0.5,
            1.0 / 3.0,
            0.25,
            2.0 / 3.0,
            0.75,
            1.0 / 9.0,
            0.125,
            4.0 / 9.0,
        ];
        for (a, b) in p.iter().zip(want) {
            assert!((a - b).abs() < 1e-15);
        }
        let s = halton(100, 5, 1, Some(7));
        assert!(s.iter().all(|v| *v > 0.0 && *v < 1.0));
        assert_ne!(s, halton(100, 5, 1, None));
    }

    #[test]
    fn sobol_reference_points() {
        // Sobol' (1967), unscrambled 2-D points, first 8 from index 0 (Joe & Kuo 2008 numbers).
        let p = sobol(8, 2, 0, None).unwrap();
        let want = [
            0.0, 0.0, 0.5, 0.5, 0.75, 0.25, 0.25, 0.75, 0.375, 0.375, 0.875, 0.875, 0.625, 0.125,
            0.125, 0.625,
        ];
        assert_eq!(p, want);
        assert!(sobol(4, 2000, 1, None).is_err());
        // Each 1-D projection of the first 2^k points (from 0) is a permutation of j/2^k.
        let q = sobol(64, 50, 0, None).unwrap();
        for j in 0..50 {
            let mut col: Vec<u64> = (0..64).map(|i| (q[i * 50 + j] * 64.0) as u64).collect();
            col.sort();
            assert_eq!(col, (0..64).collect::<Vec<_>>(), "dim {j}");
        }
    }
}
