//! `kernelpress featurize`: kernel (or a model's kernel) + method + feature count + seed +
//! data → random features as `.npy` (or CSV).

use clap::ValueEnum;
use kernelpress::data::{check_batch, read_table, write_npy_f64};
use kernelpress::features::{parse_landmarks, parse_sequence, FeatureSpec, FourierVariant, Method};
use kernelpress::model::ExactModel;
use kernelpress::{Error, Result};
use std::path::{Path, PathBuf};

#[derive(Debug, Clone, Copy, ValueEnum)]
pub(crate) enum Variant {
    /// [cos, sin] pairs (lower variance).
    Paired,
    /// cos with a random phase.
    Phase,
}

/// Shared feature-map flags (featurize, compile).
#[derive(Debug, Clone, clap::Args)]
pub(crate) struct MapArgs {
    /// Method: fourier, orthogonal, hadamard, fastfood, quasi, nystrom, maclaurin,
    /// tensorsketch, relu, identity, taylor.
    #[arg(long)]
    pub method: Option<String>,
    /// Number of features D.
    #[arg(long)]
    pub features: Option<usize>,
    /// Seed of the ChaCha20 generator that draws the map.
    #[arg(long, default_value_t = 0)]
    pub seed: u64,
    /// Output of the Fourier-type methods.
    #[arg(long, value_enum, default_value = "paired")]
    pub variant: Variant,
    /// quasi: low-discrepancy sequence (halton or sobol).
    #[arg(long, default_value = "halton")]
    pub sequence: String,
    /// quasi: do not scramble the points (deterministic, seed ignored).
    #[arg(long)]
    pub no_scramble: bool,
    /// nystrom: landmark rule (uniform, kmeans++, leverage, or support: compile only, the
    /// teacher's support vectors of largest total |coefficient|, topped up with calibration
    /// rows). k-means++ costs one kernel column over all rows per landmark.
    #[arg(long, default_value = "uniform")]
    pub landmark_rule: String,
    /// nystrom: take the landmarks from this file (CSV or .npy, raw inputs) instead.
    #[arg(long)]
    pub landmarks: Option<PathBuf>,
}

impl MapArgs {
    pub(crate) fn spec(
        &self,
        kernel: kernelpress::kernel::Kernel,
        d: usize,
    ) -> Result<FeatureSpec> {
        let method = self
            .method
            .as_deref()
            .ok_or_else(|| Error::input("--method is required (or, with compile, a budget: --budget-us, --max-bytes or --max-disagreement)"))?;
        let features = self
            .features
            .ok_or_else(|| Error::input("--features is required (or, with compile, a budget: --budget-us, --max-bytes or --max-disagreement)"))?;
        let mut spec = FeatureSpec::new(kernel, Method::parse(method)?, d, features, self.seed);
        spec.options.fourier = match self.variant {
            Variant::Paired => FourierVariant::Paired,
            Variant::Phase => FourierVariant::Phase,
        };
        spec.options.sequence = parse_sequence(&self.sequence)?;
        spec.options.scramble = !self.no_scramble;
        spec.options.landmarks = parse_landmarks(&self.landmark_rule)?;
        spec.validate()?;
        Ok(spec)
    }
}

/// Compute random features of a data set and write them as .npy (or CSV).
///
/// The features z satisfy ⟨z(x), z(y)⟩ ≈ k(x, y). With --model, the model's kernel and
/// input scaling are used.
///
/// Example:
///   kernelpress featurize --kernel 'gaussian(gamma=0.25)' --method orthogonal --features 512
///       --seed 7 --data models/pump_test.csv --target condition --out z.npy
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// Kernel expression.
    #[arg(long, conflicts_with = "model")]
    kernel: Option<String>,
    /// Take the kernel (and input scaling) from this exact model file.
    #[arg(long)]
    model: Option<PathBuf>,
    #[command(flatten)]
    map: MapArgs,
    /// Data: CSV with a header row, or .npy.
    #[arg(long)]
    data: PathBuf,
    /// A target column to leave out of the features.
    #[arg(long)]
    target: Option<String>,
    /// Output: .npy (float64), or .csv.
    #[arg(long)]
    out: PathBuf,
}

pub(crate) fn read_landmarks(
    p: &Path,
    d: usize,
    scale: &dyn Fn(ndarray::ArrayView2<f64>) -> ndarray::Array2<f64>,
) -> Result<ndarray::Array2<f64>> {
    let t = read_table(p, None, false)?;
    check_batch(t.x.view(), d, &p.display().to_string())?;
    Ok(scale(t.x.view()))
}

pub(crate) fn run(a: Args) -> Result<()> {
    let mut ins: Vec<&std::path::Path> = vec![&a.data];
    for p in [&a.model, &a.map.landmarks].into_iter().flatten() {
        ins.push(p);
    }
    super::guard_outputs(&ins, &[(&a.out, false)])?;
    let (kernel, model) = match (&a.kernel, &a.model) {
        (Some(k), None) => (super::kernel_arg(k)?, None),
        (None, Some(m)) => {
            let em = ExactModel::load(m)?;
            (em.kernel().clone(), Some(em))
        }
        _ => return Err(Error::input("give --kernel EXPR or --model FILE")),
    };
    let ext = a
        .out
        .extension()
        .map(|e| e.to_string_lossy().to_ascii_lowercase())
        .unwrap_or_default();
    if ext != "npy" && ext != "csv" {
        return Err(Error::input(format!(
            "--out {}: featurize writes .npy (float64) or .csv; name the file with one of those extensions",
            a.out.display()
        )));
    }
    let t = read_table(&a.data, a.target.as_deref(), false)?;
    let src = a.data.display().to_string();
    check_batch(t.x.view(), t.x.ncols(), &src)?;
    kernel.check_dim(t.x.ncols()).map_err(|e| e.context(&src))?;
    let scale = |x: ndarray::ArrayView2<f64>| match &model {
        Some(m) => m.scale_inputs(x),
        None => x.to_owned(),
    };
    let x = scale(t.x.view());
    let spec = a.map.spec(kernel, x.ncols())?;
    if spec.options.landmarks == kernelpress::features::Landmarks::Support {
        return Err(Error::input(
            "--landmark-rule support takes the landmarks from a teacher's support vectors: it needs an exact model (compile MODEL --calib FILE)",
        ));
    }
    let pool = match &a.map.landmarks {
        Some(p) => Some(read_landmarks(p, x.ncols(), &scale)?),
        None => None,
    };
    let (map, info) = spec.sample(Some(pool.as_ref().map(|p| p.view()).unwrap_or(x.view())))?;
    for n in &info.notes {
        super::progress::warn(n);
    }
    kernelpress::limits::check_alloc(
        (x.nrows() as u64).saturating_mul(map.output_dim() as u64),
        8,
        &format!("{} rows × {} features", x.nrows(), map.output_dim()),
    )?;
    let pb = super::progress::bar(1, "featurize");
    let z = map.transform(x.view());
    pb.finish();
    let is_csv = ext == "csv";
    if is_csv {
        let header: Vec<String> = (0..z.ncols()).map(|j| format!("z{j}")).collect();
        let rows: Vec<Vec<String>> = z
            .rows()
            .into_iter()
            .map(|r| r.iter().map(|v| format!("{v:?}")).collect())
            .collect();
        kernelpress::data::write_csv(&a.out, &header, &rows)?;
    } else {
        write_npy_f64(&a.out, &[z.nrows(), z.ncols()], z.as_slice().unwrap())?;
    }
    let rank = match (info.rank, info.landmarks) {
        (Some(r), Some(l)) => format!("; Nyström rank {r} of {l} landmarks"),
        _ => String::new(),
    };
    super::print_stdout(&format!(
        "{} rows × {} features ({} of {}, seed {}; {} steps, {} bytes of parameters, {} flops/row{rank}) → {}\n",
        z.nrows(),
        z.ncols(),
        spec.method.name(),
        spec.kernel,
        spec.seed,
        map.program.len(),
        map.program.param_bytes(),
        map.program.cost().flops,
        a.out.display()
    ))
}
