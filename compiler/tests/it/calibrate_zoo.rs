//! Calibration on zoo networks through the real loader, float reference,
//! lowering and integer simulator.

use image::{GrayImage, Luma};
use ingot_compiler::calibrate::{self, CalibOptions, ImageSet, Method, Ranges};
use ingot_compiler::lower::LowerOptions;
use ingot_compiler::Graph;
use ingot_testkit::zoo::{self, Rng};
use std::path::Path;

/// `per_class` smooth random 28x28 pictures in each of the class folders
/// `class0..class{classes}`.
fn write_images(dir: &Path, classes: usize, per_class: usize) {
    let mut rng = Rng::new(5);
    for c in 0..classes {
        let d = dir.join(format!("class{c}"));
        std::fs::create_dir_all(&d).unwrap();
        for i in 0..per_class {
            let (fx, fy, ph) = (
                rng.range(0.05, 0.5),
                rng.range(0.05, 0.5),
                rng.range(0.0, 6.3),
            );
            let img = GrayImage::from_fn(28, 28, |x, y| {
                let v = 128.0
                    + 100.0 * ((x as f32 * fx + ph).sin() * (y as f32 * fy).cos())
                    + 20.0 * rng.range(-1.0, 1.0);
                Luma([v.clamp(0.0, 255.0) as u8])
            });
            img.save(d.join(format!("{i:03}.png"))).unwrap();
        }
    }
}

fn setup(dir: &Path) -> (Graph, ImageSet) {
    let net = zoo::plain_stack(&zoo::PlainStackConfig::default(), 11);
    let path = net.write(dir, "plain").unwrap();
    let graph = ingot_compiler::load(&path).unwrap();
    let img = dir.join("images");
    write_images(&img, 4, 10);
    let set = ImageSet::open(&img, &graph).unwrap();
    (graph, set)
}

fn in_pool<T: Send>(threads: usize, f: impl FnOnce() -> T + Send) -> T {
    rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .unwrap()
        .install(f)
}

#[test]
fn reference_calibration_is_identical_with_one_and_two_threads() {
    let dir = tempfile::tempdir().unwrap();
    let (graph, set) = setup(dir.path());
    for method in [
        Method::MinMax,
        Method::Percentile(99.9),
        Method::Mse,
        Method::Kl,
    ] {
        let opts = CalibOptions {
            method,
            holdout: 0.2,
            ..CalibOptions::default()
        };
        let one = in_pool(1, || calibrate::run(&graph, &set, &opts).unwrap());
        let two = in_pool(2, || calibrate::run(&graph, &set, &opts).unwrap());
        assert_eq!(one.ranges, two.ranges, "{method}");
        assert_eq!(one.stats, two.stats, "{method}");
        assert_eq!((one.calibration.len(), one.evaluation.len()), (32, 8));
        assert_eq!(one.ranges.method, method.to_string());
        // ReLU outputs get one-sided ranges.
        let relu = graph.find_layer("relu1").unwrap().output();
        assert_eq!(one.ranges.get(relu).min, 0.0);
        assert!(one.ranges.get(relu).max > 0.0);
    }
}

#[test]
fn ranges_file_round_trips_and_names_the_graph() {
    let dir = tempfile::tempdir().unwrap();
    let (graph, set) = setup(dir.path());
    let cal = calibrate::run(
        &graph,
        &set,
        &CalibOptions {
            method: Method::Kl,
            ..CalibOptions::default()
        },
    )
    .unwrap();
    let path = dir.path().join("out/plain.ranges.json");
    cal.ranges.save(&graph, &path).unwrap();
    let hash = calibrate::ranges::graph_hash(&graph).unwrap();
    let back = Ranges::load(&graph, &path, Some(&hash)).unwrap();
    assert_eq!(back, cal.ranges);
    assert_eq!(back.images, 40);
    assert!(Ranges::load(&graph, &path, Some("0000000000000000")).is_err());
}

#[test]
fn report_measures_int8_against_float_on_held_out_images() {
    let dir = tempfile::tempdir().unwrap();
    let (graph, set) = setup(dir.path());
    let opts = CalibOptions {
        method: Method::Percentile(99.99),
        holdout: 0.25,
        ..CalibOptions::default()
    };
    let cal = calibrate::run(&graph, &set, &opts).unwrap();
    let report =
        ingot_compiler::agree::report(&graph, &set, &cal, &opts, Some(&LowerOptions::default()))
            .unwrap();
    assert_eq!(report.evaluated_on, "held-out");
    assert_eq!(report.evaluation.len(), 10);
    assert!(report
        .evaluation
        .iter()
        .all(|n| !report.calibration.contains(n)));
    let out = report.output.as_ref().unwrap();
    assert_eq!((out.images, out.labelled), (10, 10));
    let (fa, ia, drop) = (
        out.float_accuracy.unwrap(),
        out.int8_accuracy.unwrap(),
        out.drop_pp.unwrap(),
    );
    assert!((drop - 100.0 * (fa - ia)).abs() < 1e-9);
    // Int8 with calibrated ranges keeps the decisions of a small network.
    assert!(out.top1_agreement >= 0.8, "{}", out.top1_agreement);
    // conv1 is fused with its ReLU: the stored map is relu1's.
    assert_eq!(
        report
            .layers
            .iter()
            .find(|r| r.name == "conv1")
            .unwrap()
            .sqnr_db,
        None
    );
    let conv1 = report.layers.iter().find(|r| r.name == "relu1").unwrap();
    // Rule of thumb: about 6 dB per bit, so 8-bit maps land well above 25 dB.
    assert!(conv1.sqnr_db.unwrap() > 25.0, "{conv1:?}");
    assert!(conv1.scale.unwrap() > 0.0);
    // The input is quantized from the same bytes: its SQNR is high too.
    assert!(
        report.layers[0].sqnr_db.unwrap() > 30.0,
        "{:?}",
        report.layers[0]
    );
    let text = report.to_string();
    assert!(
        text.contains("conv1") && text.contains("int8 top-1 agrees"),
        "{text}"
    );
}
