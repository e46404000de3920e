//! `kernel_block`: kernel values against stored landmarks, `y_l = k(x, L_l)` (Nyström
//! features; `k(x, 0)` for Gaussian envelopes).

use crate::kernel::{Kernel, Prepared};
use crate::linalg;
use crate::program::op::{Cost, Op, Reader, Writer};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2, Axis};

/// Kernel block against landmarks.
#[derive(Debug, Clone)]
pub struct KernelBlock {
    kernel: Kernel,
    landmarks: Array2<f64>,
    prepared: Prepared,
}

impl KernelBlock {
    /// Kernel and landmarks (`L × n`, `L ≥ 1`, finite); the kernel must accept width `n`.
    pub fn new(kernel: Kernel, landmarks: Array2<f64>) -> Result<KernelBlock> {
        if landmarks.nrows() == 0 {
            return Err(Error::input("kernel_block step: no landmarks"));
        }
        if landmarks.iter().any(|v| !v.is_finite()) {
            return Err(Error::input(
                "kernel_block step: a landmark has a non-finite value",
            ));
        }
        kernel.check_dim(landmarks.ncols())?;
        let prepared = Prepared::new(&kernel, landmarks.view());
        Ok(KernelBlock {
            kernel,
            landmarks,
            prepared,
        })
    }
    /// The kernel.
    pub fn kernel(&self) -> &Kernel {
        &self.kernel
    }
    /// The landmarks.
    pub fn landmarks(&self) -> &Array2<f64> {
        &self.landmarks
    }
}

impl Op for KernelBlock {
    const NAME: &'static str = "kernel_block";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        match ins {
            [n] if *n == self.landmarks.ncols() => Ok(self.landmarks.nrows()),
            [n] => Err(format!(
                "landmarks have {} columns but the input width is {n}",
                self.landmarks.ncols()
            )),
            _ => Err(format!("expects one input, got {}", ins.len())),
        }
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        self.kernel.gram_block(x.view(), &self.prepared)
    }
    fn backward(
        &self,
        xs: &[ArrayView2<f64>],
        _y: ArrayView2<f64>,
        gy: ArrayView2<f64>,
        gp: Option<&mut [f64]>,
        need_gx: bool,
    ) -> Vec<Array2<f64>> {
        let x = xs[0];
        let l = self.landmarks.view();
        let k = &self.kernel;
        let d = x.ncols();
        // Leaf kernels of one distance or one dot product: the sums over pairs are matrix
        // products. With C_il = gy_il · f'(·):
        //   Euclidean profile f(r²), r² = ‖(x − l) ⊙ s‖²:
        //     ∂L/∂L_l = −2 s² ⊙ (Σ_i C_il x_i − (Σ_i C_il) L_l),
        //     ∂L/∂x_i =  2 s² ⊙ ((Σ_l C_il) x_i − Σ_l C_il L_l);
        //   dot profile g(x·l): ∂L/∂L = Cᵀ X, ∂L/∂X = C L.
        if k.is_shift_invariant() && !matches!(k, Kernel::Laplacian { .. }) {
            let s = k.inverse_scale(d).expect("shift-invariant");
            let s2: Vec<f64> = s.iter().map(|v| v * v).collect();
            let xs_ = super::super::op::times_columns(x, &s);
            let ls_ = super::super::op::times_columns(l, &s);
            let nx: Vec<f64> = xs_.rows().into_iter().map(|r| r.dot(&r)).collect();
            let nl: Vec<f64> = ls_.rows().into_iter().map(|r| r.dot(&r)).collect();
            let mut c = linalg::abt_seq(xs_.view(), ls_.view());
            for (i, mut row) in c.rows_mut().into_iter().enumerate() {
                for (j, v) in row.iter_mut().enumerate() {
                    let r2 = (nx[i] + nl[j] - 2.0 * *v).max(0.0);
                    *v = gy[[i, j]] * k.euclidean_profile_deriv(r2).expect("euclidean");
                }
            }
            if let Some(gp) = gp {
                let ctx = linalg::ab_seq(c.t(), x);
                let cs = c.sum_axis(Axis(0));
                for (li, (row, lr)) in ctx.rows().into_iter().zip(l.rows()).enumerate() {
                    for j in 0..d {
                        gp[li * d + j] += -2.0 * s2[j] * (row[j] - cs[li] * lr[j]);
                    }
                }
            }
            if !need_gx {
                return vec![];
            }
            let cl = linalg::ab_seq(c.view(), l);
            let rs = c.sum_axis(Axis(1));
            let mut g = Array2::<f64>::zeros(x.dim());
            for (i, ((mut gr, xr), clr)) in g
                .rows_mut()
                .into_iter()
                .zip(x.rows())
                .zip(cl.rows())
                .enumerate()
            {
                for j in 0..d {
                    gr[j] = 2.0 * s2[j] * (rs[i] * xr[j] - clr[j]);
                }
            }
            return vec![g];
        }
        if k.dot_profile_deriv(0.0).is_some() {
            let mut c = linalg::abt_seq(x, l);
            c.zip_mut_with(&gy, |v, g| {
                *v = g * k.dot_profile_deriv(*v).expect("dot kernel")
            });
            if let Some(gp) = gp {
                let gl = linalg::ab_seq(c.t(), x);
                gp.iter_mut().zip(gl.iter()).for_each(|(o, v)| *o += v);
            }
            if !need_gx {
                return vec![];
            }
            return vec![linalg::ab_seq(c.view(), l)];
        }
        // Sums, products and scaled kernels (and the Laplacian): pair by pair.
        let mut gx = Array2::<f64>::zeros(if need_gx { x.dim() } else { (0, 0) });
        let mut gp = gp;
        for (i, xr) in x.rows().into_iter().enumerate() {
            let xr = xr.to_vec();
            for (li, lr) in l.rows().into_iter().enumerate() {
                let w = gy[[i, li]];
                if w == 0.0 {
                    continue;
                }
                let lr = lr.to_vec();
                if let Some(gp) = gp.as_deref_mut() {
                    k.add_grad_second(&xr, &lr, w, &mut gp[li * d..(li + 1) * d]);
                }
                if need_gx {
                    let row = gx.row_mut(i).into_slice().expect("standard layout");
                    k.add_grad_second(&lr, &xr, w, row);
                }
            }
        }
        if need_gx {
            vec![gx]
        } else {
            vec![]
        }
    }
    fn params(&self) -> Vec<f64> {
        self.landmarks.iter().copied().collect()
    }
    fn with_params(&self, p: &[f64]) -> Result<Self> {
        let l = Array2::from_shape_vec(self.landmarks.dim(), p.to_vec())
            .map_err(|e| Error::internal(e.to_string()))?;
        KernelBlock::new(self.kernel.clone(), l)
    }
    fn differentiable(&self) -> bool {
        self.kernel.has_gradient()
    }
    fn cost(&self, ins: &[usize], out: usize) -> Cost {
        // Distance form: one product of width n plus norms and the profile per landmark.
        let l = self.landmarks.len() as u64;
        Cost {
            flops: 3 * l + 2 * out as u64,
            transcendental: out as u64,
            param_bytes: 8 * (l + out as u64),
            activation_bytes: 8 * (ins[0] + out) as u64,
        }
    }
    fn describe(&self) -> String {
        format!(
            "{} against {} landmarks",
            self.kernel,
            self.landmarks.nrows()
        )
    }
    fn write(&self, w: &mut Writer) {
        w.scalar("kernel", self.kernel.to_string());
        w.f64s(
            "landmarks",
            vec![self.landmarks.nrows(), self.landmarks.ncols()],
            self.landmarks.iter().copied().collect(),
        );
    }
    fn read(r: &Reader) -> Result<Self> {
        let kernel: Kernel = r.string("kernel")?.parse().map_err(|e| r.bad(e))?;
        let l = r.matrix("landmarks", None, Some(r.in_dim()))?;
        KernelBlock::new(kernel, l).map_err(|e| r.bad(e))
    }
}
