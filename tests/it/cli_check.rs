//! `ingot check` from the command line.

use ingot_compiler::check::{emulation_or_skip, io, RunOn};
use ingot_testkit::ingot;
use std::path::Path;

fn standin() -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("compiler/tests/fixtures/standin")
}

fn inputs_file(dir: &Path) -> std::path::PathBuf {
    let p = dir.join("inputs.bin");
    let inputs: Vec<Vec<i8>> = (0..4)
        .map(|i| {
            (0..64)
                .map(|k| ((k * 7 + i * 13) % 256) as u8 as i8)
                .collect()
        })
        .collect();
    io::write_inputs(&p, 64, &inputs).unwrap();
    p
}

#[test]
fn check_module_on_m4_reports_and_fails_naming_the_flash_budget() {
    if !emulation_or_skip(RunOn::M4) {
        return;
    }
    let tmp = tempfile::tempdir().unwrap();
    let inputs = inputs_file(tmp.path());
    let report = tmp.path().join("report");
    let ok = ingot!()
        .args(["check", "--on", "m4", "--module"])
        .arg(standin())
        .arg("--inputs")
        .arg(&inputs)
        .arg("--report")
        .arg(&report)
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&ok.stdout);
    assert!(
        ok.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&ok.stderr)
    );
    assert!(stdout.contains("**Result: pass.**"), "{stdout}");
    assert!(
        stdout.contains("Executed instructions per inference"),
        "{stdout}"
    );
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report.join("report.json")).unwrap())
            .unwrap();
    assert!(json["instructions"]["per_inference_mean"].as_u64().unwrap() > 2496);

    let over = ingot!()
        .args(["check", "--on", "m4", "--flash-budget", "1000", "--module"])
        .arg(standin())
        .arg("--inputs")
        .arg(&inputs)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&over.stderr);
    assert!(!over.status.success());
    assert!(
        stderr.contains("check failed: flash") && stderr.contains("exceeds the budget of 1000 B"),
        "{stderr}"
    );
}

#[test]
fn check_rejects_unknown_cores_and_wrong_input_lengths() {
    let tmp = tempfile::tempdir().unwrap();
    let out = ingot!()
        .args(["check", "--on", "m5", "--module"])
        .arg(standin())
        .output()
        .unwrap();
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("unknown core `m5`"));

    let bad = tmp.path().join("bad.bin");
    io::write_inputs(&bad, 10, &[vec![0; 10]]).unwrap();
    let out = ingot!()
        .args(["check", "--module"])
        .arg(standin())
        .arg("--inputs")
        .arg(&bad)
        .output()
        .unwrap();
    assert!(!out.status.success());
    let e = String::from_utf8_lossy(&out.stderr);
    assert!(
        e.contains("inputs of 10 values; the module takes 64"),
        "{e}"
    );
}

fn digits() -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/optdigits")
}

fn check_digits(extra: &[&str], report: &Path) -> std::process::Output {
    let d = digits();
    ingot!()
        .arg("check")
        .arg(d.join("model/digits.graph.json"))
        .arg("--calib-images")
        .arg(d.join("calibration"))
        .arg("--images")
        .arg(d.join("heldout"))
        .arg("--report")
        .arg(report)
        .args(extra)
        .output()
        .unwrap()
}

/// The UCI optdigits held-out split (Alpaydin & Kaynak 1998, CC BY 4.0; see
/// `tests/data/optdigits/README.md`) through the whole pipeline on the host.
#[test]
fn check_digits_graph_on_host_is_bit_identical_and_accurate() {
    let tmp = tempfile::tempdir().unwrap();
    let report = tmp.path().join("report");
    let out = check_digits(&[], &report);
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(stdout.contains("bit-identical:  yes"), "{stdout}");
    assert!(stdout.contains("result:         pass"), "{stdout}");
    assert!(stdout.contains("lower bound"), "{stdout}");
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report.join("report.json")).unwrap())
            .unwrap();
    assert_eq!(json["images"], 360);
    assert!(json["bit_exact"]["mismatched_images"]
        .as_array()
        .unwrap()
        .is_empty());
    let float = json["accuracy"]["float_accuracy"].as_f64().unwrap();
    let drop = json["accuracy"]["drop_pp"].as_f64().unwrap();
    let agree = json["float"]["top1_agreement"].as_f64().unwrap();
    assert!(float >= 0.95, "{float}");
    assert!(drop <= 1.0, "{drop}");
    assert!(agree >= 0.98, "{agree}");
    let module = ingot_compiler::check::ModuleFiles::find(&report.join("module"), None).unwrap();
    assert!(
        module
            .extra
            .iter()
            .any(|p| p.to_string_lossy().ends_with(".weights.bin")),
        "{module:?}"
    );
    assert!(
        stdout.contains(&module.source.display().to_string()),
        "{stdout}"
    );
    assert!(report.join("confusion_int8.svg").is_file());
    assert!(report.join("sqnr.svg").is_file());
}

#[test]
fn check_digits_fails_naming_the_figure_over_threshold() {
    let tmp = tempfile::tempdir().unwrap();
    let out = check_digits(&["--min-agreement", "1.01"], &tmp.path().join("r"));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(stderr.contains("top-1 agreement"), "{stderr}");
    assert!(stderr.contains("--min-agreement 1.01"), "{stderr}");
}

#[test]
fn check_digits_on_m0plus_counts_instructions() {
    if !emulation_or_skip(RunOn::M0plus) {
        return;
    }
    let tmp = tempfile::tempdir().unwrap();
    let report = tmp.path().join("report");
    let out = check_digits(&["--on", "m0plus"], &report);
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(stdout.contains("bit-identical:  yes"), "{stdout}");
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report.join("report.json")).unwrap())
            .unwrap();
    let per = json["instructions"]["per_inference_mean"].as_u64().unwrap();
    let macs = json["instructions"]["macs"].as_u64().unwrap();
    assert!(macs > 0 && per > macs, "{per} instructions for {macs} MACs");
}

/// `ingot check` itself on the other emulated cores, on the UCI optdigits
/// held-out split (Alpaydin & Kaynak 1998): Cortex-M3, M7 and M33
/// (thumbv8m.main) give the host's outputs bit for bit and report
/// instruction counts and ELF sizes.
#[test]
fn check_digits_on_m3_m7_and_m33() {
    for (on, name) in [(RunOn::M3, "m3"), (RunOn::M7, "m7"), (RunOn::M33, "m33")] {
        if !emulation_or_skip(on) {
            continue;
        }
        let tmp = tempfile::tempdir().unwrap();
        let report = tmp.path().join("report");
        let out = check_digits(&["--on", name], &report);
        let stdout = String::from_utf8_lossy(&out.stdout);
        assert!(
            out.status.success(),
            "{name}: {stdout}\n{}",
            String::from_utf8_lossy(&out.stderr)
        );
        assert!(stdout.contains("bit-identical:  yes"), "{name}: {stdout}");
        let json: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(report.join("report.json")).unwrap())
                .unwrap();
        assert!(
            json["run_on"].as_str().unwrap().contains(name),
            "{name}: {}",
            json["run_on"]
        );
        assert!(json["instructions"]["per_inference_mean"].as_u64().unwrap() > 456_704);
        assert!(
            json["sizes"]["flash"].as_u64().unwrap() > 20_424,
            "weights alone"
        );
    }
}

/// The accuracy statistics on the UCI optdigits held-out split (Alpaydin &
/// Kaynak 1998), with digit 0 standing in for the "good part" class:
/// escapes lead, then the drop with its interval, the discordant pairs,
/// McNemar's p and the images needed; the same figures in JSON and
/// Markdown; `--max-drop-upper` fails when the interval reaches past it.
#[test]
fn check_digits_reports_intervals_escapes_and_gates_on_the_interval() {
    let tmp = tempfile::tempdir().unwrap();
    let report = tmp.path().join("report");
    let out = check_digits(&["--good", "0", "--max-drop", "0.5"], &report);
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let pos = |s: &str| {
        stdout
            .find(s)
            .unwrap_or_else(|| panic!("no `{s}` in\n{stdout}"))
    };
    assert!(pos("  escapes:        int8 ") < pos("  accuracy:       float"));
    assert!(pos("  overkill:       int8 ") < pos("  accuracy:       float"));
    assert!(pos("  escapes/class:  int8 1 ") > 0);
    assert!(pos("  drop 95% CI:    ") > pos("  accuracy:       float"));
    pos("(Newcombe 1998, method 10)");
    pos(" in int8 only; exact McNemar p = ");
    pos("  images needed:  about ");
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report.join("report.json")).unwrap())
            .unwrap();
    let p = &json["paired"];
    assert_eq!(p["images"], 360);
    let (b, c) = (
        p["float_only"].as_u64().unwrap(),
        p["int8_only"].as_u64().unwrap(),
    );
    let drop = json["accuracy"]["drop_pp"].as_f64().unwrap();
    assert!((p["drop_pp"].as_f64().unwrap() - drop).abs() < 1e-9);
    assert!((drop - 100.0 * (b as f64 - c as f64) / 360.0).abs() < 1e-9);
    let (lo, hi) = (
        p["drop_interval_pp"]["lo"].as_f64().unwrap(),
        p["drop_interval_pp"]["hi"].as_f64().unwrap(),
    );
    assert!(lo <= drop && drop <= hi && hi > lo, "{p}");
    let e = &json["escapes"];
    assert_eq!(e["good_classes"][0], "0");
    assert_eq!(e["int8"]["per_class"].as_array().unwrap().len(), 9);
    let md = std::fs::read_to_string(report.join("report.md")).unwrap();
    assert!(md.contains("## Escapes and overkill (good: 0)"), "{md}");
    assert!(md.contains("| exact McNemar test, two-sided p |"), "{md}");
    // The changed-images file exists exactly when some image changed.
    let changed = json["changed"].as_array().unwrap().len();
    assert!(
        changed as u64 >= b + c,
        "{changed} changed, {b} + {c} discordant"
    );
    assert_eq!(report.join("changed_images.csv").is_file(), changed > 0);

    let strict = check_digits(
        &["--max-drop-upper", &format!("{:.2}", hi - 0.1)],
        &tmp.path().join("r2"),
    );
    let stderr = String::from_utf8_lossy(&strict.stderr);
    assert!(!strict.status.success());
    assert!(stderr.contains("--max-drop-upper"), "{stderr}");
    let bad = check_digits(&["--good", "ten"], &tmp.path().join("r3"));
    let stderr = String::from_utf8_lossy(&bad.stderr);
    assert!(!bad.status.success());
    assert!(stderr.contains("good class `ten`"), "{stderr}");
}

/// `check --bias-correction --sensitivity` while calibrating on
/// `--calib-images`: the ranges note says the biases were corrected, the
/// corrected module differs from the plain one (its `MODEL_HASH` covers the
/// shifts), and the sensitivity ranking, measured on the checked images, is
/// a section of `report.md` and of `report.json`. With `--ranges` the flag
/// is refused (the file carries its own shifts).
#[test]
fn check_digits_with_bias_correction_and_sensitivity() {
    let tmp = tempfile::tempdir().unwrap();
    let plain = check_digits(&[], &tmp.path().join("plain"));
    assert!(plain.status.success());
    let report = tmp.path().join("report");
    let out = check_digits(&["--bias-correction", "--sensitivity"], &report);
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(stdout.contains("bias-corrected"), "{stdout}");
    assert!(stdout.contains("bit-identical:  yes"), "{stdout}");
    assert!(
        stdout.contains("sensitivity on 360 checked images"),
        "{stdout}"
    );
    let read = |d: &Path| -> serde_json::Value {
        serde_json::from_str(&std::fs::read_to_string(d.join("report.json")).unwrap()).unwrap()
    };
    let (json, plain_json) = (read(&report), read(&tmp.path().join("plain")));
    assert_ne!(json["model_hash"], plain_json["model_hash"]);
    assert!(plain_json.get("sensitivity").is_none());
    let s = &json["sensitivity"];
    assert_eq!(s["on"], "checked");
    assert_eq!(s["images"], 360);
    let rows = s["rows"].as_array().unwrap();
    assert!(rows.len() >= 3, "{s}");
    assert!(rows.iter().any(|r| r["name"] == "input"));
    for (k, r) in rows.iter().enumerate() {
        assert_eq!(r["rank"], k + 1);
    }
    let md = std::fs::read_to_string(report.join("report.md")).unwrap();
    assert!(md.contains("## Sensitivity"), "{md}");
    let first = rows[0]["name"].as_str().unwrap();
    assert!(md.contains(&format!("| 1 | {first} |")), "{md}");

    let refused = ingot!()
        .arg("check")
        .arg(digits().join("model/digits.graph.json"))
        .arg("--ranges")
        .arg(tmp.path().join("none.json"))
        .arg("--images")
        .arg(digits().join("heldout"))
        .arg("--bias-correction")
        .output()
        .unwrap();
    assert!(!refused.status.success());
    assert!(
        String::from_utf8_lossy(&refused.stderr).contains("--bias-correction"),
        "{}",
        String::from_utf8_lossy(&refused.stderr)
    );
}
