//! `ingot check` and `ingot calibrate` through a camera: the UCI optdigits
//! pictures (Alpaydin & Kaynak 1998, CC BY 4.0; `tests/data/optdigits`)
//! become frames of an invented 16×12 camera, go through
//! `ingot_rt::convert_frame`, and the report gives the camera path's drop;
//! raw frames of the wrong size are refused naming the file and sizes.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn digits() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/optdigits")
}

fn ingot(args: &[&str], extra: &[&Path]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_ingot"))
        .args(args)
        .args(extra)
        .output()
        .unwrap()
}

fn check(images: &Path, report: &Path, camera: &[&str]) -> Output {
    let d = digits();
    let mut args = vec![
        "check".to_string(),
        d.join("model/digits.graph.json").display().to_string(),
        "--calib-images".into(),
        d.join("calibration").display().to_string(),
        "--images".into(),
        images.display().to_string(),
        "--report".into(),
        report.display().to_string(),
    ];
    args.extend(camera.iter().map(|s| s.to_string()));
    let a: Vec<&str> = args.iter().map(String::as_str).collect();
    ingot(&a, &[])
}

#[test]
fn check_through_a_camera_reports_the_camera_path() {
    let t = tempfile::tempdir().unwrap();
    for (format, frame) in [("gray8", "16x12"), ("rgb565le", "16x12")] {
        let report = t.path().join(format);
        let o = check(
            &digits().join("heldout"),
            &report,
            &["--camera-format", format, "--frame", frame],
        );
        let stdout = String::from_utf8_lossy(&o.stdout);
        assert!(
            o.status.success(),
            "{stdout}\n{}",
            String::from_utf8_lossy(&o.stderr)
        );
        assert!(
            stdout.contains(&format!("camera path:    {format} 16x12")),
            "{stdout}"
        );
        let json: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(report.join("report.json")).unwrap())
                .unwrap();
        let cam = &json["camera"];
        let acc = |k: &str| cam[k].as_f64().unwrap();
        // The 8×8 digits stretched to the centred 12×12 region of the 16×12
        // frame, then averaged down to 8×8: the device path must still
        // classify (lenient bound; a broken conversion gives chance, 10%).
        assert!(acc("device_float_accuracy") > 0.8, "{cam}");
        assert!(acc("device_int8_accuracy") > 0.8, "{cam}");
        assert!(
            (acc("host_float_accuracy")
                - acc("device_float_accuracy")
                - acc("float_drop_pp") / 100.0)
                .abs()
                < 1e-9
        );
        // The device path's int8 accuracy is the accuracy check reports.
        assert_eq!(
            json["accuracy"]["int8_accuracy"].as_f64(),
            Some(acc("device_int8_accuracy"))
        );
        let md = std::fs::read_to_string(report.join("report.md")).unwrap();
        assert!(md.contains("## Camera path"), "{md}");
    }
}

#[test]
fn raw_frames_of_the_wrong_size_are_refused() {
    let t = tempfile::tempdir().unwrap();
    let class = t.path().join("images/3");
    std::fs::create_dir_all(&class).unwrap();
    // A 16×12 gray8 frame has 192 bytes.
    std::fs::write(class.join("good.raw"), [128u8; 192]).unwrap();
    std::fs::write(class.join("short.bin"), [0u8; 100]).unwrap();
    let o = check(
        &t.path().join("images"),
        &t.path().join("report"),
        &["--camera-format", "gray8", "--frame", "16x12"],
    );
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success());
    assert!(
        err.contains("short.bin: a raw frame of 100 bytes, but the camera's frames have 192 bytes"),
        "{err}"
    );
    // Without the bad file the raw frame is read and checked.
    std::fs::remove_file(class.join("short.bin")).unwrap();
    let o = check(
        &t.path().join("images"),
        &t.path().join("report"),
        &["--camera-format", "gray8", "--frame", "16x12"],
    );
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(String::from_utf8_lossy(&o.stdout).contains("1 images"));
}

#[test]
fn calibrate_takes_the_camera_options() {
    let t = tempfile::tempdir().unwrap();
    let d = digits();
    let out = t.path().join("r.json");
    let graph = d.join("model/digits.graph.json");
    let images = d.join("calibration");
    let o = ingot(
        &[
            "calibrate",
            graph.to_str().unwrap(),
            "--images",
            images.to_str().unwrap(),
            "--camera-format",
            "rgb565be",
            "--frame",
            "16x12",
            "-o",
            out.to_str().unwrap(),
        ],
        &[],
    );
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let plain = t.path().join("p.json");
    let o = ingot(
        &[
            "calibrate",
            graph.to_str().unwrap(),
            "--images",
            images.to_str().unwrap(),
            "-o",
            plain.to_str().unwrap(),
        ],
        &[],
    );
    assert!(o.status.success());
    // The camera path changes what calibration observes.
    assert_ne!(
        std::fs::read_to_string(&out).unwrap(),
        std::fs::read_to_string(&plain).unwrap()
    );
    let o = ingot(
        &[
            "calibrate",
            graph.to_str().unwrap(),
            "--images",
            images.to_str().unwrap(),
            "--camera-format",
            "gray8",
            "--frame",
            "4x4",
            "-o",
            out.to_str().unwrap(),
        ],
        &[],
    );
    assert!(!o.status.success());
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("camera gray8 4x4"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
}

/// A missing emulator skips, except under `INGOT_REQUIRE_EMULATION=1`.
fn emulator_or_skip() -> bool {
    let ok = Command::new("qemu-system-arm")
        .arg("--version")
        .output()
        .is_ok_and(|o| o.status.success());
    if !ok {
        if std::env::var("INGOT_REQUIRE_EMULATION").is_ok_and(|v| v == "1") {
            panic!("INGOT_REQUIRE_EMULATION=1, but qemu-system-arm cannot be run");
        }
        eprintln!("skipping: qemu-system-arm cannot be run");
    }
    ok
}

#[test]
fn check_on_m4_runs_frame_to_input_on_the_device() {
    if !emulator_or_skip() {
        return;
    }
    let t = tempfile::tempdir().unwrap();
    // Two pictures per class keep the emulated runs short.
    let images = t.path().join("images");
    for class in 0..10 {
        let from = digits().join("heldout").join(class.to_string());
        let to = images.join(class.to_string());
        std::fs::create_dir_all(&to).unwrap();
        let mut names: Vec<_> = std::fs::read_dir(&from)
            .unwrap()
            .map(|e| e.unwrap().path())
            .collect();
        names.sort();
        for p in names.iter().take(2) {
            std::fs::copy(p, to.join(p.file_name().unwrap())).unwrap();
        }
    }
    let report = t.path().join("report");
    let d = digits();
    let o = ingot(
        &[
            "check",
            "--on",
            "m4",
            d.join("model/digits.graph.json").to_str().unwrap(),
            "--calib-images",
            d.join("calibration").to_str().unwrap(),
            "--images",
            images.to_str().unwrap(),
            "--report",
            report.to_str().unwrap(),
            "--camera-format",
            "rgb565le",
            "--frame",
            "16x12",
        ],
        &[],
    );
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(
        stdout.contains("frame step:     frame_to_input ran on the raw frames (host, Cortex-M4")
            || stdout.contains("frame step:     frame_to_input ran on the raw frames (host, m4"),
        "{stdout}"
    );
    assert!(
        stdout.contains("equal the host's convert_frame on all 20 images"),
        "{stdout}"
    );
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(report.join("report.json")).unwrap())
            .unwrap();
    // Both runners computed the input codes from the raw frames themselves.
    let runs = json["frame_step"]["runs"].as_array().unwrap();
    assert_eq!(runs.len(), 2, "{json}");
    for r in runs {
        assert_eq!(r["mismatched_images"].as_array().unwrap().len(), 0, "{r}");
    }
    // The outputs of frame_to_input + run on the core are the simulator's
    // (which was given the host's convert_frame codes), bit for bit.
    assert_eq!(
        json["bit_exact"]["mismatched_images"]
            .as_array()
            .unwrap()
            .len(),
        0,
        "{}",
        json["bit_exact"]
    );
    let i = &json["instructions"];
    let f = i["frame_to_input_mean"].as_u64().unwrap();
    // 16×12 RGB565 to 8×8: a few thousand instructions, not zero (a frame
    // step that was skipped) and not millions.
    assert!(f > 100 && f < 200_000, "{i}");
    assert!(json["failures"].as_array().unwrap().is_empty(), "{json}");
}
