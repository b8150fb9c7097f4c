//! The layering rule of `ingot-compiler`: a stage uses only the stages
//! before it (DEVELOPERS.md, "Layering").
//!
//! This reads every `crate::…` path in `compiler/src/<stage>/` and
//! `compiler/src/<stage>.rs` (code and unit tests; comments are skipped, so
//! a doc link may point forward) and fails on any path into a later stage.
//! Keeping a rule like this as a plain source-reading test is common
//! practice in large Rust workspaces ("tidy" checks); it needs no tool
//! beyond `cargo test`.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

/// The stages in the order they may use each other: each one may use
/// itself and those listed before it. `graph` (the IR types) comes before
/// `frontend`, which builds it. (Test networks live in the dev crate
/// `ingot-testkit`, outside the library.)
const ORDER: &[&str] = &[
    "util",
    "guard",
    "camera",
    "measure",
    "stats",
    "graph",
    "frontend",
    "inspect",
    "ranges",
    "reference",
    "calibrate",
    "lower",
    "agree",
    "plan",
    "codegen",
    "driver",
    "check",
];

/// Items `lib.rs` re-exports at the crate root, by the stage that defines
/// them (`crate::load` is `crate::frontend::load`).
const ROOT_ITEMS: &[(&str, &str)] = &[
    ("load", "frontend"),
    ("LoadError", "frontend"),
    ("Graph", "graph"),
    ("LayerId", "graph"),
    ("MapId", "graph"),
    ("Op", "graph"),
    ("Shape", "graph"),
    ("build", "driver"),
];

fn src() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("src")
}

fn rank(stage: &str) -> Option<usize> {
    ORDER.iter().position(|s| *s == stage)
}

fn rs_files(dir: &Path, out: &mut Vec<PathBuf>) {
    let mut entries: Vec<_> = std::fs::read_dir(dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.unwrap().path())
        .collect();
    entries.sort();
    for p in entries {
        if p.is_dir() {
            rs_files(&p, out);
        } else if p.extension().is_some_and(|x| x == "rs") {
            out.push(p);
        }
    }
}

/// The code of a line without its `//` comment (a `//` inside a string
/// literal would end the line early, which can only hide a path, and the
/// library has none).
fn code(line: &str) -> &str {
    match line.find("//") {
        Some(i) => &line[..i],
        None => line,
    }
}

fn ident(s: &str) -> &str {
    let end = s
        .find(|c: char| !(c.is_ascii_alphanumeric() || c == '_'))
        .unwrap_or(s.len());
    &s[..end]
}

/// The first segment after every `crate::` in `text`, including each
/// member of `crate::{a, b::c}`.
fn crate_paths(text: &str) -> Vec<(usize, String)> {
    let mut out = Vec::new();
    let lines: Vec<&str> = text.lines().map(code).collect();
    let joined = lines.join("\n");
    let mut at = 0;
    while let Some(i) = joined[at..].find("crate::") {
        let start = at + i;
        let before = joined[..start].chars().next_back();
        at = start + "crate::".len();
        // `ingot_crate::` or `$crate::` are not this crate's paths.
        if before.is_some_and(|c| c.is_ascii_alphanumeric() || c == '_' || c == '$') {
            continue;
        }
        let line = joined[..start].matches('\n').count() + 1;
        let rest = &joined[at..];
        if let Some(group) = rest.strip_prefix('{') {
            // Top-level members of the group, split at depth 0 commas.
            let mut depth = 0;
            let mut item = String::new();
            for ch in group.chars() {
                match ch {
                    '{' => depth += 1,
                    '}' if depth == 0 => break,
                    '}' => depth -= 1,
                    ',' if depth == 0 => {
                        out.push((line, ident(item.trim()).to_string()));
                        item.clear();
                        continue;
                    }
                    _ => {}
                }
                item.push(ch);
            }
            if !item.trim().is_empty() {
                out.push((line, ident(item.trim()).to_string()));
            }
        } else {
            out.push((line, ident(rest).to_string()));
        }
    }
    out
}

/// The stage a first path segment belongs to.
fn stage_of(segment: &str) -> Option<&'static str> {
    if let Some(r) = rank(segment) {
        return Some(ORDER[r]);
    }
    ROOT_ITEMS
        .iter()
        .find(|(item, _)| *item == segment)
        .map(|(_, stage)| *stage)
}

#[test]
fn parser_sees_single_grouped_and_nested_paths() {
    let text = "use crate::lower::QGraph;\n\
                use crate::{plan::{self, Plan}, graph};\n\
                // use crate::check::x;\n\
                let x = crate::codegen::f(); // crate::driver\n\
                macro_rules! m { () => { $crate::util::g() } }\n";
    let got: Vec<(usize, String)> = crate_paths(text);
    let want: Vec<(usize, String)> = vec![
        (1, "lower".into()),
        (2, "plan".into()),
        (2, "graph".into()),
        (4, "codegen".into()),
    ];
    assert_eq!(got, want);
}

#[test]
fn every_module_of_the_crate_has_a_place_in_the_order() {
    let mut unplaced = Vec::new();
    for e in std::fs::read_dir(src()).unwrap() {
        let p = e.unwrap().path();
        let name = p.file_stem().unwrap().to_string_lossy().to_string();
        if name == "lib" || name == "main" {
            continue;
        }
        if rank(&name).is_none() {
            unplaced.push(name);
        }
    }
    assert!(
        unplaced.is_empty(),
        "add these top-level modules to ORDER in {} (and to DEVELOPERS.md): {unplaced:?}",
        file!()
    );
}

#[test]
fn a_stage_uses_only_the_stages_before_it() {
    let mut back_edges = BTreeSet::new();
    let mut checked = 0;
    for (r, stage) in ORDER.iter().enumerate() {
        let mut files = Vec::new();
        let dir = src().join(stage);
        if dir.is_dir() {
            rs_files(&dir, &mut files);
        }
        let file = src().join(format!("{stage}.rs"));
        if file.is_file() {
            files.push(file);
        }
        for f in files {
            let text = std::fs::read_to_string(&f).unwrap();
            for (line, segment) in crate_paths(&text) {
                checked += 1;
                let Some(target) = stage_of(&segment) else {
                    back_edges.insert(format!(
                        "{}:{line}: `crate::{segment}` is not a stage in ORDER",
                        f.display()
                    ));
                    continue;
                };
                if rank(target).unwrap() > r {
                    back_edges.insert(format!(
                        "{}:{line}: stage `{stage}` uses the later stage `{target}`",
                        f.display()
                    ));
                }
            }
        }
    }
    // Guards against a parser that silently finds nothing.
    assert!(checked > 50, "only {checked} `crate::` paths found");
    assert!(
        back_edges.is_empty(),
        "a stage may use only the stages before it:\n{}",
        back_edges.into_iter().collect::<Vec<_>>().join("\n")
    );
}

/// Integration tests are one binary per crate (DEVELOPERS.md, "Tests"): a
/// test file placed beside `tests/it/main.rs` but not declared there would
/// never be compiled, and one placed directly in `tests/` would be a binary
/// of its own. Both fail here.
#[test]
fn every_integration_test_file_is_a_module_of_the_crates_one_binary() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("..");
    let mut problems = Vec::new();
    for krate in [".", "compiler", "runtime-nostd"] {
        let tests = root.join(krate).join("tests");
        for e in std::fs::read_dir(&tests).unwrap() {
            let p = e.unwrap().path();
            if p.extension().is_some_and(|x| x == "rs") {
                problems.push(format!(
                    "{} is a test binary of its own: move it to tests/it/",
                    p.display()
                ));
            }
        }
        let it = tests.join("it");
        let main = std::fs::read_to_string(it.join("main.rs")).unwrap();
        let declared: BTreeSet<String> = main
            .lines()
            .filter_map(|l| {
                l.trim()
                    .strip_prefix("mod ")?
                    .strip_suffix(';')
                    .map(str::to_string)
            })
            .collect();
        for e in std::fs::read_dir(&it).unwrap() {
            let p = e.unwrap().path();
            let name = if p.is_dir() {
                p.file_name().unwrap().to_string_lossy().into_owned()
            } else if p.extension().is_some_and(|x| x == "rs") {
                p.file_stem().unwrap().to_string_lossy().into_owned()
            } else {
                continue;
            };
            if name != "main" && !declared.contains(&name) {
                problems.push(format!(
                    "{} is not declared in {}",
                    p.display(),
                    it.join("main.rs").display()
                ));
            }
        }
    }
    assert!(problems.is_empty(), "{problems:#?}");
}
