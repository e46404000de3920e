//! The sweep's picture: loss against measured single-row latency, both axes logarithmic,
//! one line per method (points labelled with their feature count), the exact model as a
//! vertical reference line, the Pareto front ringed and joined. Drawn with plotters' SVG
//! backend.

use super::Sweep;
use crate::{Error, Result};
use plotters::prelude::*;

/// Line colours: six colours of the colour-blind-safe palette of Okabe & Ito (2008), "Color
/// Universal Design (CUD): how to make figures and presentations that are friendly to
/// colorblind people" (their yellow is too light on white and black marks the Pareto
/// front, so both are left out), then a brown and a dark purple of our own.
const PALETTE: [RGBColor; 8] = [
    RGBColor(0, 114, 178),
    RGBColor(213, 94, 0),
    RGBColor(0, 158, 115),
    RGBColor(204, 121, 167),
    RGBColor(86, 180, 233),
    RGBColor(230, 159, 0),
    RGBColor(120, 60, 20),
    RGBColor(90, 0, 140),
];

/// A label's box in pixels: left, top, right, bottom.
type LabelBox = (i32, i32, i32, i32);

/// The box of `text` drawn at 11 px with its top-left corner at (x, y) (7 px a digit).
fn label_box(x: i32, y: i32, text: &str) -> LabelBox {
    (x, y, x + 7 * text.chars().count() as i32, y + 12)
}

fn overlaps(a: LabelBox, b: LabelBox) -> bool {
    a.0 < b.2 && b.0 < a.2 && a.1 < b.3 && b.1 < a.3
}

/// The offset from its point (px, py) at which a label covers no point (a 4 px disc) and
/// no box in `taken`: the first free of fourteen spots in two rings around the point, else
/// the first.
fn place_label(
    px: i32,
    py: i32,
    text: &str,
    points: &[(i32, i32)],
    taken: &[LabelBox],
) -> (i32, i32) {
    let w = 7 * text.chars().count() as i32;
    let spots = [
        (6, -14),
        (6, 3),
        (-w - 6, -14),
        (-w - 6, 3),
        (-w / 2, -20),
        (-w / 2, 8),
        (10, -6),
        (-w - 10, -6),
        (14, -28),
        (14, 17),
        (-w - 14, -28),
        (-w - 14, 17),
        (-w / 2, -34),
        (-w / 2, 22),
    ];
    spots
        .iter()
        .copied()
        .find(|&(dx, dy)| {
            let b = label_box(px + dx, py + dy, text);
            !taken.iter().any(|t| overlaps(*t, b))
                && !points
                    .iter()
                    .any(|&(x, y)| overlaps((x - 4, y - 4, x + 4, y + 4), b))
        })
        .unwrap_or(spots[0])
}

fn err<E: std::fmt::Display>(e: E) -> Error {
    Error::internal(format!("drawing the sweep picture: {e}"))
}

/// The sweep as an SVG document (`width × height` pixels).
pub fn render_svg(s: &Sweep, width: u32, height: u32) -> Result<String> {
    // A loss of zero cannot sit on a log axis: it is drawn at half of one row in n.
    let floor = 0.5 / s.n_rows.max(1) as f64;
    let pts: Vec<(f64, f64)> = s
        .records
        .iter()
        .filter(|r| !r.exact && r.latency_us.is_finite() && r.latency_us > 0.0)
        .map(|r| (r.latency_us, r.loss.max(floor)))
        .collect();
    let exact = s.records.iter().find(|r| r.exact);
    let exact_t = exact
        .map(|r| r.latency_us)
        .filter(|t| t.is_finite() && *t > 0.0);
    let mut xs: Vec<f64> = pts.iter().map(|p| p.0).collect();
    xs.extend(exact_t);
    let (mut x0, mut x1) = xs
        .iter()
        .fold((f64::INFINITY, 0.0f64), |(a, b), &x| (a.min(x), b.max(x)));
    if !x0.is_finite() {
        return Err(Error::input(
            "the sweep has no timed candidates to plot (was timing switched off?)",
        ));
    }
    x0 /= 1.6;
    x1 *= 1.6;
    let (mut y0, mut y1) = pts.iter().fold((f64::INFINITY, 0.0f64), |(a, b), p| {
        (a.min(p.1), b.max(p.1))
    });
    if !y0.is_finite() {
        (y0, y1) = (floor, 1.0);
    }
    y0 = (y0 / 2.0).max(floor / 2.0);
    y1 = (y1 * 2.0).min(2.0).max(y0 * 10.0);
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (width, height)).into_drawing_area();
        root.fill(&WHITE).map_err(err)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(
                format!(
                    "{} against single-row latency ({} rows)",
                    s.loss_name, s.n_rows
                ),
                ("sans-serif", 18),
            )
            .margin(14)
            .x_label_area_size(44)
            .y_label_area_size(70)
            .build_cartesian_2d((x0..x1).log_scale(), (y0..y1).log_scale())
            .map_err(err)?;
        chart
            .configure_mesh()
            .x_desc(if s.records.iter().any(|r| r.method.ends_with("+guard")) {
                "single-row latency, median; +guard lines: mean (µs, log scale)"
            } else {
                "single-row latency, median (µs, log scale)"
            })
            .x_labels(8)
            .y_desc(format!("{} (log scale)", s.loss_name))
            .x_label_formatter(&|v| {
                if *v >= 10.0 {
                    format!("{v:.0}")
                } else if *v >= 1.0 {
                    format!("{v:.1}")
                } else {
                    format!("{v:.2}")
                }
            })
            .y_label_formatter(&|v| format!("{v:.1e}"))
            .draw()
            .map_err(err)?;
        let mut labels: Vec<(f64, f64, usize)> = Vec::new();
        let mut methods: Vec<&str> = Vec::new();
        for r in s.records.iter().filter(|r| !r.exact) {
            if !methods.contains(&r.method.as_str()) {
                methods.push(&r.method);
            }
        }
        for (i, m) in methods.iter().enumerate() {
            let color = PALETTE[i % PALETTE.len()].to_rgba();
            let mut line: Vec<(f64, f64, usize)> = s
                .records
                .iter()
                .filter(|r| !r.exact && r.method == *m && r.latency_us.is_finite())
                .map(|r| (r.latency_us, r.loss.max(floor), r.features))
                .collect();
            line.sort_by_key(|p| p.2);
            chart
                .draw_series(LineSeries::new(
                    line.iter().map(|p| (p.0, p.1)),
                    color.stroke_width(2),
                ))
                .map_err(err)?
                .label(m.to_string())
                .legend(move |(x, y)| {
                    PathElement::new(vec![(x, y), (x + 18, y)], color.stroke_width(2))
                });
            chart
                .draw_series(
                    line.iter()
                        .map(|p| Circle::new((p.0, p.1), 4, color.filled())),
                )
                .map_err(err)?;
            labels.extend(line.iter().map(|p| (p.0, p.1, p.2)));
        }
        // Size labels placed one by one where they cover no point and no label placed
        // before (tried around the point in a fixed order; the first free spot wins, else
        // the default spot): crowded points of several methods stay readable.
        let points: Vec<(i32, i32)> = labels
            .iter()
            .map(|p| chart.backend_coord(&(p.0, p.1)))
            .collect();
        let mut taken: Vec<LabelBox> = Vec::new();
        for p in &labels {
            let (px, py) = chart.backend_coord(&(p.0, p.1));
            let text = format!("{}", p.2);
            let (dx, dy) = place_label(px, py, &text, &points, &taken);
            taken.push(label_box(px + dx, py + dy, &text));
            chart
                .draw_series(std::iter::once(
                    EmptyElement::at((p.0, p.1))
                        + Text::new(text, (dx, dy), ("sans-serif", 11).into_font()),
                ))
                .map_err(err)?;
        }
        // The Pareto front among compiled candidates, joined in latency order and ringed.
        let mut front: Vec<(f64, f64)> = s
            .records
            .iter()
            .filter(|r| r.pareto && !r.exact)
            .map(|r| (r.latency_us, r.loss.max(floor)))
            .collect();
        front.sort_by(|a, b| a.0.total_cmp(&b.0));
        if !front.is_empty() {
            chart
                .draw_series(DashedLineSeries::new(
                    front.clone(),
                    6,
                    4,
                    BLACK.stroke_width(1),
                ))
                .map_err(err)?
                .label("Pareto front")
                .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], BLACK));
            chart
                .draw_series(
                    front
                        .iter()
                        .map(|p| Circle::new(*p, 8, BLACK.stroke_width(1))),
                )
                .map_err(err)?;
        }
        if let Some(t) = exact_t {
            let grey = RGBColor(90, 90, 90);
            chart
                .draw_series(DashedLineSeries::new(
                    vec![(t, y0), (t, y1)],
                    3,
                    3,
                    grey.stroke_width(2),
                ))
                .map_err(err)?
                .label(format!("exact model ({t:.1} µs, agrees with itself)"))
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], grey));
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .background_style(WHITE.mix(0.85))
            .border_style(BLACK)
            .draw()
            .map_err(err)?;
        root.present().map_err(err)?;
    }
    Ok(svg)
}

#[cfg(test)]
mod label_tests {
    use super::*;

    #[test]
    fn crowded_labels_find_free_spots() {
        // Four points of four methods within a few pixels of each other, as at one feature
        // count of a sweep: every label gets a box no other label or point covers.
        let points = [(100, 100), (104, 102), (98, 105), (103, 97)];
        let mut taken: Vec<LabelBox> = Vec::new();
        for &(x, y) in &points {
            let (dx, dy) = place_label(x, y, "1024", &points, &taken);
            let b = label_box(x + dx, y + dy, "1024");
            assert!(
                !taken.iter().any(|t| overlaps(*t, b)),
                "{b:?} overlaps {taken:?}"
            );
            taken.push(b);
        }
        // With the old fixed offset all four would have overlapped.
        let fixed: Vec<LabelBox> = points
            .iter()
            .map(|&(x, y)| label_box(x + 6, y - 14, "1024"))
            .collect();
        assert!(overlaps(fixed[0], fixed[1]));
    }
}
