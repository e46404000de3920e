//! Compiled models: input scaling → feature program → linear head → the teacher's label
//! rule, `f(x) = H·z(s(x)) + b` with `z` the [`Program`], `H` the head (`D × k`, applied as
//! `z·H`) and `s` the stored input scaling.

use super::io::{check_scaling, generator, read_input, read_output, write_input, write_output};
use super::{v1, OutputRule, Task};
use crate::data::Standardizer;
use crate::features::{FeatureMap, FeatureSpec};
use crate::format::{TensorFile, FORMAT_VERSION};
use crate::linalg;
use crate::program::{InputMap, Program};
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2, Axis};
use serde_json::{json, Value};
use std::path::Path;

/// A compiled model: feature program + linear head.
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
/// assert_eq!(m.program().len(), 3); // scale → dense → cos_sin
/// ```
#[derive(Debug, Clone)]
pub struct CompiledModel {
    spec: FeatureSpec,
    features: usize,
    program: Program,
    head: Array2<f64>,
    /// The head in f32 (converted once at construction), packed for the f32 products of
    /// single rows and batches.
    head_narrow: linalg::NarrowF32,
    /// The head packed for a low-precision product on the f32 paths, when the model's head
    /// precision is not f32 (`head.precision` in the manifest).
    head_low: Option<linalg::LowHead>,
    /// The reciprocals of the scaling's scales (the f32 paths multiply).
    inv_scale: Vec<f64>,
    intercept: Vec<f64>,
    rule: OutputRule,
    scaling: Option<Standardizer>,
    folded: bool,
    /// Fit settings (`fit` in the manifest).
    pub fit: Value,
    /// Report summary stored with the model (`report` in the manifest).
    pub report: Value,
    /// Feature names (the model's input columns).
    pub feature_names: Vec<String>,
    /// Fingerprint of the exact model this one was compiled from
    /// ([`crate::model::ExactModel::fingerprint`]), if any.
    pub exact_fingerprint: Option<String>,
    /// Platt sigmoids for class probabilities, with what they were fitted on, if any
    /// (`compile` fits them when the calibration rows carry labels).
    pub probabilities: Option<(super::Probabilities, String)>,
}

impl CompiledModel {
    /// Builds and validates a compiled model from a sampled map and a head fitted on its
    /// features. When the program ends in a dense projection `P` and folding the head into
    /// it stores fewer numbers (Nyström: `K(x, L)·(Pᵀ·H)`), the head is folded.
    pub fn new(
        map: FeatureMap,
        head: Array2<f64>,
        intercept: Vec<f64>,
        task: Task,
        labels: Vec<String>,
        scaling: Option<Standardizer>,
    ) -> Result<CompiledModel> {
        let features = map.output_dim();
        let mut program = map.program;
        let mut head = head;
        let mut folded = false;
        if head.nrows() == features {
            if let Some((inner, p)) = program.split_trailing_dense() {
                let (r, l) = p.dim();
                let k = head.ncols();
                if l * k < r * l + r * k {
                    let h = linalg::ab_seq(p.t(), head.view());
                    program = inner;
                    head = h;
                    folded = true;
                }
            }
        }
        Self::from_parts(
            map.spec, features, program, head, intercept, task, labels, scaling, folded,
        )
    }

    #[allow(clippy::too_many_arguments)]
    fn from_parts(
        spec: FeatureSpec,
        features: usize,
        program: Program,
        head: Array2<f64>,
        intercept: Vec<f64>,
        task: Task,
        labels: Vec<String>,
        scaling: Option<Standardizer>,
        folded: bool,
    ) -> Result<CompiledModel> {
        let dd = program.output_dim();
        let head = head.as_standard_layout().into_owned();
        if head.nrows() != dd {
            return Err(Error::input(format!(
                "head has {} rows but the feature program has {dd} outputs",
                head.nrows()
            )));
        }
        if head.iter().any(|v| !v.is_finite()) {
            return Err(Error::input("head has a non-finite weight"));
        }
        let k = head.ncols();
        if intercept.len() != k {
            return Err(Error::input(format!(
                "{} intercepts for {k} head columns",
                intercept.len()
            )));
        }
        if intercept.iter().any(|v| !v.is_finite()) {
            return Err(Error::input("an intercept is not finite"));
        }
        let rule = OutputRule::new(task, labels, k)?;
        let d = program.input_dim();
        if spec.input_dim != d {
            return Err(Error::input(format!(
                "feature spec has input_dim {} but the program reads {d} inputs",
                spec.input_dim
            )));
        }
        check_scaling(scaling.as_ref(), d)?;
        let head32: Vec<f32> = head.iter().map(|v| *v as f32).collect();
        let head_narrow = linalg::NarrowF32::from_k_by_n(&head32, head.nrows(), head.ncols());
        let inv_scale = scaling
            .as_ref()
            .map(|s| s.scale.iter().map(|v| 1.0 / v).collect())
            .unwrap_or_default();
        Ok(CompiledModel {
            spec,
            features,
            program,
            head,
            head_narrow,
            head_low: None,
            inv_scale,
            intercept,
            rule,
            scaling,
            folded,
            fit: json!({}),
            report: json!({}),
            feature_names: crate::data::placeholder_names(d),
            exact_fingerprint: None,
            probabilities: None,
        })
    }

    /// The feature spec the program was sampled from (kernel, method, seed, options).
    pub fn spec(&self) -> &FeatureSpec {
        &self.spec
    }
    /// The feature program the model runs.
    pub fn program(&self) -> &Program {
        &self.program
    }
    /// Number of features the head was fitted on (Nyström: the kept rank).
    pub fn features(&self) -> usize {
        self.features
    }
    /// True when the head was folded into a trailing projection of the program.
    pub fn is_folded(&self) -> bool {
        self.folded
    }
    /// Head weights (`program outputs × k`).
    pub fn head(&self) -> ArrayView2<'_, f64> {
        self.head.view()
    }
    /// The head in f32, packed as the f32 single-row and batch paths read it (converted
    /// once when the model was built).
    pub fn head_f32(&self) -> &linalg::NarrowF32 {
        &self.head_narrow
    }
    /// The precision of the head's products on the f32 paths ([`Self::decision_f32`],
    /// [`Self::decision_one_f32`]); the f64 paths always use the f64 head.
    pub fn head_precision(&self) -> linalg::HeadPrecision {
        self.head_low
            .as_ref()
            .map(|h| h.precision())
            .unwrap_or_default()
    }
    /// Sets the precision of the head's products on the f32 paths (stored in the model
    /// file; the f64 head stays as it is, so it can be set back). bfloat16 rounds weights
    /// and features to 8 significant bits and sums in f32; int8 quantizes the weights per
    /// output (as `export --precision int8` does) and each row's features per row, and
    /// sums in integers.
    ///
    /// ```
    /// # use kernelpress::features::{FeatureSpec, Method};
    /// # use kernelpress::model::{CompiledModel, Task};
    /// # use kernelpress::linalg::HeadPrecision;
    /// # use ndarray::{array, Array2};
    /// let spec = FeatureSpec::new("gaussian(gamma=1)".parse().unwrap(), Method::Fourier, 1, 64, 3);
    /// let (map, _) = spec.sample(None).unwrap();
    /// let head = Array2::from_shape_fn((64, 1), |(i, _)| (i as f64 * 0.3).sin());
    /// let mut m = CompiledModel::new(map, head, vec![0.0], Task::Regression, vec![], None).unwrap();
    /// let x = array![[0.5]];
    /// let f32_head = m.decision_f32(x.view())[[0, 0]];
    /// m.set_head_precision(HeadPrecision::Int8);
    /// assert!((m.decision_f32(x.view())[[0, 0]] - f32_head).abs() < 0.05);
    /// assert_eq!(m.decision(x.view())[[0, 0]], m.decision(x.view())[[0, 0]]);
    /// ```
    pub fn set_head_precision(&mut self, precision: linalg::HeadPrecision) {
        let w = self
            .head
            .as_slice()
            .expect("the head is kept in standard layout");
        self.head_low = linalg::LowHead::new(precision, w, self.head.nrows(), self.head.ncols());
    }
    /// The f32 paths' head product: `out = z · H` at the head's precision.
    fn head_product_f32(&self, z: &[f32], out: &mut [f32]) {
        match &self.head_low {
            Some(h) => h.product(z, out),
            None => self.head_narrow.product(z, out),
        }
    }
    /// Intercepts.
    pub fn intercept(&self) -> &[f64] {
        &self.intercept
    }
    /// Task.
    pub fn task(&self) -> Task {
        self.rule.task()
    }
    /// Class labels.
    pub fn labels(&self) -> &[String] {
        self.rule.labels()
    }
    /// The output rule.
    pub fn rule(&self) -> &OutputRule {
        &self.rule
    }
    /// Input scaling.
    pub fn scaling(&self) -> Option<&Standardizer> {
        self.scaling.as_ref()
    }
    /// Input dimension.
    pub fn input_dim(&self) -> usize {
        self.program.input_dim()
    }
    /// Decision values per row.
    pub fn n_outputs(&self) -> usize {
        self.head.ncols()
    }

    fn head_rows(&self, z: ArrayView2<f64>) -> Array2<f64> {
        let mut s = linalg::ab_seq(z, self.head.view());
        for mut row in s.rows_mut() {
            row.iter_mut()
                .zip(&self.intercept)
                .for_each(|(v, b)| *v += b);
        }
        s
    }

    /// Decision values for raw inputs: scaling, program and head fused per fixed row chunk,
    /// chunks in parallel (the whole feature matrix is never built).
    ///
    /// # Panics
    /// If `x` does not have [`Self::input_dim`] columns.
    #[track_caller]
    pub fn decision(&self, x: ArrayView2<f64>) -> Array2<f64> {
        assert_eq!(
            x.ncols(),
            self.input_dim(),
            "decision: wrong number of features"
        );
        linalg::map_row_chunks(x, self.n_outputs(), |c| {
            let xs = match &self.scaling {
                Some(s) => s.apply(c),
                None => c.to_owned(),
            };
            let z = self.program.apply_chunk(xs.view());
            self.head_rows(z.view())
        })
    }

    /// One raw row in the model's scaled input space.
    fn scaled_row(&self, x: &[f64]) -> Vec<f64> {
        match &self.scaling {
            Some(s) => x
                .iter()
                .enumerate()
                .map(|(j, v)| (v - s.mean[j]) / s.scale[j])
                .collect(),
            None => x.to_vec(),
        }
    }

    /// Decision values for one raw row, sequentially (single-row latency).
    pub fn decision_one(&self, x: &[f64]) -> Vec<f64> {
        let xs = self.scaled_row(x);
        let z = self.program.apply_one(&xs);
        let mut out = self.intercept.clone();
        let w = self
            .head
            .as_slice()
            .expect("the head is kept in standard layout");
        linalg::add_weighted_rows(&z, w, &mut out);
        out
    }

    /// Decision values for one raw row in f32: the program runs in f32 when every step has
    /// an f32 form ([`Program::runs_in_f32`]: the structured maps), otherwise in f64 with
    /// its features rounded to f32; the head product in f32 (half the head's bytes;
    /// [`linalg::NarrowF32`]). The f64 path stays the reference; the report
    /// measures this path's latency and its agreement with the exact model.
    pub fn decision_one_f32(&self, x: &[f64]) -> Vec<f64> {
        let mut scratch = vec![0f32; self.scratch_len()];
        let mut out = vec![0.0; self.intercept.len()];
        self.decision_one_f32_with(x, &mut scratch, &mut out);
        out
    }

    /// Scratch (f32 values) for [`Self::decision_one_f32_with`]: the f32 program's, then
    /// one value per output.
    pub fn scratch_len(&self) -> usize {
        self.program.f32_scratch_len() + self.n_outputs()
    }

    /// [`Self::decision_one_f32`] into `out` (one value per output) with the caller's
    /// scratch: allocates nothing when the program runs in f32 ([`Program::runs_in_f32`]),
    /// so a serving loop can keep one scratch per thread.
    ///
    /// # Panics
    /// If `x` does not have the model's width, `scratch` is shorter than
    /// [`Self::scratch_len`], or `out` does not have one value per output.
    ///
    /// ```
    /// # use kernelpress::features::{FeatureSpec, Method};
    /// # use kernelpress::fit::{compile_exact, HeadKind, RidgeGrid};
    /// # use kernelpress::model::{ExactModel, Task};
    /// # use ndarray::Array2;
    /// # let sv = Array2::from_shape_fn((30, 2), |(i, j)| ((i * 2 + j) as f64 * 0.7).sin());
    /// # let coef = Array2::from_shape_fn((30, 1), |(i, _)| if i % 2 == 0 { 1.0 } else { -1.0 });
    /// # let exact = ExactModel::new("gaussian(gamma=1)".parse().unwrap(), sv, coef, vec![0.0],
    /// #     Task::Binary, vec!["a".into(), "b".into()], None).unwrap();
    /// # let x = Array2::from_shape_fn((300, 2), |(i, j)| ((i * 2 + j) as f64 * 0.31).cos());
    /// let spec = FeatureSpec::new(exact.kernel().clone(), Method::Hadamard, 2, 64, 1);
    /// let (m, _) = compile_exact(&exact, Some(x.view()), &spec, HeadKind::Distill,
    ///     &RidgeGrid::standard(), None, &kernelpress::observe::Silent).unwrap();
    /// let mut scratch = vec![0f32; m.scratch_len()];
    /// let mut out = vec![0.0; 1];
    /// for row in x.rows() {
    ///     m.decision_one_f32_with(row.as_slice().unwrap(), &mut scratch, &mut out);
    ///     assert!((out[0] - m.decision_one(row.as_slice().unwrap())[0]).abs() < 1e-4);
    /// }
    /// ```
    #[track_caller]
    pub fn decision_one_f32_with(&self, x: &[f64], scratch: &mut [f32], out: &mut [f64]) {
        let d = self.program.input_dim();
        assert_eq!(x.len(), d, "decision: wrong number of features");
        assert_eq!(
            out.len(),
            self.intercept.len(),
            "decision: one value per output"
        );
        assert!(
            scratch.len() >= self.scratch_len(),
            "decision: scratch of {} values, needs {}",
            scratch.len(),
            self.scratch_len()
        );
        let (ps, s32) = scratch.split_at_mut(self.program.f32_scratch_len());
        let s32 = &mut s32[..self.intercept.len()];
        match self
            .program
            .apply_row_f32_at(crate::simd::level(), x, self.input_map(), ps)
        {
            Some(z) => self.head_product_f32(z, s32),
            None => {
                let z: Vec<f32> = self
                    .program
                    .apply_one(&self.scaled_row(x))
                    .iter()
                    .map(|v| *v as f32)
                    .collect();
                self.head_product_f32(&z, s32);
            }
        }
        for ((o, s), b) in out.iter_mut().zip(s32.iter()).zip(&self.intercept) {
            *o = *s as f64 + b;
        }
    }

    /// The standardisation as the f32 program's input map.
    fn input_map(&self) -> Option<InputMap<'_>> {
        self.scaling.as_ref().map(|s| InputMap {
            shift: &s.mean,
            factor: &self.inv_scale,
        })
    }

    /// Decision values for raw inputs, batched in f32: per fixed row chunk (chunks in
    /// parallel) each row's features come from the f32 program with one scratch for the
    /// chunk (the f64 program rounded to f32 for maps without an f32 form), then one f32
    /// product with the f32 head per block of rows ([`linalg::NarrowF32`]); intercepts in
    /// f64. Agrees with
    /// [`Self::decision_one_f32`] to the f32 rounding of the head's sums (a different
    /// summation order); the f64 [`Self::decision`] stays the reference.
    ///
    /// # Panics
    /// If `x` does not have [`Self::input_dim`] columns.
    #[track_caller]
    pub fn decision_f32(&self, x: ArrayView2<f64>) -> Array2<f64> {
        assert_eq!(
            x.ncols(),
            self.input_dim(),
            "decision: wrong number of features"
        );
        let (dz, k) = (self.program.output_dim(), self.n_outputs());
        // Rows per head product (128 × 4,096 f32 = 2 MB of features at D = 4,096). With
        // the narrow product (which reads the block in place, a 512-row slice of the
        // packed head at a time) 32, 64 and 128 rows ran alike on the Fashion-MNIST
        // model. Fixed, so results never depend on the thread count.
        const BLOCK: usize = 128;
        linalg::map_row_chunks(x, k, |c| {
            let m = c.nrows();
            let mut out = Array2::<f64>::zeros((m, k));
            let rows = BLOCK.min(m);
            let (mut z, mut s) = (vec![0f32; rows * dz], vec![0f32; rows * k]);
            let level = crate::simd::level();
            let mut scratch = vec![0f32; self.scratch_len()];
            let mut row = vec![0.0; c.ncols()];
            for (b, xb) in c.axis_chunks_iter(Axis(0), BLOCK).enumerate() {
                let mb = xb.nrows();
                let zb = &mut z[..mb * dz];
                if self.program.batches_in_f32() {
                    for (i, (r, zr)) in xb
                        .rows()
                        .into_iter()
                        .zip(zb.chunks_exact_mut(dz))
                        .enumerate()
                    {
                        if i + 1 < mb {
                            if let Some(next) = xb.row(i + 1).as_slice() {
                                prefetch(next);
                            }
                        }
                        let xr = match r.as_slice() {
                            Some(sl) => sl,
                            None => {
                                row.iter_mut().zip(r).for_each(|(o, v)| *o = *v);
                                &row
                            }
                        };
                        self.program.apply_row_f32_into_at(
                            level,
                            xr,
                            self.input_map(),
                            &mut scratch,
                            zr,
                        );
                    }
                } else {
                    let xs = match &self.scaling {
                        Some(sc) => sc.apply(xb),
                        None => xb.to_owned(),
                    };
                    let zz = self.program.apply_chunk(xs.view());
                    zb.iter_mut()
                        .zip(zz.iter())
                        .for_each(|(o, v)| *o = *v as f32);
                }
                let sb = &mut s[..mb * k];
                self.head_product_f32(zb, sb);
                for (i, srow) in sb.chunks_exact(k).enumerate() {
                    for (j, v) in srow.iter().enumerate() {
                        out[[b * BLOCK + i, j]] = *v as f64 + self.intercept[j];
                    }
                }
            }
            out
        })
    }

    /// Labels of decision values (empty strings for regression).
    pub fn labels_of(&self, s: ArrayView2<f64>) -> Vec<String> {
        self.rule.labels_of(s)
    }

    /// Bytes of parameters in memory (program + head + intercepts + scaling; f64 for real
    /// values, int8 signs, int32 indices).
    pub fn parameter_bytes(&self) -> usize {
        self.program.param_bytes() as usize
            + 8 * (self.head.len()
                + self.intercept.len()
                + self.scaling.as_ref().map(|s| 2 * s.mean.len()).unwrap_or(0))
    }

    /// Flops per prediction (analytic): scaling, program, head.
    pub fn flops(&self) -> usize {
        let d = self.input_dim();
        self.scaling.as_ref().map(|_| 2 * d).unwrap_or(0)
            + self.program.cost().flops as usize
            + 2 * self.head.len()
    }

    /// The model as a [`TensorFile`] (format version 2).
    pub fn to_file(&self) -> TensorFile {
        let mut f = TensorFile::default();
        let d = self.input_dim();
        let input = write_input(&mut f, d, &self.feature_names, self.scaling.as_ref());
        let program = self.program.write(&mut f);
        f.put_f64(
            "head.weights",
            vec![self.head.nrows(), self.head.ncols()],
            self.head.iter().copied().collect(),
        );
        f.put_f64(
            "head.bias",
            vec![self.intercept.len()],
            self.intercept.clone(),
        );
        let mut source = self.spec.to_json();
        if let Some(o) = source.as_object_mut() {
            o.remove("input_dim");
            o.insert("features".into(), json!(self.features));
            o.insert("features_requested".into(), json!(self.spec.features));
            if let Some(fp) = &self.exact_fingerprint {
                o.insert("exact_fingerprint".into(), json!(fp));
            }
        }
        let m = json!({
            "format_version": FORMAT_VERSION,
            "kind": "compiled",
            "generator": generator(),
            "input": input,
            "output": write_output(&self.rule),
            "source": source,
            "program": program,
            "head": if self.head_low.is_some() {
                json!({"folded": self.folded, "precision": self.head_precision().name()})
            } else {
                json!({"folded": self.folded})
            },
            "fit": self.fit,
            "report": self.report,
        });
        f.manifest = m.as_object().expect("object").clone();
        if let Some(p) = super::io::write_probabilities(&mut f, self.probabilities.as_ref()) {
            f.manifest.insert("probabilities".into(), p);
        }
        f
    }

    /// Writes the model atomically.
    pub fn save(&self, path: &Path) -> Result<()> {
        self.to_file().write(path)
    }

    /// Reads a compiled model from a parsed file (format version 1 or 2). Nothing is
    /// recomputed: every tensor the program needs is in the file.
    pub fn from_file(f: &TensorFile, src: &str) -> Result<CompiledModel> {
        let kind = f.get_str("kind", src)?;
        if kind != "compiled" {
            return Err(Error::input(format!(
                "{src}: model kind is '{kind}'; expected a compiled model"
            )));
        }
        let v = if f.version() == 1 {
            v1::compiled(f, src)?
        } else {
            let (d, names, scaling) = read_input(f, src)?;
            let rule = read_output(f, src)?;
            let bad = |m: String| Error::file(format!("{src}: manifest '{m}"));
            let pj = f
                .manifest
                .get("program")
                .ok_or_else(|| bad("program' is missing".into()))?;
            let program = Program::read(pj, f, d, src)?;
            let mut source = f
                .manifest
                .get("source")
                .and_then(|s| s.as_object())
                .cloned()
                .ok_or_else(|| bad("source' is missing or not an object".into()))?;
            let features = source
                .get("features")
                .and_then(|v| v.as_u64())
                .and_then(|v| usize::try_from(v).ok())
                .filter(|v| (1..=1 << 24).contains(v))
                .ok_or_else(|| bad("source.features' must be a positive whole number".into()))?;
            source.insert("input_dim".into(), json!(d));
            if let Some(r) = source.remove("features_requested") {
                source.insert("features".into(), r);
            }
            let fingerprint = source
                .remove("exact_fingerprint")
                .and_then(|v| v.as_str().map(String::from));
            let spec = FeatureSpec::from_json(&Value::Object(source))
                .map_err(|e| bad(format!("source': {}", e.message())))?;
            let folded = f
                .manifest
                .get("head")
                .and_then(|h| h.get("folded"))
                .and_then(|v| v.as_bool())
                .ok_or_else(|| bad("head.folded' must be true or false".into()))?;
            let k = rule.outputs();
            let rows = program.output_dim();
            if !folded && rows != features {
                return Err(bad(format!(
                    "source.features' is {features} but the program has {rows} outputs"
                )));
            }
            let head = f.f64("head.weights", &[Some(rows), Some(k)], src)?;
            let bias = f.f64("head.bias", &[Some(k)], src)?;
            v1::Parts {
                spec,
                features,
                program,
                head: Array2::from_shape_vec((rows, k), head).expect("shape checked"),
                intercept: bias,
                rule,
                scaling,
                folded,
                names,
                fingerprint,
            }
        };
        let mut m = Self::from_parts(
            v.spec,
            v.features,
            v.program,
            v.head,
            v.intercept,
            v.rule.task(),
            v.rule.labels().to_vec(),
            v.scaling,
            v.folded,
        )
        .map_err(|e| Error::file(format!("{src}: {}", e.message())))?;
        m.feature_names = v.names;
        m.exact_fingerprint = v.fingerprint;
        m.fit = f.manifest.get("fit").cloned().unwrap_or(json!({}));
        m.report = f.manifest.get("report").cloned().unwrap_or(json!({}));
        m.probabilities = super::io::read_probabilities(f, m.rule(), src)?;
        if let Some(p) = f.manifest.get("head").and_then(|h| h.get("precision")) {
            let p: linalg::HeadPrecision = p
                .as_str()
                .ok_or_else(|| {
                    Error::file(format!("{src}: manifest 'head.precision' must be a string"))
                })?
                .parse()
                .map_err(|e: Error| {
                    Error::file(format!("{src}: manifest 'head.precision': {}", e.message()))
                })?;
            m.set_head_precision(p);
        }
        Ok(m)
    }

    /// Reads a compiled model file.
    pub fn load(path: &Path) -> Result<CompiledModel> {
        let f = TensorFile::read(path)?;
        Self::from_file(&f, &path.display().to_string())
    }
}

/// Asks the CPU to start loading a slice into its caches (a row read next while this one
/// is being transformed).
#[inline(always)]
fn prefetch(v: &[f64]) {
    #[cfg(target_arch = "x86_64")]
    for c in v.chunks(8) {
        // SAFETY: prefetching is a hint; the address is inside a live slice.
        unsafe {
            std::arch::x86_64::_mm_prefetch(c.as_ptr() as *const i8, std::arch::x86_64::_MM_HINT_T0)
        };
    }
}
