//! The row side of a refinement: what each pass needs from the calibration rows — the
//! head's statistics for the current program, the gradient of one minibatch, the audit
//! tally — computed by [`RefineRows`] for the rows it holds (all of them, or one shard of a
//! larger set, named by the global index of its first row). Every answer is a sum over
//! rows, so shards answer separately and the driver adds their answers
//! ([`super::refine::refine_with`]); how the shards are reached (one process, threads, a
//! cluster) is the caller's business, through [`RefineSource`].
//!
//! ```
//! use kernelpress::fit::{RefineRows, RefineSource};
//! use kernelpress::model::{ExactModel, Task};
//! use ndarray::{array, Array2};
//! let k: kernelpress::kernel::Kernel = "gaussian(gamma=0.5)".parse().unwrap();
//! let exact = ExactModel::new(k, array![[0.0, 0.0], [1.0, 0.5]], array![[1.0], [-0.5]],
//!     vec![0.1], Task::Regression, vec![], None).unwrap();
//! let x = Array2::from_shape_fn((50, 2), |(i, j)| ((i * 7 + j * 3) as f64 * 0.37).sin());
//! // Rows 100–149 of a larger calibration set.
//! let rows = RefineRows::new(&exact, x.view(), 100).unwrap();
//! assert_eq!(rows.range(), (100, 150));
//! ```

use super::shard::ShardStats;
use super::{audit_row, row_part, Part, FIT_CHUNK};
use crate::features::FeatureSpec;
use crate::format::TensorFile;
use crate::model::{ExactModel, Task};
use crate::program::{Program, Step};
use crate::{Error, Result};
use ndarray::{s, Array2, ArrayView2, Axis, CowArray, Ix2};
use rayon::prelude::*;
use serde_json::json;

/// Rows per parallel piece of a minibatch (fixed, so sums do not depend on the threads).
const PIECE: usize = 64;

/// The manifest `kind` of a refinement state's bytes.
const STATE_KIND: &str = "refinement-state";

/// The manifest `kind` of refinement rows' bytes.
const ROWS_KIND: &str = "refinement-rows";

/// Which steps move: those with parameters, except a dense projection right after a
/// kernel block (the Nyström whitening, which the ridge head absorbs).
pub(crate) fn trainable(p: &Program) -> Vec<bool> {
    p.instrs()
        .iter()
        .map(|ins| {
            let after_block = ins
                .inputs
                .iter()
                .any(|v| v.0 > 0 && matches!(p.instrs()[v.0 - 1].step, Step::KernelBlock(_)));
            let whitening = matches!(ins.step, Step::Dense(_)) && after_block;
            !ins.step.params().is_empty() && !whitening
        })
        .collect()
}

/// Where a refinement stands: the program being refined, the head it is judged with and
/// which of its steps move. The driver sends it with every request; it serialises to a few
/// tensors (`to_bytes`), so shards on other machines can be sent it.
#[derive(Debug, Clone)]
pub struct RefineState {
    pub(crate) spec: FeatureSpec,
    pub(crate) teacher: String,
    pub(crate) program: Program,
    pub(crate) head: Array2<f64>,
    pub(crate) intercept: Vec<f64>,
    pub(crate) train: Vec<bool>,
}

impl RefineState {
    pub(crate) fn new(spec: FeatureSpec, teacher: String, program: Program, k: usize) -> Self {
        let train = trainable(&program);
        let head = Array2::zeros((program.output_dim(), k));
        RefineState {
            spec,
            teacher,
            program,
            head,
            intercept: vec![0.0; k],
            train,
        }
    }

    /// The program's steps, as `step{i}.{op}`, that move.
    pub fn trained(&self) -> Vec<String> {
        self.program
            .instrs()
            .iter()
            .enumerate()
            .filter(|(i, _)| self.train[*i])
            .map(|(i, ins)| format!("step{i}.{}", ins.step.name()))
            .collect()
    }

    fn to_file(&self) -> TensorFile {
        let mut f = TensorFile::default();
        let prog = self.program.write(&mut f);
        let (p, k) = self.head.dim();
        f.put_f64("head", vec![p, k], self.head.iter().copied().collect());
        f.put_f64("intercept", vec![k], self.intercept.clone());
        let m = &mut f.manifest;
        m.insert("format_version".into(), json!(2));
        m.insert("kind".into(), json!(STATE_KIND));
        m.insert("spec".into(), self.spec.to_json());
        m.insert("teacher_fingerprint".into(), json!(self.teacher));
        m.insert("input_dim".into(), json!(self.program.input_dim()));
        m.insert("program".into(), prog);
        f
    }

    /// The state as bytes (a safetensors file).
    pub fn to_bytes(&self) -> Result<Vec<u8>> {
        self.to_file().to_bytes()
    }

    /// A state from [`Self::to_bytes`]; `src` names the bytes in errors.
    pub fn from_bytes(bytes: &[u8], src: &str) -> Result<RefineState> {
        let f = TensorFile::from_bytes(bytes, src)?;
        let kind = f.get_str("kind", src)?;
        if kind != STATE_KIND {
            return Err(Error::file(format!(
                "{src}: a {kind}, not a refinement state"
            )));
        }
        let spec = FeatureSpec::from_json(
            f.manifest
                .get("spec")
                .ok_or_else(|| Error::file(format!("{src}: manifest field 'spec' is missing")))?,
        )
        .map_err(|e| e.context(src))?;
        let d = f.get_u64("input_dim", src)? as usize;
        let prog_meta = f
            .manifest
            .get("program")
            .ok_or_else(|| Error::file(format!("{src}: manifest field 'program' is missing")))?;
        let program = Program::read(prog_meta, &f, d, src)?;
        let p = program.output_dim();
        let head = matrix(&f, "head", Some(p), src)?;
        let k = head.ncols();
        let intercept = f.f64("intercept", &[Some(k)], src)?;
        Ok(RefineState {
            spec,
            teacher: f.get_str("teacher_fingerprint", src)?,
            train: trainable(&program),
            program,
            head,
            intercept,
        })
    }

    /// A fingerprint of the program (FNV-1a over its tensors), so that statistics made
    /// for different programs are never merged.
    fn program_fingerprint(&self) -> String {
        let mut f = TensorFile::default();
        let meta = self.program.write(&mut f);
        let mut h: u64 = 0xcbf2_9ce4_8422_2325;
        let mut eat = |b: &[u8]| {
            for x in b {
                h ^= *x as u64;
                h = h.wrapping_mul(0x0100_0000_01b3);
            }
        };
        eat(meta.to_string().as_bytes());
        if let Ok(bytes) = f.to_bytes() {
            eat(&bytes);
        }
        format!("refine-fnv1a64:{h:016x}")
    }
}

/// A two-dimensional tensor of `f` (with `rows` rows when given).
fn matrix(f: &TensorFile, name: &str, rows: Option<usize>, src: &str) -> Result<Array2<f64>> {
    let (shape, v) = f.f64_shaped(name, &[rows, None], src)?;
    Array2::from_shape_vec((shape[0], shape[1]), v)
        .map_err(|_| Error::file(format!("{src}: tensor '{name}' has the wrong size")))
}

/// One gradient: a vector per program step (empty for steps that do not move), summed
/// over the rows that answered.
pub type RefineGradient = Vec<Vec<f64>>;

/// The audit rows' verdict, summed over rows: `hits / count` is the label agreement
/// (classifiers) or minus the mean squared decision error (regression).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct AuditTally {
    /// Rows whose label agrees (classifiers), or minus the summed squared error.
    pub hits: f64,
    /// Rows (classifiers) or decision values (regression) counted.
    pub count: f64,
}

impl AuditTally {
    /// The figure (NaN with nothing counted).
    pub fn figure(&self) -> f64 {
        if self.count > 0.0 {
            self.hits / self.count
        } else {
            f64::NAN
        }
    }
}

/// What the refinement driver asks of the calibration rows, however they are held; each
/// answer covers every row (a sharded source adds its shards' answers in a fixed order).
pub trait RefineSource {
    /// The head's statistics of the state's program over every row.
    fn statistics(&mut self, state: &RefineState) -> Result<ShardStats>;
    /// The gradient of the minibatch `batch` (global row indices, in batch order).
    fn gradient(&mut self, state: &RefineState, batch: &[usize]) -> Result<RefineGradient>;
    /// The audit tally of the state's program and head.
    fn audit(&mut self, state: &RefineState) -> Result<AuditTally>;
}

/// Calibration rows for a refinement (all of them, or one shard): the rows in the exact
/// model's scaled input space, the exact model's decision values on them, and the global
/// index of the first row.
#[derive(Debug, Clone)]
pub struct RefineRows<'a> {
    x: CowArray<'a, f64, Ix2>,
    y: CowArray<'a, f64, Ix2>,
    first: usize,
    task: Task,
    labels: usize,
    teacher: String,
}

impl RefineRows<'static> {
    /// The raw rows `x` (global indices `first_row …`): scaled as the exact model scales
    /// its inputs, and the exact model's decisions computed once.
    pub fn new(exact: &ExactModel, x: ArrayView2<f64>, first_row: usize) -> Result<Self> {
        crate::data::check_batch(x, exact.input_dim(), "calibration rows")?;
        first_row
            .checked_add(x.nrows())
            .ok_or_else(|| Error::input(format!("first row {first_row} is too large")))?;
        let n = x.nrows();
        let mut y = Array2::zeros((n, exact.n_outputs()));
        for c in 0..n.div_ceil(FIT_CHUNK) {
            let r = c * FIT_CHUNK..((c + 1) * FIT_CHUNK).min(n);
            let yc = exact.decision(x.slice(s![r.clone(), ..]));
            if let Some(i) = yc.iter().position(|v| !v.is_finite()) {
                return Err(Error::numerical(format!(
                    "calibration row {}: the exact model's decision value is not finite (overflow); the kernel or the data are too extreme",
                    first_row + r.start + i / yc.ncols().max(1) + 1
                )));
            }
            y.slice_mut(s![r, ..]).assign(&yc);
        }
        Ok(RefineRows {
            x: CowArray::from(exact.scale_inputs(x)),
            y: CowArray::from(y),
            first: first_row,
            task: exact.task(),
            labels: exact.labels().len(),
            teacher: exact.fingerprint(),
        })
    }

    /// Rows already scaled, with their decisions, from [`Self::to_bytes`].
    pub fn from_bytes(bytes: &[u8], src: &str) -> Result<Self> {
        let f = TensorFile::from_bytes(bytes, src)?;
        let kind = f.get_str("kind", src)?;
        if kind != ROWS_KIND {
            return Err(Error::file(format!("{src}: a {kind}, not refinement rows")));
        }
        let x = matrix(&f, "x", None, src)?;
        let y = matrix(&f, "y", Some(x.nrows()), src)?;
        let task = Task::parse(&f.get_str("task", src)?).map_err(|e| e.context(src))?;
        Ok(RefineRows {
            x: CowArray::from(x),
            y: CowArray::from(y),
            first: f.get_u64("first_row", src)? as usize,
            task,
            labels: f.get_u64("labels", src)? as usize,
            teacher: f.get_str("teacher_fingerprint", src)?,
        })
    }
}

impl<'a> RefineRows<'a> {
    /// Rows already scaled, with the teacher's decisions on them (no copy).
    pub(crate) fn borrowed(
        exact: &ExactModel,
        x: ArrayView2<'a, f64>,
        y: ArrayView2<'a, f64>,
        first: usize,
    ) -> Self {
        RefineRows {
            x: CowArray::from(x),
            y: CowArray::from(y),
            first,
            task: exact.task(),
            labels: exact.labels().len(),
            teacher: exact.fingerprint(),
        }
    }

    /// The global row range `[start, end)` held.
    pub fn range(&self) -> (usize, usize) {
        (self.first, self.first + self.x.nrows())
    }

    /// The rows as bytes (a safetensors file: the scaled rows, the decisions, the first
    /// row's index), so a shard can move between processes.
    pub fn to_bytes(&self) -> Result<Vec<u8>> {
        let mut f = TensorFile::default();
        f.put_f64(
            "x",
            self.x.shape().to_vec(),
            self.x.iter().copied().collect(),
        );
        f.put_f64(
            "y",
            self.y.shape().to_vec(),
            self.y.iter().copied().collect(),
        );
        let m = &mut f.manifest;
        m.insert("format_version".into(), json!(2));
        m.insert("kind".into(), json!(ROWS_KIND));
        m.insert("first_row".into(), json!(self.first));
        m.insert("task".into(), json!(self.task.name()));
        m.insert("labels".into(), json!(self.labels));
        m.insert("teacher_fingerprint".into(), json!(self.teacher));
        f.to_bytes()
    }

    fn check(&self, state: &RefineState) -> Result<()> {
        if state.teacher != self.teacher {
            return Err(Error::input(format!(
                "refinement rows were made with another exact model (teacher {}; the refinement's is {})",
                self.teacher, state.teacher
            )));
        }
        if state.program.input_dim() != self.x.ncols() || state.head.ncols() != self.y.ncols() {
            return Err(Error::input(
                "refinement rows do not fit the program (other input width or output count)",
            ));
        }
        Ok(())
    }

    /// The head's statistics of the state's program over these rows (fit and ridge-choice
    /// parts by global index; audit rows skipped).
    pub fn statistics(&self, state: &RefineState) -> Result<ShardStats> {
        self.check(state)?;
        let prog = &state.program;
        let mut st = ShardStats::for_program(
            &state.spec,
            state.program_fingerprint(),
            self.teacher.clone(),
            prog.output_dim(),
            self.y.ncols(),
        );
        let n = self.x.nrows();
        for c in 0..n.div_ceil(FIT_CHUNK) {
            let r = c * FIT_CHUNK..((c + 1) * FIT_CHUNK).min(n);
            let z = crate::linalg::map_row_chunks(
                self.x.slice(s![r.clone(), ..]),
                prog.output_dim(),
                |xc| prog.apply_chunk(xc),
            );
            if let Some(i) = z.iter().position(|v| !v.is_finite()) {
                return Err(Error::numerical(format!(
                    "calibration row {}: a refined feature is not finite; try a smaller refinement rate",
                    self.first + r.start + i / z.ncols().max(1) + 1
                )));
            }
            st.add_features(self.first + r.start, z.view(), self.y.slice(s![r, ..]))?;
        }
        Ok(st)
    }

    /// The gradient of the squared decision error, `2 / (|batch|·k) · Σ‖f(x) − y‖²` summed
    /// over the rows of `batch` (global indices) that these rows hold, with respect to the
    /// parameters of the steps that move (the head held fixed).
    pub fn gradient(&self, state: &RefineState, batch: &[usize]) -> Result<RefineGradient> {
        self.check(state)?;
        let (a, b) = self.range();
        let mine: Vec<usize> = batch
            .iter()
            .filter(|&&i| (a..b).contains(&i))
            .map(|&i| i - a)
            .collect();
        if let Some(i) = mine.iter().find(|&&i| row_part(a + i) != Part::Fit) {
            return Err(Error::input(format!(
                "refinement batch holds row {} which is not a head-fitting row",
                a + i + 1
            )));
        }
        let prog = &state.program;
        let mut g: RefineGradient = prog
            .instrs()
            .iter()
            .zip(&state.train)
            .map(|(ins, t)| {
                if *t {
                    vec![0.0; ins.step.params().len()]
                } else {
                    Vec::new()
                }
            })
            .collect();
        if mine.is_empty() {
            return Ok(g);
        }
        let xb = self.x.select(Axis(0), &mine);
        let yb = self.y.select(Axis(0), &mine);
        let k = self.y.ncols();
        let scale = 2.0 / (batch.len() * k) as f64;
        let (head, icpt) = (&state.head, &state.intercept);
        let pieces: Vec<Vec<Vec<f64>>> = (0..mine.len().div_ceil(PIECE))
            .into_par_iter()
            .map(|c| {
                let r = c * PIECE..((c + 1) * PIECE).min(mine.len());
                let vals = prog.forward_all(xb.slice(s![r.clone(), ..]));
                let z = vals.last().expect("output");
                let mut res = crate::linalg::ab_seq(z.view(), head.view());
                for (mut row, yr) in res
                    .rows_mut()
                    .into_iter()
                    .zip(yb.slice(s![r.clone(), ..]).rows())
                {
                    for ((v, c0), yv) in row.iter_mut().zip(icpt).zip(yr) {
                        *v = (*v + c0 - yv) * scale;
                    }
                }
                let gz = crate::linalg::abt_seq(res.view(), head.view());
                prog.backward(&vals, gz.view(), &state.train, false).0
            })
            .collect();
        for pc in &pieces {
            for (gi, pi) in g.iter_mut().zip(pc) {
                gi.iter_mut().zip(pi).for_each(|(a, v)| *a += v);
            }
        }
        Ok(g)
    }

    /// The audit tally of the state's program and head over these rows' audit rows.
    pub fn audit(&self, state: &RefineState) -> Result<AuditTally> {
        self.check(state)?;
        let idx: Vec<usize> = (0..self.x.nrows())
            .filter(|&i| audit_row(self.first + i))
            .collect();
        if idx.is_empty() {
            return Ok(AuditTally::default());
        }
        let xa = self.x.select(Axis(0), &idx);
        let ya = self.y.select(Axis(0), &idx);
        let z = state.program.apply_chunk(xa.view());
        let mut d: Array2<f64> = crate::linalg::ab_seq(z.view(), state.head.view());
        for mut r in d.rows_mut() {
            r.iter_mut()
                .zip(&state.intercept)
                .for_each(|(v, c)| *v += c);
        }
        Ok(if self.task.is_classifier() {
            let a = crate::model::label_indices(self.task, self.labels, d.view());
            let b = crate::model::label_indices(self.task, self.labels, ya.view());
            AuditTally {
                hits: a.iter().zip(&b).filter(|(u, v)| u == v).count() as f64,
                count: a.len() as f64,
            }
        } else {
            AuditTally {
                hits: -(&d - &ya).mapv(|v| v * v).sum(),
                count: d.len() as f64,
            }
        })
    }
}

/// Adds gradients of disjoint rows, in the order given.
pub fn add_gradients(parts: &[RefineGradient]) -> Result<RefineGradient> {
    let mut it = parts.iter();
    let mut acc = it
        .next()
        .cloned()
        .ok_or_else(|| Error::input("no gradients to add"))?;
    for g in it {
        if g.len() != acc.len() || g.iter().zip(&acc).any(|(a, b)| a.len() != b.len()) {
            return Err(Error::input(
                "gradients of different programs cannot be added",
            ));
        }
        for (a, b) in acc.iter_mut().zip(g) {
            a.iter_mut().zip(b).for_each(|(u, v)| *u += v);
        }
    }
    Ok(acc)
}

/// Rows held as several shards in this process: each request is answered shard by shard
/// and the answers added in shard order.
impl RefineSource for Vec<RefineRows<'_>> {
    fn statistics(&mut self, state: &RefineState) -> Result<ShardStats> {
        let mut it = self.iter();
        let mut acc = it
            .next()
            .ok_or_else(|| Error::input("no calibration rows to refine on"))?
            .statistics(state)?;
        for r in it {
            acc.merge(&r.statistics(state)?)?;
        }
        Ok(acc)
    }
    fn gradient(&mut self, state: &RefineState, batch: &[usize]) -> Result<RefineGradient> {
        let parts = self
            .iter()
            .map(|r| r.gradient(state, batch))
            .collect::<Result<Vec<_>>>()?;
        add_gradients(&parts)
    }
    fn audit(&mut self, state: &RefineState) -> Result<AuditTally> {
        let mut t = AuditTally::default();
        for r in self.iter() {
            let a = r.audit(state)?;
            t.hits += a.hits;
            t.count += a.count;
        }
        Ok(t)
    }
}
