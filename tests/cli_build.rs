//! `ingot build` end to end: failures leave the output folder untouched.

use std::collections::BTreeMap;
use std::path::Path;
use std::process::Command;

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

fn ingot(args: &[&std::ffi::OsStr]) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_ingot"))
        .args(args)
        .output()
        .unwrap()
}

#[test]
fn failing_build_leaves_existing_out_dir_byte_identical() {
    let t = tempfile::tempdir().unwrap();
    let out = t.path().join("out");
    let files = vec![
        ("model.rs".to_string(), b"// old module\n".to_vec()),
        ("model.weights.bin".to_string(), vec![9; 10]),
    ];
    ingot_compiler::codegen::output::write_all(&out, &files, false).unwrap();
    let before = snapshot(&out);
    let bad = t.path().join("bad.graph.json");
    std::fs::write(&bad, b"{ \"format\": \"not a graph\" }").unwrap();
    let ranges = t.path().join("r.json");
    std::fs::write(&ranges, b"{}").unwrap();
    let o = ingot(&[
        "build".as_ref(),
        bad.as_os_str(),
        "--ranges".as_ref(),
        ranges.as_os_str(),
        "--out".as_ref(),
        out.as_os_str(),
    ]);
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("bad.graph.json"), "{err}");
    assert_eq!(snapshot(&out), before);
    let siblings = std::fs::read_dir(t.path()).unwrap().count();
    assert_eq!(siblings, 3, "temporary files left behind");
}

#[test]
fn build_needs_ranges_or_images() {
    let t = tempfile::tempdir().unwrap();
    let g = t.path().join("g.json");
    let o = ingot(&[
        "build".as_ref(),
        g.as_os_str(),
        "--out".as_ref(),
        t.path().join("o").as_os_str(),
    ]);
    assert!(!o.status.success());
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("--images") || err.contains("--ranges"),
        "{err}"
    );
    assert!(!t.path().join("o").exists());
}
