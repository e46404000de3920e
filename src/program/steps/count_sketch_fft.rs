//! `count_sketch_fft`: the Tensor Sketch of Pham & Pagh (KDD 2013): `p` count sketches of
//! the input (bucket `h_q(j)`, sign `s_q(j)`), multiplied in the frequency domain,
//! `y = FFT⁻¹(FFT(C₁x) ⊙ … ⊙ FFT(C_p x))` (real part; the inverse divides by the width).
//! FFT plans are made once, when the step is built.

use crate::program::op::{log2_ceil, rows_map, Cost, Op, Reader, Writer};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};
use rustfft::num_complex::Complex;
use rustfft::Fft;
use std::sync::Arc;

/// Count sketches multiplied by FFT.
#[derive(Clone)]
pub struct CountSketchFft {
    out: usize,
    hash: Vec<Vec<u32>>,
    sign: Vec<Vec<i8>>,
    fwd: Arc<dyn Fft<f64>>,
    inv: Arc<dyn Fft<f64>>,
}

impl std::fmt::Debug for CountSketchFft {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("CountSketchFft")
            .field("out", &self.out)
            .field("degree", &self.hash.len())
            .finish()
    }
}

impl CountSketchFft {
    /// `hash` and `sign` are `p × n` (buckets in `0..out`, signs ±1), `p ≥ 1`, `out ≥ 1`.
    pub fn new(out: usize, hash: Vec<Vec<u32>>, sign: Vec<Vec<i8>>) -> Result<CountSketchFft> {
        let bad = |m: String| Err(Error::input(format!("count_sketch_fft step: {m}")));
        if out == 0 || hash.is_empty() || hash.len() != sign.len() {
            return bad("needs out ≥ 1 and as many sign rows as hash rows (≥ 1)".into());
        }
        // The FFT plans and buffers are `out` complex values each: checked against the
        // memory ceiling before planning (a crafted width of 2^40 must not abort).
        if out > 1 << 26 {
            return bad(format!(
                "width {out} is beyond the largest supported (2^26)"
            ));
        }
        if let Err(e) = crate::limits::check_alloc(
            out as u64,
            16 * (hash.len() as u64 + 4),
            "count sketch buffers",
        ) {
            return bad(e.message().to_string());
        }
        let n = hash[0].len();
        for (h, s) in hash.iter().zip(&sign) {
            if h.len() != n || s.len() != n {
                return bad("hash and sign rows of different lengths".into());
            }
            if let Some(b) = h.iter().find(|b| **b as usize >= out) {
                return bad(format!("bucket {b} is out of range for width {out}"));
            }
            if let Some(v) = s.iter().find(|v| **v != 1 && **v != -1) {
                return bad(format!("sign {v}; expected +1 or -1"));
            }
        }
        let mut planner = rustfft::FftPlanner::<f64>::new();
        Ok(CountSketchFft {
            fwd: planner.plan_fft_forward(out),
            inv: planner.plan_fft_inverse(out),
            out,
            hash,
            sign,
        })
    }
    /// Output width.
    pub fn width(&self) -> usize {
        self.out
    }
    /// Bucket rows (`p × n`).
    pub fn hashes(&self) -> &[Vec<u32>] {
        &self.hash
    }
    /// Sign rows (`p × n`).
    pub fn signs(&self) -> &[Vec<i8>] {
        &self.sign
    }
}

impl Op for CountSketchFft {
    const NAME: &'static str = "count_sketch_fft";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        match ins {
            [n] if *n == self.hash[0].len() => Ok(self.out),
            [n] => Err(format!(
                "sketches take width {} but the input width is {n}",
                self.hash[0].len()
            )),
            _ => Err(format!("expects one input, got {}", ins.len())),
        }
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        let out = self.out;
        let zero = Complex::new(0.0, 0.0);
        let mut scratch = vec![
            zero;
            self.fwd
                .get_inplace_scratch_len()
                .max(self.inv.get_inplace_scratch_len())
        ];
        let mut acc = vec![zero; out];
        let mut buf = vec![zero; out];
        let inv_n = 1.0 / out as f64;
        rows_map(&x, out, |a, y| {
            acc.iter_mut().for_each(|c| *c = Complex::new(1.0, 0.0));
            for (h, s) in self.hash.iter().zip(&self.sign) {
                buf.iter_mut().for_each(|c| *c = zero);
                for ((v, b), sg) in a.iter().zip(h).zip(s) {
                    buf[*b as usize].re += *sg as f64 * v;
                }
                self.fwd.process_with_scratch(&mut buf, &mut scratch);
                acc.iter_mut().zip(&buf).for_each(|(a, b)| *a *= b);
            }
            self.inv.process_with_scratch(&mut acc, &mut scratch);
            y.iter_mut().zip(&acc).for_each(|(o, c)| *o = c.re * inv_n);
        })
    }
    fn backward(
        &self,
        xs: &[ArrayView2<f64>],
        _y: ArrayView2<f64>,
        gy: ArrayView2<f64>,
        _gp: Option<&mut [f64]>,
        need_gx: bool,
    ) -> Vec<Array2<f64>> {
        if !need_gx {
            return vec![];
        }
        // y = s₁ ⊛ … ⊛ s_p (circular convolution of the count sketches s_k = C_k x), so
        // ∂L/∂s_k is the circular cross-correlation of ∂L/∂y with the convolution of the
        // other sketches: IFFT(FFT(gy) · conj(Π_{j≠k} FFT(s_j))) / D; then ∂L/∂x_i =
        // Σ_k σ_k(i) · (∂L/∂s_k)[h_k(i)].
        let (out, p) = (self.out, self.hash.len());
        let zero = Complex::new(0.0, 0.0);
        let mut scratch = vec![
            zero;
            self.fwd
                .get_inplace_scratch_len()
                .max(self.inv.get_inplace_scratch_len())
        ];
        let inv_n = 1.0 / out as f64;
        let mut spectra = vec![vec![zero; out]; p];
        let mut gf = vec![zero; out];
        let mut buf = vec![zero; out];
        let mut g = Array2::<f64>::zeros(xs[0].dim());
        for ((mut gr, xr), gyr) in g.rows_mut().into_iter().zip(xs[0].rows()).zip(gy.rows()) {
            for ((spec, h), s) in spectra.iter_mut().zip(&self.hash).zip(&self.sign) {
                spec.iter_mut().for_each(|c| *c = zero);
                for ((v, b), sg) in xr.iter().zip(h).zip(s) {
                    spec[*b as usize].re += *sg as f64 * v;
                }
                self.fwd.process_with_scratch(spec, &mut scratch);
            }
            gf.iter_mut()
                .zip(gyr)
                .for_each(|(c, v)| *c = Complex::new(*v, 0.0));
            self.fwd.process_with_scratch(&mut gf, &mut scratch);
            for k in 0..p {
                for (f, b) in buf.iter_mut().enumerate() {
                    let mut prod = Complex::new(1.0, 0.0);
                    for (j, spec) in spectra.iter().enumerate() {
                        if j != k {
                            prod *= spec[f];
                        }
                    }
                    *b = gf[f] * prod.conj();
                }
                self.inv.process_with_scratch(&mut buf, &mut scratch);
                for ((o, b), sg) in gr.iter_mut().zip(&self.hash[k]).zip(&self.sign[k]) {
                    *o += *sg as f64 * buf[*b as usize].re * inv_n;
                }
            }
        }
        vec![g]
    }
    fn cost(&self, ins: &[usize], out: usize) -> Cost {
        let p = self.hash.len() as u64;
        let (n, d) = (ins[0] as u64, out as u64);
        // p sketches (n adds each), p + 1 complex FFTs (≈5·D·log₂D), p complex products.
        Cost {
            flops: p * n + (p + 1) * 5 * d * log2_ceil(out) + 6 * p * d,
            param_bytes: 5 * p * n,
            activation_bytes: 8 * (n + d) + 16 * d,
            ..Cost::default()
        }
    }
    fn describe(&self) -> String {
        format!("{} sketches into {} buckets", self.hash.len(), self.out)
    }
    fn write(&self, w: &mut Writer) {
        let (p, n) = (self.hash.len(), self.hash[0].len());
        w.scalar("width", self.out);
        w.i32s(
            "buckets",
            vec![p, n],
            self.hash.iter().flatten().map(|v| *v as i32).collect(),
        );
        w.i8s(
            "signs",
            vec![p, n],
            self.sign.iter().flatten().copied().collect(),
        );
    }
    fn read(r: &Reader) -> Result<Self> {
        let out = r.uint("width")?;
        let n = r.in_dim();
        let s = r.shape("buckets")?;
        let p = *s.first().unwrap_or(&0);
        let h = r.i32s("buckets", &[Some(p), Some(n)])?;
        let sg = r.i8s("signs", &[Some(p), Some(n)])?;
        if n == 0 || h.iter().any(|v| *v < 0) {
            return Err(r.bad("negative bucket or empty sketch"));
        }
        let hash = h
            .chunks(n)
            .map(|c| c.iter().map(|v| *v as u32).collect())
            .collect();
        let sign = sg.chunks(n).map(|c| c.to_vec()).collect();
        CountSketchFft::new(out, hash, sign).map_err(|e| r.bad(e))
    }
}
