//! Writing generated files: all or nothing, never over foreign files.

use ingot_compiler::codegen::output::{manifest, write_all, OutputError, MANIFEST};
use std::collections::BTreeMap;
use std::path::Path;

fn snapshot(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap())
        .map(|e| {
            (
                e.file_name().to_string_lossy().into_owned(),
                std::fs::read(e.path()).unwrap(),
            )
        })
        .collect()
}

fn files(tag: &str) -> Vec<(String, Vec<u8>)> {
    vec![
        ("model.rs".into(), format!("// {tag}\n").into_bytes()),
        ("model.weights.bin".into(), vec![1, 2, 3]),
    ]
}

#[test]
fn writes_files_and_manifest_then_replaces_its_own() {
    let t = tempfile::tempdir().unwrap();
    let out = t.path().join("gen/out");
    write_all(&out, &files("one"), false).unwrap();
    assert_eq!(std::fs::read(out.join("model.rs")).unwrap(), b"// one\n");
    assert!(manifest(&out).contains("model.rs") && manifest(&out).contains("model.weights.bin"));
    write_all(&out, &files("two"), false).unwrap();
    assert_eq!(std::fs::read(out.join("model.rs")).unwrap(), b"// two\n");
    // No temporary folder is left next to the output.
    let left: Vec<_> = std::fs::read_dir(t.path().join("gen"))
        .unwrap()
        .map(|e| e.unwrap().file_name())
        .collect();
    assert_eq!(left.len(), 1, "{left:?}");
}

#[test]
fn refuses_foreign_file_and_changes_nothing() {
    let t = tempfile::tempdir().unwrap();
    let out = t.path().join("out");
    std::fs::create_dir(&out).unwrap();
    std::fs::write(out.join("model.rs"), b"hand written").unwrap();
    std::fs::write(out.join("notes.txt"), b"keep").unwrap();
    let before = snapshot(&out);
    let e = write_all(&out, &files("gen"), false).unwrap_err();
    assert!(matches!(e, OutputError::Foreign(_)));
    assert!(e.to_string().contains("--force"), "{e}");
    assert_eq!(snapshot(&out), before);
    write_all(&out, &files("gen"), true).unwrap();
    assert_eq!(std::fs::read(out.join("model.rs")).unwrap(), b"// gen\n");
    assert_eq!(std::fs::read(out.join("notes.txt")).unwrap(), b"keep");
    assert!(out.join(MANIFEST).exists());
}

#[test]
fn output_path_that_is_a_file_is_refused() {
    let t = tempfile::tempdir().unwrap();
    let out = t.path().join("out");
    std::fs::write(&out, b"x").unwrap();
    assert!(matches!(
        write_all(&out, &files("a"), true),
        Err(OutputError::NotDir(_))
    ));
    assert_eq!(std::fs::read(&out).unwrap(), b"x");
}
