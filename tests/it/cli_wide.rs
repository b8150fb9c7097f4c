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
    // t1.conv at two bytes a value is live next to the first block, and
    // an int16 map gives up the ring the all-int8 plan streams it through.
    assert!(
        text.contains("arena with int16 maps: 98304 B; all int8: 56832 B"),
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

/// A few evaluation images per class of the demo, copied into `dir`.
fn eval_subset(dir: &std::path::Path, per_class: usize) -> std::path::PathBuf {
    let out = dir.join("eval");
    for class in ["ok", "pit", "scratch", "stain"] {
        let mut files: Vec<_> = std::fs::read_dir(demo("data/eval").join(class))
            .unwrap()
            .map(|e| e.unwrap().path())
            .collect();
        files.sort();
        std::fs::create_dir_all(out.join(class)).unwrap();
        for f in files.iter().take(per_class) {
            std::fs::copy(f, out.join(class).join(f.file_name().unwrap())).unwrap();
        }
    }
    out
}

/// `ingot check --wide`: the generated module (int16 calls) against the
/// integer simulator, bit for bit on the outputs and on every traced map,
/// with the int16 steps marked and the arena with and without them.
fn check_wide(wide: &str, extra: &[&str]) -> (serde_json::Value, String) {
    let tmp = tempfile::tempdir().unwrap();
    let images = eval_subset(tmp.path(), 3);
    let report = tmp.path().join("report");
    let o = ingot!()
        .arg("check")
        .arg(demo("model/brackets.graph.json"))
        .arg("--ranges")
        .arg(demo("model/brackets.ranges.json"))
        .arg("--images")
        .arg(&images)
        .args(["--wide", wide])
        .arg("--report")
        .arg(&report)
        .args(extra)
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&o.stdout).into_owned();
    assert!(o.status.success(), "{stdout}\n{}", stderr(&o));
    assert!(stdout.contains("bit-identical:  yes"), "{stdout}");
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report.join("report.json")).unwrap())
            .unwrap();
    assert_eq!(json["images"], 12);
    assert!(json["bit_exact"]["mismatched_images"]
        .as_array()
        .unwrap()
        .is_empty());
    // Every traced map agrees too (int16 maps as their byte pairs).
    assert!(json["first_differing_layer"].is_null(), "{json}");
    let md = std::fs::read_to_string(report.join("report.md")).unwrap();
    assert!(md.contains("## int16 maps (--wide)"), "{md}");
    let module = std::fs::read_dir(report.join("module"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.extension().is_some_and(|x| x == "rs"))
        .unwrap();
    let src = std::fs::read_to_string(module).unwrap();
    assert!(src.contains("ingot_rt::wide::checked::"), "no int16 call");
    (json, md)
}

#[test]
fn check_wide_module_matches_the_simulator_on_the_host() {
    let (json, md) = check_wide("t1.conv", &[]);
    assert_eq!(json["wide"]["maps"][0][0], "t1.conv");
    // The plan's figures for the same choice (see the test above).
    assert_eq!(json["wide"]["arena_bytes"], 98304);
    assert_eq!(json["wide"]["arena_bytes_int8"], 56832);
    let kinds: Vec<&str> = json["layers"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| l["kind"].as_str().unwrap())
        .collect();
    // t1.conv writes the int16 map, t1.pool reads it.
    assert_eq!(kinds.iter().filter(|k| k.ends_with("(int16)")).count(), 2);
    assert!(md.contains("(int16)"), "{md}");

    // A widened concatenation region: its members, the copies-free
    // concatenations and their readers all run the int16 kernels.
    let (json, _) = check_wide("b2.l0.conv", &[]);
    let maps = json["wide"]["maps"].as_array().unwrap();
    assert!(maps.len() > 1, "{maps:?}");
    assert!(maps.iter().all(|m| m[1] == "b2.l0.conv"), "{maps:?}");
}

#[test]
fn check_wide_module_matches_the_simulator_on_the_emulated_m4() {
    if !ingot_compiler::check::emulation_or_skip(ingot_compiler::check::RunOn::M4) {
        return;
    }
    for wide in ["t1.conv", "b2.l0.conv"] {
        let (json, _) = check_wide(wide, &["--on", "m4"]);
        assert!(json["instructions"]["per_inference_mean"].as_u64().unwrap() > 0);
        let kinds = json["instructions"]["per_kind"].to_string();
        assert!(kinds.contains("(int16)"), "{kinds}");
    }
}

/// `ingot build --wide`: the module calls the int16 kernels and the build
/// lists the int16 maps; `auto:N` needs images to rank on, so it is an
/// error with a ranges file, said as such.
#[test]
fn build_writes_int16_calls_and_auto_needs_images() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("out");
    let o = ingot!()
        .arg("build")
        .arg(demo("model/brackets.graph.json"))
        .arg("--ranges")
        .arg(demo("model/brackets.ranges.json"))
        .args(["--wide", "t1.conv", "--out"])
        .arg(&out)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    let text = String::from_utf8(o.stdout).unwrap();
    assert!(text.contains("int16 maps (--wide): 1 map(s)"), "{text}");
    let src = std::fs::read_to_string(out.join("model.rs")).unwrap();
    assert!(
        src.contains("ingot_rt::wide::checked::Conv2d"),
        "no int16 conv"
    );
    assert!(
        src.contains("ingot_rt::wide::checked::Pool"),
        "no int16 pool"
    );
    assert!(
        src.contains("ingot_rt::wide::TypedMap::i16"),
        "no int16 map"
    );

    let o = ingot!()
        .arg("build")
        .arg(demo("model/brackets.graph.json"))
        .arg("--ranges")
        .arg(demo("model/brackets.ranges.json"))
        .args(["--wide", "auto:2", "--out"])
        .arg(tmp.path().join("auto"))
        .output()
        .unwrap();
    assert!(!o.status.success());
    let e = stderr(&o);
    assert!(e.contains("auto:N") && e.contains("images"), "{e}");
}
