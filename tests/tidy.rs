//! Repository hygiene checks: every Rust file opens with a `//!` line saying what it is for,
//! and the pure core stays free of async, Kafka, HTTP and serde (an architecture invariant in
//! docs/architecture.md).

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

#[test]
fn the_core_is_pure() {
    // The statistics, state and decision core: synchronous, no I/O frameworks, no wire types.
    let core = [
        "src/event.rs",
        "src/experiment.rs",
        "src/state",
        "src/stats",
        "src/summary.rs",
        "src/history.rs",
    ];
    let forbidden = [
        "tokio",
        "axum",
        "rdkafka",
        "serde",
        "hyper",
        "reqwest",
        "prometheus",
        "tracing",
    ];
    let mut files = Vec::new();
    for c in core {
        let p = root().join(c);
        if p.is_dir() {
            rust_files(&p, &mut files);
        } else {
            files.push(p);
        }
    }
    for f in files {
        let text = std::fs::read_to_string(&f).unwrap();
        for line in text.lines() {
            let code = line.split("//").next().unwrap();
            for word in forbidden {
                let hit =
                    code.contains(&format!("{word}::")) || code.contains(&format!("use {word}"));
                assert!(!hit, "{} uses {word}: {line}", f.display());
            }
        }
    }
}
