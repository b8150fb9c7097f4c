//! `--wide` (int16 layers) through the command line on the demo:
//! `calibrate` reports the int16 maps and leaves the ranges file as
//! without it; `plan` prints the arena with and without them; a layer that
//! cannot be widened is refused by name.

use ingot_testkit::cli::{repo, stderr};
use ingot_testkit::ingot;

fn demo(p: &str) -> std::path::PathBuf {
    repo().join("examples/demo").join(p)
}

fn calibrate(out: &std::path::Path, wide: &[&str]) -> serde_json::Value {
    let o = ingot!()
        .arg("calibrate")
        .arg(demo("model/brackets.graph.json"))
        .arg("--images")
        .arg(demo("data/calibration"))
        .args([
            "--method",
            "minmax",
            "--holdout",
            "0.5",
            "--json",
            "--force",
            "-o",
        ])
        .arg(out)
        .args(wide)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    serde_json::from_slice(&o.stdout).unwrap()
}

#[test]
fn calibrate_reports_int16_maps_and_writes_the_same_ranges() {
    let dir = tempfile::tempdir().unwrap();
    let (a, b) = (dir.path().join("a.json"), dir.path().join("b.json"));
    let plain = calibrate(&a, &[]);
    let wide = calibrate(&b, &["--wide", "t1.conv"]);
    assert!(plain.get("wide").is_none());
    assert_eq!(wide["wide"][0]["map"], "t1.conv");
    assert_eq!(wide["wide"][0]["because"], "t1.conv");
    assert_eq!(wide["wide"][0]["extra_bytes"], 24 * 32 * 32);
    // The ranges file does not depend on --wide.
    assert_eq!(std::fs::read(&a).unwrap(), std::fs::read(&b).unwrap());
}

#[test]
fn plan_prints_the_arena_with_and_without_int16_maps() {
    let o = ingot!()
        .arg("plan")
        .arg(demo("model/brackets.graph.json"))
        .arg("--ranges")
        .arg(demo("model/brackets.ranges.json"))
        .args(["--wide", "t1.conv"])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    let text = String::from_utf8(o.stdout).unwrap();
    // t1.conv at two bytes a value is live next to the first block.
    assert!(
        text.contains("arena with int16 maps: 98304 B; all int8: 73728 B"),
        "{text}"
    );
    assert!(text.contains("t1.conv") && text.contains("named"), "{text}");

    let o = ingot!()
        .arg("plan")
        .arg(demo("model/brackets.graph.json"))
        .args(["--wide", "b1.l0.bn"])
        .output()
        .unwrap();
    assert!(!o.status.success());
    let e = stderr(&o);
    assert!(
        e.contains("--wide `b1.l0.bn`") && e.contains("no output map of its own"),
        "{e}"
    );
}
