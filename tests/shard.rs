//! Sharded distillation: statistics of disjoint shards, merged in any order, give the
//! single-machine compile; one shard's statistics are recomputed in numpy from the
//! features (`featurize`) and the teacher's decisions (`score`); merges that would be wrong
//! are refused.

mod common;
use common::*;
use std::path::Path;

/// Splits the demo calibration file into CSV shards at the given row indices.
fn split(dir: &Path, cuts: &[usize]) -> Vec<(std::path::PathBuf, usize)> {
    let text = std::fs::read_to_string(root().join("models/pump_calib.csv")).unwrap();
    let mut lines = text.lines();
    let header = lines.next().unwrap();
    let rows: Vec<&str> = lines.collect();
    let mut out = Vec::new();
    let mut bounds = cuts.to_vec();
    bounds.push(rows.len());
    let mut start = 0;
    for (i, &end) in bounds.iter().enumerate() {
        let p = dir.join(format!("part{i}.csv"));
        let body: String = rows[start..end].iter().map(|l| format!("{l}\n")).collect();
        std::fs::write(&p, format!("{header}\n{body}")).unwrap();
        out.push((p, start));
        start = end;
    }
    out
}

fn decisions(model: &Path, data: &Path, dir: &Path, name: &str) -> Vec<Vec<f64>> {
    let out = dir.join(name);
    ok(&[
        "score",
        "--decisions",
        s(model),
        "--data",
        s(data),
        "--target",
        "condition",
        "--out",
        s(&out),
    ]);
    let text = std::fs::read_to_string(&out).unwrap();
    let mut lines = text.lines();
    let head: Vec<&str> = lines.next().unwrap().split(',').collect();
    let cols: Vec<usize> = (0..head.len())
        .filter(|&j| head[j].starts_with("decision"))
        .collect();
    lines
        .map(|l| {
            let f: Vec<&str> = l.split(',').collect();
            cols.iter().map(|&j| f[j].parse().unwrap()).collect()
        })
        .collect()
}

fn stats_for(model: &Path, shard: &Path, first: usize, map: &[&str], out: &Path) {
    let first = first.to_string();
    let mut args = vec![
        "compile",
        s(model),
        "--calib",
        s(shard),
        "--target",
        "condition",
        "--first-row",
        &first,
        "--stats-out",
        s(out),
    ];
    args.extend_from_slice(map);
    ok(&args);
}

#[test]
fn shards_merged_in_any_order_equal_one_compile() {
    let dir = tmpdir("shard_equal");
    let model = root().join("models/pump_svm.safetensors");
    let test = root().join("models/pump_test.csv");
    // Uneven shards, one of a single row (an audit-free ridge-choice row: index 1234).
    let shards = split(&dir, &[1234, 1235, 3001]);
    let maps: [&[&str]; 3] = [
        &["--method", "hadamard", "--features", "512", "--seed", "4"],
        &["--method", "fourier", "--features", "300", "--seed", "9"],
        &[
            "--method",
            "nystrom",
            "--landmark-rule",
            "support",
            "--features",
            "256",
        ],
    ];
    for (m, map) in maps.iter().enumerate() {
        let single = dir.join(format!("single{m}.safetensors"));
        let mut args = vec![
            "compile",
            s(&model),
            "--calib",
            "models/pump_calib.csv",
            "--target",
            "condition",
            "--no-bandwidth-search",
            "--no-timing",
            "--out",
            s(&single),
        ];
        args.extend_from_slice(map);
        let args: Vec<String> = args
            .iter()
            .map(|a| {
                if *a == "models/pump_calib.csv" {
                    s(&root().join(a)).to_string()
                } else {
                    a.to_string()
                }
            })
            .collect();
        ok(&args.iter().map(|a| a.as_str()).collect::<Vec<_>>());
        let mut parts = Vec::new();
        for (i, (p, first)) in shards.iter().enumerate() {
            let out = dir.join(format!("m{m}_s{i}.kpstats"));
            stats_for(&model, p, *first, map, &out);
            parts.push(out);
        }
        // Merge in a scrambled order.
        let merged = dir.join(format!("merged{m}.safetensors"));
        ok(&[
            "compile",
            s(&model),
            "--from-stats",
            s(&parts[3]),
            s(&parts[1]),
            s(&parts[0]),
            s(&parts[2]),
            "--eval",
            s(&test),
            "--target",
            "condition",
            "--no-timing",
            "--out",
            s(&merged),
        ]);
        let a = decisions(&single, &test, &dir, &format!("a{m}.csv"));
        let b = decisions(&merged, &test, &dir, &format!("b{m}.csv"));
        let worst = a
            .iter()
            .flatten()
            .zip(b.iter().flatten())
            .map(|(x, y)| (x - y).abs())
            .fold(0.0, f64::max);
        assert!(worst < 1e-9, "method {m}: sharded vs single {worst:e}");
    }
}

#[test]
fn one_shards_statistics_match_numpy() {
    let dir = tmpdir("shard_numpy");
    let model = root().join("models/pump_svm.safetensors");
    let shards = split(&dir, &[1500, 2600]);
    let (shard, first) = &shards[1];
    let stats = dir.join("mid.kpstats");
    let map = ["--method", "orthogonal", "--features", "128", "--seed", "2"];
    stats_for(&model, shard, *first, &map, &stats);
    // Independent pieces: the map's features (featurize with the model's kernel and
    // scaling) and the teacher's decision values (score).
    let z = dir.join("z.npy");
    ok(&[
        "featurize",
        "--model",
        s(&model),
        "--method",
        "orthogonal",
        "--features",
        "128",
        "--seed",
        "2",
        "--data",
        s(shard),
        "--target",
        "condition",
        "--out",
        s(&z),
    ]);
    let y = dir.join("y.csv");
    ok(&[
        "score",
        "--decisions",
        s(&model),
        "--data",
        s(shard),
        "--target",
        "condition",
        "--out",
        s(&y),
    ]);
    let out = py_inline(
        r#"
import sys, numpy as np
from safetensors.numpy import load_file
z = np.load(sys.argv[1]); first = int(sys.argv[4])
import csv
rows = list(csv.reader(open(sys.argv[2])))
cols = [j for j, h in enumerate(rows[0]) if h.startswith("decision")]
y = np.array([[float(r[j]) for j in cols] for r in rows[1:]])
st = load_file(sys.argv[3])
g = first + np.arange(len(z))
# Parts by global index: audit i % 10 == 9, ridge choice i % 10 == 4, the rest fit.
worst = 0.0
for name, sel in [("fit", (g % 10 != 9) & (g % 10 != 4)), ("choose", g % 10 == 4)]:
    zs, ys = z[sel], y[sel]
    for field, ref in [("zz", zs.T @ zs), ("zy", zs.T @ ys), ("sz", zs.sum(0)), ("sy", ys.sum(0)), ("yy", (ys * ys).sum(0))]:
        got = st[f"{name}.{field}"]
        worst = max(worst, float(np.abs(got - ref).max() / (np.abs(ref).max() + 1e-300)))
print(worst)
"#,
        &[s(&z), s(&y), s(&stats), &first.to_string()],
    );
    let worst: f64 = out.trim().parse().unwrap();
    assert!(worst < 1e-10, "statistics vs numpy: {worst:e}");
}

#[test]
fn wrong_merges_are_refused() {
    let dir = tmpdir("shard_refuse");
    let model = root().join("models/pump_svm.safetensors");
    let shards = split(&dir, &[4000]);
    let map = ["--method", "hadamard", "--features", "256", "--seed", "1"];
    let a = dir.join("a.kpstats");
    let b = dir.join("b.kpstats");
    stats_for(&model, &shards[0].0, 0, &map, &a);
    stats_for(&model, &shards[1].0, 4000, &map, &b);
    // The same rows twice (a shard given the wrong first row).
    let b_overlap = dir.join("b_overlap.kpstats");
    stats_for(&model, &shards[1].0, 3000, &map, &b_overlap);
    let out = dir.join("m.safetensors");
    let e = bad(&[
        "compile",
        s(&model),
        "--from-stats",
        s(&a),
        s(&b_overlap),
        "--out",
        s(&out),
    ]);
    assert!(e.contains("overlap"), "{e}");
    // Another seed: another map.
    let c = dir.join("c.kpstats");
    let other = ["--method", "hadamard", "--features", "256", "--seed", "2"];
    stats_for(&model, &shards[1].0, 4000, &other, &c);
    let e = bad(&[
        "compile",
        s(&model),
        "--from-stats",
        s(&a),
        s(&c),
        "--out",
        s(&out),
    ]);
    assert!(e.contains("different maps"), "{e}");
    // Landmarks drawn from the shard's own rows would differ between shards.
    let e = bad(&[
        "compile",
        s(&model),
        "--calib",
        s(&shards[0].0),
        "--target",
        "condition",
        "--method",
        "nystrom",
        "--features",
        "128",
        "--stats-out",
        s(&dir.join("n.kpstats")),
    ]);
    assert!(e.contains("same on every shard"), "{e}");
    // Another teacher: a model trained here on other data.
    let other_model = dir.join("other.safetensors");
    ok(&[
        "train",
        "--data",
        s(&shards[0].0),
        "--target",
        "condition",
        "--kernel",
        "gaussian(gamma=0.3)",
        "--model",
        "ridge",
        "--classify",
        "--ridge",
        "1",
        "--out",
        s(&other_model),
    ]);
    let e = bad(&[
        "compile",
        s(&other_model),
        "--from-stats",
        s(&a),
        s(&b),
        "--out",
        s(&out),
    ]);
    assert!(e.contains("another exact model"), "{e}");
    assert!(!out.exists());
    // A statistics file is not a model.
    let e = bad(&["inspect", s(&a)]);
    assert!(
        e.contains("not a model") && e.contains("--from-stats"),
        "{e}"
    );
    // The good pair fits.
    ok(&[
        "compile",
        s(&model),
        "--from-stats",
        s(&b),
        s(&a),
        "--out",
        s(&out),
    ]);
    assert!(out.exists());
}

#[test]
fn a_gap_between_shards_is_warned_about() {
    let dir = tmpdir("shard_gap");
    let text = std::fs::read_to_string(root().join("models/pump_calib.csv")).unwrap();
    let lines: Vec<&str> = text.lines().collect();
    let part = |name: &str, from: usize, to: usize| {
        let p = dir.join(name);
        let mut s = format!("{}\n", lines[0]);
        for l in &lines[1 + from..1 + to] {
            s.push_str(l);
            s.push('\n');
        }
        std::fs::write(&p, s).unwrap();
        p
    };
    let (a, b) = (part("a.csv", 0, 200), part("b.csv", 400, 600));
    let model = root().join("models/pump_svm.safetensors");
    for (csv, first, out) in [(&a, "0", "a.kpstats"), (&b, "400", "b.kpstats")] {
        ok(&[
            "compile",
            s(&model),
            "--calib",
            s(csv),
            "--target",
            "condition",
            "--first-row",
            first,
            "--method",
            "hadamard",
            "--features",
            "16",
            "--seed",
            "1",
            "--stats-out",
            s(&dir.join(out)),
        ]);
    }
    let o = run(&[
        "compile",
        s(&model),
        "--from-stats",
        s(&dir.join("a.kpstats")),
        s(&dir.join("b.kpstats")),
        "--out",
        s(&dir.join("m.safetensors")),
    ]);
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success(), "{e}");
    assert!(
        e.contains("calibration rows 201–400 are in no statistics file"),
        "{e}"
    );
}
