//! # kernelpress
//!
//! Compile kernel machines (kernel SVMs, kernel ridge regressors) into compact
//! random-feature models, measure how far they are from the exact model, and export them.
//!
//! The data flow is one line: kernel → sampler → feature map → head fit → compiled
//! model → export, with the error report beside it. Each stage is its own module:
//!
//! - [`kernel`]: expression syntax, exact evaluation, Gram blocks;
//! - [`data`]: CSV and `.npy` readers and writers, input scaling;
//! - [`format`](mod@format): the file container (safetensors + JSON manifest), a leaf;
//! - [`program`]: feature programs, the primitive steps a compiled model runs;
//! - [`features`]: feature-map specs and one sampler per method (spec → program);
//! - [`model`]: output rules, exact and compiled models and their files;
//! - [`exact`]: exact teachers (kernel ridge, C-SVM by SMO);
//! - [`fit`]: head fits (projection, streamed distillation, labels);
//! - [`report`]: agreement, errors, sizes and measured latency;
//! - [`export`]: ONNX, C, Rust and plain weights; ONNX SVMs in;
//! - [`observe`]: progress and notes reported to the caller (the library never prints);
//! - [`simd`]: the one CPU-feature detection; [`linalg`], [`transform`]: numerics.
//!
//! ## Conventions
//! - Inputs are rows; a batch is an `n × d` array of `f64`.
//! - A binary model's decision value is positive for the *second* class label.
//! - One-vs-one models have one decision value per class pair `(i, j)`, `i < j`, in the
//!   order (0,1), (0,2), …, (1,2), …; a positive value votes for `i`, ties go to the lowest
//!   class index.
//! - Everything is deterministic: the same inputs and seed give bit-identical outputs,
//!   whatever the number of threads.
#![warn(missing_docs)]
// `!(v > 0.0)` is the deliberate idiom that also rejects NaN (as rand_distr does).
#![allow(clippy::neg_cmp_op_on_partial_ord)]

pub mod choose;
pub mod cost;
pub mod data;
mod error;
pub mod exact;
pub mod export;
pub mod features;
pub mod fit;
pub mod format;
mod fsio;
pub mod kernel;
pub mod limits;
pub mod linalg;
pub mod model;
pub mod observe;
pub mod program;
pub mod report;
pub mod simd;
pub mod transform;

pub use error::{Error, ErrorKind, Result};
