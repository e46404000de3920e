//! The manifest sections every model kind shares, written and read once: `input` (width,
//! feature names, scaling with its tensors `input.mean` / `input.scale`) and `output`
//! (task, labels, number of decision values).

use super::{OutputRule, Task};
use crate::data::Standardizer;
use crate::format::TensorFile;
use crate::{Error, Result};
use serde_json::{json, Value};

/// Largest input width a model file may declare (checked before anything is allocated).
pub(crate) const MAX_INPUT_DIM: usize = 1 << 24;

/// `kernelpress <version>`.
pub(crate) fn generator() -> String {
    format!("kernelpress {}", env!("CARGO_PKG_VERSION"))
}

/// Checks an input scaling: `d` entries, finite means, positive finite scales.
pub(crate) fn check_scaling(s: Option<&Standardizer>, d: usize) -> Result<()> {
    let Some(s) = s else { return Ok(()) };
    if s.mean.len() != d || s.scale.len() != d {
        return Err(Error::input(format!(
            "input scaling has {} means and {} scales; expected {d} of each",
            s.mean.len(),
            s.scale.len()
        )));
    }
    if let Some(j) = s.mean.iter().position(|v| !v.is_finite()) {
        return Err(Error::input(format!("input mean {j} is not finite")));
    }
    if let Some(j) = s.scale.iter().position(|v| !(*v > 0.0 && v.is_finite())) {
        return Err(Error::input(format!(
            "input scale {j} is {}; expected a positive finite number",
            s.scale[j]
        )));
    }
    Ok(())
}

/// Writes the scaling tensors and returns the `input` section.
pub(crate) fn write_input(
    f: &mut TensorFile,
    d: usize,
    names: &[String],
    scaling: Option<&Standardizer>,
) -> Value {
    if let Some(s) = scaling {
        f.put_f64("input.mean", vec![d], s.mean.clone());
        f.put_f64("input.scale", vec![d], s.scale.clone());
    }
    json!({
        "dim": d,
        "names": names,
        "scaling": if scaling.is_some() { "standardize" } else { "none" },
    })
}

/// Reads the `input` section: (width, feature names, scaling), cross-checked with the
/// tensors (scaling tensors present exactly when the section says so).
pub(crate) fn read_input(
    f: &TensorFile,
    src: &str,
) -> Result<(usize, Vec<String>, Option<Standardizer>)> {
    let bad = |m: String| Error::file(format!("{src}: manifest 'input': {m}"));
    let sec = f
        .manifest
        .get("input")
        .and_then(|v| v.as_object())
        .ok_or_else(|| bad("missing or not an object".into()))?;
    let d = sec
        .get("dim")
        .and_then(|v| v.as_u64())
        .and_then(|v| usize::try_from(v).ok())
        .filter(|v| (1..=MAX_INPUT_DIM).contains(v))
        .ok_or_else(|| {
            bad(format!(
                "'dim' must be a whole number from 1 to {MAX_INPUT_DIM}"
            ))
        })?;
    let names: Vec<String> = match sec.get("names") {
        Some(Value::Array(v)) => v
            .iter()
            .map(|s| s.as_str().map(String::from))
            .collect::<Option<_>>()
            .ok_or_else(|| bad("'names' must be strings".into()))?,
        _ => return Err(bad("'names' missing".into())),
    };
    if names.len() != d {
        return Err(bad(format!("{} names for {d} inputs", names.len())));
    }
    let has = f.tensors.contains_key("input.mean") || f.tensors.contains_key("input.scale");
    let scaling = match sec.get("scaling").and_then(|v| v.as_str()) {
        Some("none") if has => {
            return Err(bad(
                "scaling 'none' but the file stores input.mean/input.scale".into(),
            ))
        }
        Some("none") => None,
        Some("standardize") => {
            let mean = f.f64("input.mean", &[Some(d)], src)?;
            let scale = f.f64("input.scale", &[Some(d)], src)?;
            Some(Standardizer { mean, scale })
        }
        other => {
            return Err(bad(format!(
                "scaling {other:?} unknown; expected \"none\" or \"standardize\""
            )))
        }
    };
    check_scaling(scaling.as_ref(), d).map_err(|e| bad(e.message().to_string()))?;
    Ok((d, names, scaling))
}

/// The `output` section.
pub(crate) fn write_output(rule: &OutputRule) -> Value {
    json!({
        "task": rule.task().name(),
        "labels": rule.labels(),
        "outputs": rule.outputs(),
    })
}

/// Reads and checks the `output` section.
pub(crate) fn read_output(f: &TensorFile, src: &str) -> Result<OutputRule> {
    let bad = |m: String| Error::file(format!("{src}: manifest 'output': {m}"));
    let sec = f
        .manifest
        .get("output")
        .and_then(|v| v.as_object())
        .ok_or_else(|| bad("missing or not an object".into()))?;
    let task = Task::parse(sec.get("task").and_then(|v| v.as_str()).unwrap_or("?"))
        .map_err(|e| bad(e.message().to_string()))?;
    let labels: Vec<String> = match sec.get("labels") {
        Some(Value::Array(v)) => v
            .iter()
            .map(|s| s.as_str().map(String::from))
            .collect::<Option<_>>()
            .ok_or_else(|| bad("'labels' must be strings".into()))?,
        _ => return Err(bad("'labels' missing".into())),
    };
    let k = sec
        .get("outputs")
        .and_then(|v| v.as_u64())
        .and_then(|v| usize::try_from(v).ok())
        .filter(|v| (1..=1 << 20).contains(v))
        .ok_or_else(|| bad("'outputs' must be a whole number from 1 to 1048576".into()))?;
    OutputRule::new(task, labels, k).map_err(|e| bad(e.message().to_string()))
}

/// Writes a model's probability calibration, if any: tensors `output.platt_a` and
/// `output.platt_b` (one value per decision output) and the manifest section
/// `probabilities` (`{"method": "platt", "fitted_on": …}`) returned for the caller to store.
pub(crate) fn write_probabilities(
    f: &mut TensorFile,
    p: Option<&(super::Probabilities, String)>,
) -> Option<Value> {
    let (p, on) = p?;
    f.put_f64("output.platt_a", vec![p.a().len()], p.a().to_vec());
    f.put_f64("output.platt_b", vec![p.b().len()], p.b().to_vec());
    Some(json!({"method": "platt", "fitted_on": on}))
}

/// Reads the probability calibration written by [`write_probabilities`], if the file has
/// one.
pub(crate) fn read_probabilities(
    f: &TensorFile,
    rule: &OutputRule,
    src: &str,
) -> Result<Option<(super::Probabilities, String)>> {
    let Some(sec) = f.manifest.get("probabilities") else {
        return Ok(None);
    };
    let bad = |m: String| Error::file(format!("{src}: manifest 'probabilities': {m}"));
    if sec.get("method").and_then(|v| v.as_str()) != Some("platt") {
        return Err(bad("'method' must be \"platt\"".into()));
    }
    let on = sec
        .get("fitted_on")
        .and_then(|v| v.as_str())
        .unwrap_or("")
        .to_string();
    let k = rule.outputs();
    let a = f.f64("output.platt_a", &[Some(k)], src)?;
    let b = f.f64("output.platt_b", &[Some(k)], src)?;
    let p = super::Probabilities::new(rule, a, b).map_err(|e| bad(e.message().to_string()))?;
    Ok(Some((p, on)))
}
