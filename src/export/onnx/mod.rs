//! ONNX export (default opset domain 17) of a compiled model: input `X` float32 `[N, d]`;
//! outputs `decision` float32 `[N, k]` (same order and sign as `score`), and for
//! classifiers `label_index` int64 `[N]` and `label` string `[N]`.
//!
//! Each step is lowered to standard operators in `lower_step`. Structured steps keep
//! their structure: a Walsh–Hadamard block of 32 or fewer is one `MatMul` by the dense
//! Hadamard matrix; a larger one is ⌈log₈ b⌉ stages of `Reshape` + `MatMul` by `H₈` (or
//! `H₄`/`H₂` for the last stage), which costs `O(b log b)` instead of `O(b²)`. Count sketches
//! use the `DFT` operator. f16 weights are stored as float16 and `Cast`; int8 weights use
//! `DequantizeLinear` with per-output scales.

pub mod proto;
pub mod svm;

use super::precision::{Quant, Quantized};
use crate::fsio::write_atomic;
use crate::kernel::Kernel;
use crate::model::guarded::GuardRule;
use crate::model::{CompiledModel, GuardedModel, Task};
use crate::program::Step;
use crate::Result;
use prost::Message;
use proto::*;
use std::path::{Path, PathBuf};

/// The opset of the default domain.
pub const OPSET: i64 = 17;

/// A graph being built.
pub(crate) struct G {
    pub nodes: Vec<NodeProto>,
    pub inits: Vec<TensorProto>,
    count: usize,
}

fn attr_i(name: &str, v: i64) -> AttributeProto {
    AttributeProto {
        name: Some(name.into()),
        r#type: Some(attr_type::INT),
        i: Some(v),
        ..Default::default()
    }
}

fn attr_ints(name: &str, v: &[i64]) -> AttributeProto {
    AttributeProto {
        name: Some(name.into()),
        r#type: Some(attr_type::INTS),
        ints: v.to_vec(),
        ..Default::default()
    }
}

impl G {
    fn new() -> G {
        G {
            nodes: Vec::new(),
            inits: Vec::new(),
            count: 0,
        }
    }

    fn fresh(&mut self, hint: &str) -> String {
        self.count += 1;
        format!("{hint}_{}", self.count)
    }

    /// One node with one output.
    fn op(&mut self, op: &str, inputs: &[&str], attrs: Vec<AttributeProto>) -> String {
        let out = self.fresh(&op.to_lowercase());
        self.nodes.push(NodeProto {
            input: inputs.iter().map(|s| s.to_string()).collect(),
            output: vec![out.clone()],
            name: Some(format!("n{}", self.count)),
            op_type: Some(op.into()),
            attribute: attrs,
            ..Default::default()
        });
        out
    }

    fn init(&mut self, hint: &str, dims: &[usize], dt: i32, raw: Vec<u8>) -> String {
        let name = self.fresh(hint);
        self.inits.push(TensorProto {
            dims: dims.iter().map(|d| *d as i64).collect(),
            data_type: Some(dt),
            name: Some(name.clone()),
            raw_data: Some(raw),
            ..Default::default()
        });
        name
    }

    fn f32s(&mut self, hint: &str, dims: &[usize], v: &[f32]) -> String {
        let raw = v.iter().flat_map(|x| x.to_le_bytes()).collect();
        self.init(hint, dims, data_type::FLOAT, raw)
    }

    fn scalar(&mut self, v: f64) -> String {
        self.f32s("c", &[], &[v as f32])
    }

    fn i64s(&mut self, hint: &str, v: &[i64]) -> String {
        let raw = v.iter().flat_map(|x| x.to_le_bytes()).collect();
        self.init(hint, &[v.len()], data_type::INT64, raw)
    }

    /// A real weight tensor at its export precision, as a float tensor of `dims`.
    /// `transpose` stores a 2-D tensor transposed (for `MatMul`).
    fn weights(&mut self, hint: &str, shape: &[usize], q: &Quant, transpose: bool) -> String {
        let (dims, order): (Vec<usize>, Box<dyn Fn(usize) -> usize>) =
            if transpose && shape.len() == 2 {
                let (r, c) = (shape[0], shape[1]);
                (vec![c, r], Box::new(move |i| (i % r) * c + i / r))
            } else {
                (shape.to_vec(), Box::new(|i| i))
            };
        let n: usize = shape.iter().product();
        match q {
            Quant::F16(v) => {
                let raw = (0..n).flat_map(|i| v[order(i)].to_le_bytes()).collect();
                let t = self.init(hint, &dims, data_type::FLOAT16, raw);
                self.op("Cast", &[&t], vec![attr_i("to", data_type::FLOAT as i64)])
            }
            Quant::I8 { q, scale, axis } => {
                let raw = (0..n).map(|i| q[order(i)] as u8).collect();
                let t = self.init(hint, &dims, data_type::INT8, raw);
                let s = self.f32s("scale", &[scale.len()], scale);
                let zeros = vec![0u8; scale.len()];
                let z = self.init("zero", &[scale.len()], data_type::INT8, zeros);
                let ax = if transpose { 1 - *axis } else { *axis } as i64;
                self.op("DequantizeLinear", &[&t, &s, &z], vec![attr_i("axis", ax)])
            }
            other => {
                let v = other.values(shape);
                let t: Vec<f32> = (0..n).map(|i| v[order(i)]).collect();
                self.f32s(hint, &dims, &t)
            }
        }
    }
}

/// `x·Hᵀ` blockwise for blocks of `block` along the last axis of a `[N, n]` value.
fn wht(g: &mut G, u: &str, n: usize, block: usize) -> (String, String) {
    let h = |r: usize| -> Vec<f32> {
        (0..r * r)
            .map(|i| {
                if ((i / r) & (i % r)).count_ones().is_multiple_of(2) {
                    1.0
                } else {
                    -1.0
                }
            })
            .collect()
    };
    if block <= 32 {
        let hm = g.f32s("hadamard", &[block, block], &h(block));
        let shp = g.i64s("shape", &[-1, (n / block) as i64, block as i64]);
        let r = g.op("Reshape", &[u, &shp], vec![]);
        let m = g.op("MatMul", &[&r, &hm], vec![]);
        let back = g.i64s("shape", &[-1, n as i64]);
        return (
            g.op("Reshape", &[&m, &back], vec![]),
            format!("dense {block}×{block} Hadamard MatMul"),
        );
    }
    if block <= 64 * 64 {
        // H_b = H_f1 ⊗ H_f2 (Sylvester), so a block read as an f1 × f2 matrix M becomes
        // H_f1 · M · H_f2: one MatMul on the last axis, one with H_f1 on the left
        // (broadcast over rows and blocks). Two dense products beat ⌈log₈ b⌉ stages of
        // 8 × 8 ones in onnxruntime (a Hadamard 4,096 map on 784 columns: 6,400 → see
        // docs/exporting.md for the measured rows per second).
        let f2 = 1usize << (block.trailing_zeros().div_ceil(2));
        let f1 = block / f2;
        let h2 = g.f32s("hadamard", &[f2, f2], &h(f2));
        let h1 = g.f32s("hadamard", &[f1, f1], &h(f1));
        let shp = g.i64s("shape", &[-1, (n / block) as i64, f1 as i64, f2 as i64]);
        let r = g.op("Reshape", &[u, &shp], vec![]);
        let right = g.op("MatMul", &[&r, &h2], vec![]);
        let left = g.op("MatMul", &[&h1, &right], vec![]);
        let back = g.i64s("shape", &[-1, n as i64]);
        return (
            g.op("Reshape", &[&left, &back], vec![]),
            format!("H{f1} · block · H{f2} (two MatMuls, Kronecker factors of H{block})"),
        );
    }
    let mut v = u.to_string();
    let mut span = 1usize;
    let mut stages = 0;
    while span < block {
        let r = (block / span).min(8);
        let hm = g.f32s("hadamard", &[r, r], &h(r));
        let shp = g.i64s(
            "shape",
            &[-1, (n / (r * span)) as i64, r as i64, span as i64],
        );
        let t = g.op("Reshape", &[&v, &shp], vec![]);
        v = g.op("MatMul", &[&hm, &t], vec![]);
        span *= r;
        stages += 1;
    }
    let back = g.i64s("shape", &[-1, n as i64]);
    (
        g.op("Reshape", &[&v, &back], vec![]),
        format!("{stages} Reshape+MatMul stages (radix 8), O(b log b)"),
    )
}

/// `K(u, L)` for a kernel expression: `[N, L]` from `u` `[N, n]` and landmarks `l` (f32 values,
/// `[L, n]`, stored at the export precision by the caller as `lname`).
fn kernel(g: &mut G, k: &Kernel, u: &str, l: &[f32], nl: usize, n: usize) -> String {
    match k {
        Kernel::Sum(parts) | Kernel::Product(parts) => {
            let op = if matches!(k, Kernel::Sum(_)) {
                "Add"
            } else {
                "Mul"
            };
            let mut acc = kernel(g, &parts[0], u, l, nl, n);
            for p in &parts[1..] {
                let v = kernel(g, p, u, l, nl, n);
                acc = g.op(op, &[&acc, &v], vec![]);
            }
            acc
        }
        Kernel::Scaled(c, inner) => {
            let v = kernel(g, inner, u, l, nl, n);
            let c = g.scalar(*c);
            g.op("Mul", &[&v, &c], vec![])
        }
        Kernel::Laplacian { .. } => {
            let s = k.inverse_scale(n).expect("shift-invariant");
            let sf: Vec<f32> = s.iter().map(|v| *v as f32).collect();
            let ls: Vec<f32> = (0..nl * n).map(|i| l[i] * sf[i % n]).collect();
            let sv = g.f32s("scale", &[n], &sf);
            let us = g.op("Mul", &[u, &sv], vec![]);
            let ax = g.i64s("axes", &[1]);
            let u3 = g.op("Unsqueeze", &[&us, &ax], vec![]);
            let lt = g.f32s("landmarks", &[nl, n], &ls);
            let d = g.op("Sub", &[&u3, &lt], vec![]);
            let a = g.op("Abs", &[&d], vec![]);
            let ax2 = g.i64s("axes", &[2]);
            let r = g.op("ReduceSum", &[&a, &ax2], vec![attr_i("keepdims", 0)]);
            let m1 = g.scalar(-1.0);
            let e = g.op("Mul", &[&r, &m1], vec![]);
            g.op("Exp", &[&e], vec![])
        }
        k if k.is_shift_invariant() => {
            let s = k.inverse_scale(n).expect("shift-invariant");
            let sf: Vec<f32> = s.iter().map(|v| *v as f32).collect();
            // Centred on the landmarks' mean (distances do not change), so that the
            // distance form ‖u‖² + ‖l‖² − 2u·l loses less to cancellation in f32.
            let mu: Vec<f64> = (0..n)
                .map(|j| (0..nl).map(|r| (l[r * n + j] * sf[j]) as f64).sum::<f64>() / nl as f64)
                .collect();
            let ls: Vec<f32> = (0..nl * n)
                .map(|i| ((l[i] * sf[i % n]) as f64 - mu[i % n]) as f32)
                .collect();
            let lsq: Vec<f32> = (0..nl)
                .map(|j| ls[j * n..(j + 1) * n].iter().map(|v| v * v).sum())
                .collect();
            let sv = g.f32s("scale", &[n], &sf);
            let mv: Vec<f32> = mu.iter().map(|v| *v as f32).collect();
            let mt = g.f32s("centre", &[n], &mv);
            let us0 = g.op("Mul", &[u, &sv], vec![]);
            let us = g.op("Sub", &[&us0, &mt], vec![]);
            let lt: Vec<f32> = (0..nl * n).map(|i| ls[(i % nl) * n + i / nl]).collect();
            let ltt = g.f32s("landmarks_t", &[n, nl], &lt);
            let dot = g.op("MatMul", &[&us, &ltt], vec![]);
            let usq = g.op("Mul", &[&us, &us], vec![]);
            let ax = g.i64s("axes", &[1]);
            let un = g.op("ReduceSum", &[&usq, &ax], vec![attr_i("keepdims", 1)]);
            let lnv = g.f32s("norms", &[1, nl], &lsq);
            let m2 = g.scalar(-2.0);
            let dd = g.op("Mul", &[&dot, &m2], vec![]);
            let a = g.op("Add", &[&dd, &un], vec![]);
            let b = g.op("Add", &[&a, &lnv], vec![]);
            let zero = g.scalar(0.0);
            let r2 = g.op("Max", &[&b, &zero], vec![]);
            profile(g, k, &r2)
        }
        _ => {
            let lt: Vec<f32> = (0..nl * n).map(|i| l[(i % nl) * n + i / nl]).collect();
            let ltt = g.f32s("landmarks_t", &[n, nl], &lt);
            let dot = g.op("MatMul", &[u, &ltt], vec![]);
            match k {
                Kernel::Linear => dot,
                Kernel::Polynomial {
                    degree,
                    gamma,
                    coef0,
                } => {
                    let gm = g.scalar(*gamma);
                    let c0 = g.scalar(*coef0);
                    let a = g.op("Mul", &[&dot, &gm], vec![]);
                    let b = g.op("Add", &[&a, &c0], vec![]);
                    let p = g.scalar(*degree as f64);
                    g.op("Pow", &[&b, &p], vec![])
                }
                Kernel::Sigmoid { gamma, coef0 } => {
                    let gm = g.scalar(*gamma);
                    let c0 = g.scalar(*coef0);
                    let a = g.op("Mul", &[&dot, &gm], vec![]);
                    let b = g.op("Add", &[&a, &c0], vec![]);
                    g.op("Tanh", &[&b], vec![])
                }
                Kernel::ArcCos { order } => {
                    let lnorm: Vec<f32> = (0..nl)
                        .map(|j| {
                            l[j * n..(j + 1) * n]
                                .iter()
                                .map(|v| v * v)
                                .sum::<f32>()
                                .sqrt()
                        })
                        .collect();
                    let ax = g.i64s("axes", &[1]);
                    let usq = g.op("Mul", &[u, u], vec![]);
                    let s = g.op("ReduceSum", &[&usq, &ax], vec![attr_i("keepdims", 1)]);
                    let un = g.op("Sqrt", &[&s], vec![]);
                    let ln = g.f32s("norms", &[1, nl], &lnorm);
                    let nn = g.op("Mul", &[&un, &ln], vec![]);
                    let tiny = g.scalar(1e-30);
                    let den = g.op("Max", &[&nn, &tiny], vec![]);
                    let cs = g.op("Div", &[&dot, &den], vec![]);
                    let lo = g.scalar(-1.0);
                    let hi = g.scalar(1.0);
                    let cc = g.op("Clip", &[&cs, &lo, &hi], vec![]);
                    let th = g.op("Acos", &[&cc], vec![]);
                    let pi = g.scalar(std::f64::consts::PI);
                    let pmt = g.op("Sub", &[&pi, &th], vec![]);
                    if *order == 0 {
                        g.op("Div", &[&pmt, &pi], vec![])
                    } else {
                        let sn = g.op("Sin", &[&th], vec![]);
                        let co = g.op("Cos", &[&th], vec![]);
                        let t = g.op("Mul", &[&pmt, &co], vec![]);
                        let j = g.op("Add", &[&sn, &t], vec![]);
                        let a = g.op("Mul", &[&nn, &j], vec![]);
                        g.op("Div", &[&a, &pi], vec![])
                    }
                }
                _ => unreachable!("every kernel is shift-invariant or a dot-product kernel"),
            }
        }
    }
}

/// The profile of a Euclidean kernel of the scaled squared distance `r2`.
fn profile(g: &mut G, k: &Kernel, r2: &str) -> String {
    use crate::kernel::Nu;
    match k {
        Kernel::Gaussian { .. } => {
            let h = g.scalar(-0.5);
            let a = g.op("Mul", &[r2, &h], vec![]);
            g.op("Exp", &[&a], vec![])
        }
        Kernel::Matern { nu, .. } => {
            let r = g.op("Sqrt", &[r2], vec![]);
            let c = match nu {
                Nu::Half => 1.0,
                Nu::ThreeHalves => 3f64.sqrt(),
                Nu::FiveHalves => 5f64.sqrt(),
            };
            let cs = g.scalar(c);
            let a = g.op("Mul", &[&r, &cs], vec![]);
            let m1 = g.scalar(-1.0);
            let na = g.op("Mul", &[&a, &m1], vec![]);
            let e = g.op("Exp", &[&na], vec![]);
            let one = g.scalar(1.0);
            let poly = match nu {
                Nu::Half => return e,
                Nu::ThreeHalves => g.op("Add", &[&a, &one], vec![]),
                Nu::FiveHalves => {
                    let f = g.scalar(5.0 / 3.0);
                    let t = g.op("Mul", &[r2, &f], vec![]);
                    let s = g.op("Add", &[&a, &one], vec![]);
                    g.op("Add", &[&s, &t], vec![])
                }
            };
            g.op("Mul", &[&poly, &e], vec![])
        }
        Kernel::RationalQuadratic { alpha, .. } => {
            let f = g.scalar(1.0 / (2.0 * alpha));
            let t = g.op("Mul", &[r2, &f], vec![]);
            let one = g.scalar(1.0);
            let b = g.op("Add", &[&t, &one], vec![]);
            let p = g.scalar(-alpha);
            g.op("Pow", &[&b, &p], vec![])
        }
        _ => unreachable!("a Euclidean kernel"),
    }
}

/// Lowers step `i` reading `ins` (value names of widths `dims`); returns the output name
/// and how the step was lowered.
fn lower_step(
    g: &mut G,
    q: &Quantized,
    i: usize,
    step: &Step,
    ins: &[String],
    dims: &[usize],
) -> Result<(String, String)> {
    let t = |f: &str| format!("step{i}.{f}");
    let u = ins[0].as_str();
    let n = dims[0];
    Ok(match step {
        Step::Scale(_) => {
            let (s, qv) = q.get(&t("factors"));
            let w = g.weights("factors", s, qv, false);
            (g.op("Mul", &[u, &w], vec![]), "Mul".into())
        }
        Step::ConstScale(c) => {
            let c = g.scalar(c.value());
            (g.op("Mul", &[u, &c], vec![]), "Mul".into())
        }
        Step::Pad(p) => {
            let pads = g.i64s("pads", &[0, 0, 0, (p.width() - n) as i64]);
            (g.op("Pad", &[u, &pads], vec![]), "Pad".into())
        }
        Step::Tile(tl) => {
            let r = g.i64s("repeats", &[1, tl.copies() as i64]);
            (g.op("Tile", &[u, &r], vec![]), "Tile".into())
        }
        Step::Signs(_) => {
            let (s, qv) = q.get(&t("signs"));
            let w = g.f32s("signs", s, &qv.values(s));
            (g.op("Mul", &[u, &w], vec![]), "Mul by ±1".into())
        }
        Step::Wht(w) => wht(g, u, n, w.block()),
        Step::Gather(gt) => {
            let idx: Vec<i64> = gt.indices().iter().map(|v| *v as i64).collect();
            let ix = g.i64s("indices", &idx);
            (
                g.op("Gather", &[u, &ix], vec![attr_i("axis", 1)]),
                "Gather".into(),
            )
        }
        Step::Dense(_) => {
            let (s, qv) = q.get(&t("weights"));
            let w = g.weights("weights", s, qv, true);
            (g.op("MatMul", &[u, &w], vec![]), "MatMul".into())
        }
        Step::CosSin(cs) => {
            let c = g.scalar(cs.scale());
            let a = g.op("Cos", &[u], vec![]);
            let b = g.op("Sin", &[u], vec![]);
            let ac = g.op("Mul", &[&a, &c], vec![]);
            let bc = g.op("Mul", &[&b, &c], vec![]);
            (
                g.op("Concat", &[&ac, &bc], vec![attr_i("axis", 1)]),
                "Cos, Sin, Concat".into(),
            )
        }
        Step::CosPhase(cp) => {
            let (s, qv) = q.get(&t("phases"));
            let ph = g.weights("phases", s, qv, false);
            let a = g.op("Add", &[u, &ph], vec![]);
            let co = g.op("Cos", &[&a], vec![]);
            let c = g.scalar(cp.scale());
            (g.op("Mul", &[&co, &c], vec![]), "Add, Cos, Mul".into())
        }
        Step::KernelBlock(kb) => {
            let l = q.f32s(&t("landmarks"));
            let nl = kb.landmarks().nrows();
            (
                kernel(g, kb.kernel(), u, &l, nl, n),
                format!("kernel {} against {nl} landmarks", kb.kernel()),
            )
        }
        Step::CountSketchFft(cs) => {
            let w = cs.width();
            let mut acc: Option<String> = None;
            for (h, sg) in cs.hashes().iter().zip(cs.signs()) {
                let mut m = vec![0f32; n * w];
                for j in 0..n {
                    m[j * w + h[j] as usize] += sg[j] as f32;
                }
                let mt = g.f32s("sketch", &[n, w], &m);
                let c = g.op("MatMul", &[u, &mt], vec![]);
                let ax = g.i64s("axes", &[2]);
                let c3 = g.op("Unsqueeze", &[&c, &ax], vec![]);
                let f = g.op("DFT", &[&c3], vec![attr_i("axis", 1)]);
                acc = Some(match acc {
                    None => f,
                    Some(a) => complex_mul(g, &a, &f),
                });
            }
            let a = acc.expect("at least one sketch");
            let inv = g.op("DFT", &[&a], vec![attr_i("axis", 1), attr_i("inverse", 1)]);
            let starts = g.i64s("starts", &[0]);
            let ends = g.i64s("ends", &[1]);
            let axes = g.i64s("axes", &[2]);
            let re = g.op("Slice", &[&inv, &starts, &ends, &axes], vec![]);
            let sq = g.i64s("axes", &[2]);
            (
                g.op("Squeeze", &[&re, &sq], vec![]),
                "MatMul (count sketch), DFT, complex products, inverse DFT".into(),
            )
        }
        Step::Relu(_) => (g.op("Relu", &[u], vec![]), "Relu".into()),
        Step::Heaviside(_) => {
            let z = g.scalar(0.0);
            let gt = g.op("Greater", &[u, &z], vec![]);
            (
                g.op("Cast", &[&gt], vec![attr_i("to", data_type::FLOAT as i64)]),
                "Greater, Cast".into(),
            )
        }
        Step::Concat(_) => {
            let r: Vec<&str> = ins.iter().map(|s| s.as_str()).collect();
            (g.op("Concat", &r, vec![attr_i("axis", 1)]), "Concat".into())
        }
        Step::Product(_) => {
            let mut acc = ins[0].clone();
            for v in &ins[1..] {
                acc = g.op("Mul", &[&acc, v], vec![]);
            }
            (acc, "Mul".into())
        }
        Step::Append(a) => {
            let one_col = column_of(g, u, a.value());
            (
                g.op("Concat", &[u, &one_col], vec![attr_i("axis", 1)]),
                "Concat with a constant column".into(),
            )
        }
        Step::SegmentProduct(sp) => {
            let lens = sp.lengths();
            let maxl = lens.iter().copied().max().unwrap_or(0).max(1) as usize;
            // Pad every segment to the longest with an index of an appended 1.
            let ones = column_of(g, u, 1.0);
            let ext = g.op("Concat", &[u, &ones], vec![attr_i("axis", 1)]);
            let mut idx = Vec::with_capacity(lens.len() * maxl);
            let mut at = 0i64;
            for l in lens {
                for j in 0..maxl {
                    idx.push(if (j as u32) < *l {
                        at + j as i64
                    } else {
                        n as i64
                    });
                }
                at += *l as i64;
            }
            let ix = g.i64s("indices", &idx);
            let gth = g.op("Gather", &[&ext, &ix], vec![attr_i("axis", 1)]);
            let shp = g.i64s("shape", &[-1, lens.len() as i64, maxl as i64]);
            let r = g.op("Reshape", &[&gth, &shp], vec![]);
            (
                g.op(
                    "ReduceProd",
                    &[&r],
                    vec![attr_ints("axes", &[2]), attr_i("keepdims", 0)],
                ),
                "Gather, Reshape, ReduceProd".into(),
            )
        }
    })
}

/// A `[N, 1]` column holding `c`, shaped after `u`.
fn column_of(g: &mut G, u: &str, c: f64) -> String {
    let starts = g.i64s("starts", &[0]);
    let ends = g.i64s("ends", &[1]);
    let axes = g.i64s("axes", &[1]);
    let first = g.op("Slice", &[u, &starts, &ends, &axes], vec![]);
    let zero = g.scalar(0.0);
    let z = g.op("Mul", &[&first, &zero], vec![]);
    // Mul by 0 keeps NaN/inf of the input: use Where on finiteness-free logic instead.
    let isn = g.op("IsNaN", &[&z], vec![]);
    let cz = g.scalar(0.0);
    let clean = g.op("Where", &[&isn, &cz, &z], vec![]);
    let c = g.scalar(c);
    g.op("Add", &[&clean, &c], vec![])
}

/// `(a + ib)(c + id)` for `[N, W, 2]` complex tensors.
fn complex_mul(g: &mut G, x: &str, y: &str) -> String {
    let part = |g: &mut G, v: &str, k: i64| {
        let s = g.i64s("starts", &[k]);
        let e = g.i64s("ends", &[k + 1]);
        let a = g.i64s("axes", &[2]);
        g.op("Slice", &[v, &s, &e, &a], vec![])
    };
    let (a, b) = (part(g, x, 0), part(g, x, 1));
    let (c, d) = (part(g, y, 0), part(g, y, 1));
    let ac = g.op("Mul", &[&a, &c], vec![]);
    let bd = g.op("Mul", &[&b, &d], vec![]);
    let ad = g.op("Mul", &[&a, &d], vec![]);
    let bc = g.op("Mul", &[&b, &c], vec![]);
    let re = g.op("Sub", &[&ac, &bd], vec![]);
    let im = g.op("Add", &[&ad, &bc], vec![]);
    g.op("Concat", &[&re, &im], vec![attr_i("axis", 2)])
}

fn value_info(name: &str, elem: i32, dims: &[Option<i64>]) -> ValueInfoProto {
    ValueInfoProto {
        name: Some(name.into()),
        r#type: Some(TypeProto {
            tensor_type: Some(TypeTensor {
                elem_type: Some(elem),
                shape: Some(TensorShapeProto {
                    dim: dims
                        .iter()
                        .map(|d| match d {
                            Some(v) => Dimension {
                                dim_value: Some(*v),
                                dim_param: None,
                            },
                            None => Dimension {
                                dim_value: None,
                                dim_param: Some("N".into()),
                            },
                        })
                        .collect(),
                }),
            }),
        }),
        doc_string: None,
    }
}

/// The exported graph's input: the raw rows, `[N, d]` float.
pub const INPUT_NAME: &str = "input_rows";
/// The exported graph's class output (classifiers): the predicted class, `[N]` string.
pub const CLASS_NAME: &str = "predicted_class";
/// A guarded graph's stage output, `[N]` int64: 0 the compiled stage answered, 1 the exact
/// model, 2 the compiled stage with some pairs recomputed exactly.
pub const STAGE_NAME: &str = "stage";

/// The one-vs-one vote matrices over `nl` classes: `[pairs, nl]`, 1 where the pair's
/// first (`a`) or second (`b`) class is the column.
fn vote_matrices(nl: usize) -> (Vec<f32>, Vec<f32>) {
    let pairs = nl * (nl - 1) / 2;
    let (mut a, mut bm) = (vec![0f32; pairs * nl], vec![0f32; pairs * nl]);
    let mut pi = 0;
    for i in 0..nl {
        for j in i + 1..nl {
            a[pi * nl + i] = 1.0;
            bm[pi * nl + j] = 1.0;
            pi += 1;
        }
    }
    (a, bm)
}

/// The guard of a guarded graph: the exact expansion of every row from the scaled input
/// `xs` (a graph evaluates both branches), the guard's mask over the compiled decisions
/// `dec` (the rule of `GuardedModel::decision`), and the selection. Returns the decisions,
/// the stage per row and how it was lowered.
fn guarded(gr: &mut G, gm: &GuardedModel, xs: &str, dec: &str) -> (String, String, String) {
    let ex = gm.exact();
    let sv = ex.support_vectors();
    let (nsv, d) = sv.dim();
    let k = ex.n_outputs();
    let svf: Vec<f32> = sv.iter().map(|v| *v as f32).collect();
    let kx = kernel(gr, ex.kernel(), xs, &svf, nsv, d);
    let cf: Vec<f32> = ex.coef().iter().map(|v| *v as f32).collect();
    let ct = gr.f32s("exact_coef", &[nsv, k], &cf);
    let m = gr.op("MatMul", &[&kx, &ct], vec![]);
    let bf: Vec<f32> = ex.intercept().iter().map(|v| *v as f32).collect();
    let bt = gr.f32s("exact_bias", &[k], &bf);
    let exact = gr.op("Add", &[&m, &bt], vec![]);
    let t = gr.f32s("threshold", &[], &[gm.threshold() as f32]);
    let nl = ex.labels().len();
    let ax1 = gr.i64s("axes", &[1]);
    let mask = match (gm.guard_rule(), ex.task()) {
        (GuardRule::Row, Task::Binary) => {
            let a = gr.op("Abs", &[dec], vec![]);
            gr.op("Less", &[&a, &t], vec![])
        }
        (GuardRule::Row, Task::Ovr) => {
            let two = gr.i64s("k", &[2]);
            let top = gr.op("TopK", &[dec, &two], vec![attr_i("axis", 1)]);
            let idx = gr.fresh("topk_indices");
            gr.nodes.last_mut().expect("node").output.push(idx);
            let dv = gr.f32s("top_minus_second", &[2, 1], &[1.0, -1.0]);
            let conf = gr.op("MatMul", &[&top, &dv], vec![]);
            gr.op("Less", &[&conf, &t], vec![])
        }
        (GuardRule::Row, _) => {
            // One-vs-one: the predicted class's smallest pair value, oriented towards it.
            let (a, bm) = vote_matrices(nl);
            let pairs = k;
            let at = gr.f32s("votes_pos", &[pairs, nl], &a);
            let bt2 = gr.f32s("votes_neg", &[pairs, nl], &bm);
            let z = gr.scalar(0.0);
            let gt = gr.op("Greater", &[dec, &z], vec![]);
            let pos = gr.op("Cast", &[&gt], vec![attr_i("to", data_type::FLOAT as i64)]);
            let one = gr.scalar(1.0);
            let neg = gr.op("Sub", &[&one, &pos], vec![]);
            let va = gr.op("MatMul", &[&pos, &at], vec![]);
            let vb = gr.op("MatMul", &[&neg, &bt2], vec![]);
            let votes = gr.op("Add", &[&va, &vb], vec![]);
            let best = gr.op(
                "ArgMax",
                &[&votes],
                vec![attr_i("axis", 1), attr_i("keepdims", 1)],
            );
            let orient: Vec<f32> = a.iter().zip(&bm).map(|(x, y)| x - y).collect();
            let off: Vec<f32> = orient
                .iter()
                .map(|o| if *o == 0.0 { f32::INFINITY } else { 0.0 })
                .collect();
            let ot = gr.f32s("orient", &[pairs, nl], &orient);
            let of = gr.f32s("not_involved", &[pairs, nl], &off);
            let ax2 = gr.i64s("axes", &[2]);
            let d3 = gr.op("Unsqueeze", &[dec, &ax2], vec![]);
            let o = gr.op("Mul", &[&d3, &ot], vec![]);
            let o2 = gr.op("Add", &[&o, &of], vec![]);
            let mins = gr.op(
                "ReduceMin",
                &[&o2],
                vec![attr_ints("axes", &[1]), attr_i("keepdims", 0)],
            );
            let conf = gr.op("GatherElements", &[&mins, &best], vec![attr_i("axis", 1)]);
            gr.op("Less", &[&conf, &t], vec![])
        }
        (GuardRule::Pairs, _) => {
            let (a, bm) = vote_matrices(nl);
            let pairs = k;
            let at = gr.f32s("votes_pos", &[pairs, nl], &a);
            let bt2 = gr.f32s("votes_neg", &[pairs, nl], &bm);
            let both: Vec<f32> = (0..nl * pairs)
                .map(|i| {
                    let (c, p) = (i / pairs, i % pairs);
                    a[p * nl + c] + bm[p * nl + c]
                })
                .collect();
            let bth = gr.f32s("pairs_of_class", &[nl, pairs], &both);
            let z = gr.scalar(0.0);
            let one = gr.scalar(1.0);
            let gt = gr.op("Greater", &[dec, &z], vec![]);
            let w = gr.op("Cast", &[&gt], vec![attr_i("to", data_type::FLOAT as i64)]);
            let wn = gr.op("Sub", &[&one, &w], vec![]);
            let ab = gr.op("Abs", &[dec], vec![]);
            let uncb = gr.op("Less", &[&ab, &t], vec![]);
            let unc = gr.op(
                "Cast",
                &[&uncb],
                vec![attr_i("to", data_type::FLOAT as i64)],
            );
            let mm = |gr: &mut G, x: &str, y: &str| gr.op("MatMul", &[x, y], vec![]);
            let va = mm(gr, &w, &at);
            let vb = mm(gr, &wn, &bt2);
            let votes = gr.op("Add", &[&va, &vb], vec![]);
            let uw = gr.op("Mul", &[&unc, &w], vec![]);
            let uwn = gr.op("Mul", &[&unc, &wn], vec![]);
            let la = mm(gr, &uw, &at);
            let lb = mm(gr, &uwn, &bt2);
            let loss = gr.op("Add", &[&la, &lb], vec![]);
            let ga = mm(gr, &uwn, &at);
            let gb = mm(gr, &uw, &bt2);
            let gain = gr.op("Add", &[&ga, &gb], vec![]);
            let best = gr.op(
                "ArgMax",
                &[&votes],
                vec![attr_i("axis", 1), attr_i("keepdims", 1)],
            );
            let vl = gr.op("Sub", &[&votes, &loss], vec![]);
            let floor = gr.op("GatherElements", &[&vl, &best], vec![attr_i("axis", 1)]);
            let vg = gr.op("Add", &[&votes, &gain], vec![]);
            let reach = gr.op("GreaterOrEqual", &[&vg, &floor], vec![]);
            let classes: Vec<i64> = (0..nl as i64).collect();
            let ct2 = gr.i64s("classes", &classes);
            let isbest = gr.op("Equal", &[&ct2, &best], vec![]);
            let cont = gr.op("Or", &[&reach, &isbest], vec![]);
            let contf = gr.op(
                "Cast",
                &[&cont],
                vec![attr_i("to", data_type::FLOAT as i64)],
            );
            let pc = mm(gr, &contf, &bth);
            let pcb = gr.op("Greater", &[&pc, &z], vec![]);
            gr.op("And", &[&uncb, &pcb], vec![])
        }
    };
    let out = gr.op("Where", &[&mask, &exact, dec], vec![]);
    // The stage: 0 none exact, 1 all, 2 some.
    let mf = gr.op(
        "Cast",
        &[&mask],
        vec![attr_i("to", data_type::FLOAT as i64)],
    );
    let cnt = gr.op("ReduceSum", &[&mf, &ax1], vec![attr_i("keepdims", 0)]);
    let width = if gm.guard_rule() == GuardRule::Pairs || ex.task() == Task::Binary {
        k
    } else {
        1
    };
    let z = gr.scalar(0.0);
    let any = gr.op("Greater", &[&cnt, &z], vec![]);
    let wv = gr.scalar(width as f64);
    let all = gr.op("Equal", &[&cnt, &wv], vec![]);
    let notall = gr.op("Not", &[&all], vec![]);
    let part = gr.op("And", &[&any, &notall], vec![]);
    let a64 = gr.op("Cast", &[&any], vec![attr_i("to", data_type::INT64 as i64)]);
    let p64 = gr.op(
        "Cast",
        &[&part],
        vec![attr_i("to", data_type::INT64 as i64)],
    );
    let stage = gr.op("Add", &[&a64, &p64], vec![]);
    let how = format!(
        "guard: {} below {:.4} selects per row between the compiled stage and the exact expansion ({} support vectors, f32); the graph computes both for every row",
        gm.guard_rule().describe(),
        gm.threshold(),
        nsv
    );
    (out, stage, how)
}

/// Builds the ONNX model of `model` at the precision of `q`; returns it with one line per
/// step saying how it was lowered.
///
/// The graph reads one float input [`INPUT_NAME`] (`[N, d]`, the raw input columns in the
/// model's order) and writes `decision` (`[N, outputs]`) and, for classifiers,
/// `label_index` and [`CLASS_NAME`] (the predicted class as a string).
pub fn build(
    model: &CompiledModel,
    guard: Option<&GuardedModel>,
    q: &Quantized,
) -> Result<(ModelProto, Vec<String>)> {
    let mut g = G::new();
    let info = super::meta::ArtefactInfo::of(model, guard);
    let p = model.program();
    let d = model.input_dim();
    let mut x = INPUT_NAME.to_string();
    if model.scaling().is_some() {
        let m = g.f32s("input_mean", &[d], &q.f32s("input.mean"));
        let s = g.f32s("input_scale", &[d], &q.f32s("input.scale"));
        let c = g.op("Sub", &[&x, &m], vec![]);
        x = g.op("Div", &[&c, &s], vec![]);
    }
    let mut vals = vec![x];
    let mut lines = Vec::new();
    // A program ending in cos_sin whose output only the head reads: [c·cos u, c·sin u]·H
    // is lowered as (cos u·H_top + sin u·H_bottom)·c, without the Concat and the two
    // scalings of the [N, D] features (a quarter of the graph's time in onnxruntime).
    let last = p.instrs().len().checked_sub(1);
    let fused = last.and_then(|l| {
        let ins = &p.instrs()[l];
        let only_head = p.output().0 == l + 1
            && p.instrs()[..l]
                .iter()
                .all(|o| o.inputs.iter().all(|v| v.0 != l + 1));
        match (&ins.step, only_head) {
            (Step::CosSin(cs), true) => Some((l, cs.scale())),
            _ => None,
        }
    });
    for (i, ins) in p.instrs().iter().enumerate() {
        if fused.is_some_and(|(l, _)| l == i) {
            vals.push(String::new());
            continue;
        }
        let names: Vec<String> = ins.inputs.iter().map(|v| vals[v.0].clone()).collect();
        let dims: Vec<usize> = ins.inputs.iter().map(|v| p.dim(*v)).collect();
        let (out, how) = lower_step(&mut g, q, i, &ins.step, &names, &dims)?;
        lines.push(format!("step {i} {}: {how}", ins.step.name()));
        vals.push(out);
    }
    let (hs, hq) = q.get("head.weights");
    let k0 = model.n_outputs();
    let zw = match fused {
        Some((l, c)) => {
            let u = vals[p.instrs()[l].inputs[0].0].clone();
            let half = hs[0] / 2;
            let top = g.weights("head_cos", &[half, k0], &hq.rows(k0, 0, half), false);
            let bot = g.weights("head_sin", &[half, k0], &hq.rows(k0, half, 2 * half), false);
            let co = g.op("Cos", &[&u], vec![]);
            let si = g.op("Sin", &[&u], vec![]);
            let a = g.op("MatMul", &[&co, &top], vec![]);
            let b2 = g.op("MatMul", &[&si, &bot], vec![]);
            let sum = g.op("Add", &[&a, &b2], vec![]);
            let cs = g.scalar(c);
            lines.push(format!(
                "step {l} cos_sin: fused with the head: (Cos·H_top + Sin·H_bottom)·c, no Concat"
            ));
            g.op("Mul", &[&sum, &cs], vec![])
        }
        None => {
            let z = vals[p.output().0].clone();
            let w = g.weights("head", hs, hq, false);
            g.op("MatMul", &[&z, &w], vec![])
        }
    };
    let b = g.f32s("bias", &[model.n_outputs()], &q.f32s("head.bias"));
    let mut dec = g.op("Add", &[&zw, &b], vec![]);
    let k = model.n_outputs() as i64;
    let mut outputs = vec![value_info("decision", data_type::FLOAT, &[None, Some(k)])];
    if let Some(gm) = guard {
        let (d2, stage, how) = guarded(&mut g, gm, &vals[0], &dec);
        dec = d2;
        g.op("Identity", &[&stage], vec![]);
        g.nodes.last_mut().expect("node").output = vec![STAGE_NAME.into()];
        outputs.push(value_info(STAGE_NAME, data_type::INT64, &[None]));
        lines.push(how);
    }
    g.op("Identity", &[&dec], vec![]);
    g.nodes.last_mut().expect("node").output = vec!["decision".into()];
    if model.task().is_classifier() {
        let nl = model.labels().len();
        let idx = match model.task() {
            Task::Binary => {
                let z = g.scalar(0.0);
                let gt = g.op("Greater", &["decision", &z], vec![]);
                let c = g.op("Cast", &[&gt], vec![attr_i("to", data_type::INT64 as i64)]);
                let ax = g.i64s("axes", &[1]);
                g.op("Squeeze", &[&c, &ax], vec![])
            }
            Task::Ovr => g.op(
                "ArgMax",
                &["decision"],
                vec![attr_i("axis", 1), attr_i("keepdims", 0)],
            ),
            Task::Ovo => {
                let pairs = model.n_outputs();
                let (mut a, mut bm) = (vec![0f32; pairs * nl], vec![0f32; pairs * nl]);
                let mut pi = 0;
                for i in 0..nl {
                    for j in i + 1..nl {
                        a[pi * nl + i] = 1.0;
                        bm[pi * nl + j] = 1.0;
                        pi += 1;
                    }
                }
                let at = g.f32s("votes_pos", &[pairs, nl], &a);
                let bt = g.f32s("votes_neg", &[pairs, nl], &bm);
                let z = g.scalar(0.0);
                let gt = g.op("Greater", &["decision", &z], vec![]);
                let pos = g.op("Cast", &[&gt], vec![attr_i("to", data_type::FLOAT as i64)]);
                let one = g.scalar(1.0);
                let neg = g.op("Sub", &[&one, &pos], vec![]);
                let va = g.op("MatMul", &[&pos, &at], vec![]);
                let vb = g.op("MatMul", &[&neg, &bt], vec![]);
                let votes = g.op("Add", &[&va, &vb], vec![]);
                g.op(
                    "ArgMax",
                    &[&votes],
                    vec![attr_i("axis", 1), attr_i("keepdims", 0)],
                )
            }
            Task::Regression => unreachable!("a classifier"),
        };
        g.op("Identity", &[&idx], vec![]);
        g.nodes.last_mut().expect("node").output = vec!["label_index".into()];
        let names = TensorProto {
            dims: vec![nl as i64],
            data_type: Some(data_type::STRING),
            name: Some("class_labels".into()),
            string_data: model
                .labels()
                .iter()
                .map(|l| l.as_bytes().to_vec())
                .collect(),
            ..Default::default()
        };
        g.inits.push(names);
        g.op(
            "Gather",
            &["class_labels", "label_index"],
            vec![attr_i("axis", 0)],
        );
        g.nodes.last_mut().expect("node").output = vec![CLASS_NAME.into()];
        outputs.push(value_info("label_index", data_type::INT64, &[None]));
        outputs.push(value_info(CLASS_NAME, data_type::STRING, &[None]));
    }
    let graph = GraphProto {
        node: g.nodes,
        name: Some("kernelpress".into()),
        initializer: g.inits,
        input: vec![value_info(
            INPUT_NAME,
            data_type::FLOAT,
            &[None, Some(d as i64)],
        )],
        output: outputs,
        doc_string: Some(format!(
            "{} {} model ({} features of {}) exported by kernelpress\n{}",
            if guard.is_some() {
                "guarded"
            } else {
                "compiled"
            },
            model.spec().method.name(),
            model.features(),
            model.spec().kernel,
            info.text()
        )),
        ..Default::default()
    };
    let m = ModelProto {
        ir_version: Some(8),
        opset_import: vec![OperatorSetIdProto {
            domain: Some(String::new()),
            version: Some(OPSET),
        }],
        producer_name: Some("kernelpress".into()),
        producer_version: Some(env!("CARGO_PKG_VERSION").into()),
        doc_string: Some(info.text()),
        metadata_props: info
            .pairs()
            .into_iter()
            .map(|(k, v)| StringStringEntryProto {
                key: Some(k),
                value: Some(v),
            })
            .collect(),
        graph: Some(graph),
        ..Default::default()
    };
    Ok((m, lines))
}

/// Writes the ONNX file (of the guarded model `guard` when given, whose compiled stage is
/// `model`).
pub fn write(
    model: &CompiledModel,
    guard: Option<&GuardedModel>,
    q: &Quantized,
    out: &Path,
) -> Result<(Vec<PathBuf>, Vec<String>)> {
    let (m, lines) = build(model, guard, q)?;
    write_atomic(out, &m.encode_to_vec())?;
    Ok((vec![out.to_path_buf()], lines))
}
