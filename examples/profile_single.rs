//! A loop to profile single-row scoring under `perf record` or callgrind: scores the rows
//! of a data file one at a time, over and over, for a given number of seconds.
//!
//! Run: `cargo run --release --example profile_single -- MODEL DATA.csv TARGET SECONDS [f32|f64]`
//! then, for example, `perf record -g target/release/examples/profile_single …` and
//! `perf report --no-children`.

use kernelpress::model::AnyModel;
use std::hint::black_box;
use std::path::Path;
use std::time::Instant;

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let a: Vec<String> = std::env::args().collect();
    if a.len() < 5 {
        eprintln!("usage: profile_single MODEL DATA.csv TARGET SECONDS [f32|f64]");
        std::process::exit(2);
    }
    let (model, _) = AnyModel::load(Path::new(&a[1]))?;
    let t = kernelpress::data::read_table(Path::new(&a[2]), Some(&a[3]), false)?;
    let secs: f64 = a[4].parse()?;
    let f32 = a.get(5).is_none_or(|p| p == "f32");
    let rows: Vec<Vec<f64>> =
        t.x.rows()
            .into_iter()
            .take(1000)
            .map(|r| r.to_vec())
            .collect();
    // The compiled f32 path runs with one scratch for the whole loop (allocation-free).
    let (mut scratch, mut out) = match &model {
        AnyModel::Compiled(c) => (vec![0f32; c.scratch_len()], vec![0.0; c.head().ncols()]),
        _ => (Vec::new(), Vec::new()),
    };
    let start = Instant::now();
    let mut n = 0usize;
    while start.elapsed().as_secs_f64() < secs {
        for r in &rows {
            match (&model, f32) {
                (AnyModel::Compiled(c), true) => {
                    c.decision_one_f32_with(r, &mut scratch, &mut out);
                    black_box(out.clone())
                }
                (AnyModel::Compiled(c), false) => black_box(c.decision_one(r)),
                (AnyModel::Exact(e), true) => black_box(e.decision_one_f32(r)),
                (AnyModel::Exact(e), false) => black_box(e.decision_one(r)),
                (AnyModel::Guarded(g), true) => black_box(g.decision_one_f32(r).0),
                (AnyModel::Guarded(g), false) => black_box(g.decision_one(r).0),
            };
        }
        n += rows.len();
    }
    eprintln!(
        "{n} rows in {:.2} s: {:.2} µs per row",
        start.elapsed().as_secs_f64(),
        start.elapsed().as_secs_f64() * 1e6 / n as f64
    );
    Ok(())
}
