//! The camera part of a generated module: snapshot of the text, the module
//! compiled as a real `#![no_std]` crate whose `frame_to_input` gives the
//! same bytes as the host calling `ingot_rt::convert_frame`, and bad
//! cameras refused at generation with a sentence naming the problem.

use ingot_compiler::camera::{Camera, Format, ResizeMethod};
use ingot_compiler::codegen::{generate, CodegenError, GenOptions, Schedule};
use ingot_testkit::testnets;
use std::path::Path;
use std::process::Command;

/// A 40×30 RGB565 camera, rotated and mirrored, for `plain` (12×12 RGB).
fn camera() -> Camera {
    let mut cam = Camera::new(Format::Rgb565le, 40, 30);
    cam.rotate = 180;
    cam.mirror = true;
    cam
}

fn opts(cam: Option<Camera>) -> GenOptions {
    GenOptions {
        module: "plain_camera".into(),
        camera: cam,
        ..GenOptions::default()
    }
}

/// The frame both sides convert.
fn frame(bytes: usize) -> Vec<u8> {
    (0..bytes)
        .map(|i| (i * 37 % 251) as u8 ^ (i >> 7) as u8)
        .collect()
}

/// `tests/out/plain_camera.rs`; `INGOT_BLESS=1` rewrites it. Without a
/// camera the module is the plain snapshot's text (so existing modules
/// are unchanged).
#[test]
fn snapshot_of_camera_module() {
    let q = testnets::plain();
    let g = generate(&q, &Schedule::naive(&q), &opts(Some(camera()))).unwrap();
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/out/plain_camera.rs");
    if std::env::var_os("INGOT_BLESS").is_some() {
        std::fs::write(&path, &g.module).unwrap();
    }
    let have = std::fs::read_to_string(&path)
        .unwrap_or_else(|_| panic!("{} missing; run with INGOT_BLESS=1", path.display()));
    assert!(
        have == g.module,
        "{} differs from the generator's output; rerun with INGOT_BLESS=1 if intended",
        path.display()
    );
    for item in [
        "pub const FRAME_BYTES: usize = FRAME.frame_bytes();",
        "pub const FRAME_WIDTH: usize = 40;",
        "pub const FRAME_HEIGHT: usize = 30;",
        "pub fn frame_to_input(frame: &[u8; FRAME_BYTES], input: &mut [i8; INPUT_LEN])",
        ".roi(5, 0, 30, 30)",
    ] {
        assert!(g.module.contains(item), "missing {item}");
    }
    let plain = generate(&q, &Schedule::naive(&q), &opts(None)).unwrap();
    assert!(!plain.module.contains("FRAME"));
}

#[test]
fn bad_cameras_are_refused_at_generation() {
    let q = testnets::plain();
    let gen = |cam: Camera| generate(&q, &Schedule::naive(&q), &opts(Some(cam))).unwrap_err();
    let mut cam = camera();
    cam.roi = Some([30, 0, 20, 20]);
    let e = gen(cam);
    assert!(matches!(e, CodegenError::Camera(_)));
    assert_eq!(
        e.to_string(),
        "camera rgb565le 40x30: region x=30 y=0 w=20 h=20 reaches outside the 40x30 frame"
    );
    let e = gen(Camera::new(Format::Yuyv, 40, 30));
    assert!(e.to_string().contains("gray networks only"), "{e}");
    let e = gen(Camera::new(Format::Gray8, 8, 8));
    assert!(e.to_string().contains("area averaging only shrinks"), "{e}");
    let mut cam = Camera::new(Format::Gray8, 8, 8);
    cam.resize = ResizeMethod::Bilinear;
    assert!(generate(&q, &Schedule::naive(&q), &opts(Some(cam))).is_ok());
}

/// The generated `frame_to_input`, compiled by cargo, against the host's
/// `ingot_rt::convert_frame` with the camera's parameters and the model's
/// pixel table: the same bytes.
#[test]
fn generated_frame_to_input_matches_host_kernel() {
    let q = testnets::plain();
    let cam = camera();
    let g = generate(&q, &Schedule::naive(&q), &opts(Some(cam.clone()))).unwrap();
    let root = Path::new(env!("CARGO_TARGET_TMPDIR")).join("ingot-codegen-camera");
    let dir = root.join("crate");
    for (name, bytes) in g.files("plain_camera") {
        let p = dir.join("src").join(name);
        std::fs::create_dir_all(p.parent().unwrap()).unwrap();
        std::fs::write(p, bytes).unwrap();
    }
    let rt = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../runtime-nostd")
        .canonicalize()
        .unwrap();
    std::fs::write(
        dir.join("Cargo.toml"),
        format!(
            "[package]\nname = \"ingot-camera-check\"\nversion = \"0.0.0\"\nedition = \"2021\"\npublish = false\n\n\
             [dependencies]\ningot-rt = {{ path = {:?} }}\n\n[features]\ningot-trace = []\n\n[workspace]\n",
            rt.display().to_string()
        ),
    )
    .unwrap();
    std::fs::write(
        dir.join("src/main.rs"),
        "#![forbid(unsafe_code)]\n#![deny(warnings)]\n\
         #[allow(dead_code)]\nmod plain_camera {\n    include!(\"plain_camera.rs\");\n}\n\
         fn main() {\n    use plain_camera as m;\n\
         let frame: [u8; m::FRAME_BYTES] = core::array::from_fn(|i| (i * 37 % 251) as u8 ^ (i >> 7) as u8);\n\
         let mut input = [0i8; m::INPUT_LEN];\n    m::frame_to_input(&frame, &mut input);\n\
         let hex: String = input.iter().map(|b| format!(\"{:02x}\", *b as u8)).collect();\n\
         println!(\"{} {} {}\", m::FRAME_WIDTH, m::FRAME_HEIGHT, hex);\n}\n",
    )
    .unwrap();
    let out = Command::new(env!("CARGO"))
        .args(["run", "--quiet", "--offline"])
        .current_dir(&dir)
        .env("CARGO_TARGET_DIR", root.join("target"))
        .env_remove("RUSTFLAGS")
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "generated crate failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let stdout = String::from_utf8_lossy(&out.stdout);
    let f: Vec<&str> = stdout.split_whitespace().collect();
    assert_eq!(f[..2], ["40", "30"]);
    let s = q.map(q.input).shape;
    let p = cam.params(s.w as u32, s.h as u32, s.c as u32).unwrap();
    let mut want = vec![0i8; p.input_len()];
    ingot_rt::convert_frame(&frame(p.frame_bytes()), &p, &q.pixel_table, &mut want).unwrap();
    let want: String = want.iter().map(|b| format!("{:02x}", *b as u8)).collect();
    assert_eq!(f[2], want);
}
