//! Reading ONNX-ML `SVMClassifier` and `SVMRegressor` models (optionally after a `Scaler`)
//! into exact models, following the operator definitions of the ONNX-ML domain as
//! onnxruntime evaluates them:
//!
//! - kernels: `LINEAR` `x·sv`, `POLY` `(γ x·sv + coef0)^degree`, `RBF` `exp(−γ‖x − sv‖²)`,
//!   `SIGMOID` `tanh(γ x·sv + coef0)`, with `kernel_params = [γ, coef0, degree]`;
//! - `K > 2` classes: support vectors grouped by class (`vectors_per_class`), coefficients
//!   `[K−1, n_sv]`; for the pair `(i, j)`, `i < j`, in the order (0,1), (0,2), …,
//!   `s_ij = Σ_{m∈i} coef[j−1, m]·K_m + Σ_{m∈j} coef[i, m]·K_m + rho[p]`; a value > 0
//!   votes for `i`, ties go to the lowest index — kernelpress's one-vs-one rule;
//! - 2 classes: `s = Σ coef[0, m]·K_m + rho[0]`, the label is the first class when `s > 0`.
//!   The imported binary model keeps `s` as its decision and lists the labels as
//!   (second, first), so that "positive means the second label" gives the same labels;
//! - `SVMRegressor`: `Σ coef_m·K_m + rho[0]`;
//! - `Scaler`: `(x − offset)·scale`, kept as the model's input scaling.
//!
//! Probability outputs, post transforms other than `NONE`, one-class regressors, inputs of
//! another shape and any other node are refused with the attribute named. Every length is
//! checked against the others before anything is built.

use super::proto::{attr_type, AttributeProto, ModelProto, NodeProto};
use crate::data::Standardizer;
use crate::kernel::{Kernel, Width};
use crate::model::{ExactModel, Task};
use crate::{Error, Result};
use ndarray::Array2;
use prost::Message;
use std::path::Path;

/// Largest ONNX file read.
pub const MAX_ONNX_BYTES: u64 = 2 << 30;

struct Attrs<'a> {
    node: &'a NodeProto,
    src: &'a str,
}

impl Attrs<'_> {
    fn op(&self) -> String {
        self.node.op_type.clone().unwrap_or_default()
    }
    fn get(&self, name: &str) -> Option<&AttributeProto> {
        self.node
            .attribute
            .iter()
            .find(|a| a.name.as_deref() == Some(name))
    }
    fn bad(&self, m: impl std::fmt::Display) -> Error {
        Error::file(format!("{}: node {}: {m}", self.src, self.op()))
    }
    fn floats(&self, name: &str) -> Vec<f32> {
        self.get(name).map(|a| a.floats.clone()).unwrap_or_default()
    }
    fn ints(&self, name: &str) -> Vec<i64> {
        self.get(name).map(|a| a.ints.clone()).unwrap_or_default()
    }
    fn string(&self, name: &str) -> Option<String> {
        self.get(name)
            .and_then(|a| a.s.as_ref())
            .map(|s| String::from_utf8_lossy(s).into_owned())
    }
    fn int(&self, name: &str) -> Option<i64> {
        self.get(name).and_then(|a| a.i)
    }
}

/// Checks a node's attributes as the ONNX-ML operator definitions declare them: every
/// attribute known to the operator, of its declared type, at most once (what onnx.checker
/// and onnxruntime refuse is refused here, instead of being read with another meaning).
fn check_attributes(a: &Attrs, schema: &[(&str, i32)]) -> Result<()> {
    use attr_type::*;
    let type_name = |t: i32| match t {
        FLOAT => "FLOAT",
        INT => "INT",
        STRING => "STRING",
        TENSOR => "TENSOR",
        FLOATS => "FLOATS",
        INTS => "INTS",
        STRINGS => "STRINGS",
        _ => "another type",
    };
    let mut seen = std::collections::HashSet::new();
    for at in &a.node.attribute {
        let name = at.name.as_deref().unwrap_or("");
        if !seen.insert(name) {
            return Err(a.bad(format!("attribute '{name}' is given twice")));
        }
        let Some((_, want)) = schema.iter().find(|(n, _)| *n == name) else {
            return Err(a.bad(format!(
                "attribute '{name}' is not one of the operator's ({})",
                schema
                    .iter()
                    .map(|(n, _)| *n)
                    .collect::<Vec<_>>()
                    .join(", ")
            )));
        };
        let got = at.r#type.unwrap_or(0);
        if got != *want {
            return Err(a.bad(format!(
                "attribute '{name}' is {}; the operator declares it {}",
                type_name(got),
                type_name(*want)
            )));
        }
    }
    Ok(())
}

/// The ONNX-ML attribute schemas of the operators read.
const SVM_CLASSIFIER_ATTRS: [(&str, i32); 11] = [
    ("classlabels_ints", attr_type::INTS),
    ("classlabels_strings", attr_type::STRINGS),
    ("coefficients", attr_type::FLOATS),
    ("kernel_params", attr_type::FLOATS),
    ("kernel_type", attr_type::STRING),
    ("post_transform", attr_type::STRING),
    ("prob_a", attr_type::FLOATS),
    ("prob_b", attr_type::FLOATS),
    ("rho", attr_type::FLOATS),
    ("support_vectors", attr_type::FLOATS),
    ("vectors_per_class", attr_type::INTS),
];
const SVM_REGRESSOR_ATTRS: [(&str, i32); 8] = [
    ("coefficients", attr_type::FLOATS),
    ("kernel_params", attr_type::FLOATS),
    ("kernel_type", attr_type::STRING),
    ("n_supports", attr_type::INT),
    ("one_class", attr_type::INT),
    ("post_transform", attr_type::STRING),
    ("rho", attr_type::FLOATS),
    ("support_vectors", attr_type::FLOATS),
];
const SCALER_ATTRS: [(&str, i32); 2] =
    [("offset", attr_type::FLOATS), ("scale", attr_type::FLOATS)];

fn finite(v: &[f32], what: &str, a: &Attrs) -> Result<Vec<f64>> {
    match v.iter().position(|x| !x.is_finite()) {
        Some(i) => Err(a.bad(format!("'{what}' entry {i} is not finite"))),
        None => Ok(v.iter().map(|x| *x as f64).collect()),
    }
}

fn kernel(a: &Attrs) -> Result<Kernel> {
    let kt = a.string("kernel_type").unwrap_or_else(|| "LINEAR".into());
    let p = a.floats("kernel_params");
    if a.get("kernel_params").is_some() && p.len() != 3 {
        return Err(a.bad(format!(
            "'kernel_params' has {} values; the operator takes exactly 3 (gamma, coef0, degree)",
            p.len()
        )));
    }
    let param = |i: usize, default: f64| p.get(i).map(|v| *v as f64).unwrap_or(default);
    let (gamma, coef0, degree) = (param(0, 0.0), param(1, 0.0), param(2, 0.0));
    let text = match kt.as_str() {
        "LINEAR" => return Ok(Kernel::Linear),
        "RBF" => {
            return if gamma > 0.0 && gamma.is_finite() {
                Ok(Kernel::Gaussian {
                    width: Width::Gamma(gamma),
                })
            } else {
                Err(a.bad(format!(
                    "kernel_params gamma = {gamma}; RBF needs gamma > 0"
                )))
            }
        }
        "POLY" => {
            if degree.fract() != 0.0 || !(1.0..=32.0).contains(&degree) {
                return Err(a.bad(format!(
                    "kernel_params degree = {degree}; expected a whole number from 1 to 32"
                )));
            }
            format!("polynomial(degree={degree}, gamma={gamma:?}, offset={coef0:?})")
        }
        "SIGMOID" => format!("sigmoid(gamma={gamma:?}, offset={coef0:?})"),
        other => {
            return Err(a.bad(format!(
                "kernel_type '{other}' is not supported; expected LINEAR, POLY, RBF or SIGMOID"
            )))
        }
    };
    text.parse()
        .map_err(|e: Error| a.bad(format!("kernel_params: {}", e.message())))
}

fn check_common(a: &Attrs) -> Result<()> {
    if let Some(pt) = a.string("post_transform") {
        if pt != "NONE" {
            return Err(a.bad(format!(
                "post_transform '{pt}' is not supported; only NONE (raw decision values)"
            )));
        }
    }
    let (pa, pb) = (a.floats("prob_a"), a.floats("prob_b"));
    if pa.len() != pb.len() {
        return Err(a.bad(format!(
            "'prob_a' has {} values and 'prob_b' {}; expected one of each per class pair",
            pa.len(),
            pb.len()
        )));
    }
    for at in &a.node.attribute {
        if matches!(
            at.r#type,
            Some(attr_type::TENSOR) | Some(attr_type::STRING) | Some(attr_type::INT)
        ) && !matches!(
            at.name.as_deref(),
            Some("kernel_type" | "post_transform" | "n_supports" | "one_class")
        ) {
            return Err(a.bad(format!(
                "attribute '{}' is not understood",
                at.name.as_deref().unwrap_or("?")
            )));
        }
    }
    Ok(())
}

/// Reads an ONNX file holding an SVM (optionally after a scaler) as an exact model.
pub fn import_svm(path: &Path) -> Result<ExactModel> {
    let src = path.display().to_string();
    if let Ok(m) = std::fs::metadata(path) {
        if m.is_file() && m.len() > MAX_ONNX_BYTES {
            return Err(Error::file(format!(
                "{src}: {} bytes, more than the {MAX_ONNX_BYTES} an ONNX model may have here",
                m.len()
            )));
        }
    }
    let bytes = crate::fsio::read_bytes(path)?;
    import_svm_bytes(&bytes, &src)
}

/// As [`import_svm`], from bytes.
pub fn import_svm_bytes(bytes: &[u8], src: &str) -> Result<ExactModel> {
    let m = ModelProto::decode(bytes).map_err(|e| {
        Error::file(format!(
            "{src}: not an ONNX model (protobuf could not be read: {e})"
        ))
    })?;
    let g = m
        .graph
        .as_ref()
        .ok_or_else(|| Error::file(format!("{src}: the ONNX model has no graph")))?;
    let ml = |n: &NodeProto| n.domain.as_deref() == Some("ai.onnx.ml");
    let (scaler, svm) = match g.node.as_slice() {
        [s] if ml(s) => (None, s),
        [a, s] if ml(a) && ml(s) && a.op_type.as_deref() == Some("Scaler") => (Some(a), s),
        nodes => {
            let ops: Vec<String> = nodes
                .iter()
                .map(|n| {
                    format!(
                        "{}:{}",
                        n.domain.clone().unwrap_or_default(),
                        n.op_type.clone().unwrap_or_default()
                    )
                })
                .collect();
            return Err(Error::file(format!(
                "{src}: expected one ai.onnx.ml SVMClassifier or SVMRegressor node, optionally after a Scaler; the graph has [{}]",
                ops.join(", ")
            )));
        }
    };
    if g.input.len() != 1 {
        return Err(Error::file(format!(
            "{src}: the graph has {} inputs; expected one [N, d] input",
            g.input.len()
        )));
    }
    let dims: Vec<Option<i64>> = g.input[0]
        .r#type
        .as_ref()
        .and_then(|t| t.tensor_type.as_ref())
        .and_then(|t| t.shape.as_ref())
        .map(|s| s.dim.iter().map(|d| d.dim_value).collect())
        .unwrap_or_default();
    if dims.len() != 2 {
        return Err(Error::file(format!(
            "{src}: input '{}' has {} dimensions; expected 2 ([N, d])",
            g.input[0].name.clone().unwrap_or_default(),
            dims.len()
        )));
    }
    let a = Attrs { node: svm, src };
    match a.op().as_str() {
        "SVMClassifier" => check_attributes(&a, &SVM_CLASSIFIER_ATTRS)?,
        "SVMRegressor" => check_attributes(&a, &SVM_REGRESSOR_ATTRS)?,
        other => return Err(a.bad(format!("operator '{other}' is not an SVM"))),
    }
    // Follow the wiring: which tensor each node reads. A Scaler applies only when the SVM
    // reads its output and it reads the graph's input (as onnxruntime evaluates it); an
    // SVM that reads the graph's input directly ignores a Scaler beside it.
    let graph_in = g.input[0].name.clone().unwrap_or_default();
    let svm_in = svm.input.first().cloned().unwrap_or_default();
    let scaler = match scaler {
        Some(s) if s.output.first() == Some(&svm_in) => {
            if s.input.first() != Some(&graph_in) {
                return Err(Error::file(format!(
                    "{src}: node Scaler reads '{}', not the graph's input '{graph_in}'",
                    s.input.first().cloned().unwrap_or_default()
                )));
            }
            Some(s)
        }
        _ if svm_in == graph_in => None,
        _ => {
            return Err(Error::file(format!(
                "{src}: node {} reads '{svm_in}', which is neither the graph's input '{graph_in}' nor a Scaler's output",
                a.op()
            )))
        }
    };
    if let Some(s) = scaler {
        check_attributes(&Attrs { node: s, src }, &SCALER_ATTRS)?;
    }
    check_common(&a)?;
    let kernel = kernel(&a)?;
    let svs = finite(&a.floats("support_vectors"), "support_vectors", &a)?;
    let coef = finite(&a.floats("coefficients"), "coefficients", &a)?;
    let rho = finite(&a.floats("rho"), "rho", &a)?;
    let (model, d) = match a.op().as_str() {
        "SVMClassifier" => classifier(&a, kernel, svs, coef, rho, dims[1])?,
        "SVMRegressor" => regressor(&a, kernel, svs, coef, rho, dims[1])?,
        other => return Err(a.bad(format!("operator '{other}' is not an SVM"))),
    };
    let scaling = match scaler {
        None => None,
        Some(s) => {
            let sa = Attrs { node: s, src };
            let off = finite(&sa.floats("offset"), "offset", &sa)?;
            let sc = finite(&sa.floats("scale"), "scale", &sa)?;
            let expand = |v: Vec<f64>, what: &str, def: f64| match v.len() {
                0 => Ok(vec![def; d]),
                1 => Ok(vec![v[0]; d]),
                n if n == d => Ok(v),
                n => Err(sa.bad(format!("'{what}' has {n} entries; expected 1 or {d}"))),
            };
            let off = expand(off, "offset", 0.0)?;
            let sc = expand(sc, "scale", 1.0)?;
            if let Some(j) = sc.iter().position(|v| !(*v > 0.0)) {
                return Err(sa.bad(format!(
                    "'scale' entry {j} is {}; only positive scales are supported",
                    sc[j]
                )));
            }
            Some(Standardizer {
                mean: off,
                scale: sc.iter().map(|v| 1.0 / v).collect(),
            })
        }
    };
    let (kernel, sv, coef, b, task, labels) = model;
    let mut m = ExactModel::new(kernel, sv, coef, b, task, labels, scaling)
        .map_err(|e| Error::file(format!("{src}: {}", e.message())))?;
    m.training = serde_json::json!({"model": "imported", "from": "onnx", "operator": a.op()});
    // Pairwise Platt sigmoids (ONNX-ML: P(first class of the pair) = 1/(1 + exp(A·s + B))
    // with s the pair's decision; a binary model's pair is (classlabels[0],
    // classlabels[1]), which is our (second label, first label)): the same sigmoid and
    // sign as ours, so the coefficients carry over unchanged.
    let (pa, pb) = (a.floats("prob_a"), a.floats("prob_b"));
    if !pa.is_empty() {
        if a.op() != "SVMClassifier" {
            return Err(a.bad("'prob_a'/'prob_b' are for classifiers"));
        }
        let want = m.n_outputs();
        if pa.len() != want {
            return Err(a.bad(format!(
                "'prob_a' has {} values; expected one per class pair, {want}",
                pa.len()
            )));
        }
        let pa = finite(&pa, "prob_a", &a)?;
        let pb = finite(&pb, "prob_b", &a)?;
        let p =
            crate::model::Probabilities::new(m.rule(), pa, pb).map_err(|e| a.bad(e.message()))?;
        m.probabilities = Some((p, "the ONNX SVM's prob_a and prob_b (imported)".into()));
    }
    if m.n_support_vectors() == 0 {
        return Err(a.bad("the SVM has no support vectors; there is nothing to import"));
    }
    // An imported model always loads: read back what would be written.
    let f = crate::format::TensorFile::from_bytes(&m.to_file().to_bytes()?, src)?;
    ExactModel::from_file(&f, src).map_err(|e| {
        Error::file(format!(
            "{src}: the imported model would not load: {}",
            e.message()
        ))
    })?;
    Ok(m)
}

type Parts = (
    Kernel,
    Array2<f64>,
    Array2<f64>,
    Vec<f64>,
    Task,
    Vec<String>,
);

fn support_vectors(
    a: &Attrs,
    svs: Vec<f64>,
    n: usize,
    d_in: Option<i64>,
) -> Result<(Array2<f64>, usize)> {
    if n == 0 {
        return Err(a.bad("no support vectors"));
    }
    if !svs.len().is_multiple_of(n) {
        return Err(a.bad(format!(
            "'support_vectors' has {} values, not a multiple of the {n} support vectors",
            svs.len()
        )));
    }
    let d = svs.len() / n;
    if d == 0 {
        return Err(a.bad("'support_vectors' is empty"));
    }
    if let Some(di) = d_in {
        if di > 0 && di as usize != d {
            return Err(a.bad(format!(
                "support vectors have {d} features but the input is declared with {di}"
            )));
        }
    }
    Ok((Array2::from_shape_vec((n, d), svs).expect("checked"), d))
}

fn classifier(
    a: &Attrs,
    kernel: Kernel,
    svs: Vec<f64>,
    coef: Vec<f64>,
    rho: Vec<f64>,
    d_in: Option<i64>,
) -> Result<(Parts, usize)> {
    let labels: Vec<String> = {
        let s: Vec<String> = a
            .get("classlabels_strings")
            .map(|x| {
                x.strings
                    .iter()
                    .map(|b| String::from_utf8_lossy(b).into_owned())
                    .collect()
            })
            .unwrap_or_default();
        if s.is_empty() {
            a.ints("classlabels_ints")
                .iter()
                .map(|v| v.to_string())
                .collect()
        } else {
            s
        }
    };
    let k = labels.len();
    if k < 2 {
        return Err(a.bad(format!(
            "classlabels_ints/classlabels_strings name {k} classes; expected at least 2"
        )));
    }
    let vpc = a.ints("vectors_per_class");
    if vpc.len() != k || vpc.iter().any(|v| *v < 0) {
        return Err(a.bad(format!(
            "'vectors_per_class' has {} entries; expected {k} non-negative counts",
            vpc.len()
        )));
    }
    let n: usize = vpc
        .iter()
        .try_fold(0usize, |acc, v| acc.checked_add(*v as usize))
        .ok_or_else(|| a.bad("'vectors_per_class' sums past any possible size"))?;
    let (sv, d) = support_vectors(a, svs, n, d_in)?;
    if coef.len() != (k - 1) * n {
        return Err(a.bad(format!(
            "'coefficients' has {} values; expected (classes − 1) × support vectors = {}",
            coef.len(),
            (k - 1) * n
        )));
    }
    let pairs = k * (k - 1) / 2;
    if rho.len() != pairs {
        return Err(a.bad(format!(
            "'rho' has {} values; expected one per class pair, {pairs}",
            rho.len()
        )));
    }
    let c = |row: usize, m: usize| coef[row * n + m];
    if k == 2 {
        let col = Array2::from_shape_fn((n, 1), |(m, _)| c(0, m));
        let labels = vec![labels[1].clone(), labels[0].clone()];
        return Ok(((kernel, sv, col, rho, Task::Binary, labels), d));
    }
    let mut start = vec![0usize; k + 1];
    for i in 0..k {
        start[i + 1] = start[i] + vpc[i] as usize;
    }
    let mut cm = Array2::zeros((n, pairs));
    let mut p = 0;
    for i in 0..k {
        for j in i + 1..k {
            for m in start[i]..start[i + 1] {
                cm[[m, p]] = c(j - 1, m);
            }
            for m in start[j]..start[j + 1] {
                cm[[m, p]] = c(i, m);
            }
            p += 1;
        }
    }
    Ok(((kernel, sv, cm, rho, Task::Ovo, labels), d))
}

fn regressor(
    a: &Attrs,
    kernel: Kernel,
    svs: Vec<f64>,
    coef: Vec<f64>,
    rho: Vec<f64>,
    d_in: Option<i64>,
) -> Result<(Parts, usize)> {
    if a.int("one_class").unwrap_or(0) != 0 {
        return Err(a.bad("'one_class' = 1 (a one-class SVM) is not supported"));
    }
    let n = a.int("n_supports").unwrap_or(coef.len() as i64);
    if n < 0 || n as usize != coef.len() {
        return Err(a.bad(format!(
            "'n_supports' is {n} but 'coefficients' has {} values",
            coef.len()
        )));
    }
    let (sv, d) = support_vectors(a, svs, n as usize, d_in)?;
    if rho.len() != 1 {
        return Err(a.bad(format!("'rho' has {} values; expected 1", rho.len())));
    }
    let col = Array2::from_shape_vec((n as usize, 1), coef).expect("checked");
    Ok(((kernel, sv, col, rho, Task::Regression, vec![]), d))
}
