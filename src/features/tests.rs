use super::*;
use crate::kernel::Kernel;
use crate::program::{Builder, Step, ValueId};
use ndarray::{array, Array2};

fn k(s: &str) -> Kernel {
    s.parse().unwrap()
}

/// The frequency matrix `W` (`m × d`) of a spectral program `scale → … → trig`: the steps
/// between the input scaling and the trig step applied to the unit vectors.
fn frequencies(map: &FeatureMap) -> Array2<f64> {
    let p = &map.program;
    let d = p.input_dim();
    let ins = p.instrs();
    assert!(matches!(ins[0].step, Step::Scale(_)));
    assert!(matches!(
        ins.last().unwrap().step,
        Step::CosSin(_) | Step::CosPhase(_)
    ));
    let mut b = Builder::new(d);
    let mut v = Builder::INPUT;
    for i in &ins[1..ins.len() - 1] {
        assert_eq!(i.inputs, vec![ValueId(v.0 + 1)], "a chain");
        v = b.push(i.step.clone(), &[v]).unwrap();
    }
    let proj = b.finish(v);
    proj.apply(Array2::<f64>::eye(d).view()).t().to_owned()
}

fn landmarks_of(map: &FeatureMap) -> Array2<f64> {
    match &map.program.instrs()[0].step {
        Step::KernelBlock(kb) => kb.landmarks().clone(),
        other => panic!("{other:?}"),
    }
}

#[test]
fn fastfood_row_norms_and_orf_orthogonality() {
    // Le, Sarlós & Smola 2013: every Fastfood row has norm s_i (σ = 1: gamma = ½); the
    // program's last scale holds s_i/(‖G‖·√d'), so ‖row‖ = that · ‖G‖ · √d'.
    let spec = FeatureSpec::new(k("gaussian(gamma=0.5)"), Method::Fastfood, 16, 64, 3);
    let (map, _) = spec.sample(None).unwrap();
    let w = frequencies(&map);
    let scales: Vec<&[f64]> = map
        .program
        .instrs()
        .iter()
        .filter_map(|i| match &i.step {
            Step::Scale(s) => Some(s.factors()),
            _ => None,
        })
        .collect();
    // Scales: the kernel's inverse lengthscale (1), then G, then S/√d'.
    let (g, s) = (scales[1], scales[2]);
    for bl in 0..2 {
        let gb = &g[bl * 16..bl * 16 + 16];
        let gn = gb.iter().map(|v| v * v).sum::<f64>().sqrt();
        for i in 0..16 {
            let r = w.row(bl * 16 + i);
            let norm = r.dot(&r).sqrt();
            let s_i = s[bl * 16 + i] * gn * 4.0;
            assert!((norm - s_i).abs() < 1e-10 * s_i, "row {i}: {norm} vs {s_i}");
        }
    }
    // Yu et al. 2016: ORF rows are orthogonal within a block, W Wᵀ = diag(s²).
    let spec = FeatureSpec::new(k("gaussian(gamma=0.5)"), Method::Orthogonal, 8, 32, 5);
    let (map, _) = spec.sample(None).unwrap();
    let w = frequencies(&map);
    for bl in 0..2 {
        let b = w.slice(ndarray::s![bl * 8..bl * 8 + 8, ..]);
        let g = b.dot(&b.t());
        for i in 0..8 {
            for j in 0..8 {
                if i != j {
                    assert!(g[[i, j]].abs() < 1e-10 * g[[i, i]]);
                }
            }
        }
    }
    // Hadamard rows have norm exactly √d' (normalised H blocks scaled by √d').
    let spec = FeatureSpec::new(k("gaussian(gamma=0.5)"), Method::Hadamard, 8, 16, 5);
    let (map, _) = spec.sample(None).unwrap();
    let w = frequencies(&map);
    for r in w.rows() {
        assert!((r.dot(&r) - 8.0).abs() < 1e-10);
    }
    // 8 scale factors and 3·8 int8 signs: 64 + 24 bytes.
    assert_eq!(map.program.param_bytes(), 8 * 8 + 3 * 8);
}

#[test]
fn quasi_frequencies_are_inverse_cdf_of_halton() {
    // Halton (1964) points in bases (2,3), skipping index 0, through Φ⁻¹ (Yang et al. 2014).
    let mut spec = FeatureSpec::new(k("gaussian(lengthscale=1)"), Method::Quasi, 2, 8, 0);
    spec.options.scramble = false;
    let (map, _) = spec.sample(None).unwrap();
    let w = frequencies(&map);
    let want = [
        [0.0, -0.4307273],
        [-0.6744898, 0.4307273],
        [0.6744898, -1.2206403],
        [-1.1503494, -0.1397103],
    ];
    for (i, row) in want.iter().enumerate() {
        for j in 0..2 {
            assert!((w[[i, j]] - row[j]).abs() < 5e-8, "{i},{j}: {}", w[[i, j]]);
        }
    }
}

#[test]
fn nystrom_reference_example() {
    // Nyström (Williams & Seeger 2001) worked by hand: points {0,1,2}, Gaussian σ=1, landmarks
    // {0,2}: K̃₁₁ = 2e⁻¹/(1+e⁻²),
    // other entries exact, ‖K − K̃‖_F = 0.3519457.
    let kern = k("gaussian(lengthscale=1)");
    let x = array![[0.0], [1.0], [2.0]];
    let mut info = SampleInfo::default();
    let node = nystrom_from_landmarks(&kern, array![[0.0], [2.0]], 1e-12, &mut info).unwrap();
    let z = node.apply_chunk(x.view());
    let kt = z.dot(&z.t());
    let kx = kern.gram(x.view(), x.view());
    assert!((kt[[1, 1]] - 0.6480543).abs() < 1e-7);
    let fro = (&kx - &kt).iter().map(|v| v * v).sum::<f64>().sqrt();
    assert!((fro - 0.3519457).abs() < 1e-7, "{fro}");
    for (i, j) in [(0, 0), (0, 1), (0, 2), (1, 2), (2, 2)] {
        assert!((kt[[i, j]] - kx[[i, j]]).abs() < 1e-12, "{i}{j}");
    }
    // With m = n, K̃ = K.
    let node = nystrom_from_landmarks(&kern, x.clone(), 1e-14, &mut info).unwrap();
    let z = node.apply_chunk(x.view());
    assert!((&z.dot(&z.t()) - &kx).iter().all(|v| v.abs() < 1e-10));
    // Linear Gram of (1,0),(0,1),(1,1): Nyström with the first two points is exact (§12).
    let lin = k("linear()");
    let p = array![[1.0, 0.0], [0.0, 1.0], [1.0, 1.0]];
    let node = nystrom_from_landmarks(
        &lin,
        p.slice(ndarray::s![..2, ..]).to_owned(),
        1e-12,
        &mut info,
    )
    .unwrap();
    let z = node.apply_chunk(p.view());
    assert!((&z.dot(&z.t()) - &lin.gram(p.view(), p.view()))
        .iter()
        .all(|v| v.abs() < 1e-12));
}

#[test]
fn nystrom_uses_all_rows_when_short_and_reproduces_landmarks() {
    let x = Array2::from_shape_fn((30, 3), |(i, j)| ((i * 3 + j) as f64 * 0.41).sin());
    for rule in [Landmarks::Uniform, Landmarks::KmeansPP, Landmarks::Leverage] {
        let mut spec = FeatureSpec::new(
            k("matern(nu=2.5, lengthscale=0.7)"),
            Method::Nystrom,
            3,
            12,
            9,
        );
        spec.options.landmarks = rule;
        let (map, info) = spec.sample(Some(x.view())).unwrap();
        let landmarks = landmarks_of(&map);
        let z = map.transform(landmarks.view());
        let g = spec.kernel.gram(landmarks.view(), landmarks.view());
        assert!(
            (&z.dot(&z.t()) - &g).iter().all(|v| v.abs() < 1e-8),
            "{rule:?}"
        );
        assert_eq!(info.landmarks, Some(12));
    }
    let spec = FeatureSpec::new(k("gaussian(gamma=1)"), Method::Nystrom, 3, 100, 9);
    let (_, info) = spec.sample(Some(x.view())).unwrap();
    assert!(
        info.notes.iter().any(|n| n.contains("using them all")),
        "{:?}",
        info.notes
    );
    assert_eq!(info.landmarks, Some(30));
}

#[test]
fn maps_round_trip_through_files_and_buffers() {
    let x = Array2::from_shape_fn((300, 5), |(i, j)| ((i * 5 + j) as f64 * 0.13).cos());
    let cases = [
        ("gaussian(gamma=0.3)", Method::Fourier),
        ("gaussian(gamma=0.3)", Method::Hadamard),
        ("gaussian(gamma=0.3)", Method::Fastfood),
        ("laplacian(lengthscale=[1, 2, 3, 4, 5])", Method::Quasi),
        ("matern(nu=1.5, lengthscale=2)", Method::Orthogonal),
        (
            "polynomial(degree=3, gamma=0.5, coef0=1)",
            Method::Maclaurin,
        ),
        (
            "polynomial(degree=2, gamma=1, coef0=1)",
            Method::TensorSketch,
        ),
        ("arccos(order=1)", Method::Relu),
        ("gaussian(gamma=1) + 0.5 * linear()", Method::Fourier),
        ("gaussian(gamma=1) * linear()", Method::Fourier),
        ("sigmoid(gamma=0.1, coef0=0)", Method::Nystrom),
        ("gaussian(gamma=0.3)", Method::parse("taylor").unwrap()),
    ];
    for (e, m) in cases {
        let spec = FeatureSpec::new(k(e), m, 5, 64, 11);
        let (map, _) = spec.sample(Some(x.view())).unwrap();
        let z = map.transform(x.view());
        let mut f = crate::format::TensorFile::default();
        f.manifest.insert("format_version".into(), 2.into());
        let entry = map.program.write(&mut f);
        let bytes = f.to_bytes().unwrap();
        let back = crate::format::TensorFile::from_bytes(&bytes, "mem").unwrap();
        let prog2 = crate::program::Program::read(&entry, &back, 5, "mem").unwrap();
        let z2 = prog2.apply(x.view());
        assert_eq!(z, z2, "{e} {m:?}");
        let one = map.transform_one(x.row(7).as_slice().unwrap());
        // One row goes through a different GEMM kernel than a chunk: equal to rounding.
        for (a, b) in one.iter().zip(z.row(7)) {
            assert!((a - b).abs() < 1e-12, "{e} {m:?}");
        }
        // Same spec and seed: same map.
        let (again, _) = spec.sample(Some(x.view())).unwrap();
        assert_eq!(again.transform(x.view()), z);
    }
}

#[test]
fn methods_that_cannot_serve_say_which_can() {
    let e = FeatureSpec::new(k("arccos(order=0)"), Method::Fourier, 3, 64, 0)
        .sample(None)
        .unwrap_err();
    assert!(e.to_string().contains("relu, nystrom"), "{e}");
    let e = FeatureSpec::new(k("gaussian(gamma=1)"), Method::Nystrom, 3, 64, 0)
        .sample(None)
        .unwrap_err();
    assert!(e.to_string().contains("needs data"), "{e}");
}

/// Reverse mode through every method's program against central finite differences.
#[test]
fn every_method_program_backward_matches_finite_differences() {
    let cases: &[(&str, Method, usize)] = &[
        ("gaussian(gamma=0.3)", Method::Fourier, 12),
        ("matern(nu=2.5, lengthscale=1.5)", Method::Orthogonal, 12),
        ("gaussian(gamma=0.3)", Method::Hadamard, 16),
        ("gaussian(gamma=0.3)", Method::Fastfood, 10),
        (
            "rational_quadratic(alpha=1.5, lengthscale=1.0)",
            Method::Quasi,
            12,
        ),
        ("gaussian(gamma=0.3)", Method::Nystrom, 6),
        (
            "polynomial(degree=2, gamma=0.5, offset=1)",
            Method::Maclaurin,
            12,
        ),
        (
            "polynomial(degree=2, gamma=0.5, offset=1)",
            Method::TensorSketch,
            8,
        ),
        ("gaussian(gamma=0.3)", Method::parse("taylor").unwrap(), 15),
        ("arccos(order=1)", Method::Relu, 8),
        (
            "gaussian(gamma=0.3) * laplacian(gamma=0.2) + linear()",
            Method::Fourier,
            20,
        ),
    ];
    let x = crate::program::tests::rows(4, 4, 11);
    for (kern, method, features) in cases {
        let spec = FeatureSpec::new(kern.parse().unwrap(), *method, 4, *features, 5);
        let data = crate::program::tests::rows(40, 4, 12);
        let (map, _) = spec.sample(Some(data.view())).unwrap();
        crate::program::tests::check_gradients(&map.program, &x, &format!("{method:?} on {kern}"));
    }
}
