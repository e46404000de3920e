//! Bad input: one clear line on stderr naming the file/row/field, exit code 2, no panic,
//! and no output file left behind.

mod common;
use common::*;

fn demo_model() -> String {
    s(&root().join("models/pump_svm.safetensors")).to_string()
}

#[test]
fn missing_and_empty_files() {
    let dir = tmpdir("missing_and_empty_files");
    let out = dir.join("out.csv");
    let e = bad(&[
        "score",
        "--decisions",
        "nope.safetensors",
        "--data",
        "x.csv",
    ]);
    assert!(e.contains("nope.safetensors"), "{e}");
    let e = bad(&[
        "score",
        "--decisions",
        &demo_model(),
        "--data",
        s(&dir.join("missing.csv")),
        "--out",
        s(&out),
    ]);
    assert!(e.contains("missing.csv"), "{e}");
    let empty = dir.join("empty.csv");
    std::fs::write(&empty, "").unwrap();
    let e = bad(&[
        "score",
        "--decisions",
        &demo_model(),
        "--data",
        s(&empty),
        "--out",
        s(&out),
    ]);
    assert!(e.contains("empty"), "{e}");
    let e = bad(&["score", "--decisions", s(&empty), "--data", s(&empty)]);
    assert!(e.contains("empty"), "{e}");
    assert!(!out.exists());
}

#[test]
fn bad_csv_cells_name_row_and_column() {
    let dir = tmpdir("bad_csv_cells_name_row_and_column");
    let out = dir.join("m.safetensors");
    let p = dir.join("d.csv");
    std::fs::write(&p, "a,b,y\n1,2,x\n3,oops,y\n").unwrap();
    let e = bad(&[
        "train",
        "--data",
        s(&p),
        "--target",
        "y",
        "--kernel",
        "linear()",
        "--model",
        "svm",
        "--c",
        "1",
        "--out",
        s(&out),
    ]);
    assert!(
        e.contains("row 2") && e.contains("column 'b'") && e.contains("oops"),
        "{e}"
    );
    for v in ["NaN", "inf", "-Infinity"] {
        std::fs::write(&p, format!("a,b,y\n1,2,x\n3,{v},y\n")).unwrap();
        let e = bad(&[
            "train",
            "--data",
            s(&p),
            "--target",
            "y",
            "--kernel",
            "linear()",
            "--model",
            "svm",
            "--c",
            "1",
            "--out",
            s(&out),
        ]);
        assert!(e.contains("finite") && e.contains("row 2"), "{e}");
    }
    std::fs::write(&p, "a,b,y\n1,2,x\n3,4,y\n").unwrap();
    let e = bad(&[
        "train",
        "--data",
        s(&p),
        "--target",
        "label",
        "--kernel",
        "linear()",
        "--model",
        "svm",
        "--c",
        "1",
        "--out",
        s(&out),
    ]);
    assert!(e.contains("target column 'label' not found"), "{e}");
    std::fs::write(&p, "a,b,y\n1,2,x\n3,4\n").unwrap();
    let e = bad(&[
        "train",
        "--data",
        s(&p),
        "--target",
        "y",
        "--kernel",
        "linear()",
        "--model",
        "svm",
        "--c",
        "1",
        "--out",
        s(&out),
    ]);
    assert!(e.contains("row 2") && e.contains("fields"), "{e}");
    assert!(!out.exists());
}

#[test]
fn wrong_feature_count() {
    let dir = tmpdir("wrong_feature_count");
    let p = dir.join("d.csv");
    std::fs::write(&p, "a,b\n1,2\n").unwrap();
    let out = dir.join("o.csv");
    let e = bad(&[
        "score",
        "--decisions",
        &demo_model(),
        "--data",
        s(&p),
        "--out",
        s(&out),
    ]);
    assert!(e.contains("'vib_rms'") && e.contains("are missing"), "{e}");
    let e = bad(&[
        "score",
        "--decisions",
        &demo_model(),
        "--data",
        s(&p),
        "--by-position",
        "--out",
        s(&out),
    ]);
    assert!(e.contains("2 features") && e.contains("expects 8"), "{e}");
    assert!(!out.exists());
}

#[test]
fn truncated_corrupted_and_absurd_model_files() {
    let dir = tmpdir("truncated_corrupted_and_absurd_model_files");
    let good = std::fs::read(root().join("models/pump_svm.safetensors")).unwrap();
    let data = s(&root().join("models/pump_test.csv")).to_string();
    let cases: Vec<(&str, Vec<u8>, &str)> = vec![
        (
            "trunc.safetensors",
            good[..good.len() / 2].to_vec(),
            "truncated",
        ),
        ("tiny.safetensors", good[..5].to_vec(), "truncated"),
        (
            "garbage.safetensors",
            (0..4096u32)
                .map(|i| (i.wrapping_mul(2654435761) >> 13) as u8)
                .collect(),
            "",
        ),
        (
            "absurd.safetensors",
            {
                let mut b = good.clone();
                b[..8].copy_from_slice(&(u64::MAX / 2).to_le_bytes());
                b
            },
            "header claims",
        ),
        (
            "flipped.safetensors",
            {
                // Corrupt the JSON header.
                let mut b = good.clone();
                b[12] = b'#';
                b
            },
            "safetensors",
        ),
    ];
    for (name, bytes, needle) in cases {
        let p = dir.join(name);
        std::fs::write(&p, bytes).unwrap();
        let e = bad(&["score", "--decisions", s(&p), "--data", &data]);
        assert!(e.contains(name) && e.contains(needle), "{name}: {e}");
        let e = bad(&["inspect", s(&p)]);
        assert!(e.contains(name), "{e}");
    }
    // Valid safetensors files whose manifests lie: the input width disagrees with the
    // support vectors; scaling "none" beside stored scaling tensors; a compiled program
    // step reading a value that does not exist yet.
    let m =
        kernelpress::model::ExactModel::load(&root().join("models/pump_svm.safetensors")).unwrap();
    let mut f = m.to_file();
    f.manifest["input"]["dim"] = serde_json::json!(7);
    let p = dir.join("liar.safetensors");
    f.write(&p).unwrap();
    let e = bad(&["score", "--decisions", s(&p), "--data", &data]);
    assert!(e.contains("liar.safetensors") && e.contains("names"), "{e}");
    let mut f = m.to_file();
    f.manifest["input"]["scaling"] = serde_json::json!("none");
    let p = dir.join("noscale.safetensors");
    f.write(&p).unwrap();
    let e = bad(&["inspect", s(&p)]);
    assert!(e.contains("input.mean"), "{e}");
    let c =
        kernelpress::model::CompiledModel::load(&root().join("models/pump_compiled.safetensors"))
            .unwrap();
    let mut f = c.to_file();
    f.manifest["program"]["steps"][0]["inputs"] = serde_json::json!([1]);
    let p = dir.join("forward.safetensors");
    f.write(&p).unwrap();
    let e = bad(&["score", "--decisions", s(&p), "--data", &data]);
    assert!(e.contains("not an earlier value"), "{e}");
}

#[test]
fn bad_kernels_and_flags() {
    let dir = tmpdir("bad_kernels_and_flags");
    let p = dir.join("d.csv");
    std::fs::write(&p, "a,b,y\n1,2,x\n3,4,y\n").unwrap();
    let out = dir.join("m.safetensors");
    for (k, needle) in [
        ("wavelet(gamma=1)", "unknown kernel 'wavelet'"),
        ("gaussian(gamma=-1)", "gamma = -1"),
        ("gaussian(gamma=nan)", "gamma = NaN"),
        ("matern(nu=3, lengthscale=1)", "nu = 3"),
        ("gaussian(lengthscale=[1, 2, 3])", "3 entries"),
    ] {
        let e = bad(&[
            "train",
            "--data",
            s(&p),
            "--target",
            "y",
            "--kernel",
            k,
            "--model",
            "svm",
            "--c",
            "1",
            "--out",
            s(&out),
        ]);
        assert!(e.contains(needle), "{k}: {e}");
    }
    let e = bad(&[
        "train",
        "--data",
        s(&p),
        "--target",
        "y",
        "--kernel",
        "linear()",
        "--model",
        "svm",
        "--c",
        "-1",
        "--out",
        s(&out),
    ]);
    assert!(e.contains("--c"), "{e}");
    let e = bad(&["kernel-check", "--kernel", "linear()"]);
    assert!(e.contains("--dim"), "{e}");
    let o = run(&["train", "--bogus"]);
    assert_eq!(o.status.code(), Some(2));
    assert!(!out.exists());
}

#[test]
fn help_has_an_example_on_every_command() {
    for c in [
        "train",
        "import",
        "score",
        "inspect",
        "kernel-check",
        "featurize",
    ] {
        let h = ok(&[c, "--help"]);
        assert!(h.contains("Example"), "{c}: {h}");
    }
}
