//! `ingot_rt::convert_frame` on emulated Cortex-M0+ and Cortex-M4 cores
//! gives the same input bytes as on the host, for every pixel format and
//! resize method, with a region, rotation and mirroring (the instruction
//! counts are printed by `examples/bench_frame`, not asserted here).

#[path = "../../examples/bench_frame/harness.rs"]
mod harness;

use harness::Case;
use ingot_compiler::check::runner::BuildConfig;
use ingot_compiler::check::{emulation_or_skip, RunOn};
use ingot_rt::{FrameConfig, Luma, PixelFormat, Resize};

fn cases() -> Vec<Case> {
    let c = |name: &str, cfg: FrameConfig| Case {
        name: name.into(),
        cfg,
    };
    vec![
        c(
            "rgb565le area",
            FrameConfig::new(PixelFormat::Rgb565Le, 64, 48, 17, 13, 1),
        ),
        c(
            "rgb565be bilinear",
            FrameConfig::new(PixelFormat::Rgb565Be, 64, 48, 20, 20, 3)
                .resize(Resize::Bilinear)
                .luma(Luma::Bt709),
        ),
        c(
            "yuyv nearest rotated",
            FrameConfig::new(PixelFormat::Yuyv, 40, 30, 31, 29, 1)
                .resize(Resize::Nearest)
                .rotate180(true),
        ),
        c(
            "rgb888 area mirrored",
            FrameConfig::new(PixelFormat::Rgb888, 33, 21, 7, 5, 1)
                .roi(3, 2, 29, 17)
                .mirror(true)
                .luma(Luma::Bt709),
        ),
        c(
            "gray8 bilinear enlarging",
            FrameConfig::new(PixelFormat::Gray8, 9, 7, 16, 12, 3)
                .roi(1, 1, 5, 4)
                .resize(Resize::Bilinear)
                .rotate180(true)
                .mirror(true),
        ),
    ]
}

#[test]
fn device_bytes_equal_host_bytes() {
    let cases = cases();
    for on in [RunOn::M0plus, RunOn::M4] {
        if !emulation_or_skip(on) {
            continue;
        }
        let res = harness::run(on, &cases, &BuildConfig::default()).unwrap();
        assert_eq!(res.len(), cases.len());
        for (c, m) in cases.iter().zip(&res) {
            assert_eq!(m.device_hash, m.host_hash, "{on}: {}", c.name);
            assert!(m.instructions > 0, "{on}: {}", c.name);
            // No temporary frame: the kernel's stack stays a few hundred
            // bytes (upper bound incl. the timer reads; bench_frame prints it).
            assert!(m.stack <= 1024, "{on}: {}: {} stack bytes", c.name, m.stack);
        }
    }
}

/// The generated `frame_to_input` of a module built for a camera (the
/// `plain` test network, 12×12 RGB, behind a rotated and mirrored 40×30
/// RGB565 camera), compiled for and run on emulated Cortex-M0+ and M4
/// cores: the same input codes as the host's `ingot_rt::convert_frame`
/// with the module's pixel table.
#[test]
fn generated_frame_to_input_on_the_device_equals_the_host() {
    use ingot_compiler::camera::{Camera, Format};
    use ingot_compiler::codegen::{generate, GenOptions, Schedule};
    let q = ingot_testkit::testnets::plain();
    let mut cam = Camera::new(Format::Rgb565le, 40, 30);
    cam.rotate = 180;
    cam.mirror = true;
    let opts = GenOptions {
        module: "plain_camera".into(),
        camera: Some(cam.clone()),
        ..GenOptions::default()
    };
    let g = generate(&q, &Schedule::naive(&q), &opts).unwrap();
    let s = q.map(q.input).shape;
    let p = cam.params(s.w as u32, s.h as u32, s.c as u32).unwrap();
    let mut want = vec![0i8; p.input_len()];
    ingot_rt::convert_frame(
        &harness::frame(p.frame_bytes(), 0),
        &p,
        &q.pixel_table,
        &mut want,
    )
    .unwrap();
    for on in [RunOn::M0plus, RunOn::M4] {
        if !emulation_or_skip(on) {
            continue;
        }
        let (instructions, hash) = harness::run_module(
            on,
            "plain_camera",
            &g.files("plain_camera"),
            &BuildConfig::default(),
        )
        .unwrap();
        assert_eq!(hash, harness::fnv(&want), "{on}");
        assert!(instructions > 0, "{on}");
    }
}
