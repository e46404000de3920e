use super::*;
use ndarray::Array2;

fn k(s: &str) -> Kernel {
    s.parse().unwrap()
}

#[test]
fn reference_values_matern_rq() {
    // Matérn ℓ=1, r=1: closed forms of Rasmussen & Williams, GPML 2006, eq. 4.16–4.17.
    let x = [0.0, 0.0];
    let y = [1.0, 0.0];
    let cases = [
        ("matern(nu=0.5, lengthscale=1)", 0.3678794),
        ("matern(nu=1.5, lengthscale=1)", 0.4833577),
        ("matern(nu=2.5, lengthscale=1)", 0.5239941),
    ];
    for (e, want) in cases {
        assert!((k(e).eval(&x, &y) - want).abs() < 5e-8, "{e}");
    }
    // σ=2, Δ=(0.7,−1.1,0.4): the L1 Laplacian exp(−‖Δ‖₁/σ) = e^{−1.1} (direct evaluation).
    let d = [0.7, -1.1, 0.4];
    let z = [0.0; 3];
    assert!((k("laplacian(lengthscale=2)").eval(&d, &z) - 0.3328711).abs() < 5e-8);
    assert!((k("laplacian(gamma=0.5)").eval(&d, &z) - 0.3328711).abs() < 5e-8);
}

#[test]
fn reference_values_dot_kernels() {
    // Cho & Saul, NIPS 2009, arc-cosine kernels: x=(1,0), y=(1,1): k0 = 3/4, k1 = 3/4 + 1/π.
    let x = [1.0, 0.0];
    let y = [1.0, 1.0];
    assert!((k("arccos(order=0)").eval(&x, &y) - 0.75).abs() < 1e-12);
    assert!((k("arccos(order=1)").eval(&x, &y) - 1.0683099).abs() < 5e-8);
    // (x·y)² with x=(1,2), y=(3,4) is 11² = 121 (direct evaluation).
    let p = k("polynomial(degree=2, gamma=1, offset=0)");
    assert_eq!(p.eval(&[1.0, 2.0], &[3.0, 4.0]), 121.0);
}

#[test]
fn gram_blocks_match_pairwise() {
    let a = Array2::from_shape_fn((300, 3), |(i, j)| ((i * 3 + j) as f64 * 0.37).sin());
    let b = Array2::from_shape_fn((17, 3), |(i, j)| ((i * 5 + j) as f64 * 0.11).cos());
    for e in [
        "gaussian(gamma=0.7)",
        "gaussian(lengthscale=[1, 2, 0.5])",
        "laplacian(gamma=0.3)",
        "matern(nu=1.5, lengthscale=0.8)",
        "rational_quadratic(alpha=2, lengthscale=1.5)",
        "polynomial(degree=3, gamma=0.5, offset=1)",
        "arccos(order=1)",
        "arccos(order=0)",
        "sigmoid(gamma=0.1, offset=0.5)",
        "2 * gaussian(gamma=1) + linear() * matern(nu=0.5, lengthscale=2)",
    ] {
        let kk = k(e);
        let g = kk.gram(a.view(), b.view());
        for i in (0..300).step_by(13) {
            for j in 0..17 {
                let want = kk.eval(a.row(i).as_slice().unwrap(), b.row(j).as_slice().unwrap());
                assert!((g[[i, j]] - want).abs() < 1e-12, "{e} {i} {j}");
            }
        }
    }
}

#[test]
fn bad_parameters_are_errors() {
    for (e, needle) in [
        ("gaussian(gamma=0)", "gamma"),
        ("gaussian(gamma=-1)", "gamma"),
        ("gaussian(gamma=nan)", "gamma"),
        ("gaussian()", "gamma"),
        ("gaussian(gamma=1, lengthscale=2)", "not both"),
        ("matern(nu=2, lengthscale=1)", "nu"),
        ("matern(nu=1.5, gamma=1)", "lengthscale"),
        ("frobnicate(x=1)", "unknown kernel"),
        ("gaussian(gamma=1, beta=2)", "unknown parameter"),
        ("polynomial(degree=2.5)", "degree"),
        ("arccos(order=2)", "order"),
        ("0 * linear()", "positive"),
        ("3", "number alone"),
        ("gaussian(gamma=1", "expected"),
        ("gaussian(lengthscale=[1, -2])", "lengthscale"),
        ("", "empty"),
    ] {
        let err = e.parse::<Kernel>().unwrap_err();
        assert!(err.to_string().contains(needle), "{e}: {err}");
        assert_eq!(err.kind(), crate::ErrorKind::Input);
    }
    let wrong_len = k("gaussian(lengthscale=[1, 2])");
    assert!(wrong_len
        .check_dim(3)
        .unwrap_err()
        .to_string()
        .contains("2 entries"));
    assert!(wrong_len.check_dim(2).is_ok());
}

#[test]
fn printing_round_trips() {
    for e in [
        "gaussian(gamma=0.5)",
        "2.5 * laplacian(lengthscale=[1, 2.5])",
        "gaussian(gamma=1) + 0.1 * (linear() + polynomial(degree=2))",
        "(gaussian(gamma=1) + linear()) * matern(nu=2.5)",
        "3 * (2 * linear())",
        "(2 * linear()) * sigmoid(gamma=0.01, offset=-1)",
    ] {
        let a = k(e);
        let b = k(&a.to_string());
        assert_eq!(a, b, "{e} -> {a}");
    }
}

mod prop {
    use super::*;
    use proptest::prelude::*;

    fn leaf() -> impl Strategy<Value = Kernel> {
        let pos = 1e-6f64..1e6;
        prop_oneof![
            pos.clone().prop_map(|g| Kernel::Gaussian {
                width: Width::Gamma(g)
            }),
            proptest::collection::vec(pos.clone(), 1..4).prop_map(|v| Kernel::Laplacian {
                width: Width::PerDim(v)
            }),
            (pos.clone(), 0usize..3).prop_map(|(l, n)| Kernel::Matern {
                nu: [Nu::Half, Nu::ThreeHalves, Nu::FiveHalves][n],
                width: Width::Lengthscale(l)
            }),
            (pos.clone(), pos.clone()).prop_map(|(a, l)| Kernel::RationalQuadratic {
                alpha: a,
                width: Width::Lengthscale(l)
            }),
            (1u32..6, pos.clone(), 0.0f64..10.0).prop_map(|(d, g, c)| Kernel::Polynomial {
                degree: d,
                gamma: g,
                coef0: c
            }),
            (0u32..2).prop_map(|o| Kernel::ArcCos { order: o }),
            Just(Kernel::Linear),
            (pos, -5.0f64..5.0).prop_map(|(g, c)| Kernel::Sigmoid { gamma: g, coef0: c }),
        ]
    }

    fn expr() -> impl Strategy<Value = Kernel> {
        leaf().prop_recursive(3, 12, 3, |inner| {
            prop_oneof![
                proptest::collection::vec(inner.clone(), 2..4)
                    .prop_map(|v| Kernel::sum(v).unwrap()),
                proptest::collection::vec(inner.clone(), 2..4)
                    .prop_map(|v| Kernel::product(v).unwrap()),
                (1e-3f64..1e3, inner).prop_map(|(c, k)| Kernel::Scaled(c, Box::new(k))),
            ]
        })
    }

    proptest! {
        #[test]
        fn parse_print_round_trip(k in expr()) {
            let s = k.to_string();
            let back: Kernel = s.parse().unwrap();
            prop_assert_eq!(back, k);
        }
    }
}

#[test]
fn the_older_offset_spelling_still_reads() {
    // Model files written before the rename carry `coef0`; they read as `offset`.
    let old: Kernel = "polynomial(degree=2, gamma=0.5, coef0=1.5)"
        .parse()
        .unwrap();
    let new: Kernel = "polynomial(degree=2, gamma=0.5, offset=1.5)"
        .parse()
        .unwrap();
    assert_eq!(old, new);
    assert_eq!(
        old.to_string(),
        "polynomial(degree=2, gamma=0.5, offset=1.5)"
    );
    let s: Kernel = "sigmoid(gamma=0.1, coef0=-1)".parse().unwrap();
    assert_eq!(s.to_string(), "sigmoid(gamma=0.1, offset=-1.0)");
    assert!("polynomial(degree=2, coef0=1, offset=1)"
        .parse::<Kernel>()
        .is_err());
}
