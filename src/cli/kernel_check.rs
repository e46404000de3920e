//! `kernelpress kernel-check`: a numerical Mercer check (a necessary condition) for a kernel
//! expression: draw points (or read them), build the Gram matrix, report its eigenvalues.

use clap::ValueEnum;
use kernelpress::data::read_table;
use kernelpress::{linalg, Error, Result};
use ndarray::Array2;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal, Uniform};
use std::path::PathBuf;

#[derive(Debug, Clone, Copy, ValueEnum)]
pub(crate) enum Dist {
    /// Standard normal coordinates.
    Gaussian,
    /// Uniform on [−1, 1] per coordinate.
    Uniform,
}

/// Check numerically whether a kernel's Gram matrices are positive semidefinite.
///
/// A negative eigenvalue proves the kernel is not positive definite; none found is only
/// evidence (a necessary condition on these points). Exit code 0 either way.
///
/// Example:
///   kernelpress kernel-check --kernel 'sigmoid(gamma=1, coef0=-1)' --dim 3 --json
#[derive(Debug, clap::Args)]
#[command(verbatim_doc_comment)]
pub(crate) struct Args {
    /// Kernel expression.
    #[arg(long)]
    kernel: String,
    /// Input dimension of the drawn points.
    #[arg(long)]
    dim: Option<usize>,
    /// Number of points.
    #[arg(long, default_value_t = 200)]
    points: usize,
    /// Seed for the points (ChaCha20).
    #[arg(long, default_value_t = 0)]
    seed: u64,
    /// Distribution of the drawn points.
    #[arg(long, value_enum, default_value = "gaussian")]
    dist: Dist,
    /// Scale applied to the drawn points.
    #[arg(long, default_value_t = 1.0)]
    spread: f64,
    /// Use the rows of this data file (CSV or .npy) instead of drawn points.
    #[arg(long)]
    data: Option<PathBuf>,
    /// Number of smallest eigenvalues to list.
    #[arg(long, default_value_t = 5)]
    show: usize,
    /// Print one JSON object.
    #[arg(long)]
    json: bool,
}

/// The verdict of a numerical Mercer check.
pub(crate) struct Check {
    pub eig: Vec<f64>,
    pub tol: f64,
    pub negative: usize,
}

pub(crate) fn check(k: &kernelpress::kernel::Kernel, x: &Array2<f64>) -> Result<Check> {
    kernelpress::limits::check_alloc((x.nrows() * x.nrows()) as u64, 16, "the Gram matrix")?;
    let g = k.gram(x.view(), x.view());
    if let Some(i) = g.iter().position(|v| !v.is_finite()) {
        let n = x.nrows();
        return Err(Error::input(format!(
            "kernel {k} overflows on these points: K[{}, {}] = {} (choose a smaller gamma, degree or spread)",
            i / n,
            i % n,
            g[[i / n, i % n]]
        )));
    }
    // Symmetrise against rounding in the blocked product.
    let g = (&g + &g.t()) * 0.5;
    let eig = linalg::eigvalsh(g.view())?;
    let scale = eig.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    // Common practice: eigenvalues within n·ε·‖K‖ (×10) of zero are rounding noise.
    let tol = 10.0 * x.nrows() as f64 * f64::EPSILON * scale.max(f64::MIN_POSITIVE);
    let negative = eig.iter().filter(|v| **v < -tol).count();
    Ok(Check { eig, tol, negative })
}

pub(crate) fn run(a: Args) -> Result<()> {
    let kernel = super::kernel_arg(&a.kernel)?;
    let x = match &a.data {
        Some(p) => {
            let t = read_table(p, None, false)?;
            kernelpress::data::check_batch(t.x.view(), t.x.ncols(), &p.display().to_string())?;
            t.x
        }
        None => {
            let d = a
                .dim
                .ok_or_else(|| Error::input("--dim is required unless --data is given"))?;
            if d == 0 || a.points == 0 || a.points > 10_000 {
                return Err(Error::input(format!(
                    "--dim {d} / --points {} invalid: need dim ≥ 1 and 1 ≤ points ≤ 10000",
                    a.points
                )));
            }
            kernelpress::limits::check_alloc(
                (a.points as u64).saturating_mul(d as u64),
                8,
                &format!("{} points in {d} dimensions", a.points),
            )?;
            if !(a.spread > 0.0) || !a.spread.is_finite() {
                return Err(Error::input("--spread must be a positive finite number"));
            }
            let mut rng = rand::rngs::ChaCha20Rng::seed_from_u64(a.seed);
            let u = Uniform::new(-1.0, 1.0).unwrap();
            Array2::from_shape_simple_fn((a.points, d), || {
                a.spread
                    * match a.dist {
                        Dist::Gaussian => StandardNormal.sample(&mut rng),
                        Dist::Uniform => u.sample(&mut rng),
                    }
            })
        }
    };
    kernel.check_dim(x.ncols())?;
    let c = check(&kernel, &x)?;
    let n = c.eig.len();
    let psd = c.negative == 0;
    let smallest: Vec<f64> = c.eig.iter().take(a.show.min(n)).copied().collect();
    if a.json {
        let v = serde_json::json!({
            "kernel": kernel.to_string(),
            "points": n,
            "dim": x.ncols(),
            "seed": a.seed,
            "min_eigenvalue": c.eig[0],
            "max_eigenvalue": c.eig[n - 1],
            "smallest_eigenvalues": smallest,
            "negative_count": c.negative,
            "tolerance": c.tol,
            "psd": psd,
        });
        return super::print_stdout(&format!("{v}\n"));
    }
    let sig = |v: f64| format!("{v:.3e}");
    let rows = [
        ("kernel", kernel.to_string()),
        ("points", format!("{n} in {} dimensions", x.ncols())),
        ("largest eigenvalue", sig(c.eig[n - 1])),
        (
            "smallest eigenvalues",
            smallest
                .iter()
                .map(|v| sig(*v))
                .collect::<Vec<_>>()
                .join(", "),
        ),
        (
            "negative eigenvalues",
            format!(
                "{} (below −{:.1e}, the rounding tolerance)",
                c.negative, c.tol
            ),
        ),
        (
            "verdict",
            if psd {
                "numerically positive semidefinite on these points (necessary, not sufficient)"
                    .to_string()
            } else {
                "NOT positive semidefinite: this kernel is not a Mercer kernel".to_string()
            },
        ),
    ];
    let mut s = String::new();
    for (k, v) in rows {
        s.push_str(&format!("{k:<22}{v}\n"));
    }
    super::print_stdout(&s)
}
