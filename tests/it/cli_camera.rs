//! `ingot build` with a camera: from the target profile's `[camera]` or
//! the `--camera-format`/`--frame`/... options; bad cameras fail the build
//! with a sentence naming the camera and leave `--out` untouched.

use ingot_testkit::ingot;
use std::path::Path;
use std::process::Output;

fn root() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

fn build(out: &Path, extra: &[&str]) -> Output {
    let demo = root().join("examples/demo/model");
    ingot!()
        .arg("build")
        .arg(demo.join("brackets.graph.json"))
        .arg("--ranges")
        .arg(demo.join("brackets.ranges.json"))
        .arg("--out")
        .arg(out)
        .args(extra)
        .output()
        .unwrap()
}

#[test]
fn camera_from_profile_and_options() {
    let t = tempfile::tempdir().unwrap();
    let profile = root().join("examples/demo/bench-camera.toml");
    let out = t.path().join("profile");
    let o = build(&out, &["--target", profile.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let module = std::fs::read_to_string(out.join("model.rs")).unwrap();
    assert!(module.contains("pub fn frame_to_input(frame: &[u8; FRAME_BYTES]"));
    assert!(module.contains("ingot_rt::PixelFormat::Rgb565Le"));
    assert!(module.contains(".roi(40, 0, 240, 240)"));

    let out = t.path().join("options");
    let o = build(
        &out,
        &[
            "--camera-format",
            "yuyv",
            "--frame",
            "160x120",
            "--roi",
            "10,0,120,120",
            "--resize",
            "bilinear",
            "--rotate",
            "180",
            "--mirror",
        ],
    );
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let module = std::fs::read_to_string(out.join("model.rs")).unwrap();
    for item in [
        "ingot_rt::PixelFormat::Yuyv",
        ".roi(10, 0, 120, 120)",
        ".resize(ingot_rt::Resize::Bilinear)",
        ".rotate180(true)",
        ".mirror(true)",
    ] {
        assert!(module.contains(item), "missing {item}");
    }

    // No camera: no frame items (existing modules are unchanged).
    let out = t.path().join("none");
    let o = build(&out, &[]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(!std::fs::read_to_string(out.join("model.rs"))
        .unwrap()
        .contains("FRAME"));
}

#[test]
fn bad_cameras_fail_the_build_naming_the_problem() {
    let t = tempfile::tempdir().unwrap();
    let out = t.path().join("out");
    for (args, want) in [
        (
            &["--camera-format", "rgb565le", "--frame", "320x240", "--roi", "300,0,64,64"][..],
            "camera rgb565le 320x240: region x=300 y=0 w=64 h=64 reaches outside the 320x240 frame",
        ),
        (
            &["--camera-format", "rgb565", "--frame", "320x240"][..],
            "--camera-format: unknown value `rgb565` (expected one of: gray8, rgb565le, rgb565be, rgb888, yuyv)",
        ),
        (
            &["--camera-format", "gray8", "--frame", "0x240"][..],
            "must all have non-zero sizes",
        ),
        (
            &["--camera-format", "rgb888", "--frame", "70000x70000"][..],
            "overflows 32 bits",
        ),
        (
            &["--frame", "320x240"][..],
            "missing --camera-format",
        ),
    ] {
        let o = build(&out, args);
        assert!(!o.status.success(), "{args:?}");
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(err.contains(want), "{args:?}: {err}");
        assert!(!out.exists(), "a failed build wrote {}", out.display());
    }
}
