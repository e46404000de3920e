//! Exact teachers end to end: kernel ridge against numpy.linalg.solve, SMO against its KKT
//! conditions and an independent scipy QP solution, model files read by the Python
//! safetensors package, and determinism.

mod common;
use common::*;
use kernelpress::exact::{solve_binary, SmoOptions};
use kernelpress::kernel::Kernel;
use ndarray::Array2;

fn lcg(seed: u64) -> impl FnMut() -> f64 {
    let mut s = seed;
    move || {
        s = s
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((s >> 11) as f64) / ((1u64 << 53) as f64)
    }
}

/// Two noisy interleaved classes in 2-D.
fn two_class(n: usize, seed: u64) -> (Vec<Vec<f64>>, Vec<String>) {
    let mut r = lcg(seed);
    let mut xs = Vec::new();
    let mut ys = Vec::new();
    for i in 0..n {
        let c = i % 2;
        let t = r() * 6.0;
        let (cx, cy) = if c == 0 {
            (t.cos() * 2.0, t.sin())
        } else {
            (t.cos() * 2.0 + 1.0, -t.sin() + 0.5)
        };
        xs.push(vec![cx + (r() - 0.5) * 1.2, cy + (r() - 0.5) * 1.2]);
        ys.push(if c == 0 { "neg".into() } else { "pos".into() });
    }
    (xs, ys)
}

#[test]
fn ridge_regression_matches_numpy_solve() {
    let dir = tmpdir("ridge_regression_matches_numpy_solve");
    let mut r = lcg(1);
    let rows: Vec<Vec<f64>> = (0..150)
        .map(|_| vec![r() * 4.0, r() * 10.0 - 5.0, r()])
        .collect();
    let y: Vec<String> = rows
        .iter()
        .map(|v| format!("{}", (v[0]).sin() + 0.1 * v[1] + v[2] * v[2]))
        .collect();
    let train = dir.join("train.csv");
    write_csv(&train, &["a", "b", "c"], &rows, Some(("y", &y)));
    let model = dir.join("m.safetensors");
    ok(&[
        "train",
        "--data",
        s(&train),
        "--target",
        "y",
        "--kernel",
        "gaussian(gamma=0.3)",
        "--model",
        "ridge",
        "--ridge",
        "0.01",
        "--standardize",
        "--out",
        s(&model),
    ]);
    let test = dir.join("test.csv");
    write_csv(
        &test,
        &["a", "b", "c"],
        &rows[..40]
            .iter()
            .map(|v| v.iter().map(|x| x + 0.05).collect())
            .collect::<Vec<_>>(),
        Some(("y", &y[..40])),
    );
    let score = dir.join("score.csv");
    ok(&[
        "score",
        "--decisions",
        s(&model),
        "--data",
        s(&test),
        "--target",
        "y",
        "--out",
        s(&score),
    ]);
    py(
        "ridge.py",
        &[s(&model), s(&train), "y", "0.01", s(&test), s(&score)],
    );
}

#[test]
fn ridge_classification_matches_numpy_solve() {
    let dir = tmpdir("ridge_classification_matches_numpy_solve");
    let (rows, y) = two_class(120, 5);
    let train = dir.join("train.csv");
    write_csv(&train, &["u", "v"], &rows, Some(("kind", &y)));
    let model = dir.join("m.safetensors");
    ok(&[
        "train",
        "--data",
        s(&train),
        "--target",
        "kind",
        "--kernel",
        "polynomial(degree=3, gamma=0.5, offset=1)",
        "--model",
        "ridge",
        "--ridge",
        "0.1",
        "--classify",
        "--out",
        s(&model),
    ]);
    let score = dir.join("score.csv");
    ok(&[
        "score",
        "--decisions",
        s(&model),
        "--data",
        s(&train),
        "--target",
        "kind",
        "--out",
        s(&score),
    ]);
    py(
        "ridge.py",
        &[s(&model), s(&train), "kind", "0.1", s(&train), s(&score)],
    );
    py("score_file.py", &[s(&model), s(&train), "kind", s(&score)]);
}

fn kkt_violation(k: &Kernel, x: &Array2<f64>, y: &[f64], alpha: &[f64], b: f64, c: f64) -> f64 {
    // KKT for the C-SVM dual (Platt 1998): with u_t = y_t f(x_t),
    // α=0 ⇒ u ≥ 1, 0<α<C ⇒ u = 1, α=C ⇒ u ≤ 1. Computed here from scratch.
    let g = k.gram(x.view(), x.view());
    let mut worst: f64 = 0.0;
    for t in 0..y.len() {
        let f: f64 = (0..y.len())
            .map(|i| alpha[i] * y[i] * g[[i, t]])
            .sum::<f64>()
            + b;
        let u = y[t] * f;
        let v = if alpha[t] <= 0.0 {
            (1.0 - u).max(0.0)
        } else if alpha[t] >= c {
            (u - 1.0).max(0.0)
        } else {
            (u - 1.0).abs()
        };
        worst = worst.max(v);
    }
    let eq: f64 = alpha.iter().zip(y).map(|(a, y)| a * y).sum();
    assert!(eq.abs() < 1e-9, "yᵀα = {eq}");
    assert!(alpha.iter().all(|a| *a >= 0.0 && *a <= c));
    worst
}

#[test]
fn smo_meets_kkt_conditions_with_full_and_row_cache() {
    let (rows, ys) = two_class(300, 9);
    let x = Array2::from_shape_vec((300, 2), rows.concat()).unwrap();
    let y: Vec<f64> = ys
        .iter()
        .map(|l| if l == "pos" { 1.0 } else { -1.0 })
        .collect();
    let k: Kernel = "gaussian(gamma=0.8)".parse().unwrap();
    for (cache, name) in [(1 << 30, "full"), (300 * 8 * 20, "20 rows")] {
        let opts = SmoOptions {
            c: 5.0,
            tol: 1e-4,
            cache_bytes: cache,
            max_iter: 0,
        };
        let sol = solve_binary(&k, x.view(), &y, &opts);
        assert!(!sol.hit_cap);
        assert!(sol.gap < 1e-4);
        let v = kkt_violation(&k, &x, &y, &sol.alpha, sol.b, 5.0);
        // The stopping rule m − M < tol bounds every KKT violation by tol (Fan et al. 2005).
        assert!(v < 1e-4 * 1.01, "{name}: KKT violation {v}");
        let nsv = sol.alpha.iter().filter(|a| **a > 0.0).count();
        assert!(nsv > 10 && nsv < 300, "{name}: {nsv} SVs");
    }
}

#[test]
fn svm_matches_independent_scipy_qp() {
    let dir = tmpdir("svm_matches_independent_scipy_qp");
    let (rows, y) = two_class(200, 3);
    let train = dir.join("train.csv");
    write_csv(&train, &["u", "v"], &rows, Some(("kind", &y)));
    let (trows, ty) = two_class(80, 4);
    let test = dir.join("test.csv");
    write_csv(&test, &["u", "v"], &trows, Some(("kind", &ty)));
    let model = dir.join("m.safetensors");
    ok(&[
        "train",
        "--data",
        s(&train),
        "--target",
        "kind",
        "--kernel",
        "gaussian(gamma=0.5)",
        "--model",
        "svm",
        "--c",
        "2",
        "--kkt-gap",
        "1e-6",
        "--out",
        s(&model),
    ]);
    let score = dir.join("score.csv");
    ok(&[
        "score",
        "--decisions",
        s(&model),
        "--data",
        s(&test),
        "--target",
        "kind",
        "--out",
        s(&score),
    ]);
    // labels sorted: neg, pos → positive decision means "pos".
    py(
        "svm_qp.py",
        &[s(&train), "kind", "pos", "0.5", "2", s(&test), s(&score)],
    );
    py("score_file.py", &[s(&model), s(&test), "kind", s(&score)]);
}

#[test]
fn multiclass_svm_file_is_read_by_python_and_deterministic() {
    let dir = tmpdir("multiclass_svm_file_is_read_by_python_and_deterministic");
    let train = dir.join("train.csv");
    head_lines(&root().join("models/pump_train.csv"), &train, 700);
    let m1 = dir.join("m1.safetensors");
    let m2 = dir.join("m2.safetensors");
    let args = |out: &str| {
        vec![
            "train".to_string(),
            "--data".into(),
            s(&train).into(),
            "--target".into(),
            "condition".into(),
            "--kernel".into(),
            "gaussian(gamma=0.25)".into(),
            "--model".into(),
            "svm".into(),
            "--c".into(),
            "10".into(),
            "--standardize".into(),
            "--out".into(),
            out.into(),
        ]
    };
    let a1 = args(s(&m1));
    let o = std::process::Command::new(bin())
        .args(&a1)
        .env("RAYON_NUM_THREADS", "1")
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let a2 = args(s(&m2));
    let o = std::process::Command::new(bin())
        .args(&a2)
        .env("RAYON_NUM_THREADS", "2")
        .output()
        .unwrap();
    assert!(o.status.success());
    assert_eq!(
        std::fs::read(&m1).unwrap(),
        std::fs::read(&m2).unwrap(),
        "model files differ across thread counts"
    );
    let score = dir.join("score.csv");
    ok(&[
        "score",
        "--decisions",
        s(&m1),
        "--data",
        s(&root().join("models/pump_test.csv")),
        "--target",
        "condition",
        "--out",
        s(&score),
    ]);
    py(
        "score_file.py",
        &[
            s(&m1),
            s(&root().join("models/pump_test.csv")),
            "condition",
            s(&score),
        ],
    );
    let info = ok(&["inspect", s(&m1), "--json"]);
    let v: serde_json::Value = serde_json::from_str(&info).unwrap();
    assert_eq!(v["manifest"]["output"]["task"], "ovo");
    assert_eq!(v["manifest"]["output"]["outputs"], 6);
}

#[test]
fn import_from_arrays_scores_like_the_formula() {
    let dir = tmpdir("import_from_arrays_scores_like_the_formula");
    let sv = [0.0, 0.0, 1.0, 0.0, 0.0, 2.0];
    kernelpress::data::write_npy_f64(&dir.join("sv.npy"), &[3, 2], &sv).unwrap();
    kernelpress::data::write_npy_f64(&dir.join("coef.npy"), &[3], &[1.0, -2.0, 0.5]).unwrap();
    let model = dir.join("m.safetensors");
    ok(&[
        "import",
        "--support-vectors",
        s(&dir.join("sv.npy")),
        "--weights",
        s(&dir.join("coef.npy")),
        "--bias",
        "-0.25",
        "--kernel",
        "gaussian(gamma=0.5)",
        "--labels",
        "ok,worn",
        "--out",
        s(&model),
    ]);
    let data = dir.join("d.csv");
    std::fs::write(&data, "p,q\n0,0\n1,1\n").unwrap();
    let out = ok(&["score", "--decisions", s(&model), "--data", s(&data)]);
    let lines: Vec<&str> = out.lines().collect();
    assert_eq!(
        lines[0],
        "label,margin,score_ok,score_worn,decision_worn_vs_ok"
    );
    // By hand: f(0,0) = 1 − 2e^{−½} + 0.5e^{−2} − 0.25.
    let f0: f64 = 1.0 - 2.0 * (-0.5f64).exp() + 0.5 * (-2.0f64).exp() - 0.25;
    let cells: Vec<&str> = lines[1].split(',').collect();
    let got: f64 = cells[4].parse().unwrap();
    assert!((got - f0).abs() < 1e-12);
    assert_eq!(cells[0], if f0 > 0.0 { "worn" } else { "ok" });
    // The class scores: ±half the decision, the margin its size.
    assert_eq!(cells[1].parse::<f64>().unwrap(), got.abs());
    assert_eq!(cells[3].parse::<f64>().unwrap(), 0.5 * got);
    assert_eq!(cells[2].parse::<f64>().unwrap(), -0.5 * got);
    py(
        "score_file.py",
        &[
            s(&model),
            s(&data),
            "none",
            s(&{
                let p = dir.join("score.csv");
                std::fs::write(&p, &out).unwrap();
                p
            }),
        ],
    );
}

/// The exact model's single-row f32 path (support vectors in f32, profiles in f64) against
/// the expansion computed in numpy in f64, and so do its f32 batches (products, profiles
/// and coefficient sums in f32), for every kind of Gram block: Euclidean
/// (Gaussian, Matérn), L1 (Laplacian), dot product (polynomial), and sums, products and
/// scaling of them.
#[test]
fn f32_single_row_path_matches_numpy_for_every_block_kind() {
    use kernelpress::model::{ExactModel, Task};
    let dir = tmpdir("exact_f32");
    let mut next = lcg(11);
    let (n, d, k) = (300, 20, 3);
    let sv = Array2::from_shape_fn((n, d), |_| next() * 2.0 - 1.0);
    let coef = Array2::from_shape_fn((n, k), |_| next() - 0.5);
    let x = Array2::from_shape_fn((40, d), |_| next() * 2.0 - 1.0);
    let dump = |name: &str, a: &Array2<f64>| {
        let p = dir.join(name);
        kernelpress::data::write_npy_f64(&p, &[a.nrows(), a.ncols()], a.as_slice().unwrap())
            .unwrap();
        p
    };
    let (psv, pcoef, px) = (
        dump("sv.npy", &sv),
        dump("coef.npy", &coef),
        dump("x.npy", &x),
    );
    for kernel in [
        "gaussian(gamma=0.05)",
        "matern(nu=1.5, lengthscale=3)",
        "laplacian(gamma=0.1)",
        "polynomial(degree=3, gamma=0.2, offset=1)",
        "gaussian(gamma=0.02) + 0.5 * polynomial(degree=2, gamma=0.1, offset=1)",
        "gaussian(gamma=0.03) * laplacian(gamma=0.05)",
    ] {
        let m = ExactModel::new(
            kernel.parse().unwrap(),
            sv.clone(),
            coef.clone(),
            vec![0.1, -0.2, 0.3],
            Task::Ovr,
            vec!["a".into(), "b".into(), "c".into()],
            None,
        )
        .unwrap();
        let out = py_inline(
            r#"
import sys, numpy as np
from scipy.spatial.distance import cdist
sv, coef, x = (np.load(p) for p in sys.argv[1:4]); kind = sys.argv[4]
def gauss(g): return np.exp(-g * cdist(x, sv, "sqeuclidean"))
def lap(g): return np.exp(-g * cdist(x, sv, "cityblock"))
def poly(p, g, c): return (g * x @ sv.T + c) ** p
def matern15(l):
    r = np.sqrt(3) * cdist(x, sv) / l
    return (1 + r) * np.exp(-r)
K = {
 "gaussian(gamma=0.05)": lambda: gauss(0.05),
 "matern(nu=1.5, lengthscale=3)": lambda: matern15(3.0),
 "laplacian(gamma=0.1)": lambda: lap(0.1),
 "polynomial(degree=3, gamma=0.2, offset=1)": lambda: poly(3, 0.2, 1),
 "gaussian(gamma=0.02) + 0.5 * polynomial(degree=2, gamma=0.1, offset=1)": lambda: gauss(0.02) + 0.5 * poly(2, 0.1, 1),
 "gaussian(gamma=0.03) * laplacian(gamma=0.05)": lambda: gauss(0.03) * lap(0.05),
}[kind]()
s = K @ coef
np.savetxt(sys.stdout, s, fmt="%.17g")
"#,
            &[s(&psv), s(&pcoef), s(&px), kernel],
        );
        let want: Vec<Vec<f64>> = out
            .lines()
            .map(|l| l.split_whitespace().map(|v| v.parse().unwrap()).collect())
            .collect();
        let mut worst = 0.0f64;
        let mut scale = 0.0f64;
        for (i, row) in x.rows().into_iter().enumerate() {
            let got = m.decision_one_f32(row.as_slice().unwrap());
            for (j, g) in got.iter().enumerate() {
                let w = want[i][j] + m.intercept()[j];
                worst = worst.max((g - w).abs());
                scale = scale.max(w.abs());
            }
        }
        assert!(
            worst <= 1e-5 * scale.max(1.0),
            "{kernel}: f32 path vs numpy {worst:e} (scale {scale:.3})"
        );
        // The f32 batches: products, profiles and the coefficient sums all in f32.
        let batch = m.decision_f32(x.view());
        let mut worst_b = 0.0f64;
        for ((i, j), g) in batch.indexed_iter() {
            worst_b = worst_b.max((g - (want[i][j] + m.intercept()[j])).abs());
        }
        assert!(
            worst_b <= 1e-5 * scale.max(1.0),
            "{kernel}: f32 batch vs numpy {worst_b:e} (scale {scale:.3})"
        );
    }
}

#[test]
fn import_from_arrays_attaches_input_scaling_and_hints_at_a_transposed_array() {
    let dir = tmpdir("import_from_arrays_scaling");
    let sv = [0.0, 0.0, 1.0, 0.0, 0.0, 2.0];
    kernelpress::data::write_npy_f64(&dir.join("sv.npy"), &[3, 2], &sv).unwrap();
    kernelpress::data::write_npy_f64(&dir.join("w.npy"), &[3], &[1.0, -2.0, 0.5]).unwrap();
    kernelpress::data::write_npy_f64(
        &dir.join("wt.npy"),
        &[2, 3],
        &[1.0, -2.0, 0.5, 0.1, 0.2, 0.3],
    )
    .unwrap();
    kernelpress::data::write_npy_f64(&dir.join("div.npy"), &[2], &[2.0, 4.0]).unwrap();
    let model = dir.join("m.safetensors");
    ok(&[
        "import",
        "--support-vectors",
        s(&dir.join("sv.npy")),
        "--weights",
        s(&dir.join("w.npy")),
        "--bias",
        "-0.25",
        "--kernel",
        "gaussian(gamma=0.5)",
        "--subtract",
        "1,-1",
        "--divide-by",
        s(&dir.join("div.npy")),
        "--out",
        s(&model),
    ]);
    let data = dir.join("d.csv");
    std::fs::write(&data, "p,q\n3,3\n").unwrap();
    let out = ok(&["score", s(&model), "--data", s(&data)]);
    // By hand: s(3, 3) = ((3 − 1)/2, (3 + 1)/4) = (1, 1); f = Σ w_i e^{−½‖(1,1) − sv_i‖²} − 0.25
    //        = e^{−1} − 2e^{−½} + 0.5e^{−1} − 0.25.
    let want = (-1f64).exp() - 2.0 * (-0.5f64).exp() + 0.5 * (-1f64).exp() - 0.25;
    let got: f64 = out.lines().nth(1).unwrap().parse().unwrap();
    assert!((got - want).abs() < 1e-12, "{got} vs {want}");
    let e = bad(&[
        "import",
        "--support-vectors",
        s(&dir.join("sv.npy")),
        "--weights",
        s(&dir.join("wt.npy")),
        "--bias",
        "0,0",
        "--kernel",
        "gaussian(gamma=0.5)",
        "--out",
        s(&dir.join("t.safetensors")),
    ]);
    assert!(e.contains("looks transposed"), "{e}");
    let e = bad(&[
        "import",
        "--support-vectors",
        s(&dir.join("sv.npy")),
        "--weights",
        s(&dir.join("w.npy")),
        "--bias",
        "0",
        "--kernel",
        "gaussian(gamma=0.5)",
        "--subtract",
        "1,2,3",
        "--divide-by",
        "1,1",
        "--out",
        s(&dir.join("u.safetensors")),
    ]);
    assert!(e.contains("--subtract: 3 values; expected 2"), "{e}");
}
