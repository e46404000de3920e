//! C export: `kp_model.h` and `kp_model.c` in a folder — self-contained C99 that needs only
//! libm, weights as `static const` arrays, no allocation, re-entrant (every buffer is a
//! local array), symbols prefixed by `--prefix` (`kp` by default). The header describes the
//! model in a comment (columns, scaling, labels, decision rule, method, exact model
//! fingerprint, agreement at compile time), defines `KP_INPUT_NAMES` (the input columns in
//! order, as an initializer) and declares `int kp_input_dim(void)`,
//! `const char *kp_input_name(int index)`, `const char *kp_model_info(void)`,
//! `int kp_output_dim(void)`, `void kp_decision(const float *x, float *out)` (same order
//! and sign as `score`, input scaling applied inside), `int kp_label_index(const float *x)`
//! and, for classifiers, `const char *kp_label_name(int index)`. A guarded model adds
//! `int kp_decision_stage(const float *x, float *out)`, which also says which stage
//! answered; its exact expansion runs only for the rows (and, under the pairs rule, only
//! over the support vectors of the pairs) the guard sends to it. Computation is in f32;
//! strings escape `?` so that no trigraph survives `-std=c99`.

use super::code::{self, Lang};
use super::meta::ArtefactInfo;
use super::precision::Quantized;
use crate::model::guarded::GuardRule;
use crate::model::{CompiledModel, GuardedModel, Task};
use crate::{Error, Result};
use std::fmt::Write;
use std::path::{Path, PathBuf};

fn c_string(s: &str) -> String {
    let mut o = String::from("\"");
    for ch in s.bytes() {
        match ch {
            b'"' => o.push_str("\\\""),
            b'\\' => o.push_str("\\\\"),
            // `??/` and the other trigraphs are read as other characters under -std=c99.
            b'?' => o.push_str("\\?"),
            0x20..=0x7e => o.push(ch as char),
            other => {
                let _ = write!(o, "\\{other:03o}");
            }
        }
    }
    o.push('"');
    o
}

/// Text safe inside a C comment: printable ASCII, no comment ends, no trigraphs.
fn comment_text(s: &str) -> String {
    s.chars()
        .map(|c| if (' '..='~').contains(&c) { c } else { '_' })
        .collect::<String>()
        .replace("*/", "* /")
        .replace("??", "?_?")
}

/// The label rule of a row of decisions `s` (`k` of them), leaving the index in `best`.
fn label_rule(task: Task, k: usize, nl: usize) -> String {
    match task {
        Task::Regression => "    int best = 0;".into(),
        Task::Binary => "    int best = s[0] > 0.0f ? 1 : 0;".into(),
        Task::Ovr => format!(
            "    int best = 0;\n    for (int j = 1; j < {k}; j++) if (s[j] > s[best]) best = j;"
        ),
        Task::Ovo => format!(
            "    int votes[{nl}] = {{0}};\n    int p = 0;\n    for (int i = 0; i < {nl}; i++)\n        for (int j = i + 1; j < {nl}; j++, p++)\n            votes[s[p] > 0.0f ? i : j]++;\n    int best = 0;\n    for (int i = 1; i < {nl}; i++) if (votes[i] > votes[best]) best = i;"
        ),
    }
}

/// The guard's plan for compiled decisions `s`: fills `need` and returns the stage (0 the
/// compiled stage alone, 1 the exact model alone, 2 some outputs exact), as
/// `GuardedModel::decision` decides.
fn plan_fn(g: &GuardedModel, prefix: &str, k: usize) -> String {
    let nl = g.exact().labels().len();
    let t = code::threshold_lit(g.threshold(), Lang::C);
    let mut f = format!("static int {prefix}_plan(const float *s, unsigned char *need) {{\n");
    match g.guard_rule() {
        GuardRule::Row => {
            f.push_str(&label_rule(g.exact().task(), k, nl));
            f.push('\n');
            match g.exact().task() {
                Task::Binary => f.push_str("    (void)best;\n    float conf = fabsf(s[0]);\n"),
                Task::Ovr => {
                    let _ = write!(
                        f,
                        "    float other = -HUGE_VALF;\n    for (int j = 0; j < {k}; j++) if (j != best && s[j] > other) other = s[j];\n    float conf = s[best] - other;\n"
                    );
                }
                Task::Ovo => {
                    let _ = write!(
                        f,
                        "    float conf = HUGE_VALF;\n    p = 0;\n    for (int i = 0; i < {nl}; i++)\n        for (int j = i + 1; j < {nl}; j++, p++) {{\n            if (i == best && s[p] < conf) conf = s[p];\n            if (j == best && -s[p] < conf) conf = -s[p];\n        }}\n"
                    );
                }
                Task::Regression => unreachable!("guards need classifiers"),
            }
            let _ = write!(
                f,
                "    int all = conf < {t};\n    for (int c = 0; c < {k}; c++) need[c] = (unsigned char)all;\n    return all;\n}}\n"
            );
        }
        GuardRule::Pairs => {
            let _ = write!(
                f,
                "    int votes[{nl}] = {{0}}, gain[{nl}] = {{0}}, loss[{nl}] = {{0}};\n    unsigned char contender[{nl}];\n    int p = 0;\n    for (int i = 0; i < {nl}; i++)\n        for (int j = i + 1; j < {nl}; j++, p++) {{\n            int w = s[p] > 0.0f ? i : j, l = s[p] > 0.0f ? j : i;\n            votes[w]++;\n            if (fabsf(s[p]) < {t}) {{ loss[w]++; gain[l]++; }}\n        }}\n    int best = 0;\n    for (int c = 1; c < {nl}; c++) if (votes[c] > votes[best]) best = c;\n    int floor_votes = votes[best] - loss[best];\n    for (int c = 0; c < {nl}; c++) contender[c] = (unsigned char)(c == best || votes[c] + gain[c] >= floor_votes);\n    int any = 0, all = 1;\n    p = 0;\n    for (int i = 0; i < {nl}; i++)\n        for (int j = i + 1; j < {nl}; j++, p++) {{\n            need[p] = (unsigned char)(fabsf(s[p]) < {t} && (contender[i] || contender[j]));\n            if (need[p]) any = 1; else all = 0;\n        }}\n    return any ? (all ? 1 : 2) : 0;\n}}\n"
            );
        }
    }
    f
}

/// True when the guard sends every row whole to the exact model (the rows rule with an
/// infinite threshold): the compiled stage need not run.
pub(crate) fn every_row_exact(g: &GuardedModel) -> bool {
    g.guard_rule() == GuardRule::Row && g.threshold() == f64::INFINITY
}

/// Writes `dir/kp_model.h` and `dir/kp_model.c`; with `guard`, the model is that guarded
/// model (whose compiled stage is `model`): the exact expansion runs only for the rows, and
/// the outputs, the guard sends to it.
pub fn write(
    model: &CompiledModel,
    guard: Option<&GuardedModel>,
    q: &Quantized,
    prefix: &str,
    dir: &Path,
    replace: bool,
) -> Result<(Vec<PathBuf>, Vec<String>)> {
    if prefix.is_empty()
        || !prefix
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '_')
        || prefix.starts_with(|c: char| c.is_ascii_digit())
    {
        return Err(Error::input(format!(
            "--prefix '{prefix}' is not a C identifier (letters, digits, underscores; not starting with a digit)"
        )));
    }
    if dir.exists() && !dir.is_dir() {
        return Err(Error::input(format!(
            "{}: exists and is not a folder; --format c writes a folder",
            dir.display()
        )));
    }
    let mut code = code::scorer(model, q)?;
    let mut lines = std::mem::take(&mut code.lines);
    let exact = guard.map(|g| code::exact_part(&mut code, g.exact()));
    let (d, k) = (model.input_dim(), model.n_outputs());
    let info = ArtefactInfo::of(model, guard);
    let up = prefix.to_uppercase();
    let mut h = String::new();
    let what = if guard.is_some() {
        "guarded model: compiled stage with exact fallback"
    } else {
        "compiled model"
    };
    let _ = writeln!(
        h,
        "/* Generated by kernelpress {}: {what}, {} features ({}) of {}. C99, libm only.\n",
        env!("CARGO_PKG_VERSION"),
        model.features(),
        model.spec().method.name(),
        comment_text(&model.spec().kernel.to_string())
    );
    for (key, val) in info.pairs() {
        let _ = writeln!(h, "   {}: {}", key, comment_text(&val));
    }
    let _ = writeln!(h, "*/\n");
    let _ = writeln!(h, "#ifndef {up}_MODEL_H\n#define {up}_MODEL_H\n");
    let names: Vec<String> = info.columns.iter().map(|c| c_string(c)).collect();
    let _ = writeln!(
        h,
        "/* The input columns in the order x[] takes them, as an initializer:\n   static const char *const columns[{d}] = {up}_INPUT_NAMES; */\n#define {up}_INPUT_NAMES {{ {} }}\n",
        names.join(", ")
    );
    let _ = writeln!(
        h,
        "/* Number of inputs (raw, unscaled) of one row. */\nint {prefix}_input_dim(void);"
    );
    let _ = writeln!(
        h,
        "/* Name of input column `index` (NULL when out of range). */\nconst char *{prefix}_input_name(int index);"
    );
    let _ = writeln!(
        h,
        "/* What this model is (\"key: value\" lines: columns, scaling, labels, decision rule,\n   method, exact model fingerprint, agreement measured at compile time). */\nconst char *{prefix}_model_info(void);"
    );
    let _ = writeln!(
        h,
        "/* Number of decision values. */\nint {prefix}_output_dim(void);"
    );
    let _ = writeln!(
        h,
        "/* Decision values of the row x[{d}] into out[{k}], in the order and sign of `kernelpress score`. */\nvoid {prefix}_decision(const float *x, float *out);"
    );
    if guard.is_some() {
        let _ = writeln!(
            h,
            "/* As {prefix}_decision, and returns the stage that answered: 0 the compiled stage,\n   1 the exact model, 2 the compiled stage with some pairs recomputed exactly. */\nint {prefix}_decision_stage(const float *x, float *out);"
        );
    }
    let _ = writeln!(
        h,
        "/* Index of the predicted class (0 for regression models). */\nint {prefix}_label_index(const float *x);"
    );
    if model.task().is_classifier() {
        let _ = writeln!(
            h,
            "/* Name of class `index` (NULL when out of range). */\nconst char *{prefix}_label_name(int index);"
        );
    }
    let _ = writeln!(h, "\n#endif");
    let mut c = String::new();
    let _ = writeln!(
        c,
        "/* Generated by kernelpress {}. */",
        env!("CARGO_PKG_VERSION")
    );
    let _ = writeln!(
        c,
        "#include <math.h>\n#include <stddef.h>\n#include \"kp_model.h\"\n"
    );
    if code::uses_f16(&code.arrays) {
        c.push_str(
            "static float kp_h2f(unsigned short h) {\n    unsigned int s = (unsigned int)(h >> 15), e = (h >> 10) & 31u, m = h & 1023u;\n    float v = e == 0 ? ldexpf((float)m, -24) : (e == 31 ? (m ? NAN : INFINITY) : ldexpf((float)(m | 1024u), (int)e - 25));\n    return s ? -v : v;\n}\n\n",
        );
    }
    c.push_str(&code::declare(&code.arrays, Lang::C));
    let _ = writeln!(c, "\nint {prefix}_input_dim(void) {{ return {d}; }}");
    let _ = writeln!(c, "int {prefix}_output_dim(void) {{ return {k}; }}\n");
    let _ = writeln!(
        c,
        "const char *{prefix}_input_name(int index) {{\n    static const char *const names[{d}] = {up}_INPUT_NAMES;\n    return index >= 0 && index < {d} ? names[index] : NULL;\n}}\n"
    );
    let _ = writeln!(
        c,
        "const char *{prefix}_model_info(void) {{\n    return {};\n}}\n",
        c_string(&info.text())
    );
    let compact_name = if guard.is_some() {
        format!("static void {prefix}_compact")
    } else {
        format!("void {prefix}_decision")
    };
    let _ = writeln!(c, "{compact_name}(const float *x, float *out) {{");
    code::stmts(&code.body, Lang::C, &code.arrays, 1, &mut c);
    let _ = writeln!(c, "}}\n");
    if let (Some(g), Some(e)) = (guard, &exact) {
        let _ = writeln!(
            c,
            "/* The exact expansion of the outputs marked in need[], from the support vectors\n   of the groups that feed them. */\nstatic void {prefix}_exact_some(const float *x, const unsigned char *need, float *out) {{"
        );
        code::stmts(&e.scale, Lang::C, &code.arrays, 1, &mut c);
        let _ = writeln!(
            c,
            "    for (int c = 0; c < {k}; c++) if (need[c]) out[c] = EXACT_BIAS[c];\n    for (int g = 0; g < {}; g++) {{\n        int use = 0;\n        for (int c = 0; c < {k}; c++) if (need[c] && EXACT_GROUP_OUTPUTS[g * {k} + c]) use = 1;\n        if (!use) continue;\n        for (int l = EXACT_GROUP_START[g]; l < EXACT_GROUP_START[g + 1]; l++) {{",
            e.groups
        );
        code::stmts(&e.kernel, Lang::C, &code.arrays, 3, &mut c);
        let _ = writeln!(
            c,
            "            const float kv = {};\n            for (int c = 0; c < {k}; c++) if (need[c]) out[c] += kv * EXACT_COEF[l * {k} + c];\n        }}\n    }}\n}}\n",
            code::expr(&e.value, Lang::C, &code.arrays)
        );
        if every_row_exact(g) {
            // Every row goes to the exact model whatever the compiled stage says: the
            // compiled stage is not run (the export is the exact model's).
            let _ = writeln!(
                c,
                "\nint {prefix}_decision_stage(const float *x, float *out) {{\n    unsigned char need[{k}];\n    for (int c = 0; c < {k}; c++) need[c] = 1;\n    (void){prefix}_compact;\n    {prefix}_exact_some(x, need, out);\n    return 1;\n}}\n\nvoid {prefix}_decision(const float *x, float *out) {{\n    (void){prefix}_decision_stage(x, out);\n}}\n"
            );
        } else {
            c.push_str(&plan_fn(g, prefix, k));
            let _ = writeln!(
                c,
                "\nint {prefix}_decision_stage(const float *x, float *out) {{\n    unsigned char need[{k}];\n    {prefix}_compact(x, out);\n    int stage = {prefix}_plan(out, need);\n    if (stage) {prefix}_exact_some(x, need, out);\n    return stage;\n}}\n\nvoid {prefix}_decision(const float *x, float *out) {{\n    (void){prefix}_decision_stage(x, out);\n}}\n"
            );
        }
        lines.push(format!(
            "guard: {} below {:.4} sends outputs to the exact expansion ({} support vectors in {} groups, f32), run only for those rows",
            g.guard_rule().describe(),
            g.threshold(),
            g.exact().n_support_vectors(),
            e.groups
        ));
    }
    let _ = writeln!(c, "int {prefix}_label_index(const float *x) {{");
    let _ = writeln!(c, "    float s[{k}];\n    {prefix}_decision(x, s);");
    let nl = model.labels().len();
    match model.task() {
        Task::Regression => {
            let _ = writeln!(c, "    (void)s;\n    return 0;");
        }
        t => {
            let _ = writeln!(c, "{}\n    return best;", label_rule(t, k, nl));
        }
    }
    let _ = writeln!(c, "}}");
    if model.task().is_classifier() {
        let names: Vec<String> = model.labels().iter().map(|l| c_string(l)).collect();
        let _ = writeln!(
            c,
            "\nconst char *{prefix}_label_name(int index) {{\n    static const char *const names[{}] = {{ {} }};\n    return index >= 0 && index < {} ? names[index] : NULL;\n}}",
            names.len(),
            names.join(", "),
            names.len()
        );
    }
    let paths = crate::fsio::write_folder_atomic(
        dir,
        &[
            ("kp_model.h".into(), h.into_bytes()),
            ("kp_model.c".into(), c.into_bytes()),
        ],
        replace,
    )?;
    Ok((paths, lines))
}
