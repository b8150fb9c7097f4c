//! The README's main command, as written there, on the committed demo: the
//! figures it prints must stay within the bounds the README and the demo
//! scenario promise (float accuracy at least 95%, int8 drop at most 1.0
//! percentage point, module bit-identical to the integer simulator, fits the
//! Cortex-M4F profile), on the host and on the emulated Cortex-M4.

use ingot_compiler::check::{emulation_or_skip, RunOn};
use ingot_testkit::ingot;
use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// The arguments of the README's first `cargo run --release -- check`
/// command (continuation lines joined), with its `--report` folder
/// replaced by `report`.
fn readme_main_command(report: &Path) -> Vec<String> {
    let readme = std::fs::read_to_string(root().join("README.md")).unwrap();
    let start = readme
        .find("cargo run --release -- check ")
        .expect("README has no `cargo run --release -- check` command");
    let mut line = String::new();
    for l in readme[start..].lines() {
        let l = l.trim();
        match l.strip_suffix('\\') {
            Some(head) => line.push_str(head),
            None => {
                line.push_str(l);
                break;
            }
        }
        line.push(' ');
    }
    let words: Vec<String> = line.split_whitespace().map(String::from).collect();
    assert_eq!(&words[..4], ["cargo", "run", "--release", "--"], "{line}");
    let mut args: Vec<String> = words[4..].to_vec();
    let r = args
        .iter()
        .position(|w| w == "--report")
        .expect("the main command writes a report");
    args[r + 1] = report.display().to_string();
    args
}

fn run(args: &[String]) -> (std::process::Output, String) {
    let out = ingot!().current_dir(root()).args(args).output().unwrap();
    let text = format!(
        "{}\n{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    (out, text)
}

/// The bounds of the demo's figures (README, "Two commands").
fn assert_documented_bounds(report: &Path, text: &str) -> serde_json::Value {
    assert!(text.contains("bit-identical:  yes"), "{text}");
    assert!(text.contains("target:         fits STM32L4R9AI"), "{text}");
    assert!(text.contains("result:         pass"), "{text}");
    // The README's walkthrough explains these lines (`--good ok`).
    for line in [
        "  escapes:        int8 ",
        "  discordant:     ",
        "  images needed:  about ",
    ] {
        assert!(text.contains(line), "no `{line}` in {text}");
    }
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report.join("report.json")).unwrap())
            .unwrap();
    assert_eq!(json["images"], 400);
    assert!(json["bit_exact"]["mismatched_images"]
        .as_array()
        .unwrap()
        .is_empty());
    let float = json["accuracy"]["float_accuracy"].as_f64().unwrap();
    let drop = json["accuracy"]["drop_pp"].as_f64().unwrap();
    assert!(float >= 0.95, "float accuracy {float}");
    assert!(drop <= 1.0, "drop {drop} pp");
    assert!(report.join("module/brackets.rs").is_file());
    assert!(report.join("module/brackets.weights.bin").is_file());
    json
}

#[test]
fn readme_main_command_meets_the_documented_bounds_on_the_host() {
    let tmp = tempfile::tempdir().unwrap();
    let report = tmp.path().join("demo-report");
    let args = readme_main_command(&report);
    assert!(
        args.iter().any(|a| a == "targets/stm32l4r9ai.toml"),
        "the main command checks against the Cortex-M4F profile: {args:?}"
    );
    let (out, text) = run(&args);
    assert!(out.status.success(), "{text}");
    assert_documented_bounds(&report, &text);
}

/// The same command on the emulated Cortex-M4 (QEMU `mps2-an386`): the
/// module built for `thumbv7em-none-eabihf` gives the host's outputs, and
/// the real ELF fits the profile's flash and RAM less their reserves.
#[test]
fn readme_main_command_on_emulated_cortex_m4() {
    if !emulation_or_skip(RunOn::M4) {
        return;
    }
    let tmp = tempfile::tempdir().unwrap();
    let report = tmp.path().join("demo-report");
    let mut args = readme_main_command(&report);
    args.extend(["--on".into(), "m4".into()]);
    let (out, text) = run(&args);
    assert!(out.status.success(), "{text}");
    let json = assert_documented_bounds(&report, &text);
    let sizes = &json["sizes"];
    let (flash, ram) = (
        sizes["flash"].as_u64().unwrap(),
        sizes["ram"].as_u64().unwrap(),
    );
    // STM32L4R9AI profile: 2 MiB flash less 128 KiB reserve, 640 KiB RAM
    // less 32 KiB reserve (targets/stm32l4r9ai.toml).
    assert_eq!(sizes["budget"]["flash"], 2_097_152 - 131_072);
    assert_eq!(sizes["budget"]["ram"], 655_360 - 32_768);
    assert!(flash > 20_000 && flash < 2_097_152 - 131_072, "{flash}");
    assert!(ram > 20_000 && ram < 655_360 - 32_768, "{ram}");
    let instr = &json["instructions"];
    let per_mac = instr["per_mac"].as_f64().unwrap();
    assert!(
        per_mac > 0.3,
        "{per_mac} instructions per MAC is implausibly low"
    );
    let kinds = instr["per_kind"].as_array().unwrap();
    assert!(
        kinds.iter().any(|k| k["kind"] == "conv2d"),
        "per-kind table lacks conv2d: {kinds:?}"
    );
}

/// Ranges clipped at the 99.95th percentile (the demo's `auto` pick before
/// dense blocks were quantized per slice) lose 0.50 pp on the demo, so
/// `--max-drop 0` must fail and name the figure, as a build pipeline gating
/// on it would need.
#[test]
fn max_drop_zero_fails_on_the_demo_naming_the_drop() {
    let tmp = tempfile::tempdir().unwrap();
    let args: Vec<String> = [
        "check",
        "examples/demo/model/brackets.graph.json",
        "--calib-images",
        "examples/demo/data/calibration",
        "--method",
        "percentile:99.95",
        "--images",
        "examples/demo/data/eval",
        "--max-drop",
        "0",
        "--report",
    ]
    .iter()
    .map(|s| s.to_string())
    .chain([tmp.path().join("r").display().to_string()])
    .collect();
    let (out, text) = run(&args);
    assert!(!out.status.success(), "{text}");
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("check failed: accuracy drop: 0.50 pp")
            && stderr.contains("exceeds --max-drop 0"),
        "{stderr}"
    );
    // The report is still written, marked as failed.
    let md = std::fs::read_to_string(tmp.path().join("r/report.md")).unwrap();
    assert!(md.contains("**Result: FAIL.**"), "{md}");
}
