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

/// Names of the stages, by index (the `stage` column of `score`): the compiled model
/// alone, the exact model alone, or the compiled model with some decision values
/// recomputed exactly (the pairs rule).
pub const STAGES: [&str; 3] = ["compiled", "exact", "partial"];

/// How a guard decides what the exact model computes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GuardRule {
    /// A row whose confidence ([`confidence`]) is below the threshold goes to the exact
    /// model whole.
    Row,
    /// One-vs-one classifiers: the pairs whose compiled decision is within the threshold
    /// of zero and that involve a class that could still win the vote are recomputed by
    /// the exact model, reading only those pairs' support vectors ([`pairs_to_check`]).
    Pairs,
}

impl GuardRule {
    /// The rule's description in the file's `guard.rule`.
    pub fn describe(self) -> &'static str {
        match self {
            GuardRule::Row => "smallest margin of the predicted class",
            GuardRule::Pairs => "uncertain pairs of the classes that could still win",
        }
    }

    /// The rule a file's `guard.rule` names.
    pub fn from_description(s: &str) -> Option<GuardRule> {
        [GuardRule::Row, GuardRule::Pairs]
            .into_iter()
            .find(|r| r.describe() == s)
    }

    /// The rules that apply to a task: both for one-vs-one classifiers, rows otherwise.
    pub fn candidates(task: Task) -> Vec<GuardRule> {
        if task == Task::Ovo {
            vec![GuardRule::Row, GuardRule::Pairs]
        } else {
            vec![GuardRule::Row]
        }
    }
}

/// For a one-vs-one row of compiled decisions `d` over `k` classes (pairs in the order
/// (0,1), (0,2), …, (1,2), …; a positive value favours the first class), the pairs the
/// exact model must recompute under threshold `tau`: a pair is *uncertain* when
/// `|d| < tau`; the classes that could still win are the compiled winner and every class
/// whose votes, if it won all its uncertain pairs, would reach the winner's votes if the
/// winner lost all of its own; the uncertain pairs that involve one of those classes are
/// marked. If every pair with `|d| ≥ tau` has the exact model's sign, the vote over the
/// compiled decisions with the marked pairs replaced by exact ones gives the exact label:
/// the contenders' votes are then exact, and no other class can reach the winner's.
///
/// ```
/// use kernelpress::model::guarded::pairs_to_check;
/// // Three classes; pairs (0,1), (0,2), (1,2). Class 0 wins both its pairs, but (0,1)
/// // is close: classes 0 and 1 contend, class 2 cannot reach two votes.
/// let d = [0.05, 2.0, 1.5];
/// assert_eq!(pairs_to_check(3, &d, 0.1), vec![true, false, false]);
/// assert_eq!(pairs_to_check(3, &d, 0.01), vec![false, false, false]);
/// ```
pub fn pairs_to_check(k: usize, d: &[f64], tau: f64) -> Vec<bool> {
    let mut votes = vec![0usize; k];
    let mut gain = vec![0usize; k];
    let mut loss = vec![0usize; k];
    let mut p = 0;
    for i in 0..k {
        for j in i + 1..k {
            let (w, l) = if d[p] > 0.0 { (i, j) } else { (j, i) };
            votes[w] += 1;
            if d[p].abs() < tau {
                loss[w] += 1;
                gain[l] += 1;
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
    let floor = votes[best] - loss[best];
    let contender: Vec<bool> = (0..k)
        .map(|c| c == best || votes[c] + gain[c] >= floor)
        .collect();
    let mut out = vec![false; d.len()];
    let mut p = 0;
    for i in 0..k {
        for j in i + 1..k {
            out[p] = d[p].abs() < tau && (contender[i] || contender[j]);
            p += 1;
        }
    }
    out
}

/// A compiled model guarded by its exact model.
#[derive(Debug, Clone)]
pub struct GuardedModel {
    compact: CompiledModel,
    exact: ExactModel,
    threshold: f64,
    rule: GuardRule,
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
        Self::with_rule(compact, exact, threshold, GuardRule::Row)
    }

    /// Guards `compact` with `exact` under `rule` ([`GuardRule::Pairs`] needs a one-vs-one
    /// classifier).
    pub fn with_rule(
        compact: CompiledModel,
        exact: ExactModel,
        threshold: f64,
        rule: GuardRule,
    ) -> Result<Self> {
        if rule == GuardRule::Pairs && exact.task() != Task::Ovo {
            return Err(Error::input(
                "the pairs guard needs a one-vs-one classifier (its decision values are class pairs)",
            ));
        }
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
            rule,
            guard: json!({}),
        })
    }

    /// The guard's rule.
    pub fn guard_rule(&self) -> GuardRule {
        self.rule
    }

    /// What the exact model computes for a row of compiled decisions `s`: nothing
    /// (`None`), or the outputs marked (every output: the exact model answers alone).
    fn plan(&self, s: &[f64]) -> Option<Vec<bool>> {
        let k = self.exact.labels().len();
        match self.rule {
            GuardRule::Row => {
                let view = ArrayView2::from_shape((1, s.len()), s).expect("one row");
                (confidence(self.exact.task(), k, view)[0] < self.threshold)
                    .then(|| vec![true; s.len()])
            }
            GuardRule::Pairs => {
                let m = pairs_to_check(k, s, self.threshold);
                m.iter().any(|&b| b).then_some(m)
            }
        }
    }

    /// One row: the compiled decisions `s` completed by the exact model as planned.
    fn finish_one(&self, x: &[f64], mut s: Vec<f64>, f32: bool) -> (Vec<f64>, u8) {
        match self.plan(&s) {
            None => (s, 0),
            Some(_) if self.rule == GuardRule::Row => (self.exact.decision_one(x), 1),
            Some(m) => {
                let e = if f32 {
                    self.exact.decision_some_one_f32(x, &m)
                } else {
                    self.exact.decision_some_one(x, &m)
                };
                let all = m.iter().all(|&b| b);
                for ((v, &b), ev) in s.iter_mut().zip(&m).zip(e) {
                    if b {
                        *v = ev;
                    }
                }
                (s, if all { 1 } else { 2 })
            }
        }
    }

    /// Mean share of the exact model's support vectors read per row of `x` (the exact
    /// model's share of the work).
    pub fn exact_work_share(&self, x: ArrayView2<f64>) -> f64 {
        let s = self.compact.decision(x);
        let n = s.nrows().max(1) as f64;
        s.rows()
            .into_iter()
            .map(|r| {
                let r = r.to_vec();
                match self.plan(&r) {
                    None => 0.0,
                    Some(m) if m.iter().all(|&b| b) => 1.0,
                    Some(m) => self.exact.support_share(&m),
                }
            })
            .sum::<f64>()
            / n
    }

    /// Stores `report` (the guarded model's report, [`crate::report::build_guarded`]) in
    /// the model; [`Self::to_file`] writes it as the manifest's `report`.
    pub fn set_report(&mut self, report: Value) {
        self.compact.report = report;
    }

    /// The compiled stage.
    pub fn compact(&self) -> &CompiledModel {
        &self.compact
    }

    /// Sets the head precision of the compiled stage's f32 paths
    /// ([`CompiledModel::set_head_precision`]). The guard's threshold was set on the
    /// compiled stage's decisions at compile time; `report` measures what another
    /// precision does to the guarded labels.
    pub fn set_head_precision(&mut self, precision: crate::linalg::HeadPrecision) {
        self.compact.set_head_precision(precision);
    }

    /// The exact fallback.
    pub fn exact(&self) -> &ExactModel {
        &self.exact
    }

    /// The confidence threshold.
    pub fn threshold(&self) -> f64 {
        self.threshold
    }

    /// Decision values and the stage that answered each row (indices into [`STAGES`]).
    ///
    /// # Panics
    /// If `x` does not have the model's number of columns.
    pub fn decision(&self, x: ArrayView2<f64>) -> (Array2<f64>, Vec<u8>) {
        // Rows the exact model takes part in go through its batched path (one matrix
        // product per chunk beats reading the support vectors once per row); the pairs
        // rule keeps the exact values of the planned outputs only, as one row at a time
        // does (equal up to the order of the sums).
        let mut s = self.compact.decision(x);
        self.finish_batch(x, &mut s, false)
    }

    /// [`Self::decision`] in f32 arithmetic: the compiled stage's f32 path
    /// ([`CompiledModel::decision_f32`]) and, for the rows the guard sends on, the exact
    /// model's ([`ExactModel::decision_f32`]); the threshold is compared with the f32
    /// decisions, as the C, Rust and ONNX exports compare it.
    ///
    /// # Panics
    /// If `x` does not have the model's number of columns.
    pub fn decision_f32(&self, x: ArrayView2<f64>) -> (Array2<f64>, Vec<u8>) {
        let mut s = self.compact.decision_f32(x);
        self.finish_batch(x, &mut s, true)
    }

    /// Completes compiled decisions `s` of the rows `x` by the exact model as planned.
    fn finish_batch(
        &self,
        x: ArrayView2<f64>,
        s: &mut Array2<f64>,
        f32: bool,
    ) -> (Array2<f64>, Vec<u8>) {
        let plans: Vec<Option<Vec<bool>>> = s
            .rows()
            .into_iter()
            .map(|r| self.plan(&r.to_vec()))
            .collect();
        let mut stage = vec![0u8; plans.len()];
        let sent: Vec<usize> = (0..plans.len()).filter(|&i| plans[i].is_some()).collect();
        if !sent.is_empty() {
            let xs = x.select(Axis(0), &sent);
            let se = if f32 {
                self.exact.decision_f32(xs.view())
            } else {
                self.exact.decision(xs.view())
            };
            for (r, &i) in sent.iter().enumerate() {
                let m = plans[i].as_ref().expect("planned");
                for ((v, &b), &ev) in s.row_mut(i).iter_mut().zip(m).zip(se.row(r)) {
                    if b {
                        *v = ev;
                    }
                }
                stage[i] = if m.iter().all(|&b| b) { 1 } else { 2 };
            }
        }
        (std::mem::take(s), stage)
    }

    /// Decision values of one row (sequential) and the stage that answered it.
    pub fn decision_one(&self, x: &[f64]) -> (Vec<f64>, u8) {
        let s = self.compact.decision_one(x);
        self.finish_one(x, s, false)
    }

    /// [`Self::decision_one`] in f32: the compiled stage's f32 row
    /// ([`CompiledModel::decision_one_f32`]), the threshold compared with those f32
    /// decisions (as the exports do), and the exact model's f32 row
    /// ([`ExactModel::decision_one_f32`]) for a row sent whole; the pairs rule completes its
    /// marked pairs from the grouped f32 copy ([`ExactModel::decision_some_one_f32`]).
    pub fn decision_one_f32(&self, x: &[f64]) -> (Vec<f64>, u8) {
        let s = self.compact.decision_one_f32(x);
        match self.plan(&s) {
            None => (s, 0),
            Some(m) if m.iter().all(|&b| b) => (self.exact.decision_one_f32(x), 1),
            Some(_) => self.finish_one(x, s, true),
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
        g["rule"] = json!(self.rule.describe());
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
            integrity: f.integrity,
        };
        let mut e = TensorFile {
            tensors: Default::default(),
            manifest: f.manifest.clone(),
            integrity: f.integrity,
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
        // The probability calibration belongs to the compiled stage (its tensors go there).
        e.manifest.remove("probabilities");
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
        let rule = match g.get("rule") {
            None => GuardRule::Row,
            Some(Value::String(r)) => GuardRule::from_description(r).ok_or_else(|| {
                Error::file(format!(
                    "{src}: guard.rule '{r}' unknown; expected '{}' or '{}'",
                    GuardRule::Row.describe(),
                    GuardRule::Pairs.describe()
                ))
            })?,
            Some(_) => return Err(Error::file(format!("{src}: guard.rule must be a string"))),
        };
        let mut m =
            GuardedModel::with_rule(compact, exact, threshold, rule).map_err(|e| e.context(src))?;
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

/// A guard chosen on audit rows.
#[derive(Debug, Clone, PartialEq)]
pub struct GuardChoice {
    /// The rule.
    pub rule: GuardRule,
    /// Its threshold.
    pub threshold: f64,
    /// Share of the audit rows the exact model takes part in (alone or completing).
    pub fallback_share: f64,
    /// Mean share of the support vectors read per audit row.
    pub work_share: f64,
    /// Agreement with the exact model on the audit rows.
    pub agreement: f64,
}

/// What a guard is chosen for.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum GuardTarget {
    /// The least exact work whose one-sided 95% lower bound of agreement on the audit rows
    /// is at least this.
    Agreement(f64),
    /// The exact model takes part in at most this share of the audit rows.
    Rate(f64),
}

impl GuardTarget {
    /// The target, or what is wrong with it: an agreement in (0, 1), a rate in [0, 1].
    ///
    /// ```
    /// use kernelpress::model::GuardTarget;
    /// assert!(GuardTarget::Agreement(0.995).checked().is_ok());
    /// assert!(GuardTarget::Agreement(1.5).checked().is_err());
    /// assert!(GuardTarget::Rate(1.0).checked().is_ok() && GuardTarget::Rate(-0.1).checked().is_err());
    /// ```
    pub fn checked(self) -> crate::Result<GuardTarget> {
        match self {
            GuardTarget::Agreement(p) if !(p > 0.0 && p < 1.0) => Err(crate::Error::input(
                format!("the guard's agreement target {p} must be in (0, 1)"),
            )),
            GuardTarget::Rate(r) if !(0.0..=1.0).contains(&r) => Err(crate::Error::input(format!(
                "the guard's fallback rate {r} must be in [0, 1]"
            ))),
            t => Ok(t),
        }
    }
}

/// Chooses the guard with the least exact work (mean share of support vectors read per
/// row) for `target` among the rules that apply to the task ([`GuardRule::candidates`];
/// ties go to the row rule). Which rule is cheaper depends on the model: on a one-vs-one
/// model with many classes and a strong compiled stage the pairs rule reads a fraction of
/// what the row rule reads; with few classes or a weak compiled stage it can read more.
pub fn choose_guard_auto(
    exact: &ExactModel,
    sc: ArrayView2<f64>,
    se: ArrayView2<f64>,
    target: GuardTarget,
) -> Option<GuardChoice> {
    GuardRule::candidates(exact.task())
        .into_iter()
        .filter_map(|r| choose_guard(exact, r, sc, se, target))
        .min_by(|a, b| a.work_share.total_cmp(&b.work_share))
}

/// Chooses a guard of `rule` for `target` on audit rows with compiled decisions `sc` and
/// exact decisions `se`. `None` when no threshold meets an agreement target (only
/// possible with few rows).
pub fn choose_guard(
    exact: &ExactModel,
    rule: GuardRule,
    sc: ArrayView2<f64>,
    se: ArrayView2<f64>,
    target: GuardTarget,
) -> Option<GuardChoice> {
    let task = exact.task();
    let k = exact.labels().len();
    let n = sc.nrows();
    let lc = label_indices(task, k, sc);
    let le = label_indices(task, k, se);
    if rule == GuardRule::Row {
        let t = match target {
            GuardTarget::Agreement(p) => threshold_for_agreement(task, k, sc, se, p)?.0,
            GuardTarget::Rate(r) => threshold_for_rate(task, k, sc, r),
        };
        let conf = confidence(task, k, sc);
        let agree = (0..n).filter(|&i| conf[i] < t || lc[i] == le[i]).count();
        let sent = conf.iter().filter(|&&c| c < t).count() as f64 / n.max(1) as f64;
        return Some(GuardChoice {
            rule,
            threshold: t,
            fallback_share: sent,
            work_share: sent,
            agreement: agree as f64 / n.max(1) as f64,
        });
    }
    if n == 0 {
        return None;
    }
    // Candidate thresholds: 0, quantiles of |decision| over every audit entry, +∞. The
    // exact work grows with the threshold, so the first that meets an agreement target is
    // the cheapest.
    let mut mags: Vec<f64> = sc.iter().map(|v| v.abs()).collect();
    mags.sort_by(f64::total_cmp);
    let levels = 256;
    let mut taus = vec![0.0];
    for i in 1..=levels {
        let v = mags[((i * (mags.len() - 1)) / levels).min(mags.len() - 1)];
        if v > *taus.last().expect("nonempty") {
            taus.push(v);
        }
    }
    taus.push(f64::INFINITY);
    let eval = |tau: f64| -> GuardChoice {
        let (mut agree, mut touched, mut work) = (0usize, 0usize, 0.0);
        for i in 0..n {
            let row = sc.row(i).to_vec();
            let m = pairs_to_check(k, &row, tau);
            if !m.iter().any(|&b| b) {
                agree += usize::from(lc[i] == le[i]);
                continue;
            }
            touched += 1;
            let mut d = row;
            for (j, &b) in m.iter().enumerate() {
                if b {
                    d[j] = se[[i, j]];
                }
            }
            let v = ArrayView2::from_shape((1, d.len()), &d).expect("one row");
            agree += usize::from(label_indices(task, k, v)[0] == le[i]);
            work += if m.iter().all(|&b| b) {
                1.0
            } else {
                exact.support_share(&m)
            };
        }
        GuardChoice {
            rule,
            threshold: tau,
            fallback_share: touched as f64 / n as f64,
            work_share: work / n as f64,
            agreement: agree as f64 / n as f64,
        }
    };
    match target {
        GuardTarget::Agreement(p) => taus
            .into_iter()
            .map(eval)
            .find(|c| wilson_lower_one_sided((c.agreement * n as f64).round() as usize, n) >= p),
        GuardTarget::Rate(r) => {
            let mut best = eval(0.0);
            for &t in &taus[1..] {
                let c = eval(t);
                if c.fallback_share > r {
                    break;
                }
                best = c;
            }
            Some(best)
        }
    }
}
