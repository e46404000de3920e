//! Hostile and careless input: nothing aborts, nothing allocates from an unchecked size,
//! nothing is silently wrong, outputs are all-or-nothing. One test per class of mistake;
//! the README's table of bad inputs lists the same classes.

mod common;
use common::*;
use std::process::Command;

fn demo() -> std::path::PathBuf {
    root().join("models/pump_svm.safetensors")
}

#[test]
fn deeply_nested_kernels_are_refused_not_a_stack_overflow() {
    let deep = format!(
        "{}gaussian(gamma=1){}",
        "(".repeat(10_000),
        ")".repeat(10_000)
    );
    let e = bad(&["kernel-check", "--kernel", &deep, "--dim", "2"]);
    assert!(e.contains("nested deeper than 32"), "{e}");
    // The same expression inside a model file's manifest.
    let dir = tmpdir("deeply_nested_kernels_are_refused_not_a_stack_overflow");
    let m = kernelpress::model::ExactModel::load(&demo()).unwrap();
    let mut f = m.to_file();
    f.manifest["kernel"] = serde_json::json!(deep);
    let p = dir.join("deep.safetensors");
    f.write(&p).unwrap();
    for cmd in ["inspect", "score"] {
        let mut args = vec![cmd, s(&p)];
        if cmd == "score" {
            args.extend(["--data", "models/pump_test.csv"]);
        }
        let e = bad(&args);
        assert!(e.contains("nested deeper"), "{e}");
    }
    // A sum of 20,000 terms.
    let wide = vec!["linear()"; 20_000].join(" + ");
    let mut f = m.to_file();
    f.manifest["kernel"] = serde_json::json!(wide);
    let p = dir.join("wide.safetensors");
    f.write(&p).unwrap();
    let e = bad(&["inspect", s(&p)]);
    assert!(e.contains("at most 65536"), "{e}");
    let hundred = vec!["linear()"; 100].join(" + ");
    let mut f = m.to_file();
    f.manifest["kernel"] = serde_json::json!(hundred);
    f.write(&p).unwrap();
    let e = bad(&["inspect", s(&p)]);
    assert!(e.contains("more than 64 kernels"), "{e}");
}

#[test]
fn sizes_are_checked_before_allocating() {
    let e = bad(&[
        "kernel-check",
        "--kernel",
        "linear()",
        "--dim",
        "1000000000",
        "--max-memory",
        "1G",
    ]);
    assert!(e.contains("memory limit"), "{e}");
    let c = root().join("models/pump_compiled.safetensors");
    let e = bad(&[
        "report",
        s(&c),
        "--exact",
        s(&demo()),
        "--data",
        "models/pump_test.csv",
        "--reps",
        "1000000000",
    ]);
    assert!(e.contains("--reps"), "{e}");
    let dir = tmpdir("sizes_are_checked_before_allocating");
    let calib = dir.join("c.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 49);
    let e = bad(&[
        "--max-memory",
        "64M",
        "compile",
        s(&demo()),
        "--calib",
        s(&calib),
        "--target",
        "condition",
        "--method",
        "fourier",
        "--features",
        "1048576",
        "--out",
        s(&dir.join("x.safetensors")),
    ]);
    assert!(e.contains("memory limit") && e.contains("1048576"), "{e}");
    assert!(!dir.join("x.safetensors").exists());
}

#[test]
fn overflow_and_absurd_values_are_bad_input() {
    let e = bad(&[
        "kernel-check",
        "--kernel",
        "polynomial(degree=32, gamma=1e10)",
        "--dim",
        "3",
    ]);
    assert!(e.contains("overflows"), "{e}");
    let dir = tmpdir("overflow_and_absurd_values_are_bad_input");
    let text = std::fs::read_to_string(root().join("models/pump_calib.csv")).unwrap();
    let mut lines: Vec<String> = text.lines().take(40).map(String::from).collect();
    let mut cells: Vec<&str> = lines[5].split(',').collect();
    cells[2] = "1e308";
    lines[5] = cells.join(",");
    let calib = dir.join("huge.csv");
    std::fs::write(&calib, lines.join("\n") + "\n").unwrap();
    let out = dir.join("x.safetensors");
    let e = bad(&[
        "compile",
        s(&demo()),
        "--calib",
        s(&calib),
        "--target",
        "condition",
        "--method",
        "fourier",
        "--features",
        "16",
        "--out",
        s(&out),
    ]);
    assert!(
        e.contains("huge.csv") && e.contains("row 5") && e.contains("too large"),
        "{e}"
    );
    let e = bad(&[
        "compile",
        s(&demo()),
        "--calib",
        "models/pump_calib.csv",
        "--target",
        "condition",
        "--method",
        "fourier",
        "--features",
        "16",
        "--ridge-rel",
        "1e308",
        "--out",
        s(&out),
    ]);
    assert!(e.contains("--ridge-rel"), "{e}");
    // Values the library's checked constructors refuse, named by their flag.
    for (flag, value) in [
        ("--ridge-rel", "-1"),
        ("--guard-agreement", "1.5"),
        ("--guard-rate", "-0.1"),
        ("--budget-us", "-3"),
        ("--max-disagreement", "1"),
    ] {
        let given = format!("{flag}={value}");
        let model = demo();
        let mut args = vec![
            "compile",
            s(&model),
            "--calib",
            "models/pump_calib.csv",
            "--target",
            "condition",
            &given,
            "--out",
            s(&out),
        ];
        if !flag.starts_with("--budget") && !flag.starts_with("--max") {
            args.extend(["--method", "fourier", "--features", "16"]);
        }
        let e = bad(&args);
        assert!(
            e.contains(&format!("{flag}: ")) && e.contains(value),
            "{flag}: {e}"
        );
    }
    let e = bad(&["score", "--decisions", s(&demo()), "--data", "/dev/zero"]);
    assert!(e.contains("not a regular file"), "{e}");
    assert!(!out.exists());
}

#[test]
fn model_files_that_lie_are_refused() {
    let dir = tmpdir("model_files_that_lie_are_refused");
    let m = kernelpress::model::ExactModel::load(&demo()).unwrap();
    for (name, edit) in [
        ("negative_dim", serde_json::json!(-1)),
        ("huge_dim", serde_json::json!(1_000_000_000_000u64)),
    ] {
        let mut f = m.to_file();
        f.manifest["input"]["dim"] = edit;
        let p = dir.join(format!("{name}.safetensors"));
        f.write(&p).unwrap();
        let e = bad(&["inspect", s(&p)]);
        assert!(e.contains("'dim'"), "{name}: {e}");
    }
    let mut f = m.to_file();
    f.manifest["output"]["labels"] = serde_json::json!([1, 2, 3, 4]);
    let p = dir.join("labels.safetensors");
    f.write(&p).unwrap();
    let e = bad(&["inspect", s(&p)]);
    assert!(e.contains("labels"), "{e}");
    // float32 tensors in a version-2 file.
    let mut f = m.to_file();
    let t = f.tensors.get("exact.intercepts").unwrap().clone();
    let kernelpress::format::Data::F64(v) = t.data else {
        panic!()
    };
    f.put_data(
        "exact.intercepts",
        t.shape,
        kernelpress::format::Data::F32(v.iter().map(|x| *x as f32).collect()),
    );
    let p = dir.join("f32.safetensors");
    f.write(&p).unwrap();
    let e = bad(&["inspect", s(&p)]);
    assert!(e.contains("dtype F32"), "{e}");
    // Safetensors errors are sentences, not debug dumps.
    let good = std::fs::read(demo()).unwrap();
    let p = dir.join("cut.safetensors");
    std::fs::write(&p, &good[..200]).unwrap();
    let e = bad(&["inspect", s(&p)]);
    assert!(!e.contains("InvalidHeader") && !e.contains("{"), "{e}");
}

#[test]
fn outputs_never_overwrite_inputs() {
    let dir = tmpdir("outputs_never_overwrite_inputs");
    let data = dir.join("d.csv");
    std::fs::copy(root().join("models/pump_test.csv"), &data).unwrap();
    let before = std::fs::read(&data).unwrap();
    let e = bad(&[
        "score",
        "--decisions",
        s(&demo()),
        "--data",
        s(&data),
        "--target",
        "condition",
        "--out",
        s(&data),
    ]);
    assert!(e.contains("also an input"), "{e}");
    assert_eq!(std::fs::read(&data).unwrap(), before);
    let model = dir.join("m.safetensors");
    std::fs::copy(demo(), &model).unwrap();
    let e = bad(&[
        "compile",
        s(&model),
        "--calib",
        s(&data),
        "--target",
        "condition",
        "--method",
        "fourier",
        "--features",
        "16",
        "--out",
        s(&model),
    ]);
    assert!(e.contains("also an input"), "{e}");
    let out = dir.join("o.safetensors");
    let e = bad(&[
        "compile",
        s(&model),
        "--calib",
        s(&data),
        "--target",
        "condition",
        "--method",
        "fourier",
        "--features",
        "16",
        "--out",
        s(&out),
        "--json",
        s(&out),
    ]);
    assert!(e.contains("two different outputs"), "{e}");
    let e = bad(&[
        "compile",
        s(&model),
        "--calib",
        s(&data),
        "--target",
        "condition",
        "--method",
        "fourier",
        "--features",
        "16",
        "--out",
        s(&dir.join("no/such/dir/o.safetensors")),
    ]);
    assert!(e.contains("does not exist"), "{e}");
    // Both outputs of compile are published together.
    let j = dir.join("r.json");
    ok(&[
        "compile",
        s(&model),
        "--calib",
        s(&data),
        "--target",
        "condition",
        "--method",
        "fourier",
        "--features",
        "16",
        "--no-timing",
        "--out",
        s(&out),
        "--json",
        s(&j),
    ]);
    assert!(out.exists() && j.exists());
}

#[test]
fn a_terminated_run_leaves_no_temporary_file() {
    let dir = tmpdir("a_terminated_run_leaves_no_temporary_file");
    let out = dir.join("o.safetensors");
    let mut child = Command::new(bin())
        .args([
            "compile",
            s(&demo()),
            "--calib",
            s(&root().join("models/pump_calib.csv")),
            "--target",
            "condition",
            "--method",
            "nystrom",
            "--features",
            "2048",
            "--out",
            s(&out),
        ])
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    std::thread::sleep(std::time::Duration::from_millis(300));
    // A temporary file as the writer would leave it at the moment of the signal.
    let tmp = dir.join(format!(".o.safetensors.tmp{}", child.id()));
    std::fs::write(&tmp, b"partial").unwrap();
    let k = Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(k.success());
    let status = child.wait().unwrap();
    assert_eq!(status.code(), Some(130), "{status:?}");
    assert!(!tmp.exists(), "temporary file left behind");
    assert!(!out.exists());
}

#[test]
fn messages_stay_short_and_readable() {
    let dir = tmpdir("messages_stay_short_and_readable");
    // A 1,000-column file without the named target lists a dozen columns, not all.
    let head: Vec<String> = (0..1000).map(|j| format!("c{j}")).collect();
    let row: Vec<String> = (0..1000).map(|j| j.to_string()).collect();
    let p = dir.join("wide.csv");
    std::fs::write(&p, format!("{}\n{}\n", head.join(","), row.join(","))).unwrap();
    let e = bad(&[
        "train",
        "--data",
        s(&p),
        "--target",
        "label",
        "--kernel",
        "linear()",
        "--model",
        "ridge",
        "--out",
        s(&dir.join("m.safetensors")),
    ]);
    assert!(e.len() < 400 && e.contains("(988 more)"), "{e}");
    // Non-ASCII characters are shown as characters.
    let e = bad(&[
        "kernel-check",
        "--kernel",
        "gaussian(gamma=1) ÷ linear()",
        "--dim",
        "2",
    ]);
    assert!(e.contains("'÷'") && e.contains("position 19"), "{e}");
    // Old-Mac line endings are read.
    let p = dir.join("cr.csv");
    std::fs::write(&p, "a,b,y\r1,2,x\r3,4,z\r5,6,x\r").unwrap();
    ok(&[
        "train",
        "--data",
        s(&p),
        "--target",
        "y",
        "--kernel",
        "linear()",
        "--model",
        "ridge",
        "--classify",
        "--out",
        s(&dir.join("cr.safetensors")),
    ]);
}

#[test]
fn degenerate_data_never_puts_nan_in_a_file() {
    let dir = tmpdir("degenerate_data_never_puts_nan_in_a_file");
    // Duplicate rows and a constant column.
    let mut t = String::from("a,b,c,y\n");
    for i in 0..120 {
        let v = (i % 6) as f64 * 0.3;
        t.push_str(&format!(
            "{v},{},{},{}\n",
            1.0,
            -v,
            if i % 2 == 0 { "p" } else { "q" }
        ));
    }
    let p = dir.join("deg.csv");
    std::fs::write(&p, &t).unwrap();
    for (kernel, method) in [
        ("gaussian(gamma=1e-12)", "fourier"),
        ("gaussian(gamma=1e6)", "orthogonal"),
        ("gaussian(gamma=0.5)", "nystrom"),
        ("gaussian(gamma=0.5)", "taylor"),
        ("polynomial(degree=3, gamma=1, offset=1)", "maclaurin"),
    ] {
        let out = dir.join(format!("{method}.safetensors"));
        let o = run(&[
            "compile",
            "--kernel",
            kernel,
            "--data",
            s(&p),
            "--target",
            "y",
            "--standardize",
            "--method",
            method,
            "--features",
            "64",
            "--out",
            s(&out),
        ]);
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(!err.contains("panicked"), "{kernel} {method}: {err}");
        match o.status.code() {
            Some(0) => {
                let sc = ok(&[
                    "score",
                    "--decisions",
                    s(&out),
                    "--data",
                    s(&p),
                    "--target",
                    "y",
                ]);
                assert!(
                    !sc.contains("NaN") && !sc.contains("inf"),
                    "{kernel} {method}: non-finite score"
                );
            }
            Some(1) | Some(2) => assert!(!out.exists(), "{kernel} {method}: {err}"),
            other => panic!("{kernel} {method}: exit {other:?}: {err}"),
        }
    }
}

#[test]
fn the_report_says_where_f32_loses_precision() {
    // The demo's Nyström head cancels large terms: the report says so and by how much (the
    // f32 ONNX export of this model measured 1.8e-4 of the decision scale).
    let dir = tmpdir("the_report_says_where_f32_loses_precision");
    let j = dir.join("r.json");
    ok(&[
        "report",
        s(&root().join("models/pump_compiled.safetensors")),
        "--exact",
        s(&demo()),
        "--data",
        "models/pump_test.csv",
        "--target",
        "condition",
        "--no-timing",
        "--json",
        s(&j),
    ]);
    let r: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&j).unwrap()).unwrap();
    assert!(r["head_cancellation"].as_f64().unwrap() > 1000.0);
    assert!(
        r["warnings"].to_string().contains("precision"),
        "{}",
        r["warnings"]
    );
    // One figure, not two: the warning quotes the f32 movement the report measured.
    let moved = r["f32_max_abs_difference"].as_f64().unwrap();
    assert!(
        r["warnings"]
            .to_string()
            .contains(&format!("up to {moved:.1e}")),
        "{} vs {moved:.1e}",
        r["warnings"]
    );
    // A random-feature head does not.
    let calib = dir.join("c.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 1000);
    ok(&[
        "compile",
        s(&demo()),
        "--calib",
        s(&calib),
        "--target",
        "condition",
        "--method",
        "orthogonal",
        "--features",
        "256",
        "--no-timing",
        "--out",
        s(&dir.join("o.safetensors")),
        "--json",
        s(&j),
    ]);
    let r: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&j).unwrap()).unwrap();
    assert!(
        r["head_cancellation"].as_f64().unwrap() < 100.0,
        "{}",
        r["head_cancellation"]
    );
    assert!(!r["warnings"].to_string().contains("precision"));
}

#[test]
fn outputs_never_replace_what_is_not_a_regular_file() {
    use std::os::unix::fs::FileTypeExt;
    let dir = tmpdir("outputs_never_replace");
    let test = dir.join("t.csv");
    head_lines(&root().join("models/pump_test.csv"), &test, 20);
    let args = |out: &std::path::Path| {
        vec![
            "score".to_string(),
            s(&demo()).to_string(),
            "--data".into(),
            s(&test).to_string(),
            "--target".into(),
            "condition".into(),
            "--out".into(),
            s(out).to_string(),
        ]
    };
    let run_args = |a: Vec<String>| run(&a.iter().map(|x| x.as_str()).collect::<Vec<_>>());
    // A symbolic link: its target is replaced, the link stays a link.
    let real = dir.join("real.csv");
    std::fs::write(&real, "old\n").unwrap();
    let link = dir.join("link.csv");
    std::os::unix::fs::symlink(&real, &link).unwrap();
    assert!(run_args(args(&link)).status.success());
    assert!(std::fs::symlink_metadata(&link)
        .unwrap()
        .file_type()
        .is_symlink());
    assert!(std::fs::read_to_string(&real)
        .unwrap()
        .starts_with("label,"));
    // A link to nothing is refused, and nothing is created.
    let dangling = dir.join("dangling.csv");
    std::os::unix::fs::symlink(dir.join("nowhere.csv"), &dangling).unwrap();
    let o = run_args(args(&dangling));
    assert_eq!(
        o.status.code(),
        Some(2),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(!dir.join("nowhere.csv").exists());
    // A character device is written as a stream, never replaced.
    let o = run_args(args(std::path::Path::new("/dev/null")));
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(std::fs::metadata("/dev/null")
        .unwrap()
        .file_type()
        .is_char_device());
    // A FIFO: the reader gets the CSV, the FIFO stays a FIFO.
    let fifo = dir.join("pipe");
    assert!(Command::new("mkfifo")
        .arg(&fifo)
        .status()
        .unwrap()
        .success());
    let f2 = fifo.clone();
    let reader = std::thread::spawn(move || std::fs::read_to_string(&f2).unwrap());
    assert!(run_args(args(&fifo)).status.success());
    assert!(reader.join().unwrap().starts_with("label,"));
    assert!(std::fs::metadata(&fifo).unwrap().file_type().is_fifo());
    // A folder is refused.
    let o = run_args(args(&dir));
    assert_eq!(o.status.code(), Some(2));
    // No temporary file is left anywhere in the folder.
    let left = leftovers(&dir, |n| n.contains(".tmp"));
    assert!(left.is_empty(), "{left:?}");
}

#[test]
fn a_planted_link_at_the_old_temporary_name_is_not_followed() {
    // Temporary names were `.NAME.tmpPID`: predictable, and created through a planted
    // link. They are now created exclusively under an unpredictable name.
    let dir = tmpdir("planted_temp_link");
    let victim = dir.join("victim.txt");
    std::fs::write(&victim, "precious").unwrap();
    let out = dir.join("out.csv");
    let planted = dir.join(format!(".out.csv.tmp{}", std::process::id()));
    std::os::unix::fs::symlink(&victim, &planted).unwrap();
    kernelpress::data::write_atomic(&out, b"a,b\n1,2\n").unwrap();
    assert_eq!(std::fs::read_to_string(&victim).unwrap(), "precious");
    assert_eq!(std::fs::read_to_string(&out).unwrap(), "a,b\n1,2\n");
    // Two writes of the same path never share a temporary name (exclusive creation).
    kernelpress::data::write_atomic(&out, b"x\n").unwrap();
    assert_eq!(std::fs::read_to_string(&out).unwrap(), "x\n");
}

#[test]
fn folder_exports_are_all_or_nothing_and_never_swallow_an_input() {
    let dir = tmpdir("folder_exports_all_or_nothing");
    let compiled = root().join("models/pump_compiled.safetensors");
    let out = dir.join("c_export");
    ok(&["export", s(&compiled), "--format", "c", "--out", s(&out)]);
    let first = std::fs::read_to_string(out.join("kp_model.h")).unwrap();
    // An existing folder is refused without --replace-folder, and left as it was.
    std::fs::write(out.join("mine.txt"), "keep").unwrap();
    let e = bad(&["export", s(&compiled), "--format", "npy", "--out", s(&out)]);
    assert!(e.contains("--replace-folder"), "{e}");
    assert_eq!(
        std::fs::read_to_string(out.join("kp_model.h")).unwrap(),
        first
    );
    assert!(out.join("mine.txt").exists());
    // With it, the folder is replaced whole: the new files, nothing old beside them.
    ok(&[
        "export",
        s(&compiled),
        "--format",
        "npy",
        "--out",
        s(&out),
        "--replace-folder",
    ]);
    assert!(out.join("program.json").exists());
    assert!(!out.join("kp_model.h").exists() && !out.join("mine.txt").exists());
    // An input inside the output folder is refused before any work.
    let inside = out.join("model.safetensors");
    std::fs::copy(&compiled, &inside).unwrap();
    let e = bad(&[
        "export",
        s(&inside),
        "--format",
        "c",
        "--out",
        s(&out),
        "--replace-folder",
    ]);
    assert!(e.contains("lives inside this output folder"), "{e}");
    assert!(inside.exists());
    // No temporary folder is left beside it.
    let left = leftovers(&dir, |n| n.starts_with('.'));
    assert!(left.is_empty(), "{left:?}");
}

#[test]
fn a_flipped_bit_anywhere_is_refused() {
    // Every single-bit flip of a freshly written model file (header, manifest, labels,
    // tensor data) is refused when read; files written before checksums still load.
    let dir = tmpdir("a_flipped_bit_anywhere_is_refused");
    let calib = dir.join("c.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 400);
    let out = dir.join("m.safetensors");
    ok(&[
        "compile",
        s(&demo()),
        "--calib",
        s(&calib),
        "--target",
        "condition",
        "--method",
        "hadamard",
        "--features",
        "16",
        "--no-timing",
        "--no-bandwidth-search",
        "--out",
        s(&out),
    ]);
    let bytes = std::fs::read(&out).unwrap();
    let clean = kernelpress::model::TensorFile::from_bytes(&bytes, "m").unwrap();
    assert_eq!(clean.integrity, kernelpress::format::Integrity::Verified);
    let mut refused = 0;
    for pos in 0..bytes.len() {
        let bit = (pos * 7) % 8;
        let mut b = bytes.clone();
        b[pos] ^= 1 << bit;
        match kernelpress::model::TensorFile::from_bytes(&b, "m") {
            Err(_) => refused += 1,
            Ok(f) => panic!(
                "a flip of bit {bit} at byte {pos} was read ({:?})",
                f.integrity
            ),
        }
    }
    assert_eq!(refused, bytes.len());
    // One flipped bit in a class label, through the CLI: exit 2 naming the checksum.
    let text = String::from_utf8_lossy(&bytes).to_string();
    let at = text.find("bearing_wear").unwrap();
    let mut b = bytes.clone();
    b[at] ^= 0x20;
    let bad_file = dir.join("flipped.safetensors");
    std::fs::write(&bad_file, &b).unwrap();
    let e = bad(&[
        "score",
        s(&bad_file),
        "--data",
        s(&calib),
        "--target",
        "condition",
    ]);
    assert!(e.contains("checksum mismatch"), "{e}");
    // A file written before checksums (a version-1 fixture) loads, with a note.
    let old = root().join("tests/fixtures/v1/pump_svm.safetensors");
    let o = run(&["inspect", s(&old)]);
    assert!(o.status.success());
    assert!(String::from_utf8_lossy(&o.stderr).contains("carries no checksum"));
    assert!(String::from_utf8_lossy(&o.stdout).contains("checksum        none"));
    assert!(ok(&["inspect", s(&out)]).contains("checksum        verified"));
}

#[test]
fn smaller_findings_of_the_hostile_round() {
    let dir = tmpdir("smaller_findings_of_the_hostile_round");
    let calib = dir.join("c.csv");
    head_lines(&root().join("models/pump_calib.csv"), &calib, 600);
    // --stats-out does not silently ignore flags that belong to the merge.
    let e = bad(&[
        "compile",
        s(&demo()),
        "--calib",
        s(&calib),
        "--method",
        "hadamard",
        "--features",
        "16",
        "--stats-out",
        s(&dir.join("p.kpstats")),
        "--eval",
        s(&calib),
        "--min-agreement",
        "0.9",
    ]);
    assert!(
        e.contains("--eval, --min-agreement belong to the merge"),
        "{e}"
    );
    assert!(!dir.join("p.kpstats").exists());
    // A 20 KB kernel expression is not echoed whole.
    let long = format!("gaussian(gamma=1) + {}", "x".repeat(20_000));
    let e = bad(&["kernel-check", "--kernel", &long, "--dim", "2"]);
    assert!(e.len() < 600, "{} characters", e.len());
    assert!(e.contains("characters)"), "{e}");
    // Identical calibration rows: an input error that says so, not an internal error.
    let text = std::fs::read_to_string(&calib).unwrap();
    let mut lines = text.lines();
    let head = lines.next().unwrap();
    let row = lines.next().unwrap();
    let same = dir.join("same.csv");
    std::fs::write(&same, format!("{head}\n{}", format!("{row}\n").repeat(300))).unwrap();
    let o = run(&[
        "compile",
        s(&demo()),
        "--calib",
        s(&same),
        "--target",
        "condition",
        "--method",
        "hadamard",
        "--features",
        "32",
        "--no-timing",
        "--out",
        s(&dir.join("m.safetensors")),
    ]);
    let e = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{e}");
    assert!(
        e.trim().lines().last().unwrap().contains("do not vary"),
        "{e}"
    );
    assert!(!dir.join("m.safetensors").exists());
    // Calibration labels of one class: the model is compiled, without probabilities.
    let one = dir.join("one.csv");
    let healthy: String = text
        .lines()
        .skip(1)
        .filter(|l| l.ends_with(",healthy"))
        .map(|l| format!("{l}\n"))
        .collect();
    std::fs::write(&one, format!("{head}\n{healthy}")).unwrap();
    let o = run(&[
        "compile",
        s(&demo()),
        "--calib",
        s(&one),
        "--target",
        "condition",
        "--method",
        "hadamard",
        "--features",
        "32",
        "--no-timing",
        "--out",
        s(&dir.join("one.safetensors")),
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(String::from_utf8_lossy(&o.stderr).contains("class probabilities not fitted"));
}

#[test]
fn an_unwritable_output_is_found_before_any_work_with_one_exit_code() {
    // /sys takes no new file, even as root: every command and format says so first, exit 2.
    let cases: [&[&str]; 4] = [
        &[
            "score",
            "models/pump_svm.safetensors",
            "--data",
            "models/pump_test.csv",
            "--target",
            "condition",
            "--out",
            "/sys/kp.csv",
        ],
        &[
            "export",
            "models/pump_compiled.safetensors",
            "--format",
            "c",
            "--out",
            "/sys/kp_c",
        ],
        &[
            "export",
            "models/pump_compiled.safetensors",
            "--format",
            "onnx",
            "--out",
            "/sys/kp.onnx",
        ],
        &[
            "compile",
            "models/pump_svm.safetensors",
            "--calib",
            "models/pump_calib.csv",
            "--target",
            "condition",
            "--method",
            "hadamard",
            "--features",
            "64",
            "--out",
            "/sys/kp.safetensors",
        ],
    ];
    for args in cases {
        let o = std::process::Command::new(bin())
            .current_dir(root())
            .args(args)
            .output()
            .unwrap();
        let e = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {e}");
        assert!(e.contains("cannot write in folder /sys"), "{e}");
        assert!(
            !e.contains("[kernelpress]"),
            "work started before the check: {e}"
        );
    }
}

#[test]
fn a_version_1_file_that_says_no_scaling_but_stores_it_is_refused() {
    // Rewritten with the safetensors package: the manifest says 'none', the tensors remain.
    let dir = tmpdir("v1_scaling_none");
    let out = dir.join("v1_none.safetensors");
    py_inline(
        "import json, sys\nfrom safetensors.numpy import load_file, save_file\nfrom safetensors import safe_open\nf = safe_open(sys.argv[1], 'np')\nm = json.loads(f.metadata()['kernelpress'])\nm['input_scaling'] = 'none'\nsave_file(load_file(sys.argv[1]), sys.argv[2], metadata={'kernelpress': json.dumps(m)})\n",
        &[s(&root().join("tests/fixtures/v1/pump_svm.safetensors")), s(&out)],
    );
    let test = root().join("models/pump_test.csv");
    let e = bad(&[
        "score",
        s(&out),
        "--data",
        s(&test),
        "--target",
        "condition",
    ]);
    assert!(e.contains("disagrees with itself"), "{e}");
}

#[test]
fn a_crafted_step_width_is_refused_not_allocated() {
    // A Tensor Sketch model whose sketch width is rewritten to 2^40 (safetensors package):
    // score, inspect and export refuse it under --max-memory 4G instead of aborting.
    let dir = tmpdir("crafted_step_width");
    let train = dir.join("train.csv");
    head_lines(&root().join("models/pump_train.csv"), &train, 300);
    let model = dir.join("ts.safetensors");
    ok(&[
        "compile",
        "--kernel",
        "polynomial(degree=2, gamma=0.3, offset=1)",
        "--data",
        s(&train),
        "--target",
        "condition",
        "--method",
        "tensorsketch",
        "--features",
        "64",
        "--out",
        s(&model),
    ]);
    let crafted = dir.join("crafted.safetensors");
    py_inline(
        "import json, sys\nfrom safetensors.numpy import load_file, save_file\nfrom safetensors import safe_open\nf = safe_open(sys.argv[1], 'np')\nm = json.loads(f.metadata()['kernelpress'])\nn = 0\nfor st in m['program']['steps']:\n    if 'width' in st:\n        st['width'] = 2**40\n        n += 1\nassert n == 1, n\nm.pop('checksum'); m.pop('checksum_required')\nsave_file(load_file(sys.argv[1]), sys.argv[2], metadata={'kernelpress': json.dumps(m)})\n",
        &[s(&model), s(&crafted)],
    );
    let test = root().join("models/pump_test.csv");
    for args in [
        vec![
            "--max-memory",
            "4G",
            "score",
            s(&crafted),
            "--data",
            s(&test),
            "--target",
            "condition",
        ],
        vec!["--max-memory", "4G", "inspect", s(&crafted)],
        vec![
            "--max-memory",
            "4G",
            "export",
            s(&crafted),
            "--format",
            "onnx",
            "--out",
            "/tmp/never.onnx",
        ],
    ] {
        let o = run(&args);
        let e = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {e}");
        assert!(e.contains("width"), "{e}");
    }
}

#[test]
fn a_million_column_header_is_refused_under_a_small_ceiling() {
    // Before: split into a million names, 232 MB under --max-memory 20M. Now refused first.
    let dir = tmpdir("million_columns");
    let p = dir.join("wide.csv");
    let head: Vec<String> = (0..1_000_000).map(|i| format!("c{i}")).collect();
    std::fs::write(
        &p,
        format!("{}\n{}\n", head.join(","), vec!["1"; 1_000_000].join(",")),
    )
    .unwrap();
    let e = bad(&["--max-memory", "20M", "score", s(&demo()), "--data", s(&p)]);
    assert!(e.contains("the header's column names would need"), "{e}");
    // Before: featurize --features 1048576 under 1G reached 2.5 GB or aborted; now the
    // program's widths are checked first.
    let test = root().join("models/pump_test.csv");
    let e = bad(&[
        "--max-memory",
        "1G",
        "featurize",
        "--kernel",
        "gaussian(gamma=1)",
        "--method",
        "fourier",
        "--features",
        "1048576",
        "--data",
        s(&test),
        "--target",
        "condition",
        "--out",
        s(&dir.join("z.npy")),
    ]);
    assert!(e.contains("more than the memory limit"), "{e}");
    assert!(!dir.join("z.npy").exists());
}

/// The names in `dir` that `keep` selects (left-over temporary files and folders).
fn leftovers(dir: &std::path::Path, keep: impl Fn(&str) -> bool) -> Vec<String> {
    std::fs::read_dir(dir)
        .unwrap()
        .flatten()
        .map(|e| e.file_name().to_string_lossy().to_string())
        .filter(|n| keep(n))
        .collect()
}

/// `--max-memory` budgets the whole process: a planned size that fits the ceiling alone but
/// not beside what the process already holds is refused before allocating, and a command
/// whose copies and buffers (which no single check sees) take its resident memory over
/// the ceiling is stopped by the watchdog with exit 2, its output not written and no
/// temporary file left. (Measured by hand with /usr/bin/time: featurize of 3,000 rows ×
/// 8,192 features peaks at 636 MB unbounded; under --max-memory 300M it stops at 303 MiB,
/// peak 310 MB.)
#[test]
fn max_memory_budgets_the_whole_process() {
    let dir = tmpdir("max_memory_process");
    let test = root().join("models/pump_test.csv");
    let run_with = |limit: &str, out: &str| {
        run(&[
            "--max-memory",
            limit,
            "featurize",
            "--kernel",
            "gaussian(gamma=1)",
            "--method",
            "fourier",
            "--features",
            "8192",
            "--data",
            s(&test),
            "--target",
            "condition",
            "--out",
            s(&dir.join(out)),
        ])
    };
    // 3,000 × 8,192 f64 = 196,608,000 bytes: under 190 MiB + what is in use, not beside it.
    let o = run_with("190M", "a.npy");
    let e = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{e}");
    assert!(e.contains("already in use"), "{e}");
    // Fits beside what is in use, but the features plus the file's bytes do not.
    let o = run_with("300M", "b.npy");
    let e = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{e}");
    assert!(e.contains("was exceeded"), "{e}");
    assert!(!dir.join("b.npy").exists());
    assert!(leftovers(&dir, |n| n.starts_with('.')).is_empty());
    // Enough room: written.
    let o = run_with("2G", "c.npy");
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(dir.join("c.npy").exists());
}
