//! The streamed compile (calibration files read a chunk at a time) against the in-memory
//! compile of the library, on CSV and .npy calibration files; a bad cell deep in the file
//! is named by its row and line.

mod common;
use common::*;
use kernelpress::features::{FeatureSpec, Method};
use kernelpress::fit::{compile_exact, HeadKind, RidgeGrid};
use kernelpress::model::CompiledModel;

#[test]
fn streamed_compile_is_bit_identical_to_the_in_memory_one() {
    let dir = tmpdir("streaming_equal");
    let exact = demo_exact();
    let calib = demo_rows("pump_calib.csv");
    let test = demo_rows("pump_test.csv");
    let npy = dir.join("calib.npy");
    kernelpress::data::write_npy_f64(
        &npy,
        &[calib.nrows(), calib.ncols()],
        calib.as_slice().unwrap(),
    )
    .unwrap();
    let spec = FeatureSpec::new(exact.kernel().clone(), Method::Fastfood, 8, 512, 6);
    let (mem, _) = compile_exact(
        &exact,
        Some(calib.view()),
        &spec,
        HeadKind::Distill,
        &RidgeGrid::standard(),
        None,
        &kernelpress::observe::Silent,
    )
    .unwrap();
    let want = mem.decision(test.view());
    let csv = root().join("models/pump_calib.csv");
    for (i, src) in [csv.as_path(), npy.as_path()].into_iter().enumerate() {
        let out = dir.join(format!("c{i}.safetensors"));
        let stderr = String::from_utf8(
            run(&[
                "compile",
                s(&root().join("models/pump_svm.safetensors")),
                "--calib",
                s(src),
                "--target",
                "condition",
                "--method",
                "fastfood",
                "--features",
                "512",
                "--seed",
                "6",
                "--no-bandwidth-search",
                "--no-timing",
                "--out",
                s(&out),
            ])
            .stderr,
        )
        .unwrap();
        assert!(stderr.contains("distilling (streamed)"), "{stderr}");
        let got = CompiledModel::load(&out).unwrap().decision(test.view());
        assert_eq!(got, want, "calibration from {}", src.display());
    }
}

#[test]
fn a_bad_cell_deep_in_a_streamed_file_is_named_by_row_and_line() {
    let dir = tmpdir("streaming_bad");
    let text = std::fs::read_to_string(root().join("models/pump_calib.csv")).unwrap();
    let mut lines: Vec<String> = text.lines().map(|l| l.to_string()).collect();
    // Row 5,000 is line 5,001 (after the header).
    let cells: Vec<&str> = lines[5000].split(',').collect();
    let mut cells: Vec<String> = cells.iter().map(|c| c.to_string()).collect();
    cells[2] = "n/a".into();
    lines[5000] = cells.join(",");
    let bad_csv = dir.join("bad.csv");
    std::fs::write(&bad_csv, lines.join("\n") + "\n").unwrap();
    let out = dir.join("m.safetensors");
    let o = run(&[
        "compile",
        s(&root().join("models/pump_svm.safetensors")),
        "--calib",
        s(&bad_csv),
        "--target",
        "condition",
        "--method",
        "hadamard",
        "--features",
        "256",
        "--no-bandwidth-search",
        "--out",
        s(&out),
    ]);
    // The pass was under way: progress lines come first, the error is the last line.
    assert_eq!(o.status.code(), Some(2));
    let stderr = String::from_utf8(o.stderr).unwrap();
    let e = stderr.trim().lines().last().unwrap();
    assert!(!stderr.contains("panicked"), "{stderr}");
    assert!(
        e.contains("row 5000 (line 5001), column 'crest_factor'"),
        "{e}"
    );
    assert!(!out.exists());
}

#[test]
fn every_npy_header_spelling_numpy_reads_is_read_the_same_whole_and_streamed() {
    // One header parser for both readers, checked against numpy.load on each file.
    let dir = tmpdir("npy_spellings");
    let n: usize = py("npy_spellings.py", &[s(&dir)]).trim().parse().unwrap();
    assert_eq!(n, 20);
    let want: Vec<f64> = std::fs::read_to_string(dir.join("want.csv"))
        .unwrap()
        .lines()
        .flat_map(|l| {
            l.split(',')
                .map(|v| v.parse::<f64>().unwrap())
                .collect::<Vec<_>>()
        })
        .collect();
    let names: Vec<String> = (0..4).map(|j| format!("x{j}")).collect();
    for i in 0..n {
        let p = dir.join(format!("v{i:02}.npy"));
        let whole = kernelpress::data::read_npy(&p).unwrap();
        assert_eq!(whole.shape, vec![3, 4], "{}", p.display());
        assert_eq!(whole.data, want, "whole read of {}", p.display());
        let mut f = kernelpress::data::RowFile::open_for_model(&p, None, &names, true).unwrap();
        let mut got = Vec::new();
        while let Some(c) = f.next_chunk(2).unwrap() {
            got.extend(c.x.iter().copied());
        }
        assert_eq!(got, want, "streamed read of {}", p.display());
    }
}

#[test]
fn csv_follows_rfc_4180_both_ways() {
    // Quoted fields with commas, quotes and line breaks, as Python's csv module writes
    // them, read whole and streamed as csv.reader reads them; labels written back by
    // `score` quoted so that csv.reader reads them unchanged and `a,b` and `a_b` stay apart.
    let dir = tmpdir("csv_rfc_4180");
    let n: usize = py("csv_quoting.py", &["write", s(&dir)])
        .trim()
        .parse()
        .unwrap();
    let want: Vec<Vec<String>> =
        serde_json::from_str(&std::fs::read_to_string(dir.join("want.json")).unwrap()).unwrap();
    assert_eq!(want.len(), n + 1);
    for file in ["minimal.csv", "all.csv"] {
        let p = dir.join(file);
        let t = kernelpress::data::read_table(&p, Some("label"), true).unwrap();
        let labels = t.target.clone().unwrap();
        let names = vec!["x1".to_string(), "x2".to_string()];
        let mut f =
            kernelpress::data::RowFile::open_for_model(&p, Some("label"), &names, false).unwrap();
        let mut streamed = Vec::new();
        let mut slabels = Vec::new();
        while let Some(c) = f.next_chunk(7).unwrap() {
            streamed.extend(c.x.iter().copied());
            slabels.extend(c.target.unwrap());
        }
        for (i, row) in want[1..].iter().enumerate() {
            let x1: f64 = row[0].parse().unwrap();
            let x2: f64 = row[2].parse().unwrap();
            assert_eq!((t.x[[i, 0]], t.x[[i, 1]]), (x1, x2), "{file} row {i}");
            assert_eq!(labels[i], row[1], "{file} row {i}");
            assert_eq!(
                (streamed[2 * i], streamed[2 * i + 1]),
                (x1, x2),
                "{file} streamed row {i}"
            );
            assert_eq!(slabels[i], row[1], "{file} streamed row {i}");
        }
    }
    // A classifier over those labels: score's CSV, read by csv.reader.
    let model = dir.join("m.safetensors");
    ok(&[
        "train",
        "--data",
        s(&dir.join("minimal.csv")),
        "--target",
        "label",
        "--kernel",
        "gaussian(gamma=0.5)",
        "--model",
        "ridge",
        "--classify",
        "--out",
        s(&model),
    ]);
    let out = dir.join("scores.csv");
    ok(&[
        "score",
        s(&model),
        "--data",
        s(&dir.join("minimal.csv")),
        "--target",
        "label",
        "--decisions",
        "--out",
        s(&out),
    ]);
    let back: serde_json::Value =
        serde_json::from_str(&py("csv_quoting.py", &["read", s(&out)])).unwrap();
    let header: Vec<&str> = back["header"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    for l in ["a,b", "a_b", "say \"hi\"", "two\nlines"] {
        assert!(
            header.contains(&format!("score_{l}").as_str()),
            "{header:?}"
        );
        assert!(
            header.contains(&format!("decision_{l}").as_str()),
            "{header:?}"
        );
    }
    let rows = back["rows"].as_array().unwrap();
    assert_eq!(rows.len(), n);
    for r in rows {
        let label = r[0].as_str().unwrap();
        assert!(
            ["a,b", "a_b", "say \"hi\"", "two\nlines"].contains(&label),
            "{label:?}"
        );
        assert_eq!(r.as_array().unwrap().len(), header.len());
    }
    // The same text on stdout.
    let text = ok(&[
        "score",
        s(&model),
        "--data",
        s(&dir.join("minimal.csv")),
        "--target",
        "label",
        "--decisions",
    ]);
    assert_eq!(text, std::fs::read_to_string(&out).unwrap());
    // An unclosed quote is an error naming the row.
    let bad_csv = dir.join("open.csv");
    std::fs::write(&bad_csv, "x1,label,x2\n1,\"ok,2\n3,b,4\n").unwrap();
    let e = bad(&[
        "score",
        s(&model),
        "--data",
        s(&bad_csv),
        "--target",
        "label",
    ]);
    assert!(e.contains("never closed") && e.contains("row 1"), "{e}");
}
