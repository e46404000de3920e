//! Latency and throughput predicted from step costs and a [`MachineProfile`].

use super::MachineProfile;
use crate::model::{CompiledModel, ExactModel};
use crate::program::{Cost, Program};
use serde::{Deserialize, Serialize};

/// One step of a prediction: its kind (a program step name, or `dense` for a head) and its
/// analytic cost per row.
#[derive(Debug, Clone, PartialEq)]
pub struct CostLine {
    /// Step kind.
    pub kind: String,
    /// Cost per row.
    pub cost: Cost,
}

impl CostLine {
    /// A line.
    pub fn new(kind: &str, cost: Cost) -> CostLine {
        CostLine {
            kind: kind.to_string(),
            cost,
        }
    }
}

/// Predicted speed of a model on the profiled machine.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Prediction {
    /// Single-row latency (µs).
    pub latency_us: f64,
    /// Batched throughput (rows/s).
    pub rows_per_s: f64,
    /// Parameter bytes read per row.
    pub param_bytes: u64,
    /// Flops per row.
    pub flops: u64,
}

fn head_cost(d: usize, k: usize) -> Cost {
    Cost {
        flops: 2 * (d * k) as u64,
        param_bytes: 8 * (d * k + k) as u64,
        activation_bytes: 8 * (d + k) as u64,
        ..Cost::default()
    }
}

fn scaling_cost(d: usize) -> Cost {
    Cost {
        flops: 2 * d as u64,
        param_bytes: 16 * d as u64,
        activation_bytes: 16 * d as u64,
        ..Cost::default()
    }
}

/// Cost lines of a program followed by a `D × k` head (and input scaling when `scaled`).
pub fn program_lines(p: &Program, k: usize, scaled: bool) -> Vec<CostLine> {
    let mut out = Vec::new();
    if scaled {
        out.push(CostLine::new("scale", scaling_cost(p.input_dim())));
    }
    for (ins, c) in p.instrs().iter().zip(p.step_costs()) {
        out.push(CostLine::new(ins.step.name(), c));
    }
    out.push(CostLine::new(head_kind(k), head_cost(p.output_dim(), k)));
    out
}

/// The step kind of a compiled model's head with `k` outputs (narrow heads run at another
/// rate than wide ones).
fn head_kind(k: usize) -> &'static str {
    if k < 16 {
        "head"
    } else {
        "head_wide"
    }
}

/// Cost lines of a compiled model.
pub fn compiled_lines(m: &CompiledModel) -> Vec<CostLine> {
    program_lines(m.program(), m.n_outputs(), m.scaling().is_some())
}

/// Cost lines of an exact model: a kernel block against the support vectors, then the dual
/// coefficients (the same code path as a program's `kernel_block` step).
pub fn exact_lines(m: &ExactModel) -> Vec<CostLine> {
    let (n, d, k) = (m.n_support_vectors(), m.input_dim(), m.n_outputs());
    let mut out = Vec::new();
    if m.scaling().is_some() {
        out.push(CostLine::new("scale", scaling_cost(d)));
    }
    out.push(CostLine::new(
        "kernel_block",
        Cost {
            flops: (3 * n * d + 2 * n) as u64,
            transcendental: n as u64,
            param_bytes: 8 * (n * d + n) as u64,
            activation_bytes: 8 * (d + n) as u64,
        },
    ));
    out.push(CostLine::new("dense", head_cost(n, k)));
    out
}

/// Predicts single-row latency and batched throughput.
///
/// Single row: the call's fixed cost, then per step its fixed cost plus the longer of its
/// arithmetic time (flops and transcendental calls at the step kind's measured rates) and
/// the time to stream its parameters at the bandwidth of a working set holding the whole
/// model. Batched: matrix-product steps (`dense`, the distance part of `kernel_block`) at the
/// measured product rate, the rest at their single-row rates, no fixed costs, spread over
/// the profile's threads.
pub fn predict(m: &MachineProfile, lines: &[CostLine]) -> Prediction {
    let total = lines.iter().fold(Cost::default(), |a, l| a.plus(l.cost));
    let bw = m.bandwidth_bytes_per_ns(total.param_bytes + total.activation_bytes);
    let mut single = m.call_ns;
    let mut batch = 0.0;
    for l in lines {
        let r = m.rate(&l.kind);
        let c = l.cost;
        let arith = r.flop_ns * c.flops as f64 + r.transcendental_ns * c.transcendental as f64;
        let mem = c.param_bytes as f64 / bw;
        single += m.step_ns + arith.max(mem);
        batch += match l.kind.as_str() {
            "dense" | "head" | "head_wide" => c.flops as f64 / m.gemm_flops_per_ns,
            "kernel_block" => {
                c.flops as f64 / m.gemm_flops_per_ns + r.transcendental_ns * c.transcendental as f64
            }
            _ => arith,
        };
    }
    let per_row_ns = (batch / m.threads as f64).max(1e-3);
    Prediction {
        latency_us: single / 1e3,
        rows_per_s: 1e9 / per_row_ns,
        param_bytes: total.param_bytes,
        flops: total.flops,
    }
}

/// [`predict`] for a compiled model.
pub fn predict_compiled(p: &MachineProfile, m: &CompiledModel) -> Prediction {
    predict(p, &compiled_lines(m))
}

/// [`predict`] for an exact model.
pub fn predict_exact(p: &MachineProfile, m: &ExactModel) -> Prediction {
    predict(p, &exact_lines(m))
}
