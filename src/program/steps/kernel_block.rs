//! `kernel_block`: kernel values against stored landmarks, `y_l = k(x, L_l)` (Nyström
//! features; `k(x, 0)` for Gaussian envelopes).

use crate::kernel::{Kernel, Prepared};
use crate::program::op::{Cost, Op, Reader, Writer};
use crate::{Error, Result};
use ndarray::Array2;

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
