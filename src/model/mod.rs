//! Models and model files.
//!
//! Every model is one safetensors file (see [`TensorFile`]): float64 tensors named by role
//! and a JSON manifest. An exact model's tensors are `support_vectors` (`n_sv × d`, in the
//! scaled input space), `coefficients` (`n_sv × n_outputs`), `intercepts` (`n_outputs`) and,
//! when inputs are standardised, `input_mean` and `input_scale` (`d`). The manifest holds
//! `format_version`, `kind` (`exact`), `kernel` (expression), `task`, `labels`, `input_dim`,
//! `n_outputs`, `n_support_vectors`, `input_scaling`, `feature_names` and `training`.
//!
//! ```
//! use kernelpress::model::{ExactModel, Task};
//! use ndarray::array;
//! let m = ExactModel::new(
//!     "linear()".parse().unwrap(),
//!     array![[1.0, 0.0], [0.0, 1.0]],
//!     array![[2.0], [-1.0]],
//!     vec![0.5],
//!     Task::Binary,
//!     vec!["ok".into(), "worn".into()],
//!     None,
//! ).unwrap();
//! let s = m.decision(array![[1.0, 1.0]].view());
//! assert_eq!(s[[0, 0]], 1.5);
//! assert_eq!(m.labels_of(s.view())[0], "worn");
//! ```

mod compiled;
mod file;

pub use compiled::CompiledModel;

pub use file::{TensorFile, FORMAT_VERSION, MANIFEST_KEY, MAX_FILE_BYTES};

use crate::data::Standardizer;
use crate::kernel::{Kernel, Prepared};
use crate::linalg;
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};
use serde_json::json;
use std::path::Path;
use std::sync::OnceLock;

/// What a model predicts and how decision values become labels.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Task {
    /// One or more real outputs; no labels.
    Regression,
    /// Two classes, one decision value; positive means the second label.
    Binary,
    /// One-vs-rest: one decision value per class; the label is the arg-max (first on ties).
    Ovr,
    /// One-vs-one: one value per class pair (i<j, in order); positive votes for i, ties go to
    /// the lowest class index.
    Ovo,
}

impl Task {
    /// The task's name in files and flags.
    pub fn name(self) -> &'static str {
        match self {
            Task::Regression => "regression",
            Task::Binary => "binary",
            Task::Ovr => "ovr",
            Task::Ovo => "ovo",
        }
    }

    /// Parses a task name.
    pub fn parse(s: &str) -> Result<Task> {
        Ok(match s {
            "regression" => Task::Regression,
            "binary" => Task::Binary,
            "ovr" => Task::Ovr,
            "ovo" => Task::Ovo,
            other => {
                return Err(Error::input(format!(
                    "task '{other}' is unknown; expected regression, binary, ovr or ovo"
                )))
            }
        })
    }

    /// Number of decision values for `k` labels (`None` for regression).
    pub fn outputs_for(self, k: usize) -> Option<usize> {
        match self {
            Task::Regression => None,
            Task::Binary => Some(1),
            Task::Ovr => Some(k),
            Task::Ovo => Some(k * (k.saturating_sub(1)) / 2),
        }
    }

    /// True for classifiers.
    pub fn is_classifier(self) -> bool {
        self != Task::Regression
    }
}

/// Turns decision values into label indices under a task's rule.
pub fn label_indices(task: Task, k: usize, s: ArrayView2<f64>) -> Vec<usize> {
    s.rows()
        .into_iter()
        .map(|r| match task {
            Task::Regression => 0,
            Task::Binary => usize::from(r[0] > 0.0),
            Task::Ovr => {
                let mut best = 0;
                for j in 1..r.len() {
                    if r[j] > r[best] {
                        best = j;
                    }
                }
                best
            }
            Task::Ovo => {
                let mut votes = vec![0usize; k];
                let mut p = 0;
                for i in 0..k {
                    for j in i + 1..k {
                        if r[p] > 0.0 {
                            votes[i] += 1;
                        } else {
                            votes[j] += 1;
                        }
                        p += 1;
                    }
                }
                let mut best = 0;
                for c in 1..k {
                    if votes[c] > votes[best] {
                        best = c;
                    }
                }
                best
            }
        })
        .collect()
}

/// An exact kernel model: `f(x) = Σ_i coef_i · k(x, sv_i) + intercept` per output.
#[derive(Debug, Clone)]
pub struct ExactModel {
    kernel: Kernel,
    support_vectors: Array2<f64>,
    coef: Array2<f64>,
    intercept: Vec<f64>,
    task: Task,
    labels: Vec<String>,
    scaling: Option<Standardizer>,
    /// Feature names, if known.
    pub feature_names: Vec<String>,
    /// Fit settings and notes recorded in the manifest (`training`).
    pub training: serde_json::Value,
    prepared: OnceLock<Prepared>,
}

impl ExactModel {
    /// Builds and validates a model. `support_vectors` are in the scaled input space.
    pub fn new(
        kernel: Kernel,
        support_vectors: Array2<f64>,
        coef: Array2<f64>,
        intercept: Vec<f64>,
        task: Task,
        labels: Vec<String>,
        scaling: Option<Standardizer>,
    ) -> Result<ExactModel> {
        let (n, d) = support_vectors.dim();
        kernel.check_dim(d)?;
        if coef.nrows() != n {
            return Err(Error::input(format!(
                "coefficients have {} rows but there are {n} support vectors",
                coef.nrows()
            )));
        }
        let k = coef.ncols();
        if k == 0 {
            return Err(Error::input("coefficients have no columns"));
        }
        if intercept.len() != k {
            return Err(Error::input(format!(
                "{} intercepts given but the coefficients have {k} output columns",
                intercept.len()
            )));
        }
        if let Some(want) = task.outputs_for(labels.len()) {
            if labels.len() < 2 {
                return Err(Error::input(format!(
                    "a {} model needs at least 2 class labels, got {}",
                    task.name(),
                    labels.len()
                )));
            }
            if task == Task::Binary && labels.len() != 2 {
                return Err(Error::input(format!(
                    "a binary model needs exactly 2 labels, got {}",
                    labels.len()
                )));
            }
            if want != k {
                return Err(Error::input(format!(
                    "a {} model with {} labels needs {want} decision columns, the coefficients have {k}",
                    task.name(),
                    labels.len()
                )));
            }
            let mut seen = std::collections::HashSet::new();
            if let Some(dup) = labels.iter().find(|l| !seen.insert(l.as_str())) {
                return Err(Error::input(format!("class label '{dup}' appears twice")));
            }
        } else if !labels.is_empty() {
            return Err(Error::input("a regression model takes no class labels"));
        }
        if let Some(s) = &scaling {
            if s.mean.len() != d || s.scale.len() != d {
                return Err(Error::input(format!(
                    "input scaling has {} entries; expected {d}",
                    s.mean.len()
                )));
            }
            if s.scale.iter().any(|v| !(*v > 0.0)) {
                return Err(Error::input("input scale entries must be positive"));
            }
        }
        Ok(ExactModel {
            kernel,
            support_vectors,
            coef,
            intercept,
            task,
            labels,
            scaling,
            feature_names: (0..d).map(|j| format!("x{j}")).collect(),
            training: json!({}),
            prepared: OnceLock::new(),
        })
    }

    /// The kernel.
    pub fn kernel(&self) -> &Kernel {
        &self.kernel
    }
    /// Support vectors (`n_sv × d`, scaled input space).
    pub fn support_vectors(&self) -> ArrayView2<'_, f64> {
        self.support_vectors.view()
    }
    /// Coefficients (`n_sv × n_outputs`).
    pub fn coef(&self) -> ArrayView2<'_, f64> {
        self.coef.view()
    }
    /// Intercepts, one per output.
    pub fn intercept(&self) -> &[f64] {
        &self.intercept
    }
    /// The task.
    pub fn task(&self) -> Task {
        self.task
    }
    /// Class labels (empty for regression).
    pub fn labels(&self) -> &[String] {
        &self.labels
    }
    /// Input scaling, if any.
    pub fn scaling(&self) -> Option<&Standardizer> {
        self.scaling.as_ref()
    }
    /// Input dimension.
    pub fn input_dim(&self) -> usize {
        self.support_vectors.ncols()
    }
    /// Number of decision values per row.
    pub fn n_outputs(&self) -> usize {
        self.coef.ncols()
    }
    /// Number of support vectors.
    pub fn n_support_vectors(&self) -> usize {
        self.support_vectors.nrows()
    }

    fn prepared(&self) -> &Prepared {
        self.prepared
            .get_or_init(|| Prepared::new(&self.kernel, self.support_vectors.view()))
    }

    /// Applies the stored input scaling (identity when there is none).
    pub fn scale_inputs(&self, x: ArrayView2<f64>) -> Array2<f64> {
        match &self.scaling {
            Some(s) => s.apply(x),
            None => x.to_owned(),
        }
    }

    /// Decision values (`n × n_outputs`) for raw inputs, batched: fixed row chunks in
    /// parallel, each a GEMM-based kernel block times the coefficients.
    ///
    /// # Panics
    /// If `x` does not have [`Self::input_dim`] columns (check with
    /// [`crate::data::check_batch`]).
    #[track_caller]
    pub fn decision(&self, x: ArrayView2<f64>) -> Array2<f64> {
        assert_eq!(
            x.ncols(),
            self.input_dim(),
            "decision: wrong number of features"
        );
        let xs = self.scale_inputs(x);
        let prep = self.prepared();
        let k = self.n_outputs();
        linalg::map_row_chunks(xs.view(), k, |chunk| {
            let g = self.kernel.gram_block(chunk, prep);
            let mut s = linalg::ab_seq(g.view(), self.coef.view());
            for mut row in s.rows_mut() {
                for (v, b) in row.iter_mut().zip(&self.intercept) {
                    *v += b;
                }
            }
            s
        })
    }

    /// Decision values for one row, without any parallel machinery (single-row latency).
    pub fn decision_one(&self, x: &[f64]) -> Vec<f64> {
        let row = ndarray::ArrayView2::from_shape((1, x.len()), x).expect("one row");
        let xs = self.scale_inputs(row);
        let g = self.kernel.gram_block(xs.view(), self.prepared());
        let s = linalg::ab_seq(g.view(), self.coef.view());
        s.row(0)
            .iter()
            .zip(&self.intercept)
            .map(|(a, b)| a + b)
            .collect()
    }

    /// Labels for decision values (empty strings for regression).
    pub fn labels_of(&self, s: ArrayView2<f64>) -> Vec<String> {
        if !self.task.is_classifier() {
            return vec![String::new(); s.nrows()];
        }
        label_indices(self.task, self.labels.len(), s)
            .into_iter()
            .map(|i| self.labels[i].clone())
            .collect()
    }

    /// Flops per prediction (analytic): a kernel row (≈3 per support vector and input, the
    /// distance form) plus the coefficient product.
    pub fn flops(&self) -> usize {
        self.n_support_vectors() * (3 * self.input_dim() + 2 * self.n_outputs())
    }

    /// Bytes of the model's parameters (f64), as stored.
    pub fn parameter_bytes(&self) -> usize {
        8 * (self.support_vectors.len()
            + self.coef.len()
            + self.intercept.len()
            + self.scaling.as_ref().map(|s| 2 * s.mean.len()).unwrap_or(0))
    }

    /// The model as a [`TensorFile`].
    pub fn to_file(&self) -> TensorFile {
        let mut f = TensorFile::default();
        let (n, d) = self.support_vectors.dim();
        let k = self.n_outputs();
        f.put(
            "support_vectors",
            vec![n, d],
            self.support_vectors.iter().copied().collect(),
        );
        f.put(
            "coefficients",
            vec![n, k],
            self.coef.iter().copied().collect(),
        );
        f.put("intercepts", vec![k], self.intercept.clone());
        put_scaling(&mut f, self.scaling.as_ref());
        let m = json!({
            "format_version": FORMAT_VERSION,
            "kind": "exact",
            "kernel": self.kernel.to_string(),
            "task": self.task.name(),
            "labels": self.labels,
            "input_dim": d,
            "n_outputs": k,
            "n_support_vectors": n,
            "input_scaling": scaling_name(self.scaling.as_ref()),
            "feature_names": self.feature_names,
            "training": self.training,
            "generator": format!("kernelpress {}", env!("CARGO_PKG_VERSION")),
        });
        f.manifest = m.as_object().unwrap().clone();
        f
    }

    /// Writes the model atomically to `path`.
    pub fn save(&self, path: &Path) -> Result<()> {
        self.to_file().write(path)
    }

    /// Reads an exact model from a parsed file.
    pub fn from_file(f: &TensorFile, src: &str) -> Result<ExactModel> {
        let kind = f.get_str("kind", src)?;
        if kind != "exact" {
            return Err(Error::input(format!(
                "{src}: model kind is '{kind}'; expected an exact model"
            )));
        }
        let kernel: Kernel = f
            .get_str("kernel", src)?
            .parse()
            .map_err(|e: Error| e.context(format!("{src}: manifest 'kernel'")))?;
        let task = Task::parse(&f.get_str("task", src)?).map_err(|e| e.context(src))?;
        let labels = read_labels(f, src)?;
        let d = f.get_u64("input_dim", src)? as usize;
        let k = f.get_u64("n_outputs", src)? as usize;
        let n = f.get_u64("n_support_vectors", src)? as usize;
        let (_, sv) = f.tensor("support_vectors", &[Some(n), Some(d)], src)?;
        let (_, coef) = f.tensor("coefficients", &[Some(n), Some(k)], src)?;
        let (_, b) = f.tensor("intercepts", &[Some(k)], src)?;
        let scaling = read_scaling(f, d, src)?;
        let mut m = ExactModel::new(
            kernel,
            Array2::from_shape_vec((n, d), sv).unwrap(),
            Array2::from_shape_vec((n, k), coef).unwrap(),
            b,
            task,
            labels,
            scaling,
        )
        .map_err(|e| e.context(src))?;
        if let Some(names) = read_feature_names(f, d) {
            m.feature_names = names;
        }
        m.training = f.manifest.get("training").cloned().unwrap_or(json!({}));
        Ok(m)
    }

    /// Reads an exact model file.
    pub fn load(path: &Path) -> Result<ExactModel> {
        let f = TensorFile::read(path)?;
        Self::from_file(&f, &path.display().to_string())
    }
}

/// Stores the input scaling tensors `input_mean`, `input_scale` (nothing without scaling).
fn put_scaling(f: &mut TensorFile, scaling: Option<&Standardizer>) {
    if let Some(s) = scaling {
        f.put("input_mean", vec![s.mean.len()], s.mean.clone());
        f.put("input_scale", vec![s.scale.len()], s.scale.clone());
    }
}

/// The manifest's `input_scaling` value.
fn scaling_name(scaling: Option<&Standardizer>) -> &'static str {
    if scaling.is_some() {
        "standardize"
    } else {
        "none"
    }
}

/// Reads `input_scaling` and, for `standardize`, the two `d`-long tensors.
fn read_scaling(f: &TensorFile, d: usize, src: &str) -> Result<Option<Standardizer>> {
    match f.get_str("input_scaling", src)?.as_str() {
        "none" => Ok(None),
        "standardize" => {
            let (_, mean) = f.tensor("input_mean", &[Some(d)], src)?;
            let (_, scale) = f.tensor("input_scale", &[Some(d)], src)?;
            Ok(Some(Standardizer { mean, scale }))
        }
        other => Err(Error::input(format!(
            "{src}: input_scaling '{other}' unknown; expected none or standardize"
        ))),
    }
}

/// Reads the manifest's `labels` (every entry must be a string).
fn read_labels(f: &TensorFile, src: &str) -> Result<Vec<String>> {
    match f.manifest.get("labels") {
        Some(serde_json::Value::Array(v)) => v
            .iter()
            .map(|l| l.as_str().map(|s| s.to_string()))
            .collect::<Option<_>>()
            .ok_or_else(|| Error::input(format!("{src}: manifest 'labels' must be strings"))),
        _ => Err(Error::input(format!("{src}: manifest 'labels' missing"))),
    }
}

/// The manifest's `feature_names` when there are exactly `d` of them.
fn read_feature_names(f: &TensorFile, d: usize) -> Option<Vec<String>> {
    let v = f.manifest.get("feature_names")?.as_array()?;
    let names: Vec<String> = v
        .iter()
        .filter_map(|s| s.as_str().map(String::from))
        .collect();
    (names.len() == d).then_some(names)
}

/// Any model file kernelpress reads.
#[derive(Debug, Clone)]
#[allow(clippy::large_enum_variant)] // one value per command; boxing buys nothing
pub enum AnyModel {
    /// An exact kernel model.
    Exact(ExactModel),
    /// A compiled model.
    Compiled(CompiledModel),
}

impl AnyModel {
    /// Reads a model file of any kind.
    pub fn load(path: &Path) -> Result<(AnyModel, TensorFile)> {
        let f = TensorFile::read(path)?;
        let src = path.display().to_string();
        let kind = f.get_str("kind", &src)?;
        match kind.as_str() {
            "exact" => Ok((AnyModel::Exact(ExactModel::from_file(&f, &src)?), f)),
            "compiled" => Ok((AnyModel::Compiled(CompiledModel::from_file(&f, &src)?), f)),
            other => Err(Error::input(format!(
                "{src}: model kind '{other}' unknown; expected exact or compiled"
            ))),
        }
    }

    /// Input dimension.
    pub fn input_dim(&self) -> usize {
        match self {
            AnyModel::Exact(m) => m.input_dim(),
            AnyModel::Compiled(m) => m.input_dim(),
        }
    }

    /// Decision values for a batch.
    pub fn decision(&self, x: ArrayView2<f64>) -> Array2<f64> {
        match self {
            AnyModel::Exact(m) => m.decision(x),
            AnyModel::Compiled(m) => m.decision(x),
        }
    }

    /// Labels of decision values.
    pub fn labels_of(&self, s: ArrayView2<f64>) -> Vec<String> {
        match self {
            AnyModel::Exact(m) => m.labels_of(s),
            AnyModel::Compiled(m) => m.labels_of(s),
        }
    }

    /// Task.
    pub fn task(&self) -> Task {
        match self {
            AnyModel::Exact(m) => m.task(),
            AnyModel::Compiled(m) => m.task(),
        }
    }
}
