//! `cos_phase`: the Fourier output with random phases `y_j = c·cos(x_j + b_j)`.

use crate::program::op::{check_finite, one_input, rows_in_place, Cost, Op, Reader, Writer};
use crate::transform::trig::sin_cos;
use crate::Result;
use ndarray::{Array2, ArrayView2};

/// Cosine with phase.
#[derive(Debug, Clone)]
pub struct CosPhase {
    phase: Vec<f64>,
    c: f64,
}

impl CosPhase {
    /// Phases `b` and output scale `c` (finite).
    pub fn new(phase: Vec<f64>, c: f64) -> Result<CosPhase> {
        check_finite(&phase, "cos_phase step: phases", false)?;
        check_finite(&[c], "cos_phase step: scale", false)?;
        Ok(CosPhase { phase, c })
    }
    /// The phases.
    pub fn phases(&self) -> &[f64] {
        &self.phase
    }
    /// The output scale.
    pub fn scale(&self) -> f64 {
        self.c
    }
}

impl Op for CosPhase {
    const NAME: &'static str = "cos_phase";
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
        one_input(ins, self.phase.len())?;
        Ok(self.phase.len())
    }
    fn apply(&self, x: Array2<f64>) -> Array2<f64> {
        let c = self.c;
        rows_in_place(x, |r| {
            r.iter_mut()
                .zip(&self.phase)
                .for_each(|(v, b)| *v = c * sin_cos(*v + b).1)
        })
    }
    fn backward(
        &self,
        xs: &[ArrayView2<f64>],
        _y: ArrayView2<f64>,
        gy: ArrayView2<f64>,
        gp: Option<&mut [f64]>,
        need_gx: bool,
    ) -> Vec<Array2<f64>> {
        // y = c·cos(x + b): ∂y/∂x = ∂y/∂b = −c·sin(x + b).
        let c = self.c;
        let mut g = Array2::<f64>::zeros(gy.dim());
        for ((mut gr, xr), gyr) in g.rows_mut().into_iter().zip(xs[0].rows()).zip(gy.rows()) {
            for j in 0..gr.len() {
                gr[j] = -c * sin_cos(xr[j] + self.phase[j]).0 * gyr[j];
            }
        }
        if let Some(gp) = gp {
            for r in g.rows() {
                gp.iter_mut().zip(r).for_each(|(o, v)| *o += v);
            }
        }
        if !need_gx {
            return vec![];
        }
        vec![g]
    }
    fn params(&self) -> Vec<f64> {
        self.phase.clone()
    }
    fn with_params(&self, p: &[f64]) -> Result<Self> {
        CosPhase::new(p.to_vec(), self.c)
    }
    fn cost(&self, _ins: &[usize], out: usize) -> Cost {
        Cost {
            flops: 2 * out as u64,
            transcendental: out as u64,
            param_bytes: 8 * out as u64,
            activation_bytes: 16 * out as u64,
        }
    }
    fn describe(&self) -> String {
        format!("cos(x + b) × {:.6e}, {} phases", self.c, self.phase.len())
    }
    fn write(&self, w: &mut Writer) {
        w.scalar("c", self.c);
        w.f64s("phases", vec![self.phase.len()], self.phase.clone());
    }
    fn read(r: &Reader) -> Result<Self> {
        CosPhase::new(r.f64s("phases", &[Some(r.in_dim())])?, r.num("c")?)
    }
}
