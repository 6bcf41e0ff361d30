//! The architecture check of `docs/ARCHITECTURE.md`, run by `cargo xtask
//! test`:
//!
//! 1. **Crates.** Every workspace crate is in [`RULES`]; each uses only the
//!    workspace crates its row allows (read from `cargo metadata`, normal and
//!    build dependencies; dev-dependencies are free); no crate but the binary
//!    uses the crates only the binary may use ([`BINARY_ONLY`]).
//! 2. **Modules.** No import cycle between the top-level modules of any
//!    crate (`crate::a` in module `b` and `crate::b` in module `a`, directly
//!    or round a longer loop). Test modules (`#[cfg(test)]` to the end of a
//!    file) are left out.
//! 3. **Quiet libraries.** No file of a host library crate prints to the
//!    terminal (`println!`, `eprintln!`, `print!`, `eprint!`, `dbg!`,
//!    `std::io::stdout`, `std::io::stderr`) outside its test module.

use anyhow::{bail, Context, Result};
use cargo_metadata::{DependencyKind, MetadataCommand};
use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

/// Which workspace crates each crate may use (its normal and build
/// dependencies). The table of `docs/ARCHITECTURE.md`, in code.
pub const RULES: &[(&str, &[&str])] = &[
    // Device side: no_std, no heap; never a host crate.
    ("fringe-protocol", &[]),
    ("fringe-calibration", &[]),
    ("fringe-registers", &["fringe-protocol"]),
    (
        "fringe-firmware",
        &["fringe-protocol", "fringe-calibration", "fringe-registers"],
    ),
    ("fringe-drivers", &["fringe-firmware"]),
    // Host libraries, from the bottom up.
    ("fringe-store", &["fringe-protocol"]),
    ("fringe-link", &["fringe-protocol"]),
    ("fringe-sqlite", &["fringe-protocol", "fringe-store"]),
    ("fringe-postgres", &["fringe-protocol", "fringe-store"]),
    (
        "fringe-quality",
        &[
            "fringe-protocol",
            "fringe-calibration",
            "fringe-firmware",
            "fringe-store",
        ],
    ),
    (
        "fringe-sim",
        &[
            "fringe-protocol",
            "fringe-calibration",
            "fringe-firmware",
            "fringe-link",
        ],
    ),
    (
        "fringe-line",
        &["fringe-protocol", "fringe-link", "fringe-store"],
    ),
    (
        "fringe-device",
        &[
            "fringe-protocol",
            "fringe-calibration",
            "fringe-firmware",
            "fringe-link",
            "fringe-quality",
            "fringe-store",
        ],
    ),
    (
        "fringe-gateway",
        &[
            "fringe-protocol",
            "fringe-registers",
            "fringe-store",
            "fringe-link",
            "fringe-line",
            "fringe-quality",
        ],
    ),
    // The binary: the only crate that knows clap, the terminal, anyhow and
    // exit codes; it may use every library.
    (
        "fringe-host",
        &[
            "fringe-protocol",
            "fringe-calibration",
            "fringe-firmware",
            "fringe-registers",
            "fringe-store",
            "fringe-link",
            "fringe-sqlite",
            "fringe-postgres",
            "fringe-quality",
            "fringe-sim",
            "fringe-line",
            "fringe-device",
            "fringe-gateway",
        ],
    ),
    // Tests and tools: they may use anything, nothing may use them.
    ("fringe-testkit", &[]),
    ("fringe-tests", &["*"]),
    ("xtask", &["*"]),
];

/// Crates.io crates only the binary (and tests and tools) may use.
pub const BINARY_ONLY: &[&str] = &["clap", "anyhow", "indicatif", "ctrlc"];

/// Crates that may use [`BINARY_ONLY`] crates.
const MAY_USE_BINARY_ONLY: &[&str] = &["fringe-host", "fringe-tests", "xtask"];

/// Host library crates: nothing in them prints.
const QUIET: &[&str] = &[
    "fringe-store",
    "fringe-link",
    "fringe-sqlite",
    "fringe-postgres",
    "fringe-quality",
    "fringe-sim",
    "fringe-line",
    "fringe-device",
    "fringe-gateway",
];

/// One workspace crate as the check sees it.
#[derive(Debug, Clone)]
pub struct Krate {
    /// Package name.
    pub name: String,
    /// Normal and build dependencies, by package name.
    pub deps: Vec<String>,
    /// Its `src` folder.
    pub src: PathBuf,
}

/// The workspace's crates from `cargo metadata`.
pub fn workspace_crates(root: &Path) -> Result<Vec<Krate>> {
    let meta = MetadataCommand::new()
        .manifest_path(root.join("Cargo.toml"))
        .no_deps()
        .exec()
        .context("cargo metadata")?;
    Ok(meta
        .packages
        .iter()
        .map(|p| Krate {
            name: p.name.to_string(),
            deps: p
                .dependencies
                .iter()
                .filter(|d| matches!(d.kind, DependencyKind::Normal | DependencyKind::Build))
                .map(|d| d.name.clone())
                .collect(),
            src: p
                .manifest_path
                .parent()
                .map(|d| d.join("src").into_std_path_buf())
                .unwrap_or_default(),
        })
        .collect())
}

/// The crate-level rule breaches, one line each.
pub fn crate_breaches(crates: &[Krate]) -> Vec<String> {
    let names: BTreeSet<&str> = crates.iter().map(|k| k.name.as_str()).collect();
    let rules: BTreeMap<&str, &[&str]> = RULES.iter().copied().collect();
    let mut out = Vec::new();
    for k in crates {
        let Some(allowed) = rules.get(k.name.as_str()) else {
            out.push(format!(
                "{}: not in the architecture table (add its row to docs/ARCHITECTURE.md and xtask/src/arch.rs)",
                k.name
            ));
            continue;
        };
        for d in &k.deps {
            let internal = names.contains(d.as_str());
            if internal && !allowed.contains(&"*") && !allowed.contains(&d.as_str()) {
                out.push(format!("{} may not use {d}", k.name));
            }
            if internal && matches!(d.as_str(), "fringe-tests" | "xtask") {
                out.push(format!("{} may not use the test crate {d}", k.name));
            }
            if BINARY_ONLY.contains(&d.as_str()) && !MAY_USE_BINARY_ONLY.contains(&k.name.as_str())
            {
                out.push(format!(
                    "{} may not use {d} (only the fringe binary knows the command line, the terminal and exit codes)",
                    k.name
                ));
            }
        }
    }
    out
}

/// The source of a file without its test module and comments.
fn code_of(text: &str) -> String {
    let mut out = String::new();
    for line in text.lines() {
        let t = line.trim_start();
        if t.starts_with("#[cfg(test)]") {
            break;
        }
        if t.starts_with("//") {
            continue;
        }
        // A trailing comment.
        let code = match line.find("//") {
            Some(i) if !line[..i].contains('"') => &line[..i],
            _ => line,
        };
        out.push_str(code);
        out.push('\n');
    }
    out
}

/// The top-level module a source file belongs to (`None` for the crate
/// root).
fn top_module(src: &Path, file: &Path) -> Option<String> {
    let rel = file.strip_prefix(src).ok()?;
    let first = rel.components().next()?.as_os_str().to_str()?.to_string();
    let name = first.strip_suffix(".rs").unwrap_or(&first).to_string();
    match name.as_str() {
        "lib" | "main" => None,
        // Binaries under src/bin are crates of their own.
        "bin" => None,
        _ => Some(name),
    }
}

/// The top-level modules a piece of code names through `crate::`.
fn named_modules(code: &str) -> BTreeSet<String> {
    let mut out = BTreeSet::new();
    let mut rest = code;
    while let Some(i) = rest.find("crate::") {
        // Not part of a longer word (`fringe_crate::`).
        let before = rest[..i].chars().last();
        rest = &rest[i + "crate::".len()..];
        if before.is_some_and(|c| c.is_alphanumeric() || c == '_') {
            continue;
        }
        if let Some(group) = rest.strip_prefix('{') {
            // `crate::{a, b::c, d::{e, f}}`: the top-level names of the group.
            let mut depth = 0usize;
            let mut item = String::new();
            for c in group.chars() {
                match c {
                    '{' => depth += 1,
                    '}' if depth == 0 => break,
                    '}' => depth -= 1,
                    ',' if depth == 0 => {
                        push_first(&mut out, &item);
                        item.clear();
                        continue;
                    }
                    _ => {}
                }
                if depth == 0 || c != '{' {
                    item.push(c);
                }
            }
            push_first(&mut out, &item);
        } else {
            push_first(&mut out, rest);
        }
    }
    out
}

fn push_first(out: &mut BTreeSet<String>, path: &str) {
    let name: String = path
        .trim_start()
        .chars()
        .take_while(|c| c.is_alphanumeric() || *c == '_')
        .collect();
    if !name.is_empty() && name != "self" {
        out.insert(name);
    }
}

fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    for e in entries.flatten() {
        let p = e.path();
        if p.is_dir() {
            rust_files(&p, out);
        } else if p.extension().is_some_and(|x| x == "rs") {
            out.push(p);
        }
    }
}

/// The module graph of one crate: module -> the modules it names.
pub fn module_graph(src: &Path) -> Result<BTreeMap<String, BTreeSet<String>>> {
    let mut files = Vec::new();
    rust_files(src, &mut files);
    let mut graph: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for f in files {
        let Some(module) = top_module(src, &f) else {
            continue;
        };
        let text = std::fs::read_to_string(&f).with_context(|| format!("{}", f.display()))?;
        let mut names = named_modules(&code_of(&text));
        // In a top-level module's own file, `super::x` is `crate::x`.
        if f.parent() == Some(src) {
            names.extend(named_modules(&code_of(&text).replace("super::", "crate::")));
        }
        names.remove(&module);
        graph.entry(module).or_default().extend(names);
    }
    // Names that are not modules (items of the root) are no edges.
    let modules: BTreeSet<String> = graph.keys().cloned().collect();
    for edges in graph.values_mut() {
        edges.retain(|m| modules.contains(m));
    }
    Ok(graph)
}

/// The import cycles of a module graph, each as its modules in order
/// (strongly connected components of more than one module).
pub fn cycles(graph: &BTreeMap<String, BTreeSet<String>>) -> Vec<Vec<String>> {
    // Tarjan's algorithm.
    struct State<'a> {
        graph: &'a BTreeMap<String, BTreeSet<String>>,
        index: BTreeMap<&'a str, usize>,
        low: BTreeMap<&'a str, usize>,
        stack: Vec<&'a str>,
        on_stack: BTreeSet<&'a str>,
        next: usize,
        out: Vec<Vec<String>>,
    }
    fn visit<'a>(s: &mut State<'a>, v: &'a str) {
        s.index.insert(v, s.next);
        s.low.insert(v, s.next);
        s.next += 1;
        s.stack.push(v);
        s.on_stack.insert(v);
        if let Some(edges) = s.graph.get(v) {
            for w in edges {
                let w = w.as_str();
                if !s.index.contains_key(w) {
                    visit(s, w);
                    let lw = s.low[w];
                    let lv = s.low.get_mut(v).expect("visited");
                    *lv = (*lv).min(lw);
                } else if s.on_stack.contains(w) {
                    let iw = s.index[w];
                    let lv = s.low.get_mut(v).expect("visited");
                    *lv = (*lv).min(iw);
                }
            }
        }
        if s.low[v] == s.index[v] {
            let mut comp = Vec::new();
            while let Some(w) = s.stack.pop() {
                s.on_stack.remove(w);
                comp.push(w.to_string());
                if w == v {
                    break;
                }
            }
            if comp.len() > 1 {
                comp.sort();
                s.out.push(comp);
            }
        }
    }
    let mut s = State {
        graph,
        index: BTreeMap::new(),
        low: BTreeMap::new(),
        stack: Vec::new(),
        on_stack: BTreeSet::new(),
        next: 0,
        out: Vec::new(),
    };
    for v in graph.keys() {
        if !s.index.contains_key(v.as_str()) {
            visit(&mut s, v);
        }
    }
    s.out
}

/// Printing in a quiet crate's source, one line per place.
pub fn printing(name: &str, src: &Path) -> Result<Vec<String>> {
    const PRINTS: &[&str] = &[
        "println!",
        "eprintln!",
        "print!",
        "eprint!",
        "dbg!",
        "io::stdout",
        "io::stderr",
    ];
    let mut files = Vec::new();
    rust_files(src, &mut files);
    files.sort();
    let mut out = Vec::new();
    for f in files {
        let text = std::fs::read_to_string(&f).with_context(|| format!("{}", f.display()))?;
        for (n, line) in code_of(&text).lines().enumerate() {
            if let Some(p) = PRINTS.iter().find(|p| {
                line.match_indices(**p).any(|(i, _)| {
                    !line[..i]
                        .chars()
                        .last()
                        .is_some_and(|c| c.is_alphanumeric() || c == '_')
                })
            }) {
                out.push(format!(
                    "{name}: {}:{}: {p} (a library prints nothing; hand the text to the caller)",
                    f.display(),
                    n + 1
                ));
            }
        }
    }
    Ok(out)
}

/// Runs the whole check; an error lists every breach.
pub fn check(root: &Path) -> Result<()> {
    let crates = workspace_crates(root)?;
    let mut breaches = crate_breaches(&crates);
    for k in &crates {
        let graph = module_graph(&k.src)?;
        for c in cycles(&graph) {
            breaches.push(format!(
                "{}: import cycle between modules {}",
                k.name,
                c.join(" <-> ")
            ));
        }
        if QUIET.contains(&k.name.as_str()) {
            breaches.extend(printing(&k.name, &k.src)?);
        }
    }
    if !breaches.is_empty() {
        bail!(
            "architecture check (docs/ARCHITECTURE.md): {} breaches\n  {}",
            breaches.len(),
            breaches.join("\n  ")
        );
    }
    println!(
        "xtask: architecture check: {} crates, their dependencies and module graphs as docs/ARCHITECTURE.md says",
        crates.len()
    );
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn krate(name: &str, deps: &[&str]) -> Krate {
        Krate {
            name: name.into(),
            deps: deps.iter().map(|d| d.to_string()).collect(),
            src: PathBuf::new(),
        }
    }

    #[test]
    fn a_forbidden_dependency_is_a_breach() {
        let ok = [
            krate("fringe-store", &["fringe-protocol", "serde"]),
            krate("fringe-protocol", &[]),
        ];
        assert!(crate_breaches(&ok).is_empty());
        // The store may not know its SQLite back end, a library not clap,
        // the device side no host crate.
        let bad = [
            krate("fringe-store", &["fringe-sqlite"]),
            krate("fringe-sqlite", &[]),
            krate("fringe-line", &["clap"]),
            krate("fringe-firmware", &["fringe-link"]),
            krate("fringe-link", &[]),
            krate("fringe-new", &[]),
        ];
        let b = crate_breaches(&bad);
        assert_eq!(b.len(), 4, "{b:#?}");
        assert!(b[0].contains("fringe-store may not use fringe-sqlite"));
        assert!(b[1].contains("fringe-line may not use clap"));
        assert!(b[2].contains("fringe-firmware may not use fringe-link"));
        assert!(b[3].contains("fringe-new: not in the architecture table"));
    }

    #[test]
    fn the_table_in_architecture_md_is_the_table_checked() {
        let doc = std::fs::read_to_string(
            Path::new(env!("CARGO_MANIFEST_DIR")).join("../docs/ARCHITECTURE.md"),
        )
        .expect("docs/ARCHITECTURE.md");
        let mut rows = 0;
        for line in doc.lines().filter(|l| l.starts_with("| `fringe-")) {
            let cells: Vec<&str> = line.split('|').map(str::trim).collect();
            let may_use = cells[3];
            if may_use.starts_with("every") || may_use.starts_with("anything") {
                continue;
            }
            let mut want: Vec<String> = may_use
                .split(',')
                .map(str::trim)
                .filter(|s| !s.is_empty() && *s != "—")
                .map(|s| format!("fringe-{s}"))
                .collect();
            want.sort();
            let name = cells[1].trim_matches('`');
            let (_, got) = RULES
                .iter()
                .find(|(n, _)| *n == name)
                .unwrap_or_else(|| panic!("{name} is in ARCHITECTURE.md but not in RULES"));
            let mut got: Vec<String> = got.iter().map(|s| s.to_string()).collect();
            got.sort();
            assert_eq!(got, want, "{name}: RULES and ARCHITECTURE.md differ");
            rows += 1;
        }
        assert!(rows >= 14, "only {rows} rows read from the table");
    }

    #[test]
    fn module_names_are_read_from_paths_and_groups() {
        let code = "use crate::{a, b::c, d::{e, f}};\nlet x = crate::g::h();\nuse fringe_crate::z;\nuse crate::self_test;";
        let got: Vec<String> = named_modules(code).into_iter().collect();
        assert_eq!(got, ["a", "b", "d", "g", "self_test"]);
        assert_eq!(
            code_of("use crate::a; // crate::b\n// crate::c\n#[cfg(test)]\nuse crate::d;"),
            "use crate::a; \n"
        );
    }

    #[test]
    fn a_cycle_through_three_modules_is_found_and_a_chain_is_not() {
        let g = |edges: &[(&str, &str)]| {
            let mut m: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
            for (a, b) in edges {
                m.entry(a.to_string()).or_default().insert(b.to_string());
                m.entry(b.to_string()).or_default();
            }
            m
        };
        assert!(cycles(&g(&[("cli", "cmd"), ("cmd", "link"), ("demo", "cli")])).is_empty());
        let c = cycles(&g(&[
            ("cli", "cmd"),
            ("cmd", "device_cal"),
            ("device_cal", "cli"),
            ("demo", "cli"),
        ]));
        assert_eq!(c, vec![vec!["cli", "cmd", "device_cal"]]);
    }

    #[test]
    fn printing_in_a_library_is_found_outside_tests_only() {
        let dir = std::env::temp_dir().join(format!("fringe-arch-{}", std::process::id()));
        std::fs::create_dir_all(&dir).expect("temp dir");
        std::fs::write(
            dir.join("lib.rs"),
            "fn a() { println!(\"x\"); }\nfn b() { my_println!(); }\n// eprintln!\n#[cfg(test)]\nmod t { fn c() { eprintln!(); } }\n",
        )
        .expect("write");
        let got = printing("fringe-x", &dir).expect("scan");
        std::fs::remove_dir_all(&dir).ok();
        assert_eq!(got.len(), 1, "{got:#?}");
        assert!(got[0].contains("lib.rs:1: println!"));
    }
}
