//! The headline speed figures, measured side by side in one run and written as one JSON
//! object (`bash benches/headline.sh --out FILE.json` builds this and runs it).
//!
//! - `wht_vs_fft_1024`: rustfft's complex f32 FFT of length 1,024 ÷ our f32 Walsh–Hadamard
//!   transform of the same length (median time per transform; > 1: ours is faster).
//! - `projection_vs_gemm`: faer's matrix product ÷ our dense projection step applied as a
//!   program (same shapes: 4,096 rows × 784 → 4,096; > 1: ours is faster).
//! - `machine_bandwidth_gbps`: a streaming read of 512 MiB of f64, best of five.
//! - `exact_single_bandwidth_fraction`: bytes the exact model's f32 single-row path reads
//!   per prediction ÷ its median time ÷ the measured bandwidth (`…_at_model_size`: against
//!   the same read over a buffer of the model's size, which the caches may hold).
//! - `fmnist_speedup_single`, `fmnist_speedup_batch`, `fmnist_agreement`: the best compiled
//!   model at D = 4,096 (Hadamard or Fastfood, distilled on the 60,000 training images,
//!   without the bandwidth search) against the exact Fashion-MNIST teacher, on the 10,000
//!   test images: single row with both in f32 (the compiled model's f32 program and head,
//!   the exact model's f32 support vectors), batched with both in f32 (`decision_f32`: one
//!   f32 matrix product per chunk on each side, the exact model's Gaussian profile through
//!   the vectorised f32 exponential; the f64 batch ratio is kept as
//!   `fmnist_speedup_batch_f64`), and the label agreement with the f64 exact model of the
//!   compiled model's f32 paths (the lower of the single-row and the batched figure).
//! - `compiled_single_head_us`, `compiled_single_vs_head`, `fmnist_speedup_single_head_bound`:
//!   the best model's f32 head product alone on one row (its weights read from the cache),
//!   the whole f32 single row ÷ that (1 would be a row that costs only its head), and the
//!   exact f32 single row ÷ that (the single-row speedup if the features cost nothing).
//! - `compile_rows_ratio`: compile time at 60,000 calibration rows ÷ at 20,000 (linear
//!   growth gives 3).
//! - `compile_vs_gemm_floor`: the 60,000-row compile's wall time ÷ the time its `ZᵀZ`
//!   product would take at the matrix-product rate measured in this run (2·n·D² flops).
//!
//! - `fmnist60k`: the big teacher (all 60,000 training images, about 20,500 support
//!   vectors, 64 MB in f32, larger than the caches) and its Hadamard 4,096 model distilled
//!   on those images: single row and batch, both in f32, and their ratios; the same with
//!   bf16 and int8 heads (`low_precision`), and the headline keys `fmnist60k_speedup_single`,
//!   `fmnist60k_speedup_batch`, `fmnist60k_agreement` for the head precision the library
//!   keeps (`fmnist60k_head_precision`: the smallest whose label agreement with the teacher
//!   on the ridge-choice rows of the first 5,000 training images is within 0.002 of the
//!   f32 head's; the test images never take part in the choice).
//! - `exact_f32_over_f64` and `exact_f32_over_f64_min`: the exact model's f64 single row
//!   ÷ its f32 single row (medians) on the shipped 8-column demo, an invented 20-column
//!   scenario (`narrow_scenario`), and the two Fashion-MNIST teachers; the smallest of them
//!   (below 1, the f32 row is slower than the f64 one somewhere).
//! - `fmnist_lowp`, `fmnist_speedup_single_lowp`, `fmnist_agreement_lowp`: the 10,000-image
//!   teacher's Hadamard model with bf16 and int8 heads, the same rule.
//!
//! The teacher: an exact Gaussian C-SVM (γ = 1/784 on pixels standardised on the training
//! subset, C = 10, one-vs-one) trained here on the first 10,000 training images of
//! Fashion-MNIST (Xiao, Rasul & Vollgraf 2017, MIT licence; Debian's
//! `dataset-fashion-mnist`); the big one on all 60,000 (trained once, about 3–6 minutes
//! on 2 cores, then cached).
//!
//! Run: `cargo run --release --example headline -- OUT.json [--micro]` (`--micro`: the
//! first three figures only).

#[path = "common/fashion.rs"]
mod fashion;

use kernelpress::data::Standardizer;
use kernelpress::exact::{fit_svm, SmoOptions};
use kernelpress::features::{FeatureSpec, Method};
use kernelpress::fit::{compile_exact, HeadKind, HeadPrecisionRule, RidgeGrid, Teacher};
use kernelpress::linalg::HeadPrecision;
use kernelpress::observe::Silent;
use kernelpress::program::{steps::Dense, Builder};
use kernelpress::report::{build, measure_single, ReportOptions};
use kernelpress::transform::wht_in_place;
use ndarray::{s, Array2};
use rustfft::num_complex::Complex;
use serde_json::json;
use std::hint::black_box;
use std::time::Instant;

/// Median over `rounds` of the time per call of `f` (each round runs `per_round` calls).
fn median_secs(rounds: usize, per_round: usize, mut f: impl FnMut()) -> f64 {
    let mut t: Vec<f64> = (0..rounds)
        .map(|_| {
            let t0 = Instant::now();
            for _ in 0..per_round {
                f();
            }
            t0.elapsed().as_secs_f64() / per_round as f64
        })
        .collect();
    t.sort_by(f64::total_cmp);
    t[rounds / 2]
}

/// Streaming-read bandwidth over `bytes` bytes of f64, best of `rounds` passes.
fn bandwidth_gbps(bytes: usize, rounds: usize) -> f64 {
    let n = bytes / 8;
    let v: Vec<f64> = (0..n).map(|i| (i % 7) as f64).collect();
    let mut best = f64::INFINITY;
    for _ in 0..rounds {
        let t0 = Instant::now();
        let mut acc = [0.0f64; 8];
        for c in v.chunks_exact(8) {
            for (a, x) in acc.iter_mut().zip(c) {
                *a += x;
            }
        }
        black_box(acc);
        best = best.min(t0.elapsed().as_secs_f64());
    }
    (n * 8) as f64 / best / 1e9
}

fn main() -> Result<(), Box<dyn std::error::Error>> {
    let out = std::env::args()
        .nth(1)
        .unwrap_or_else(|| "target/headline.json".into());
    let mut res = serde_json::Map::new();
    let say = |m: &str| eprintln!("[headline] {m}");

    // 1. WHT against the FFT, f32, length 1,024.
    let n = 1024;
    let mut x: Vec<f32> = (0..n).map(|i| (i as f32 * 0.1).sin()).collect();
    let wht = median_secs(31, 20_000, || wht_in_place(black_box(&mut x)));
    let mut planner = rustfft::FftPlanner::<f32>::new();
    let fft = planner.plan_fft_forward(n);
    let mut buf: Vec<Complex<f32>> = (0..n)
        .map(|i| Complex::new((i as f32 * 0.1).sin(), 0.0))
        .collect();
    let mut scratch = vec![Complex::new(0.0, 0.0); fft.get_inplace_scratch_len()];
    let fftt = median_secs(31, 20_000, || {
        fft.process_with_scratch(black_box(&mut buf), &mut scratch)
    });
    res.insert("wht_1024_ns".into(), json!(wht * 1e9));
    res.insert("fft_1024_ns".into(), json!(fftt * 1e9));
    res.insert("wht_vs_fft_1024".into(), json!(fftt / wht));
    say(&format!(
        "WHT {:.0} ns, FFT {:.0} ns",
        wht * 1e9,
        fftt * 1e9
    ));

    // 2. Dense projection as a program step against faer's product, same shapes.
    let (rows, d, dd) = (4096, 784, 4096);
    let xa = Array2::from_shape_fn((rows, d), |(i, j)| ((i * 7 + j * 3) as f64 * 0.01).sin());
    let w = Array2::from_shape_fn((dd, d), |(i, j)| ((i * 5 + j * 11) as f64 * 0.013).cos());
    let wt = w.t().as_standard_layout().into_owned();
    let mut b = Builder::new(d);
    let v = b.push(Dense::new(w.clone())?, &[Builder::INPUT])?;
    let prog = b.finish(v);
    let ours = median_secs(5, 1, || {
        black_box(prog.apply(xa.view()));
    });
    let gemm = median_secs(5, 1, || {
        let mut o = faer::Mat::<f64>::zeros(rows, dd);
        let fa = faer::MatRef::from_row_major_slice(xa.as_slice().unwrap(), rows, d);
        let fb = faer::MatRef::from_row_major_slice(wt.as_slice().unwrap(), d, dd);
        faer::linalg::matmul::matmul(
            o.as_mut(),
            faer::Accum::Replace,
            fa,
            fb,
            1.0,
            faer::Par::rayon(0),
        );
        black_box(o);
    });
    let gemm_flops = 2.0 * (rows * d * dd) as f64 / gemm;
    res.insert("projection_ms".into(), json!(ours * 1e3));
    res.insert("gemm_ms".into(), json!(gemm * 1e3));
    res.insert("gemm_gflops".into(), json!(gemm_flops / 1e9));
    res.insert("projection_vs_gemm".into(), json!(gemm / ours));
    say(&format!(
        "projection {:.1} ms, faer {:.1} ms ({:.1} GFLOP/s)",
        ours * 1e3,
        gemm * 1e3,
        gemm_flops / 1e9
    ));

    // 3. Bandwidth.
    let bw = bandwidth_gbps(512 << 20, 5);
    res.insert("machine_bandwidth_gbps".into(), json!(bw));
    say(&format!("bandwidth {bw:.1} GB/s"));

    if std::env::args().any(|a| a == "--micro") {
        // The transform, product and bandwidth figures alone (seconds, not minutes).
        let text = serde_json::to_string_pretty(&serde_json::Value::Object(res))?;
        std::fs::write(&out, format!("{text}\n"))?;
        return Ok(());
    }

    // 4. The Fashion-MNIST teacher.
    let (train, test) = fashion::load()?;
    let (xtr, ytr, xte) = (train.x, train.y, test.x);
    let sub = xtr.slice(s![..10_000, ..]);
    let scaler = Standardizer::fit(sub);
    let kernel: kernelpress::kernel::Kernel = "gaussian(gamma=0.0012755102040816326)".parse()?;
    let t0 = Instant::now();
    let opts = SmoOptions {
        c: 10.0,
        ..SmoOptions::default()
    };
    let exact = fit_svm(
        &kernel,
        scaler.apply(sub).view(),
        &ytr[..10_000],
        &opts,
        Some(scaler),
        &Silent,
    )?;
    say(&format!(
        "teacher: {} support vectors in {:.1} s",
        exact.n_support_vectors(),
        t0.elapsed().as_secs_f64()
    ));
    res.insert(
        "teacher_support_vectors".into(),
        json!(exact.n_support_vectors()),
    );

    // 5. Compile times at 20,000 and 60,000 rows (Hadamard, D = 4,096).
    let compile = |m: Method, rows: usize| -> Result<_, kernelpress::Error> {
        let spec = FeatureSpec::new(kernel.clone(), m, 784, 4096, 1);
        let t0 = Instant::now();
        let (c, _) = compile_exact(
            &exact,
            Some(xtr.slice(s![..rows, ..])),
            &spec,
            HeadKind::Distill,
            &RidgeGrid::standard(),
            None,
            &Silent,
        )?;
        Ok((c, t0.elapsed().as_secs_f64()))
    };
    let (_, t20) = compile(Method::Hadamard, 20_000)?;
    let (had, t60) = compile(Method::Hadamard, 60_000)?;
    let floor = 2.0 * 60_000.0 * 4096.0f64 * 4096.0 / gemm_flops;
    res.insert("compile_s_20k".into(), json!(t20));
    res.insert("compile_s_60k".into(), json!(t60));
    res.insert("compile_rows_ratio".into(), json!(t60 / t20));
    res.insert("ztz_floor_s_60k".into(), json!(floor));
    res.insert("compile_vs_gemm_floor".into(), json!(t60 / floor));
    say(&format!(
        "compile 20k {t20:.1} s, 60k {t60:.1} s (ZᵀZ floor {floor:.1} s)"
    ));
    let (ff, _) = compile(Method::Fastfood, 60_000)?;

    // 6. Speed and agreement on the test images.
    let ropts = ReportOptions {
        timing: true,
        ..ReportOptions::default()
    };
    let mut best: Option<(String, f64, f64, f64, f64, f64)> = None;
    let mut exact_p50 = (f64::NAN, f64::NAN);
    let mut batch_f64 = f64::NAN;
    for (name, m) in [("hadamard", &had), ("fastfood", &ff)] {
        let r = build(m, &exact, xte.view(), None, None, &ropts)?;
        let t = &r.timing;
        let nan = f64::NAN;
        exact_p50 = (
            t.latency_us_exact_p50.unwrap_or(nan),
            t.latency_us_exact_f32_p50.unwrap_or(nan),
        );
        let single = t.speedup_single_f32.unwrap_or(nan);
        let batch = t.speedup_batch_f32.unwrap_or(nan);
        let agree = r
            .agreement_f32
            .unwrap_or(nan)
            .min(r.agreement_f32_batch.unwrap_or(nan));
        say(&format!(
            "{name} 4096: single {single:.1}× (both f32), batch {batch:.1}× (both f32), agreement {agree:.4} (exact p50 {:.0} µs f64, {:.0} µs f32)",
            exact_p50.0, exact_p50.1
        ));
        res.insert(
            format!("fmnist_{name}"),
            json!({"speedup_single_f32": single, "speedup_single_f64": t.speedup_single,
                   "speedup_batch_f32": batch, "speedup_batch_f64": t.speedup_batch,
                   "throughput_rows_per_s_exact_f32": t.throughput_rows_per_s_exact_f32,
                   "throughput_rows_per_s_compiled_f32": t.throughput_rows_per_s_compiled_f32,
                   "agreement_f32_single": r.agreement_f32,
                   "agreement_f32_batch": r.agreement_f32_batch,
                   "agreement_exact_f32_batch": r.agreement_exact_f32_batch,
                   "agreement_f64": r.agreement,
                   "agreement_exact_f32": r.agreement_exact_f32,
                   "latency_us_exact_p50": t.latency_us_exact_p50,
                   "latency_us_exact_f32_p50": t.latency_us_exact_f32_p50,
                   "latency_us_compiled_f32_p50": t.latency_us_compiled_f32_p50,
                   "latency_us_compiled_p50": t.latency_us_compiled_p50}),
        );
        if best.as_ref().is_none_or(|b| single > b.1) {
            let c32 = t.latency_us_compiled_f32_p50.unwrap_or(nan);
            best = Some((name.to_string(), single, batch, agree, c32, exact_p50.1));
            batch_f64 = t.speedup_batch.unwrap_or(nan);
        }
    }
    let (name, single, batch, agree, c32, e32) = best.expect("two candidates");
    // The best model's f32 head product alone, on one row of its features: the part of
    // the single row that reads its 4,096 × 45 weights from the cache, the floor under
    // the whole row (features, head, intercepts).
    let head_us = head_alone_p50_us(if name == "hadamard" { &had } else { &ff }, xte.view());
    res.insert("compiled_single_head_us".into(), json!(head_us));
    res.insert("compiled_single_vs_head".into(), json!(c32 / head_us));
    res.insert(
        "fmnist_speedup_single_head_bound".into(),
        json!(e32 / head_us),
    );
    say(&format!(
        "{name} single row {c32:.2} µs, its head alone {head_us:.2} µs ({:.2}×): speedup bound with free features {:.1}×",
        c32 / head_us,
        e32 / head_us
    ));
    // The Hadamard model as ONNX, for benches/headline.sh to time in onnxruntime beside
    // `score`'s f32 paths (fmnist_hadamard: latency_us_compiled_f32_p50 and
    // throughput_rows_per_s_compiled_f32), with the test images as .npy rows.
    let onnx_path = std::path::Path::new(&out).with_extension("hadamard4096.onnx");
    kernelpress::export::export(
        &had,
        &kernelpress::export::ExportOptions::new(kernelpress::export::Format::Onnx),
        &onnx_path,
    )?;
    let rows_path = std::path::Path::new(&out).with_extension("test_rows.npy");
    let flat: Vec<f32> = xte.iter().map(|v| *v as f32).collect();
    kernelpress::data::write_npy_f32(&rows_path, &[xte.nrows(), xte.ncols()], &flat)?;
    res.insert("onnx_model".into(), json!(onnx_path.display().to_string()));
    res.insert("onnx_rows".into(), json!(rows_path.display().to_string()));
    res.insert("threads".into(), json!(rayon::current_num_threads()));
    res.insert("fmnist_best".into(), json!(name));
    res.insert("fmnist_speedup_single".into(), json!(single));
    res.insert("fmnist_speedup_batch".into(), json!(batch));
    res.insert("fmnist_speedup_batch_f64".into(), json!(batch_f64));
    res.insert("fmnist_agreement".into(), json!(agree));
    // 6b. The Hadamard model with a low-precision head (bf16, int8: `--head-precision`),
    //     against one measurement of the exact model; the precision the library's rule
    //     keeps, judged on training images.
    let had_r = &res["fmnist_hadamard"];
    let had_agree = had_r["agreement_f32_single"]
        .as_f64()
        .unwrap_or(f64::NAN)
        .min(had_r["agreement_f32_batch"].as_f64().unwrap_or(f64::NAN));
    let had_c32 = had_r["latency_us_compiled_f32_p50"]
        .as_f64()
        .unwrap_or(f64::NAN);
    let (lowp, best_lowp) = low_precision(
        &had,
        &exact,
        xtr.slice(s![..5_000, ..]),
        xte.view(),
        had_agree,
        &ropts,
        &say,
    )?;
    res.insert("fmnist_lowp".into(), lowp);
    if let Some((p, single, agree, c)) = best_lowp {
        res.insert("fmnist_lowp_precision".into(), json!(p));
        res.insert("fmnist_speedup_single_lowp".into(), json!(single));
        res.insert("fmnist_agreement_lowp".into(), json!(agree));
        res.insert("fmnist_lowp_vs_f32_head_single".into(), json!(had_c32 / c));
    }
    // The exact model's f32 single-row path reads its support vectors and its (packed)
    // coefficients in f32.
    let bytes = exact.bytes_per_prediction(true) as f64;
    res.insert(
        "exact_single_bandwidth_fraction".into(),
        json!(bytes / (exact_p50.1 * 1e-6) / (bw * 1e9)),
    );
    res.insert("exact_bytes_per_prediction_f32".into(), json!(bytes));
    // The same read over a buffer of the exact model's size: what the caches give a
    // working set that small (the fraction above can pass 1 when the model stays cached).
    let bw_model = bandwidth_gbps(bytes as usize, 40);
    res.insert("bandwidth_gbps_at_model_size".into(), json!(bw_model));
    res.insert(
        "exact_single_bandwidth_fraction_at_model_size".into(),
        json!(bytes / (exact_p50.1 * 1e-6) / (bw_model * 1e9)),
    );
    // 7. The big teacher: all 60,000 training images (about 20,500 support vectors, 64 MB
    //    in f32: larger than the caches), cached in target/fashion/teacher60k.safetensors
    //    (as examples/fashion_refine.rs caches it), and its Hadamard 4,096 model distilled
    //    on those 60,000 images; single rows and batches, both in f32, on the test images.
    let cache = std::path::Path::new("target/fashion/teacher60k.safetensors");
    let big = if cache.exists() {
        kernelpress::model::ExactModel::load(cache)?
    } else {
        let scaler = Standardizer::fit(xtr.view());
        let t0 = Instant::now();
        let m = fit_svm(
            &kernel,
            scaler.apply(xtr.view()).view(),
            &ytr,
            &opts,
            Some(scaler),
            &Silent,
        )?;
        say(&format!(
            "60k teacher: {} support vectors in {:.0} s",
            m.n_support_vectors(),
            t0.elapsed().as_secs_f64()
        ));
        std::fs::create_dir_all("target/fashion")?;
        m.save(cache)?;
        m
    };
    // The cached teacher's own kernel (examples/fashion_refine.rs writes γ to 5 digits).
    let spec = FeatureSpec::new(big.kernel().clone(), Method::Hadamard, 784, 4096, 1);
    let (h60, _) = compile_exact(
        &big,
        Some(xtr.view()),
        &spec,
        HeadKind::Distill,
        &RidgeGrid::standard(),
        None,
        &Silent,
    )?;
    let r60 = build(&h60, &big, xte.view(), None, None, &ropts)?;
    let agree60 = r60
        .agreement_f32
        .unwrap_or(f64::NAN)
        .min(r60.agreement_f32_batch.unwrap_or(f64::NAN));
    let (lowp60, best60) = low_precision(
        &h60,
        &big,
        xtr.slice(s![..5_000, ..]),
        xte.view(),
        agree60,
        &ropts,
        &say,
    )?;
    let t = &r60.timing;
    let nan = f64::NAN;
    let (e1, c1) = (
        t.latency_us_exact_f32_p50.unwrap_or(nan),
        t.latency_us_compiled_f32_p50.unwrap_or(nan),
    );
    let (eb, cb) = (
        t.throughput_rows_per_s_exact_f32.unwrap_or(nan),
        t.throughput_rows_per_s_compiled_f32.unwrap_or(nan),
    );
    say(&format!(
        "60k teacher ({} SVs, {:.1} MB f32): exact f32 single {e1:.0} µs, batch {eb:.0} rows/s; Hadamard 4,096 f32 single {c1:.2} µs, batch {cb:.0} rows/s: {:.1}× single, {:.1}× batch, agreement {:.4}",
        big.n_support_vectors(),
        big.bytes_per_prediction(true) as f64 / 1e6,
        e1 / c1,
        cb / eb,
        r60.agreement.unwrap_or(nan)
    ));
    res.insert(
        "fmnist60k".into(),
        json!({"support_vectors": big.n_support_vectors(),
               "exact_bytes_f32": big.bytes_per_prediction(true),
               "exact_f32_single_us_p50": e1, "exact_f32_batch_rows_per_s": eb,
               "hadamard4096_f32_single_us_p50": c1, "hadamard4096_f32_batch_rows_per_s": cb,
               "speedup_single_f32": e1 / c1, "speedup_batch_f32": cb / eb,
               "agreement_f64": r60.agreement, "agreement_f32_single": r60.agreement_f32,
               "low_precision": lowp60}),
    );
    // The headline keys: the head precision the library's rule keeps (f32 when it keeps
    // the f32 head).
    let (p60, s60, b60, a60) = match &best60 {
        Some((p, single, agree, _)) => {
            let b = res["fmnist60k"]["low_precision"][p.as_str()]["speedup_batch_f32"]
                .as_f64()
                .unwrap_or(f64::NAN);
            (p.clone(), *single, b, *agree)
        }
        None => ("f32".to_string(), e1 / c1, cb / eb, agree60),
    };
    // 8. The exact model's f32 single row against its f64 one on three scenarios: the
    //    shipped 8-column demo, an invented 20-column one, Fashion-MNIST (10,000 and
    //    60,000 images, from the measurements above).
    let mut ratios = serde_json::Map::new();
    let demo =
        kernelpress::model::ExactModel::load(std::path::Path::new("models/pump_svm.safetensors"))?;
    let demo_rows = kernelpress::data::read_table(
        std::path::Path::new("models/pump_test.csv"),
        Some("condition"),
        false,
    )?;
    let (narrow, narrow_rows) = narrow_scenario()?;
    for (name, m, x) in [
        ("demo8", &demo, demo_rows.x.view()),
        ("narrow20", &narrow, narrow_rows.view()),
    ] {
        let t = kernelpress::report::measure_exact(m, x, &ropts);
        let r = t.single.p50_us / t.single_f32.p50_us;
        say(&format!(
            "exact {name} ({} columns, {} SVs): single row f64 {:.1} µs, f32 {:.1} µs ({r:.2}×)",
            m.input_dim(),
            m.n_support_vectors(),
            t.single.p50_us,
            t.single_f32.p50_us
        ));
        ratios.insert(
            name.into(),
            json!({"f64_us": t.single.p50_us, "f32_us": t.single_f32.p50_us, "ratio": r}),
        );
    }
    let had_r = &res["fmnist_hadamard"];
    let (f64_10k, f32_10k) = (
        had_r["latency_us_exact_p50"].as_f64().unwrap_or(f64::NAN),
        had_r["latency_us_exact_f32_p50"]
            .as_f64()
            .unwrap_or(f64::NAN),
    );
    let f64_60k = r60.timing.latency_us_exact_p50.unwrap_or(f64::NAN);
    for (name, a, b) in [("fmnist10k", f64_10k, f32_10k), ("fmnist60k", f64_60k, e1)] {
        ratios.insert(
            name.into(),
            json!({"f64_us": a, "f32_us": b, "ratio": a / b}),
        );
    }
    let min_ratio = ratios
        .values()
        .filter_map(|v| v["ratio"].as_f64())
        .fold(f64::INFINITY, f64::min);
    say(&format!(
        "exact f32 over f64, smallest single-row ratio: {min_ratio:.2}"
    ));
    res.insert(
        "exact_f32_over_f64".into(),
        serde_json::Value::Object(ratios),
    );
    res.insert("exact_f32_over_f64_min".into(), json!(min_ratio));
    res.insert("fmnist60k_head_precision".into(), json!(p60));
    res.insert("fmnist60k_speedup_single".into(), json!(s60));
    res.insert("fmnist60k_speedup_batch".into(), json!(b60));
    res.insert("fmnist60k_agreement".into(), json!(a60));
    let text = serde_json::to_string_pretty(&serde_json::Value::Object(res))?;
    std::fs::write(&out, format!("{text}\n"))?;
    say(&format!("wrote {out}"));
    Ok(())
}

/// An invented narrow scenario: three classes of 20 measurements, each class a blob with
/// unit noise around centres drawn once (seed 20), overlapping enough that most of the
/// 6,000 training rows become support vectors; a Gaussian SVM (γ = 1/20, C = 1) on the
/// standardised rows, and 1,000 other rows to time it on.
fn narrow_scenario(
) -> Result<(kernelpress::model::ExactModel, Array2<f64>), Box<dyn std::error::Error>> {
    use rand::{RngExt, SeedableRng};
    use rand_distr::{Distribution, Normal};
    const COLS: usize = 20;
    let mut rng = rand::rngs::ChaCha20Rng::seed_from_u64(20);
    let noise = Normal::new(0.0, 1.0)?;
    let centres = Array2::from_shape_fn((3, COLS), |_| 0.6 * noise.sample(&mut rng));
    let mut draw = |n: usize| {
        let mut x = Array2::zeros((n, COLS));
        let mut y = Vec::with_capacity(n);
        for i in 0..n {
            let c = rng.random_range(0..3usize);
            for j in 0..COLS {
                x[[i, j]] = centres[[c, j]] + noise.sample(&mut rng);
            }
            y.push(format!("class{c}"));
        }
        (x, y)
    };
    let (xtr, ytr) = draw(6_000);
    let (xte, _) = draw(1_000);
    let scaler = Standardizer::fit(xtr.view());
    let kernel: kernelpress::kernel::Kernel = "gaussian(gamma=0.05)".parse()?;
    let m = fit_svm(
        &kernel,
        scaler.apply(xtr.view()).view(),
        &ytr,
        &SmoOptions {
            c: 1.0,
            ..SmoOptions::default()
        },
        Some(scaler),
        &Silent,
    )?;
    Ok((m, xte))
}

/// The model with each low-precision head: its report on the test images (timed, the exact
/// model measured once for all), as JSON per precision, and the precision the library's
/// rule keeps ([`HeadPrecisionRule::Smallest`], tolerance 0.002), judged on the
/// ridge-choice rows of `choose_on` (training images, never the test images whose figures
/// are reported): (precision, single-row speedup, agreement, latency µs), `None` when it
/// keeps f32.
#[allow(clippy::type_complexity)]
fn low_precision(
    m: &kernelpress::model::CompiledModel,
    exact: &kernelpress::model::ExactModel,
    choose_on: ndarray::ArrayView2<f64>,
    x: ndarray::ArrayView2<f64>,
    f32_agreement: f64,
    ropts: &ReportOptions,
    say: &dyn Fn(&str),
) -> Result<(serde_json::Value, Option<(String, f64, f64, f64)>), Box<dyn std::error::Error>> {
    let teacher = Teacher::new(exact, choose_on, &Silent)?;
    let (_, summary) =
        teacher.set_head_precision(m, HeadPrecisionRule::Smallest { tolerance: 0.002 })?;
    let et = kernelpress::report::measure_exact(exact, x, ropts);
    let shared = ReportOptions {
        exact_timing: Some(et),
        ..ropts.clone()
    };
    let mut out = serde_json::Map::new();
    out.insert("kept".into(), json!(summary.chosen.name()));
    out.insert("kept_by".into(), summary.to_json());
    let mut kept: Option<(String, f64, f64, f64)> = None;
    for p in [HeadPrecision::Bf16, HeadPrecision::Int8] {
        let mut mp = m.clone();
        mp.set_head_precision(p);
        let r = build(&mp, exact, x, None, None, &shared)?;
        let t = &r.timing;
        let nan = f64::NAN;
        let single = t.speedup_single_f32.unwrap_or(nan);
        let agree = r
            .agreement_f32
            .unwrap_or(nan)
            .min(r.agreement_f32_batch.unwrap_or(nan));
        let c = t.latency_us_compiled_f32_p50.unwrap_or(nan);
        say(&format!(
            "  head {}: single {single:.1}× ({c:.2} µs), batch {:.1}×, agreement {agree:.4} (f32 head {f32_agreement:.4}); labels equal to its f64 path {:.4}",
            p.name(),
            t.speedup_batch_f32.unwrap_or(nan),
            r.agreement_f32_with_f64.unwrap_or(nan)
        ));
        out.insert(
            p.name().into(),
            json!({"path": p.path_name(), "speedup_single_f32": single,
                   "speedup_batch_f32": t.speedup_batch_f32,
                   "latency_us_compiled_f32_p50": c,
                   "latency_us_exact_f32_p50": t.latency_us_exact_f32_p50,
                   "throughput_rows_per_s_compiled_f32": t.throughput_rows_per_s_compiled_f32,
                   "agreement_f32_single": r.agreement_f32,
                   "agreement_f32_batch": r.agreement_f32_batch,
                   "agreement_f32_with_f64": r.agreement_f32_with_f64}),
        );
        if p == summary.chosen {
            kept = Some((p.name().to_string(), single, agree, c));
        }
    }
    say(&format!(
        "  head precision kept on training rows' ridge-choice rows: {}",
        summary.chosen.name()
    ));
    Ok((serde_json::Value::Object(out), kept))
}

/// Median time (µs) of the compiled model's own packed f32 head product on one row of its
/// f32 features (the first test image's, standardised as the model does), 20,000 calls
/// timed one by one by the report's single-row harness.
fn head_alone_p50_us(m: &kernelpress::model::CompiledModel, x: ndarray::ArrayView2<f64>) -> f64 {
    let head = m.head_f32();
    let first = x.slice(s![..1, ..]);
    let row = match m.scaling() {
        Some(sc) => sc.apply(first).row(0).to_vec(),
        None => first.row(0).to_vec(),
    };
    let z = m
        .program()
        .apply_one_f32(&row)
        .unwrap_or_else(|| vec![0.5; m.head().nrows()]);
    let mut out = vec![0f32; m.head().ncols()];
    // The returned copy matches the whole f32 row's timing closure in the report.
    measure_single(first, 20_000, |_| {
        head.product(black_box(&z), &mut out);
        out.iter().map(|&v| f64::from(v)).collect()
    })
    .p50_us
}
