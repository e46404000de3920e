//! Models and model files.
//!
//! - [`output`]: the output rule shared by every model (task, class labels, label rule);
//! - [`ExactModel`]: the kernel expansion over support vectors;
//! - [`CompiledModel`]: input scaling → feature program → linear head → the teacher's rule.
//!
//! Every model is one safetensors file (the container is [`crate::format`]); the README's
//! "Model files" section documents the layout of format version 2, which this build writes.
//! Version-1 files (written before programs existed) still load and score the same.
//!
//! ```
//! use kernelpress::model::{ExactModel, Task};
//! use ndarray::array;
//! let m = ExactModel::new(
//!     "linear()".parse().unwrap(),
//!     array![[1.0, 0.0], [0.0, 1.0]],
//!     array![[2.0], [-1.0]],
//!     vec![0.5],
//!     Task::Binary,
//!     vec!["ok".into(), "worn".into()],
//!     None,
//! ).unwrap();
//! let s = m.decision(array![[1.0, 1.0]].view());
//! assert_eq!(s[[0, 0]], 1.5);
//! assert_eq!(m.labels_of(s.view())[0], "worn");
//! ```

mod compiled;
mod exact;
pub mod guarded;
mod io;
pub mod output;
mod parts;
mod probability;
mod v1;

pub use crate::format::{TensorFile, FORMAT_VERSION, MANIFEST_KEY, MAX_FILE_BYTES};
pub use compiled::CompiledModel;
pub use exact::ExactModel;
pub use guarded::{GuardRule, GuardTarget, GuardedModel};
pub use output::{label_indices, OutputRule, Task};
pub use probability::{couple, platt_fit, sigmoid, Probabilities};

/// The `generator` string model files record: `kernelpress <version>`.
pub fn generator_name() -> String {
    io::generator()
}

use crate::{Error, Result};
use ndarray::{Array2, ArrayView2};
use std::path::Path;

/// Any model file kernelpress reads.
#[derive(Debug, Clone)]
#[allow(clippy::large_enum_variant)] // one value per command; boxing buys nothing
pub enum AnyModel {
    /// An exact kernel model.
    Exact(ExactModel),
    /// A compiled model.
    Compiled(CompiledModel),
    /// A compiled model guarded by its exact model.
    Guarded(GuardedModel),
}

impl AnyModel {
    /// Reads a model file of any kind.
    pub fn load(path: &Path) -> Result<(AnyModel, TensorFile)> {
        let f = TensorFile::read(path)?;
        let src = path.display().to_string();
        Ok((Self::from_file(&f, &src)?, f))
    }

    /// A model of any kind from a parsed file (`src` names it in errors).
    pub fn from_file(f: &TensorFile, src: &str) -> Result<AnyModel> {
        let kind = f.get_str("kind", src)?;
        match kind.as_str() {
            "exact" => Ok(AnyModel::Exact(ExactModel::from_file(f, src)?)),
            "compiled" => Ok(AnyModel::Compiled(CompiledModel::from_file(f, src)?)),
            "guarded" => Ok(AnyModel::Guarded(GuardedModel::from_file(f, src)?)),
            "statistics" => Err(Error::input(format!(
                "{src}: distillation statistics (compile --stats-out), not a model; fit a model from them with `compile MODEL --from-stats {src} …`"
            ))),
            other => Err(Error::file(format!(
                "{src}: model kind '{other}' unknown; expected exact, compiled or guarded"
            ))),
        }
    }

    /// Input dimension.
    pub fn input_dim(&self) -> usize {
        match self {
            AnyModel::Exact(m) => m.input_dim(),
            AnyModel::Compiled(m) => m.input_dim(),
            AnyModel::Guarded(m) => m.exact().input_dim(),
        }
    }

    /// Decision values for a batch.
    pub fn decision(&self, x: ArrayView2<f64>) -> Array2<f64> {
        match self {
            AnyModel::Exact(m) => m.decision(x),
            AnyModel::Compiled(m) => m.decision(x),
            AnyModel::Guarded(m) => m.decision(x).0,
        }
    }

    /// Labels of decision values.
    pub fn labels_of(&self, s: ArrayView2<f64>) -> Vec<String> {
        match self {
            AnyModel::Exact(m) => m.labels_of(s),
            AnyModel::Compiled(m) => m.labels_of(s),
            AnyModel::Guarded(m) => m.labels_of(s),
        }
    }

    /// Decision values and, for a guarded model, the stage that answered each row
    /// ([`guarded::STAGES`]).
    pub fn decision_with_stage(&self, x: ArrayView2<f64>) -> (Array2<f64>, Option<Vec<u8>>) {
        match self {
            AnyModel::Guarded(m) => {
                let (s, st) = m.decision(x);
                (s, Some(st))
            }
            m => (m.decision(x), None),
        }
    }

    /// The precision of the head's products on the f32 paths (a guarded model's compiled
    /// stage's; `None` for an exact model, which has no head).
    pub fn head_precision(&self) -> Option<crate::linalg::HeadPrecision> {
        match self {
            AnyModel::Exact(_) => None,
            AnyModel::Compiled(m) => Some(m.head_precision()),
            AnyModel::Guarded(m) => Some(m.compact().head_precision()),
        }
    }

    /// Sets the precision of the head's products on the f32 paths of a compiled model or
    /// of a guarded model's compiled stage; an exact model has no head, so it is refused.
    pub fn set_head_precision(
        &mut self,
        precision: crate::linalg::HeadPrecision,
    ) -> crate::Result<()> {
        match self {
            AnyModel::Exact(_) => Err(crate::Error::input(
                "an exact model has no head to score at another precision",
            )),
            AnyModel::Compiled(m) => {
                m.set_head_precision(precision);
                Ok(())
            }
            AnyModel::Guarded(m) => {
                m.set_head_precision(precision);
                Ok(())
            }
        }
    }

    /// Decision values computed in f32 ([`ExactModel::decision_f32`],
    /// [`CompiledModel::decision_f32`], [`GuardedModel::decision_f32`], which compares its
    /// threshold with f32 decisions as the exports do) and, for a guarded model, the stage
    /// of each row.
    pub fn decision_f32_with_stage(&self, x: ArrayView2<f64>) -> (Array2<f64>, Option<Vec<u8>>) {
        match self {
            AnyModel::Exact(m) => (m.decision_f32(x), None),
            AnyModel::Compiled(m) => (m.decision_f32(x), None),
            AnyModel::Guarded(m) => {
                let (s, st) = m.decision_f32(x);
                (s, Some(st))
            }
        }
    }

    /// Task.
    pub fn task(&self) -> Task {
        match self {
            AnyModel::Exact(m) => m.task(),
            AnyModel::Compiled(m) => m.task(),
            AnyModel::Guarded(m) => m.exact().task(),
        }
    }

    /// The model's input column names.
    pub fn feature_names(&self) -> &[String] {
        match self {
            AnyModel::Exact(m) => &m.feature_names,
            AnyModel::Compiled(m) => &m.feature_names,
            AnyModel::Guarded(m) => &m.exact().feature_names,
        }
    }

    /// The probability calibration the file carries, with what it was fitted on (a
    /// guarded model: its compiled stage's, applied to the guarded decisions).
    pub fn probabilities(&self) -> Option<&(Probabilities, String)> {
        match self {
            AnyModel::Exact(m) => m.probabilities.as_ref(),
            AnyModel::Compiled(m) => m.probabilities.as_ref(),
            AnyModel::Guarded(m) => m.compact().probabilities.as_ref(),
        }
    }

    /// The output rule.
    pub fn rule(&self) -> &OutputRule {
        match self {
            AnyModel::Exact(m) => m.rule(),
            AnyModel::Compiled(m) => m.rule(),
            AnyModel::Guarded(m) => m.rule(),
        }
    }
}
