//! Benchmarks: the Walsh–Hadamard transform against rustfft's complex FFT of the same length
//! (f32, 2^8 … 2^16), each feature map's throughput for d = 784, D = 4096, and a Gaussian
//! Gram row with the vectorised exponential against the standard library's `exp`.
//!
//! Run: `cargo bench --bench transforms` (add `-- wht`, `-- maps` or `-- gauss_row` to pick
//! a group).

use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use kernelpress::features::{FeatureSpec, Method};
use kernelpress::transform::wht_in_place;
use ndarray::Array2;
use rustfft::num_complex::Complex;
use std::hint::black_box;

fn wht_vs_fft(c: &mut Criterion) {
    let mut g = c.benchmark_group("wht");
    for k in [8u32, 10, 12, 14, 16] {
        let n = 1usize << k;
        g.throughput(Throughput::Elements(n as u64));
        let mut x: Vec<f32> = (0..n).map(|i| (i as f32 * 0.1).sin()).collect();
        g.bench_with_input(BenchmarkId::new("wht_f32", n), &n, |b, _| {
            b.iter(|| wht_in_place(black_box(&mut x)))
        });
        let mut planner = rustfft::FftPlanner::<f32>::new();
        let fft = planner.plan_fft_forward(n);
        let mut buf: Vec<Complex<f32>> = (0..n)
            .map(|i| Complex::new((i as f32 * 0.1).sin(), 0.0))
            .collect();
        let mut scratch = vec![Complex::new(0.0, 0.0); fft.get_inplace_scratch_len()];
        g.bench_with_input(BenchmarkId::new("rustfft_c32", n), &n, |b, _| {
            b.iter(|| fft.process_with_scratch(black_box(&mut buf), &mut scratch))
        });
    }
    g.finish();
}

fn maps(c: &mut Criterion) {
    let d = 784;
    let dd = 4096;
    let rows = 256;
    let x = Array2::from_shape_fn((rows, d), |(i, j)| {
        (((i * d + j) % 97) as f64 / 97.0 - 0.5) * 2.0
    });
    let mut g = c.benchmark_group("maps");
    g.sample_size(10);
    g.throughput(Throughput::Elements(rows as u64));
    let cases = [
        ("gaussian(gamma=0.0012755)", Method::Fourier),
        ("gaussian(gamma=0.0012755)", Method::Orthogonal),
        ("gaussian(gamma=0.0012755)", Method::Hadamard),
        ("gaussian(gamma=0.0012755)", Method::Fastfood),
        ("gaussian(gamma=0.0012755)", Method::Quasi),
        ("gaussian(gamma=0.0012755)", Method::Nystrom),
        (
            "polynomial(degree=3, gamma=0.01, coef0=1)",
            Method::Maclaurin,
        ),
        (
            "polynomial(degree=3, gamma=0.01, coef0=1)",
            Method::TensorSketch,
        ),
        ("arccos(order=1)", Method::Relu),
    ];
    let pool = Array2::from_shape_fn((dd, d), |(i, j)| {
        (((i * 31 + j * 7) % 89) as f64 / 89.0 - 0.5) * 2.0
    });
    for (k, m) in cases {
        let spec = FeatureSpec::new(k.parse().unwrap(), m, d, dd, 1);
        let (map, _) = spec.sample(Some(pool.view())).unwrap();
        g.bench_function(m.name(), |b| b.iter(|| map.transform(black_box(x.view()))));
    }
    g.finish();
}

/// One row of a Gaussian Gram block (4,825 entries, the Fashion-MNIST teacher's support
/// vectors) from its inner products: the vectorised exponential against the standard
/// library's `exp` per entry, same inputs.
fn gaussian_rows(c: &mut Criterion) {
    let n = 4825;
    let qb: Vec<f64> = (0..n)
        .map(|j| 700.0 + (j as f64 * 0.37).sin() * 50.0)
        .collect();
    let dots: Vec<f64> = (0..n)
        .map(|j| 300.0 + (j as f64 * 0.11).cos() * 40.0)
        .collect();
    let qa = 690.0;
    let half = 0.5 * 0.0012755;
    let mut g = c.benchmark_group("gauss_row");
    g.throughput(Throughput::Elements(n as u64));
    let mut v = dots.clone();
    g.bench_function("vectorised", |b| {
        b.iter(|| {
            v.copy_from_slice(&dots);
            kernelpress::transform::expo::gaussian_row(black_box(&mut v), qa, &qb, half)
        })
    });
    g.bench_function("libm_exp", |b| {
        b.iter(|| {
            v.copy_from_slice(&dots);
            for (x, q) in black_box(&mut v).iter_mut().zip(&qb) {
                *x = (-half * (qa + q - 2.0 * *x).max(0.0)).exp();
            }
        })
    });
    g.finish();
}

criterion_group!(benches, wht_vs_fft, maps, gaussian_rows);
criterion_main!(benches);
