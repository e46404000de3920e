//! The four batch paths side by side, or a loop over one of them to profile.
//!
//! Run: `cargo run --release --example profile_batch -- EXACT COMPILED DATA TARGET [SECONDS]`.
//! Without SECONDS: throughput of the exact and the compiled model's batches in f64 and in
//! f32 over the first 4,096 rows (best of three each, one run, both on every core), their
//! ratios, and the label agreement of the f32 batches with the exact f64 labels. With
//! SECONDS: the compiled model's f32 batches over and over, for
//! `perf record -e cpu-clock -g`.

use kernelpress::model::AnyModel;
use std::path::Path;
use std::time::Instant;

fn best(f: &mut dyn FnMut()) -> f64 {
    let mut b = f64::INFINITY;
    for _ in 0..3 {
        let t0 = Instant::now();
        f();
        b = b.min(t0.elapsed().as_secs_f64());
    }
    b
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let a: Vec<String> = std::env::args().collect();
    if a.len() < 5 {
        eprintln!("usage: profile_batch EXACT COMPILED DATA TARGET [SECONDS]");
        std::process::exit(2);
    }
    let (AnyModel::Exact(e), AnyModel::Compiled(c)) = (
        AnyModel::load(Path::new(&a[1]))?.0,
        AnyModel::load(Path::new(&a[2]))?.0,
    ) else {
        return Err("expected an exact model, then a compiled one".into());
    };
    let t = kernelpress::data::read_table(Path::new(&a[3]), Some(&a[4]), false)?;
    let x = t.x.slice(ndarray::s![..t.x.nrows().min(4096), ..]);
    let n = x.nrows() as f64;
    if let Some(secs) = a.get(5) {
        let secs: f64 = secs.parse()?;
        let t0 = Instant::now();
        let mut k = 0usize;
        while t0.elapsed().as_secs_f64() < secs {
            std::hint::black_box(c.decision_f32(x));
            k += 1;
        }
        let us = t0.elapsed().as_secs_f64() * 1e6 / (k as f64 * n);
        println!("compiled f32 batches: {us:.2} µs per row ({k} batches of {n} rows)");
        return Ok(());
    }
    let te64 = best(&mut || drop(std::hint::black_box(e.decision(x))));
    let te32 = best(&mut || drop(std::hint::black_box(e.decision_f32(x))));
    let tc64 = best(&mut || drop(std::hint::black_box(c.decision(x))));
    let tc32 = best(&mut || drop(std::hint::black_box(c.decision_f32(x))));
    println!(
        "rows/s: exact f64 {:.0}, exact f32 {:.0}, compiled f64 {:.0}, compiled f32 {:.0}",
        n / te64,
        n / te32,
        n / tc64,
        n / tc32
    );
    println!("speedup: f64 {:.2}×, f32 {:.2}×", te64 / tc64, te32 / tc32);
    let labels = |d: ndarray::Array2<f64>| e.labels_of(d.view());
    let l64 = labels(e.decision(x));
    let agree = |l: Vec<String>| l.iter().zip(&l64).filter(|(p, q)| p == q).count() as f64 / n;
    println!(
        "agreement with the exact f64 labels: exact f32 {:.4}, compiled f32 {:.4}",
        agree(labels(e.decision_f32(x))),
        agree(labels(c.decision_f32(x)))
    );
    Ok(())
}
