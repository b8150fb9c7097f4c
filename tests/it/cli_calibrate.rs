//! End-to-end tests of `ingot calibrate`: the built binary on a zoo graph
//! and PGM images written by the test (binary PGM, `P5`, written by hand).

use ingot_testkit::ingot;
use ingot_testkit::zoo;
use std::path::Path;

fn write_pgm(path: &Path, w: usize, h: usize, seed: u64) {
    let mut rng = zoo::Rng::new(seed);
    let mut bytes = format!("P5\n{w} {h}\n255\n").into_bytes();
    bytes.extend((0..w * h).map(|_| (rng.next_u64() >> 56) as u8));
    std::fs::write(path, bytes).unwrap();
}

fn setup(dir: &Path) -> std::path::PathBuf {
    let graph = zoo::plain_stack(&zoo::PlainStackConfig::default(), 2)
        .write(dir, "plain")
        .unwrap();
    for c in 0..2 {
        let d = dir.join(format!("images/class{c}"));
        std::fs::create_dir_all(&d).unwrap();
        for i in 0..10 {
            write_pgm(&d.join(format!("{i}.pgm")), 28, 28, (c * 100 + i) as u64);
        }
    }
    graph
}

/// `ingot calibrate GRAPH --images DIR --method METHOD --holdout 0.2 --json
/// -o OUT` on the test set of `setup`; must succeed. Returns the JSON it
/// printed.
fn calibrate_json(dir: &Path, graph: &Path, method: &str, out_file: &Path) -> serde_json::Value {
    let out = ingot!()
        .args(["calibrate"])
        .arg(graph)
        .arg("--images")
        .arg(dir.join("images"))
        .args(["--method", method, "--holdout", "0.2", "--json", "-o"])
        .arg(out_file)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

#[test]
fn calibrate_writes_ranges_and_prints_json() {
    let dir = tempfile::tempdir().unwrap();
    let graph = setup(dir.path());
    let out_file = dir.path().join("r.json");
    let v = calibrate_json(dir.path(), &graph, "kl", &out_file);
    assert_eq!(v["method"], "kl");
    assert_eq!(v["calibration"].as_array().unwrap().len(), 16);
    assert_eq!(v["evaluation"].as_array().unwrap().len(), 4);
    assert_eq!(v["evaluated_on"], "held-out");
    assert_eq!(v["output"]["images"], 4);
    assert_eq!(v["layers"].as_array().unwrap().len(), 9);
    let ranges: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&out_file).unwrap()).unwrap();
    // Per-channel ranges of the convolution and ReLU outputs make it v3.
    assert_eq!(ranges["format"], "ingot.ranges.v3");
    assert_eq!(ranges["images"], 16);
    assert_eq!(ranges["maps"]["relu1"]["min"], 0.0);
    let chans = ranges["channels"]["relu1"].as_array().unwrap();
    assert!(!chans.is_empty());
    for c in chans {
        // Observed after a ReLU: never negative.
        let (lo, hi) = (c[0].as_f64().unwrap(), c[1].as_f64().unwrap());
        assert!(lo >= 0.0 && lo <= hi, "{c}");
    }
}

#[test]
fn calibrate_prints_a_table_and_defaults_the_output_path() {
    let dir = tempfile::tempdir().unwrap();
    let graph = setup(dir.path());
    let out = ingot!()
        .arg("calibrate")
        .arg(&graph)
        .arg("--images")
        .arg(dir.path().join("images"))
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = String::from_utf8(out.stdout).unwrap();
    assert!(
        text.contains("method minmax") && text.contains("relu1") && text.contains("SQNR dB"),
        "{text}"
    );
    assert!(text.contains("int8 top-1 agrees"), "{text}");
    assert!(
        dir.path().join("plain_stack.ranges.json").exists(),
        "{text}"
    );
}

#[test]
fn calibrate_reports_bad_files_and_skips_them_on_request() {
    let dir = tempfile::tempdir().unwrap();
    let graph = setup(dir.path());
    std::fs::write(
        dir.path().join("images/class1/bad.pgm"),
        b"P5\n28 28\n255\nshort",
    )
    .unwrap();
    let run = |extra: &[&str]| {
        ingot!()
            .arg("calibrate")
            .arg(&graph)
            .arg("--images")
            .arg(dir.path().join("images"))
            .args(extra)
            .output()
            .unwrap()
    };
    let out = run(&[]);
    assert_eq!(out.status.code(), Some(1));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("bad.pgm"), "{err}");
    let out = run(&["--skip-bad", "--json"]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["skipped"].as_array().unwrap().len(), 1);
    assert_eq!(v["calibration"].as_array().unwrap().len(), 20);
    let out = run(&["--method", "entropy"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("unknown method `entropy`"));
}

#[test]
fn unknown_class_folder_is_named() {
    let dir = tempfile::tempdir().unwrap();
    let graph = setup(dir.path());
    std::fs::create_dir_all(dir.path().join("images/kitten")).unwrap();
    let out = ingot!()
        .arg("calibrate")
        .arg(&graph)
        .arg("--images")
        .arg(dir.path().join("images"))
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&out.stderr).contains("`kitten`"));
}

/// `--method auto` tries every candidate on the calibration images (the
/// held-out ones stay untouched), keeps the best top-1 agreement, and says
/// so in the ranges file and the JSON report.
#[test]
fn calibrate_auto_keeps_the_candidate_with_the_best_agreement() {
    let dir = tempfile::tempdir().unwrap();
    let graph = setup(dir.path());
    let out_file = dir.path().join("r.json");
    let v = calibrate_json(dir.path(), &graph, "auto", &out_file);
    let tried = v["auto"]["tried"].as_array().unwrap();
    let names: Vec<&str> = tried.iter().map(|t| t[0].as_str().unwrap()).collect();
    assert_eq!(
        names,
        [
            "minmax",
            "percentile:99.99",
            "percentile:99.95",
            "percentile:99.9",
            "mse",
            "kl"
        ]
    );
    assert_eq!(
        v["auto"]["images"], 16,
        "compared on the calibration images"
    );
    let best = tried
        .iter()
        .map(|t| t[1].as_f64().unwrap())
        .fold(f64::MIN, f64::max);
    let first_best = tried
        .iter()
        .find(|t| t[1].as_f64().unwrap() == best)
        .unwrap();
    assert_eq!(v["auto"]["chosen"], first_best[0]);
    let chosen = v["auto"]["chosen"].as_str().unwrap();
    assert_eq!(v["method"], format!("auto: {chosen}"));
    let ranges: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&out_file).unwrap()).unwrap();
    assert_eq!(ranges["method"], format!("auto: {chosen}"));
    // The evaluation in the report is still on the held-out images.
    assert_eq!(v["evaluated_on"], "held-out");
}

/// The held-out report gives the paired figures and, with `--good`,
/// escapes and overkill; an unknown good class is named with the graph's
/// labels.
#[test]
fn calibrate_holdout_reports_the_paired_comparison_and_escapes() {
    let dir = tempfile::tempdir().unwrap();
    let graph = setup(dir.path());
    let run = |good: &str| {
        ingot!()
            .arg("calibrate")
            .arg(&graph)
            .arg("--images")
            .arg(dir.path().join("images"))
            .args(["--holdout", "0.2", "--good", good, "-o"])
            .arg(dir.path().join("r.json"))
            .output()
            .unwrap()
    };
    let out = run("class0");
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(text.contains("accuracy on 4 labelled image(s)"), "{text}");
    assert!(
        text.contains("drop 95% interval") && text.contains("Newcombe 1998"),
        "{text}"
    );
    assert!(text.contains("in int8 only; exact McNemar p = "), "{text}");
    assert!(
        text.contains("labelled images would give a ±1 pp interval"),
        "{text}"
    );
    assert!(text.contains("escapes (good: class0): float "), "{text}");
    let bad = run("fine");
    let e = String::from_utf8_lossy(&bad.stderr);
    assert!(!bad.status.success());
    assert!(
        e.contains("good class `fine`") && e.contains("class0, class1"),
        "{e}"
    );
}

/// `--bias-correction --sensitivity --sensitivity-svg`: the shifts land in
/// a v2 ranges file that `build` reads, the JSON report carries the
/// sensitivity ranking (one row per step but the concatenations, the input
/// included) and the bias-correction section, and the chart is an SVG.
#[test]
fn calibrate_bias_correction_and_sensitivity() {
    let dir = tempfile::tempdir().unwrap();
    let graph = setup(dir.path());
    let out_file = dir.path().join("r.json");
    let svg = dir.path().join("sens.svg");
    let out = ingot!()
        .args(["calibrate"])
        .arg(&graph)
        .arg("--images")
        .arg(dir.path().join("images"))
        .args(["--bias-correction", "--json", "--sensitivity-svg"])
        .arg(&svg)
        .arg("-o")
        .arg(&out_file)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let rows = v["sensitivity"]["rows"].as_array().unwrap();
    // input, conv1, pool1, conv2, pool2, fc
    assert_eq!(rows.len(), 6);
    assert_eq!(rows[0]["rank"], 1);
    assert!(rows.iter().any(|r| r["name"] == "input"));
    let layers: Vec<&str> = v["bias_correction"]["layers"]
        .as_array()
        .unwrap()
        .iter()
        .map(|l| l["layer"].as_str().unwrap())
        .collect();
    assert_eq!(layers, ["conv1", "conv2", "fc"]);
    let ranges: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&out_file).unwrap()).unwrap();
    assert_eq!(ranges["format"], "ingot.ranges.v3");
    assert_eq!(ranges["bias_shifts"]["conv1"].as_array().unwrap().len(), 8);
    assert!(std::fs::read_to_string(&svg).unwrap().starts_with("<svg"));
    let built = ingot!()
        .args(["build"])
        .arg(&graph)
        .arg("--ranges")
        .arg(&out_file)
        .arg("--out")
        .arg(dir.path().join("module"))
        .output()
        .unwrap();
    assert!(
        built.status.success(),
        "{}",
        String::from_utf8_lossy(&built.stderr)
    );
}

/// `calibrate --equalize` on the zoo's depthwise-separable network with
/// ReLU (the paper's preparation of ReLU6 networks): the report lists the
/// three pairs with equal channel-range ratios after and the figures
/// without and with; the ranges file says `equalized` (format v2); and a
/// build from it lowers the equalized weights, the ones the calibration
/// observed.
#[test]
fn calibrate_equalize_is_reproduced_by_build() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = zoo::DepthwiseConfig {
        input: [1, 28, 28],
        classes: 2,
        ..zoo::DepthwiseConfig::default()
    };
    let graph = zoo::depthwise_separable(&cfg, 3)
        .write(dir.path(), "dws")
        .unwrap();
    let text = std::fs::read_to_string(&graph).unwrap();
    std::fs::write(&graph, text.replace("\"relu6\"", "\"relu\"")).unwrap();
    for c in 0..2 {
        let d = dir.path().join(format!("images/class{c}"));
        std::fs::create_dir_all(&d).unwrap();
        for i in 0..6 {
            write_pgm(&d.join(format!("{i}.pgm")), 28, 28, (c * 100 + i) as u64);
        }
    }
    let out_file = dir.path().join("r.json");
    let out = ingot!()
        .args(["calibrate"])
        .arg(&graph)
        .arg("--images")
        .arg(dir.path().join("images"))
        .args(["--equalize", "--json", "-o"])
        .arg(&out_file)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let pairs = v["equalization"]["pairs"].as_array().unwrap();
    assert_eq!(pairs.len(), 3, "{v}");
    for p in pairs {
        assert!(p["skipped"].is_null(), "{p}");
        let a = p["ratio_after"].as_array().unwrap();
        let (x, y) = (a[0].as_f64().unwrap(), a[1].as_f64().unwrap());
        assert!((x - y).abs() <= 1e-3 * x, "{p}");
    }
    assert!(v["equalization"]["before"]["top1_agreement"].is_number());
    assert!(v["equalization"]["after"]["logit_sqnr_db"].is_number());
    let ranges: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(&out_file).unwrap()).unwrap();
    assert_eq!(ranges["format"], "ingot.ranges.v3");
    assert_eq!(ranges["equalized"], true);

    use ingot_compiler::driver::{compile, BuildInputs, RangesSource};
    let built = compile(&BuildInputs::new(&graph, RangesSource::File(out_file))).unwrap();
    let mut want = ingot_compiler::load(&graph).unwrap();
    ingot_compiler::graph::equalize::equalize(&mut want);
    let loaded = ingot_compiler::load(&graph).unwrap();
    let pw = |g: &ingot_compiler::Graph| g.layer(g.find_layer("block1.pw").unwrap()).op.clone();
    assert_eq!(pw(&built.graph), pw(&want));
    assert_ne!(pw(&built.graph), pw(&loaded));
}
