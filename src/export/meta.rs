//! What every exported artefact says about itself: the input columns in order, the input
//! scaling, the labels and how decision values map to them, the exact model it stands for
//! (its fingerprint), the method and size, the agreement measured when it was compiled, and
//! for guarded models the guard. Each backend prints the same [`ArtefactInfo`]: ONNX as
//! `metadata_props` and the graph's doc string, C as accessor functions and a header
//! comment, Rust as constants, plain weights in their JSON description.
//!
//! ```
//! use kernelpress::export::meta::ArtefactInfo;
//! use kernelpress::features::{FeatureSpec, Method};
//! use kernelpress::model::{CompiledModel, Task};
//! use ndarray::Array2;
//! let spec = FeatureSpec::new("gaussian(gamma=1)".parse().unwrap(), Method::Fourier, 2, 8, 3);
//! let (map, _) = spec.sample(None).unwrap();
//! let mut m = CompiledModel::new(map, Array2::zeros((8, 1)), vec![0.0], Task::Binary,
//!     vec!["calm".into(), "alarm".into()], None).unwrap();
//! m.feature_names = vec!["flow".into(), "heat".into()];
//! let info = ArtefactInfo::of(&m, None);
//! assert_eq!(info.columns, ["flow", "heat"]);
//! assert!(info.pairs().iter().any(|(k, v)| k == "input_columns" && v == "flow,heat"));
//! ```

use crate::model::{CompiledModel, GuardedModel, Task};
use serde_json::Value;

/// The description an export carries.
#[derive(Debug, Clone, PartialEq)]
pub struct ArtefactInfo {
    /// Input column names in the order the artefact reads them.
    pub columns: Vec<String>,
    /// Whether the artefact standardises its inputs itself (`(x − mean) / scale`, the
    /// stored scaling), so callers pass raw values.
    pub scaled_inside: bool,
    /// Class names by label index (empty for regression).
    pub labels: Vec<String>,
    /// How decision values map to labels.
    pub decision_rule: String,
    /// Fingerprint of the exact model the artefact stands for, when known.
    pub exact_fingerprint: Option<String>,
    /// Feature method of the compiled stage.
    pub method: String,
    /// Number of features of the compiled stage.
    pub features: usize,
    /// The kernel.
    pub kernel: String,
    /// Label agreement with the exact model measured at compile time, and the rows it was
    /// measured on (`audit rows` or `--eval rows`), when the model file stored one.
    pub agreement: Option<(f64, String)>,
    /// The guard (rule, threshold) of a guarded model.
    pub guard: Option<(String, f64)>,
}

/// The rule that turns decision values into a label, in words.
pub fn decision_rule(task: Task) -> &'static str {
    match task {
        Task::Regression => "regression: the single decision value is the prediction",
        Task::Binary => "binary: label 1 when decision[0] > 0, else label 0",
        Task::Ovr => "one-vs-rest: the label with the largest decision value (first on ties)",
        Task::Ovo => {
            "one-vs-one: decision values are class pairs (0,1), (0,2), ..., (1,2), ...; a positive value is a vote for the first class; most votes wins (first on ties)"
        }
    }
}

impl ArtefactInfo {
    /// The description of `model`, or of the guarded model `guard` whose compiled stage
    /// it is.
    pub fn of(model: &CompiledModel, guard: Option<&GuardedModel>) -> ArtefactInfo {
        let rep = &model.report;
        let agreement = rep.get("agreement").and_then(Value::as_f64).map(|a| {
            let on = rep
                .get("evaluated_on")
                .and_then(Value::as_str)
                .unwrap_or("held-out rows")
                .to_string();
            (a, on)
        });
        let exact_fingerprint = match guard {
            Some(g) => Some(g.exact().fingerprint()),
            None => model.exact_fingerprint.clone(),
        };
        ArtefactInfo {
            columns: model.feature_names.clone(),
            scaled_inside: model.scaling().is_some(),
            labels: model.labels().to_vec(),
            decision_rule: decision_rule(model.task()).to_string(),
            exact_fingerprint,
            method: model.spec().method.name().to_string(),
            features: model.features(),
            kernel: model.spec().kernel.to_string(),
            agreement,
            guard: guard.map(|g| (g.guard_rule().describe().to_string(), g.threshold())),
        }
    }

    /// The description as ordered key/value strings (ONNX `metadata_props`, the C info
    /// text). Lists are comma-separated with `\` escaping commas and backslashes inside
    /// names.
    pub fn pairs(&self) -> Vec<(String, String)> {
        let list = |v: &[String]| {
            v.iter()
                .map(|s| s.replace('\\', "\\\\").replace(',', "\\,"))
                .collect::<Vec<_>>()
                .join(",")
        };
        let mut out = vec![
            (
                "producer".into(),
                format!("kernelpress {}", env!("CARGO_PKG_VERSION")),
            ),
            ("input_columns".into(), list(&self.columns)),
            (
                "input_scaling".into(),
                if self.scaled_inside {
                    "standardised inside the artefact: pass raw values".into()
                } else {
                    "none: pass values as the model was trained on".into()
                },
            ),
            ("labels".into(), list(&self.labels)),
            ("decision_rule".into(), self.decision_rule.clone()),
            ("method".into(), self.method.clone()),
            ("features".into(), self.features.to_string()),
            ("kernel".into(), self.kernel.clone()),
            (
                "exact_fingerprint".into(),
                self.exact_fingerprint
                    .clone()
                    .unwrap_or_else(|| "unknown".into()),
            ),
            (
                "agreement_at_compile".into(),
                match &self.agreement {
                    Some((a, on)) => format!("{a:.4} on {on}"),
                    None => "not measured".into(),
                },
            ),
        ];
        if let Some((rule, t)) = &self.guard {
            out.push(("guard".into(), format!("exact fallback when {rule} < {t}")));
        }
        out
    }

    /// The description as lines `key: value` (for doc strings and comments).
    pub fn text(&self) -> String {
        self.pairs()
            .into_iter()
            .map(|(k, v)| format!("{k}: {v}\n"))
            .collect()
    }
}
