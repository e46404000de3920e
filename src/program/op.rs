//! What every step implements, once: its output width, how it applies itself to a chunk
//! of rows, its cost, a one-line description, and how it is written to and read from a
//! model file. The [`Step`](super::Step) enum dispatches to these.

use crate::format::TensorFile;
use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};
use serde_json::{Map, Value};

/// Cost of one step for one input row (analytic).
///
/// `flops` counts additions and multiplications (a sine/cosine pair or an exponential as
/// one, and they are also counted in `transcendental`); `param_bytes` the parameters the
/// step reads; `activation_bytes` its inputs read and outputs written (8 bytes a value).
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Cost {
    /// Floating-point operations.
    pub flops: u64,
    /// Calls of sin/cos/exp.
    pub transcendental: u64,
    /// Bytes of parameters read.
    pub param_bytes: u64,
    /// Bytes of inputs read and outputs written.
    pub activation_bytes: u64,
}

impl Cost {
    /// All bytes a single-row evaluation touches.
    pub fn touched_bytes(&self) -> u64 {
        self.param_bytes + self.activation_bytes
    }

    /// True when the step reads parameters and does at most two flops per parameter byte:
    /// its speed is then set by streaming its parameters rather than by arithmetic (the
    /// roofline model, Williams, Waterman & Patterson 2009; a CPU core's ridge point is
    /// several flops per byte, common practice). A single row's activations stay in the
    /// nearest cache, so they do not count; a step without parameters (a pad, a
    /// transform, a sine/cosine) is never memory-bound by this rule.
    pub fn memory_bound(&self) -> bool {
        self.param_bytes > 0 && self.flops <= 2 * self.param_bytes
    }

    /// Sum of two costs.
    pub fn plus(self, o: Cost) -> Cost {
        Cost {
            flops: self.flops + o.flops,
            transcendental: self.transcendental + o.transcendental,
            param_bytes: self.param_bytes + o.param_bytes,
            activation_bytes: self.activation_bytes + o.activation_bytes,
        }
    }
}

/// `log₂ n` rounded up, exact for powers of two.
pub fn log2_ceil(n: usize) -> u64 {
    if n <= 1 {
        0
    } else {
        (usize::BITS - (n - 1).leading_zeros()) as u64
    }
}

/// One primitive step. Implemented once per step type (one file each under `steps/`).
pub(crate) trait Op: Sized {
    /// The step's name in files and in `inspect`.
    const NAME: &'static str;
    /// `Some(k)`: exactly `k` inputs; `None`: one or more.
    const ARITY: Option<usize> = Some(1);

    /// Output width for the given input widths, or why they do not fit.
    fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String>;

    /// Unary steps: applies to a chunk of rows (`n × in`), reusing the buffer when it can.
    fn apply(&self, _x: Array2<f64>) -> Array2<f64> {
        unreachable!("{} takes several inputs", Self::NAME)
    }

    /// Whether the step has an f32 single-row form ([`Op::apply_row32`]).
    const F32: bool = false;

    /// Whether batches of rows should run the f32 row form row by row (structured steps);
    /// false where one matrix product over the batch is cheaper than a product per row
    /// (dense projections).
    const F32_BATCH: bool = true;

    /// One row in f32 (steps with [`Op::F32`]): reads `x` (the input width), writes all of
    /// `y` (the output width), allocating nothing. Every SIMD kernel it calls runs at
    /// `level` (resolved once by the caller, so a forced level runs that level's copies). Arithmetic in f32; parameters stored in
    /// f64 are rounded to f32 as they are read.
    fn apply_row32(&self, _level: crate::simd::Level, _x: &[f32], _y: &mut [f32]) {
        unreachable!("{} has no f32 form", Self::NAME)
    }

    /// Whether [`Op::apply_row32_in_place`] exists (output as wide as the input).
    const IN_PLACE32: bool = false;

    /// [`Op::apply_row32`] over its own input (steps with [`Op::IN_PLACE32`]): the row
    /// runner uses it between steps, saving a copy into the other scratch half.
    fn apply_row32_in_place(&self, _level: crate::simd::Level, _x: &mut [f32]) {
        unreachable!("{} has no in-place f32 form", Self::NAME)
    }

    /// Steps with several inputs.
    fn apply_many(&self, _xs: &[ArrayView2<f64>]) -> Array2<f64> {
        unreachable!("{} takes one input", Self::NAME)
    }

    /// Reverse mode for a chunk of rows (vector–Jacobian products): `xs` are the step's
    /// inputs (`n × in` each), `y` its output and `gy = ∂L/∂y` (`n × out`). Adds `∂L/∂θ`
    /// for the step's continuous parameters ([`Op::params`], same order) into `gp` when
    /// given, and returns `∂L/∂x` for every input when `need_gx` (else nothing).
    /// Written beside the forward in every step's file; checked against central finite
    /// differences in `program::tests`.
    fn backward(
        &self,
        xs: &[ArrayView2<f64>],
        y: ArrayView2<f64>,
        gy: ArrayView2<f64>,
        gp: Option<&mut [f64]>,
        need_gx: bool,
    ) -> Vec<Array2<f64>>;

    /// The continuous parameters refinement may move, flattened (none by default).
    fn params(&self) -> Vec<f64> {
        Vec::new()
    }

    /// The step with its parameters replaced by `p` (as many as [`Op::params`] gives).
    fn with_params(&self, _p: &[f64]) -> Result<Self> {
        Err(Error::internal(format!(
            "step {} has no parameters",
            Self::NAME
        )))
    }

    /// Whether [`Op::backward`] can differentiate this step (a kernel block whose kernel
    /// has no derivative in closed form cannot).
    fn differentiable(&self) -> bool {
        true
    }

    /// Cost per row for the given input and output widths.
    fn cost(&self, ins: &[usize], out: usize) -> Cost;

    /// Parameters in a few words (for `inspect`).
    fn describe(&self) -> String;

    /// Writes the step's scalars and tensors.
    fn write(&self, w: &mut Writer);

    /// Reads a step written by [`Op::write`]; `r.in_dims` are its input widths.
    fn read(r: &Reader) -> Result<Self>;
}

/// Where a step writes its parameters: scalars into its manifest entry, tensors into the
/// file under `step{i}.{field}`.
pub(crate) struct Writer<'a> {
    pub(crate) file: &'a mut TensorFile,
    pub(crate) prefix: String,
    pub(crate) meta: Map<String, Value>,
}

impl Writer<'_> {
    fn key(&mut self, field: &str) -> String {
        format!("{}.{field}", self.prefix)
    }
    /// A float64 tensor.
    pub(crate) fn f64s(&mut self, field: &str, shape: Vec<usize>, data: Vec<f64>) {
        let k = self.key(field);
        self.file.put_f64(&k, shape, data);
    }
    /// An int32 tensor.
    pub(crate) fn i32s(&mut self, field: &str, shape: Vec<usize>, data: Vec<i32>) {
        let k = self.key(field);
        self.file.put_i32(&k, shape, data);
    }
    /// An int8 tensor.
    pub(crate) fn i8s(&mut self, field: &str, shape: Vec<usize>, data: Vec<i8>) {
        let k = self.key(field);
        self.file.put_i8(&k, shape, data);
    }
    /// A scalar in the manifest entry.
    pub(crate) fn scalar(&mut self, key: &str, v: impl Into<Value>) {
        self.meta.insert(key.to_string(), v.into());
    }
}

/// Where a step reads its parameters from.
pub(crate) struct Reader<'a> {
    pub(crate) file: &'a TensorFile,
    pub(crate) prefix: String,
    pub(crate) meta: &'a Map<String, Value>,
    pub(crate) src: String,
    /// Widths of the step's inputs.
    pub(crate) in_dims: Vec<usize>,
}

impl Reader<'_> {
    fn key(&self, field: &str) -> String {
        format!("{}.{field}", self.prefix)
    }
    /// An error naming the step.
    pub(crate) fn bad(&self, what: impl std::fmt::Display) -> Error {
        Error::file(format!("{}: step '{}': {what}", self.src, self.prefix))
    }
    /// Width of the (first) input.
    pub(crate) fn in_dim(&self) -> usize {
        self.in_dims.first().copied().unwrap_or(0)
    }
    /// A float64 tensor.
    pub(crate) fn f64s(&self, field: &str, shape: &[Option<usize>]) -> Result<Vec<f64>> {
        self.file.f64(&self.key(field), shape, &self.src)
    }
    /// A float64 matrix.
    pub(crate) fn matrix(
        &self,
        field: &str,
        rows: Option<usize>,
        cols: Option<usize>,
    ) -> Result<Array2<f64>> {
        let (s, v) = self
            .file
            .f64_shaped(&self.key(field), &[rows, cols], &self.src)?;
        Array2::from_shape_vec((s[0], s[1]), v).map_err(|e| self.bad(e))
    }
    /// An int32 tensor.
    pub(crate) fn i32s(&self, field: &str, shape: &[Option<usize>]) -> Result<Vec<i32>> {
        self.file.i32(&self.key(field), shape, &self.src)
    }
    /// An int8 tensor.
    pub(crate) fn i8s(&self, field: &str, shape: &[Option<usize>]) -> Result<Vec<i8>> {
        self.file.i8(&self.key(field), shape, &self.src)
    }
    /// The shape of a tensor of this step.
    pub(crate) fn shape(&self, field: &str) -> Result<Vec<usize>> {
        self.file
            .shape(&self.key(field))
            .map(|s| s.to_vec())
            .ok_or_else(|| self.bad(format!("tensor '{}' is missing", self.key(field))))
    }
    /// A finite number.
    pub(crate) fn num(&self, key: &str) -> Result<f64> {
        self.meta
            .get(key)
            .and_then(|v| v.as_f64())
            .filter(|v| v.is_finite())
            .ok_or_else(|| self.bad(format!("'{key}' is missing or not a finite number")))
    }
    /// A whole number.
    pub(crate) fn uint(&self, key: &str) -> Result<usize> {
        self.meta
            .get(key)
            .and_then(|v| v.as_u64())
            .and_then(|v| usize::try_from(v).ok())
            .ok_or_else(|| self.bad(format!("'{key}' is missing or not a whole number")))
    }
    /// A string.
    pub(crate) fn string(&self, key: &str) -> Result<String> {
        self.meta
            .get(key)
            .and_then(|v| v.as_str())
            .map(String::from)
            .ok_or_else(|| self.bad(format!("'{key}' is missing or not a string")))
    }
}

/// Checks that every value is finite and, when `positive`, > 0 (NaN fails both).
pub(crate) fn check_finite(v: &[f64], what: &str, positive: bool) -> Result<()> {
    for (i, x) in v.iter().enumerate() {
        if !x.is_finite() || (positive && !(*x > 0.0)) {
            let want = if positive {
                "a positive finite number"
            } else {
                "a finite number"
            };
            return Err(Error::input(format!(
                "{what}: entry {i} is {x}; expected {want}"
            )));
        }
    }
    Ok(())
}

/// One input of width `want`.
pub(crate) fn one_input(ins: &[usize], want: usize) -> std::result::Result<(), String> {
    match ins {
        [n] if *n == want => Ok(()),
        [n] => Err(format!("expects an input of width {want}, got {n}")),
        _ => Err(format!("expects one input, got {}", ins.len())),
    }
}

/// Applies `f` to every row of `x` in place (rows are contiguous).
pub(crate) fn rows_in_place(mut x: Array2<f64>, mut f: impl FnMut(&mut [f64])) -> Array2<f64> {
    for mut r in x.rows_mut() {
        f(r.as_slice_mut().expect("standard layout"));
    }
    x
}

/// A new `n × out` array filled row by row from the input rows.
pub(crate) fn rows_map(
    x: &Array2<f64>,
    out: usize,
    mut f: impl FnMut(&[f64], &mut [f64]),
) -> Array2<f64> {
    let mut y = Array2::zeros((x.nrows(), out));
    for (xr, mut yr) in x.rows().into_iter().zip(y.rows_mut()) {
        f(
            xr.as_slice().expect("standard layout"),
            yr.as_slice_mut().expect("standard layout"),
        );
    }
    y
}

/// `gy ⊙ f` row by row (`f` one factor per column): the input gradient of a diagonal.
pub(crate) fn times_columns(gy: ArrayView2<f64>, f: &[f64]) -> Array2<f64> {
    let mut g = gy.to_owned();
    for mut r in g.rows_mut() {
        r.iter_mut().zip(f).for_each(|(v, s)| *v *= s);
    }
    g
}

/// Adds `Σ_rows a ⊙ b` (column sums of the element-wise product) into `out`.
pub(crate) fn add_column_dots(a: ArrayView2<f64>, b: ArrayView2<f64>, out: &mut [f64]) {
    for (ra, rb) in a.rows().into_iter().zip(b.rows()) {
        for ((o, x), y) in out.iter_mut().zip(ra).zip(rb) {
            *o += x * y;
        }
    }
}
