//! The Python binding of kernelpress: a thin layer over the library (`kernelpress`), as the
//! command-line tool is. NumPy arrays come in without a copy when they are C-contiguous,
//! aligned float64; other layouts and dtypes are copied once. Long calls release the
//! interpreter lock. Errors are raised as `kernelpress.Error` with the library's message,
//! its `kind` and the `exit_code` the command-line tool would use.

use kernelpress::data::{self, Table};
use kernelpress::export::{ExportOptions, Format, Precision};
use kernelpress::features::{parse_landmarks, FeatureSpec, Method};
use kernelpress::fit::shard::ShardStats;
use kernelpress::fit::{
    audit_rows, compile_exact_tuned, refine_sharded, AuditTally, HeadRank, RefineGradient,
    RefineOptions, RefineRows, RefineSource, RefineState, RidgeGrid,
};
use kernelpress::kernel::Kernel;
use kernelpress::model::{CompiledModel, ExactModel, GuardedModel, Task};
use kernelpress::observe::Silent;
use kernelpress::report::{self as kreport, ReportOptions};
use ndarray::{Array2, ArrayView2};
use numpy::{IntoPyArray, PyArray1, PyArray2, PyArrayMethods, PyReadonlyArray1, PyReadonlyArray2};
use pyo3::exceptions::{PyException, PyTypeError, PyUserWarning};
use pyo3::prelude::*;
use pyo3::types::{PyBytes, PyList};
use std::path::PathBuf;
use std::sync::Arc;

pyo3::create_exception!(
    kernelpress,
    Error,
    PyException,
    "A kernelpress error: `str(e)` is the message (it names the array or file, the row, the field and what was expected); `e.kind` is the library's error kind ('input', 'file', 'numerical', 'io', 'internal', 'gate', 'budget', 'keep_exact'); `e.exit_code` is the command-line tool's exit code for it."
);

fn kind_name(k: kernelpress::ErrorKind) -> &'static str {
    use kernelpress::ErrorKind as K;
    match k {
        K::Input => "input",
        K::File => "file",
        K::Numerical => "numerical",
        K::Io => "io",
        K::Gate => "gate",
        K::Budget => "budget",
        K::KeepExact => "keep_exact",
        _ => "internal",
    }
}

/// The library's error as a Python `kernelpress.Error` carrying `kind` and `exit_code`.
fn err(e: kernelpress::Error) -> PyErr {
    Python::attach(|py| {
        let pe = Error::new_err(e.message().to_string());
        let v = pe.value(py);
        let _ = v.setattr("kind", kind_name(e.kind()));
        let _ = v.setattr("exit_code", e.exit_code());
        pe
    })
}

type Res<T> = PyResult<T>;

fn lib<T>(r: kernelpress::Result<T>) -> Res<T> {
    r.map_err(err)
}

/// Rows of a batch: a zero-copy view of a C-contiguous aligned float64 array, or a copy.
struct Rows<'py> {
    arr: PyReadonlyArray2<'py, f64>,
}

impl Rows<'_> {
    fn view(&self) -> ArrayView2<'_, f64> {
        self.arr.as_array()
    }
}

/// Reads `x` (any array-like) as an `n × d` float64 batch; `what` names it in messages
/// (as a file name does for the command-line tool). A 1-D array is one column, as for
/// `.npy` files.
fn rows<'py>(py: Python<'py>, x: &Bound<'py, PyAny>, what: &str) -> Res<Rows<'py>> {
    let np = py.import("numpy")?;
    let ndarray_t = np.getattr("ndarray")?;
    let mut a = if x.is_instance(&ndarray_t)? {
        x.clone()
    } else {
        np.call_method1("asarray", (x,))?
    };
    let shape: Vec<usize> = a.getattr("shape")?.extract()?;
    if shape.is_empty() || shape.len() > 2 {
        return Err(err(kernelpress::Error::input(data::shape_message(
            what, &shape,
        ))));
    }
    let dtype = a.getattr("dtype")?;
    let kind: String = dtype.getattr("kind")?.extract()?;
    if !matches!(kind.as_str(), "f" | "i" | "u") {
        let descr: String = dtype.getattr("str")?.extract()?;
        return Err(err(kernelpress::Error::input(data::dtype_message(
            what, &descr,
        ))));
    }
    if shape.len() == 1 {
        a = a.call_method1("reshape", (-1i64, 1i64))?;
    }
    let flags = a.getattr("flags")?;
    let direct = dtype.getattr("str")?.extract::<String>()? == "<f8"
        && flags.getattr("c_contiguous")?.extract::<bool>()?
        && flags.getattr("aligned")?.extract::<bool>()?;
    if !direct {
        // A fresh, aligned, C-ordered float64 copy (unaligned buffers arrive from pickle
        // protocol 5, e.g. when Dask ships arrays between processes).
        let kw = pyo3::types::PyDict::new(py);
        kw.set_item("dtype", np.getattr("float64")?)?;
        kw.set_item("order", "C")?;
        kw.set_item("copy", true)?;
        a = np.call_method("array", (a,), Some(&kw))?;
    }
    let arr = a.cast_into::<PyArray2<f64>>()?.readonly();
    Ok(Rows { arr })
}

/// Rows checked for a model of input width `d` (finite, the right width).
fn model_rows<'py>(py: Python<'py>, x: &Bound<'py, PyAny>, what: &str, d: usize) -> Res<Rows<'py>> {
    let r = rows(py, x, what)?;
    lib(data::check_batch(r.view(), d, what))?;
    Ok(r)
}

/// A data source given as a path (str or os.PathLike) rather than an array.
fn as_path(x: &Bound<'_, PyAny>) -> Option<PathBuf> {
    x.extract::<PathBuf>().ok()
}

/// `x` as an owned batch for a model with these feature names: read from a file (columns
/// matched by name, as the command-line tool does) or taken from an array.
fn model_batch(
    py: Python<'_>,
    x: &Bound<'_, PyAny>,
    what: &str,
    names: &[String],
    target: Option<&str>,
) -> Res<(Array2<f64>, Option<Vec<String>>)> {
    if let Some(p) = as_path(x) {
        let m = py.detach(|| data::read_for_model(&p, target, names, false));
        let t = lib(m)?.table;
        return Ok((t.x, t.target));
    }
    let r = model_rows(py, x, what, names.len())?;
    Ok((r.view().to_owned(), None))
}

fn to_py<'py>(py: Python<'py>, a: Array2<f64>) -> Bound<'py, PyArray2<f64>> {
    a.into_pyarray(py)
}

fn json_to_py<'py>(py: Python<'py>, v: &serde_json::Value) -> Res<Bound<'py, PyAny>> {
    py.import("json")?.call_method1("loads", (v.to_string(),))
}

fn warn(py: Python<'_>, msg: &str) -> Res<()> {
    let cat = py.get_type::<PyUserWarning>();
    PyErr::warn(
        py,
        &cat,
        &std::ffi::CString::new(msg).unwrap_or_default(),
        1,
    )
}

/// The map spec for a model's kernel and input width.
fn spec_for(
    exact: &ExactModel,
    method: &str,
    features: usize,
    seed: u64,
    landmark_rule: &str,
) -> Res<FeatureSpec> {
    spec_of(
        exact.kernel().clone(),
        exact.input_dim(),
        method,
        features,
        seed,
        landmark_rule,
    )
}

fn spec_of(
    kernel: Kernel,
    d: usize,
    method: &str,
    features: usize,
    seed: u64,
    landmark_rule: &str,
) -> Res<FeatureSpec> {
    let mut spec = FeatureSpec::new(kernel, lib(Method::parse(method))?, d, features, seed);
    spec.options.landmarks = lib(parse_landmarks(landmark_rule))?;
    lib(spec.validate())?;
    Ok(spec)
}

fn labels_or_values(
    py: Python<'_>,
    task: Task,
    rule_labels: Vec<String>,
    s: Array2<f64>,
) -> Res<Py<PyAny>> {
    if task.is_classifier() {
        Ok(PyList::new(py, rule_labels)?.into_any().unbind())
    } else {
        Ok(to_py(py, s).call_method1("ravel", ())?.unbind())
    }
}

/// The methods every model class has: files, bytes, pickling, decisions and labels.
macro_rules! model_class {
    ($py:ident, $model:ident, { $($extra:tt)* }) => {
        #[pymethods]
        impl $py {
            /// Reads a model file of this kind.
            #[staticmethod]
            fn load(py: Python<'_>, path: PathBuf) -> Res<Self> {
                let m = py.detach(|| $model::load(&path));
                Ok($py { inner: Arc::new(lib(m)?) })
            }

            /// A model from the bytes of a model file (as `to_bytes` gives).
            #[staticmethod]
            fn from_bytes(py: Python<'_>, data: &[u8]) -> Res<Self> {
                let m = py.detach(|| {
                    let f = kernelpress::format::TensorFile::from_bytes(data, "bytes")?;
                    $model::from_file(&f, "bytes")
                });
                Ok($py { inner: Arc::new(lib(m)?) })
            }

            /// The model file's bytes (safetensors).
            fn to_bytes<'py>(&self, py: Python<'py>) -> Res<Bound<'py, PyBytes>> {
                let b = lib(self.inner.to_file().to_bytes())?;
                Ok(PyBytes::new(py, &b))
            }

            /// Writes the model file atomically.
            fn save(&self, py: Python<'_>, path: PathBuf) -> Res<()> {
                lib(py.detach(|| self.inner.save(&path)))
            }

            /// Decision values, rows × decision functions (float64).
            fn decision<'py>(
                &self,
                py: Python<'py>,
                x: &Bound<'py, PyAny>,
            ) -> Res<Bound<'py, PyArray2<f64>>> {
                let r = model_rows(py, x, "x", self.inner.input_dim())?;
                let v = r.view();
                let s = py.detach(|| self.inner.decision(v));
                Ok(to_py(py, s))
            }

            /// Class labels (a list of str) for classifiers; values (1-D array) for
            /// regression.
            fn predict(&self, py: Python<'_>, x: &Bound<'_, PyAny>) -> Res<Py<PyAny>> {
                let r = model_rows(py, x, "x", self.inner.input_dim())?;
                let v = r.view();
                let s = py.detach(|| self.inner.decision(v));
                let l = self.inner.labels_of(s.view());
                labels_or_values(py, self.inner.task(), l, s)
            }

            /// `regression`, `binary`, `ovr` or `ovo`.
            #[getter]
            fn task(&self) -> &'static str {
                self.inner.task().name()
            }

            /// Class labels (empty for regression).
            #[getter]
            fn labels(&self) -> Vec<String> {
                self.inner.labels().to_vec()
            }

            /// Input width `d`.
            #[getter]
            fn input_dim(&self) -> usize {
                self.inner.input_dim()
            }

            fn __reduce__<'py>(
                &self,
                py: Python<'py>,
            ) -> Res<(Bound<'py, PyAny>, (Bound<'py, PyBytes>,))> {
                let f = py.get_type::<$py>().getattr("from_bytes")?;
                Ok((f, (self.to_bytes(py)?,)))
            }

            $($extra)*
        }
    };
}

/// An exact kernel model: support vectors, coefficients, intercepts, a kernel and an
/// output rule. Every prediction compares the input with every support vector.
///
/// >>> import kernelpress as kp
/// >>> exact = kp.ExactModel.load("models/pump_svm.safetensors")
/// >>> exact.decision(x).shape      # (rows, decision functions)
/// >>> exact.predict(x)[:3]         # class labels
#[pyclass(name = "ExactModel", module = "kernelpress", frozen)]
struct PyExact {
    inner: Arc<ExactModel>,
}

model_class!(PyExact, ExactModel, {
    /// An exact model from its kernel expansion: `support_vectors` (n × d), `weights`
    /// (n × k, one column per decision function), `bias` (k values), a kernel expression
    /// such as `"gaussian(gamma=0.5)"`, class `labels` (none for regression) and the
    /// `task` (`regression`, `binary`, `ovr`, `ovo`; inferred from the labels and columns
    /// when omitted). Decision values follow the library's conventions: a binary model's
    /// value is positive for the second label.
    #[staticmethod]
    #[pyo3(signature = (support_vectors, weights, bias, kernel, labels=None, task=None))]
    fn from_expansion(
        py: Python<'_>,
        support_vectors: &Bound<'_, PyAny>,
        weights: &Bound<'_, PyAny>,
        bias: Vec<f64>,
        kernel: &str,
        labels: Option<Vec<String>>,
        task: Option<&str>,
    ) -> Res<Self> {
        let k: Kernel = lib(kernel.parse())?;
        let sv = rows(py, support_vectors, "support_vectors")?;
        let svv = sv.view();
        lib(data::check_batch(svv, svv.ncols(), "support_vectors"))?;
        let c = rows(py, weights, "weights")?;
        let cv = c.view();
        lib(data::check_batch(cv, cv.ncols(), "weights"))?;
        if cv.nrows() != svv.nrows() {
            let hint = if cv.ncols() == svv.nrows() {
                " — it looks transposed (one column per support vector); pass its transpose"
            } else {
                ""
            };
            return Err(err(kernelpress::Error::input(format!(
                "weights: has {} rows but support_vectors has {} support vectors; expected one row per support vector{hint}",
                cv.nrows(),
                svv.nrows()
            ))));
        }
        let labels = labels.unwrap_or_default();
        let task = match task {
            Some(t) => lib(Task::parse(t))?,
            None => lib(Task::infer(labels.len(), cv.ncols()))?,
        };
        let mut m = lib(ExactModel::new(
            k,
            svv.to_owned(),
            cv.to_owned(),
            bias,
            task,
            labels,
            None,
        ))?;
        m.training = serde_json::json!({"model": "imported", "from": "arrays (Python)"});
        Ok(PyExact { inner: Arc::new(m) })
    }

    /// The kernel expression.
    #[getter]
    fn kernel(&self) -> String {
        self.inner.kernel().to_string()
    }
    /// Number of decision functions.
    #[getter]
    fn outputs(&self) -> usize {
        self.inner.n_outputs()
    }
    /// Number of support vectors.
    #[getter]
    fn n_support_vectors(&self) -> usize {
        self.inner.n_support_vectors()
    }
    /// Feature (column) names the model matches data by.
    #[getter]
    fn feature_names(&self) -> Vec<String> {
        self.inner.feature_names.clone()
    }
    /// FNV-1a fingerprint of the model (compiled models record their teacher's).
    #[getter]
    fn fingerprint(&self) -> String {
        self.inner.fingerprint()
    }

    fn __repr__(&self) -> String {
        format!(
            "ExactModel(kernel='{}', task='{}', support_vectors={}, input_dim={})",
            self.inner.kernel(),
            self.inner.task().name(),
            self.inner.n_support_vectors(),
            self.inner.input_dim()
        )
    }
});

/// A compiled model: input scaling → feature program → linear head → the teacher's label
/// rule. Its cost does not depend on the number of support vectors.
///
/// >>> compiled = kp.compact(exact, "models/pump_calib.csv", method="nystrom", features=1024)
/// >>> compiled.report["agreement"]     # on the calibration audit rows
/// >>> compiled.predict(x)
#[pyclass(name = "CompiledModel", module = "kernelpress", frozen)]
struct PyCompiled {
    inner: Arc<CompiledModel>,
}

model_class!(PyCompiled, CompiledModel, {
    /// The feature program's output on `x` (after the model's input scaling), rows × D.
    fn featurize<'py>(
        &self,
        py: Python<'py>,
        x: &Bound<'py, PyAny>,
    ) -> Res<Bound<'py, PyArray2<f64>>> {
        let r = model_rows(py, x, "x", self.inner.input_dim())?;
        let v = r.view();
        let z = py.detach(|| {
            let xs = match self.inner.scaling() {
                Some(s) => s.apply(v),
                None => v.to_owned(),
            };
            self.inner.program().apply(xs.view())
        });
        Ok(to_py(py, z))
    }

    /// The method name (`fourier`, `hadamard`, `nystrom`, …).
    #[getter]
    fn method(&self) -> &'static str {
        self.inner.spec().method.name()
    }
    /// Feature count `D`.
    #[getter]
    fn features(&self) -> usize {
        self.inner.features()
    }
    /// The seed the map was drawn with.
    #[getter]
    fn seed(&self) -> u64 {
        self.inner.spec().seed
    }
    /// The kernel expression.
    #[getter]
    fn kernel(&self) -> String {
        self.inner.spec().kernel.to_string()
    }
    /// Bytes of parameters.
    #[getter]
    fn parameter_bytes(&self) -> usize {
        self.inner.parameter_bytes()
    }
    /// The stored report (a dict with the report keys, timings left out), or None.
    #[getter]
    fn report<'py>(&self, py: Python<'py>) -> Res<Option<Bound<'py, PyAny>>> {
        if self.inner.report.is_null() {
            return Ok(None);
        }
        json_to_py(py, &self.inner.report).map(Some)
    }
    /// How the head was fitted (ridge strength, rows, bandwidth search …), a dict.
    #[getter]
    fn fit<'py>(&self, py: Python<'py>) -> Res<Bound<'py, PyAny>> {
        json_to_py(py, &self.inner.fit)
    }

    fn __repr__(&self) -> String {
        format!(
            "CompiledModel(method='{}', features={}, kernel='{}', task='{}')",
            self.inner.spec().method.name(),
            self.inner.features(),
            self.inner.spec().kernel,
            self.inner.task().name()
        )
    }
});

/// A guarded model: the compiled model answers where it is confident, the exact model
/// where it is not (docs/guarding.md). Built by :func:`guard`, or read from a file that
/// `kernelpress compile --guard-agreement` wrote. Scores like `kernelpress score`: the same
/// labels, decisions and stage column.
///
/// >>> g = kp.guard(compiled, exact, "models/pump_calib.csv", agreement=0.995)
/// >>> s, stage = g.decision_with_stage(x)    # stage: "compiled", "exact" or "partial"
#[pyclass(name = "GuardedModel", module = "kernelpress", frozen)]
struct PyGuarded {
    inner: Arc<GuardedModel>,
}

#[pymethods]
impl PyGuarded {
    /// Reads a guarded model file.
    #[staticmethod]
    fn load(py: Python<'_>, path: PathBuf) -> Res<Self> {
        let m = py.detach(|| GuardedModel::load(&path));
        Ok(PyGuarded {
            inner: Arc::new(lib(m)?),
        })
    }

    /// A guarded model from the bytes of its file (as `to_bytes` gives).
    #[staticmethod]
    fn from_bytes(py: Python<'_>, data: &[u8]) -> Res<Self> {
        let m = py.detach(|| {
            let f = kernelpress::format::TensorFile::from_bytes(data, "bytes")?;
            GuardedModel::from_file(&f, "bytes")
        });
        Ok(PyGuarded {
            inner: Arc::new(lib(m)?),
        })
    }

    /// The model file's bytes (safetensors).
    fn to_bytes<'py>(&self, py: Python<'py>) -> Res<Bound<'py, PyBytes>> {
        let b = lib(self.inner.to_file().to_bytes())?;
        Ok(PyBytes::new(py, &b))
    }

    /// Writes the model file atomically (`kernelpress score`, `inspect` and `export` read it).
    fn save(&self, py: Python<'_>, path: PathBuf) -> Res<()> {
        lib(py.detach(|| self.inner.save(&path)))
    }

    /// Decision values, rows × decision functions (float64).
    fn decision<'py>(
        &self,
        py: Python<'py>,
        x: &Bound<'py, PyAny>,
    ) -> Res<Bound<'py, PyArray2<f64>>> {
        let r = model_rows(py, x, "x", self.inner.compact().input_dim())?;
        let v = r.view();
        let (s, _) = py.detach(|| self.inner.decision(v));
        Ok(to_py(py, s))
    }

    /// Decision values and, per row, the stage that answered (`compiled`, `exact` or
    /// `partial`, as `score`'s stage column). With `f32=True`, both stages compute in f32
    /// and the threshold is compared with f32 decisions, as the exports do.
    #[pyo3(signature = (x, *, f32=false))]
    fn decision_with_stage<'py>(
        &self,
        py: Python<'py>,
        x: &Bound<'py, PyAny>,
        f32: bool,
    ) -> Res<(Bound<'py, PyArray2<f64>>, Vec<&'static str>)> {
        let r = model_rows(py, x, "x", self.inner.compact().input_dim())?;
        let v = r.view();
        let (s, st) = py.detach(|| {
            if f32 {
                self.inner.decision_f32(v)
            } else {
                self.inner.decision(v)
            }
        });
        let names = st
            .iter()
            .map(|&i| kernelpress::model::guarded::STAGES[i as usize])
            .collect();
        Ok((to_py(py, s), names))
    }

    /// Class labels (a list of str).
    fn predict(&self, py: Python<'_>, x: &Bound<'_, PyAny>) -> Res<Py<PyAny>> {
        let r = model_rows(py, x, "x", self.inner.compact().input_dim())?;
        let v = r.view();
        let (s, _) = py.detach(|| self.inner.decision(v));
        let l = self.inner.labels_of(s.view());
        labels_or_values(py, self.inner.exact().task(), l, s)
    }

    /// `binary`, `ovr` or `ovo`.
    #[getter]
    fn task(&self) -> &'static str {
        self.inner.exact().task().name()
    }
    /// Class labels.
    #[getter]
    fn labels(&self) -> Vec<String> {
        self.inner.exact().labels().to_vec()
    }
    /// Input width `d`.
    #[getter]
    fn input_dim(&self) -> usize {
        self.inner.compact().input_dim()
    }
    /// The confidence threshold below which the exact model answers.
    #[getter]
    fn threshold(&self) -> f64 {
        self.inner.threshold()
    }
    /// The guard's rule, as the model file names it.
    #[getter]
    fn rule(&self) -> &'static str {
        self.inner.guard_rule().describe()
    }
    /// The compiled stage (a :class:`CompiledModel`).
    #[getter]
    fn compact(&self) -> PyCompiled {
        PyCompiled {
            inner: Arc::new(self.inner.compact().clone()),
        }
    }
    /// The exact fallback (an :class:`ExactModel`).
    #[getter]
    fn exact(&self) -> PyExact {
        PyExact {
            inner: Arc::new(self.inner.exact().clone()),
        }
    }
    /// The stored report of the guarded model (a dict: the keys of `kernelpress report
    /// --json`, with `stage_shares` and `stage_agreement`; timings left out), or None.
    #[getter]
    fn report<'py>(&self, py: Python<'py>) -> Res<Option<Bound<'py, PyAny>>> {
        let r = &self.inner.compact().report;
        if r.is_null() || r.get("stage_shares").is_none() {
            return Ok(None);
        }
        json_to_py(py, r).map(Some)
    }
    /// How the threshold was chosen (the file's `guard` section), a dict.
    #[getter]
    fn guard<'py>(&self, py: Python<'py>) -> Res<Bound<'py, PyAny>> {
        json_to_py(py, &self.inner.guard)
    }

    fn __reduce__<'py>(&self, py: Python<'py>) -> Res<(Bound<'py, PyAny>, (Bound<'py, PyBytes>,))> {
        let f = py.get_type::<PyGuarded>().getattr("from_bytes")?;
        Ok((f, (self.to_bytes(py)?,)))
    }

    fn __repr__(&self) -> String {
        format!(
            "GuardedModel(method='{}', features={}, threshold={:.4}, rule='{}')",
            self.inner.compact().spec().method.name(),
            self.inner.compact().features(),
            self.inner.threshold(),
            self.inner.guard_rule().describe()
        )
    }
}

/// Guards `compiled` by `exact`: rows whose compiled answer is unsure go to the exact
/// model. The threshold is chosen on the audit rows of `calib` (every tenth row, never
/// fitted on: pass the calibration rows `compact` was given) for `agreement` (the one-sided
/// 95% lower bound on those rows reaches it) or for a fallback `rate`; `rule` is `row`,
/// `pairs` (one-vs-one) or None for the cheaper. The report (`model.report`) is computed
/// on `eval` when given, else on the audit rows (optimistic: they chose the threshold; a
/// `UserWarning` says so). As `kernelpress compile --guard-agreement P` does.
///
/// >>> g = kp.guard(compiled, exact, "models/pump_calib.csv", agreement=0.995, eval=test_x)
#[pyfunction]
#[pyo3(signature = (compiled, exact, calib, *, agreement=None, rate=None, rule=None, eval=None, eval_labels=None, min_agreement=0.99))]
#[allow(clippy::too_many_arguments)]
fn guard(
    py: Python<'_>,
    compiled: &PyCompiled,
    exact: &PyExact,
    calib: &Bound<'_, PyAny>,
    agreement: Option<f64>,
    rate: Option<f64>,
    rule: Option<&str>,
    eval: Option<&Bound<'_, PyAny>>,
    eval_labels: Option<Vec<String>>,
    min_agreement: f64,
) -> Res<PyGuarded> {
    use kernelpress::model::guarded::{GuardRule, GuardTarget};
    let target = match (agreement, rate) {
        (Some(p), None) => GuardTarget::Agreement(p),
        (None, Some(r)) => GuardTarget::Rate(r),
        _ => {
            return lib(Err(kernelpress::Error::input(
                "give agreement=P or rate=R (one of them)",
            )))
        }
    };
    let rule = match rule {
        None => None,
        Some("row") => Some(GuardRule::Row),
        Some("pairs") => Some(GuardRule::Pairs),
        Some(o) => {
            return lib(Err(kernelpress::Error::input(format!(
                "rule '{o}' is unknown; expected 'row', 'pairs' or None"
            ))))
        }
    };
    let e = exact.inner.clone();
    let (x, _) = model_batch(py, calib, "calib", &e.feature_names, None)?;
    let c = (*compiled.inner).clone();
    let mut g =
        lib(py.detach(|| kernelpress::fit::guard_on_audit_rows(c, &e, x.view(), target, rule)))?;
    let (xe, on) = match eval {
        Some(ev) => (
            model_batch(py, ev, "eval", &e.feature_names, None)?.0,
            "eval".to_string(),
        ),
        None => {
            warn(py, "no eval: the guard's figures are computed on the audit rows its threshold was chosen on (optimistic); pass eval= for an independent check")?;
            (
                audit_rows(x.view()).0,
                "calibration audit rows (also used to choose the guard)".to_string(),
            )
        }
    };
    let opts = ReportOptions {
        min_agreement,
        timing: false,
        ..ReportOptions::default()
    };
    let mut rep = lib(
        py.detach(|| kreport::build_guarded(&g, &e, xe.view(), eval_labels.as_deref(), &opts))
    )?;
    rep.evaluated_on = Some(on);
    for w in &rep.warnings {
        warn(py, w)?;
    }
    let mut stored = rep.without_timing();
    stored.warnings.clear();
    g.set_report(stored.to_json());
    Ok(PyGuarded { inner: Arc::new(g) })
}

/// Distillation statistics of some calibration rows (one shard, or several merged):
/// picklable, mergeable, and enough to fit the head (`compile_from_statistics`).
#[pyclass(name = "Statistics", module = "kernelpress", frozen)]
struct PyStats {
    inner: ShardStats,
}

#[pymethods]
impl PyStats {
    /// Statistics from bytes (as `to_bytes` gives: a safetensors file).
    #[staticmethod]
    fn from_bytes(py: Python<'_>, data: &[u8]) -> Res<Self> {
        let s = py.detach(|| ShardStats::from_bytes(data, "bytes"));
        Ok(PyStats { inner: lib(s)? })
    }
    /// The statistics as bytes (a safetensors file, as `compile --stats-out` writes).
    fn to_bytes<'py>(&self, py: Python<'py>) -> Res<Bound<'py, PyBytes>> {
        let b = lib(self.inner.to_bytes())?;
        Ok(PyBytes::new(py, &b))
    }
    /// Writes the statistics file atomically (readable by `compile --from-stats`).
    fn save(&self, py: Python<'_>, path: PathBuf) -> Res<()> {
        lib(py.detach(|| self.inner.save(&path)))
    }
    /// Reads a statistics file.
    #[staticmethod]
    fn load(py: Python<'_>, path: PathBuf) -> Res<Self> {
        let s = py.detach(|| ShardStats::load(&path));
        Ok(PyStats { inner: lib(s)? })
    }
    /// Calibration rows covered (audit rows included).
    #[getter]
    fn rows(&self) -> usize {
        self.inner.rows()
    }
    /// Global row ranges `[start, end)` covered.
    #[getter]
    fn ranges(&self) -> Vec<(usize, usize)> {
        self.inner.ranges().to_vec()
    }
    /// Rows that fit the head, rows that choose the ridge strength, audit rows left out.
    #[getter]
    fn parts(&self) -> (usize, usize, usize) {
        self.inner.parts()
    }
    fn __reduce__<'py>(&self, py: Python<'py>) -> Res<(Bound<'py, PyAny>, (Bound<'py, PyBytes>,))> {
        let f = py.get_type::<PyStats>().getattr("from_bytes")?;
        Ok((f, (self.to_bytes(py)?,)))
    }
    fn __repr__(&self) -> String {
        let (f, c, a) = self.inner.parts();
        format!(
            "Statistics(method='{}', features={}, rows={}, fit={f}, choose={c}, audit={a})",
            self.inner.spec().method.name(),
            self.inner.spec().features,
            self.inner.rows()
        )
    }
}

/// Builds the report of `compiled` against `exact` on `x` and stores it (timings left
/// out) in the model; warns when the agreement is below `min_agreement`.
fn attach_report(
    py: Python<'_>,
    exact: &ExactModel,
    model: &mut CompiledModel,
    x: ArrayView2<f64>,
    truth: Option<&[String]>,
    on: String,
    min_agreement: f64,
) -> Res<()> {
    let opts = ReportOptions {
        min_agreement,
        timing: false,
        ..ReportOptions::default()
    };
    let mut rep = lib(py.detach(|| kreport::build(model, exact, x, truth, None, &opts)))?;
    rep.evaluated_on = Some(on);
    for w in &rep.warnings {
        warn(py, w)?;
    }
    model.report = rep.without_timing().to_json();
    Ok(())
}

/// [`attach_report`] on the `eval` rows (array or path).
fn eval_report(
    py: Python<'_>,
    exact: &ExactModel,
    model: &mut CompiledModel,
    eval: &Bound<'_, PyAny>,
    labels: Option<&[String]>,
    min_agreement: f64,
) -> Res<()> {
    let (xe, _) = model_batch(py, eval, "eval", &exact.feature_names, None)?;
    attach_report(
        py,
        exact,
        model,
        xe.view(),
        labels,
        "eval".into(),
        min_agreement,
    )
}

/// Compiles `exact` into a feature map plus a linear head distilled from the exact model's
/// decision values on `calib` (an array of rows, or a CSV / .npy path whose columns are
/// matched to the model's by name). Every tenth calibration row is an audit row, never
/// fitted on; the report (`model.report`) is computed on `eval` when given (with
/// `eval_labels` for accuracy), else on the audit rows. A `UserWarning` is raised when the
/// label agreement is below `min_agreement`. As `kernelpress compile MODEL --calib FILE
/// --method M --features D` does, including the map bandwidth search unless
/// `bandwidth_search=False`. With `refine=N`, the map is then refined against the exact
/// model for up to N passes, as `compile --refine N` does (docs/refining.md). With
/// `head_rank` (a rank, or `"auto"`) the head is factored as `compile --head-rank` does;
/// with `head_precision` (`"f32"`, `"bf16"`, `"int8"` or `"auto"`) its f32 paths multiply
/// at that precision, as `compile --head-precision` sets it (docs/choosing.md).
///
/// >>> compiled = kp.compact(exact, "models/pump_calib.csv", method="nystrom", features=1024)
#[pyfunction]
#[pyo3(name = "compact", signature = (exact, calib, method, features, *, seed=0, landmark_rule="uniform", bandwidth_search=true, eval=None, eval_labels=None, min_agreement=0.99, refine=None, head_rank=None, head_precision=None))]
#[allow(clippy::too_many_arguments)]
fn compile(
    py: Python<'_>,
    exact: &PyExact,
    calib: &Bound<'_, PyAny>,
    method: &str,
    features: usize,
    seed: u64,
    landmark_rule: &str,
    bandwidth_search: bool,
    eval: Option<&Bound<'_, PyAny>>,
    eval_labels: Option<Vec<String>>,
    min_agreement: f64,
    refine: Option<usize>,
    head_rank: Option<&Bound<'_, PyAny>>,
    head_precision: Option<String>,
) -> Res<PyCompiled> {
    let e = exact.inner.clone();
    let spec = spec_for(&e, method, features, seed, landmark_rule)?;
    let (x, _) = model_batch(py, calib, "calib", &e.feature_names, None)?;
    let opts = match refine {
        Some(n) => Some(lib(kernelpress::fit::RefineOptions::new(n))?),
        None => None,
    };
    let rank = match head_rank {
        None => None,
        Some(v) if v.is_none() => None,
        Some(v) => Some(lib(if let Ok(n) = v.extract::<usize>() {
            HeadRank::Fixed(n).checked()
        } else if v.extract::<String>().is_ok_and(|t| t == "auto") {
            Ok(HeadRank::Auto { tolerance: 0.002 })
        } else {
            Err(kernelpress::Error::input(format!(
                "compact: head_rank {v}: expected a whole number ≥ 1 or 'auto'"
            )))
        })?),
    };
    let precision = match head_precision.as_deref() {
        None => None,
        Some("auto") => Some(kernelpress::fit::HeadPrecisionRule::Smallest { tolerance: 0.002 }),
        Some(v) => Some(kernelpress::fit::HeadPrecisionRule::Fixed(lib(v
            .parse()
            .map_err(|e: kernelpress::Error| {
                kernelpress::Error::input(format!("compact: head_precision: {}", e.message()))
            }))?)),
    };
    let (mut model, _) = lib(py.detach(|| {
        let (m, info) = compile_exact_tuned(
            &e,
            x.view(),
            &spec,
            &RidgeGrid::standard(),
            bandwidth_search,
            None,
            &Silent,
        )?;
        if opts.is_none() && rank.is_none() && precision.is_none() {
            return Ok((m, info));
        }
        let t = kernelpress::fit::Teacher::new(&e, x.view(), &Silent)?;
        let (m, info) = match &opts {
            Some(o) => {
                let chosen = m.spec().clone();
                let (m, info, _) =
                    t.distil_refined(&chosen, &RidgeGrid::standard(), None, o, &Silent)?;
                (m, info)
            }
            None => (m, info),
        };
        let m = match rank {
            Some(r) => t.factor_head(&m, r)?.0,
            None => m,
        };
        match precision {
            Some(p) => Ok((t.set_head_precision(&m, p)?.0, info)),
            None => Ok((m, info)),
        }
    }))?;
    match eval {
        Some(ev) => eval_report(
            py,
            &e,
            &mut model,
            ev,
            eval_labels.as_deref(),
            min_agreement,
        )?,
        None => {
            let (xa, _) = audit_rows(x.view());
            attach_report(
                py,
                &e,
                &mut model,
                xa.view(),
                None,
                "calibration audit rows (every tenth row; never fitted on)".into(),
                min_agreement,
            )?;
        }
    }
    Ok(PyCompiled {
        inner: Arc::new(model),
    })
}

/// The report of `compiled` against `exact` on rows `x` (array or path), as a dict with the
/// keys of `kernelpress report --json`. `labels` (true class labels) add the accuracies;
/// `timing=True` measures latency and throughput on this machine (seconds).
#[pyfunction]
#[pyo3(signature = (compiled, exact, x, *, labels=None, timing=false, min_agreement=0.99))]
fn report<'py>(
    py: Python<'py>,
    compiled: &PyCompiled,
    exact: &PyExact,
    x: &Bound<'py, PyAny>,
    labels: Option<Vec<String>>,
    timing: bool,
    min_agreement: f64,
) -> Res<Bound<'py, PyAny>> {
    let e = exact.inner.clone();
    let (xr, _) = model_batch(py, x, "x", &e.feature_names, None)?;
    let opts = ReportOptions {
        min_agreement,
        timing,
        ..ReportOptions::default()
    };
    let c = compiled.inner.clone();
    let rep = lib(py.detach(|| kreport::build(&c, &e, xr.view(), labels.as_deref(), None, &opts)))?;
    json_to_py(py, &rep.to_json())
}

/// Random features of `x` for a kernel expression: rows × D with ⟨z(x), z(y)⟩ ≈ k(x, y)
/// (as `kernelpress featurize` writes them).
#[pyfunction]
#[pyo3(signature = (kernel, method, features, x, *, seed=0, landmark_rule="uniform"))]
fn featurize<'py>(
    py: Python<'py>,
    kernel: &str,
    method: &str,
    features: usize,
    x: &Bound<'py, PyAny>,
    seed: u64,
    landmark_rule: &str,
) -> Res<Bound<'py, PyArray2<f64>>> {
    let k: Kernel = lib(kernel.parse())?;
    let r = rows(py, x, "x")?;
    let v = r.view();
    lib(data::check_batch(v, v.ncols(), "x"))?;
    lib(k.check_dim(v.ncols()))?;
    let spec = spec_of(k, v.ncols(), method, features, seed, landmark_rule)?;
    let z = lib(py.detach(|| -> kernelpress::Result<Array2<f64>> {
        let (map, _) = spec.sample(Some(v))?;
        Ok(map.transform(v))
    }))?;
    Ok(to_py(py, z))
}

/// Exports `model` (a :class:`CompiledModel` or a :class:`GuardedModel`, which exports
/// whole: docs/exporting.md) to `path` in `format` (`onnx`, `c`, `rust`, `npy`,
/// `safetensors`) at `precision` (`f32`, `f16`, `int8`); returns a dict of what was written.
#[pyfunction]
#[pyo3(signature = (model, format, path, *, precision="f32"))]
fn export<'py>(
    py: Python<'py>,
    model: &Bound<'py, PyAny>,
    format: &str,
    path: PathBuf,
    precision: &str,
) -> Res<Bound<'py, PyAny>> {
    let mut opts = ExportOptions::new(lib(Format::parse(format))?);
    opts.precision = lib(Precision::parse(precision))?;
    let s = if let Ok(g) = model.cast::<PyGuarded>() {
        let g = g.get().inner.clone();
        lib(py.detach(|| kernelpress::export::export_guarded(&g, &opts, &path)))?
    } else {
        let c = model
            .cast::<PyCompiled>()
            .map_err(|_| {
                PyTypeError::new_err("export: model must be a CompiledModel or a GuardedModel")
            })?
            .get()
            .inner
            .clone();
        lib(py.detach(|| kernelpress::export::export(&c, &opts, &path)))?
    };
    json_to_py(py, &serde_json::to_value(&s).unwrap_or_default())
}

/// `(x, columns, target)` as `read_data` returns them.
type DataTuple<'py> = (Bound<'py, PyArray2<f64>>, Vec<String>, Option<Vec<String>>);

/// Reads a CSV (header row) or .npy data file: `(x, columns, target)`, `target` a list of
/// str when `target` names a column, else None.
#[pyfunction]
#[pyo3(signature = (path, target=None))]
fn read_data<'py>(py: Python<'py>, path: PathBuf, target: Option<&str>) -> Res<DataTuple<'py>> {
    let t: Table = lib(py.detach(|| data::read_table(&path, target, target.is_some())))?;
    Ok((to_py(py, t.x), t.columns, t.target))
}

/// Distillation statistics of one shard of calibration rows `x` (array or path) whose
/// first row has global index `first_row` in the whole calibration set (rows keep their
/// part — fit, ridge choice, audit — however the set is split). Map options as `compile`;
/// the map bandwidth is not searched. Nyström needs `landmark_rule="support"` (the
/// teacher's support vectors), so that every shard draws the same map.
#[pyfunction]
#[pyo3(signature = (exact, x, method, features, *, first_row=0, seed=0, landmark_rule="uniform"))]
#[allow(clippy::too_many_arguments)]
fn shard_statistics(
    py: Python<'_>,
    exact: &PyExact,
    x: &Bound<'_, PyAny>,
    method: &str,
    features: usize,
    first_row: usize,
    seed: u64,
    landmark_rule: &str,
) -> Res<PyStats> {
    let e = exact.inner.clone();
    let spec = spec_for(&e, method, features, seed, landmark_rule)?;
    let (xr, _) = model_batch(py, x, "x", &e.feature_names, None)?;
    let st = lib(py.detach(|| ShardStats::compute(&e, &spec, xr.view(), first_row)))?;
    Ok(PyStats { inner: st })
}

/// Merges statistics of disjoint rows (same map and teacher), in any order.
#[pyfunction]
fn merge_statistics(py: Python<'_>, parts: Vec<Py<PyStats>>) -> Res<PyStats> {
    let mut it = parts.iter();
    let first = it.next().ok_or_else(|| {
        err(kernelpress::Error::input(
            "merge_statistics: no statistics given",
        ))
    })?;
    let mut acc = first.get().inner.clone();
    for p in it {
        let other = &p.get().inner;
        lib(py.detach(|| acc.merge(other)))?;
    }
    Ok(PyStats { inner: acc })
}

/// Fits the head from (merged) statistics and builds the compiled model; with `eval`
/// (array or path) the report is computed there.
#[pyfunction]
#[pyo3(signature = (exact, statistics, *, eval=None, eval_labels=None, min_agreement=0.99))]
fn compile_from_statistics(
    py: Python<'_>,
    exact: &PyExact,
    statistics: &PyStats,
    eval: Option<&Bound<'_, PyAny>>,
    eval_labels: Option<Vec<String>>,
    min_agreement: f64,
) -> Res<PyCompiled> {
    let e = exact.inner.clone();
    let mut model = lib(py.detach(|| statistics.inner.fit(&e, &RidgeGrid::standard())))?;
    if let Some(ev) = eval {
        eval_report(
            py,
            &e,
            &mut model,
            ev,
            eval_labels.as_deref(),
            min_agreement,
        )?;
    }
    Ok(PyCompiled {
        inner: Arc::new(model),
    })
}

/// Where a refinement stands (its current program and head), as the driver sends it to
/// every shard with each request: picklable (`to_bytes`), nothing to build by hand.
#[pyclass(name = "RefineState", module = "kernelpress", frozen)]
struct PyRefineState {
    inner: Arc<RefineState>,
}

#[pymethods]
impl PyRefineState {
    /// A state from bytes (as `to_bytes` gives).
    #[staticmethod]
    fn from_bytes(py: Python<'_>, data: &[u8]) -> Res<Self> {
        let s = lib(py.detach(|| RefineState::from_bytes(data, "bytes")))?;
        Ok(PyRefineState { inner: Arc::new(s) })
    }
    /// The state as bytes (a safetensors file).
    fn to_bytes<'py>(&self, py: Python<'py>) -> Res<Bound<'py, PyBytes>> {
        let b = lib(self.inner.to_bytes())?;
        Ok(PyBytes::new(py, &b))
    }
    /// The program's steps that move, as `step{i}.{op}`.
    #[getter]
    fn trained(&self) -> Vec<String> {
        self.inner.trained()
    }
    fn __reduce__<'py>(&self, py: Python<'py>) -> Res<(Bound<'py, PyAny>, (Bound<'py, PyBytes>,))> {
        let f = py.get_type::<PyRefineState>().getattr("from_bytes")?;
        Ok((f, (self.to_bytes(py)?,)))
    }
}

/// How a gradient pickles: `(from_parts, (values, lengths))`.
type GradientParts<'py> = (Bound<'py, PyAny>, (Bound<'py, PyArray1<f64>>, Vec<usize>));

/// One shard's gradient of a minibatch (a vector per program step): picklable, added by
/// the driver in shard order.
#[pyclass(name = "RefineGradient", module = "kernelpress", frozen)]
struct PyGradient {
    inner: RefineGradient,
}

#[pymethods]
impl PyGradient {
    /// A gradient from its parts (as `__reduce__` gives them): the values end to end and
    /// each step's length.
    #[staticmethod]
    fn from_parts(values: PyReadonlyArray1<'_, f64>, lengths: Vec<usize>) -> Res<Self> {
        let v = values
            .as_slice()
            .map_err(|e| PyTypeError::new_err(e.to_string()))?;
        if lengths.iter().try_fold(0usize, |a, l| a.checked_add(*l)) != Some(v.len()) {
            return Err(err(kernelpress::Error::input(
                "RefineGradient.from_parts: the lengths do not add up to the values",
            )));
        }
        let mut at = 0;
        let inner = lengths
            .iter()
            .map(|l| {
                at += l;
                v[at - l..at].to_vec()
            })
            .collect();
        Ok(PyGradient { inner })
    }
    fn __reduce__<'py>(&self, py: Python<'py>) -> Res<GradientParts<'py>> {
        let f = py.get_type::<PyGradient>().getattr("from_parts")?;
        let flat: Vec<f64> = self.inner.iter().flatten().copied().collect();
        let lens = self.inner.iter().map(|g| g.len()).collect();
        Ok((f, (flat.into_pyarray(py), lens)))
    }
}

/// Calibration rows held for a refinement — all of them, or one shard whose first row has
/// global index `first_row` — scaled as the exact model scales its inputs, with the exact
/// model's decisions computed once. A driver (`refine_over`) asks it for the head's
/// statistics, a minibatch's gradient and the audit tally; on a cluster it lives on a
/// worker (picklable, should it have to move).
#[pyclass(name = "RefineRows", module = "kernelpress", frozen)]
struct PyRefineRows {
    inner: RefineRows<'static>,
}

#[pymethods]
impl PyRefineRows {
    /// Rows `x` (array, or a CSV / .npy path matched to the model's columns by name).
    #[new]
    #[pyo3(signature = (exact, x, *, first_row=0))]
    fn new(py: Python<'_>, exact: &PyExact, x: &Bound<'_, PyAny>, first_row: usize) -> Res<Self> {
        let e = exact.inner.clone();
        let (xr, _) = model_batch(py, x, "x", &e.feature_names, None)?;
        let inner = lib(py.detach(|| RefineRows::new(&e, xr.view(), first_row)))?;
        Ok(PyRefineRows { inner })
    }
    /// Rows from bytes (as `to_bytes` gives).
    #[staticmethod]
    fn from_bytes(py: Python<'_>, data: &[u8]) -> Res<Self> {
        let inner = lib(py.detach(|| RefineRows::from_bytes(data, "bytes")))?;
        Ok(PyRefineRows { inner })
    }
    /// The rows as bytes (scaled rows, decisions, first row).
    fn to_bytes<'py>(&self, py: Python<'py>) -> Res<Bound<'py, PyBytes>> {
        let b = lib(py.detach(|| self.inner.to_bytes()))?;
        Ok(PyBytes::new(py, &b))
    }
    /// The global row range `(start, end)` held.
    #[getter]
    fn range(&self) -> (usize, usize) {
        self.inner.range()
    }
    /// The head's statistics of the state's program over these rows.
    fn statistics(&self, py: Python<'_>, state: &PyRefineState) -> Res<PyStats> {
        let st = state.inner.clone();
        let inner = lib(py.detach(|| self.inner.statistics(&st)))?;
        Ok(PyStats { inner })
    }
    /// The gradient of minibatch `batch` (global row indices) over the rows held.
    fn gradient(
        &self,
        py: Python<'_>,
        state: &PyRefineState,
        batch: Vec<usize>,
    ) -> Res<PyGradient> {
        let st = state.inner.clone();
        let inner = lib(py.detach(|| self.inner.gradient(&st, &batch)))?;
        Ok(PyGradient { inner })
    }
    /// The audit tally `(hits, count)` of the state over these rows' audit rows.
    fn audit(&self, py: Python<'_>, state: &PyRefineState) -> Res<(f64, f64)> {
        let st = state.inner.clone();
        let t = lib(py.detach(|| self.inner.audit(&st)))?;
        Ok((t.hits, t.count))
    }
    /// The answer to a driver's request `job` (`"statistics"`, `"gradient"` with `batch`,
    /// or `"audit"`), as `refine_over`'s `each` callable passes them on.
    #[pyo3(signature = (job, state, batch=None))]
    fn answer(
        &self,
        py: Python<'_>,
        job: &str,
        state: &PyRefineState,
        batch: Option<Vec<usize>>,
    ) -> Res<Py<PyAny>> {
        Ok(match (job, batch) {
            ("statistics", None) => Py::new(py, self.statistics(py, state)?)?.into_any(),
            ("gradient", Some(b)) => Py::new(py, self.gradient(py, state, b)?)?.into_any(),
            ("audit", None) => self.audit(py, state)?.into_pyobject(py)?.into_any().unbind(),
            (j, b) => {
                return Err(err(kernelpress::Error::input(format!(
                    "RefineRows.answer: unknown request '{j}'{} (expected statistics, gradient with a batch, or audit)",
                    if b.is_some() { " with a batch" } else { "" }
                ))))
            }
        })
    }
    fn __reduce__<'py>(&self, py: Python<'py>) -> Res<(Bound<'py, PyAny>, (Bound<'py, PyBytes>,))> {
        let f = py.get_type::<PyRefineRows>().getattr("from_bytes")?;
        Ok((f, (self.to_bytes(py)?,)))
    }
    fn __repr__(&self) -> String {
        let (a, b) = self.inner.range();
        format!("RefineRows(rows {a}–{b})")
    }
}

/// A refinement source whose shards are reached through a Python callable
/// `each(job, state, batch)` that returns one answer per shard, in shard order.
struct CallbackSource {
    each: Py<PyAny>,
}

impl CallbackSource {
    fn ask<T>(
        &self,
        job: &str,
        state: &RefineState,
        batch: Option<&[usize]>,
        one: impl Fn(&Bound<'_, PyAny>) -> PyResult<T>,
    ) -> kernelpress::Result<Vec<T>> {
        Python::attach(|py| -> PyResult<Vec<T>> {
            let st = Py::new(
                py,
                PyRefineState {
                    inner: Arc::new(state.clone()),
                },
            )?;
            let b = batch.map(|b| b.to_vec());
            let out = self.each.bind(py).call1((job, st, b))?;
            let mut v = Vec::new();
            for item in out.try_iter()? {
                v.push(one(&item?)?);
            }
            Ok(v)
        })
        .map_err(|e| {
            kernelpress::Error::input(format!("refine_over: the shards' {job} failed: {e}"))
        })
        .and_then(|v| {
            if v.is_empty() {
                Err(kernelpress::Error::input(format!(
                    "refine_over: no shard answered the {job} request"
                )))
            } else {
                Ok(v)
            }
        })
    }
}

impl RefineSource for CallbackSource {
    fn statistics(&mut self, state: &RefineState) -> kernelpress::Result<ShardStats> {
        let parts = self.ask("statistics", state, None, |o| {
            Ok(o.cast::<PyStats>()?.get().inner.clone())
        })?;
        let mut it = parts.into_iter();
        let mut acc = it.next().expect("checked non-empty");
        for p in it {
            acc.merge(&p)?;
        }
        Ok(acc)
    }
    fn gradient(
        &mut self,
        state: &RefineState,
        batch: &[usize],
    ) -> kernelpress::Result<RefineGradient> {
        let parts = self.ask("gradient", state, Some(batch), |o| {
            Ok(o.cast::<PyGradient>()?.get().inner.clone())
        })?;
        kernelpress::fit::add_gradients(&parts)
    }
    fn audit(&mut self, state: &RefineState) -> kernelpress::Result<AuditTally> {
        let parts = self.ask("audit", state, None, |o| o.extract::<(f64, f64)>())?;
        Ok(parts
            .iter()
            .fold(AuditTally::default(), |t, (h, c)| AuditTally {
                hits: t.hits + h,
                count: t.count + c,
            }))
    }
}

/// Refines a `method`/`features` map of `exact` over calibration rows held elsewhere, as
/// `compact(..., refine=passes)` does over rows in hand: `each(job, state, batch)` must
/// ask every shard (a :class:`RefineRows`) for `job` — `"statistics"` (call
/// `rows.statistics(state)`), `"gradient"` (`rows.gradient(state, batch)`) or `"audit"`
/// (`rows.audit(state)`) — and return their answers as a list in a fixed shard order.
/// The map must be the same on every shard: a data-independent method, or Nyström with
/// `landmark_rule="support"`. `kernelpress.distributed.refine` is this over a Dask
/// cluster. With `eval` the report is computed on those rows.
#[pyfunction]
#[pyo3(signature = (exact, each, method, features, *, passes, seed=0, landmark_rule="uniform", rate=3e-3, batch=500, patience=2, eval=None, eval_labels=None, min_agreement=0.99))]
#[allow(clippy::too_many_arguments)]
fn refine_over(
    py: Python<'_>,
    exact: &PyExact,
    each: Py<PyAny>,
    method: &str,
    features: usize,
    passes: usize,
    seed: u64,
    landmark_rule: &str,
    rate: f64,
    batch: usize,
    patience: usize,
    eval: Option<&Bound<'_, PyAny>>,
    eval_labels: Option<Vec<String>>,
    min_agreement: f64,
) -> Res<PyCompiled> {
    let e = exact.inner.clone();
    let spec = spec_for(&e, method, features, seed, landmark_rule)?;
    let opts = lib(RefineOptions {
        passes,
        rate,
        batch,
        patience,
    }
    .checked())?;
    let mut source = CallbackSource { each };
    let (mut model, _) = lib(py.detach(|| {
        refine_sharded(
            &e,
            &spec,
            &RidgeGrid::standard(),
            &opts,
            &mut source,
            &Silent,
        )
    }))?;
    if let Some(ev) = eval {
        eval_report(
            py,
            &e,
            &mut model,
            ev,
            eval_labels.as_deref(),
            min_agreement,
        )?;
    }
    Ok(PyCompiled {
        inner: Arc::new(model),
    })
}

/// The compiled part of kernelpress; import `kernelpress`, not this module.
#[pymodule]
fn _kernelpress(m: &Bound<'_, PyModule>) -> PyResult<()> {
    m.add("Error", m.py().get_type::<Error>())?;
    m.add_class::<PyExact>()?;
    m.add_class::<PyCompiled>()?;
    m.add_class::<PyGuarded>()?;
    m.add_class::<PyStats>()?;
    m.add_class::<PyRefineState>()?;
    m.add_class::<PyGradient>()?;
    m.add_class::<PyRefineRows>()?;
    m.add_function(wrap_pyfunction!(compile, m)?)?;
    m.add_function(wrap_pyfunction!(guard, m)?)?;
    m.add_function(wrap_pyfunction!(report, m)?)?;
    m.add_function(wrap_pyfunction!(featurize, m)?)?;
    m.add_function(wrap_pyfunction!(export, m)?)?;
    m.add_function(wrap_pyfunction!(read_data, m)?)?;
    m.add_function(wrap_pyfunction!(shard_statistics, m)?)?;
    m.add_function(wrap_pyfunction!(merge_statistics, m)?)?;
    m.add_function(wrap_pyfunction!(compile_from_statistics, m)?)?;
    m.add_function(wrap_pyfunction!(refine_over, m)?)?;
    m.add("__version__", env!("CARGO_PKG_VERSION"))?;
    Ok(())
}
