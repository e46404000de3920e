//! `kernelpress compile`: exact model (+ calibration data) → compiled model, or kernel +
//! labelled data → random-feature model fitted to the labels.

use super::featurize::{read_landmarks, MapArgs};
use clap::ValueEnum;
use kernelpress::choose::{search, Budget, Choice, SearchOptions};
use kernelpress::data::{check_batch, read_table, write_all_atomic};
use kernelpress::fit::{
    audit_row, audit_rows, compile_exact, compile_exact_tuned, compile_labels, HeadKind,
    HeadPrecisionRule, HeadRank, RefineOptions, RidgeGrid, Teacher,
};
use kernelpress::model::guarded::GuardTarget;
use kernelpress::model::ExactModel;
use kernelpress::report::{self, ReportOptions};
use kernelpress::{Error, ErrorKind, Result};
use ndarray::Axis;
use std::path::PathBuf;

#[derive(Debug, Clone, Copy, ValueEnum)]
pub(crate) enum Head {
    /// Ridge regression to the exact model's decision values (needs --calib).
    Distill,
    /// The dual expansion pushed through the map (no data needed).
    Project,
}

/// Compile an exact kernel model into a feature map plus a linear head.
///
/// With MODEL and --calib, the head is distilled from the model's decision values on the
/// calibration inputs (read a chunk at a time when the map does not depend on them and no
/// bandwidth search runs). --stats-out and --from-stats shard the distillation across
/// machines. Every tenth calibration row is an audit row, never fitted on; of
/// the others, one in nine chooses the ridge strength. The report is
/// printed on stdout: on --eval if given, else on the audit rows.
/// Without MODEL, --kernel, --data and --target fit the features to labels directly.
///
/// Examples:
///   kernelpress compile models/pump_svm.safetensors --calib models/pump_calib.csv --target condition
///       --method orthogonal --features 1024 --seed 1 --out pump_compiled.safetensors --json r.json
///   kernelpress compile --kernel 'gaussian(gamma=0.25)' --data models/pump_train.csv --target condition
///       --standardize --method fourier --features 1024 --out direct.safetensors
///   kernelpress compile models/pump_svm.safetensors --calib shard1.csv --first-row 4000 --target condition
///       --method hadamard --features 2048 --seed 1 --stats-out s1.kpstats
///   kernelpress compile models/pump_svm.safetensors --from-stats s0.kpstats s1.kpstats
///       --eval models/pump_test.csv --target condition --out sharded.safetensors
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// Exact model file.
    model: Option<PathBuf>,
    /// Calibration inputs (CSV or .npy); labels are not needed.
    #[arg(long)]
    calib: Option<PathBuf>,
    /// Evaluation data for the compile report (defaults to the calibration audit rows: every
    /// tenth row, never fitted on).
    #[arg(long)]
    eval: Option<PathBuf>,
    /// Target column in --calib/--eval/--data (ignored as a feature; used for accuracy).
    #[arg(long)]
    target: Option<String>,
    /// Kernel expression (labels mode, without MODEL).
    #[arg(long)]
    kernel: Option<String>,
    /// Labelled data (labels mode).
    #[arg(long)]
    data: Option<PathBuf>,
    /// Labels mode: treat the target as a numeric regression target.
    #[arg(long)]
    regression: bool,
    /// Labels mode: standardise the inputs (stored in the model).
    #[arg(long)]
    standardize: bool,
    #[command(flatten)]
    map: MapArgs,
    /// How to fit the head.
    #[arg(long, value_enum, default_value = "distill")]
    head: Head,
    /// Fix the relative ridge strength instead of choosing it on held-out rows (every tenth
    /// row but the audit rows).
    #[arg(long)]
    ridge_rel: Option<f64>,
    #[command(flatten)]
    gate: super::GateArgs,
    /// When a quality gate fails, write no model file (by default the file is still written,
    /// for inspection, and the exit code is 3).
    #[arg(long)]
    discard_below_gate: bool,
    /// Skip the latency measurements in the report.
    #[arg(long)]
    no_timing: bool,
    /// Take data columns in file order instead of matching the model's column names.
    #[arg(long)]
    by_position: bool,
    /// Budget: the most single-row latency (median, µs, measured on this machine) the
    /// compiled model may take. The method and feature count are then chosen (the most
    /// faithful within the budget); give no --method/--features.
    #[arg(long)]
    budget_us: Option<f64>,
    /// Budget: the most parameter bytes (e.g. 200000, 512K, 4M).
    #[arg(long)]
    max_bytes: Option<String>,
    /// Budget: the largest share of rows whose label may differ from the exact model's on
    /// calibration audit rows (regression: the decision RMSE relative to the spread of
    /// the exact decisions). Alone, the fastest model that meets it is chosen.
    #[arg(long)]
    max_disagreement: Option<f64>,
    /// Budget search: the methods to try, comma-separated (default: every method for the
    /// kernel but identity).
    #[arg(long, value_delimiter = ',')]
    methods: Vec<String>,
    /// Guard: write a guarded model whose compiled stage answers where it is confident and
    /// the exact model elsewhere, with the smallest fallback share whose agreement with the
    /// exact model on the calibration audit rows is at least P with 95% confidence
    /// (one-sided Wilson bound). Classifiers only.
    #[arg(long)]
    guard_agreement: Option<f64>,
    /// Guard: the exact model takes part in at most this share of rows (the least
    /// confident).
    #[arg(long)]
    guard_rate: Option<f64>,
    /// Budget search with --max-disagreement (classifiers): also consider every candidate
    /// guarded by the exact model (threshold for agreement 1 − P with 95% confidence on
    /// the audit rows), judged at its mean single-row latency; the fastest that meets the
    /// bound is written, guarded or not.
    #[arg(long)]
    allow_guard: bool,
    /// Guard: what the exact model computes. `pairs` (one-vs-one classifiers): only the
    /// class pairs the compiled model is unsure of among the classes that could still
    /// win, reading those pairs' support vectors; `row`: the whole row; `auto` (the
    /// default): whichever reads fewer support vectors for the target on the audit rows.
    #[arg(long, value_parser = ["auto", "row", "pairs"])]
    guard_rule: Option<String>,
    /// Keep the kernel's own bandwidth for the random map. By default distillation of a
    /// random map of a shift-invariant kernel tries the map at 1, 0.5 and 0.7 times the
    /// kernel's bandwidth (a Gaussian's γ) and keeps the one that reproduces the teacher
    /// best on the ridge-choice rows (three distillations).
    #[arg(long)]
    no_bandwidth_search: bool,
    /// Refine the map against the exact model for up to N passes over the calibration
    /// rows: Nyström landmarks, spectral frequencies, phases and input scales, and the
    /// diagonals of Hadamard and Fastfood maps move by gradient descent on the squared
    /// decision error; the head is refitted after each pass and the best pass on the
    /// ridge-choice rows is kept (the audit rows are never used). Same program shape and
    /// cost. With a budget, every candidate is refined before it is judged. See
    /// docs/refining.md.
    #[arg(long, value_name = "N")]
    refine: Option<usize>,
    /// Refinement step size, relative to each parameter tensor's size.
    #[arg(long, value_name = "R", requires = "refine")]
    refine_rate: Option<f64>,
    /// Factor the head of a model with many outputs into a D × r projection and an
    /// r × outputs head (reduced-rank: the leading directions of its fitted values on the
    /// head-fitting rows). `auto` keeps the smallest rank whose label agreement on the
    /// ridge-choice rows is within 0.002 of the full head's; a number fixes the rank. With
    /// a budget, every candidate is factored before it is timed. See docs/choosing.md.
    #[arg(long, value_name = "R|auto")]
    head_rank: Option<String>,
    /// Precision of the head's products when the model scores in f32 (`score --f32`, the
    /// f32 single row): f32, bf16 (bfloat16 weights and features, f32 sums) or int8 (int8
    /// weights per output and features per row, integer sums). `auto` keeps the smallest
    /// whose label agreement on the ridge-choice rows is within 0.002 of the f32 head's
    /// (needs --calib). The f64 paths keep the f64 head. See docs/choosing.md.
    #[arg(long, value_name = "P|auto")]
    head_precision: Option<String>,
    /// Budget search: measure this machine again instead of using the cached profile.
    #[arg(long)]
    recalibrate: bool,
    /// Sharded distillation, step 1: write the distillation statistics of the --calib rows
    /// (one shard of a larger calibration set) to this file instead of a model. Needs
    /// --method and --features; the map bandwidth is not searched.
    #[arg(long, requires = "calib", conflicts_with = "out")]
    stats_out: Option<PathBuf>,
    /// Sharded distillation: the global index (counting from 0) of the first --calib row in
    /// the whole calibration set, so that every row keeps its part (fit, ridge choice, audit)
    /// however the rows are split.
    #[arg(long, default_value_t = 0, requires = "stats_out")]
    first_row: usize,
    /// Sharded distillation, step 2: merge these statistics files (any number, any order,
    /// disjoint rows) and fit the head from them. The report is computed on --eval when
    /// given (the audit rows stayed on the machines that made the statistics).
    #[arg(long, num_args = 1.., conflicts_with_all = ["calib", "stats_out"])]
    from_stats: Vec<PathBuf>,
    /// Output compiled model file (with --stats-out, not written).
    #[arg(long, required_unless_present = "stats_out")]
    out: Option<PathBuf>,
    /// Also write the report as JSON here (as `report --json FILE` does; `--report` is
    /// accepted too).
    #[arg(long = "json", visible_alias = "report")]
    report: Option<PathBuf>,
}

impl Args {
    /// True when a budget search or a guard is asked for (both need the calibration rows
    /// in memory).
    fn budget_or_guard(&self) -> bool {
        self.budget_us.is_some()
            || self.max_bytes.is_some()
            || self.max_disagreement.is_some()
            || self.guard_agreement.is_some()
            || self.guard_rate.is_some()
    }

    /// The output model path (present unless --stats-out: clap checks it).
    fn out(&self) -> &std::path::Path {
        self.out
            .as_deref()
            .or(self.stats_out.as_deref())
            .expect("clap requires --out or --stats-out")
    }
}

pub(crate) fn run(a: Args) -> Result<()> {
    {
        let mut ins: Vec<&std::path::Path> = Vec::new();
        for p in [&a.model, &a.calib, &a.eval, &a.data, &a.map.landmarks]
            .into_iter()
            .flatten()
        {
            ins.push(p);
        }
        let mut outs = vec![(a.out(), false)];
        for p in &a.from_stats {
            ins.push(p);
        }
        if let Some(r) = &a.report {
            outs.push((r.as_path(), false));
        }
        super::guard_outputs(&ins, &outs)?;
    }
    let grid = match a.ridge_rel {
        Some(r) => RidgeGrid::try_fixed(r).map_err(|e| flag_error("--ridge-rel", e))?,
        None => RidgeGrid::standard(),
    };
    a.gate.validate()?;
    match (a.guard_agreement, a.guard_rate) {
        (Some(_), Some(_)) => {
            return Err(Error::input(
                "give --guard-agreement P or --guard-rate R, not both",
            ))
        }
        (Some(p), None) => {
            GuardTarget::Agreement(p)
                .checked()
                .map_err(|e| flag_error("--guard-agreement", e))?;
        }
        (None, Some(r)) => {
            GuardTarget::Rate(r)
                .checked()
                .map_err(|e| flag_error("--guard-rate", e))?;
        }
        _ => {}
    }
    let guarded = a.guard_agreement.is_some() || a.guard_rate.is_some();
    if a.allow_guard && a.max_disagreement.is_none() {
        return Err(Error::input(
            "--allow-guard lets the budget search return a guarded model: give --max-disagreement P with it",
        ));
    }
    if a.guard_rule.is_some() && !guarded {
        return Err(Error::input(
            "--guard-rule chooses how a guard works: give --guard-agreement P or --guard-rate R with it",
        ));
    }
    if guarded && (a.model.is_none() || matches!(a.head, Head::Project)) {
        return Err(Error::input(
            "a guard needs an exact model and distillation: compile MODEL --calib FILE",
        ));
    }
    if guarded && (a.budget_us.is_some() || a.max_bytes.is_some() || a.max_disagreement.is_some()) {
        return Err(Error::input(
            "--guard-agreement/--guard-rate and a budget search are not combined yet: choose the method and size with the budget first, then compile it with a guard",
        ));
    }
    if a.budget_us.is_some() || a.max_bytes.is_some() || a.max_disagreement.is_some() {
        if a.map.method.is_some() || a.map.features.is_some() {
            return Err(Error::input(
                "a budget (--budget-us, --max-bytes, --max-disagreement) chooses the method and the feature count: drop --method/--features (restrict the search with --methods)",
            ));
        }
        if a.map.landmarks.is_some() || a.ridge_rel.is_some() || !matches!(a.head, Head::Distill) {
            return Err(Error::input(
                "a budget search distils every candidate with the standard settings: drop --landmarks, --ridge-rel and --head",
            ));
        }
    }
    let Some(model_path) = &a.model else {
        return run_labels(&a, &grid);
    };
    if a.kernel.is_some() || a.data.is_some() {
        return Err(Error::input(
            "give either MODEL (with --calib) or --kernel with --data, not both",
        ));
    }
    let exact = ExactModel::load(model_path)?;
    super::note_unverified(model_path);
    if (a.guard_agreement.is_some() || a.guard_rate.is_some()) && !exact.task().is_classifier() {
        return Err(Error::input(format!(
            "{}: a guard needs a classifier: regression models have no margin to judge confidence by",
            model_path.display()
        )));
    }
    if a.allow_guard && !exact.task().is_classifier() {
        return Err(Error::input(format!(
            "{}: --allow-guard needs a classifier: regression models have no margin to judge confidence by",
            model_path.display()
        )));
    }
    if a.guard_rule.as_deref() == Some("pairs") && exact.task() != kernelpress::model::Task::Ovo {
        return Err(Error::input(format!(
            "{}: --guard-rule pairs needs a one-vs-one classifier (its decision values are class pairs); this model is {}: use --guard-rule row",
            model_path.display(),
            exact.task().name()
        )));
    }
    if a.stats_out.is_some() || !a.from_stats.is_empty() {
        return run_shards(&a, &exact, &grid);
    }
    if let Some(done) = try_streamed(&a, &exact, &grid)? {
        return done;
    }
    let d = exact.input_dim();
    let calib = match &a.calib {
        Some(p) => Some(super::read_for(
            p,
            a.target.as_deref(),
            &exact.feature_names,
            a.by_position,
        )?),
        None => None,
    };
    let kind = match a.head {
        Head::Distill if calib.is_none() => {
            return Err(Error::input(
                "--head distill needs --calib FILE (or use --head project)",
            ))
        }
        Head::Distill => HeadKind::Distill,
        Head::Project => HeadKind::Project,
    };
    let refine = match a.refine {
        Some(n) => {
            let mut o = RefineOptions::new(n)
                .map_err(|e| Error::input(format!("--refine {n}: {}", e.message())))?;
            if let Some(r) = a.refine_rate {
                o.rate = r;
                o = o
                    .checked()
                    .map_err(|e| Error::input(format!("--refine-rate {r}: {}", e.message())))?;
            }
            if kind != HeadKind::Distill {
                return Err(Error::input("--refine moves the map against the exact model's decisions: it needs --head distill and --calib"));
            }
            Some(o)
        }
        None => None,
    };
    let head_rank = match a.head_rank.as_deref() {
        None => None,
        Some(v) => {
            let r = if v == "auto" {
                HeadRank::Auto { tolerance: 0.002 }
            } else {
                match v.parse::<usize>() {
                    Ok(n) => HeadRank::Fixed(n),
                    Err(_) => {
                        return Err(Error::input(format!(
                            "--head-rank {v}: expected a whole number ≥ 1 or 'auto'"
                        )))
                    }
                }
            };
            let r = r
                .checked()
                .map_err(|e| Error::input(format!("--head-rank {v}: {}", e.message())))?;
            if kind != HeadKind::Distill || calib.is_none() {
                return Err(Error::input(
                    "--head-rank chooses directions on the calibration rows: it needs --head distill and --calib",
                ));
            }
            Some(r)
        }
    };
    let head_precision = match a.head_precision.as_deref() {
        None => None,
        Some("auto") => {
            if kind != HeadKind::Distill || calib.is_none() {
                return Err(Error::input(
                    "--head-precision auto judges each precision on the calibration rows: it needs --head distill and --calib (or name a precision: f32, bf16, int8)",
                ));
            }
            Some(HeadPrecisionRule::Smallest { tolerance: 0.002 })
        }
        Some(v) => Some(HeadPrecisionRule::Fixed(v.parse().map_err(
            |e: Error| Error::input(format!("--head-precision: {}", e.message())),
        )?)),
    };
    if a.budget_us.is_some() || a.max_bytes.is_some() || a.max_disagreement.is_some() {
        if head_precision.is_some() {
            return Err(Error::input(
                "--head-precision does not combine with a budget search yet (its latencies are those of f32 heads): compile the chosen method and size again with --head-precision",
            ));
        }
        return run_budget(&a, &exact, calib, &grid, refine, head_rank);
    }
    if !a.methods.is_empty() {
        return Err(Error::input(
            "--methods restricts a budget search; give --budget-us, --max-bytes or --max-disagreement (or one --method)",
        ));
    }
    let spec = a.map.spec(exact.kernel().clone(), d)?;
    let lm = match &a.map.landmarks {
        Some(p) => Some(read_landmarks(p, d, &|x| x.to_owned())?),
        None => None,
    };
    let bars = super::progress::Bars::default();
    let (model, info) = match (kind, &calib) {
        (HeadKind::Distill, Some(c)) => compile_exact_tuned(
            &exact,
            c.x.view(),
            &spec,
            &grid,
            !a.no_bandwidth_search,
            lm.as_ref().map(|l| l.view()),
            &bars,
        )?,
        _ => compile_exact(
            &exact,
            calib.as_ref().map(|t| t.x.view()),
            &spec,
            kind,
            &grid,
            lm.as_ref().map(|l| l.view()),
            &bars,
        )?,
    };
    if let Some(t) = model.fit.get("bandwidth_search") {
        let chosen = model.spec().options.map_bandwidth;
        super::progress::note(format!(
            "map bandwidth: {chosen}× the kernel's (tried {}; judged on the ridge-choice rows; --no-bandwidth-search keeps the kernel's)",
            t["tried"]
                .as_array()
                .map(|v| v
                    .iter()
                    .map(|x| format!("{}× → {:.4}", x["multiple"], x["score"].as_f64().unwrap_or(f64::NAN)))
                    .collect::<Vec<_>>()
                    .join(", "))
                .unwrap_or_default()
        ));
    }
    for n in &info.notes {
        super::progress::warn(n);
    }
    let mut model = model;
    let teacher = match (
        &calib,
        refine.is_some() || head_rank.is_some() || head_precision.is_some(),
    ) {
        (Some(c), true) => Some(Teacher::new(&exact, c.x.view(), &bars)?),
        _ => None,
    };
    if let (Some(o), Some(teacher)) = (&refine, &teacher) {
        let spec = model.spec().clone();
        let (m, _, sum) =
            teacher.distil_refined(&spec, &grid, lm.as_ref().map(|l| l.view()), o, &bars)?;
        super::progress::note(format!(
            "refined {} in {} pass{} (kept pass {}): agreement on the audit rows {:.4} → {:.4}, ridge-choice error {:.3e} → {:.3e}, {:.1} s",
            sum.trained.join(", "),
            sum.passes_run,
            if sum.passes_run == 1 { "" } else { "es" },
            sum.best_pass,
            sum.audit_agreement.0,
            sum.audit_agreement.1,
            sum.choose_mse.0,
            sum.choose_mse.1,
            sum.seconds
        ));
        model = m;
    }
    if let (Some(r), Some(teacher)) = (head_rank, &teacher) {
        let (m, sum) = teacher.factor_head(&model, r)?;
        super::progress::note(factor_note(&sum, model.features()));
        model = m;
    }
    match (head_precision, &teacher) {
        (Some(rule), Some(teacher)) => {
            let (m, sum) = teacher.set_head_precision(&model, rule)?;
            super::progress::note(precision_note(&sum));
            model = m;
        }
        (Some(HeadPrecisionRule::Fixed(p)), None) => model.set_head_precision(p),
        _ => {}
    }
    super::warn_slow_head(model.head_precision());
    warn_fit_notes(&model);
    if let Some(Some(y)) = calib.as_ref().map(|c| c.target.as_ref()) {
        if model.task().is_classifier() {
            // Probabilities are an extra: when the labels cannot support them (a class
            // pair without rows on both sides), the model is written without them.
            if let Err(e) =
                kernelpress::fit::fit_probabilities(&mut model, calib.as_ref().unwrap().x.view(), y)
            {
                super::progress::note(format!(
                    "class probabilities not fitted ({}); the model is written without them",
                    e.message()
                ));
            }
        }
    }
    if a.guard_agreement.is_some() || a.guard_rate.is_some() {
        return run_guard(&a, &exact, calib.as_ref(), model);
    }
    evaluate_and_finish(&a, &exact, calib.as_ref().map(audit_of), model, None)
}

/// One line on what choosing the head precision measured.
fn precision_note(sum: &kernelpress::fit::HeadPrecisionSummary) -> String {
    let tried = sum
        .tried
        .iter()
        .map(|t| {
            format!(
                "{} ({}) {:.4}, {:.2} µs per row",
                t.precision.name(),
                t.path,
                t.figure,
                t.latency_us
            )
        })
        .collect::<Vec<_>>()
        .join("; ");
    format!(
        "head precision {} (ridge-choice rows, {}: {tried})",
        sum.chosen.name(),
        if sum.tried.first().is_some_and(|t| t.figure <= 0.0) {
            "minus mean squared error"
        } else {
            "agreement with the exact model"
        }
    )
}

/// One line on what factoring the head did.
fn factor_note(sum: &kernelpress::fit::FactorSummary, features: usize) -> String {
    let tried = sum
        .tried
        .iter()
        .map(|(r, f)| format!("{r} → {f:.4}"))
        .collect::<Vec<_>>()
        .join(", ");
    match sum.rank {
        Some(r) => format!(
            "head factored: {features} features → rank {r} → outputs, {} weights instead of {} (ridge-choice rows: full head {:.4}; tried {tried})",
            sum.weights.1, sum.weights.0, sum.full
        ),
        None => format!(
            "head not factored: no rank saved weights within the tolerance (ridge-choice rows: full head {:.4}; tried {})",
            sum.full,
            if tried.is_empty() { "none".to_string() } else { tried }
        ),
    }
}

fn run_guard(
    a: &Args,
    exact: &ExactModel,
    calib: Option<&kernelpress::data::Table>,
    model: kernelpress::model::CompiledModel,
) -> Result<()> {
    let calib =
        calib.ok_or_else(|| Error::input("a guard is chosen on calibration rows: give --calib"))?;
    use kernelpress::model::guarded::GuardRule;
    let target = match (a.guard_agreement, a.guard_rate) {
        (Some(p), None) => GuardTarget::Agreement(p),
        (None, Some(r)) => GuardTarget::Rate(r),
        _ => unreachable!("checked in run"),
    };
    let rule = match a.guard_rule.as_deref() {
        Some("row") => Some(GuardRule::Row),
        Some("pairs") => Some(GuardRule::Pairs),
        _ => None,
    };
    let g = kernelpress::fit::guard_on_audit_rows(model, exact, calib.x.view(), target, rule)?;
    finish_guarded(a, exact, calib, g, String::new())
}

/// Reports a guarded model (on --eval, else on the audit rows it was chosen on), applies
/// the gate and writes it; `head` is printed first.
fn finish_guarded(
    a: &Args,
    exact: &ExactModel,
    calib: &kernelpress::data::Table,
    g: kernelpress::model::GuardedModel,
    head: String,
) -> Result<()> {
    use kernelpress::model::guarded::GuardRule;
    let idx: Vec<usize> = (0..calib.x.nrows()).filter(|&i| audit_row(i)).collect();
    let xa = calib.x.select(Axis(0), &idx);
    let threshold = g.threshold();
    let fallback = g.guard["fallback_share"].as_f64().unwrap_or(f64::NAN);
    let work = g.guard["work_share"].as_f64().unwrap_or(f64::NAN);
    let (ex, truth, on) = match &a.eval {
        Some(p) => {
            let t = super::read_for(p, a.target.as_deref(), &exact.feature_names, a.by_position)?;
            (t.x, t.target, format!("{}", p.display()))
        }
        None => {
            super::progress::warn(
                "no --eval: the guard's figures are computed on the audit rows its threshold was chosen on (optimistic); give --eval for an independent check",
            );
            let y = calib
                .target
                .as_ref()
                .map(|y| idx.iter().map(|&i| y[i].clone()).collect());
            (
                xa.clone(),
                y,
                "calibration audit rows (also used to choose the guard)".to_string(),
            )
        }
    };
    let opts = ReportOptions {
        min_agreement: a.gate.tolerance(),
        timing: !a.no_timing,
        ..ReportOptions::default()
    };
    let pb = super::progress::bar(1, "report");
    let mut rep = report::build_guarded(&g, exact, ex.view(), truth.as_deref(), &opts)?;
    pb.finish();
    rep.evaluated_on = Some(on);
    let gate = a.gate.failure(&rep)?;
    let mut text = head;
    text.push_str(&match g.guard_rule() {
        GuardRule::Row => format!(
            "guard: rows whose smallest margin of the predicted class is below {threshold:.4} go to the exact model ({:.1}% of the audit rows)\n",
            100.0 * fallback
        ),
        GuardRule::Pairs => format!(
            "guard: class pairs with |decision| below {threshold:.4} among the classes that could still win are recomputed by the exact model ({:.1}% of the audit rows; {:.1}% of its support vectors read per row on average)\n",
            100.0 * fallback,
            100.0 * work
        ),
    });
    for w in &rep.warnings {
        super::progress::warn(w);
    }
    text.push_str(&report::render_text(&rep));
    text.push('\n');
    if let (Some(why), true) = (&gate, a.discard_below_gate) {
        return discard(&mut text, a, why);
    }
    let mut stored = rep.without_timing();
    stored.warnings.clear();
    let mut g = g;
    g.set_report(stored.to_json());
    let bytes = g.to_file().to_bytes()?;
    let json = format!("{}\n", serde_json::to_string_pretty(&rep).unwrap());
    let mut items: Vec<(&std::path::Path, &[u8])> = vec![(a.out(), &bytes)];
    if let Some(p) = &a.report {
        items.push((p.as_path(), json.as_bytes()));
    }
    write_all_atomic(&items)?;
    text.push_str(&format!(
        "wrote {} (guarded: {} features, exact fallback with {} support vectors)\n",
        a.out().display(),
        g.compact().features(),
        exact.n_support_vectors()
    ));
    super::finish_gate(&text, gate, a.out())
}

/// Builds the report (on --eval, else on the calibration audit rows), applies the gate
/// and writes the model. `budget_line` is printed after the report.
/// The audit rows of a calibration table (every tenth row, never fitted on) with their
/// target values.
fn audit_of(t: &kernelpress::data::Table) -> Rows {
    let (x, idx) = audit_rows(t.x.view());
    let y = t
        .target
        .as_ref()
        .map(|y| idx.iter().map(|&i| y[i].clone()).collect());
    (x, y)
}

/// Rows with their target values, when present.
type Rows = (ndarray::Array2<f64>, Option<Vec<String>>);

fn evaluate_and_finish(
    a: &Args,
    exact: &ExactModel,
    audit: Option<Rows>,
    mut model: kernelpress::model::CompiledModel,
    budget_line: Option<&dyn Fn(&report::Report) -> String>,
) -> Result<()> {
    // Evaluation rows for the report.
    let (ex, truth, on) = match &a.eval {
        Some(p) => {
            let t = super::read_for(p, a.target.as_deref(), &exact.feature_names, a.by_position)?;
            (t.x, t.target, format!("{}", p.display()))
        }
        None => match audit {
            Some((x, y)) => (
                x,
                y,
                "calibration audit rows (every tenth row; never fitted on)".to_string(),
            ),
            None => {
                return finish(a, &mut model, None);
            }
        },
    };
    let opts = ReportOptions {
        min_agreement: a.gate.tolerance(),
        timing: !a.no_timing,
        ..ReportOptions::default()
    };
    let pb = super::progress::bar(1, "report");
    let mut rep = report::build(&model, exact, ex.view(), truth.as_deref(), None, &opts)?;
    pb.finish();
    rep.evaluated_on = Some(on);
    if let Some(f) = budget_line {
        super::print_stdout(&f(&rep))?;
    }
    finish(a, &mut model, Some(rep))
}

fn run_budget(
    a: &Args,
    exact: &ExactModel,
    calib: Option<kernelpress::data::Table>,
    grid: &RidgeGrid,
    refine: Option<RefineOptions>,
    head_rank: Option<HeadRank>,
) -> Result<()> {
    let calib = calib.ok_or_else(|| Error::input("a budget search needs --calib FILE"))?;
    let max_bytes = match &a.max_bytes {
        Some(s) => Some(
            kernelpress::limits::parse_size(s)
                .map_err(|e| Error::input(format!("--max-bytes {s}: {e}")))?,
        ),
        None => None,
    };
    // Each bound checked by the library alone, so the error names its flag.
    if let Some(b) = a.budget_us {
        let one = Budget {
            latency_us: Some(b),
            ..Budget::default()
        };
        one.checked().map_err(|e| flag_error("--budget-us", e))?;
    }
    if let Some(p) = a.max_disagreement {
        let one = Budget {
            max_loss: Some(p),
            ..Budget::default()
        };
        one.checked()
            .map_err(|e| flag_error("--max-disagreement", e))?;
    }
    let kernel = exact.kernel().clone();
    let methods = super::methods_arg(&a.methods, &kernel)?;
    let budget = Budget {
        latency_us: a.budget_us,
        max_bytes,
        max_loss: a.max_disagreement,
    };
    let profile = super::machine::profile(a.recalibrate)?;
    let bars = super::progress::Bars::default();
    let teacher = Teacher::new(exact, calib.x.view(), &bars)?;
    let opts = SearchOptions {
        methods,
        ladder: SearchOptions::standard_ladder(),
        seed: a.map.seed,
        grid: grid.clone(),
        reps: 300,
        guard: a.allow_guard,
        refine,
        head_rank,
    };
    let res = search(&teacher, &profile, budget, &opts, &bars)?;
    for n in &res.notes {
        super::progress::note(n);
    }
    let mut text = String::from(
        "candidates (judged on the calibration audit rows: every tenth row, never fitted on):\n",
    );
    text.push_str(&format!(
        "  {:<12} {:>8} {:>13} {:>10} {:>14} {:>12}\n",
        "method", "features", "disagreement", "p50 (µs)", "predicted (µs)", "bytes"
    ));
    for r in &res.tried {
        text.push_str(&format!(
            "  {:<12} {:>8} {:>13.4} {:>10.2} {:>14.2} {:>12}\n",
            r.method, r.features, r.loss, r.latency_us, r.predicted.latency_us, r.bytes
        ));
    }
    let want = describe_budget(&budget);
    match res.choice {
        Choice::Compiled { model, record } => {
            text.push_str(&format!(
                "chosen: {} with {} features for {want}\n",
                record.method, record.features
            ));
            super::print_stdout(&text)?;
            let budget_us = a.budget_us;
            let line = move |r: &report::Report| -> String {
                match (budget_us, r.timing.latency_us_compiled_p50) {
                    (Some(b), Some(t)) => format!(
                        "re-measured single-row latency {t:.2} µs against the budget of {b} µs ({})\n",
                        if t <= b { "within" } else if t <= 1.1 * b { "over by less than the 10% measurement noise" } else { "OVER the budget: this machine is busier than when it was profiled" }
                    ),
                    (None, Some(t)) => format!("re-measured single-row latency {t:.2} µs\n"),
                    _ => String::new(),
                }
            };
            evaluate_and_finish(a, exact, Some(audit_of(&calib)), *model, Some(&line))
        }
        Choice::Guarded { model, record } => {
            text.push_str(&format!(
                "chosen: {} with {} features, guarded by the exact model, for {want} (mean single-row latency {:.2} µs on the audit rows)\n",
                record.method.trim_end_matches("+guard"),
                record.features,
                record.latency_us
            ));
            finish_guarded(a, exact, &calib, *model, text)
        }
        Choice::Exact {
            exact: e,
            best_compiled,
        } => {
            let why = match best_compiled {
                Some(b) => format!(
                    "; the compiled models that meet it are slower (best: {} with {} features, {:.2} µs)",
                    b.method, b.features, b.latency_us
                ),
                None => compiled_shortfall(&budget, &res.tried),
            };
            text.push_str(&format!(
                "the exact model itself meets {want} ({:.2} µs per row, agrees with itself){why}: keep it; nothing was written\n",
                e.latency_us,
            ));
            super::print_stdout(&text)?;
            Err(Error::new(
                ErrorKind::KeepExact,
                format!("the exact model is the better choice for {want}; no file written"),
            ))
        }
        Choice::Nothing {
            closest,
            fastest_predicted,
        } => {
            if let Some(c) = &closest {
                text.push_str(&format!(
                    "closest: {} with {} features ({:.2} µs, {} bytes, disagreement {:.4})\n",
                    c.method, c.features, c.latency_us, c.bytes, c.loss
                ));
            } else if let Some((m, f, p)) = &fastest_predicted {
                text.push_str(&format!(
                    "nothing was built: the fastest candidate, {m} with {f} features, is predicted at {:.2} µs and {} bytes\n",
                    p.latency_us, p.param_bytes
                ));
            }
            super::print_stdout(&text)?;
            Err(Error::new(
                ErrorKind::Budget,
                format!("{}; no file written", budget_parts(&budget)),
            ))
        }
    }
}

/// Why no compiled candidate was chosen, by bound: which ones met the latency and size but
/// not the fidelity, or none was built within them.
fn compiled_shortfall(b: &Budget, tried: &[kernelpress::choose::Record]) -> String {
    let built: Vec<&kernelpress::choose::Record> = tried.iter().filter(|r| !r.exact).collect();
    if built.is_empty() {
        return if b.max_loss.is_none() {
            "; without a fidelity bound nothing compiled can be more faithful, so none was built"
                .into()
        } else {
            "; no compiled candidate was predicted to be faster, so none was built".into()
        };
    }
    let quick: Vec<&&kernelpress::choose::Record> = built
        .iter()
        .filter(|r| b.fits(r.latency_us, r.bytes as u64))
        .collect();
    match (b.max_loss, quick.is_empty()) {
        (Some(p), false) => {
            let best = quick.iter().map(|r| r.loss).fold(f64::INFINITY, f64::min);
            format!(
                "; {} of the {} compiled candidates built meet the {} but none the disagreement bound of {p} (best: {best:.4})",
                quick.len(),
                built.len(),
                if b.latency_us.is_some() && b.max_bytes.is_some() {
                    "latency and size"
                } else if b.latency_us.is_some() {
                    "latency"
                } else {
                    "size"
                }
            )
        }
        _ => format!(
            "; none of the {} compiled candidates built meets it",
            built.len()
        ),
    }
}

fn describe_budget(b: &Budget) -> String {
    format!("the budget ({})", budget_parts(b))
}

/// The bounds of a budget in words ("a latency of 2 µs, a disagreement of 0.01").
fn budget_parts(b: &Budget) -> String {
    let mut parts = Vec::new();
    if let Some(t) = b.latency_us {
        parts.push(format!("a latency of {t} µs"));
    }
    if let Some(m) = b.max_bytes {
        parts.push(format!("{m} bytes"));
    }
    if let Some(p) = b.max_loss {
        parts.push(format!("a disagreement of {p}"));
    }
    parts.join(", ")
}

fn finish(
    a: &Args,
    model: &mut kernelpress::model::CompiledModel,
    rep: Option<report::Report>,
) -> Result<()> {
    let mut text = String::new();
    let gate = match &rep {
        Some(r) => a.gate.failure(r)?,
        None if a.gate.min_agreement.is_some() || a.gate.min_accuracy.is_some() => {
            return Err(Error::input(
                "a quality gate needs evaluation rows: give --calib (or --eval)",
            ))
        }
        None => None,
    };
    if let Some(r) = &rep {
        // The manifest keeps the deterministic part of the report: timings vary run to run
        // and would break bit-identical model files.
        model.report = r.without_timing().to_json();
        for w in &r.warnings {
            super::progress::warn(w);
        }
        text.push_str(&report::render_text(r));
        text.push('\n');
    }
    if let (Some(why), true) = (&gate, a.discard_below_gate) {
        return discard(&mut text, a, why);
    }
    // The model and the JSON report are published together, or neither.
    let bytes = model.to_file().to_bytes()?;
    let json = rep
        .as_ref()
        .map(|r| format!("{}\n", serde_json::to_string_pretty(r).unwrap()));
    let mut items: Vec<(&std::path::Path, &[u8])> = vec![(a.out(), &bytes)];
    if let (Some(p), Some(j)) = (&a.report, &json) {
        items.push((p.as_path(), j.as_bytes()));
    }
    write_all_atomic(&items)?;
    text.push_str(&format!(
        "wrote {} ({} features, {} program step{}, {} bytes of parameters)\n",
        a.out().display(),
        model.features(),
        model.program().len(),
        if model.program().len() == 1 { "" } else { "s" },
        model.parameter_bytes()
    ));
    super::finish_gate(&text, gate, a.out())
}

fn run_labels(a: &Args, grid: &RidgeGrid) -> Result<()> {
    let (Some(k), Some(data)) = (&a.kernel, &a.data) else {
        return Err(Error::input(
            "give MODEL (an exact model file), or --kernel EXPR with --data FILE --target COL",
        ));
    };
    let target = a
        .target
        .as_deref()
        .ok_or_else(|| Error::input("labels mode needs --target COL"))?;
    let kernel = super::kernel_arg(k)?;
    let t = read_table(data, Some(target), true)?;
    let src = data.display().to_string();
    check_batch(t.x.view(), t.x.ncols(), &src)?;
    kernel.check_dim(t.x.ncols()).map_err(|e| e.context(&src))?;
    let spec = a.map.spec(kernel, t.x.ncols())?;
    if spec.options.landmarks == kernelpress::features::Landmarks::Support {
        return Err(Error::input(
            "--landmark-rule support takes the landmarks from a teacher's support vectors: it needs an exact model (compile MODEL --calib FILE)",
        ));
    }
    let y = t.target.clone().unwrap();
    let (mut model, info) = compile_labels(
        &spec,
        t.x.view(),
        &y,
        !a.regression,
        a.standardize,
        grid,
        &super::progress::Bars::default(),
    )?;
    for n in &info.notes {
        super::progress::warn(n);
    }
    model.feature_names = t.columns.clone();
    let s = model.decision(t.x.view());
    let idx: Vec<usize> = (0..t.x.nrows()).filter(|&i| audit_row(i)).collect();
    let mut msg = format!(
        "fitted {} features ({} of {}) to the labels of {} rows",
        model.features(),
        spec.method.name(),
        spec.kernel,
        t.x.nrows()
    );
    if model.task().is_classifier() {
        let pred = model.labels_of(s.view());
        let acc = idx.iter().filter(|&&i| pred[i] == y[i]).count() as f64 / idx.len().max(1) as f64;
        msg.push_str(&format!(
            "; accuracy on the audit rows (every tenth row, never fitted on) {acc:.4}"
        ));
        model.report = serde_json::json!({"accuracy_audit_rows": acc, "n_rows": idx.len()});
    }
    model.save(a.out())?;
    msg.push_str(&format!("\nwrote {}\n", a.out().display()));
    super::print_stdout(&msg)
}

/// `--discard-below-gate` with a failed gate: say so, write nothing, exit 3.
fn discard(text: &mut String, a: &Args, why: &str) -> Result<()> {
    text.push_str(&format!(
        "not written: {} (--discard-below-gate)\n",
        a.out().display()
    ));
    super::print_stdout(text)?;
    Err(Error::new(ErrorKind::Gate, why.to_string()))
}

/// Sharded distillation: `--stats-out` (statistics of one shard) or `--from-stats` (merge
/// and fit).
fn run_shards(a: &Args, exact: &ExactModel, grid: &RidgeGrid) -> Result<()> {
    use kernelpress::fit::shard::ShardStats;
    if a.refine.is_some() {
        return Err(Error::input(
            "a sharded distillation does not refine from the command line: refine in one process (compile MODEL --calib FILE --refine N), or sharded from Python (kernelpress.distributed.refine, docs/scaling-out.md)",
        ));
    }
    if a.head_rank.is_some() || a.head_precision.is_some() {
        return Err(Error::input(
            "a sharded distillation does not factor the head or set its precision: compile in one process with --head-rank or --head-precision",
        ));
    }
    if a.budget_or_guard() || a.map.landmarks.is_some() || !matches!(a.head, Head::Distill) {
        return Err(Error::input(
            "a sharded distillation (--stats-out, --from-stats) takes --method and --features with the standard settings: drop the budget, guard, --landmarks and --head flags",
        ));
    }
    if let Some(path) = &a.stats_out {
        // A shard writes statistics only: flags about evaluating or gating a model have
        // nothing to act on here, so they are refused rather than silently ignored.
        let ignored: Vec<&str> = [
            ("--eval", a.eval.is_some()),
            ("--json", a.report.is_some()),
            ("--min-agreement", a.gate.min_agreement.is_some()),
            ("--min-accuracy", a.gate.min_accuracy.is_some()),
            ("--discard-below-gate", a.discard_below_gate),
        ]
        .into_iter()
        .filter_map(|(f, given)| given.then_some(f))
        .collect();
        if !ignored.is_empty() {
            return Err(Error::input(format!(
                "--stats-out writes a shard's statistics only; {} belong{} to the merge (--from-stats): give {} there",
                ignored.join(", "),
                if ignored.len() == 1 { "s" } else { "" },
                if ignored.len() == 1 { "it" } else { "them" }
            )));
        }
        let spec = a.map.spec(exact.kernel().clone(), exact.input_dim())?;
        let calib = super::read_for(
            a.calib.as_deref().expect("clap requires --calib"),
            a.target.as_deref(),
            &exact.feature_names,
            a.by_position,
        )?;
        let (mut st, map) = ShardStats::new(exact, &spec)?;
        let pb = super::progress::bar(1, "shard statistics");
        st.add(exact, &map, calib.x.view(), a.first_row)?;
        pb.finish();
        st.save(path)?;
        let (fit, choose, audit) = st.parts();
        return super::print_stdout(&format!(
            "wrote {}: distillation statistics of calibration rows {}–{} ({fit} to fit, {choose} to choose the ridge, {audit} audit rows left out) for {} with {} features\n",
            path.display(),
            a.first_row + 1,
            a.first_row + st.rows(),
            spec.method.name(),
            spec.features
        ));
    }
    if a.map.method.is_some() || a.map.features.is_some() {
        return Err(Error::input(
            "--from-stats takes the map from the statistics files: drop --method and --features",
        ));
    }
    let mut parts = a.from_stats.iter();
    let first = parts.next().expect("clap requires one file");
    let mut st = ShardStats::load(first)?;
    for p in parts {
        let other = ShardStats::load(p)?;
        st.merge(&other).map_err(|e| e.context(p.display()))?;
    }
    for (a0, b0) in st.gaps() {
        super::progress::warn(format!(
            "calibration rows {}–{} are in no statistics file: the merge skips them (a shard missing, or a --first-row given wrongly?)",
            a0 + 1,
            b0
        ));
    }
    let model = st.fit(exact, grid)?;
    warn_fit_notes(&model);
    super::progress::note(format!(
        "fitted from {} statistics file{} covering {} calibration rows",
        a.from_stats.len(),
        if a.from_stats.len() == 1 { "" } else { "s" },
        st.rows()
    ));
    if a.eval.is_none() {
        super::progress::warn(
            "no --eval: the audit rows stayed with the shards, so there is no report; give --eval FILE to measure the compiled model",
        );
    }
    evaluate_and_finish(a, exact, None, model, None)
}

/// A compile whose map does not depend on the calibration rows and has no bandwidth
/// search reads --calib a chunk at a time (memory: one chunk, the statistics, and the
/// audit rows when the report is computed on them). `None` when the compile needs the
/// rows in memory (landmarks drawn from them, the bandwidth search, a budget or a guard).
fn try_streamed(a: &Args, exact: &ExactModel, grid: &RidgeGrid) -> Result<Option<Result<()>>> {
    use kernelpress::data::RowFile;
    use kernelpress::features::Landmarks;
    use kernelpress::fit::shard::distil_streamed;
    let (Some(path), Head::Distill) = (&a.calib, a.head) else {
        return Ok(None);
    };
    if a.budget_or_guard()
        || a.map.landmarks.is_some()
        || !a.methods.is_empty()
        || a.refine.is_some()
        || a.head_rank.is_some()
        || a.head_precision.is_some()
    {
        return Ok(None);
    }
    let spec = a.map.spec(exact.kernel().clone(), exact.input_dim())?;
    let tunes = !a.no_bandwidth_search && spec.kernel.is_shift_invariant() && !spec.from_data();
    let fixed_landmarks =
        spec.options.landmarks == Landmarks::Support && spec.features <= exact.n_support_vectors();
    if tunes || (spec.from_data() && !fixed_landmarks) {
        return Ok(None);
    }
    let mut file = RowFile::open_for_model(
        path,
        a.target.as_deref(),
        &exact.feature_names,
        a.by_position,
    )?;
    for n in &file.notes {
        super::progress::note(n);
    }
    let keep_audit = a.eval.is_none();
    let mut audit_y: Vec<String> = Vec::new();
    let mut has_target = false;
    let mut next = || -> Result<Option<ndarray::Array2<f64>>> {
        let Some(c) = file.next_chunk(kernelpress::fit::FIT_CHUNK)? else {
            return Ok(None);
        };
        if let (true, Some(t)) = (keep_audit, &c.target) {
            has_target = true;
            for (i, v) in t.iter().enumerate() {
                if audit_row(c.first_row + i) {
                    audit_y.push(v.clone());
                }
            }
        }
        Ok(Some(c.x))
    };
    let keep = |i: usize| keep_audit && audit_row(i);
    let bars = super::progress::Bars::default();
    let (model, audit_x) = distil_streamed(exact, &spec, grid, &mut next, &keep, &bars)?;
    warn_fit_notes(&model);
    let audit = keep_audit.then(|| (audit_x, has_target.then_some(audit_y)));
    Ok(Some(evaluate_and_finish(a, exact, audit, model, None)))
}

/// Prints what the head fit had to do (jitter, retries) as warnings.
fn warn_fit_notes(model: &kernelpress::model::CompiledModel) {
    for n in model
        .fit
        .get("notes")
        .and_then(|v| v.as_array())
        .into_iter()
        .flatten()
    {
        super::progress::warn(n.as_str().unwrap_or(""));
    }
}

/// A library error about a value the user gave with `flag`, naming the flag.
fn flag_error(flag: &str, e: Error) -> Error {
    Error::input(format!("{flag}: {}", e.message()))
}
