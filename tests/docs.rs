//! The documentation cannot drift: `docs/commands.md` is the CLI's own `--help` text
//! (regenerate it with `KP_WRITE_DOCS=1 cargo test --test docs`), the README stays short,
//! and every page it links to exists.

mod common;
use common::*;

const COMMANDS: [&str; 10] = [
    "train",
    "import",
    "score",
    "inspect",
    "kernel-check",
    "featurize",
    "compile",
    "sweep",
    "report",
    "export",
];

fn generated() -> String {
    let mut s = String::from(
        "# Command reference\n\nEvery command's `--help`, as the binary prints it (this page is generated from it by\n`KP_WRITE_DOCS=1 cargo test --test docs`, and a test fails when it differs). Details the\nhelp leaves out are in [using.md](using.md); back to the [README](../README.md).\n",
    );
    let top = ok(&["--help"]);
    s.push_str(&format!(
        "\n## kernelpress\n\n```text\n{}\n```\n",
        top.trim_end()
    ));
    for c in COMMANDS {
        let h = ok(&[c, "--help"]);
        s.push_str(&format!("\n## {c}\n\n```text\n{}\n```\n", h.trim_end()));
    }
    s
}

#[test]
fn the_command_reference_is_the_help_text() {
    let path = root().join("docs/commands.md");
    let want = generated();
    if std::env::var_os("KP_WRITE_DOCS").is_some() {
        std::fs::write(&path, &want).unwrap();
    }
    let have = std::fs::read_to_string(&path).unwrap_or_default();
    assert!(
        have == want,
        "docs/commands.md differs from the CLI's help; regenerate it with KP_WRITE_DOCS=1 cargo test --test docs"
    );
}

#[test]
fn the_readme_is_short_and_its_links_exist() {
    let readme = std::fs::read_to_string(root().join("README.md")).unwrap();
    let n = readme.lines().count();
    assert!(
        n <= 250,
        "README.md has {n} lines; reference material belongs in docs/"
    );
    let mut links = 0;
    for part in readme.split("](").skip(1) {
        let target = part.split(')').next().unwrap().split('#').next().unwrap();
        if target.is_empty() || target.starts_with("http") {
            continue;
        }
        assert!(
            root().join(target).exists(),
            "README links to missing {target}"
        );
        links += 1;
    }
    assert!(
        links >= 8,
        "the README links to the docs pages ({links} links)"
    );
    for page in std::fs::read_dir(root().join("docs")).unwrap() {
        let p = page.unwrap().path();
        if p.extension().is_some_and(|x| x == "md") {
            let text = std::fs::read_to_string(&p).unwrap();
            for part in text.split("](").skip(1) {
                let target = part.split(')').next().unwrap().split('#').next().unwrap();
                if target.is_empty() || target.starts_with("http") {
                    continue;
                }
                assert!(
                    p.parent().unwrap().join(target).exists(),
                    "{} links to missing {target}",
                    p.display()
                );
            }
        }
    }
}
