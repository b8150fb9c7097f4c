//! End-to-end tests of `ingot plan`: the built binary on zoo graphs written
//! to disk, with the shipped target profiles.

use ingot_testkit::ingot;
use ingot_testkit::zoo;
use std::path::Path;

fn target(name: &str) -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("targets")
        .join(name)
}

/// dense_small needs a 288 KiB arena: it fits the 512 KiB AXI SRAM of the
/// STM32H743 and prints a picture, but not the 264 KiB of the RP2040, where
/// the command fails naming RAM and the excess.
#[test]
fn plan_prints_and_checks_the_budget() {
    let dir = tempfile::tempdir().unwrap();
    let path = zoo::dense_small(1).write(dir.path(), "dense").unwrap();
    let svg = dir.path().join("plan.svg");
    let out = ingot!()
        .args(["plan"])
        .arg(&path)
        .arg("--target")
        .arg(target("stm32h743zi.toml"))
        .arg("--svg")
        .arg(&svg)
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{}\n{text}",
        String::from_utf8_lossy(&out.stderr)
    );
    // Row streaming: the fused plan (figures of `bench_plan`), and the
    // bound with every map whole beside it.
    assert!(text.contains("arena            224256 B"), "{text}");
    assert!(text.contains("unfused          294912 B"), "{text}");
    assert!(text.contains("ratio 1.0000"), "{text}");
    assert!(text.contains("  fits"), "{text}");
    assert!(std::fs::read_to_string(&svg).unwrap().starts_with("<svg"));

    let out = ingot!()
        .args(["plan", "--json", "--no-stream"])
        .arg(&path)
        .arg("--target")
        .arg(target("rp2040.toml"))
        .output()
        .unwrap();
    assert!(!out.status.success());
    let json: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(json["arena_bytes"], 294912);
    assert_eq!(json["unfused_bound"], 294912);
    assert_eq!(json["pipelines"].as_array().map(Vec::len), Some(0));
    assert_eq!(json["budget"]["fits"], false);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("RAM over by"), "{err}");
}
