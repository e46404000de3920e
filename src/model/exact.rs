//! The exact kernel model: `f(x) = Σ_i coef_i · k(x, sv_i) + intercept` per output.

use super::io::{check_scaling, generator, read_input, read_output, write_input, write_output};
use super::{v1, OutputRule, Task};
use crate::data::Standardizer;
use crate::format::{TensorFile, FORMAT_VERSION};
use crate::kernel::{Kernel, Prepared};
use crate::linalg;
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};
use serde_json::json;
use std::path::Path;
use std::sync::OnceLock;

/// An exact kernel model: `f(x) = Σ_i coef_i · k(x, sv_i) + intercept` per output.
#[derive(Debug, Clone)]
pub struct ExactModel {
    kernel: Kernel,
    support_vectors: Array2<f64>,
    coef: Array2<f64>,
    intercept: Vec<f64>,
    rule: OutputRule,
    scaling: Option<Standardizer>,
    /// Feature names, if known.
    pub feature_names: Vec<String>,
    /// Fit settings and notes recorded in the manifest (`training`).
    pub training: serde_json::Value,
    /// Platt sigmoids for class probabilities, with what they were fitted on (imported
    /// from an ONNX SVM's `prob_a`/`prob_b`), if any.
    pub probabilities: Option<(super::Probabilities, String)>,
    prepared: OnceLock<Prepared>,
    prepared32: OnceLock<crate::kernel::Prepared32>,
    coef32: OnceLock<linalg::NarrowF32>,
    parts: OnceLock<super::parts::Parts>,
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
        if n == 0 {
            return Err(Error::input(
                "an exact model needs at least one support vector",
            ));
        }
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
        let rule = OutputRule::new(task, labels, k)?;
        check_scaling(scaling.as_ref(), d)?;
        // Row-major coefficients: the single-row paths read them as one slice.
        let coef = if coef.is_standard_layout() {
            coef
        } else {
            coef.as_standard_layout().into_owned()
        };
        Ok(ExactModel {
            kernel,
            support_vectors,
            coef,
            intercept,
            rule,
            scaling,
            feature_names: crate::data::placeholder_names(d),
            training: json!({}),
            probabilities: None,
            prepared: OnceLock::new(),
            prepared32: OnceLock::new(),
            coef32: OnceLock::new(),
            parts: OnceLock::new(),
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
        self.rule.task()
    }
    /// Class labels (empty for regression).
    pub fn labels(&self) -> &[String] {
        self.rule.labels()
    }
    /// The output rule (task, labels).
    pub fn rule(&self) -> &OutputRule {
        &self.rule
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

    fn prepared32(&self) -> &crate::kernel::Prepared32 {
        self.prepared32
            .get_or_init(|| crate::kernel::Prepared32::new(self.prepared()))
    }

    /// Decision values (`n × n_outputs`) for raw inputs, batched in f32: fixed row chunks
    /// in parallel, each one f32 matrix product with the support vectors (converted to f32
    /// on first use), the kernel profile in f32 (a vectorised exponential for the
    /// Gaussian), and one f32 product with the coefficients (packed once for the narrow
    /// product, [`linalg::NarrowF32`], like the compiled model's head); intercepts added
    /// in f64. What
    /// a batch server in single precision runs: the report measures its throughput and its
    /// agreement with the f64 path ([`Self::decision`]), which stays the reference.
    ///
    /// # Panics
    /// If `x` does not have [`Self::input_dim`] columns.
    ///
    /// ```
    /// # use kernelpress::model::{ExactModel, Task};
    /// # use ndarray::{array, Array2};
    /// let sv = array![[0.0, 0.0], [1.0, 1.0]];
    /// let m = ExactModel::new("gaussian(gamma=0.5)".parse().unwrap(), sv,
    ///     array![[1.0], [-1.0]], vec![0.1], Task::Binary, vec!["a".into(), "b".into()],
    ///     None).unwrap();
    /// let x = Array2::from_shape_fn((5, 2), |(i, j)| (i + j) as f64 * 0.3);
    /// let (d64, d32) = (m.decision(x.view()), m.decision_f32(x.view()));
    /// assert!((&d64 - &d32).iter().all(|v| v.abs() < 1e-5));
    /// ```
    #[track_caller]
    pub fn decision_f32(&self, x: ArrayView2<f64>) -> Array2<f64> {
        assert_eq!(
            x.ncols(),
            self.input_dim(),
            "decision: wrong number of features"
        );
        let xs = self.scale_inputs(x);
        let p32 = self.prepared32();
        let coef32 = self.coef32();
        let k = self.coef.ncols();
        linalg::map_row_chunks(xs.view(), k, |chunk| {
            let g = self.kernel.gram_block_f32(chunk, p32);
            let mut s = vec![0f32; chunk.nrows() * k];
            coef32.product(&g, &mut s);
            Array2::from_shape_fn((chunk.nrows(), k), |(i, j)| {
                s[i * k + j] as f64 + self.intercept[j]
            })
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

    /// The coefficients in f32, packed for the narrow product on first use.
    fn coef32(&self) -> &linalg::NarrowF32 {
        self.coef32.get_or_init(|| {
            let c: Vec<f32> = self.coef.iter().map(|&v| v as f32).collect();
            linalg::NarrowF32::from_k_by_n(&c, self.coef.nrows(), self.coef.ncols())
        })
    }

    /// Decision values for one row in f32, as a single-precision server runs it: the
    /// support vectors read in f32 (half the bytes of [`Self::decision_one`]; the f32 copy
    /// is made on first use), the kernel profile from f32 products, and the coefficient
    /// sums in f32 with the same narrow product as the compiled model's head
    /// ([`linalg::NarrowF32`]); intercepts added in f64. Decisions differ from the f64
    /// path by about the f32 rounding of the products and sums (the report measures the
    /// agreement).
    pub fn decision_one_f32(&self, x: &[f64]) -> Vec<f64> {
        let p32 = self.prepared32();
        let row = ndarray::ArrayView2::from_shape((1, x.len()), x).expect("one row");
        let xs = self.scale_inputs(row);
        let mut g = vec![0.0; p32.rows()];
        self.kernel
            .row_f32(xs.as_slice().expect("a fresh row"), p32, &mut g);
        let g32: Vec<f32> = g.iter().map(|&v| v as f32).collect();
        let mut s = vec![0f32; self.intercept.len()];
        self.coef32().product(&g32, &mut s);
        s.iter()
            .zip(&self.intercept)
            .map(|(v, b)| *v as f64 + b)
            .collect()
    }

    fn parts(&self) -> &super::parts::Parts {
        self.parts.get_or_init(|| {
            super::parts::Parts::new(&self.kernel, self.support_vectors.view(), self.coef.view())
        })
    }

    /// Decision values of the outputs marked in `needed` for one row, reading only the
    /// support vectors with a nonzero coefficient in one of them (on first use the support
    /// vectors are copied once, ordered by the outputs they feed). Unmarked outputs are
    /// `NaN`. Marked outputs equal [`Self::decision_one`]'s up to the order of the sums.
    ///
    /// # Panics
    /// If `needed` does not have [`Self::n_outputs`] entries or `x` the model's width.
    ///
    /// ```
    /// use kernelpress::model::{ExactModel, Task};
    /// use ndarray::array;
    /// // Two outputs: the first fed by support vector 0, the second by support vector 1.
    /// let m = ExactModel::new("gaussian(gamma=1)".parse().unwrap(),
    ///     array![[0.0, 0.0], [1.0, 0.0]], array![[2.0, 0.0], [0.0, -1.0]], vec![0.5, 0.0],
    ///     Task::Regression, vec![], None).unwrap();
    /// let some = m.decision_some_one(&[0.0, 0.0], &[true, false]);
    /// assert_eq!(some[0], 2.5);
    /// assert!(some[1].is_nan());
    /// assert_eq!(m.support_share(&[true, false]), 0.5);
    /// ```
    #[track_caller]
    pub fn decision_some_one(&self, x: &[f64], needed: &[bool]) -> Vec<f64> {
        assert_eq!(needed.len(), self.n_outputs(), "decision_some_one: outputs");
        let row = ndarray::ArrayView2::from_shape((1, x.len()), x).expect("one row");
        assert_eq!(x.len(), self.input_dim(), "decision_some_one: wrong width");
        let xs = self.scale_inputs(row);
        let mut out: Vec<f64> = self
            .intercept
            .iter()
            .zip(needed)
            .map(|(&b, &n)| if n { b } else { f64::NAN })
            .collect();
        self.parts().add_into(
            &self.kernel,
            xs.as_slice().expect("a fresh row"),
            needed,
            &mut out,
        );
        out
    }

    /// [`Self::decision_some_one`] as a single-precision server runs it: the kernel row
    /// from an f32 copy of the grouped support vectors (half the bytes; made on first
    /// use), f64 profiles and coefficient sums. Marked outputs agree with
    /// [`Self::decision_one_f32`] to f32 rounding.
    ///
    /// # Panics
    /// If `needed` does not have [`Self::n_outputs`] entries or `x` the model's width.
    #[track_caller]
    pub fn decision_some_one_f32(&self, x: &[f64], needed: &[bool]) -> Vec<f64> {
        assert_eq!(
            needed.len(),
            self.n_outputs(),
            "decision_some_one_f32: outputs"
        );
        assert_eq!(
            x.len(),
            self.input_dim(),
            "decision_some_one_f32: wrong width"
        );
        let row = ndarray::ArrayView2::from_shape((1, x.len()), x).expect("one row");
        let xs = self.scale_inputs(row);
        let mut out: Vec<f64> = self
            .intercept
            .iter()
            .zip(needed)
            .map(|(&b, &n)| if n { b } else { f64::NAN })
            .collect();
        self.parts().add_into_f32(
            &self.kernel,
            xs.as_slice().expect("a fresh row"),
            needed,
            &mut out,
        );
        out
    }

    /// Share of the support vectors [`Self::decision_some_one`] reads for `needed`.
    #[track_caller]
    pub fn support_share(&self, needed: &[bool]) -> f64 {
        assert_eq!(needed.len(), self.n_outputs(), "support_share: outputs");
        self.parts().share(needed)
    }

    /// Bytes one single-row prediction reads: the support vectors and the coefficients,
    /// in f64, or with `f32` both in f32 (the coefficients as the narrow product packs
    /// them, outputs padded to a multiple of 16).
    pub fn bytes_per_prediction(&self, f32: bool) -> usize {
        if f32 {
            let coef = linalg::NarrowF32::packed_len(self.coef.nrows(), self.coef.ncols());
            4 * (self.support_vectors.len() + coef)
        } else {
            8 * (self.support_vectors.len() + self.coef.len())
        }
    }

    /// Labels for decision values (empty strings for regression).
    pub fn labels_of(&self, s: ArrayView2<f64>) -> Vec<String> {
        self.rule.labels_of(s)
    }

    /// Flops per prediction (analytic): a kernel row (≈3 per support vector and input, the
    /// distance form) plus the coefficient product.
    pub fn flops(&self) -> usize {
        self.n_support_vectors() * (3 * self.input_dim() + 2 * self.n_outputs())
    }

    /// A fingerprint of the model: FNV-1a (64 bits) over its kernel, task, labels, input
    /// scaling, support vectors, coefficients and intercepts. Compiled models record the
    /// fingerprint of the exact model they came from.
    pub fn fingerprint(&self) -> String {
        let mut h: u64 = 0xcbf2_9ce4_8422_2325;
        let mut eat = |b: &[u8]| {
            for x in b {
                h ^= *x as u64;
                h = h.wrapping_mul(0x0100_0000_01b3);
            }
        };
        eat(self.kernel.to_string().as_bytes());
        eat(self.task().name().as_bytes());
        for l in self.labels() {
            eat(l.as_bytes());
            eat(&[0]);
        }
        let floats = |v: &mut dyn FnMut(&[u8]), xs: &mut dyn Iterator<Item = f64>| {
            for x in xs {
                v(&x.to_le_bytes());
            }
        };
        if let Some(s) = &self.scaling {
            floats(&mut eat, &mut s.mean.iter().copied());
            floats(&mut eat, &mut s.scale.iter().copied());
        }
        floats(&mut eat, &mut self.support_vectors.iter().copied());
        floats(&mut eat, &mut self.coef.iter().copied());
        floats(&mut eat, &mut self.intercept.iter().copied());
        format!("fnv1a64:{h:016x}")
    }

    /// Bytes of the model's parameters (f64), as stored.
    pub fn parameter_bytes(&self) -> usize {
        8 * (self.support_vectors.len()
            + self.coef.len()
            + self.intercept.len()
            + self.scaling.as_ref().map(|s| 2 * s.mean.len()).unwrap_or(0))
    }

    /// The model as a [`TensorFile`] (format version 2).
    pub fn to_file(&self) -> TensorFile {
        let mut f = TensorFile::default();
        let (n, d) = self.support_vectors.dim();
        let k = self.n_outputs();
        f.put_f64(
            "exact.support_vectors",
            vec![n, d],
            self.support_vectors.iter().copied().collect(),
        );
        f.put_f64(
            "exact.coefficients",
            vec![n, k],
            self.coef.iter().copied().collect(),
        );
        f.put_f64("exact.intercepts", vec![k], self.intercept.clone());
        let input = write_input(&mut f, d, &self.feature_names, self.scaling.as_ref());
        let probs = super::io::write_probabilities(&mut f, self.probabilities.as_ref());
        let m = json!({
            "format_version": FORMAT_VERSION,
            "kind": "exact",
            "generator": generator(),
            "input": input,
            "output": write_output(&self.rule),
            "kernel": self.kernel.to_string(),
            "training": self.training,
        });
        f.manifest = m.as_object().expect("object").clone();
        if let Some(p) = probs {
            f.manifest.insert("probabilities".into(), p);
        }
        f
    }

    /// Writes the model atomically to `path`.
    pub fn save(&self, path: &Path) -> Result<()> {
        self.to_file().write(path)
    }

    /// Reads an exact model from a parsed file (format version 1 or 2).
    pub fn from_file(f: &TensorFile, src: &str) -> Result<ExactModel> {
        let kind = f.get_str("kind", src)?;
        if kind != "exact" {
            return Err(Error::input(format!(
                "{src}: model kind is '{kind}'; expected an exact model"
            )));
        }
        if f.version() == 1 {
            return v1::exact(f, src);
        }
        let kernel: Kernel = f.get_str("kernel", src)?.parse().map_err(|e: Error| {
            Error::file(format!("{src}: manifest 'kernel': {}", e.message()))
        })?;
        let (d, names, scaling) = read_input(f, src)?;
        let rule = read_output(f, src)?;
        let k = rule.outputs();
        let (s, sv) = f.f64_shaped("exact.support_vectors", &[None, Some(d)], src)?;
        let n = s[0];
        let coef = f.f64("exact.coefficients", &[Some(n), Some(k)], src)?;
        let b = f.f64("exact.intercepts", &[Some(k)], src)?;
        let mut m = ExactModel::new(
            kernel,
            Array2::from_shape_vec((n, d), sv).expect("shape checked"),
            Array2::from_shape_vec((n, k), coef).expect("shape checked"),
            b,
            rule.task(),
            rule.labels().to_vec(),
            scaling,
        )
        .map_err(|e| Error::file(format!("{src}: {}", e.message())))?;
        m.feature_names = names;
        m.training = f.manifest.get("training").cloned().unwrap_or(json!({}));
        m.probabilities = super::io::read_probabilities(f, m.rule(), src)?;
        Ok(m)
    }

    /// Reads an exact model file.
    pub fn load(path: &Path) -> Result<ExactModel> {
        let f = TensorFile::read(path)?;
        Self::from_file(&f, &path.display().to_string())
    }
}
