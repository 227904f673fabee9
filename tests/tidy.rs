//! Repository hygiene checks: every Rust file opens with a `//!` line saying what it is for, and
//! the code keeps the layers of `src/layers.toml` — no `crate::` path names a higher layer (or a
//! peer kept apart), and each crate with one job is named only by the modules the table gives it.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

fn rust_files(dir: &Path, out: &mut Vec<PathBuf>) {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return;
    };
    for entry in entries.flatten() {
        let path = entry.path();
        let name = path.file_name().unwrap().to_string_lossy().to_string();
        if path.is_dir() {
            if name != "target" && !name.starts_with('.') {
                rust_files(&path, out);
            }
        } else if name.ends_with(".rs") {
            out.push(path);
        }
    }
}

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

#[test]
fn every_rust_file_starts_with_a_module_doc_line() {
    let mut files = Vec::new();
    for dir in ["src", "tests", "benches", "fuzz"] {
        rust_files(&root().join(dir), &mut files);
    }
    assert!(files.len() > 10, "found only {files:?}");
    let offenders: Vec<_> = files
        .iter()
        .filter(|f| {
            let text = std::fs::read_to_string(f).unwrap();
            !text.starts_with("//!")
        })
        .collect();
    assert!(
        offenders.is_empty(),
        "files without a leading //! line: {offenders:?}"
    );
}

// ---- the layer table ---------------------------------------------------------------------

#[derive(serde::Deserialize)]
struct Table {
    layer: Vec<Layer>,
    crates: std::collections::BTreeMap<String, Vec<String>>,
}

#[derive(serde::Deserialize)]
struct Layer {
    name: String,
    modules: Vec<String>,
    peers: Peers,
    #[serde(default)]
    except: Vec<(String, String)>,
}

#[derive(serde::Deserialize, PartialEq, Clone, Copy)]
#[serde(rename_all = "lowercase")]
enum Peers {
    Apart,
    Ordered,
    Free,
}

fn table() -> Table {
    let path = root().join("src/layers.toml");
    let text = std::fs::read_to_string(&path).unwrap();
    toml::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

impl Table {
    /// Layer index (0 = top) and place within the layer of top-level module `name`.
    fn place(&self, name: &str) -> Option<(usize, usize)> {
        self.layer
            .iter()
            .enumerate()
            .find_map(|(i, l)| l.modules.iter().position(|m| m == name).map(|p| (i, p)))
    }

    /// Why `from` (a module path such as `kafka::changelog`) may not name `to` (a path after
    /// `crate::`, such as `service::Service`), or `None` when it may.
    fn breach(&self, from: &str, to: &str) -> Option<String> {
        let top = |p: &str| p.split("::").next().unwrap_or_default().to_string();
        let (a, b) = (top(from), top(to));
        if a == b {
            return None;
        }
        let Some((la, pa)) = self.place(&a) else {
            return Some(format!("`{a}` is not in src/layers.toml"));
        };
        let Some((lb, pb)) = self.place(&b) else {
            return Some(format!("`{b}` is not in src/layers.toml"));
        };
        let layer = &self.layer[la];
        if lb < la {
            return Some(format!(
                "`{a}` ({}) names `{b}` of the higher layer {}",
                layer.name, self.layer[lb].name
            ));
        }
        if lb > la {
            return None;
        }
        match layer.peers {
            Peers::Free => None,
            Peers::Ordered if pb < pa => None,
            Peers::Ordered => Some(format!(
                "`{a}` names `{b}`, listed after it in layer {}",
                layer.name
            )),
            Peers::Apart => {
                let allowed = layer
                    .except
                    .iter()
                    .any(|(x, y)| *x == a && (to == y || to.starts_with(&format!("{y}::"))));
                (!allowed).then(|| {
                    format!(
                        "`{a}` names its peer `{b}`; layer {} keeps them apart",
                        layer.name
                    )
                })
            }
        }
    }

    /// Whether module path `module` may name crate `krate`.
    fn may_use(&self, module: &str, krate: &str) -> bool {
        self.crates.get(krate).is_none_or(|allowed| {
            allowed
                .iter()
                .any(|m| module == m || module.starts_with(&format!("{m}::")))
        })
    }
}

/// The module path of a file under src/ (`src/kafka/mod.rs` → `kafka`, `src/http/dashboard/page.rs`
/// → `http::dashboard::page`); `None` for lib.rs, which only declares the modules.
fn module_path(file: &Path) -> Option<String> {
    let rel = file.strip_prefix(root().join("src")).ok()?;
    let mut parts: Vec<String> = rel
        .iter()
        .map(|p| p.to_string_lossy().trim_end_matches(".rs").to_string())
        .collect();
    if parts.last().is_some_and(|l| l == "mod") {
        parts.pop();
    }
    if parts == ["lib"] {
        return None;
    }
    Some(parts.join("::"))
}

/// The code of `text` without comments (line comments, and block comments that open a line),
/// so that prose naming a module is not taken for an import.
fn code_of(text: &str) -> String {
    let mut out = String::new();
    let mut in_block = false;
    for line in text.lines() {
        let t = line.trim_start();
        if in_block {
            in_block = !t.contains("*/");
            continue;
        }
        if t.starts_with("/*") {
            in_block = !t.contains("*/");
            continue;
        }
        let code = match line.find("//") {
            // `"http://…"` inside a string is code, not a comment.
            Some(i) if line[..i].matches('"').count() % 2 == 0 => &line[..i],
            Some(_) | None => line,
        };
        out.push_str(code);
        out.push('\n');
    }
    out
}

fn is_ident(c: char) -> bool {
    c.is_ascii_alphanumeric() || c == '_'
}

/// Every path that `code` names under `crate::`, with `use crate::{a::B, c}` groups expanded
/// one level (`a::B`, `c`).
fn crate_paths(code: &str) -> Vec<String> {
    let mut out = Vec::new();
    let mut rest = code;
    while let Some(i) = rest.find("crate::") {
        let before = rest[..i].chars().next_back();
        rest = &rest[i + "crate::".len()..];
        if before.is_some_and(|c| is_ident(c) || c == ':') {
            continue; // `$crate::`, `other_crate::`
        }
        if let Some(group) = rest.strip_prefix('{') {
            let end = group.find('}').unwrap_or(group.len());
            for item in group[..end].split(',') {
                let item: String = item
                    .trim()
                    .chars()
                    .take_while(|c| is_ident(*c) || *c == ':')
                    .collect();
                if !item.is_empty() {
                    out.push(item);
                }
            }
            continue;
        }
        let path: String = rest
            .chars()
            .take_while(|c| is_ident(*c) || *c == ':')
            .collect();
        out.push(path.trim_end_matches(':').to_string());
    }
    out
}

/// Whether `code` names crate `krate` (`krate::…` or `use krate`), not as part of a longer name
/// or a path inside this crate.
fn names_crate(code: &str, krate: &str) -> bool {
    let mut from = 0;
    while let Some(i) = code[from..].find(krate) {
        let at = from + i;
        from = at + krate.len();
        let before = code[..at].chars().next_back();
        if before.is_some_and(|c| is_ident(c) || c == ':') {
            continue;
        }
        let after = &code[at + krate.len()..];
        if after.starts_with("::") {
            return true;
        }
        let line_start = code[..at].rfind('\n').map_or(0, |n| n + 1);
        if code[line_start..at].trim() == "use" && after.starts_with(|c: char| !is_ident(c)) {
            return true;
        }
    }
    false
}

/// Every breach of the table in the files under src/, one line each.
fn breaches(table: &Table) -> Vec<String> {
    let mut files = Vec::new();
    rust_files(&root().join("src"), &mut files);
    files.sort();
    let mut out = Vec::new();
    for file in files {
        let Some(module) = module_path(&file) else {
            continue;
        };
        let code = code_of(&std::fs::read_to_string(&file).unwrap());
        // Unit tests may use dev-dependencies (an HTTP client to call the server under test);
        // what they import from the crate is held to the layers like any other code.
        let production = code
            .split("#[cfg(test)]\nmod tests")
            .next()
            .unwrap_or_default();
        let shown = file.strip_prefix(root()).unwrap().display().to_string();
        for path in crate_paths(&code) {
            if let Some(why) = table.breach(&module, &path) {
                out.push(format!("{shown}: crate::{path}: {why}"));
            }
        }
        for krate in table.crates.keys() {
            if names_crate(production, krate) && !table.may_use(&module, krate) {
                out.push(format!(
                    "{shown}: names `{krate}`, which only {:?} may",
                    table.crates[krate]
                ));
            }
        }
    }
    out.sort();
    out.dedup();
    out
}

#[test]
fn the_code_keeps_the_layers() {
    let found = breaches(&table());
    assert!(
        found.is_empty(),
        "imports against src/layers.toml:\n{}",
        found.join("\n")
    );
}

#[test]
fn the_table_names_every_module_once() {
    let table = table();
    let mut listed = BTreeSet::new();
    for l in &table.layer {
        for m in &l.modules {
            assert!(listed.insert(m.clone()), "`{m}` is listed twice");
        }
    }
    let mut present = BTreeSet::new();
    for entry in std::fs::read_dir(root().join("src")).unwrap().flatten() {
        let name = entry.file_name().to_string_lossy().to_string();
        if entry.path().is_dir() {
            present.insert(name);
        } else if let Some(stem) = name.strip_suffix(".rs") {
            if stem != "lib" {
                present.insert(stem.to_string());
            }
        }
    }
    assert_eq!(
        listed, present,
        "src/layers.toml against the modules of src/"
    );
}

/// The checker itself, on planted text: it must see what the layers test relies on it to see.
#[test]
fn the_checker_sees_planted_breaches() {
    let table = table();
    let code = code_of(
        "use crate::{app::run, event::Event};\n\
         // crate::cli in a comment is prose\n\
         let url = \"http://x\"; let s = crate::service::Service::in_memory(c);\n\
         use tokio::task;\n",
    );
    assert_eq!(
        crate_paths(&code),
        ["app::run", "event::Event", "service::Service::in_memory"]
    );
    // Up a layer, across apart peers, the one allowed pair, down a layer, and ordered peers.
    assert!(table.breach("state", "app::run").is_some());
    assert!(table.breach("http", "kafka::start").is_some());
    assert!(table
        .breach("sinks", "kafka::client::producer_config")
        .is_none());
    assert!(table.breach("sinks", "kafka::changelog").is_some());
    assert!(table.breach("kafka", "service::Service").is_none());
    assert!(table.breach("state", "decide::evaluate").is_some());
    assert!(table
        .breach("decide", "state::ExperimentSnapshot")
        .is_none());
    // Crates: only the listed modules, whole words only.
    assert!(names_crate(&code, "tokio"));
    assert!(!names_crate("tokio_util::sync::CancellationToken", "tokio"));
    assert!(!names_crate("crate::x::tokio::y", "tokio"));
    assert!(!table.may_use("service", "tokio"));
    assert!(table.may_use("service::metrics", "prometheus"));
    assert!(!table.may_use("service::readings", "prometheus"));
    assert!(!table.may_use("http", "rdkafka"));
}
