//! Guarding a compiled model on its calibration rows: the threshold is chosen on the audit
//! rows (every tenth calibration row, never fitted on), for an agreement target or a
//! fallback rate, under one rule or the cheaper of the rules that apply
//! ([`crate::model::guarded::choose_guard_auto`]). The command line's `compile
//! --guard-agreement` and the Python package's `guard` both call [`guard_on_audit_rows`].
//!
//! ```
//! use kernelpress::features::{FeatureSpec, Method};
//! use kernelpress::fit::{compile_exact, guard_on_audit_rows, HeadKind, RidgeGrid};
//! use kernelpress::model::guarded::GuardTarget;
//! use kernelpress::model::{ExactModel, Task};
//! use ndarray::Array2;
//! let sv = Array2::from_shape_fn((30, 2), |(i, j)| ((i * 2 + j) as f64 * 0.7).sin());
//! let coef = Array2::from_shape_fn((30, 1), |(i, _)| if i % 2 == 0 { 1.0 } else { -1.0 });
//! let exact = ExactModel::new("gaussian(gamma=1)".parse().unwrap(), sv, coef, vec![0.0],
//!     Task::Binary, vec!["a".into(), "b".into()], None).unwrap();
//! let x = Array2::from_shape_fn((600, 2), |(i, j)| ((i * 2 + j) as f64 * 0.31).cos());
//! let spec = FeatureSpec::new(exact.kernel().clone(), Method::Fourier, 2, 16, 1);
//! let (m, _) = compile_exact(&exact, Some(x.view()), &spec, HeadKind::Distill,
//!     &RidgeGrid::standard(), None, &kernelpress::observe::Silent).unwrap();
//! let g = guard_on_audit_rows(m, &exact, x.view(), GuardTarget::Rate(0.2), None).unwrap();
//! assert!(g.guard["fallback_share"].as_f64().unwrap() <= 0.2);
//! ```

use super::compile::audit_rows;
use crate::model::guarded::{choose_guard, choose_guard_auto, GuardRule, GuardTarget};
use crate::model::{CompiledModel, ExactModel, GuardedModel};
use crate::{Error, ErrorKind, Result};
use ndarray::ArrayView2;
use serde_json::json;

/// Guards `compact` by `exact` with the threshold chosen on the audit rows of `calib` for
/// `target`, under `rule` (`None`: the cheaper rule that meets it). The guard's `guard`
/// section records where and how it was chosen. A target no guard meets, even sending
/// every row to the exact model (possible with few rows), is a [`ErrorKind::Budget`] error.
pub fn guard_on_audit_rows(
    compact: CompiledModel,
    exact: &ExactModel,
    calib: ArrayView2<f64>,
    target: GuardTarget,
    rule: Option<GuardRule>,
) -> Result<GuardedModel> {
    let target = target.checked()?;
    if !exact.task().is_classifier() {
        return Err(Error::input(
            "a guard needs a classifier: regression models have no margin to judge confidence by",
        ));
    }
    let (xa, idx) = audit_rows(calib);
    let sc = compact.decision(xa.view());
    let se = exact.decision(xa.view());
    let choice = match rule {
        Some(r) => choose_guard(exact, r, sc.view(), se.view(), target),
        None => choose_guard_auto(exact, sc.view(), se.view(), target),
    };
    let choice = choice.ok_or_else(|| {
        let p = match target {
            GuardTarget::Agreement(p) => p,
            GuardTarget::Rate(_) => 1.0,
        };
        Error::new(
            ErrorKind::Budget,
            format!(
                "no guard reaches agreement {p} with 95% confidence on the {} audit rows, even sending every row to the exact model; give more calibration rows or a lower target",
                idx.len()
            ),
        )
    })?;
    let mut g = GuardedModel::with_rule(compact, exact.clone(), choice.threshold, choice.rule)?;
    g.guard = json!({
        "chosen_on": format!("calibration audit rows ({} rows, never fitted on)", idx.len()),
        "target_agreement": match target {
            GuardTarget::Agreement(p) => Some(p),
            GuardTarget::Rate(_) => None,
        },
        "fallback_share": choice.fallback_share,
        "work_share": choice.work_share,
    });
    Ok(g)
}
