//! Row streaming on the demo, end to end: `ingot check` on the emulated
//! Cortex-M4 (QEMU `mps2-an386`) with the fused plan (the default) and
//! with `--no-stream`; both modules equal the integer simulator bit for
//! bit, and the fused one needs less scratch RAM.

use ingot_compiler::check::{emulation_or_skip, RunOn};
use ingot_testkit::ingot;
use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Images `0000`–`0002` of each class of the demo's evaluation set.
fn few_images(dir: &Path) {
    for class in ["ok", "pit", "scratch", "stain"] {
        let to = dir.join(class);
        std::fs::create_dir_all(&to).unwrap();
        for k in 0..3 {
            let name = format!("{k:04}.png");
            let from = root()
                .join("examples/demo/data/eval")
                .join(class)
                .join(&name);
            std::fs::copy(from, to.join(&name)).unwrap();
        }
    }
}

/// `(scratch RAM bytes, report JSON)` of one check.
fn check(dir: &Path, extra: &[&str]) -> (u64, serde_json::Value) {
    let report = dir.join(format!("report{}", extra.len()));
    let out = ingot!()
        .current_dir(root())
        .args([
            "check",
            "examples/demo/model/brackets.graph.json",
            "--ranges",
            "examples/demo/model/brackets.ranges.json",
            "--target",
            "targets/stm32l4r9ai.toml",
            "--good",
            "ok",
            "--on",
            "m4",
            "--images",
        ])
        .arg(dir.join("images"))
        .arg("--report")
        .arg(&report)
        .args(extra)
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&out.stdout).into_owned();
    assert!(
        text.contains("bit-identical:  yes"),
        "{text}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let scratch = text
        .lines()
        .find_map(|l| l.trim().strip_prefix("scratch RAM:"))
        .and_then(|l| l.split_whitespace().next())
        .and_then(|n| n.parse().ok())
        .expect("a scratch RAM line");
    let json = std::fs::read_to_string(report.join("report.json")).unwrap();
    (scratch, serde_json::from_str(&json).unwrap())
}

#[test]
fn fused_and_unfused_demo_are_bit_identical_on_emulated_m4() {
    if !emulation_or_skip(RunOn::M4) {
        return;
    }
    let tmp = tempfile::tempdir().unwrap();
    few_images(&tmp.path().join("images"));
    let (fused, jf) = check(tmp.path(), &[]);
    let (whole, jw) = check(tmp.path(), &["--no-stream"]);
    // Scratch = arena + patch (8,160 B with the word form): the plan's
    // figures (`ingot plan`, docs/memory-plan.md).
    assert_eq!(fused, 56_832 + 8_160);
    assert_eq!(whole, 73_728 + 8_160);
    for j in [&jf, &jw] {
        assert!(j["bit_exact"]["mismatched_images"]
            .as_array()
            .unwrap()
            .is_empty());
    }
    // The same outputs either way: the fused form computes the same rows.
    assert_eq!(jf["accuracy"], jw["accuracy"]);
}
