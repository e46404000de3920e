//! Feature programs: a compiled model's feature map as a short list of primitive steps.
//!
//! A [`Program`] reads one input row (already scaled by the model's input scaling) as value
//! `0`; step `i` reads one or more earlier values and produces value `i + 1`; the program's
//! output is one of these values (usually the last). Every method's sampler emits such a
//! program (`crate::features`), and everything else is written once per *step* type, in one
//! file each under `steps/`: applying it, its cost, its description, and its file codec.
//!
//! | step | does | parameters |
//! |---|---|---|
//! | `scale` | `y_j = s_j x_j` | `factors` (f64) |
//! | `times` | `y = c x` | `c` |
//! | `pad` | `[x, 0, …]` to a width | `to` |
//! | `tile` | `[x, x, …]` | `copies` |
//! | `signs` | `y_j = s_j x_j`, `s_j = ±1` | `signs` (int8) |
//! | `wht` | unnormalised Walsh–Hadamard transform per block | `block` |
//! | `gather` | `y_i = x_{idx_i}` | `indices` (int32) |
//! | `dense` | `y = W x` | `weights` (f64, `m × n`) |
//! | `cos_sin` | `c·[cos x, sin x]` | `c` |
//! | `cos_phase` | `c·cos(x + b)` | `c`, `phases` (f64) |
//! | `kernel_block` | `y_l = k(x, L_l)` | `kernel`, `landmarks` (f64) |
//! | `count_sketch_fft` | Tensor Sketch: count sketches multiplied by FFT | `width`, `buckets` (int32), `signs` (int8) |
//! | `relu`, `step` | `max(0, x)`, `1[x > 0]` | — |
//! | `concat` | inputs side by side | — |
//! | `product` | element-wise product (width-1 inputs broadcast) | — |
//! | `append` | `[x, c]` | `c` |
//! | `segment_product` | products over consecutive segments | `lengths` (int32) |
//!
//! ```
//! use kernelpress::program::{Builder, steps};
//! use ndarray::array;
//! // √(1/2)·[cos(Wx), sin(Wx)] for two frequencies.
//! let mut b = Builder::new(2);
//! let w = steps::Dense::new(array![[1.0, 0.0], [0.0, 2.0]]).unwrap();
//! let p = b.push(w, &[Builder::INPUT]).unwrap();
//! let z = b.push(steps::CosSin::new(0.5f64.sqrt()).unwrap(), &[p]).unwrap();
//! let prog = b.finish(z);
//! assert_eq!(prog.output_dim(), 4);
//! let y = prog.apply_one(&[0.3, 0.1]);
//! assert!((y[0] - 0.3f64.cos() * 0.5f64.sqrt()).abs() < 1e-15);
//! assert_eq!(prog.len(), 2);
//! ```

pub(crate) mod op;
pub mod steps;

pub use op::{log2_ceil, Cost};

use crate::format::TensorFile;
use crate::linalg;
use crate::{Error, Result};
use ndarray::{s, Array2, ArrayView2, ArrayViewMut2, Axis};
use op::{Op, Reader, Writer};
use rayon::prelude::*;
use serde_json::{json, Map, Value};

/// A value of a program: `0` is the input, `i + 1` the output of step `i`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub struct ValueId(pub usize);

macro_rules! step_enum {
    ($($variant:ident($ty:ty)),* $(,)?) => {
        /// One primitive step (the closed set every program is made of).
        #[derive(Debug, Clone)]
        #[non_exhaustive]
        pub enum Step {
            $(
                #[doc = concat!("See [`", stringify!($ty), "`].")]
                $variant($ty),
            )*
        }
        $(impl From<$ty> for Step {
            fn from(s: $ty) -> Step {
                Step::$variant(s)
            }
        })*
        impl Step {
            /// Every step name, as written in files.
            pub const NAMES: &'static [&'static str] = &[$(<$ty as Op>::NAME),*];
            /// The step's name in files and in `inspect`.
            pub fn name(&self) -> &'static str {
                match self { $(Step::$variant(_) => <$ty as Op>::NAME),* }
            }
            fn arity(&self) -> Option<usize> {
                match self { $(Step::$variant(_) => <$ty as Op>::ARITY),* }
            }
            /// Output width for the input widths, or why they do not fit.
            pub fn out_dim(&self, ins: &[usize]) -> std::result::Result<usize, String> {
                match self { $(Step::$variant(s) => s.out_dim(ins)),* }
            }
            fn apply(&self, x: Array2<f64>) -> Array2<f64> {
                match self { $(Step::$variant(s) => s.apply(x)),* }
            }
            fn apply_many(&self, xs: &[ArrayView2<f64>]) -> Array2<f64> {
                match self { $(Step::$variant(s) => s.apply_many(xs)),* }
            }
            /// Whether the step has an f32 single-row form.
            pub fn has_f32(&self) -> bool {
                match self { $(Step::$variant(_) => <$ty as Op>::F32),* }
            }
            /// Whether batches should run the step's f32 row form row by row.
            pub fn batches_in_f32(&self) -> bool {
                match self { $(Step::$variant(_) => <$ty as Op>::F32_BATCH),* }
            }
            #[inline(always)]
            fn apply_row32(&self, level: crate::simd::Level, x: &[f32], y: &mut [f32]) {
                match self { $(Step::$variant(s) => s.apply_row32(level, x, y)),* }
            }
            #[inline(always)]
            fn in_place32(&self) -> bool {
                match self { $(Step::$variant(_) => <$ty as Op>::IN_PLACE32),* }
            }
            #[inline(always)]
            fn apply_row32_in_place(&self, level: crate::simd::Level, x: &mut [f32]) {
                match self { $(Step::$variant(s) => s.apply_row32_in_place(level, x)),* }
            }
            fn backward(
                &self,
                xs: &[ArrayView2<f64>],
                y: ArrayView2<f64>,
                gy: ArrayView2<f64>,
                gp: Option<&mut [f64]>,
                need_gx: bool,
            ) -> Vec<Array2<f64>> {
                match self { $(Step::$variant(s) => s.backward(xs, y, gy, gp, need_gx)),* }
            }
            /// The step's continuous parameters, flattened (empty for steps without).
            pub fn params(&self) -> Vec<f64> {
                match self { $(Step::$variant(s) => s.params()),* }
            }
            /// The step with its parameters replaced (as many as [`Step::params`] gives).
            pub fn with_params(&self, p: &[f64]) -> Result<Step> {
                match self { $(Step::$variant(s) => Ok(Step::$variant(s.with_params(p)?))),* }
            }
            /// Whether the step can be differentiated (see [`Program::backward`]).
            pub fn differentiable(&self) -> bool {
                match self { $(Step::$variant(s) => s.differentiable()),* }
            }
            /// Cost per row for the given input and output widths.
            pub fn cost(&self, ins: &[usize], out: usize) -> Cost {
                match self { $(Step::$variant(s) => s.cost(ins, out)),* }
            }
            /// Parameters in a few words.
            pub fn describe(&self) -> String {
                match self { $(Step::$variant(s) => s.describe()),* }
            }
            fn write(&self, w: &mut Writer) {
                match self { $(Step::$variant(s) => s.write(w)),* }
            }
            fn read(name: &str, r: &Reader) -> Result<Step> {
                match name {
                    $(<$ty as Op>::NAME => Ok(Step::$variant(<$ty as Op>::read(r)?)),)*
                    other => Err(r.bad(format!(
                        "unknown step '{other}'; expected one of {}",
                        Step::NAMES.join(", ")
                    ))),
                }
            }
        }
    };
}

step_enum! {
    Scale(steps::Scale),
    ConstScale(steps::ConstScale),
    Pad(steps::Pad),
    Tile(steps::Tile),
    Signs(steps::Signs),
    Wht(steps::Wht),
    Gather(steps::Gather),
    Dense(steps::Dense),
    CosSin(steps::CosSin),
    CosPhase(steps::CosPhase),
    KernelBlock(steps::KernelBlock),
    CountSketchFft(steps::CountSketchFft),
    Relu(steps::Relu),
    Heaviside(steps::Heaviside),
    Concat(steps::Concat),
    Product(steps::Product),
    Append(steps::Append),
    SegmentProduct(steps::SegmentProduct),
}

/// A step with its inputs.
#[derive(Debug, Clone)]
pub struct Instr {
    /// The step.
    pub step: Step,
    /// The values it reads.
    pub inputs: Vec<ValueId>,
}

/// Builds a [`Program`] step by step, checking every step's inputs as it is placed.
#[derive(Debug, Clone)]
pub struct Builder {
    input_dim: usize,
    instrs: Vec<Instr>,
    dims: Vec<usize>,
}

impl Builder {
    /// The program's input.
    pub const INPUT: ValueId = ValueId(0);

    /// A program over inputs of width `input_dim`.
    pub fn new(input_dim: usize) -> Builder {
        Builder {
            input_dim,
            instrs: Vec::new(),
            dims: vec![input_dim],
        }
    }

    /// Width of a value.
    ///
    /// # Panics
    /// If `v` is not a value of this builder.
    pub fn dim(&self, v: ValueId) -> usize {
        self.dims[v.0]
    }

    /// Appends a step reading `inputs`; returns its output value.
    pub fn push(&mut self, step: impl Into<Step>, inputs: &[ValueId]) -> Result<ValueId> {
        const MAX_WIDTH: usize = 1 << 26;
        let step = step.into();
        if let Some(v) = inputs.iter().find(|v| v.0 >= self.dims.len()) {
            return Err(Error::internal(format!(
                "step {}: value {} does not exist yet",
                step.name(),
                v.0
            )));
        }
        if let Some(k) = step.arity() {
            if inputs.len() != k {
                return Err(Error::internal(format!(
                    "step {} takes {k} input(s), got {}",
                    step.name(),
                    inputs.len()
                )));
            }
        }
        let ins: Vec<usize> = inputs.iter().map(|v| self.dims[v.0]).collect();
        let out = step
            .out_dim(&ins)
            .map_err(|e| Error::input(format!("step {}: {e}", step.name())))?;
        if out == 0 {
            return Err(Error::input(format!("step {}: empty output", step.name())));
        }
        // Every value is held for a chunk of rows (and the f32 runner keeps two of the
        // widest per row): a width from a file is checked against the memory ceiling
        // before anything that size exists.
        if out > MAX_WIDTH {
            return Err(Error::input(format!(
                "step {}: output width {out} is beyond the largest supported ({MAX_WIDTH})",
                step.name()
            )));
        }
        crate::limits::check_alloc(
            out as u64,
            8 * crate::linalg::CHUNK_ROWS as u64,
            &format!("step {}'s output", step.name()),
        )?;
        self.instrs.push(Instr {
            step,
            inputs: inputs.to_vec(),
        });
        self.dims.push(out);
        Ok(ValueId(self.dims.len() - 1))
    }

    /// The program whose output is `out`.
    ///
    /// # Panics
    /// If `out` is not a value of this builder.
    pub fn finish(self, out: ValueId) -> Program {
        assert!(out.0 < self.dims.len(), "output value does not exist");
        let mut last_use = vec![usize::MAX; self.dims.len()];
        for (i, ins) in self.instrs.iter().enumerate() {
            for v in &ins.inputs {
                last_use[v.0] = i;
            }
        }
        Program {
            input_dim: self.input_dim,
            instrs: self.instrs,
            dims: self.dims,
            output: out,
            last_use,
        }
    }
}

/// A feature program: primitive steps from an input row to a feature vector.
#[derive(Debug, Clone)]
pub struct Program {
    input_dim: usize,
    instrs: Vec<Instr>,
    dims: Vec<usize>,
    output: ValueId,
    last_use: Vec<usize>,
}

impl Program {
    /// Input width.
    pub fn input_dim(&self) -> usize {
        self.input_dim
    }
    /// Output width (the number of features).
    pub fn output_dim(&self) -> usize {
        self.dims[self.output.0]
    }
    /// Number of steps.
    pub fn len(&self) -> usize {
        self.instrs.len()
    }
    /// True for the identity program (no steps).
    pub fn is_empty(&self) -> bool {
        self.instrs.is_empty()
    }
    /// The steps with their inputs.
    pub fn instrs(&self) -> &[Instr] {
        &self.instrs
    }
    /// The output value.
    pub fn output(&self) -> ValueId {
        self.output
    }
    /// Width of a value.
    pub fn dim(&self, v: ValueId) -> usize {
        self.dims[v.0]
    }

    /// Cost per row of each step.
    pub fn step_costs(&self) -> Vec<Cost> {
        self.instrs
            .iter()
            .enumerate()
            .map(|(i, ins)| {
                let dims: Vec<usize> = ins.inputs.iter().map(|v| self.dims[v.0]).collect();
                ins.step.cost(&dims, self.dims[i + 1])
            })
            .collect()
    }

    /// Total cost per row.
    pub fn cost(&self) -> Cost {
        self.step_costs()
            .into_iter()
            .fold(Cost::default(), Cost::plus)
    }

    /// Parameter bytes as stored in memory by the steps.
    pub fn param_bytes(&self) -> u64 {
        self.cost().param_bytes
    }

    /// One line per step: index, name, inputs → output width, parameters, bytes, flops.
    pub fn describe(&self) -> Vec<String> {
        let costs = self.step_costs();
        self.instrs
            .iter()
            .enumerate()
            .zip(costs)
            .map(|((i, ins), c)| {
                let inputs: Vec<String> = ins
                    .inputs
                    .iter()
                    .map(|v| {
                        if v.0 == 0 {
                            format!("x[{}]", self.dims[0])
                        } else {
                            format!("v{}[{}]", v.0, self.dims[v.0])
                        }
                    })
                    .collect();
                format!(
                    "v{:<3} = {:<16} {:<22} → {:>6}  {:<40} {:>10} B {:>10} flops{}",
                    i + 1,
                    ins.step.name(),
                    inputs.join(", "),
                    self.dims[i + 1],
                    ins.step.describe(),
                    c.param_bytes,
                    c.flops,
                    if c.memory_bound() {
                        "  (memory-bound)"
                    } else {
                        ""
                    }
                )
            })
            .collect()
    }

    /// Features of a chunk of rows, sequentially.
    ///
    /// # Panics
    /// If `x` does not have [`Self::input_dim`] columns.
    #[track_caller]
    pub fn apply_chunk(&self, x: ArrayView2<f64>) -> Array2<f64> {
        assert_eq!(
            x.ncols(),
            self.input_dim,
            "feature program: wrong number of input features"
        );
        let mut vals: Vec<Option<Array2<f64>>> = vec![None; self.dims.len()];
        vals[0] = Some(x.as_standard_layout().into_owned());
        for (i, ins) in self.instrs.iter().enumerate() {
            let y = if ins.inputs.len() == 1 && ins.step.arity() == Some(1) {
                let v = ins.inputs[0].0;
                let arg = if self.last_use[v] == i && v != self.output.0 {
                    vals[v].take().expect("value computed")
                } else {
                    vals[v].clone().expect("value computed")
                };
                ins.step.apply(arg)
            } else {
                let views: Vec<ArrayView2<f64>> = ins
                    .inputs
                    .iter()
                    .map(|v| vals[v.0].as_ref().expect("value computed").view())
                    .collect();
                ins.step.apply_many(&views)
            };
            vals[i + 1] = Some(y);
            for v in &ins.inputs {
                if self.last_use[v.0] == i && v.0 != self.output.0 {
                    vals[v.0] = None;
                }
            }
        }
        vals[self.output.0].take().expect("output computed")
    }

    /// Every value of the program for a chunk of rows (the input first, then each step's
    /// output), kept for [`Self::backward`].
    ///
    /// # Panics
    /// If `x` does not have [`Self::input_dim`] columns.
    #[track_caller]
    pub fn forward_all(&self, x: ArrayView2<f64>) -> Vec<Array2<f64>> {
        assert_eq!(
            x.ncols(),
            self.input_dim,
            "feature program: wrong number of input features"
        );
        let mut vals: Vec<Array2<f64>> = Vec::with_capacity(self.dims.len());
        vals.push(x.as_standard_layout().into_owned());
        for ins in &self.instrs {
            let y = if ins.step.arity() == Some(1) {
                ins.step.apply(vals[ins.inputs[0].0].clone())
            } else {
                let views: Vec<ArrayView2<f64>> =
                    ins.inputs.iter().map(|v| vals[v.0].view()).collect();
                ins.step.apply_many(&views)
            };
            vals.push(y);
        }
        vals
    }

    /// Reverse mode through the whole program for one chunk: `vals` from
    /// [`Self::forward_all`], `g_out = ∂L/∂(output)`. Returns `∂L/∂θ` for every step whose
    /// `train` flag is set (empty vectors for the others) and, when `need_input` is set,
    /// `∂L/∂x` for the input. Only the values that lead to a trained step or to the
    /// input (when asked) are differentiated.
    ///
    /// # Panics
    /// If the shapes do not match the program, or a trained step is not
    /// [`Step::differentiable`].
    #[track_caller]
    pub fn backward(
        &self,
        vals: &[Array2<f64>],
        g_out: ArrayView2<f64>,
        train: &[bool],
        need_input: bool,
    ) -> (Vec<Vec<f64>>, Option<Array2<f64>>) {
        assert_eq!(vals.len(), self.dims.len(), "backward: one value per step");
        assert_eq!(
            train.len(),
            self.instrs.len(),
            "backward: one flag per step"
        );
        // needs[v]: a gradient with respect to value v is wanted.
        let mut needs = vec![false; self.dims.len()];
        needs[0] = need_input;
        for (i, ins) in self.instrs.iter().enumerate() {
            needs[i + 1] = train[i] || ins.inputs.iter().any(|v| needs[v.0]);
        }
        let mut grads: Vec<Option<Array2<f64>>> = vec![None; self.dims.len()];
        grads[self.output.0] = Some(g_out.to_owned());
        let mut out: Vec<Vec<f64>> = vec![Vec::new(); self.instrs.len()];
        for (i, ins) in self.instrs.iter().enumerate().rev() {
            let Some(gy) = grads[i + 1].take() else {
                continue;
            };
            if !needs[i + 1] {
                continue;
            }
            let mut gp = if train[i] {
                assert!(
                    ins.step.differentiable(),
                    "backward: step {} cannot be differentiated",
                    ins.step.name()
                );
                Some(vec![0.0; ins.step.params().len()])
            } else {
                None
            };
            let need_gx = ins.inputs.iter().any(|v| needs[v.0]);
            let xs: Vec<ArrayView2<f64>> = ins.inputs.iter().map(|v| vals[v.0].view()).collect();
            let gxs = ins.step.backward(
                &xs,
                vals[i + 1].view(),
                gy.view(),
                gp.as_deref_mut(),
                need_gx,
            );
            if let Some(gp) = gp {
                out[i] = gp;
            }
            for (v, gx) in ins.inputs.iter().zip(gxs) {
                if !needs[v.0] {
                    continue;
                }
                match &mut grads[v.0] {
                    Some(acc) => *acc += &gx,
                    slot => *slot = Some(gx),
                }
            }
        }
        let gin = if need_input {
            Some(
                grads[0]
                    .take()
                    .unwrap_or_else(|| Array2::zeros((g_out.nrows(), self.input_dim))),
            )
        } else {
            None
        };
        (out, gin)
    }

    /// The same program with step `i` replaced by `step`, which must take the same inputs
    /// and give the same output width (refinement turns a sign diagonal into a continuous
    /// one, or moves a step's parameters).
    pub fn with_step(&self, i: usize, step: Step) -> Result<Program> {
        let ins = self
            .instrs
            .get(i)
            .ok_or_else(|| Error::internal(format!("program has no step {i}")))?;
        let dims: Vec<usize> = ins.inputs.iter().map(|v| self.dims[v.0]).collect();
        let out = step
            .out_dim(&dims)
            .map_err(|e| Error::internal(format!("step {}: {e}", step.name())))?;
        if out != self.dims[i + 1] || step.arity() != ins.step.arity() {
            return Err(Error::internal(format!(
                "step {} does not fit where step {} was",
                step.name(),
                ins.step.name()
            )));
        }
        let mut p = self.clone();
        p.instrs[i].step = step;
        Ok(p)
    }

    /// Replaces step `i`'s parameters in place (as many as [`Step::params`] gives).
    pub fn set_params(&mut self, i: usize, p: &[f64]) -> Result<()> {
        let ins = self
            .instrs
            .get_mut(i)
            .ok_or_else(|| Error::internal(format!("program has no step {i}")))?;
        if ins.step.params().len() != p.len() {
            return Err(Error::internal(format!(
                "step {} takes {} parameters, got {}",
                ins.step.name(),
                ins.step.params().len(),
                p.len()
            )));
        }
        ins.step = ins.step.with_params(p)?;
        Ok(())
    }

    /// Features of one row.
    pub fn apply_one(&self, x: &[f64]) -> Vec<f64> {
        let row = ArrayView2::from_shape((1, x.len()), x).expect("one row");
        self.apply_chunk(row).into_raw_vec_and_offset().0
    }

    /// True when batches should run [`Self::runs_in_f32`]'s row form row by row: no step
    /// (a dense projection) batches better as one matrix product.
    pub fn batches_in_f32(&self) -> bool {
        self.runs_in_f32() && self.instrs.iter().all(|ins| ins.step.batches_in_f32())
    }

    /// True when the program is a chain of steps that all have an f32 form (the structured
    /// maps: scale, pad, tile, signs, Walsh–Hadamard, gather, cos/sin), so that
    /// [`Self::apply_one_f32`] can run it.
    pub fn runs_in_f32(&self) -> bool {
        self.output.0 == self.instrs.len()
            && self
                .instrs
                .iter()
                .enumerate()
                .all(|(i, ins)| ins.inputs == [ValueId(i)] && ins.step.has_f32())
    }

    /// Scratch (f32 values) that [`Self::apply_one_f32_with`] needs: two buffers of the
    /// widest value.
    pub fn f32_scratch_len(&self) -> usize {
        2 * self.dims.iter().copied().max().unwrap_or(0)
    }

    /// Features of one row computed in f32 throughout, or `None` when the program has a
    /// step without an f32 form ([`Self::runs_in_f32`]). Agrees with [`Self::apply_one`]
    /// to f32 rounding.
    ///
    /// ```
    /// use kernelpress::program::{Builder, steps};
    /// let mut b = Builder::new(2);
    /// let p = b.push(steps::Pad::new(4).unwrap(), &[Builder::INPUT]).unwrap();
    /// let h = b.push(steps::Wht::new(4).unwrap(), &[p]).unwrap();
    /// let z = b.push(steps::CosSin::new(0.5).unwrap(), &[h]).unwrap();
    /// let prog = b.finish(z);
    /// let f = prog.apply_one_f32(&[0.3, 0.1]).unwrap();
    /// for (a, b) in f.iter().zip(prog.apply_one(&[0.3, 0.1])) {
    ///     assert!((*a as f64 - b).abs() < 1e-6);
    /// }
    /// // The same without allocating: the caller's scratch.
    /// let mut scratch = vec![0f32; prog.f32_scratch_len()];
    /// scratch[..2].copy_from_slice(&[0.3, 0.1]);
    /// assert_eq!(prog.apply_one_f32_with(&mut scratch).unwrap(), &f[..]);
    /// ```
    #[track_caller]
    pub fn apply_one_f32(&self, x: &[f64]) -> Option<Vec<f32>> {
        assert_eq!(
            x.len(),
            self.input_dim,
            "feature program: wrong number of input features"
        );
        let mut scratch = vec![0f32; self.f32_scratch_len()];
        for (s, v) in scratch.iter_mut().zip(x) {
            *s = *v as f32;
        }
        self.apply_one_f32_with(&mut scratch).map(|z| z.to_vec())
    }

    /// [`Self::apply_one_f32`] in the caller's scratch, allocating nothing: the input row
    /// (f32) is read from `scratch[..input_dim]`, and the features are returned as a slice
    /// of `scratch`. `None` when the program has a step without an f32 form.
    ///
    /// # Panics
    /// If `scratch` is shorter than [`Self::f32_scratch_len`].
    #[track_caller]
    pub fn apply_one_f32_with<'a>(&self, scratch: &'a mut [f32]) -> Option<&'a [f32]> {
        let half = self.f32_scratch_len() / 2;
        assert!(
            scratch.len() >= 2 * half,
            "feature program: scratch of {} values, needs {}",
            scratch.len(),
            2 * half
        );
        if !self.runs_in_f32() {
            return None;
        }
        Some(run_f32_at(crate::simd::level(), self, None, scratch, None))
    }

    /// Features of one raw f64 row in f32, allocating nothing: the row enters as
    /// `(x_j − shift_j)·factor_j` (`input`: a model's standardisation; `None`: as it is),
    /// rounded to f32, then every step runs in f32 between the halves of `scratch`. `None`
    /// when the program has a step without an f32 form. The input map and the simple steps
    /// are compiled once per instruction-set level, so their loops vectorise at the CPU's
    /// width.
    ///
    /// # Panics
    /// If `x` does not have the program's input width, the input map another width,
    /// `scratch` is too short, or this CPU cannot run `level`.
    #[track_caller]
    pub fn apply_row_f32_at<'a>(
        &self,
        level: crate::simd::Level,
        x: &[f64],
        input: Option<InputMap>,
        scratch: &'a mut [f32],
    ) -> Option<&'a [f32]> {
        self.check_row_f32(x, &input, scratch);
        if !self.runs_in_f32() {
            return None;
        }
        Some(run_f32_at(level, self, Some((x, input)), scratch, None))
    }

    /// The f32 steps one after the other between the two halves of `scratch`, the input
    /// first written from `x` when given (the callers checked [`Self::runs_in_f32`] and
    /// every length); inlined into the level-specific copies below.
    #[inline(always)]
    fn run_f32<'a>(
        &self,
        level: crate::simd::Level,
        x: RowIn,
        scratch: &'a mut [f32],
        out: Option<&mut [f32]>,
    ) -> &'a [f32] {
        let half = self.f32_scratch_len() / 2;
        let (mut a, mut b) = scratch[..2 * half].split_at_mut(half);
        match x {
            Some((x, Some(m))) => {
                for (((o, v), s), f) in a.iter_mut().zip(x).zip(m.shift).zip(m.factor) {
                    *o = ((v - s) * f) as f32;
                }
            }
            Some((x, None)) => a.iter_mut().zip(x).for_each(|(o, v)| *o = *v as f32),
            None => {}
        }
        let last = self.instrs.len().saturating_sub(1);
        for (i, ins) in self.instrs[..last].iter().enumerate() {
            let (din, dout) = (self.dims[i], self.dims[i + 1]);
            if ins.step.in_place32() {
                ins.step.apply_row32_in_place(level, &mut a[..din]);
            } else {
                ins.step.apply_row32(level, &a[..din], &mut b[..dout]);
                std::mem::swap(&mut a, &mut b);
            }
        }
        let Some(ins) = self.instrs.last() else {
            if let Some(o) = out {
                o.copy_from_slice(&a[..self.input_dim]);
            }
            return &a[..self.input_dim];
        };
        let (din, dout) = (self.dims[last], self.dims[last + 1]);
        match out {
            Some(o) => {
                ins.step.apply_row32(level, &a[..din], o);
                &[]
            }
            None => {
                ins.step.apply_row32(level, &a[..din], &mut b[..dout]);
                &b[..dout]
            }
        }
    }

    /// [`Self::apply_row_f32_at`] with the last step writing into `out` (one row of a
    /// batch's feature block), saving a copy. Returns false (and writes nothing) when the
    /// program has a step without an f32 form.
    ///
    /// # Panics
    /// As [`Self::apply_row_f32_at`], and if `out` does not have the output width.
    #[track_caller]
    pub(crate) fn apply_row_f32_into_at(
        &self,
        level: crate::simd::Level,
        x: &[f64],
        input: Option<InputMap>,
        scratch: &mut [f32],
        out: &mut [f32],
    ) -> bool {
        self.check_row_f32(x, &input, scratch);
        assert_eq!(
            out.len(),
            self.output_dim(),
            "feature program: output width"
        );
        if !self.runs_in_f32() {
            return false;
        }
        run_f32_at(level, self, Some((x, input)), scratch, Some(out));
        true
    }

    #[track_caller]
    fn check_row_f32(&self, x: &[f64], input: &Option<InputMap>, scratch: &[f32]) {
        let d = self.input_dim;
        assert_eq!(
            x.len(),
            d,
            "feature program: wrong number of input features"
        );
        if let Some(m) = input {
            assert!(
                m.shift.len() == d && m.factor.len() == d,
                "feature program: input map of another width"
            );
        }
        assert!(
            scratch.len() >= self.f32_scratch_len(),
            "feature program: scratch of {} values, needs {}",
            scratch.len(),
            self.f32_scratch_len()
        );
    }

    /// Features of a batch (`n × D`), in parallel over fixed row chunks (deterministic).
    pub fn apply(&self, x: ArrayView2<f64>) -> Array2<f64> {
        let mut out = Array2::zeros((x.nrows(), self.output_dim()));
        self.apply_into(x, out.view_mut());
        out
    }

    /// Features of a batch written into `out`.
    ///
    /// # Panics
    /// If the shapes do not match.
    #[track_caller]
    pub fn apply_into(&self, x: ArrayView2<f64>, mut out: ArrayViewMut2<f64>) {
        assert_eq!(
            out.dim(),
            (x.nrows(), self.output_dim()),
            "feature program: output buffer has the wrong shape"
        );
        let n = x.nrows();
        out.axis_chunks_iter_mut(Axis(0), linalg::CHUNK_ROWS)
            .into_par_iter()
            .enumerate()
            .for_each(|(ci, mut dst)| {
                let start = ci * linalg::CHUNK_ROWS;
                let rows = dst.nrows().min(n - start);
                let z = self.apply_chunk(x.slice(s![start..start + rows, ..]));
                dst.assign(&z);
            });
    }

    /// If the last step is a `dense` projection `W` whose output is the program's output,
    /// the program without it and `W` (so a head `H` can be folded into `Wᵀ·H`).
    pub fn split_trailing_dense(&self) -> Option<(Program, &Array2<f64>)> {
        let last = self.instrs.last()?;
        if self.output.0 != self.instrs.len() {
            return None;
        }
        let Step::Dense(d) = &last.step else {
            return None;
        };
        let b = Builder {
            input_dim: self.input_dim,
            instrs: self.instrs[..self.instrs.len() - 1].to_vec(),
            dims: self.dims[..self.dims.len() - 1].to_vec(),
        };
        Some((b.finish(last.inputs[0]), d.matrix()))
    }

    /// Writes the steps' tensors (`step{i}.{field}`) into `f` and returns the program's
    /// manifest entry: `{"steps": [{"op", "inputs", scalars…}, …], "output": id}`.
    pub fn write(&self, f: &mut TensorFile) -> Value {
        let mut steps = Vec::with_capacity(self.instrs.len());
        for (i, ins) in self.instrs.iter().enumerate() {
            let mut w = Writer {
                file: f,
                prefix: format!("step{i}"),
                meta: Map::new(),
            };
            w.meta.insert("op".into(), json!(ins.step.name()));
            w.meta.insert(
                "inputs".into(),
                json!(ins.inputs.iter().map(|v| v.0).collect::<Vec<_>>()),
            );
            ins.step.write(&mut w);
            steps.push(Value::Object(w.meta));
        }
        json!({"steps": steps, "output": self.output.0})
    }

    /// Reads a program written by [`Self::write`] for inputs of width `input_dim`; every
    /// step is validated as it is built.
    pub fn read(v: &Value, f: &TensorFile, input_dim: usize, src: &str) -> Result<Program> {
        let bad = |m: String| Error::file(format!("{src}: program: {m}"));
        let steps = v
            .get("steps")
            .and_then(|s| s.as_array())
            .ok_or_else(|| bad("'steps' missing or not a list".into()))?;
        let mut b = Builder::new(input_dim);
        for (i, st) in steps.iter().enumerate() {
            let meta = st
                .as_object()
                .ok_or_else(|| bad(format!("step {i} is not an object")))?;
            let op = meta
                .get("op")
                .and_then(|o| o.as_str())
                .ok_or_else(|| bad(format!("step {i} has no 'op'")))?;
            let inputs: Vec<ValueId> = meta
                .get("inputs")
                .and_then(|x| x.as_array())
                .ok_or_else(|| bad(format!("step {i} has no 'inputs'")))?
                .iter()
                .map(|x| {
                    x.as_u64()
                        .map(|u| ValueId(u as usize))
                        .filter(|v| v.0 <= i)
                        .ok_or_else(|| bad(format!("step {i}: input {x} is not an earlier value")))
                })
                .collect::<Result<_>>()?;
            if inputs.is_empty() {
                return Err(bad(format!("step {i} has no inputs")));
            }
            let r = Reader {
                file: f,
                prefix: format!("step{i}"),
                meta,
                src: src.to_string(),
                in_dims: inputs.iter().map(|v| b.dim(*v)).collect(),
            };
            let step = Step::read(op, &r)?;
            b.push(step, &inputs)
                .map_err(|e| bad(format!("step {i}: {}", e.message())))?;
        }
        let out = v
            .get("output")
            .and_then(|o| o.as_u64())
            .map(|u| u as usize)
            .filter(|u| *u <= steps.len())
            .ok_or_else(|| bad("'output' missing or not a value of the program".into()))?;
        Ok(b.finish(ValueId(out)))
    }
}

/// How a raw row enters an f32 program: `(x_j − shift_j)·factor_j` per column (a model's
/// standardisation, with the reciprocal scales as factors).
#[derive(Debug, Clone, Copy)]
pub struct InputMap<'a> {
    /// Subtracted first (the means).
    pub shift: &'a [f64],
    /// Then multiplied (the reciprocal scales).
    pub factor: &'a [f64],
}

type RowIn<'x, 'm> = Option<(&'x [f64], Option<InputMap<'m>>)>;

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn run_f32_avx2<'a>(
    p: &Program,
    x: RowIn,
    s: &'a mut [f32],
    out: Option<&mut [f32]>,
) -> &'a [f32] {
    p.run_f32(crate::simd::Level::Avx2, x, s, out)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn run_f32_avx512<'a>(
    p: &Program,
    x: RowIn,
    s: &'a mut [f32],
    out: Option<&mut [f32]>,
) -> &'a [f32] {
    p.run_f32(crate::simd::Level::Avx512, x, s, out)
}

fn run_f32_at<'a>(
    level: crate::simd::Level,
    p: &Program,
    x: RowIn,
    s: &'a mut [f32],
    out: Option<&mut [f32]>,
) -> &'a [f32] {
    assert!(
        level <= crate::simd::detected(),
        "this CPU cannot run the {} path",
        level.name()
    );
    match level {
        // SAFETY: the level is supported by this CPU (checked above; AVX2 implies FMA).
        #[cfg(target_arch = "x86_64")]
        crate::simd::Level::Avx512 => unsafe { run_f32_avx512(p, x, s, out) },
        #[cfg(target_arch = "x86_64")]
        crate::simd::Level::Avx2 => unsafe { run_f32_avx2(p, x, s, out) },
        _ => p.run_f32(level, x, s, out),
    }
}

#[cfg(test)]
pub(crate) mod tests;
