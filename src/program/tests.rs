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
