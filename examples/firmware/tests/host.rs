//! Runs the firmware library on the host: PNG images in, labels out.
//!
//! With the demo model compiled in, it also classifies a handful of the
//! committed evaluation images per class and checks the generated module
//! against the compiler's integer simulator, image by image, and its
//! accuracy.

use ingot_compiler::driver::{self as pipeline, BuildInputs, RangesSource};
use ingot_compiler::lower::{SimInput, Simulator};
use ingot_firmware_example::{classify, label, model, Scratch};
use std::path::{Path, PathBuf};

/// A synthetic test image (a bright square on a gradient), saved as PNG and
/// read back, resized to the model input.
fn png_image(dir: &std::path::Path, k: u32) -> Vec<u8> {
    let [h, w, c] = model::INPUT_SHAPE;
    let img = image::RgbImage::from_fn(64, 48, |x, y| {
        let inside = x / 16 == k % 4 && y / 16 == (k / 4) % 3;
        if inside {
            image::Rgb([250, 240, 230])
        } else {
            image::Rgb([(x * 3) as u8, (y * 5) as u8, (k * 40) as u8])
        }
    });
    let path = dir.join(format!("img{k}.png"));
    img.save(&path).unwrap();
    let back = image::open(&path).unwrap().to_rgb8();
    let small = image::imageops::resize(
        &back,
        w as u32,
        h as u32,
        image::imageops::FilterType::Triangle,
    );
    match c {
        3 => small.into_raw(),
        1 => image::DynamicImage::ImageRgb8(small).to_luma8().into_raw(),
        _ => panic!("this test feeds grey or RGB images, the model wants {c} channels"),
    }
}

#[test]
fn classifies_png_images() {
    let dir = std::env::temp_dir().join(format!("ingot-fw-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let mut scratch = Box::new(Scratch::new());
    let mut seen = Vec::new();
    for k in 0..6 {
        let px: [u8; model::INPUT_LEN] = png_image(&dir, k).try_into().unwrap();
        let class = classify(&mut scratch, &px);
        assert!(class < model::OUTPUT_LEN);
        // Same frame, same answer (the scratch contents do not matter).
        assert_eq!(classify(&mut scratch, &px), class);
        println!("img{k}.png -> {} ({class})", label(class));
        seen.push(class);

        if model::MODEL_NAME == "demo_sized" {
            // The built-in network: compare with the compiler's interpretation.
            use ingot_compiler::codegen::{interpret, Schedule};
            use ingot_testkit::testnets;
            let q = testnets::demo_sized();
            let s = Schedule::naive(&q);
            let mut input = [0i8; model::INPUT_LEN];
            model::quantize_pixels(&px, &mut input);
            let want = interpret(&q, &s, &input, &mut |_, _| {}).unwrap();
            let mut out = [0i8; model::OUTPUT_LEN];
            model::run(&mut scratch, &input, &mut out);
            assert_eq!(out.to_vec(), want);
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
    assert_eq!(label(usize::MAX), "?");
}

/// Images per class taken from `examples/demo/data/eval/<class>/`.
const PER_CLASS: usize = 6;

fn demo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../demo")
}

/// A PNG as the model's input bytes (HWC).
fn pixels(path: &Path) -> [u8; model::INPUT_LEN] {
    let [h, w, c] = model::INPUT_SHAPE;
    let img = image::open(path).unwrap();
    assert_eq!(
        (img.width(), img.height()),
        (w as u32, h as u32),
        "{}",
        path.display()
    );
    let raw = match c {
        1 => img.to_luma8().into_raw(),
        3 => img.to_rgb8().into_raw(),
        _ => panic!("the model wants {c} channels"),
    };
    raw.try_into().unwrap()
}

/// A missing tool skips this test, except under `INGOT_REQUIRE_EMULATION=1`
/// (set by CI), where it is a failure: a broken install must not pass.
fn skip_unless_required(why: &str) {
    if std::env::var("INGOT_REQUIRE_EMULATION").is_ok_and(|v| v == "1") {
        panic!("INGOT_REQUIRE_EMULATION=1, but {why}");
    }
    eprintln!("skipping: {why}");
}

#[test]
fn demo_model_matches_simulator_on_eval_images() {
    if model::MODEL_NAME == "demo_sized" {
        skip_unless_required("the demo model is not compiled in (build.rs fell back)");
        return;
    }
    // The same compilation as build.rs, to get the lowered graph.
    let c = pipeline::compile(&demo_request()).unwrap();
    // The Cortex-M4F profile gives the word weight form (the host runs
    // the same module as the firmware).
    assert!(c
        .generated
        .module
        .contains("ingot_rt::checked::Conv2dWords::new("));
    assert!(
        c.generated.module.contains(model::MODEL_HASH),
        "the compiled-in module is not this compilation"
    );
    let mut sim = Simulator::new(&c.qgraph);
    let mut scratch = Box::new(Scratch::new());
    let (mut total, mut right) = (0, 0);
    for (class, name) in model::LABELS.iter().enumerate() {
        let dir = demo().join("data/eval").join(name);
        let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
            .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
            .map(|e| e.unwrap().path())
            .filter(|p| p.extension().is_some_and(|x| x == "png"))
            .collect();
        files.sort();
        assert!(files.len() >= PER_CLASS, "{}", dir.display());
        for f in files.iter().take(PER_CLASS) {
            let px = pixels(f);
            let got = classify(&mut scratch, &px);
            let want = sim.run(SimInput::Pixels(&px)).unwrap();
            assert_eq!(
                got,
                ingot_rt::argmax(&want),
                "{}: generated module and simulator disagree",
                f.display()
            );
            let mut input = [0i8; model::INPUT_LEN];
            model::quantize_pixels(&px, &mut input);
            let mut out = [0i8; model::OUTPUT_LEN];
            model::run(&mut scratch, &input, &mut out);
            assert_eq!(out.to_vec(), want, "{}: output codes differ", f.display());
            total += 1;
            right += (got == class) as usize;
        }
    }
    let acc = right as f64 / total as f64;
    println!("accuracy on {total} eval images: {:.1}%", 100.0 * acc);
    assert_eq!(total, PER_CLASS * model::LABELS.len());
    assert!(
        acc >= MIN_ACCURACY,
        "accuracy {acc:.3} below {MIN_ACCURACY}"
    );
}

/// Lowest accepted int8 accuracy on the sample (the committed model scores
/// well above it; `ingot check` on the whole evaluation set is the real
/// measure, see the README).
const MIN_ACCURACY: f64 = 0.9;

/// The frame-to-decision loop on a synthetic RGB565 frame (a bright
/// rectangle on a dark gradient): `classify_frame` gives the same input
/// codes as the host running `ingot_rt::convert_frame` with the build's
/// camera, and the same class as the compiler's integer simulator on them.
#[test]
fn classifies_a_synthetic_rgb565_frame() {
    let (w, h) = (model::FRAME_WIDTH, model::FRAME_HEIGHT);
    let mut frame = [0u8; model::FRAME_BYTES];
    for y in 0..h {
        for x in 0..w {
            let bright = (120..200).contains(&x) && (90..150).contains(&y);
            let (r, g, b) = if bright {
                (28u16, 58u16, 27u16)
            } else {
                ((x / 20) as u16, (y / 8) as u16, 4)
            };
            let word = (r << 11) | (g << 5) | b;
            frame[2 * (y * w + x)..2 * (y * w + x) + 2].copy_from_slice(&word.to_le_bytes());
        }
    }
    let mut scratch = Box::new(Scratch::new());
    let class = ingot_firmware_example::classify_frame(&mut scratch, &frame);
    println!("synthetic frame -> {} ({class})", label(class));
    let mut input = [0i8; model::INPUT_LEN];
    model::frame_to_input(&frame, &mut input);
    let [ih, iw, ic] = model::INPUT_SHAPE;
    let q = if model::MODEL_NAME == "demo_sized" {
        ingot_testkit::testnets::demo_sized()
    } else {
        pipeline::compile(&demo_request()).unwrap().qgraph
    };
    let cam =
        ingot_compiler::camera::Camera::new(ingot_compiler::camera::Format::Rgb565le, 320, 240);
    let p = cam.params(iw as u32, ih as u32, ic as u32).unwrap();
    assert_eq!(p, model::FRAME);
    let mut want = vec![0i8; model::INPUT_LEN];
    ingot_rt::convert_frame(&frame, &p, &q.pixel_table, &mut want).unwrap();
    assert_eq!(
        input.to_vec(),
        want,
        "frame_to_input differs from the host kernel"
    );
    let out = Simulator::new(&q).run(SimInput::Codes(&want)).unwrap();
    assert_eq!(class, ingot_rt::argmax(&out));
}

/// The same compilation as build.rs.
fn demo_request() -> BuildInputs {
    let mut req = BuildInputs::new(
        demo().join("model/brackets.graph.json"),
        RangesSource::File(demo().join("model/brackets.ranges.json")),
    );
    req.target = Some(demo().join("bench-camera.toml"));
    req
}
