//! The repository's own documents hold what the code cites: every
//! citation of a project document resolves to a file in the repository,
//! every `docs/REFERENCES.md` section cited exists, and every test that
//! file lists as using a check value exists under that name.

use std::path::{Path, PathBuf};

use fringe_tests::workspace_root;

/// Text files of the repository that may cite documents (sources, docs,
/// manifests), outside build output.
fn text_files(dir: &Path, out: &mut Vec<PathBuf>) {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    for e in entries.filter_map(Result::ok) {
        let p = e.path();
        let name = e.file_name().to_string_lossy().into_owned();
        if p.is_dir() {
            if !matches!(
                name.as_str(),
                "target" | ".git" | "corpus" | "artifacts" | "seeds"
            ) {
                text_files(&p, out);
            }
        } else if [".rs", ".md", ".toml", ".x", ".py"]
            .iter()
            .any(|x| name.ends_with(x))
        {
            out.push(p);
        }
    }
}

fn repo_files() -> Vec<(PathBuf, String)> {
    let root = workspace_root();
    let mut files = Vec::new();
    text_files(&root, &mut files);
    files
        .into_iter()
        .filter_map(|p| {
            let text = std::fs::read_to_string(&p).ok()?;
            Some((p.strip_prefix(&root).unwrap_or(&p).to_path_buf(), text))
        })
        .collect()
}

/// Documents the code cites by bare name, and where they live.
const DOCS: [&str; 4] = ["REFERENCES.md", "DESIGN.md", "TOOLCHAIN.md", "CONTRACTS.md"];

#[test]
fn every_cited_document_is_in_the_repository() {
    let root = workspace_root();
    let mut bad = Vec::new();
    for (path, text) in repo_files() {
        if path.ends_with("tests/docs.rs") {
            continue; // this file names them to look for them
        }
        for (n, line) in text.lines().enumerate() {
            for doc in DOCS {
                let mut from = 0;
                while let Some(i) = line[from..].find(doc) {
                    let at = from + i;
                    from = at + doc.len();
                    // The path as written just before the name.
                    let before = &line[..at];
                    let start = before
                        .rfind(|c: char| c.is_whitespace() || "`(\"'[".contains(c))
                        .map_or(0, |i| i + 1);
                    let cited = format!("{}{doc}", &before[start..]);
                    let resolved = if cited.contains('/') {
                        root.join(&cited)
                    } else {
                        path.parent()
                            .map(|d| root.join(d).join(doc))
                            .unwrap_or_default()
                    };
                    if !resolved.is_file() {
                        bad.push(format!("{}:{}: `{cited}`", path.display(), n + 1));
                    }
                }
            }
        }
    }
    assert!(
        bad.is_empty(),
        "citations of documents not in the repository:\n{}",
        bad.join("\n")
    );
}

/// Section numbers `## N.` of docs/REFERENCES.md.
fn reference_sections() -> Vec<u32> {
    let text = std::fs::read_to_string(workspace_root().join("docs/REFERENCES.md"))
        .expect("docs/REFERENCES.md");
    text.lines()
        .filter_map(|l| l.strip_prefix("## "))
        .filter_map(|l| l.split('.').next()?.trim().parse().ok())
        .collect()
}

#[test]
fn every_cited_reference_section_exists() {
    let sections = reference_sections();
    assert!(sections.len() >= 12, "{sections:?}");
    let mut bad = Vec::new();
    for (path, text) in repo_files() {
        for (n, line) in text.lines().enumerate() {
            let mut rest = line;
            while let Some(i) = rest.find("docs/REFERENCES.md") {
                rest = &rest[i + "docs/REFERENCES.md".len()..];
                // `docs/REFERENCES.md 7`, `... section 7`, `... sec. 9`, `... §7.4`.
                let tail = rest
                    .trim_start_matches([' ', ','])
                    .trim_start_matches("section")
                    .trim_start_matches("sec.")
                    .trim_start_matches('§')
                    .trim_start();
                let digits: String = tail.chars().take_while(char::is_ascii_digit).collect();
                if let Ok(sec) = digits.parse::<u32>() {
                    if !sections.contains(&sec) {
                        bad.push(format!("{}:{}: section {sec}", path.display(), n + 1));
                    }
                }
            }
        }
    }
    assert!(
        bad.is_empty(),
        "sections of docs/REFERENCES.md that do not exist:\n{}",
        bad.join("\n")
    );
}

#[test]
fn every_test_listed_in_the_references_exists() {
    let root = workspace_root();
    let text = std::fs::read_to_string(root.join("docs/REFERENCES.md")).expect("references");
    let mut bad = Vec::new();
    let mut seen = 0;
    for cell in text.split('`').skip(1).step_by(2) {
        let Some((file, name)) = cell.split_once("::") else {
            continue;
        };
        if !file.ends_with(".rs") || name.contains(' ') {
            continue;
        }
        seen += 1;
        let source = std::fs::read_to_string(root.join(file)).unwrap_or_default();
        if !source.contains(&format!("fn {name}(")) {
            bad.push(format!("{file}::{name}"));
        }
    }
    assert!(seen > 50, "only {seen} test references found");
    assert!(
        bad.is_empty(),
        "tests listed in docs/REFERENCES.md that do not exist:\n{}",
        bad.join("\n")
    );
}

/// The README gives the QEMU board's key as the 64 hex digits a key file
/// holds, and they are the board's key (issue 16: it gave 32 ASCII
/// characters, which `--key-file` refuses).
#[test]
fn readme_gives_the_qemu_key_as_a_key_file_holds_it() {
    let readme = std::fs::read_to_string(workspace_root().join("README.md")).expect("README");
    let hex: String = fringe_tests::qemu::BOARD_KEY
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect();
    assert_eq!(hex.len(), 64);
    assert!(
        readme.contains(&format!("echo {hex} > qemu-mps2.key")),
        "README lacks the key file line for {hex}"
    );
    // After the install step the README calls the binary by its name.
    let install = readme
        .find("cargo install --path host")
        .expect("install step");
    assert!(
        !readme[install..].contains("cargo run --release -p fringe-host -- demo"),
        "bare `fringe` after the install step"
    );
}
