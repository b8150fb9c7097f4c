//! ONNX import against the `onnx` package's reference evaluator.
//!
//! The fixtures in `tests/fixtures/onnx/` were written by
//! `make_fixtures.py` with the `onnx` Python package (onnx 1.23.2,
//! numpy 2.4.6), checked by `onnx.checker`, and run by
//! `onnx.reference.ReferenceEvaluator` on fixed camera bytes; the outputs
//! are in `expected.json`. Each fixture is imported, checked by ingot's own
//! loader, and run by ingot's float reference from the same camera bytes
//! through the imported graph's preprocessing; every value must match within
//! 1e-4 * max(1, |y|).

use ingot_compiler::frontend::onnx::{self, ImportOptions, Imported};
use ingot_compiler::graph::Graph;
use ingot_compiler::reference::Reference;
use std::path::{Path, PathBuf};

fn dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/onnx")
}

fn expected() -> serde_json::Value {
    let text = std::fs::read_to_string(dir().join("expected.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

fn import(name: &str) -> (Imported, Graph) {
    let path = dir().join(format!("{name}.onnx"));
    let imported =
        onnx::import(&path, &ImportOptions::default()).unwrap_or_else(|e| panic!("{name}: {e}"));
    let graph = imported
        .validate(Path::new(&format!("/virtual/{name}.graph.json")))
        .unwrap_or_else(|e| panic!("{name}: {e}"));
    (imported, graph)
}

fn floats(v: &serde_json::Value) -> Vec<f32> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap() as f32)
        .collect()
}

/// Runs ingot's float reference on the fixture's camera bytes and compares
/// with the evaluator's output.
fn check(name: &str, fx: &serde_json::Value) -> (Imported, Graph) {
    let (imported, graph) = import(name);
    let pixels: Vec<u8> = fx["pixels"]
        .as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap() as u8)
        .collect();
    let s = graph.input().shape;
    let plane = s.h * s.w;
    let x: Vec<f32> = pixels
        .iter()
        .enumerate()
        .map(|(i, &p)| graph.input().preprocess(i / plane, p))
        .collect();
    let got = Reference::new(&graph).run(&x).unwrap();
    let want = floats(&fx["output"]);
    assert_eq!(got.len(), want.len(), "{name}: output length");
    for (i, (g, w)) in got.iter().zip(&want).enumerate() {
        let tol = 1e-4 * w.abs().max(1.0);
        assert!(
            (g - w).abs() <= tol,
            "{name}: output {i}: ingot {g}, onnx.reference {w} (tolerance {tol})\n{}",
            imported.table()
        );
    }
    (imported, graph)
}

#[test]
fn every_fixture_matches_the_reference_evaluator() {
    let all = expected();
    let fixtures = all["fixtures"].as_object().unwrap();
    assert!(fixtures.len() >= 20, "fixtures missing");
    for (name, fx) in fixtures {
        check(name, fx);
    }
}

fn fixture(name: &str) -> (Imported, Graph) {
    let all = expected();
    check(name, &all["fixtures"][name])
}

fn ops(g: &Graph) -> Vec<String> {
    g.layers().iter().map(|l| l.op.kind().to_string()).collect()
}

#[test]
fn shape_subgraphs_fold_and_identity_outputs_vanish() {
    let (imp, g) = fixture("net_resnet");
    // Exporters' names survive as layer names.
    assert!(g.layers().iter().any(|l| l.name == "/layer1/conv1/Conv"));
    assert_eq!(g.layers().last().unwrap().name, "/fc/Gemm");
    let folded = imp
        .rows
        .iter()
        .filter(|r| r.result.starts_with("constant"))
        .count();
    // Shape, Constant x3, Gather, Unsqueeze, Concat.
    assert_eq!(folded, 7, "{}", imp.table());
    assert!(ops(&g).iter().all(|o| o != "flatten"), "{:?}", ops(&g));
    assert_eq!(imp.opset, 17);
    // Tensors keep the exporter's initializer names.
    assert!(imp.store.tensors.contains_key("onnx::Conv_101"));
}

#[test]
fn padding_merges_into_the_next_window() {
    let (imp, g) = fixture("pad_merges");
    let merged: Vec<&str> = imp
        .rows
        .iter()
        .filter(|r| r.op == "Pad")
        .map(|r| r.result.as_str())
        .collect();
    assert_eq!(
        merged,
        [
            "padding, merged into `/conv/Conv`",
            "padding, merged into `/MaxPool`",
            "padding, merged into `/AveragePool`"
        ]
    );
    assert_eq!(g.layers().len(), 4);
}

#[test]
fn input_normalisation_folds_into_mean_and_std() {
    let (imp, g) = fixture("input_normalisation");
    assert_eq!(g.layers().len(), 1, "{}", imp.table());
    // (x - m) / s * 0.5 = (x - m) / (2 s), x = pixel / 255 (defaults).
    for (c, (m, s)) in [(0.485f32, 0.229f32), (0.456, 0.224), (0.406, 0.225)]
        .into_iter()
        .enumerate()
    {
        assert!((g.input().mean[c] - m).abs() < 1e-6, "{:?}", g.input().mean);
        assert!(
            (g.input().std[c] - 2.0 * s).abs() < 1e-6,
            "{:?}",
            g.input().std
        );
    }
}

#[test]
fn metadata_gives_labels_and_preprocessing_and_flags_override_it() {
    let (imp, g) = fixture("metadata_labels");
    assert_eq!(g.labels(), ["good", "scratch", "dent"]);
    assert_eq!(g.input().pixel_scale, 0.00390625);
    assert_eq!(g.input().mean, [0.25]);
    assert!(imp.notices.is_empty(), "{:?}", imp.notices);
    let opt = ImportOptions {
        labels: Some(vec!["x".into(), "y".into(), "z".into()]),
        mean: Some(vec![0.0]),
        name: Some("renamed".into()),
        ..ImportOptions::default()
    };
    let imp = onnx::import(&dir().join("metadata_labels.onnx"), &opt).unwrap();
    assert_eq!(imp.file.labels.as_deref().unwrap(), ["x", "y", "z"]);
    assert_eq!(imp.file.input.mean.as_deref().unwrap(), [0.0]);
    assert_eq!(imp.file.weights, "renamed.safetensors");
    // Without metadata: defaults, each with a notice.
    let (imp, g) = fixture("conv_pads_stride");
    assert_eq!(g.labels().len(), g.shape(g.output()).len());
    assert_eq!(imp.notices.len(), 4, "{:?}", imp.notices);
}

#[test]
fn ceil_mode_and_auto_pad_become_explicit_padding() {
    let (_, g) = fixture("maxpool_forms");
    // 13 -> 7 (k3 s2 p1) -> ceil((7 - 2) / 2) + 1 = 4 with ceil_mode.
    assert_eq!(g.shape(g.output()).h, 4);
    let (_, g) = fixture("conv_auto_pad");
    // SAME_UPPER, stride 2 on 11x10: ceil(11/2) x ceil(10/2).
    let s = g.shape(ingot_compiler::MapId(1));
    assert_eq!((s.h, s.w), (6, 5));
}

#[test]
fn typed_fields_half_precision_and_external_data_decode() {
    fixture("tensor_encodings");
    let (imp, _) = fixture("net_external");
    assert!(imp.store.tensors.len() > 10);
}
