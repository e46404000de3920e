//! Each step against its defining formula written out directly, the file codec, and the
//! builder's checks.

use super::*;
use crate::format::TensorFile;
use ndarray::array;

fn run(step: impl Into<Step>, x: Array2<f64>) -> Array2<f64> {
    let mut b = Builder::new(x.ncols());
    let v = b.push(step, &[Builder::INPUT]).unwrap();
    let p = b.finish(v);
    let y = p.apply_chunk(x.view());
    // The file codec gives back a program that computes the same.
    let back = round_trip(&p);
    assert_eq!(back.apply_chunk(x.view()), y);
    y
}

fn round_trip(p: &Program) -> Program {
    let mut f = TensorFile::default();
    let v = p.write(&mut f);
    f.manifest.insert("format_version".into(), json!(2));
    let bytes = f.to_bytes().unwrap();
    let g = TensorFile::from_bytes(&bytes, "mem").unwrap();
    Program::read(&v, &g, p.input_dim(), "mem").unwrap()
}

#[test]
fn elementwise_steps_follow_their_formulas() {
    let x = array![[1.0, -2.0, 3.0], [0.5, 0.0, -4.0]];
    assert_eq!(
        run(steps::Scale::new(vec![2.0, 3.0, -1.0]).unwrap(), x.clone()),
        array![[2.0, -6.0, -3.0], [1.0, 0.0, 4.0]]
    );
    assert_eq!(
        run(steps::ConstScale::new(0.5).unwrap(), x.clone()),
        &x * 0.5
    );
    assert_eq!(
        run(steps::Signs::new(vec![1, -1, -1]).unwrap(), x.clone()),
        array![[1.0, 2.0, -3.0], [0.5, 0.0, 4.0]]
    );
    assert_eq!(
        run(steps::Pad::new(5).unwrap(), x.clone()),
        array![[1.0, -2.0, 3.0, 0.0, 0.0], [0.5, 0.0, -4.0, 0.0, 0.0]]
    );
    assert_eq!(
        run(steps::Tile::new(2).unwrap(), x.clone()).row(1).to_vec(),
        vec![0.5, 0.0, -4.0, 0.5, 0.0, -4.0]
    );
    assert_eq!(
        run(steps::Gather::new(vec![2, 0, 2]).unwrap(), x.clone()),
        array![[3.0, 1.0, 3.0], [-4.0, 0.5, -4.0]]
    );
    assert_eq!(
        run(steps::Relu, x.clone()),
        array![[1.0, 0.0, 3.0], [0.5, 0.0, 0.0]]
    );
    assert_eq!(
        run(steps::Heaviside, x.clone()),
        array![[1.0, 0.0, 1.0], [1.0, 0.0, 0.0]]
    );
    assert_eq!(
        run(steps::Append::new(7.0).unwrap(), x.clone())
            .row(0)
            .to_vec(),
        vec![1.0, -2.0, 3.0, 7.0]
    );
    assert_eq!(
        run(
            steps::SegmentProduct::new(vec![2, 0, 1]).unwrap(),
            x.clone()
        ),
        array![[-2.0, 1.0, 3.0], [0.0, 1.0, -4.0]]
    );
}

#[test]
fn dense_trig_and_wht_follow_their_formulas() {
    let x = array![[0.3, -0.7], [1.1, 0.2]];
    let w = array![[1.0, 2.0], [-0.5, 0.25], [3.0, 0.0]];
    let y = run(steps::Dense::new(w.clone()).unwrap(), x.clone());
    let want = x.dot(&w.t());
    assert!((&y - &want).iter().all(|v| v.abs() < 1e-15));
    let y = run(steps::CosSin::new(0.5).unwrap(), x.clone());
    for r in 0..2 {
        for j in 0..2 {
            assert!((y[[r, j]] - 0.5 * x[[r, j]].cos()).abs() < 1e-15);
            assert!((y[[r, j + 2]] - 0.5 * x[[r, j]].sin()).abs() < 1e-15);
        }
    }
    let y = run(
        steps::CosPhase::new(vec![0.1, 2.0], 2.0).unwrap(),
        x.clone(),
    );
    assert!((y[[1, 1]] - 2.0 * (0.2f64 + 2.0).cos()).abs() < 1e-15);
    // H₄·(1,2,3,4) = (10, −2, −4, 0) (Sylvester's construction), blockwise.
    let x = array![[1.0, 2.0, 3.0, 4.0, 1.0, 0.0, 0.0, 0.0]];
    assert_eq!(
        run(steps::Wht::new(4).unwrap(), x),
        array![[10.0, -2.0, -4.0, 0.0, 1.0, 1.0, 1.0, 1.0]]
    );
}

#[test]
fn kernel_block_and_sketch_follow_their_formulas() {
    let k: crate::kernel::Kernel = "gaussian(gamma=0.5)".parse().unwrap();
    let l = array![[0.0, 0.0], [1.0, 1.0]];
    let x = array![[1.0, 0.0]];
    let y = run(steps::KernelBlock::new(k, l).unwrap(), x.clone());
    assert!((y[[0, 0]] - (-0.5f64).exp()).abs() < 1e-15);
    assert!((y[[0, 1]] - (-0.5f64).exp()).abs() < 1e-15);
    // One sketch, identity buckets: the FFT round trip returns the signed input.
    let cs = steps::CountSketchFft::new(4, vec![vec![0, 1]], vec![vec![1, -1]]).unwrap();
    let y = run(cs, array![[2.0, 3.0]]);
    let want = [2.0, -3.0, 0.0, 0.0];
    for j in 0..4 {
        assert!((y[[0, j]] - want[j]).abs() < 1e-12, "{y}");
    }
    // Two sketches: circular convolution of the two count sketches.
    let cs = steps::CountSketchFft::new(
        3,
        vec![vec![0, 1], vec![1, 2]],
        vec![vec![1, 1], vec![1, -1]],
    )
    .unwrap();
    let y = run(cs, array![[2.0, 3.0]]);
    let (a, b) = ([2.0, 3.0, 0.0], [0.0, 2.0, -3.0]);
    for j in 0..3 {
        let want: f64 = (0..3).map(|i| a[i] * b[(j + 3 - i) % 3]).sum();
        assert!((y[[0, j]] - want).abs() < 1e-12);
    }
}

#[test]
fn multi_input_steps_and_value_reuse() {
    let mut b = Builder::new(2);
    let s = b
        .push(
            steps::Scale::new(vec![2.0, 3.0]).unwrap(),
            &[Builder::INPUT],
        )
        .unwrap();
    let one = b
        .push(steps::Gather::new(vec![0]).unwrap(), &[Builder::INPUT])
        .unwrap();
    let p = b.push(steps::Product, &[s, Builder::INPUT, one]).unwrap();
    let c = b.push(steps::Concat, &[p, Builder::INPUT]).unwrap();
    let prog = b.finish(c);
    let y = prog.apply_one(&[2.0, -1.0]);
    assert_eq!(y, vec![16.0, 6.0, 2.0, -1.0]);
    let back = round_trip(&prog);
    assert_eq!(back.apply_one(&[2.0, -1.0]), y);
    assert_eq!(prog.describe().len(), 4);
}

#[test]
fn builder_and_constructors_refuse_bad_steps() {
    let mut b = Builder::new(3);
    assert!(b
        .push(
            steps::Scale::new(vec![1.0, 2.0]).unwrap(),
            &[Builder::INPUT]
        )
        .is_err());
    assert!(b
        .push(steps::Wht::new(4).unwrap(), &[Builder::INPUT])
        .is_err());
    assert!(b
        .push(steps::Gather::new(vec![3]).unwrap(), &[Builder::INPUT])
        .is_err());
    assert!(steps::Wht::new(6).is_err());
    assert!(steps::Signs::new(vec![1, 0]).is_err());
    assert!(steps::Scale::new(vec![f64::NAN]).is_err());
    assert!(steps::ConstScale::new(f64::INFINITY).is_err());
    assert!(steps::CountSketchFft::new(4, vec![vec![4]], vec![vec![1]]).is_err());
    assert!(steps::Pad::new(0).is_err());
}

#[test]
fn file_reader_refuses_inconsistent_programs() {
    let mut b = Builder::new(2);
    let v = b
        .push(steps::Signs::new(vec![1, -1]).unwrap(), &[Builder::INPUT])
        .unwrap();
    let p = b.finish(v);
    let mut f = TensorFile::default();
    let mut m = p.write(&mut f);
    // A later value as input, an unknown op, a sign of 3, a wrong input width.
    let mut bad = m.clone();
    bad["steps"][0]["inputs"] = json!([1]);
    assert!(Program::read(&bad, &f, 2, "mem").is_err());
    let mut bad = m.clone();
    bad["steps"][0]["op"] = json!("warp");
    assert!(Program::read(&bad, &f, 2, "mem").is_err());
    assert!(Program::read(&m, &f, 3, "mem").is_err());
    f.put_i8("step0.signs", vec![2], vec![1, 3]);
    assert!(Program::read(&m, &f, 2, "mem").is_err());
    m["output"] = json!(5);
    assert!(Program::read(&m, &f, 2, "mem").is_err());
}

#[test]
fn costs_use_exact_log2() {
    assert_eq!(log2_ceil(1024), 10);
    assert_eq!(log2_ceil(1), 0);
    assert_eq!(log2_ceil(1025), 11);
    let c = steps::Wht::new(1024).unwrap();
    let mut b = Builder::new(2048);
    let v = b.push(c, &[Builder::INPUT]).unwrap();
    assert_eq!(b.finish(v).cost().flops, 2048 * 10);
}

#[test]
fn only_steps_that_stream_parameters_are_called_memory_bound() {
    // A pad moves no parameters; a transform has none; a dense projection reads 8 bytes
    // per multiply-add (0.25 flops per byte, far below a CPU's ridge point).
    let mut b = Builder::new(3);
    let v = b
        .push(steps::Pad::new(4).unwrap(), &[Builder::INPUT])
        .unwrap();
    let v = b.push(steps::Wht::new(4).unwrap(), &[v]).unwrap();
    let w = Array2::from_shape_fn((8, 4), |(i, j)| (i + j) as f64);
    let v = b.push(steps::Dense::new(w).unwrap(), &[v]).unwrap();
    let p = b.finish(v);
    let bound: Vec<bool> = p.step_costs().iter().map(|c| c.memory_bound()).collect();
    assert_eq!(bound, vec![false, false, true]);
    let lines = p.describe();
    assert!(!lines[0].contains("memory-bound"), "{}", lines[0]);
    assert!(lines[2].contains("memory-bound"), "{}", lines[2]);
}

// ---- Reverse mode against central finite differences (f64) ----

use rand::{RngExt, SeedableRng};

/// `L = Σ r ⊙ program(x)`: a fixed random weighting of the outputs.
fn loss(p: &Program, x: &Array2<f64>, r: &Array2<f64>) -> f64 {
    (&p.apply_chunk(x.view()) * r).sum()
}

/// The largest disagreement between the reverse-mode gradient (input and every step's
/// parameters, a spread of entries each) and central differences, relative to
/// `1 + |gradient|`. `fault` moves one analytic entry by 1% of `1 + |entry|`, to show a wrong gradient is
/// caught.
fn fd_disagreement(p: &Program, x: &Array2<f64>, fault: bool) -> f64 {
    let mut rng = rand::rngs::ChaCha20Rng::seed_from_u64(7);
    let out = p.apply_chunk(x.view());
    let r = Array2::from_shape_simple_fn(out.dim(), || rng.random::<f64>() - 0.5);
    let train: Vec<bool> = p
        .instrs()
        .iter()
        .map(|i| !i.step.params().is_empty())
        .collect();
    let vals = p.forward_all(x.view());
    assert_eq!(
        vals.last().unwrap(),
        &out,
        "forward_all computes what apply_chunk does"
    );
    let (mut gp, gx) = p.backward(&vals, r.view(), &train, true);
    let mut gx = gx.unwrap();
    if fault {
        // The fault goes where the check will look: the input's first entry, or the first
        // trained step's first parameter.
        match train.iter().position(|t| *t) {
            Some(i) => gp[i][0] += 0.01 * (1.0 + gp[i][0].abs()),
            None => gx[[0, 0]] += 0.01 * (1.0 + gx[[0, 0]].abs()),
        }
    }
    let h = 1e-6;
    let mut worst: f64 = 0.0;
    let mut cmp = |an: f64, fd: f64| worst = worst.max((an - fd).abs() / (1.0 + an.abs()));
    // Input entries.
    for (i, j) in [
        (0, 0),
        (x.nrows() - 1, x.ncols() - 1),
        (1 % x.nrows(), x.ncols() / 2),
    ] {
        let (mut a, mut b) = (x.clone(), x.clone());
        a[[i, j]] += h;
        b[[i, j]] -= h;
        cmp(gx[[i, j]], (loss(p, &a, &r) - loss(p, &b, &r)) / (2.0 * h));
    }
    // Parameters of every trained step: the first, the last and a few between.
    for (s, ins) in p.instrs().iter().enumerate() {
        if !train[s] {
            continue;
        }
        let theta = ins.step.params();
        let n = theta.len();
        for k in [0, n / 3, n / 2, n - 1] {
            let (mut a, mut b) = (theta.clone(), theta.clone());
            a[k] += h;
            b[k] -= h;
            let pa = p.with_step(s, ins.step.with_params(&a).unwrap()).unwrap();
            let pb = p.with_step(s, ins.step.with_params(&b).unwrap()).unwrap();
            cmp(gp[s][k], (loss(&pa, x, &r) - loss(&pb, x, &r)) / (2.0 * h));
        }
    }
    worst
}

pub(crate) fn check_gradients(p: &Program, x: &Array2<f64>, what: &str) {
    let e = fd_disagreement(p, x, false);
    assert!(
        e < 2e-6,
        "{what}: reverse mode differs from finite differences by {e:.2e}"
    );
    // The same check catches a gradient that is off by 1%.
    let e = fd_disagreement(p, x, true);
    assert!(
        e > 1e-4,
        "{what}: an injected 1% fault went unnoticed ({e:.2e})"
    );
}

pub(crate) fn rows(n: usize, d: usize, seed: u64) -> Array2<f64> {
    let mut rng = rand::rngs::ChaCha20Rng::seed_from_u64(seed);
    Array2::from_shape_simple_fn((n, d), || rng.random::<f64>() * 2.0 - 1.0)
}

fn one_step(step: impl Into<Step>, x: &Array2<f64>) -> Program {
    let mut b = Builder::new(x.ncols());
    let v = b.push(step, &[Builder::INPUT]).unwrap();
    b.finish(v)
}

#[test]
fn every_step_backward_matches_finite_differences() {
    let x = rows(3, 4, 1);
    let k = |s: &str| -> crate::kernel::Kernel { s.parse().unwrap() };
    let unary: Vec<(&str, Step)> = vec![
        (
            "scale",
            steps::Scale::new(vec![0.5, -1.5, 2.0, 0.3]).unwrap().into(),
        ),
        ("times", steps::ConstScale::new(1.7).unwrap().into()),
        ("pad", steps::Pad::new(6).unwrap().into()),
        ("tile", steps::Tile::new(3).unwrap().into()),
        (
            "signs",
            steps::Signs::new(vec![1, -1, -1, 1]).unwrap().into(),
        ),
        ("wht", steps::Wht::new(4).unwrap().into()),
        (
            "gather",
            steps::Gather::new(vec![3, 0, 0, 2, 1]).unwrap().into(),
        ),
        ("dense", steps::Dense::new(rows(5, 4, 2)).unwrap().into()),
        ("cos_sin", steps::CosSin::new(0.7).unwrap().into()),
        (
            "cos_phase",
            steps::CosPhase::new(vec![0.1, 2.0, -1.0, 4.0], 1.3)
                .unwrap()
                .into(),
        ),
        ("relu", steps::Relu.into()),
        ("append", steps::Append::new(0.5).unwrap().into()),
        (
            "segment_product",
            steps::SegmentProduct::new(vec![1, 3]).unwrap().into(),
        ),
        (
            "count_sketch_fft",
            steps::CountSketchFft::new(
                5,
                vec![vec![0, 3, 1, 4], vec![2, 2, 0, 1]],
                vec![vec![1, -1, 1, 1], vec![-1, 1, 1, -1]],
            )
            .unwrap()
            .into(),
        ),
    ];
    for (name, step) in unary {
        check_gradients(&one_step(step, &x), &x, name);
    }
    for kern in [
        "gaussian(gamma=0.7)",
        "laplacian(gamma=0.4)",
        "matern(nu=0.5, lengthscale=1.3)",
        "matern(nu=1.5, lengthscale=0.9)",
        "matern(nu=2.5, lengthscale=1.1)",
        "rational_quadratic(alpha=0.8, lengthscale=1.2)",
        "polynomial(degree=3, gamma=0.5, offset=1)",
        "sigmoid(gamma=0.3, offset=-0.2)",
        "linear()",
        "gaussian(gamma=0.5) + 2 * polynomial(degree=2, gamma=1, offset=0.5)",
        "gaussian(gamma=0.5) * laplacian(gamma=0.3)",
    ] {
        let l = rows(5, 4, 3);
        check_gradients(
            &one_step(steps::KernelBlock::new(k(kern), l).unwrap(), &x),
            &x,
            &format!("kernel_block {kern}"),
        );
    }
    // Steps with several inputs, and a value read twice (gradients add up).
    let mut b = Builder::new(4);
    let a = b
        .push(steps::Dense::new(rows(3, 4, 4)).unwrap(), &[Builder::INPUT])
        .unwrap();
    let c = b
        .push(steps::Dense::new(rows(3, 4, 5)).unwrap(), &[Builder::INPUT])
        .unwrap();
    let one = b
        .push(steps::Dense::new(rows(1, 4, 6)).unwrap(), &[Builder::INPUT])
        .unwrap();
    let pr = b.push(steps::Product, &[a, c, one]).unwrap();
    let cat = b.push(steps::Concat, &[pr, a]).unwrap();
    check_gradients(&b.finish(cat), &x, "product and concat");
}

#[test]
fn heaviside_has_a_zero_gradient() {
    let x = rows(2, 3, 9);
    let p = one_step(steps::Heaviside, &x);
    let vals = p.forward_all(x.view());
    let g = Array2::ones((2, 3));
    let (_, gx) = p.backward(&vals, g.view(), &[false], true);
    assert!(gx.unwrap().iter().all(|v| *v == 0.0));
}
