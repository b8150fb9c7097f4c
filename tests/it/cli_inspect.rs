//! End-to-end tests of `ingot inspect`: the built binary on graphs written
//! to disk.
//!
//! The snapshot test compares with `tests/out/plain_stack.inspect.txt`; run
//! with `INGOT_BLESS=1` to regenerate the input graph (from the zoo, seed 1)
//! and the expected output after an intended change.

use ingot_testkit::cli::bless;
use ingot_testkit::ingot;
use ingot_testkit::zoo;
use std::path::Path;

/// The value on the totals line that starts with `key`.
fn total<'a>(text: &'a str, key: &str) -> &'a str {
    let line = text
        .lines()
        .find(|l| l.starts_with(key))
        .unwrap_or_else(|| panic!("no `{key}` line"));
    line[key.len()..].split_whitespace().next().unwrap()
}

#[test]
fn inspect_prints_counts_of_a_written_graph() {
    let dir = tempfile::tempdir().unwrap();
    let net = zoo::residual(&zoo::ResidualConfig::default(), 3);
    let path = net.write(dir.path(), "res").unwrap();
    let out = ingot!().arg("inspect").arg(&path).output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = String::from_utf8(out.stdout).unwrap();
    // By hand: convolutions 16*3*9 + 2*16*16*9 + 32*16*9 + 32*32*9 + 32*16
    // = 19,376 weights (no biases); 6 batch norms of 16,16,16,32,32,32
    // channels, scale + shift: 2 * 144 = 288; fc 10*32 + 10 = 330.
    assert_eq!(total(&text, "parameters"), "19,994", "{text}");
    assert!(text.contains("block2.add"), "{text}");
    // Running statistics: as many as batch-norm scale and shift.
    assert_eq!(total(&text, "buffers"), "288", "{text}");

    let out = ingot!()
        .arg("inspect")
        .arg("--json")
        .arg(&path)
        .output()
        .unwrap();
    assert!(out.status.success());
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["totals"]["params"], 19_994);
    assert_eq!(v["totals"]["buffers"], 288);
    assert_eq!(v["layers"][0]["name"], "stem.conv");
    assert_eq!(v["layers"][0]["macs"], 32 * 32 * 16 * 27);
    assert_eq!(v["output"]["c"], 10);
}

#[test]
fn inspect_reports_load_errors_and_exits_1() {
    let dir = tempfile::tempdir().unwrap();
    let mut net = zoo::plain_stack(&zoo::PlainStackConfig::default(), 1);
    net.file.layers[1].op = "swish".into();
    let path = net.write(dir.path(), "bad").unwrap();
    let out = ingot!().arg("inspect").arg(&path).output().unwrap();
    assert_eq!(out.status.code(), Some(1));
    let err = String::from_utf8(out.stderr).unwrap();
    assert!(
        err.contains("bad.graph.json")
            && err.contains("relu1")
            && err.contains("unknown op `swish`"),
        "{err}"
    );
    assert!(out.stdout.is_empty());
}

#[test]
fn inspect_snapshot_plain_stack() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let net = zoo::plain_stack(&zoo::PlainStackConfig::default(), 1);
    let in_dir = root.join("tests/in");
    let expected_path = root.join("tests/out/plain_stack.inspect.txt");
    if bless() {
        net.write(&in_dir, "plain_stack").unwrap();
    }
    // The committed input is what the zoo generates today (seed 1).
    let committed = std::fs::read(in_dir.join("plain_stack.safetensors")).unwrap();
    assert_eq!(
        committed,
        net.store.to_bytes(),
        "tests/in is stale: rerun with INGOT_BLESS=1"
    );
    let out = ingot!()
        .current_dir(root)
        .args(["inspect", "tests/in/plain_stack.graph.json"])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let got = String::from_utf8(out.stdout).unwrap();
    if bless() {
        std::fs::create_dir_all(expected_path.parent().unwrap()).unwrap();
        std::fs::write(&expected_path, &got).unwrap();
    }
    let want = std::fs::read_to_string(&expected_path).unwrap();
    assert_eq!(
        got,
        want,
        "output differs from {}; rerun with INGOT_BLESS=1 if intended",
        expected_path.display()
    );
}
