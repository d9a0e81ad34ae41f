//! The binary's module tree against what DEVELOPERS.md says of it: every source file is in the documented
//! tree, every documented file exists, and no module imports one of a layer above its own, so the layering
//! cannot drift as sinks, HTTP endpoints and commands are added.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

use crate::util::repo_root;

/// The layers of `daemon/glint/src`, lowest first, as DEVELOPERS.md lists them: a module may use its own
/// layer and those before it. Top-level files other than `cli.rs` and `main.rs` are the plumbing.
const LAYERS: [&str; 10] = [
    "plumbing", "client", "desk", "sinks", "coincide", "http", "serve", "tune", "commands", "cli",
];

fn src() -> PathBuf {
    repo_root().join("daemon/glint/src")
}

/// Every `.rs` file under `dir`, relative to `src()`.
fn sources(dir: &Path, out: &mut BTreeSet<String>) {
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            sources(&p, out);
        } else if p.extension().is_some_and(|x| x == "rs") {
            let rel = p.strip_prefix(src()).unwrap().to_string_lossy().into_owned();
            out.insert(rel);
        }
    }
}

/// The layer of a file (by its path) or of a top-level module (by its name).
fn layer_of(first: &str) -> usize {
    let name = first.trim_end_matches(".rs");
    match name {
        "main" | "cli" => LAYERS.len() - 1,
        _ => LAYERS.iter().position(|l| *l == name).unwrap_or(0),
    }
}

#[test]
fn no_module_imports_a_layer_above_its_own() {
    let mut files = BTreeSet::new();
    sources(&src(), &mut files);
    assert!(files.len() > 20, "found only {files:?}");
    let mut upward = Vec::new();
    for f in &files {
        let text = std::fs::read_to_string(src().join(f)).unwrap();
        let own = layer_of(f.split('/').next().unwrap());
        for (i, _) in text.match_indices("crate::") {
            let rest = &text[i + "crate::".len()..];
            let module: String = rest
                .chars()
                .take_while(|c| c.is_ascii_alphanumeric() || *c == '_')
                .collect();
            if module.is_empty() {
                continue;
            }
            let theirs = layer_of(&module);
            if theirs > own {
                upward.push(format!(
                    "{f} ({}) uses crate::{module} ({})",
                    LAYERS[own], LAYERS[theirs]
                ));
            }
        }
    }
    assert!(upward.is_empty(), "imports upwards:\n{}", upward.join("\n"));
}

#[test]
fn the_documented_module_tree_matches_the_code() {
    let guide = std::fs::read_to_string(repo_root().join("DEVELOPERS.md")).unwrap();
    let start = guide
        .find("## Where things live in the binary")
        .expect("the section exists");
    let block_start = start + guide[start..].find("```\n").unwrap() + 4;
    let block_len = guide[block_start..].find("```").unwrap();
    let block = &guide[block_start..block_start + block_len];

    // Each line: an optional folder ("serve/"), then file names up to the description.
    let mut documented = BTreeSet::new();
    let mut folder = String::new();
    for line in block.lines() {
        let words: Vec<&str> = line.split_whitespace().collect();
        let Some(first) = words.first() else { continue };
        if first.ends_with('/') {
            folder = (*first).to_string();
        } else if !line.starts_with(' ') {
            folder.clear();
        }
        for w in &words {
            if w.ends_with(".rs") {
                documented.insert(format!("{folder}{w}"));
            }
        }
    }
    let mut files = BTreeSet::new();
    sources(&src(), &mut files);
    let commands: BTreeSet<String> = files
        .iter()
        .filter(|f| f.starts_with("commands/"))
        .cloned()
        .collect();
    let others: BTreeSet<String> = files.difference(&commands).cloned().collect();
    let missing: Vec<_> = others.difference(&documented).collect();
    let stale: Vec<_> = documented.difference(&others).collect();
    assert!(missing.is_empty(), "files the guide does not list: {missing:?}");
    assert!(
        stale.is_empty(),
        "files the guide lists that do not exist: {stale:?}"
    );
    // The commands folder is "one file per subcommand": each file there is a subcommand or the module root.
    let cli = std::fs::read_to_string(src().join("cli.rs")).unwrap();
    for c in &commands {
        let name = c.trim_start_matches("commands/").trim_end_matches(".rs");
        if name == "mod" {
            continue;
        }
        assert!(
            cli.contains(&format!("commands::{name}::")),
            "{c} is not a subcommand in cli.rs"
        );
    }
}
