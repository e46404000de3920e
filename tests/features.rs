//! Statistical tests of the feature maps against the published results (seeded, so
//! deterministic). Each bound is a computed confidence bound, not a guess.

mod common;
use common::*;
use kernelpress::features::{FeatureSpec, FourierVariant, Method};
use kernelpress::kernel::Kernel;
use ndarray::Array2;

fn k(s: &str) -> Kernel {
    s.parse().unwrap()
}

/// ⟨z(x), z(y)⟩ over seeds 0..s.
fn estimates(spec: &FeatureSpec, x: &[f64], y: &[f64], s: u64) -> Vec<f64> {
    let d = x.len();
    let pts = Array2::from_shape_vec((2, d), [x, y].concat()).unwrap();
    (0..s)
        .map(|seed| {
            let mut sp = spec.clone();
            sp.seed = seed;
            let (map, _) = sp.sample(None).unwrap();
            let z = map.transform(pts.view());
            z.row(0).dot(&z.row(1))
        })
        .collect()
}

fn mean_var(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let m = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|a| (a - m) * (a - m)).sum::<f64>() / (n - 1.0);
    (m, var)
}

#[test]
fn unbiased_for_every_pair_that_claims_it() {
    // Rahimi & Recht 2007 (Fourier), Yu et al. 2016 (ORF rows are marginally i.i.d.),
    // Kar & Karnick 2012, Pham & Pagh 2013, Cho & Saul 2009: E⟨z(x), z(y)⟩ = k(x, y).
    // Bound: |mean − k| < 4.5 standard errors (all cases together stay below a 1e-4
    // false-alarm rate under normality).
    let x = [0.3, -0.5, 0.8];
    let y = [-0.2, 0.4, 0.5];
    let cases: Vec<(&str, Method, FourierVariant)> = vec![
        (
            "gaussian(gamma=0.5)",
            Method::Fourier,
            FourierVariant::Paired,
        ),
        (
            "gaussian(gamma=0.5)",
            Method::Fourier,
            FourierVariant::Phase,
        ),
        (
            "laplacian(gamma=0.7)",
            Method::Fourier,
            FourierVariant::Paired,
        ),
        (
            "matern(nu=0.5, lengthscale=1.2)",
            Method::Fourier,
            FourierVariant::Paired,
        ),
        (
            "matern(nu=1.5, lengthscale=1.2)",
            Method::Fourier,
            FourierVariant::Paired,
        ),
        (
            "matern(nu=2.5, lengthscale=0.8)",
            Method::Fourier,
            FourierVariant::Phase,
        ),
        (
            "rational_quadratic(alpha=1.5, lengthscale=0.9)",
            Method::Fourier,
            FourierVariant::Paired,
        ),
        (
            "gaussian(lengthscale=[1, 2, 0.5])",
            Method::Orthogonal,
            FourierVariant::Paired,
        ),
        (
            "matern(nu=1.5, lengthscale=1)",
            Method::Orthogonal,
            FourierVariant::Paired,
        ),
        (
            "rational_quadratic(alpha=0.8, lengthscale=1)",
            Method::Orthogonal,
            FourierVariant::Paired,
        ),
        (
            "polynomial(degree=3, gamma=0.5, offset=1)",
            Method::Maclaurin,
            FourierVariant::Paired,
        ),
        (
            "polynomial(degree=2, gamma=1, offset=0.5)",
            Method::TensorSketch,
            FourierVariant::Paired,
        ),
        ("arccos(order=0)", Method::Relu, FourierVariant::Paired),
        ("arccos(order=1)", Method::Relu, FourierVariant::Paired),
        (
            "2 * gaussian(gamma=0.5) + laplacian(gamma=1)",
            Method::Fourier,
            FourierVariant::Paired,
        ),
        (
            "gaussian(gamma=0.5) * matern(nu=2.5, lengthscale=1)",
            Method::Fourier,
            FourierVariant::Paired,
        ),
        (
            "gaussian(gamma=0.5) * linear()",
            Method::Fourier,
            FourierVariant::Paired,
        ),
    ];
    for (e, m, v) in cases {
        let mut spec = FeatureSpec::new(k(e), m, 3, 32, 0);
        spec.options.fourier = v;
        let est = estimates(&spec, &x, &y, 600);
        let (mean, var) = mean_var(&est);
        let se = (var / est.len() as f64).sqrt();
        let want = spec.kernel.eval(&x, &y);
        assert!(
            (mean - want).abs() < 4.5 * se + 1e-12,
            "{e} {m:?} {v:?}: mean {mean} vs k {want} (se {se})"
        );
    }
}

#[test]
fn fourier_variance_matches_sutherland_schneider() {
    // Sutherland & Schneider, UAI 2015: Gaussian σ = 1, ‖Δ‖ = 1:
    // D·Var_paired = 0.3995764, D·Var_phase = 0.6997882.
    let x = [0.0, 0.0];
    let y = [0.6, 0.8];
    for (variant, want) in [
        (FourierVariant::Paired, 0.3995764),
        (FourierVariant::Phase, 0.6997882),
    ] {
        let dd = 16usize;
        let mut spec = FeatureSpec::new(k("gaussian(gamma=0.5)"), Method::Fourier, 2, dd, 0);
        spec.options.fourier = variant;
        let est = estimates(&spec, &x, &y, 4000);
        let (mean, var) = mean_var(&est);
        // Standard error of the sample variance from the fourth central moment.
        let n = est.len() as f64;
        let m4 = est.iter().map(|a| (a - mean).powi(4)).sum::<f64>() / n;
        let se = ((m4 - var * var) / n).sqrt();
        let got = dd as f64 * var;
        assert!(
            (var - want / dd as f64).abs() < 4.5 * se,
            "{variant:?}: D·Var {got} vs {want} (se of D·Var {})",
            dd as f64 * se
        );
    }
}

fn var_at(method: Method, d: usize, z: f64, seeds: u64) -> f64 {
    // Pair at distance z·σ along a fixed random-looking direction (σ = 1).
    let dir: Vec<f64> = (0..d).map(|i| ((i * 7 + 3) as f64).sin()).collect();
    let norm = dir.iter().map(|v| v * v).sum::<f64>().sqrt();
    let x = vec![0.0; d];
    let y: Vec<f64> = dir.iter().map(|v| v / norm * z).collect();
    let spec = FeatureSpec::new(k("gaussian(gamma=0.5)"), method, d, 2 * d, 0);
    mean_var(&estimates(&spec, &x, &y, seeds)).1
}

#[test]
fn orthogonal_and_hadamard_beat_fourier_at_d_frequencies() {
    // Yu et al., NIPS 2016: at D = d frequencies, z = 1:
    // Var_RFF = (1 − e^{−1})²/(2d); Var_ORF/Var_RFF = 0.158 (d=16), 0.098 (d=64).
    for (d, ratio_ref, seeds) in [(16usize, 0.158, 3000u64), (64, 0.098, 1500)] {
        let rff = var_at(Method::Fourier, d, 1.0, seeds);
        let orf = var_at(Method::Orthogonal, d, 1.0, seeds);
        let sorf = var_at(Method::Hadamard, d, 1.0, seeds);
        let rff_ref = (1.0 - (-1.0f64).exp()).powi(2) / (2.0 * d as f64);
        // Relative standard error of a sample variance is about √(2/(S−1)) for near-normal
        // estimates; allow 4.5 of them (kurtosis of these estimates is modest).
        let rel = 4.5 * (2.0 / (seeds as f64 - 1.0)).sqrt();
        assert!(
            (rff / rff_ref - 1.0).abs() < rel * 1.5,
            "d={d}: RFF var {rff} vs {rff_ref}"
        );
        let ratio = orf / rff_ref;
        assert!(
            (ratio / ratio_ref - 1.0).abs() < rel * 2.0,
            "d={d}: ORF ratio {ratio} vs {ratio_ref}"
        );
        eprintln!(
            "d={d}: rff {rff} (ref {rff_ref}) orf ratio {ratio} (ref {ratio_ref}) sorf ratio {}",
            sorf / rff_ref
        );
        assert!(
            orf < rff && sorf < rff,
            "d={d}: orf {orf} sorf {sorf} rff {rff}"
        );
        assert!(
            sorf < 0.5 * rff,
            "d={d}: SORF should be far below RFF: {sorf} vs {rff}"
        );
    }
}

fn gram_error(spec: &FeatureSpec, x: &Array2<f64>, seeds: u64) -> f64 {
    let g = spec.kernel.gram(x.view(), x.view());
    let gn = g.iter().map(|v| v * v).sum::<f64>().sqrt();
    let mut tot = 0.0;
    for s in 0..seeds {
        let mut sp = spec.clone();
        sp.seed = s;
        let (map, _) = sp.sample(None).unwrap();
        let z = map.transform(x.view());
        let e = &z.dot(&z.t()) - &g;
        tot += e.iter().map(|v| v * v).sum::<f64>().sqrt() / gn;
    }
    tot / seeds as f64
}

#[test]
fn monte_carlo_error_falls_like_inverse_sqrt_d_and_qmc_beats_it() {
    // Rahimi & Recht 2007: Monte-Carlo error O(D^{−1/2}); Yang et al. 2014: QMC beats MC in
    // low dimension.
    let x = Array2::from_shape_fn((60, 3), |(i, j)| ((i * 3 + j) as f64 * 0.77).sin() * 1.5);
    let ds = [32usize, 128, 512, 2048];
    for m in [Method::Fourier, Method::Fastfood] {
        let errs: Vec<f64> = ds
            .iter()
            .map(|&dd| {
                gram_error(
                    &FeatureSpec::new(k("gaussian(gamma=0.4)"), m, 3, dd, 0),
                    &x,
                    6,
                )
            })
            .collect();
        let lx: Vec<f64> = ds.iter().map(|v| (*v as f64).ln()).collect();
        let ly: Vec<f64> = errs.iter().map(|v| v.ln()).collect();
        let (mx, my) = (lx.iter().sum::<f64>() / 4.0, ly.iter().sum::<f64>() / 4.0);
        let slope = lx
            .iter()
            .zip(&ly)
            .map(|(a, b)| (a - mx) * (b - my))
            .sum::<f64>()
            / lx.iter().map(|a| (a - mx).powi(2)).sum::<f64>();
        eprintln!("{m:?}: slope {slope}, errors {errs:?}");
        assert!(
            (-0.6..=-0.4).contains(&slope),
            "{m:?}: slope {slope}, errors {errs:?}"
        );
    }
    for dd in [64usize, 256, 1024] {
        let mc = gram_error(
            &FeatureSpec::new(k("gaussian(gamma=0.4)"), Method::Fourier, 3, dd, 0),
            &x,
            6,
        );
        for seq in [
            kernelpress::features::Sequence::Halton,
            kernelpress::features::Sequence::Sobol,
        ] {
            let mut spec = FeatureSpec::new(k("gaussian(gamma=0.4)"), Method::Quasi, 3, dd, 0);
            spec.options.sequence = seq;
            let q = gram_error(&spec, &x, 6);
            eprintln!("D={dd} {seq:?}: quasi {q} vs fourier {mc}");
            assert!(q < mc, "D={dd} {seq:?}: quasi {q} vs fourier {mc}");
        }
    }
}

#[test]
fn walsh_hadamard_matches_scipy() {
    let dir = tmpdir("walsh_hadamard_matches_scipy");
    for n in [1usize, 2, 8, 64, 1024] {
        let x: Vec<f64> = (0..n).map(|i| ((i * 13 + 1) as f64 * 0.37).sin()).collect();
        let mut y = x.clone();
        kernelpress::transform::wht_in_place(&mut y);
        kernelpress::data::write_npy_f64(&dir.join(format!("x{n}.npy")), &[n], &x).unwrap();
        kernelpress::data::write_npy_f64(&dir.join(format!("y{n}.npy")), &[n], &y).unwrap();
    }
    py("wht.py", &[s(&dir)]);
}

#[test]
fn featurize_gram_matches_scipy() {
    let dir = tmpdir("featurize_gram_matches_scipy");
    let x = Array2::from_shape_fn((80, 4), |(i, j)| ((i * 4 + j) as f64 * 0.29).cos());
    let rows: Vec<Vec<f64>> = x.rows().into_iter().map(|r| r.to_vec()).collect();
    let data = dir.join("x.csv");
    write_csv(&data, &["a", "b", "c", "d"], &rows, None);
    for (expr, spec, method) in [
        (
            "gaussian(gamma=0.5)",
            r#"{"name":"gaussian","gamma":0.5}"#,
            "orthogonal",
        ),
        (
            "laplacian(gamma=0.3)",
            r#"{"name":"laplacian","gamma":0.3}"#,
            "fourier",
        ),
        (
            "matern(nu=1.5, lengthscale=1)",
            r#"{"name":"matern","nu":1.5,"lengthscale":1.0}"#,
            "quasi",
        ),
        (
            "polynomial(degree=2, gamma=1, offset=1)",
            r#"{"name":"polynomial","degree":2,"gamma":1.0,"coef0":1.0}"#,
            "tensorsketch",
        ),
        (
            "gaussian(gamma=0.5)",
            r#"{"name":"gaussian","gamma":0.5}"#,
            "nystrom",
        ),
    ] {
        let z = dir.join(format!("z_{method}.npy"));
        ok(&[
            "featurize",
            "--kernel",
            expr,
            "--method",
            method,
            "--features",
            "4096",
            "--seed",
            "1",
            "--data",
            s(&data),
            "--out",
            s(&z),
        ]);
        // Bound: Monte-Carlo error ~ c/√D; 0.1 relative Frobenius error is loose at D = 4096
        // for these smooth kernels (common practice), and Nyström with 80 ≤ D is exact.
        let tol = if method == "nystrom" { "1e-8" } else { "0.1" };
        py("featurize_gram.py", &[s(&data), spec, s(&z), tol]);
    }
}

#[test]
fn featurize_writes_csv_and_refuses_bad_pairs() {
    let dir = tmpdir("featurize_writes_csv_and_refuses_bad_pairs");
    let data = dir.join("x.csv");
    std::fs::write(&data, "a,b\n1,2\n3,4\n").unwrap();
    let out = dir.join("z.csv");
    ok(&[
        "featurize",
        "--kernel",
        "gaussian(gamma=1)",
        "--method",
        "hadamard",
        "--features",
        "8",
        "--data",
        s(&data),
        "--out",
        s(&out),
    ]);
    let text = std::fs::read_to_string(&out).unwrap();
    assert_eq!(text.lines().count(), 3);
    assert_eq!(text.lines().next().unwrap().split(',').count(), 8);
    let e = bad(&[
        "featurize",
        "--kernel",
        "laplacian(gamma=1)",
        "--method",
        "fastfood",
        "--features",
        "8",
        "--data",
        s(&data),
        "--out",
        s(&dir.join("y.npy")),
    ]);
    assert!(e.contains("fourier, quasi, nystrom"), "{e}");
    assert!(!dir.join("y.npy").exists());
}

#[test]
fn taylor_features_match_the_scipy_gram() {
    // Cotter, Keshet & Srebro 2011: the degree-p Taylor map of exp(−γ‖x−y‖²) has C(d+p, p)
    // features and its error falls quickly with p. Checked against scipy's Gram matrix, with
    // per-dimension lengthscales too.
    let dir = tmpdir("taylor_features_match_the_scipy_gram");
    let x = Array2::from_shape_fn((60, 3), |(i, j)| ((i * 3 + j) as f64 * 0.37).sin());
    let rows: Vec<Vec<f64>> = x.rows().into_iter().map(|r| r.to_vec()).collect();
    let data = dir.join("x.csv");
    write_csv(&data, &["a", "b", "c"], &rows, None);
    for (expr, spec, features, used, tol) in [
        // d = 3: degree 4 gives C(7, 4) = 35 features, degree 12 gives C(15, 12) = 455.
        (
            "gaussian(gamma=0.5)",
            r#"{"name":"gaussian","gamma":0.5}"#,
            "40",
            35,
            "0.1",
        ),
        (
            "gaussian(gamma=0.5)",
            r#"{"name":"gaussian","gamma":0.5}"#,
            "455",
            455,
            "1e-5",
        ),
        (
            "gaussian(lengthscale=[1, 2, 0.5])",
            r#"{"name":"gaussian_ls","lengthscale":[1, 2, 0.5]}"#,
            "1000",
            969,
            "1e-3",
        ),
    ] {
        let z = dir.join(format!("z_{features}.npy"));
        let out = ok(&[
            "featurize",
            "--kernel",
            expr,
            "--method",
            "taylor",
            "--features",
            features,
            "--data",
            s(&data),
            "--out",
            s(&z),
        ]);
        assert!(out.contains(&format!("× {used} features")), "{out}");
        py("featurize_gram.py", &[s(&data), spec, s(&z), tol]);
    }
}
