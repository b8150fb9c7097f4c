//! The committed data sets are what their generators and READMEs say.

use ingot_demo::brackets::{
    calibration_sample, eval_sample, file_name, render, CLASSES, COMMITTED_SEED, SIZE,
};
use ingot_demo::digits::{byte_to_value, is_heldout, value_to_byte, SIDE};
use ingot_demo::{crate_dir, encode_png_gray, png_files, read_gray, repo_root};

#[test]
fn committed_bracket_images_regenerate_byte_for_byte() {
    let data = crate_dir().join("data");
    for i in [0usize, 1, 57, 199] {
        let (seed, class) = calibration_sample(COMMITTED_SEED, i);
        let png = encode_png_gray(SIZE as u32, SIZE as u32, &render(seed, class));
        let path = data.join("calibration").join(file_name(i));
        assert_eq!(
            std::fs::read(&path).unwrap(),
            png,
            "{} differs from its regeneration",
            path.display()
        );
    }
    for (c, name) in CLASSES.iter().enumerate() {
        for i in [0usize, 42, 99] {
            let png = encode_png_gray(
                SIZE as u32,
                SIZE as u32,
                &render(eval_sample(COMMITTED_SEED, c, i), c),
            );
            let path = data.join("eval").join(name).join(file_name(i));
            assert_eq!(
                std::fs::read(&path).unwrap(),
                png,
                "{} differs from its regeneration",
                path.display()
            );
        }
    }
}

#[test]
fn bracket_sets_have_the_documented_size_and_shape() {
    let data = crate_dir().join("data");
    assert_eq!(png_files(&data.join("calibration")).unwrap().len(), 200);
    for name in CLASSES {
        let files = png_files(&data.join("eval").join(name)).unwrap();
        assert_eq!(files.len(), 100, "eval/{name}");
        let (w, h, _) = read_gray(&files[0]).unwrap();
        assert_eq!((w, h), (SIZE as u32, SIZE as u32));
    }
}

#[test]
fn generation_is_deterministic_and_classes_differ() {
    for c in 0..CLASSES.len() {
        assert_eq!(render(12345, c), render(12345, c));
    }
    assert_ne!(render(12345, 0), render(12345, 1));
    assert_ne!(render(1, 0), render(2, 0));
}

#[test]
fn readmes_say_the_demo_data_is_invented() {
    for p in [
        crate_dir().join("data/README.md"),
        crate_dir().join("README.md"),
    ] {
        let text = std::fs::read_to_string(&p).unwrap();
        assert!(
            text.to_lowercase().contains("invented"),
            "{} must say the data is invented",
            p.display()
        );
    }
}

fn optdigits() -> std::path::PathBuf {
    repo_root().join("tests/data/optdigits")
}

#[test]
fn optdigits_readme_carries_attribution_and_checksum() {
    let text = std::fs::read_to_string(optdigits().join("README.md")).unwrap();
    for needle in [
        "Alpaydin",
        "Kaynak",
        "1998",
        "CC BY 4.0",
        "09f66e6debdee2cd2b5ae59e0d6abbb73fc2b0e0185d2e1957e9ebb51e23aa22",
    ] {
        assert!(text.contains(needle), "README lacks `{needle}`");
    }
    let gz = std::fs::read(optdigits().join("digits.csv.gz")).unwrap();
    assert_eq!(gz.len(), 57523, "digits.csv.gz changed size");
}

fn rows() -> Vec<ingot_demo::digits::Row> {
    use std::io::Read;
    let mut text = String::new();
    flate2::read::GzDecoder::new(std::fs::File::open(optdigits().join("digits.csv.gz")).unwrap())
        .read_to_string(&mut text)
        .unwrap();
    ingot_demo::digits::parse_csv(&text).unwrap()
}

#[test]
fn optdigits_png_folders_match_the_csv_exactly() {
    let rows = rows();
    assert_eq!(rows.len(), 1797);
    let mut heldout = 0;
    for d in 0..10 {
        for p in png_files(&optdigits().join("heldout").join(d.to_string())).unwrap() {
            let index: usize = p.file_stem().unwrap().to_str().unwrap().parse().unwrap();
            assert!(is_heldout(index), "{} is not a held-out row", p.display());
            let row = &rows[index];
            assert_eq!(row.label, d as u8, "{}", p.display());
            let (w, h, px) = read_gray(&p).unwrap();
            assert_eq!((w as usize, h as usize), (SIDE, SIDE));
            let want: Vec<u8> = row.values.iter().map(|&v| value_to_byte(v)).collect();
            assert_eq!(px, want, "{}", p.display());
            assert!(px
                .iter()
                .zip(&row.values)
                .all(|(&b, &v)| byte_to_value(b) == v));
            heldout += 1;
        }
    }
    assert_eq!(heldout, 360);
    let cal = png_files(&optdigits().join("calibration")).unwrap();
    assert_eq!(cal.len(), 100);
    for p in cal {
        let index: usize = p.file_stem().unwrap().to_str().unwrap().parse().unwrap();
        assert!(!is_heldout(index), "calibration uses held-out row {index}");
        let want: Vec<u8> = rows[index]
            .values
            .iter()
            .map(|&v| value_to_byte(v))
            .collect();
        assert_eq!(read_gray(&p).unwrap().2, want);
    }
}

#[test]
fn exported_models_load_and_agree_with_their_data() {
    let b = ingot_compiler::frontend::load(&crate_dir().join("model/brackets.graph.json")).unwrap();
    assert_eq!(b.labels(), CLASSES);
    assert_eq!(b.input().pixel_scale, 1.0 / 255.0);
    let s =
        ingot_compiler::frontend::load(&crate_dir().join("model/separable.graph.json")).unwrap();
    assert_eq!(s.labels(), CLASSES);
    assert_eq!(s.input(), b.input(), "same task, same preprocessing");
    let d = ingot_compiler::frontend::load(&optdigits().join("model/digits.graph.json")).unwrap();
    assert_eq!(d.labels().len(), 10);
    assert_eq!(d.input().pixel_scale, 1.0 / 255.0);
    assert_eq!(d.input().shape, ingot_compiler::Shape::new(1, SIDE, SIDE));
}
