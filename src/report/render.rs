//! The report as text for people: units, three significant digits, each figure next to
//! what it means, only what was measured.

use super::Report;

/// `x` with three significant digits (plain notation from 0.001 to 10⁶).
pub fn sig3(x: f64) -> String {
    if !x.is_finite() {
        return format!("{x}");
    }
    if x == 0.0 {
        return "0".into();
    }
    let a = x.abs();
    if !(1e-3..1e6).contains(&a) {
        return format!("{x:.2e}");
    }
    let digits = (2 - a.log10().floor() as i32).max(0) as usize;
    format!("{x:.digits$}")
}

/// Bytes in binary units: B, KiB (1,024 B), MiB or GiB — the one unit system every size
/// the tool prints uses (and the one `--max-memory` and the other size flags read).
pub fn bytes(n: usize) -> String {
    let x = n as f64;
    if x >= 1024.0 * 1024.0 * 1024.0 {
        format!("{} GiB", sig3(x / 1073741824.0))
    } else if x >= 1024.0 * 1024.0 {
        format!("{} MiB", sig3(x / 1048576.0))
    } else if x >= 1024.0 {
        format!("{} KiB", sig3(x / 1024.0))
    } else {
        format!("{n} B")
    }
}

/// A speed ratio (baseline time ÷ new time) in words that mean what they say: "2.50×
/// faster" above 1, "1.16× slower" below 1 (the inverse ratio), "as fast" at 1 to three
/// significant digits.
///
/// ```
/// use kernelpress::report::speed_ratio;
/// assert_eq!(speed_ratio(2.5), "2.50× faster");
/// assert_eq!(speed_ratio(0.864), "1.16× slower");
/// assert_eq!(speed_ratio(1.0004), "as fast");
/// ```
pub fn speed_ratio(r: f64) -> String {
    if !(r > 0.0) || !r.is_finite() {
        return format!("speed ratio {r}");
    }
    let q = if r >= 1.0 { r } else { 1.0 / r };
    if sig3(q) == "1.00" {
        "as fast".into()
    } else if r > 1.0 {
        format!("{}× faster", sig3(q))
    } else {
        format!("{}× slower", sig3(q))
    }
}

/// A count with k or M.
pub fn count(x: f64) -> String {
    if x >= 1e6 {
        format!("{} M", sig3(x / 1e6))
    } else if x >= 1e3 {
        format!("{} k", sig3(x / 1e3))
    } else {
        sig3(x)
    }
}

fn row(s: &mut String, label: &str, exact: &str, compiled: &str, note: &str) {
    let line = format!("  {label:<28} {exact:>14} {compiled:>14}  {note}");
    s.push_str(line.trim_end());
    s.push('\n');
}

/// The report as a human-readable text.
pub fn render_text(r: &Report) -> String {
    let mut s = String::new();
    s.push_str(&format!(
        "compiled model: {}, {} features (seed {}), for {}{}\n",
        r.method,
        r.features,
        r.seed,
        r.kernel,
        if r.map_bandwidth != 1.0 {
            format!(" (map at {}× the kernel's bandwidth)", r.map_bandwidth)
        } else {
            String::new()
        }
    ));
    s.push_str(&format!(
        "evaluated on {} rows{}\n\n",
        r.n_rows,
        r.evaluated_on
            .as_ref()
            .map(|e| format!(" ({e})"))
            .unwrap_or_default()
    ));
    if let (Some(a), Some([lo, hi])) = (r.agreement, r.agreement_ci95) {
        s.push_str(&format!(
            "  agreement with the exact model   {a:.4} (95% interval {lo:.4}–{hi:.4})\n      share of rows given the same label as the exact model\n"
        ));
    }
    if let (Some(sh), Some(ag)) = (&r.stage_shares, &r.stage_agreement) {
        let a0 = ag
            .first()
            .copied()
            .flatten()
            .map(|a| format!(", agreement {a:.4} on them"))
            .unwrap_or_default();
        let part = sh.get(2).copied().unwrap_or(0.0);
        let part_text = if part > 0.0 {
            format!("; completed by the exact model {:.1}%", 100.0 * part)
        } else {
            String::new()
        };
        let work = r
            .exact_work_share
            .map(|w| format!("\n      the exact model's work per row: {:.1}% of its support vectors on average", 100.0 * w))
            .unwrap_or_default();
        s.push_str(&format!(
            "  answered by                     compiled stage {:.1}% of rows{a0}; exact model {:.1}%{part_text}\n      the guard sends what the compiled model is unsure of to the exact model{work}\n",
            100.0 * sh.first().copied().unwrap_or(0.0),
            100.0 * sh.get(1).copied().unwrap_or(0.0)
        ));
    }
    if let (Some(a), Some(d)) = (r.agreement_f32, r.f32_max_abs_difference) {
        let p = r.head_precision.as_deref().unwrap_or("f32");
        let same = r
            .agreement_f32_with_f64
            .map(|v| format!("; {v:.4} of the labels equal the f64 path's"))
            .unwrap_or_default();
        s.push_str(&format!(
            "  with the head in {p:<15}agreement {a:.4}; decisions move by at most {} from the f64 path{same}\n",
            sig3(d)
        ));
    }
    if let (Some(e), Some(c)) = (r.accuracy_exact, r.accuracy_compiled) {
        s.push_str(&format!(
            "  accuracy                        exact {e:.4}, compiled {c:.4} ({:+.2} points)\n      share of rows given the true label\n",
            100.0 * (c - e)
        ));
    }
    if let Some(p) = &r.probabilities {
        s.push_str(&format!(
            "  class probabilities             log loss {:.4}, Brier score {:.4} on {} labelled rows\n      Platt sigmoids fitted on {}; lower is better on both (log loss of a uniform guess: ln classes)\n",
            p.log_loss, p.brier, p.n_rows, p.fitted_on
        ));
    }
    s.push_str(&format!(
        "  decision values                 RMSE {}, R² {}, max |error| {}\n      how far the compiled scores are from the exact ones (same units as the scores)\n",
        sig3(r.decision_rmse),
        r.decision_r2.map(|v| format!("{v:.4}")).unwrap_or_else(|| "undefined (constant scores)".into()),
        sig3(r.decision_max_abs_error)
    ));
    s.push_str(&format!(
        "  kernel values                   RMSE {}, max |error| {}, Gram relative error {} (first {} rows)\n      how well ⟨z(x), z(y)⟩ reproduces k(x, y); the max is the worst single pair and can be\n      large while decisions rarely change, since the head fit corrects for the map\n",
        sig3(r.kernel_rmse),
        sig3(r.kernel_max_abs_error),
        sig3(r.gram_rel_frobenius_error),
        r.kernel_rows
    ));
    s.push('\n');
    row(&mut s, "", "exact", "compiled", "");
    row(
        &mut s,
        "parameters",
        &bytes(r.bytes_exact),
        &bytes(r.bytes_compiled),
        "",
    );
    row(
        &mut s,
        "flops per prediction",
        &count(r.flops_exact as f64),
        &count(r.flops_compiled as f64),
        "(analytic)",
    );
    let t = &r.timing;
    if let (Some(e), Some(c)) = (t.latency_us_exact_p50, t.latency_us_compiled_p50) {
        let speed = t.speedup_single.map(speed_ratio).unwrap_or_default();
        row(
            &mut s,
            "single-row latency, median",
            &format!("{} µs", sig3(e)),
            &format!("{} µs", sig3(c)),
            &speed,
        );
    }
    if let (Some(e), Some(c)) = (t.latency_us_exact_p50, t.latency_us_compiled_f32_p50) {
        row(
            &mut s,
            "  with the head in f32",
            "",
            &format!("{} µs", sig3(c)),
            &speed_ratio(e / c),
        );
    }
    if let (Some(e), Some(c)) = (t.latency_us_exact_f32_p50, t.latency_us_compiled_f32_p50) {
        let agree = r
            .agreement_exact_f32
            .map(|a| format!(", exact f32 agrees with f64 on {a:.4}"))
            .unwrap_or_default();
        row(
            &mut s,
            "  both in f32",
            &format!("{} µs", sig3(e)),
            &format!("{} µs", sig3(c)),
            &format!("{}{agree}", speed_ratio(e / c)),
        );
    }
    if let (Some(e), Some(c)) = (t.latency_us_exact_mean, t.latency_us_compiled_mean) {
        let speed = t.speedup_mean.map(speed_ratio).unwrap_or_default();
        row(
            &mut s,
            "single-row latency, mean",
            &format!("{} µs", sig3(e)),
            &format!("{} µs", sig3(c)),
            &speed,
        );
    }
    if let (Some(e), Some(c)) = (t.latency_us_exact_f32_mean, t.latency_us_compiled_f32_mean) {
        let speed = t.speedup_mean_f32.map(speed_ratio).unwrap_or_default();
        row(
            &mut s,
            "  mean, both in f32",
            &format!("{} µs", sig3(e)),
            &format!("{} µs", sig3(c)),
            &speed,
        );
    }
    if let (Some(e), Some(c)) = (t.latency_us_exact_p99, t.latency_us_compiled_p99) {
        row(
            &mut s,
            "single-row latency, p99",
            &format!("{} µs", sig3(e)),
            &format!("{} µs", sig3(c)),
            "",
        );
    }
    if let (Some(e), Some(c)) = (
        t.throughput_rows_per_s_exact,
        t.throughput_rows_per_s_compiled,
    ) {
        let speed = t.speedup_batch.map(speed_ratio).unwrap_or_default();
        row(
            &mut s,
            "batched throughput",
            &format!("{} rows/s", count(e)),
            &format!("{} rows/s", count(c)),
            &speed,
        );
    }
    if let (Some(e), Some(c)) = (
        t.throughput_rows_per_s_exact_f32,
        t.throughput_rows_per_s_compiled_f32,
    ) {
        let agree = match (r.agreement_f32_batch, r.agreement_exact_f32_batch) {
            (Some(a), Some(b)) => format!(", agreement {a:.4} (exact f32: {b:.4})"),
            _ => String::new(),
        };
        row(
            &mut s,
            "  both in f32",
            &format!("{} rows/s", count(e)),
            &format!("{} rows/s", count(c)),
            &format!("{}{agree}", speed_ratio(c / e)),
        );
    }
    if t.latency_us_exact_p50.is_none() {
        s.push_str("  (latency not measured: --no-timing)\n");
    }
    if !r.changed_decisions.is_empty() {
        s.push_str("\n  decisions that change (exact label → compiled label: rows)\n");
        for c in &r.changed_decisions {
            s.push_str(&format!("    {} → {}: {}\n", c.exact, c.compiled, c.rows));
        }
    }
    // Warnings are not part of the text: the caller shows each once (the CLI on stderr).
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn three_significant_digits_and_units() {
        assert_eq!(sig3(25.0930), "25.1");
        assert_eq!(sig3(2634.1538), "2634");
        assert_eq!(sig3(0.0407), "0.0407");
        assert_eq!(sig3(1.5), "1.50");
        assert_eq!(sig3(123456789.0), "1.23e8");
        assert_eq!(bytes(284768), "278 KiB");
        assert_eq!(bytes(900), "900 B");
        assert_eq!(bytes(3 << 20), "3.00 MiB");
        assert_eq!(bytes(5 << 30), "5.00 GiB");
        assert_eq!(count(91476.0), "91.5 k");
    }

    #[test]
    fn ratios_below_one_are_slower() {
        assert_eq!(speed_ratio(0.864), "1.16× slower");
        assert_eq!(speed_ratio(0.5), "2.00× slower");
        assert_eq!(speed_ratio(3.0), "3.00× faster");
        assert_eq!(speed_ratio(0.9996), "as fast");
        for r in [0.1, 0.7, 0.99, 1.01, 2.0, 40.0] {
            let t = speed_ratio(r);
            assert_eq!(t.ends_with("faster"), r > 1.0, "{r}: {t}");
        }
    }
}
