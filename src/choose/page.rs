//! The sweep's page: one self-contained HTML file (inline SVG, no scripts, no network):
//! the picture, the recommendation, the table and the cautions.

use super::{recommend, Sweep};

fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

fn num(v: f64, digits: usize) -> String {
    if v.is_finite() {
        format!("{v:.digits$}")
    } else {
        "not measured".into()
    }
}

/// A bound for people: 0.01 rather than 0.010000000000000009.
fn short(v: f64) -> String {
    let t = format!("{v:.6}");
    t.trim_end_matches('0').trim_end_matches('.').to_string()
}

/// The page. `title` names the model; `svg` is the picture ([`super::render_svg`]);
/// `max_loss` is the user's tolerance for the recommendation; `context` lines (data, machine)
/// are shown under the title.
pub fn render_page(s: &Sweep, svg: &str, title: &str, max_loss: f64, context: &[String]) -> String {
    let svg = match svg.find("<svg") {
        Some(i) => &svg[i..],
        None => svg,
    };
    let mut h = String::new();
    h.push_str("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n");
    h.push_str(&format!("<title>Sweep: {}</title>\n", esc(title)));
    h.push_str(
        "<style>\nbody{font-family:sans-serif;margin:2em auto;max-width:70em;color:#222}\n\
         table{border-collapse:collapse;font-size:0.9em}\n\
         th,td{border:1px solid #bbb;padding:0.25em 0.6em;text-align:right}\n\
         th{background:#eee}td.l{text-align:left}\n\
         tr.front td{font-weight:bold}tr.exact td{background:#f4f4f4}\n\
         .caution{background:#fff6e0;border-left:4px solid #e0a000;padding:0.5em 1em}\n\
         </style>\n</head>\n<body>\n",
    );
    h.push_str(&format!("<h1>Sweep: {}</h1>\n<ul>\n", esc(title)));
    for c in context {
        h.push_str(&format!("<li>{}</li>\n", esc(c)));
    }
    h.push_str("</ul>\n<h2>Recommendation</h2>\n<p>");
    let bound = format!("{} at most {}", s.loss_name, short(max_loss));
    match recommend(&s.records, max_loss) {
        Some((i, true)) if s.records[i].exact => h.push_str(&esc(&format!(
            "Keep the exact model: no compiled candidate with {bound} is faster than it ({:.1} µs per row).",
            s.records[i].latency_us
        ))),
        Some((i, true)) => {
            let r = &s.records[i];
            let e = s.records.iter().find(|r| r.exact);
            h.push_str(&esc(&format!(
                "{} with {} features: the fastest candidate with {bound} ({} {:.4}, {:.1} µs per row{}).",
                r.method,
                r.features,
                s.loss_name,
                r.loss,
                r.latency_us,
                e.map(|e| format!(", {:.1}× faster than the exact model", e.latency_us / r.latency_us))
                    .unwrap_or_default()
            )))
        }
        Some((i, false)) => {
            let r = &s.records[i];
            h.push_str(&esc(&format!(
                "No candidate reaches {bound}. The most faithful is {} with {} features ({} {:.4}, {:.1} µs per row); consider more features or keep the exact model.",
                r.method, r.features, s.loss_name, r.loss, r.latency_us
            )))
        }
        None => h.push_str("No candidate could be built."),
    }
    h.push_str("</p>\n<h2>Fidelity against latency</h2>\n");
    h.push_str(svg);
    h.push_str("\n<p>Lower is better on both axes. Ringed points joined by the black dashed line are the Pareto front: no other candidate is both faster and more faithful. The dark grey vertical line of short dashes is the exact model.");
    if s.records.iter().any(|r| r.method.ends_with("+guard")) {
        h.push_str(" Lines named <code>+guard</code> are the same candidates guarded by the exact model, placed at their mean single-row latency.");
    }
    h.push_str("</p>\n");
    h.push_str("<h2>Candidates</h2>\n<table>\n<tr><th>method</th><th>features</th>");
    h.push_str(&format!(
        "<th>{}</th><th>agreement 95% CI</th><th>latency p50 (µs; +guard: mean)</th><th>predicted (µs)</th><th>prediction error</th><th>throughput (rows/s)</th><th>parameters (KiB)</th><th>accuracy</th><th>compile (s)</th></tr>\n",
        esc(&s.loss_name)
    ));
    let mut order: Vec<usize> = (0..s.records.len()).collect();
    // The exact model first, then the candidates from the most faithful down (ties: faster
    // first): the order a reader choosing by fidelity scans.
    order.sort_by(|&a, &b| {
        let (x, y) = (&s.records[a], &s.records[b]);
        y.exact
            .cmp(&x.exact)
            .then(x.loss.total_cmp(&y.loss))
            .then(x.latency_us.total_cmp(&y.latency_us))
    });
    for i in order {
        let r = &s.records[i];
        let class = if r.exact {
            " class=\"exact\""
        } else if r.pareto {
            " class=\"front\""
        } else {
            ""
        };
        let rep = r.report.as_ref();
        let ci = rep
            .and_then(|x| x.agreement_ci95)
            .map(|[a, b]| format!("{a:.4}–{b:.4}"))
            .unwrap_or_default();
        let first = s.records.iter().find_map(|r| r.report.as_ref());
        let acc = if r.exact {
            first.and_then(|x| x.accuracy_exact)
        } else {
            rep.and_then(|x| x.accuracy_compiled)
        }
        .map(|a| format!("{a:.4}"))
        .unwrap_or_default();
        h.push_str(&format!(
            "<tr{class}><td class=\"l\">{}{}</td><td>{}</td><td>{:.4}</td><td>{}</td><td>{}</td><td>{}</td><td>{:+.0}%</td><td>{}</td><td>{:.1}</td><td>{}</td><td>{}</td></tr>\n",
            esc(&if r.exact {
                format!("exact model ({} support vectors)", r.features)
            } else {
                r.method.clone()
            }),
            if r.pareto { " (front)" } else { "" },
            if r.exact { "—".to_string() } else { r.features.to_string() },
            r.loss,
            ci,
            num(r.latency_us, 2),
            num(r.predicted.latency_us, 2),
            100.0 * r.latency_prediction_error(),
            if r.rows_per_s.is_finite() {
                crate::report::format_count(r.rows_per_s)
            } else {
                String::new()
            },
            r.bytes as f64 / 1024.0,
            acc,
            if r.exact { String::new() } else { format!("{:.2}", r.compile_s) },
        ));
    }
    h.push_str("</table>\n");
    if !s.skipped.is_empty() {
        h.push_str("<h3>Not built</h3>\n<ul>\n");
        for (m, f, why) in &s.skipped {
            h.push_str(&format!(
                "<li>{} at {f} features: {}</li>\n",
                esc(m),
                esc(why)
            ));
        }
        h.push_str("</ul>\n");
    }
    h.push_str("<h2>Cautions</h2>\n<div class=\"caution\"><ul>\n");
    for c in [
        format!(
            "Every figure was measured on the {} evaluation rows given to the sweep, which no candidate was fitted on; agreement on other data (a shifted population, rare inputs) can be lower.",
            s.n_rows
        ),
        "A compiled model changes some decisions of the exact model. Validate the chosen model on your own held-out data before any high-stakes use, and keep a quality gate (compile --min-agreement) in the pipeline.".to_string(),
        "Latencies are medians on this machine, at the moment of the sweep; another machine, another load or another build changes them. Ratios measured in one run are more stable than absolute times.".to_string(),
    ]
    .iter()
    .chain(s.notes.iter())
    {
        h.push_str(&format!("<li>{}</li>\n", esc(c)));
    }
    h.push_str("</ul></div>\n</body>\n</html>\n");
    h
}
