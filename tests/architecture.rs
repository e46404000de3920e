//! The module graph of the library has no cycle, the library needs no command-line crates,
//! and a method is one file.

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

fn rust_files(dir: &Path, out: &mut Vec<std::path::PathBuf>) {
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            rust_files(&p, out);
        } else if p.extension().is_some_and(|x| x == "rs") {
            out.push(p);
        }
    }
}

/// Top-level module → the top-level modules it names as `crate::<module>` in code (comments
/// and doc comments are skipped).
fn module_graph() -> BTreeMap<String, BTreeSet<String>> {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut files = Vec::new();
    rust_files(&src, &mut files);
    let mut g: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for f in files {
        let rel = f.strip_prefix(&src).unwrap();
        let top = rel
            .components()
            .next()
            .unwrap()
            .as_os_str()
            .to_string_lossy()
            .trim_end_matches(".rs")
            .to_string();
        if ["main", "cli", "lib"].contains(&top.as_str()) {
            continue;
        }
        let text = std::fs::read_to_string(&f).unwrap();
        let deps = g.entry(top.clone()).or_default();
        for line in text.lines() {
            let code = line.split("//").next().unwrap();
            let mut rest = code;
            while let Some(i) = rest.find("crate::") {
                rest = &rest[i + 7..];
                let name: String = rest
                    .chars()
                    .take_while(|c| c.is_ascii_lowercase() || *c == '_')
                    .collect();
                if !name.is_empty() && name != top && name != "error" {
                    deps.insert(name);
                }
            }
        }
    }
    g
}

#[test]
fn no_import_cycle_in_the_library() {
    let g = module_graph();
    // Depth-first search for a back edge.
    fn visit(
        n: &str,
        g: &BTreeMap<String, BTreeSet<String>>,
        path: &mut Vec<String>,
        done: &mut BTreeSet<String>,
    ) {
        if done.contains(n) {
            return;
        }
        if let Some(i) = path.iter().position(|p| p == n) {
            panic!("import cycle: {} -> {n}", path[i..].join(" -> "));
        }
        path.push(n.to_string());
        for m in g.get(n).into_iter().flatten() {
            visit(m, g, path, done);
        }
        path.pop();
        done.insert(n.to_string());
    }
    let mut done = BTreeSet::new();
    for n in g.keys() {
        visit(n, &g, &mut Vec::new(), &mut done);
    }
    // The container is a leaf (it may only use file I/O).
    let f = &g["format"];
    assert!(f.iter().all(|d| d == "fsio"), "format uses {f:?}");
    // Steps know nothing of methods or models.
    let p = &g["program"];
    assert!(
        !p.contains("features") && !p.contains("model"),
        "program uses {p:?}"
    );
}

#[test]
fn the_library_has_no_command_line_dependencies() {
    let o = std::process::Command::new(env!("CARGO"))
        .args([
            "tree",
            "-e",
            "normal",
            "--no-default-features",
            "-p",
            "kernelpress",
            "--offline",
        ])
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(text.contains("faer"), "{text}");
    for dep in ["clap", "indicatif"] {
        assert!(
            !text.contains(&format!("{dep} v")),
            "library pulls in {dep}"
        );
    }
}

#[test]
fn a_method_is_one_file_registered_once() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("src/features/methods");
    let reg = std::fs::read_to_string(dir.join("mod.rs")).unwrap();
    for m in kernelpress::features::Method::all() {
        let file = dir.join(format!("{}.rs", m.name()));
        assert!(file.exists(), "{} has no file of its own", m.name());
        let needle = format!("\"{}\"", m.name());
        let text = std::fs::read_to_string(&file).unwrap();
        assert!(
            text.contains(&needle),
            "{} file does not name itself",
            m.name()
        );
        // The rest of the library never matches on a method's name.
        assert!(!reg.contains(&needle), "{}", m.name());
    }
}
