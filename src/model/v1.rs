//! Reading format-version-1 files (written before feature programs existed): the old
//! manifest layout and the old feature-map tree, translated into the same values version 2
//! gives. A version-1 Nyström file stored the landmarks and the head folded into them
//! (`f(x) = K(x, L)·F + b`), so it becomes a one-step program with no eigendecomposition.

use super::{ExactModel, OutputRule, Task};
use crate::data::Standardizer;
use crate::features::FeatureSpec;
use crate::format::TensorFile;
use crate::kernel::Kernel;
use crate::program::{steps, Builder, Program, ValueId};
use crate::{Error, Result};
use ndarray::Array2;
use serde_json::{json, Value};

/// What a compiled model is made of.
pub(crate) struct Parts {
    pub spec: FeatureSpec,
    pub features: usize,
    pub program: Program,
    pub head: Array2<f64>,
    pub intercept: Vec<f64>,
    pub rule: OutputRule,
    pub scaling: Option<Standardizer>,
    pub folded: bool,
    pub names: Vec<String>,
    pub fingerprint: Option<String>,
}

fn bad(src: &str, m: impl std::fmt::Display) -> Error {
    Error::file(format!("{src}: {m}"))
}

fn uint(f: &TensorFile, key: &str, src: &str) -> Result<usize> {
    f.get_u64(key, src)?
        .try_into()
        .ok()
        .filter(|v: &usize| *v <= 1 << 24)
        .ok_or_else(|| bad(src, format!("manifest '{key}' is too large")))
}

fn rule(f: &TensorFile, k: usize, src: &str) -> Result<OutputRule> {
    let task = Task::parse(&f.get_str("task", src)?).map_err(|e| bad(src, e))?;
    let labels = match f.manifest.get("labels") {
        Some(Value::Array(v)) => v
            .iter()
            .map(|l| l.as_str().map(String::from))
            .collect::<Option<Vec<_>>>()
            .ok_or_else(|| bad(src, "manifest 'labels' must be strings"))?,
        _ => return Err(bad(src, "manifest 'labels' missing")),
    };
    OutputRule::new(task, labels, k).map_err(|e| bad(src, e))
}

fn scaling(f: &TensorFile, d: usize, src: &str) -> Result<Option<Standardizer>> {
    match f.get_str("input_scaling", src)?.as_str() {
        // As version 2 files: scaling tensors without the scaling that uses them mean the
        // file disagrees with itself, and scoring it unscaled would be silently wrong.
        "none" if f.tensors.contains_key("input_mean") || f.tensors.contains_key("input_scale") => {
            Err(bad(
                src,
                "input_scaling 'none' but the file stores input_mean/input_scale; the file disagrees with itself",
            ))
        }
        "none" => Ok(None),
        "standardize" => Ok(Some(Standardizer {
            mean: f.f64("input_mean", &[Some(d)], src)?,
            scale: f.f64("input_scale", &[Some(d)], src)?,
        })),
        other => Err(bad(
            src,
            format!("input_scaling '{other}' unknown; expected none or standardize"),
        )),
    }
}

fn names(f: &TensorFile, d: usize) -> Vec<String> {
    let v: Option<Vec<String>> = f
        .manifest
        .get("feature_names")
        .and_then(|v| v.as_array())
        .map(|a| {
            a.iter()
                .filter_map(|s| s.as_str().map(String::from))
                .collect()
        });
    match v {
        Some(n) if n.len() == d => n,
        _ => crate::data::placeholder_names(d),
    }
}

/// A version-1 exact model.
pub(crate) fn exact(f: &TensorFile, src: &str) -> Result<ExactModel> {
    let kernel: Kernel = f
        .get_str("kernel", src)?
        .parse()
        .map_err(|e: Error| bad(src, format!("manifest 'kernel': {}", e.message())))?;
    let d = uint(f, "input_dim", src)?;
    let k = uint(f, "n_outputs", src)?;
    let n = uint(f, "n_support_vectors", src)?;
    let r = rule(f, k, src)?;
    let sv = f.f64("support_vectors", &[Some(n), Some(d)], src)?;
    let coef = f.f64("coefficients", &[Some(n), Some(k)], src)?;
    let b = f.f64("intercepts", &[Some(k)], src)?;
    let mut m = ExactModel::new(
        kernel,
        Array2::from_shape_vec((n, d), sv).expect("shape checked"),
        Array2::from_shape_vec((n, k), coef).expect("shape checked"),
        b,
        r.task(),
        r.labels().to_vec(),
        scaling(f, d, src)?,
    )
    .map_err(|e| bad(src, e))?;
    m.feature_names = names(f, d);
    m.training = f.manifest.get("training").cloned().unwrap_or(json!({}));
    Ok(m)
}

/// A version-1 compiled model.
pub(crate) fn compiled(f: &TensorFile, src: &str) -> Result<Parts> {
    let spec = FeatureSpec::from_json(
        f.manifest
            .get("feature_spec")
            .ok_or_else(|| bad(src, "manifest has no feature_spec"))?,
    )
    .map_err(|e| bad(src, e))?;
    let d = spec.input_dim;
    let tree = f
        .manifest
        .get("feature_map")
        .ok_or_else(|| bad(src, "manifest has no feature_map"))?;
    let k = uint(f, "n_outputs", src)?;
    let r = rule(f, k, src)?;
    let mut b = Builder::new(d);
    let folded = f.manifest.get("head_form").and_then(|v| v.as_str()) == Some("nystrom_folded");
    let (out, features) = if folded {
        if tree.get("node").and_then(|v| v.as_str()) != Some("nystrom") {
            return Err(bad(
                src,
                "head_form nystrom_folded on a map that is not Nyström",
            ));
        }
        let kernel = node_kernel(tree, src)?;
        let l = matrix(f, tree, "landmarks", None, Some(d), src)?;
        let rank = tree
            .get("rank")
            .and_then(|v| v.as_u64())
            .ok_or_else(|| bad(src, "feature map: 'rank' missing"))? as usize;
        let v = b.push(steps::KernelBlock::new(kernel, l)?, &[Builder::INPUT])?;
        (v, rank)
    } else {
        let v = node(&mut b, tree, f, src, Builder::INPUT)?;
        (v, b.dim(v))
    };
    let program = b.finish(out);
    let rows = program.output_dim();
    let head_name = if folded { "nystrom_head" } else { "head" };
    let head = f.f64(head_name, &[Some(rows), Some(k)], src)?;
    Ok(Parts {
        spec,
        features,
        program,
        head: Array2::from_shape_vec((rows, k), head).expect("shape checked"),
        intercept: f.f64("intercepts", &[Some(k)], src)?,
        rule: r,
        scaling: scaling(f, d, src)?,
        folded,
        names: names(f, d),
        fingerprint: None,
    })
}

fn node_kernel(v: &Value, src: &str) -> Result<Kernel> {
    v.get("kernel")
        .and_then(|k| k.as_str())
        .ok_or_else(|| bad(src, "feature map: 'kernel' missing"))?
        .parse()
        .map_err(|e: Error| bad(src, e))
}

fn matrix(
    f: &TensorFile,
    v: &Value,
    key: &str,
    rows: Option<usize>,
    cols: Option<usize>,
    src: &str,
) -> Result<Array2<f64>> {
    let name = v
        .get(key)
        .and_then(|x| x.as_str())
        .ok_or_else(|| bad(src, format!("feature map: '{key}' missing")))?;
    let (s, data) = f.f64_shaped(name, &[rows, cols], src)?;
    Ok(Array2::from_shape_vec((s[0], s[1]), data).expect("shape checked"))
}

fn vector(f: &TensorFile, v: &Value, key: &str, len: Option<usize>, src: &str) -> Result<Vec<f64>> {
    let name = v
        .get(key)
        .and_then(|x| x.as_str())
        .ok_or_else(|| bad(src, format!("feature map: '{key}' missing")))?;
    f.f64(name, &[len], src)
}

fn num(v: &Value, key: &str, src: &str) -> Result<f64> {
    v.get(key)
        .and_then(|x| x.as_f64())
        .ok_or_else(|| bad(src, format!("feature map: '{key}' missing")))
}

fn whole(v: &Value, key: &str, src: &str) -> Result<usize> {
    v.get(key)
        .and_then(|x| x.as_u64())
        .filter(|x| *x <= 1 << 24)
        .map(|x| x as usize)
        .ok_or_else(|| bad(src, format!("feature map: '{key}' missing or too large")))
}

fn to_signs(v: impl Iterator<Item = f64>, src: &str) -> Result<Vec<i8>> {
    v.map(|s| match s {
        1.0 => Ok(1),
        -1.0 => Ok(-1),
        o => Err(bad(src, format!("feature map: sign {o}"))),
    })
    .collect()
}

fn to_index(v: f64, below: usize, src: &str) -> Result<u32> {
    if v < 0.0 || v.fract() != 0.0 || v as usize >= below {
        return Err(bad(src, format!("feature map: index {v} out of range")));
    }
    Ok(v as u32)
}

/// Translates one node of the version-1 tree into steps reading `x`.
fn node(b: &mut Builder, v: &Value, f: &TensorFile, src: &str, x: ValueId) -> Result<ValueId> {
    let d = b.dim(x);
    let kind = v
        .get("node")
        .and_then(|n| n.as_str())
        .ok_or_else(|| bad(src, "feature map: 'node' missing"))?;
    Ok(match kind {
        "spectral" => {
            let scale = vector(f, v, "scale", Some(d), src)?;
            let mut at = b.push(steps::Scale::new(scale)?, &[x])?;
            let fj = v
                .get("freq")
                .ok_or_else(|| bad(src, "feature map: 'freq' missing"))?;
            let fkind = fj.get("kind").and_then(|s| s.as_str()).unwrap_or("?");
            match fkind {
                "dense" => {
                    at = b.push(
                        steps::Dense::new(matrix(f, fj, "w", None, Some(d), src)?)?,
                        &[at],
                    )?
                }
                "hadamard" | "fastfood" => {
                    let d_pad = whole(fj, "d_pad", src)?;
                    let m = whole(fj, "m", src)?;
                    if !d_pad.is_power_of_two() || d_pad < d {
                        return Err(bad(src, "feature map: inconsistent sizes"));
                    }
                    if fkind == "hadamard" {
                        let sg = matrix(f, fj, "signs", None, Some(d_pad), src)?;
                        let blocks = sg.nrows() / 3;
                        if blocks == 0 || sg.nrows() % 3 != 0 || m > blocks * d_pad {
                            return Err(bad(src, "feature map: inconsistent hadamard sizes"));
                        }
                        at = b.push(steps::Pad::new(d_pad)?, &[at])?;
                        at = b.push(steps::Tile::new(blocks)?, &[at])?;
                        for step in [2usize, 1, 0] {
                            let s = (0..blocks).flat_map(|bl| sg.row(3 * bl + step).to_vec());
                            at = b.push(steps::Signs::new(to_signs(s, src)?)?, &[at])?;
                            at = b.push(steps::Wht::new(d_pad)?, &[at])?;
                        }
                        if m < blocks * d_pad {
                            at = b.push(steps::Gather::first(m)?, &[at])?;
                        }
                        at = b.push(steps::ConstScale::new(1.0 / d_pad as f64)?, &[at])?;
                    } else {
                        let bb = matrix(f, fj, "b", None, Some(d_pad), src)?;
                        let blocks = bb.nrows();
                        if blocks == 0 || m > blocks * d_pad {
                            return Err(bad(src, "feature map: inconsistent fastfood sizes"));
                        }
                        let perm = matrix(f, fj, "perm", Some(blocks), Some(d_pad), src)?;
                        let g = matrix(f, fj, "g", Some(blocks), Some(d_pad), src)?;
                        let s = matrix(f, fj, "s", Some(blocks), Some(d_pad), src)?;
                        let mut idx = Vec::with_capacity(blocks * d_pad);
                        for (bl, row) in perm.rows().into_iter().enumerate() {
                            let mut seen = vec![false; d_pad];
                            for v in row {
                                let i = to_index(*v, d_pad, src)?;
                                if seen[i as usize] {
                                    return Err(bad(
                                        src,
                                        "fastfood permutation is not a permutation",
                                    ));
                                }
                                seen[i as usize] = true;
                                idx.push(i + (bl * d_pad) as u32);
                            }
                        }
                        let norm = 1.0 / (d_pad as f64).sqrt();
                        at = b.push(steps::Pad::new(d_pad)?, &[at])?;
                        at = b.push(steps::Tile::new(blocks)?, &[at])?;
                        at = b.push(
                            steps::Signs::new(to_signs(bb.iter().copied(), src)?)?,
                            &[at],
                        )?;
                        at = b.push(steps::Wht::new(d_pad)?, &[at])?;
                        at = b.push(steps::Gather::new(idx)?, &[at])?;
                        at = b.push(steps::Scale::new(g.iter().copied().collect())?, &[at])?;
                        at = b.push(steps::Wht::new(d_pad)?, &[at])?;
                        at = b.push(
                            steps::Scale::new(s.iter().map(|v| v * norm).collect())?,
                            &[at],
                        )?;
                        if m < blocks * d_pad {
                            at = b.push(steps::Gather::first(m)?, &[at])?;
                        }
                    }
                }
                o => return Err(bad(src, format!("frequency kind '{o}' unknown"))),
            }
            let m = b.dim(at);
            match v.get("trig") {
                Some(Value::String(s)) if s == "paired" => {
                    b.push(steps::CosSin::new((1.0 / m as f64).sqrt())?, &[at])?
                }
                Some(t) => {
                    let ph = vector(f, t, "phase", Some(m), src)?;
                    b.push(steps::CosPhase::new(ph, (2.0 / m as f64).sqrt())?, &[at])?
                }
                None => return Err(bad(src, "feature map: 'trig' missing")),
            }
        }
        "maclaurin" => {
            let deg = vector(f, v, "degree", None, src)?;
            let coef = vector(f, v, "coef", Some(deg.len()), src)?;
            let lens: Vec<u32> = deg
                .iter()
                .map(|x| to_index(*x, 1 << 16, src))
                .collect::<Result<_>>()?;
            let total: usize = lens.iter().map(|v| *v as usize).sum();
            if total == 0 {
                return Err(bad(src, "maclaurin map of degree-0 features only"));
            }
            let w = matrix(f, v, "w", Some(total), Some(d), src)?;
            let at = b.push(steps::Dense::new(w)?, &[x])?;
            let at = b.push(steps::SegmentProduct::new(lens)?, &[at])?;
            b.push(steps::Scale::new(coef)?, &[at])?
        }
        "tensorsketch" => {
            let degree = whole(v, "degree", src)?;
            let out = whole(v, "out", src)?;
            let h = matrix(f, v, "hash", Some(degree), Some(d + 1), src)?;
            let sg = matrix(f, v, "sign", Some(degree), Some(d + 1), src)?;
            let hash = h
                .rows()
                .into_iter()
                .map(|r| r.iter().map(|x| to_index(*x, out, src)).collect())
                .collect::<Result<_>>()?;
            let sign = sg
                .rows()
                .into_iter()
                .map(|r| to_signs(r.iter().copied(), src))
                .collect::<Result<_>>()?;
            let gamma = num(v, "gamma", src)?;
            let coef0 = num(v, "coef0", src)?;
            if !(gamma > 0.0) || !(coef0 >= 0.0) {
                return Err(bad(src, "tensor sketch needs gamma > 0 and coef0 ≥ 0"));
            }
            let at = b.push(steps::ConstScale::new(gamma.sqrt())?, &[x])?;
            let at = b.push(steps::Append::new(coef0.sqrt())?, &[at])?;
            b.push(steps::CountSketchFft::new(out, hash, sign)?, &[at])?
        }
        "relu" => {
            let w = matrix(f, v, "w", None, Some(d), src)?;
            let n = w.nrows();
            let at = b.push(steps::Dense::new(w)?, &[x])?;
            let at = match whole(v, "order", src)? {
                0 => b.push(steps::Heaviside, &[at])?,
                1 => b.push(steps::Relu, &[at])?,
                o => return Err(bad(src, format!("arc-cosine order {o}"))),
            };
            b.push(steps::ConstScale::new((2.0 / n as f64).sqrt())?, &[at])?
        }
        "projection" => {
            let w = matrix(f, v, "w", None, Some(d), src)?;
            let n = w.nrows();
            let at = b.push(steps::Dense::new(w)?, &[x])?;
            b.push(steps::ConstScale::new(1.0 / (n as f64).sqrt())?, &[at])?
        }
        "identity" => x,
        "nystrom" => {
            return Err(bad(
                src,
                "a version-1 Nyström map is only readable with its folded head",
            ))
        }
        "concat" | "product" => {
            let parts = v
                .get("parts")
                .and_then(|p| p.as_array())
                .filter(|p| !p.is_empty())
                .ok_or_else(|| bad(src, "feature map: 'parts' missing"))?;
            let vals: Vec<ValueId> = parts
                .iter()
                .map(|p| node(b, p, f, src, x))
                .collect::<Result<_>>()?;
            if kind == "concat" {
                b.push(steps::Concat, &vals)?
            } else {
                let w = b.dim(vals[0]);
                let prod = if vals.len() == 1 {
                    vals[0]
                } else {
                    b.push(steps::Product, &vals)?
                };
                let c = (w as f64).powf((vals.len() as f64 - 1.0) / 2.0);
                b.push(steps::ConstScale::new(c)?, &[prod])?
            }
        }
        "scaled" => {
            let c = num(v, "c", src)?;
            let inner = v
                .get("inner")
                .ok_or_else(|| bad(src, "feature map: 'inner' missing"))?;
            let at = node(b, inner, f, src, x)?;
            b.push(steps::ConstScale::new(c)?, &[at])?
        }
        o => return Err(bad(src, format!("feature map: node '{o}' unknown"))),
    })
}
