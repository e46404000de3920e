//! Latency harness: warm-up, many repetitions, median and p99 for single rows; best of a few
//! repetitions for batched throughput. Measured with `std::time::Instant` on this machine.

use ndarray::ArrayView2;
use std::hint::black_box;
use std::time::Instant;

/// Single-row latency percentiles in microseconds.
#[derive(Debug, Clone, Copy)]
pub struct LatencyStats {
    /// Median.
    pub p50_us: f64,
    /// 99th percentile.
    pub p99_us: f64,
    /// Mean.
    pub mean_us: f64,
    /// Repetitions timed.
    pub reps: usize,
}

/// Times `f` on single rows of `x` (cycling through them): 20 warm-up calls, then `reps`
/// timed calls (fewer if they take more than about 3 s in all).
pub fn measure_single<F: FnMut(&[f64]) -> Vec<f64>>(
    x: ArrayView2<f64>,
    reps: usize,
    mut f: F,
) -> LatencyStats {
    let rows: Vec<Vec<f64>> = x
        .rows()
        .into_iter()
        .take(1000)
        .map(|r| r.to_vec())
        .collect();
    for i in 0..20 {
        black_box(f(&rows[i % rows.len()]));
    }
    let mut t = Vec::with_capacity(reps.clamp(1, 100_000));
    let start = Instant::now();
    for i in 0..reps.max(1) {
        let r = &rows[i % rows.len()];
        let t0 = Instant::now();
        black_box(f(black_box(r)));
        t.push(t0.elapsed().as_secs_f64() * 1e6);
        if start.elapsed().as_secs_f64() > 3.0 && t.len() >= 20 {
            break;
        }
    }
    let mean_us = t.iter().sum::<f64>() / t.len() as f64;
    t.sort_by(|a, b| a.total_cmp(b));
    let q = |p: f64| t[((t.len() - 1) as f64 * p).round() as usize];
    LatencyStats {
        p50_us: q(0.5),
        p99_us: q(0.99),
        mean_us,
        reps: t.len(),
    }
}

/// Batched throughput in rows per second: the best of up to 3 runs over (up to) 4096 rows.
pub fn measure_batch<F: FnMut(ArrayView2<f64>) -> ndarray::Array2<f64>>(
    x: ArrayView2<f64>,
    mut f: F,
) -> f64 {
    let n = x.nrows().min(4096);
    let b = x.slice(ndarray::s![..n, ..]);
    let mut best = f64::INFINITY;
    for _ in 0..3 {
        let t0 = Instant::now();
        black_box(f(b));
        let e = t0.elapsed().as_secs_f64();
        best = best.min(e);
        if e > 5.0 {
            break;
        }
    }
    n as f64 / best
}
