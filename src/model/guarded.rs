//! A guarded model: the compiled model answers where it is confident, the exact model where
//! it is not. Confidence of a classifier's answer is the smallest margin of the predicted
//! class over the decision values that involve it (binary: `|s|`; one-vs-one: the smallest
//! signed value of the class's pairs, oriented towards it; one-vs-rest: its value minus the
//! runner-up's). Rows whose confidence is below the threshold go to the exact model. In the
//! spirit of Cossalter, Yan & Zheng, "Adaptive Kernel Approximation for Large-Scale
//! Non-Linear SVM Prediction" (ICML 2011): an approximation plus a fall-back to the full
//! kernel sum driven by an error estimate.
//!
//! ```
//! use kernelpress::features::{FeatureSpec, Method};
//! use kernelpress::fit::{compile_exact, HeadKind, RidgeGrid};
//! use kernelpress::model::{ExactModel, GuardedModel, Task};
//! use ndarray::Array2;
//! let sv = Array2::from_shape_fn((30, 2), |(i, j)| ((i * 2 + j) as f64 * 0.7).sin());
//! let coef = Array2::from_shape_fn((30, 1), |(i, _)| if i % 2 == 0 { 1.0 } else { -1.0 });
//! let exact = ExactModel::new("gaussian(gamma=1)".parse().unwrap(), sv, coef, vec![0.0],
//!     Task::Binary, vec!["a".into(), "b".into()], None).unwrap();
//! let x = Array2::from_shape_fn((300, 2), |(i, j)| ((i * 2 + j) as f64 * 0.31).cos());
//! let spec = FeatureSpec::new(exact.kernel().clone(), Method::Fourier, 2, 16, 1);
//! let (m, _) = compile_exact(&exact, Some(x.view()), &spec, HeadKind::Distill,
//!     &RidgeGrid::standard(), None, &kernelpress::observe::Silent).unwrap();
//! // A threshold above every confidence sends every row to the exact model.
//! let g = GuardedModel::new(m, exact.clone(), f64::INFINITY).unwrap();
//! let (s, stage) = g.decision(x.view());
//! assert_eq!(s, exact.decision(x.view()));
//! assert!(stage.iter().all(|&k| k == 1));
//! ```

use super::{label_indices, CompiledModel, ExactModel, OutputRule, Task, TensorFile};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2, Axis};
use serde_json::{json, Value};
use std::path::Path;

/// Names of the stages, by index (the `stage` column of `score`).
pub const STAGES: [&str; 2] = ["compiled", "exact"];

/// A compiled model guarded by its exact model.
#[derive(Debug, Clone)]
pub struct GuardedModel {
    compact: CompiledModel,
    exact: ExactModel,
    threshold: f64,
    /// How the threshold was chosen (stored in the file).
    pub guard: Value,
}

/// Confidence of each row's label under `task` (see the module documentation). Regression
/// has no label and no margin: every confidence is `+∞`.
pub fn confidence(task: Task, k: usize, s: ArrayView2<f64>) -> Vec<f64> {
    let labels = label_indices(task, k, s);
    s.rows()
        .into_iter()
        .zip(labels)
        .map(|(r, c)| match task {
            Task::Regression => f64::INFINITY,
            Task::Binary => r[0].abs(),
            Task::Ovr => {
                let other = (0..r.len())
                    .filter(|&j| j != c)
                    .map(|j| r[j])
                    .fold(f64::NEG_INFINITY, f64::max);
                r[c] - other
            }
            Task::Ovo => {
                let mut m = f64::INFINITY;
                let mut p = 0;
                for i in 0..k {
                    for j in i + 1..k {
                        if i == c {
                            m = m.min(r[p]);
                        } else if j == c {
                            m = m.min(-r[p]);
                        }
                        p += 1;
                    }
                }
                m
            }
        })
        .collect()
}

impl GuardedModel {
    /// Guards `compact` with `exact`: rows with confidence below `threshold` are answered by
    /// the exact model. The two must share task, labels, inputs and scaling; regression
    /// models cannot be guarded (they have no margin).
    pub fn new(compact: CompiledModel, exact: ExactModel, threshold: f64) -> Result<Self> {
        if threshold.is_nan() {
            return Err(Error::input("the guard threshold is not a number"));
        }
        if !exact.task().is_classifier() {
            return Err(Error::input(
                "a guard needs a classifier: regression models have no margin to judge confidence by",
            ));
        }
        if compact.rule() != exact.rule()
            || compact.input_dim() != exact.input_dim()
            || compact.scaling() != exact.scaling()
        {
            return Err(Error::input(
                "the compiled and the exact model differ in task, labels, inputs or scaling",
            ));
        }
        Ok(GuardedModel {
            compact,
            exact,
            threshold,
            guard: json!({}),
        })
    }

    /// The compiled stage.
    pub fn compact(&self) -> &CompiledModel {
        &self.compact
    }

    /// The exact fallback.
    pub fn exact(&self) -> &ExactModel {
        &self.exact
    }

    /// The confidence threshold.
    pub fn threshold(&self) -> f64 {
        self.threshold
    }

    /// Decision values and the stage that answered each row (0 compiled, 1 exact).
    ///
    /// # Panics
    /// If `x` does not have the model's number of columns.
    pub fn decision(&self, x: ArrayView2<f64>) -> (Array2<f64>, Vec<u8>) {
        let mut s = self.compact.decision(x);
        let k = self.exact.labels().len();
        let conf = confidence(self.exact.task(), k, s.view());
        let idx: Vec<usize> = (0..conf.len())
            .filter(|&i| conf[i] < self.threshold)
            .collect();
        let mut stage = vec![0u8; conf.len()];
        if !idx.is_empty() {
            let se = self.exact.decision(x.select(Axis(0), &idx).view());
            for (r, &i) in idx.iter().enumerate() {
                s.row_mut(i).assign(&se.row(r));
                stage[i] = 1;
            }
        }
        (s, stage)
    }

    /// Decision values of one row (sequential) and the stage that answered it.
    pub fn decision_one(&self, x: &[f64]) -> (Vec<f64>, u8) {
        let s = self.compact.decision_one(x);
        let k = self.exact.labels().len();
        let view = ArrayView2::from_shape((1, s.len()), &s).expect("one row");
        if confidence(self.exact.task(), k, view)[0] < self.threshold {
            (self.exact.decision_one(x), 1)
        } else {
            (s, 0)
        }
    }

    /// The output rule.
    pub fn rule(&self) -> &OutputRule {
        self.exact.rule()
    }

    /// Labels of decision values.
    pub fn labels_of(&self, s: ArrayView2<f64>) -> Vec<String> {
        self.exact.labels_of(s)
    }

    /// The model as one file: the compiled model's tensors and manifest, the exact model's
    /// `exact.*` tensors and kernel, and a `guard` section.
    pub fn to_file(&self) -> TensorFile {
        let mut f = self.compact.to_file();
        let e = self.exact.to_file();
        for (name, t) in e.tensors {
            if name.starts_with("exact.") {
                f.tensors.insert(name, t);
            }
        }
        f.manifest.insert("kind".into(), json!("guarded"));
        f.manifest
            .insert("kernel".into(), json!(self.exact.kernel().to_string()));
        f.manifest.insert(
            "exact_training".into(),
            e.manifest.get("training").cloned().unwrap_or(Value::Null),
        );
        let mut g = self.guard.clone();
        if !g.is_object() {
            g = json!({});
        }
        g["rule"] = json!("smallest margin of the predicted class");
        g["threshold"] = if self.threshold.is_finite() {
            json!(self.threshold)
        } else if self.threshold > 0.0 {
            json!("inf")
        } else {
            json!("-inf")
        };
        g["stages"] = json!(STAGES);
        f.manifest.insert("guard".into(), g);
        f
    }

    /// Writes the model atomically.
    pub fn save(&self, path: &Path) -> Result<()> {
        self.to_file().write(path)
    }

    /// Reads a guarded model from a parsed file.
    pub fn from_file(f: &TensorFile, src: &str) -> Result<GuardedModel> {
        let kind = f.get_str("kind", src)?;
        if kind != "guarded" {
            return Err(Error::input(format!(
                "{src}: model kind is '{kind}'; expected a guarded model"
            )));
        }
        let mut c = TensorFile {
            tensors: Default::default(),
            manifest: f.manifest.clone(),
        };
        let mut e = TensorFile {
            tensors: Default::default(),
            manifest: f.manifest.clone(),
        };
        for (name, t) in &f.tensors {
            if name.starts_with("exact.") {
                e.tensors.insert(name.clone(), t.clone());
            } else {
                if name.starts_with("input.") {
                    e.tensors.insert(name.clone(), t.clone());
                }
                c.tensors.insert(name.clone(), t.clone());
            }
        }
        c.manifest.insert("kind".into(), json!("compiled"));
        e.manifest.insert("kind".into(), json!("exact"));
        let training = f
            .manifest
            .get("exact_training")
            .cloned()
            .unwrap_or(Value::Null);
        e.manifest.insert("training".into(), training);
        let compact = CompiledModel::from_file(&c, src)?;
        let exact = ExactModel::from_file(&e, src)?;
        let g = f.manifest.get("guard").cloned().ok_or_else(|| {
            Error::file(format!("{src}: a guarded model needs a 'guard' section"))
        })?;
        let threshold = match g.get("threshold") {
            Some(Value::Number(n)) => n.as_f64().unwrap_or(f64::NAN),
            Some(Value::String(s)) if s == "inf" => f64::INFINITY,
            Some(Value::String(s)) if s == "-inf" => f64::NEG_INFINITY,
            _ => f64::NAN,
        };
        if threshold.is_nan() {
            return Err(Error::file(format!(
                "{src}: guard.threshold must be a number, \"inf\" or \"-inf\""
            )));
        }
        let mut m = GuardedModel::new(compact, exact, threshold).map_err(|e| e.context(src))?;
        m.guard = g;
        Ok(m)
    }

    /// Reads a guarded model file.
    pub fn load(path: &Path) -> Result<GuardedModel> {
        let f = TensorFile::read(path)?;
        Self::from_file(&f, &path.display().to_string())
    }
}

/// The guard's threshold for a target: on rows with compiled decisions `sc` and exact
/// decisions `se`, the smallest share of rows sent to the exact model (lowest confidence
/// first) such that the one-sided 95% lower confidence bound of the agreement (Wilson,
/// z = 1.645) is at least `target`. Returns the threshold and the fallback share, or
/// `None` when even sending every row does not meet it (only possible with very few rows).
pub fn threshold_for_agreement(
    task: Task,
    k: usize,
    sc: ArrayView2<f64>,
    se: ArrayView2<f64>,
    target: f64,
) -> Option<(f64, f64)> {
    let n = sc.nrows();
    if n == 0 {
        return None;
    }
    let conf = confidence(task, k, sc);
    let lc = label_indices(task, k, sc);
    let le = label_indices(task, k, se);
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| conf[a].total_cmp(&conf[b]));
    // agree_rest[f]: agreeing rows among order[f..].
    let mut agree_rest = vec![0usize; n + 1];
    for f in (0..n).rev() {
        let i = order[f];
        agree_rest[f] = agree_rest[f + 1] + usize::from(lc[i] == le[i]);
    }
    for f in 0..=n {
        // Ties: a threshold cannot split rows of equal confidence.
        if f > 0 && f < n && conf[order[f - 1]] == conf[order[f]] {
            continue;
        }
        let agree = f + agree_rest[f];
        if wilson_lower_one_sided(agree, n) >= target {
            let t = if f == 0 {
                f64::NEG_INFINITY
            } else if f == n {
                f64::INFINITY
            } else {
                0.5 * (conf[order[f - 1]] + conf[order[f]])
            };
            return Some((t, f as f64 / n as f64));
        }
    }
    None
}

/// The threshold that sends the share `rate` of the rows (lowest confidence first) to the
/// exact model.
pub fn threshold_for_rate(task: Task, k: usize, sc: ArrayView2<f64>, rate: f64) -> f64 {
    let mut conf = confidence(task, k, sc);
    conf.sort_by(f64::total_cmp);
    let n = conf.len();
    let f = ((rate.clamp(0.0, 1.0) * n as f64).ceil() as usize).min(n);
    if f == 0 {
        f64::NEG_INFINITY
    } else if f == n {
        f64::INFINITY
    } else {
        0.5 * (conf[f - 1] + conf[f])
    }
}

/// One-sided 95% lower bound of a proportion (Wilson score interval with z = 1.645).
pub fn wilson_lower_one_sided(k: usize, n: usize) -> f64 {
    if n == 0 {
        return 0.0;
    }
    let z = 1.644_853_626_951_472_2_f64;
    let nf = n as f64;
    let p = k as f64 / nf;
    let z2 = z * z;
    let centre = p + z2 / (2.0 * nf);
    let half = z * (p * (1.0 - p) / nf + z2 / (4.0 * nf * nf)).sqrt();
    ((centre - half) / (1.0 + z2 / nf)).clamp(0.0, 1.0)
}
