//! End-to-end tests of `ingot import`: the built binary on the committed
//! ONNX fixtures (written by `compiler/tests/fixtures/onnx/make_fixtures.py`
//! with the `onnx` package 1.23.2).

use ingot_testkit::ingot;
use std::path::{Path, PathBuf};

fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join(format!("compiler/tests/fixtures/onnx/{name}.onnx"))
}

#[test]
fn import_writes_a_graph_that_inspect_loads_and_prints_the_table() {
    let dir = tempfile::tempdir().unwrap();
    let out = ingot!()
        .arg("import")
        .arg(fixture("net_mobile"))
        .arg("--out")
        .arg(dir.path())
        .arg("--name")
        .arg("mobile")
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        text.contains("/stem/Pad  ") && text.contains("padding, merged into `/stem/Conv`"),
        "{text}"
    );
    assert!(text.contains("layer `/dw/Clip` (relu6)"), "{text}");
    assert!(
        text.contains("wrote mobile.graph.json and mobile.safetensors"),
        "{text}"
    );
    let graph = dir.path().join("mobile.graph.json");
    let out = ingot!().arg("inspect").arg(&graph).output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // Labels and preprocessing from the model's metadata_props.
    let g: serde_json::Value = serde_json::from_slice(&std::fs::read(&graph).unwrap()).unwrap();
    assert_eq!(g["labels"], serde_json::json!(["a", "b", "c"]));
    assert_eq!(g["input"]["mean"], serde_json::json!([0.5, 0.5, 0.5]));
    // Re-importing over its own files is fine.
    let again = ingot!()
        .args([
            "import",
            fixture("net_mobile").to_str().unwrap(),
            "--name",
            "mobile",
            "--out",
        ])
        .arg(dir.path())
        .output()
        .unwrap();
    assert!(again.status.success());
}

#[test]
fn import_never_overwrites_a_foreign_file_without_force() {
    let dir = tempfile::tempdir().unwrap();
    let mine = dir.path().join("net_dense.graph.json");
    std::fs::write(&mine, "my own notes").unwrap();
    let out = ingot!()
        .arg("import")
        .arg(fixture("net_dense"))
        .arg("--out")
        .arg(dir.path())
        .output()
        .unwrap();
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("was not written by ingot") && err.contains("--force"),
        "{err}"
    );
    assert_eq!(std::fs::read_to_string(&mine).unwrap(), "my own notes");
    assert!(!dir.path().join("net_dense.safetensors").exists());
    let out = ingot!()
        .arg("import")
        .arg(fixture("net_dense"))
        .arg("--out")
        .arg(dir.path())
        .arg("--force")
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_ne!(std::fs::read_to_string(&mine).unwrap(), "my own notes");
}

#[test]
fn a_bad_model_exits_non_zero_and_writes_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let bad = dir.path().join("bad.onnx");
    let bytes = std::fs::read(fixture("net_resnet")).unwrap();
    std::fs::write(&bad, &bytes[..bytes.len() / 3]).unwrap();
    let out_dir = dir.path().join("out");
    let out = ingot!()
        .arg("import")
        .arg(&bad)
        .arg("--out")
        .arg(&out_dir)
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(1));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("bad.onnx: not a readable ONNX model"), "{err}");
    assert!(!out_dir.exists());
}
