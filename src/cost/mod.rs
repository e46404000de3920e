//! Predicting what a model costs on this machine before it is built.
//!
//! Every program step states its analytic cost per row ([`crate::program::Cost`]: flops,
//! transcendental calls, parameter and activation bytes). A [`MachineProfile`] holds a short
//! calibration of this machine (memory bandwidth at several working-set sizes, the cache
//! sizes the system reports, the time per flop and per transcendental call of each step kind
//! measured on small programs, the fixed cost of a call and of a step, the matrix-product
//! rate). [`predict`] combines the two into a single-row latency and a batched throughput,
//! for any candidate, without distilling it.
//!
//! The model per step is the roofline rule of thumb (common practice): a step takes the
//! longer of its arithmetic time and the time to stream its parameters at the bandwidth of
//! the smallest measured working set that holds the whole model, plus a fixed cost.
//!
//! ```
//! use kernelpress::cost::{predict, CostLine, MachineProfile};
//! use kernelpress::program::Cost;
//! let m = MachineProfile::nominal();
//! let small = [CostLine::new("dense", Cost { flops: 2 * 64 * 8, param_bytes: 8 * 64 * 8,
//!     ..Cost::default() })];
//! let big = [CostLine::new("dense", Cost { flops: 2 * 4096 * 784, param_bytes: 8 * 4096 * 784,
//!     ..Cost::default() })];
//! assert!(predict(&m, &small).latency_us < predict(&m, &big).latency_us);
//! ```

mod machine;
mod predict;

pub use machine::{MachineProfile, Rate, PROFILE_VERSION};
pub use predict::{
    compiled_lines, exact_lines, predict, predict_compiled, predict_exact, program_lines, CostLine,
    Prediction,
};
