//! Benchmarks: the Walsh–Hadamard transform against rustfft's complex FFT of the same length
//! (f32, 2^8 … 2^16), and each feature map's throughput for d = 784, D = 4096.
//!
//! Run: `cargo bench --bench transforms` (add `-- wht` or `-- maps` to pick a group).

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

criterion_group!(benches, wht_vs_fft, maps);
criterion_main!(benches);
