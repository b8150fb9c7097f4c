//! Runs the firmware library on the host: PNG images in, labels out.

use ingot_firmware_example::{classify, label, model, Scratch};

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
            use ingot_compiler::codegen::{calls, testnets, Schedule};
            let q = testnets::demo_sized();
            let s = Schedule::naive(&q);
            let steps = calls::step_calls(&q, &s).unwrap();
            let mut input = [0i8; model::INPUT_LEN];
            model::quantize_pixels(&px, &mut input);
            let want = calls::execute(&q, &s, &steps, &input, &mut |_, _| {}).unwrap();
            let mut out = [0i8; model::OUTPUT_LEN];
            model::run(&mut scratch, &input, &mut out);
            assert_eq!(out.to_vec(), want);
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
    assert_eq!(label(usize::MAX), "?");
}
