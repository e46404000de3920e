//! Rust export: one dependency-free module with no `unsafe`, which builds with
//! `-D warnings` whichever of its items the caller uses, and exposes the constants
//! `INPUT_NAMES` (the input columns in order), `LABEL_NAMES`, `METHOD`, `FEATURES`,
//! `EXACT_FINGERPRINT`, `INPUTS_SCALED_INSIDE` and `MODEL_INFO` (the whole description as
//! `key: value` lines), and `pub fn input_dim() -> usize`, `pub fn output_dim() -> usize`,
//! `pub fn decision(x: &[f32], out: &mut [f32])` (same order and sign as `score`, input
//! scaling applied inside), `pub fn label_index(x: &[f32]) -> usize` and
//! `pub fn label_name(index: usize) -> Option<&'static str>`. A guarded model adds
//! `pub fn decision_stage(x: &[f32], out: &mut [f32]) -> u8` (0 the compiled stage, 1 the
//! exact model, 2 some pairs exact); its exact expansion runs only for the rows the guard
//! sends to it. Computation is in f32; every buffer is a local array.

use super::code::{self, Lang};
use super::meta::ArtefactInfo;
use super::precision::Quantized;
use crate::fsio::write_atomic;
use crate::model::guarded::GuardRule;
use crate::model::{CompiledModel, GuardedModel, Task};
use crate::Result;
use std::fmt::Write;
use std::path::{Path, PathBuf};

/// The label rule of decisions `s` (`k` of them), leaving the index in `best`.
fn label_rule(task: Task, k: usize, nl: usize) -> String {
    match task {
        Task::Regression => "    let best = 0usize;".into(),
        Task::Binary => "    let best = usize::from(s[0] > 0.0);".into(),
        Task::Ovr => format!(
            "    let mut best = 0;\n    for j in 1..{k} {{\n        if s[j] > s[best] {{\n            best = j;\n        }}\n    }}"
        ),
        Task::Ovo => format!(
            "    let mut votes = [0usize; {nl}];\n    let mut p = 0;\n    for i in 0..{nl} {{\n        for j in i + 1..{nl} {{\n            votes[if s[p] > 0.0 {{ i }} else {{ j }}] += 1;\n            p += 1;\n        }}\n    }}\n    let mut best = 0;\n    for i in 1..{nl} {{\n        if votes[i] > votes[best] {{\n            best = i;\n        }}\n    }}"
        ),
    }
}

/// The guard's plan for compiled decisions `s` (see the C export's `plan_fn`).
fn plan_fn(g: &GuardedModel, k: usize) -> String {
    let nl = g.exact().labels().len();
    let t = code::threshold_lit(g.threshold(), Lang::Rust);
    let mut f = format!(
        "#[allow(unused_parens, clippy::needless_range_loop)]\nfn plan(s: &[f32], need: &mut [bool; {k}]) -> u8 {{\n"
    );
    match g.guard_rule() {
        GuardRule::Row => {
            f.push_str(&label_rule(g.exact().task(), k, nl));
            f.push('\n');
            match g.exact().task() {
                Task::Binary => f.push_str("    let _ = best;\n    let conf = s[0].abs();\n"),
                Task::Ovr => {
                    let _ = write!(
                        f,
                        "    let mut other = f32::NEG_INFINITY;\n    for j in 0..{k} {{\n        if j != best && s[j] > other {{\n            other = s[j];\n        }}\n    }}\n    let conf = s[best] - other;\n"
                    );
                }
                Task::Ovo => {
                    let _ = write!(
                        f,
                        "    let mut conf = f32::INFINITY;\n    p = 0;\n    for i in 0..{nl} {{\n        for j in i + 1..{nl} {{\n            if i == best {{\n                conf = conf.min(s[p]);\n            }}\n            if j == best {{\n                conf = conf.min(-s[p]);\n            }}\n            p += 1;\n        }}\n    }}\n"
                    );
                }
                Task::Regression => unreachable!("guards need classifiers"),
            }
            let _ = write!(
                f,
                "    let all = conf < {t};\n    *need = [all; {k}];\n    u8::from(all)\n}}\n"
            );
        }
        GuardRule::Pairs => {
            let _ = write!(
                f,
                "    let (mut votes, mut gain, mut loss) = ([0usize; {nl}], [0usize; {nl}], [0usize; {nl}]);\n    let mut p = 0;\n    for i in 0..{nl} {{\n        for j in i + 1..{nl} {{\n            let (w, l) = if s[p] > 0.0 {{ (i, j) }} else {{ (j, i) }};\n            votes[w] += 1;\n            if s[p].abs() < {t} {{\n                loss[w] += 1;\n                gain[l] += 1;\n            }}\n            p += 1;\n        }}\n    }}\n    let mut best = 0;\n    for c in 1..{nl} {{\n        if votes[c] > votes[best] {{\n            best = c;\n        }}\n    }}\n    let floor = votes[best] - loss[best];\n    let mut contender = [false; {nl}];\n    for c in 0..{nl} {{\n        contender[c] = c == best || votes[c] + gain[c] >= floor;\n    }}\n    let (mut any, mut all) = (false, true);\n    p = 0;\n    for i in 0..{nl} {{\n        for j in i + 1..{nl} {{\n            need[p] = s[p].abs() < {t} && (contender[i] || contender[j]);\n            any |= need[p];\n            all &= need[p];\n            p += 1;\n        }}\n    }}\n    if !any {{\n        0\n    }} else if all {{\n        1\n    }} else {{\n        2\n    }}\n}}\n"
            );
        }
    }
    f
}

fn rust_list(v: &[String]) -> String {
    v.iter()
        .map(|l| format!("{l:?}"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// Writes the module to `out`; with `guard`, the model is that guarded model (whose
/// compiled stage is `model`).
pub fn write(
    model: &CompiledModel,
    guard: Option<&GuardedModel>,
    q: &Quantized,
    out: &Path,
) -> Result<(Vec<PathBuf>, Vec<String>)> {
    let mut code = code::scorer(model, q)?;
    let mut lines = std::mem::take(&mut code.lines);
    let exact = guard.map(|g| code::exact_part(&mut code, g.exact()));
    let (d, k) = (model.input_dim(), model.n_outputs());
    let info = ArtefactInfo::of(model, guard);
    let mut s = String::new();
    let what = if guard.is_some() {
        "guarded model (compiled stage with exact fallback)"
    } else {
        "compiled model"
    };
    let _ = writeln!(
        s,
        "//! Generated by kernelpress {}: {what}, {} features ({}) of {}.\n//! Dependency-free, no `unsafe`; computation in f32.\n//!",
        env!("CARGO_PKG_VERSION"),
        model.features(),
        model.spec().method.name(),
        model.spec().kernel
    );
    for (key, val) in info.pairs() {
        let _ = writeln!(s, "//! - {key}: {}", val.replace(['\n', '\r'], " "));
    }
    s.push_str("\n#![allow(dead_code)]\n#![allow(clippy::all)]\n#![allow(clippy::excessive_precision)]\n\n");
    if code::uses_f16(&code.arrays) {
        s.push_str(
            "fn h2f(h: u16) -> f32 {\n    let (e, m) = (((h >> 10) & 31) as i32, (h & 1023) as f32);\n    let v = if e == 0 {\n        m * 2f32.powi(-24)\n    } else if e == 31 {\n        if m == 0.0 { f32::INFINITY } else { f32::NAN }\n    } else {\n        (m + 1024.0) * 2f32.powi(e - 25)\n    };\n    if h >> 15 == 1 { -v } else { v }\n}\n\n",
        );
    }
    s.push_str(&code::declare(&code.arrays, Lang::Rust));
    let _ = writeln!(
        s,
        "\n/// The input columns, in the order `decision` reads them.\npub const INPUT_NAMES: [&str; {d}] = [{}];\n",
        rust_list(&info.columns)
    );
    let _ = writeln!(
        s,
        "/// The class names by label index (empty for regression models).\npub const LABEL_NAMES: [&str; {}] = [{}];\n",
        info.labels.len(),
        rust_list(&info.labels)
    );
    let _ = writeln!(
        s,
        "/// The feature method of the compiled stage.\npub const METHOD: &str = {:?};\n\n/// The number of features of the compiled stage.\npub const FEATURES: usize = {};\n\n/// Fingerprint of the exact model this one stands for (empty when unknown).\npub const EXACT_FINGERPRINT: &str = {:?};\n\n/// True when `decision` standardises its inputs itself (pass raw values).\npub const INPUTS_SCALED_INSIDE: bool = {};\n\n/// The whole description, as `key: value` lines.\npub const MODEL_INFO: &str = {:?};\n",
        info.method,
        info.features,
        info.exact_fingerprint.clone().unwrap_or_default(),
        info.scaled_inside,
        info.text()
    );
    let _ = writeln!(
        s,
        "/// Number of inputs (raw, unscaled) of one row.\npub fn input_dim() -> usize {{\n    {d}\n}}\n"
    );
    let _ = writeln!(
        s,
        "/// Number of decision values.\npub fn output_dim() -> usize {{\n    {k}\n}}\n"
    );
    let doc = format!(
        "/// Decision values of the row `x` (length {d}) into `out` (length {k}), in the order and\n/// sign of `kernelpress score`.\n///\n/// # Panics\n/// If the slices are shorter.\n"
    );
    let compact = if guard.is_some() {
        "fn compact(x: &[f32], out: &mut [f32]) {".to_string()
    } else {
        format!("{doc}#[allow(unused_parens, clippy::needless_range_loop)]\npub fn decision(x: &[f32], out: &mut [f32]) {{")
    };
    if guard.is_some() {
        s.push_str("#[allow(unused_parens, clippy::needless_range_loop)]\n");
    }
    let _ = writeln!(
        s,
        "{compact}\n    assert!(x.len() >= {d} && out.len() >= {k}, \"decision: slices too short\");"
    );
    code::stmts(&code.body, Lang::Rust, &code.arrays, 1, &mut s);
    let _ = writeln!(s, "}}\n");
    if let (Some(g), Some(e)) = (guard, &exact) {
        let _ = writeln!(
            s,
            "/// The exact expansion of the outputs marked in `need`, from the support vectors of\n/// the groups that feed them.\n#[allow(unused_parens, clippy::needless_range_loop)]\nfn exact_some(x: &[f32], need: &[bool; {k}], out: &mut [f32]) {{"
        );
        code::stmts(&e.scale, Lang::Rust, &code.arrays, 1, &mut s);
        let _ = writeln!(
            s,
            "    for c in 0..{k} {{\n        if need[c] {{\n            out[c] = EXACT_BIAS[c];\n        }}\n    }}\n    for g in 0..{} {{\n        if !(0..{k}).any(|c| need[c] && EXACT_GROUP_OUTPUTS[g * {k} + c] != 0) {{\n            continue;\n        }}\n        for l in (EXACT_GROUP_START[g] as usize)..(EXACT_GROUP_START[g + 1] as usize) {{",
            e.groups
        );
        code::stmts(&e.kernel, Lang::Rust, &code.arrays, 3, &mut s);
        let _ = writeln!(
            s,
            "            let kv: f32 = {};\n            for c in 0..{k} {{\n                if need[c] {{\n                    out[c] += kv * EXACT_COEF[l * {k} + c];\n                }}\n            }}\n        }}\n    }}\n}}\n",
            code::expr(&e.value, Lang::Rust, &code.arrays)
        );
        let stage_body = if super::c::every_row_exact(g) {
            // Every row goes to the exact model: the compiled stage is not run.
            format!("    let _ = compact;\n    exact_some(x, &[true; {k}], out);\n    1")
        } else {
            s.push_str(&plan_fn(g, k));
            format!("    compact(x, out);\n    let mut need = [false; {k}];\n    let stage = plan(out, &mut need);\n    if stage != 0 {{\n        exact_some(x, &need, out);\n    }}\n    stage")
        };
        let _ = writeln!(
            s,
            "\n{doc}/// Returns the stage that answered: 0 the compiled stage, 1 the exact model, 2 the\n/// compiled stage with some pairs recomputed exactly.\npub fn decision_stage(x: &[f32], out: &mut [f32]) -> u8 {{\n{stage_body}\n}}\n\n{doc}pub fn decision(x: &[f32], out: &mut [f32]) {{\n    let _ = decision_stage(x, out);\n}}\n"
        );
        lines.push(format!(
            "guard: {} below {:.4} sends outputs to the exact expansion ({} support vectors in {} groups, f32), run only for those rows",
            g.guard_rule().describe(),
            g.threshold(),
            g.exact().n_support_vectors(),
            e.groups
        ));
    }
    let _ = writeln!(
        s,
        "/// Index of the predicted class (0 for regression models).\n#[allow(clippy::needless_range_loop)]\npub fn label_index(x: &[f32]) -> usize {{\n    let mut s = [0.0_f32; {k}];\n    decision(x, &mut s);"
    );
    match model.task() {
        Task::Regression => {
            let _ = writeln!(s, "    let _ = s;\n    0");
        }
        t => {
            let _ = writeln!(s, "{}\n    best", label_rule(t, k, model.labels().len()));
        }
    }
    let _ = writeln!(s, "}}\n");
    let _ = writeln!(
        s,
        "/// Name of class `index` (`None` for regression models or out of range).\npub fn label_name(index: usize) -> Option<&'static str> {{\n    LABEL_NAMES.get(index).copied()\n}}"
    );
    write_atomic(out, s.as_bytes())?;
    Ok((vec![out.to_path_buf()], lines))
}
