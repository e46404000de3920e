//! Compiled models: a sampled feature map plus a linear head,
//! `f(x) = z(s(x)) · W + b` with `s` the stored input scaling.

use super::{
    label_indices, put_scaling, read_feature_names, read_labels, read_scaling, scaling_name, Task,
    TensorFile, FORMAT_VERSION,
};
use crate::data::Standardizer;
use crate::features::{FeatureMap, Node};
use crate::linalg;
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};
use serde_json::{json, Value};
use std::path::Path;

/// A compiled model: feature map + head.
///
/// ```
/// use kernelpress::features::{FeatureSpec, Method};
/// use kernelpress::model::{CompiledModel, Task};
/// use ndarray::{array, Array2};
/// let spec = FeatureSpec::new("gaussian(gamma=1)".parse().unwrap(), Method::Fourier, 1, 64, 3);
/// let (map, _) = spec.sample(None).unwrap();
/// let head = Array2::zeros((64, 1));
/// let m = CompiledModel::new(map, head, vec![0.25], Task::Regression, vec![], None).unwrap();
/// assert_eq!(m.decision(array![[0.5]].view())[[0, 0]], 0.25);
/// ```
#[derive(Debug, Clone)]
pub struct CompiledModel {
    map: FeatureMap,
    head: Array2<f64>,
    intercept: Vec<f64>,
    task: Task,
    labels: Vec<String>,
    scaling: Option<Standardizer>,
    /// Fit settings (`fit` in the manifest).
    pub fit: Value,
    /// Report summary stored with the model (`report` in the manifest).
    pub report: Value,
    /// Feature names, if known.
    pub feature_names: Vec<String>,
    /// Nyström only: the head folded into the landmarks, `F = P·W` (`L × k`), so that
    /// `f(x) = K(x, L)·F + b` (one kernel block and one product per prediction).
    folded: Option<Array2<f64>>,
}

impl CompiledModel {
    /// Builds and validates a compiled model.
    pub fn new(
        map: FeatureMap,
        head: Array2<f64>,
        intercept: Vec<f64>,
        task: Task,
        labels: Vec<String>,
        scaling: Option<Standardizer>,
    ) -> Result<CompiledModel> {
        let dd = map.output_dim();
        if head.nrows() != dd {
            return Err(Error::input(format!(
                "head has {} rows but the feature map has {dd} outputs",
                head.nrows()
            )));
        }
        let k = head.ncols();
        if intercept.len() != k {
            return Err(Error::input(format!(
                "{} intercepts for {k} head columns",
                intercept.len()
            )));
        }
        if let Some(want) = task.outputs_for(labels.len()) {
            if want != k || labels.len() < 2 {
                return Err(Error::input(format!(
                    "a {} model with {} labels needs {want} decision columns, the head has {k}",
                    task.name(),
                    labels.len()
                )));
            }
        }
        if let Some(s) = &scaling {
            if s.mean.len() != map.input_dim() {
                return Err(Error::input(
                    "input scaling length differs from the input dimension",
                ));
            }
        }
        let d = map.input_dim();
        let folded = match &map.root {
            Node::Nystrom { proj, .. } => Some(linalg::ab_seq(proj.view(), head.view())),
            _ => None,
        };
        Ok(CompiledModel {
            folded,
            map,
            head,
            intercept,
            task,
            labels,
            scaling,
            fit: json!({}),
            report: json!({}),
            feature_names: (0..d).map(|j| format!("x{j}")).collect(),
        })
    }

    /// The feature map.
    pub fn map(&self) -> &FeatureMap {
        &self.map
    }
    /// Head weights `D × k`.
    pub fn head(&self) -> ArrayView2<'_, f64> {
        self.head.view()
    }
    /// Intercepts.
    pub fn intercept(&self) -> &[f64] {
        &self.intercept
    }
    /// Task.
    pub fn task(&self) -> Task {
        self.task
    }
    /// Class labels.
    pub fn labels(&self) -> &[String] {
        &self.labels
    }
    /// Input scaling.
    pub fn scaling(&self) -> Option<&Standardizer> {
        self.scaling.as_ref()
    }
    /// Input dimension.
    pub fn input_dim(&self) -> usize {
        self.map.input_dim()
    }
    /// Decision values per row.
    pub fn n_outputs(&self) -> usize {
        self.head.ncols()
    }

    /// Nyström with a folded head: the kernel, the prepared landmarks and `F = P·W`.
    fn fold(
        &self,
    ) -> Option<(
        &crate::kernel::Kernel,
        &crate::kernel::Prepared,
        &Array2<f64>,
    )> {
        match (&self.folded, &self.map.root) {
            (
                Some(f),
                Node::Nystrom {
                    kernel,
                    landmarks,
                    prepared,
                    ..
                },
            ) => {
                let prep =
                    prepared.get_or_init(|| crate::kernel::Prepared::new(kernel, landmarks.view()));
                Some((kernel, prep, f))
            }
            _ => None,
        }
    }

    /// Decision values for raw inputs.
    ///
    /// # Panics
    /// If `x` does not have [`Self::input_dim`] columns.
    #[track_caller]
    pub fn decision(&self, x: ArrayView2<f64>) -> Array2<f64> {
        let xs = match &self.scaling {
            Some(s) => s.apply(x),
            None => x.to_owned(),
        };
        let mut s = match self.fold() {
            Some((kernel, prep, f)) => linalg::map_row_chunks(xs.view(), f.ncols(), |c| {
                linalg::ab_seq(kernel.gram_block(c, prep).view(), f.view())
            }),
            None => {
                let z = self.map.transform(xs.view());
                linalg::ab(z.view(), self.head.view())
            }
        };
        for mut row in s.rows_mut() {
            row.iter_mut()
                .zip(&self.intercept)
                .for_each(|(v, b)| *v += b);
        }
        s
    }

    /// Decision values for one raw row, sequentially (single-row latency).
    pub fn decision_one(&self, x: &[f64]) -> Vec<f64> {
        let xs: Vec<f64> = match &self.scaling {
            Some(s) => x
                .iter()
                .enumerate()
                .map(|(j, v)| (v - s.mean[j]) / s.scale[j])
                .collect(),
            None => x.to_vec(),
        };
        let (z, head) = match self.fold() {
            Some((kernel, prep, f)) => {
                let row = ArrayView2::from_shape((1, xs.len()), &xs[..]).expect("one row");
                (kernel.gram_block(row, prep).into_raw_vec_and_offset().0, f)
            }
            None => (self.map.transform_one(&xs), &self.head),
        };
        let k = self.head.ncols();
        let mut out = self.intercept.clone();
        for (zi, row) in z.iter().zip(head.rows()) {
            for c in 0..k {
                out[c] += zi * row[c];
            }
        }
        out
    }

    /// Labels of decision values (empty strings for regression).
    pub fn labels_of(&self, s: ArrayView2<f64>) -> Vec<String> {
        if !self.task.is_classifier() {
            return vec![String::new(); s.nrows()];
        }
        label_indices(self.task, self.labels.len(), s)
            .into_iter()
            .map(|i| self.labels[i].clone())
            .collect()
    }

    /// Floats stored (map + head + intercepts + scaling).
    pub fn parameter_floats(&self) -> usize {
        self.map.stored_floats()
            + self
                .folded
                .as_ref()
                .map(|f| f.len())
                .unwrap_or(self.head.len())
            + self.intercept.len()
            + self.scaling.as_ref().map(|s| 2 * s.mean.len()).unwrap_or(0)
    }

    /// Flops per prediction (analytic).
    pub fn flops(&self) -> usize {
        match (&self.folded, &self.map.root) {
            (Some(f), Node::Nystrom { landmarks, .. }) => 3 * landmarks.len() + 2 * f.len(),
            _ => self.map.flops_per_row() + 2 * self.head.len(),
        }
    }

    /// The model as a [`TensorFile`].
    pub fn to_file(&self) -> TensorFile {
        let mut f = TensorFile::default();
        self.map.write_to(&mut f);
        match &self.folded {
            // Nyström: store F = P·W; W is recovered on load as Pᵀ·K(L, L)·F.
            Some(fh) => {
                f.put(
                    "nystrom_head",
                    vec![fh.nrows(), fh.ncols()],
                    fh.iter().copied().collect(),
                );
                f.manifest
                    .insert("head_form".into(), json!("nystrom_folded"));
            }
            None => {
                f.put(
                    "head",
                    vec![self.head.nrows(), self.head.ncols()],
                    self.head.iter().copied().collect(),
                );
                f.manifest.insert("head_form".into(), json!("features"));
            }
        }
        f.put(
            "intercepts",
            vec![self.intercept.len()],
            self.intercept.clone(),
        );
        let d = self.input_dim();
        put_scaling(&mut f, self.scaling.as_ref());
        let spec = &self.map.spec;
        let entries = [
            ("format_version", json!(FORMAT_VERSION)),
            ("kind", json!("compiled")),
            ("kernel", json!(spec.kernel.to_string())),
            ("task", json!(self.task.name())),
            ("labels", json!(self.labels)),
            ("input_dim", json!(d)),
            ("n_outputs", json!(self.n_outputs())),
            ("input_scaling", json!(scaling_name(self.scaling.as_ref()))),
            ("method", json!(spec.method.name())),
            ("features", json!(self.map.output_dim())),
            ("features_requested", json!(spec.features)),
            ("seed", json!(spec.seed)),
            ("rng", json!(crate::features::RNG_NAME)),
            ("fit", self.fit.clone()),
            ("report", self.report.clone()),
            ("feature_names", json!(self.feature_names)),
            (
                "generator",
                json!(format!("kernelpress {}", env!("CARGO_PKG_VERSION"))),
            ),
        ];
        for (k, v) in entries {
            f.manifest.insert(k.into(), v);
        }
        f
    }

    /// Writes the model atomically.
    pub fn save(&self, path: &Path) -> Result<()> {
        self.to_file().write(path)
    }

    /// Reads a compiled model from a parsed file.
    pub fn from_file(f: &TensorFile, src: &str) -> Result<CompiledModel> {
        let kind = f.get_str("kind", src)?;
        if kind != "compiled" {
            return Err(Error::input(format!(
                "{src}: model kind is '{kind}'; expected a compiled model"
            )));
        }
        let map = FeatureMap::read_from(f, src)?;
        let dd = map.output_dim();
        let k = f.get_u64("n_outputs", src)? as usize;
        let mut stored_fold: Option<Array2<f64>> = None;
        let head: Vec<f64> = match (
            f.manifest.get("head_form").and_then(|v| v.as_str()),
            &map.root,
        ) {
            (
                Some("nystrom_folded"),
                Node::Nystrom {
                    kernel,
                    landmarks,
                    proj,
                    ..
                },
            ) => {
                let (_, fh) = f.tensor("nystrom_head", &[Some(landmarks.nrows()), Some(k)], src)?;
                let fh = Array2::from_shape_vec((landmarks.nrows(), k), fh).unwrap();
                let kll = kernel.gram(landmarks.view(), landmarks.view());
                let w = linalg::ab_seq(linalg::ab_seq(proj.t(), kll.view()).view(), fh.view());
                stored_fold = Some(fh);
                w.iter().copied().collect()
            }
            (Some("nystrom_folded"), _) => {
                return Err(Error::input(format!(
                    "{src}: head_form nystrom_folded on a map that is not Nyström"
                )))
            }
            _ => f.tensor("head", &[Some(dd), Some(k)], src)?.1,
        };
        let (_, b) = f.tensor("intercepts", &[Some(k)], src)?;
        let task = Task::parse(&f.get_str("task", src)?).map_err(|e| e.context(src))?;
        let labels = read_labels(f, src)?;
        let d = map.input_dim();
        let scaling = read_scaling(f, d, src)?;
        let mut m = CompiledModel::new(
            map,
            Array2::from_shape_vec((dd, k), head).unwrap(),
            b,
            task,
            labels,
            scaling,
        )
        .map_err(|e| e.context(src))?;
        if stored_fold.is_some() {
            // Score with exactly the stored F.
            m.folded = stored_fold;
        }
        m.fit = f.manifest.get("fit").cloned().unwrap_or(json!({}));
        m.report = f.manifest.get("report").cloned().unwrap_or(json!({}));
        if let Some(names) = read_feature_names(f, d) {
            m.feature_names = names;
        }
        Ok(m)
    }

    /// Reads a compiled model file.
    pub fn load(path: &Path) -> Result<CompiledModel> {
        let f = TensorFile::read(path)?;
        Self::from_file(&f, &path.display().to_string())
    }
}
